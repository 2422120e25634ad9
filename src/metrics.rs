//! Model-quality metrics: AUC, Gini, KS, log loss, Brier score and calibration for binary
//! outcomes; RMSE, MAE and R² for numeric ones; and the paired tests the gate uses.
//!
//! Pure functions over slices of probabilities and 0/1 labels; no I/O and no model types, so
//! each can be checked against published values. Callers make sure the slices are the same
//! length; a metric that is undefined for the input (AUC with one class) returns `None`.

use serde::{Deserialize, Serialize};

use crate::schema::LabelKind;

/// The metric the gate (and the cross-validated search) compares models on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Deserialize, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum GateMetric {
    Auc,
    LogLoss,
    Brier,
    /// Root mean squared error (numeric labels).
    Rmse,
    /// Mean absolute error (numeric labels).
    Mae,
}

impl GateMetric {
    /// True when a larger value is better.
    pub fn higher_is_better(self) -> bool {
        matches!(self, GateMetric::Auc)
    }

    pub fn name(self) -> &'static str {
        match self {
            GateMetric::Auc => "auc",
            GateMetric::LogLoss => "log_loss",
            GateMetric::Brier => "brier",
            GateMetric::Rmse => "rmse",
            GateMetric::Mae => "mae",
        }
    }

    /// The kind of label this metric judges.
    pub fn label_kind(self) -> LabelKind {
        match self {
            GateMetric::Auc | GateMetric::LogLoss | GateMetric::Brier => LabelKind::Binary,
            GateMetric::Rmse | GateMetric::Mae => LabelKind::Number,
        }
    }
}

/// Probabilities are clipped to [EPS, 1 - EPS] in log loss, as scikit-learn does for float64
/// (its `np.finfo(float64).eps` clip; scikit-learn 1.9 `sklearn.metrics.log_loss`).
const LOG_LOSS_EPS: f64 = f64::EPSILON;

/// Bins of the expected calibration error (ten equal-width bins, as in Naeini, Cooper &
/// Hauskrecht 2015, "Obtaining well calibrated probabilities using Bayesian binning", AAAI).
pub const ECE_BINS: usize = 10;

/// The metrics reported for one model on one set of rows. Binary labels fill the
/// classification fields, numeric labels the regression ones; the others stay empty.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Report {
    pub rows: usize,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub positives: Option<usize>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub auc: Option<f64>,
    /// 2·AUC − 1 (common practice, no source).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub gini: Option<f64>,
    /// Kolmogorov–Smirnov distance between the positives' and negatives' score distributions.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ks: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub log_loss: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub brier: Option<f64>,
    /// Expected calibration error over ten equal-width probability bins.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ece: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rmse: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mae: Option<f64>,
    /// Coefficient of determination; undefined when the targets do not vary.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub r2: Option<f64>,
}

impl Report {
    /// The report for probabilities of 0/1 labels.
    pub fn binary(probabilities: &[f64], labels: &[u8]) -> Report {
        let auc = auc(probabilities, labels);
        Report {
            rows: labels.len(),
            positives: Some(labels.iter().filter(|&&y| y == 1).count()),
            auc,
            gini: auc.map(|a| 2.0 * a - 1.0),
            ks: ks(probabilities, labels),
            log_loss: Some(log_loss(probabilities, labels)),
            brier: Some(brier(probabilities, labels)),
            ece: Some(expected_calibration_error(probabilities, labels, ECE_BINS)),
            rmse: None,
            mae: None,
            r2: None,
        }
    }

    /// The report for predicted numbers against numeric targets.
    pub fn numeric(predictions: &[f64], targets: &[f64]) -> Report {
        Report {
            rows: targets.len(),
            positives: None,
            auc: None,
            gini: None,
            ks: None,
            log_loss: None,
            brier: None,
            ece: None,
            rmse: Some(rmse(predictions, targets)),
            mae: Some(mae(predictions, targets)),
            r2: r2(predictions, targets),
        }
    }

    /// The report for `outputs` against `labels`, binary when `binary` is true.
    pub fn for_labels(binary: bool, outputs: &[f64], labels: &[f64]) -> Report {
        if binary {
            Report::binary(outputs, &as_binary(labels))
        } else {
            Report::numeric(outputs, labels)
        }
    }

