//! The sections of the file: their typed shape and their defaults (the starter file's values).

use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

use serde::{Deserialize, Deserializer, Serialize};

use crate::access::{KeySecret, KeySource, Keyring, KeyringError, Role};
use crate::metrics::GateMetric;
use crate::model::{penalized, FamilyGrid, PenalizedGrid, Penalty};
use crate::schema::{FeatureKind, LabelKind, MissingRule};

use super::DEFAULT_CACHE_MB;

/// Who may call what: API keys and their roles.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AccessConfig {
    /// `/healthz` and `/readyz` answer without a key.
    #[serde(default = "default_true")]
    pub open_health: bool,
    /// `/metrics` answers without a key (otherwise it needs an operator key).
    #[serde(default)]
    pub open_metrics: bool,
    #[serde(default)]
    pub keys: Vec<KeyConfig>,
}

fn default_true() -> bool {
    true
}

impl AccessConfig {
    /// The keyring these keys make, reading `key_env` variables now.
    pub fn keyring(&self) -> Result<Keyring, KeyringError> {
        let sources: Vec<KeySource> = self
            .keys
            .iter()
            .filter_map(|k| {
                let secret = match (&k.key, &k.key_sha256, &k.key_env) {
                    (Some(raw), _, _) => KeySecret::Key(raw.clone()),
                    (_, Some(hex), _) => KeySecret::Sha256Hex(hex.clone()),
                    (_, _, Some(var)) => KeySecret::Env(var.clone()),
                    // `validate` requires one of the three.
                    (None, None, None) => return None,
                };
                Some(KeySource {
                    name: k.name.clone(),
                    role: k.role,
                    secret,
                })
            })
            .collect();
        Keyring::new(&sources, self.open_health, self.open_metrics)
    }
}

impl Default for AccessConfig {
    fn default() -> Self {
        AccessConfig {
            open_health: true,
            open_metrics: false,
            keys: vec![],
        }
    }
}

/// One API key: exactly one of `key` (the key itself), `key_sha256` (its SHA-256, hex) or
/// `key_env` (the environment variable that holds it).
#[derive(Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct KeyConfig {
    pub name: String,
    pub role: Role,
    pub key: Option<String>,
    pub key_sha256: Option<String>,
    pub key_env: Option<String>,
}

impl std::fmt::Debug for KeyConfig {
    // Never print a key.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("KeyConfig")
            .field("name", &self.name)
            .field("role", &self.role)
            .finish_non_exhaustive()
    }
}

/// Live shadowing before promotion.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ShadowConfig {
    /// Outcomes of shadowed requests the live gate needs; 0 promotes on the holdout alone.
    #[serde(default)]
    pub outcomes: u64,
    /// A shadow older than this ends `kept`.
    #[serde(default = "default_shadow_age", deserialize_with = "optional_duration")]
    pub max_age: Option<Duration>,
}

fn default_shadow_age() -> Option<Duration> {
    Some(Duration::from_secs(30 * 24 * 3600))
}

impl Default for ShadowConfig {
    fn default() -> Self {
        ShadowConfig {
            outcomes: 0,
            max_age: default_shadow_age(),
        }
    }
}

/// A live traffic share before promotion: a candidate that passed the holdout gate (and
/// sign-off, when configured) answers a sticky share of live requests, and a live gate
/// compares the two arms on the outcomes of the requests each answered. Off while `fraction`
/// is 0 (the default); then a candidate only shadows (`[shadow]`), as before.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ShareConfig {
    /// The share of sticky keys the candidate answers, in (0, 0.5]; 0 is off.
    #[serde(default)]
    pub fraction: f64,
    /// What keeps a caller on one model: `"ref"` (the score request's `ref`) or
    /// `"features.NAME"` (the value of a declared feature). A request without it is answered
    /// by the active model.
    #[serde(default = "default_sticky_by")]
    pub sticky_by: String,
    /// Outcomes each arm needs before the live gate compares them.
    #[serde(default = "default_outcomes_per_arm")]
    pub outcomes_per_arm: u64,
    /// The share stops at once when the candidate arm's error rate exceeds the active arm's
    /// by more than this (an error: an output that is not a finite number, or a panic).
    #[serde(default = "default_max_error_excess")]
    pub max_error_excess: f64,
    /// Requests the candidate's arm must have before the guardrail compares error rates:
    /// with fewer, one failure moves a rate by several points, so a shared, rare failure
    /// could stop the share by chance.
    #[serde(default = "default_guard_min_answers")]
    pub guard_min_answers: u64,
}

