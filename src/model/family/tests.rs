//! Every family on the same data: scikit-learn fixtures, hand-checked trees, edge cases.

use serde::{Deserialize, Serialize};

use super::forest::*;
use super::knn::*;
use super::naive_bayes::*;
use super::tree::*;
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
    let reference: Reference = serde_json::from_str(include_str!(
        "../../../tests/fixtures/knn_breast_cancer.json"
    ))
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
        "../../../tests/fixtures/naive_bayes_breast_cancer.json"
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
    println!("naive Bayes: log-odds gap {worst_log_odds:e}, probability gap {worst_probability:e}");
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

// Path contributions (Saabas's decomposition), checked by hand on a tree built node by node.
//
//   0: split column 0 at 0.5             10 rows, 4 positive: share 0.4
//   ├─ 1: leaf                            4 rows, 1 positive: share 0.25, votes 0
//   └─ 2: split column 1 at 0.0           6 rows, 3 positive: share 0.5
//      ├─ 3: split column 0 at 2.0        4 rows, 3 positive: share 0.75
//      │  ├─ 5: leaf                      3 rows, 3 positive: share 1, votes 1
//      │  └─ 6: leaf                      1 row,  0 positive: share 0, votes 0
//      └─ 4: leaf                         2 rows, 0 positive: share 0, votes 0
//
// Each step credits (child's share − node's share) to the node's column; the root's share 0.4
// is where every path starts.
//
//   row z        path       column 0                      column 1          sum + 0.4
//   [1.0, -1.0]  0-2-3-5    (0.5−0.4) + (1−0.75) = 0.35   0.75−0.5 = 0.25   1    = leaf 5
//   [3.0, -1.0]  0-2-3-6    (0.5−0.4) + (0−0.75) = −0.65  0.25              0    = leaf 6
//   [0.0,  5.0]  0-1        0.25−0.4 = −0.15              0                 0.25 = leaf 1
//   [1.0,  5.0]  0-2-4      0.1                           0−0.5 = −0.5      0    = leaf 4
//
// As a forest's tree the last step goes to the leaf's vote instead: only row [0.0, 5.0] changes
// (leaf 1 has share 0.25 but votes 0), to column 0 = 0 − 0.4 = −0.4.
fn hand_tree() -> Tree {
    let split = |feature, threshold, left, right| Node::Split {
        feature,
        threshold,
        left,
        right,
    };
    let leaf = |rows, positives| Node::Leaf { rows, positives };
    Tree::try_from(vec![
        split(0, 0.5, 1, 2),
        leaf(4, 1),
        split(1, 0.0, 3, 4),
        split(0, 2.0, 5, 6),
        leaf(2, 0),
        leaf(3, 3),
        leaf(1, 0),
    ])
    .unwrap()
}

/// The hand-computed rows above: (row, column contributions as a tree, as a forest's tree).
const HAND_TABLE: [([f64; 2], [f64; 2], [f64; 2]); 4] = [
    ([1.0, -1.0], [0.35, 0.25], [0.35, 0.25]),
    ([3.0, -1.0], [-0.65, 0.25], [-0.65, 0.25]),
    ([0.0, 5.0], [-0.15, 0.0], [-0.4, 0.0]),
    ([1.0, 5.0], [0.1, -0.5], [0.1, -0.5]),
];

fn assert_close(actual: &[f64], expected: &[f64], what: &str) {
    assert_eq!(actual.len(), expected.len(), "{what}");
    for (a, e) in actual.iter().zip(expected) {
        assert!(
            (a - e).abs() < 1e-12,
            "{what}: {actual:?}, expected {expected:?}"
        );
    }
}

#[test]
fn node_shares_are_summed_up_from_the_leaves() {
    assert_close(
        &hand_tree().node_shares(),
        &[0.4, 0.25, 0.5, 0.75, 0.0, 1.0, 0.0],
        "shares of nodes 0..6",
    );
}

#[test]
fn a_tree_credits_each_change_in_share_along_the_path_to_the_split_column() {
    let model = TreeModel {
        features: 2,
        nodes: hand_tree(),
        shares: Derived::default(),
    };
    for (z, expected, _) in HAND_TABLE {
        let mut columns = [0.0; 2];
        let base = model.add_contributions(&z, &mut columns);
        assert_eq!(base, 0.4, "every path starts at the root's share");
        assert_close(&columns, &expected, &format!("tree, row {z:?}"));
        let total = base + columns.iter().sum::<f64>();
        assert!((total - model.probability(&z)).abs() < 1e-12, "{z:?}");
    }
}

