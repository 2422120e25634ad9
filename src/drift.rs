//! Population stability: how far recent score requests have moved from the data the active
//! model was trained on, per feature and for the score itself.
//!
//! A model carries a [`Reference`] fitted on its own training rows: numeric features binned at
//! the deciles of their training values (plus a bin for values left to the model to impute),
//! categories as their own bins plus an "unseen" bin, and the model's output binned at its own
//! training deciles. Recent requests are binned the same way and compared with the Population
//! Stability Index, `PSI = Σ (actual − expected) · ln(actual / expected)` over the bins.
//!
//! Pure: no I/O. The caller reads the recent score records from the store.

use serde::{Deserialize, Serialize};

use crate::schema::FeatureKind;
use crate::schema::{Row, Schema, Value};

/// A bin share below this is raised to it before the logarithm, so an empty bin adds a large
/// but finite term instead of an infinite one (common practice, no source; the value is ours).
pub const PSI_EPSILON: f64 = 1e-4;

/// Deciles: nine interior cut points (common practice, no source).
const QUANTILE_BINS: usize = 10;

/// How one feature (or the score) is binned, with the training shares of each bin.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Bins {
    /// `edges` are increasing cut points; bin k holds values in `(edges[k-1], edges[k]]`, the
    /// last bin everything above; a final extra bin holds values left missing.
    Number { edges: Vec<f64>, expected: Vec<f64> },
    /// One bin per declared category, then one for a category the model never saw.
    Category {
        categories: Vec<String>,
        expected: Vec<f64>,
    },
}

/// The training distribution a model is judged against.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Reference {
    /// Training rows the shares come from.
    pub rows: usize,
    /// One per schema feature, in schema order: (name, bins).
    pub features: Vec<(String, Bins)>,
    /// The model's own output on its training rows.
    pub score: Bins,
}

/// Where a PSI value falls.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Band {
    /// Below the watch threshold.
    Stable,
    /// At or above the watch threshold, below the act threshold.
    Watch,
    /// At or above the act threshold.
    Act,
}

/// One bin of a comparison.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BinShare {
    pub bin: String,
    pub expected: f64,
    pub actual: f64,
}

/// One feature's (or the score's) drift.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Drift {
    pub name: String,
    pub psi: f64,
    pub band: Band,
    pub bins: Vec<BinShare>,
}

/// Thresholds for the bands.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Thresholds {
    pub watch: f64,
    pub act: f64,
}

impl Thresholds {
    pub fn band(&self, psi: f64) -> Band {
        if psi >= self.act {
            Band::Act
        } else if psi >= self.watch {
            Band::Watch
        } else {
            Band::Stable
        }
    }
}

/// The Population Stability Index of `actual` against `expected` shares (same bins), with
/// each share floored at [`PSI_EPSILON`].
pub fn psi(expected: &[f64], actual: &[f64]) -> f64 {
    expected
        .iter()
        .zip(actual)
        .map(|(&e, &a)| {
            let (e, a) = (e.max(PSI_EPSILON), a.max(PSI_EPSILON));
            (a - e) * (a / e).ln()
        })
        .sum()
}

/// Interior cut points at the deciles of `values` (sorted copy), without repeats.
fn quantile_edges(values: &[f64]) -> Vec<f64> {
    let mut sorted: Vec<f64> = values.iter().copied().filter(|v| v.is_finite()).collect();
    sorted.sort_by(f64::total_cmp);
    if sorted.is_empty() {
        return vec![];
    }
    let mut edges: Vec<f64> = (1..QUANTILE_BINS)
        .map(|k| sorted[(k * sorted.len() / QUANTILE_BINS).min(sorted.len() - 1)])
        .collect();
    edges.dedup();
    // The top edge equal to the maximum would leave the last bin empty by construction.
    if edges.last() == sorted.last() {
        edges.pop();
    }
    edges
}

/// Index of the bin of `value` among `edges` (bins `(.., e0], (e0, e1], ..., (e_last, ..)`).
fn bin_of(edges: &[f64], value: f64) -> usize {
    edges.partition_point(|&e| e < value)
}

fn shares(counts: &[usize]) -> Vec<f64> {
    let total: usize = counts.iter().sum();
    counts
        .iter()
        .map(|&c| {
            if total == 0 {
                0.0
            } else {
                c as f64 / total as f64
            }
        })
        .collect()
}

impl Bins {
    fn numeric(values: &[Option<f64>]) -> Bins {
        let present: Vec<f64> = values.iter().flatten().copied().collect();
        let edges = quantile_edges(&present);
        let counts = Bins::count_numbers(&edges, values);
        Bins::Number {
            expected: shares(&counts),
            edges,
        }
    }

