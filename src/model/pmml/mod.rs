//! PMML 4.4 export: a model, with its preprocessing, as an open interchange document.
//!
//! Risk teams are asked for models in a format a second scoring engine can run (independent
//! validation, a fallback engine, a regulator's file). The Data Mining Group's PMML 4.4 is that
//! format; this module writes it, following the DMG PMML 4.4 specification
//! (<https://dmg.org/pmml/v4-4-1/GeneralStructure.html> and the pages beside it).
//!
//! The document reproduces [`Model::predict`] exactly, preprocessing included, so an evaluator
//! gets the service's number for every row the service accepts:
//!
//! - `MiningSchema` carries the config's missing rule for each feature (`asMedian` with the
//!   model's training median, `asValue` with the configured number or category, or
//!   `returnInvalid` where the service refuses a missing value). Values the service refuses
//!   (a number outside its bounds, an undeclared category) are `returnInvalid` too, through the
//!   `DataDictionary`'s `Interval` and `Value` lists.
//! - The `TransformationDictionary` holds one derived field per model column: for a number
//!   `(x - mean) / scale` (an `Apply` of `-` and `/`, the same two IEEE operations the service
//!   does, so the values agree bit for bit), for a category value its indicator (`NormDiscrete`)
//!   standardized the same way.
//! - Linear models are a `RegressionModel` on those columns: `logit` normalization for binary
//!   labels (the probability of `1`), none for numeric ones. A decision tree is a `TreeModel`
//!   whose leaves carry their training counts; a random forest is a `MiningModel` whose
//!   segments vote (`majorityVote`), as the service's forest counts the trees voting positive.
//! - The first output field is the probability of `1` (or the predicted number). One more
//!   output per feature echoes the value the model used: evaluators prepare an input only when
//!   something reads it, and without these a tree that never splits on a feature would score
//!   a row the service refuses for that feature.
//! - kNN and naive Bayes are refused with [`PmmlError::Unsupported`].
//!
//! Pure: it builds a string and does no I/O. The XML is written by hand (a dozen element
//! kinds); every attribute value and text goes through [`crate::text::escape_markup`].

use std::fmt::Write;

use crate::schema::{Feature, Schema};
use crate::schema::{FeatureKind, LabelKind, MissingRule};
use crate::text::escape_markup as escape;

use super::preprocess::FeatureTransform;
use super::{Estimator, Model};

/// The PMML namespace and version written.
pub const PMML_NAMESPACE: &str = "http://www.dmg.org/PMML-4_4";
pub const PMML_VERSION: &str = "4.4";

/// Why a model cannot be exported.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum PmmlError {
    /// The family has no PMML form here.
    #[error("{family} models cannot be exported as PMML: {reason}")]
    Unsupported {
        family: &'static str,
        reason: &'static str,
    },
    /// The model was trained on other features than the config declares, so the config's
    /// missing rules and bounds do not describe it.
    #[error("{0}")]
    Incompatible(String),
    /// A parameter is NaN or infinite and has no PMML number.
    #[error("the model's {what} is not a finite number")]
    NotFinite { what: String },
    /// Two fields of the document would share one name.
    #[error("the field name `{0}` would be used twice in the PMML document; rename the feature")]
    NameClash(String),
    /// The model's stored form could not be read back (a bug, not a user error).
    #[error("the model's estimator could not be read for export: {0}")]
    Unreadable(String),
}

