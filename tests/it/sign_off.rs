//! Sign-off over HTTP against the real service: a passed gate waits for a person; approval
//! serves the candidate (once, across a restart), a refusal and an expiry never do, four eyes
//! keeps the starter from approving, and every operator action names its key in the log.

use std::time::Duration;

use serde_json::{json, Value as Json};
use understudy::access::Role;
use understudy::config::{Config, KeyConfig};
use understudy::demo::scenario::Regime;

use crate::access::{call, keyed_config, OPERATOR_KEY};
use crate::helpers::{spawn_app_with, test_config, valid_features, TestApp};

/// A second operator key, for the four-eyes rule.
const SECOND_OPERATOR_KEY: &str = "second-operator-key-for-sign-off";

/// Two operator keys (`ops`, `ops2`) and a scorer, sign-off on with the given expiry.
fn sign_off_config(dir: &std::path::Path, four_eyes: bool, expires: &str) -> Config {
    let mut config = keyed_config(dir);
    config.access.keys.push(KeyConfig {
        name: "ops2".into(),
        role: Role::Operator,
        key: Some(SECOND_OPERATOR_KEY.into()),
        key_sha256: None,
        key_env: None,
    });
    config.gate.sign_off = true;
    config.gate.four_eyes = four_eyes;
    config.gate.sign_off_expires = Some(humantime::parse_duration(expires).unwrap());
    config.validate().unwrap();
    config
}

/// Backfills through the operator key (the helpers' `backfill` sends none).
async fn backfill(app: &TestApp, n: usize, seed: u64, regime: Regime) {
    use rand::SeedableRng;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let start = understudy::time::now_ms() - 30 * 24 * 3600 * 1000 + seed as i64 * 10_000_000;
    let rows: Vec<Json> = (0..n)
        .map(|i| {
            let inv = understudy::demo::scenario::invoice(&mut rng, regime);
            json!({"features": inv.features, "label": inv.draw_label(&mut rng),
                   "event_time": understudy::time::to_rfc3339(start + i as i64 * 1000),
                   "id": format!("backfill{seed}-{i}")})
        })
        .collect();
    for chunk in rows.chunks(1000) {
        let (status, body) = call(
            app,
            "POST",
            "/v1/examples",
            Some(OPERATOR_KEY),
            &json!(chunk),
        )
        .await;
        assert_eq!(status, 200, "{body}");
    }
}

/// Starts a run with `key` (and `reason`) and waits for its log entry.
async fn retrain(app: &TestApp, key: &str, reason: Option<&str>) -> Json {
    let body = match reason {
        Some(reason) => json!({ "reason": reason }),
        None => json!({}),
    };
    let (status, queued) = call(app, "POST", "/v1/retrain", Some(key), &body).await;
    assert_eq!(status, 202, "{queued}");
    let run = queued["run_id"].as_str().unwrap().to_owned();
    for _ in 0..600 {
        tokio::time::sleep(Duration::from_millis(100)).await;
        let (_, body) = call(
            app,
            "GET",
            &format!("/v1/runs/{run}"),
            Some(key),
            &json!(null),
        )
        .await;
        if body["run"]["state"] == "finished" {
            return body;
        }
    }
    panic!("run {run} did not finish in 60 s");
}

async fn decide(app: &TestApp, run: &str, action: &str, key: &str, reason: &str) -> (u16, Json) {
    let path = format!("/v1/sign-off/{run}/{action}");
    call(app, "POST", &path, Some(key), &json!({ "reason": reason })).await
}

async fn log(app: &TestApp) -> Vec<Json> {
    let (status, body) = call(
        app,
        "GET",
        "/v1/promotions?limit=100",
        Some(OPERATOR_KEY),
        &json!(null),
    )
    .await;
    assert_eq!(status, 200, "{body}");
    body["entries"].as_array().unwrap().clone()
}

async fn active(app: &TestApp) -> Option<String> {
    let (_, models) = call(app, "GET", "/v1/models", Some(OPERATOR_KEY), &json!(null)).await;
    models["active"].as_str().map(str::to_owned)
}

/// The model that answers a score request (503 without one).
async fn answering_model(app: &TestApp) -> (u16, Option<String>) {
    let score = json!({"features": valid_features()});
    let (status, body) = call(app, "POST", "/v1/score", Some(OPERATOR_KEY), &score).await;
    (status, body["model_id"].as_str().map(str::to_owned))
}

