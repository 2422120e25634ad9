//! The HTTP API: routes, request and response shapes, and errors as problem details.
//!
//! Only this module knows JSON shapes and status codes. Handlers validate through `schema`,
//! score through the `registry`, and write through `store` (blocking calls on the blocking
//! pool); they hold no state of their own.

mod control;
mod json;
mod labels;
pub mod problem;
mod scoring;
mod watching;

use std::sync::Arc;

use axum::extract::DefaultBodyLimit;
use axum::http::Method;
use axum::routing::{get, post, MethodRouter};
use axum::Router;
use tower_http::trace::TraceLayer;

use crate::app::Service;

/// Largest request body accepted (a full batch of scores or examples fits well inside).
pub const BODY_LIMIT_BYTES: usize = 16 * 1024 * 1024;

type Handler = MethodRouter<Arc<Service>>;

/// Every route: method, path (in OpenAPI's `{param}` form) and handler. The router and the
/// contract test are both built from this one table.
pub fn routes() -> Vec<(Method, &'static str, Handler)> {
    vec![
        (Method::POST, "/v1/score", post(scoring::score)),
        (Method::POST, "/v1/score/batch", post(scoring::score_batch)),
        (Method::POST, "/v1/outcomes", post(labels::outcome)),
        (Method::POST, "/v1/examples", post(labels::examples)),
        (Method::GET, "/v1/promotions", get(control::promotions)),
        (Method::GET, "/v1/models", get(control::models)),
        (Method::GET, "/v1/models/{id}", get(control::model)),
        (Method::POST, "/v1/retrain", post(control::retrain)),
        (Method::GET, "/v1/runs/{id}", get(control::run)),
        (Method::POST, "/v1/rollback", post(control::rollback)),
        (Method::GET, "/v1/candidate", get(watching::candidate)),
        (Method::GET, "/v1/drift", get(watching::drift)),
        (Method::GET, "/healthz", get(control::healthz)),
        (Method::GET, "/readyz", get(control::readyz)),
    ]
}

/// Runs a blocking store call on the blocking pool and turns its error into a problem.
async fn blocking<T: Send + 'static>(
    f: impl FnOnce() -> Result<T, crate::store::StoreError> + Send + 'static,
) -> Result<T, problem::Problem> {
    match tokio::task::spawn_blocking(f).await {
        Ok(result) => result.map_err(problem::Problem::from),
        Err(e) => Err(problem::Problem::internal(e)),
    }
}

/// The application router over a running [`Service`].
pub fn router(service: Arc<Service>) -> Router {
    let mut router = Router::new();
    for (_, path, handler) in routes() {
        router = router.route(path, handler);
    }
    router
        .fallback(|| async { problem::Problem::not_found("no such route; see openapi.yaml") })
        .layer(DefaultBodyLimit::max(BODY_LIMIT_BYTES))
        .layer(TraceLayer::new_for_http())
        .with_state(service)
}