/// The PMML document of `model`, with the missing rules, bounds and categories of `schema`
/// (the config the model is served under).
pub fn to_pmml(model: &Model, schema: &Schema) -> Result<String, PmmlError> {
    match &model.estimator {
        Estimator::Linear { .. } | Estimator::DecisionTree(_) | Estimator::RandomForest(_) => {}
        Estimator::Knn(_) => {
            return Err(PmmlError::Unsupported {
                family: "knn",
                reason: "it scores against every training row, which PMML 4.4's \
                         NearestNeighborModel would have to carry whole; export a linear or \
                         tree model instead",
            })
        }
        Estimator::NaiveBayes(_) => {
            return Err(PmmlError::Unsupported {
                family: "naive_bayes",
                reason: "its Gaussian likelihoods on standardized indicators have no exact \
                         PMML 4.4 form here; export a linear or tree model instead",
            })
        }
        #[allow(unreachable_patterns)] // a family registered later exports only once written here
        other => {
            return Err(PmmlError::Unsupported {
                family: other.family(),
                reason: "PMML export covers linear, tree and forest models",
            })
        }
    }
    model
        .compatible_with(schema)
        .map_err(PmmlError::Incompatible)?;
    let columns = Columns::of(model);
    let label = schema.label();
    let mut names: Vec<&str> = schema.features().iter().map(|f| f.name.as_str()).collect();
    names.push(label);
    names.extend(columns.names.iter().map(String::as_str));
    names.push(&columns.output);
    let checked: Vec<String> = schema
        .features()
        .iter()
        .map(|f| checked_name(&f.name))
        .collect();
    names.extend(checked.iter().map(String::as_str));
    let mut seen = std::collections::HashSet::new();
    if let Some(clash) = names.iter().find(|n| !seen.insert(**n)) {
        return Err(PmmlError::NameClash((*clash).to_owned()));
    }

    let mut x = Xml::default();
    x.raw("<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n");
    x.open(
        "PMML",
        &[
            ("xmlns", PMML_NAMESPACE.into()),
            ("version", PMML_VERSION.into()),
        ],
    );
    header(&mut x, model);
    data_dictionary(&mut x, schema, model.target)?;
    transformations(&mut x, model, &columns)?;
    match &model.estimator {
        Estimator::Linear { weights, intercept } => {
            regression_model(&mut x, model, schema, &columns, weights, *intercept)?
        }
        Estimator::DecisionTree(tree) => {
            let view: TreeView = read_back(tree)?;
            let name = model.id.clone();
            let mut tree_x = TreeWriter {
                x: &mut x,
                columns: &columns,
            };
            tree_x.tree_model(&name, schema, model, &view.nodes, true)?;
        }
        Estimator::RandomForest(forest) => {
            let view: ForestView = read_back(forest)?;
            forest_model(&mut x, model, schema, &columns, &view.trees)?;
        }
        _ => unreachable!("refused above"),
    }
    x.close("PMML");
    Ok(x.out)
}

/// Names of the model's columns as derived fields, in the estimator's column order, and the
/// output field's name.
struct Columns {
    names: Vec<String>,
    output: String,
}

impl Columns {
    fn of(model: &Model) -> Columns {
        let mut names = Vec::with_capacity(model.preprocessor.width());
        for transform in &model.preprocessor.features {
            match transform {
                FeatureTransform::Number { name, .. } => {
                    names.push(format!("standardized({name})"))
                }
                FeatureTransform::Category {
                    name, categories, ..
                } => names.extend(
                    categories
                        .iter()
                        .map(|c| format!("standardized({name}={c})")),
                ),
            }
        }
        let output = match model.target {
            LabelKind::Binary => "probability(1)".to_owned(),
            LabelKind::Number => "predicted".to_owned(),
        };
        Columns { names, output }
    }
}

fn header(x: &mut Xml, model: &Model) {
    let description = format!(
        "understudy model {}: {}; trained on {} rows up to {}",
        model.id,
        model.setting,
        model.trained.rows,
        crate::time::to_rfc3339(model.trained.cutoff)
    );
    x.open("Header", &[("description", description)]);
    x.empty(
        "Application",
        &[
            ("name", "understudy".into()),
            ("version", env!("CARGO_PKG_VERSION").into()),
        ],
    );
    x.element("Timestamp", &[], &crate::time::to_rfc3339(model.created_at));
    x.close("Header");
}

