//! The declared features, and the validation of one request's features into a dense [`Row`].
//!
//! This is the only place that decides whether an input is acceptable. Every refusal names
//! the field and the rule it broke, so the API can answer 422 with something a caller can fix.
//! The row it produces is in the schema's column order; models and the store work from that.

use std::borrow::Cow;
use std::cell::Cell;
use std::collections::HashMap;

use serde::de::{DeserializeSeed, Deserializer, MapAccess, Visitor};

use serde_json::{Map, Value as Json};

use serde::Deserialize;

/// One feature's value inside a [`Row`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Value {
    Number(f64),
    /// Index into the feature's declared categories.
    Category(u32),
    /// Absent, to be imputed by the model (only under `missing = "median"`).
    Missing,
}

/// A request's features, validated, in schema order.
///
/// Each value is one 8-byte word, not the 16 bytes a [`Value`] takes, in a boxed slice (no
/// spare capacity): a window of examples holds one row per example, so this halves the memory
/// of every training run. A number is its
/// own `f64` bits (a validated number is always finite); a category and the missing marker are
/// quiet NaNs with payloads no arithmetic produces.
#[derive(Clone)]
pub struct Row(Box<[u64]>);

/// The top 16 bits of a packed category (a quiet NaN with payload bit 48 set); its index is in
/// the low 32 bits.
const CATEGORY_TAG: u64 = 0x7FF9_0000_0000_0000;
/// The packed missing marker (a quiet NaN with payload bit 49 set).
const MISSING_WORD: u64 = 0x7FFA_0000_0000_0000;
const TAG_MASK: u64 = 0xFFFF_0000_0000_0000;

impl Value {
    fn pack(self) -> u64 {
        match self {
            // Never NaN after validation; a NaN from elsewhere becomes the canonical one, so
            // it cannot read back as a category.
            Value::Number(v) if v.is_nan() => f64::NAN.to_bits(),
            Value::Number(v) => v.to_bits(),
            Value::Category(c) => CATEGORY_TAG | u64::from(c),
            Value::Missing => MISSING_WORD,
        }
    }

    fn unpack(word: u64) -> Value {
        match word & TAG_MASK {
            CATEGORY_TAG => Value::Category(word as u32),
            _ if word == MISSING_WORD => Value::Missing,
            _ => Value::Number(f64::from_bits(word)),
        }
    }
}

impl Row {
    /// The number of values (the schema's feature count).
    pub fn len(&self) -> usize {
        self.0.len()
    }

    pub fn is_empty(&self) -> bool {
        self.0.is_empty()
    }

    /// The `index`th feature's value, if there is one.
    pub fn get(&self, index: usize) -> Option<Value> {
        self.0.get(index).copied().map(Value::unpack)
    }

    /// The values in schema order.
    pub fn values(&self) -> impl ExactSizeIterator<Item = Value> + '_ {
        self.0.iter().map(|&w| Value::unpack(w))
    }
}

impl FromIterator<Value> for Row {
    fn from_iter<I: IntoIterator<Item = Value>>(values: I) -> Row {
        Row(values.into_iter().map(Value::pack).collect())
    }
}

impl From<Vec<Value>> for Row {
    fn from(values: Vec<Value>) -> Row {
        values.into_iter().collect()
    }
}

impl PartialEq for Row {
    /// Value by value, as [`Value`] compares (so `0.0 == -0.0`).
    fn eq(&self, other: &Row) -> bool {
        self.len() == other.len() && self.values().eq(other.values())
    }
}

impl std::fmt::Debug for Row {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_list().entries(self.values()).finish()
    }
}

/// One field that broke one rule.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct FieldError {
    pub field: String,
    pub rule: String,
}

/// Every field error found in one set of features (never empty). A field is a declared
/// feature's name or a name the caller sent; the empty field stands for the features object
/// as a whole (when it is not an object), which [`RowError::prefixed`] turns into its path.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{}", .0.iter().map(|e| format!("`{}`: {}", e.field, e.rule)).collect::<Vec<_>>().join("; "))]
pub struct RowError(pub Vec<FieldError>);

impl RowError {
    /// Prefixes every field with `prefix` (for example `items[3].features.`). An empty field
    /// is the prefixed value as a whole, so it becomes the prefix without its trailing `.`.
    pub fn prefixed(mut self, prefix: &str) -> RowError {
        for error in &mut self.0 {
            error.field = if error.field.is_empty() {
                prefix.trim_end_matches('.').to_owned()
            } else {
                format!("{prefix}{}", error.field)
            };
        }
        self
    }
}

/// A declared feature.
#[derive(Debug, Clone, PartialEq)]
pub struct Feature {
    pub name: String,
    pub kind: FeatureKind,
    pub min: Option<f64>,
    pub max: Option<f64>,
    pub categories: Vec<String>,
    pub missing: MissingRule,
}

/// The declared features and the label's name.
#[derive(Debug, Clone)]
pub struct Schema {
    features: Vec<Feature>,
    index: HashMap<String, usize>,
    label: String,
    label_rule: LabelRule,
    /// Attributes an example may carry beside its features, stored and never scored on
    /// (`monitoring.attributes`).
    monitoring: Vec<String>,
}