    /// The value of `metric`, if defined.
    pub fn get(&self, metric: GateMetric) -> Option<f64> {
        match metric {
            GateMetric::Auc => self.auc,
            GateMetric::LogLoss => self.log_loss,
            GateMetric::Brier => self.brier,
            GateMetric::Rmse => self.rmse,
            GateMetric::Mae => self.mae,
        }
    }
}

/// 0/1 labels carried as numbers, as the binary metrics take them.
pub fn as_binary(labels: &[f64]) -> Vec<u8> {
    labels.iter().map(|&y| u8::from(y >= 0.5)).collect()
}

/// The value of `metric` for these outputs (probabilities or predicted numbers).
pub fn evaluate(metric: GateMetric, outputs: &[f64], labels: &[f64]) -> Option<f64> {
    match metric {
        GateMetric::Auc => auc(outputs, &as_binary(labels)),
        GateMetric::LogLoss => Some(log_loss(outputs, &as_binary(labels))),
        GateMetric::Brier => Some(brier(outputs, &as_binary(labels))),
        GateMetric::Rmse => Some(rmse(outputs, labels)),
        GateMetric::Mae => Some(mae(outputs, labels)),
    }
}

/// Root mean squared error.
pub fn rmse(predictions: &[f64], targets: &[f64]) -> f64 {
    let squared: f64 = row_squared_errors(predictions, targets).iter().sum();
    (squared / targets.len() as f64).sqrt()
}

/// Mean absolute error.
pub fn mae(predictions: &[f64], targets: &[f64]) -> f64 {
    row_absolute_errors(predictions, targets)
        .iter()
        .sum::<f64>()
        / targets.len() as f64
}

/// R² = 1 − SS_res / SS_tot; `None` when the targets are all equal (SS_tot = 0).
pub fn r2(predictions: &[f64], targets: &[f64]) -> Option<f64> {
    let n = targets.len() as f64;
    let mean = targets.iter().sum::<f64>() / n;
    let total: f64 = targets.iter().map(|y| (y - mean).powi(2)).sum();
    let residual: f64 = row_squared_errors(predictions, targets).iter().sum();
    (total > 0.0).then(|| 1.0 - residual / total)
}

/// Area under the ROC curve, as the Mann–Whitney U statistic over (positive, negative) pairs
/// with ties counted as one half; computed from mid-ranks in O(n log n).
/// `None` when either class is absent.
pub fn auc(scores: &[f64], labels: &[u8]) -> Option<f64> {
    let positives = labels.iter().filter(|&&y| y == 1).count();
    let negatives = labels.len() - positives;
    if positives == 0 || negatives == 0 {
        return None;
    }
    let ranks = midranks(scores);
    let rank_sum: f64 = ranks
        .iter()
        .zip(labels)
        .filter(|(_, &y)| y == 1)
        .map(|(r, _)| r)
        .sum();
    let p = positives as f64;
    let u = rank_sum - p * (p + 1.0) / 2.0;
    Some(u / (p * negatives as f64))
}

/// 1-based mid-ranks: tied values share the mean of the ranks they span.
fn midranks(values: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&a, &b| values[a].total_cmp(&values[b]));
    let mut ranks = vec![0.0; values.len()];
    let mut start = 0;
    while start < order.len() {
        let mut end = start + 1;
        while end < order.len() && values[order[end]] == values[order[start]] {
            end += 1;
        }
        let mid = (start + 1 + end) as f64 / 2.0;
        for &i in &order[start..end] {
            ranks[i] = mid;
        }
        start = end;
    }
    ranks
}

/// Kolmogorov–Smirnov statistic: the largest gap between the empirical score distributions of
/// positives and negatives, evaluated after each distinct score. `None` with one class.
pub fn ks(scores: &[f64], labels: &[u8]) -> Option<f64> {
    let positives = labels.iter().filter(|&&y| y == 1).count() as f64;
    let negatives = labels.len() as f64 - positives;
    if positives == 0.0 || negatives == 0.0 {
        return None;
    }
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]));
    let (mut pos_seen, mut neg_seen, mut best) = (0.0, 0.0, 0.0f64);
    for (k, &i) in order.iter().enumerate() {
        if labels[i] == 1 {
            pos_seen += 1.0;
        } else {
            neg_seen += 1.0;
        }
        let last_of_tie = order
            .get(k + 1)
            .is_none_or(|&next| scores[next] != scores[i]);
        if last_of_tie {
            best = best.max((pos_seen / positives - neg_seen / negatives).abs());
        }
    }
    Some(best)
}

