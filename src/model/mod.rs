//! The model artifact: preprocessing + estimator + metadata, immutable once built.
//!
//! Pure: no I/O, no HTTP, no storage. A model scores a validated [`Row`] into a probability (or
//! a number) and per-feature contributions: to the log-odds (or the value) for linear models, to
//! the probability for trees and forests (path contributions, see `family::tree` and
//! `family::forest`), none for kNN and naive Bayes. It serializes whole so the store can keep it
//! and the registry can restore it.

pub mod elastic_net;
pub mod families;
pub mod family;
pub mod logistic;
pub mod penalized;
pub mod pmml;
pub mod preprocess;

use serde::{Deserialize, Serialize};

use crate::metrics::Report;
use crate::schema::LabelKind;
use crate::schema::{Row, Schema};
use crate::time::Millis;
pub use families::{Estimator, FamilyGrid, Setting, NONLINEAR_FAMILIES};
use logistic::sigmoid;
pub use logistic::FitError;
pub use penalized::{PenalizedGrid, Penalty};
pub use preprocess::Preprocessor;

/// How many factors a score reports.
pub const TOP_FACTORS: usize = 5;

impl Estimator {
    /// The raw output on one preprocessed row (log-odds or value for linear models).
    fn linear_output(weights: &[f64], intercept: f64, z: &[f64]) -> f64 {
        intercept + weights.iter().zip(z).map(|(w, x)| w * x).sum::<f64>()
    }
}

/// How the solver got there: reported in the run record.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FitSummary {
    /// Coefficients that are not exactly zero (linear families).
    pub nonzero: Option<usize>,
    /// Columns the model sees after preprocessing.
    pub columns: usize,
    /// Newton steps and coordinate-descent passes along the path, summed.
    pub newton_steps: Option<usize>,
    pub passes: Option<usize>,
    /// Whether every lambda on the path converged.
    pub converged: bool,
    /// The lambda values fitted on the way to the chosen one (warm starts).
    #[serde(default)]
    pub path: Vec<f64>,
}

/// What a model was trained on.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrainingFacts {
    pub run_id: String,
    pub rows: usize,
    pub positives: usize,
    /// Event time of the earliest training row.
    #[serde(with = "crate::time::rfc3339")]
    pub from: Millis,
    /// Event time of the latest training row: the model has seen nothing after it.
    #[serde(with = "crate::time::rfc3339")]
    pub cutoff: Millis,
}

/// A trained, immutable model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Model {
    /// `m-<seq>-<hash8>`.
    pub id: String,
    #[serde(with = "crate::time::rfc3339")]
    pub created_at: Millis,
    pub setting: Setting,
    /// What the model predicts: the probability of 1 (binary) or a number.
    #[serde(default)]
    pub target: LabelKind,
    pub preprocessor: Preprocessor,
    pub estimator: Estimator,
    pub trained: TrainingFacts,
    /// The model's metrics on its run's whole holdout.
    pub holdout: Option<Report>,
    /// Its training window's distribution, the baseline for drift.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reference: Option<crate::drift::Reference>,
}

/// One feature's contribution to a score, relative to the training average: to the log-odds
/// (or the value, for numeric labels) for a linear model, to the probability for a tree or a
/// forest (see [`Contributions`]).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Factor<'a> {
    pub feature: &'a str,
    pub contribution: f64,
}

/// A model's answer for one row.
#[derive(Debug, Clone, PartialEq)]
pub struct Scored<'a> {
    /// The probability of 1 (binary labels) or the predicted number.
    pub output: f64,
    /// The [`TOP_FACTORS`] largest contributions by size, largest first, ties in feature order:
    /// to the log-odds (or the value) for linear models, to the probability for trees and
    /// forests; empty for kNN and naive Bayes, which have no per-feature contributions.
    pub factors: Vec<Factor<'a>>,
}

/// Every feature's contribution to one row's score, before the largest are chosen.
#[derive(Debug, Clone, PartialEq)]
pub struct Contributions {
    /// Where the contributions start. A linear model: its intercept, the linear predictor at the
    /// training average (columns are centred). A tree: its root's positive share, the training
    /// base rate. A forest: the mean over its trees of their roots' in-bag shares (the vote of a
    /// tree that is a single leaf).
    pub base: f64,
    /// One per feature, in the config's order (a category sums its indicator columns). `base`
    /// plus their sum is the linear predictor for a linear model (the log-odds, or the value for
    /// numeric labels) and the probability for a tree or a forest. For a tree each is the sum of
    /// the changes in the node's positive share at the splits on the feature along the row's path
    /// (Saabas's path decomposition); for a forest, the mean over trees of the same, where each
    /// tree's path ends at its vote (1 or 0) rather than its leaf's share, because the forest's
    /// probability is its share of positive votes.
    pub by_feature: Vec<f64>,
}