/// A key borrowed from the body when it has no escapes (serde's own `Cow<str>` always copies,
/// which cost one allocation per feature per request).
struct BorrowedKey;

impl<'de> DeserializeSeed<'de> for BorrowedKey {
    type Value = Cow<'de, str>;
    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<Cow<'de, str>, D::Error> {
        d.deserialize_str(self)
    }
}

impl<'de> Visitor<'de> for BorrowedKey {
    type Value = Cow<'de, str>;
    fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
        f.write_str("a feature name")
    }
    fn visit_borrowed_str<E>(self, v: &'de str) -> Result<Cow<'de, str>, E> {
        Ok(Cow::Borrowed(v))
    }
    fn visit_str<E>(self, v: &str) -> Result<Cow<'de, str>, E> {
        Ok(Cow::Owned(v.to_owned()))
    }
}

/// Reads a features object as it streams past, for a body parsed in one pass: each value is
/// checked against its feature's rules as it is read, with no raw-text step per value. `None`
/// when anything is off (an array or object value, a number f64 cannot hold, an unknown or
/// repeated name, a value its feature refuses); the caller then takes the careful path
/// ([`Schema::parse_row_text_as_sent`]), which names every error. Otherwise the row, and
/// whether every feature was sent with a value (none absent, none `null`).
pub struct SentFeatures<'s>(pub &'s Schema);

impl<'de> DeserializeSeed<'de> for SentFeatures<'_> {
    type Value = Option<(Row, bool)>;
    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<Self::Value, D::Error> {
        let schema = self.0;
        let null_sent = Cell::new(false);
        let Some(mut slots) = d.deserialize_map(SentSlots {
            schema,
            null_sent: &null_sent,
        })?
        else {
            return Ok(None);
        };
        let mut every_feature_sent = !null_sent.get();
        for (feature, slot) in schema.features.iter().zip(&mut slots) {
            if slot.is_none() {
                every_feature_sent = false;
                match feature.when_missing() {
                    Ok(value) => *slot = Some(value),
                    Err(_) => return Ok(None),
                }
            }
        }
        // Every slot is filled (the `Missing` is never used).
        let row = slots
            .into_iter()
            .map(|slot| slot.unwrap_or(Value::Missing))
            .collect();
        Ok(Some((row, every_feature_sent)))
    }
}

/// The values of [`SentFeatures`] by schema position.
struct SentSlots<'s> {
    schema: &'s Schema,
    /// Set when a feature was sent as `null`.
    null_sent: &'s Cell<bool>,
}

impl<'de> Visitor<'de> for SentSlots<'_> {
    type Value = Option<Vec<Option<Value>>>;
    fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
        f.write_str("a JSON object of named features")
    }
    fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Self::Value, A::Error> {
        let features = &self.schema.features;
        let mut slots: Vec<Option<Value>> = vec![None; features.len()];
        // Callers mostly send the features in schema order, so the next one is tried
        // before the name index (one string comparison instead of a hash).
        let mut next = 0;
        while let Some(name) = map.next_key_seed(BorrowedKey)? {
            let j = match features.get(next) {
                Some(feature) if feature.name == name.as_ref() => next,
                _ => match self.schema.index.get(name.as_ref()) {
                    Some(&j) => j,
                    None => return Ok(None),
                },
            };
            if slots[j].is_some() {
                return Ok(None);
            }
            match map.next_value_seed(Scalar(&features[j], self.null_sent))? {
                Some(value) => slots[j] = Some(value),
                None => return Ok(None),
            }
            next = j + 1;
        }
        Ok(Some(slots))
    }
}

/// One feature's value, checked against its rules as it is read: `None` when the feature
/// refuses it (the careful path then says why); an array or object is an error.
struct Scalar<'f>(&'f Feature, &'f Cell<bool>);

impl<'de> DeserializeSeed<'de> for Scalar<'_> {
    type Value = Option<Value>;
    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<Option<Value>, D::Error> {
        d.deserialize_any(self)
    }
}

impl<'de> Visitor<'de> for Scalar<'_> {
    type Value = Option<Value>;
    fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
        f.write_str("a number, string, bool or null")
    }
    fn visit_bool<E>(self, _: bool) -> Result<Option<Value>, E> {
        Ok(None)
    }
    // Every number becomes the nearest f64, as the careful path's `str::parse` makes it
    // (serde_json parses correctly rounded with `float_roundtrip`; `as` rounds to nearest).
    fn visit_i64<E: serde::de::Error>(self, v: i64) -> Result<Option<Value>, E> {
        self.visit_f64(v as f64)
    }
    fn visit_u64<E: serde::de::Error>(self, v: u64) -> Result<Option<Value>, E> {
        self.visit_f64(v as f64)
    }
    fn visit_f64<E: serde::de::Error>(self, v: f64) -> Result<Option<Value>, E> {
        Ok(match self.0.kind {
            FeatureKind::Number => self.0.number(v).ok(),
            FeatureKind::Category => None,
        })
    }
    fn visit_str<E>(self, v: &str) -> Result<Option<Value>, E> {
        Ok(match self.0.kind {
            FeatureKind::Category => self.0.category(v).ok(),
            FeatureKind::Number => None,
        })
    }
    fn visit_unit<E>(self) -> Result<Option<Value>, E> {
        self.1.set(true);
        Ok(self.0.when_missing().ok())
    }
}