/// Expected calibration error: over `bins` equal-width probability bins, the share of rows in
/// each bin times the gap between its mean probability and its observed positive rate.
pub fn expected_calibration_error(probabilities: &[f64], labels: &[u8], bins: usize) -> f64 {
    if labels.is_empty() || bins == 0 {
        return f64::NAN;
    }
    let n = labels.len() as f64;
    calibration_bins(probabilities, labels, bins)
        .iter()
        .map(|b| b.rows as f64 / n * (b.mean_probability - b.observed_rate).abs())
        .sum()
}

/// One equal-width probability bin of a reliability (calibration) diagram.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CalibrationBin {
    pub rows: usize,
    pub mean_probability: f64,
    pub observed_rate: f64,
}

/// The non-empty bins of `bins` equal-width probability bins.
pub fn calibration_bins(probabilities: &[f64], labels: &[u8], bins: usize) -> Vec<CalibrationBin> {
    let bins = bins.max(1);
    let mut count = vec![0usize; bins];
    let mut p_sum = vec![0.0; bins];
    let mut y_sum = vec![0.0; bins];
    for (&p, &y) in probabilities.iter().zip(labels) {
        let b = ((p * bins as f64) as usize).min(bins - 1);
        count[b] += 1;
        p_sum[b] += p;
        y_sum[b] += f64::from(y);
    }
    (0..bins)
        .filter(|&b| count[b] > 0)
        .map(|b| {
            let c = count[b] as f64;
            CalibrationBin {
                rows: count[b],
                mean_probability: p_sum[b] / c,
                observed_rate: y_sum[b] / c,
            }
        })
        .collect()
}

/// The ROC curve as (false positive rate, true positive rate) points from (0, 0) to (1, 1),
/// one per distinct score (ties move diagonally), thinned to at most `max_points` for display.
/// Empty when a class is absent.
pub fn roc_curve(scores: &[f64], labels: &[u8], max_points: usize) -> Vec<(f64, f64)> {
    let positives = labels.iter().filter(|&&y| y == 1).count() as f64;
    let negatives = labels.len() as f64 - positives;
    if positives == 0.0 || negatives == 0.0 {
        return vec![];
    }
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[b].total_cmp(&scores[a]));
    let mut points = vec![(0.0, 0.0)];
    let (mut tp, mut fp) = (0.0, 0.0);
    let mut k = 0;
    while k < order.len() {
        let score = scores[order[k]];
        while k < order.len() && scores[order[k]] == score {
            if labels[order[k]] == 1 {
                tp += 1.0;
            } else {
                fp += 1.0;
            }
            k += 1;
        }
        points.push((fp / negatives, tp / positives));
    }
    if points.len() > max_points.max(2) {
        let step = (points.len() - 1) as f64 / (max_points.max(2) - 1) as f64;
        points = (0..max_points.max(2))
            .map(|i| points[((i as f64 * step).round() as usize).min(points.len() - 1)])
            .collect();
    }
    points
}

/// The DeLong, DeLong & Clarke-Pearson (1988) comparison of two correlated AUCs on the same rows.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DeLong {
    pub auc_a: f64,
    pub auc_b: f64,
    pub var_a: f64,
    pub var_b: f64,
    pub cov_ab: f64,
    /// (AUC_a − AUC_b) / sd of the difference.
    pub z: f64,
    pub p_two_sided: f64,
    /// One-sided p-value for "a is better than b".
    pub p_a_better: f64,
}

