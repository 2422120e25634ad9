//! The model artifact: preprocessing + estimator + metadata, immutable once built.
//!
//! Pure: no I/O, no HTTP, no storage. A model scores a validated [`Row`] into a probability and
//! the per-feature contributions to its log-odds, and it serializes whole so the store can keep
//! it and the registry can restore it.

pub mod logistic;
pub mod preprocess;

use serde::{Deserialize, Serialize};

use crate::config::{FamilyName, Penalty};
use crate::metrics::Report;
use crate::schema::{Row, Schema};
use crate::time::Millis;
use logistic::{sigmoid, LogisticFit};
pub use preprocess::Preprocessor;

/// How many factors a score reports.
pub const TOP_FACTORS: usize = 5;

/// One point of a family's grid: the hyperparameters a model was fitted with.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Setting {
    pub family: FamilyName,
    pub penalty: Penalty,
    pub lambda: f64,
}

impl std::fmt::Display for Setting {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let family = match self.family {
            FamilyName::Logistic => "logistic",
        };
        let penalty = match self.penalty {
            Penalty::L2 => "l2",
        };
        write!(f, "{family}/{penalty} lambda={}", self.lambda)
    }
}

/// The fitted estimator.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Estimator {
    /// Log-odds linear in the standardized columns.
    Linear { weights: Vec<f64>, intercept: f64 },
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
    pub preprocessor: Preprocessor,
    pub estimator: Estimator,
    pub trained: TrainingFacts,
    /// The model's metrics on its run's whole holdout.
    pub holdout: Option<Report>,
}

/// One feature's contribution to a score's log-odds, relative to the training average.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Factor<'a> {
    pub feature: &'a str,
    pub contribution: f64,
}

/// A model's answer for one row.
#[derive(Debug, Clone, PartialEq)]
pub struct Scored<'a> {
    pub probability: f64,
    pub factors: Vec<Factor<'a>>,
}

impl Model {
    /// Builds a model from a fit and assigns its id from `seq` and a hash of its content.
    pub fn new(
        seq: u64,
        created_at: Millis,
        setting: Setting,
        preprocessor: Preprocessor,
        fit: LogisticFit,
        trained: TrainingFacts,
    ) -> Model {
        let estimator = Estimator::Linear {
            weights: fit.weights,
            intercept: fit.intercept,
        };
        let mut model = Model {
            id: String::new(),
            created_at,
            setting,
            preprocessor,
            estimator,
            trained,
            holdout: None,
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
            } else if feature.kind != crate::config::FeatureKind::Number {
                return Err(format!(
                    "model {} treats `{}` as a number",
                    self.id, feature.name
                ));
            }
        }
        Ok(())
    }

    /// The probability of the positive label for one row.
    pub fn probability(&self, row: &Row) -> f64 {
        let mut z = vec![0.0; self.preprocessor.width()];
        self.preprocessor.transform_into(row, &mut z);
        match &self.estimator {
            Estimator::Linear { weights, intercept } => {
                sigmoid(intercept + weights.iter().zip(&z).map(|(w, x)| w * x).sum::<f64>())
            }
        }
    }

    /// Probabilities for many rows.
    pub fn probabilities(&self, rows: &[&Row]) -> Vec<f64> {
        rows.iter().map(|r| self.probability(r)).collect()
    }

    /// The probability and the [`TOP_FACTORS`] largest contributions to the log-odds.
    pub fn score(&self, row: &Row) -> Scored<'_> {
        let mut z = vec![0.0; self.preprocessor.width()];
        self.preprocessor.transform_into(row, &mut z);
        let Estimator::Linear { weights, intercept } = &self.estimator;
        let mut per_feature = vec![0.0; self.preprocessor.features.len()];
        let mut col = 0;
        for (j, transform) in self.preprocessor.features.iter().enumerate() {
            let width = match transform {
                preprocess::FeatureTransform::Number { .. } => 1,
                preprocess::FeatureTransform::Category { categories, .. } => categories.len(),
            };
            per_feature[j] = (col..col + width).map(|c| weights[c] * z[c]).sum();
            col += width;
        }
        let log_odds = intercept + per_feature.iter().sum::<f64>();
        let mut factors: Vec<Factor<'_>> = self
            .preprocessor
            .features
            .iter()
            .zip(per_feature)
            .map(|(t, contribution)| Factor {
                feature: t.name(),
                contribution,
            })
            .collect();
        factors.sort_by(|a, b| b.contribution.abs().total_cmp(&a.contribution.abs()));
        factors.truncate(TOP_FACTORS);
        Scored {
            probability: sigmoid(log_odds),
            factors,
        }
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
    use serde_json::json;

    fn demo_model() -> (Schema, Model) {
        let schema = Schema::from_config(&Config::embedded_default());
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
        let setting = Setting {
            family: FamilyName::Logistic,
            penalty: Penalty::L2,
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
            pre,
            LogisticFit {
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
        assert!((scored.probability - model.probability(&row)).abs() < 1e-15);
        for pair in scored.factors.windows(2) {
            assert!(pair[0].contribution.abs() >= pair[1].contribution.abs());
        }
    }

    #[test]
    fn a_model_refuses_a_schema_it_was_not_trained_on() {
        let (schema, model) = demo_model();
        assert!(model.compatible_with(&schema).is_ok());
        let mut config = Config::embedded_default();
        config.features[5].categories.push("mining".into());
        let err = model
            .compatible_with(&Schema::from_config(&config))
            .unwrap_err();
        assert!(err.contains("debtor_sector"), "{err}");
    }

    #[test]
    fn models_survive_serialization_whole() {
        let (_, model) = demo_model();
        let text = serde_json::to_string(&model).unwrap();
        assert_eq!(serde_json::from_str::<Model>(&text).unwrap(), model);
    }
}