fn data_dictionary(x: &mut Xml, schema: &Schema, target: LabelKind) -> Result<(), PmmlError> {
    x.open(
        "DataDictionary",
        &[("numberOfFields", (schema.features().len() + 1).to_string())],
    );
    for feature in schema.features() {
        match feature.kind {
            FeatureKind::Number => {
                x.open(
                    "DataField",
                    &[
                        ("name", feature.name.clone()),
                        ("optype", "continuous".into()),
                        ("dataType", "double".into()),
                    ],
                );
                let bound = |v: Option<f64>, what: &str| {
                    v.map(|v| number(v, &format!("`{}` {what}", feature.name)))
                        .transpose()
                };
                let (min, max) = (bound(feature.min, "min")?, bound(feature.max, "max")?);
                let interval = match (min, max) {
                    (Some(l), Some(r)) => Some(vec![
                        ("closure", "closedClosed".into()),
                        ("leftMargin", l),
                        ("rightMargin", r),
                    ]),
                    (Some(l), None) => Some(vec![
                        ("closure", "closedInfinity".into()),
                        ("leftMargin", l),
                    ]),
                    (None, Some(r)) => Some(vec![
                        ("closure", "infinityClosed".into()),
                        ("rightMargin", r),
                    ]),
                    (None, None) => None,
                };
                if let Some(attributes) = interval {
                    x.empty("Interval", &attributes);
                }
                x.close("DataField");
            }
            FeatureKind::Category => {
                x.open(
                    "DataField",
                    &[
                        ("name", feature.name.clone()),
                        ("optype", "categorical".into()),
                        ("dataType", "string".into()),
                    ],
                );
                for category in &feature.categories {
                    x.empty("Value", &[("value", category.clone())]);
                }
                x.close("DataField");
            }
        }
    }
    match target {
        LabelKind::Binary => {
            x.open(
                "DataField",
                &[
                    ("name", schema.label().to_owned()),
                    ("optype", "categorical".into()),
                    ("dataType", "integer".into()),
                ],
            );
            x.empty("Value", &[("value", "0".into())]);
            x.empty("Value", &[("value", "1".into())]);
            x.close("DataField");
        }
        LabelKind::Number => {
            x.empty(
                "DataField",
                &[
                    ("name", schema.label().to_owned()),
                    ("optype", "continuous".into()),
                    ("dataType", "double".into()),
                ],
            );
        }
    }
    x.close("DataDictionary");
    Ok(())
}

/// One derived field per column: `(value - mean) / scale`, the value a number or an indicator.
fn transformations(x: &mut Xml, model: &Model, columns: &Columns) -> Result<(), PmmlError> {
    x.open("TransformationDictionary", &[]);
    let mut names = columns.names.iter();
    for transform in &model.preprocessor.features {
        match transform {
            FeatureTransform::Number {
                name, mean, scale, ..
            } => standardized(x, &names.next(), Source::Number(name), *mean, *scale)?,
            FeatureTransform::Category {
                name,
                categories,
                means,
                scales,
            } => {
                for (k, category) in categories.iter().enumerate() {
                    let source = Source::Indicator(name, category);
                    standardized(x, &names.next(), source, means[k], scales[k])?;
                }
            }
        }
    }
    x.close("TransformationDictionary");
    Ok(())
}

/// What a column standardizes: a number feature, or one category's indicator.
enum Source<'a> {
    Number(&'a str),
    Indicator(&'a str, &'a str),
}

fn standardized(
    x: &mut Xml,
    name: &Option<&String>,
    source: Source<'_>,
    mean: f64,
    scale: f64,
) -> Result<(), PmmlError> {
    let what = match source {
        Source::Number(feature) => format!("`{feature}`"),
        Source::Indicator(feature, category) => format!("`{feature}={category}`"),
    };
    let name = name.ok_or_else(|| PmmlError::Unreadable(format!("no column for {what}")))?;
    let mean = number(mean, &format!("mean of {what}"))?;
    let scale = number(scale, &format!("scale of {what}"))?;
    x.open(
        "DerivedField",
        &[
            ("name", name.clone()),
            ("optype", "continuous".into()),
            ("dataType", "double".into()),
        ],
    );
    x.open("Apply", &[("function", "/".into())]);
    x.open("Apply", &[("function", "-".into())]);
    match source {
        Source::Number(feature) => x.empty("FieldRef", &[("field", feature.to_owned())]),
        Source::Indicator(feature, category) => x.empty(
            "NormDiscrete",
            &[
                ("field", feature.to_owned()),
                ("value", category.to_owned()),
            ],
        ),
    }
    x.element("Constant", &[("dataType", "double".into())], &mean);
    x.close("Apply");
    x.element("Constant", &[("dataType", "double".into())], &scale);
    x.close("Apply");
    x.close("DerivedField");
    Ok(())
}

