//! The HTTP API: routes, request and response shapes, and errors as problem details.
//!
//! Only this module knows JSON shapes and status codes. Handlers validate through `schema`,
//! score through the `registry`, and write through `store` (blocking calls on the blocking
//! pool); they hold no state of their own.

mod control;
mod dashboard;
mod export;
mod json;
mod labels;
pub mod problem;
mod request_log;
mod scoring;
mod sign_off;
mod state;
mod watching;

pub use state::ApiState;

use std::sync::Arc;

use axum::extract::Request;
use axum::http::{header, Method};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post, MethodRouter};
use axum::Router;
use tower::ServiceExt;
use tracing::Instrument;

use crate::access::Role;
use crate::access::{Access, Keyring, Refusal};

/// The header that carries a request's id.
pub const REQUEST_ID: &str = "x-request-id";

type Handler = MethodRouter<Arc<ApiState>>;

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
        route(Method::POST, SCORE_PATH, scorer, post(scoring::score)),
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
            Method::GET,
            "/v1/models/{id}/pmml",
            operator,
            get(export::pmml),
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
            "/v1/runs/{id}/reproduce",
            operator,
            post(control::reproduce),
        ),
        route(
            Method::POST,
            "/v1/rollback",
            operator,
            post(control::rollback),
        ),
        route(Method::POST, "/v1/freeze", operator, post(control::freeze)),
        route(
            Method::GET,
            "/v1/sign-off",
            operator,
            get(sign_off::waiting),
        ),
        route(
            Method::POST,
            "/v1/sign-off/{run_id}/approve",
            operator,
            post(sign_off::approve),
        ),
        route(
            Method::POST,
            "/v1/sign-off/{run_id}/decline",
            operator,
            post(sign_off::decline),
        ),
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
        route(
            Method::GET,
            "/metrics",
            Access::Metrics,
            get(control::metrics),
        ),
        route(Method::GET, "/", Access::Open, get(dashboard::page)),
    ]
}

/// The configured name of the key an operator route was called with, set by the front door
/// (`observe`) for handlers that record who acted; `None` when the API is open (no keys).
#[derive(Debug, Clone, Default)]
pub(crate) struct Caller(pub(crate) Option<String>);