fn default_sticky_by() -> String {
    "ref".into()
}

fn default_outcomes_per_arm() -> u64 {
    200
}

fn default_max_error_excess() -> f64 {
    0.01
}

fn default_guard_min_answers() -> u64 {
    50
}

impl Default for ShareConfig {
    fn default() -> Self {
        ShareConfig {
            fraction: 0.0,
            sticky_by: default_sticky_by(),
            outcomes_per_arm: default_outcomes_per_arm(),
            max_error_excess: default_max_error_excess(),
            guard_min_answers: default_guard_min_answers(),
        }
    }
}

impl ShareConfig {
    /// Whether a candidate takes a traffic share before promotion.
    pub fn on(&self) -> bool {
        self.fraction > 0.0
    }

    /// The declared feature `sticky_by` names (`features.NAME`), if it names one.
    pub fn sticky_feature(&self) -> Option<&str> {
        self.sticky_by.strip_prefix("features.")
    }
}

/// Population-stability watch over recent score requests.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DriftConfig {
    /// The most recent score requests compared, at most.
    #[serde(default = "default_drift_rows")]
    pub window_rows: usize,
    /// And no older than this.
    #[serde(default = "default_drift_age", deserialize_with = "optional_duration")]
    pub window_age: Option<Duration>,
    /// PSI at or above `watch` is worth a look; at or above `act`, worth a run.
    #[serde(default = "default_watch")]
    pub watch: f64,
    #[serde(default = "default_act")]
    pub act: f64,
    /// Fewest requests in the window for a drift verdict.
    #[serde(default = "default_drift_min_rows")]
    pub min_rows: usize,
    /// How often the schedule checks drift when `schedule.on_drift` is set.
    #[serde(
        default = "default_drift_check",
        deserialize_with = "optional_duration"
    )]
    pub check_every: Option<Duration>,
}

fn default_drift_rows() -> usize {
    5000
}
fn default_drift_age() -> Option<Duration> {
    Some(Duration::from_secs(7 * 24 * 3600))
}
fn default_watch() -> f64 {
    0.1
}
fn default_act() -> f64 {
    0.25
}
fn default_drift_min_rows() -> usize {
    200
}
fn default_drift_check() -> Option<Duration> {
    Some(Duration::from_secs(15 * 60))
}

impl Default for DriftConfig {
    fn default() -> Self {
        DriftConfig {
            window_rows: default_drift_rows(),
            window_age: default_drift_age(),
            watch: default_watch(),
            act: default_act(),
            min_rows: default_drift_min_rows(),
            check_every: default_drift_check(),
        }
    }
}

/// How long score records are kept. Scores with an outcome are already copied into the labeled
/// examples, so compaction only forgets requests: their features for drift and the ability to
/// take a late outcome.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RetentionConfig {
    /// Score records older than this are deleted; `None` (`"off"`) keeps them at any age.
    #[serde(
        default = "default_scores_max_age",
        deserialize_with = "duration_or_off"
    )]
    pub scores_max_age: Option<Duration>,
    /// Beyond this many score records the oldest are deleted; `None` (`"off"`) keeps any number.
    #[serde(
        default = "default_scores_max_count",
        deserialize_with = "count_or_off"
    )]
    pub scores_max_count: Option<u64>,
    /// How often the background compaction looks for records to delete.
    #[serde(default = "default_retention_check", deserialize_with = "duration")]
    pub check_every: Duration,
}

fn default_scores_max_age() -> Option<Duration> {
    Some(Duration::from_secs(90 * 24 * 3600))
}
fn default_scores_max_count() -> Option<u64> {
    Some(5_000_000)
}
fn default_retention_check() -> Duration {
    Duration::from_secs(10 * 60)
}

