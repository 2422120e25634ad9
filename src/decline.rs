//! Has the active model got worse on recently labeled outcomes than it was on its holdout?
//!
//! Drift (PSI) sees a change in who is being scored, not in how the features relate to the
//! outcome; after such a change the inputs can look the same while the model is wrong. This
//! check compares the model's gate metric on its latest labeled rows with the value it had
//! on its run's holdout, with a one-sided test, so the schedule can start a run when the
//! model has really declined (`schedule.on_decline`).
//!
//! - AUC: z = (A_holdout − A_recent) / √(SE_holdout² + SE_recent²), each SE by Hanley &
//!   McNeil (1982), the two samples independent (the recent rows come after the holdout's
//!   training cutoff and are scored, not trained on).
//! - Losses (log loss, Brier, RMSE through the squared error, MAE): the holdout keeps only its
//!   mean, so its value is taken as the reference: z = (mean recent loss − holdout loss) /
//!   (sd of the recent per-row losses / √n). This ignores the holdout's own sampling error,
//!   which makes the test somewhat quicker to fire than a two-sample one; `decline_alpha`
//!   defaults low (0.01) for that reason (our own choice).
//!
//! The p-value is the upper normal tail of z; the model has declined when p < alpha.
//! Pure: no I/O.

use serde::Serialize;

use crate::metrics::{self, GateMetric, Report};

/// The check's evidence, logged with the run it starts.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Decline {
    pub metric: GateMetric,
    pub rows: usize,
    /// The model's value on its run's holdout, and on the recent rows.
    pub holdout: f64,
    pub recent: f64,
    pub z: f64,
    pub p_value: f64,
    pub alpha: f64,
    /// True when the recent value is significantly worse (p < alpha).
    pub declined: bool,
}

impl Decline {
    /// One line for the log's trigger detail.
    pub fn describe(&self, model_id: &str) -> String {
        format!(
            "{} of {model_id} on its latest {} labeled rows {:.4} against {:.4} on its holdout (one-sided z {:.2}, p {:.2e}, alpha {})",
            self.metric.name(),
            self.rows,
            self.recent,
            self.holdout,
            self.z,
            self.p_value,
            self.alpha
        )
    }
}

