//! The cross-validated search: which settings are tried, how they are scored on repeated
//! k-fold splits, and how one is chosen.
//!
//! The unit of work is a fold, not a setting: a fold fits its preprocessing on its own training
//! rows only (nothing leaks from its validation rows), standardizes its design matrix once, and
//! then evaluates every setting of every family on it — each penalized family as one
//! warm-started lambda path per `l1_ratio`. So the data is copied once per fold, never per grid
//! value, and folds run in parallel on at most `training.workers` threads.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;

use crate::config::{Selection, TrainingConfig};
use crate::metrics;
use crate::metrics::GateMetric;
use crate::model::elastic_net::{self, Design, Response, SolverOptions};
use crate::model::logistic::sigmoid;
use crate::model::{Estimator, FamilyGrid, Preprocessor, Setting};
use crate::promotion::SettingResult;
use crate::schema::LabelKind;
use crate::schema::{Row, Schema};

use super::split::stratified_folds;

/// A family's settings as the search fits them.
#[derive(Debug, Clone, PartialEq)]
pub enum Track {
    /// A decreasing lambda path of one penalized family at one `l1_ratio`, fitted with warm
    /// starts; one setting per lambda.
    Path {
        settings: Vec<Setting>,
        response: Response,
        l1_ratio: f64,
        lambdas: Vec<f64>,
    },
    /// One setting of a family without a path (trees, neighbours, naive Bayes).
    Single(Setting),
}

impl Track {
    pub fn settings(&self) -> &[Setting] {
        match self {
            Track::Path { settings, .. } => settings,
            Track::Single(setting) => std::slice::from_ref(setting),
        }
    }
}

/// The tracks a run searches. Automatic lambda paths start at the lambda_max of `design` (the
/// run's whole training part), so every fold and the final fit share one sequence, as glmnet's
/// cross-validation does (Friedman, Hastie & Tibshirani 2010, §2.5).
///
/// `weights` are the rows' recency weights (`training.half_life`), if any.
pub fn tracks(
    training: &TrainingConfig,
    design: &Design,
    y: &[f64],
    weights: Option<&[f64]>,
) -> Vec<Track> {
    let mut out = Vec::new();
    for family in &training.families {
        match family {
            FamilyGrid::Logistic(grid) | FamilyGrid::Linear(grid) => {
                let (response, binary) = match family {
                    FamilyGrid::Logistic(_) => (Response::Binomial, true),
                    _ => (Response::Gaussian, false),
                };
                for l1_ratio in grid.l1_ratios() {
                    let mut lambdas = match &grid.lambda {
                        Some(pinned) => pinned.clone(),
                        None => elastic_net::lambda_path(
                            elastic_net::lambda_max_weighted(design, y, weights, l1_ratio),
                            grid.lambda_count,
                            grid.lambda_min_ratio,
                        ),
                    };
                    lambdas.sort_by(|a, b| b.total_cmp(a));
                    lambdas.dedup();
                    let settings = lambdas
                        .iter()
                        .map(|&lambda| {
                            if binary {
                                Setting::Logistic {
                                    penalty: grid.penalty,
                                    l1_ratio,
                                    lambda,
                                }
                            } else {
                                Setting::Linear {
                                    penalty: grid.penalty,
                                    l1_ratio,
                                    lambda,
                                }
                            }
                        })
                        .collect();
                    out.push(Track::Path {
                        settings,
                        response,
                        l1_ratio,
                        lambdas,
                    });
                }
            }
            fixed => out.extend(
                fixed
                    .fixed_settings(training.seed)
                    .unwrap_or_default()
                    .into_iter()
                    .map(Track::Single),
            ),
        }
    }
    out
}

/// One fold's verdict on one setting.
type FoldValue = Result<(f64, bool), String>;

