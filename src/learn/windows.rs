//! The training window as a searched choice.
//!
//! After an abrupt change in how the features relate to the outcome, a challenger trained on
//! the whole window learns mostly the old regime for a long while. With several
//! `training.window_shares`, a run also asks how much history to learn from: each candidate
//! window is the latest share of the training rows before the validation slice, and every
//! (window, setting) pair is
//! fitted on its window and judged on the same rows, a time-ordered validation slice just
//! before the holdout. k-fold scores are not comparable across windows (each window's folds
//! are drawn from different rows, and a long window's folds mix old-regime rows into its
//! validation), so the slice replaces k-fold here.
//!
//! The slice is cut into `training.folds` consecutive time blocks; a setting's value is the
//! mean of the gate metric over the blocks and its standard error their standard deviation
//! over √blocks, so the one-SE rule reads the same table it reads after k-fold. Under
//! `one_se` the rule runs across windows first: among all pairs within one standard error of
//! the best pair, the longest window wins (more history is the simpler, steadier choice when
//! the data cannot tell them apart), then within it the most restrained setting on the best
//! one's path. The chosen setting is then refitted on every training row from the chosen
//! window's start on (so the validation slice, the latest rows, is learnt from too), and the
//! holdout stays untouched for the gate.

use crate::config::Selection;
use crate::metrics;
use crate::model::elastic_net::Design;
use crate::model::{Preprocessor, Setting};
use crate::promotion::{Entry, SettingResult, Verdict, WindowResult};
use crate::schema::{LabelKind, Row};

use super::{final_fit, search, split, Example, Fitted, Refusal, RunPlan};

/// One candidate window's search.
struct Candidate {
    share: f64,
    rows: usize,
    tracks: Vec<search::Track>,
    results: Vec<SettingResult>,
    error: Option<String>,
}

/// The latest `share` of `rows`, at least one row.
fn latest_share<T>(rows: &[T], share: f64) -> &[T] {
    let n = ((share * rows.len() as f64).ceil() as usize).clamp(1, rows.len().max(1));
    &rows[rows.len().saturating_sub(n)..]
}

