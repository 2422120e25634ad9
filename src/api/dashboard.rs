//! The dashboard: one page, embedded in the binary, that draws the active model, the shadow
//! candidate, the candidate waiting for sign-off (its evidence, approve/decline buttons that
//! send the key typed into the page, and the same decision as a command), the gate metric over
//! runs, the last judged run's ROC and calibration curves,
//! drift bars and the promotion log from the API (SVG drawn by its own small script; no
//! external assets, no network beyond this server).

use axum::http::header;
use axum::response::{IntoResponse, Response};

const PAGE: &str = include_str!("dashboard.html");

pub(super) async fn page() -> Response {
    (
        [
            (header::CONTENT_TYPE, "text/html; charset=utf-8"),
            (header::CACHE_CONTROL, "no-cache"),
        ],
        PAGE,
    )
        .into_response()
}
