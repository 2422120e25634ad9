//! The promotion log's entries: every run's verdict with the evidence behind it.
//!
//! An entry is written once and never changed. It holds enough to explain the verdict on its
//! own: the data window and its sizes, every grid setting's cross-validated mean and spread,
//! the chosen setting and why, both models' holdout metrics on the same rows, the gain, the
//! margin and a one-sentence reason.

use serde::{Deserialize, Serialize};

use crate::metrics::GateMetric;
use crate::metrics::Report;
use crate::model::{FitSummary, Setting};
use crate::time::Millis;

/// What a run decided.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Verdict {
    /// The candidate became the active model.
    Promoted,
    /// The incumbent stays.
    Kept,
    /// The candidate scores live traffic in the shadows before a live gate.
    Shadowing,
    /// A guardrail failed (too little data or holdout, one class, non-finite coefficients,
    /// cross-validation spread above the limit).
    Rejected,
    /// The run hit an error.
    Failed,
    /// The candidate passed its gate and waits for an operator's sign-off (`gate.sign_off`):
    /// stored, not served.
    Waiting,
    /// An operator declined a candidate that waited for sign-off.
    Declined,
    /// A candidate waited for sign-off longer than `gate.sign_off_expires`.
    Expired,
}

impl Verdict {
    pub fn as_str(self) -> &'static str {
        match self {
            Verdict::Promoted => "promoted",
            Verdict::Kept => "kept",
            Verdict::Shadowing => "shadowing",
            Verdict::Rejected => "rejected",
            Verdict::Failed => "failed",
            Verdict::Waiting => "waiting",
            Verdict::Declined => "declined",
            Verdict::Expired => "expired",
        }
    }
}

/// What started a run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Trigger {
    /// `POST /v1/retrain` or a client command.
    Manual,
    /// The `schedule.every` timer.
    Interval,
    /// `schedule.new_labels` labels arrived since the last run.
    NewLabels,
    /// An operator's rollback (no training).
    Rollback,
    /// The live gate of a shadowing candidate (no training).
    Shadow,
    /// A feature's or the score's PSI reached `drift.act`.
    Drift,
    /// The active model's metric on recent outcomes fell significantly below its holdout's.
    Decline,
    /// An operator's decision on a candidate waiting for sign-off, or its expiry (no
    /// training).
    SignOff,
    /// An operator froze promotions (no training).
    Freeze,
    /// An operator let promotions through again (no training).
    Unfreeze,
}

impl Trigger {
    pub fn as_str(self) -> &'static str {
        match self {
            Trigger::Manual => "manual",
            Trigger::Interval => "interval",
            Trigger::NewLabels => "new_labels",
            Trigger::Rollback => "rollback",
            Trigger::Shadow => "shadow",
            Trigger::Drift => "drift",
            Trigger::Decline => "decline",
            Trigger::SignOff => "sign_off",
            Trigger::Freeze => "freeze",
            Trigger::Unfreeze => "unfreeze",
        }
    }
}

/// Who asked for a change through the API, and why: the configured `name` of the key the
/// request carried (never the key), and the reason the caller gave. `key` is `None` when the
/// API is open (no `access.keys`): there is nobody to name.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Actor {
    pub key: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reason: Option<String>,
}

/// What a person (or the clock) decided about a candidate that waited for sign-off.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SignOffDecision {
    Approved,
    Declined,
    /// Nobody decided within `gate.sign_off_expires`.
    Expired,
}

impl SignOffDecision {
    pub fn as_str(self) -> &'static str {
        match self {
            SignOffDecision::Approved => "approved",
            SignOffDecision::Declined => "declined",
            SignOffDecision::Expired => "expired",
        }
    }
}

/// The end of a wait for sign-off, in the entry that records it: which run's candidate, the
/// entry that started the wait, and the decision. Who decided and why is the entry's `actor`
/// (none for an expiry).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct SignOff {
    pub decision: SignOffDecision,
    /// The run whose candidate waited, and its `waiting` entry.
    pub run_id: String,
    pub entry_seq: u64,
    /// The key that started that run (a manual retrain), if one did.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub started_by: Option<String>,
    /// When the wait began.
    #[serde(with = "crate::time::rfc3339")]
    pub waiting_since: Millis,
}

