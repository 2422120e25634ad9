//! `POST /v1/score` and `POST /v1/score/batch`.

use std::sync::Arc;

use axum::extract::{Request, State};
use axum::http::header;
use axum::response::{IntoResponse, Response};
use serde::de::{Deserializer as _, MapAccess, Visitor};
use serde::{Deserialize, Serialize};

use super::json::{self, ApiJson};
use super::problem::Problem;
use super::ApiState;
use crate::model::{Factor, Model};
use crate::registry::{Arm, ScoringModels, ShareRoute};
use crate::schema::LabelKind;
use crate::schema::{FieldError, Row, RowError, Schema, SentFeatures};
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

/// Whether a caller reference breaks [`MAX_REF_LEN`].
fn reference_too_long(reference: Option<&str>) -> bool {
    reference.is_some_and(|r| r.chars().count() > MAX_REF_LEN)
}

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

/// A request, validated.
struct Validated {
    row: Row,
    /// The features as sent, kept for the record when a feature came without a value (see
    /// `Schema::parse_row_text_as_sent`); `None` when every feature came with one, and the
    /// record keeps the row's values (see `store::recorded`).
    text: Option<Box<serde_json::value::RawValue>>,
    reference: Option<String>,
}

/// Validates one request into a row, with field names under `prefix`.
fn validate(schema: &Schema, request: ScoreRequest, prefix: &str) -> Result<Validated, RowError> {
    let ScoreRequest {
        features: text,
        reference,
    } = request;
    let too_long = reference_too_long(reference.as_deref());
    let mut row = schema
        .parse_row_text_as_sent(text.get())
        .map(|(row, every_feature_sent)| Validated {
            row,
            text: (!every_feature_sent).then_some(text),
            reference,
        })
        .map_err(|e| e.prefixed(&format!("{prefix}features.")));
    if too_long {
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
) -> ScoreResponse<'m> {
    let Validated {
        row,
        text,
        reference,
    } = validated;
    let answered = answer_row(service, models, &row, reference.as_deref());
    // What the record keeps of the features, now that the row has been scored.
    let features = match text {
        None => RecordedFeatures::Values {
            values: row,
            layout: Arc::clone(&service.record_layout),
        },
        Some(text) => RecordedFeatures::Text(text),
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

/// The usual score body, `{"features": {…}}` with every feature sent with a value and an
/// optional `ref` within its limit, read in one pass: the `RawValue` step of [`ScoreRequest`]
/// scans the features once to find their end and validation then reads them again. `None`
/// for anything else: the body is then read as a [`ScoreRequest`] and validated, which names
/// every error (so every refusal is worded as before).
fn read_in_one_pass(schema: &Schema, body: &[u8]) -> Option<Validated> {
    struct OnePass<'s>(&'s Schema);
    impl<'de> Visitor<'de> for OnePass<'_> {
        type Value = Option<Validated>;
        fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
            f.write_str("a score request")
        }
        fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Self::Value, A::Error> {
            let mut row = None;
            let mut reference = None;
            let mut reference_seen = false;
            // A key with escapes is not a borrowed `&str`: an error, so the careful path.
            while let Some(key) = map.next_key::<&'de str>()? {
                match key {
                    "features" if row.is_none() => {
                        match map.next_value_seed(SentFeatures(self.0))? {
                            Some((sent, true)) => row = Some(sent),
                            _ => return Ok(None),
                        }
                    }
                    "ref" if !reference_seen => {
                        reference_seen = true;
                        reference = map.next_value::<Option<String>>()?;
                    }
                    _ => return Ok(None),
                }
            }
            if reference_too_long(reference.as_deref()) {
                return Ok(None);
            }
            Ok(row.map(|row| Validated {
                row,
                text: None,
                reference,
            }))
        }
    }
    let mut reader = serde_json::Deserializer::from_slice(body);
    let validated = reader.deserialize_map(OnePass(schema)).ok()??;
    reader.end().ok()?;
    Some(validated)
}

pub(super) async fn score(
    State(service): State<Arc<ApiState>>,
    request: Request,
) -> Result<Response, Problem> {
    score_with(&service, request).await
}