/// Compares `outputs` (the model's, on recent labeled rows) against `labels` with the model's
/// `holdout` report. `None` when the metric is undefined on either side (one class, no
/// holdout value) or the recent losses do not vary.
pub fn check(
    metric: GateMetric,
    holdout: &Report,
    outputs: &[f64],
    labels: &[f64],
    alpha: f64,
) -> Option<Decline> {
    let n = labels.len();
    if n < 2 || outputs.len() != n {
        return None;
    }
    let (holdout_value, recent, z) = match metric {
        GateMetric::Auc => {
            let binary = metrics::as_binary(labels);
            let recent = metrics::auc(outputs, &binary)?;
            let positives = binary.iter().filter(|&&y| y == 1).count();
            let se_recent = metrics::hanley_mcneil_se(recent, positives, n - positives)?;
            let reference = holdout.auc?;
            let holdout_positives = holdout.positives?;
            let se_holdout = metrics::hanley_mcneil_se(
                reference,
                holdout_positives,
                holdout.rows.checked_sub(holdout_positives)?,
            )?;
            let se = (se_recent.powi(2) + se_holdout.powi(2)).sqrt();
            if se == 0.0 {
                return None;
            }
            (reference, recent, (reference - recent) / se)
        }
        GateMetric::LogLoss | GateMetric::Brier | GateMetric::Rmse | GateMetric::Mae => {
            let (losses, reference, shown): (Vec<f64>, f64, fn(f64) -> f64) = match metric {
                GateMetric::LogLoss => (
                    metrics::row_log_losses(outputs, &metrics::as_binary(labels)),
                    holdout.log_loss?,
                    |m| m,
                ),
                GateMetric::Brier => (
                    outputs
                        .iter()
                        .zip(labels)
                        .map(|(p, y)| (p - y).powi(2))
                        .collect(),
                    holdout.brier?,
                    |m| m,
                ),
                // RMSE is tested on the squared error against the holdout's RMSE squared.
                GateMetric::Rmse => (
                    metrics::row_squared_errors(outputs, labels),
                    holdout.rmse?.powi(2),
                    f64::sqrt,
                ),
                _ => (
                    metrics::row_absolute_errors(outputs, labels),
                    holdout.mae?,
                    |m| m,
                ),
            };
            let mean = losses.iter().sum::<f64>() / n as f64;
            let sd =
                (losses.iter().map(|l| (l - mean).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt();
            if sd == 0.0 || !sd.is_finite() {
                return None;
            }
            (
                shown(reference),
                shown(mean),
                (mean - reference) / (sd / (n as f64).sqrt()),
            )
        }
    };
    let p_value = metrics::normal_sf(z);
    Some(Decline {
        metric,
        rows: n,
        holdout: holdout_value,
        recent,
        z,
        p_value,
        alpha,
        declined: p_value < alpha,
    })
}

#[cfg(test)]
mod tests {
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    use super::*;
    use crate::config::Config;
    use crate::demo::scenario::{invoice, Regime};
    use crate::learn::{run_once, Example, RunPlan};
    use crate::model::Model;
    use crate::promotion::{Trigger, Verdict};
    use crate::schema::{Row, Schema};

    #[test]
    fn the_auc_standard_error_follows_hanley_and_mcneil() {
        // Equation 2 of Hanley & McNeil (1982) evaluated by hand (Python, double precision)
        // for A = 0.8 with 50 + 50 rows and A = 0.9 with 20 positives and 80 negatives.
        let se = metrics::hanley_mcneil_se(0.8, 50, 50).unwrap();
        assert!((se - 0.044_502_184_715_409_69).abs() < 1e-12, "{se}");
        let se = metrics::hanley_mcneil_se(0.9, 20, 80).unwrap();
        assert!((se - 0.047_522_029_643_475_96).abs() < 1e-12, "{se}");
        assert_eq!(metrics::hanley_mcneil_se(0.8, 0, 50), None);
    }

    fn rows(schema: &Schema, seed: u64, n: usize, regime: Regime) -> Vec<(Row, f64)> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        (0..n)
            .map(|_| {
                let inv = invoice(&mut rng, regime);
                let row = schema.parse_row(&inv.features).unwrap();
                (row, f64::from(inv.draw_label(&mut rng)))
            })
            .collect()
    }

    /// A model trained by a real run on 2,400 rows of the scenario's first regime.
    fn trained(config: &Config, schema: &Schema) -> Model {
        let examples: Vec<Example> = rows(schema, 7, 2400, Regime::Before)
            .into_iter()
            .enumerate()
            .map(|(i, (row, label))| Example {
                monitoring: Default::default(),
                id: format!("e{i}").into(),
                event_time: i as i64,
                row,
                label,
            })
            .collect();
        let plan =
            RunPlan::from_config(config, schema, "r-1".into(), Trigger::Manual, 1, 0, None, 0);
        let out = run_once(&plan, &examples);
        assert_eq!(out.entry.verdict, Verdict::Promoted, "{}", out.entry.reason);
        out.candidate.unwrap()
    }

    fn check_on(config: &Config, model: &Model, recent: &[(Row, f64)]) -> Option<Decline> {
        let rows: Vec<&Row> = recent.iter().map(|(r, _)| r).collect();
        let labels: Vec<f64> = recent.iter().map(|(_, y)| *y).collect();
        check(
            config.gate.metric,
            model.holdout.as_ref().unwrap(),
            &model.predictions(&rows),
            &labels,
            config.schedule.decline_alpha,
        )
    }

    #[test]
    fn on_a_stationary_stream_the_check_rarely_fires() {
        let config = Config::embedded_default();
        let schema = config.schema();
        let model = trained(&config, &schema);
        // 60 independent windows of 500 rows from the same regime.
        let fired = (0..60)
            .filter(|&seed| {
                let recent = rows(&schema, 1000 + seed, 500, Regime::Before);
                check_on(&config, &model, &recent).unwrap().declined
            })
            .count();
        // Measured: 0 of 60 at alpha 0.01 (the expected count is at most 0.6).
        assert!(fired <= 2, "fired on {fired} of 60 stationary windows");
    }

    #[test]
    fn after_an_abrupt_change_the_check_fires_within_a_few_hundred_rows() {
        let config = Config::embedded_default();
        let schema = config.schema();
        let model = trained(&config, &schema);
        // The latest 1,000 labeled rows, checked every 50 rows as the new regime arrives.
        let before = rows(&schema, 21, 1000, Regime::Before);
        let after = rows(&schema, 22, 1000, Regime::After);
        let first_fire = (1..=20).map(|k| k * 50).find(|&new_rows| {
            let mut recent: Vec<(Row, f64)> = before[new_rows..].to_vec();
            recent.extend_from_slice(&after[..new_rows]);
            let decline = check_on(&config, &model, &recent).unwrap();
            decline.declined
        });
        let new_rows = first_fire.expect("the check fires once the new regime fills the window");
        // Measured: fires after 250 new-regime rows (of the 1,000 in the window).
        assert!(
            new_rows <= 400,
            "fired only after {new_rows} new-regime rows"
        );
        let mut recent = before[new_rows..].to_vec();
        recent.extend_from_slice(&after[..new_rows]);
        let decline = check_on(&config, &model, &recent).unwrap();
        assert!(decline.recent < decline.holdout && decline.p_value < decline.alpha);
        assert!(decline.describe(&model.id).contains("auc"));
    }
}
