//! A single classification tree: CART with Gini impurity, leaves that keep their class counts.
//!
//! A tree also explains a score with per-column contributions (Saabas 2014, the path
//! decomposition): give every node the value the tree would predict if it stopped there, its
//! positive share among the training rows that reached it; walk the row's path from the root,
//! and credit each split's change in value, from the node to the child the row goes to, to the
//! column the split tests. The root's share plus the contributions is the leaf's share, the
//! tree's probability. Split nodes do not store their counts (the stored format is only the
//! leaves'), so the shares are summed up from the leaves once per model and kept beside it.

use std::sync::OnceLock;

use rand::seq::index;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use super::{
    at_least_one, check_range, check_training, check_tree_rows, check_width, score_rows, Family,
    FitError, GridError,
};

/// Hyperparameters of a single classification tree.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct TreeParams {
    /// Largest number of splits on a path from the root: 1 is a single split (a stump).
    pub max_depth: u16,
    /// Fewest training rows a leaf may hold.
    pub min_leaf: usize,
}

/// The tree grid in the config; unset keys take the starter file's suggestion.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TreeGrid {
    #[serde(default = "default_depth")]
    pub max_depth: Vec<u16>,
    #[serde(default = "default_min_leaf")]
    pub min_leaf: Vec<usize>,
}

fn default_depth() -> Vec<u16> {
    vec![3, 5]
}

pub(super) fn default_min_leaf() -> Vec<usize> {
    vec![1]
}

/// Deepest tree a grid may ask for (our own bound: deeper trees memorize the window).
pub(super) const MAX_DEPTH: u16 = 64;
/// Largest `min_leaf` a grid may ask for (our own bound).
pub(super) const MAX_MIN_LEAF: usize = 100_000;

/// Weighted label counts of a set of training rows.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub(super) struct Counts {
    pub(super) positives: u64,
    pub(super) negatives: u64,
}

impl Counts {
    pub(super) fn rows(self) -> u64 {
        self.positives + self.negatives
    }

    pub(super) fn add(&mut self, label: u8, weight: u64) {
        if label == 1 {
            self.positives += weight;
        } else {
            self.negatives += weight;
        }
    }

    pub(super) fn minus(self, other: Counts) -> Counts {
        Counts {
            positives: self.positives - other.positives,
            negatives: self.negatives - other.negatives,
        }
    }

    pub(super) fn is_pure(self) -> bool {
        self.positives == 0 || self.negatives == 0
    }
}

/// The Gini impurity of a node or of a split's two children weighted by their rows, up to the
/// constant factor 2/n, as an exact fraction: the sum over parts of positives · negatives / rows.
/// (Gini of a part is 2·pos·neg/rows²; weighting by rows/n gives 2·pos·neg/(rows·n).)
/// Exact comparison makes equal splits tie exactly, so the first one found wins, and a split that
/// does not lower the impurity is never taken for rounding noise.
#[derive(Debug, Clone, Copy)]
pub(super) struct Impurity {
    pub(super) numerator: u128,
    pub(super) denominator: u128,
}

impl Impurity {
    pub(super) fn of_node(counts: Counts) -> Self {
        Impurity {
            numerator: u128::from(counts.positives) * u128::from(counts.negatives),
            denominator: u128::from(counts.rows()),
        }
    }

    pub(super) fn of_split(left: Counts, right: Counts) -> Self {
        let (l, r) = (u128::from(left.rows()), u128::from(right.rows()));
        let left_part = u128::from(left.positives) * u128::from(left.negatives);
        let right_part = u128::from(right.positives) * u128::from(right.negatives);
        Impurity {
            numerator: left_part * r + right_part * l,
            denominator: l * r,
        }
    }