/// DeLong's test for scores `a` and `b` of the same rows, with the placement values computed
/// by the mid-rank algorithm of Sun & Xu (2014, IEEE Signal Processing Letters 21(11)).
/// `None` with one class or fewer than two rows of a class.
pub fn delong(a: &[f64], b: &[f64], labels: &[u8]) -> Option<DeLong> {
    let pos: Vec<usize> = (0..labels.len()).filter(|&i| labels[i] == 1).collect();
    let neg: Vec<usize> = (0..labels.len()).filter(|&i| labels[i] != 1).collect();
    let (m, n) = (pos.len() as f64, neg.len() as f64);
    if pos.len() < 2 || neg.len() < 2 {
        return None;
    }
    // Placement values: V10 per positive, V01 per negative.
    let placements = |scores: &[f64]| {
        let all = midranks(scores);
        let within_pos = midranks(&pos.iter().map(|&i| scores[i]).collect::<Vec<_>>());
        let within_neg = midranks(&neg.iter().map(|&i| scores[i]).collect::<Vec<_>>());
        let v10: Vec<f64> = pos
            .iter()
            .zip(&within_pos)
            .map(|(&i, r)| (all[i] - r) / n)
            .collect();
        let v01: Vec<f64> = neg
            .iter()
            .zip(&within_neg)
            .map(|(&i, r)| 1.0 - (all[i] - r) / m)
            .collect();
        (v10, v01)
    };
    let (v10a, v01a) = placements(a);
    let (v10b, v01b) = placements(b);
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let cov = |x: &[f64], y: &[f64]| {
        let (mx, my) = (mean(x), mean(y));
        x.iter()
            .zip(y)
            .map(|(a, b)| (a - mx) * (b - my))
            .sum::<f64>()
            / (x.len() as f64 - 1.0)
    };
    let auc_a = mean(&v10a);
    let auc_b = mean(&v10b);
    let var_a = cov(&v10a, &v10a) / m + cov(&v01a, &v01a) / n;
    let var_b = cov(&v10b, &v10b) / m + cov(&v01b, &v01b) / n;
    let cov_ab = cov(&v10a, &v10b) / m + cov(&v01a, &v01b) / n;
    let var = var_a + var_b - 2.0 * cov_ab;
    let z = if var > 0.0 {
        (auc_a - auc_b) / var.sqrt()
    } else if auc_a == auc_b {
        0.0
    } else {
        f64::INFINITY.copysign(auc_a - auc_b)
    };
    Some(DeLong {
        auc_a,
        auc_b,
        var_a,
        var_b,
        cov_ab,
        z,
        p_two_sided: (2.0 * normal_sf(z.abs())).min(1.0),
        p_a_better: normal_sf(z),
    })
}

/// A paired comparison of per-row losses (lower is better) of model a and model b.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PairedLossTest {
    /// Mean of (loss_b − loss_a): positive when a is better.
    pub mean_difference: f64,
    /// The paired t statistic of the differences.
    pub statistic: f64,
    /// One-sided p-value for "a is better than b", from the normal approximation to the t
    /// distribution (the gate only runs this with at least `gate.min_rows` rows).
    pub p_a_better: f64,
}

/// Paired test on per-row loss differences (the statistic of `scipy.stats.ttest_rel`).
/// `None` with fewer than two rows.
pub fn paired_loss_test(loss_a: &[f64], loss_b: &[f64]) -> Option<PairedLossTest> {
    let n = loss_a.len();
    if n < 2 || loss_b.len() != n {
        return None;
    }
    let d: Vec<f64> = loss_b.iter().zip(loss_a).map(|(b, a)| b - a).collect();
    let mean = d.iter().sum::<f64>() / n as f64;
    let var = d.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n as f64 - 1.0);
    let statistic = if var > 0.0 {
        mean / (var / n as f64).sqrt()
    } else if mean == 0.0 {
        0.0
    } else {
        f64::INFINITY.copysign(mean)
    };
    Some(PairedLossTest {
        mean_difference: mean,
        statistic,
        p_a_better: normal_sf(statistic),
    })
}

/// Per-row log loss (clipped as in [`log_loss`]).
pub fn row_log_losses(probabilities: &[f64], labels: &[u8]) -> Vec<f64> {
    probabilities
        .iter()
        .zip(labels)
        .map(|(&p, &y)| log_loss(&[p], &[y]))
        .collect()
}

/// Per-row squared error of a prediction (a probability against 0/1, or a number).
pub fn row_squared_errors(predictions: &[f64], targets: &[f64]) -> Vec<f64> {
    predictions
        .iter()
        .zip(targets)
        .map(|(&p, &y)| (p - y).powi(2))
        .collect()
}

