//! Non-linear estimator families (decision tree, k-nearest neighbours, Gaussian naive Bayes,
//! random forest) that give a probability for the positive class on a preprocessed row. Each
//! lives in its own file with its hyperparameters, its fit and its probability, behind the
//! small [`Family`] trait; this file holds the checks they share.
//!
//! Pure: no I/O. Every fit takes a row-major `n × p` matrix of already preprocessed (imputed,
//! one-hot encoded, standardized) rows and 0/1 labels, and every model scores one row (or a
//! row-major batch) into a probability in [0, 1] that is finite by construction.
//!
//! All four families are our own code over plain vectors. smartcore 0.7 was checked first
//! (its 0.7.0 source) and does not give what a scoring service needs:
//! - `DecisionTreeClassifier::predict_proba` returns a one-hot row for the leaf's majority class,
//!   not the leaf's class shares, and its nodes are private;
//! - `RandomForestClassifier` has `predict` only; its trees, hence their votes, are private;
//! - `KNNClassifier::predict_proba` gives the share of positives, but the model keeps its search
//!   structure (a cover tree by default), whose order among neighbours at equal distance is its
//!   own; we want a stored format we define and a tie rule we can state;
//! - `GaussianNB` has no `predict_proba`, keeps its per-class log-likelihoods behind a private
//!   trait, and adds no variance smoothing, so a feature constant within a class gives ln 0.
//!
//! Each model stores its own plain representation, serialized with serde (JSON in the service):
//! - tree: the nodes; a leaf keeps its training row counts, so its probability is exact;
//! - forest: the trees, same node format (leaf counts include bootstrap multiplicity);
//! - kNN: the whole training matrix and labels; about 20 bytes of JSON per training value, so a
//!   30-column model on 10,000 rows is roughly 6 MB;
//! - naive Bayes: per class, its row count and the per-feature mean and smoothed variance.
//!
//! Exact JSON round trips of the `f64` fields need serde_json's `float_roundtrip` feature: without
//! it serde_json parses some decimals one unit in the last place off.

mod forest;
mod knn;
mod naive_bayes;
mod tree;

pub use forest::{ForestGrid, ForestModel, ForestParams};
pub use knn::{KnnGrid, KnnModel, KnnParams};
pub use naive_bayes::{NaiveBayesGrid, NaiveBayesModel, NaiveBayesParams};
pub use tree::{TreeGrid, TreeModel, TreeParams};

use super::FitError;

/// What a non-linear family offers the rest of the service: its grid in the config (with its
/// checks and the settings it spans), what the search needs to compare its settings, a fit on
/// a row-major preprocessed matrix with 0/1 labels, and probabilities. A family implements
/// this in its own file and is registered by one line in `model::families`.
pub trait Family: Sized {
    /// The family's name in the config, in stored settings and in the log.
    const NAME: &'static str;
    /// One point of the family's grid, stored with every model and log entry.
    type Params: Copy;
    /// The family's grid as the config writes it (`[[training.families]]`); every key has the
    /// starter file's default.
    type Grid;
    /// Checks a grid the config gave; the error names the grid's key and the rule.
    fn check_grid(grid: &Self::Grid) -> Result<(), GridError>;
    /// The settings a grid spans, in search order; `seed` is the run's (for families that draw).
    fn settings(grid: &Self::Grid, seed: u64) -> Vec<Self::Params>;
    /// Settings with the same group are ordered by [`Family::restraint`] for the one-SE rule.
    fn path_group(params: &Self::Params) -> String;
    /// How strongly a setting restrains the fit within its group: larger is simpler.
    fn restraint(params: &Self::Params) -> f64;
    /// The setting as the log shows it, after the family's name (`max_depth=3 min_leaf=1`).
    fn describe(params: &Self::Params) -> String;
    fn fit(x: &[f64], p: usize, y: &[u8], params: &Self::Params) -> Result<Self, FitError>;
    fn probability(&self, z: &[f64]) -> f64;
    fn probabilities(&self, x: &[f64], p: usize) -> Vec<f64>;
    /// Adds each column's contribution to the probability of the preprocessed row `z` into
    /// `columns` and returns the base they start from (base + contributions = probability);
    /// `None` for a family without per-feature contributions.
    fn add_contributions(&self, _z: &[f64], _columns: &mut [f64]) -> Option<f64> {
        None
    }
}

/// A grid value the config may not use: the grid's key and the rule it breaks.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct GridError {
    pub field: &'static str,
    pub rule: String,
}

/// Checks a non-empty grid of values within `[min, max]`.
pub fn check_range<T: Copy + PartialOrd + std::fmt::Display>(
    field: &'static str,
    values: &[T],
    min: T,
    max: T,
) -> Result<(), GridError> {
    if values.is_empty() {
        return Err(GridError {
            field,
            rule: "list at least one value".into(),
        });
    }
    if values.iter().any(|v| *v < min || *v > max) {
        return Err(GridError {
            field,
            rule: format!("every value must be between {min} and {max}"),
        });
    }
    Ok(())
}

/// Most training rows a tree or forest accepts: split impurities are compared exactly as `u128`
/// fractions, and their cross products stay below 2^128 up to n = 2^26 (they are at most n⁵/64).
const MAX_TREE_ROWS: usize = 1 << 26;

// Shared checks

/// Checks the training contract shared by all families and returns the number of rows.
pub(super) fn check_training(x: &[f64], p: usize, y: &[u8]) -> Result<usize, FitError> {
    let n = y.len();
    if n == 0 || p == 0 {
        return Err(FitError::Empty);
    }
    if n.checked_mul(p) != Some(x.len()) {
        return Err(FitError::Solver(format!(
            "the training matrix holds {} values, not {n} rows × {p} columns",
            x.len()
        )));
    }
    if let Some(label) = y.iter().find(|&&label| label > 1) {
        return Err(FitError::Solver(format!(
            "labels must be 0 or 1, found {label}"
        )));
    }
    if x.iter().any(|value| !value.is_finite()) {
        return Err(FitError::Solver(
            "the training matrix holds a non-finite value".into(),
        ));
    }
    let positives = y.iter().filter(|&&label| label == 1).count();
    if positives == 0 || positives == n {
        return Err(FitError::OneClass);
    }
    Ok(n)
}

pub(super) fn at_least_one(name: &str, value: usize) -> Result<(), FitError> {
    if value == 0 {
        Err(FitError::Solver(format!("{name} must be at least 1")))
    } else {
        Ok(())
    }
}

pub(super) fn check_tree_rows(n: usize) -> Result<(), FitError> {
    if n > MAX_TREE_ROWS {
        Err(FitError::Solver(format!(
            "trees train on at most {MAX_TREE_ROWS} rows, got {n}"
        )))
    } else {
        Ok(())
    }
}

pub(super) fn check_width(z: &[f64], features: usize) {
    assert_eq!(
        z.len(),
        features,
        "a row has {} values, the model takes {features}",
        z.len()
    );
}

/// Scores every row of a row-major batch.
pub(super) fn score_rows(
    x: &[f64],
    p: usize,
    features: usize,
    score: impl Fn(&[f64]) -> f64,
) -> Vec<f64> {
    assert_eq!(
        p, features,
        "the batch has {p} columns, the model takes {features}"
    );
    assert_eq!(x.len() % p, 0, "the batch length is not a multiple of {p}");
    x.chunks_exact(p).map(score).collect()
}

#[cfg(test)]
mod tests;
