//! The TOML configuration: its typed shape, its defaults and its validation.
//!
//! Parsing (serde + toml) only checks shapes; [`Config::validate`] then checks every rule a
//! running service depends on and names the offending key, so a bad file fails at start-up
//! with a message a person can act on, never later in a request or a run.

use std::collections::HashSet;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::{Deserialize, Deserializer};

use crate::access::{KeySecret, KeySource, Keyring, KeyringError, Role};
use crate::metrics::GateMetric;
use crate::model::Penalty;
use crate::schema::{Feature, FeatureKind, LabelKind, LabelRule, MissingRule, Schema};

/// The commented starter configuration, also the embedded default.
pub const DEFAULT_CONFIG_TOML: &str = include_str!("../config/understudy.toml");

/// A configuration that failed to load, naming the key and the rule.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("cannot read config file {path}: {source}")]
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("config is not valid TOML for understudy: {0}")]
    Parse(String),
    #[error("config key `{key}`: {rule}")]
    Invalid { key: String, rule: String },
}

/// The key a deserialization error is about: its path, with the member serde names only in
/// the message (an unknown or missing key) appended; `None` at the top level with no such
/// member (the text is not TOML).
fn shape_error_key(path: &str, message: &str) -> Option<String> {
    let base = if path == "." { "" } else { path };
    let named = ["unknown field `", "missing field `"]
        .iter()
        .find_map(|prefix| message.strip_prefix(prefix))
        .and_then(|rest| rest.split('`').next())
        .filter(|name| !name.is_empty());
    let key = match named {
        Some(name) if base.is_empty() => name.to_owned(),
        Some(name) if !base.ends_with(name) => format!("{base}.{name}"),
        _ => base.to_owned(),
    };
    (!key.is_empty()).then_some(key)
}

/// For a key that has no default and is missing: the line (or table) to add.
fn missing_key_hint(key: &str, rule: &str) -> Option<&'static str> {
    if !rule.starts_with("missing field") {
        return None;
    }
    let last = key.rsplit('.').next().unwrap_or(key);
    Some(match (key, last) {
        ("label", _) => {
            "add a `[label]` table with `name = \"<your outcome column>\"` (and `kind = \"binary\"` or `kind = \"number\"`)"
        }
        ("label.name", _) => "add `name = \"<your outcome column>\"` under `[label]`",
        ("features", _) => {
            "add at least one feature: `[[features]]` with `name = \"amount\"` and `kind = \"number\"` (or `kind = \"category\"` with `categories = [...]`)"
        }
        (k, "name") if k.starts_with("features[") => {
            "add `name = \"<column>\"` to that `[[features]]` table"
        }
        (k, "kind") if k.starts_with("features[") => {
            "add `kind = \"number\"` or `kind = \"category\"` (with `categories = [...]`) to that `[[features]]` table"
        }
        (k, "family") if k.starts_with("training.families[") => {
            "add `family = \"logistic\"` (or linear, decision_tree, random_forest, knn, naive_bayes) to that `[[training.families]]` table"
        }
        (k, "name") if k.starts_with("access.keys[") => {
            "add `name = \"<who uses the key>\"` to that `[[access.keys]]` table"
        }
        (k, "role") if k.starts_with("access.keys[") => {
            "add `role = \"scorer\"` or `role = \"operator\"` to that `[[access.keys]]` table"
        }
        _ => return None,
    })
}

fn invalid(key: impl Into<String>, rule: impl Into<String>) -> ConfigError {
    ConfigError::Invalid {
        key: key.into(),
        rule: rule.into(),
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Config {
    #[serde(default)]
    pub server: ServerConfig,
    #[serde(default)]
    pub access: AccessConfig,
    pub label: LabelConfig,
    pub features: Vec<FeatureConfig>,
    /// Optional: without it, the starter file's values (see [`TrainingConfig::default`]).
    #[serde(default)]
    pub training: TrainingConfig,
    /// Optional: without it, the starter file's values (see [`GateConfig::default`]).
    #[serde(default)]
    pub gate: GateConfig,
    #[serde(default)]
    pub guardrails: GuardrailConfig,
    #[serde(default)]
    pub shadow: ShadowConfig,
    #[serde(default)]
    pub drift: DriftConfig,
    #[serde(default)]
    pub schedule: ScheduleConfig,
    #[serde(default)]
    pub retention: RetentionConfig,
}

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
    pub families: Vec<FamilyConfig>,
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
pub fn default_families(kind: LabelKind) -> Vec<FamilyConfig> {
    let grid = PenalizedGrid {
        penalty: Penalty::ElasticNet,
        l1_ratio: Some(vec![0.5, 1.0]),
        lambda: None,
        lambda_count: default_lambda_count(),
        lambda_min_ratio: default_lambda_min_ratio(),
    };
    vec![match kind {
        LabelKind::Binary => FamilyConfig::Logistic(grid),
        LabelKind::Number => FamilyConfig::Linear(grid),
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

/// One estimator family and the grid it is searched over.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(tag = "family", rename_all = "snake_case")]
pub enum FamilyConfig {
    /// Elastic-net logistic regression (binary labels).
    Logistic(PenalizedGrid),
    /// Elastic-net linear regression (numeric labels): ridge, lasso or elastic net.
    Linear(PenalizedGrid),
    DecisionTree(TreeGrid),
    RandomForest(ForestGrid),
    Knn(KnnGrid),
    NaiveBayes(NaiveBayesGrid),
}

impl FamilyConfig {
    pub fn name(&self) -> &'static str {
        match self {
            FamilyConfig::Logistic(_) => "logistic",
            FamilyConfig::Linear(_) => "linear",
            FamilyConfig::DecisionTree(_) => "decision_tree",
            FamilyConfig::RandomForest(_) => "random_forest",
            FamilyConfig::Knn(_) => "knn",
            FamilyConfig::NaiveBayes(_) => "naive_bayes",
        }
    }
}

/// The grid of a penalized linear family. Without `lambda`, the path is automatic:
/// `lambda_count` values from the data's lambda_max down to `lambda_min_ratio` of it.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PenalizedGrid {
    #[serde(default)]
    pub penalty: Penalty,
    /// The L1 share of the penalty; `elastic_net` only (`l1` is 1, `l2` is 0).
    pub l1_ratio: Option<Vec<f64>>,
    /// Pinned lambda values (instead of the automatic path).
    pub lambda: Option<Vec<f64>>,
    #[serde(default = "default_lambda_count")]
    pub lambda_count: usize,
    #[serde(default = "default_lambda_min_ratio")]
    pub lambda_min_ratio: f64,
}

fn default_lambda_count() -> usize {
    20
}

fn default_lambda_min_ratio() -> f64 {
    0.001
}

impl PenalizedGrid {
    /// The l1_ratio values this grid searches.
    pub fn l1_ratios(&self) -> Vec<f64> {
        match self.penalty {
            Penalty::L2 => vec![0.0],
            Penalty::L1 => vec![1.0],
            Penalty::ElasticNet => self.l1_ratio.clone().unwrap_or_default(),
        }
    }
}

#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TreeGrid {
    #[serde(default = "default_tree_depth")]
    pub max_depth: Vec<u16>,
    #[serde(default = "default_min_leaf")]
    pub min_leaf: Vec<usize>,
}

#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ForestGrid {
    #[serde(default = "default_trees")]
    pub trees: Vec<usize>,
    #[serde(default = "default_forest_depth")]
    pub max_depth: Vec<u16>,
    #[serde(default = "default_min_leaf")]
    pub min_leaf: Vec<usize>,
}

fn default_min_leaf() -> Vec<usize> {
    vec![1]
}
// The grids the starter file suggests in its comments.
fn default_tree_depth() -> Vec<u16> {
    vec![3, 5]
}
fn default_trees() -> Vec<usize> {
    vec![100]
}
fn default_forest_depth() -> Vec<u16> {
    vec![6]
}
fn default_k() -> Vec<usize> {
    vec![50, 150]
}

#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct KnnGrid {
    #[serde(default = "default_k")]
    pub k: Vec<usize>,
}

