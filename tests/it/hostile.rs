//! Hostile input over HTTP and through the importer: every case gets a 4xx problem naming the
//! field and the rule (never a 5xx, never a dropped connection), and the store is checked
//! afterwards, opened from disk once the service has stopped, to hold exactly what it held.

use std::path::Path;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};
use understudy::demo::scenario::{invoice, Regime};
use understudy::store::Store;
use understudy::time::{now_ms, to_rfc3339};

use crate::helpers::{spawn_app, spawn_app_with, test_config, valid_features, TestApp};

/// One answer: status, content type and body (JSON when it parses, else the text).
struct Reply {
    status: u16,
    content_type: String,
    body: Json,
    len: usize,
}

/// Posts `body` as is, with `content_type` if given.
async fn send(
    app: &TestApp,
    path: &str,
    content_type: Option<&str>,
    body: impl Into<String>,
) -> Reply {
    let mut request = app.client.post(app.url(path)).body(body.into());
    if let Some(content_type) = content_type {
        request = request.header("content-type", content_type);
    }
    reply(request.send().await.unwrap()).await
}

/// Posts JSON text.
async fn post_text(app: &TestApp, path: &str, body: impl Into<String>) -> Reply {
    send(app, path, Some("application/json"), body).await
}

async fn reply(response: reqwest::Response) -> Reply {
    let status = response.status().as_u16();
    let content_type = response
        .headers()
        .get("content-type")
        .and_then(|v| v.to_str().ok())
        .unwrap_or("")
        .to_owned();
    let text = response.text().await.unwrap();
    Reply {
        status,
        content_type,
        len: text.len(),
        body: serde_json::from_str(&text).unwrap_or(Json::String(text)),
    }
}

/// The reply is a problem with `status` whose errors name `field` with a rule containing
/// `rule`; every error it lists names a field and a rule.
#[track_caller]
fn assert_problem(reply: &Reply, status: u16, field: &str, rule: &str) {
    let body = &reply.body;
    assert_eq!(
        reply.status, status,
        "expected {status} for `{field}`: {body}"
    );
    assert_eq!(reply.content_type, "application/problem+json", "{body}");
    assert_eq!(body["status"], status, "{body}");
    let errors = body["errors"]
        .as_array()
        .unwrap_or_else(|| panic!("no errors member: {body}"));
    for error in errors {
        let (f, r) = (
            error["field"].as_str().unwrap(),
            error["rule"].as_str().unwrap(),
        );
        assert!(!f.is_empty() && !r.is_empty(), "{body}");
    }
    assert!(
        errors
            .iter()
            .any(|e| e["field"] == field && e["rule"].as_str().unwrap().contains(rule)),
        "expected `{field}`: …{rule}… in {body}"
    );
}

/// What the store holds, read from disk after the service stopped.
#[derive(Debug, PartialEq)]
struct Stored {
    examples: usize,
    scores: usize,
    entries: usize,
    models: usize,
    frozen: bool,
}

async fn stop_and_read(app: TestApp) -> Stored {
    let dir = app.dir.clone();
    let temp = app.stop().await;
    let stored = tokio::task::spawn_blocking(move || read_store(&dir))
        .await
        .unwrap();
    drop(temp);
    stored
}

fn read_store(dir: &Path) -> Stored {
    let store = crate::helpers::open_store(dir);
    Stored {
        examples: store.example_count(),
        scores: store.recent_scores(usize::MAX, None).unwrap().len(),
        entries: store.entries(1000).unwrap().len(),
        models: store.models().unwrap().len(),
        frozen: store.freeze().unwrap().is_some(),
    }
}

const EMPTY: Stored = Stored {
    examples: 0,
    scores: 0,
    entries: 0,
    models: 0,
    frozen: false,
};

fn features_text(replace: &str, by: &str) -> String {
    let mut features = valid_features();
    features.as_object_mut().unwrap().remove(replace);
    let text = features.to_string();
    format!("{{\"{replace}\": {by}, {}", &text[1..])
}