/// Whether the route's access rule lets the request through: `Ok` with the key's name (if a
/// key was needed), or the refusal: 401 without a known key, 403 for a key whose role is too
/// low. Keys are never logged; the key's name is.
fn admit(
    keyring: &Keyring,
    access: Access,
    headers: &header::HeaderMap,
) -> Result<Option<String>, problem::Problem> {
    let bearer = headers
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
        // The scheme is case-insensitive (RFC 9110 §11.1); the token is not.
        .and_then(|v| v.split_once(' '))
        .and_then(|(scheme, token)| scheme.eq_ignore_ascii_case("bearer").then_some(token))
        .map(str::trim);
    match keyring.check(access, bearer) {
        Ok(Some(name)) => {
            tracing::debug!(key = %name, "authorized");
            Ok(Some(name))
        }
        Ok(None) => Ok(None),
        Err(Refusal::Unauthenticated) => Err(problem::Problem::unauthorized()),
        Err(Refusal::Forbidden { name, has, needs }) => Err(problem::Problem::new(
            axum::http::StatusCode::FORBIDDEN,
            "forbidden",
            "Forbidden",
            format!(
                "key `{name}` has role `{}`; this route needs `{}`",
                has.as_str(),
                needs.as_str()
            ),
        )),
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

/// The route table as the front door reads it: each path template with the access rule of
/// each method it takes, found before the router routes (the door runs in front of it, so
/// axum's `MatchedPath` is not there yet) with the matcher axum uses (matchit 0.8), so a path
/// gets the template axum routes it by.
struct Templates(matchit::Router<Template>);

/// One path template and its access rule by method, from [`routes`].
struct Template {
    path: &'static str,
    access: Vec<(Method, Access)>,
}

impl Templates {
    fn new(routes: &[Route]) -> Templates {
        let mut templates: Vec<Template> = Vec::new();
        for route in routes {
            let method = (route.method.clone(), route.access);
            match templates.iter_mut().find(|t| t.path == route.path) {
                Some(template) => template.access.push(method),
                None => templates.push(Template {
                    path: route.path,
                    access: vec![method],
                }),
            }
        }
        let mut matcher = matchit::Router::new();
        for template in templates {
            let path = template.path;
            matcher
                .insert(path, template)
                .unwrap_or_else(|e| panic!("route template {path}: {e}"));
        }
        Templates(matcher)
    }

    /// The template `path` matches, if any.
    fn of(&self, path: &str) -> Option<&Template> {
        self.0.at(path).ok().map(|m| m.value)
    }
}

impl Template {
    /// The access rule of `method` on this template; `None` for a method it does not take
    /// (405), which is answered without a key as before. HEAD is answered by the GET route and
    /// needs what GET needs.
    fn access(&self, method: &Method) -> Option<Access> {
        let method = if method == Method::HEAD {
            &Method::GET
        } else {
            method
        };
        self.access
            .iter()
            .find(|(m, _)| m == method)
            .map(|(_, access)| *access)
    }
}

fn static_method(method: &Method) -> &'static str {
    match *method {
        Method::GET => "GET",
        Method::POST => "POST",
        Method::PUT => "PUT",
        Method::DELETE => "DELETE",
        Method::HEAD => "HEAD",
        Method::OPTIONS => "OPTIONS",
        Method::PATCH => "PATCH",
        _ => "other",
    }
}

/// What every request passes on its way in and out (see [`observe`]): the request counters,
/// the service-wide limit on requests in flight, the time limit, the route's access rule, and
/// where the request goes next.
struct FrontDoor {
    telemetry: Arc<crate::telemetry::Telemetry>,
    /// One semaphore for the whole service.
    in_flight: tokio::sync::Semaphore,
    timeout: std::time::Duration,
    keyring: Arc<Keyring>,
    templates: Templates,
    /// For the scoring route's handler.
    service: Arc<ApiState>,
    /// Every other route.
    router: Router,
}

/// Every request's way in and out, as one middleware (each layer boxed a service and a
/// future per request, and a score's CPU went more to them than to scoring): it gives the
/// request its id (the caller's `x-request-id` if it sent one, else a fresh ULID) and echoes
/// it on the response; runs the request in its `request` span (a scoring request carries the
/// span's values instead, see `request_log`); admits it if fewer than `server.max_in_flight`
/// are in flight (else 503 with `Retry-After` at once: load shedding, not a queue); refuses
/// it if its route's access rule does not allow the caller's key; ends it with 503 if it
/// outlasts `server.request_timeout`; logs a 5xx answer as an error; and counts every
/// request, refused ones included, with its latency by route template (not the raw path, so
/// ids do not explode the label set), method and status. Only method and path are logged,
/// never a body (so no feature values).
async fn observe(door: Arc<FrontDoor>, request: Request) -> Response {
    let started = std::time::Instant::now();
    let id = request_id(&request);
    let template = door.templates.of(request.uri().path());
    // As a `'static` string, so counting the request allocates nothing.
    let route = template.map_or("unmatched", |t| t.path);
    let method = static_method(request.method());
    let mut response = if request_log::unspanned(request.method(), route) {
        let label = request_log::RequestLabel {
            method,
            path: route,
            id: id.clone(),
        };
        request_log::with_label(label, door.answer(template, request, started)).await
    } else {
        let span = request_log::span_for(
            request.method(),
            request.uri().path(),
            id.to_str().unwrap_or("-"),
        );
        door.answer(template, request, started)
            .instrument(span)
            .await
    };
    door.telemetry.observe_request(
        route,
        method,
        response.status().as_u16(),
        started.elapsed().as_secs_f64(),
    );
    if let header::Entry::Vacant(slot) = response.headers_mut().entry(REQUEST_ID) {
        slot.insert(id);
    }
    response
}

/// The request's id: the caller's `x-request-id`, or a fresh ULID (a thread-local
/// generator; a UUID v4 asked the kernel for randomness on every request).
fn request_id(request: &Request) -> header::HeaderValue {
    if let Some(id) = request.headers().get(REQUEST_ID) {
        return id.clone();
    }
    let mut text = [0u8; ulid::ULID_LEN];
    header::HeaderValue::from_str(ulid::Ulid::new().array_to_str(&mut text))
        .expect("a ULID is a valid header value")
}

pin_project_lite::pin_project! {
    /// `tokio::time::timeout` with the timer made only when the answer is not ready at its
    /// first poll: a score usually is, and making and dropping a timer was a tenth of the
    /// front door's CPU. `None` once `at` passes first (never when there is no `at`: a limit
    /// beyond the clock's range).
    struct Deadline<F> {
        #[pin]
        answer: F,
        #[pin]
        timer: Option<tokio::time::Sleep>,
        at: Option<std::time::Instant>,
    }
}

impl<F: std::future::Future> std::future::Future for Deadline<F> {
    type Output = Option<F::Output>;

    fn poll(
        self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<Option<F::Output>> {
        let mut this = self.project();
        if let std::task::Poll::Ready(answer) = this.answer.poll(cx) {
            return std::task::Poll::Ready(Some(answer));
        }
        if let (None, Some(at)) = (this.timer.as_ref().get_ref(), *this.at) {
            this.timer.set(Some(tokio::time::sleep_until(at.into())));
        }
        match this.timer.as_pin_mut().map(|timer| timer.poll(cx)) {
            Some(std::task::Poll::Ready(())) => std::task::Poll::Ready(None),
            _ => std::task::Poll::Pending,
        }
    }
}

impl FrontDoor {
    /// [`observe`] inside the request's span or label: admission, the route's answer, and
    /// the log line of a failure.
    async fn answer(
        &self,
        template: Option<&Template>,
        mut request: Request,
        started: std::time::Instant,
    ) -> Response {
        tracing::debug!("started processing request");
        let admitted = match template.and_then(|t| t.access(request.method())) {
            Some(access) => admit(&self.keyring, access, request.headers()).map(|name| {
                // Only operator routes record who acted; scoring pays for no extension.
                if access == Access::Role(Role::Operator) {
                    request.extensions_mut().insert(Caller(name));
                }
            }),
            None => Ok(()),
        };
        let response = match self.in_flight.try_acquire() {
            Err(_) => overloaded(),
            Ok(_permit) => match admitted {
                Err(refused) => refused.into_response(),
                Ok(()) => {
                    let answer = async {
                        let scoring = template.is_some_and(|t| t.path == SCORE_PATH);
                        if scoring && request.method() == Method::POST {
                            // The busiest route straight to its handler, as the router would
                            // call it, without the router's dispatch (a fifth of a score's
                            // CPU outside the handler went to it).
                            scoring::score_with(&self.service, request)
                                .await
                                .into_response()
                        } else {
                            match self.router.clone().oneshot(request).await {
                                Ok(response) => response,
                                Err(never) => match never {},
                            }
                        }
                    };
                    match (Deadline {
                        answer,
                        timer: None,
                        at: started.checked_add(self.timeout),
                    })
                    .await
                    {
                        Some(response) => response,
                        None => timed_out(),
                    }
                }
            },
        };
        let status = response.status();
        let latency_ms = started.elapsed().as_secs_f64() * 1000.0;
        if status.is_server_error() {
            // A scoring request's span is built only now (see `request_log`).
            let _span = request_log::current().entered();
            tracing::error!(status = status.as_u16(), latency_ms, "response failed");
        } else {
            tracing::debug!(
                status = status.as_u16(),
                latency_ms,
                "finished processing request"
            );
        }
        response
    }
}

fn overloaded() -> Response {
    problem::Problem::new(
        axum::http::StatusCode::SERVICE_UNAVAILABLE,
        "overloaded",
        "Overloaded",
        "the service is handling server.max_in_flight requests already; retry shortly",
    )
    .retry_after(1)
    .into_response()
}

fn timed_out() -> Response {
    problem::Problem::new(
        axum::http::StatusCode::SERVICE_UNAVAILABLE,
        "timed-out",
        "Request timed out",
        "the request took longer than server.request_timeout (reading its body included)",
    )
    .retry_after(1)
    .into_response()
}

/// The scoring route, which [`FrontDoor::answer`] hands to its handler itself.
const SCORE_PATH: &str = "/v1/score";

/// The service as one request handler: the router behind its front door ([`observe`]).
#[derive(Clone)]
pub struct App {
    door: Arc<FrontDoor>,
}

impl tower::Service<Request> for App {
    type Response = Response;
    type Error = std::convert::Infallible;
    type Future = std::pin::Pin<
        Box<dyn std::future::Future<Output = Result<Response, std::convert::Infallible>> + Send>,
    >;

    fn poll_ready(
        &mut self,
        _: &mut std::task::Context<'_>,
    ) -> std::task::Poll<Result<(), Self::Error>> {
        // The router is always ready.
        std::task::Poll::Ready(Ok(()))
    }

    fn call(&mut self, request: Request) -> Self::Future {
        let door = Arc::clone(&self.door);
        Box::pin(async move { Ok(observe(door, request).await) })
    }
}

/// The application over the running service's parts: the router behind the front door.
pub fn router(service: Arc<ApiState>) -> App {
    let in_flight = tokio::sync::Semaphore::new(service.config.server.max_in_flight);
    let mut router = Router::new();
    let routes = routes();
    let templates = Templates::new(&routes);
    for route in routes {
        router = router.route(route.path, route.handler);
    }
    let router = router
        // A known path called with a method it does not take: a problem like every other
        // error (axum still adds the `Allow` header listing the methods the path takes).
        .method_not_allowed_fallback(|| async { problem::Problem::method_not_allowed() })
        .fallback(|| async { problem::Problem::not_found("no such route; see openapi.yaml") })
        .with_state(Arc::clone(&service));
    App {
        door: Arc::new(FrontDoor {
            telemetry: Arc::clone(&service.telemetry),
            in_flight,
            timeout: service.config.server.request_timeout,
            keyring: Arc::clone(&service.keyring),
            templates,
            service: Arc::clone(&service),
            router,
        }),
    }
}