/// Cross-validates every setting of `tracks` on `folds × repeats` splits of `rows`/`labels`
/// and returns one result per setting, in track order.
#[allow(clippy::too_many_arguments)]
pub fn cross_validate(
    schema: &Schema,
    rows: &[&Row],
    labels: &[f64],
    weights: Option<&[f64]>,
    tracks: &[Track],
    training: &TrainingConfig,
    target: LabelKind,
    metric: GateMetric,
) -> Vec<SettingResult> {
    let k = training.folds;
    // Numeric targets have no classes to stratify: one class, dealt round-robin after a shuffle.
    let strata: Vec<u8> = match target {
        LabelKind::Binary => metrics::as_binary(labels),
        LabelKind::Number => vec![0; labels.len()],
    };
    let assignments: Vec<Vec<usize>> = (0..training.repeats)
        .map(|r| stratified_folds(&strata, k, repeat_seed(training.seed, r)))
        .collect();
    let tasks: Vec<(usize, usize)> = (0..training.repeats)
        .flat_map(|r| (0..k).map(move |f| (r, f)))
        .collect();
    let outcomes: Mutex<Vec<Option<Vec<FoldValue>>>> = Mutex::new(vec![None; tasks.len()]);
    let next = AtomicUsize::new(0);
    let threads = training.workers.clamp(1, tasks.len());
    let work = || loop {
        let t = next.fetch_add(1, Ordering::Relaxed);
        let Some(&(r, f)) = tasks.get(t) else { break };
        let values = evaluate_fold(
            schema,
            rows,
            labels,
            weights,
            &assignments[r],
            f,
            tracks,
            target,
            metric,
        );
        outcomes.lock().unwrap_or_else(|e| e.into_inner())[t] = Some(values);
    };
    if threads == 1 {
        // On the caller's thread: a spawned one would get its own allocator arena, where the
        // memory the caller freed (the whole part's design) cannot be reused for the folds'.
        work();
    } else {
        std::thread::scope(|scope| {
            for _ in 0..threads {
                scope.spawn(work);
            }
        });
    }
    let outcomes: Vec<Vec<FoldValue>> = outcomes
        .into_inner()
        .unwrap_or_else(|e| e.into_inner())
        .into_iter()
        .map(|o| o.unwrap_or_default())
        .collect();

    let settings: Vec<Setting> = tracks.iter().flat_map(|t| t.settings().to_vec()).collect();
    settings
        .iter()
        .enumerate()
        .map(|(s, &setting)| {
            let mut values = Vec::with_capacity(tasks.len());
            let mut unconverged = 0;
            for (t, &(r, f)) in tasks.iter().enumerate() {
                match outcomes[t].get(s) {
                    Some(Ok((value, converged))) => {
                        values.push(*value);
                        unconverged += usize::from(!converged);
                    }
                    Some(Err(e)) => {
                        return SettingResult::failed(setting, format!("repeat {r} fold {f}: {e}"))
                    }
                    None => {
                        return SettingResult::failed(
                            setting,
                            format!("repeat {r} fold {f}: not evaluated"),
                        )
                    }
                }
            }
            SettingResult::from_folds(setting, values, unconverged)
        })
        .collect()
}

/// Each repeat's shuffle gets its own seed, derived so repeats differ but stay reproducible.
fn repeat_seed(seed: u64, repeat: usize) -> u64 {
    seed.wrapping_add((repeat as u64).wrapping_mul(0x9e37_79b9_7f4a_7c15))
}

/// Fits every track on fold `fold`'s training rows and scores its validation rows.
#[allow(clippy::too_many_arguments)]
fn evaluate_fold(
    schema: &Schema,
    rows: &[&Row],
    labels: &[f64],
    weights: Option<&[f64]>,
    assignment: &[usize],
    fold: usize,
    tracks: &[Track],
    target: LabelKind,
    metric: GateMetric,
) -> Vec<FoldValue> {
    let (train, valid): (Vec<usize>, Vec<usize>) =
        (0..rows.len()).partition(|&i| assignment[i] != fold);
    let train_rows: Vec<&Row> = train.iter().map(|&i| rows[i]).collect();
    let valid_rows: Vec<&Row> = valid.iter().map(|&i| rows[i]).collect();
    let y_train: Vec<f64> = train.iter().map(|&i| labels[i]).collect();
    let y_valid: Vec<f64> = valid.iter().map(|&i| labels[i]).collect();
    let w_train: Option<Vec<f64>> = weights.map(|w| train.iter().map(|&i| w[i]).collect());
    validation_outputs(
        schema,
        (&train_rows, &y_train, w_train.as_deref()),
        &valid_rows,
        tracks,
        target,
    )
    .into_iter()
    .map(|outputs| {
        let (outputs, converged) = outputs?;
        metrics::evaluate(metric, &outputs, &y_valid)
            .map(|v| (v, converged))
            .ok_or_else(|| format!("{} undefined (one class)", metric.name()))
    })
    .collect()
}

/// Every setting's outputs on one validation set.
pub type SettingOutputs = Result<(Vec<f64>, bool), String>;

