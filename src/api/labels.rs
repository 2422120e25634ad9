//! `POST /v1/outcomes` and `POST /v1/examples`: labels in, durable before the 2xx.

use std::sync::Arc;

use axum::extract::State;
use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::de::Error as _;
use serde::{Deserialize, Deserializer};
use serde_json::json;
use serde_json::value::RawValue;

use super::blocking;
use super::json::ApiJson;
use super::problem::Problem;
use super::ApiState;
use crate::ingest;
use crate::schema::RowError;
use crate::store::{NewOutcome, OutcomeAck};
use crate::time::now_ms;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct OutcomeRequest {
    score_id: String,
    #[serde(deserialize_with = "label_number")]
    label: f64,
    /// Monitoring attributes (`monitoring.attributes`), stored on the example the outcome
    /// makes: known when the outcome is, never features.
    #[serde(default)]
    monitoring: crate::ingest::Monitoring,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct ExampleRequest {
    /// Kept as JSON text for the streaming parser, which refuses a name given twice (a map
    /// would keep the last silently) and a number beyond f64 as that feature's error.
    features: Box<RawValue>,
    #[serde(deserialize_with = "label_number")]
    label: f64,
    event_time: String,
    #[serde(default)]
    id: Option<String>,
    /// Monitoring attributes (`monitoring.attributes`): stored, never features.
    #[serde(default)]
    monitoring: crate::ingest::Monitoring,
}

/// A label is a JSON number: `"1"`, `true` and `null` are refused by name, and a number
/// beyond f64 (`1e999`) is refused as such rather than as malformed JSON.
fn label_number<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
    let raw = Box::<RawValue>::deserialize(d)?;
    let text = raw.get();
    if let Some(b'-' | b'0'..=b'9') = text.as_bytes().first() {
        return text
            .parse::<f64>()
            .ok()
            .filter(|v| v.is_finite())
            .ok_or_else(|| D::Error::custom("must be a finite number within f64 range"));
    }
    let kind = match text.as_bytes().first() {
        Some(b'"') => "a string",
        Some(b't' | b'f') => "a boolean",
        Some(b'n') => "null",
        Some(b'[') => "an array",
        _ => "an object",
    };
    Err(D::Error::custom(format!(
        "must be a JSON number, got {kind}"
    )))
}

pub(super) async fn outcome(
    State(service): State<Arc<ApiState>>,
    ApiJson(request): ApiJson<OutcomeRequest>,
) -> Result<Response, Problem> {
    if let Err(rule) = service.schema.label_rule().check(request.label) {
        return Err(Problem::invalid_field("label", rule));
    }
    if request.score_id.is_empty() || request.score_id.len() > 64 {
        return Err(Problem::invalid_field(
            "score_id",
            "must be 1-64 characters",
        ));
    }
    let OutcomeRequest {
        score_id,
        label,
        monitoring,
    } = request;
    let monitoring =
        ingest::outcome_monitoring(&service.schema, monitoring).map_err(Problem::invalid)?;
    let ack = service
        .outcomes
        .write(NewOutcome {
            score_id: score_id.clone(),
            label,
            at: now_ms(),
            monitoring,
        })
        .await?;
    let duplicate = ack == OutcomeAck::Duplicate;
    if !duplicate {
        // Score ids are ULIDs: their first 48 bits are the score's time in milliseconds.
        let lag = ulid::Ulid::from_string(&score_id)
            .ok()
            .map(|id| (now_ms() - id.timestamp_ms() as i64) as f64 / 1000.0);
        service.telemetry.observe_outcome(lag);
        service.retrainer.note_labels(1);
        if service.registry.shadow().is_some() {
            service.retrainer.note_shadow_outcome();
        }
    }
    let status = if duplicate {
        StatusCode::OK
    } else {
        StatusCode::CREATED
    };
    Ok((
        status,
        Json(json!({"score_id": score_id, "label": label, "duplicate": duplicate})),
    )
        .into_response())
}

pub(super) async fn examples(
    State(service): State<Arc<ApiState>>,
    ApiJson(rows): ApiJson<Vec<ExampleRequest>>,
) -> Result<Response, Problem> {
    let max = service.config.server.max_batch;
    if rows.is_empty() || rows.len() > max {
        return Err(Problem::invalid_field(
            super::json::BODY,
            format!(
                "send 1 to {max} examples (server.max_batch), got {}",
                rows.len()
            ),
        ));
    }
    let mut examples = Vec::with_capacity(rows.len());
    let mut errors = Vec::new();
    for (i, row) in rows.iter().enumerate() {
        match ingest::example_from_text(
            &service.schema,
            row.features.get(),
            row.label,
            &row.event_time,
            row.id.as_deref(),
            row.monitoring.clone(),
        ) {
            Ok(example) => examples.push(example),
            Err(e) => errors.extend(e.prefixed(&format!("[{i}].")).0),
        }
    }
    if !errors.is_empty() {
        return Err(Problem::invalid(RowError(errors)));
    }
    let store = Arc::clone(&service.store);
    let ack = blocking(move || store.put_examples(&examples)).await?;
    service.retrainer.note_labels(ack.inserted as u64);
    Ok((StatusCode::OK, Json(ack)).into_response())
}