/// A linear model's coefficients on the standardized scale (what the estimator multiplies)
/// and on the original scale of the features (per unit of a number, per category indicator).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Coefficients {
    pub intercept_standardized: f64,
    pub intercept_original: f64,
    pub columns: Vec<ColumnCoefficient>,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ColumnCoefficient {
    /// `feature` for a number, `feature=category` for a category indicator.
    pub column: String,
    pub standardized: f64,
    pub original: f64,
}

impl Model {
    /// Builds a model and assigns its id from `seq` and a hash of its content.
    pub fn new(
        seq: u64,
        created_at: Millis,
        setting: Setting,
        target: LabelKind,
        preprocessor: Preprocessor,
        estimator: Estimator,
        trained: TrainingFacts,
    ) -> Model {
        let mut model = Model {
            id: String::new(),
            created_at,
            setting,
            target,
            preprocessor,
            estimator,
            trained,
            holdout: None,
            reference: None,
        };
        let content = serde_json::to_vec(&(
            &model.setting,
            &model.preprocessor,
            &model.estimator,
            &model.trained,
        ))
        .unwrap_or_default();
        model.id = format!("m-{seq}-{:08x}", fnv1a(&content) as u32);
        model
    }

    /// Checks that this model can score rows of `schema` (same features, kinds, categories).
    pub fn compatible_with(&self, schema: &Schema) -> Result<(), String> {
        let own: Vec<&str> = self
            .preprocessor
            .features
            .iter()
            .map(|f| f.name())
            .collect();
        let declared: Vec<&str> = schema.features().iter().map(|f| f.name.as_str()).collect();
        if own != declared {
            return Err(format!(
                "model {} was trained on features [{}] but the config declares [{}]",
                self.id,
                own.join(", "),
                declared.join(", ")
            ));
        }
        for (transform, feature) in self.preprocessor.features.iter().zip(schema.features()) {
            if let preprocess::FeatureTransform::Category { categories, .. } = transform {
                if categories != &feature.categories {
                    return Err(format!(
                        "model {} knows categories [{}] for `{}` but the config declares [{}]",
                        self.id,
                        categories.join(", "),
                        feature.name,
                        feature.categories.join(", ")
                    ));
                }
            } else if feature.kind != crate::schema::FeatureKind::Number {
                return Err(format!(
                    "model {} treats `{}` as a number",
                    self.id, feature.name
                ));
            }
        }
        Ok(())
    }

    /// The model's output for one row: the probability of 1, or the predicted number.
    pub fn predict(&self, row: &Row) -> f64 {
        let mut z = vec![0.0; self.preprocessor.width()];
        self.preprocessor.transform_into(row, &mut z);
        self.output(&z)
    }

    /// Outputs for many rows.
    pub fn predictions(&self, rows: &[&Row]) -> Vec<f64> {
        let mut z = vec![0.0; self.preprocessor.width()];
        rows.iter()
            .map(|row| {
                self.preprocessor.transform_into(row, &mut z);
                self.output(&z)
            })
            .collect()
    }

    /// The output on one preprocessed row.
    fn output(&self, z: &[f64]) -> f64 {
        match &self.estimator {
            Estimator::Linear { weights, intercept } => {
                self.link(Estimator::linear_output(weights, *intercept, z))
            }
            family => family
                .family_probability(z)
                .expect("a non-linear estimator has a probability"),
        }
    }

    /// Maps a linear predictor to the output: the logistic function for binary labels.
    fn link(&self, linear: f64) -> f64 {
        match self.target {
            LabelKind::Binary => sigmoid(linear),
            LabelKind::Number => linear,
        }
    }

