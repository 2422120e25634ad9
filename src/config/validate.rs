//! [`Config::validate`]: every rule a running service depends on, each error naming the key
//! and the rule.

use std::collections::HashSet;
use std::time::Duration;

use super::*;
use crate::model::{FamilyGrid, NONLINEAR_FAMILIES};
use crate::schema::{FeatureKind, MissingRule};

impl Config {
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
        if gate.sign_off_expires.is_some_and(|age| age.as_secs() < 1) {
            return Err(invalid(
                "gate.sign_off_expires",
                "must be at least 1s (or \"off\")",
            ));
        }
        if gate.four_eyes {
            if !gate.sign_off {
                return Err(invalid(
                    "gate.four_eyes",
                    "needs gate.sign_off = true (it is a rule about who may sign off)",
                ));
            }
            let operators = self
                .access
                .keys
                .iter()
                .filter(|k| k.role >= crate::access::Role::Operator)
                .count();
            if operators < 2 {
                return Err(invalid(
                    "gate.four_eyes",
                    "needs at least two operator keys in access.keys (one starts a run, another approves it)",
                ));
            }
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
        self.validate_share()?;
        let schedule = &self.schedule;
        if schedule.on_decline && drift.check_every.is_none_or(|d| d < Duration::from_secs(1)) {
            return Err(invalid(
                "drift.check_every",
                "must be at least 1s when schedule.on_decline is set",
            ));
        }
        if !(20..=1_000_000).contains(&schedule.decline_min_rows) {
            return Err(invalid(
                "schedule.decline_min_rows",
                "must be between 20 and 1000000",
            ));
        }
        if schedule.decline_rows < schedule.decline_min_rows || schedule.decline_rows > 1_000_000 {
            return Err(invalid(
                "schedule.decline_rows",
                "must be at least schedule.decline_min_rows and at most 1000000",
            ));
        }
        if !(schedule.decline_alpha > 0.0 && schedule.decline_alpha < 0.5) {
            return Err(invalid(
                "schedule.decline_alpha",
                "must be between 0 and 0.5 (exclusive)",
            ));
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
        self.store.validate()?;
        self.validate_retention()
    }

    /// Retention must leave the drift window whole: drift and outcome coverage read the
    /// newest `drift.window_rows` scores no older than `drift.window_age`.
    fn validate_share(&self) -> Result<(), ConfigError> {
        let share = &self.share;
        if !(share.fraction == 0.0 || (share.fraction > 0.0 && share.fraction <= 0.5)) {
            return Err(invalid(
                "share.fraction",
                "must be 0 (off) or greater than 0 and at most 0.5",
            ));
        }
        let sticky_ok = share.sticky_by == "ref"
            || share
                .sticky_feature()
                .is_some_and(|name| self.features.iter().any(|f| f.name == name));
        if !sticky_ok {
            return Err(invalid(
                "share.sticky_by",
                format!(
                    "must be \"ref\" (the score request's ref) or \"features.NAME\" with NAME a declared feature; got {:?}",
                    crate::text::clip(&share.sticky_by, 80)
                ),
            ));
        }
        if !(2..=10_000_000).contains(&share.outcomes_per_arm) {
            return Err(invalid(
                "share.outcomes_per_arm",
                "must be between 2 and 10000000",
            ));
        }
        if !(share.max_error_excess >= 0.0 && share.max_error_excess < 1.0) {
            return Err(invalid(
                "share.max_error_excess",
                "must be at least 0 and less than 1 (a difference of error rates)",
            ));
        }
        if share.guard_min_answers == 0 {
            return Err(invalid("share.guard_min_answers", "must be at least 1"));
        }
        Ok(())
    }

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
        if t.window_shares.is_empty() || t.window_shares.len() > 16 {
            return Err(invalid(
                "training.window_shares",
                "list between 1 and 16 shares",
            ));
        }
        if !t.window_shares.iter().all(|s| *s > 0.0 && *s <= 1.0) {
            return Err(invalid(
                "training.window_shares",
                "every share must be above 0 and at most 1",
            ));
        }
        if let Some(half_life) = t.half_life {
            if half_life.is_zero() {
                return Err(invalid("training.half_life", "must be longer than 0"));
            }
            if let Some(family) = t
                .families
                .iter()
                .find(|f| !matches!(f, FamilyGrid::Logistic(_) | FamilyGrid::Linear(_)))
            {
                return Err(invalid(
                    "training.half_life",
                    format!(
                        "recency weights apply to the logistic and linear families only; `{}` cannot take them (remove it or half_life)",
                        family.name()
                    ),
                ));
            }
        }
        if !(t.validation_fraction > 0.0 && t.validation_fraction <= 0.5) {
            return Err(invalid(
                "training.validation_fraction",
                "must be above 0 and at most 0.5",
            ));
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
        if !(g.segment_tolerance.is_finite() && g.segment_tolerance >= 0.0) {
            return Err(invalid(
                "guardrails.segment_tolerance",
                "must be a finite number >= 0",
            ));
        }
        if g.segment_min_rows < 2 {
            return Err(invalid("guardrails.segment_min_rows", "must be at least 2"));
        }
        let attributes = &self.monitoring.attributes;
        for (i, name) in attributes.iter().enumerate() {
            let key = format!("monitoring.attributes[{i}]");
            if name.is_empty() || name.chars().count() > 64 {
                return Err(invalid(key, "must be a name of 1 to 64 characters"));
            }
            if self.features.iter().any(|f| &f.name == name) {
                return Err(invalid(
                    key,
                    format!("`{name}` is a declared feature; a monitoring attribute is never a feature (and should not be a close proxy of one)"),
                ));
            }
            if name == &self.label.name || name == "id" || name == "event_time" {
                return Err(invalid(
                    key,
                    format!("`{name}` is the label, `id` or `event_time`"),
                ));
            }
            if attributes[..i].contains(name) {
                return Err(invalid(key, format!("`{name}` is listed twice")));
            }
        }
        if let Some(impact) = &g.adverse_impact {
            let key = "guardrails.adverse_impact";
            if !attributes.contains(&impact.attribute) {
                return Err(invalid(
                    format!("{key}.attribute"),
                    format!("`{}` is not in monitoring.attributes", impact.attribute),
                ));
            }
            match (impact.threshold, impact.approval_rate) {
                (Some(_), Some(_)) | (None, None) => {
                    return Err(invalid(
                        format!("{key}.threshold"),
                        "give exactly one of threshold and approval_rate",
                    ))
                }
                (Some(t), None) if !t.is_finite() => {
                    return Err(invalid(
                        format!("{key}.threshold"),
                        "must be a finite number",
                    ))
                }
                (None, Some(r)) if !(r > 0.0 && r < 1.0) => {
                    return Err(invalid(
                        format!("{key}.approval_rate"),
                        "must be a share strictly between 0 and 1",
                    ))
                }
                _ => {}
            }
            if !(impact.min_ratio > 0.0 && impact.min_ratio <= 1.0) {
                return Err(invalid(format!("{key}.min_ratio"), "must be in (0, 1]"));
            }
            if impact.min_group_rows < 2 {
                return Err(invalid(
                    format!("{key}.min_group_rows"),
                    "must be at least 2",
                ));
            }
        }
        for (i, segment) in g.segments.iter().enumerate() {
            let key = format!("guardrails.segments[{i}]");
            let Some(feature) = self.features.iter().find(|f| f.name == segment.feature) else {
                return Err(invalid(
                    format!("{key}.feature"),
                    format!("`{}` is not a declared feature", segment.feature),
                ));
            };
            match feature.kind {
                FeatureKind::Category if !segment.bands.is_empty() => {
                    return Err(invalid(
                        format!("{key}.bands"),
                        "a category feature is cut by its categories; remove bands",
                    ))
                }
                FeatureKind::Number if segment.bands.is_empty() => {
                    return Err(invalid(
                        format!("{key}.bands"),
                        "a number feature needs cut points, e.g. bands = [5000, 20000]",
                    ))
                }
                _ => {}
            }
            if !segment.bands.iter().all(|b| b.is_finite())
                || !segment.bands.windows(2).all(|w| w[0] < w[1])
            {
                return Err(invalid(
                    format!("{key}.bands"),
                    "cut points must be finite and increasing",
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

    fn validate_family(&self, key: &str, family: &FamilyGrid) -> Result<(), ConfigError> {
        let binary_only = !matches!(family, FamilyGrid::Linear(_));
        let fits_label = match self.label.kind {
            LabelKind::Binary => binary_only,
            LabelKind::Number => !binary_only,
        };
        if !fits_label {
            return Err(invalid(
                format!("{key}.family"),
                match self.label.kind {
                    LabelKind::Binary => format!(
                        "`{}` predicts numbers; binary labels take {}",
                        family.name(),
                        binary_families()
                    ),
                    LabelKind::Number => format!(
                        "`{}` predicts probabilities; numeric labels (label.kind = \"number\") take linear",
                        family.name()
                    ),
                },
            ));
        }
        family
            .check()
            .map_err(|e| invalid(format!("{key}.{}", e.field), e.rule))
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

/// The families binary labels take, for an error message: "logistic, a, b or c".
fn binary_families() -> String {
    let mut names = vec!["logistic"];
    names.extend_from_slice(NONLINEAR_FAMILIES);
    match names.split_last() {
        Some((last, rest)) if !rest.is_empty() => format!("{} or {last}", rest.join(", ")),
        _ => names.join(", "),
    }
}