/// The labeled data a run looked at.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct DataWindow {
    /// Event time of the earliest and latest example in the window.
    #[serde(with = "crate::time::rfc3339::option")]
    pub from: Option<Millis>,
    #[serde(with = "crate::time::rfc3339::option")]
    pub to: Option<Millis>,
    pub rows: usize,
    pub positives: usize,
    /// Stored examples that no longer fit the schema and were left out.
    pub skipped: usize,
    pub training_rows: usize,
    pub holdout_rows: usize,
    /// Holdout rows later than the active model's training cutoff (the rows the gate used).
    pub gate_rows: Option<usize>,
}

/// One grid setting's cross-validated result.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SettingResult {
    pub setting: Setting,
    /// Mean, standard deviation and standard error (sd / √folds) of the gate metric over every
    /// fold of every repeat (None if undefined or not cross-validated).
    pub cv_mean: Option<f64>,
    pub cv_std: Option<f64>,
    #[serde(default)]
    pub cv_se: Option<f64>,
    /// Every fold's value, repeat by repeat.
    pub folds: Vec<f64>,
    /// Folds whose solver hit its iteration limit before converging.
    #[serde(default)]
    pub unconverged: usize,
    /// Why the setting could not be evaluated, if it could not.
    pub error: Option<String>,
}

impl SettingResult {
    pub fn failed(setting: Setting, error: String) -> SettingResult {
        SettingResult {
            error: Some(error),
            ..SettingResult::pinned(setting)
        }
    }

    /// Summarizes fold values (sample standard deviation; the SE divides it by √folds).
    pub fn from_folds(setting: Setting, folds: Vec<f64>, unconverged: usize) -> SettingResult {
        let n = folds.len() as f64;
        let mean = folds.iter().sum::<f64>() / n;
        let std = if folds.len() > 1 {
            (folds.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt()
        } else {
            0.0
        };
        SettingResult {
            setting,
            cv_mean: Some(mean),
            cv_std: Some(std),
            cv_se: Some(std / n.sqrt()),
            folds,
            unconverged,
            error: None,
        }
    }

    /// A setting that was not cross-validated because the config pins it.
    pub fn pinned(setting: Setting) -> SettingResult {
        SettingResult {
            setting,
            cv_mean: None,
            cv_std: None,
            cv_se: None,
            folds: vec![],
            unconverged: 0,
            error: None,
        }
    }
}

/// A run's provenance, for an auditor re-creating it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Provenance {
    /// `training.seed`: folds, forests and every other draw.
    pub seed: u64,
    /// SHA-256 of the normalized config (`Config::digest`).
    pub config_sha256: String,
    /// The binary's version and git revision.
    pub version: String,
    pub revision: String,
    /// SHA-256 of the window's example ids, event times and labels (`learn::data_digest`).
    pub data_sha256: String,
}

/// Both models' gate metric on one segment of the gate's rows.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SegmentResult {
    pub feature: String,
    /// The category, or the band as `[low, high)` (`below 5000`, `20000 and above`).
    pub segment: String,
    pub rows: usize,
    pub candidate: Option<f64>,
    pub active: Option<f64>,
    /// How much worse the candidate is (positive: worse), in the metric's units.
    pub worse_by: Option<f64>,
    /// False when the segment has fewer than `guardrails.segment_min_rows` rows or the metric
    /// is undefined on it: shown, not judged.
    pub judged: bool,
    /// Judged and worse by more than `guardrails.segment_tolerance`.
    pub breach: bool,
}

/// One group's decisions under one model, in the adverse-impact check.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GroupImpact {
    pub group: String,
    pub rows: usize,
    /// Rows given the favourable decision.
    pub favourable: usize,
    pub rate: f64,
    /// The rate over the reference group's (`None` without a reference).
    pub ratio: Option<f64>,
    /// `z` or `fisher`, against the reference group (`None` for the reference itself).
    pub test: Option<String>,
    pub z: Option<f64>,
    pub p_value: Option<f64>,
    /// At least the minimum rows, and a ratio below the bound.
    pub flagged: bool,
}

/// One model's decisions by group on the gate's rows.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelImpact {
    /// The score the decisions were cut at (`None` with no rows).
    pub threshold: Option<f64>,
    /// The eligible group with the highest favourable rate.
    pub reference: Option<String>,
    pub groups: Vec<GroupImpact>,
}

