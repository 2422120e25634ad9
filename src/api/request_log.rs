//! The `request` span every log line of a request carries: method, path and request id.
//!
//! Most routes get it from the front door (`api::observe`) when the request arrives. Creating,
//! entering and closing that span costs about 2 µs of CPU per request with the fmt subscriber
//! (its fields are formatted into a string at creation), a twentieth of a score's whole cost
//! under load, and a score logs nothing unless it fails. So the scoring routes get no span up front: the front
//! door keeps the span's three values in a task-local for the request's life, and the few
//! places a scoring request can log (`problem`) build the same span from it first, so their
//! lines read exactly as any other route's.

use axum::http::{HeaderValue, Method};
use tracing::Span;

/// The routes served without a span up front (POST only).
const UNSPANNED: [&str; 2] = ["/v1/score", "/v1/score/batch"];

tokio::task_local! {
    static UNSPANNED_REQUEST: RequestLabel;
}

/// What the `request` span holds, kept for a request that has none yet.
#[derive(Clone)]
pub(super) struct RequestLabel {
    pub method: &'static str,
    pub path: &'static str,
    pub id: HeaderValue,
}

/// Whether a request goes without a span up front.
pub(super) fn unspanned(method: &Method, path: &str) -> bool {
    method == Method::POST && UNSPANNED.contains(&path)
}

/// The `request` span for a request as it arrives, made by the front door for every request
/// not [`unspanned`].
pub(super) fn span_for(method: &Method, path: &str, id: &str) -> Span {
    tracing::info_span!("request", method = %method, path = %path, request_id = %id)
}

/// Runs a request's future with its label at hand for [`current`].
pub(super) async fn with_label<F: std::future::Future>(
    label: RequestLabel,
    future: F,
) -> F::Output {
    UNSPANNED_REQUEST.scope(label, future).await
}

/// The span a log line should be written in: for a request served without one, its
/// `request` span built now; otherwise none (the front door's span is already current).
pub(crate) fn current() -> Span {
    UNSPANNED_REQUEST
        .try_with(|label| {
            let id = label.id.to_str().unwrap_or("-");
            tracing::info_span!(
                "request",
                method = %label.method,
                path = %label.path,
                request_id = %id
            )
        })
        .unwrap_or_else(|_| Span::none())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn only_the_scoring_posts_go_without_a_span() {
        assert!(unspanned(&Method::POST, "/v1/score"));
        assert!(unspanned(&Method::POST, "/v1/score/batch"));
        assert!(!unspanned(&Method::GET, "/v1/score"));
        assert!(!unspanned(&Method::POST, "/v1/outcomes"));
        assert!(!unspanned(&Method::POST, "/v1/rollback"));
    }

    /// Log output kept in memory for a test.
    #[derive(Clone, Default)]
    struct Captured(std::sync::Arc<std::sync::Mutex<Vec<u8>>>);

    impl std::io::Write for Captured {
        fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
            self.0.lock().unwrap().extend_from_slice(buf);
            Ok(buf.len())
        }
        fn flush(&mut self) -> std::io::Result<()> {
            Ok(())
        }
    }

    #[tokio::test(flavor = "current_thread")]
    async fn a_failing_scores_log_line_carries_its_request_id_and_others_are_untouched() {
        let captured = Captured::default();
        let writer = captured.clone();
        let subscriber = tracing_subscriber::fmt()
            .with_ansi(false)
            .with_writer(move || writer.clone())
            .finish();
        let _default = tracing::subscriber::set_default(subscriber);
        let label = RequestLabel {
            method: "POST",
            path: "/v1/score",
            id: HeaderValue::from_static("01JTESTREQUESTID"),
        };
        with_label(label, async {
            let _ = crate::api::problem::Problem::internal("the disk is gone");
        })
        .await;
        let _ = crate::api::problem::Problem::internal("outside any request");
        let text = String::from_utf8(captured.0.lock().unwrap().clone()).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines.len(), 2, "{text}");
        assert!(
            lines[0].contains("request{method=POST path=/v1/score request_id=01JTESTREQUESTID}"),
            "{text}"
        );
        assert!(lines[0].contains("the disk is gone"), "{text}");
        assert!(!lines[1].contains("request_id"), "{text}");
        assert!(current().is_none(), "no request: no span");
    }
}
