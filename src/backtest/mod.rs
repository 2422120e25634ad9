//! A backtest: the configured retraining policy replayed over labeled history, against a model
//! that is never retrained and a policy that always promotes the latest fit.
//!
//! `train` judges one run; a data scientist choosing a window, a schedule, a margin, an alpha
//! or a shadow wants to see how the policy behaves over a year of history before trusting it
//! with production. This module is pure (rows in, a report out; the CLI reads the CSV and
//! prints), and it runs the service's own learning code: every run is
//! [`crate::learn::run_once`] with a plan from [`crate::learn::RunPlan::from_config`] (so the
//! search, the window search and the holdout gate are the service's), and a shadowing
//! candidate's live gate is [`crate::learn::judge`]. There is no second implementation.
//!
//! # The timeline
//!
//! The rows are sorted by event time and cut into periods: every `step` rows
//! ([`Step::Rows`]) or every `step` of event time ([`Step::Every`]), from `start` (default:
//! the first row). A step happens at the start of each period; the period's rows are then
//! scored by the model each policy has active after the step. A row's label is known
//! `label_delay` after its event time, strictly: at a step at time `t` a run sees the rows
//! whose `event_time + label_delay < t`, the latest `training.window_rows` of them (and none
//! older than `training.window_age`). Runs take no time: a run decided at a step answers the
//! whole period after it.
//!
//! # The schedule, as configured
//!
//! - `schedule.every`: ticks at `start + j·every`; a run at the first step at or after a
//!   tick (several ticks between two steps make one run).
//! - `schedule.new_labels`: a run once that many labels became known since the last run of
//!   any kind (the service resets its count when a run starts).
//! - `schedule.on_drift`: with the pure [`crate::drift`] code. At each step the recent
//!   requests are the rows of the last `drift.window_age` before it (at most
//!   `drift.window_rows`; every row counts as a scored request), and the score's PSI counts
//!   only rows the active model answered; at most one drift run per active model, as in the
//!   service.
//! - None of them (runs only on request): one run per step, as an operator who retrains after
//!   each period's outcomes (what the demo does). With `on_drift` alone, the same until the
//!   first model is active (drift needs a model to drift from).
//!
//! The first model is shared: until a model is active the configured schedule runs, and the
//! first promoted candidate is the starting model of all three policies. Periods before it are
//! not scored.
//!
//! # The policies
//!
//! - **configured**: a proposal that passed the gate is promoted, or, with `shadow.outcomes`
//!   set and an incumbent, it shadows the rows that follow; at the first step where
//!   `shadow.outcomes` of them have known labels, the live gate (`judge` on the first
//!   `shadow.outcomes` of them) promotes or keeps it. A shadow older than `shadow.max_age`
//!   ends kept; a newer candidate that passes replaces it, as in the registry.
//! - **never retrained**: the first model answers every period.
//! - **always promote**: runs when the configured schedule would, and every run's candidate
//!   becomes active if one was fitted, whatever the gate said.
//!
//! Not simulated: freezes and rollbacks (operator actions), the time a run takes, runs
//! queued while another one trains, and the traffic share (`[share]`: the report says so when
//! it is on).
//!
//! # What is reported
//!
//! Per period and policy: the active model, its metric (AUC, or RMSE for numeric labels), log
//! loss and Brier score on the period's rows. Every run and every promotion with its gain.
//! Totals per policy: the mean of each metric over the scored periods, and the runs and
//! promotions after the first model.
//!
//! **Recovery from the largest change.** A period's own metric is too noisy to judge a change
//! by (on 200 rows AUC moves by ±0.04 from chance alone), so the change and the recovery are
//! judged on `R = recovery_rows` rows pooled across periods, each row scored by the model that
//! answered it.
//!
//! - The change is the step where the never-retrained model's metric over the `R` rows after
//!   it is furthest below its metric over the `R` rows before it (for RMSE: above). That model
//!   is fixed, so only the world moves its metric; the configured policy's own metric also
//!   moves with its promotions.
//! - The target is the better of the configured policy's metric over the `R` rows before the
//!   change and the best policy's metric over the last `R` rows of the history: after a
//!   change the world may allow better predictions than before (the demo's `After` regime
//!   does), and coming back to the old level is then not a recovery.
//! - A policy has recovered at the first step, from the change on, whose next `R` rows it
//!   answers within [`RECOVERY_TOLERANCE`] of the target (for RMSE: within that share of it).
//!   Its rows to recovery are the rows from the change to that step; a policy that never
//!   recovers (no step with `R` rows after it qualifies) reports the rows to the end and
//!   `recovered: false`.

