//! Labeled rows from outside (the `POST /v1/examples` body, a CSV file) into stored examples.
//!
//! One path for both, so a CSV import accepts and refuses exactly what the API does.

use serde_json::{Map, Value as Json};

use crate::schema::{FieldError, RowError, Schema};
use crate::store::StoredExample;
use crate::time::{now_ms, parse_rfc3339, Millis};

/// Event times must not be more than this far in the future (clock skew allowance).
const MAX_FUTURE_MS: Millis = 24 * 3600 * 1000;

/// Validates one labeled row. `id` defaults to a fresh ULID (then the row is never a duplicate).
pub fn example(
    schema: &Schema,
    features: &Map<String, Json>,
    label: f64,
    event_time: &str,
    id: Option<&str>,
) -> Result<StoredExample, RowError> {
    let mut errors = match schema.parse_row(features) {
        Ok(_) => vec![],
        Err(RowError(errors)) => errors
            .into_iter()
            .map(|e| FieldError {
                field: format!("features.{}", e.field),
                rule: e.rule,
            })
            .collect(),
    };
    if let Err(rule) = schema.label_rule().check(label) {
        errors.push(FieldError {
            field: "label".into(),
            rule,
        });
    }
    let time = parse_rfc3339(event_time);
    match time {
        None => errors.push(FieldError {
            field: "event_time".into(),
            rule: "must be an RFC 3339 timestamp such as 2026-03-01T12:00:00Z".into(),
        }),
        Some(t) if t < 0 || t > now_ms() + MAX_FUTURE_MS => errors.push(FieldError {
            field: "event_time".into(),
            rule: "must lie between 1970-01-01 and one day from now".into(),
        }),
        Some(_) => {}
    }
    if let Some(id) = id {
        if id.is_empty() || id.len() > 128 {
            errors.push(FieldError {
                field: "id".into(),
                rule: "must be 1-128 characters".into(),
            });
        }
    }
    if !errors.is_empty() {
        return Err(RowError(errors));
    }
    Ok(StoredExample {
        id: id.map_or_else(|| ulid::Ulid::new().to_string(), str::to_owned),
        event_time: time.unwrap_or_default(),
        label,
        features: features.clone(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use serde_json::json;

    #[test]
    fn every_bad_part_of_a_labeled_row_is_named() {
        let schema = Schema::from_config(&Config::embedded_default());
        let features = json!({"days_to_due": 30}).as_object().cloned().unwrap();
        let errors = example(&schema, &features, 2.0, "3026-01-01T00:00:00Z", Some(""))
            .unwrap_err()
            .0;
        let fields: Vec<&str> = errors.iter().map(|e| e.field.as_str()).collect();
        assert!(fields.contains(&"features.invoice_amount"), "{fields:?}");
        assert!(fields.contains(&"label"));
        assert!(fields.contains(&"event_time"));
        assert!(fields.contains(&"id"));
    }
}
