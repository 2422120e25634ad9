//! One retraining run: out-of-time split, cross-validated search, final fit, gate, verdict.
//!
//! [`run_once`] is pure computation over examples already read from the store: it returns the
//! promotion-log entry and, when one was fitted, the candidate model. The caller (the
//! scheduler) persists both and swaps the registry; tests call `run_once` directly.

pub mod search;
pub mod split;

use std::time::Instant;

use crate::config::{GateConfig, GateMetric, TrainingConfig};
use crate::metrics;
use crate::metrics::Report;
use crate::model::logistic::fit_l2;
use crate::model::{Model, Preprocessor, TrainingFacts};
use crate::promotion::{DataWindow, Entry, Trigger, Verdict};
use crate::schema::{Row, Schema};
use crate::time::Millis;

/// One labeled row with its event time.
#[derive(Debug, Clone, PartialEq)]
pub struct Example {
    pub id: String,
    pub event_time: Millis,
    pub row: Row,
    pub label: u8,
}

/// Everything a run needs besides its examples.
pub struct RunPlan<'a> {
    pub run_id: String,
    pub trigger: Trigger,
    /// Sequence number for the candidate's id.
    pub model_seq: u64,
    pub now: Millis,
    pub schema: &'a Schema,
    pub training: &'a TrainingConfig,
    pub gate: &'a GateConfig,
    pub active: Option<&'a Model>,
    /// Stored examples that did not fit the schema and were left out before the run.
    pub skipped: usize,
}

/// A run's result: its log entry and, when one was fitted, the candidate.
#[derive(Debug)]
pub struct RunOutput {
    pub entry: Entry,
    pub candidate: Option<Model>,
}

/// Runs one retraining cycle on `examples`, which must be sorted by event time.
pub fn run_once(plan: &RunPlan<'_>, examples: &[Example]) -> RunOutput {
    let started = Instant::now();
    let metric = plan.gate.metric;
    let active_id = plan.active.map(|m| m.id.clone());
    let mut entry = Entry {
        seq: 0,
        run_id: plan.run_id.clone(),
        at: plan.now,
        trigger: plan.trigger,
        window: window_of(examples, plan.skipped),
        metric,
        margin: plan.gate.margin,
        search: vec![],
        chosen: None,
        choice: None,
        candidate_id: None,
        candidate_holdout: None,
        candidate_gate: None,
        active_gate: None,
        gain: None,
        test: None,
        p_value: None,
        alpha: Some(plan.gate.alpha),
        active_before: active_id.clone(),
        active_after: active_id,
        verdict: Verdict::Rejected,
        reason: String::new(),
        duration_ms: 0,
    };
    let candidate = decide(plan, examples, &mut entry);
    if entry.verdict == Verdict::Promoted {
        entry.active_after = candidate.as_ref().map(|m| m.id.clone());
    }
    entry.duration_ms = started.elapsed().as_millis() as u64;
    RunOutput { entry, candidate }
}

fn window_of(examples: &[Example], skipped: usize) -> DataWindow {
    DataWindow {
        from: examples.first().map(|e| e.event_time),
        to: examples.last().map(|e| e.event_time),
        rows: examples.len(),
        positives: examples.iter().filter(|e| e.label == 1).count(),
        skipped,
        ..DataWindow::default()
    }
}

fn reject(entry: &mut Entry, verdict: Verdict, reason: String) -> Option<Model> {
    entry.verdict = verdict;
    entry.reason = reason;
    None
}

/// Fills the entry's evidence and verdict; returns the candidate if one was fitted.
fn decide(plan: &RunPlan<'_>, examples: &[Example], entry: &mut Entry) -> Option<Model> {
    let training = plan.training;
    let n = examples.len();
    if n < training.min_rows {
        return reject(
            entry,
            Verdict::Rejected,
            format!(
            "only {n} labeled examples in the window; a run needs at least {} (training.min_rows)",
            training.min_rows
        ),
        );
    }
    let holdout_n = split::holdout_len(n, training.holdout_fraction);
    let (train, holdout) = examples.split_at(n - holdout_n);
    entry.window.training_rows = train.len();
    entry.window.holdout_rows = holdout.len();

    let train_labels: Vec<u8> = train.iter().map(|e| e.label).collect();
    let train_positives = train_labels.iter().filter(|&&y| y == 1).count();
    let per_class_min = train_positives.min(train.len() - train_positives);
    if per_class_min < training.folds {
        return reject(entry, Verdict::Rejected, format!(
            "the training part has {train_positives} positives of {} rows; each class needs at least {} (one per fold)",
            train.len(),
            training.folds
        ));
    }
    let holdout_positives = holdout.iter().filter(|e| e.label == 1).count();
    if holdout_positives == 0 || holdout_positives == holdout.len() {
        return reject(
            entry,
            Verdict::Rejected,
            format!(
                "the holdout's {} rows hold a single class; it cannot judge a model",
                holdout.len()
            ),
        );
    }

    // Search.
    let train_rows: Vec<&Row> = train.iter().map(|e| &e.row).collect();
    let settings = search::grid(training);
    entry.search = search::cross_validate(
        plan.schema,
        &train_rows,
        &train_labels,
        &settings,
        training,
        plan.gate.metric,
    );
    let Some((best, choice)) = search::choose_best(&entry.search, plan.gate.metric) else {
        let first_error = entry
            .search
            .iter()
            .find_map(|r| r.error.clone())
            .unwrap_or_default();
        return reject(
            entry,
            Verdict::Failed,
            format!("no grid setting could be cross-validated ({first_error})"),
        );
    };
    let setting = entry.search[best].setting;
    entry.chosen = Some(setting);
    entry.choice = Some(choice);

    // Final fit on the whole training part.
    let preprocessor = Preprocessor::fit(plan.schema, &train_rows);
    let x = preprocessor.transform_all(&train_rows);
    let fit = match fit_l2(&x, preprocessor.width(), &train_labels, setting.lambda) {
        Ok(fit) => fit,
        Err(e) => {
            return reject(
                entry,
                Verdict::Rejected,
                format!("the final fit of {setting} failed: {e}"),
            )
        }
    };
    let facts = TrainingFacts {
        run_id: plan.run_id.clone(),
        rows: train.len(),
        positives: train_positives,
        from: train.first().map_or(0, |e| e.event_time),
        cutoff: train.last().map_or(0, |e| e.event_time),
    };
    let mut candidate = Model::new(plan.model_seq, plan.now, setting, preprocessor, fit, facts);
    let holdout_rows: Vec<&Row> = holdout.iter().map(|e| &e.row).collect();
    let holdout_labels: Vec<u8> = holdout.iter().map(|e| e.label).collect();
    let report = Report::compute(&candidate.probabilities(&holdout_rows), &holdout_labels);
    candidate.holdout = Some(report.clone());
    entry.candidate_id = Some(candidate.id.clone());
    entry.candidate_holdout = Some(report);

    gate(plan, holdout, &candidate, entry);
    Some(candidate)
}