mod html;
mod replay;
mod table;

pub use html::html;
pub use table::table;

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use serde::Serialize;

use crate::config::Config;
use crate::learn::Example;
use crate::metrics::GateMetric;
use crate::model::Model;
use crate::promotion::Verdict;
use crate::schema::LabelKind;
use crate::time::Millis;

use replay::{Replay, Timeline};

/// How close to its level before the change a policy's metric must come back to count as
/// recovered (AUC units; a share of the level for RMSE). The issue's own yardstick: within
/// 0.01 AUC.
pub const RECOVERY_TOLERANCE: f64 = 0.01;

/// How the history is cut into periods.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Step {
    /// Every this many rows (in event-time order).
    Rows(usize),
    /// Every this many milliseconds of event time.
    Every(Millis),
}

impl std::fmt::Display for Step {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Step::Rows(n) => write!(f, "{n} rows"),
            Step::Every(ms) => write!(
                f,
                "{}",
                humantime::format_duration(std::time::Duration::from_millis(*ms as u64))
            ),
        }
    }
}

/// What to replay and how.
#[derive(Debug, Clone)]
pub struct Options {
    pub step: Step,
    /// How long after its event time a row's label is known, in milliseconds.
    pub label_delay: Millis,
    /// The first step (default: the first row's event time). Earlier rows are history only.
    pub start: Option<Millis>,
    /// Threads for the policies that train (configured and always-promote): 1 or 2.
    pub threads: usize,
    /// Rows each side of a change that judge it, and that judge a recovery (module docs).
    pub recovery_rows: usize,
}

/// Why a backtest cannot start.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum BacktestError {
    #[error("the history holds no labeled rows")]
    Empty,
    #[error("the step must be at least one row or one millisecond")]
    ZeroStep,
    #[error("the label delay must not be negative")]
    NegativeDelay,
    #[error("no period to score: the start ({0}) is after the last row")]
    StartAfterEnd(String),
}

/// The three policies compared.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Policy {
    Configured,
    NeverRetrained,
    AlwaysPromote,
}

impl Policy {
    pub const ALL: [Policy; 3] = [
        Policy::Configured,
        Policy::NeverRetrained,
        Policy::AlwaysPromote,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            Policy::Configured => "configured",
            Policy::NeverRetrained => "never_retrained",
            Policy::AlwaysPromote => "always_promote",
        }
    }
}

/// One value per policy.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct PerPolicy<T> {
    pub configured: T,
    pub never_retrained: T,
    pub always_promote: T,
}

impl<T> PerPolicy<T> {
    pub fn get(&self, policy: Policy) -> &T {
        match policy {
            Policy::Configured => &self.configured,
            Policy::NeverRetrained => &self.never_retrained,
            Policy::AlwaysPromote => &self.always_promote,
        }
    }

    fn from_fn(mut f: impl FnMut(Policy) -> T) -> PerPolicy<T> {
        PerPolicy {
            configured: f(Policy::Configured),
            never_retrained: f(Policy::NeverRetrained),
            always_promote: f(Policy::AlwaysPromote),
        }
    }
}

/// A policy's active model on one period.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct Score {
    pub model_id: Option<String>,
    /// AUC (binary labels) or RMSE (numeric); `None` on an empty or one-class period.
    pub metric: Option<f64>,
    pub log_loss: Option<f64>,
    pub brier: Option<f64>,
}

/// One period: the rows after a step, scored by each policy's active model.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Period {
    pub index: usize,
    /// The step's time: the period's rows have event times from here.
    #[serde(with = "crate::time::rfc3339")]
    pub from: Millis,
    pub rows: usize,
    pub positives: Option<usize>,
    pub scores: PerPolicy<Score>,
}

/// A model that became active.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Promotion {
    pub policy: Policy,
    /// The first period it answered.
    pub period: usize,
    #[serde(with = "crate::time::rfc3339")]
    pub at: Millis,
    pub model_id: String,
    /// `holdout` (the run's gate), `live` (a shadow's live gate), `first` (the first model) or
    /// `always` (the always-promote policy, whatever the gate said).
    pub gate: &'static str,
    /// Its gain over the model it replaced, in the gate's metric, on the rows the gate judged.
    pub gain: Option<f64>,
    pub p_value: Option<f64>,
}

