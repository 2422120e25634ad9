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
use crate::registry::{Arm, ScoringModels, ShareRoute};
use crate::schema::LabelKind;
use crate::schema::{FieldError, Row, RowError};
use crate::store::recorded::RecordedFeatures;
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

/// The answer as JSON: the body and its one header set directly (a `(headers, Vec)` tuple
/// first gave the body `application/octet-stream`, then replaced it: two inserts into the
/// header map per score).
fn json_response<T: Serialize>(value: &T, capacity: usize) -> Response {
    let mut body = Vec::with_capacity(capacity);
    match serde_json::to_writer(&mut body, value) {
        Ok(()) => {
            let mut response = Response::new(axum::body::Body::from(body));
            response.headers_mut().insert(
                header::CONTENT_TYPE,
                header::HeaderValue::from_static("application/json"),
            );
            response
        }
        Err(e) => Problem::internal(e).into_response(),
    }
}

/// A request's features, validated.
struct Validated {
    row: Row,
    /// Every feature came with a value (see `Schema::parse_row_text_as_sent`): the record
    /// keeps the row's values rather than the text (see `store::recorded`).
    every_feature_sent: bool,
}

/// Validates one request into a row, with field names under `prefix`.
fn validate(
    service: &ApiState,
    request: &ScoreRequest,
    prefix: &str,
) -> Result<Validated, RowError> {
    let mut row = service
        .schema
        .parse_row_text_as_sent(request.features.get())
        .map(|(row, every_feature_sent)| Validated {
            row,
            every_feature_sent,
        })
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

/// The models a request may be answered by: the active model, and the shadowing candidate
/// with its traffic share when it holds one.
struct Answerers<'m> {
    active: &'m Model,
    shadow: Option<&'m Model>,
    share: Option<&'m ShareRoute>,
}

/// The answerers from the registry's guards; `None` without an active model.
fn answerers(held: &ScoringModels) -> Option<Answerers<'_>> {
    Some(Answerers {
        active: held.active.as_deref()?,
        shadow: held.shadow.as_deref(),
        share: held.share.as_deref(),
    })
}

/// Whether a model's output is an answer: a finite number, and a probability for binary
/// labels.
fn usable(model: &Model, output: f64) -> bool {
    output.is_finite() && (model.target != LabelKind::Binary || (0.0..=1.0).contains(&output))
}

/// Which model answers a row, its output and factors, and the other model's output for the
/// record.
struct Answered<'m> {
    model: &'m Model,
    scored: crate::model::Scored<'m>,
    other: Option<ShadowScore>,
    candidate_answered: bool,
}

/// Scores one validated row and queues its record. While the shadowing candidate holds a
/// traffic share and the request's sticky key falls in it, the candidate answers and the
/// active model's output rides in the record; otherwise the active model answers and the
/// candidate, if any, scores into the record only (see `registry::share` for the routing and
/// the guardrail). A candidate that fails its answer (a non-finite output or a panic) counts
/// against its arm and the active model answers instead.
fn score_row<'m>(
    service: &ApiState,
    models: &Answerers<'m>,
    validated: Validated,
    request: ScoreRequest,
) -> ScoreResponse<'m> {
    let Validated {
        row,
        every_feature_sent,
    } = validated;
    let ScoreRequest {
        features: text,
        reference,
    } = request;
    let answered = answer_row(service, models, &row, reference.as_deref());
    // What the record keeps of the features, now that the row has been scored.
    let features = if every_feature_sent {
        RecordedFeatures::Values {
            values: row,
            layout: Arc::clone(&service.record_layout),
        }
    } else {
        RecordedFeatures::Text(text)
    };
    answer(service, answered, reference, features)
}

