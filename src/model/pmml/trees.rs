//! Trees and forests as PMML: a `TreeModel` whose leaves carry their training counts, and a
//! forest as a `MiningModel` of such trees voting (`majorityVote`).

use serde::Deserialize;

use super::*;

pub(super) fn forest_model(
    x: &mut Xml,
    model: &Model,
    schema: &Schema,
    columns: &Columns,
    trees: &[Vec<NodeView>],
) -> Result<(), PmmlError> {
    x.open(
        "MiningModel",
        &[
            ("modelName", model.id.clone()),
            ("functionName", "classification".into()),
            ("algorithmName", "random_forest".into()),
        ],
    );
    mining_schema(x, schema, model, true)?;
    output(x, model, schema, columns);
    // Each tree votes for its leaf's majority class; the probability of 1 is the share of
    // trees voting 1, as the service's forest computes it.
    x.open(
        "Segmentation",
        &[("multipleModelMethod", "majorityVote".into())],
    );
    for (t, nodes) in trees.iter().enumerate() {
        x.open("Segment", &[("id", (t + 1).to_string())]);
        x.empty("True", &[]);
        let mut writer = TreeWriter { x, columns };
        writer.tree_model(
            &format!("{}/tree-{}", model.id, t + 1),
            schema,
            model,
            nodes,
            false,
        )?;
        x.close("Segment");
    }
    x.close("Segmentation");
    x.close("MiningModel");
    Ok(())
}

pub(super) struct TreeWriter<'a> {
    pub(super) x: &'a mut Xml,
    pub(super) columns: &'a Columns,
}

impl TreeWriter<'_> {
    pub(super) fn tree_model(
        &mut self,
        name: &str,
        schema: &Schema,
        model: &Model,
        nodes: &[NodeView],
        top: bool,
    ) -> Result<(), PmmlError> {
        self.x.open(
            "TreeModel",
            &[
                ("modelName", name.to_owned()),
                ("functionName", "classification".into()),
                ("algorithmName", "decision_tree".into()),
                ("splitCharacteristic", "binarySplit".into()),
                ("missingValueStrategy", "none".into()),
                ("noTrueChildStrategy", "returnNullPrediction".into()),
            ],
        );
        mining_schema(self.x, schema, model, top)?;
        if top {
            output(self.x, model, schema, self.columns);
        }
        let mut next_id = 0;
        self.node(nodes, 0, None, &mut next_id)?;
        self.x.close("TreeModel");
        Ok(())
    }

    /// Node `index` and its subtree; `predicate` is (column, `lessOrEqual`/`greaterThan`,
    /// threshold), `None` for the root.
    pub(super) fn node(
        &mut self,
        nodes: &[NodeView],
        index: usize,
        predicate: Option<(usize, &str, f64)>,
        next_id: &mut usize,
    ) -> Result<(), PmmlError> {
        let node = nodes.get(index).ok_or_else(|| {
            PmmlError::Unreadable(format!("a split points at node {index}, which is missing"))
        })?;
        *next_id += 1;
        let mut attributes = vec![("id", next_id.to_string())];
        if let NodeView::Leaf { rows, positives } = node {
            // An even leaf votes negative, as the service's trees do.
            let vote = if 2 * positives > *rows { "1" } else { "0" };
            attributes.push(("score", vote.into()));
            attributes.push(("recordCount", rows.to_string()));
        }
        self.x.open("Node", &attributes);
        match predicate {
            None => self.x.empty("True", &[]),
            Some((column, operator, threshold)) => {
                let field = self.columns.names.get(column).ok_or_else(|| {
                    PmmlError::Unreadable(format!("a split uses column {column}, which is missing"))
                })?;
                self.x.empty(
                    "SimplePredicate",
                    &[
                        ("field", field.clone()),
                        ("operator", operator.into()),
                        ("value", number(threshold, "split threshold")?),
                    ],
                );
            }
        }
        match *node {
            NodeView::Leaf { rows, positives } => {
                // The share is computed here as the service computes it, so the evaluator
                // reads the same double.
                let share = positives as f64 / rows as f64;
                for (value, count, probability) in [
                    ("0", rows - positives, 1.0 - share),
                    ("1", positives, share),
                ] {
                    self.x.empty(
                        "ScoreDistribution",
                        &[
                            ("value", value.into()),
                            ("recordCount", count.to_string()),
                            ("probability", number(probability, "leaf share")?),
                        ],
                    );
                }
            }
            NodeView::Split {
                feature,
                threshold,
                left,
                right,
            } => {
                if left <= index || right <= index {
                    return Err(PmmlError::Unreadable(format!(
                        "node {index} points back to an earlier node"
                    )));
                }
                self.node(
                    nodes,
                    left,
                    Some((feature, "lessOrEqual", threshold)),
                    next_id,
                )?;
                self.node(
                    nodes,
                    right,
                    Some((feature, "greaterThan", threshold)),
                    next_id,
                )?;
            }
        }
        self.x.close("Node");
        Ok(())
    }
}

// The tree families keep their nodes private; their serialized form is the stored model format
// (the store and model files hold it), so the exporter reads trees back through it rather than
// widening those types.

#[derive(Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub(super) enum NodeView {
    Split {
        feature: usize,
        threshold: f64,
        left: usize,
        right: usize,
    },
    Leaf {
        rows: u64,
        positives: u64,
    },
}

#[derive(Deserialize)]
pub(super) struct TreeView {
    pub(super) nodes: Vec<NodeView>,
}

#[derive(Deserialize)]
pub(super) struct ForestView {
    pub(super) trees: Vec<Vec<NodeView>>,
}

pub(super) fn read_back<T: serde::Serialize, V: for<'de> Deserialize<'de>>(
    value: &T,
) -> Result<V, PmmlError> {
    serde_json::to_value(value)
        .and_then(serde_json::from_value)
        .map_err(|e| PmmlError::Unreadable(e.to_string()))
}