/// Compares the candidate with the active model on holdout rows later than the active model's
/// own training cutoff, and sets the verdict.
fn gate(plan: &RunPlan<'_>, holdout: &[Example], candidate: &Model, entry: &mut Entry) {
    let metric = plan.gate.metric;
    let Some(active) = plan.active else {
        entry.verdict = Verdict::Promoted;
        entry.reason =
            "no model was active; the first candidate that passes the guardrails becomes active"
                .into();
        return;
    };
    let later: Vec<&Example> = holdout
        .iter()
        .filter(|e| e.event_time > active.trained.cutoff)
        .collect();
    entry.window.gate_rows = Some(later.len());
    if later.len() < plan.gate.min_rows {
        entry.verdict = Verdict::Kept;
        entry.reason = format!(
            "only {} holdout rows are later than {}'s training cutoff; the gate needs {} (gate.min_rows) it never trained on",
            later.len(),
            active.id,
            plan.gate.min_rows
        );
        return;
    }
    let rows: Vec<&Row> = later.iter().map(|e| &e.row).collect();
    let labels: Vec<u8> = later.iter().map(|e| e.label).collect();
    let cand_p = candidate.probabilities(&rows);
    let act_p = active.probabilities(&rows);
    let cand = Report::compute(&cand_p, &labels);
    let act = Report::compute(&act_p, &labels);
    let (Some(c), Some(a)) = (cand.get(metric), act.get(metric)) else {
        entry.candidate_gate = Some(cand);
        entry.active_gate = Some(act);
        entry.verdict = Verdict::Kept;
        entry.reason = format!(
            "{} is undefined on the {} gate rows (one class)",
            metric.name(),
            later.len()
        );
        return;
    };
    let gain = if metric.higher_is_better() {
        c - a
    } else {
        a - c
    };
    entry.candidate_gate = Some(cand);
    entry.active_gate = Some(act);
    entry.gain = Some(gain);
    let margin = plan.gate.margin;
    let alpha = plan.gate.alpha;
    let (test, p_value) = significance(metric, &cand_p, &act_p, &labels);
    entry.test = Some(test.to_owned());
    entry.p_value = p_value;
    let p = p_value.unwrap_or(1.0);
    let evidence = format!(
        "{} {c:.4} vs {a:.4} on {} later rows: gain {gain:+.4}",
        metric.name(),
        later.len()
    );
    let (verdict, judgement) = if gain < margin {
        (Verdict::Kept, format!("is below the margin {margin}"))
    } else if p > alpha {
        (
            Verdict::Kept,
            format!(
                "meets the margin {margin} but is not significant: p = {} ({test}) > alpha {alpha}",
                format_p(p)
            ),
        )
    } else {
        (
            Verdict::Promoted,
            format!(
                "meets the margin {margin} and p = {} ({test}) is at most alpha {alpha}",
                format_p(p)
            ),
        )
    };
    entry.verdict = verdict;
    entry.reason = format!("{evidence} {judgement}");
}

/// A p-value for a log line: four decimals, or scientific notation when smaller.
fn format_p(p: f64) -> String {
    if p < 1e-4 {
        format!("{p:.1e}")
    } else {
        format!("{p:.4}")
    }
}

/// The one-sided p-value that the candidate beats the active model on these rows.
fn significance(
    metric: GateMetric,
    candidate: &[f64],
    active: &[f64],
    labels: &[u8],
) -> (&'static str, Option<f64>) {
    match metric {
        GateMetric::Auc => (
            "delong",
            metrics::delong(candidate, active, labels).map(|d| d.p_a_better),
        ),
        GateMetric::LogLoss | GateMetric::Brier => {
            let per_row: fn(&[f64], &[u8]) -> Vec<f64> = if metric == GateMetric::LogLoss {
                metrics::row_log_losses
            } else {
                metrics::row_squared_errors
            };
            let test =
                metrics::paired_loss_test(&per_row(candidate, labels), &per_row(active, labels));
            ("paired_loss", test.map(|t| t.p_a_better))
        }
    }
}

#[cfg(test)]
mod tests;
