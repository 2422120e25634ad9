//! Errors as RFC 9457 problem details (`application/problem+json`), built in one place.
//!
//! Every refusal the API makes goes through [`Problem`]. Field-level validation failures carry
//! an `errors` member listing each field and the rule it broke. 5xx bodies never show
//! internals: the cause is logged, the caller gets a generic detail.

use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use serde::Serialize;

use crate::registry::{RollbackError, SignOffError};
use crate::scheduler::RetrainError;
use crate::schema::{FieldError, RowError};
use crate::store::StoreError;

#[derive(Debug, Clone, Serialize)]
pub struct Problem {
    #[serde(rename = "type")]
    pub kind: String,
    pub title: &'static str,
    #[serde(serialize_with = "status_code")]
    pub status: StatusCode,
    pub detail: String,
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub errors: Vec<FieldError>,
    #[serde(skip)]
    pub retry_after: Option<u32>,
}

fn status_code<S: serde::Serializer>(status: &StatusCode, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_u16(status.as_u16())
}

impl Problem {
    /// A problem of kind `slug` (its `type` is `/problems/<slug>`).
    pub fn new(
        status: StatusCode,
        slug: &str,
        title: &'static str,
        detail: impl Into<String>,
    ) -> Problem {
        Problem {
            kind: format!("/problems/{slug}"),
            title,
            status,
            detail: detail.into(),
            errors: vec![],
            retry_after: None,
        }
    }

    pub fn invalid(errors: RowError) -> Problem {
        let detail = errors.to_string();
        let mut problem = Problem::new(
            StatusCode::UNPROCESSABLE_ENTITY,
            "invalid-input",
            "Invalid input",
            detail,
        );
        problem.errors = errors.0;
        problem
    }

    pub fn invalid_field(field: &str, rule: impl Into<String>) -> Problem {
        Problem::invalid(RowError(vec![FieldError {
            field: field.into(),
            rule: rule.into(),
        }]))
    }

    /// 401: no key, or one the service does not know.
    pub fn unauthorized() -> Problem {
        Problem::new(
            StatusCode::UNAUTHORIZED,
            "unauthorized",
            "Unauthorized",
            "send a valid API key as `Authorization: Bearer <key>`",
        )
    }

    pub fn not_found(detail: impl Into<String>) -> Problem {
        Problem::new(StatusCode::NOT_FOUND, "not-found", "Not found", detail)
    }

    /// 405: the path exists but not with this method (the response's `Allow` lists those).
    pub fn method_not_allowed() -> Problem {
        Problem::new(
            StatusCode::METHOD_NOT_ALLOWED,
            "method-not-allowed",
            "Method not allowed",
            "this path does not take that method; the Allow header lists the ones it takes",
        )
    }

    pub fn no_active_model() -> Problem {
        Problem::new(
            StatusCode::SERVICE_UNAVAILABLE,
            "no-active-model",
            "No active model",
            "no model is active yet: load labeled examples (POST /v1/examples or `understudy import`) \
             and start a run (POST /v1/retrain), or send outcomes until the schedule starts one",
        )
        .retry_after(30)
    }

    /// A server-side failure: logged with its cause, shown without it.
    pub fn internal(cause: impl std::fmt::Display) -> Problem {
        let _request = super::request_log::current().entered();
        tracing::error!(cause = %cause, "internal error");
        Problem::new(
            StatusCode::INTERNAL_SERVER_ERROR,
            "internal",
            "Internal error",
            "the request failed inside the service; see its logs",
        )
    }

    /// Names the one field the problem is about and the rule it broke (the `errors` member).
    pub fn naming(mut self, field: impl Into<String>, rule: impl Into<String>) -> Problem {
        self.errors = vec![FieldError {
            field: field.into(),
            rule: rule.into(),
        }];
        self
    }

    pub fn retry_after(mut self, seconds: u32) -> Problem {
        self.retry_after = Some(seconds);
        self
    }
}

impl IntoResponse for Problem {
    fn into_response(self) -> Response {
        let body = serde_json::to_vec(&self).unwrap_or_default();
        let mut response = (self.status, body).into_response();
        let headers = response.headers_mut();
        headers.insert(
            header::CONTENT_TYPE,
            HeaderValue::from_static("application/problem+json"),
        );
        if let Some(seconds) = self.retry_after {
            headers.insert(header::RETRY_AFTER, HeaderValue::from(seconds));
        }
        if self.status == StatusCode::UNAUTHORIZED {
            headers.insert(header::WWW_AUTHENTICATE, HeaderValue::from_static("Bearer"));
        }
        response
    }
}

