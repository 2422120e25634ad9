//! The traffic share's live gate: two arms, each judged on the outcomes of the requests it
//! answered, with a test for two independent samples.
//!
//! While a candidate holds a traffic share, the requests it answers and those the active
//! model answers are different requests (split by a hash of a sticky key), so the two arms'
//! metrics are independent estimates, not paired ones:
//!
//! - AUC: each arm's AUC (Mann–Whitney, [`metrics::auc`]) with its variance by Hanley &
//!   McNeil (1982, "The meaning and use of the area under a receiver operating characteristic
//!   (ROC) curve", Radiology 143:29–36, equation 2; Q1 = A/(2 − A), Q2 = 2A²/(1 + A));
//!   z = (AUC_c − AUC_a − margin) / √(var_c + var_a), one-sided p = 1 − Φ(z).
//! - Losses (RMSE through the squared error, Brier, log loss, MAE): Welch's t-test on the two
//!   arms' per-row losses, t = (mean_a − mean_c) / √(s_a²/n_a + s_c²/n_c) with the
//!   Welch–Satterthwaite degrees of freedom, one-sided p = P(T > t) that the active arm's mean
//!   loss is the larger. The margin applies to the metric itself (RMSE is the root of the mean
//!   squared error, so it cannot enter the t statistic); the gate asks for both.
//!
//! Both are checked against scipy 1.17.1 and scikit-learn 1.9.1 on datasets scikit-learn
//! ships (`tests/reference/live_share_reference.py`, fixture
//! `tests/fixtures/live_share_reference.json`). The normal tail uses `libm`'s `erfc` and the t
//! tail the regularized incomplete beta function (continued fraction by the modified Lentz
//! method, as in Press et al., *Numerical Recipes in C*, 2nd ed. 1992, §6.4 `betai`/`betacf`),
//! both near double precision, so the p-values match scipy to far better than 1e-9.
//!
//! Pure: numbers in, evidence out.

use serde::{Deserialize, Serialize};

use crate::metrics::{self, normal_sf, GateMetric};

/// One arm's outcomes: its model's outputs and the labels, row for row.
#[derive(Debug, Clone, Copy)]
pub struct Arm<'a> {
    pub outputs: &'a [f64],
    pub labels: &'a [f64],
}

/// What the live gate found on one arm.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ArmSummary {
    /// Outcomes of requests this arm answered.
    pub n: usize,
    /// Label-1 outcomes (binary labels only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub positives: Option<usize>,
    /// The gate metric on the arm's outcomes.
    pub metric: f64,
    /// The variance of that estimate: Hanley & McNeil's for AUC; for a loss, the variance of
    /// the arm's mean per-row loss (s²/n, s² with n − 1).
    pub variance: f64,
}

/// The two arms compared: the evidence a traffic share's live gate logs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ArmComparison {
    pub metric: GateMetric,
    /// `hanley_mcneil_z` (AUC) or `welch_t` (losses).
    pub test: String,
    pub candidate: ArmSummary,
    pub active: ArmSummary,
    /// The candidate's improvement in the metric (positive is better, whatever its direction).
    pub gain: f64,
    pub margin: f64,
    /// z (AUC) or Welch's t.
    pub statistic: f64,
    /// Welch–Satterthwaite degrees of freedom (losses only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub df: Option<f64>,
    /// One-sided: that the candidate's arm is better (by the margin, for AUC).
    pub p_value: f64,
}

