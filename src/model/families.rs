//! Non-linear estimator families (decision tree, k-nearest neighbours, Gaussian naive Bayes,
//! random forest) that give a probability for the positive class on a preprocessed row.
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

use rand::seq::index;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use super::FitError;

/// Hyperparameters of a single classification tree.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct TreeParams {
    /// Largest number of splits on a path from the root: 1 is a single split (a stump).
    pub max_depth: u16,
    /// Fewest training rows a leaf may hold.
    pub min_leaf: usize,
}

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

/// Hyperparameters of k-nearest neighbours.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct KnnParams {
    pub k: usize,
}

/// Most training rows a tree or forest accepts: split impurities are compared exactly as `u128`
/// fractions, and their cross products stay below 2^128 up to n = 2^26 (they are at most n⁵/64).
const MAX_TREE_ROWS: usize = 1 << 26;

/// scikit-learn's `GaussianNB(var_smoothing=1e-9)` default: "portion of the largest variance of
/// all features that is added to variances for calculation stability" (scikit-learn
/// `sklearn.naive_bayes.GaussianNB` documentation; in 1.9.1 `epsilon_ = var_smoothing *
/// max(var(X, axis=0))`, added to every class variance).
const VAR_SMOOTHING: f64 = 1e-9;

/// Cap on one feature's squared standardized deviation in naive Bayes, (z − mean)² / variance.
/// A real row never comes near it (it is 1e150 standard deviations), and with it every log joint
/// likelihood stays finite even for infinite or NaN inputs. Our own guard.
const SQUARED_DEVIATION_CAP: f64 = 1e300;

// ---------------------------------------------------------------------------------------------
// Shared checks