/// [`score`] on borrowed state: the front door calls it for `POST /v1/score` (without the
/// router, and without a clone of the state's `Arc` per request).
pub(super) async fn score_with(service: &ApiState, request: Request) -> Result<Response, Problem> {
    let body = json::read_body(request, service).await?;
    let validated = match read_in_one_pass(&service.schema, &body) {
        Some(validated) => validated,
        None => {
            let request: ScoreRequest = json::parse(&body)?;
            validate(&service.schema, request, "").map_err(Problem::invalid)?
        }
    };
    if service.registry.has_no_active() {
        return Err(Problem::no_active_model());
    }
    service.recorder.reserve(1, RECORD_WAIT).await?;
    let held = service.registry.for_scoring();
    let Some(models) = answerers(&held) else {
        service.recorder.release(1);
        return Err(Problem::no_active_model());
    };
    let response = score_row(service, &models, validated);
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
    for (i, item) in batch.items.into_iter().enumerate() {
        match validate(&service.schema, item, &format!("items[{i}].")) {
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
    let results: Vec<ScoreResponse> = rows
        .into_iter()
        .map(|validated| score_row(&service, &models, validated))
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

#[cfg(test)]
mod tests {
    use proptest::prelude::*;
    use serde_json::{json, Map, Value as Json};

    use super::*;
    use crate::config::Config;
    use crate::schema::FeatureKind;

    fn schema() -> &'static Schema {
        static SCHEMA: std::sync::OnceLock<Schema> = std::sync::OnceLock::new();
        SCHEMA.get_or_init(|| Config::embedded_default().schema())
    }

    /// The body read the careful way: as a [`ScoreRequest`], then validated.
    fn careful(body: &[u8]) -> Option<Validated> {
        let request: ScoreRequest = json::parse(body).ok()?;
        validate(schema(), request, "").ok()
    }

    /// One feature's value as a caller might send it: usually valid, sometimes null, of the
    /// wrong kind, or out of range; `None` leaves it out.
    fn sent_value(feature: &crate::schema::Feature) -> BoxedStrategy<Option<Json>> {
        let (min, max) = (feature.min.unwrap_or(0.0), feature.max.unwrap_or(100.0));
        let valid = match feature.kind {
            FeatureKind::Number => prop_oneof![
                (min..=max).prop_map(Json::from),
                (min.ceil() as i64..=max.floor() as i64).prop_map(Json::from),
            ]
            .boxed(),
            FeatureKind::Category => proptest::sample::select(feature.categories.clone())
                .prop_map(Json::from)
                .boxed(),
        };
        prop_oneof![
            60 => valid.prop_map(Some),
            1 => Just(None),
            1 => Just(Some(Json::Null)),
            1 => Just(Some(json!(true))),
            1 => Just(Some(json!([1]))),
            1 => Just(Some(json!(-1e300))),
            1 => Just(Some(json!("not one of them"))),
        ]
        .boxed()
    }

    /// A score body: the schema's features in a shuffled order, sometimes an unknown feature,
    /// sometimes a `ref` (short, too long, null or not a string), sometimes an unknown member.
    fn body() -> impl Strategy<Value = Vec<u8>> {
        let features: Vec<_> = schema()
            .features()
            .iter()
            .map(|f| {
                let name = f.name.clone();
                sent_value(f).prop_map(move |v| (name.clone(), v))
            })
            .collect();
        let reference = prop_oneof![
            Just(None),
            "[a-z0-9é]{0,12}".prop_map(|r| Some(json!(r))),
            Just(Some(json!("x".repeat(MAX_REF_LEN + 1)))),
            Just(Some(Json::Null)),
            Just(Some(json!(7))),
        ];
        (
            features,
            any::<prop::sample::Index>(),
            prop::bool::weighted(0.1),
            reference,
            prop::bool::weighted(0.1),
            prop::bool::ANY,
        )
            .prop_map(
                |(mut sent, shuffle, unknown, reference, extra, ref_first)| {
                    let k = shuffle.index(sent.len());
                    sent.rotate_left(k);
                    let mut features = Map::new();
                    for (name, value) in sent {
                        if let Some(value) = value {
                            features.insert(name, value);
                        }
                    }
                    if unknown {
                        features.insert("not_declared".into(), json!(1));
                    }
                    let mut members = Vec::new();
                    if let (Some(reference), true) = (&reference, ref_first) {
                        members.push(format!("\"ref\":{reference}"));
                    }
                    members.push(format!("\"features\":{}", Json::Object(features)));
                    if let (Some(reference), false) = (&reference, ref_first) {
                        members.push(format!("\"ref\":{reference}"));
                    }
                    if extra {
                        members.push("\"extra\":1".into());
                    }
                    format!("{{{}}}", members.join(",")).into_bytes()
                },
            )
    }

    proptest! {
        /// The one-pass read takes exactly the bodies the careful read accepts with every
        /// feature sent, and gives the same row and reference (the careful read is the
        /// reference here: it names every error, and the fast path must never accept more).
        #[test]
        fn the_one_pass_read_agrees_with_the_careful_read(body in body()) {
            let fast = read_in_one_pass(schema(), &body);
            let careful = careful(&body).filter(|v| v.text.is_none());
            match (fast, careful) {
                (Some(fast), Some(careful)) => {
                    prop_assert!(fast.row == careful.row);
                    prop_assert_eq!(fast.reference, careful.reference);
                    prop_assert!(fast.text.is_none());
                }
                (None, None) => {}
                (fast, careful) => prop_assert!(
                    false,
                    "one pass {} but careful {} for {}",
                    fast.is_some(),
                    careful.is_some(),
                    String::from_utf8_lossy(&body)
                ),
            }
        }
    }

    #[test]
    fn a_body_with_a_feature_left_out_is_read_the_careful_way_and_its_record_keeps_the_text() {
        let mut body = json!({"features": {
            "invoice_amount": 12500.0, "days_to_due": 30, "debtor_years_trading": 4,
            "prior_late_invoices": 1, "credit_utilisation": 0.4,
            "debtor_sector": "retail", "submission_channel": "edi"
        }, "ref": "inv-7"});
        let full = serde_json::to_vec(&body).unwrap();
        let read = read_in_one_pass(schema(), &full).expect("every feature sent");
        assert_eq!(read.reference.as_deref(), Some("inv-7"));
        // `debtor_years_trading` has `missing = "median"` in the embedded config.
        body["features"]
            .as_object_mut()
            .unwrap()
            .remove("debtor_years_trading");
        let partial = serde_json::to_vec(&body).unwrap();
        assert!(read_in_one_pass(schema(), &partial).is_none());
        let text = careful(&partial)
            .and_then(|v| v.text)
            .expect("accepted, with the text kept for the record");
        assert!(text.get().contains("invoice_amount"));
        assert!(!text.get().contains("debtor_years_trading"));
    }
}