#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NaiveBayesGrid {}

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
        }
    }
}

#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ScheduleConfig {
    #[serde(default, deserialize_with = "optional_duration")]
    pub every: Option<Duration>,
    pub new_labels: Option<u64>,
    /// Start a run when a feature's or the score's PSI reaches `drift.act`.
    #[serde(default)]
    pub on_drift: bool,
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

/// The store's cache when `server.cache_mb` is not set: sled's own default (1 GiB) let memory
/// follow the store's size (RELIABILITY.md, "Soak and retention").
pub const DEFAULT_CACHE_MB: u64 = 128;

impl From<&FeatureConfig> for Feature {
    fn from(f: &FeatureConfig) -> Feature {
        Feature {
            name: f.name.clone(),
            kind: f.kind,
            min: f.min,
            max: f.max,
            categories: f.categories.clone(),
            missing: f.missing.clone(),
        }
    }
}

impl Config {
    /// The schema the features and the label declare.
    pub fn schema(&self) -> Schema {
        Schema::new(
            self.features.iter().map(Feature::from).collect(),
            self.label.name.clone(),
        )
        .with_label_rule(LabelRule {
            kind: self.label.kind,
            min: self.label.min,
            max: self.label.max,
        })
    }

    /// The embedded default configuration (the demo scenario).
    pub fn embedded_default() -> Config {
        Config::from_toml(DEFAULT_CONFIG_TOML).expect("the embedded default config is valid")
    }

