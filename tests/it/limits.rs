//! The service's own limits: requests beyond `server.max_in_flight` are shed with 503 and
//! `Retry-After`, a request slower than `server.request_timeout` is ended with 503, and a body
//! over `server.body_limit` is a 413 naming the limit.

use std::time::Duration;

use tokio::io::{AsyncReadExt, AsyncWriteExt};

use crate::helpers::{spawn_app_with, test_config};

/// Opens a connection and sends a request whose body never finishes, so it stays in flight
/// until the server gives up on it.
async fn stalled_request(base: &str) -> tokio::net::TcpStream {
    let address = base.trim_start_matches("http://");
    let mut stream = tokio::net::TcpStream::connect(address).await.unwrap();
    stream
        .write_all(
            b"POST /v1/score HTTP/1.1\r\nHost: test\r\nContent-Type: application/json\r\nContent-Length: 100\r\n\r\n{\"features\":",
        )
        .await
        .unwrap();
    stream
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_request_beyond_max_in_flight_is_shed_and_a_stalled_one_times_out() {
    let dir = tempfile::tempdir().unwrap();
    let mut config = test_config(dir.path());
    config.server.max_in_flight = 1;
    config.server.request_timeout = Duration::from_secs(2);
    let app = spawn_app_with(config).await;

    // The stalled request holds the only place once the server has read its head; until then
    // a probe may still get through, so probe until one is shed. On a loaded machine the
    // stalled request can reach its timeout before a probe lands, freeing its place; then it
    // is dropped and the attempt repeated with a fresh one (bounded).
    let mut shed = None;
    let mut stalled = None;
    for _attempt in 0..5 {
        drop(stalled.take());
        let stream = stalled_request(&app.base).await;
        let opened = std::time::Instant::now();
        while shed.is_none() && opened.elapsed() < Duration::from_secs(1) {
            let response = app.client.get(app.url("/healthz")).send().await.unwrap();
            if response.status() == 503 {
                shed = Some(response);
            } else {
                assert_eq!(response.status(), 200);
                tokio::time::sleep(Duration::from_millis(10)).await;
            }
        }
        stalled = Some(stream);
        if shed.is_some() {
            break;
        }
    }
    let mut stalled = stalled.expect("at least one attempt ran");
    let shed = shed.expect("a second request while one is in flight is shed");
    assert_eq!(shed.headers()["retry-after"], "1");
    assert_eq!(shed.headers()["content-type"], "application/problem+json");
    let body: serde_json::Value = shed.json().await.unwrap();
    assert!(
        body["type"].as_str().unwrap().ends_with("overloaded"),
        "{body}"
    );
    assert!(
        body["detail"]
            .as_str()
            .unwrap()
            .contains("server.max_in_flight"),
        "{body}"
    );

    // The stalled request is ended by the timeout, as a problem.
    let mut answer = Vec::new();
    let read = tokio::time::timeout(Duration::from_secs(20), stalled.read_to_end(&mut answer))
        .await
        .expect("the server ends a stalled request");
    read.unwrap();
    let answer = String::from_utf8_lossy(&answer);
    assert!(answer.starts_with("HTTP/1.1 503"), "{answer}");
    assert!(answer.contains("timed-out"), "{answer}");
    assert!(answer.contains("server.request_timeout"), "{answer}");

    // Its place is free again.
    let (status, _) = app.get("/healthz").await;
    assert_eq!(status, 200);
    let metrics = app.get_text("/metrics").await;
    assert!(
        metrics.contains(r#"route="/healthz",method="GET",status="503""#),
        "shed requests are counted under their route:\n{metrics}"
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_body_over_the_limit_is_a_413_naming_the_limit() {
    let dir = tempfile::tempdir().unwrap();
    let mut config = test_config(dir.path());
    config.server.body_limit = 2048;
    let app = spawn_app_with(config).await;
    let long = "x".repeat(4096);
    // A JSON body, and a route whose body is optional and read as bytes (the reason).
    let bodies = [
        (
            "/v1/score",
            format!(r#"{{"features": {{"invoice_amount": 1200.0}}, "ref": "{long}"}}"#),
        ),
        ("/v1/freeze", format!(r#"{{"reason": "{long}"}}"#)),
    ];
    for (route, big) in bodies {
        let response = app
            .client
            .post(app.url(route))
            .header("content-type", "application/json")
            .body(big)
            .send()
            .await
            .unwrap();
        assert_eq!(response.status(), 413, "{route}");
        let body: serde_json::Value = response.json().await.unwrap();
        let rules: Vec<String> = body["errors"]
            .as_array()
            .unwrap()
            .iter()
            .map(|e| format!("{}: {}", e["field"], e["rule"]))
            .collect();
        assert!(
            rules
                .iter()
                .any(|r| r.contains("2048 bytes") && r.contains("server.body_limit")),
            "{route}: {rules:?}"
        );
    }
    app.stop().await;
}
