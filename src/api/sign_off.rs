//! Sign-off over HTTP: the candidate waiting for a person (with the evidence of the run that
//! proposed it), and an operator's approval or refusal of it with a reason.
//!
//! The handlers only read the caller's key name (set by the front door) and the reason; the
//! registry applies the rules (expiry, four eyes, a changed active model, the freeze) and
//! writes the decision. Also home of the small body every operator action takes
//! (`{"reason": …}`), so freeze, unfreeze, retrain and rollback read it the same way.

use std::sync::Arc;

use axum::extract::rejection::PathRejection;
use axum::extract::{Path, State};
use axum::response::{IntoResponse, Response};
use axum::{Extension, Json};
use serde::Deserialize;
use serde_json::json;

use super::blocking;
use super::json::BodyBytes;
use super::problem::Problem;
use super::{ApiState, Caller};
use crate::promotion::Actor;
use crate::time::to_rfc3339;

/// The longest reason kept, in characters: a sentence or two for the log, not a document.
pub(super) const MAX_REASON_CHARS: usize = 500;

/// An operator action's body: an optional reason (required for a sign-off).
#[derive(Deserialize, Default)]
#[serde(deny_unknown_fields)]
pub(super) struct ActionRequest {
    reason: Option<String>,
}

/// Checks a reason: not blank, at most [`MAX_REASON_CHARS`] characters; `None` stays `None`.
pub(super) fn checked_reason(reason: Option<String>) -> Result<Option<String>, Problem> {
    let Some(reason) = reason else {
        return Ok(None);
    };
    let trimmed = reason.trim();
    if trimmed.is_empty() {
        return Err(Problem::invalid_field(
            "reason",
            "must not be blank (leave it out instead)",
        ));
    }
    // Counted before trimming, as the OpenAPI schema's maxLength counts.
    if reason.chars().count() > MAX_REASON_CHARS {
        return Err(Problem::invalid_field(
            "reason",
            format!("must be at most {MAX_REASON_CHARS} characters"),
        ));
    }
    Ok(Some(trimmed.to_owned()))
}

/// The acting key's name (from the front door) and the body's reason; no body is no reason
/// (a body of blanks is not JSON, and refused like any other).
pub(super) fn actor(caller: Option<Extension<Caller>>, body: &[u8]) -> Result<Actor, Problem> {
    let request: ActionRequest = if body.is_empty() {
        ActionRequest::default()
    } else {
        super::json::parse(body)?
    };
    Ok(Actor {
        key: caller.and_then(|Extension(Caller(name))| name),
        reason: checked_reason(request.reason)?,
    })
}

/// The candidate waiting for sign-off with its run's log entry (the evidence), whether it can
/// still be approved, and the commands that decide it; `{"waiting": null}` when none waits.
pub(super) async fn waiting(State(service): State<Arc<ApiState>>) -> Result<Response, Problem> {
    let store = Arc::clone(&service.store);
    let (wait, entry, frozen) = blocking(move || {
        let Some(wait) = store.pending_sign_off()? else {
            return Ok((None, None, None));
        };
        let entry = store.entry(wait.entry_seq)?;
        Ok((Some(wait), entry, store.freeze()?))
    })
    .await?;
    let Some(wait) = wait else {
        return Ok(Json(json!({ "waiting": null })).into_response());
    };
    let gate = &service.config.gate;
    let active = service.registry.active_id();
    let stale = active != wait.active_id;
    let blocked_by = if stale {
        Some(format!(
            "the active model changed since the run (judged against {}, now {})",
            wait.active_id.as_deref().unwrap_or("no model"),
            active.as_deref().unwrap_or("no model")
        ))
    } else {
        frozen.map(|f| format!("promotions are frozen since {}", to_rfc3339(f.since)))
    };
    let run = &wait.run_id;
    Ok(Json(json!({
        "waiting": {
            "run_id": wait.run_id,
            "candidate_id": wait.candidate_id,
            "against": wait.active_id,
            "entry_seq": wait.entry_seq,
            "since": to_rfc3339(wait.since),
            "expires_at": gate.sign_off_expires.map(|age| to_rfc3339(wait.since + age.as_millis() as i64)),
            "started_by": wait.started_by,
            "four_eyes": gate.four_eyes,
            "approvable": blocked_by.is_none(),
            "blocked_by": blocked_by,
            "commands": {
                "approve": format!("understudy approve {run} --reason \"...\""),
                "decline": format!("understudy decline {run} --reason \"...\""),
                "approve_curl": format!(
                    "curl -X POST -H \"Authorization: Bearer $UNDERSTUDY_KEY\" -H 'Content-Type: application/json' -d '{{\"reason\": \"...\"}}' <server>/v1/sign-off/{run}/approve"
                ),
            },
        },
        "entry": entry,
    }))
    .into_response())
}

/// The run id of the path, as every other bad input: a problem naming the field.
fn path_run(id: Result<Path<String>, PathRejection>) -> Result<String, Problem> {
    id.map(|Path(id)| id)
        .map_err(|_| Problem::invalid_field("run_id", "must be UTF-8 text once percent-decoded"))
}

/// A sign-off's body: the reason is required.
fn signed_actor(caller: Option<Extension<Caller>>, body: &[u8]) -> Result<Actor, Problem> {
    if body.iter().all(u8::is_ascii_whitespace) {
        return Err(Problem::invalid_field(
            "reason",
            "is required: a sign-off records why (send {\"reason\": \"...\"})",
        ));
    }
    let actor = actor(caller, body)?;
    if actor.reason.is_none() {
        return Err(Problem::invalid_field(
            "reason",
            "is required: a sign-off records why",
        ));
    }
    Ok(actor)
}

async fn decide(
    service: Arc<ApiState>,
    run_id: String,
    actor: Actor,
    approve: bool,
) -> Result<Response, Problem> {
    let registry = Arc::clone(&service.registry);
    let key = actor.key.clone();
    let decided = tokio::task::spawn_blocking(move || {
        if approve {
            registry.approve(&run_id, actor)
        } else {
            registry.decline(&run_id, actor)
        }
    })
    .await
    .map_err(Problem::internal)?;
    let entry = decided.map_err(Problem::from)?;
    tracing::info!(
        run_id = %entry.run_id,
        verdict = entry.verdict.as_str(),
        key = key.as_deref().unwrap_or("-"),
        "sign-off decided"
    );
    Ok(Json(json!({ "entry": entry })).into_response())
}

/// Approves the waiting candidate of `{run_id}`: it is promoted (or starts shadowing).
pub(super) async fn approve(
    State(service): State<Arc<ApiState>>,
    caller: Option<Extension<Caller>>,
    run_id: Result<Path<String>, PathRejection>,
    BodyBytes(body): BodyBytes,
) -> Result<Response, Problem> {
    let run_id = path_run(run_id)?;
    let actor = signed_actor(caller, &body)?;
    decide(service, run_id, actor, true).await
}

/// Declines the waiting candidate of `{run_id}`: it is never served.
pub(super) async fn decline(
    State(service): State<Arc<ApiState>>,
    caller: Option<Extension<Caller>>,
    run_id: Result<Path<String>, PathRejection>,
    BodyBytes(body): BodyBytes,
) -> Result<Response, Problem> {
    let run_id = path_run(run_id)?;
    let actor = signed_actor(caller, &body)?;
    decide(service, run_id, actor, false).await
}