#[test]
fn a_forest_tree_ends_its_path_at_its_vote_and_the_forest_averages_its_trees() {
    // One tree alone: the vote table.
    let alone = ForestModel {
        features: 2,
        trees: vec![hand_tree()],
        shares: Derived::default(),
    };
    for (z, _, expected) in HAND_TABLE {
        let mut columns = [0.0; 2];
        let base = alone.add_contributions(&z, &mut columns);
        assert_eq!(base, 0.4);
        assert_close(&columns, &expected, &format!("forest tree, row {z:?}"));
        assert!((alone.probability(&z) - (base + columns[0] + columns[1])).abs() < 1e-12);
    }
    // With a second tree that is a single leaf (5 rows, 3 positive: share 0.6, votes 1), which
    // has no split to credit: it starts at its vote. Row [0.0, 5.0]: votes 0 and 1, so the
    // probability is 0.5; base (0.4 + 1)/2 = 0.7; column 0: (−0.4 + 0)/2 = −0.2.
    let pair = ForestModel {
        features: 2,
        trees: vec![
            hand_tree(),
            Tree(vec![Node::Leaf {
                rows: 5,
                positives: 3,
            }]),
        ],
        shares: Derived::default(),
    };
    let mut columns = [0.0; 2];
    let base = pair.add_contributions(&[0.0, 5.0], &mut columns);
    assert!((base - 0.7).abs() < 1e-12, "{base}");
    assert_close(&columns, &[-0.2, 0.0], "forest of two, row [0, 5]");
    assert_eq!(pair.probability(&[0.0, 5.0]), 0.5);
}

/// The property the decomposition promises, on every column of every held-out row: the base
/// plus all contributions is the model's probability (up to rounding: a path of d steps adds d
/// differences).
fn assert_contributions_add_up(
    data: &BreastCancer,
    probability: impl Fn(&[f64]) -> f64,
    contributions: impl Fn(&[f64], &mut [f64]) -> f64,
) -> usize {
    let mut columns_used = std::collections::BTreeSet::new();
    for z in data
        .test_x
        .chunks_exact(data.p)
        .chain(data.train_x.chunks_exact(data.p))
    {
        let mut columns = vec![0.0; data.p];
        let base = contributions(z, &mut columns);
        let total = base + columns.iter().sum::<f64>();
        let p = probability(z);
        assert!((total - p).abs() < 1e-12, "base {base} + {columns:?} ≠ {p}");
        columns_used.extend((0..data.p).filter(|&j| columns[j] != 0.0));
    }
    columns_used.len()
}

#[test]
fn fitted_trees_and_forests_add_their_contributions_up_to_their_probability() {
    let data = breast_cancer();
    let tree = TreeModel::fit(
        &data.train_x,
        data.p,
        &data.train_y,
        &TreeParams {
            max_depth: 6,
            min_leaf: 2,
        },
    )
    .unwrap();
    let used = assert_contributions_add_up(
        &data,
        |z| tree.probability(z),
        |z, c| tree.add_contributions(z, c),
    );
    assert!(
        used >= 3,
        "a depth-6 tree credits several columns, got {used}"
    );
    // Every path starts at the training base rate.
    let rate = data.train_y.iter().filter(|&&y| y == 1).count() as f64 / data.train_y.len() as f64;
    assert_eq!(
        tree.add_contributions(&data.test_x[..data.p], &mut vec![0.0; data.p]),
        rate
    );

    let forest = ForestModel::fit(
        &data.train_x,
        data.p,
        &data.train_y,
        &ForestParams {
            trees: 60,
            max_depth: 6,
            min_leaf: 1,
            seed: 11,
        },
    )
    .unwrap();
    let used = assert_contributions_add_up(
        &data,
        |z| forest.probability(z),
        |z, c| forest.add_contributions(z, c),
    );
    assert!(
        used > 15,
        "60 trees with √30 columns per split credit many, got {used}"
    );
    // The derived shares are not part of the stored model or of its equality.
    assert_json_round_trip(&tree);
    assert_json_round_trip(&forest);
}