    /// The output and the [`TOP_FACTORS`] largest contributions by size (see [`Scored`]).
    pub fn score(&self, row: &Row) -> Scored<'_> {
        let mut z = vec![0.0; self.preprocessor.width()];
        self.preprocessor.transform_into(row, &mut z);
        let Some(contributions) = self.contributions_of(&z) else {
            // Neighbours and naive Bayes have no per-feature contributions.
            return Scored {
                output: self.output(&z),
                factors: vec![],
            };
        };
        let output = match &self.estimator {
            Estimator::Linear { .. } => {
                self.link(contributions.base + contributions.by_feature.iter().sum::<f64>())
            }
            // The tree's own probability, not base + contributions, which can differ from it
            // by rounding.
            _ => self.output(&z),
        };
        Scored {
            output,
            factors: self.top_factors(contributions.by_feature),
        }
    }

    /// Every feature's contribution to `row`'s score (see [`Contributions`]); `None` for kNN and
    /// naive Bayes.
    pub fn contributions(&self, row: &Row) -> Option<Contributions> {
        let mut z = vec![0.0; self.preprocessor.width()];
        self.preprocessor.transform_into(row, &mut z);
        self.contributions_of(&z)
    }

    /// [`Model::contributions`] on a preprocessed row.
    fn contributions_of(&self, z: &[f64]) -> Option<Contributions> {
        // Sums each feature's columns (one for a number, the indicators of a category).
        let by_feature = |column: &dyn Fn(usize) -> f64| -> Vec<f64> {
            let mut sums = Vec::with_capacity(self.preprocessor.features.len());
            let mut col = 0;
            for transform in &self.preprocessor.features {
                let width = transform.width();
                sums.push((col..col + width).map(column).sum());
                col += width;
            }
            sums
        };
        let (base, by_feature) = match &self.estimator {
            Estimator::Linear { weights, intercept } => {
                (*intercept, by_feature(&|c| weights[c] * z[c]))
            }
            family => {
                let mut columns = vec![0.0; z.len()];
                let base = family.family_contributions(z, &mut columns)?;
                (base, by_feature(&|c| columns[c]))
            }
        };
        Some(Contributions { base, by_feature })
    }

    /// The [`TOP_FACTORS`] largest contributions by size, largest first, ties in feature order.
    fn top_factors(&self, by_feature: Vec<f64>) -> Vec<Factor<'_>> {
        let mut contributions: Vec<(usize, f64)> = by_feature.into_iter().enumerate().collect();
        // Selected, then only those sorted (a full sort of every feature was 2 % of a score
        // request's CPU).
        let larger_first = |a: &(usize, f64), b: &(usize, f64)| {
            b.1.abs().total_cmp(&a.1.abs()).then(a.0.cmp(&b.0))
        };
        if contributions.len() > TOP_FACTORS {
            contributions.select_nth_unstable_by(TOP_FACTORS, larger_first);
            contributions.truncate(TOP_FACTORS);
        }
        contributions.sort_unstable_by(larger_first);
        contributions
            .into_iter()
            .map(|(j, contribution)| Factor {
                feature: self.preprocessor.features[j].name(),
                contribution,
            })
            .collect()
    }

    /// A linear model's coefficients on both scales; `None` for other estimators.
    pub fn coefficients(&self) -> Option<Coefficients> {
        let Estimator::Linear { weights, intercept } = &self.estimator else {
            return None;
        };
        let mut columns = Vec::with_capacity(weights.len());
        let mut intercept_original = *intercept;
        let mut push = |column: String, w: f64, mean: f64, scale: f64| {
            let original = w / scale;
            intercept_original -= original * mean;
            columns.push(ColumnCoefficient {
                column,
                standardized: w,
                original,
            });
        };
        let mut c = 0;
        for transform in &self.preprocessor.features {
            match transform {
                preprocess::FeatureTransform::Number {
                    name, mean, scale, ..
                } => {
                    push(name.clone(), weights[c], *mean, *scale);
                    c += 1;
                }
                preprocess::FeatureTransform::Category {
                    name,
                    categories,
                    means,
                    scales,
                } => {
                    for (k, category) in categories.iter().enumerate() {
                        push(
                            format!("{name}={category}"),
                            weights[c],
                            means[k],
                            scales[k],
                        );
                        c += 1;
                    }
                }
            }
        }
        Some(Coefficients {
            intercept_standardized: *intercept,
            intercept_original,
            columns,
        })
    }
}