    pub(super) fn lower_than(self, other: Impurity) -> bool {
        self.numerator * other.denominator < other.numerator * self.denominator
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub(super) enum Node {
    /// Rows with `z[feature] <= threshold` go `left`, the others `right`.
    Split {
        feature: usize,
        threshold: f64,
        left: usize,
        right: usize,
    },
    /// The training rows that reached this leaf (with bootstrap multiplicity in a forest).
    Leaf { rows: u64, positives: u64 },
}

/// A tree as a node list with the root first. Every child comes after its parent, which the
/// deserializer checks, so a walk from the root always ends at a leaf.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(try_from = "Vec<Node>")]
pub(super) struct Tree(pub(super) Vec<Node>);

impl TryFrom<Vec<Node>> for Tree {
    type Error = String;

    fn try_from(nodes: Vec<Node>) -> Result<Self, String> {
        if nodes.is_empty() {
            return Err("a tree needs at least one node".into());
        }
        for (index, node) in nodes.iter().enumerate() {
            let valid = match *node {
                Node::Split {
                    threshold,
                    left,
                    right,
                    ..
                } => {
                    let after = |child: usize| child > index && child < nodes.len();
                    threshold.is_finite() && after(left) && after(right)
                }
                Node::Leaf { rows, positives } => rows > 0 && positives <= rows,
            };
            if !valid {
                return Err(format!("tree node {index} is malformed: {node:?}"));
            }
        }
        Ok(Tree(nodes))
    }
}

impl Tree {
    /// The leaf `z` falls in, as (rows, positives).
    pub(super) fn leaf(&self, z: &[f64]) -> (u64, u64) {
        let mut index = 0;
        loop {
            match self.0[index] {
                Node::Split {
                    feature,
                    threshold,
                    left,
                    right,
                } => index = if z[feature] <= threshold { left } else { right },
                Node::Leaf { rows, positives } => return (rows, positives),
            }
        }
    }

    pub(super) fn share(&self, z: &[f64]) -> f64 {
        let (rows, positives) = self.leaf(z);
        positives as f64 / rows as f64
    }

    /// The leaf's majority class; an even leaf votes negative, as an argmax over
    /// (negative, positive) that keeps the first maximum would.
    pub(super) fn votes_positive(&self, z: &[f64]) -> bool {
        let (rows, positives) = self.leaf(z);
        majority_positive(rows, positives)
    }

    /// Every node's positive share among the training rows that reached it (with bootstrap
    /// multiplicity in a forest): a leaf's from its counts, a split's from the leaves below it.
    /// Children come after their parent, so one pass from the end sums every subtree. Sums
    /// saturate, so a hand-made tree whose splits share a child gives odd shares, not a panic.
    pub(super) fn node_shares(&self) -> Vec<f64> {
        let mut counts = vec![(0u64, 0u64); self.0.len()];
        for index in (0..self.0.len()).rev() {
            counts[index] = match self.0[index] {
                Node::Split { left, right, .. } => (
                    counts[left].0.saturating_add(counts[right].0),
                    counts[left].1.saturating_add(counts[right].1),
                ),
                Node::Leaf { rows, positives } => (rows, positives),
            };
        }
        counts
            .into_iter()
            .map(|(rows, positives)| positives as f64 / rows as f64)
            .collect()
    }

    /// The Saabas decomposition of `z`'s path: adds each split's change in value, from the node
    /// to the child `z` goes to, to `columns[feature]`, and returns the value the path starts
    /// from. A node's value is its share in `shares` (from [`Tree::node_shares`]), except that
    /// with [`PathEnd::Vote`] the leaf's value is its vote, 1 or 0. The start plus the changes is
    /// the leaf's value; a tree that is a single leaf starts at that value and adds nothing.
    pub(super) fn add_path_contributions(
        &self,
        z: &[f64],
        shares: &[f64],
        end: PathEnd,
        columns: &mut [f64],
    ) -> f64 {
        let value = |index: usize| match (end, &self.0[index]) {
            (PathEnd::Vote, &Node::Leaf { rows, positives }) => {
                if majority_positive(rows, positives) {
                    1.0
                } else {
                    0.0
                }
            }
            _ => shares[index],
        };
        let mut index = 0;
        while let Node::Split {
            feature,
            threshold,
            left,
            right,
        } = self.0[index]
        {
            let child = if z[feature] <= threshold { left } else { right };
            columns[feature] += value(child) - value(index);
            index = child;
        }
        value(0)
    }
}

/// What a path's last step goes to in [`Tree::add_path_contributions`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum PathEnd {
    /// The leaf's positive share: a tree's probability.
    Share,
    /// The leaf's vote: a forest's tree, whose probability is the forest's share of votes.
    Vote,
}

fn majority_positive(rows: u64, positives: u64) -> bool {
    2 * positives > rows
}

/// A value derived from a model's stored fields on its first use and kept beside them. It is
/// not serialized and never part of equality, so a model is equal to its own round trip whether
/// or not it has scored a row.
pub(super) struct Derived<T>(OnceLock<T>);

impl<T> Derived<T> {
    pub(super) fn get_or_init(&self, derive: impl FnOnce() -> T) -> &T {
        self.0.get_or_init(derive)
    }
}

impl<T> Default for Derived<T> {
    fn default() -> Self {
        Derived(OnceLock::new())
    }
}

impl<T: Clone> Clone for Derived<T> {
    fn clone(&self) -> Self {
        Derived(self.0.clone())
    }
}

impl<T> PartialEq for Derived<T> {
    fn eq(&self, _: &Self) -> bool {
        true
    }
}

impl<T> std::fmt::Debug for Derived<T> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let state = if self.0.get().is_some() {
            "derived"
        } else {
            "not yet derived"
        };
        f.write_str(state)
    }
}