/// One run (or live gate) of a policy.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RunRecord {
    pub policy: Policy,
    /// The step it ran at (its candidate, if promoted, answers this period).
    pub period: usize,
    #[serde(with = "crate::time::rfc3339")]
    pub at: Millis,
    pub trigger: &'static str,
    /// The verdict as the service would log it (the always-promote policy logs the gate's).
    pub verdict: Verdict,
    pub candidate_id: Option<String>,
    pub rows: usize,
    pub gain: Option<f64>,
    pub p_value: Option<f64>,
    pub reason: String,
}

/// Rows from the largest change to a policy's recovery (see the module docs).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Recovered {
    /// Its own metric over the rows before the change.
    pub level_before: Option<f64>,
    pub recovered: bool,
    /// The first period back within the tolerance.
    pub period: Option<usize>,
    pub rows: usize,
}

/// The largest change in the world, and each policy's recovery from it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Recovery {
    /// The period of the largest worsening.
    pub period: usize,
    #[serde(with = "crate::time::rfc3339")]
    pub at: Millis,
    /// How much the never-retrained model's metric worsened (positive): over the
    /// `rows_compared` rows from the change against as many rows before it.
    pub worsening: f64,
    pub rows_compared: usize,
    /// The configured policy's metric over the rows before the change.
    pub level_before: Option<f64>,
    /// The best policy's metric over the last `rows_compared` rows of the history.
    pub settled_level: Option<f64>,
    /// The better of the two: what a policy must come back to.
    pub target: f64,
    pub tolerance: f64,
    pub policies: PerPolicy<Recovered>,
}

/// A policy's totals over the scored periods.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct Totals {
    pub mean_metric: Option<f64>,
    pub mean_log_loss: Option<f64>,
    pub mean_brier: Option<f64>,
    /// Runs and promotions after the first model (live gates count as runs).
    pub runs: usize,
    pub promotions: usize,
}

/// A backtest's report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Backtest {
    /// `auc` or `rmse`.
    pub metric: &'static str,
    pub higher_is_better: bool,
    pub step: String,
    pub label_delay_ms: Millis,
    pub rows: usize,
    /// Steps in the history (periods before the first model included).
    pub steps: usize,
    pub first_model: Option<Promotion>,
    pub periods: Vec<Period>,
    pub promotions: Vec<Promotion>,
    pub runs: Vec<RunRecord>,
    pub recovery: Option<Recovery>,
    pub totals: PerPolicy<Totals>,
    /// What the replay leaves out.
    pub not_simulated: Vec<String>,
    /// Every model a policy made active, by id: what a caller needs to judge the policies on
    /// rows of its own (the tests measure them against the data-generating model). Not part
    /// of the JSON report.
    #[serde(skip)]
    pub models: Models,
}

/// The models of a backtest by id; its `Debug` lists the ids only.
#[derive(Clone, Default, PartialEq)]
pub struct Models(pub BTreeMap<String, Arc<Model>>);

impl std::fmt::Debug for Models {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_list().entries(self.0.keys()).finish()
    }
}

impl std::ops::Index<&str> for Models {
    type Output = Model;

    fn index(&self, id: &str) -> &Model {
        &self.0[id]
    }
}