/// Fits every setting of `tracks` on the training rows (with their labels and recency weights,
/// which only the penalized paths take) and gives its outputs on the validation rows (and
/// whether its fit converged), one entry per setting in track order.
pub fn validation_outputs(
    schema: &Schema,
    (train_rows, y_train, w_train): (&[&Row], &[f64], Option<&[f64]>),
    valid_rows: &[&Row],
    tracks: &[Track],
    target: LabelKind,
) -> Vec<SettingOutputs> {
    // The paths read a column-major design, written column by column as each feature is
    // fitted (one read of the rows per feature, statistics over contiguous memory); a
    // row-major copy is made only for families that need one.
    let (pre, design) = if tracks.iter().any(|t| matches!(t, Track::Path { .. })) {
        let (pre, columns) = Preprocessor::fit_columns(schema, train_rows);
        let width = pre.width();
        (
            pre,
            Some(Design::from_columns(columns, train_rows.len(), width)),
        )
    } else {
        (Preprocessor::fit(schema, train_rows), None)
    };
    let width = pre.width();
    // Only the families without a path read whole row-major matrices; a path's outputs are
    // computed a block of validation rows at a time (below).
    let any_single = tracks.iter().any(|t| matches!(t, Track::Single(_)));
    let x_valid = any_single.then(|| pre.transform_all(valid_rows));
    let x_train = any_single.then(|| pre.transform_all(train_rows));
    let y_train_binary = metrics::as_binary(y_train);

    let mut values = Vec::new();
    for track in tracks {
        match track {
            Track::Path {
                settings,
                response,
                l1_ratio,
                lambdas,
            } => {
                let Some(design) = &design else { continue };
                let path = elastic_net::fit_path_weighted(
                    design,
                    y_train,
                    w_train,
                    *response,
                    *l1_ratio,
                    lambdas,
                    &SolverOptions::default(),
                );
                match path {
                    Ok(points) => {
                        let fits: Vec<(f64, Vec<f64>)> = points
                            .iter()
                            .map(|p| design.to_input_scale(p.intercept, &p.weights))
                            .collect();
                        let outputs = path_outputs(&pre, valid_rows, &fits, target);
                        values.extend(
                            outputs
                                .into_iter()
                                .zip(&points)
                                .map(|(outputs, point)| Ok((outputs, point.converged))),
                        );
                    }
                    Err(e) => values.extend(settings.iter().map(|_| Err(e.to_string()))),
                }
            }
            Track::Single(setting) => {
                let (Some(x_train), Some(x_valid)) = (&x_train, &x_valid) else {
                    continue;
                };
                let value = Estimator::fit_family(setting, x_train, width, &y_train_binary)
                    .map_err(|e| e.to_string())
                    .map(|estimator| {
                        let probabilities = estimator
                            .family_probabilities(x_valid, width)
                            .unwrap_or_default();
                        (probabilities, true)
                    });
                values.push(value);
            }
        }
    }
    values
}

/// Each of a path's fitted linear models (`(intercept, weights)` on the standardized columns)
/// applied to `rows`: one output vector per fit. The rows are standardized a block at a time
/// into one small buffer, so no matrix of the validation rows is held beside the fold's design.
fn path_outputs(
    pre: &Preprocessor,
    rows: &[&Row],
    fits: &[(f64, Vec<f64>)],
    target: LabelKind,
) -> Vec<Vec<f64>> {
    const BLOCK: usize = 256;
    let width = pre.width();
    let mut outputs: Vec<Vec<f64>> = fits
        .iter()
        .map(|_| Vec::with_capacity(rows.len()))
        .collect();
    let mut block = vec![0.0; BLOCK * width];
    for chunk in rows.chunks(BLOCK) {
        let x = &mut block[..chunk.len() * width];
        for (row, out) in chunk.iter().zip(x.chunks_exact_mut(width.max(1))) {
            pre.transform_into(row, out);
        }
        for ((b0, w), out) in fits.iter().zip(&mut outputs) {
            out.extend(x.chunks_exact(width.max(1)).map(|z| {
                let linear = b0 + w.iter().zip(z).map(|(a, b)| a * b).sum::<f64>();
                match target {
                    LabelKind::Binary => sigmoid(linear),
                    LabelKind::Number => linear,
                }
            }));
        }
    }
    outputs
}