    /// Counts per bin: `edges.len() + 1` value bins, then the missing bin.
    fn count_numbers(edges: &[f64], values: &[Option<f64>]) -> Vec<usize> {
        let mut counts = vec![0; edges.len() + 2];
        for value in values {
            match value {
                Some(v) => counts[bin_of(edges, *v)] += 1,
                None => counts[edges.len() + 1] += 1,
            }
        }
        counts
    }

    fn count_categories(width: usize, values: &[Option<u32>]) -> Vec<usize> {
        // One bin per category, then "unseen" (an index beyond the list or a missing value).
        let mut counts = vec![0; width + 1];
        for value in values {
            match value {
                Some(c) if (*c as usize) < width => counts[*c as usize] += 1,
                _ => counts[width] += 1,
            }
        }
        counts
    }

    fn labels(&self) -> Vec<String> {
        match self {
            Bins::Number { edges, .. } => {
                let mut labels = Vec::with_capacity(edges.len() + 2);
                for k in 0..=edges.len() {
                    labels.push(match (k.checked_sub(1).map(|i| edges[i]), edges.get(k)) {
                        (None, Some(hi)) => format!("<= {hi}"),
                        (Some(lo), Some(hi)) => format!("({lo}, {hi}]"),
                        (Some(lo), None) => format!("> {lo}"),
                        (None, None) => "all".to_owned(),
                    });
                }
                labels.push("missing".to_owned());
                labels
            }
            Bins::Category { categories, .. } => categories
                .iter()
                .cloned()
                .chain(std::iter::once("unseen".to_owned()))
                .collect(),
        }
    }

    fn expected(&self) -> &[f64] {
        match self {
            Bins::Number { expected, .. } | Bins::Category { expected, .. } => expected,
        }
    }

    /// Compares actual counts with the expected shares.
    fn compare(&self, name: &str, counts: &[usize], thresholds: Thresholds) -> Drift {
        let actual = shares(counts);
        let value = psi(self.expected(), &actual);
        Drift {
            name: name.to_owned(),
            psi: value,
            band: thresholds.band(value),
            bins: self
                .labels()
                .into_iter()
                .zip(self.expected())
                .zip(&actual)
                .map(|((bin, &expected), &actual)| BinShare {
                    bin,
                    expected,
                    actual,
                })
                .collect(),
        }
    }
}

fn numbers(rows: &[&Row], j: usize) -> Vec<Option<f64>> {
    rows.iter()
        .map(|r| match r.get(j).unwrap_or(Value::Missing) {
            Value::Number(v) => Some(v),
            _ => None,
        })
        .collect()
}

fn categories(rows: &[&Row], j: usize) -> Vec<Option<u32>> {
    rows.iter()
        .map(|r| match r.get(j).unwrap_or(Value::Missing) {
            Value::Category(c) => Some(c),
            _ => None,
        })
        .collect()
}

impl Reference {
    /// Fits the reference on a model's training rows and its outputs on them.
    pub fn fit(schema: &Schema, rows: &[&Row], outputs: &[f64]) -> Reference {
        let features = schema
            .features()
            .iter()
            .enumerate()
            .map(|(j, feature)| {
                let bins = match feature.kind {
                    FeatureKind::Number => Bins::numeric(&numbers(rows, j)),
                    FeatureKind::Category => {
                        let counts =
                            Bins::count_categories(feature.categories.len(), &categories(rows, j));
                        Bins::Category {
                            categories: feature.categories.clone(),
                            expected: shares(&counts),
                        }
                    }
                };
                (feature.name.clone(), bins)
            })
            .collect();
        let score: Vec<Option<f64>> = outputs.iter().map(|&o| Some(o)).collect();
        Reference {
            rows: rows.len(),
            features,
            score: Bins::numeric(&score),
        }
    }

    /// The drift of each feature of `rows` (recent requests, in schema order).
    pub fn feature_drift(&self, rows: &[&Row], thresholds: Thresholds) -> Vec<Drift> {
        self.features
            .iter()
            .enumerate()
            .map(|(j, (name, bins))| {
                let counts = match bins {
                    Bins::Number { edges, .. } => Bins::count_numbers(edges, &numbers(rows, j)),
                    Bins::Category {
                        categories: list, ..
                    } => Bins::count_categories(list.len(), &categories(rows, j)),
                };
                bins.compare(name, &counts, thresholds)
            })
            .collect()
    }

