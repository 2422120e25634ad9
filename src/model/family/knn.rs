//! k-nearest neighbours by Euclidean distance, brute force, with a stated tie rule.

use serde::{Deserialize, Serialize};

use super::{
    at_least_one, check_range, check_training, check_width, score_rows, Family, FitError, GridError,
};

/// Hyperparameters of k-nearest neighbours.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct KnnParams {
    pub k: usize,
}

/// The kNN grid in the config; unset keys take the starter file's suggestion.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct KnnGrid {
    #[serde(default = "default_k")]
    pub k: Vec<usize>,
}

fn default_k() -> Vec<usize> {
    vec![50, 150]
}

/// Largest k a grid may ask for (our own bound: every score sorts k neighbours).
const MAX_K: usize = 1000;

/// k-nearest neighbours by Euclidean distance on the preprocessed columns, brute force; the
/// probability is the share of positives among the k nearest training rows. Neighbours are
/// ordered by (distance, training row index), so at a tie at the k-th distance the earlier
/// training rows are taken.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct KnnModel {
    pub(super) k: usize,
    pub(super) features: usize,
    /// The training matrix, row-major.
    pub(super) rows: Vec<f64>,
    pub(super) labels: Vec<u8>,
}

impl KnnModel {
    pub fn fit(x: &[f64], p: usize, y: &[u8], params: &KnnParams) -> Result<Self, FitError> {
        at_least_one("k", params.k)?;
        let n = check_training(x, p, y)?;
        if params.k > n {
            return Err(FitError::Solver(format!(
                "k = {} exceeds the {n} training rows",
                params.k
            )));
        }
        Ok(KnnModel {
            k: params.k,
            features: p,
            rows: x.to_vec(),
            labels: y.to_vec(),
        })
    }

    pub fn probability(&self, z: &[f64]) -> f64 {
        check_width(z, self.features);
        self.positive_share(z)
    }

    pub fn probabilities(&self, x: &[f64], p: usize) -> Vec<f64> {
        score_rows(x, p, self.features, |z| self.positive_share(z))
    }

    pub(super) fn positive_share(&self, z: &[f64]) -> f64 {
        // Squared distances order the rows exactly as distances do.
        let mut neighbours: Vec<(f64, usize)> = self
            .rows
            .chunks_exact(self.features)
            .map(|row| {
                row.iter()
                    .zip(z)
                    .map(|(a, b)| (a - b) * (a - b))
                    .sum::<f64>()
            })
            .zip(0..)
            .collect();
        let nearest_first =
            |a: &(f64, usize), b: &(f64, usize)| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1));
        neighbours.select_nth_unstable_by(self.k - 1, nearest_first);
        let positives = neighbours[..self.k]
            .iter()
            .filter(|&&(_, row)| self.labels[row] == 1)
            .count();
        positives as f64 / self.k as f64
    }
}

impl Family for KnnModel {
    const NAME: &'static str = "knn";
    type Params = KnnParams;
    type Grid = KnnGrid;
    fn check_grid(grid: &KnnGrid) -> Result<(), GridError> {
        check_range("k", &grid.k, 1, MAX_K)
    }
    fn settings(grid: &KnnGrid, _seed: u64) -> Vec<KnnParams> {
        grid.k.iter().map(|&k| KnnParams { k }).collect()
    }
    fn path_group(_: &KnnParams) -> String {
        Self::NAME.to_owned()
    }
    /// More neighbours averaged is simpler.
    fn restraint(params: &KnnParams) -> f64 {
        params.k as f64
    }
    fn describe(params: &KnnParams) -> String {
        format!("k={}", params.k)
    }
    fn fit(x: &[f64], p: usize, y: &[u8], params: &KnnParams) -> Result<Self, FitError> {
        KnnModel::fit(x, p, y, params)
    }
    fn probability(&self, z: &[f64]) -> f64 {
        KnnModel::probability(self, z)
    }
    fn probabilities(&self, x: &[f64], p: usize) -> Vec<f64> {
        KnnModel::probabilities(self, x, p)
    }
}