/// The adverse-impact check of a judged run (`guardrails.adverse_impact`): a screening
/// statistic, not a legal finding.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AdverseImpact {
    /// The monitoring attribute the groups come from.
    pub attribute: String,
    /// How decisions were made, in words (`favourable below 0.35`, `approval rate 0.7, favourable below`).
    pub decision: String,
    pub min_ratio: f64,
    pub min_group_rows: usize,
    /// Gate rows whose example carried no value of the attribute (in no group).
    pub rows_without_group: usize,
    pub candidate: ModelImpact,
    pub active: Option<ModelImpact>,
    /// The candidate's flagged groups, in name order.
    pub flagged: Vec<String>,
    /// What a flag does: `reject` or `sign_off`.
    pub on_flag: crate::config::OnFlag,
}

/// One candidate training window's result in a window search.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct WindowResult {
    /// The window as a share of the training part (its latest rows).
    pub share: f64,
    /// Rows the window's settings were fitted on during the search.
    pub rows: usize,
    /// Rows of the validation slice every window was judged on (the same for all).
    pub validation_rows: usize,
    /// The window's best setting and its validation metric: mean and standard error over the
    /// slice's time blocks.
    pub best: Option<Setting>,
    pub mean: Option<f64>,
    pub se: Option<f64>,
    /// Whether the run chose this window.
    pub chosen: bool,
    /// Why the window could not be evaluated, if it could not.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub error: Option<String>,
}

/// A model's curves on a set of rows.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Curves {
    /// (false positive rate, true positive rate), at most 101 points.
    pub roc: Vec<(f64, f64)>,
    /// Ten equal-width probability bins (empty ones left out).
    pub calibration: Vec<crate::metrics::CalibrationBin>,
}

impl Curves {
    pub fn of(probabilities: &[f64], labels: &[u8]) -> Curves {
        Curves {
            roc: crate::metrics::roc_curve(probabilities, labels, 101),
            calibration: crate::metrics::calibration_bins(
                probabilities,
                labels,
                crate::metrics::ECE_BINS,
            ),
        }
    }
}

/// Both models' curves on the same rows (the candidate's alone for a first model).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GateCurves {
    pub rows: usize,
    pub candidate: Curves,
    pub active: Option<Curves>,
}

/// One line of the promotion log.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Entry {
    /// Position in the log, assigned by the store on append (1-based).
    pub seq: u64,
    pub run_id: String,
    #[serde(with = "crate::time::rfc3339")]
    pub at: Millis,
    pub trigger: Trigger,
    /// What set the trigger off, when there is more to say (the drift that breached).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub trigger_detail: Option<String>,
    pub window: DataWindow,
    pub metric: GateMetric,
    pub margin: f64,
    pub search: Vec<SettingResult>,
    /// With several candidate training windows: each window's best setting on the shared
    /// validation slice, and which window the run chose (empty with one window).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub windows: Vec<WindowResult>,
    /// With `guardrails.segments`: both models on each segment of the gate's rows.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub segments: Vec<SegmentResult>,
    /// With `guardrails.adverse_impact`: decisions by group of a monitoring attribute, under
    /// the candidate and the active model.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub adverse_impact: Option<AdverseImpact>,
    /// What a run needs to be re-created: seed, config and data digests, the binary.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub provenance: Option<Provenance>,
    pub chosen: Option<Setting>,
    /// Why that setting was chosen.
    pub choice: Option<String>,
    /// True when the config pins one setting and the run skipped the search.
    #[serde(default)]
    pub pinned: bool,
    /// How the final fit went: non-zero coefficients, solver steps, convergence.
    #[serde(default)]
    pub fit: Option<FitSummary>,
    pub candidate_id: Option<String>,
    /// The candidate on its whole holdout.
    pub candidate_holdout: Option<Report>,
    /// ROC and calibration curves of both models on the rows they were judged on (binary
    /// labels only), for the dashboard.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub curves: Option<GateCurves>,
    /// Both models on the gate rows (the same rows for both).
    pub candidate_gate: Option<Report>,
    pub active_gate: Option<Report>,
    /// Improvement in the gate metric, oriented so that positive is better.
    pub gain: Option<f64>,
    /// The significance test used (`delong` or `paired_loss`) and its one-sided p-value for
    /// "the candidate is better", with the threshold it was held to.
    #[serde(default)]
    pub test: Option<String>,
    #[serde(default)]
    pub p_value: Option<f64>,
    #[serde(default)]
    pub alpha: Option<f64>,
    pub active_before: Option<String>,
    pub active_after: Option<String>,
    pub verdict: Verdict,
    pub reason: String,
    pub duration_ms: u64,
    /// The operator's request behind this entry (manual retrain, rollback, freeze, unfreeze,
    /// sign-off): the acting key's name and the reason given.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub actor: Option<Actor>,
    /// For a `sign_off` entry: whose wait it ends, and how.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sign_off: Option<SignOff>,
    /// For the end of a traffic share: the two arms compared, the paired check on every
    /// shadowed outcome, and the guardrail's counts.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub share: Option<ShareEvidence>,
}

