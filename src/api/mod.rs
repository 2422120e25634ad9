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

use axum::extract::{DefaultBodyLimit, Request, State};
use axum::http::{header, Method};
use axum::middleware::{from_fn_with_state, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post, MethodRouter};
use axum::Router;
use tower_http::trace::TraceLayer;

use crate::access::{Access, Keyring, Refusal};
use crate::app::Service;
use crate::config::Role;

/// Largest request body accepted (a full batch of scores or examples fits well inside).
pub const BODY_LIMIT_BYTES: usize = 16 * 1024 * 1024;

type Handler = MethodRouter<Arc<Service>>;

/// One route: method, path (in OpenAPI's `{param}` form), who may call it, and its handler.
pub struct Route {
    pub method: Method,
    pub path: &'static str,
    pub access: Access,
    pub handler: Handler,
}

/// Every route. The router, the contract test and the role-matrix test are all built from this
/// one table.
pub fn routes() -> Vec<Route> {
    use Role::{Operator, Scorer};
    let route = |method: Method, path, access, handler| Route {
        method,
        path,
        access,
        handler,
    };
    let scorer = Access::Role(Scorer);
    let operator = Access::Role(Operator);
    vec![
        route(Method::POST, "/v1/score", scorer, post(scoring::score)),
        route(
            Method::POST,
            "/v1/score/batch",
            scorer,
            post(scoring::score_batch),
        ),
        route(Method::POST, "/v1/outcomes", scorer, post(labels::outcome)),
        route(Method::POST, "/v1/examples", scorer, post(labels::examples)),
        route(
            Method::GET,
            "/v1/promotions",
            operator,
            get(control::promotions),
        ),
        route(Method::GET, "/v1/models", operator, get(control::models)),
        route(
            Method::GET,
            "/v1/models/{id}",
            operator,
            get(control::model),
        ),
        route(
            Method::POST,
            "/v1/retrain",
            operator,
            post(control::retrain),
        ),
        route(Method::GET, "/v1/runs/{id}", operator, get(control::run)),
        route(
            Method::POST,
            "/v1/rollback",
            operator,
            post(control::rollback),
        ),
        route(Method::POST, "/v1/freeze", operator, post(control::freeze)),
        route(
            Method::POST,
            "/v1/unfreeze",
            operator,
            post(control::unfreeze),
        ),
        route(
            Method::GET,
            "/v1/candidate",
            operator,
            get(watching::candidate),
        ),
        route(Method::GET, "/v1/drift", operator, get(watching::drift)),
        route(
            Method::GET,
            "/healthz",
            Access::Health,
            get(control::healthz),
        ),
        route(Method::GET, "/readyz", Access::Health, get(control::readyz)),
    ]
}

/// Refuses a request the route's access rule does not allow: 401 without a known key, 403
/// for a key whose role is too low. Keys are never logged; the key's name is.
async fn authorize(
    State((keyring, access)): State<(Arc<Keyring>, Access)>,
    request: Request,
    next: Next,
) -> Response {
    let bearer = request
        .headers()
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.strip_prefix("Bearer "))
        .map(str::trim);
    match keyring.check(access, bearer) {
        Ok(Some(name)) => {
            tracing::debug!(key = %name, "authorized");
            next.run(request).await
        }
        Ok(None) => next.run(request).await,
        Err(Refusal::Unauthenticated) => problem::Problem::unauthorized().into_response(),
        Err(Refusal::Forbidden { name, has, needs }) => problem::Problem::new(
            axum::http::StatusCode::FORBIDDEN,
            "forbidden",
            "Forbidden",
            format!(
                "key `{name}` has role `{}`; this route needs `{}`",
                has.as_str(),
                needs.as_str()
            ),
        )
        .into_response(),
    }
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
    for route in routes() {
        let guard = from_fn_with_state((Arc::clone(&service.keyring), route.access), authorize);
        router = router.route(route.path, route.handler.route_layer(guard));
    }
    router
        .fallback(|| async { problem::Problem::not_found("no such route; see openapi.yaml") })
        .layer(DefaultBodyLimit::max(BODY_LIMIT_BYTES))
        .layer(TraceLayer::new_for_http())
        .with_state(service)
}