/// Replays `config`'s policy over `examples` (any order; sorted here by event time, stably).
/// `progress` is called after each policy step with the steps done and the total (known once
/// the first model is).
pub fn run(
    config: &Config,
    mut examples: Vec<Example>,
    options: &Options,
    progress: &(dyn Fn(u64, u64) + Sync),
) -> Result<Backtest, BacktestError> {
    if examples.is_empty() {
        return Err(BacktestError::Empty);
    }
    if matches!(options.step, Step::Rows(0) | Step::Every(0))
        || matches!(options.step, Step::Every(ms) if ms < 0)
    {
        return Err(BacktestError::ZeroStep);
    }
    if options.label_delay < 0 {
        return Err(BacktestError::NegativeDelay);
    }
    examples.sort_by_key(|e| e.event_time);
    let timeline = Timeline::new(&examples, options)?;
    let schema = config.schema();
    let steps = timeline.steps() as u64;
    // Policy steps: until the first model one (shared), then three per step.
    let total = AtomicU64::new(3 * steps);
    let done = AtomicU64::new(0);
    let tick = || {
        let done = done.fetch_add(1, Ordering::Relaxed) + 1;
        progress(done, total.load(Ordering::Relaxed));
    };

    // The shared first model: the configured schedule until a model is active.
    let mut configured = Replay::new(Policy::Configured, config, &schema, &timeline);
    let mut first_step = None;
    for k in 0..timeline.steps() {
        configured.decide(k);
        tick();
        if configured.has_model() {
            first_step = Some(k);
            break;
        }
    }
    let mut replays = vec![];
    if let Some(k0) = first_step {
        total.store(
            k0 as u64 + 1 + 3 * (steps - k0 as u64 - 1),
            Ordering::Relaxed,
        );
        let mut always = configured.fork(Policy::AlwaysPromote);
        let mut never = configured.fork(Policy::NeverRetrained);
        let rest = |replay: &mut Replay<'_>| {
            replay.score(k0);
            for k in k0 + 1..timeline.steps() {
                replay.decide(k);
                replay.score(k);
                tick();
            }
        };
        if options.threads >= 2 {
            std::thread::scope(|scope| {
                scope.spawn(|| rest(&mut always));
                rest(&mut configured);
            });
        } else {
            rest(&mut configured);
            rest(&mut always);
        }
        rest(&mut never);
        replays = vec![configured, never, always];
    } else {
        replays.push(configured);
    }
    Ok(assemble(config, options, &timeline, replays, first_step))
}

fn assemble(
    config: &Config,
    options: &Options,
    timeline: &Timeline<'_>,
    replays: Vec<Replay<'_>>,
    first_step: Option<usize>,
) -> Backtest {
    let binary = config.label.kind == LabelKind::Binary;
    let metric = if binary {
        GateMetric::Auc
    } else {
        GateMetric::Rmse
    };
    let by_policy = |policy: Policy| replays.iter().find(|r| r.policy == policy);
    let periods: Vec<Period> = match first_step {
        None => vec![],
        Some(k0) => (k0..timeline.steps())
            .map(|k| {
                let rows = timeline.period(k);
                Period {
                    index: k,
                    from: timeline.time(k),
                    rows: rows.len(),
                    positives: binary.then(|| rows.iter().filter(|e| e.label == 1.0).count()),
                    scores: PerPolicy::from_fn(|p| {
                        by_policy(p)
                            .and_then(|r| r.scores.get(&k).cloned())
                            .unwrap_or_default()
                    }),
                }
            })
            .collect(),
    };
    let mut runs = vec![];
    let mut promotions = vec![];
    let mut first_model = None;
    for replay in &replays {
        // The bootstrap is shared: its runs and the first promotion are the configured
        // replay's; the forks start after it.
        runs.extend(replay.runs.iter().cloned());
        for promotion in &replay.promotions {
            if promotion.gate == "first" {
                if first_model.is_none() {
                    first_model = Some(promotion.clone());
                }
            } else {
                promotions.push(promotion.clone());
            }
        }
    }
    let totals = PerPolicy::from_fn(|policy| {
        let mean = |f: &dyn Fn(&Score) -> Option<f64>| {
            let values: Vec<f64> = periods
                .iter()
                .filter_map(|p| f(p.scores.get(policy)))
                .collect();
            (!values.is_empty()).then(|| values.iter().sum::<f64>() / values.len() as f64)
        };
        Totals {
            mean_metric: mean(&|s| s.metric),
            mean_log_loss: mean(&|s| s.log_loss),
            mean_brier: mean(&|s| s.brier),
            runs: runs
                .iter()
                .filter(|r| r.policy == policy && first_step.is_some_and(|k0| r.period > k0))
                .count(),
            promotions: promotions.iter().filter(|p| p.policy == policy).count(),
        }
    });
    let mut not_simulated = vec![
        "freezes and rollbacks (operator actions)".to_owned(),
        "the time a run takes: a run decided at a step answers the whole period after it"
            .to_owned(),
    ];
    if config.schedule.every.is_none()
        && config.schedule.new_labels.is_none()
        && !config.schedule.on_drift
    {
        not_simulated.push(
            "no schedule is configured (runs only on request): one run per step stands in for an operator's requests"
                .to_owned(),
        );
    }
    if config.share.on() {
        not_simulated.push(
            "the traffic share ([share]): a candidate that passed goes on as without it (promoted at once, or shadowing when shadow.outcomes is set, judged by the paired live gate), not split by caller"
                .to_owned(),
        );
    }
    let recovery = first_step.and_then(|k0| {
        let outputs = PerPolicy::from_fn(|p| by_policy(p).map_or(&[][..], |r| &r.outputs[..]));
        if outputs.never_retrained.is_empty() {
            return None;
        }
        recovery(timeline, k0, &outputs, metric, options.recovery_rows)
    });
    Backtest {
        metric: metric.name(),
        higher_is_better: metric.higher_is_better(),
        step: options.step.to_string(),
        label_delay_ms: options.label_delay,
        rows: timeline.rows(),
        steps: timeline.steps(),
        first_model,
        periods,
        promotions,
        runs,
        recovery,
        totals,
        not_simulated,
        models: Models(
            replays
                .iter()
                .flat_map(|r| r.activated.iter())
                .map(|m| (m.id.clone(), Arc::clone(m)))
                .collect(),
        ),
    }
}

