//! The operator's routes: promotion log, models, runs, retrain, rollback, health.

use std::sync::Arc;

use axum::extract::rejection::PathRejection;
use axum::extract::{Path, Query, State};
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::{Extension, Json};
use serde::{Deserialize, Serialize};
use serde_json::json;

use super::blocking;
use super::json::BodyBytes;
use super::problem::Problem;
use super::sign_off::{actor, checked_reason};
use super::{ApiState, Caller};
use crate::metrics::Report;
use crate::model::{Model, Setting, TrainingFacts};
use crate::promotion::{Actor, Trigger};
use crate::time::now_ms;

const MAX_LOG_LIMIT: usize = 1000;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct LogQuery {
    limit: Option<usize>,
    /// A cursor: entries with a `seq` below this one (the previous page's `next_before`).
    before: Option<u64>,
}

pub(super) async fn promotions(
    State(service): State<Arc<ApiState>>,
    query: Result<Query<LogQuery>, axum::extract::rejection::QueryRejection>,
) -> Result<Response, Problem> {
    let Query(query) = query.map_err(|e| {
        let text = e.body_text();
        let field = if text.contains("before") {
            "before"
        } else {
            "limit"
        };
        Problem::invalid_field(field, text)
    })?;
    let limit = query.limit.unwrap_or(50);
    if limit == 0 || limit > MAX_LOG_LIMIT {
        return Err(Problem::invalid_field(
            "limit",
            format!("must be between 1 and {MAX_LOG_LIMIT}"),
        ));
    }
    let store = Arc::clone(&service.store);
    let entries = blocking(move || match query.before {
        // Entries are numbered 1, 2, … with no gaps: a page is a range of seqs.
        Some(before) => (before.saturating_sub(limit as u64).max(1)..before)
            .rev()
            .filter_map(|seq| store.entry(seq).transpose())
            .collect::<Result<Vec<_>, _>>(),
        None => store.entries(limit),
    })
    .await?;
    let next_before = entries.last().map(|e| e.seq).filter(|&seq| seq > 1);
    Ok(Json(json!({ "entries": entries, "next_before": next_before })).into_response())
}

#[derive(Serialize)]
struct ModelSummary<'a> {
    id: &'a str,
    active: bool,
    #[serde(with = "crate::time::rfc3339")]
    created_at: i64,
    setting: &'a Setting,
    trained: &'a TrainingFacts,
    holdout: &'a Option<Report>,
}

pub(super) async fn models(State(service): State<Arc<ApiState>>) -> Result<Response, Problem> {
    let store = Arc::clone(&service.store);
    let models: Vec<Model> = blocking(move || store.models()).await?;
    let active = service.registry.active_id();
    let summaries: Vec<ModelSummary<'_>> = models
        .iter()
        .rev()
        .map(|m| ModelSummary {
            id: &m.id,
            active: active.as_deref() == Some(m.id.as_str()),
            created_at: m.created_at,
            setting: &m.setting,
            trained: &m.trained,
            holdout: &m.holdout,
        })
        .collect();
    let store = Arc::clone(&service.store);
    let freeze = blocking(move || store.freeze()).await?;
    Ok(Json(json!({
        "active": active,
        "frozen": freeze.is_some(),
        "frozen_since": freeze.as_ref().map(|f| crate::time::to_rfc3339(f.since)),
        "frozen_by": freeze.as_ref().and_then(|f| f.by.clone()),
        "frozen_reason": freeze.and_then(|f| f.reason),
        "models": summaries,
    }))
    .into_response())
}

/// Freezes promotions: runs still train and log, but every verdict that would promote (or
/// start a shadow, or wait for sign-off) is `kept` with the reason "frozen"; rollback still
/// works. Survives restarts. Logged with the key's name and the body's optional `reason`.
pub(super) async fn freeze(
    State(service): State<Arc<ApiState>>,
    caller: Option<Extension<Caller>>,
    BodyBytes(body): BodyBytes,
) -> Result<Response, Problem> {
    let actor = actor(caller, &body)?;
    let registry = Arc::clone(&service.registry);
    let state = blocking(move || registry.freeze(actor)).await?;
    tracing::info!(
        key = state.by.as_deref().unwrap_or("-"),
        "promotions frozen"
    );
    Ok(Json(json!({
        "frozen": true,
        "since": crate::time::to_rfc3339(state.since),
        "by": state.by,
        "reason": state.reason,
    }))
    .into_response())
}

