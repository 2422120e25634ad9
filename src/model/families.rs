//! The list of estimator families: the one place a family is registered.
//!
//! A model's [`Setting`] and [`Estimator`], and the config's [`FamilyGrid`], are each one enum
//! with a variant per family, because each is stored or read with serde and its tag names the
//! family. The two penalized linear families are written out here by hand: they share the
//! elastic-net path, which the search walks with warm starts. Every other family implements
//! [`Family`] in its own file under `family/` (params, grid and its checks, fit, probability)
//! and is registered by one line in the `nonlinear_families!` call at the bottom of this file,
//! which writes its variant into the three enums and its arm into every dispatch below.
//!
//! The variant name is the family's stored name in snake case (`DecisionTree` is
//! `decision_tree`); it must equal [`Family::NAME`] (a test checks every registered family).

use serde::{Deserialize, Serialize};

use super::family::{self, Family, GridError};
use super::penalized::{PenalizedGrid, Penalty};
use super::FitError;

macro_rules! nonlinear_families {
    ($( $(#[$doc:meta])* $variant:ident => $model:ty ),+ $(,)?) => {
        /// One point of a family's grid: the hyperparameters a model was fitted with.
        #[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
        #[serde(tag = "family", rename_all = "snake_case")]
        pub enum Setting {
            /// Elastic-net logistic regression; `lambda` on the glmnet scale, `l1_ratio` its L1
            /// share.
            Logistic {
                penalty: Penalty,
                #[serde(default)]
                l1_ratio: f64,
                lambda: f64,
            },
            /// Elastic-net linear regression for numeric labels.
            Linear {
                penalty: Penalty,
                #[serde(default)]
                l1_ratio: f64,
                lambda: f64,
            },
            $( $(#[$doc])* $variant(<$model as Family>::Params), )+
        }

        /// The fitted estimator.
        #[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
        #[serde(tag = "kind", rename_all = "snake_case")]
        pub enum Estimator {
            /// Linear in the preprocessed (standardized) columns: the log-odds for binary
            /// labels, the predicted value for numeric ones.
            Linear { weights: Vec<f64>, intercept: f64 },
            $( $(#[$doc])* $variant($model), )+
        }

        /// One estimator family and the grid it is searched over (`[[training.families]]`).
        #[derive(Debug, Clone, PartialEq, Deserialize)]
        #[serde(tag = "family", rename_all = "snake_case")]
        pub enum FamilyGrid {
            /// Elastic-net logistic regression (binary labels).
            Logistic(PenalizedGrid),
            /// Elastic-net linear regression (numeric labels): ridge, lasso or elastic net.
            Linear(PenalizedGrid),
            $( $(#[$doc])* $variant(<$model as Family>::Grid), )+
        }

        /// The names of the families that are not penalized linear ones, in registration order.
        pub const NONLINEAR_FAMILIES: &[&str] = &[$( <$model as Family>::NAME ),+];

        impl Setting {
            /// The family's config name.
            pub fn family(&self) -> &'static str {
                match self {
                    Setting::Logistic { .. } => "logistic",
                    Setting::Linear { .. } => "linear",
                    $( Setting::$variant(_) => <$model as Family>::NAME, )+
                }
            }

            /// Settings that lie on one penalty path, where "more penalized" is meaningful: the
            /// one-SE rule only compares settings of the same group.
            pub fn path_group(&self) -> String {
                match self {
                    Setting::Logistic { penalty, l1_ratio, .. }
                    | Setting::Linear { penalty, l1_ratio, .. } => {
                        format!("{}/{}/{l1_ratio}", self.family(), penalty.name())
                    }
                    $( Setting::$variant(params) => <$model as Family>::path_group(params), )+
                }
            }

            /// How strongly the setting restrains the fit within its group: larger is simpler
            /// (a larger lambda, a shallower tree, more neighbours averaged).
            pub fn restraint(&self) -> f64 {
                match self {
                    Setting::Logistic { lambda, .. } | Setting::Linear { lambda, .. } => *lambda,
                    $( Setting::$variant(params) => <$model as Family>::restraint(params), )+
                }
            }
        }

        impl std::fmt::Display for Setting {
            fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                match self {
                    Setting::Logistic { penalty, l1_ratio, lambda }
                    | Setting::Linear { penalty, l1_ratio, lambda } => {
                        write!(f, "{}/{}", self.family(), penalty.name())?;
                        if *penalty == Penalty::ElasticNet {
                            write!(f, " l1_ratio={l1_ratio}")?;
                        }
                        write!(f, " lambda={lambda:.6}")
                    }
                    $( Setting::$variant(params) => {
                        let details = <$model as Family>::describe(params);
                        f.write_str(self.family())?;
                        if details.is_empty() {
                            Ok(())
                        } else {
                            write!(f, " {details}")
                        }
                    } )+
                }
            }
        }

        impl Estimator {
            /// Fits a non-linear family's setting on the row-major preprocessed matrix `x`
            /// (width `p`) with 0/1 labels. Linear settings are fitted along their path by the
            /// search instead.
            pub fn fit_family(
                setting: &Setting,
                x: &[f64],
                p: usize,
                y: &[u8],
            ) -> Result<Estimator, FitError> {
                Ok(match setting {
                    $( Setting::$variant(params) => {
                        Estimator::$variant(<$model as Family>::fit(x, p, y, params)?)
                    } )+
                    Setting::Logistic { .. } | Setting::Linear { .. } => {
                        return Err(FitError::Solver(format!(
                            "{setting} is fitted along its lambda path"
                        )))
                    }
                })
            }

            /// Probabilities of a non-linear estimator for row-major rows; `None` for linear
            /// ones.
            pub fn family_probabilities(&self, x: &[f64], p: usize) -> Option<Vec<f64>> {
                match self {
                    Estimator::Linear { .. } => None,
                    $( Estimator::$variant(m) => Some(<$model as Family>::probabilities(m, x, p)), )+
                }
            }

            /// A non-linear estimator's probability for one preprocessed row; `None` for
            /// linear ones.
            pub fn family_probability(&self, z: &[f64]) -> Option<f64> {
                match self {
                    Estimator::Linear { .. } => None,
                    $( Estimator::$variant(m) => Some(<$model as Family>::probability(m, z)), )+
                }
            }

            /// Adds a non-linear estimator's per-column contributions for the preprocessed row
            /// `z` into `columns` and returns their base; `None` for linear estimators and
            /// for families without contributions.
            pub fn family_contributions(&self, z: &[f64], columns: &mut [f64]) -> Option<f64> {
                match self {
                    Estimator::Linear { .. } => None,
                    $( Estimator::$variant(m) => <$model as Family>::add_contributions(m, z, columns), )+
                }
            }

            /// The family's name, as its setting and its config name it.
            pub fn family(&self) -> &'static str {
                match self {
                    Estimator::Linear { .. } => "linear",
                    $( Estimator::$variant(_) => <$model as Family>::NAME, )+
                }
            }
        }

        impl FamilyGrid {
            pub fn name(&self) -> &'static str {
                match self {
                    FamilyGrid::Logistic(_) => "logistic",
                    FamilyGrid::Linear(_) => "linear",
                    $( FamilyGrid::$variant(_) => <$model as Family>::NAME, )+
                }
            }

            /// Checks the grid's values; the error names the grid's key and the rule.
            pub fn check(&self) -> Result<(), GridError> {
                match self {
                    FamilyGrid::Logistic(grid) | FamilyGrid::Linear(grid) => grid.check(),
                    $( FamilyGrid::$variant(grid) => <$model as Family>::check_grid(grid), )+
                }
            }

            /// The settings of a family without a lambda path, in search order (`seed`: the
            /// run's); `None` for the penalized families, whose lambdas come from the data.
            pub fn fixed_settings(&self, seed: u64) -> Option<Vec<Setting>> {
                match self {
                    FamilyGrid::Logistic(_) | FamilyGrid::Linear(_) => None,
                    $( FamilyGrid::$variant(grid) => Some(
                        <$model as Family>::settings(grid, seed)
                            .into_iter()
                            .map(Setting::$variant)
                            .collect(),
                    ), )+
                }
            }
        }
    };
}

nonlinear_families! {
    DecisionTree => family::TreeModel,
    RandomForest => family::ForestModel,
    Knn => family::KnnModel,
    NaiveBayes => family::NaiveBayesModel,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_registered_family_is_stored_and_configured_under_its_own_name() {
        for &name in NONLINEAR_FAMILIES {
            // The config's tag (serde's snake-case variant name) must be the family's NAME.
            let grid: FamilyGrid = toml::from_str(&format!("family = \"{name}\"\n"))
                .unwrap_or_else(|e| panic!("`{name}` is not a config family: {e}"));
            assert_eq!(grid.name(), name);
            grid.check().unwrap();
            // Its settings carry the same tag when stored, and read back equal.
            let settings = grid.fixed_settings(7).expect("a family without a path");
            assert!(
                !settings.is_empty(),
                "`{name}`'s default grid spans nothing"
            );
            for setting in settings {
                assert_eq!(setting.family(), name);
                let json = serde_json::to_value(setting).unwrap();
                assert_eq!(json["family"], name);
                let back: Setting = serde_json::from_value(json).unwrap();
                assert_eq!(back, setting);
            }
        }
    }

    #[test]
    fn settings_stored_before_the_registration_read_back_the_same() {
        // Shapes written by earlier versions (model JSON in the store and the log).
        let stored = [
            r#"{"family":"naive_bayes"}"#,
            r#"{"family":"knn","k":50}"#,
            r#"{"family":"decision_tree","max_depth":3,"min_leaf":1}"#,
            r#"{"family":"random_forest","trees":100,"max_depth":6,"min_leaf":1,"seed":7}"#,
            r#"{"family":"logistic","penalty":"elastic_net","l1_ratio":0.5,"lambda":0.01}"#,
        ];
        for text in stored {
            let setting: Setting = serde_json::from_str(text).unwrap();
            assert_eq!(serde_json::to_string(&setting).unwrap(), text);
        }
        let naive: Setting = serde_json::from_str(stored[0]).unwrap();
        assert_eq!(naive.to_string(), "naive_bayes");
        let tree: Setting = serde_json::from_str(stored[2]).unwrap();
        assert_eq!(tree.to_string(), "decision_tree max_depth=3 min_leaf=1");
        assert_eq!(tree.path_group(), "decision_tree/min_leaf=1");
    }
}
