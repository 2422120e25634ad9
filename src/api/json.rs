//! A JSON extractor whose rejections are problem details like every other error.

use axum::extract::rejection::JsonRejection;
use axum::extract::{FromRequest, Request};
use axum::http::StatusCode;
use serde::de::DeserializeOwned;

use super::problem::Problem;

/// `axum::Json`, with malformed bodies answered as `application/problem+json`.
pub struct ApiJson<T>(pub T);

impl<S, T> FromRequest<S> for ApiJson<T>
where
    T: DeserializeOwned,
    S: Send + Sync,
{
    type Rejection = Problem;

    async fn from_request(req: Request, state: &S) -> Result<Self, Self::Rejection> {
        match axum::Json::<T>::from_request(req, state).await {
            Ok(axum::Json(value)) => Ok(ApiJson(value)),
            Err(rejection) => Err(json_problem(rejection)),
        }
    }
}

fn json_problem(rejection: JsonRejection) -> Problem {
    let detail = rejection.body_text();
    match rejection {
        JsonRejection::JsonDataError(_) => Problem::new(
            StatusCode::UNPROCESSABLE_ENTITY,
            "invalid-body",
            "Invalid body",
            detail,
        ),
        JsonRejection::JsonSyntaxError(_) => Problem::new(
            StatusCode::BAD_REQUEST,
            "malformed-json",
            "Malformed JSON",
            detail,
        ),
        JsonRejection::MissingJsonContentType(_) => Problem::new(
            StatusCode::UNSUPPORTED_MEDIA_TYPE,
            "unsupported-media-type",
            "Unsupported media type",
            "send the body as JSON with `Content-Type: application/json`",
        ),
        other => {
            let status = other.status();
            if status == StatusCode::PAYLOAD_TOO_LARGE {
                Problem::new(status, "body-too-large", "Body too large", detail)
            } else {
                Problem::new(
                    StatusCode::BAD_REQUEST,
                    "unreadable-body",
                    "Unreadable body",
                    detail,
                )
            }
        }
    }
}