/// Checks the training contract shared by all families and returns the number of rows.
fn check_training(x: &[f64], p: usize, y: &[u8]) -> Result<usize, FitError> {
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

fn at_least_one(name: &str, value: usize) -> Result<(), FitError> {
    if value == 0 {
        Err(FitError::Solver(format!("{name} must be at least 1")))
    } else {
        Ok(())
    }
}

fn check_tree_rows(n: usize) -> Result<(), FitError> {
    if n > MAX_TREE_ROWS {
        Err(FitError::Solver(format!(
            "trees train on at most {MAX_TREE_ROWS} rows, got {n}"
        )))
    } else {
        Ok(())
    }
}

fn check_width(z: &[f64], features: usize) {
    assert_eq!(
        z.len(),
        features,
        "a row has {} values, the model takes {features}",
        z.len()
    );
}

/// Scores every row of a row-major batch.
fn score_rows(x: &[f64], p: usize, features: usize, score: impl Fn(&[f64]) -> f64) -> Vec<f64> {
    assert_eq!(
        p, features,
        "the batch has {p} columns, the model takes {features}"
    );
    assert_eq!(x.len() % p, 0, "the batch length is not a multiple of {p}");
    x.chunks_exact(p).map(score).collect()
}

// ---------------------------------------------------------------------------------------------
// Decision tree (CART with Gini impurity)

/// Weighted label counts of a set of training rows.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
struct Counts {
    positives: u64,
    negatives: u64,
}

impl Counts {
    fn rows(self) -> u64 {
        self.positives + self.negatives
    }

    fn add(&mut self, label: u8, weight: u64) {
        if label == 1 {
            self.positives += weight;
        } else {
            self.negatives += weight;
        }
    }

    fn minus(self, other: Counts) -> Counts {
        Counts {
            positives: self.positives - other.positives,
            negatives: self.negatives - other.negatives,
        }
    }

    fn is_pure(self) -> bool {
        self.positives == 0 || self.negatives == 0
    }
}

/// The Gini impurity of a node or of a split's two children weighted by their rows, up to the
/// constant factor 2/n, as an exact fraction: the sum over parts of positives · negatives / rows.
/// (Gini of a part is 2·pos·neg/rows²; weighting by rows/n gives 2·pos·neg/(rows·n).)
/// Exact comparison makes equal splits tie exactly, so the first one found wins, and a split that
/// does not lower the impurity is never taken for rounding noise.
#[derive(Debug, Clone, Copy)]
struct Impurity {
    numerator: u128,
    denominator: u128,
}

impl Impurity {
    fn of_node(counts: Counts) -> Self {
        Impurity {
            numerator: u128::from(counts.positives) * u128::from(counts.negatives),
            denominator: u128::from(counts.rows()),
        }
    }

    fn of_split(left: Counts, right: Counts) -> Self {
        let (l, r) = (u128::from(left.rows()), u128::from(right.rows()));
        let left_part = u128::from(left.positives) * u128::from(left.negatives);
        let right_part = u128::from(right.positives) * u128::from(right.negatives);
        Impurity {
            numerator: left_part * r + right_part * l,
            denominator: l * r,
        }
    }

    fn lower_than(self, other: Impurity) -> bool {
        self.numerator * other.denominator < other.numerator * self.denominator
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
enum Node {
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
struct Tree(Vec<Node>);

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
    fn leaf(&self, z: &[f64]) -> (u64, u64) {
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

    fn share(&self, z: &[f64]) -> f64 {
        let (rows, positives) = self.leaf(z);
        positives as f64 / rows as f64
    }

    /// The leaf's majority class; an even leaf votes negative, as an argmax over
    /// (negative, positive) that keeps the first maximum would.
    fn votes_positive(&self, z: &[f64]) -> bool {
        let (rows, positives) = self.leaf(z);
        2 * positives > rows
    }
}

/// Which features a node may split on.
enum Candidates<'r> {
    All,
    /// A fresh draw without replacement at every node (Breiman's random forests).
    Drawn {
        per_split: usize,
        rng: &'r mut ChaCha8Rng,
    },
}

impl Candidates<'_> {
    fn draw(&mut self, p: usize) -> Vec<usize> {
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
struct Grower<'a> {
    x: &'a [f64],
    p: usize,
    y: &'a [u8],
    /// Multiplicity of each training row: 1 for a plain tree, the bootstrap count in a forest.
    weights: &'a [u32],
    max_depth: u16,
    min_leaf: u64,
}

/// One row seen from a candidate feature: (value, label, weight).
type Entry = (f64, u8, u64);

impl Grower<'_> {
    fn grow(&self, candidates: &mut Candidates<'_>) -> Tree {
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

    fn counts(&self, rows: &[usize]) -> Counts {
        let mut counts = Counts::default();
        for &row in rows {
            counts.add(self.y[row], u64::from(self.weights[row]));
        }
        counts
    }

    fn best_split(
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
    fn partition(&self, rows: &mut [usize], feature: usize, threshold: f64) -> usize {
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
fn threshold_between(low: f64, high: f64) -> f64 {
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
    features: usize,
    nodes: Tree,
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
        })
    }

    pub fn probability(&self, z: &[f64]) -> f64 {
        check_width(z, self.features);
        self.nodes.share(z)
    }

    pub fn probabilities(&self, x: &[f64], p: usize) -> Vec<f64> {
        score_rows(x, p, self.features, |z| self.nodes.share(z))
    }
}

// ---------------------------------------------------------------------------------------------
// Random forest

/// Features tried at each split: √p rounded, at least 1. The √p default for classification is
/// common practice, no source checked here (scikit-learn 1.9.1's `max_features="sqrt"` floors
/// instead of rounding: `max(1, int(np.sqrt(n_features)))` in `sklearn/tree/_classes.py`).
fn features_per_split(p: usize) -> usize {
    ((p as f64).sqrt().round() as usize).clamp(1, p)
}

/// Breiman's random forest of CART trees, each grown on a bootstrap sample with a random subset
/// of the features tried at every split; the probability is the share of trees whose leaf votes
/// positive. Tree `t` draws from ChaCha8 seeded with `seed` on stream `t`, so the forest depends
/// only on the data and the parameters, and each tree only on its own index.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ForestModel {
    features: usize,
    trees: Vec<Tree>,
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
        Ok(ForestModel { features: p, trees })
    }

    pub fn probability(&self, z: &[f64]) -> f64 {
        check_width(z, self.features);
        self.vote_share(z)
    }

    pub fn probabilities(&self, x: &[f64], p: usize) -> Vec<f64> {
        score_rows(x, p, self.features, |z| self.vote_share(z))
    }

    fn vote_share(&self, z: &[f64]) -> f64 {
        let votes = self
            .trees
            .iter()
            .filter(|tree| tree.votes_positive(z))
            .count();
        votes as f64 / self.trees.len() as f64
    }
}

// ---------------------------------------------------------------------------------------------
// k-nearest neighbours

/// k-nearest neighbours by Euclidean distance on the preprocessed columns, brute force; the
/// probability is the share of positives among the k nearest training rows. Neighbours are
/// ordered by (distance, training row index), so at a tie at the k-th distance the earlier
/// training rows are taken.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct KnnModel {
    k: usize,
    features: usize,
    /// The training matrix, row-major.
    rows: Vec<f64>,
    labels: Vec<u8>,
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

    fn positive_share(&self, z: &[f64]) -> f64 {
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

// ---------------------------------------------------------------------------------------------
// Gaussian naive Bayes

/// One class's part of a Gaussian naive Bayes model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct ClassGaussians {
    rows: u64,
    means: Vec<f64>,
    /// Population variances plus the model's smoothing.
    variances: Vec<f64>,
}

impl ClassGaussians {
    fn fit(rows: &[&[f64]], p: usize, smoothing: f64) -> Self {
        let (means, variances) = column_moments(rows, p);
        ClassGaussians {
            rows: rows.len() as u64,
            means,
            variances: variances.into_iter().map(|v| v + smoothing).collect(),
        }
    }

    fn is_finite(&self) -> bool {
        self.means
            .iter()
            .chain(&self.variances)
            .all(|v| v.is_finite())
    }

    /// ln P(class) + Σ ln N(z_j; mean_j, variance_j), finite for any `z` (see
    /// [`SQUARED_DEVIATION_CAP`]).
    fn log_joint(&self, z: &[f64], total_rows: u64) -> f64 {
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
fn column_moments(rows: &[&[f64]], p: usize) -> (Vec<f64>, Vec<f64>) {
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
    features: usize,
    negative: ClassGaussians,
    positive: ClassGaussians,
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
    fn log_joints(&self, z: &[f64]) -> (f64, f64) {
        let total = self.negative.rows + self.positive.rows;
        (
            self.negative.log_joint(z, total),
            self.positive.log_joint(z, total),
        )
    }

    /// P(positive | z) by log-sum-exp over the two log joints.
    fn posterior(&self, z: &[f64]) -> f64 {
        let (negative, positive) = self.log_joints(z);
        let top = negative.max(positive);
        let (negative, positive) = ((negative - top).exp(), (positive - top).exp());
        positive / (negative + positive)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::metrics::auc;

    /// The Wisconsin diagnostic breast-cancer data as smartcore ships it (f32, widened), every
    /// column standardized over all rows with the population standard deviation, split the way
    /// the reference scripts split it: rows whose index is a multiple of 4 are held out.
    struct BreastCancer {
        p: usize,
        train_x: Vec<f64>,
        train_y: Vec<u8>,
        test_x: Vec<f64>,
        test_y: Vec<u8>,
        labels: Vec<u8>,
        raw_column_means: Vec<f64>,
    }

    fn breast_cancer() -> BreastCancer {
        let data = smartcore::dataset::breast_cancer::load_dataset();
        let (n, p) = (data.num_samples, data.num_features);
        let mut x: Vec<f64> = data.data.iter().map(|&v| f64::from(v)).collect();
        let mut raw_column_means = Vec::with_capacity(p);
        for j in 0..p {
            let mean = (0..n).map(|i| x[i * p + j]).sum::<f64>() / n as f64;
            let var = (0..n).map(|i| (x[i * p + j] - mean).powi(2)).sum::<f64>() / n as f64;
            raw_column_means.push(mean);
            for i in 0..n {
                x[i * p + j] = (x[i * p + j] - mean) / var.sqrt();
            }
        }
        let labels: Vec<u8> = data.target.iter().map(|&t| t as u8).collect();
        let mut split = BreastCancer {
            p,
            train_x: Vec::new(),
            train_y: Vec::new(),
            test_x: Vec::new(),
            test_y: Vec::new(),
            labels: labels.clone(),
            raw_column_means,
        };
        for (i, (row, &label)) in x.chunks_exact(p).zip(&labels).enumerate() {
            if i % 4 == 0 {
                split.test_x.extend_from_slice(row);
                split.test_y.push(label);
            } else {
                split.train_x.extend_from_slice(row);
                split.train_y.push(label);
            }
        }
        split
    }

    /// Held-out AUC, after checking that batch and single-row scoring agree and every
    /// probability is a finite number in [0, 1].
    fn held_out_auc(data: &BreastCancer, batch: &[f64], single: impl Fn(&[f64]) -> f64) -> f64 {
        assert_eq!(batch.len(), data.test_y.len());
        for (row, &probability) in data.test_x.chunks_exact(data.p).zip(batch) {
            assert!((0.0..=1.0).contains(&probability), "{probability}");
            assert_eq!(single(row), probability);
        }
        auc(batch, &data.test_y).unwrap()
    }

    /// Asserts that a model survives JSON exactly; on failure names the first value that moved,
    /// rather than printing two whole models.
    fn assert_json_round_trip<T>(model: &T)
    where
        T: Serialize + for<'de> Deserialize<'de> + PartialEq,
    {
        let stored = serde_json::to_string(model).unwrap();
        let restored: T = serde_json::from_str(&stored).unwrap();
        if restored != *model {
            let again = serde_json::to_string(&restored).unwrap();
            let split = |s: &str| -> Vec<String> {
                s.split([',', '[', ']', '{', '}', ':'])
                    .map(String::from)
                    .collect()
            };
            let (before, after) = (split(&stored), split(&again));
            let moved = before.iter().zip(&after).filter(|(a, b)| a != b).count();
            let first = before.iter().zip(&after).find(|(a, b)| a != b);
            panic!(
                "the JSON round trip changed {moved} of {} values, first {first:?}; exact \
                 round trips of f64 need serde_json's float_roundtrip feature",
                before.len()
            );
        }
    }

    // Held-out AUC floors below. The split is fixed, so each family's AUC here is one number,
    // printed by the test; the floors sit a few hundredths under the measured values, so a
    // change that makes a family rank noticeably worse fails, and far above 0.5 (a model that
    // ignores the rows). The measured values are in each test's comment.

    #[test]
    fn tree_on_breast_cancer() {
        let data = breast_cancer();
        let params = TreeParams {
            max_depth: 4,
            min_leaf: 5,
        };
        let model = TreeModel::fit(&data.train_x, data.p, &data.train_y, &params).unwrap();
        let probabilities = model.probabilities(&data.test_x, data.p);
        let auc = held_out_auc(&data, &probabilities, |z| model.probability(z));
        println!("tree held-out AUC {auc}");
        // Measured: 0.9576 (a depth-4 tree has at most 16 leaves, so few distinct scores).
        assert!(auc > 0.92, "held-out AUC {auc}");
        assert_json_round_trip(&model);
    }

    #[test]
    fn forest_on_breast_cancer() {
        let data = breast_cancer();
        let params = ForestParams {
            trees: 100,
            max_depth: 8,
            min_leaf: 1,
            seed: 7,
        };
        let model = ForestModel::fit(&data.train_x, data.p, &data.train_y, &params).unwrap();
        let probabilities = model.probabilities(&data.test_x, data.p);
        let auc = held_out_auc(&data, &probabilities, |z| model.probability(z));
        println!("forest held-out AUC {auc}");
        // Measured: 0.9911.
        assert!(auc > 0.97, "held-out AUC {auc}");
        // A vote share: a whole number of trees out of 100.
        for probability in &probabilities {
            let votes = probability * 100.0;
            assert!((votes - votes.round()).abs() < 1e-9, "{probability}");
        }
        assert_json_round_trip(&model);

        let again = ForestModel::fit(&data.train_x, data.p, &data.train_y, &params).unwrap();
        assert_eq!(again, model, "same seed, same forest");
        let other_seed = ForestParams { seed: 8, ..params };
        let other = ForestModel::fit(&data.train_x, data.p, &data.train_y, &other_seed).unwrap();
        assert_ne!(
            other, model,
            "the seed drives the bootstrap and the feature draws"
        );
    }

    #[test]
    fn knn_on_breast_cancer_matches_scikit_learn() {
        // Reference: scikit-learn 1.9.1 KNeighborsClassifier(n_neighbors=k, algorithm="kd_tree")
        // predict_proba on the same standardized rows and split; recipe and versions in
        // tests/reference/knn_breast_cancer.py and its fixture.
        #[derive(Deserialize)]
        struct Reference {
            fits: Vec<ReferenceFit>,
        }
        #[derive(Deserialize)]
        struct ReferenceFit {
            k: usize,
            smallest_relative_gap: f64,
            probabilities: Vec<f64>,
        }
        let reference: Reference =
            serde_json::from_str(include_str!("../../tests/fixtures/knn_breast_cancer.json"))
                .unwrap();
        let data = breast_cancer();
        for fit in &reference.fits {
            let model = KnnModel::fit(
                &data.train_x,
                data.p,
                &data.train_y,
                &KnnParams { k: fit.k },
            )
            .unwrap();
            let probabilities = model.probabilities(&data.test_x, data.p);
            // On every held-out row the k-th and (k+1)-th neighbours are apart by at least 1.6e-5
            // of their distance (the fixture's smallest gap, at k = 15), ten orders of magnitude
            // above float64 rounding of a 30-term distance, and smartcore ships the same rows as
            // scikit-learn (checked in the naive Bayes test). So both sides pick the same
            // neighbours whatever their tie rules, and the shares j/k must be equal, not close.
            assert!(fit.smallest_relative_gap > 1e-9);
            assert_eq!(probabilities, fit.probabilities, "k = {}", fit.k);
            let auc = held_out_auc(&data, &probabilities, |z| model.probability(z));
            println!("knn k={} held-out AUC {auc}", fit.k);
            // Measured: 0.9477 at k = 1 (two distinct scores, so one ROC threshold), 0.9962 at
            // k = 5, 0.9944 at k = 15.
            let floor = if fit.k == 1 { 0.92 } else { 0.97 };
            assert!(auc > floor, "k = {}: held-out AUC {auc}", fit.k);
            assert_json_round_trip(&model);
        }
    }

    #[test]
    fn naive_bayes_on_breast_cancer_matches_scikit_learn() {
        // Reference: scikit-learn 1.9.1 GaussianNB() predict_proba and predict_joint_log_proba
        // on the same standardized rows and split; recipe and versions in
        // tests/reference/naive_bayes_breast_cancer.py and its fixture.
        #[derive(Deserialize)]
        struct Reference {
            labels: Vec<u8>,
            column_means: Vec<f64>,
            probabilities: Vec<f64>,
            log_odds: Vec<f64>,
        }
        let reference: Reference = serde_json::from_str(include_str!(
            "../../tests/fixtures/naive_bayes_breast_cancer.json"
        ))
        .unwrap();
        let data = breast_cancer();
        // Same data on both sides: the same labels in the same order, and the same float32
        // values (column means agree to summation-order rounding).
        assert_eq!(data.labels, reference.labels);
        for (ours, theirs) in data.raw_column_means.iter().zip(&reference.column_means) {
            assert!(
                (ours - theirs).abs() <= 1e-12 * theirs.abs(),
                "{ours} vs {theirs}"
            );
        }

        let model = NaiveBayesModel::fit(&data.train_x, data.p, &data.train_y).unwrap();
        let probabilities = model.probabilities(&data.test_x, data.p);
        let mut worst_log_odds = 0.0f64;
        let mut worst_probability = 0.0f64;
        for ((row, expected_log_odds), (ours, theirs)) in data
            .test_x
            .chunks_exact(data.p)
            .zip(&reference.log_odds)
            .zip(probabilities.iter().zip(&reference.probabilities))
        {
            let (negative, positive) = model.log_joints(row);
            let gap = ((positive - negative) - expected_log_odds).abs();
            worst_log_odds = worst_log_odds.max(gap / expected_log_odds.abs().max(1.0));
            worst_probability = worst_probability.max((ours - theirs).abs());
        }
        println!(
            "naive Bayes: log-odds gap {worst_log_odds:e}, probability gap {worst_probability:e}"
        );
        // Both sides evaluate the same formula in float64 and differ only in summation order
        // (numpy's pairwise sums against our left-to-right sums) over 30 terms; log-odds reach
        // 2.4e3 here, so the log-odds gap is taken relative to max(|log-odds|, 1). Measured:
        // 2.1e-14 on the log-odds, 4.1e-15 on the probabilities. 1e-12 leaves room for other
        // summation orders and is still far below what a slip in the formula moves (measured
        // with scikit-learn on this split: dropping the smoothing moves the log-odds by 1.5e-7
        // and the probabilities by 3.0e-8; sample instead of population variances, by 7.6e-2
        // and 1.7e-2).
        assert!(worst_log_odds < 1e-12, "log-odds gap {worst_log_odds}");
        assert!(
            worst_probability < 1e-12,
            "probability gap {worst_probability}"
        );

        let auc = held_out_auc(&data, &probabilities, |z| model.probability(z));
        println!("naive Bayes held-out AUC {auc}");
        // Measured: 0.9684, the lowest of the four families on this split.
        assert!(auc > 0.94, "held-out AUC {auc}");
        assert_json_round_trip(&model);
    }

    // Hand-checkable tree. Points 1..9 with labels 0 0 0 0 0 1 0 1 1. Candidate root splits and
    // their weighted impurity Σ pos·neg/rows: at 5.5 → 0/5 + 3·1/4 = 0.75; at 6.5 → 5/6 + 2/3;
    // at 7.5 → 6/7 + 0; every other threshold is worse. So the root splits at 5.5, leaves 0/5
    // and 3/4. On the right (labels 1 0 1 1 at 6..9) the best split is 7.5 (1/2 + 0 against
    // 2/3 at 6.5 and 8.5), giving leaves 1/2 and 2/2.
    const LINE_X: [f64; 9] = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0];
    const LINE_Y: [u8; 9] = [0, 0, 0, 0, 0, 1, 0, 1, 1];

    #[test]
    fn a_stump_splits_where_the_gini_impurity_is_lowest() {
        let params = TreeParams {
            max_depth: 1,
            min_leaf: 1,
        };
        let model = TreeModel::fit(&LINE_X, 1, &LINE_Y, &params).unwrap();
        assert_eq!(
            model.nodes.0[0],
            Node::Split {
                feature: 0,
                threshold: 5.5,
                left: 1,
                right: 2
            }
        );
        assert_eq!(model.probability(&[3.0]), 0.0);
        assert_eq!(
            model.probability(&[5.5]),
            0.0,
            "a row at the threshold goes left"
        );
        assert_eq!(model.probability(&[5.6]), 0.75);
        assert_eq!(model.probability(&[100.0]), 0.75);
    }

    #[test]
    fn depth_two_splits_the_mixed_leaf_unless_min_leaf_forbids_it() {
        let deeper = TreeParams {
            max_depth: 2,
            min_leaf: 1,
        };
        let model = TreeModel::fit(&LINE_X, 1, &LINE_Y, &deeper).unwrap();
        assert_eq!(
            model.probabilities(&[2.0, 6.2, 7.4, 8.7], 1),
            [0.0, 0.5, 0.5, 1.0]
        );
        // The left leaf (five negatives) is pure, so only the right one was split.
        assert_eq!(model.nodes.0.len(), 5);

        // With min_leaf 3 the right node (4 rows) cannot be split, the root still can (5 | 4).
        let wide = TreeParams {
            max_depth: 2,
            min_leaf: 3,
        };
        let model = TreeModel::fit(&LINE_X, 1, &LINE_Y, &wide).unwrap();
        assert_eq!(model.probabilities(&[2.0, 6.2, 8.7], 1), [0.0, 0.75, 0.75]);
        // With min_leaf 5 no split leaves 5 rows on both sides of 9: one leaf, the base rate.
        let wider = TreeParams {
            max_depth: 2,
            min_leaf: 5,
        };
        let model = TreeModel::fit(&LINE_X, 1, &LINE_Y, &wider).unwrap();
        assert_eq!(model.probability(&[1.0]), 3.0 / 9.0);
    }

    #[test]
    fn a_split_that_does_not_lower_the_impurity_is_not_made() {
        // Both halves are as mixed as the whole: 1·1/2 + 1·1/2 = 2·2/4.
        let x = [1.0, 1.0, 2.0, 2.0];
        let y = [0, 1, 0, 1];
        let params = TreeParams {
            max_depth: 3,
            min_leaf: 1,
        };
        let model = TreeModel::fit(&x, 1, &y, &params).unwrap();
        assert_eq!(
            model.nodes.0,
            [Node::Leaf {
                rows: 4,
                positives: 2
            }]
        );
        assert_eq!(model.probability(&[1.0]), 0.5);
    }

    #[test]
    fn a_tree_picks_the_informative_column() {
        // Column 0 is noise-free, column 1 is unrelated to the label.
        let x = [0.0, 5.0, 1.0, 1.0, 2.0, 4.0, 3.0, 2.0, 10.0, 3.0, 11.0, 0.0];
        let y = [0, 0, 0, 0, 1, 1];
        let params = TreeParams {
            max_depth: 3,
            min_leaf: 1,
        };
        let model = TreeModel::fit(&x, 2, &y, &params).unwrap();
        assert_eq!(
            model.nodes.0[0],
            Node::Split {
                feature: 0,
                threshold: 6.5,
                left: 1,
                right: 2
            }
        );
        assert_eq!(model.probabilities(&x, 2), [0.0, 0.0, 0.0, 0.0, 1.0, 1.0]);
    }

    #[test]
    fn threshold_between_adjacent_floats_stays_below_the_upper_value() {
        let low = 1.0f64;
        let high = f64::from_bits(low.to_bits() + 1);
        assert_eq!(threshold_between(low, high), low);
        assert_eq!(threshold_between(-1.0, 3.0), 1.0);
    }

    #[test]
    fn a_forest_of_one_stump_votes_its_leaf_majority() {
        // Separable data: whatever rows the bootstrap draws, with both classes in it the stump
        // separates them, and with one class it is a single leaf voting that class. Either way
        // every tree's vote is 0 or 1 and the forest's probability is the share of votes.
        let x = [0.0, 1.0, 2.0, 10.0, 11.0, 12.0];
        let y = [0, 0, 0, 1, 1, 1];
        let params = ForestParams {
            trees: 50,
            max_depth: 1,
            min_leaf: 1,
            seed: 3,
        };
        let model = ForestModel::fit(&x, 1, &y, &params).unwrap();
        for tree in &model.trees {
            assert!(tree.0.len() == 1 || tree.0.len() == 3);
        }
        let far_negative = model.probability(&[-100.0]);
        let far_positive = model.probability(&[100.0]);
        let pure_trees = model.trees.iter().filter(|t| t.0.len() == 1).count();
        assert!(far_negative < 0.5 && far_positive > 0.5);
        // Only single-leaf trees can vote against the side a row is on.
        assert!(far_negative * 50.0 <= pure_trees as f64);
        assert!((1.0 - far_positive) * 50.0 <= pure_trees as f64);
        assert_eq!(features_per_split(1), 1);
        assert_eq!(features_per_split(30), 5);
        assert_eq!(features_per_split(2), 1);
        assert_eq!(features_per_split(7), 3);
    }

    #[test]
    fn an_even_leaf_votes_negative() {
        let tree = Tree(vec![Node::Leaf {
            rows: 4,
            positives: 2,
        }]);
        assert!(!tree.votes_positive(&[0.0]));
        assert_eq!(tree.share(&[0.0]), 0.5);
    }

    #[test]
    fn knn_takes_the_share_of_the_k_nearest() {
        let x = [0.0, 1.0, 2.0, 3.0, 10.0];
        let y = [0, 0, 1, 1, 1];
        let model = KnnModel::fit(&x, 1, &y, &KnnParams { k: 3 }).unwrap();
        // Nearest to 0.4: rows at 0, 1, 2 → one positive of three.
        assert_eq!(model.probability(&[0.4]), 1.0 / 3.0);
        // Nearest to 9: 10, 3, 2 → all positive.
        assert_eq!(model.probability(&[9.0]), 1.0);
        // Euclidean over columns: (3, 4) is 5 from the origin, (0, 6) is 6.
        let x = [3.0, 4.0, 0.0, 6.0];
        let model = KnnModel::fit(&x, 2, &[1, 0], &KnnParams { k: 1 }).unwrap();
        assert_eq!(model.probability(&[0.0, 0.0]), 1.0);
    }

    #[test]
    fn knn_ties_at_the_kth_distance_go_to_the_earlier_training_row() {
        // Rows at -1 and 1 are both at distance 1 from 0.
        let model = KnnModel::fit(&[-1.0, 1.0, 5.0], 1, &[0, 1, 1], &KnnParams { k: 1 }).unwrap();
        assert_eq!(model.probability(&[0.0]), 0.0);
        let model = KnnModel::fit(&[1.0, -1.0, 5.0], 1, &[1, 0, 1], &KnnParams { k: 1 }).unwrap();
        assert_eq!(model.probability(&[0.0]), 1.0);
    }

    #[test]
    fn probabilities_stay_finite_on_extreme_rows() {
        // Column 1 is constant within each class, so only the smoothing keeps its variance > 0.
        let x = [
            0.0, 1.0, 0.5, 1.0, 1.0, 1.0, 3.0, -1.0, 3.5, -1.0, 4.0, -1.0,
        ];
        let y = [0, 0, 0, 1, 1, 1];
        let bayes = NaiveBayesModel::fit(&x, 2, &y).unwrap();
        let tree = TreeModel::fit(
            &x,
            2,
            &y,
            &TreeParams {
                max_depth: 2,
                min_leaf: 1,
            },
        )
        .unwrap();
        let forest = ForestModel::fit(
            &x,
            2,
            &y,
            &ForestParams {
                trees: 10,
                max_depth: 2,
                min_leaf: 1,
                seed: 1,
            },
        )
        .unwrap();
        let knn = KnnModel::fit(&x, 2, &y, &KnnParams { k: 3 }).unwrap();
        let rows = [
            [0.0, 0.0],
            [1e200, -1e200],
            [f64::MAX, f64::MAX],
            [f64::INFINITY, f64::NEG_INFINITY],
            [f64::NAN, 0.0],
            [f64::NAN, f64::NAN],
        ];
        for row in &rows {
            for probability in [
                bayes.probability(row),
                tree.probability(row),
                forest.probability(row),
                knn.probability(row),
            ] {
                assert!((0.0..=1.0).contains(&probability), "{row:?}: {probability}");
            }
        }
        // Column 1 alone separates the classes; naive Bayes is certain on a training row.
        assert!(bayes.probability(&[0.0, 1.0]) < 1e-12);
        assert!(bayes.probability(&[3.0, -1.0]) > 1.0 - 1e-12);
    }

    #[test]
    fn naive_bayes_with_constant_columns_gives_the_prior() {
        // Every column constant: smoothing is the smallest normal f64, the likelihoods are
        // equal, so the posterior is the class share 1/3 at the constant, and stays finite off it.
        let x = [2.0; 6];
        let y = [0, 1, 0, 0, 1, 0];
        let model = NaiveBayesModel::fit(&x, 1, &y).unwrap();
        assert!((model.probability(&[2.0]) - 1.0 / 3.0).abs() < 1e-15);
        let off = model.probability(&[3.0]);
        assert!((0.0..=1.0).contains(&off));
    }

    #[test]
    fn bad_training_data_is_refused() {
        let tree = TreeParams {
            max_depth: 3,
            min_leaf: 1,
        };
        let forest = ForestParams {
            trees: 3,
            max_depth: 3,
            min_leaf: 1,
            seed: 0,
        };
        let knn = KnnParams { k: 1 };
        let fits = |x: &[f64], p: usize, y: &[u8]| {
            [
                TreeModel::fit(x, p, y, &tree).err(),
                ForestModel::fit(x, p, y, &forest).err(),
                KnnModel::fit(x, p, y, &knn).err(),
                NaiveBayesModel::fit(x, p, y).err(),
            ]
        };
        for error in fits(&[], 1, &[]) {
            assert!(matches!(error, Some(FitError::Empty)), "{error:?}");
        }
        for error in fits(&[], 0, &[0, 1]) {
            assert!(matches!(error, Some(FitError::Empty)), "{error:?}");
        }
        for error in fits(&[1.0, 2.0, 3.0], 1, &[1, 1, 1]) {
            assert!(matches!(error, Some(FitError::OneClass)), "{error:?}");
        }
        for error in fits(&[1.0, 2.0, 3.0], 1, &[0, 1]) {
            assert!(
                matches!(&error, Some(FitError::Solver(m)) if m.contains("3 values")),
                "{error:?}"
            );
        }
        for error in fits(&[1.0, 2.0], 1, &[0, 2]) {
            assert!(
                matches!(&error, Some(FitError::Solver(m)) if m.contains("0 or 1")),
                "{error:?}"
            );
        }
        for error in fits(&[1.0, f64::NAN], 1, &[0, 1]) {
            assert!(
                matches!(&error, Some(FitError::Solver(m)) if m.contains("non-finite")),
                "{error:?}"
            );
        }
    }

    #[test]
    fn zero_hyperparameters_are_refused_by_name() {
        let (x, y) = ([0.0, 1.0, 2.0, 3.0], [0, 0, 1, 1]);
        let named = |error: Option<FitError>, name: &str| match error {
            Some(FitError::Solver(message)) => {
                assert_eq!(message, format!("{name} must be at least 1"))
            }
            other => panic!("{name}: {other:?}"),
        };
        let tree = |max_depth, min_leaf| {
            TreeModel::fit(
                &x,
                1,
                &y,
                &TreeParams {
                    max_depth,
                    min_leaf,
                },
            )
            .err()
        };
        named(tree(0, 1), "max_depth");
        named(tree(1, 0), "min_leaf");
        let forest = |trees, max_depth, min_leaf| {
            let params = ForestParams {
                trees,
                max_depth,
                min_leaf,
                seed: 0,
            };
            ForestModel::fit(&x, 1, &y, &params).err()
        };
        named(forest(0, 1, 1), "trees");
        named(forest(1, 0, 1), "max_depth");
        named(forest(1, 1, 0), "min_leaf");
        named(KnnModel::fit(&x, 1, &y, &KnnParams { k: 0 }).err(), "k");
        assert!(matches!(
            KnnModel::fit(&x, 1, &y, &KnnParams { k: 5 }),
            Err(FitError::Solver(m)) if m == "k = 5 exceeds the 4 training rows"
        ));
    }

    #[test]
    fn a_stored_tree_whose_walk_could_loop_is_refused() {
        let looping = r#"{"features":1,"nodes":[
            {"kind":"split","feature":0,"threshold":0.5,"left":0,"right":1},
            {"kind":"leaf","rows":1,"positives":1}]}"#;
        let error = serde_json::from_str::<TreeModel>(looping).unwrap_err();
        assert!(error.to_string().contains("node 0"), "{error}");
        let empty_leaf = r#"{"features":1,"nodes":[{"kind":"leaf","rows":0,"positives":0}]}"#;
        assert!(serde_json::from_str::<TreeModel>(empty_leaf).is_err());
        let fine = r#"{"features":1,"nodes":[
            {"kind":"split","feature":0,"threshold":0.5,"left":1,"right":2},
            {"kind":"leaf","rows":2,"positives":0},
            {"kind":"leaf","rows":3,"positives":3}]}"#;
        let model: TreeModel = serde_json::from_str(fine).unwrap();
        assert_eq!(model.probabilities(&[0.0, 1.0], 1), [0.0, 1.0]);
    }
}