/// The `MiningSchema`: every feature active with the config's missing rule, the label the
/// target. `treatments` is false inside a forest's segments (the outer schema already replaced
/// missing values).
fn mining_schema(
    x: &mut Xml,
    schema: &Schema,
    model: &Model,
    treatments: bool,
) -> Result<(), PmmlError> {
    x.open("MiningSchema", &[]);
    for (feature, transform) in schema.features().iter().zip(&model.preprocessor.features) {
        let mut attributes = vec![
            ("name", feature.name.clone()),
            ("usageType", "active".into()),
        ];
        if treatments {
            attributes.extend(missing_treatment(feature, transform)?);
            attributes.push(("invalidValueTreatment", "returnInvalid".into()));
        }
        x.empty("MiningField", &attributes);
    }
    x.empty(
        "MiningField",
        &[
            ("name", schema.label().to_owned()),
            ("usageType", "target".into()),
        ],
    );
    x.close("MiningSchema");
    Ok(())
}

/// What the service does when `feature` is missing, as `MiningField` attributes.
fn missing_treatment(
    feature: &Feature,
    transform: &FeatureTransform,
) -> Result<Vec<(&'static str, String)>, PmmlError> {
    Ok(match (&feature.missing, transform) {
        (MissingRule::Reject, _) => vec![("missingValueTreatment", "returnInvalid".into())],
        (MissingRule::Median, FeatureTransform::Number { median, .. }) => vec![
            (
                "missingValueReplacement",
                number(*median, &format!("median of `{}`", feature.name))?,
            ),
            ("missingValueTreatment", "asMedian".into()),
        ],
        (MissingRule::Number(v), _) => vec![
            (
                "missingValueReplacement",
                number(*v, &format!("missing value of `{}`", feature.name))?,
            ),
            ("missingValueTreatment", "asValue".into()),
        ],
        (MissingRule::Category(c), _) => vec![
            ("missingValueReplacement", c.clone()),
            ("missingValueTreatment", "asValue".into()),
        ],
        // The config refuses "median" for a category; were it allowed, the service would set
        // every indicator to 0, which no replacement value expresses.
        (MissingRule::Median, FeatureTransform::Category { .. }) => {
            return Err(PmmlError::Incompatible(format!(
                "`{}` is a category with missing = \"median\", which has no PMML form",
                feature.name
            )))
        }
    })
}

fn output(x: &mut Xml, model: &Model, schema: &Schema, columns: &Columns) {
    x.open("Output", &[]);
    match model.target {
        LabelKind::Binary => x.empty(
            "OutputField",
            &[
                ("name", columns.output.clone()),
                ("optype", "continuous".into()),
                ("dataType", "double".into()),
                ("feature", "probability".into()),
                ("value", "1".into()),
            ],
        ),
        LabelKind::Number => x.empty(
            "OutputField",
            &[
                ("name", columns.output.clone()),
                ("optype", "continuous".into()),
                ("dataType", "double".into()),
                ("feature", "predictedValue".into()),
            ],
        ),
    }
    // One output per feature, its value as the model used it (after missing-value
    // replacement). Evaluators prepare an input only when something reads it, so a tree that
    // never splits on a feature would otherwise score a row the service refuses for that
    // feature (an undeclared category, a required value missing); reading each one here makes
    // the evaluator refuse exactly the rows the service refuses.
    for feature in schema.features() {
        let (optype, data_type) = match feature.kind {
            FeatureKind::Number => ("continuous", "double"),
            FeatureKind::Category => ("categorical", "string"),
        };
        x.open(
            "OutputField",
            &[
                ("name", checked_name(&feature.name)),
                ("optype", optype.into()),
                ("dataType", data_type.into()),
                ("feature", "transformedValue".into()),
            ],
        );
        x.empty("FieldRef", &[("field", feature.name.clone())]);
        x.close("OutputField");
    }
    x.close("Output");
}

/// The output field that echoes a feature as the model used it.
fn checked_name(feature: &str) -> String {
    format!("used({feature})")
}