/// The largest change of the configured policy's metric, and each policy's recovery from it
/// (module docs). `outputs` are each policy's outputs on the rows from period `k0` on.
fn recovery(
    timeline: &Timeline<'_>,
    k0: usize,
    outputs: &PerPolicy<&[f64]>,
    metric: GateMetric,
    rows: usize,
) -> Option<Recovery> {
    let rows = rows.max(1);
    let offset = timeline.bound(k0);
    let end = timeline.rows();
    let labels: Vec<f64> = timeline.examples()[offset..]
        .iter()
        .map(|e| e.label)
        .collect();
    // The metric of `policy` over rows `from..to` (indices into the whole history).
    let pooled = |policy: Policy, from: usize, to: usize| {
        let range = from - offset..to - offset;
        crate::metrics::evaluate(metric, &outputs.get(policy)[range.clone()], &labels[range])
    };
    let worse_by = |before: f64, after: f64| {
        if metric.higher_is_better() {
            before - after
        } else {
            after - before
        }
    };
    // The change: where the fixed first model's metric worsens most (only the world moves it).
    let (change, worsening) = (k0 + 1..timeline.steps())
        .filter_map(|k| {
            let at = timeline.bound(k);
            if at < offset + rows || at + rows > end {
                return None;
            }
            let before = pooled(Policy::NeverRetrained, at - rows, at)?;
            let after = pooled(Policy::NeverRetrained, at, at + rows)?;
            Some((k, worse_by(before, after)))
        })
        .max_by(|a, b| a.1.total_cmp(&b.1))?;
    let at = timeline.bound(change);
    let better = |a: f64, b: f64| if worse_by(a, b) > 0.0 { a } else { b };
    let level_before = pooled(Policy::Configured, at - rows, at);
    let settled = Policy::ALL
        .iter()
        .filter_map(|&p| pooled(p, end - rows, end))
        .reduce(better);
    let target = match (level_before, settled) {
        (Some(a), Some(b)) => better(a, b),
        (a, b) => a.or(b)?,
    };
    let tolerance = if metric.higher_is_better() {
        RECOVERY_TOLERANCE
    } else {
        RECOVERY_TOLERANCE * target.abs()
    };
    let policies = PerPolicy::from_fn(|policy| {
        let back = (change..timeline.steps())
            .map(|j| (j, timeline.bound(j)))
            .take_while(|&(_, from)| from + rows <= end)
            .find(|&(_, from)| {
                pooled(policy, from, from + rows).is_some_and(|v| worse_by(target, v) <= tolerance)
            });
        Recovered {
            level_before: pooled(policy, at - rows, at),
            recovered: back.is_some(),
            period: back.map(|(j, _)| j),
            rows: back.map_or(end, |(_, from)| from) - at,
        }
    });
    Some(Recovery {
        period: change,
        at: timeline.time(change),
        worsening,
        rows_compared: rows,
        level_before,
        settled_level: settled,
        target,
        tolerance: RECOVERY_TOLERANCE,
        policies,
    })
}

#[cfg(test)]
mod tests;