impl Default for RetentionConfig {
    fn default() -> Self {
        RetentionConfig {
            scores_max_age: default_scores_max_age(),
            scores_max_count: default_scores_max_count(),
            check_every: default_retention_check(),
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ServerConfig {
    #[serde(default = "default_listen")]
    pub listen: SocketAddr,
    #[serde(default = "default_data_dir")]
    pub data_dir: PathBuf,
    #[serde(default = "default_max_batch")]
    pub max_batch: usize,
    /// Largest request body accepted, in bytes (larger: 413).
    #[serde(default = "default_body_limit")]
    pub body_limit: usize,
    /// Requests handled at once; more are refused at once with 503 and `Retry-After` rather
    /// than queued.
    #[serde(default = "default_max_in_flight")]
    pub max_in_flight: usize,
    /// Longest a request may take, body included (longer: 503).
    #[serde(
        default = "default_request_timeout",
        deserialize_with = "required_duration"
    )]
    pub request_timeout: Duration,
    /// The store's page cache, in MiB.
    #[serde(default = "default_cache_mb")]
    pub cache_mb: u64,
    /// How long a stop (SIGTERM, Ctrl-C) waits for in-flight requests, and then for a
    /// training run, before it writes what it has and exits anyway.
    #[serde(default = "default_shutdown_grace", deserialize_with = "duration")]
    pub shutdown_grace: Duration,
}

fn default_cache_mb() -> u64 {
    DEFAULT_CACHE_MB
}

fn default_listen() -> SocketAddr {
    SocketAddr::from(([127, 0, 0, 1], 8080))
}
fn default_data_dir() -> PathBuf {
    PathBuf::from("./understudy-data")
}
fn default_max_batch() -> usize {
    1000
}
fn default_body_limit() -> usize {
    16 * 1024 * 1024
}
fn default_max_in_flight() -> usize {
    1024
}
fn default_request_timeout() -> Duration {
    Duration::from_secs(30)
}
fn default_shutdown_grace() -> Duration {
    Duration::from_secs(10)
}

impl Default for ServerConfig {
    fn default() -> Self {
        ServerConfig {
            listen: default_listen(),
            data_dir: default_data_dir(),
            max_batch: default_max_batch(),
            body_limit: default_body_limit(),
            max_in_flight: default_max_in_flight(),
            request_timeout: default_request_timeout(),
            cache_mb: default_cache_mb(),
            shutdown_grace: default_shutdown_grace(),
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LabelConfig {
    pub name: String,
    /// `binary` (0/1 outcomes, the default) or `number` (a numeric target).
    #[serde(default)]
    pub kind: LabelKind,
    /// Bounds a numeric outcome must respect (numeric labels only).
    pub min: Option<f64>,
    pub max: Option<f64>,
}

fn default_missing() -> MissingRule {
    MissingRule::Reject
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FeatureConfig {
    pub name: String,
    pub kind: FeatureKind,
    pub min: Option<f64>,
    pub max: Option<f64>,
    #[serde(default)]
    pub categories: Vec<String>,
    #[serde(default = "default_missing")]
    pub missing: MissingRule,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrainingConfig {
    #[serde(default = "default_window_rows")]
    pub window_rows: usize,
    #[serde(default, deserialize_with = "optional_duration")]
    pub window_age: Option<Duration>,
    #[serde(default = "default_holdout_fraction")]
    pub holdout_fraction: f64,
    /// Candidate training windows, as shares of the training part (the latest rows). With one
    /// share (the default, `[1.0]`) a run cross-validates on k folds as always; with several,
    /// every (window, setting) pair is fitted on its window and validated on the same
    /// time-ordered slice just before the holdout (`learn::windows`).
    #[serde(default = "default_window_shares")]
    pub window_shares: Vec<f64>,
    /// With several window shares: the latest share of the training part that validates them.
    #[serde(default = "default_validation_fraction")]
    pub validation_fraction: f64,
    /// Recency weighting: a training row weighs 0.5 ^ (its age before the latest training row
    /// / `half_life`) in the penalized fits (the `logistic` and `linear` families). Unset: every
    /// row weighs the same.
    #[serde(default, deserialize_with = "optional_duration")]
    pub half_life: Option<Duration>,
    #[serde(default = "default_folds")]
    pub folds: usize,
    /// Times the k-fold split is redrawn (with a new shuffle) and repeated.
    #[serde(default = "default_repeats")]
    pub repeats: usize,
    #[serde(default)]
    pub selection: Selection,
    #[serde(default = "default_seed")]
    pub seed: u64,
    #[serde(default = "default_training_min_rows")]
    pub min_rows: usize,
    /// Threads a run may use for its folds (and training threads taking queued runs).
    #[serde(default = "default_workers")]
    pub workers: usize,
    /// The Unix nice value of training threads (0 = same as scoring, 19 = lowest).
    #[serde(default = "default_nice")]
    pub nice: i32,
    /// Training threads run in Linux's `SCHED_IDLE` class: only on CPU time scoring leaves
    /// unused, so a run does not lengthen scoring's tail. A service saturated for long
    /// stretches then starves its runs; `false` gives them a share by `nice` instead.
    #[serde(default = "default_idle_cpu_only")]
    pub idle_cpu_only: bool,
    /// Without `[[training.families]]`, the label's default family is filled in after
    /// parsing ([`default_families`]): it depends on `label.kind`.
    #[serde(default)]
    pub families: Vec<FamilyGrid>,
}

// The defaults of `[training]` are the starter file's values (`config/understudy.toml`).
fn default_window_rows() -> usize {
    4800
}
fn default_holdout_fraction() -> f64 {
    0.25
}
fn default_folds() -> usize {
    5
}
fn default_window_shares() -> Vec<f64> {
    vec![1.0]
}
fn default_validation_fraction() -> f64 {
    0.2
}
fn default_seed() -> u64 {
    20261201
}
fn default_training_min_rows() -> usize {
    500
}

impl Default for TrainingConfig {
    fn default() -> Self {
        TrainingConfig {
            window_rows: default_window_rows(),
            window_age: None,
            holdout_fraction: default_holdout_fraction(),
            window_shares: default_window_shares(),
            validation_fraction: default_validation_fraction(),
            half_life: None,
            folds: default_folds(),
            repeats: default_repeats(),
            selection: Selection::default(),
            seed: default_seed(),
            min_rows: default_training_min_rows(),
            workers: default_workers(),
            nice: default_nice(),
            idle_cpu_only: default_idle_cpu_only(),
            families: vec![],
        }
    }
}

/// The family searched when the config lists none: the starter file's elastic-net path,
/// logistic for binary labels and linear for numeric ones.
pub fn default_families(kind: LabelKind) -> Vec<FamilyGrid> {
    let grid = PenalizedGrid {
        penalty: Penalty::ElasticNet,
        l1_ratio: Some(vec![0.5, 1.0]),
        lambda: None,
        lambda_count: penalized::default_lambda_count(),
        lambda_min_ratio: penalized::default_lambda_min_ratio(),
    };
    vec![match kind {
        LabelKind::Binary => FamilyGrid::Logistic(grid),
        LabelKind::Number => FamilyGrid::Linear(grid),
    }]
}

fn default_workers() -> usize {
    1
}

fn default_nice() -> i32 {
    10
}

fn default_idle_cpu_only() -> bool {
    true
}

fn default_repeats() -> usize {
    2
}

/// How the search picks a setting from the cross-validation table.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Selection {
    /// The best mean.
    Best,
    /// The most penalized setting whose mean is within one standard error of the best (Breiman
    /// et al. 1984; Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, §7.10).
    #[default]
    OneSe,
}

/// Checks that turn a run's candidate away with the verdict `rejected`.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GuardrailConfig {
    /// Fewest holdout rows a run may judge a candidate on.
    #[serde(default = "default_min_holdout_rows")]
    pub min_holdout_rows: usize,
    /// Fewest positives (and negatives) in the holdout, binary labels only.
    #[serde(default = "default_min_holdout_positives")]
    pub min_holdout_positives: usize,
    /// Largest standard deviation of the chosen setting's fold values; unset means no limit.
    pub max_cv_spread: Option<f64>,
    /// Segments the candidate must not do worse on than the active model (by more than
    /// `segment_tolerance`, on the gate's rows), each with at least `segment_min_rows` rows.
    #[serde(default)]
    pub segments: Vec<SegmentConfig>,
    #[serde(default = "default_segment_tolerance")]
    pub segment_tolerance: f64,
    #[serde(default = "default_segment_min_rows")]
    pub segment_min_rows: usize,
    /// The adverse-impact check on a monitoring attribute; off when absent.
    pub adverse_impact: Option<AdverseImpactConfig>,
}

/// `[guardrails.adverse_impact]`: each group's favourable-decision rate under the candidate
/// (and the active model), divided by the most favoured group's; a ratio below `min_ratio`
/// flags the group, and a flagged run is `rejected` or waits for sign-off (`on_flag`). A
/// screening statistic, not a legal finding (see `adverse_impact`).
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AdverseImpactConfig {
    /// A monitoring attribute (`monitoring.attributes`): never a feature.
    pub attribute: String,
    /// The side of the cut that is the favourable decision.
    pub favourable: Favourable,
    /// Cut scores here ...
    pub threshold: Option<f64>,
    /// ... or where this share of the gate's rows is favoured (each model its own cut).
    pub approval_rate: Option<f64>,
    #[serde(default = "default_min_ratio")]
    pub min_ratio: f64,
    #[serde(default = "default_impact_min_group_rows")]
    pub min_group_rows: usize,
    #[serde(default)]
    pub on_flag: OnFlag,
}

/// Which side of the cut is the favourable decision: `below` for a risk score (a low
/// probability of default is an approval), `above` for a propensity score.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Favourable {
    Below,
    Above,
}

impl Favourable {
    pub fn as_str(self) -> &'static str {
        match self {
            Favourable::Below => "below",
            Favourable::Above => "above",
        }
    }
}

/// What a flagged adverse-impact check does to a run that passed the gate.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum OnFlag {
    /// The verdict becomes `rejected`.
    #[default]
    Reject,
    /// The candidate waits for an operator's sign-off, whatever `gate.sign_off` says.
    SignOff,
}

impl OnFlag {
    pub fn as_str(self) -> &'static str {
        match self {
            OnFlag::Reject => "reject",
            OnFlag::SignOff => "sign_off",
        }
    }
}