/// The routing of [`score_row`]: which model answers `row`, and what the other one said.
fn answer_row<'m>(
    service: &ApiState,
    models: &Answerers<'m>,
    row: &Row,
    reference: Option<&str>,
) -> Answered<'m> {
    let active = models.active;
    let routed = match (models.share, models.shadow) {
        (Some(share), Some(candidate)) if share.candidate_id == candidate.id => {
            let key = share.key_of(reference, row, &service.schema);
            Some((share, candidate, share.arm_for(key.as_deref())))
        }
        _ => None,
    };
    if let Some((share, candidate, Arm::Candidate)) = routed {
        let scored =
            std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| candidate.score(row)))
                .ok()
                .filter(|scored| usable(candidate, scored.output));
        note(service, share, Arm::Candidate, scored.is_none());
        return match scored {
            Some(scored) => {
                let other = active.predict(row);
                Answered {
                    model: candidate,
                    scored,
                    other: usable(active, other).then(|| ShadowScore {
                        model_id: active.id.clone(),
                        output: other,
                    }),
                    candidate_answered: true,
                }
            }
            // The candidate failed: the active model answers, and no other output is recorded.
            None => Answered {
                model: active,
                scored: active.score(row),
                other: None,
                candidate_answered: false,
            },
        };
    }
    let scored = active.score(row);
    if let Some((share, _, Arm::Active)) = routed {
        note(service, share, Arm::Active, !usable(active, scored.output));
    }
    let other = models.shadow.and_then(|candidate| {
        let output = candidate.predict(row);
        usable(candidate, output).then(|| ShadowScore {
            model_id: candidate.id.clone(),
            output,
        })
    });
    Answered {
        model: active,
        scored,
        other,
        candidate_answered: false,
    }
}

/// Counts one routed request for the guardrail; the first time it trips, the share's end is
/// logged off the response path (the routing to the candidate has already stopped).
fn note(service: &ApiState, share: &ShareRoute, arm: Arm, failed: bool) {
    let Some(trip) = share.note(arm, failed) else {
        return;
    };
    service.telemetry.observe_share_stop();
    let registry = Arc::clone(&service.registry);
    let candidate = share.candidate_id.clone();
    tracing::warn!(candidate = %candidate, evidence = %trip.describe(), "traffic share guardrail tripped");
    tokio::task::spawn_blocking(move || match registry.stop_share(&candidate, &trip) {
        Ok(Some(entry)) => {
            tracing::warn!(run_id = %entry.run_id, reason = %entry.reason, "traffic share stopped")
        }
        Ok(None) => {}
        Err(e) => {
            tracing::error!(error = %e, "the traffic share's stop could not be logged; routing to the candidate stays stopped in this process")
        }
    });
}

/// Queues the record of the answer and builds the response.
fn answer<'m>(
    service: &ApiState,
    answered: Answered<'m>,
    reference: Option<String>,
    features: RecordedFeatures,
) -> ScoreResponse<'m> {
    let Answered {
        model,
        scored,
        other,
        candidate_answered,
    } = answered;
    // The recorder assigns the id and time, in the order records are written.
    let score_id = service.recorder.push(ScoreRecord {
        score_id: String::new(),
        at: 0,
        model_id: model.id.clone(),
        reference,
        features,
        output: scored.output,
        shadow: other,
        candidate_answered,
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
    let validated = validate(&service, &request, "").map_err(Problem::invalid)?;
    if service.registry.has_no_active() {
        return Err(Problem::no_active_model());
    }
    service.recorder.reserve(1, RECORD_WAIT).await?;
    let held = service.registry.for_scoring();
    let Some(models) = answerers(&held) else {
        service.recorder.release(1);
        return Err(Problem::no_active_model());
    };
    let response = score_row(&service, &models, validated, request);
    service.telemetry.observe_scores(response.model_id, 1);
    Ok(json_response(&response, RESPONSE_BYTES))
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
    if service.registry.has_no_active() {
        return Err(Problem::no_active_model());
    }
    service.recorder.reserve(rows.len(), RECORD_WAIT).await?;
    let held = service.registry.for_scoring();
    let Some(models) = answerers(&held) else {
        service.recorder.release(rows.len());
        return Err(Problem::no_active_model());
    };
    let model = models.active;
    let shadow = models.shadow;
    #[derive(Serialize)]
    struct BatchResponse<'a> {
        results: Vec<ScoreResponse<'a>>,
    }
    let count = rows.len();
    let results: Vec<ScoreResponse> = batch
        .items
        .into_iter()
        .zip(rows)
        .map(|(item, validated)| score_row(&service, &models, validated, item))
        .collect();
    let by_active = results.iter().filter(|r| r.model_id == model.id).count();
    if by_active > 0 {
        service
            .telemetry
            .observe_scores(&model.id, by_active as u64);
    }
    if let (Some(candidate), true) = (shadow, by_active < results.len()) {
        service
            .telemetry
            .observe_scores(&candidate.id, (results.len() - by_active) as u64);
    }
    Ok(json_response(
        &BatchResponse { results },
        RESPONSE_BYTES * count,
    ))
}