    /// Reads, parses and validates a config file.
    pub fn load(path: &Path) -> Result<Config, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
            path: path.to_owned(),
            source,
        })?;
        Config::from_toml(&text)
    }

    /// Parses and validates TOML text.
    ///
    /// A value of the wrong shape (a string where a number belongs, an unknown or missing key)
    /// is [`ConfigError::Invalid`] naming the key's path (`features[2].min`); text that is not
    /// TOML at all is [`ConfigError::Parse`] with its line and column.
    pub fn from_toml(text: &str) -> Result<Config, ConfigError> {
        let config: Config = serde_path_to_error::deserialize(toml::Deserializer::new(text))
            .map_err(|e| {
                let path = e.path().to_string();
                let error = e.into_inner();
                match shape_error_key(&path, error.message()) {
                    Some(key) => {
                        let rule = error.message().trim();
                        match missing_key_hint(&key, rule) {
                            Some(hint) => invalid(key, format!("{rule}; {hint}")),
                            None => invalid(key, rule),
                        }
                    }
                    None => ConfigError::Parse(error.to_string().trim().to_owned()),
                }
            })?;
        let mut config = config;
        config.fill_label_defaults(text);
        config.validate()?;
        Ok(config)
    }

    /// The defaults that depend on `label.kind`, for keys the file leaves out: the gate's
    /// metric and the candidate families. A key the file gives, even as an empty list, is
    /// left as given (so `families = []` is still refused by [`Config::validate`]).
    fn fill_label_defaults(&mut self, text: &str) {
        let Ok(raw) = text.parse::<toml::Table>() else {
            return;
        };
        let given = |table: &str, key: &str| {
            raw.get(table)
                .and_then(toml::Value::as_table)
                .is_some_and(|t| t.contains_key(key))
        };
        if !given("gate", "metric") && self.label.kind == LabelKind::Number {
            self.gate.metric = GateMetric::Rmse;
        }
        if !given("training", "families") {
            self.training.families = default_families(self.label.kind);
        }
    }

    /// Checks every rule the service relies on; the error names the key and the rule.
    pub fn validate(&self) -> Result<(), ConfigError> {
        self.validate_access()?;
        if !(1024..=1 << 30).contains(&self.server.body_limit) {
            return Err(invalid(
                "server.body_limit",
                "must be between 1024 and 1073741824 bytes",
            ));
        }
        if !(1..=1_000_000).contains(&self.server.max_in_flight) {
            return Err(invalid(
                "server.max_in_flight",
                "must be between 1 and 1000000",
            ));
        }
        if !(Duration::from_millis(100)..=Duration::from_secs(3600))
            .contains(&self.server.request_timeout)
        {
            return Err(invalid(
                "server.request_timeout",
                "must be between 100ms and 1h",
            ));
        }
        if self.server.max_batch == 0 {
            return Err(invalid("server.max_batch", "must be at least 1"));
        }
        if !(8..=65_536).contains(&self.server.cache_mb) {
            return Err(invalid(
                "server.cache_mb",
                "must be between 8 and 65536 (MiB)",
            ));
        }
        if self.server.shutdown_grace > Duration::from_secs(3600) {
            return Err(invalid("server.shutdown_grace", "must be at most 1h"));
        }
        check_name("label.name", &self.label.name)?;
        self.validate_label()?;
        if self.features.is_empty() {
            return Err(invalid("features", "declare at least one feature"));
        }
        let mut seen = HashSet::new();
        for (i, feature) in self.features.iter().enumerate() {
            validate_feature(&format!("features[{i}]"), feature)?;
            if !seen.insert(feature.name.as_str()) {
                return Err(invalid(
                    format!("features[{i}].name"),
                    format!(
                        "`{}` is declared twice; feature names must be unique",
                        feature.name
                    ),
                ));
            }
            if feature.name == self.label.name {
                return Err(invalid(
                    format!("features[{i}].name"),
                    format!("`{}` is also the label's name", feature.name),
                ));
            }
        }
        self.validate_training()?;
        let gate = &self.gate;
        if !gate.margin.is_finite() || gate.margin < 0.0 {
            return Err(invalid("gate.margin", "must be a finite number >= 0"));
        }
        if !(gate.alpha > 0.0 && gate.alpha <= 1.0) {
            return Err(invalid(
                "gate.alpha",
                "must be in (0, 1]; 1 turns the significance test off",
            ));
        }
        if gate.min_rows == 0 {
            return Err(invalid("gate.min_rows", "must be at least 1"));
        }
        let drift = &self.drift;
        if !(drift.watch.is_finite()
            && drift.watch > 0.0
            && drift.act.is_finite()
            && drift.act > drift.watch)
        {
            return Err(invalid(
                "drift.act",
                "drift.watch must be > 0 and drift.act greater than drift.watch",
            ));
        }
        if drift.window_rows == 0 || drift.min_rows == 0 || drift.min_rows > drift.window_rows {
            return Err(invalid(
                "drift.min_rows",
                "drift.window_rows and drift.min_rows must be at least 1, min_rows at most window_rows",
            ));
        }
        if self.schedule.on_drift && drift.check_every.is_none_or(|d| d < Duration::from_secs(1)) {
            return Err(invalid(
                "drift.check_every",
                "must be at least 1s when schedule.on_drift is set",
            ));
        }
        if self.shadow.outcomes > 0 && self.shadow.outcomes < 2 {
            return Err(invalid("shadow.outcomes", "must be 0 (off) or at least 2"));
        }
        if let Some(0) = self.schedule.new_labels {
            return Err(invalid(
                "schedule.new_labels",
                "must be at least 1 (or omitted)",
            ));
        }
        if let Some(every) = self.schedule.every {
            if every < Duration::from_secs(1) {
                return Err(invalid(
                    "schedule.every",
                    "must be at least 1s (or omitted)",
                ));
            }
        }
        self.validate_retention()
    }

    /// Retention must leave the drift window whole: drift and outcome coverage read the
    /// newest `drift.window_rows` scores no older than `drift.window_age`.
    fn validate_retention(&self) -> Result<(), ConfigError> {
        let r = &self.retention;
        if let Some(age) = r.scores_max_age {
            if age < Duration::from_secs(60) {
                return Err(invalid(
                    "retention.scores_max_age",
                    "must be at least 1m (or \"off\")",
                ));
            }
            if let Some(window) = self.drift.window_age {
                if age < window {
                    return Err(invalid(
                        "retention.scores_max_age",
                        format!(
                            "must be at least drift.window_age ({}), so drift still sees its whole window",
                            humantime::format_duration(window)
                        ),
                    ));
                }
            }
        }
        if let Some(count) = r.scores_max_count {
            if count < self.drift.window_rows as u64 {
                return Err(invalid(
                    "retention.scores_max_count",
                    format!(
                        "must be at least drift.window_rows ({}), so drift still sees its whole window",
                        self.drift.window_rows
                    ),
                ));
            }
        }
        if r.check_every < Duration::from_secs(1) {
            return Err(invalid("retention.check_every", "must be at least 1s"));
        }
        Ok(())
    }

    fn validate_training(&self) -> Result<(), ConfigError> {
        let t = &self.training;
        if !(t.holdout_fraction > 0.0 && t.holdout_fraction < 1.0) {
            return Err(invalid(
                "training.holdout_fraction",
                "must be between 0 and 1 (exclusive)",
            ));
        }
        if !(2..=50).contains(&t.folds) {
            return Err(invalid("training.folds", "must be between 2 and 50"));
        }
        if t.min_rows < 2 * t.folds {
            return Err(invalid(
                "training.min_rows",
                "must be at least 2 × training.folds",
            ));
        }
        if t.window_rows < t.min_rows {
            return Err(invalid(
                "training.window_rows",
                "must be at least training.min_rows",
            ));
        }
        if !(1..=64).contains(&t.workers) {
            return Err(invalid("training.workers", "must be between 1 and 64"));
        }
        if !(0..=19).contains(&t.nice) {
            return Err(invalid("training.nice", "must be between 0 and 19"));
        }
        if !(1..=20).contains(&t.repeats) {
            return Err(invalid("training.repeats", "must be between 1 and 20"));
        }
        if t.families.is_empty() {
            return Err(invalid(
                "training.families",
                "list at least one candidate family",
            ));
        }
        for (i, family) in t.families.iter().enumerate() {
            self.validate_family(&format!("training.families[{i}]"), family)?;
        }
        let g = &self.guardrails;
        if g.min_holdout_rows == 0 {
            return Err(invalid("guardrails.min_holdout_rows", "must be at least 1"));
        }
        if let Some(spread) = g.max_cv_spread {
            if !(spread.is_finite() && spread > 0.0) {
                return Err(invalid(
                    "guardrails.max_cv_spread",
                    "must be a finite number > 0 (or omitted)",
                ));
            }
        }
        Ok(())
    }

    fn validate_access(&self) -> Result<(), ConfigError> {
        let mut names = HashSet::new();
        for (i, key) in self.access.keys.iter().enumerate() {
            let at = format!("access.keys[{i}]");
            check_name(&format!("{at}.name"), &key.name)?;
            if !names.insert(key.name.as_str()) {
                return Err(invalid(format!("{at}.name"), "key names must be unique"));
            }
            let given = [&key.key, &key.key_sha256, &key.key_env]
                .iter()
                .filter(|v| v.is_some())
                .count();
            if given != 1 {
                return Err(invalid(
                    at,
                    "give exactly one of key, key_sha256 or key_env",
                ));
            }
            if let Some(raw) = &key.key {
                if raw.len() < 16 {
                    return Err(invalid(
                        format!("{at}.key"),
                        "must be at least 16 characters",
                    ));
                }
            }
            if let Some(hash) = &key.key_sha256 {
                if hash.len() != 64 || !hash.chars().all(|c| c.is_ascii_hexdigit()) {
                    return Err(invalid(
                        format!("{at}.key_sha256"),
                        "must be 64 hexadecimal characters (a SHA-256 digest)",
                    ));
                }
            }
        }
        if self.access.keys.is_empty() && !self.server.listen.ip().is_loopback() {
            return Err(invalid(
                "server.listen",
                "with no access.keys the service listens on loopback only (127.0.0.1 or ::1)",
            ));
        }
        Ok(())
    }

    fn validate_label(&self) -> Result<(), ConfigError> {
        let label = &self.label;
        match label.kind {
            LabelKind::Binary => {
                if label.min.is_some() || label.max.is_some() {
                    return Err(invalid(
                        "label.min",
                        "only numeric labels (kind = \"number\") take min/max",
                    ));
                }
            }
            LabelKind::Number => {
                for (bound, value) in [("min", label.min), ("max", label.max)] {
                    if value.is_some_and(|v| !v.is_finite()) {
                        return Err(invalid(format!("label.{bound}"), "must be a finite number"));
                    }
                }
                if let (Some(min), Some(max)) = (label.min, label.max) {
                    if min >= max {
                        return Err(invalid("label.max", "must be greater than min"));
                    }
                }
            }
        }
        if self.gate.metric.label_kind() != label.kind {
            let allowed = match label.kind {
                LabelKind::Binary => "auc, log_loss or brier",
                LabelKind::Number => "rmse or mae",
            };
            return Err(invalid(
                "gate.metric",
                format!(
                    "`{}` does not judge {} labels; use {allowed}",
                    self.gate.metric.name(),
                    match label.kind {
                        LabelKind::Binary => "binary",
                        LabelKind::Number => "numeric",
                    }
                ),
            ));
        }
        Ok(())
    }

    fn validate_family(&self, key: &str, family: &FamilyConfig) -> Result<(), ConfigError> {
        let binary_only = !matches!(family, FamilyConfig::Linear(_));
        let fits_label = match self.label.kind {
            LabelKind::Binary => binary_only,
            LabelKind::Number => !binary_only,
        };
        if !fits_label {
            return Err(invalid(
                format!("{key}.family"),
                match self.label.kind {
                    LabelKind::Binary => format!(
                        "`{}` predicts numbers; binary labels take logistic, decision_tree, random_forest, knn or naive_bayes",
                        family.name()
                    ),
                    LabelKind::Number => format!(
                        "`{}` predicts probabilities; numeric labels (label.kind = \"number\") take linear",
                        family.name()
                    ),
                },
            ));
        }
        fn non_empty<T>(
            key: String,
            values: &[T],
            ok: impl Fn(&T) -> bool,
            rule: &str,
        ) -> Result<(), ConfigError> {
            if values.is_empty() {
                return Err(invalid(key, "list at least one value"));
            }
            if !values.iter().all(ok) {
                return Err(invalid(key, rule.to_owned()));
            }
            Ok(())
        }
        match family {
            FamilyConfig::Logistic(grid) | FamilyConfig::Linear(grid) => {
                match (grid.penalty, &grid.l1_ratio) {
                    (Penalty::ElasticNet, None) => {
                        return Err(invalid(
                            format!("{key}.l1_ratio"),
                            "penalty \"elastic_net\" needs a list of l1_ratio values",
                        ))
                    }
                    (Penalty::ElasticNet, Some(ratios)) => non_empty(
                        format!("{key}.l1_ratio"),
                        ratios,
                        |r| (0.0..=1.0).contains(r),
                        "every value must be between 0 and 1",
                    )?,
                    (penalty, Some(_)) => {
                        return Err(invalid(
                            format!("{key}.l1_ratio"),
                            format!(
                                "penalty \"{}\" fixes the l1_ratio; use penalty \"elastic_net\" to search it",
                                penalty.name()
                            ),
                        ))
                    }
                    (_, None) => {}
                }
                if let Some(lambda) = &grid.lambda {
                    non_empty(
                        format!("{key}.lambda"),
                        lambda,
                        |l| l.is_finite() && *l >= 0.0,
                        "every value must be a finite number >= 0",
                    )?;
                }
                if !(1..=500).contains(&grid.lambda_count) {
                    return Err(invalid(
                        format!("{key}.lambda_count"),
                        "must be between 1 and 500",
                    ));
                }
                if !(grid.lambda_min_ratio > 0.0 && grid.lambda_min_ratio < 1.0) {
                    return Err(invalid(
                        format!("{key}.lambda_min_ratio"),
                        "must be between 0 and 1 (exclusive)",
                    ));
                }
            }
            FamilyConfig::DecisionTree(grid) => {
                within(key, "max_depth", &grid.max_depth, 1, 64)?;
                within(key, "min_leaf", &grid.min_leaf, 1, 100_000)?;
            }
            FamilyConfig::RandomForest(grid) => {
                within(key, "trees", &grid.trees, 1, 2000)?;
                within(key, "max_depth", &grid.max_depth, 1, 64)?;
                within(key, "min_leaf", &grid.min_leaf, 1, 100_000)?;
            }
            FamilyConfig::Knn(grid) => within(key, "k", &grid.k, 1, 1000)?,
            FamilyConfig::NaiveBayes(_) => {}
        }
        Ok(())
    }
}