/// Why two arms could not be compared.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum CompareError {
    #[error("the {arm} arm has {n} outcomes; the test needs at least 2")]
    TooFew { arm: &'static str, n: usize },
    #[error("auc is undefined on the {arm} arm's outcomes (one class)")]
    OneClass { arm: &'static str },
    #[error("the arms' outputs do not vary (both variances are 0)")]
    NoVariance,
    #[error("the {arm} arm has {outputs} outputs for {labels} labels")]
    Mismatch {
        arm: &'static str,
        outputs: usize,
        labels: usize,
    },
}

/// Compares the candidate's arm with the active model's arm on `metric`, with `margin` the
/// gain the gate asks for.
pub fn compare_arms(
    metric: GateMetric,
    margin: f64,
    candidate: Arm<'_>,
    active: Arm<'_>,
) -> Result<ArmComparison, CompareError> {
    for (arm, side) in [("candidate", candidate), ("active", active)] {
        if side.outputs.len() != side.labels.len() {
            return Err(CompareError::Mismatch {
                arm,
                outputs: side.outputs.len(),
                labels: side.labels.len(),
            });
        }
        if side.labels.len() < 2 {
            return Err(CompareError::TooFew {
                arm,
                n: side.labels.len(),
            });
        }
    }
    match metric {
        GateMetric::Auc => {
            let c = auc_summary(candidate, "candidate")?;
            let a = auc_summary(active, "active")?;
            let spread = c.variance + a.variance;
            if spread.is_nan() || spread <= 0.0 {
                return Err(CompareError::NoVariance);
            }
            let gain = c.metric - a.metric;
            let z = (gain - margin) / spread.sqrt();
            Ok(ArmComparison {
                metric,
                test: "hanley_mcneil_z".into(),
                candidate: c,
                active: a,
                gain,
                margin,
                statistic: z,
                df: None,
                p_value: normal_sf(z),
            })
        }
        _ => {
            let (c, loss_c) = loss_summary(metric, candidate);
            let (a, loss_a) = loss_summary(metric, active);
            let spread = c.variance + a.variance;
            if spread.is_nan() || spread <= 0.0 {
                return Err(CompareError::NoVariance);
            }
            let t = (mean(&loss_a) - mean(&loss_c)) / spread.sqrt();
            let df = spread * spread
                / (c.variance * c.variance / (c.n as f64 - 1.0)
                    + a.variance * a.variance / (a.n as f64 - 1.0));
            Ok(ArmComparison {
                metric,
                test: "welch_t".into(),
                gain: a.metric - c.metric,
                candidate: c,
                active: a,
                margin,
                statistic: t,
                df: Some(df),
                p_value: student_t_sf(t, df),
            })
        }
    }
}

fn auc_summary(arm: Arm<'_>, name: &'static str) -> Result<ArmSummary, CompareError> {
    let binary = metrics::as_binary(arm.labels);
    let positives = binary.iter().filter(|&&y| y == 1).count();
    let auc = metrics::auc(arm.outputs, &binary).ok_or(CompareError::OneClass { arm: name })?;
    let se = metrics::hanley_mcneil_se(auc, positives, binary.len() - positives)
        .ok_or(CompareError::OneClass { arm: name })?;
    Ok(ArmSummary {
        n: binary.len(),
        positives: Some(positives),
        metric: auc,
        variance: se * se,
    })
}

/// An arm's loss metric and the variance of its mean per-row loss, with the per-row losses.
fn loss_summary(metric: GateMetric, arm: Arm<'_>) -> (ArmSummary, Vec<f64>) {
    let binary = metric.label_kind() == crate::schema::LabelKind::Binary;
    let losses = match metric {
        GateMetric::LogLoss => {
            metrics::row_log_losses(arm.outputs, &metrics::as_binary(arm.labels))
        }
        GateMetric::Mae => metrics::row_absolute_errors(arm.outputs, arm.labels),
        _ => metrics::row_squared_errors(arm.outputs, arm.labels),
    };
    let n = losses.len();
    let m = mean(&losses);
    let sample_variance = losses.iter().map(|l| (l - m).powi(2)).sum::<f64>() / (n as f64 - 1.0);
    let value = match metric {
        GateMetric::Rmse => m.sqrt(),
        _ => m,
    };
    let summary = ArmSummary {
        n,
        positives: binary.then(|| arm.labels.iter().filter(|&&y| y >= 0.5).count()),
        metric: value,
        variance: sample_variance / n as f64,
    };
    (summary, losses)
}

fn mean(values: &[f64]) -> f64 {
    values.iter().sum::<f64>() / values.len() as f64
}

/// Upper tail of Student's t with `df` degrees of freedom (`df` need not be whole):
/// P(T > t) = I_x(df/2, 1/2)/2 for t > 0, with x = df/(df + t²).
pub fn student_t_sf(t: f64, df: f64) -> f64 {
    if t.is_nan() || df.is_nan() || df <= 0.0 {
        return f64::NAN;
    }
    if t.is_infinite() {
        return if t > 0.0 { 0.0 } else { 1.0 };
    }
    let t2 = t * t;
    let x = df / (df + t2);
    let one_minus_x = t2 / (df + t2);
    let tail = 0.5 * regularized_incomplete_beta(df / 2.0, 0.5, x, one_minus_x);
    if t > 0.0 {
        tail
    } else {
        1.0 - tail
    }
}

/// I_x(a, b), with 1 − x passed separately so that x near 1 keeps its precision.
fn regularized_incomplete_beta(a: f64, b: f64, x: f64, one_minus_x: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    if one_minus_x <= 0.0 {
        return 1.0;
    }
    let front = (libm::lgamma(a + b) - libm::lgamma(a) - libm::lgamma(b)
        + a * x.ln()
        + b * one_minus_x.ln())
    .exp();
    if x < (a + 1.0) / (a + b + 2.0) {
        front * beta_continued_fraction(a, b, x) / a
    } else {
        1.0 - front * beta_continued_fraction(b, a, one_minus_x) / b
    }
}

/// The continued fraction of the incomplete beta function, by the modified Lentz method.
fn beta_continued_fraction(a: f64, b: f64, x: f64) -> f64 {
    const TINY: f64 = 1e-300;
    let guard = |v: f64| if v.abs() < TINY { TINY } else { v };
    let (qab, qap, qam) = (a + b, a + 1.0, a - 1.0);
    let mut c = 1.0;
    let mut d = 1.0 / guard(1.0 - qab * x / qap);
    let mut h = d;
    for m in 1..10_000 {
        let m = f64::from(m);
        let m2 = 2.0 * m;
        let even = m * (b - m) * x / ((qam + m2) * (a + m2));
        d = 1.0 / guard(1.0 + even * d);
        c = guard(1.0 + even / c);
        h *= d * c;
        let odd = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2));
        d = 1.0 / guard(1.0 + odd * d);
        c = guard(1.0 + odd / c);
        let step = d * c;
        h *= step;
        if (step - 1.0).abs() < f64::EPSILON {
            break;
        }
    }
    h
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Deserialize)]
    struct Fixture {
        cases: Vec<Case>,
    }

    #[derive(Deserialize)]
    struct Case {
        name: String,
        metric: GateMetric,
        margin: f64,
        candidate: ArmFixture,
        active: ArmFixture,
        statistic: f64,
        df: Option<f64>,
        p_value: f64,
    }

    #[derive(Deserialize)]
    struct ArmFixture {
        outputs: Vec<f64>,
        labels: Vec<f64>,
        n: usize,
        positives: Option<usize>,
        metric: f64,
        variance: f64,
    }

    fn close(ours: f64, theirs: f64, tolerance: f64) -> bool {
        (ours - theirs).abs() <= tolerance
    }

    /// Reference: scipy 1.17.1 (`norm.sf`, `ttest_ind(equal_var=False, alternative="greater")`)
    /// and scikit-learn 1.9.1 (`roc_auc_score`, `mean_squared_error`) on scikit-learn's
    /// breast cancer and diabetes datasets, from tests/reference/live_share_reference.py.
    #[test]
    fn the_two_sample_gate_matches_scipy_and_scikit_learn_on_shipped_datasets() {
        let fixture: Fixture =
            serde_json::from_str(include_str!("../tests/fixtures/live_share_reference.json"))
                .unwrap();
        assert_eq!(fixture.cases.len(), 3);
        for case in &fixture.cases {
            fn arm(f: &ArmFixture) -> Arm<'_> {
                Arm {
                    outputs: &f.outputs,
                    labels: &f.labels,
                }
            }
            let got = compare_arms(
                case.metric,
                case.margin,
                arm(&case.candidate),
                arm(&case.active),
            )
            .unwrap();
            let at = &case.name;
            for (ours, theirs) in [
                (&got.candidate, &case.candidate),
                (&got.active, &case.active),
            ] {
                assert_eq!(ours.n, theirs.n, "{at}");
                assert_eq!(ours.positives, theirs.positives, "{at}");
                assert!(close(ours.metric, theirs.metric, 1e-9), "{at}: {ours:?}");
                assert!(
                    close(ours.variance, theirs.variance, 1e-9),
                    "{at}: {ours:?}"
                );
            }
            assert!(
                close(got.statistic, case.statistic, 1e-9),
                "{at}: statistic {} vs scipy {}",
                got.statistic,
                case.statistic
            );
            assert!(
                close(got.p_value, case.p_value, 1e-9),
                "{at}: p {} vs scipy {}",
                got.p_value,
                case.p_value
            );
            match (got.df, case.df) {
                (Some(ours), Some(theirs)) => assert!(close(ours, theirs, 1e-9), "{at}"),
                (None, None) => {}
                other => panic!("{at}: degrees of freedom {other:?}"),
            }
        }
    }

    /// Properties of the distribution, no outside values: the two tails add up to 1, t = 0
    /// halves it, and many degrees of freedom give the normal tail.
    #[test]
    fn the_t_tail_is_symmetric_and_tends_to_the_normal_tail() {
        for (t, df) in [(1.5, 3.5), (0.3, 120.0), (4.0, 7.0)] {
            let sum = student_t_sf(t, df) + student_t_sf(-t, df);
            assert!((sum - 1.0).abs() < 1e-14, "t {t} df {df}: {sum}");
        }
        assert!((student_t_sf(0.0, 9.0) - 0.5).abs() < 1e-15);
        // With a million degrees of freedom the t tail is the normal tail to about 1e-6.
        let (t, n) = (1.7, normal_sf(1.7));
        assert!((student_t_sf(t, 1e6) - n).abs() < 1e-6);
        assert!((normal_sf(0.0) - 0.5).abs() < 1e-16);
    }

    #[test]
    fn arms_that_cannot_be_compared_say_why() {
        let one = [0.4];
        let two = [0.2, 0.8];
        let same = [1.0, 1.0];
        assert_eq!(
            compare_arms(
                GateMetric::Auc,
                0.0,
                Arm {
                    outputs: &one,
                    labels: &[1.0]
                },
                Arm {
                    outputs: &two,
                    labels: &[0.0, 1.0]
                }
            ),
            Err(CompareError::TooFew {
                arm: "candidate",
                n: 1
            })
        );
        assert_eq!(
            compare_arms(
                GateMetric::Auc,
                0.0,
                Arm {
                    outputs: &two,
                    labels: &[0.0, 1.0]
                },
                Arm {
                    outputs: &two,
                    labels: &same
                }
            ),
            Err(CompareError::OneClass { arm: "active" })
        );
        // Perfect predictions on both arms: no loss varies.
        assert_eq!(
            compare_arms(
                GateMetric::Rmse,
                0.0,
                Arm {
                    outputs: &same,
                    labels: &same
                },
                Arm {
                    outputs: &same,
                    labels: &same
                }
            ),
            Err(CompareError::NoVariance)
        );
    }

    #[test]
    fn a_better_arm_has_a_small_p_value_and_a_worse_one_a_large_one() {
        // Candidate arm: perfectly separated; active arm: scores unrelated to the labels.
        let labels: Vec<f64> = (0..200).map(|i| f64::from(i % 2)).collect();
        let good: Vec<f64> = labels.iter().map(|y| 0.2 + 0.6 * y).collect();
        let noise: Vec<f64> = (0..200)
            .map(|i| f64::from((i * 37) % 101) / 101.0)
            .collect();
        let better = compare_arms(
            GateMetric::Auc,
            0.02,
            Arm {
                outputs: &good,
                labels: &labels,
            },
            Arm {
                outputs: &noise,
                labels: &labels,
            },
        )
        .unwrap();
        assert!(better.gain > 0.3 && better.p_value < 1e-6, "{better:?}");
        let worse = compare_arms(
            GateMetric::Auc,
            0.02,
            Arm {
                outputs: &noise,
                labels: &labels,
            },
            Arm {
                outputs: &good,
                labels: &labels,
            },
        )
        .unwrap();
        assert!(worse.gain < -0.3 && worse.p_value > 0.999, "{worse:?}");
    }
}