/// Searches every (window, setting) pair on the validation slice, chooses one, records the
/// table in `entry`, and fits the chosen setting on its window of the whole training part.
pub(super) fn search<'e>(
    plan: &RunPlan<'_>,
    train: &'e [Example],
    entry: &mut Entry,
) -> Result<Fitted<'e>, Refusal> {
    let training = plan.training;
    let metric = plan.gate.metric;
    let binary = plan.target == LabelKind::Binary;
    let valid_n = split::holdout_len(train.len(), training.validation_fraction);
    let (pool, valid) = train.split_at(train.len() - valid_n);
    let valid_rows: Vec<&Row> = valid.iter().map(|e| &e.row).collect();
    let y_valid: Vec<f64> = valid.iter().map(|e| e.label).collect();
    let blocks = time_blocks(valid.len(), training.folds);
    // Recency weights count back from the latest training row, the same for every window.
    let weights = super::recency_weights(train, training.half_life);

    let mut shares = training.window_shares.clone();
    shares.sort_by(|a, b| b.total_cmp(a));
    shares.dedup();
    let candidates: Vec<Candidate> = shares
        .iter()
        .map(|&share| {
            let window = latest_share(pool, share);
            let window_weights = weights
                .as_ref()
                .map(|w| w[pool.len() - window.len()..pool.len()].to_vec());
            let mut candidate = Candidate {
                share,
                rows: window.len(),
                tracks: vec![],
                results: vec![],
                error: None,
            };
            let rows: Vec<&Row> = window.iter().map(|e| &e.row).collect();
            let labels: Vec<f64> = window.iter().map(|e| e.label).collect();
            if binary {
                let positives = labels.iter().filter(|&&y| y == 1.0).count();
                if positives.min(labels.len() - positives) < 2 {
                    candidate.error = Some(format!(
                        "its {} rows hold {positives} positives; a fit needs at least 2 of each class",
                        labels.len()
                    ));
                    return candidate;
                }
            }
            let (preprocessor, columns) = Preprocessor::fit_columns(plan.schema, &rows);
            let design = Design::from_columns(columns, rows.len(), preprocessor.width());
            candidate.tracks =
                search::tracks(training, &design, &labels, window_weights.as_deref());
            // The design was for lambda_max only: freed before the fit below builds its own.
            drop(design);
            let settings: Vec<Setting> = candidate
                .tracks
                .iter()
                .flat_map(|t| t.settings().to_vec())
                .collect();
            let outputs = search::validation_outputs(
                plan.schema,
                (&rows, &labels, window_weights.as_deref()),
                &valid_rows,
                &candidate.tracks,
                plan.target,
            );
            candidate.results = settings
                .into_iter()
                .zip(outputs)
                .map(|(setting, outputs)| match outputs {
                    Ok((outputs, converged)) => {
                        let values: Option<Vec<f64>> = blocks
                            .iter()
                            .map(|b| {
                                metrics::evaluate(metric, &outputs[b.clone()], &y_valid[b.clone()])
                            })
                            .collect();
                        match values {
                            Some(values) => SettingResult::from_folds(
                                setting,
                                values,
                                usize::from(!converged),
                            ),
                            None => SettingResult::failed(
                                setting,
                                format!(
                                    "{} undefined on a validation block (one class)",
                                    metric.name()
                                ),
                            ),
                        }
                    }
                    Err(e) => SettingResult::failed(setting, e),
                })
                .collect();
            candidate
        })
        .collect();

    let Some((w, i)) = choose(&candidates, metric.higher_is_better(), training.selection) else {
        let first_error = candidates
            .iter()
            .find_map(|c| {
                c.error
                    .clone()
                    .or_else(|| c.results.iter().find_map(|r| r.error.clone()))
            })
            .unwrap_or_default();
        return Err(Refusal(
            Verdict::Failed,
            format!("no (window, setting) pair could be validated ({first_error})"),
        ));
    };
    record(
        entry,
        &candidates,
        (w, i),
        (metric.name(), metric.higher_is_better()),
        (blocks.len(), valid.len()),
    );

    let chosen = &candidates[w];
    let result = &chosen.results[i];
    let setting = result.setting;
    if let (Some(limit), Some(spread)) = (plan.guardrails.max_cv_spread, result.cv_std) {
        if spread > limit {
            return Err(Refusal(
                Verdict::Rejected,
                format!(
                    "{setting}'s {} varies by {spread:.4} (standard deviation) across validation blocks, above guardrails.max_cv_spread {limit}",
                    metric.name()
                ),
            ));
        }
    }

    // The final fit: the chosen setting on every training row from the chosen window's first
    // row on (the window and the validation slice after it), along the chosen window's lambda
    // path (its own lambda values).
    let fit_rows = &train[pool.len() - chosen.rows..];
    let rows: Vec<&Row> = fit_rows.iter().map(|e| &e.row).collect();
    let labels: Vec<f64> = fit_rows.iter().map(|e| e.label).collect();
    let (preprocessor, columns) = Preprocessor::fit_columns(plan.schema, &rows);
    let design = Design::from_columns(columns, rows.len(), preprocessor.width());
    let x = || preprocessor.transform_all(&rows);
    let fit_weights = weights
        .as_ref()
        .map(|w| w[pool.len() - chosen.rows..].to_vec());
    let (estimator, summary) = final_fit(
        &chosen.tracks,
        i,
        &design,
        x,
        (&labels, fit_weights.as_deref()),
    )
    .map_err(|e| {
        Refusal(
            Verdict::Failed,
            format!("the final fit of {setting} failed: {e}"),
        )
    })?;
    Ok(Fitted {
        setting,
        preprocessor,
        estimator,
        summary,
        rows: fit_rows,
    })
}

/// `count` consecutive ranges covering `0..n` (the first ones one longer when it does not
/// divide), none empty.
fn time_blocks(n: usize, count: usize) -> Vec<std::ops::Range<usize>> {
    let count = count.clamp(1, n.max(1));
    let (size, extra) = (n / count, n % count);
    let mut start = 0;
    (0..count)
        .map(|b| {
            let end = start + size + usize::from(b < extra);
            let range = start..end;
            start = end;
            range
        })
        .collect()
}

