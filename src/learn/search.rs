//! Cross-validated search over every configured family's grid.
//!
//! Preprocessing is fitted inside each fold on that fold's training rows only; the fold's
//! design matrices are built once and reused for every grid setting.

use crate::config::{GateMetric, TrainingConfig};
use crate::metrics;
use crate::model::logistic::{fit_l2, sigmoid};
use crate::model::{Preprocessor, Setting};
use crate::promotion::SettingResult;
use crate::schema::{Row, Schema};

use super::split::stratified_folds;

/// Every grid setting of every family, in config order.
pub fn grid(training: &TrainingConfig) -> Vec<Setting> {
    training
        .families
        .iter()
        .flat_map(|family| {
            family.lambda.iter().map(move |&lambda| Setting {
                family: family.family,
                penalty: family.penalty,
                lambda,
            })
        })
        .collect()
}

struct Fold {
    x_train: Vec<f64>,
    y_train: Vec<u8>,
    x_valid: Vec<f64>,
    y_valid: Vec<u8>,
    width: usize,
}

/// Cross-validates every setting on `rows`/`labels` and returns one result per setting.
pub fn cross_validate(
    schema: &Schema,
    rows: &[&Row],
    labels: &[u8],
    settings: &[Setting],
    training: &TrainingConfig,
    metric: GateMetric,
) -> Vec<SettingResult> {
    let assignment = stratified_folds(labels, training.folds, training.seed);
    let folds: Vec<Fold> = (0..training.folds)
        .map(|f| {
            let (train, valid): (Vec<usize>, Vec<usize>) =
                (0..rows.len()).partition(|&i| assignment[i] != f);
            let train_rows: Vec<&Row> = train.iter().map(|&i| rows[i]).collect();
            let valid_rows: Vec<&Row> = valid.iter().map(|&i| rows[i]).collect();
            let pre = Preprocessor::fit(schema, &train_rows);
            Fold {
                x_train: pre.transform_all(&train_rows),
                y_train: train.iter().map(|&i| labels[i]).collect(),
                x_valid: pre.transform_all(&valid_rows),
                y_valid: valid.iter().map(|&i| labels[i]).collect(),
                width: pre.width(),
            }
        })
        .collect();

    settings
        .iter()
        .map(|&setting| {
            let mut values = Vec::with_capacity(folds.len());
            for (f, fold) in folds.iter().enumerate() {
                let fit = match fit_l2(&fold.x_train, fold.width, &fold.y_train, setting.lambda) {
                    Ok(fit) => fit,
                    Err(e) => return failed(setting, format!("fold {f}: {e}")),
                };
                let probabilities: Vec<f64> = fold
                    .x_valid
                    .chunks_exact(fold.width)
                    .map(|z| sigmoid(fit.log_odds(z)))
                    .collect();
                match metrics::evaluate(metric, &probabilities, &fold.y_valid) {
                    Some(v) => values.push(v),
                    None => {
                        return failed(
                            setting,
                            format!("fold {f}: {} undefined (one class)", metric.name()),
                        )
                    }
                }
            }
            let n = values.len() as f64;
            let mean = values.iter().sum::<f64>() / n;
            let std = if values.len() > 1 {
                (values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt()
            } else {
                0.0
            };
            SettingResult {
                setting,
                cv_mean: Some(mean),
                cv_std: Some(std),
                folds: values,
                error: None,
            }
        })
        .collect()
}

fn failed(setting: Setting, error: String) -> SettingResult {
    SettingResult {
        setting,
        cv_mean: None,
        cv_std: None,
        folds: vec![],
        error: Some(error),
    }
}

/// The setting with the best mean CV metric; ties go to the larger penalty. `None` when no
/// setting could be evaluated. Returns the index into `results` and the reason.
pub fn choose_best(results: &[SettingResult], metric: GateMetric) -> Option<(usize, String)> {
    let better = |a: f64, b: f64| {
        if metric.higher_is_better() {
            a > b
        } else {
            a < b
        }
    };
    let mut best: Option<usize> = None;
    for (i, r) in results.iter().enumerate() {
        let Some(mean) = r.cv_mean else { continue };
        best = match best {
            None => Some(i),
            Some(b) => {
                let best_mean = results[b].cv_mean.unwrap_or(f64::NAN);
                if better(mean, best_mean)
                    || (mean == best_mean && r.setting.lambda > results[b].setting.lambda)
                {
                    Some(i)
                } else {
                    Some(b)
                }
            }
        };
    }
    best.map(|i| {
        let r = &results[i];
        let reason = format!(
            "best mean cross-validated {} ({:.4} ± {:.4} over {} folds) of {} settings",
            metric.name(),
            r.cv_mean.unwrap_or(f64::NAN),
            r.cv_std.unwrap_or(f64::NAN),
            r.folds.len(),
            results.len()
        );
        (i, reason)
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{FamilyName, Penalty};

    fn result(lambda: f64, mean: Option<f64>) -> SettingResult {
        SettingResult {
            setting: Setting {
                family: FamilyName::Logistic,
                penalty: Penalty::L2,
                lambda,
            },
            cv_mean: mean,
            cv_std: mean.map(|_| 0.01),
            folds: vec![],
            error: None,
        }
    }

    #[test]
    fn best_follows_the_metrics_direction_and_breaks_ties_toward_more_penalty() {
        let results = [
            result(0.001, Some(0.80)),
            result(0.01, Some(0.82)),
            result(0.1, Some(0.82)),
            result(1.0, None),
        ];
        assert_eq!(choose_best(&results, GateMetric::Auc).unwrap().0, 2);
        let losses = [
            result(0.001, Some(0.30)),
            result(0.01, Some(0.25)),
            result(0.1, Some(0.40)),
        ];
        assert_eq!(choose_best(&losses, GateMetric::LogLoss).unwrap().0, 1);
        assert!(choose_best(&[result(1.0, None)], GateMetric::Auc).is_none());
    }
}
