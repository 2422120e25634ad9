//! Gaussian naive Bayes with scikit-learn's variance smoothing.

use serde::{Deserialize, Serialize};

use super::{check_training, check_width, score_rows, Family, FitError, GridError};

/// scikit-learn's `GaussianNB(var_smoothing=1e-9)` default: "portion of the largest variance of
/// all features that is added to variances for calculation stability" (scikit-learn
/// `sklearn.naive_bayes.GaussianNB` documentation; in 1.9.1 `epsilon_ = var_smoothing *
/// max(var(X, axis=0))`, added to every class variance).
pub(super) const VAR_SMOOTHING: f64 = 1e-9;

/// Cap on one feature's squared standardized deviation in naive Bayes, (z − mean)² / variance.
/// A real row never comes near it (it is 1e150 standard deviations), and with it every log joint
/// likelihood stays finite even for infinite or NaN inputs. Our own guard.
pub(super) const SQUARED_DEVIATION_CAP: f64 = 1e300;

/// Naive Bayes has no hyperparameters: its grid and its setting are empty (a setting is stored
/// as `{"family": "naive_bayes"}`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NaiveBayesParams {}

/// The naive Bayes grid in the config: nothing to search.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NaiveBayesGrid {}

/// One class's part of a Gaussian naive Bayes model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(super) struct ClassGaussians {
    pub(super) rows: u64,
    pub(super) means: Vec<f64>,
    /// Population variances plus the model's smoothing.
    pub(super) variances: Vec<f64>,
}

impl ClassGaussians {
    pub(super) fn fit(rows: &[&[f64]], p: usize, smoothing: f64) -> Self {
        let (means, variances) = column_moments(rows, p);
        ClassGaussians {
            rows: rows.len() as u64,
            means,
            variances: variances.into_iter().map(|v| v + smoothing).collect(),
        }
    }

    pub(super) fn is_finite(&self) -> bool {
        self.means
            .iter()
            .chain(&self.variances)
            .all(|v| v.is_finite())
    }

    /// ln P(class) + Σ ln N(z_j; mean_j, variance_j), finite for any `z` (see
    /// [`SQUARED_DEVIATION_CAP`]).
    pub(super) fn log_joint(&self, z: &[f64], total_rows: u64) -> f64 {
        let prior = (self.rows as f64 / total_rows as f64).ln();
        let likelihood: f64 = self
            .means
            .iter()
            .zip(&self.variances)
            .zip(z)
            .map(|((mean, variance), value)| {
                let deviation = ((value - mean).powi(2) / variance).min(SQUARED_DEVIATION_CAP);
                -0.5 * ((2.0 * std::f64::consts::PI * variance).ln() + deviation)
            })
            .sum();
        prior + likelihood
    }
}

/// Per-column mean and population variance (two passes) of a set of rows.
pub(super) fn column_moments(rows: &[&[f64]], p: usize) -> (Vec<f64>, Vec<f64>) {
    let count = rows.len() as f64;
    let means: Vec<f64> = (0..p)
        .map(|j| rows.iter().map(|row| row[j]).sum::<f64>() / count)
        .collect();
    let variances = (0..p)
        .map(|j| {
            rows.iter()
                .map(|row| (row[j] - means[j]).powi(2))
                .sum::<f64>()
                / count
        })
        .collect();
    (means, variances)
}

/// Gaussian naive Bayes: class priors from the class shares, and per class and feature a normal
/// density with the class mean and population variance, smoothed as scikit-learn's `GaussianNB`
/// does by default ([`VAR_SMOOTHING`] × the largest column variance, added to every variance;
/// at least the smallest normal `f64` so no variance is zero). The posterior is normalized in
/// log space, so it stays finite where the densities themselves underflow.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NaiveBayesModel {
    pub(super) features: usize,
    pub(super) negative: ClassGaussians,
    pub(super) positive: ClassGaussians,
}

impl NaiveBayesModel {
    pub fn fit(x: &[f64], p: usize, y: &[u8]) -> Result<Self, FitError> {
        check_training(x, p, y)?;
        let all: Vec<&[f64]> = x.chunks_exact(p).collect();
        let (_, column_variances) = column_moments(&all, p);
        let largest = column_variances.into_iter().fold(0.0, f64::max);
        let smoothing = (VAR_SMOOTHING * largest).max(f64::MIN_POSITIVE);
        let of_class = |class: u8| -> Vec<&[f64]> {
            all.iter()
                .zip(y)
                .filter(|&(_, &label)| label == class)
                .map(|(&row, _)| row)
                .collect()
        };
        let model = NaiveBayesModel {
            features: p,
            negative: ClassGaussians::fit(&of_class(0), p, smoothing),
            positive: ClassGaussians::fit(&of_class(1), p, smoothing),
        };
        if !(model.negative.is_finite() && model.positive.is_finite()) {
            return Err(FitError::NonFinite);
        }
        Ok(model)
    }

    pub fn probability(&self, z: &[f64]) -> f64 {
        check_width(z, self.features);
        self.posterior(z)
    }

    pub fn probabilities(&self, x: &[f64], p: usize) -> Vec<f64> {
        score_rows(x, p, self.features, |z| self.posterior(z))
    }

    /// (ln P(negative, z), ln P(positive, z)), each finite.
    pub(super) fn log_joints(&self, z: &[f64]) -> (f64, f64) {
        let total = self.negative.rows + self.positive.rows;
        (
            self.negative.log_joint(z, total),
            self.positive.log_joint(z, total),
        )
    }

    /// P(positive | z) by log-sum-exp over the two log joints.
    pub(super) fn posterior(&self, z: &[f64]) -> f64 {
        let (negative, positive) = self.log_joints(z);
        let top = negative.max(positive);
        let (negative, positive) = ((negative - top).exp(), (positive - top).exp());
        positive / (negative + positive)
    }
}

impl Family for NaiveBayesModel {
    const NAME: &'static str = "naive_bayes";
    type Params = NaiveBayesParams;
    type Grid = NaiveBayesGrid;
    fn check_grid(_: &NaiveBayesGrid) -> Result<(), GridError> {
        Ok(())
    }
    fn settings(_: &NaiveBayesGrid, _seed: u64) -> Vec<NaiveBayesParams> {
        vec![NaiveBayesParams {}]
    }
    fn path_group(_: &NaiveBayesParams) -> String {
        Self::NAME.to_owned()
    }
    fn restraint(_: &NaiveBayesParams) -> f64 {
        0.0
    }
    fn describe(_: &NaiveBayesParams) -> String {
        String::new()
    }
    fn fit(x: &[f64], p: usize, y: &[u8], _: &NaiveBayesParams) -> Result<Self, FitError> {
        NaiveBayesModel::fit(x, p, y)
    }
    fn probability(&self, z: &[f64]) -> f64 {
        NaiveBayesModel::probability(self, z)
    }
    fn probabilities(&self, x: &[f64], p: usize) -> Vec<f64> {
        NaiveBayesModel::probabilities(self, x, p)
    }
}