/// What an outcome is.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum LabelKind {
    /// 0 or 1; models predict the probability of 1.
    #[default]
    Binary,
    /// A finite number; models predict its expected value.
    Number,
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

/// What an outcome label may be.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct LabelRule {
    pub kind: LabelKind,
    pub min: Option<f64>,
    pub max: Option<f64>,
}

impl LabelRule {
    /// Checks one label; the error is the rule it broke.
    pub fn check(&self, label: f64) -> Result<(), String> {
        match self.kind {
            LabelKind::Binary if label == 0.0 || label == 1.0 => Ok(()),
            LabelKind::Binary => Err(format!("must be 0 or 1, got {label}")),
            LabelKind::Number => {
                if !label.is_finite() {
                    return Err("must be a finite number".into());
                }
                if let Some(min) = self.min.filter(|&min| label < min) {
                    return Err(format!("must be at least {min} (label.min), got {label}"));
                }
                if let Some(max) = self.max.filter(|&max| label > max) {
                    return Err(format!("must be at most {max} (label.max), got {label}"));
                }
                Ok(())
            }
        }
    }
}

impl Schema {
    /// The same schema with `rule` for its labels.
    pub fn with_label_rule(mut self, rule: LabelRule) -> Schema {
        self.label_rule = rule;
        self
    }

    pub fn new(features: Vec<Feature>, label: String) -> Schema {
        let index = features
            .iter()
            .enumerate()
            .map(|(i, f)| (f.name.clone(), i))
            .collect();
        Schema {
            features,
            index,
            label,
            label_rule: LabelRule::default(),
            monitoring: Vec::new(),
        }
    }

    /// The same schema accepting these monitoring attributes on examples.
    pub fn with_monitoring(mut self, attributes: Vec<String>) -> Schema {
        self.monitoring = attributes;
        self
    }

    /// The monitoring attributes an example may carry.
    pub fn monitoring(&self) -> &[String] {
        &self.monitoring
    }

    /// What an outcome label may be.
    pub fn label_rule(&self) -> LabelRule {
        self.label_rule
    }

    pub fn features(&self) -> &[Feature] {
        &self.features
    }

    pub fn label(&self) -> &str {
        &self.label
    }

    pub fn feature_names(&self) -> Vec<String> {
        self.features.iter().map(|f| f.name.clone()).collect()
    }

    /// Validates named JSON features into a row; collects every field error.
    pub fn parse_row(&self, features: &Map<String, Json>) -> Result<Row, RowError> {
        let errors = features
            .keys()
            .filter(|name| !self.index.contains_key(*name))
            .map(|name| FieldError {
                field: field_name(name),
                rule: "unknown feature; not declared in the schema".into(),
            })
            .collect();
        self.finish_row(self.features.iter().map(|f| features.get(&f.name)), errors)
    }