/// Picks a (window, setting) pair: its window's index (windows longest first) and the
/// setting's index within that window. `None` when no pair could be validated.
fn choose(
    candidates: &[Candidate],
    higher_is_better: bool,
    selection: Selection,
) -> Option<(usize, usize)> {
    let score = |r: &SettingResult| r.cv_mean.map(|m| if higher_is_better { m } else { -m });
    let pairs = || {
        candidates.iter().enumerate().flat_map(|(w, c)| {
            c.results
                .iter()
                .enumerate()
                .filter_map(move |(i, r)| score(r).map(|s| (w, i, s)))
        })
    };
    // The best pair; ties go to the longer window (earlier), then the more restrained setting.
    let mut best: Option<(usize, usize, f64)> = None;
    for (w, i, s) in pairs() {
        let better = best.is_none_or(|(bw, bi, bs)| {
            s > bs
                || (s == bs
                    && w == bw
                    && candidates[w].results[i].setting.restraint()
                        > candidates[bw].results[bi].setting.restraint())
        });
        if better {
            best = Some((w, i, s));
        }
    }
    let (bw, bi, bs) = best?;
    if selection == Selection::Best {
        return Some((bw, bi));
    }
    let floor = bs - candidates[bw].results[bi].cv_se.unwrap_or(0.0);
    let within: Vec<(usize, usize, f64)> = pairs().filter(|&(_, _, s)| s >= floor).collect();
    // The longest window with a pair within one SE (windows are sorted longest first).
    let w = within.iter().map(|&(w, _, _)| w).min()?;
    let in_window: Vec<(usize, f64)> = within
        .iter()
        .filter(|&&(pw, _, _)| pw == w)
        .map(|&(_, i, s)| (i, s))
        .collect();
    let results = &candidates[w].results;
    let (lead, _) = in_window
        .iter()
        .copied()
        .max_by(|a, b| a.1.total_cmp(&b.1))?;
    let group = results[lead].setting.path_group();
    let i = in_window
        .iter()
        .filter(|&&(i, _)| results[i].setting.path_group() == group)
        .max_by(|a, b| {
            results[a.0]
                .setting
                .restraint()
                .total_cmp(&results[b.0].setting.restraint())
        })
        .map_or(lead, |&(i, _)| i);
    Some((w, i))
}

/// A window's best validated setting by the metric's direction.
fn window_best(candidate: &Candidate, higher_is_better: bool) -> Option<&SettingResult> {
    let oriented = |r: &SettingResult| {
        r.cv_mean
            .map(|m| if higher_is_better { m } else { -m })
            .unwrap_or(f64::NEG_INFINITY)
    };
    candidate
        .results
        .iter()
        .filter(|r| r.cv_mean.is_some())
        .max_by(|a, b| oriented(a).total_cmp(&oriented(b)))
}

/// Writes the window table, the chosen window's settings and why into the entry.
fn record(
    entry: &mut Entry,
    candidates: &[Candidate],
    (w, i): (usize, usize),
    (metric, higher_is_better): (&str, bool),
    (blocks, validation_rows): (usize, usize),
) {
    entry.windows = candidates
        .iter()
        .enumerate()
        .map(|(k, c)| {
            // The window's own best: for the chosen window, the chosen setting.
            let best = if k == w {
                c.results.get(i)
            } else {
                window_best(c, higher_is_better)
            };
            WindowResult {
                share: c.share,
                rows: c.rows,
                validation_rows,
                best: best.map(|r| r.setting),
                mean: best.and_then(|r| r.cv_mean),
                se: best.and_then(|r| r.cv_se),
                chosen: k == w,
                error: c.error.clone(),
            }
        })
        .collect();
    let chosen = &candidates[w];
    let result = &chosen.results[i];
    entry.search = chosen.results.clone();
    entry.pinned = false;
    entry.choice = Some(format!(
        "window search: from the latest {} of the rows before the validation slice ({} rows in the search) on, {} with validation {metric} {:.4} ± {:.4} SE over {blocks} time blocks of the {validation_rows} rows before the holdout; the longest window within one standard error of the best pair",
        chosen.share,
        chosen.rows,
        result.setting,
        result.cv_mean.unwrap_or(f64::NAN),
        result.cv_se.unwrap_or(f64::NAN),
    ));
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn time_blocks_cover_the_slice_in_order() {
        assert_eq!(time_blocks(10, 3), vec![0..4, 4..7, 7..10]);
        assert_eq!(time_blocks(2, 5), vec![0..1, 1..2]);
        assert_eq!(latest_share(&[1, 2, 3, 4, 5], 0.5), &[3, 4, 5]);
        assert_eq!(latest_share(&[1, 2, 3, 4, 5], 1.0), &[1, 2, 3, 4, 5]);
    }
}