pub(super) async fn unfreeze(
    State(service): State<Arc<ApiState>>,
    caller: Option<Extension<Caller>>,
    BodyBytes(body): BodyBytes,
) -> Result<Response, Problem> {
    let actor = actor(caller, &body)?;
    let registry = Arc::clone(&service.registry);
    let entry = blocking(move || registry.unfreeze(actor)).await?;
    tracing::info!("promotions unfrozen");
    Ok(Json(json!({ "frozen": false, "entry": entry })).into_response())
}

/// The `{id}` of a path. axum's own rejection (an id whose percent-decoding is not UTF-8) is
/// plain text; here it is a problem naming the field like every other bad input.
fn path_id(id: Result<Path<String>, PathRejection>) -> Result<String, Problem> {
    id.map(|Path(id)| id)
        .map_err(|_| Problem::invalid_field("id", "must be UTF-8 text once percent-decoded"))
}

pub(super) async fn model(
    State(service): State<Arc<ApiState>>,
    id: Result<Path<String>, PathRejection>,
) -> Result<Response, Problem> {
    let id = path_id(id)?;
    let store = Arc::clone(&service.store);
    let lookup = id.clone();
    let model = blocking(move || store.model(&lookup))
        .await?
        .ok_or_else(|| Problem::not_found(format!("no model with id `{}`", shown(&id))))?;
    let active = service.registry.active_id().as_deref() == Some(model.id.as_str());
    let coefficients = model.coefficients();
    Ok(
        Json(json!({ "active": active, "coefficients": coefficients, "model": model }))
            .into_response(),
    )
}

/// An id from the path as an error shows it: cut, so the caller cannot make the answer huge.
fn shown(id: &str) -> String {
    crate::text::clip(id, crate::text::ECHO_CHARS)
}

pub(super) async fn retrain(
    State(service): State<Arc<ApiState>>,
    caller: Option<Extension<Caller>>,
    BodyBytes(body): BodyBytes,
) -> Result<Response, Problem> {
    let actor = actor(caller, &body)?;
    let retrainer = Arc::clone(&service.retrainer);
    let status = tokio::task::spawn_blocking(move || retrainer.request_by(Trigger::Manual, actor))
        .await
        .map_err(Problem::internal)??;
    let location = format!("/v1/runs/{}", status.run_id);
    Ok((
        StatusCode::ACCEPTED,
        [(header::LOCATION, location)],
        Json(status),
    )
        .into_response())
}

pub(super) async fn run(
    State(service): State<Arc<ApiState>>,
    id: Result<Path<String>, PathRejection>,
) -> Result<Response, Problem> {
    let id = path_id(id)?;
    let store = Arc::clone(&service.store);
    let lookup = id.clone();
    let (status, entry) = blocking(move || {
        let Some(status) = store.run(&lookup)? else {
            return Ok((None, None));
        };
        let entry = match status.entry_seq {
            Some(seq) => store.entry(seq)?,
            None => None,
        };
        Ok((Some(status), entry))
    })
    .await?;
    let status =
        status.ok_or_else(|| Problem::not_found(format!("no run with id `{}`", shown(&id))))?;
    Ok(Json(json!({ "run": status, "entry": entry })).into_response())
}