    /// Validates each declared feature's value (in schema order; `None` when absent) and
    /// returns the row, or every error: those already found and the features' own.
    fn finish_row<'j>(
        &self,
        values: impl Iterator<Item = Option<&'j Json>>,
        mut errors: Vec<FieldError>,
    ) -> Result<Row, RowError> {
        let mut row = Vec::with_capacity(self.features.len());
        for (feature, json) in self.features.iter().zip(values) {
            match feature.parse(json) {
                Ok(value) => row.push(value),
                Err(rule) => {
                    errors.push(FieldError {
                        field: feature.name.clone(),
                        rule,
                    });
                    row.push(Value::Missing);
                }
            }
        }
        if errors.is_empty() {
            Ok(Row::from(row))
        } else {
            Err(RowError(errors))
        }
    }

    /// Validates the JSON text of a features object into a row without building a map: keys
    /// are matched to schema positions as they stream past (borrowed when they need no
    /// unescaping), and every field error is collected as in [`Schema::parse_row`]. A name given
    /// twice is an error here (a map would silently keep the last).
    pub fn parse_row_text(&self, text: &str) -> Result<Row, RowError> {
        self.parse_row_text_as_sent(text).map(|(row, _)| row)
    }

    /// [`Schema::parse_row_text`], and whether every feature was sent with a value (none
    /// absent, none `null`): then the row holds exactly what was sent, not an imputed default.
    pub fn parse_row_text_as_sent(&self, text: &str) -> Result<(Row, bool), RowError> {
        if let Some(parsed) = self.parse_row_fast(text) {
            return Ok(parsed);
        }

        struct Slots<'s> {
            schema: &'s Schema,
        }
        type Collected = (Vec<Option<Json>>, Vec<FieldError>);

        impl<'de> Visitor<'de> for Slots<'_> {
            type Value = Collected;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str("a JSON object of named features")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Collected, A::Error> {
                let mut slots: Vec<Option<Json>> = vec![None; self.schema.features.len()];
                let mut errors = Vec::new();
                while let Some(name) = map.next_key_seed(BorrowedKey)? {
                    // Taken raw first, so a value JSON allows but f64 cannot hold (1e999)
                    // becomes this field's error, not a failure of the whole body.
                    let raw: &'de serde_json::value::RawValue = map.next_value()?;
                    let text = raw.get();
                    // Numbers, the common case, are read straight from their text (the JSON
                    // grammar is a subset of Rust's float syntax; both round correctly).
                    let parsed = match text.as_bytes().first() {
                        Some(b'-' | b'0'..=b'9') => text
                            .parse::<f64>()
                            .ok()
                            .and_then(serde_json::Number::from_f64)
                            .map(Json::Number)
                            .ok_or("must be a finite number within f64 range"),
                        // The raw value was read without a depth limit; building it is not.
                        _ => serde_json::from_str(text).map_err(|_| {
                            "must be a number or a string, not an array or object nested \
                             this deeply"
                        }),
                    };
                    let value: Json = match parsed {
                        Ok(value) => value,
                        Err(rule) => {
                            errors.push(FieldError {
                                field: field_name(&name),
                                rule: rule.into(),
                            });
                            continue;
                        }
                    };
                    match self.schema.index.get(name.as_ref()) {
                        Some(&j) if slots[j].is_some() => errors.push(FieldError {
                            field: field_name(&name),
                            rule: "given twice; send each feature once".into(),
                        }),
                        Some(&j) => slots[j] = Some(value),
                        None => errors.push(FieldError {
                            field: field_name(&name),
                            rule: "unknown feature; not declared in the schema".into(),
                        }),
                    }
                }
                Ok((slots, errors))
            }
        }
        impl<'de> DeserializeSeed<'de> for Slots<'_> {
            type Value = Collected;
            fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<Collected, D::Error> {
                d.deserialize_map(self)
            }
        }

        let mut reader = serde_json::Deserializer::from_str(text);
        let (slots, errors) = Slots { schema: self }
            .deserialize(&mut reader)
            .map_err(|_| {
                RowError(vec![FieldError {
                    field: String::new(),
                    rule: "`features` must be a JSON object of named features".into(),
                }])
            })?;
        // The careful path is taken for the unusual body; its row is not called as sent.
        self.finish_row(slots.iter().map(Option::as_ref), errors)
            .map(|row| (row, false))
    }

    /// [`Schema::parse_row_text`]'s common case in one pass (see [`SentFeatures`]).
    fn parse_row_fast(&self, text: &str) -> Option<(Row, bool)> {
        let mut reader = serde_json::Deserializer::from_str(text);
        let parsed = SentFeatures(self).deserialize(&mut reader).ok()??;
        reader.end().ok()?;
        Some(parsed)
    }

    /// The named-JSON form of a row, as callers sent it (missing values as `null`).
    pub fn row_to_json(&self, row: &Row) -> Map<String, Json> {
        self.features
            .iter()
            .zip(row.values())
            .map(|(feature, value)| (feature.name.clone(), feature.to_json(&value)))
            .collect()
    }
}

/// A name the caller sent, as an error's field: never empty (an empty name is shown as `""`)
/// and never long.
fn field_name(name: &str) -> String {
    if name.is_empty() {
        "\"\"".to_owned()
    } else {
        shorten(name)
    }
}

/// Long unknown names are cut so an error body cannot be made huge by the caller.
fn shorten(name: &str) -> String {
    crate::text::clip(name, crate::text::ECHO_CHARS)
}

impl Feature {
    fn parse(&self, json: Option<&Json>) -> Result<Value, String> {
        match json {
            None | Some(Json::Null) => self.when_missing(),
            Some(json) => match self.kind {
                FeatureKind::Number => self.parse_number(json),
                FeatureKind::Category => self.parse_category(json),
            },
        }
    }

    /// The value of an absent or null feature, or the rule that refuses it.
    pub(crate) fn when_missing(&self) -> Result<Value, String> {
        match &self.missing {
            MissingRule::Reject => Err("required (missing = \"reject\")".into()),
            MissingRule::Median => Ok(Value::Missing),
            MissingRule::Number(v) => Ok(Value::Number(*v)),
            MissingRule::Category(c) => Ok(Value::Category(self.category_index(c).unwrap_or(0))),
        }
    }

    fn parse_number(&self, json: &Json) -> Result<Value, String> {
        let Some(number) = json.as_f64() else {
            return Err(format!("must be a JSON number, got {}", json_kind(json)));
        };
        self.number(number)
    }

    /// A number for this feature (finite, within `min`/`max`), or the rule it breaks.
    pub(crate) fn number(&self, number: f64) -> Result<Value, String> {
        if !number.is_finite() {
            return Err("must be a finite number".into());
        }
        if let Some(min) = self.min {
            if number < min {
                return Err(format!("must be >= {min} (min), got {number}"));
            }
        }
        if let Some(max) = self.max {
            if number > max {
                return Err(format!("must be <= {max} (max), got {number}"));
            }
        }
        Ok(Value::Number(number))
    }

    fn parse_category(&self, json: &Json) -> Result<Value, String> {
        let Some(text) = json.as_str() else {
            return Err(format!(
                "must be a JSON string (a category), got {}",
                json_kind(json)
            ));
        };
        self.category(text)
    }

