//! The penalized linear families' vocabulary: how coefficients are penalized, and the grid the
//! config searches them over. Their fit is the elastic-net path in [`super::elastic_net`]; the
//! search walks one warm-started lambda path per `l1_ratio`, so these families are not
//! [`super::family::Family`] implementations but are written out in `model::families`.

use serde::{Deserialize, Serialize};

use super::family::GridError;

/// How a linear family's coefficients are penalized.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Penalty {
    /// Ridge: l1_ratio 0.
    #[default]
    L2,
    /// Lasso: l1_ratio 1.
    L1,
    /// A grid of l1_ratio values.
    ElasticNet,
}

impl Penalty {
    pub fn name(self) -> &'static str {
        match self {
            Penalty::L2 => "l2",
            Penalty::L1 => "l1",
            Penalty::ElasticNet => "elastic_net",
        }
    }
}

/// The grid of a penalized linear family. Without `lambda`, the path is automatic:
/// `lambda_count` values from the data's lambda_max down to `lambda_min_ratio` of it.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PenalizedGrid {
    #[serde(default)]
    pub penalty: Penalty,
    /// The L1 share of the penalty; `elastic_net` only (`l1` is 1, `l2` is 0).
    pub l1_ratio: Option<Vec<f64>>,
    /// Pinned lambda values (instead of the automatic path).
    pub lambda: Option<Vec<f64>>,
    #[serde(default = "default_lambda_count")]
    pub lambda_count: usize,
    #[serde(default = "default_lambda_min_ratio")]
    pub lambda_min_ratio: f64,
}

pub fn default_lambda_count() -> usize {
    20
}

pub fn default_lambda_min_ratio() -> f64 {
    0.001
}

/// Most lambdas an automatic path may have (our own bound: each is a fit per fold).
const MAX_LAMBDA_COUNT: usize = 500;

impl PenalizedGrid {
    /// The l1_ratio values this grid searches.
    pub fn l1_ratios(&self) -> Vec<f64> {
        match self.penalty {
            Penalty::L2 => vec![0.0],
            Penalty::L1 => vec![1.0],
            Penalty::ElasticNet => self.l1_ratio.clone().unwrap_or_default(),
        }
    }

    /// Checks the grid the config gave; the error names the grid's key and the rule.
    pub fn check(&self) -> Result<(), GridError> {
        let fail = |field, rule: &str| {
            Err(GridError {
                field,
                rule: rule.to_owned(),
            })
        };
        match (self.penalty, &self.l1_ratio) {
            (Penalty::ElasticNet, None) => {
                return fail(
                    "l1_ratio",
                    "penalty \"elastic_net\" needs a list of l1_ratio values",
                )
            }
            (Penalty::ElasticNet, Some(ratios)) => {
                if ratios.is_empty() {
                    return fail("l1_ratio", "list at least one value");
                }
                if !ratios.iter().all(|r| (0.0..=1.0).contains(r)) {
                    return fail("l1_ratio", "every value must be between 0 and 1");
                }
            }
            (penalty, Some(_)) => {
                return fail(
                    "l1_ratio",
                    &format!(
                    "penalty \"{}\" fixes the l1_ratio; use penalty \"elastic_net\" to search it",
                    penalty.name()
                ),
                )
            }
            (_, None) => {}
        }
        if let Some(lambda) = &self.lambda {
            if lambda.is_empty() {
                return fail("lambda", "list at least one value");
            }
            if !lambda.iter().all(|l| l.is_finite() && *l >= 0.0) {
                return fail("lambda", "every value must be a finite number >= 0");
            }
        }
        if !(1..=MAX_LAMBDA_COUNT).contains(&self.lambda_count) {
            return fail("lambda_count", "must be between 1 and 500");
        }
        if !(self.lambda_min_ratio > 0.0 && self.lambda_min_ratio < 1.0) {
            return fail("lambda_min_ratio", "must be between 0 and 1 (exclusive)");
        }
        Ok(())
    }
}