/// Per-row absolute error.
pub fn row_absolute_errors(predictions: &[f64], targets: &[f64]) -> Vec<f64> {
    predictions
        .iter()
        .zip(targets)
        .map(|(&p, &y)| (p - y).abs())
        .collect()
}

/// The standard error of an AUC from its value and the class counts, by Hanley & McNeil's
/// approximation (Hanley & McNeil 1982, "The meaning and use of the area under a receiver
/// operating characteristic (ROC) curve", Radiology 143:29–36, equation 2, with
/// Q1 = A/(2 − A) and Q2 = 2A²/(1 + A)). `None` without both classes.
pub fn hanley_mcneil_se(auc: f64, positives: usize, negatives: usize) -> Option<f64> {
    if positives == 0 || negatives == 0 || !(0.0..=1.0).contains(&auc) {
        return None;
    }
    let (a, np, nn) = (auc, positives as f64, negatives as f64);
    let q1 = a / (2.0 - a);
    let q2 = 2.0 * a * a / (1.0 + a);
    let variance =
        (a * (1.0 - a) + (np - 1.0) * (q1 - a * a) + (nn - 1.0) * (q2 - a * a)) / (np * nn);
    Some(variance.max(0.0).sqrt())
}

/// Upper tail of the standard normal, 1 − Φ(z) = erfc(z/√2)/2, with `libm`'s erfc (a port
/// of FreeBSD's msun, near double precision; the Numerical Recipes fit used before was good to
/// 1.2e-7, too coarse for the live gate's 1e-9 check against scipy).
pub fn normal_sf(z: f64) -> f64 {
    0.5 * libm::erfc(z / std::f64::consts::SQRT_2)
}

/// Mean negative log-likelihood of the labels under the probabilities.
pub fn log_loss(probabilities: &[f64], labels: &[u8]) -> f64 {
    if labels.is_empty() {
        return f64::NAN;
    }
    let total: f64 = probabilities
        .iter()
        .zip(labels)
        .map(|(&p, &y)| {
            let p = p.clamp(LOG_LOSS_EPS, 1.0 - LOG_LOSS_EPS);
            if y == 1 {
                -p.ln()
            } else {
                -(1.0 - p).ln()
            }
        })
        .sum();
    total / labels.len() as f64
}

