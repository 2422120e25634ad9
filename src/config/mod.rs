//! The TOML configuration: its typed shape, its defaults and its validation.
//!
//! Parsing (serde + toml) only checks shapes; [`Config::validate`] then checks every rule a
//! running service depends on and names the offending key, so a bad file fails at start-up
//! with a message a person can act on, never later in a request or a run.

mod sections;
mod store;
mod validate;

pub use sections::*;
pub use store::*;

use std::path::{Path, PathBuf};

use serde::Deserialize;

use crate::metrics::GateMetric;
use crate::schema::{Feature, LabelKind, LabelRule, Schema};

/// The commented starter configuration, also the embedded default.
pub const DEFAULT_CONFIG_TOML: &str = include_str!("../../config/understudy.toml");

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
            static HINT: std::sync::LazyLock<String> = std::sync::LazyLock::new(|| {
                format!(
                    "add `family = \"logistic\"` (or linear, {}) to that `[[training.families]]` table",
                    crate::model::NONLINEAR_FAMILIES.join(", ")
                )
            });
            HINT.as_str()
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
    pub monitoring: MonitoringConfig,
    #[serde(default)]
    pub shadow: ShadowConfig,
    #[serde(default)]
    pub share: ShareConfig,
    #[serde(default)]
    pub drift: DriftConfig,
    #[serde(default)]
    pub schedule: ScheduleConfig,
    #[serde(default)]
    pub retention: RetentionConfig,
    /// SHA-256 (hex) of the file as loaded, normalized: its TOML parsed and written back as
    /// JSON with sorted keys, so comments, layout and key order do not change it; `[access]`
    /// and `[store]` left out. Every run records it.
    #[serde(skip)]
    pub digest: String,
    /// Optional: without it, sled in `server.data_dir`.
    #[serde(default)]
    pub store: StoreConfig,
}

/// The normalized digest of a config text (see [`Config::digest`]); empty if it does not parse.
/// `[access]` and `[store]` are left out: they can hold keys and a database password (a digest
/// would let a guess be checked), and they do not change what a run learns.
fn normalized_digest(text: &str) -> String {
    use sha2::{Digest, Sha256};
    let Ok(mut value) = toml::from_str::<toml::Value>(text) else {
        return String::new();
    };
    if let Some(table) = value.as_table_mut() {
        table.remove("access");
        table.remove("store");
    }
    // serde_json's map keeps keys sorted (no `preserve_order` feature): a canonical form.
    let Ok(json) = serde_json::to_value(&value).and_then(|v| serde_json::to_vec(&v)) else {
        return String::new();
    };
    Sha256::digest(&json)
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect()
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
        .with_monitoring(self.monitoring.attributes.clone())
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
        config.digest = normalized_digest(text);
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
}

#[cfg(test)]
mod tests {
    use std::time::Duration;

