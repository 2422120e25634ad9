//! `POST /v1/score` and `POST /v1/score/batch`.

use std::sync::Arc;

use axum::extract::State;
use axum::http::header;
use axum::response::{IntoResponse, Response};
use serde::{Deserialize, Serialize};

use super::json::ApiJson;
use super::problem::Problem;
use super::ApiState;
use crate::model::{Factor, Model};
use crate::schema::LabelKind;
use crate::schema::{FieldError, Row, RowError};
use crate::store::{ScoreRecord, ShadowScore};

/// Room for one score's answer (ids, output, five factors), so the body is written without
/// growing its buffer.
const RESPONSE_BYTES: usize = 512;

/// How long a score waits for room in the record buffer before it is refused (503): a score
/// is never answered without its record.
const RECORD_WAIT: std::time::Duration = std::time::Duration::from_secs(1);

/// Longest caller reference kept with a score.
const MAX_REF_LEN: usize = 200;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct ScoreRequest {
    /// Kept as JSON text: validated straight into column order, recorded as sent.
    features: Box<serde_json::value::RawValue>,
    #[serde(rename = "ref", default)]
    reference: Option<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct BatchRequest {
    items: Vec<ScoreRequest>,
}

#[derive(Serialize)]
struct ScoreResponse<'a> {
    score_id: String,
    model_id: &'a str,
    /// Binary labels: the probability of 1.
    #[serde(skip_serializing_if = "Option::is_none")]
    probability: Option<f64>,
    /// Numeric labels: the predicted value.
    #[serde(skip_serializing_if = "Option::is_none")]
    prediction: Option<f64>,
    factors: Vec<Factor<'a>>,
}

fn json_response<T: Serialize>(value: &T, capacity: usize) -> Response {
    let mut body = Vec::with_capacity(capacity);
    match serde_json::to_writer(&mut body, value) {
        Ok(()) => ([(header::CONTENT_TYPE, "application/json")], body).into_response(),
        Err(e) => Problem::internal(e).into_response(),
    }
}

/// Validates one request into a row, with field names under `prefix`.
fn validate(service: &ApiState, request: &ScoreRequest, prefix: &str) -> Result<Row, RowError> {
    let mut row = service
        .schema
        .parse_row_text(request.features.get())
        .map_err(|e| e.prefixed(&format!("{prefix}features.")));
    if request
        .reference
        .as_ref()
        .is_some_and(|r| r.chars().count() > MAX_REF_LEN)
    {
        let error = FieldError {
            field: format!("{prefix}ref"),
            rule: format!("at most {MAX_REF_LEN} characters"),
        };
        match &mut row {
            Ok(_) => row = Err(RowError(vec![error])),
            Err(RowError(errors)) => errors.push(error),
        }
    }
    row
}

/// Scores one validated row and queues its record; a shadowing candidate scores it too, into
/// the record only.
fn score_row<'m>(
    service: &ApiState,
    model: &'m Model,
    shadow: Option<&Model>,
    row: &Row,
    request: ScoreRequest,
) -> ScoreResponse<'m> {
    let scored = model.score(row);
    // The recorder assigns the id and time, in the order records are written.
    let score_id = service.recorder.push(ScoreRecord {
        score_id: String::new(),
        at: 0,
        model_id: model.id.clone(),
        reference: request.reference,
        features: request.features,
        output: scored.output,
        shadow: shadow.map(|candidate| ShadowScore {
            model_id: candidate.id.clone(),
            output: candidate.predict(row),
        }),
    });
    ScoreResponse {
        score_id,
        model_id: &model.id,
        probability: (model.target == LabelKind::Binary).then_some(scored.output),
        prediction: (model.target == LabelKind::Number).then_some(scored.output),
        factors: scored.factors,
    }
}

pub(super) async fn score(
    State(service): State<Arc<ApiState>>,
    ApiJson(request): ApiJson<ScoreRequest>,
) -> Result<Response, Problem> {
    let row = validate(&service, &request, "").map_err(Problem::invalid)?;
    let model = service
        .registry
        .active()
        .ok_or_else(Problem::no_active_model)?;
    service.recorder.reserve(1, RECORD_WAIT).await?;
    let shadow = service.registry.shadow();
    service.telemetry.observe_scores(&model.id, 1);
    Ok(json_response(
        &score_row(&service, &model, shadow.as_deref(), &row, request),
        RESPONSE_BYTES,
    ))
}

pub(super) async fn score_batch(
    State(service): State<Arc<ApiState>>,
    ApiJson(batch): ApiJson<BatchRequest>,
) -> Result<Response, Problem> {
    let max = service.config.server.max_batch;
    if batch.items.len() > max {
        return Err(Problem::invalid_field(
            "items",
            format!(
                "at most {max} items (server.max_batch), got {}",
                batch.items.len()
            ),
        ));
    }
    let mut rows = Vec::with_capacity(batch.items.len());
    let mut errors = Vec::new();
    for (i, item) in batch.items.iter().enumerate() {
        match validate(&service, item, &format!("items[{i}].")) {
            Ok(row) => rows.push(row),
            Err(RowError(e)) => errors.extend(e),
        }
    }
    if !errors.is_empty() {
        return Err(Problem::invalid(RowError(errors)));
    }
    let model = service
        .registry
        .active()
        .ok_or_else(Problem::no_active_model)?;
    service.recorder.reserve(rows.len(), RECORD_WAIT).await?;
    let shadow = service.registry.shadow();
    service
        .telemetry
        .observe_scores(&model.id, rows.len() as u64);
    #[derive(Serialize)]
    struct BatchResponse<'a> {
        results: Vec<ScoreResponse<'a>>,
    }
    let results = batch
        .items
        .into_iter()
        .zip(&rows)
        .map(|(item, row)| score_row(&service, &model, shadow.as_deref(), row, item))
        .collect();
    Ok(json_response(
        &BatchResponse { results },
        RESPONSE_BYTES * rows.len(),
    ))
}
