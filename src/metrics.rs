//! Model-quality metrics for binary outcomes: AUC, log loss, Brier score.
//!
//! Pure functions over slices of probabilities and 0/1 labels; no I/O and no model types, so
//! each can be checked against published values. Callers make sure the slices are the same
//! length; a metric that is undefined for the input (AUC with one class) returns `None`.

use serde::{Deserialize, Serialize};

use crate::config::GateMetric;

/// Probabilities are clipped to [EPS, 1 - EPS] in log loss, as scikit-learn does for float64
/// (its `np.finfo(float64).eps` clip; scikit-learn 1.9 `sklearn.metrics.log_loss`).
const LOG_LOSS_EPS: f64 = f64::EPSILON;

/// The metrics reported for one model on one set of rows.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Report {
    pub rows: usize,
    pub positives: usize,
    pub auc: Option<f64>,
    pub log_loss: f64,
    pub brier: f64,
}

impl Report {
    pub fn compute(probabilities: &[f64], labels: &[u8]) -> Report {
        Report {
            rows: labels.len(),
            positives: labels.iter().filter(|&&y| y == 1).count(),
            auc: auc(probabilities, labels),
            log_loss: log_loss(probabilities, labels),
            brier: brier(probabilities, labels),
        }
    }

    /// The value of `metric`, if defined.
    pub fn get(&self, metric: GateMetric) -> Option<f64> {
        match metric {
            GateMetric::Auc => self.auc,
            GateMetric::LogLoss => Some(self.log_loss),
            GateMetric::Brier => Some(self.brier),
        }
    }
}

/// The value of `metric` for these predictions.
pub fn evaluate(metric: GateMetric, probabilities: &[f64], labels: &[u8]) -> Option<f64> {
    match metric {
        GateMetric::Auc => auc(probabilities, labels),
        GateMetric::LogLoss => Some(log_loss(probabilities, labels)),
        GateMetric::Brier => Some(brier(probabilities, labels)),
    }
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
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]));
    // Sum of the positives' mid-ranks (1-based), ties sharing the mean of their ranks.
    let mut rank_sum = 0.0;
    let mut start = 0;
    while start < order.len() {
        let mut end = start + 1;
        while end < order.len() && scores[order[end]] == scores[order[start]] {
            end += 1;
        }
        let mid_rank = (start + 1 + end) as f64 / 2.0;
        let tied_positives = order[start..end]
            .iter()
            .filter(|&&i| labels[i] == 1)
            .count();
        rank_sum += mid_rank * tied_positives as f64;
        start = end;
    }
    let p = positives as f64;
    let u = rank_sum - p * (p + 1.0) / 2.0;
    Some(u / (p * negatives as f64))
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

    #[test]
    fn log_loss_stays_finite_on_certain_wrong_predictions() {
        let got = log_loss(&[0.0, 1.0], &[1, 0]);
        assert!(got.is_finite() && got > 30.0, "{got}");
    }
}