fn default_min_ratio() -> f64 {
    // The four-fifths rule: US Uniform Guidelines on Employee Selection Procedures,
    // 29 CFR 1607.4(D).
    0.8
}

fn default_impact_min_group_rows() -> usize {
    30
}

/// `[monitoring]`: attributes examples may carry that are stored but never features (a group
/// the team must watch, such as an age band). Only the adverse-impact check reads them.
#[derive(Debug, Clone, Default, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MonitoringConfig {
    #[serde(default)]
    pub attributes: Vec<String>,
}

/// One way to cut the gate's rows into segments: by a category feature's categories, or by
/// bands of a number feature (`bands` are the cut points: `[5000, 20000]` makes below 5000,
/// 5000 up to 20000, and 20000 and above).
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SegmentConfig {
    pub feature: String,
    #[serde(default)]
    pub bands: Vec<f64>,
}

fn default_segment_tolerance() -> f64 {
    0.02
}

fn default_segment_min_rows() -> usize {
    100
}

fn default_min_holdout_rows() -> usize {
    100
}

fn default_min_holdout_positives() -> usize {
    10
}

impl Default for GuardrailConfig {
    fn default() -> Self {
        GuardrailConfig {
            min_holdout_rows: default_min_holdout_rows(),
            min_holdout_positives: default_min_holdout_positives(),
            max_cv_spread: None,
            segments: vec![],
            segment_tolerance: default_segment_tolerance(),
            segment_min_rows: default_segment_min_rows(),
            adverse_impact: None,
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GateConfig {
    /// Without it: `auc`, or `rmse` for numeric labels (filled in after parsing).
    #[serde(default = "default_metric")]
    pub metric: GateMetric,
    #[serde(default = "default_margin")]
    pub margin: f64,
    #[serde(default = "default_gate_min_rows")]
    pub min_rows: usize,
    /// Largest one-sided p-value that counts as significant; 1 turns the test off.
    #[serde(default = "default_alpha")]
    pub alpha: f64,
    /// A candidate that passes the gate waits (verdict `waiting`, stored, not served) until
    /// an operator approves or declines it; an approval promotes it, or starts its shadow.
    #[serde(default)]
    pub sign_off: bool,
    /// A candidate still waiting after this ends `expired`; "off" waits for ever.
    #[serde(
        default = "default_sign_off_expires",
        deserialize_with = "duration_or_off"
    )]
    pub sign_off_expires: Option<Duration>,
    /// The key that started a run (a manual retrain) may not approve its candidate.
    #[serde(default)]
    pub four_eyes: bool,
}

fn default_sign_off_expires() -> Option<Duration> {
    Some(Duration::from_secs(7 * 24 * 3600))
}

fn default_alpha() -> f64 {
    0.05
}
fn default_metric() -> GateMetric {
    GateMetric::Auc
}
fn default_margin() -> f64 {
    0.02
}
fn default_gate_min_rows() -> usize {
    200
}

impl Default for GateConfig {
    fn default() -> Self {
        GateConfig {
            metric: default_metric(),
            margin: default_margin(),
            min_rows: default_gate_min_rows(),
            alpha: default_alpha(),
            sign_off: false,
            sign_off_expires: default_sign_off_expires(),
            four_eyes: false,
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ScheduleConfig {
    #[serde(default, deserialize_with = "optional_duration")]
    pub every: Option<Duration>,
    pub new_labels: Option<u64>,
    /// Start a run when a feature's or the score's PSI reaches `drift.act`.
    #[serde(default)]
    pub on_drift: bool,
    /// Start a run when the active model's gate metric on its latest labeled rows is
    /// significantly worse than on its holdout (`decline`), checked every
    /// `drift.check_every`, once per active model.
    #[serde(default)]
    pub on_decline: bool,
    /// The latest labeled rows (after the model's training cutoff) the check reads.
    #[serde(default = "default_decline_rows")]
    pub decline_rows: usize,
    /// Fewer such rows than this: no check.
    #[serde(default = "default_decline_min_rows")]
    pub decline_min_rows: usize,
    /// The one-sided test's level.
    #[serde(default = "default_decline_alpha")]
    pub decline_alpha: f64,
}

impl Default for ScheduleConfig {
    fn default() -> Self {
        ScheduleConfig {
            every: None,
            new_labels: None,
            on_drift: false,
            on_decline: false,
            decline_rows: default_decline_rows(),
            decline_min_rows: default_decline_min_rows(),
            decline_alpha: default_decline_alpha(),
        }
    }
}

fn default_decline_rows() -> usize {
    1000
}
fn default_decline_min_rows() -> usize {
    300
}
fn default_decline_alpha() -> f64 {
    0.01
}

fn required_duration<'de, D: Deserializer<'de>>(d: D) -> Result<Duration, D::Error> {
    optional_duration(d)?.ok_or_else(|| serde::de::Error::custom("a duration is required"))
}

fn optional_duration<'de, D: Deserializer<'de>>(d: D) -> Result<Option<Duration>, D::Error> {
    let text = Option::<String>::deserialize(d)?;
    text.map(|t| {
        humantime::parse_duration(&t).map_err(|e| {
            serde::de::Error::custom(format!(
                "`{t}` is not a duration like \"6h\" or \"30m\": {e}"
            ))
        })
    })
    .transpose()
}

fn duration<'de, D: Deserializer<'de>>(d: D) -> Result<Duration, D::Error> {
    let text = String::deserialize(d)?;
    humantime::parse_duration(&text).map_err(|e| {
        serde::de::Error::custom(format!(
            "`{text}` is not a duration like \"10m\" or \"1h\": {e}"
        ))
    })
}

/// A duration, or `"off"` for no limit.
fn duration_or_off<'de, D: Deserializer<'de>>(d: D) -> Result<Option<Duration>, D::Error> {
    let text = String::deserialize(d)?;
    if text == "off" {
        return Ok(None);
    }
    humantime::parse_duration(&text).map(Some).map_err(|e| {
        serde::de::Error::custom(format!(
            "`{text}` is neither a duration like \"90d\" nor \"off\": {e}"
        ))
    })
}

/// A whole number, or `"off"` for no limit.
fn count_or_off<'de, D: Deserializer<'de>>(d: D) -> Result<Option<u64>, D::Error> {
    #[derive(Deserialize)]
    #[serde(untagged)]
    enum Raw {
        Count(u64),
        Text(String),
    }
    match Raw::deserialize(d) {
        Ok(Raw::Count(n)) => Ok(Some(n)),
        Ok(Raw::Text(text)) if text == "off" => Ok(None),
        _ => Err(serde::de::Error::custom(
            "must be a whole number of records or \"off\"",
        )),
    }
}