fn regression_model(
    x: &mut Xml,
    model: &Model,
    schema: &Schema,
    columns: &Columns,
    weights: &[f64],
    intercept: f64,
) -> Result<(), PmmlError> {
    let (function, normalization) = match model.target {
        LabelKind::Binary => ("classification", "logit"),
        LabelKind::Number => ("regression", "none"),
    };
    x.open(
        "RegressionModel",
        &[
            ("modelName", model.id.clone()),
            ("functionName", function.into()),
            ("algorithmName", model.setting.family().into()),
            ("normalizationMethod", normalization.into()),
        ],
    );
    mining_schema(x, schema, model, true)?;
    output(x, model, schema, columns);
    let mut table = vec![("intercept", number(intercept, "intercept")?)];
    if model.target == LabelKind::Binary {
        table.push(("targetCategory", "1".into()));
    }
    x.open("RegressionTable", &table);
    for (c, (name, weight)) in columns.names.iter().zip(weights).enumerate() {
        // A coefficient the penalty set to zero adds nothing; it is left out.
        if *weight != 0.0 {
            x.empty(
                "NumericPredictor",
                &[
                    ("name", name.clone()),
                    ("coefficient", number(*weight, &format!("coefficient {c}"))?),
                ],
            );
        }
    }
    x.close("RegressionTable");
    if model.target == LabelKind::Binary {
        // With two categories and `logit`, the first table's value y gives P(1) = 1/(1+e^-y)
        // and the last category takes the rest (DMG PMML 4.4, Regression, "normalizationMethod").
        x.empty(
            "RegressionTable",
            &[("intercept", "0".into()), ("targetCategory", "0".into())],
        );
    }
    x.close("RegressionModel");
    Ok(())
}

/// A finite double as PMML text: the shortest decimal that reads back as the same double
/// (Rust's float formatting; an exponent for very large or small magnitudes), so an evaluator
/// parses exactly the service's value.
fn number(value: f64, what: &str) -> Result<String, PmmlError> {
    if value.is_finite() {
        Ok(format!("{value:?}"))
    } else {
        Err(PmmlError::NotFinite {
            what: what.to_owned(),
        })
    }
}

/// A small indenting XML writer.
#[derive(Default)]
struct Xml {
    out: String,
    depth: usize,
}

impl Xml {
    fn raw(&mut self, text: &str) {
        self.out.push_str(text);
    }

    fn indent(&mut self) {
        for _ in 0..self.depth {
            self.out.push_str("  ");
        }
    }

    fn start(&mut self, tag: &str, attributes: &[(&str, String)]) {
        self.indent();
        let _ = write!(self.out, "<{tag}");
        for (name, value) in attributes {
            let _ = write!(self.out, " {name}=\"{}\"", escape(value));
        }
    }

    fn open(&mut self, tag: &str, attributes: &[(&str, String)]) {
        self.start(tag, attributes);
        self.out.push_str(">\n");
        self.depth += 1;
    }

    fn empty(&mut self, tag: &str, attributes: &[(&str, String)]) {
        self.start(tag, attributes);
        self.out.push_str("/>\n");
    }

    /// An element holding only text, on one line.
    fn element(&mut self, tag: &str, attributes: &[(&str, String)], text: &str) {
        self.start(tag, attributes);
        let _ = writeln!(self.out, ">{}</{tag}>", escape(text));
    }

    fn close(&mut self, tag: &str) {
        self.depth -= 1;
        self.indent();
        let _ = writeln!(self.out, "</{tag}>");
    }
}

mod trees;

