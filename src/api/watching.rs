//! What ops watch between runs: the shadowing candidate's progress and drift.

use std::sync::Arc;

use axum::extract::State;
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde_json::json;

use super::blocking;
use super::problem::Problem;
use super::ApiState;
use crate::metrics::Report;
use crate::schema::LabelKind;
use crate::time::to_rfc3339;

/// The shadowing candidate, its shadowed outcomes so far and the live metrics on them;
/// `{"candidate": null}` when no candidate is shadowing.
pub(super) async fn candidate(State(service): State<Arc<ApiState>>) -> Result<Response, Problem> {
    let store = Arc::clone(&service.store);
    let (state, outcomes, model) = blocking(move || {
        let Some(state) = store.shadow_state()? else {
            return Ok((None, vec![], None));
        };
        let outcomes = store.shadowed_outcomes(&state.candidate_id)?;
        let model = store.model(&state.candidate_id)?;
        Ok((Some(state), outcomes, model))
    })
    .await?;
    let Some(state) = state else {
        return Ok(Json(json!({ "candidate": null })).into_response());
    };
    let shadow = &service.config.shadow;
    let binary = service.config.label.kind == LabelKind::Binary;
    let labels: Vec<f64> = outcomes.iter().map(|o| o.label).collect();
    let live = (outcomes.len() >= 2).then(|| {
        let cand: Vec<f64> = outcomes.iter().map(|o| o.candidate).collect();
        let act: Vec<f64> = outcomes.iter().map(|o| o.active).collect();
        json!({
            "candidate": Report::for_labels(binary, &cand, &labels),
            "active": Report::for_labels(binary, &act, &labels),
        })
    });
    let share = state.share.as_ref().map(|terms| {
        let route = service
            .registry
            .share()
            .filter(|r| r.candidate_id == state.candidate_id);
        let arm = |answered_by_candidate: bool, arm: crate::registry::Arm| {
            let rows: Vec<_> = outcomes
                .iter()
                .filter(|o| o.candidate_answered == answered_by_candidate)
                .collect();
            let labels: Vec<f64> = rows.iter().map(|o| o.label).collect();
            let outputs: Vec<f64> = rows
                .iter()
                .map(|o| {
                    if answered_by_candidate {
                        o.candidate
                    } else {
                        o.active
                    }
                })
                .collect();
            let counts = route.as_ref().map(|r| r.counts(arm)).unwrap_or_default();
            json!({
                "outcomes": rows.len(),
                "answers": counts.answers,
                "errors": counts.errors,
                "live": (rows.len() >= 2).then(|| Report::for_labels(binary, &outputs, &labels)),
            })
        };
        json!({
            "fraction": terms.fraction,
            "sticky_by": terms.sticky_by,
            "needed_per_arm": service.config.share.outcomes_per_arm,
            "stopped": route.as_ref().is_some_and(|r| r.stopped()),
            "candidate": arm(true, crate::registry::Arm::Candidate),
            "active": arm(false, crate::registry::Arm::Active),
        })
    });
    let expires_at = shadow
        .max_age
        .map(|age| to_rfc3339(state.since + age.as_millis() as i64));
    Ok(Json(json!({
        "candidate": {
            "id": state.candidate_id,
            "against": state.active_id,
            "run_id": state.run_id,
            "entry_seq": state.entry_seq,
            "since": to_rfc3339(state.since),
            "expires_at": expires_at,
            "setting": model.as_ref().map(|m| m.setting),
            "holdout": model.as_ref().and_then(|m| m.holdout.clone()),
        },
        "outcomes": outcomes.len(),
        "needed": shadow.outcomes,
        "live": live,
        "share": share,
    }))
    .into_response())
}

/// Drift of recent requests against the active model, and outcome coverage by score age.
pub(super) async fn drift(State(service): State<Arc<ApiState>>) -> Result<Response, Problem> {
    let model = service
        .registry
        .active()
        .ok_or_else(Problem::no_active_model)?;
    let inner = Arc::clone(&service);
    let (report, coverage) = blocking(move || {
        let report = crate::monitor::drift_report(
            inner.store.as_ref(),
            &inner.schema,
            &inner.config,
            &model,
        )?;
        let coverage = crate::monitor::coverage(inner.store.as_ref(), &inner.config)?;
        // Fresh for the caller, and kept for the next metrics scrape.
        let report = report.map(|r| inner.drift_cache.keep(r, crate::time::now_ms()));
        Ok((report, coverage))
    })
    .await?;
    Ok(Json(json!({
        "drift": report.as_deref(),
        "coverage": coverage,
    }))
    .into_response())
}
