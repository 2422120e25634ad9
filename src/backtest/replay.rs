//! One policy living through the timeline: at each step its schedule may start a run (the
//! service's `run_once`), a shadow's live gate may decide (the service's `judge`), and then its
//! active model scores the period. The rules are the module docs' (`backtest`).

use std::collections::BTreeMap;
use std::sync::Arc;

use crate::config::Config;
use crate::drift::Thresholds;
use crate::learn::{judge, run_once, Example, RunPlan};
use crate::metrics::{GateMetric, Report};
use crate::model::Model;
use crate::promotion::{Trigger, Verdict};
use crate::schema::{LabelKind, Row, Schema};
use crate::time::Millis;

use super::{BacktestError, Options, Policy, Promotion, RunRecord, Score, Step};

/// The sorted rows cut into periods, with when each label is known.
pub(super) struct Timeline<'a> {
    examples: &'a [Example],
    /// The step times: step k happens at `times[k]`.
    times: Vec<Millis>,
    /// Period k is `examples[bounds[k]..bounds[k + 1]]`.
    bounds: Vec<usize>,
    delay: Millis,
}

/// The step times and the period bounds (one more bound than times) over sorted event times.
fn boundaries(
    event_times: &[Millis],
    options: &Options,
) -> Result<(Vec<Millis>, Vec<usize>), BacktestError> {
    let (Some(&first), Some(&last)) = (event_times.first(), event_times.last()) else {
        return Err(BacktestError::Empty);
    };
    let start = options.start.unwrap_or(first);
    if start > last {
        return Err(BacktestError::StartAfterEnd(crate::time::to_rfc3339(start)));
    }
    let index_at = |t: Millis| event_times.partition_point(|&e| e < t);
    let (mut times, mut bounds) = (vec![], vec![]);
    match options.step {
        Step::Rows(n) => {
            let mut b = index_at(start);
            while b < event_times.len() {
                times.push(event_times[b]);
                bounds.push(b);
                b += n.max(1);
            }
        }
        Step::Every(period) => {
            let mut t = start;
            while t <= last {
                times.push(t);
                bounds.push(index_at(t));
                t += period.max(1);
            }
        }
    }
    bounds.push(event_times.len());
    Ok((times, bounds))
}

impl<'a> Timeline<'a> {
    /// `examples` must be sorted by event time.
    pub(super) fn new(examples: &'a [Example], options: &Options) -> Result<Self, BacktestError> {
        let event_times: Vec<Millis> = examples.iter().map(|e| e.event_time).collect();
        let (times, bounds) = boundaries(&event_times, options)?;
        Ok(Timeline {
            examples,
            times,
            bounds,
            delay: options.label_delay,
        })
    }

    pub(super) fn steps(&self) -> usize {
        self.times.len()
    }

    pub(super) fn rows(&self) -> usize {
        self.examples.len()
    }

    pub(super) fn time(&self, k: usize) -> Millis {
        self.times[k]
    }

    pub(super) fn period(&self, k: usize) -> &'a [Example] {
        &self.examples[self.bounds[k]..self.bounds[k + 1]]
    }

    /// The index of period `k`'s first row (`k` may be `steps()`: the end).
    pub(super) fn bound(&self, k: usize) -> usize {
        self.bounds[k]
    }

    pub(super) fn examples(&self) -> &'a [Example] {
        self.examples
    }

    /// How many rows have a known label at `t` (a prefix: event times are sorted and the
    /// delay is the same for every row).
    fn known_at(&self, t: Millis) -> usize {
        self.examples
            .partition_point(|e| e.event_time.saturating_add(self.delay) < t)
    }

    fn is_known(&self, event_time: Millis, t: Millis) -> bool {
        event_time.saturating_add(self.delay) < t
    }
}

/// A candidate scoring in the shadows, and what it and the active model said on the rows it
/// shadowed.
#[derive(Clone)]
struct Shadow {
    candidate: Arc<Model>,
    since: Millis,
    /// (event time, label, candidate's output, active model's output), in time order.
    rows: Vec<(Millis, f64, f64, f64)>,
}

