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
    pub label: LabelConfig,
    pub features: Vec<FeatureConfig>,
    pub training: TrainingConfig,
    pub gate: GateConfig,
    #[serde(default)]
    pub schedule: ScheduleConfig,
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

impl Default for ServerConfig {
    fn default() -> Self {
        ServerConfig {
            listen: default_listen(),
            data_dir: default_data_dir(),
            max_batch: default_max_batch(),
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LabelConfig {
    pub name: String,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FeatureKind {
    Number,
    Category,
}

/// What happens when a request leaves a feature out (or sends `null`).
#[derive(Debug, Clone, PartialEq)]
pub enum MissingRule {
    /// The request is refused with 422.
    Reject,
    /// The model's training median is used (numbers only).
    Median,
    /// This number is used.
    Number(f64),
    /// This category is used.
    Category(String),
}

impl<'de> Deserialize<'de> for MissingRule {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        #[derive(Deserialize)]
        #[serde(untagged)]
        enum Raw {
            Number(f64),
            Text(String),
        }
        Ok(match Raw::deserialize(deserializer)? {
            Raw::Number(value) => MissingRule::Number(value),
            Raw::Text(text) if text == "reject" => MissingRule::Reject,
            Raw::Text(text) if text == "median" => MissingRule::Median,
            Raw::Text(text) => MissingRule::Category(text),
        })
    }
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
    pub window_rows: usize,
    #[serde(default, deserialize_with = "optional_duration")]
    pub window_age: Option<Duration>,
    pub holdout_fraction: f64,
    pub folds: usize,
    #[serde(default)]
    pub seed: u64,
    pub min_rows: usize,
    #[serde(default = "default_workers")]
    pub workers: usize,
    pub families: Vec<FamilyConfig>,
}

fn default_workers() -> usize {
    1
}

/// One estimator family and the grid it is searched over.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FamilyConfig {
    pub family: FamilyName,
    #[serde(default)]
    pub penalty: Penalty,
    pub lambda: Vec<f64>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FamilyName {
    Logistic,
}

#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Penalty {
    #[default]
    L2,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GateConfig {
    pub metric: GateMetric,
    pub margin: f64,
    pub min_rows: usize,
    /// Largest one-sided p-value that counts as significant; 1 turns the test off.
    #[serde(default = "default_alpha")]
    pub alpha: f64,
}

fn default_alpha() -> f64 {
    0.05
}

/// The metric the gate (and the cross-validated search) compares models on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum GateMetric {
    Auc,
    LogLoss,
    Brier,
}

impl GateMetric {
    /// True when a larger value is better.
    pub fn higher_is_better(self) -> bool {
        matches!(self, GateMetric::Auc)
    }

    pub fn name(self) -> &'static str {
        match self {
            GateMetric::Auc => "auc",
            GateMetric::LogLoss => "log_loss",
            GateMetric::Brier => "brier",
        }
    }
}

#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ScheduleConfig {
    #[serde(default, deserialize_with = "optional_duration")]
    pub every: Option<Duration>,
    pub new_labels: Option<u64>,
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

impl Config {
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
    pub fn from_toml(text: &str) -> Result<Config, ConfigError> {
        let config: Config = toml::from_str(text)
            .map_err(|e| ConfigError::Parse(e.to_string().trim().to_owned()))?;
        config.validate()?;
        Ok(config)
    }

    /// Checks every rule the service relies on; the error names the key and the rule.
    pub fn validate(&self) -> Result<(), ConfigError> {
        if self.server.max_batch == 0 {
            return Err(invalid("server.max_batch", "must be at least 1"));
        }
        check_name("label.name", &self.label.name)?;
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
        if t.families.is_empty() {
            return Err(invalid(
                "training.families",
                "list at least one candidate family",
            ));
        }
        for (i, family) in t.families.iter().enumerate() {
            let key = format!("training.families[{i}].lambda");
            if family.lambda.is_empty() {
                return Err(invalid(key, "list at least one value"));
            }
            if family.lambda.iter().any(|l| !l.is_finite() || *l < 0.0) {
                return Err(invalid(key, "every value must be a finite number >= 0"));
            }
        }
        Ok(())
    }
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
            key_of(with("margin = 0.01", "margin = -0.5")),
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
            key_of(with("lambda = [0.0001, 0.003, 0.1]", "lambda = []")),
            "training.families[0].lambda"
        );
    }

    #[test]
    fn unknown_keys_and_bad_values_fail_to_parse_with_the_key_named() {
        let err = with("margin = 0.01", "margin = 0.01\nmargn = 3")
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
}