/// 64-bit FNV-1a: a small, stable content hash for model ids (not for security).
fn fnv1a(bytes: &[u8]) -> u64 {
    bytes.iter().fold(0xcbf2_9ce4_8422_2325, |hash, &b| {
        (hash ^ u64::from(b)).wrapping_mul(0x0000_0100_0000_01b3)
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use crate::model::family::{ForestParams, TreeParams};
    use serde_json::json;

    fn demo_model() -> (Schema, Model) {
        let schema = Config::embedded_default().schema();
        let rows: Vec<Row> = (0..20)
            .map(|i| {
                let f = json!({
                    "invoice_amount": 1000.0 * i as f64, "days_to_due": 30, "debtor_years_trading": i,
                    "prior_late_invoices": i % 3, "credit_utilisation": 0.1 * (i % 7) as f64,
                    "debtor_sector": if i % 2 == 0 { "retail" } else { "construction" },
                    "submission_channel": "portal"
                });
                schema.parse_row(f.as_object().unwrap()).unwrap()
            })
            .collect();
        let refs: Vec<&Row> = rows.iter().collect();
        let pre = Preprocessor::fit(&schema, &refs);
        let p = pre.width();
        let weights: Vec<f64> = (0..p).map(|c| if c == 3 { 2.0 } else { 0.1 }).collect();
        let setting = Setting::Logistic {
            penalty: Penalty::L2,
            l1_ratio: 0.0,
            lambda: 0.01,
        };
        let trained = TrainingFacts {
            run_id: "r-1".into(),
            rows: 20,
            positives: 5,
            from: 0,
            cutoff: 10,
        };
        let model = Model::new(
            3,
            0,
            setting,
            LabelKind::Binary,
            pre,
            Estimator::Linear {
                weights,
                intercept: -1.0,
            },
            trained,
        );
        (schema, model)
    }

    #[test]
    fn ids_carry_the_sequence_and_a_content_hash() {
        let (_, model) = demo_model();
        assert!(model.id.starts_with("m-3-"), "{}", model.id);
        assert_eq!(model.id.len(), "m-3-".len() + 8);
    }

    #[test]
    fn factors_sum_with_the_intercept_to_the_log_odds() {
        let (schema, model) = demo_model();
        let f = json!({
            "invoice_amount": 9000.0, "days_to_due": 30, "debtor_years_trading": 2,
            "prior_late_invoices": 2, "credit_utilisation": 0.9,
            "debtor_sector": "construction", "submission_channel": "portal"
        });
        let row = schema.parse_row(f.as_object().unwrap()).unwrap();
        let scored = model.score(&row);
        assert_eq!(scored.factors.len(), TOP_FACTORS);
        assert_eq!(
            scored.factors[0].feature, "prior_late_invoices",
            "weight 2.0 dominates"
        );
        assert!((scored.output - model.predict(&row)).abs() < 1e-15);
        for pair in scored.factors.windows(2) {
            assert!(pair[0].contribution.abs() >= pair[1].contribution.abs());
        }
    }

    #[test]
    fn original_scale_coefficients_reproduce_the_log_odds_from_raw_values() {
        let (schema, model) = demo_model();
        let f = json!({
            "invoice_amount": 12500.0, "days_to_due": 45, "debtor_years_trading": 7,
            "prior_late_invoices": 1, "credit_utilisation": 0.4,
            "debtor_sector": "retail", "submission_channel": "portal"
        });
        let row = schema.parse_row(f.as_object().unwrap()).unwrap();
        let coefficients = model.coefficients().unwrap();
        let raw = |column: &str| -> f64 {
            match column {
                "invoice_amount" => 12500.0,
                "days_to_due" => 45.0,
                "debtor_years_trading" => 7.0,
                "prior_late_invoices" => 1.0,
                "credit_utilisation" => 0.4,
                "debtor_sector=retail" | "submission_channel=portal" => 1.0,
                _ => 0.0,
            }
        };
        let log_odds = coefficients.intercept_original
            + coefficients
                .columns
                .iter()
                .map(|c| c.original * raw(&c.column))
                .sum::<f64>();
        assert!((sigmoid(log_odds) - model.predict(&row)).abs() < 1e-12);
    }

    #[test]
    fn settings_read_log_entries_written_before_l1_ratio_existed() {
        let old = r#"{"family":"logistic","penalty":"l2","lambda":0.003}"#;
        let setting: Setting = serde_json::from_str(old).unwrap();
        assert_eq!(
            setting,
            Setting::Logistic {
                penalty: Penalty::L2,
                l1_ratio: 0.0,
                lambda: 0.003
            }
        );
    }

    #[test]
    fn a_model_refuses_a_schema_it_was_not_trained_on() {
        let (schema, model) = demo_model();
        assert!(model.compatible_with(&schema).is_ok());
        let mut config = Config::embedded_default();
        config.features[5].categories.push("mining".into());
        let err = model.compatible_with(&config.schema()).unwrap_err();
        assert!(err.contains("debtor_sector"), "{err}");
    }

    /// A model around a fitted non-linear estimator on the demo schema.
    fn family_model(schema: &Schema, rows: &[Row], labels: &[u8], setting: Setting) -> Model {
        let refs: Vec<&Row> = rows.iter().collect();
        let pre = Preprocessor::fit(schema, &refs);
        let p = pre.width();
        let mut x = vec![0.0; rows.len() * p];
        for (row, out) in rows.iter().zip(x.chunks_exact_mut(p)) {
            pre.transform_into(row, out);
        }
        let estimator = Estimator::fit_family(&setting, &x, p, labels).unwrap();
        let trained = TrainingFacts {
            run_id: "r-1".into(),
            rows: rows.len(),
            positives: labels.iter().filter(|&&y| y == 1).count(),
            from: 0,
            cutoff: 10,
        };
        Model::new(1, 0, setting, LabelKind::Binary, pre, estimator, trained)
    }

    #[test]
    fn a_tree_split_on_a_category_indicator_is_credited_to_the_category_feature() {
        // Late exactly when the sector is construction: a stump splits on one of the sector's
        // indicator columns, and the whole change from the base rate (10 of 20) to the leaf
        // (all or none) belongs to `debtor_sector`.
        let (schema, _) = demo_model();
        let rows: Vec<Row> = (0..20)
            .map(|i| {
                let f = json!({
                    "invoice_amount": 1000.0 * i as f64, "days_to_due": 30,
                    "debtor_years_trading": i, "prior_late_invoices": i % 3,
                    "credit_utilisation": 0.1 * (i % 7) as f64,
                    "debtor_sector": if i % 2 == 0 { "retail" } else { "construction" },
                    "submission_channel": "portal"
                });
                schema.parse_row(f.as_object().unwrap()).unwrap()
            })
            .collect();
        let labels: Vec<u8> = (0..20).map(|i| (i % 2) as u8).collect();
        let stump = Setting::DecisionTree(TreeParams {
            max_depth: 1,
            min_leaf: 1,
        });
        let model = family_model(&schema, &rows, &labels, stump);
        let scored = model.score(&rows[1]);
        assert_eq!(scored.output, 1.0);
        assert_eq!(scored.factors[0].feature, "debtor_sector");
        assert_eq!(scored.factors[0].contribution, 0.5);
        assert!(scored.factors[1..].iter().all(|f| f.contribution == 0.0));
        let all = model.contributions(&rows[0]).unwrap();
        assert_eq!(all.base, 0.5);
        assert_eq!(all.by_feature.len(), 7, "one per feature, not per column");
        assert_eq!(all.by_feature[5], -0.5);
    }

    #[test]
    fn tree_and_forest_factors_are_the_largest_of_contributions_that_add_up_to_the_output() {
        use rand::SeedableRng;
        let (schema, _) = demo_model();
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let (mut rows, mut labels) = (Vec::new(), Vec::new());
        for _ in 0..1500 {
            let invoice =
                crate::demo::scenario::invoice(&mut rng, crate::demo::scenario::Regime::Before);
            rows.push(schema.parse_row(&invoice.features).unwrap());
            labels.push(invoice.draw_label(&mut rng));
        }
        let settings = [
            Setting::DecisionTree(TreeParams {
                max_depth: 6,
                min_leaf: 10,
            }),
            Setting::RandomForest(ForestParams {
                trees: 40,
                max_depth: 5,
                min_leaf: 5,
                seed: 2,
            }),
        ];
        for setting in settings {
            let model = family_model(&schema, &rows[..1000], &labels[..1000], setting);
            let mut credited = [false; 7];
            for row in &rows[1000..] {
                let all = model.contributions(row).unwrap();
                let total = all.base + all.by_feature.iter().sum::<f64>();
                let output = model.predict(row);
                assert!(
                    (total - output).abs() < 1e-12,
                    "{setting}: {total} vs {output}"
                );
                for (j, c) in all.by_feature.iter().enumerate() {
                    credited[j] |= *c != 0.0;
                }
                // The top five by size, ties in feature order, from a full sort.
                let mut expected: Vec<(usize, f64)> =
                    all.by_feature.iter().copied().enumerate().collect();
                expected.sort_by(|a, b| b.1.abs().total_cmp(&a.1.abs()).then(a.0.cmp(&b.0)));
                let scored = model.score(row);
                assert_eq!(scored.output, output);
                let got: Vec<(&str, f64)> = scored
                    .factors
                    .iter()
                    .map(|f| (f.feature, f.contribution))
                    .collect();
                let want: Vec<(&str, f64)> = expected[..TOP_FACTORS]
                    .iter()
                    .map(|&(j, c)| (model.preprocessor.features[j].name(), c))
                    .collect();
                assert_eq!(got, want, "{setting}");
            }
            let credited = credited.iter().filter(|&&c| c).count();
            assert!(
                credited >= 3,
                "{setting}: only {credited} features credited"
            );
        }
    }

    #[test]
    fn models_survive_serialization_whole() {
        let (_, model) = demo_model();
        let text = serde_json::to_string(&model).unwrap();
        assert_eq!(serde_json::from_str::<Model>(&text).unwrap(), model);
    }
}