fn example_text(features: &str, label: &str, event_time: &str) -> String {
    format!(r#"[{{"features": {features}, "label": {label}, "event_time": {event_time}}}]"#)
}

const WHEN: &str = "\"2026-06-01T00:00:00Z\"";

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn json_nested_100k_levels_deep_is_refused_naming_where_it_is() {
    let app = spawn_app().await;
    let open = "[".repeat(100_000);
    let deep = format!("{open}{}", "]".repeat(100_000));
    // Unclosed: the text ends inside `features`.
    let r = post_text(&app, "/v1/score", format!(r#"{{"features": {open}"#)).await;
    assert_problem(&r, 400, "features", "must be valid JSON");
    // Closed, as a feature's value: read without a depth limit, refused as that feature's value.
    let r = post_text(
        &app,
        "/v1/score",
        format!(
            r#"{{"features": {}}}"#,
            features_text("invoice_amount", &deep)
        ),
    )
    .await;
    assert_problem(&r, 422, "features.invoice_amount", "nested");
    let r = post_text(
        &app,
        "/v1/examples",
        example_text(&features_text("days_to_due", &deep), "1", WHEN),
    )
    .await;
    assert_problem(&r, 422, "[0].features.days_to_due", "nested");
    // As the whole body (the first element cannot be a row) and as a label.
    let r = post_text(&app, "/v1/examples", deep.clone()).await;
    assert_problem(&r, 422, "[0]", "expected struct ExampleRequest");
    let r = post_text(
        &app,
        "/v1/outcomes",
        format!(r#"{{"score_id": "x", "label": {deep}}}"#),
    )
    .await;
    assert_problem(&r, 422, "label", "must be a JSON number, got an array");
    let r = post_text(&app, "/v1/rollback", deep).await;
    assert_problem(&r, 422, "[0]", "invalid type: sequence");
    let (status, _) = app.get("/healthz").await;
    assert_eq!(status, 200, "the service is still up");
    assert_eq!(stop_and_read(app).await, EMPTY);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn numbers_beyond_f64_are_refused_naming_their_field() {
    let app = spawn_app().await;
    for number in ["1e999", "-1e999", "123456789e400"] {
        let r = post_text(
            &app,
            "/v1/score",
            format!(
                r#"{{"features": {}}}"#,
                features_text("invoice_amount", number)
            ),
        )
        .await;
        assert_problem(
            &r,
            422,
            "features.invoice_amount",
            "finite number within f64 range",
        );
        let batch = format!(
            r#"{{"items": [{{"features": {}}}]}}"#,
            features_text("credit_utilisation", number)
        );
        let r = post_text(&app, "/v1/score/batch", batch).await;
        assert_problem(
            &r,
            422,
            "items[0].features.credit_utilisation",
            "finite number",
        );
        let r = post_text(
            &app,
            "/v1/examples",
            example_text(&features_text("invoice_amount", number), "1", WHEN),
        )
        .await;
        assert_problem(&r, 422, "[0].features.invoice_amount", "finite number");
        let r = post_text(
            &app,
            "/v1/examples",
            example_text(&valid_features().to_string(), number, WHEN),
        )
        .await;
        assert_problem(&r, 422, "[0].label", "finite number");
        let r = post_text(
            &app,
            "/v1/outcomes",
            format!(r#"{{"score_id": "x", "label": {number}}}"#),
        )
        .await;
        assert_problem(&r, 422, "label", "finite number");
    }
    assert_eq!(stop_and_read(app).await, EMPTY);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn nan_and_infinity_are_refused_as_bare_tokens_and_as_strings() {
    let app = spawn_app().await;
    for token in ["NaN", "Infinity", "-Infinity"] {
        let r = post_text(
            &app,
            "/v1/score",
            format!(
                r#"{{"features": {}}}"#,
                features_text("invoice_amount", token)
            ),
        )
        .await;
        assert_problem(&r, 400, "features", "NaN and Infinity are not JSON numbers");
        let r = post_text(
            &app,
            "/v1/examples",
            example_text(&features_text("days_to_due", token), "1", WHEN),
        )
        .await;
        assert_problem(
            &r,
            400,
            "[0].features",
            "NaN and Infinity are not JSON numbers",
        );
        let r = post_text(
            &app,
            "/v1/outcomes",
            format!(r#"{{"score_id": "x", "label": {token}}}"#),
        )
        .await;
        assert_problem(&r, 400, "label", "NaN and Infinity are not JSON numbers");

        let quoted = format!("\"{token}\"");
        let r = post_text(
            &app,
            "/v1/score",
            format!(
                r#"{{"features": {}}}"#,
                features_text("invoice_amount", &quoted)
            ),
        )
        .await;
        assert_problem(
            &r,
            422,
            "features.invoice_amount",
            "must be a JSON number, got a string",
        );
        let r = post_text(
            &app,
            "/v1/examples",
            example_text(&valid_features().to_string(), &quoted, WHEN),
        )
        .await;
        assert_problem(&r, 422, "[0].label", "must be a JSON number, got a string");
        let r = post_text(
            &app,
            "/v1/outcomes",
            format!(r#"{{"score_id": "x", "label": {quoted}}}"#),
        )
        .await;
        assert_problem(&r, 422, "label", "must be a JSON number, got a string");
    }
    assert_eq!(stop_and_read(app).await, EMPTY);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_key_sent_twice_is_refused_on_every_route() {
    let app = spawn_app().await;
    let twice = features_text("invoice_amount", r#"1, "invoice_amount": 2"#);
    let r = post_text(&app, "/v1/score", format!(r#"{{"features": {twice}}}"#)).await;
    assert_problem(&r, 422, "features.invoice_amount", "given twice");
    let r = post_text(
        &app,
        "/v1/score/batch",
        format!(r#"{{"items": [{{"features": {twice}}}]}}"#),
    )
    .await;
    assert_problem(&r, 422, "items[0].features.invoice_amount", "given twice");
    // Backfill used to keep the last value silently.
    let r = post_text(&app, "/v1/examples", example_text(&twice, "1", WHEN)).await;
    assert_problem(&r, 422, "[0].features.invoice_amount", "given twice");
    let features = valid_features();
    let r = post_text(
        &app,
        "/v1/score",
        format!(r#"{{"features": {features}, "features": {features}}}"#),
    )
    .await;
    assert_problem(&r, 422, "features", "duplicate field");
    let r = post_text(
        &app,
        "/v1/outcomes",
        r#"{"score_id": "x", "label": 1, "label": 0}"#,
    )
    .await;
    assert_problem(&r, 422, "label", "duplicate field");
    assert_eq!(stop_and_read(app).await, EMPTY);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn unicode_and_100kb_names_are_refused_with_a_bounded_answer() {
    let app = spawn_app().await;
    let unicode = "débiteur_сектор_✓_😀";
    let r = post_text(
        &app,
        "/v1/score",
        format!(r#"{{"features": {}}}"#, features_text(unicode, "1")),
    )
    .await;
    assert_problem(&r, 422, &format!("features.{unicode}"), "unknown feature");
    let r = post_text(
        &app,
        "/v1/examples",
        example_text(&features_text(unicode, "1"), "1", WHEN),
    )
    .await;
    assert_problem(
        &r,
        422,
        &format!("[0].features.{unicode}"),
        "unknown feature",
    );

    let long = "k".repeat(100 * 1024);
    let shown = format!("features.{}…", "k".repeat(80));
    let r = post_text(
        &app,
        "/v1/score",
        format!(r#"{{"features": {}}}"#, features_text(&long, "1")),
    )
    .await;
    assert_problem(&r, 422, &shown, "unknown feature");
    assert!(
        r.len < 4096,
        "the answer does not echo 100 KB: {} bytes",
        r.len
    );
    let r = post_text(
        &app,
        "/v1/examples",
        example_text(&features_text(&long, "1"), "1", WHEN),
    )
    .await;
    assert_problem(&r, 422, &format!("[0].{shown}"), "unknown feature");
    assert!(r.len < 4096, "{} bytes", r.len);
    // As a category value and as a top-level member.
    let r = post_text(
        &app,
        "/v1/score",
        format!(
            r#"{{"features": {}}}"#,
            features_text("debtor_sector", &format!("\"{long}\""))
        ),
    )
    .await;
    assert_problem(&r, 422, "features.debtor_sector", "unknown category");
    assert!(r.len < 4096, "{} bytes", r.len);
    let r = post_text(
        &app,
        "/v1/score",
        format!(r#"{{"features": {}, "{long}": 1}}"#, valid_features()),
    )
    .await;
    assert_eq!(r.status, 422, "{}", r.body);
    let field = r.body["errors"][0]["field"].as_str().unwrap();
    assert!(
        field.starts_with("kkk") && field.chars().count() <= 201,
        "{field}"
    );
    assert!(r.len < 4096, "{} bytes", r.len);
    assert_eq!(stop_and_read(app).await, EMPTY);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn empty_bodies_are_a_400_naming_the_body() {
    let app = spawn_app().await;
    for path in [
        "/v1/score",
        "/v1/score/batch",
        "/v1/outcomes",
        "/v1/examples",
    ] {
        for body in ["", " \n\t "] {
            let r = post_text(&app, path, body).await;
            assert_problem(&r, 400, "body", "must not be empty");
        }
    }
    assert_eq!(stop_and_read(app).await, EMPTY);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_wrong_or_missing_content_type_is_a_415_naming_the_header() {
    let app = spawn_app().await;
    let score = json!({"features": valid_features()}).to_string();
    let example = example_text(&valid_features().to_string(), "1", WHEN);
    for (path, body) in [("/v1/score", &score), ("/v1/examples", &example)] {
        for content_type in [
            Some("text/plain"),
            None,
            Some("application/jsonx"),
            Some("multipart/form-data"),
        ] {
            let r = send(&app, path, content_type, body.clone()).await;
            assert_problem(&r, 415, "Content-Type", "must be application/json");
        }
    }
    // The same bodies with a JSON type are read: the score meets no model, the example is stored.
    let r = send(
        &app,
        "/v1/score",
        Some("application/json; charset=utf-8"),
        score,
    )
    .await;
    assert_eq!(r.status, 503, "{}", r.body);
    let r = send(&app, "/v1/examples", Some("Application/JSON"), example).await;
    assert_eq!(
        (r.status, r.body),
        (200, json!({"inserted": 1, "duplicates": 0}))
    );
    assert_eq!(
        stop_and_read(app).await,
        Stored {
            examples: 1,
            ..EMPTY
        }
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn batches_beyond_server_max_batch_are_refused_naming_the_limit() {
    let temp = tempfile::tempdir().unwrap();
    let mut config = test_config(temp.path());
    config.server.max_batch = 3;
    let app = spawn_app_with(config).await;
    let items: Vec<Json> = (0..4)
        .map(|_| json!({"features": valid_features()}))
        .collect();
    let (status, body) = app
        .post("/v1/score/batch", &json!({ "items": items }))
        .await;
    let r = Reply {
        status,
        content_type: "application/problem+json".into(),
        len: 0,
        body,
    };
    assert_problem(
        &r,
        422,
        "items",
        "at most 3 items (server.max_batch), got 4",
    );
    let rows: Vec<Json> = (0..4)
        .map(|i| json!({"features": valid_features(), "label": 1, "event_time": "2026-06-01T00:00:00Z", "id": format!("r{i}")}))
        .collect();
    let r = post_text(&app, "/v1/examples", Json::Array(rows.clone()).to_string()).await;
    assert_problem(
        &r,
        422,
        "body",
        "send 1 to 3 examples (server.max_batch), got 4",
    );
    let r = post_text(&app, "/v1/examples", "[]").await;
    assert_problem(&r, 422, "body", "got 0");
    // Three fit, and all three are new: the refused four stored nothing.
    let r = post_text(
        &app,
        "/v1/examples",
        Json::Array(rows[..3].to_vec()).to_string(),
    )
    .await;
    assert_eq!(
        (r.status, r.body),
        (200, json!({"inserted": 3, "duplicates": 0}))
    );
    let stored = stop_and_read(app).await;
    drop(temp);
    assert_eq!(
        stored,
        Stored {
            examples: 3,
            ..EMPTY
        }
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn labels_other_than_0_or_1_and_bad_scores_record_nothing() {
    let app = spawn_app().await;
    app.with_first_model().await;
    let (status, scored) = app
        .post("/v1/score", &json!({"features": valid_features()}))
        .await;
    assert_eq!(status, 200, "{scored}");
    let score_id = scored["score_id"].as_str().unwrap().to_owned();
    let cases = [
        ("2", 422, "must be 0 or 1, got 2"),
        ("-1", 422, "must be 0 or 1, got -1"),
        ("0.5", 422, "must be 0 or 1, got 0.5"),
        ("\"1\"", 422, "must be a JSON number, got a string"),
        ("null", 422, "must be a JSON number, got null"),
        ("true", 422, "must be a JSON number, got a boolean"),
        (
            "{\"value\": 1}",
            422,
            "must be a JSON number, got an object",
        ),
    ];
    for (label, status, rule) in cases {
        let r = post_text(
            &app,
            "/v1/outcomes",
            format!(r#"{{"score_id": "{score_id}", "label": {label}}}"#),
        )
        .await;
        assert_problem(&r, status, "label", rule);
        let r = post_text(
            &app,
            "/v1/examples",
            example_text(&valid_features().to_string(), label, WHEN),
        )
        .await;
        assert_problem(&r, status, "[0].label", rule);
    }
    let r = post_text(
        &app,
        "/v1/outcomes",
        format!(r#"{{"score_id": "{score_id}"}}"#),
    )
    .await;
    assert_problem(&r, 422, "label", "missing field");
    // Refused score requests leave no score record behind.
    let r = post_text(
        &app,
        "/v1/score",
        format!(
            r#"{{"features": {}}}"#,
            features_text("debtor_sector", "\"mining\"")
        ),
    )
    .await;
    assert_problem(&r, 422, "features.debtor_sector", "unknown category");
    let r = post_text(&app, "/v1/score", "{\"features\": 7}").await;
    assert_problem(&r, 422, "features", "must be a JSON object");
    // None of the refused labels was recorded: the first real one is new, a different one conflicts.
    let (status, body) = app
        .post("/v1/outcomes", &json!({"score_id": score_id, "label": 1}))
        .await;
    assert_eq!((status, &body["duplicate"]), (201, &json!(false)), "{body}");
    let (status, _) = app
        .post("/v1/outcomes", &json!({"score_id": score_id, "label": 0}))
        .await;
    assert_eq!(status, 409);
    let stored = stop_and_read(app).await;
    assert_eq!(
        stored,
        Stored {
            examples: 1501,
            scores: 1,
            entries: 1,
            models: 1,
            frozen: false
        },
        "1500 backfilled + the one outcome; one score"
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn event_times_far_from_now_are_refused_and_store_nothing() {
    let app = spawn_app().await;
    let day = 24 * 3600 * 1000;
    let quoted = |ms: i64| format!("\"{}\"", to_rfc3339(ms));
    let cases: Vec<(String, &str)> = vec![
        (
            "\"9999-12-31T23:59:59Z\"".into(),
            "between 20 years before now and one day after now",
        ),
        (
            "\"0001-01-01T00:00:00Z\"".into(),
            "between 20 years before now",
        ),
        (
            "\"1970-01-01T00:00:00Z\"".into(),
            "between 20 years before now",
        ),
        (quoted(now_ms() - 21 * 365 * day), "between 20 years"),
        (quoted(now_ms() + 2 * day), "one day after now"),
        (
            "\"2026-13-45T00:00:00Z\"".into(),
            "must be an RFC 3339 timestamp",
        ),
        ("\"last tuesday\"".into(), "must be an RFC 3339 timestamp"),
        ("\"\"".into(), "must be an RFC 3339 timestamp"),
        ("0".into(), "invalid type: integer `0`, expected a string"),
        ("null".into(), "invalid type: null, expected a string"),
    ];
    let good = |id: &str, at: &str| json!({"id": id, "features": valid_features(), "label": 0, "event_time": at});
    for (i, (when, rule)) in cases.iter().enumerate() {
        let bad = format!(
            r#"{{"id": "bad-{i}", "features": {}, "label": 1, "event_time": {when}}}"#,
            valid_features()
        );
        let body = format!(
            "[{}, {bad}]",
            good(&format!("good-{i}"), "2026-06-01T00:00:00Z")
        );
        let r = post_text(&app, "/v1/examples", body).await;
        assert_problem(&r, 422, "[1].event_time", rule);
    }
    // Nothing of those batches was stored: every id is new now, and times just inside the
    // window are accepted.
    let rows: Vec<Json> = (0..cases.len())
        .map(|i| good(&format!("good-{i}"), "2026-06-01T00:00:00Z"))
        .chain([
            good("recent-past", &to_rfc3339(now_ms() - 19 * 365 * day)),
            good("near-future", &to_rfc3339(now_ms() + day / 2)),
        ])
        .collect();
    let (status, body) = app.post("/v1/examples", &Json::Array(rows)).await;
    assert_eq!(
        (status, body),
        (200, json!({"inserted": cases.len() + 2, "duplicates": 0}))
    );
    assert_eq!(
        stop_and_read(app).await,
        Stored {
            examples: cases.len() + 2,
            ..EMPTY
        }
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_path_id_that_is_not_text_or_is_huge_gets_a_bounded_problem() {
    let app = spawn_app().await;
    for path in ["/v1/models/%FF%FE", "/v1/runs/%C3%28"] {
        let response = app.client.get(app.url(path)).send().await.unwrap();
        let r = reply(response).await;
        assert_problem(&r, 422, "id", "must be UTF-8");
    }
    let long = "m".repeat(8 * 1024);
    let r = reply(
        app.client
            .get(app.url(&format!("/v1/models/{long}")))
            .send()
            .await
            .unwrap(),
    )
    .await;
    assert_eq!(r.status, 404, "{}", r.body);
    assert!(r.len < 1024, "the id is not echoed whole: {} bytes", r.len);
    assert_eq!(stop_and_read(app).await, EMPTY);
}

/// A CSV of `rows` scenario rows, with `bad` lines (text) inserted before line `at`.
fn write_csv_with(path: &Path, rows: usize, at: usize, bad: &[&str]) {
    let mut rng = ChaCha8Rng::seed_from_u64(9);
    let mut text = String::from("id,event_time,invoice_amount,days_to_due,debtor_years_trading,prior_late_invoices,credit_utilisation,debtor_sector,submission_channel,paid_late\n");
    let start = now_ms() - 60 * 24 * 3600 * 1000;
    for i in 0..rows {
        if i == at {
            for line in bad {
                text.push_str(line);
                text.push('\n');
            }
        }
        let inv = invoice(&mut rng, Regime::Before);
        let cell = |k: &str| match inv.features.get(k) {
            Some(Json::String(s)) => s.clone(),
            Some(Json::Number(n)) => n.to_string(),
            _ => String::new(),
        };
        text.push_str(&format!(
            "row-{i},{},{},{},{},{},{},{},{},{}\n",
            to_rfc3339(start + i as i64 * 60_000),
            cell("invoice_amount"),
            cell("days_to_due"),
            cell("debtor_years_trading"),
            cell("prior_late_invoices"),
            cell("credit_utilisation"),
            cell("debtor_sector"),
            cell("submission_channel"),
            inv.draw_label(&mut rng)
        ));
    }
    std::fs::write(path, text).unwrap();
}

#[test]
fn csv_rows_with_the_wrong_column_count_are_refused_by_import_and_train() {
    let dir = tempfile::tempdir().unwrap();
    let short = "row-s,2026-06-01T00:00:00Z,100,30";
    let long = "row-l,2026-06-01T00:00:00Z,100,30,4,1,0.4,retail,edi,1,extra,cells";
    write_csv_with(&dir.path().join("rows.csv"), 600, 100, &[short, long]);
    let run = |args: &[&str]| {
        std::process::Command::new(env!("CARGO_BIN_EXE_understudy"))
            .args(args)
            .current_dir(dir.path())
            .output()
            .unwrap()
    };
    for args in [
        &["import", "rows.csv", "--data", "store"][..],
        &["train", "--data", "rows.csv"][..],
    ] {
        let out = run(args);
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert!(!out.status.success(), "{args:?} succeeded");
        assert!(!stderr.contains("panicked"), "{stderr}");
        assert!(
            stderr.contains("2 problems in rows.csv, nothing imported"),
            "{stderr}"
        );
        assert!(
            stderr.contains("line 102: `row`: has 4 columns; the header has 10"),
            "{stderr}"
        );
        assert!(
            stderr.contains("line 103: `row`: has 12 columns; the header has 10"),
            "{stderr}"
        );
    }
    assert!(
        !dir.path().join("store").exists(),
        "the import opened no store"
    );
    // Without the bad lines the same file imports whole.
    write_csv_with(&dir.path().join("rows.csv"), 600, 100, &[]);
    let out = run(&["import", "rows.csv", "--data", "store"]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(read_store(&dir.path().join("store")).examples, 600);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_service_stays_up_through_every_case_above_in_a_row() {
    // One service takes the cases back to back, so a case cannot hide behind a fresh process.
    let app = spawn_app().await;
    let deep = "[".repeat(100_000);
    let bodies = [
        deep.clone(),
        format!(r#"{{"features": {deep}"#),
        String::new(),
        "{\"features\": {\"invoice_amount\": NaN}}".into(),
        "{\"features\": {\"invoice_amount\": 1e999}}".into(),
        format!("{{\"features\": {{\"{}\": 1}}}}", "é".repeat(50_000)),
        "\u{0}\u{1}\u{2}".into(),
        "{\"features\": {}} trailing".into(),
    ];
    for path in [
        "/v1/score",
        "/v1/score/batch",
        "/v1/outcomes",
        "/v1/examples",
        "/v1/rollback",
    ] {
        for body in &bodies {
            let r = post_text(&app, path, body.clone()).await;
            assert!(
                (400..500).contains(&r.status),
                "{path}: {} {}",
                r.status,
                r.body
            );
            assert_eq!(r.content_type, "application/problem+json", "{path}");
        }
    }
    let (status, _) = app.get("/healthz").await;
    assert_eq!(status, 200);
    assert_eq!(stop_and_read(app).await, EMPTY);
}

// ---- Hostile callers: keys in logs, wrong roles, stored strings in the dashboard ----

/// Reads a child's pipe to the end on its own thread, so a chatty log cannot fill the pipe.
fn drain(pipe: impl std::io::Read + Send + 'static) -> std::thread::JoinHandle<String> {
    std::thread::spawn(move || {
        let mut pipe = pipe;
        let mut out = Vec::new();
        let _ = pipe.read_to_end(&mut out);
        String::from_utf8_lossy(&out).into_owned()
    })
}

/// The text without terminal colour codes (`ESC [ … m`), which the log puts around field names.
fn without_colour(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    let mut chars = text.chars();
    while let Some(c) = chars.next() {
        if c == '\u{1b}' {
            for c in chars.by_ref() {
                if c == 'm' {
                    break;
                }
            }
        } else {
            out.push(c);
        }
    }
    out
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn api_keys_never_appear_in_logs_or_error_bodies() {
    use std::process::{Command, Stdio};
    let dir = tempfile::tempdir().unwrap();
    let scorer_key = "sk-scorer-7Qw9Lm2Rt5Yx8Np3";
    let operator_key = "sk-operator-4Hd6Jf1Kz0Vb3Gc8";
    let config = format!(
        "{}\n[[access.keys]]\nname = \"backend\"\nrole = \"scorer\"\nkey = \"{scorer_key}\"\n\n\
         [[access.keys]]\nname = \"ops\"\nrole = \"operator\"\nkey_env = \"HOSTILE_TEST_OPS_KEY\"\n",
        understudy::config::DEFAULT_CONFIG_TOML
    );
    std::fs::write(dir.path().join("keys.toml"), config).unwrap();
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let listen = format!("127.0.0.1:{port}");
    let mut child = Command::new(env!("CARGO_BIN_EXE_understudy"))
        .args([
            "serve",
            "--config",
            "keys.toml",
            "--listen",
            &listen,
            "--data",
            "store",
        ])
        .env("RUST_LOG", "trace")
        .env("HOSTILE_TEST_OPS_KEY", operator_key)
        .current_dir(dir.path())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let stdout = drain(child.stdout.take().unwrap());
    let stderr = drain(child.stderr.take().unwrap());
    let base = format!("http://{listen}");
    let client = reqwest::Client::new();
    let mut up = false;
    for _ in 0..100 {
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
        if let Ok(r) = client.get(format!("{base}/healthz")).send().await {
            up = r.status() == 200;
            break;
        }
    }
    assert!(up, "the server answered /healthz");

    // Right, wrong and malformed: (header name, header value as bytes, expected status).
    let long = format!("{operator_key}{}", "x".repeat(10_000));
    let near = format!("{}X", &operator_key[..operator_key.len() - 1]);
    let mut non_utf8 = b"Bearer \xff\xfe".to_vec();
    non_utf8.extend_from_slice(operator_key.as_bytes());
    let cases: Vec<(&str, Vec<u8>, u16)> = vec![
        (
            "authorization",
            format!("Bearer {operator_key}").into_bytes(),
            200,
        ),
        (
            "authorization",
            format!("bearer {operator_key}").into_bytes(),
            200,
        ),
        (
            "authorization",
            format!("Bearer   {operator_key}  ").into_bytes(),
            200,
        ),
        (
            "authorization",
            format!("Bearer {scorer_key}").into_bytes(),
            403,
        ),
        ("authorization", format!("Bearer {near}").into_bytes(), 401),
        (
            "authorization",
            format!("Bearer {operator_key}{scorer_key}").into_bytes(),
            401,
        ),
        ("authorization", format!("Bearer {long}").into_bytes(), 401),
        (
            "authorization",
            format!("Basic {operator_key}").into_bytes(),
            401,
        ),
        ("authorization", operator_key.as_bytes().to_vec(), 401),
        ("authorization", b"Bearer".to_vec(), 401),
        ("authorization", non_utf8, 401),
        ("x-api-key", operator_key.as_bytes().to_vec(), 401),
    ];
    let mut bodies = String::new();
    for (name, value, expected) in cases {
        let value = reqwest::header::HeaderValue::from_bytes(&value).unwrap();
        for path in [
            "/v1/models",
            &format!("/v1/promotions?limit=0&key={operator_key}"),
        ] {
            let r = reply(
                client
                    .get(format!("{base}{path}"))
                    .header(name, value.clone())
                    .send()
                    .await
                    .unwrap(),
            )
            .await;
            // The promotions call is refused for its limit once the key is accepted.
            let expected = if path.starts_with("/v1/promotions") && expected == 200 {
                422
            } else {
                expected
            };
            assert_eq!(
                r.status, expected,
                "{name}: {value:?} on {path}: {}",
                r.body
            );
            bodies.push_str(&r.body.to_string());
        }
        let r = reply(
            client
                .post(format!("{base}/v1/score"))
                .header(name, value.clone())
                .json(&json!({"features": {"invoice_amount": scorer_key}}))
                .send()
                .await
                .unwrap(),
        )
        .await;
        assert!((400..500).contains(&r.status), "{}", r.body);
        bodies.push_str(&r.body.to_string());
    }
    Command::new("sh")
        .args(["-c", &format!("kill -TERM {}", child.id())])
        .status()
        .unwrap();
    assert!(child.wait().unwrap().success());
    let logs = without_colour(&format!(
        "{}{}",
        stdout.join().unwrap(),
        stderr.join().unwrap()
    ));

    // The capture works: the keys' names are logged when they are used.
    assert!(
        logs.contains("authorized") && logs.contains("key=ops"),
        "{logs}"
    );
    assert!(logs.lines().count() > 20, "{logs}");
    // No key, nor a long piece of one, in any log line or answer (the scorer key was also sent
    // as a feature value, which neither the log nor the refusal may echo).
    for secret in [
        scorer_key,
        operator_key,
        &operator_key[3..20],
        &scorer_key[3..18],
    ] {
        assert!(!logs.contains(secret), "a key in the logs:\n{logs}");
        assert!(!bodies.contains(secret), "a key in an answer: {bodies}");
    }
}

/// What an operator sees of the service's state: models (with the active one and the freeze),
/// the promotion log, the candidate and the runs in flight.
async fn operator_view(app: &TestApp) -> Json {
    use crate::access::{call, OPERATOR_KEY};
    let mut view = serde_json::Map::new();
    for path in [
        "/v1/models",
        "/v1/promotions?limit=1000",
        "/v1/candidate",
        "/healthz",
    ] {
        let (status, body) = call(app, "GET", path, Some(OPERATOR_KEY), &Json::Null).await;
        assert_eq!(status, 200, "{path}: {body}");
        view.insert(path.to_owned(), body);
    }
    Json::Object(view)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_scorer_key_on_operator_routes_changes_nothing() {
    use crate::access::{call, keyed_config, OPERATOR_KEY, SCORER_KEY};
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(keyed_config(temp.path())).await;
    // History through the scorer key, the first model through the operator's.
    let mut rng = ChaCha8Rng::seed_from_u64(21);
    let start = now_ms() - 30 * 24 * 3600 * 1000;
    let rows: Vec<Json> = (0..1500)
        .map(|i| {
            let inv = invoice(&mut rng, Regime::Before);
            json!({"features": inv.features, "label": inv.draw_label(&mut rng),
                   "event_time": to_rfc3339(start + i * 1000), "id": format!("h{i}")})
        })
        .collect();
    for chunk in rows.chunks(750) {
        let (status, body) = call(
            &app,
            "POST",
            "/v1/examples",
            Some(SCORER_KEY),
            &json!(chunk),
        )
        .await;
        assert_eq!(status, 200, "{body}");
    }
    let (status, run) = call(&app, "POST", "/v1/retrain", Some(OPERATOR_KEY), &json!({})).await;
    assert_eq!(status, 202, "{run}");
    let path = format!("/v1/runs/{}", run["run_id"].as_str().unwrap());
    let mut finished = false;
    for _ in 0..600 {
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
        let (_, body) = call(&app, "GET", &path, Some(OPERATOR_KEY), &Json::Null).await;
        if body["run"]["state"] == "finished" {
            assert_eq!(body["entry"]["verdict"], "promoted", "{body}");
            finished = true;
            break;
        }
    }
    assert!(finished, "the first run finished");
    let model = operator_view(&app).await["/v1/models"]["active"].clone();
    let before = operator_view(&app).await;

    let attempts = [
        ("/v1/rollback", json!({})),
        ("/v1/rollback", json!({"to": model})),
        ("/v1/retrain", json!({})),
        ("/v1/freeze", json!({})),
        ("/v1/unfreeze", json!({})),
    ];
    for (path, body) in &attempts {
        let (status, reply) = call(&app, "POST", path, Some(SCORER_KEY), body).await;
        assert_eq!(status, 403, "{path}: {reply}");
        assert_eq!(
            reply["detail"],
            "key `backend` has role `scorer`; this route needs `operator`"
        );
        for key in [None, Some("sk-not-a-key-of-ours-000000")] {
            let (status, _) = call(&app, "POST", path, key, body).await;
            assert_eq!(status, 401, "{path} with {key:?}");
        }
    }
    // A refused retrain would have queued a run by now.
    tokio::time::sleep(std::time::Duration::from_millis(500)).await;
    assert_eq!(operator_view(&app).await, before, "nothing changed");

    // The comparison sees a change when one is made: the operator freezes.
    let (status, _) = call(&app, "POST", "/v1/freeze", Some(OPERATOR_KEY), &json!({})).await;
    assert_eq!(status, 200);
    let after = operator_view(&app).await;
    assert_ne!(after, before);
    assert_eq!(after["/v1/models"]["frozen"], true);
    let stored = stop_and_read(app).await;
    drop(temp);
    assert_eq!(
        stored,
        Stored {
            examples: 1500,
            scores: 0,
            // The run's, and the operator's freeze (a log entry with the key's name).
            entries: 2,
            models: 1,
            frozen: true
        }
    );
}

const IMG: &str = "<img src=x onerror=\"document.body.setAttribute('data-pwned','yes')\">";
const SCRIPT: &str = "<script>document.body.setAttribute('data-pwned','yes')</script>";

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_dashboard_shows_stored_markup_as_text() {
    let Some(browser) = crate::dashboard::browser() else {
        return;
    };
    // Categories are free text in the config; two of them are markup.
    let temp = tempfile::tempdir().unwrap();
    let mut config = test_config(temp.path());
    for feature in &mut config.features {
        match feature.name.as_str() {
            "debtor_sector" => feature.categories.push(IMG.into()),
            "submission_channel" => feature.categories.push(SCRIPT.into()),
            _ => {}
        }
    }
    let app = spawn_app_with(config).await;
    let mut rng = ChaCha8Rng::seed_from_u64(33);
    let start = now_ms() - 30 * 24 * 3600 * 1000;
    let mut hostile = |mut features: serde_json::Map<String, Json>, share: f64| {
        use rand::Rng;
        if rng.gen::<f64>() < share {
            features.insert("debtor_sector".into(), json!(IMG));
        }
        if rng.gen::<f64>() < share {
            features.insert("submission_channel".into(), json!(SCRIPT));
        }
        features
    };
    let mut draw = ChaCha8Rng::seed_from_u64(34);
    let rows: Vec<Json> = (0..1500)
        .map(|i| {
            let inv = invoice(&mut draw, Regime::Before);
            let label = inv.draw_label(&mut draw);
            json!({"features": hostile(inv.features, 0.05), "label": label,
                   "event_time": to_rfc3339(start + i * 1000), "id": format!("h{i}")})
        })
        .collect();
    for chunk in rows.chunks(750) {
        let (status, body) = app.post("/v1/examples", &json!(chunk)).await;
        assert_eq!(status, 200, "{body}");
    }
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "promoted", "{entry}");
    // Recent requests lean on the markup categories (5 % in training, 60 % now), so their
    // bins move most.
    for _ in 0..200 {
        let features = hostile(invoice(&mut draw, Regime::Before).features, 0.6);
        let (status, body) = app.post("/v1/score", &json!({"features": features})).await;
        assert_eq!(status, 200, "{body}");
    }
    tokio::time::sleep(std::time::Duration::from_millis(300)).await;
    let (_, drift) = app.get("/v1/drift").await;
    let bins = drift.to_string();
    assert!(
        bins.contains(&json!(IMG).to_string()[1..20]),
        "the markup reaches the page's data"
    );

    let dom = crate::dashboard::dump_dom(&browser, app.url("/")).await;
    assert!(
        dom.contains(r#"data-loaded="yes""#),
        "the page loaded its data:\n{dom}"
    );
    // Had either string become markup, its handler would have set this attribute on <body>.
    assert!(
        !dom.contains(r#"data-pwned="yes""#),
        "the markup ran:\n{dom}"
    );
    // The rendered document ends where the page's own script starts.
    let page_script = dom
        .find("<script>\n\"use strict\"")
        .expect("the page's script");
    let rendered = &dom[..page_script];
    assert!(
        !rendered.contains("<img"),
        "an img element was created:\n{rendered}"
    );
    assert!(
        !rendered.contains("<script"),
        "a script element was created:\n{rendered}"
    );
    // Both strings are on the page, as text.
    for (feature, text) in [("debtor_sector", IMG), ("submission_channel", SCRIPT)] {
        let escaped = text
            .replace('&', "&amp;")
            .replace('<', "&lt;")
            .replace('>', "&gt;");
        let shown = format!(r#"data-feature="{feature}""#);
        let at = rendered
            .find(&format!(r#"class="drift-bin" {shown}"#))
            .unwrap_or_else(|| panic!("no moved-bin label for {feature}:\n{rendered}"));
        let label = &rendered[at..rendered[at..].find("</text>").unwrap() + at];
        assert!(label.contains(&format!("most moved: {escaped}")), "{label}");
    }
    let stored = stop_and_read(app).await;
    drop(temp);
    assert_eq!(stored.scores, 200);
}