    use super::*;
    use crate::model::family::TreeGrid;
    use crate::model::FamilyGrid;
    use crate::schema::MissingRule;

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
    fn the_adverse_impact_screen_needs_a_declared_monitoring_attribute_that_is_no_feature() {
        let text = DEFAULT_CONFIG_TOML.replacen(
            "[guardrails]\n",
            "[monitoring]\nattributes = [\"owner_age_band\"]\n\n[guardrails]\n",
            1,
        );
        let screened = |table: &str| {
            Config::from_toml(&format!("{text}\n[guardrails.adverse_impact]\n{table}\n"))
        };
        let config =
            screened("attribute = \"owner_age_band\"\nfavourable = \"below\"\napproval_rate = 0.7")
                .unwrap();
        let impact = config.guardrails.adverse_impact.clone().unwrap();
        assert_eq!((impact.min_ratio, impact.min_group_rows), (0.8, 30));
        assert_eq!(impact.on_flag, OnFlag::Reject);
        assert_eq!(config.schema().monitoring(), ["owner_age_band"]);
        for (table, key) in [
            (
                "attribute = \"age\"\nfavourable = \"below\"\nthreshold = 0.3",
                "guardrails.adverse_impact.attribute",
            ),
            (
                "attribute = \"owner_age_band\"\nfavourable = \"below\"",
                "guardrails.adverse_impact.threshold",
            ),
            (
                "attribute = \"owner_age_band\"\nfavourable = \"below\"\nthreshold = 0.3\napproval_rate = 0.5",
                "guardrails.adverse_impact.threshold",
            ),
            (
                "attribute = \"owner_age_band\"\nfavourable = \"above\"\napproval_rate = 1.0",
                "guardrails.adverse_impact.approval_rate",
            ),
            (
                "attribute = \"owner_age_band\"\nfavourable = \"above\"\nthreshold = 0.5\nmin_ratio = 1.5",
                "guardrails.adverse_impact.min_ratio",
            ),
        ] {
            assert_eq!(key_of(screened(table)), key, "{table}");
        }
        // A feature is never a monitoring attribute.
        let as_feature = DEFAULT_CONFIG_TOML.replacen(
            "[guardrails]\n",
            "[monitoring]\nattributes = [\"debtor_sector\"]\n\n[guardrails]\n",
            1,
        );
        assert_eq!(
            key_of(Config::from_toml(&as_feature)),
            "monitoring.attributes[0]"
        );
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
    fn the_traffic_share_is_off_by_default_and_its_keys_are_checked_by_name() {
        let starter = Config::embedded_default();
        assert!(!starter.share.on(), "no share unless configured");
        let on = with("fraction = 0.0", "fraction = 0.2").unwrap();
        assert!(on.share.on());
        assert_eq!(on.share.sticky_by, "ref");
        let by_feature = with(
            "fraction = 0.0\nsticky_by = \"ref\"",
            "fraction = 0.5\nsticky_by = \"features.debtor_sector\"",
        )
        .unwrap();
        assert_eq!(by_feature.share.sticky_feature(), Some("debtor_sector"));
        for (replace, by, key) in [
            ("fraction = 0.0", "fraction = 0.6", "share.fraction"),
            ("fraction = 0.0", "fraction = -0.1", "share.fraction"),
            (
                "sticky_by = \"ref\"",
                "sticky_by = \"customer\"",
                "share.sticky_by",
            ),
            (
                "sticky_by = \"ref\"",
                "sticky_by = \"features.no_such_feature\"",
                "share.sticky_by",
            ),
            (
                "outcomes_per_arm = 200",
                "outcomes_per_arm = 1",
                "share.outcomes_per_arm",
            ),
            (
                "max_error_excess = 0.01",
                "max_error_excess = 1.0",
                "share.max_error_excess",
            ),
            (
                "guard_min_answers = 50",
                "guard_min_answers = 0",
                "share.guard_min_answers",
            ),
        ] {
            assert_eq!(key_of(with(replace, by)), key, "{by}");
        }
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
        assert!(matches!(config.training.families[0], FamilyGrid::Linear(_)));
        // A metric the file names is kept, and still checked against the label.
        let text = format!("{text}\n[gate]\nmetric = \"auc\"\n");
        assert_eq!(key_of(Config::from_toml(&text)), "gate.metric");
    }

    #[test]
    fn the_config_digest_ignores_layout_and_sees_values() {
        let base = Config::from_toml(SHORT).unwrap();
        assert_eq!(base.digest.len(), 64);
        // Comments and blank lines do not change it; a value does.
        let commented = Config::from_toml(&format!("# a note\n\n{SHORT}\n# end\n")).unwrap();
        assert_eq!(commented.digest, base.digest);
        let changed = Config::from_toml(&format!("{SHORT}\n[training]\nfolds = 4\n")).unwrap();
        assert_ne!(changed.digest, base.digest);
    }

    #[test]
    fn window_search_and_recency_keys_are_checked_by_name() {
        let shares = format!("{SHORT}\n[training]\nwindow_shares = [1.0, 0.0]\n");
        assert_eq!(key_of(Config::from_toml(&shares)), "training.window_shares");
        let fraction = format!("{SHORT}\n[training]\nvalidation_fraction = 0.9\n");
        assert_eq!(
            key_of(Config::from_toml(&fraction)),
            "training.validation_fraction"
        );
        let config = Config::from_toml(&format!(
            "{SHORT}\n[training]\nwindow_shares = [1.0, 0.5]\nhalf_life = \"30d\"\n"
        ))
        .unwrap();
        assert_eq!(config.training.window_shares, vec![1.0, 0.5]);
        assert_eq!(
            config.training.half_life,
            Some(Duration::from_secs(30 * 24 * 3600))
        );
        // A family that cannot take weights is named in the refusal.
        let tree = format!(
            "{SHORT}\n[training]\nhalf_life = \"30d\"\n\n[[training.families]]\nfamily = \"decision_tree\"\n"
        );
        match Config::from_toml(&tree) {
            Err(ConfigError::Invalid { key, rule }) => {
                assert_eq!(key, "training.half_life");
                assert!(rule.contains("decision_tree"), "{rule}");
            }
            other => panic!("expected a refusal, got {other:?}"),
        }
        let decline = format!("{SHORT}\n[schedule]\non_decline = true\ndecline_alpha = 0.7\n");
        assert_eq!(
            key_of(Config::from_toml(&decline)),
            "schedule.decline_alpha"
        );
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
            vec![FamilyGrid::DecisionTree(TreeGrid {
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