    /// A category name for this feature, or the rule it breaks.
    pub(crate) fn category(&self, text: &str) -> Result<Value, String> {
        match self.category_index(text) {
            Some(i) => Ok(Value::Category(i)),
            None => Err(format!(
                "unknown category `{}`; allowed: {}",
                shorten(text),
                self.categories.join(", ")
            )),
        }
    }

    fn category_index(&self, text: &str) -> Option<u32> {
        self.categories
            .iter()
            .position(|c| c == text)
            .map(|i| i as u32)
    }

    fn to_json(&self, value: &Value) -> Json {
        match value {
            Value::Number(v) => serde_json::Number::from_f64(*v).map_or(Json::Null, Json::Number),
            Value::Category(i) => self
                .categories
                .get(*i as usize)
                .map_or(Json::Null, |c| Json::String(c.clone())),
            Value::Missing => Json::Null,
        }
    }
}

fn json_kind(json: &Json) -> &'static str {
    match json {
        Json::Null => "null",
        Json::Bool(_) => "a boolean",
        Json::Number(_) => "a number",
        Json::String(_) => "a string",
        Json::Array(_) => "an array",
        Json::Object(_) => "an object",
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use serde_json::json;

    fn schema() -> Schema {
        Config::embedded_default().schema()
    }

    fn features(value: Json) -> Map<String, Json> {
        value.as_object().cloned().unwrap()
    }

    fn valid() -> Json {
        json!({
            "invoice_amount": 12500.0, "days_to_due": 30, "debtor_years_trading": 4,
            "prior_late_invoices": 1, "credit_utilisation": 0.4,
            "debtor_sector": "retail", "submission_channel": "edi"
        })
    }

    fn rule_for(result: Result<Row, RowError>, field: &str) -> String {
        let errors = result.unwrap_err().0;
        errors
            .iter()
            .find(|e| e.field == field)
            .unwrap_or_else(|| panic!("no error for {field}: {errors:?}"))
            .rule
            .clone()
    }

    #[test]
    fn a_row_keeps_each_value_in_one_word_and_gives_it_back_unchanged() {
        let values = vec![
            Value::Number(0.0),
            Value::Number(-0.0),
            Value::Number(f64::MAX),
            Value::Number(-f64::MAX),
            Value::Number(f64::MIN_POSITIVE),
            Value::Number(5e-324), // the smallest subnormal
            Value::Number(f64::INFINITY),
            Value::Category(0),
            Value::Category(7),
            Value::Category(u32::MAX),
            Value::Missing,
        ];
        let row = Row::from(values.clone());
        assert_eq!(row.0.len(), values.len(), "one word per value");
        assert_eq!(row.values().collect::<Vec<_>>(), values);
        for (j, &value) in values.iter().enumerate() {
            assert_eq!(row.get(j), Some(value));
        }
        assert_eq!(row.get(values.len()), None);
        // The sign of zero survives the word (the row compares values, so check the bits).
        assert!(matches!(row.get(1), Some(Value::Number(z)) if z.is_sign_negative()));
        // A NaN from arithmetic stays a number: it can never read back as a category.
        let nan = Row::from(vec![Value::Number(f64::NAN), Value::Number(-f64::NAN)]);
        assert!(nan
            .values()
            .all(|v| matches!(v, Value::Number(x) if x.is_nan())));
    }

    #[test]
    fn streaming_validation_agrees_with_the_map_validation_and_refuses_repeated_names() {
        let schema = crate::config::Config::embedded_default().schema();
        let good = r#"{"invoice_amount": 1200.5, "days_to_due": 30, "debtor_years_trading": null,
            "prior_late_invoices": 2, "credit_utilisation": 0.4, "debtor_sector": "retail"}"#;
        let bad = r#"{"invoice_amount": -5, "days_to_due": "soon", "debtor_sector": "mining",
            "colour": "red", "credit_utilisation": 9}"#;
        for text in [good, bad] {
            let map: Map<String, Json> = serde_json::from_str(text).unwrap();
            assert_eq!(
                schema.parse_row_text(text),
                schema.parse_row(&map),
                "{text}"
            );
        }
        let twice = r#"{"invoice_amount": 1, "invoice_amount": 2, "days_to_due": 30,
            "prior_late_invoices": 0, "credit_utilisation": 0.1, "debtor_sector": "retail"}"#;
        let RowError(errors) = schema.parse_row_text(twice).unwrap_err();
        assert_eq!(errors[0].field, "invoice_amount");
        assert!(errors[0].rule.contains("twice"));
        assert!(schema.parse_row_text("[1, 2]").is_err());
    }

    #[test]
    fn a_valid_request_becomes_a_row_in_schema_order() {
        let row = schema().parse_row(&features(valid())).unwrap();
        assert_eq!(row.get(0).unwrap(), Value::Number(12500.0));
        assert_eq!(row.get(5).unwrap(), Value::Category(1));
        assert_eq!(row.get(6).unwrap(), Value::Category(2));
    }

    #[test]
    fn missing_values_follow_each_features_rule() {
        let mut f = features(valid());
        f.remove("debtor_years_trading");
        f.remove("prior_late_invoices");
        f.insert("submission_channel".into(), Json::Null);
        let row = schema().parse_row(&f).unwrap();
        assert_eq!(
            row.get(2).unwrap(),
            Value::Missing,
            "median rule leaves it to the model"
        );
        assert_eq!(
            row.get(3).unwrap(),
            Value::Number(0.0),
            "constant rule fills it"
        );
        assert_eq!(
            row.get(6).unwrap(),
            Value::Category(0),
            "constant category fills it"
        );
        f.remove("invoice_amount");
        assert!(rule_for(schema().parse_row(&f), "invoice_amount").contains("required"));
    }

    #[test]
    fn each_broken_rule_is_named_with_its_field() {
        let s = schema();
        let mut f = features(valid());
        f.insert("colour".into(), json!("red"));
        assert!(rule_for(s.parse_row(&f), "colour").contains("unknown feature"));

        let mut f = features(valid());
        f.insert("days_to_due".into(), json!("30"));
        assert!(rule_for(s.parse_row(&f), "days_to_due").contains("must be a JSON number"));

        let mut f = features(valid());
        f.insert("days_to_due".into(), json!(400));
        assert!(rule_for(s.parse_row(&f), "days_to_due").contains("<= 365"));

        let mut f = features(valid());
        f.insert("invoice_amount".into(), json!(-1));
        assert!(rule_for(s.parse_row(&f), "invoice_amount").contains(">= 0"));

        let mut f = features(valid());
        f.insert("debtor_sector".into(), json!("mining"));
        assert!(rule_for(s.parse_row(&f), "debtor_sector").contains("unknown category"));

        let mut f = features(valid());
        f.insert("debtor_sector".into(), json!(3));
        assert!(rule_for(s.parse_row(&f), "debtor_sector").contains("must be a JSON string"));
    }

    #[test]
    fn all_errors_are_reported_together() {
        let f = features(json!({"days_to_due": true}));
        let errors = schema().parse_row(&f).unwrap_err().0;
        // invoice_amount, days_to_due (type), credit_utilisation, debtor_sector are required.
        assert_eq!(errors.len(), 4, "{errors:?}");
    }

    #[test]
    fn rows_round_trip_through_named_json() {
        let s = schema();
        let row = s.parse_row(&features(valid())).unwrap();
        assert_eq!(s.parse_row(&s.row_to_json(&row)).unwrap(), row);
    }
}

