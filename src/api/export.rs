//! `GET /v1/models/{id}/pmml`: a stored model as a PMML 4.4 document.
//!
//! The document is built by `model::pmml` from the model and the schema the service runs
//! under (its missing rules and bounds are part of how the service scores). A model that has
//! no PMML form here (kNN, naive Bayes) or that the current config no longer describes is
//! refused with 409 and the reason.

use std::sync::Arc;

use axum::extract::rejection::PathRejection;
use axum::extract::{Path, State};
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};

use super::blocking;
use super::problem::Problem;
use super::ApiState;
use crate::model::pmml::{to_pmml, PmmlError};

/// The content type of an exported model.
pub(super) const PMML_CONTENT_TYPE: &str = "application/xml";

pub(super) async fn pmml(
    State(service): State<Arc<ApiState>>,
    id: Result<Path<String>, PathRejection>,
) -> Result<Response, Problem> {
    let Path(id) =
        id.map_err(|_| Problem::invalid_field("id", "must be UTF-8 text once percent-decoded"))?;
    let store = Arc::clone(&service.store);
    let lookup = id.clone();
    let model = blocking(move || store.model(&lookup))
        .await?
        .ok_or_else(|| Problem::not_found(format!("no model with id `{}`", shown(&id))))?;
    let schema = Arc::clone(&service.schema);
    let document = tokio::task::spawn_blocking(move || to_pmml(&model, &schema))
        .await
        .map_err(Problem::internal)?
        .map_err(refusal)?;
    Ok(([(header::CONTENT_TYPE, PMML_CONTENT_TYPE)], document).into_response())
}

fn refusal(error: PmmlError) -> Problem {
    match error {
        PmmlError::Unreadable(_) => Problem::internal(error),
        PmmlError::Unsupported { .. }
        | PmmlError::Incompatible(_)
        | PmmlError::NotFinite { .. }
        | PmmlError::NameClash(_) => Problem::new(
            StatusCode::CONFLICT,
            "not-exportable",
            "Model cannot be exported",
            error.to_string(),
        ),
    }
}

/// An id from the path as an error shows it: cut, so the caller cannot make the answer huge.
fn shown(id: &str) -> String {
    const MAX: usize = 80;
    if id.chars().count() <= MAX {
        id.to_owned()
    } else {
        format!("{}…", id.chars().take(MAX).collect::<String>())
    }
}