/// Which features a node may split on.
pub(super) enum Candidates<'r> {
    All,
    /// A fresh draw without replacement at every node (Breiman's random forests).
    Drawn {
        per_split: usize,
        rng: &'r mut ChaCha8Rng,
    },
}

impl Candidates<'_> {
    pub(super) fn draw(&mut self, p: usize) -> Vec<usize> {
        match self {
            Candidates::All => (0..p).collect(),
            Candidates::Drawn { per_split, rng } => {
                index::sample(&mut **rng, p, *per_split).into_vec()
            }
        }
    }
}

/// Grows one CART tree, greedily and depth-first with an explicit stack: at each node the split
/// (feature, threshold) with the lowest weighted Gini impurity, if it is lower than the node's
/// own and leaves at least `min_leaf` rows on each side.
pub(super) struct Grower<'a> {
    pub(super) x: &'a [f64],
    pub(super) p: usize,
    pub(super) y: &'a [u8],
    /// Multiplicity of each training row: 1 for a plain tree, the bootstrap count in a forest.
    pub(super) weights: &'a [u32],
    pub(super) max_depth: u16,
    pub(super) min_leaf: u64,
}

/// One row seen from a candidate feature: (value, label, weight).
pub(super) type Entry = (f64, u8, u64);

impl Grower<'_> {
    pub(super) fn grow(&self, candidates: &mut Candidates<'_>) -> Tree {
        let mut rows: Vec<usize> = (0..self.y.len()).filter(|&i| self.weights[i] > 0).collect();
        let unset = Node::Leaf {
            rows: 0,
            positives: 0,
        };
        let mut nodes = vec![unset.clone()];
        // (node index, range of `rows` it holds, depth)
        let mut pending = vec![(0, 0, rows.len(), 0u16)];
        let mut scratch = Vec::new();
        while let Some((index, start, end, depth)) = pending.pop() {
            let part = &mut rows[start..end];
            let counts = self.counts(part);
            let split = if depth < self.max_depth {
                self.best_split(part, counts, candidates, &mut scratch)
            } else {
                None
            };
            let Some((feature, threshold)) = split else {
                nodes[index] = Node::Leaf {
                    rows: counts.rows(),
                    positives: counts.positives,
                };
                continue;
            };
            let middle = start + self.partition(part, feature, threshold);
            let (left, right) = (nodes.len(), nodes.len() + 1);
            nodes.push(unset.clone());
            nodes.push(unset.clone());
            nodes[index] = Node::Split {
                feature,
                threshold,
                left,
                right,
            };
            pending.push((right, middle, end, depth + 1));
            pending.push((left, start, middle, depth + 1));
        }
        Tree(nodes)
    }

    pub(super) fn counts(&self, rows: &[usize]) -> Counts {
        let mut counts = Counts::default();
        for &row in rows {
            counts.add(self.y[row], u64::from(self.weights[row]));
        }
        counts
    }

    pub(super) fn best_split(
        &self,
        rows: &[usize],
        counts: Counts,
        candidates: &mut Candidates<'_>,
        scratch: &mut Vec<Entry>,
    ) -> Option<(usize, f64)> {
        if counts.is_pure() || counts.rows() < 2 * self.min_leaf {
            return None;
        }
        let mut best: Option<(Impurity, usize, f64)> = None;
        for feature in candidates.draw(self.p) {
            scratch.clear();
            scratch.extend(rows.iter().map(|&row| {
                let value = self.x[row * self.p + feature];
                (value, self.y[row], u64::from(self.weights[row]))
            }));
            scratch.sort_unstable_by(|a, b| a.0.total_cmp(&b.0));
            let mut left = Counts::default();
            for pair in scratch.windows(2) {
                let ((value, label, weight), next) = (pair[0], pair[1].0);
                left.add(label, weight);
                if value == next {
                    continue;
                }
                let right = counts.minus(left);
                if right.rows() < self.min_leaf {
                    break;
                }
                if left.rows() < self.min_leaf {
                    continue;
                }
                let impurity = Impurity::of_split(left, right);
                if best.is_none_or(|(lowest, ..)| impurity.lower_than(lowest)) {
                    best = Some((impurity, feature, threshold_between(value, next)));
                }
            }
        }
        best.filter(|(impurity, ..)| impurity.lower_than(Impurity::of_node(counts)))
            .map(|(_, feature, threshold)| (feature, threshold))
    }

    /// Moves the rows going left to the front and returns how many there are.
    pub(super) fn partition(&self, rows: &mut [usize], feature: usize, threshold: f64) -> usize {
        let mut middle = 0;
        for i in 0..rows.len() {
            if self.x[rows[i] * self.p + feature] <= threshold {
                rows.swap(i, middle);
                middle += 1;
            }
        }
        middle
    }
}

