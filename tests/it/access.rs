//! API keys, roles and freeze: every route × every caller, with the exact status.

use std::collections::BTreeMap;

use serde_json::{json, Value as Json};
use understudy::access::Role;
use understudy::config::KeyConfig;

use crate::helpers::{spawn_app_with, test_config, valid_features, TestApp};

pub const SCORER_KEY: &str = "scorer-key-for-the-matrix-0001";
pub const OPERATOR_KEY: &str = "operator-key-for-the-matrix-0001";

pub fn keyed_config(dir: &std::path::Path) -> understudy::config::Config {
    let mut config = test_config(dir);
    let key = |name: &str, role, raw: &str| KeyConfig {
        name: name.into(),
        role,
        key: Some(raw.into()),
        key_sha256: None,
        key_env: None,
    };
    config.access.keys = vec![
        key("backend", Role::Scorer, SCORER_KEY),
        key("ops", Role::Operator, OPERATOR_KEY),
    ];
    config
}

pub async fn call(
    app: &TestApp,
    method: &str,
    path: &str,
    key: Option<&str>,
    body: &Json,
) -> (u16, Json) {
    let url = app.url(path);
    let mut request = match method {
        "GET" => app.client.get(url),
        _ => app.client.post(url).json(body),
    };
    if let Some(key) = key {
        request = request.bearer_auth(key);
    }
    crate::helpers::split(request.send().await.unwrap()).await
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_route_answers_each_role_with_the_exact_status() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(keyed_config(temp.path())).await;
    // A first model, trained with the operator's key.
    let mut history = Vec::new();
    for i in 0..1200 {
        let mut features = valid_features();
        features["credit_utilisation"] = json!((i % 100) as f64 / 80.0);
        history.push(json!({"features": features, "label": i % 3 % 2,
            "event_time": format!("2026-01-{:02}T{:02}:{:02}:00Z", 1 + i / 60, (i / 60) % 24, i % 60), "id": format!("h{i}")}));
    }
    for chunk in history.chunks(600) {
        let (status, _) = call(
            &app,
            "POST",
            "/v1/examples",
            Some(OPERATOR_KEY),
            &json!(chunk),
        )
        .await;
        assert_eq!(status, 200);
    }

    // Each route: a request body and the status an allowed caller gets.
    let score = json!({"features": valid_features()});
    let cases: BTreeMap<(&str, &str), (&str, Json, u16)> = [
        (("POST", "/v1/score"), ("/v1/score", score.clone(), 503)),
        (
            ("POST", "/v1/score/batch"),
            ("/v1/score/batch", json!({"items": [score]}), 503),
        ),
        (
            ("POST", "/v1/outcomes"),
            (
                "/v1/outcomes",
                json!({"score_id": "01NOSUCH", "label": 1}),
                404,
            ),
        ),
        (("POST", "/v1/examples"), ("/v1/examples", json!([]), 422)),
        (
            ("GET", "/v1/promotions"),
            ("/v1/promotions", json!(null), 200),
        ),
        (("GET", "/v1/models"), ("/v1/models", json!(null), 200)),
        (
            ("GET", "/v1/models/{id}"),
            ("/v1/models/m-9-00000000", json!(null), 404),
        ),
        (
            ("GET", "/v1/models/{id}/pmml"),
            ("/v1/models/m-9-00000000/pmml", json!(null), 404),
        ),
        (
            ("GET", "/v1/runs/{id}"),
            ("/v1/runs/r-999", json!(null), 404),
        ),
        (
            ("POST", "/v1/runs/{id}/reproduce"),
            ("/v1/runs/r-999/reproduce", json!({}), 404),
        ),
        (("POST", "/v1/rollback"), ("/v1/rollback", json!({}), 409)),
        (("POST", "/v1/freeze"), ("/v1/freeze", json!({}), 200)),
        (("POST", "/v1/unfreeze"), ("/v1/unfreeze", json!({}), 200)),
        (("GET", "/v1/sign-off"), ("/v1/sign-off", json!(null), 200)),
        (
            ("POST", "/v1/sign-off/{run_id}/approve"),
            (
                "/v1/sign-off/r-999/approve",
                json!({"reason": "reviewed"}),
                404,
            ),
        ),
        (
            ("POST", "/v1/sign-off/{run_id}/decline"),
            (
                "/v1/sign-off/r-999/decline",
                json!({"reason": "reviewed"}),
                404,
            ),
        ),
        (
            ("GET", "/v1/candidate"),
            ("/v1/candidate", json!(null), 200),
        ),
        (("GET", "/v1/drift"), ("/v1/drift", json!(null), 503)),
        (("POST", "/v1/retrain"), ("/v1/retrain", json!({}), 202)),
        (("GET", "/healthz"), ("/healthz", json!(null), 200)),
        (("GET", "/readyz"), ("/readyz", json!(null), 200)),
        (("GET", "/metrics"), ("/metrics", json!(null), 200)),
        (("GET", "/"), ("/", json!(null), 200)),
    ]
    .into_iter()
    .collect();
    let mut routes = understudy::api::routes();
    assert_eq!(routes.len(), cases.len(), "every route has a case");
    // The one call that changes state for the others (a run that may make a model active)
    // goes last, so the statuses above stay those of a service with no model yet.
    routes.sort_by_key(|r| r.path == "/v1/retrain");

    for route in &routes {
        let method = route.method.as_str();
        let (path, body, allowed) = cases
            .get(&(method, route.path))
            .unwrap_or_else(|| panic!("no case for {method} {}", route.path))
            .clone();
        let open = matches!(
            route.access,
            understudy::access::Access::Health | understudy::access::Access::Open
        );
        // /metrics is closed by default (access.open_metrics) and then needs an operator.
        let operator_only = matches!(
            route.access,
            understudy::access::Access::Role(Role::Operator) | understudy::access::Access::Metrics
        );
        let expected = [
            (None, if open { allowed } else { 401 }),
            (
                Some("not-a-key-we-know-000000"),
                if open { allowed } else { 401 },
            ),
            (Some(SCORER_KEY), if operator_only { 403 } else { allowed }),
            (Some(OPERATOR_KEY), allowed),
        ];
        for (key, status) in expected {
            let (got, reply) = call(&app, method, path, key, &body).await;
            assert_eq!(got, status, "{method} {path} with {key:?}: {reply}");
            if method == "GET" {
                // HEAD is answered by the GET route and needs the same key.
                let mut head = app.client.head(app.url(path));
                if let Some(key) = key {
                    head = head.bearer_auth(key);
                }
                let got = head.send().await.unwrap().status().as_u16();
                assert_eq!(got, status, "HEAD {path} with {key:?}");
            }
            if got == 401 || got == 403 {
                assert_eq!(reply["status"], got, "problem+json: {reply}");
                let serialized = reply.to_string();
                assert!(!serialized.contains(SCORER_KEY) && !serialized.contains(OPERATOR_KEY));
            }
        }
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn while_frozen_runs_log_kept_and_the_freeze_survives_a_restart() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(test_config(temp.path())).await;
    let first = app.with_first_model().await;
    let (status, body) = app.post("/v1/freeze", &json!({})).await;
    assert_eq!((status, body["frozen"].clone()), (200, json!(true)));
    app.stop().await;

    let app = spawn_app_with(test_config(temp.path())).await;
    let (_, models) = app.get("/v1/models").await;
    assert_eq!(models["frozen"], true, "{models}");
    // A changed world would promote: frozen, it is kept and says why.
    app.backfill(3000, 12, understudy::demo::scenario::Regime::After)
        .await;
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "kept", "{entry}");
    assert!(
        entry["reason"].as_str().unwrap().starts_with("frozen"),
        "{entry}"
    );
    assert_eq!(entry["active_after"], first.as_str());

    let (status, body) = app.post("/v1/unfreeze", &json!({})).await;
    assert_eq!((status, body["frozen"].clone()), (200, json!(false)));
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "promoted", "{entry}");

    // Frozen again, an operator can still roll back.
    app.post("/v1/freeze", &json!({})).await;
    let (status, body) = app.post("/v1/rollback", &json!({})).await;
    assert_eq!(status, 200, "{body}");
    let (_, models) = app.get("/v1/models").await;
    assert_eq!(
        (models["active"].clone(), models["frozen"].clone()),
        (json!(first), json!(true))
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn metrics_count_requests_scores_and_runs_and_requests_carry_an_id() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(test_config(temp.path())).await;
    let first = app.with_first_model().await;
    for _ in 0..3 {
        let (status, _) = app
            .post("/v1/score", &json!({"features": valid_features()}))
            .await;
        assert_eq!(status, 200);
    }
    let (status, text) = app.get("/metrics").await;
    assert_eq!(status, 200);
    let text = text.as_str().unwrap().to_owned();
    for line in [
        r#"understudy_http_requests_total{route="/v1/score",method="POST",status="200"} 3"#
            .to_owned(),
        format!(r#"understudy_scores_total{{model="{first}"}} 3"#),
        format!(r#"understudy_active_model_info{{model="{first}",family="logistic"}} 1"#),
        r#"understudy_runs_total{verdict="promoted",trigger="manual"} 1"#.to_owned(),
    ] {
        assert!(text.contains(&line), "missing `{line}` in\n{text}");
    }
    assert!(
        text.contains(r#"understudy_active_model_holdout{metric="auc"}"#),
        "{text}"
    );
    assert!(
        text.contains("understudy_training_duration_seconds_count 1"),
        "{text}"
    );

    // A caller's request id comes back; without one the service makes one.
    let response = app
        .client
        .get(app.url("/healthz"))
        .header("x-request-id", "trace-me-42")
        .send()
        .await
        .unwrap();
    assert_eq!(response.headers()["x-request-id"], "trace-me-42");
    let response = app.client.get(app.url("/healthz")).send().await.unwrap();
    let made = response.headers()["x-request-id"]
        .to_str()
        .unwrap()
        .to_owned();
    assert!(ulid::Ulid::from_string(&made).is_ok(), "a ULID: {made}");
    let again = app.client.get(app.url("/healthz")).send().await.unwrap();
    assert_ne!(
        again.headers()["x-request-id"],
        made.as_str(),
        "a new id per request"
    );
    app.stop().await;
}

#[test]
fn without_keys_a_listen_address_beyond_loopback_is_refused() {
    let mut config = understudy::config::Config::embedded_default();
    config.server.listen = "0.0.0.0:8080".parse().unwrap();
    let err = config.validate().unwrap_err().to_string();
    assert!(
        err.contains("server.listen") && err.contains("loopback"),
        "{err}"
    );
    config.access.keys = vec![KeyConfig {
        name: "k".into(),
        role: Role::Operator,
        key: Some("0123456789abcdef".into()),
        key_sha256: None,
        key_env: None,
    }];
    assert!(config.validate().is_ok());
}

/// Runs the binary with `args` against the app, off the async runtime.
async fn understudy(args: Vec<String>) -> std::process::Output {
    tokio::task::spawn_blocking(move || {
        std::process::Command::new(env!("CARGO_BIN_EXE_understudy"))
            .args(&args)
            .env_remove("UNDERSTUDY_SERVER")
            .env_remove("UNDERSTUDY_KEY")
            .output()
            .unwrap()
    })
    .await
    .unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_client_commands_drive_a_running_server_and_fail_with_its_problem_detail() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(keyed_config(temp.path())).await;
    let args = |command: &[&str], key: &str| -> Vec<String> {
        command
            .iter()
            .map(|s| s.to_string())
            .chain([
                "--server".into(),
                app.base.clone(),
                "--key".into(),
                key.into(),
            ])
            .collect()
    };
    let text = |out: &std::process::Output| String::from_utf8_lossy(&out.stdout).into_owned();
    let errors = |out: &std::process::Output| String::from_utf8_lossy(&out.stderr).into_owned();

    // Without a model: status says so; a wrong key fails with the server's detail.
    let out = understudy(args(&["status"], OPERATOR_KEY)).await;
    assert!(out.status.success(), "{}", errors(&out));
    assert!(
        text(&out).contains("active model  none yet"),
        "{}",
        text(&out)
    );
    let out = understudy(args(&["status"], "not-a-key-we-know-000000")).await;
    assert!(!out.status.success());
    assert!(
        errors(&out).contains("401") && errors(&out).contains("Bearer"),
        "{}",
        errors(&out)
    );
    let out = understudy(args(&["freeze"], SCORER_KEY)).await;
    assert!(!out.status.success());
    assert!(errors(&out).contains("403"), "{}", errors(&out));

    // Data, then retrain (waiting for the verdict) through the commands.
    let csv = temp.path().join("rows.csv");
    crate::cli::write_csv(&csv, 1600, false);
    let out = understudy(args(&["import", csv.to_str().unwrap()], SCORER_KEY)).await;
    assert!(out.status.success(), "{}", errors(&out));
    let out = understudy(args(&["retrain"], OPERATOR_KEY)).await;
    assert!(out.status.success(), "{}", errors(&out));
    assert!(text(&out).contains(": promoted"), "{}", text(&out));

    let out = understudy(args(&["models", "--json"], OPERATOR_KEY)).await;
    let models: Json = serde_json::from_slice(&out.stdout).unwrap();
    let active = models["active"].as_str().unwrap().to_owned();
    let out = understudy(args(&["status"], OPERATOR_KEY)).await;
    assert!(
        text(&out).contains(&format!("active model  {active}")),
        "{}",
        text(&out)
    );
    assert!(text(&out).contains("last run"), "{}", text(&out));

    let out = understudy(args(&["freeze"], OPERATOR_KEY)).await;
    assert!(
        text(&out).starts_with("promotions frozen since"),
        "{}",
        text(&out)
    );
    let out = understudy(args(&["status", "--json"], OPERATOR_KEY)).await;
    let status: Json = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(status["models"]["frozen"], true);
    let out = understudy(args(&["unfreeze"], OPERATOR_KEY)).await;
    assert!(out.status.success());
    // Nothing to roll back to: non-zero, with the server's reason.
    let out = understudy(args(&["rollback"], OPERATOR_KEY)).await;
    assert!(!out.status.success());
    assert!(
        errors(&out).contains("no earlier active model"),
        "{}",
        errors(&out)
    );
    let out = understudy(args(
        &["log", "--since", "2000-01-01T00:00:00Z"],
        OPERATOR_KEY,
    ))
    .await;
    assert!(text(&out).contains("promoted"), "{}", text(&out));
    app.stop().await;
}
