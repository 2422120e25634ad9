//! A random forest: bootstrap samples, √p features drawn at each split, trees' votes averaged.
//!
//! Contributions. The forest's probability is the share of trees voting positive (a hard vote),
//! not the mean of the leaves' shares, so plain Saabas contributions per tree would not add up to
//! it. Each tree's path is valued as in a single tree (every node at its positive in-bag share)
//! except its last step, which goes to the tree's vote (1 or 0) instead of the leaf's share; the
//! tree's contributions then add up to its vote minus its root's share. A column's contribution
//! to the forest is the mean over trees of its contributions, and the forest's base is the mean
//! of the trees' starting values (the root's in-bag share; the vote itself for a tree that is a
//! single leaf, which has no split to credit). Base plus contributions is the share of votes, the
//! forest's probability, up to floating-point rounding.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use super::tree::{
    default_min_leaf, Candidates, Derived, Grower, PathEnd, Tree, MAX_DEPTH, MAX_MIN_LEAF,
};
use super::{
    at_least_one, check_range, check_training, check_tree_rows, check_width, score_rows, Family,
    FitError, GridError,
};

/// Hyperparameters of a random forest.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ForestParams {
    pub trees: usize,
    pub max_depth: u16,
    /// Fewest in-bag rows (counted with bootstrap multiplicity) a leaf may hold.
    pub min_leaf: usize,
    /// Seeds the bootstrap samples and the features drawn at each split.
    pub seed: u64,
}

/// The forest grid in the config; unset keys take the starter file's suggestion.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ForestGrid {
    #[serde(default = "default_trees")]
    pub trees: Vec<usize>,
    #[serde(default = "default_depth")]
    pub max_depth: Vec<u16>,
    #[serde(default = "default_min_leaf")]
    pub min_leaf: Vec<usize>,
}

fn default_trees() -> Vec<usize> {
    vec![100]
}

fn default_depth() -> Vec<u16> {
    vec![6]
}

/// Most trees a grid may ask for (our own bound: the model is stored whole).
const MAX_TREES: usize = 2000;

/// Features tried at each split: √p rounded, at least 1. The √p default for classification is
/// common practice, no source checked here (scikit-learn 1.9.1's `max_features="sqrt"` floors
/// instead of rounding: `max(1, int(np.sqrt(n_features)))` in `sklearn/tree/_classes.py`).
pub(super) fn features_per_split(p: usize) -> usize {
    ((p as f64).sqrt().round() as usize).clamp(1, p)
}

/// Breiman's random forest of CART trees, each grown on a bootstrap sample with a random subset
/// of the features tried at every split; the probability is the share of trees whose leaf votes
/// positive. Tree `t` draws from ChaCha8 seeded with `seed` on stream `t`, so the forest depends
/// only on the data and the parameters, and each tree only on its own index.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ForestModel {
    pub(super) features: usize,
    pub(super) trees: Vec<Tree>,
    /// Every tree's node shares, for contributions.
    #[serde(skip)]
    pub(super) shares: Derived<Vec<Vec<f64>>>,
}

impl ForestModel {
    pub fn fit(x: &[f64], p: usize, y: &[u8], params: &ForestParams) -> Result<Self, FitError> {
        at_least_one("trees", params.trees)?;
        at_least_one("max_depth", usize::from(params.max_depth))?;
        at_least_one("min_leaf", params.min_leaf)?;
        let n = check_training(x, p, y)?;
        check_tree_rows(n)?;
        let per_split = features_per_split(p);
        let trees = (0..params.trees)
            .map(|t| {
                let mut rng = ChaCha8Rng::seed_from_u64(params.seed);
                rng.set_stream(t as u64);
                let mut weights = vec![0u32; n];
                for _ in 0..n {
                    weights[rng.gen_range(0..n)] += 1;
                }
                let grower = Grower {
                    x,
                    p,
                    y,
                    weights: &weights,
                    max_depth: params.max_depth,
                    min_leaf: params.min_leaf as u64,
                };
                grower.grow(&mut Candidates::Drawn {
                    per_split,
                    rng: &mut rng,
                })
            })
            .collect();
        Ok(ForestModel {
            features: p,
            trees,
            shares: Derived::default(),
        })
    }

    pub fn probability(&self, z: &[f64]) -> f64 {
        check_width(z, self.features);
        self.vote_share(z)
    }

    pub fn probabilities(&self, x: &[f64], p: usize) -> Vec<f64> {
        score_rows(x, p, self.features, |z| self.vote_share(z))
    }

    pub(super) fn vote_share(&self, z: &[f64]) -> f64 {
        let votes = self
            .trees
            .iter()
            .filter(|tree| tree.votes_positive(z))
            .count();
        votes as f64 / self.trees.len() as f64
    }

    /// Adds each column's contribution to the probability of `z` (the mean over trees of their
    /// path contributions ending at their vote, see the module docs) to `columns`, and returns the
    /// forest's base: the base plus every contribution is [`ForestModel::probability`].
    pub fn add_contributions(&self, z: &[f64], columns: &mut [f64]) -> f64 {
        check_width(z, self.features);
        assert_eq!(columns.len(), self.features, "one contribution per column");
        let shares = self
            .shares
            .get_or_init(|| self.trees.iter().map(Tree::node_shares).collect());
        let mut sums = vec![0.0; self.features];
        let mut base = 0.0;
        for (tree, shares) in self.trees.iter().zip(shares) {
            base += tree.add_path_contributions(z, shares, PathEnd::Vote, &mut sums);
        }
        let trees = self.trees.len() as f64;
        for (column, sum) in columns.iter_mut().zip(sums) {
            *column += sum / trees;
        }
        base / trees
    }
}

impl Family for ForestModel {
    const NAME: &'static str = "random_forest";
    type Params = ForestParams;
    type Grid = ForestGrid;
    fn check_grid(grid: &ForestGrid) -> Result<(), GridError> {
        check_range("trees", &grid.trees, 1, MAX_TREES)?;
        check_range("max_depth", &grid.max_depth, 1, MAX_DEPTH)?;
        check_range("min_leaf", &grid.min_leaf, 1, MAX_MIN_LEAF)
    }
    fn settings(grid: &ForestGrid, seed: u64) -> Vec<ForestParams> {
        let mut out = Vec::new();
        for &trees in &grid.trees {
            for &max_depth in &grid.max_depth {
                for &min_leaf in &grid.min_leaf {
                    out.push(ForestParams {
                        trees,
                        max_depth,
                        min_leaf,
                        seed,
                    });
                }
            }
        }
        out
    }
    fn path_group(params: &ForestParams) -> String {
        format!(
            "{}/trees={}/min_leaf={}",
            Self::NAME,
            params.trees,
            params.min_leaf
        )
    }
    fn restraint(params: &ForestParams) -> f64 {
        -f64::from(params.max_depth)
    }
    fn describe(params: &ForestParams) -> String {
        format!(
            "trees={} max_depth={} min_leaf={}",
            params.trees, params.max_depth, params.min_leaf
        )
    }
    fn fit(x: &[f64], p: usize, y: &[u8], params: &ForestParams) -> Result<Self, FitError> {
        ForestModel::fit(x, p, y, params)
    }
    fn probability(&self, z: &[f64]) -> f64 {
        ForestModel::probability(self, z)
    }
    fn probabilities(&self, x: &[f64], p: usize) -> Vec<f64> {
        ForestModel::probabilities(self, x, p)
    }
    fn add_contributions(&self, z: &[f64], columns: &mut [f64]) -> Option<f64> {
        Some(ForestModel::add_contributions(self, z, columns))
    }
}