/// `POST /v1/runs/{id}/reproduce`: re-fits a logged run from this service's store under its
/// running config (`train --reproduce RUN --server URL`), and answers whether the candidate
/// came out bit for bit and, if not, which input differs. It takes a run's CPU, on a blocking
/// thread, hence a write method and the operator role.
pub(super) async fn reproduce(
    State(service): State<Arc<ApiState>>,
    id: Result<Path<String>, PathRejection>,
) -> Result<Response, Problem> {
    let id = path_id(id)?;
    let store = Arc::clone(&service.store);
    let config = Arc::clone(&service.config);
    let result = tokio::task::spawn_blocking(move || {
        crate::reproduce::reproduce(store.as_ref(), &config, &id)
    })
    .await
    .map_err(Problem::internal)??;
    Ok(Json(result).into_response())
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RollbackRequest {
    to: Option<String>,
    reason: Option<String>,
}

pub(super) async fn rollback(
    State(service): State<Arc<ApiState>>,
    caller: Option<Extension<Caller>>,
    BodyBytes(body): BodyBytes,
) -> Result<Response, Problem> {
    let request: RollbackRequest = if body.iter().all(u8::is_ascii_whitespace) {
        RollbackRequest {
            to: None,
            reason: None,
        }
    } else {
        super::json::parse(&body)?
    };
    let actor = Actor {
        key: caller.and_then(|Extension(Caller(name))| name),
        reason: checked_reason(request.reason)?,
    };
    let registry = Arc::clone(&service.registry);
    let entry =
        tokio::task::spawn_blocking(move || registry.rollback(request.to.as_deref(), actor))
            .await
            .map_err(Problem::internal)??;
    Ok(Json(json!({ "entry": entry })).into_response())
}

/// The OpenMetrics text exposition. State gauges (active model, holdout metrics, freeze,
/// shadow progress, pending score records) are read now; the PSI comes from the drift report
/// kept in `ApiState::drift_cache`, recomputed only when it is for another model or older than
/// `drift.check_every`.
pub(super) async fn metrics(State(service): State<Arc<ApiState>>) -> Result<Response, Problem> {
    let active = service.registry.active();
    let for_drift = active.clone();
    let inner = Arc::clone(&service);
    let (drift, frozen, shadow) = blocking(move || {
        let drift = match &for_drift {
            Some(model) => {
                let max_age = inner
                    .config
                    .drift
                    .check_every
                    .unwrap_or(std::time::Duration::from_secs(900));
                let now = now_ms();
                match inner.drift_cache.fresh(&model.id, now, max_age) {
                    Some(kept) => Some(kept),
                    None => crate::monitor::drift_report(
                        inner.store.as_ref(),
                        &inner.schema,
                        &inner.config,
                        model,
                    )?
                    .map(|report| (now, inner.drift_cache.keep(report, now))),
                }
            }
            None => None,
        };
        let frozen = inner.store.freeze()?.is_some();
        let shadow = match inner.store.shadow_state()? {
            Some(state) if state.share.is_some() => {
                let rows = inner.store.shadowed_outcomes(&state.candidate_id)?;
                let arms = crate::store::arm_outcome_counts(&rows);
                Some((state, rows.len() as u64, Some(arms)))
            }
            Some(state) => {
                let outcomes = inner.store.shadowed_count(&state.candidate_id) as u64;
                Some((state, outcomes, None))
            }
            None => None,
        };
        Ok((drift, frozen, shadow))
    })
    .await?;
    let mut state = crate::telemetry::ScrapeState {
        score_records: service.store.score_count(),
        score_records_pending: service.recorder.pending() as u64,
        frozen,
        leader: Some((
            service.retrainer.leadership().replica_id().to_owned(),
            service.retrainer.leadership().leads(),
        )),
        share: shadow.as_ref().and_then(|(state, _, arms)| {
            let terms = state.share.as_ref()?;
            let route = service
                .registry
                .share()
                .filter(|r| r.candidate_id == state.candidate_id);
            let counts = |arm| route.as_ref().map(|r| r.counts(arm)).unwrap_or_default();
            let (c, a) = (
                counts(crate::registry::Arm::Candidate),
                counts(crate::registry::Arm::Active),
            );
            Some(crate::telemetry::ShareProgress {
                candidate: state.candidate_id.clone(),
                fraction: terms.fraction,
                answers: (c.answers, a.answers),
                errors: (c.errors, a.errors),
                outcomes: arms.unwrap_or_default(),
                needed_per_arm: service.config.share.outcomes_per_arm,
            })
        }),
        shadow: shadow.map(|(state, outcomes, _)| crate::telemetry::ShadowProgress {
            candidate: state.candidate_id,
            outcomes,
            needed: service.config.shadow.outcomes,
        }),
        ..Default::default()
    };
    if let Some(model) = &active {
        state.active = Some((model.id.clone(), model.setting.family().to_owned()));
        if let Some(report) = &model.holdout {
            let value = serde_json::to_value(report).unwrap_or_default();
            if let Some(fields) = value.as_object() {
                for (metric, v) in fields {
                    if let (Some(v), false) =
                        (v.as_f64(), metric == "rows" || metric == "positives")
                    {
                        state.holdout.push((metric.clone(), v));
                    }
                }
            }
        }
    }
    if let Some((at, report)) = drift {
        state.psi = report
            .features
            .iter()
            .chain(report.score.iter())
            .map(|d| (d.name.clone(), d.psi))
            .collect();
        state.drift_computed_at = Some(at);
    }
    let text = service.telemetry.render(&state);
    Ok((
        [(header::CONTENT_TYPE, crate::telemetry::CONTENT_TYPE)],
        text,
    )
        .into_response())
}

/// Whether the store takes writes, for readiness: the latest write's result when it is recent
/// and succeeded, else one small durable write on the blocking pool (see
/// `store::watched`). Why the store refuses writes, if it does.
async fn store_writable(service: &ApiState) -> Result<(), String> {
    let watch = &service.writes;
    if watch.needs_proof(crate::time::now_ms(), crate::store::watched::PROOF_MAX_AGE) {
        let store = Arc::clone(&service.store);
        match tokio::task::spawn_blocking(move || store.check_writable()).await {
            Ok(Ok(())) => return Ok(()),
            Ok(Err(e)) => return Err(e.to_string()),
            Err(e) => return Err(e.to_string()),
        }
    }
    match watch.state() {
        state if state.writable => Ok(()),
        state => Err(state
            .cause
            .unwrap_or_else(|| "no write has succeeded yet".into())),
    }
}

/// Liveness: the process answers. It never writes: `store_writable` is how the store's latest
/// write ended (score records, outcomes, examples, log entries, readiness probes), so a probe
/// of this route costs no disk I/O and still shows a disk that refuses writes.
pub(super) async fn healthz(State(service): State<Arc<ApiState>>) -> Response {
    let writes = service.writes.state();
    let leadership = service.retrainer.leadership();
    Json(json!({
        "status": "ok",
        "active_model": service.registry.active_id(),
        "replica_id": leadership.replica_id(),
        "leader": leadership.leads(),
        "leader_id": leadership.leader_id(),
        "runs_in_flight": service.retrainer.in_flight(),
        "store_writable": writes.writable,
        "store_last_write_ok": writes.last_ok.map(crate::time::to_rfc3339),
        "store_write_error": writes.cause,
        "score_records_pending": service.recorder.pending(),
    }))
    .into_response()
}

/// Readiness means "can take traffic": a store that takes writes (outcomes, examples and score
/// records need it). A service with no model yet is ready: it must be reachable to receive its
/// first examples and its first retrain, and scoring answers 503 "no active model" meanwhile.
/// Checked on every call (see [`store_writable`]), so it recovers with the store.
pub(super) async fn readyz(State(service): State<Arc<ApiState>>) -> Result<Response, Problem> {
    if let Err(cause) = store_writable(&service).await {
        return Err(Problem::new(
            StatusCode::SERVICE_UNAVAILABLE,
            "store-unavailable",
            "Store unavailable",
            format!(
                "the store cannot take writes ({cause}); scoring goes on while score records fit in memory, outcomes and examples are refused"
            ),
        )
        .retry_after(5));
    }
    let active = service.registry.active_id();
    let note = active
        .is_none()
        .then_some("no active model: scoring answers 503 until the first run promotes one");
    Ok(Json(json!({ "status": "ready", "active_model": active, "note": note })).into_response())
}