/// A threshold between consecutive distinct values `low < high` that sends `low` left and `high`
/// right: their midpoint, or `low` itself when the midpoint rounds up to `high` (adjacent floats).
pub(super) fn threshold_between(low: f64, high: f64) -> f64 {
    let middle = low / 2.0 + high / 2.0;
    if middle < high {
        middle
    } else {
        low
    }
}

/// A single CART classification tree; the probability is the share of positive training rows in
/// the leaf the row falls in.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TreeModel {
    pub(super) features: usize,
    pub(super) nodes: Tree,
    /// Every node's positive share, for contributions.
    #[serde(skip)]
    pub(super) shares: Derived<Vec<f64>>,
}

impl TreeModel {
    pub fn fit(x: &[f64], p: usize, y: &[u8], params: &TreeParams) -> Result<Self, FitError> {
        at_least_one("max_depth", usize::from(params.max_depth))?;
        at_least_one("min_leaf", params.min_leaf)?;
        let n = check_training(x, p, y)?;
        check_tree_rows(n)?;
        let weights = vec![1; n];
        let grower = Grower {
            x,
            p,
            y,
            weights: &weights,
            max_depth: params.max_depth,
            min_leaf: params.min_leaf as u64,
        };
        Ok(TreeModel {
            features: p,
            nodes: grower.grow(&mut Candidates::All),
            shares: Derived::default(),
        })
    }

    pub fn probability(&self, z: &[f64]) -> f64 {
        check_width(z, self.features);
        self.nodes.share(z)
    }

    pub fn probabilities(&self, x: &[f64], p: usize) -> Vec<f64> {
        score_rows(x, p, self.features, |z| self.nodes.share(z))
    }

    /// Adds each column's contribution to the probability of `z` (Saabas's path decomposition,
    /// see the module docs) to `columns` and returns the root's positive share, the training
    /// rows' base rate: the root's share plus every contribution is [`TreeModel::probability`].
    pub fn add_contributions(&self, z: &[f64], columns: &mut [f64]) -> f64 {
        check_width(z, self.features);
        assert_eq!(columns.len(), self.features, "one contribution per column");
        let shares = self.shares.get_or_init(|| self.nodes.node_shares());
        self.nodes
            .add_path_contributions(z, shares, PathEnd::Share, columns)
    }
}

impl Family for TreeModel {
    const NAME: &'static str = "decision_tree";
    type Params = TreeParams;
    type Grid = TreeGrid;
    fn check_grid(grid: &TreeGrid) -> Result<(), GridError> {
        check_range("max_depth", &grid.max_depth, 1, MAX_DEPTH)?;
        check_range("min_leaf", &grid.min_leaf, 1, MAX_MIN_LEAF)
    }
    fn settings(grid: &TreeGrid, _seed: u64) -> Vec<TreeParams> {
        let mut out = Vec::new();
        for &max_depth in &grid.max_depth {
            for &min_leaf in &grid.min_leaf {
                out.push(TreeParams {
                    max_depth,
                    min_leaf,
                });
            }
        }
        out
    }
    fn path_group(params: &TreeParams) -> String {
        format!("{}/min_leaf={}", Self::NAME, params.min_leaf)
    }
    fn restraint(params: &TreeParams) -> f64 {
        -f64::from(params.max_depth)
    }
    fn describe(params: &TreeParams) -> String {
        format!(
            "max_depth={} min_leaf={}",
            params.max_depth, params.min_leaf
        )
    }
    fn fit(x: &[f64], p: usize, y: &[u8], params: &TreeParams) -> Result<Self, FitError> {
        TreeModel::fit(x, p, y, params)
    }
    fn probability(&self, z: &[f64]) -> f64 {
        TreeModel::probability(self, z)
    }
    fn probabilities(&self, x: &[f64], p: usize) -> Vec<f64> {
        TreeModel::probabilities(self, x, p)
    }
    fn add_contributions(&self, z: &[f64], columns: &mut [f64]) -> Option<f64> {
        Some(TreeModel::add_contributions(self, z, columns))
    }
}