use trees::{forest_model, read_back, ForestView, TreeView, TreeWriter};

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use crate::model::family::KnnParams;
    use crate::model::Penalty;
    use crate::model::{Preprocessor, Setting, TrainingFacts};
    use crate::schema::Row;
    use serde_json::json;

    fn rows(schema: &Schema) -> Vec<Row> {
        (0..30)
            .map(|i| {
                let sector = ["retail", "construction", "logistics"][i % 3];
                let f = json!({
                    "invoice_amount": 1000.0 * i as f64, "days_to_due": 30 + i,
                    "debtor_years_trading": if i % 5 == 0 { json!(null) } else { json!(i) },
                    "prior_late_invoices": i % 3, "credit_utilisation": 0.1 * (i % 7) as f64,
                    "debtor_sector": sector,
                    "submission_channel": "portal"
                });
                schema.parse_row(f.as_object().unwrap()).unwrap()
            })
            .collect()
    }

    fn model(
        target: LabelKind,
        estimator: impl FnOnce(&[f64], usize) -> (Setting, Estimator),
    ) -> (Schema, Model) {
        let schema = Config::embedded_default().schema();
        let rows = rows(&schema);
        let refs: Vec<&Row> = rows.iter().collect();
        let pre = Preprocessor::fit(&schema, &refs);
        let p = pre.width();
        let x = pre.transform_all(&refs);
        let (setting, estimator) = estimator(&x, p);
        let trained = TrainingFacts {
            run_id: "r-1".into(),
            rows: 30,
            positives: 10,
            from: 0,
            cutoff: 10,
        };
        let model = Model::new(1, 0, setting, target, pre, estimator, trained);
        (schema, model)
    }

    fn linear(target: LabelKind, weight: f64) -> (Schema, Model) {
        model(target, |_, p| {
            let setting = Setting::Logistic {
                penalty: Penalty::L2,
                l1_ratio: 0.0,
                lambda: 0.01,
            };
            let weights = (0..p)
                .map(|c| if c == 2 { 0.0 } else { weight * c as f64 })
                .collect();
            (
                setting,
                Estimator::Linear {
                    weights,
                    intercept: -0.5,
                },
            )
        })
    }

    fn labels() -> Vec<u8> {
        (0..30).map(|i| u8::from(i % 3 == 0)).collect()
    }

    #[test]
    fn each_missing_rule_of_the_config_becomes_the_mining_fields_treatment() {
        let (schema, model) = linear(LabelKind::Binary, 0.1);
        let doc = to_pmml(&model, &schema).unwrap();
        let median = match &model.preprocessor.features[2] {
            FeatureTransform::Number { median, .. } => *median,
            FeatureTransform::Category { .. } => panic!("a number"),
        };
        for expected in [
            // missing = "reject" (the default)
            r#"<MiningField name="invoice_amount" usageType="active" missingValueTreatment="returnInvalid" invalidValueTreatment="returnInvalid"/>"#.to_owned(),
            // missing = "median": the model's training median
            format!(r#"<MiningField name="debtor_years_trading" usageType="active" missingValueReplacement="{median:?}" missingValueTreatment="asMedian" invalidValueTreatment="returnInvalid"/>"#),
            // missing = 0 and missing = "portal": the constant
            r#"<MiningField name="prior_late_invoices" usageType="active" missingValueReplacement="0.0" missingValueTreatment="asValue" invalidValueTreatment="returnInvalid"/>"#.into(),
            r#"<MiningField name="submission_channel" usageType="active" missingValueReplacement="portal" missingValueTreatment="asValue" invalidValueTreatment="returnInvalid"/>"#.into(),
            r#"<MiningField name="paid_late" usageType="target"/>"#.into(),
            // bounds and categories: what the service refuses is invalid
            r#"<Interval closure="closedClosed" leftMargin="0.0" rightMargin="365.0"/>"#.into(),
            r#"<Value value="hospitality"/>"#.into(),
            r#"<NormDiscrete field="debtor_sector" value="logistics"/>"#.into(),
            r#"<RegressionTable intercept="0" targetCategory="0"/>"#.into(),
        ] {
            assert!(doc.contains(&expected), "{expected} not in\n{doc}");
        }
        assert!(median > 0.0);
        // The coefficient the penalty zeroed is left out; the others are all there.
        assert_eq!(
            doc.matches("<NumericPredictor ").count(),
            model.preprocessor.width() - 2
        );
    }

    #[test]
    fn a_numeric_label_is_a_regression_with_no_link() {
        let (schema, model) = linear(LabelKind::Number, 2.0);
        let doc = to_pmml(&model, &schema).unwrap();
        assert!(doc.contains(r#"functionName="regression""#));
        assert!(doc.contains(r#"normalizationMethod="none""#));
        assert!(doc.contains(r#"feature="predictedValue""#));
        assert!(!doc.contains("targetCategory"));
        assert!(
            doc.contains(r#"<DataField name="paid_late" optype="continuous" dataType="double"/>"#)
        );
    }

    #[test]
    fn knn_and_naive_bayes_are_refused_with_the_reason() {
        let y = labels();
        let (schema, knn) = model(LabelKind::Binary, |x, p| {
            let setting = Setting::Knn(KnnParams { k: 3 });
            (setting, Estimator::fit_family(&setting, x, p, &y).unwrap())
        });
        let err = to_pmml(&knn, &schema).unwrap_err();
        assert!(
            matches!(err, PmmlError::Unsupported { family: "knn", .. }),
            "{err}"
        );
        let (schema, bayes) = model(LabelKind::Binary, |x, p| {
            let setting = Setting::NaiveBayes(crate::model::family::NaiveBayesParams {});
            (setting, Estimator::fit_family(&setting, x, p, &y).unwrap())
        });
        let err = to_pmml(&bayes, &schema).unwrap_err();
        assert!(
            err.to_string()
                .starts_with("naive_bayes models cannot be exported"),
            "{err}"
        );
    }

    #[test]
    fn a_tree_is_written_node_for_node_with_its_leaf_counts() {
        let y = labels();
        let (schema, tree) = model(LabelKind::Binary, |x, p| {
            let setting = Setting::DecisionTree(crate::model::family::TreeParams {
                max_depth: 3,
                min_leaf: 2,
            });
            (setting, Estimator::fit_family(&setting, x, p, &y).unwrap())
        });
        let doc = to_pmml(&tree, &schema).unwrap();
        let leaves = doc.matches("<ScoreDistribution value=\"1\"").count();
        let splits_left = doc.matches("operator=\"lessOrEqual\"").count();
        let splits_right = doc.matches("operator=\"greaterThan\"").count();
        // A binary tree: one more leaf than splits, each split with both branches.
        assert_eq!(splits_left, splits_right);
        assert_eq!(leaves, splits_left + 1, "{doc}");
        assert!(leaves > 1, "the tree should split on this data");
        // The leaves' training counts add up to the rows.
        let counts: u64 = doc
            .lines()
            .filter(|l| l.trim_start().starts_with("<Node ") && l.contains("recordCount"))
            .map(|l| {
                let count = l.split("recordCount=\"").nth(1).unwrap();
                count[..count.find('"').unwrap()].parse::<u64>().unwrap()
            })
            .sum();
        assert_eq!(counts, 30);
    }

    #[test]
    fn a_model_for_other_features_or_with_a_non_finite_weight_is_refused() {
        let (_, model) = linear(LabelKind::Binary, 0.1);
        let mut config = Config::embedded_default();
        config.features[5].categories.push("mining".into());
        let err = to_pmml(&model, &config.schema()).unwrap_err();
        assert!(matches!(err, PmmlError::Incompatible(_)), "{err}");

        let (schema, mut model) = linear(LabelKind::Binary, 0.1);
        if let Estimator::Linear { weights, .. } = &mut model.estimator {
            weights[1] = f64::NAN;
        }
        let err = to_pmml(&model, &schema).unwrap_err();
        assert_eq!(
            err.to_string(),
            "the model's coefficient 1 is not a finite number"
        );
    }

    #[test]
    fn text_is_escaped_and_numbers_read_back_exactly() {
        assert_eq!(
            escape("food & drink <ltd> \"quoted\" 'x'\n"),
            "food &amp; drink &lt;ltd&gt; &quot;quoted&quot; &apos;x&apos;&#10;"
        );
        for v in [
            0.1,
            -1.0 / 3.0,
            1e-300,
            6.02e23,
            5e-324,
            f64::MAX,
            0.0,
            -0.0,
            12345.678,
        ] {
            let text = number(v, "v").unwrap();
            assert_eq!(
                text.parse::<f64>().unwrap().to_bits(),
                v.to_bits(),
                "{text}"
            );
        }
        assert!(number(f64::INFINITY, "v").is_err());
    }
}