/// Checks a non-empty grid of integers within `[min, max]`.
fn within<T: Copy + PartialOrd + std::fmt::Display>(
    key: &str,
    field: &str,
    values: &[T],
    min: T,
    max: T,
) -> Result<(), ConfigError> {
    if values.is_empty() {
        return Err(invalid(format!("{key}.{field}"), "list at least one value"));
    }
    if values.iter().any(|v| *v < min || *v > max) {
        return Err(invalid(
            format!("{key}.{field}"),
            format!("every value must be between {min} and {max}"),
        ));
    }
    Ok(())
}

fn check_name(key: &str, name: &str) -> Result<(), ConfigError> {
    let ok = !name.is_empty()
        && name.len() <= 64
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-' || c == '.');
    if ok {
        Ok(())
    } else {
        Err(invalid(
            key,
            "must be 1-64 characters of A-Z, a-z, 0-9, `_`, `-` or `.`",
        ))
    }
}

fn validate_feature(key: &str, f: &FeatureConfig) -> Result<(), ConfigError> {
    check_name(&format!("{key}.name"), &f.name)?;
    match f.kind {
        FeatureKind::Number => {
            if !f.categories.is_empty() {
                return Err(invalid(
                    format!("{key}.categories"),
                    "only category features list categories",
                ));
            }
            for (bound, value) in [("min", f.min), ("max", f.max)] {
                if value.is_some_and(|v| !v.is_finite()) {
                    return Err(invalid(format!("{key}.{bound}"), "must be a finite number"));
                }
            }
            if let (Some(min), Some(max)) = (f.min, f.max) {
                if min >= max {
                    return Err(invalid(format!("{key}.max"), "must be greater than min"));
                }
            }
            match &f.missing {
                MissingRule::Number(v) => {
                    let in_bounds = v.is_finite()
                        && f.min.is_none_or(|min| *v >= min)
                        && f.max.is_none_or(|max| *v <= max);
                    if !in_bounds {
                        return Err(invalid(
                            format!("{key}.missing"),
                            "the constant must be finite and within min/max",
                        ));
                    }
                }
                MissingRule::Category(text) => {
                    return Err(invalid(
                        format!("{key}.missing"),
                        format!("`{text}` is not a rule; use \"reject\", \"median\" or a number"),
                    ));
                }
                MissingRule::Reject | MissingRule::Median => {}
            }
        }
        FeatureKind::Category => {
            if f.min.is_some() || f.max.is_some() {
                return Err(invalid(
                    format!("{key}.min"),
                    "only number features take min/max",
                ));
            }
            if f.categories.is_empty() {
                return Err(invalid(
                    format!("{key}.categories"),
                    "list at least one allowed category",
                ));
            }
            let mut seen = HashSet::new();
            for c in &f.categories {
                if c.is_empty() || !seen.insert(c.as_str()) {
                    return Err(invalid(
                        format!("{key}.categories"),
                        format!("categories must be non-empty and unique (`{c}`)"),
                    ));
                }
            }
            match &f.missing {
                MissingRule::Category(c) if !f.categories.contains(c) => {
                    return Err(invalid(
                        format!("{key}.missing"),
                        format!("`{c}` is neither \"reject\" nor one of the categories"),
                    ));
                }
                MissingRule::Median => {
                    return Err(invalid(
                        format!("{key}.missing"),
                        "\"median\" applies to number features only",
                    ));
                }
                MissingRule::Number(_) => {
                    return Err(invalid(
                        format!("{key}.missing"),
                        "a category feature's constant must be one of its categories",
                    ));
                }
                _ => {}
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn with(replace: &str, by: &str) -> Result<Config, ConfigError> {
        assert!(
            DEFAULT_CONFIG_TOML.contains(replace),
            "fixture text `{replace}` not found"
        );
        Config::from_toml(&DEFAULT_CONFIG_TOML.replacen(replace, by, 1))
    }

    fn key_of(result: Result<Config, ConfigError>) -> String {
        match result {
            Err(ConfigError::Invalid { key, .. }) => key,
            other => panic!("expected an invalid-key error, got {other:?}"),
        }
    }

    #[test]
    fn embedded_default_is_valid() {
        let config = Config::embedded_default();
        assert_eq!(config.features.len(), 7);
        assert_eq!(config.gate.metric, GateMetric::Auc);
        assert_eq!(config.features[3].missing, MissingRule::Number(0.0));
        assert_eq!(
            config.features[6].missing,
            MissingRule::Category("portal".into())
        );
        assert_eq!(config.schedule.every, Some(Duration::from_secs(6 * 3600)));
        assert_eq!(config.server.max_in_flight, 1024);
        assert_eq!(config.server.request_timeout, Duration::from_secs(30));
        assert_eq!(config.training.nice, 10);
        assert!(config.training.idle_cpu_only);
    }

    #[test]
    fn request_limits_outside_their_ranges_name_their_key() {
        for (replace, by, key) in [
            (
                "body_limit = 16777216",
                "body_limit = 10",
                "server.body_limit",
            ),
            (
                "max_in_flight = 1024",
                "max_in_flight = 0",
                "server.max_in_flight",
            ),
            (
                "request_timeout = \"30s\"",
                "request_timeout = \"5ms\"",
                "server.request_timeout",
            ),
            ("nice = 10", "nice = 20", "training.nice"),
        ] {
            assert_eq!(key_of(with(replace, by)), key, "{by}");
        }
        // Not a duration at all: the parser names the key.
        let error = with("request_timeout = \"30s\"", "request_timeout = \"soon\"")
            .unwrap_err()
            .to_string();
        assert!(error.contains("request_timeout"), "{error}");
    }

    #[test]
    fn errors_name_the_key_and_the_rule() {
        assert_eq!(key_of(with("max = 365", "max = -1")), "features[1].max");
        assert_eq!(
            key_of(with("holdout_fraction = 0.25", "holdout_fraction = 1.5")),
            "training.holdout_fraction"
        );
        assert_eq!(key_of(with("folds = 5", "folds = 1")), "training.folds");
        assert_eq!(
            key_of(with("margin = 0.02", "margin = -0.5")),
            "gate.margin"
        );
        assert_eq!(key_of(with("alpha = 0.05", "alpha = 0")), "gate.alpha");
        assert_eq!(
            key_of(with("missing = \"portal\"", "missing = \"fax\"")),
            "features[6].missing"
        );
        assert_eq!(
            key_of(with("name = \"days_to_due\"", "name = \"invoice_amount\"")),
            "features[1].name"
        );
        assert_eq!(
            key_of(with("lambda_count = 20", "lambda_count = 0")),
            "training.families[0].lambda_count"
        );
        assert_eq!(
            key_of(with("penalty = \"elastic_net\"", "penalty = \"l1\"")),
            "training.families[0].l1_ratio"
        );
        assert_eq!(
            key_of(with("metric = \"auc\"", "metric = \"rmse\"")),
            "gate.metric"
        );
        assert_eq!(
            key_of(with("family = \"logistic\"", "family = \"linear\"")),
            "training.families[0].family"
        );
        assert_eq!(
            key_of(with("repeats = 2", "repeats = 0")),
            "training.repeats"
        );
    }

    #[test]
    fn retention_limits_are_checked_against_the_drift_window() {
        let config = Config::embedded_default();
        assert_eq!(
            config.retention.scores_max_age,
            Some(Duration::from_secs(90 * 24 * 3600))
        );
        assert_eq!(config.retention.scores_max_count, Some(5_000_000));
        assert_eq!(config.retention.check_every, Duration::from_secs(600));
        let off = with("scores_max_age = \"90d\"", "scores_max_age = \"off\"").unwrap();
        assert_eq!(off.retention.scores_max_age, None);
        let off = with("scores_max_count = 5000000", "scores_max_count = \"off\"").unwrap();
        assert_eq!(off.retention.scores_max_count, None);
        // Shorter than drift.window_age (7d) or fewer than drift.window_rows (5000).
        let refused = |replace: &str, by: &str| match with(replace, by) {
            Err(ConfigError::Invalid { key, rule }) => format!("{key}: {rule}"),
            other => panic!("expected an invalid-key error, got {other:?}"),
        };
        assert_eq!(
            refused("scores_max_age = \"90d\"", "scores_max_age = \"6d\""),
            "retention.scores_max_age: must be at least drift.window_age (7days), so drift still sees its whole window"
        );
        assert_eq!(
            refused("scores_max_age = \"90d\"", "scores_max_age = \"30s\""),
            "retention.scores_max_age: must be at least 1m (or \"off\")"
        );
        assert_eq!(
            refused("scores_max_count = 5000000", "scores_max_count = 4999"),
            "retention.scores_max_count: must be at least drift.window_rows (5000), so drift still sees its whole window"
        );
        assert_eq!(
            refused("scores_max_count = 5000000", "scores_max_count = -1"),
            "retention.scores_max_count: must be a whole number of records or \"off\""
        );
        assert_eq!(
            refused("scores_max_count = 5000000", "scores_max_count = \"none\""),
            "retention.scores_max_count: must be a whole number of records or \"off\""
        );
        assert_eq!(config.server.cache_mb, 128);
        assert_eq!(
            key_of(with("cache_mb = 128", "cache_mb = 4")),
            "server.cache_mb"
        );
        assert_eq!(
            key_of(with("check_every = \"10m\"", "check_every = \"0s\"")),
            "retention.check_every"
        );
        assert_eq!(
            key_of(with("check_every = \"10m\"", "check_every = \"often\"")),
            "retention.check_every"
        );
        // A smaller drift window allows smaller limits.
        let small = DEFAULT_CONFIG_TOML
            .replacen("window_rows = 5000", "window_rows = 500", 1)
            .replacen("window_age = \"7d\"", "window_age = \"1h\"", 1)
            .replacen("scores_max_age = \"90d\"", "scores_max_age = \"1h\"", 1)
            .replacen("scores_max_count = 5000000", "scores_max_count = 500", 1);
        let small = Config::from_toml(&small).unwrap();
        assert_eq!(small.retention.scores_max_count, Some(500));
    }

    #[test]
    fn unknown_keys_and_bad_values_fail_to_parse_with_the_key_named() {
        let err = with("margin = 0.02", "margin = 0.02\nmargn = 3")
            .unwrap_err()
            .to_string();
        assert!(err.contains("margn"), "{err}");
        let err = with("metric = \"auc\"", "metric = \"accuracy\"")
            .unwrap_err()
            .to_string();
        assert!(err.contains("accuracy"), "{err}");
        let err = with("every = \"6h\"", "every = \"soon\"")
            .unwrap_err()
            .to_string();
        assert!(err.contains("soon"), "{err}");
    }

    const SHORT: &str =
        "[label]\nname = \"paid_late\"\n\n[[features]]\nname = \"amount\"\nkind = \"number\"\n";

    #[test]
    fn a_config_of_only_label_and_features_takes_the_starter_files_values() {
        let short = Config::from_toml(SHORT).unwrap();
        let starter = Config::embedded_default();
        let (s, t) = (&short.training, &starter.training);
        assert_eq!(s.window_rows, t.window_rows);
        assert_eq!(s.window_age, t.window_age);
        assert_eq!(s.holdout_fraction, t.holdout_fraction);
        assert_eq!((s.folds, s.repeats), (t.folds, t.repeats));
        assert_eq!(
            (s.selection, s.seed, s.min_rows),
            (t.selection, t.seed, t.min_rows)
        );
        assert_eq!(
            (s.workers, s.nice, s.idle_cpu_only),
            (t.workers, t.nice, t.idle_cpu_only)
        );
        assert_eq!(s.families, t.families);
        let (s, t) = (&short.gate, &starter.gate);
        assert_eq!(
            (s.metric, s.margin, s.min_rows, s.alpha),
            (t.metric, t.margin, t.min_rows, t.alpha)
        );
        assert_eq!(short.server.listen, starter.server.listen);
        assert_eq!(short.drift.window_rows, starter.drift.window_rows);
        assert_eq!(short.shadow.outcomes, starter.shadow.outcomes);
        // Sections that were already optional keep their own defaults: no schedule (runs on
        // request only) and no spread limit.
        assert_eq!(short.schedule.every, None);
        assert_eq!(short.guardrails.max_cv_spread, None);
    }

    #[test]
    fn a_numeric_label_without_a_gate_or_families_gets_rmse_and_linear() {
        let text = SHORT.replace(
            "name = \"paid_late\"",
            "name = \"days_late\"\nkind = \"number\"",
        );
        let config = Config::from_toml(&text).unwrap();
        assert_eq!(config.gate.metric, GateMetric::Rmse);
        assert_eq!(
            config.training.families,
            default_families(LabelKind::Number)
        );
        assert!(matches!(
            config.training.families[0],
            FamilyConfig::Linear(_)
        ));
        // A metric the file names is kept, and still checked against the label.
        let text = format!("{text}\n[gate]\nmetric = \"auc\"\n");
        assert_eq!(key_of(Config::from_toml(&text)), "gate.metric");
    }

    #[test]
    fn a_section_with_some_keys_fills_the_rest_and_validation_still_applies() {
        let config = Config::from_toml(&format!(
            "{SHORT}\n[training]\nfolds = 3\n\n[gate]\nmargin = 0.05\n"
        ))
        .unwrap();
        assert_eq!(config.training.folds, 3);
        assert_eq!(config.training.window_rows, 4800);
        assert_eq!(config.gate.margin, 0.05);
        assert_eq!(config.gate.min_rows, 200);
        // An empty list the file gives is not replaced by the default.
        let empty = format!("{SHORT}\n[training]\nfamilies = []\n");
        assert_eq!(key_of(Config::from_toml(&empty)), "training.families");
        let few = format!("{SHORT}\n[training]\nmin_rows = 5\n");
        assert_eq!(key_of(Config::from_toml(&few)), "training.min_rows");
        // A family named without its grid takes the grid the starter file suggests.
        let tree = format!("{SHORT}\n[[training.families]]\nfamily = \"decision_tree\"\n");
        let config = Config::from_toml(&tree).unwrap();
        assert_eq!(
            config.training.families,
            vec![FamilyConfig::DecisionTree(TreeGrid {
                max_depth: vec![3, 5],
                min_leaf: vec![1]
            })]
        );
    }

    #[test]
    fn a_missing_label_or_feature_names_the_key_and_shows_what_to_add() {
        let rule_of = |text: &str| match Config::from_toml(text) {
            Err(ConfigError::Invalid { key, rule }) => (key, rule),
            other => panic!("expected an invalid-key error, got {other:?}"),
        };
        let (key, rule) = rule_of("[[features]]\nname = \"amount\"\nkind = \"number\"\n");
        assert_eq!(key, "label");
        assert!(
            rule.contains("add a `[label]` table with `name = "),
            "{rule}"
        );
        let (key, rule) = rule_of("[label]\nname = \"paid_late\"\n");
        assert_eq!(key, "features");
        assert!(rule.contains("`[[features]]` with `name = "), "{rule}");
        let (key, rule) = rule_of(&SHORT.replace("name = \"paid_late\"", "kind = \"binary\""));
        assert_eq!(key, "label.name");
        assert!(rule.contains("under `[label]`"), "{rule}");
        let (key, rule) = rule_of(&SHORT.replace("kind = \"number\"", ""));
        assert_eq!(key, "features[0].kind");
        assert!(rule.contains("add `kind = \"number\"`"), "{rule}");
        let (key, rule) = rule_of(&format!(
            "{SHORT}\n[[training.families]]\npenalty = \"l2\"\n"
        ));
        assert_eq!(key, "training.families[0].family");
        assert!(rule.contains("add `family = \"logistic\"`"), "{rule}");
    }
}

/// The loader under generated files: no text makes it panic, and every refusal names a key
/// and a rule (or, for text that is not TOML, the line and column).
#[cfg(test)]
mod properties {
    use super::*;
    use proptest::prelude::*;
    use proptest::test_runner::Config as Cases;

    const CASES: u32 = 512;

    /// A value line of the default file: its line number, and the path of its table
    /// (`training`, `features[2]`, `training.families[0]`).
    fn value_lines() -> Vec<(usize, String)> {
        let mut table = String::new();
        let mut counts: std::collections::HashMap<String, usize> = Default::default();
        let mut out = Vec::new();
        for (n, line) in DEFAULT_CONFIG_TOML.lines().enumerate() {
            let line = line.trim();
            if let Some(name) = line.strip_prefix("[[").and_then(|l| l.strip_suffix("]]")) {
                let seen = counts.entry(name.to_owned()).or_default();
                table = format!("{name}[{seen}]");
                *seen += 1;
            } else if let Some(name) = line.strip_prefix('[').and_then(|l| l.strip_suffix(']')) {
                table = name.to_owned();
            } else if !line.starts_with('#') && line.contains(" = ") {
                out.push((n, table.clone()));
            }
        }
        out
    }

    fn replace_line(n: usize, by: &str) -> String {
        DEFAULT_CONFIG_TOML
            .lines()
            .enumerate()
            .map(|(i, l)| if i == n { by } else { l })
            .collect::<Vec<_>>()
            .join("\n")
    }

    /// Loads `text` and checks the answer's form.
    fn check(text: &str) -> Result<(), TestCaseError> {
        match Config::from_toml(text) {
            Ok(config) => prop_assert!(config.validate().is_ok()),
            Err(ConfigError::Invalid { key, rule }) => {
                prop_assert!(!key.is_empty() && !rule.is_empty(), "`{}`: {}", key, rule);
            }
            Err(ConfigError::Parse(message)) => {
                prop_assert!(message.contains("line"), "{}", message);
            }
            Err(other) => prop_assert!(false, "unexpected {:?}", other),
        }
        Ok(())
    }

    fn tokens() -> impl Strategy<Value = &'static str> {
        prop::sample::select(vec![
            "\"x\"",
            "\"\"",
            "-1",
            "0",
            "1e308",
            "-1e308",
            "nan",
            "inf",
            "-inf",
            "true",
            "[]",
            "[1, \"a\"]",
            "{}",
            "9999999999999999999999",
            "\"1h\"",
            "\"-5s\"",
            "\"NaN\"",
            "\"0.0.0.0:0\"",
            "1979-05-27T07:32:00Z",
            "\"<script>\"",
            "'''",
            "\"\\u0000\"",
        ])
    }

    proptest! {
        #![proptest_config(Cases::with_cases(CASES))]

        #[test]
        fn any_text_is_loaded_or_refused_by_key_or_line(text in "\\PC{0,200}") {
            check(&text)?;
        }

        #[test]
        fn any_value_in_any_key_is_loaded_or_refused_by_key(
            pick in any::<prop::sample::Index>(),
            token in tokens(),
        ) {
            let lines = value_lines();
            let (n, _) = pick.get(&lines);
            let line = DEFAULT_CONFIG_TOML.lines().nth(*n).unwrap();
            let key = line.split(" = ").next().unwrap();
            check(&replace_line(*n, &format!("{key} = {token}")))?;
        }

        #[test]
        fn a_value_of_an_impossible_type_is_refused_under_its_table(
            pick in any::<prop::sample::Index>(),
        ) {
            let lines = value_lines();
            let (n, table) = pick.get(&lines);
            let line = DEFAULT_CONFIG_TOML.lines().nth(*n).unwrap();
            let key = line.trim().split(" = ").next().unwrap();
            // No key of the file takes an inline table.
            match Config::from_toml(&replace_line(*n, &format!("{key} = {{ x = 1 }}"))) {
                Err(ConfigError::Invalid { key: named, rule }) => {
                    prop_assert!(
                        named.starts_with(table.as_str()) || table.starts_with(named.as_str()),
                        "`{}` is not under `{}` ({})", named, table, rule
                    );
                    prop_assert!(!rule.is_empty());
                }
                other => prop_assert!(false, "{}.{}: {:?}", table, key, other),
            }
        }

        #[test]
        fn a_dropped_added_or_cut_line_is_loaded_or_refused_by_key_or_line(
            pick in any::<prop::sample::Index>(),
            edit in 0..3usize,
            extra in "[a-z_]{1,12} = [0-9a-z\"]{1,6}",
        ) {
            let lines: Vec<&str> = DEFAULT_CONFIG_TOML.lines().collect();
            let n = pick.index(lines.len());
            let text = match edit {
                0 => replace_line(n, ""),
                1 => replace_line(n, &format!("{}\n{extra}", lines[n])),
                _ => {
                    let cut = lines[..n].iter().map(|l| l.len() + 1).sum::<usize>();
                    DEFAULT_CONFIG_TOML[..cut].to_owned()
                }
            };
            check(&text)?;
        }
    }

    #[test]
    fn a_wrong_type_names_the_key_path() {
        let text = DEFAULT_CONFIG_TOML.replacen("max_batch = 1000", "max_batch = \"many\"", 1);
        match Config::from_toml(&text) {
            Err(ConfigError::Invalid { key, rule }) => {
                assert_eq!(key, "server.max_batch");
                assert!(rule.contains("invalid type"), "{rule}");
            }
            other => panic!("{other:?}"),
        }
        let text = DEFAULT_CONFIG_TOML.replacen("[server]", "[server]\ncolour = 1", 1);
        match Config::from_toml(&text) {
            Err(ConfigError::Invalid { key, .. }) => assert_eq!(key, "server.colour"),
            other => panic!("{other:?}"),
        }
    }
}