/// The evidence a traffic share ends with (its live gate, or its guardrail).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShareEvidence {
    /// The share of sticky keys the candidate answered, and what made a key.
    pub fraction: f64,
    pub sticky_by: String,
    /// Each arm on the outcomes of the requests it answered, with the two-sample test;
    /// `None` when they could not be compared (the reason says why) or the guardrail ended
    /// the share.
    #[serde(default)]
    pub arms: Option<crate::two_sample::ArmComparison>,
    /// The paired check on every shadowed outcome (both models scored each request): the
    /// gain, test and one-sided p-value, kept as evidence; it does not decide.
    #[serde(default)]
    pub paired_gain: Option<f64>,
    #[serde(default)]
    pub paired_test: Option<String>,
    #[serde(default)]
    pub paired_p_value: Option<f64>,
    /// The guardrail's counts in the process that logged the entry (since it started or the
    /// share did): requests routed to each arm, and those its model failed.
    pub candidate_answers: u64,
    pub candidate_errors: u64,
    pub active_answers: u64,
    pub active_errors: u64,
    /// The guardrail stopped the share.
    pub stopped: bool,
}

impl Entry {
    /// An entry with no evidence yet: the run, what it was judged by (`gate`: metric and
    /// margin), the active model before (and, until a transition says otherwise, after) it,
    /// and its verdict with the reason. Runs fill in the evidence; failed and interrupted runs
    /// and the registry's own transitions log it as it is.
    pub fn bare(
        run_id: &str,
        trigger: Trigger,
        at: Millis,
        gate: (GateMetric, f64),
        active: Option<String>,
        verdict: Verdict,
        reason: String,
    ) -> Entry {
        Entry {
            seq: 0,
            run_id: run_id.to_owned(),
            at,
            trigger,
            trigger_detail: None,
            window: DataWindow::default(),
            metric: gate.0,
            margin: gate.1,
            search: vec![],
            windows: vec![],
            segments: vec![],
            adverse_impact: None,
            provenance: None,
            chosen: None,
            choice: None,
            pinned: false,
            fit: None,
            candidate_id: None,
            candidate_holdout: None,
            curves: None,
            candidate_gate: None,
            active_gate: None,
            gain: None,
            test: None,
            p_value: None,
            alpha: None,
            active_before: active.clone(),
            active_after: active,
            verdict,
            reason,
            duration_ms: 0,
            actor: None,
            sign_off: None,
            share: None,
        }
    }
}

/// Where a requested run is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum RunState {
    Queued,
    Running,
    Finished,
}

/// A run's bookkeeping, from request to verdict.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RunStatus {
    pub run_id: String,
    pub trigger: Trigger,
    pub state: RunState,
    #[serde(with = "crate::time::rfc3339")]
    pub requested_at: Millis,
    #[serde(with = "crate::time::rfc3339::option")]
    pub started_at: Option<Millis>,
    #[serde(with = "crate::time::rfc3339::option")]
    pub finished_at: Option<Millis>,
    /// The promotion-log entry, once finished.
    pub entry_seq: Option<u64>,
    pub verdict: Option<Verdict>,
    /// Who asked for the run (a manual retrain through the API); the four-eyes rule keeps
    /// this key from approving the run's candidate.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub requested_by: Option<Actor>,
}

impl RunStatus {
    /// A run just asked for: `queued` at `requested_at`, nothing else known yet.
    pub fn queued(
        run_id: String,
        trigger: Trigger,
        requested_at: Millis,
        requested_by: Option<Actor>,
    ) -> RunStatus {
        RunStatus {
            run_id,
            trigger,
            state: RunState::Queued,
            requested_at,
            started_at: None,
            finished_at: None,
            entry_seq: None,
            verdict: None,
            requested_by,
        }
    }
}