/// A service with sign-off on whose first model was approved by `ops2`, and a second run
/// started by `ops` on a changed world that passed its gate and waits. Returns the waiting
/// run's id, its candidate and the first model.
async fn waiting_second_run(app: &TestApp) -> (String, String, String) {
    backfill(app, 1500, 11, Regime::Before).await;
    let first = retrain(app, OPERATOR_KEY, Some("first model")).await;
    assert_eq!(first["entry"]["verdict"], "waiting", "{first}");
    assert_eq!(
        answering_model(app).await.0,
        503,
        "nothing serves before the sign-off"
    );
    let first_run = first["run"]["run_id"].as_str().unwrap();
    let (status, body) = decide(
        app,
        first_run,
        "approve",
        SECOND_OPERATOR_KEY,
        "first model reviewed",
    )
    .await;
    assert_eq!(status, 200, "{body}");
    let first_model = body["entry"]["active_after"].as_str().unwrap().to_owned();

    backfill(app, 3000, 12, Regime::After).await;
    let second = retrain(app, OPERATOR_KEY, Some("the world changed")).await;
    let entry = &second["entry"];
    assert_eq!(entry["verdict"], "waiting", "{entry}");
    assert_eq!(second["run"]["requested_by"]["key"], "ops", "{second}");
    assert_eq!(
        entry["actor"],
        json!({"key": "ops", "reason": "the world changed"})
    );
    assert_eq!(
        entry["active_after"],
        first_model.as_str(),
        "not served yet"
    );
    let candidate = entry["candidate_id"].as_str().unwrap().to_owned();
    (
        entry["run_id"].as_str().unwrap().to_owned(),
        candidate,
        first_model,
    )
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn four_eyes_refuses_the_starter_and_the_other_keys_approval_serves_the_candidate_once_across_a_restart(
) {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(sign_off_config(temp.path(), true, "7d")).await;
    let (run, candidate, first) = waiting_second_run(&app).await;

    // The waiting candidate with its evidence, and the commands that decide it.
    let (status, waiting) = call(
        &app,
        "GET",
        "/v1/sign-off",
        Some(OPERATOR_KEY),
        &json!(null),
    )
    .await;
    assert_eq!(status, 200, "{waiting}");
    assert_eq!(waiting["waiting"]["run_id"], run.as_str());
    assert_eq!(waiting["waiting"]["candidate_id"], candidate.as_str());
    assert_eq!(waiting["waiting"]["started_by"], "ops");
    assert_eq!(waiting["waiting"]["approvable"], true, "{waiting}");
    assert!(
        waiting["entry"]["candidate_gate"]["auc"].is_number(),
        "{waiting}"
    );
    assert_eq!(
        waiting["waiting"]["commands"]["approve"],
        format!("understudy approve {run} --reason \"...\"")
    );
    assert_eq!(
        answering_model(&app).await.1.as_deref(),
        Some(first.as_str())
    );

    // The key that started the run may not approve it.
    let (status, refused) = decide(&app, &run, "approve", OPERATOR_KEY, "mine").await;
    assert_eq!(status, 403, "{refused}");
    assert_eq!(refused["type"], "/problems/four-eyes");
    assert!(
        refused["detail"]
            .as_str()
            .unwrap()
            .contains("gate.four_eyes"),
        "{refused}"
    );
    // A sign-off needs a reason.
    let (status, refused) = call(
        &app,
        "POST",
        &format!("/v1/sign-off/{run}/approve"),
        Some(SECOND_OPERATOR_KEY),
        &json!({}),
    )
    .await;
    assert_eq!(status, 422, "{refused}");
    assert_eq!(refused["errors"][0]["field"], "reason", "{refused}");

    let (status, approved) = decide(
        &app,
        &run,
        "approve",
        SECOND_OPERATOR_KEY,
        "gain and segments reviewed",
    )
    .await;
    assert_eq!(status, 200, "{approved}");
    let entry = &approved["entry"];
    assert_eq!(
        (entry["trigger"].as_str(), entry["verdict"].as_str()),
        (Some("sign_off"), Some("promoted"))
    );
    assert_eq!(
        entry["actor"],
        json!({"key": "ops2", "reason": "gain and segments reviewed"})
    );
    assert_eq!(entry["sign_off"]["decision"], "approved");
    assert_eq!(entry["sign_off"]["run_id"], run.as_str());
    assert_eq!(entry["sign_off"]["started_by"], "ops");
    assert_eq!(
        answering_model(&app).await.1.as_deref(),
        Some(candidate.as_str())
    );
    // Approving again finds nothing waiting.
    let (status, again) = decide(&app, &run, "approve", SECOND_OPERATOR_KEY, "again").await;
    assert_eq!(status, 404, "{again}");
    app.stop().await;

    // After a restart the approved model serves, nothing waits, and the log holds one
    // approval of that run.
    let app = spawn_app_with(sign_off_config(temp.path(), true, "7d")).await;
    assert_eq!(active(&app).await.as_deref(), Some(candidate.as_str()));
    assert_eq!(
        answering_model(&app).await.1.as_deref(),
        Some(candidate.as_str())
    );
    let (_, waiting) = call(
        &app,
        "GET",
        "/v1/sign-off",
        Some(OPERATOR_KEY),
        &json!(null),
    )
    .await;
    assert_eq!(waiting, json!({"waiting": null}));
    let approvals = log(&app)
        .await
        .into_iter()
        .filter(|e| e["sign_off"]["run_id"] == run.as_str())
        .count();
    assert_eq!(approvals, 1);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_declined_candidate_is_never_served_and_the_log_names_the_key_and_reason() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(sign_off_config(temp.path(), true, "7d")).await;
    let (run, candidate, first) = waiting_second_run(&app).await;
    // Declining needs no second pair of eyes: the starter withdraws her own candidate.
    let (status, declined) = decide(
        &app,
        &run,
        "decline",
        OPERATOR_KEY,
        "trained over a broken week",
    )
    .await;
    assert_eq!(status, 200, "{declined}");
    let entry = &declined["entry"];
    assert_eq!(entry["verdict"], "declined");
    assert_eq!(
        entry["actor"],
        json!({"key": "ops", "reason": "trained over a broken week"})
    );
    assert!(
        entry["reason"].as_str().unwrap().contains("ops declined"),
        "{entry}"
    );
    assert_eq!(active(&app).await.as_deref(), Some(first.as_str()));
    assert_eq!(
        answering_model(&app).await.1.as_deref(),
        Some(first.as_str())
    );
    // It can no longer be approved.
    let (status, refused) = decide(&app, &run, "approve", SECOND_OPERATOR_KEY, "too late").await;
    assert_eq!(
        (status, refused["type"].as_str()),
        (404, Some("/problems/not-waiting"))
    );
    // The candidate stays stored, for the record.
    let (status, _) = call(
        &app,
        "GET",
        &format!("/v1/models/{candidate}"),
        Some(OPERATOR_KEY),
        &json!(null),
    )
    .await;
    assert_eq!(status, 200);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_candidate_waiting_longer_than_sign_off_expires_ends_expired_in_the_log() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(sign_off_config(temp.path(), false, "2s")).await;
    backfill(&app, 1500, 11, Regime::Before).await;
    let run = retrain(&app, OPERATOR_KEY, None).await;
    assert_eq!(run["entry"]["verdict"], "waiting", "{run}");
    let run_id = run["run"]["run_id"].as_str().unwrap().to_owned();
    // The schedule's tick (a tenth of the expiry, at least a second) ends it.
    let mut expired = None;
    for _ in 0..100 {
        tokio::time::sleep(Duration::from_millis(100)).await;
        expired = log(&app)
            .await
            .into_iter()
            .find(|e| e["verdict"] == "expired");
        if expired.is_some() {
            break;
        }
    }
    let expired = expired.expect("an expired entry within 10 s");
    assert_eq!(expired["trigger"], "sign_off");
    assert_eq!(expired["sign_off"]["decision"], "expired");
    assert_eq!(expired["sign_off"]["run_id"], run_id.as_str());
    assert!(expired["actor"].is_null(), "nobody decided: {expired}");
    let (_, waiting) = call(
        &app,
        "GET",
        "/v1/sign-off",
        Some(OPERATOR_KEY),
        &json!(null),
    )
    .await;
    assert_eq!(waiting, json!({"waiting": null}));
    assert_eq!(active(&app).await, None);
    let (status, refused) = decide(&app, &run_id, "approve", OPERATOR_KEY, "late").await;
    assert_eq!(status, 404, "{refused}");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_approval_is_refused_while_frozen_and_a_rollback_cannot_serve_an_unapproved_candidate() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(sign_off_config(temp.path(), false, "7d")).await;
    let (run, _, first) = waiting_second_run(&app).await;
    let (status, _) = call(
        &app,
        "POST",
        "/v1/freeze",
        Some(OPERATOR_KEY),
        &json!({"reason": "audit"}),
    )
    .await;
    assert_eq!(status, 200);
    let (status, refused) = decide(&app, &run, "approve", OPERATOR_KEY, "go").await;
    assert_eq!(
        (status, refused["type"].as_str()),
        (409, Some("/problems/frozen")),
        "{refused}"
    );
    let (_, waiting) = call(
        &app,
        "GET",
        "/v1/sign-off",
        Some(OPERATOR_KEY),
        &json!(null),
    )
    .await;
    assert_eq!(waiting["waiting"]["approvable"], false, "{waiting}");
    assert!(
        waiting["waiting"]["blocked_by"]
            .as_str()
            .unwrap()
            .contains("frozen"),
        "{waiting}"
    );
    call(&app, "POST", "/v1/unfreeze", Some(OPERATOR_KEY), &json!({})).await;
    // A rollback "to" the waiting candidate would serve it without a sign-off: refused.
    let candidate = waiting["waiting"]["candidate_id"].as_str().unwrap();
    let (status, refused) = call(
        &app,
        "POST",
        "/v1/rollback",
        Some(OPERATOR_KEY),
        &json!({"to": candidate, "reason": "shortcut"}),
    )
    .await;
    assert_eq!(status, 409, "{refused}");
    assert!(
        refused["detail"]
            .as_str()
            .unwrap()
            .contains("gate.sign_off"),
        "{refused}"
    );
    assert_eq!(active(&app).await.as_deref(), Some(first.as_str()));
    let (status, approved) = decide(
        &app,
        &run,
        "approve",
        SECOND_OPERATOR_KEY,
        "after the audit",
    )
    .await;
    assert_eq!(status, 200, "{approved}");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn freeze_unfreeze_rollback_and_retrain_log_the_acting_key_or_an_open_api() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(keyed_config(temp.path())).await;
    backfill(&app, 1500, 11, Regime::Before).await;
    let run = retrain(&app, OPERATOR_KEY, Some("first fit")).await;
    assert_eq!(run["entry"]["verdict"], "promoted", "{run}");
    let (status, frozen) = call(
        &app,
        "POST",
        "/v1/freeze",
        Some(OPERATOR_KEY),
        &json!({"reason": "quarter end"}),
    )
    .await;
    assert_eq!(status, 200, "{frozen}");
    assert_eq!(
        (frozen["by"].as_str(), frozen["reason"].as_str()),
        (Some("ops"), Some("quarter end"))
    );
    let (_, models) = call(&app, "GET", "/v1/models", Some(OPERATOR_KEY), &json!(null)).await;
    assert_eq!(
        (
            models["frozen_by"].as_str(),
            models["frozen_reason"].as_str()
        ),
        (Some("ops"), Some("quarter end"))
    );
    let (status, refused) = call(
        &app,
        "POST",
        "/v1/unfreeze",
        Some(OPERATOR_KEY),
        &json!({"reason": "  "}),
    )
    .await;
    assert_eq!(
        (status, refused["errors"][0]["field"].as_str()),
        (422, Some("reason")),
        "{refused}"
    );
    // No body is no reason; a body of blanks is not JSON (Schemathesis found it accepted).
    let blank = app
        .client
        .post(app.url("/v1/unfreeze"))
        .bearer_auth(OPERATOR_KEY)
        .header("content-type", "application/json")
        .body("\n")
        .send()
        .await
        .unwrap();
    assert_eq!(blank.status().as_u16(), 400);
    let (status, refused) = call(
        &app,
        "POST",
        "/v1/freeze",
        Some(OPERATOR_KEY),
        &json!({"why": "x"}),
    )
    .await;
    assert_eq!(status, 422, "unknown fields are refused: {refused}");
    let (status, _) = call(
        &app,
        "POST",
        "/v1/unfreeze",
        Some(OPERATOR_KEY),
        &json!({"reason": "done"}),
    )
    .await;
    assert_eq!(status, 200);
    let actions: Vec<(String, Json)> = log(&app)
        .await
        .into_iter()
        .filter(|e| !e["actor"].is_null())
        .map(|e| {
            (
                e["trigger"].as_str().unwrap().to_owned(),
                e["actor"].clone(),
            )
        })
        .collect();
    assert_eq!(
        actions,
        [
            (
                "unfreeze".to_owned(),
                json!({"key": "ops", "reason": "done"})
            ),
            (
                "freeze".to_owned(),
                json!({"key": "ops", "reason": "quarter end"})
            ),
            (
                "manual".to_owned(),
                json!({"key": "ops", "reason": "first fit"})
            ),
        ]
    );
    app.stop().await;

    // With no keys there is nobody to name: the key is null, the reason is kept.
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(test_config(temp.path())).await;
    let (status, _) = app.post("/v1/freeze", &json!({"reason": "open box"})).await;
    assert_eq!(status, 200);
    let (_, log) = app.get("/v1/promotions").await;
    assert_eq!(
        log["entries"][0]["actor"],
        json!({"key": null, "reason": "open box"})
    );
    assert!(
        log["entries"][0]["reason"]
            .as_str()
            .unwrap()
            .starts_with("the open API froze"),
        "{log}"
    );
    app.stop().await;
}

#[test]
fn four_eyes_needs_sign_off_and_two_operator_keys() {
    let temp = tempfile::tempdir().unwrap();
    let mut config = keyed_config(temp.path());
    config.gate.four_eyes = true;
    let err = config.validate().unwrap_err().to_string();
    assert!(
        err.contains("gate.four_eyes") && err.contains("gate.sign_off"),
        "{err}"
    );
    config.gate.sign_off = true;
    let err = config.validate().unwrap_err().to_string();
    assert!(err.contains("two operator keys"), "{err}");
    assert!(sign_off_config(temp.path(), true, "1h").validate().is_ok());
}

/// Runs the binary with `args` and the operator key `key` against `app`, off the runtime.
async fn understudy(app: &TestApp, args: &[&str], key: &str) -> std::process::Output {
    let mut args: Vec<String> = args.iter().map(|s| s.to_string()).collect();
    args.extend([
        "--server".into(),
        app.base.clone(),
        "--key".into(),
        key.into(),
    ]);
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
async fn the_commands_show_the_waiting_run_and_sign_it_off_with_a_reason() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(sign_off_config(temp.path(), true, "7d")).await;
    let (run, candidate, _) = waiting_second_run(&app).await;
    let text = |out: &std::process::Output| String::from_utf8_lossy(&out.stdout).into_owned();
    let errors = |out: &std::process::Output| String::from_utf8_lossy(&out.stderr).into_owned();

    let out = understudy(&app, &["status"], OPERATOR_KEY).await;
    assert!(out.status.success(), "{}", errors(&out));
    assert!(
        text(&out).contains(&format!(
            "sign-off      run {run}'s candidate {candidate} waits"
        )),
        "{}",
        text(&out)
    );
    assert!(
        text(&out).contains(&format!("understudy approve {run} --reason")),
        "{}",
        text(&out)
    );
    // The starter's approval fails with the server's four-eyes detail and exit status 3.
    let out = understudy(&app, &["approve", &run, "--reason", "mine"], OPERATOR_KEY).await;
    assert_eq!(out.status.code(), Some(3), "{}", errors(&out));
    assert!(errors(&out).contains("gate.four_eyes"), "{}", errors(&out));
    let out = understudy(
        &app,
        &["approve", &run, "--reason", "second pair of eyes"],
        SECOND_OPERATOR_KEY,
    )
    .await;
    assert!(out.status.success(), "{}", errors(&out));
    assert!(
        text(&out).starts_with("promoted (ops2 approved run"),
        "{}",
        text(&out)
    );
    let out = understudy(&app, &["freeze", "--reason", "month end"], OPERATOR_KEY).await;
    assert!(out.status.success(), "{}", errors(&out));
    let out = understudy(&app, &["status"], OPERATOR_KEY).await;
    assert!(text(&out).contains("by ops: month end"), "{}", text(&out));
    let out = understudy(&app, &["log", "--limit", "3"], OPERATOR_KEY).await;
    assert!(
        text(&out).contains("      by ops2: second pair of eyes"),
        "{}",
        text(&out)
    );
    assert!(
        text(&out).contains("      by ops: month end"),
        "{}",
        text(&out)
    );
    app.stop().await;
}