/// Picks a setting from the cross-validation table. Returns its index and why; `None` when no
/// setting could be evaluated.
///
/// `best` takes the best mean (ties go to the more restrained setting). `one_se` then takes,
/// among the settings on the best one's penalty path, the most restrained whose mean is within
/// one standard error of the best mean (Breiman, Friedman, Olshen & Stone 1984, *Classification
/// and Regression Trees*, §3.4.3; Hastie, Tibshirani & Friedman, *The Elements of Statistical
/// Learning*, 2nd ed., §7.10). The standard error is the fold values' standard deviation over
/// √(folds × repeats), common practice although repeated folds are not independent.
pub fn choose(
    results: &[SettingResult],
    metric: GateMetric,
    selection: Selection,
) -> Option<(usize, String)> {
    // Oriented so that larger is better.
    let score = |r: &SettingResult| {
        r.cv_mean
            .map(|m| if metric.higher_is_better() { m } else { -m })
    };
    let mut best: Option<usize> = None;
    for (i, r) in results.iter().enumerate() {
        let Some(value) = score(r) else { continue };
        let replace = match best {
            None => true,
            Some(b) => {
                let incumbent = score(&results[b]).unwrap_or(f64::NEG_INFINITY);
                value > incumbent
                    || (value == incumbent
                        && r.setting.restraint() > results[b].setting.restraint())
            }
        };
        if replace {
            best = Some(i);
        }
    }
    let best = best?;
    let b = &results[best];
    let summary = |r: &SettingResult| {
        format!(
            "{} (mean {} {:.4} ± {:.4} SE over {} folds)",
            r.setting,
            metric.name(),
            r.cv_mean.unwrap_or(f64::NAN),
            r.cv_se.unwrap_or(f64::NAN),
            r.folds.len()
        )
    };
    match selection {
        Selection::Best => Some((
            best,
            format!("best mean: {} of {} settings", summary(b), results.len()),
        )),
        Selection::OneSe => {
            let floor = score(b).unwrap_or(f64::NEG_INFINITY) - b.cv_se.unwrap_or(0.0);
            let group = b.setting.path_group();
            let chosen = results
                .iter()
                .enumerate()
                .filter(|(_, r)| r.setting.path_group() == group)
                .filter(|(_, r)| score(r).is_some_and(|v| v >= floor))
                .max_by(|(_, x), (_, y)| x.setting.restraint().total_cmp(&y.setting.restraint()))
                .map_or(best, |(i, _)| i);
            let reason = if chosen == best {
                format!(
                    "one-SE rule: no more penalized setting is within one standard error of the best, {}",
                    summary(b)
                )
            } else {
                format!(
                    "one-SE rule: {} is the most penalized setting within one standard error of the best, {}",
                    summary(&results[chosen]),
                    summary(b)
                )
            };
            Some((chosen, reason))
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Penalty;

    fn result(lambda: f64, mean: Option<f64>, se: f64) -> SettingResult {
        SettingResult {
            setting: Setting::Logistic {
                penalty: Penalty::L2,
                l1_ratio: 0.0,
                lambda,
            },
            cv_mean: mean,
            cv_std: mean.map(|_| se * 10f64.sqrt()),
            cv_se: mean.map(|_| se),
            folds: vec![],
            unconverged: 0,
            error: None,
        }
    }

    #[test]
    fn best_follows_the_metrics_direction_and_breaks_ties_toward_more_penalty() {
        let results = [
            result(0.001, Some(0.80), 0.01),
            result(0.01, Some(0.82), 0.01),
            result(0.1, Some(0.82), 0.01),
            result(1.0, None, 0.0),
        ];
        assert_eq!(
            choose(&results, GateMetric::Auc, Selection::Best)
                .unwrap()
                .0,
            2
        );
        let losses = [
            result(0.001, Some(0.30), 0.01),
            result(0.01, Some(0.25), 0.01),
            result(0.1, Some(0.40), 0.01),
        ];
        assert_eq!(
            choose(&losses, GateMetric::LogLoss, Selection::Best)
                .unwrap()
                .0,
            1
        );
        assert!(choose(&[result(1.0, None, 0.0)], GateMetric::Auc, Selection::Best).is_none());
    }

    #[test]
    fn one_se_takes_the_most_penalized_setting_within_one_standard_error() {
        // Best mean AUC 0.850 ± 0.006 at lambda 0.001; lambda 0.01 (0.846) and 0.03 (0.8445)
        // are within 0.006 of it, lambda 0.1 (0.830) is not: one-SE picks 0.03, best picks 0.001.
        let results = [
            result(0.1, Some(0.830), 0.006),
            result(0.03, Some(0.8445), 0.006),
            result(0.01, Some(0.846), 0.006),
            result(0.001, Some(0.850), 0.006),
        ];
        let (best, _) = choose(&results, GateMetric::Auc, Selection::Best).unwrap();
        let (one_se, reason) = choose(&results, GateMetric::Auc, Selection::OneSe).unwrap();
        assert_eq!(best, 3);
        assert_eq!(one_se, 1);
        assert!(reason.contains("one-SE"), "{reason}");
        // For a loss the band lies above the best (smallest) mean.
        let losses = [
            result(0.1, Some(0.32), 0.02),
            result(0.01, Some(0.295), 0.02),
            result(0.001, Some(0.29), 0.02),
        ];
        assert_eq!(
            choose(&losses, GateMetric::LogLoss, Selection::OneSe)
                .unwrap()
                .0,
            1
        );
    }

    #[test]
    fn one_se_stays_on_the_best_settings_penalty_path() {
        let mut other_path = result(10.0, Some(0.849), 0.006);
        other_path.setting = Setting::Logistic {
            penalty: Penalty::L1,
            l1_ratio: 1.0,
            lambda: 10.0,
        };
        let results = [result(0.001, Some(0.850), 0.006), other_path];
        assert_eq!(
            choose(&results, GateMetric::Auc, Selection::OneSe)
                .unwrap()
                .0,
            0
        );
    }
}