/// Mean squared difference between probability and label (Brier 1950).
pub fn brier(probabilities: &[f64], labels: &[u8]) -> f64 {
    if labels.is_empty() {
        return f64::NAN;
    }
    let total: f64 = probabilities
        .iter()
        .zip(labels)
        .map(|(&p, &y)| (p - f64::from(y)).powi(2))
        .sum();
    total / labels.len() as f64
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64, tol: f64) -> bool {
        (a - b).abs() <= tol
    }

    #[test]
    fn auc_matches_a_mann_whitney_count_by_hand() {
        // Worked by hand: positives score 0.35 and 0.8, negatives 0.1 and 0.4. Of the four
        // (positive, negative) pairs the positive ranks higher in three: U/(n1·n0) = 3/4.
        // scikit-learn's `roc_auc_score` documentation uses the same example and gets 0.75.
        assert_eq!(auc(&[0.1, 0.4, 0.35, 0.8], &[0, 0, 1, 1]), Some(0.75));
    }

    #[test]
    fn auc_counts_ties_as_half_a_pair() {
        // By hand: positives 0.5, 0.7, 0.5 against negatives 0.2, 0.5, 0.1 win 2.5 + 3 + 2.5 of
        // 9 pairs = 8/9. scikit-learn 1.9 roc_auc_score on the same data: 0.888888888888889.
        let got = auc(&[0.2, 0.5, 0.5, 0.7, 0.5, 0.1], &[0, 1, 0, 1, 1, 0]).unwrap();
        assert!(close(got, 8.0 / 9.0, 1e-15), "{got}");
    }

    #[test]
    fn auc_is_undefined_with_one_class() {
        assert_eq!(auc(&[0.2, 0.3], &[1, 1]), None);
        assert_eq!(auc(&[], &[]), None);
    }

    #[test]
    fn log_loss_matches_scikit_learn() {
        // scikit-learn's `log_loss` documentation example (spam = 1): 0.21616187468057912,
        // reproduced with scikit-learn 1.9.1.
        let got = log_loss(&[0.9, 0.1, 0.2, 0.65], &[1, 0, 0, 1]);
        assert!(close(got, 0.216_161_874_680_579_12, 1e-15), "{got}");
    }

    #[test]
    fn brier_matches_scikit_learn() {
        // scikit-learn's `brier_score_loss` documentation example: 0.0375 (1.9.1 prints
        // 0.03749999999999999).
        let got = brier(&[0.1, 0.9, 0.8, 0.3], &[0, 1, 1, 0]);
        assert!(close(got, 0.0375, 1e-15), "{got}");
    }

    #[derive(serde::Deserialize)]
    struct Reference {
        labels: Vec<u8>,
        a: Vec<f64>,
        b: Vec<f64>,
        auc_a: f64,
        auc_b: f64,
        ks_a: f64,
        log_loss_a: f64,
        brier_a: f64,
        ece_a: f64,
        delong: DeLong,
        paired_log_loss: PairedReference,
        normal_sf: std::collections::BTreeMap<String, f64>,
    }

    #[derive(serde::Deserialize)]
    struct PairedReference {
        statistic: f64,
        p_a_better_normal: f64,
    }

    #[test]
    fn the_paired_loss_statistic_matches_scipy_ttest_rel() {
        // scipy.stats.ttest_rel(loss_b, loss_a).statistic on per-row log losses; the p-value is
        // the normal tail of that statistic (scipy.stats.norm.sf), our stated approximation.
        let r = reference();
        let test = paired_loss_test(
            &row_log_losses(&r.a, &r.labels),
            &row_log_losses(&r.b, &r.labels),
        )
        .unwrap();
        assert!(
            (test.statistic - r.paired_log_loss.statistic).abs() < 1e-9,
            "{}",
            test.statistic
        );
        assert!(close(
            test.p_a_better,
            r.paired_log_loss.p_a_better_normal,
            1e-6
        ));
    }

    fn reference() -> Reference {
        // Produced by tests/reference/metrics_reference.py (scikit-learn 1.9.1, scipy, numpy;
        // versions recorded in the fixture).
        serde_json::from_str(include_str!("../tests/fixtures/metrics_reference.json")).unwrap()
    }

    #[test]
    fn metrics_match_scikit_learn_and_scipy_on_tied_scores() {
        let r = reference();
        assert!(close(auc(&r.a, &r.labels).unwrap(), r.auc_a, 1e-12));
        assert!(close(auc(&r.b, &r.labels).unwrap(), r.auc_b, 1e-12));
        // scipy.stats.ks_2samp on the positives' and negatives' scores.
        assert!(close(ks(&r.a, &r.labels).unwrap(), r.ks_a, 1e-12));
        assert!(close(log_loss(&r.a, &r.labels), r.log_loss_a, 1e-12));
        assert!(close(brier(&r.a, &r.labels), r.brier_a, 1e-12));
        // The script's numpy ECE over 10 equal-width bins.
        assert!(close(
            expected_calibration_error(&r.a, &r.labels, 10),
            r.ece_a,
            1e-12
        ));
    }

    #[test]
    fn delong_matches_the_direct_placement_value_computation() {
        // Reference: DeLong et al. (1988) from the O(m·n) definition of the placement values in
        // tests/reference/metrics_reference.py, p-values from scipy.stats.norm. Tolerance 1e-6
        // on p-values covers the erfc approximation (fractional error < 1.2e-7).
        let r = reference();
        let got = delong(&r.a, &r.b, &r.labels).unwrap();
        let want = &r.delong;
        for (name, g, w) in [
            ("auc_a", got.auc_a, want.auc_a),
            ("auc_b", got.auc_b, want.auc_b),
            ("var_a", got.var_a, want.var_a),
            ("var_b", got.var_b, want.var_b),
            ("cov_ab", got.cov_ab, want.cov_ab),
            ("z", got.z, want.z),
        ] {
            assert!(
                (g - w).abs() <= 1e-10 * w.abs().max(1.0),
                "{name}: {g} vs {w}"
            );
        }
        assert!(close(got.p_two_sided, want.p_two_sided, 1e-6));
        assert!(close(got.p_a_better, want.p_a_better, 1e-6));
        // Swapping the models mirrors the test.
        let swapped = delong(&r.b, &r.a, &r.labels).unwrap();
        assert!(close(swapped.z, -got.z, 1e-12));
    }

    #[test]
    fn normal_tail_matches_scipy() {
        for (z, want) in reference().normal_sf {
            let got = normal_sf(z.parse().unwrap());
            assert!(
                (got - want).abs() <= 1e-12 * want.max(1e-300) + 1e-15,
                "sf({z}) = {got}, scipy {want}"
            );
        }
    }

    #[test]
    fn identical_models_are_not_significantly_different() {
        let r = reference();
        let same = delong(&r.a, &r.a, &r.labels).unwrap();
        assert_eq!(same.z, 0.0);
        assert!(close(same.p_two_sided, 1.0, 1e-12));
    }

    #[test]
    fn roc_curve_matches_scikit_learn_and_its_area_is_the_auc() {
        // scikit-learn's roc_curve documentation example: y = [1, 1, 2, 2] (2 positive),
        // scores [0.1, 0.4, 0.35, 0.8] → fpr [0, 0, 0.5, 0.5, 1], tpr [0, 0.5, 0.5, 1, 1]
        // (scikit-learn drops no point here with drop_intermediate; ours keeps every distinct
        // score: the same five points). Re-run with scikit-learn 1.9.1.
        let curve = roc_curve(&[0.1, 0.4, 0.35, 0.8], &[0, 0, 1, 1], 100);
        assert_eq!(
            curve,
            vec![(0.0, 0.0), (0.0, 0.5), (0.5, 0.5), (0.5, 1.0), (1.0, 1.0)]
        );
        // Trapezoids under the curve give the Mann–Whitney AUC, ties included.
        let scores = [0.9, 0.8, 0.8, 0.7, 0.6, 0.6, 0.2, 0.1];
        let labels = [1, 1, 0, 1, 0, 1, 0, 0];
        let curve = roc_curve(&scores, &labels, 100);
        let area: f64 = curve
            .windows(2)
            .map(|w| (w[1].0 - w[0].0) * (w[1].1 + w[0].1) / 2.0)
            .sum();
        assert!((area - auc(&scores, &labels).unwrap()).abs() < 1e-12);
        assert!(roc_curve(&[0.3, 0.4], &[1, 1], 10).is_empty());
        let thinned = roc_curve(
            &(0..1000).map(|i| i as f64).collect::<Vec<_>>(),
            &(0..1000).map(|i| (i % 2) as u8).collect::<Vec<_>>(),
            51,
        );
        assert_eq!(thinned.len(), 51);
        assert_eq!((thinned[0], thinned[50]), ((0.0, 0.0), (1.0, 1.0)));
    }

    #[test]
    fn regression_metrics_match_scikit_learn_doc_examples() {
        // Reference: the examples in scikit-learn's documentation of mean_squared_error,
        // mean_absolute_error and r2_score (y_true = [3, -0.5, 2, 7], y_pred = [2.5, 0, 2, 8]);
        // values re-run here with scikit-learn 1.9.1: RMSE 0.6123724356957945, MAE 0.5,
        // R² 0.9486081370449679.
        let targets = [3.0, -0.5, 2.0, 7.0];
        let predictions = [2.5, 0.0, 2.0, 8.0];
        let report = Report::numeric(&predictions, &targets);
        assert!(close(report.rmse.unwrap(), 0.612_372_435_695_794_5, 1e-15));
        assert!(close(report.mae.unwrap(), 0.5, 1e-15));
        assert!(close(report.r2.unwrap(), 0.948_608_137_044_967_9, 1e-15));
        assert_eq!(r2(&[1.0, 2.0], &[4.0, 4.0]), None, "constant targets");
        assert!(report.auc.is_none() && report.log_loss.is_none());
    }

    #[test]
    fn log_loss_stays_finite_on_certain_wrong_predictions() {
        let got = log_loss(&[0.0, 1.0], &[1, 0]);
        assert!(got.is_finite() && got > 30.0, "{got}");
    }
}