    /// The drift of the model's outputs on recent requests.
    pub fn score_drift(&self, outputs: &[f64], thresholds: Thresholds) -> Drift {
        let counts = match &self.score {
            Bins::Number { edges, .. } => {
                let values: Vec<Option<f64>> = outputs.iter().map(|&o| Some(o)).collect();
                Bins::count_numbers(edges, &values)
            }
            Bins::Category { categories, .. } => vec![0; categories.len() + 1],
        };
        self.score.compare("score", &counts, thresholds)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use crate::demo::scenario::{invoice, Regime};
    use rand::SeedableRng;

    #[test]
    fn psi_matches_a_hand_worked_two_bin_example() {
        // (0.25 − 0.5)·ln(0.25/0.5) + (0.75 − 0.5)·ln(0.75/0.5)
        //   = 0.25·ln 2 + 0.25·ln 1.5 = 0.173287 + 0.101366 = 0.274653 (worked by hand).
        let value = psi(&[0.5, 0.5], &[0.25, 0.75]);
        assert!((value - 0.274_653_072).abs() < 1e-8, "{value}");
        assert_eq!(psi(&[0.2, 0.3, 0.5], &[0.2, 0.3, 0.5]), 0.0);
        // An empty bin is floored, not infinite.
        assert!(psi(&[0.5, 0.5], &[1.0, 0.0]).is_finite());
    }

    #[test]
    fn psi_matches_the_reference_computation() {
        // Reference: tests/reference/psi_reference.py (numpy 2.4.6), the same formula and
        // epsilon floor on published-style decile counts; fixture tests/fixtures/psi.json.
        #[derive(serde::Deserialize)]
        struct Case {
            expected: Vec<f64>,
            actual: Vec<f64>,
            psi: f64,
        }
        let cases: Vec<Case> =
            serde_json::from_str(include_str!("../tests/fixtures/psi.json")).unwrap();
        for case in cases {
            let ours = psi(&case.expected, &case.actual);
            assert!((ours - case.psi).abs() < 1e-12, "{ours} vs {}", case.psi);
        }
    }

    #[test]
    fn deciles_split_training_values_into_ten_near_equal_bins() {
        let values: Vec<Option<f64>> = (0..1000).map(|i| Some(i as f64)).collect();
        let Bins::Number { edges, expected } = Bins::numeric(&values) else {
            unreachable!()
        };
        assert_eq!(edges.len(), 9);
        assert_eq!(expected.len(), 11, "ten value bins and the missing bin");
        for share in &expected[..10] {
            assert!((share - 0.1).abs() < 0.002, "{share}");
        }
        assert_eq!(expected[10], 0.0);
    }

    #[test]
    fn a_shifted_feature_crosses_act_while_an_unchanged_one_stays_stable() {
        let config = Config::embedded_default();
        let schema = config.schema();
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let training: Vec<Row> = (0..5000)
            .map(|_| {
                schema
                    .parse_row(&invoice(&mut rng, Regime::Before).features)
                    .unwrap()
            })
            .collect();
        let training_refs: Vec<&Row> = training.iter().collect();
        let outputs: Vec<f64> = (0..5000).map(|i| (i % 100) as f64 / 100.0).collect();
        let reference = Reference::fit(&schema, &training_refs, &outputs);

        // Recent requests: the same world, except credit utilisation up by 0.3.
        let recent: Vec<Row> = (0..3000)
            .map(|_| {
                let mut features = invoice(&mut rng, Regime::Before).features;
                let u = features["credit_utilisation"].as_f64().unwrap();
                features.insert("credit_utilisation".into(), serde_json::json!(u + 0.3));
                schema.parse_row(&features).unwrap()
            })
            .collect();
        let recent_refs: Vec<&Row> = recent.iter().collect();
        let recent_outputs: Vec<f64> = (0..3000).map(|i| (i % 100) as f64 / 100.0).collect();
        let thresholds = Thresholds {
            watch: 0.1,
            act: 0.25,
        };
        let features = reference.feature_drift(&recent_refs, thresholds);
        let score = reference.score_drift(&recent_outputs, thresholds);
        let by_name = |name: &str| features.iter().find(|d| d.name == name).unwrap();
        let shifted = by_name("credit_utilisation");
        assert!(shifted.psi > 0.25, "shifted PSI {}", shifted.psi);
        assert_eq!(shifted.band, Band::Act);
        for unchanged in ["invoice_amount", "days_to_due", "debtor_sector"] {
            let d = by_name(unchanged);
            assert!(d.psi < 0.1, "{unchanged} PSI {}", d.psi);
            assert_eq!(d.band, Band::Stable);
        }
        assert!(score.psi < 0.01, "same outputs: {}", score.psi);
        let shares: f64 = shifted.bins.iter().map(|b| b.actual).sum();
        assert!((shares - 1.0).abs() < 1e-9);
    }
}