/// A policy's state and what it did.
#[derive(Clone)]
pub(super) struct Replay<'a> {
    pub(super) policy: Policy,
    config: &'a Config,
    schema: &'a Schema,
    timeline: &'a Timeline<'a>,
    active: Option<Arc<Model>>,
    /// When the active model started answering.
    active_since: Millis,
    shadow: Option<Shadow>,
    model_seq: u64,
    run_seq: u64,
    /// Rows with known labels at the last run (for `schedule.new_labels`).
    known_at_last_run: usize,
    next_tick: Option<Millis>,
    /// The active model a drift run was already started for.
    drift_run_for: Option<String>,
    /// The active model a decline run was already started for (once per model).
    decline_run_for: Option<String>,
    pub(super) runs: Vec<RunRecord>,
    pub(super) promotions: Vec<Promotion>,
    pub(super) scores: BTreeMap<usize, Score>,
    /// The active model's output on every row scored so far, in row order (from the first
    /// scored period).
    pub(super) outputs: Vec<f64>,
    /// Every model this policy made active (the shared first model in the configured one).
    pub(super) activated: Vec<Arc<Model>>,
}

impl<'a> Replay<'a> {
    pub(super) fn new(
        policy: Policy,
        config: &'a Config,
        schema: &'a Schema,
        timeline: &'a Timeline<'a>,
    ) -> Replay<'a> {
        let next_tick = config.schedule.every.map(|every| {
            timeline.times.first().copied().unwrap_or(0) + every.as_millis() as Millis
        });
        Replay {
            policy,
            config,
            schema,
            timeline,
            active: None,
            active_since: 0,
            shadow: None,
            model_seq: 0,
            run_seq: 0,
            known_at_last_run: 0,
            next_tick,
            drift_run_for: None,
            decline_run_for: None,
            runs: vec![],
            promotions: vec![],
            scores: BTreeMap::new(),
            outputs: vec![],
            activated: vec![],
        }
    }

    /// The same state as another policy, with nothing done yet.
    pub(super) fn fork(&self, policy: Policy) -> Replay<'a> {
        Replay {
            policy,
            runs: vec![],
            promotions: vec![],
            scores: BTreeMap::new(),
            outputs: vec![],
            activated: vec![],
            ..self.clone()
        }
    }

    pub(super) fn has_model(&self) -> bool {
        self.active.is_some()
    }

    /// Step `k`: a shadow's live gate, then the schedule and a run.
    pub(super) fn decide(&mut self, k: usize) {
        if self.policy == Policy::NeverRetrained {
            return;
        }
        let t = self.timeline.time(k);
        self.live_gate(k, t);
        if let Some(trigger) = self.trigger(t) {
            self.run(k, t, trigger);
        }
    }

    /// What starts a run at `t`, if anything (module docs: the schedule).
    fn trigger(&mut self, t: Millis) -> Option<Trigger> {
        let schedule = &self.config.schedule;
        let timed = schedule.every.is_some() || schedule.new_labels.is_some();
        // Runs only on request, or only on drift before there is a model to drift from: an
        // operator's request at every step.
        let watched = schedule.on_drift || schedule.on_decline;
        if !timed && (!watched || self.active.is_none()) {
            return Some(Trigger::Manual);
        }
        let mut ticked = false;
        if let (Some(every), Some(next)) = (schedule.every, self.next_tick.as_mut()) {
            let every = (every.as_millis() as Millis).max(1);
            while *next <= t {
                ticked = true;
                *next += every;
            }
        }
        if ticked {
            return Some(Trigger::Interval);
        }
        if let Some(threshold) = schedule.new_labels {
            let new = self.timeline.known_at(t) - self.known_at_last_run;
            if new as u64 >= threshold {
                return Some(Trigger::NewLabels);
            }
        }
        if schedule.on_drift && self.drift_breached(t) {
            return Some(Trigger::Drift);
        }
        if schedule.on_decline && self.declined(t) {
            return Some(Trigger::Decline);
        }
        None
    }

    /// Whether the active model's metric on the labels known at `t` (after its training
    /// cutoff, the latest `schedule.decline_rows`) is significantly below its holdout's, once
    /// per active model, as `monitor::decline_check` judges the stored ones.
    fn declined(&mut self, t: Millis) -> bool {
        let Some(model) = self.active.clone() else {
            return false;
        };
        if self.decline_run_for.as_deref() == Some(model.id.as_str()) {
            return false;
        }
        let Some(holdout) = &model.holdout else {
            return false;
        };
        let schedule = &self.config.schedule;
        let known = &self.timeline.examples[..self.timeline.known_at(t)];
        let after: Vec<_> = known
            .iter()
            .filter(|e| e.event_time > model.trained.cutoff)
            .collect();
        let recent = &after[after.len().saturating_sub(schedule.decline_rows)..];
        if recent.len() < schedule.decline_min_rows {
            return false;
        }
        let rows: Vec<&Row> = recent.iter().map(|e| &e.row).collect();
        let labels: Vec<f64> = recent.iter().map(|e| e.label).collect();
        let declined = crate::decline::check(
            self.config.gate.metric,
            holdout,
            &model.predictions(&rows),
            &labels,
            schedule.decline_alpha,
        )
        .is_some_and(|d| d.declined);
        if declined {
            self.decline_run_for = Some(model.id.clone());
        }
        declined
    }

    /// Whether the recent requests before `t` reach `drift.act` against the active model's
    /// reference (once per active model), as `monitor::drift_report` judges the stored ones.
    fn drift_breached(&mut self, t: Millis) -> bool {
        let Some(model) = self.active.clone() else {
            return false;
        };
        if self.drift_run_for.as_deref() == Some(model.id.as_str()) {
            return false;
        }
        let Some(reference) = &model.reference else {
            return false;
        };
        let drift = &self.config.drift;
        let examples = self.timeline.examples;
        let end = examples.partition_point(|e| e.event_time < t);
        let oldest = drift
            .window_age
            .map_or(0, |age| t - age.as_millis() as Millis);
        let begin = examples
            .partition_point(|e| e.event_time < oldest)
            .max(end.saturating_sub(drift.window_rows));
        let recent = &examples[begin..end];
        if recent.len() < drift.min_rows {
            return false;
        }
        let thresholds = Thresholds {
            watch: drift.watch,
            act: drift.act,
        };
        let rows: Vec<&Row> = recent.iter().map(|e| &e.row).collect();
        let mut breached = reference
            .feature_drift(&rows, thresholds)
            .iter()
            .any(|d| d.band == crate::drift::Band::Act);
        // The score's PSI counts only requests this model answered.
        let own: Vec<&Row> = recent
            .iter()
            .filter(|e| e.event_time >= self.active_since)
            .map(|e| &e.row)
            .collect();
        if !breached && own.len() >= drift.min_rows.max(1) {
            let outputs = model.predictions(&own);
            breached = reference.score_drift(&outputs, thresholds).band == crate::drift::Band::Act;
        }
        if breached {
            self.drift_run_for = Some(model.id.clone());
        }
        breached
    }

    /// A run at step `k`: the service's `run_once` on the rows known at `t`.
    fn run(&mut self, k: usize, t: Millis, trigger: Trigger) {
        let training = &self.config.training;
        let known = self.timeline.known_at(t);
        self.known_at_last_run = known;
        let oldest = training.window_age.map(|age| t - age.as_millis() as Millis);
        let examples = self.timeline.examples;
        let mut begin = known.saturating_sub(training.window_rows);
        if let Some(oldest) = oldest {
            begin = begin.max(examples[..known].partition_point(|e| e.event_time < oldest));
        }
        let window = &examples[begin..known];
        self.run_seq += 1;
        self.model_seq += 1;
        let plan = RunPlan::from_config(
            self.config,
            self.schema,
            format!("r-{}", self.run_seq),
            trigger,
            self.model_seq,
            t,
            self.active.as_deref(),
            0,
        );
        let proposal = run_once(&plan, window);
        let mut entry = proposal.entry;
        let candidate = proposal.candidate.map(Arc::new);
        let first = self.active.is_none();
        let becomes_active = match self.policy {
            Policy::AlwaysPromote => candidate.is_some(),
            _ => entry.verdict == Verdict::Promoted && candidate.is_some(),
        };
        let shadows = self.policy == Policy::Configured
            && becomes_active
            && !first
            && self.config.shadow.outcomes > 0;
        // The verdict as the registry would log it; always-promote keeps the gate's.
        if shadows {
            entry.verdict = Verdict::Shadowing;
        }
        self.runs.push(RunRecord {
            policy: self.policy,
            period: k,
            at: t,
            trigger: trigger.as_str(),
            verdict: entry.verdict,
            candidate_id: entry.candidate_id.clone(),
            rows: window.len(),
            gain: entry.gain,
            p_value: entry.p_value,
            reason: entry.reason,
        });
        let Some(candidate) = candidate else { return };
        if shadows {
            self.shadow = Some(Shadow {
                candidate,
                since: t,
                rows: vec![],
            });
        } else if becomes_active {
            let gate = if first {
                "first"
            } else if self.policy == Policy::AlwaysPromote {
                "always"
            } else {
                "holdout"
            };
            self.promote(k, t, candidate, gate, entry.gain, entry.p_value);
        }
    }

    fn promote(
        &mut self,
        k: usize,
        t: Millis,
        model: Arc<Model>,
        gate: &'static str,
        gain: Option<f64>,
        p_value: Option<f64>,
    ) {
        self.promotions.push(Promotion {
            policy: self.policy,
            period: k,
            at: t,
            model_id: model.id.clone(),
            gate,
            gain,
            p_value,
        });
        self.activated.push(Arc::clone(&model));
        self.active = Some(model);
        self.active_since = t;
    }

    /// The live gate of a shadowing candidate at step `k`: once `shadow.outcomes` of its rows
    /// have known labels, or when it is older than `shadow.max_age`.
    fn live_gate(&mut self, k: usize, t: Millis) {
        let Some(shadow) = &self.shadow else { return };
        let needed = self.config.shadow.outcomes as usize;
        let labeled: Vec<(Millis, f64, f64, f64)> = shadow
            .rows
            .iter()
            .filter(|r| self.timeline.is_known(r.0, t))
            .take(needed)
            .copied()
            .collect();
        let expired = self
            .config
            .shadow
            .max_age
            .is_some_and(|age| t - shadow.since > age.as_millis() as Millis);
        if labeled.len() < needed && !expired {
            return;
        }
        let shadow = self.shadow.take().expect("checked above");
        self.run_seq += 1;
        let mut record = RunRecord {
            policy: self.policy,
            period: k,
            at: t,
            trigger: Trigger::Shadow.as_str(),
            verdict: Verdict::Kept,
            candidate_id: Some(shadow.candidate.id.clone()),
            rows: labeled.len(),
            gain: None,
            p_value: None,
            reason: String::new(),
        };
        if labeled.len() < needed {
            record.reason = format!(
                "shadow.max_age passed with {} of {needed} shadowed outcomes; kept",
                labeled.len()
            );
            self.runs.push(record);
            return;
        }
        let labels: Vec<f64> = labeled.iter().map(|r| r.1).collect();
        let candidate: Vec<f64> = labeled.iter().map(|r| r.2).collect();
        let active: Vec<f64> = labeled.iter().map(|r| r.3).collect();
        let judgement = judge(
            &self.config.gate,
            self.config.label.kind,
            &candidate,
            &active,
            &labels,
            "shadowed outcomes",
        );
        record.verdict = judgement.verdict;
        record.gain = judgement.gain;
        record.p_value = judgement.p_value;
        record.reason = judgement.reason;
        let promoted = record.verdict == Verdict::Promoted;
        let (gain, p_value) = (record.gain, record.p_value);
        self.runs.push(record);
        if promoted {
            self.promote(k, t, shadow.candidate, "live", gain, p_value);
        }
    }

    /// Period `k` scored by the active model (and seen by a shadowing candidate).
    pub(super) fn score(&mut self, k: usize) {
        let period = self.timeline.period(k);
        let Some(model) = &self.active else {
            self.scores.insert(k, Score::default());
            self.outputs
                .extend(std::iter::repeat_n(f64::NAN, period.len()));
            return;
        };
        let rows: Vec<&Row> = period.iter().map(|e| &e.row).collect();
        let labels: Vec<f64> = period.iter().map(|e| e.label).collect();
        let outputs = model.predictions(&rows);
        if let Some(shadow) = &mut self.shadow {
            let candidate = shadow.candidate.predictions(&rows);
            shadow.rows.extend(
                period
                    .iter()
                    .zip(candidate)
                    .zip(&outputs)
                    .map(|((e, c), &a)| (e.event_time, e.label, c, a)),
            );
        }
        self.outputs.extend_from_slice(&outputs);
        let binary = self.config.label.kind == LabelKind::Binary;
        let score = if rows.is_empty() {
            Score {
                model_id: Some(model.id.clone()),
                ..Score::default()
            }
        } else {
            let report = Report::for_labels(binary, &outputs, &labels);
            let metric = if binary {
                GateMetric::Auc
            } else {
                GateMetric::Rmse
            };
            Score {
                model_id: Some(model.id.clone()),
                metric: report.get(metric),
                log_loss: report.log_loss,
                brier: report.brier,
            }
        };
        self.scores.insert(k, score);
    }
}