impl From<crate::reproduce::ReproduceError> for Problem {
    fn from(e: crate::reproduce::ReproduceError) -> Problem {
        use crate::reproduce::ReproduceError;
        match e {
            ReproduceError::UnknownRun(_) => Problem::not_found(e.to_string()),
            ReproduceError::NoProvenance(_) | ReproduceError::MissingModel { .. } => Problem::new(
                StatusCode::CONFLICT,
                "not-reproducible",
                "Run cannot be re-fitted",
                e.to_string(),
            ),
            ReproduceError::Store(e) => e.into(),
        }
    }
}

impl From<StoreError> for Problem {
    fn from(e: StoreError) -> Problem {
        match e {
            StoreError::UnknownScore(_) => Problem::new(
                StatusCode::NOT_FOUND,
                "unknown-score",
                "Unknown score id",
                e.to_string(),
            ),
            StoreError::ConflictingLabel { .. } => Problem::new(
                StatusCode::CONFLICT,
                "conflicting-label",
                "Conflicting label",
                e.to_string(),
            ),
            StoreError::Unavailable(_) => {
                let _request = super::request_log::current().entered();
                tracing::error!(error = %e, "store write failed");
                Problem::new(
                    StatusCode::SERVICE_UNAVAILABLE,
                    "store-unavailable",
                    "Store unavailable",
                    "the store cannot write right now; nothing was recorded, retry later",
                )
                .retry_after(5)
            }
            StoreError::Locked { .. }
            | StoreError::NewerLayout { .. }
            | StoreError::NewerSchema { .. }
            | StoreError::Corrupt(_)
            | StoreError::ScoreOrder { .. } => Problem::internal(e),
        }
    }
}

impl From<crate::store::recorder::RecorderFull> for Problem {
    fn from(e: crate::store::recorder::RecorderFull) -> Problem {
        let _request = super::request_log::current().entered();
        tracing::warn!(error = %e, "score refused: no room for its record");
        Problem::new(
            StatusCode::SERVICE_UNAVAILABLE,
            "records-backlogged",
            "Score records backlogged",
            format!("{e}; nothing was scored, retry shortly"),
        )
        .retry_after(1)
    }
}

impl From<RetrainError> for Problem {
    fn from(e: RetrainError) -> Problem {
        match e {
            RetrainError::QueueFull => Problem::new(
                StatusCode::TOO_MANY_REQUESTS,
                "queue-full",
                "Run queue full",
                e.to_string(),
            )
            .retry_after(60),
            RetrainError::ShuttingDown => Problem::new(
                StatusCode::SERVICE_UNAVAILABLE,
                "shutting-down",
                "Shutting down",
                e.to_string(),
            ),
            RetrainError::Store(e) => e.into(),
        }
    }
}

impl From<RollbackError> for Problem {
    fn from(e: RollbackError) -> Problem {
        match e {
            RollbackError::NothingToRollBackTo
            | RollbackError::AlreadyActive(_)
            | RollbackError::NeverActive(_)
            | RollbackError::Incompatible(_) => Problem::new(
                StatusCode::CONFLICT,
                "rollback-refused",
                "Rollback refused",
                e.to_string(),
            ),
            RollbackError::UnknownModel(_) => Problem::not_found(e.to_string()),
            RollbackError::Store(e) => e.into(),
        }
    }
}

impl From<SignOffError> for Problem {
    fn from(e: SignOffError) -> Problem {
        let detail = e.to_string();
        match e {
            SignOffError::NotWaiting { .. } => Problem::new(
                StatusCode::NOT_FOUND,
                "not-waiting",
                "No such candidate waits",
                detail,
            ),
            SignOffError::FourEyes { .. } => Problem::new(
                StatusCode::FORBIDDEN,
                "four-eyes",
                "Another operator must approve",
                detail,
            ),
            SignOffError::Stale { .. } => Problem::new(
                StatusCode::CONFLICT,
                "stale-candidate",
                "Candidate is stale",
                detail,
            ),
            SignOffError::Frozen { .. } => {
                Problem::new(StatusCode::CONFLICT, "frozen", "Promotions frozen", detail)
            }
            SignOffError::Expired { .. } => Problem::new(
                StatusCode::CONFLICT,
                "sign-off-expired",
                "Sign-off expired",
                detail,
            ),
            SignOffError::MissingCandidate(_) | SignOffError::Incompatible(_) => Problem::new(
                StatusCode::CONFLICT,
                "candidate-unusable",
                "Candidate cannot be served",
                detail,
            ),
            SignOffError::Store(e) => Problem::from(e),
        }
    }
}