/// Properties over generated input: any text is answered (a row or field errors, never a
/// panic), rows built from the schema's own rules parse to exactly the row they describe, and
/// one broken rule is always reported under the field that broke it.
#[cfg(test)]
mod properties {
    use super::*;
    use crate::config::Config;
    use proptest::prelude::*;
    use proptest::test_runner::Config as Cases;

    /// Cases per property: enough to cover every feature and mutation many times over, few
    /// enough that the module runs in well under a second.
    const CASES: u32 = 1000;

    /// The embedded schema, built once (loading the config dominates a case's time).
    fn schema() -> &'static Schema {
        static SCHEMA: std::sync::OnceLock<Schema> = std::sync::OnceLock::new();
        SCHEMA.get_or_init(|| Config::embedded_default().schema())
    }

    /// One declared feature's value as sent (`None`: left out) and the row value it must give.
    fn valid_value(feature: &Feature) -> BoxedStrategy<(Option<Json>, Value)> {
        let present: BoxedStrategy<(Option<Json>, Value)> = match feature.kind {
            FeatureKind::Number => {
                let (min, max) = (feature.min.unwrap_or(-1e12), feature.max.unwrap_or(1e12));
                prop_oneof![
                    (min..=max).prop_map(|v| (Some(Json::from(v)), Value::Number(v))),
                    ((min.ceil() as i64)..=(max.floor() as i64))
                        .prop_map(|v| (Some(Json::from(v)), Value::Number(v as f64))),
                ]
                .boxed()
            }
            FeatureKind::Category => {
                let categories = feature.categories.clone();
                (0..categories.len())
                    .prop_map(move |i| {
                        (
                            Some(Json::String(categories[i].clone())),
                            Value::Category(i as u32),
                        )
                    })
                    .boxed()
            }
        };
        let absent = match &feature.missing {
            MissingRule::Reject => return present,
            MissingRule::Median => Value::Missing,
            MissingRule::Number(v) => Value::Number(*v),
            MissingRule::Category(c) => Value::Category(feature.category_index(c).unwrap()),
        };
        prop_oneof![
            3 => present,
            1 => Just((None, absent)),
            1 => Just((Some(Json::Null), absent)),
        ]
        .boxed()
    }

    /// A valid features object (in a shuffled key order) and the row it must parse to.
    fn valid_features() -> impl Strategy<Value = (Vec<(String, Json)>, Row)> {
        let schema = schema();
        let values: Vec<_> = schema.features().iter().map(valid_value).collect();
        let names = schema.feature_names();
        values
            .prop_map(move |values| {
                let mut sent = Vec::new();
                let mut row = Vec::new();
                for (name, (json, value)) in names.iter().zip(values) {
                    if let Some(json) = json {
                        sent.push((name.clone(), json));
                    }
                    row.push(value);
                }
                (sent, Row::from(row))
            })
            .prop_flat_map(|(sent, row)| (Just(sent).prop_shuffle(), Just(row)))
    }

    /// The JSON text of an object with these members, in this order (repeats kept).
    fn object_text(members: &[(String, Json)]) -> String {
        let inner: Vec<String> = members
            .iter()
            .map(|(k, v)| format!("{}:{}", Json::String(k.clone()), v))
            .collect();
        format!("{{{}}}", inner.join(","))
    }

    /// Arbitrary JSON values, nested a few levels, with the awkward numbers and strings.
    fn any_json() -> impl Strategy<Value = Json> {
        let leaf = prop_oneof![
            Just(Json::Null),
            any::<bool>().prop_map(Json::Bool),
            any::<f64>()
                .prop_map(|v| serde_json::Number::from_f64(v).map_or(Json::Null, Json::Number)),
            any::<i64>().prop_map(Json::from),
            ".{0,12}".prop_map(Json::String),
            Just(Json::String("NaN".into())),
            Just(Json::String("Infinity".into())),
        ];
        leaf.prop_recursive(3, 24, 4, |inner| {
            prop_oneof![
                prop::collection::vec(inner.clone(), 0..4).prop_map(Json::Array),
                prop::collection::vec((".{0,6}", inner), 0..4)
                    .prop_map(|m| Json::Object(m.into_iter().collect())),
            ]
        })
    }

    /// Text built from JSON's pieces and the pieces JSON lacks, in any order.
    fn json_ish_text() -> impl Strategy<Value = String> {
        let pieces = vec![
            "{",
            "}",
            "[",
            "]",
            ",",
            ":",
            "\"",
            "\"invoice_amount\"",
            "\"days_to_due\"",
            "\"debtor_sector\"",
            "\"retail\"",
            "1",
            "-0",
            "1e999",
            "-1e999",
            "NaN",
            "Infinity",
            "-Infinity",
            "null",
            "true",
            "0.5",
            "\\u0000",
            "\\ud800",
            " ",
            "\n",
            "é",
            "\u{10FFFF}",
        ];
        prop::collection::vec(prop::sample::select(pieces), 0..40).prop_map(|p| p.concat())
    }

    /// Every error names a field the caller can find and a rule: a declared feature, a name
    /// the caller sent (`sent_names`, when known), or the object as a whole.
    fn assert_named(schema: &Schema, error: &RowError, sent_names: Option<&[String]>) {
        assert!(!error.0.is_empty());
        for e in &error.0 {
            assert!(!e.rule.is_empty(), "{e:?}");
            let declared = schema.index.contains_key(&e.field);
            let sent = match sent_names {
                Some(names) => names.iter().any(|n| field_name(n) == e.field),
                // Names the caller sent are the rules about names: unknown, repeated, unreadable.
                None => {
                    !e.field.is_empty()
                        && ["unknown feature", "given twice", "must be a"]
                            .iter()
                            .any(|r| e.rule.contains(r))
                }
            };
            let whole = e.field.is_empty() && e.rule.contains("must be a JSON object");
            assert!(declared || sent || whole, "{e:?} names no field");
        }
    }

    /// The member names in a JSON text, when it is an object (for checking error fields).
    fn names_in(text: &str) -> Vec<String> {
        serde_json::from_str::<Map<String, Json>>(text)
            .map(|m| m.keys().cloned().collect())
            .unwrap_or_default()
    }

    proptest! {
        #![proptest_config(Cases::with_cases(CASES))]

        #[test]
        fn any_number_round_trips_through_a_row(bits in any::<u64>(), category in any::<u32>()) {
            let number = f64::from_bits(bits);
            let row = Row::from(vec![Value::Number(number), Value::Category(category)]);
            match row.get(0) {
                Some(Value::Number(x)) if number.is_nan() => prop_assert!(x.is_nan()),
                Some(Value::Number(x)) => prop_assert_eq!(x.to_bits(), bits),
                other => prop_assert!(false, "{number} came back as {other:?}"),
            }
            prop_assert_eq!(row.get(1), Some(Value::Category(category)));
        }

        #[test]
        fn any_text_is_answered_with_a_row_or_named_errors(text in "\\PC{0,64}") {
            let schema = schema();
            if let Err(error) = schema.parse_row_text(&text) {
                // Text that is not an object has one error for the object as a whole.
                let names = names_in(&text);
                assert_named(schema, &error, Some(&names));
            }
        }

        #[test]
        fn json_ish_text_is_answered_with_a_row_or_named_errors(text in json_ish_text()) {
            let schema = schema();
            if let Err(error) = schema.parse_row_text(&text) {
                assert_named(schema, &error, None);
            }
        }

        #[test]
        fn valid_features_parse_to_the_row_they_describe((sent, row) in valid_features()) {
            let schema = schema();
            let text = object_text(&sent);
            prop_assert_eq!(schema.parse_row_text(&text), Ok(row.clone()), "{}", text);
            // In schema order too, the order callers mostly send (the one the fast path
            // tries first).
            let mut in_order = sent.clone();
            in_order.sort_by_key(|(name, _)| schema.feature_names().iter().position(|n| n == name));
            let text = object_text(&in_order);
            prop_assert_eq!(schema.parse_row_text(&text), Ok(row.clone()), "{}", text);
            let map: Map<String, Json> = sent.into_iter().collect();
            prop_assert_eq!(schema.parse_row(&map), Ok(row));
        }

        #[test]
        fn arbitrary_objects_get_the_same_answer_from_both_parsers(
            members in prop::collection::vec(
                (prop_oneof![
                    prop::sample::select(schema().feature_names()),
                    ".{0,8}",
                ], any_json()),
                0..9,
            )
        ) {
            let schema = schema();
            let map: Map<String, Json> = members.iter().cloned().collect();
            // Repeated names are the one thing the map form cannot see; keep the last, as it does.
            let unique: Vec<(String, Json)> = map.clone().into_iter().collect();
            let text = object_text(&unique);
            let streamed = schema.parse_row_text(&text);
            prop_assert_eq!(&streamed, &schema.parse_row(&map), "{}", text);
            if let Err(error) = streamed {
                let names: Vec<String> = map.keys().cloned().collect();
                assert_named(schema, &error, Some(&names));
            }
        }

        #[test]
        fn one_broken_rule_is_reported_under_its_field(
            (sent, _) in valid_features(),
            pick in any::<prop::sample::Index>(),
            mutation in 0..8usize,
        ) {
            let schema = schema();
            let feature = pick.get(schema.features()).clone();
            let mut members: Vec<(String, Json)> =
                sent.into_iter().filter(|(k, _)| *k != feature.name).collect();
            let name = feature.name.clone();
            let (members, field, rule) = match (mutation, feature.kind) {
                (0, FeatureKind::Number) => {
                    let above = feature.max.map_or(f64::MAX, |m| m + 1.0);
                    members.push((name.clone(), Json::from(above)));
                    (members, name, "<=")
                }
                (0, FeatureKind::Category) | (1, FeatureKind::Category) => {
                    members.push((name.clone(), Json::from("not-a-declared-category")));
                    (members, name, "unknown category")
                }
                (1, FeatureKind::Number) => {
                    members.push((name.clone(), Json::from("12")));
                    (members, name, "must be a JSON number")
                }
                (2, kind) => {
                    members.push((name.clone(), Json::Bool(true)));
                    let rule = match kind {
                        FeatureKind::Number => "must be a JSON number",
                        FeatureKind::Category => "must be a JSON string",
                    };
                    (members, name, rule)
                }
                (3, kind) => {
                    members.push((name.clone(), serde_json::json!([1, 2])));
                    let rule = match kind {
                        FeatureKind::Number => "must be a JSON number",
                        FeatureKind::Category => "must be a JSON string",
                    };
                    (members, name, rule)
                }
                (4, _) => {
                    members.push(("colour".into(), Json::from("red")));
                    (members, "colour".to_owned(), "unknown feature")
                }
                (5, _) => {
                    members.push((name.clone(), Json::Null));
                    members.push((name.clone(), Json::Null));
                    (members, name, "given twice")
                }
                (6, _) if feature.missing == MissingRule::Reject => (members, name, "required"),
                (6, _) | (7, _) => {
                    // `null` under `reject`, else a number JSON allows but f64 cannot hold.
                    let text = object_text(&members);
                    let extra = format!("\"{name}\":1e999");
                    let text = if members.is_empty() {
                        format!("{{{extra}}}")
                    } else {
                        format!("{},{extra}}}", &text[..text.len() - 1])
                    };
                    let error = schema.parse_row_text(&text).unwrap_err();
                    prop_assert!(
                        error.0.iter().any(|e| e.field == name && e.rule.contains("finite number")),
                        "{:?}", error
                    );
                    return Ok(());
                }
                _ => unreachable!(),
            };
            let text = object_text(&members);
            let error = schema.parse_row_text(&text).unwrap_err();
            prop_assert!(
                error.0.iter().any(|e| e.field == field && e.rule.contains(rule)),
                "expected `{}`: {} in {:?} for {}", field, rule, error, text
            );
        }
    }

    #[test]
    fn deep_nesting_and_huge_names_are_field_errors_not_failures() {
        let schema = schema();
        let deep = format!(
            "{{\"invoice_amount\": {}{}}}",
            "[".repeat(100_000),
            "]".repeat(100_000)
        );
        let error = schema.parse_row_text(&deep).unwrap_err();
        let rule = &error
            .0
            .iter()
            .find(|e| e.field == "invoice_amount")
            .unwrap()
            .rule;
        assert!(rule.contains("nested"), "{rule}");
        let long = "é".repeat(50_000);
        let error = schema
            .parse_row_text(&format!("{{\"{long}\": 1}}"))
            .unwrap_err();
        let unknown = error
            .0
            .iter()
            .find(|e| e.rule.contains("unknown feature"))
            .unwrap();
        assert!(
            unknown.field.chars().count() <= 81,
            "{}",
            unknown.field.len()
        );
        let error = schema.parse_row_text(r#"{"": 1}"#).unwrap_err();
        assert!(error.0.iter().any(|e| e.field == "\"\""), "{error:?}");
    }
}
