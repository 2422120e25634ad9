//! A store that cannot write, and runs that fail: write routes answer 503 problems, scoring
//! goes on with the active model, `/readyz` fails while `/healthz` says why, and everything
//! recovers without a restart when the fault clears. A failed run is logged `failed` and
//! leaves the active model alone. The probes themselves do not write while writes succeed.

use std::sync::Arc;
use std::time::Duration;

use serde_json::json;
use understudy::demo::scenario::Regime;
use understudy::store::faults::{Fault, FaultyStore};
use understudy::store::{SledStore, Store};

use crate::helpers::{spawn_app_over, test_config, valid_features, TestApp};

async fn app_over_faulty_store() -> (TestApp, Arc<FaultyStore>, tempfile::TempDir) {
    let temp = tempfile::tempdir().unwrap();
    let config = test_config(temp.path());
    let sled: Arc<dyn Store> = Arc::new(SledStore::open(temp.path()).unwrap());
    let faulty = Arc::new(FaultyStore::new(sled));
    let app = spawn_app_over(config, Arc::clone(&faulty) as Arc<dyn Store>).await;
    (app, faulty, temp)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_store_that_cannot_write_refuses_writes_keeps_scoring_and_recovers() {
    let (app, faulty, _temp) = app_over_faulty_store().await;
    let active = app.with_first_model().await;
    let (status, _) = app.get("/readyz").await;
    assert_eq!(status, 200);

    faulty.set(Fault::Writes);
    // Scoring goes on with the active model; its record waits in memory.
    let (status, scored) = app
        .post("/v1/score", &json!({"features": valid_features()}))
        .await;
    assert_eq!(status, 200, "{scored}");
    assert_eq!(scored["model_id"], active.as_str());
    let during = scored["score_id"].as_str().unwrap().to_owned();

    // Writes are refused with a clear 503 problem and a Retry-After.
    let response = app
        .client
        .post(app.url("/v1/outcomes"))
        .json(&json!({"score_id": during, "label": 1}))
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 503);
    assert_eq!(response.headers()["retry-after"], "5");
    let body: serde_json::Value = response.json().await.unwrap();
    assert!(
        body["detail"]
            .as_str()
            .unwrap()
            .contains("nothing was recorded"),
        "{body}"
    );
    let (status, body) = app
        .post(
            "/v1/examples",
            &json!([{"features": valid_features(), "label": 0,
                     "event_time": understudy::time::to_rfc3339(understudy::time::now_ms()),
                     "id": "during-fault"}]),
        )
        .await;
    assert_eq!(status, 503, "{body}");
    let (status, body) = app.post("/v1/retrain", &json!({})).await;
    assert_eq!(status, 503, "{body}");

    // Liveness stays 200 and says the store refuses writes; readiness fails and says why.
    let (status, health) = app.get("/healthz").await;
    assert_eq!(status, 200);
    assert_eq!(health["store_writable"], false, "{health}");
    assert!(
        health["store_write_error"]
            .as_str()
            .unwrap()
            .contains("injected fault"),
        "{health}"
    );
    assert!(
        health["score_records_pending"].as_u64().unwrap() >= 1,
        "{health}"
    );
    let (status, ready) = app.get("/readyz").await;
    assert_eq!(status, 503, "{ready}");
    assert!(
        ready["detail"].as_str().unwrap().contains("injected fault"),
        "{ready}"
    );

    // The fault clears: no restart, readiness returns, the buffered record reaches the store
    // and its outcome is accepted.
    faulty.set(Fault::None);
    let (status, _) = app.get("/readyz").await;
    assert_eq!(status, 200);
    let mut accepted = None;
    for _ in 0..100 {
        let (status, body) = app
            .post("/v1/outcomes", &json!({"score_id": during, "label": 1}))
            .await;
        if status == 201 {
            accepted = Some(body);
            break;
        }
        assert_eq!(
            status, 503,
            "only the store's own recovery may delay it: {body}"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(
        accepted.is_some(),
        "the outcome is accepted once writes work"
    );
    let (_, health) = app.get("/healthz").await;
    assert_eq!(health["store_writable"], true);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn runs_that_cannot_read_or_that_panic_fail_and_leave_the_active_model() {
    let (app, faulty, _temp) = app_over_faulty_store().await;
    let active = app.with_first_model().await;
    app.backfill(600, 21, Regime::After).await;

    for (fault, reason) in [
        (Fault::ExampleReads, "could not read its data"),
        (Fault::ExampleReadsPanic, "panicked"),
    ] {
        faulty.set(fault);
        let entry = app.retrain().await;
        assert_eq!(entry["verdict"], "failed", "{entry}");
        assert!(
            entry["reason"].as_str().unwrap().contains(reason),
            "{entry}"
        );
        let (_, models) = app.get("/v1/models").await;
        assert_eq!(models["active"], active.as_str(), "{models}");
        let (status, scored) = app
            .post("/v1/score", &json!({"features": valid_features()}))
            .await;
        assert_eq!(status, 200, "{scored}");
        assert_eq!(scored["model_id"], active.as_str());
    }

    // The training thread survived the panic: the next run, with the fault gone, finishes.
    faulty.set(Fault::None);
    let entry = app.retrain().await;
    assert_ne!(entry["verdict"], "failed", "{entry}");
    let (_, log) = app.get("/v1/promotions").await;
    let verdicts: Vec<&str> = log["entries"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["verdict"].as_str().unwrap())
        .collect();
    assert_eq!(
        verdicts.iter().filter(|v| **v == "failed").count(),
        2,
        "{verdicts:?}"
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn health_probes_read_the_last_write_instead_of_writing() {
    let (app, faulty, _temp) = app_over_faulty_store().await;
    // A fresh service with no model: ready, and healthy with a writable store (its start
    // made the one probe write that tells it so).
    let (status, ready) = app.get("/readyz").await;
    assert_eq!(status, 200, "{ready}");
    let (_, health) = app.get("/healthz").await;
    assert_eq!(health["store_writable"], true, "{health}");
    assert!(health["store_last_write_ok"].is_string(), "{health}");
    assert_eq!(health["store_write_error"], serde_json::Value::Null);

    // Liveness never writes, however often it is probed.
    let before = faulty.probe_writes();
    for _ in 0..20 {
        let (status, health) = app.get("/healthz").await;
        assert_eq!(status, 200);
        assert_eq!(health["store_writable"], true, "{health}");
    }
    assert_eq!(
        faulty.probe_writes(),
        before,
        "/healthz made no probe write"
    );

    // Readiness writes only when no write has proved the store for PROOF_MAX_AGE (5 s): 20
    // probes in quick succession make at most one write between them.
    let before = faulty.probe_writes();
    for _ in 0..20 {
        let (status, _) = app.get("/readyz").await;
        assert_eq!(status, 200);
    }
    assert!(
        faulty.probe_writes() - before <= 1,
        "{} probe writes for 20 readiness probes",
        faulty.probe_writes() - before
    );

    // A write that fails is seen by the next probe of either kind, without a write of theirs.
    faulty.set(Fault::Writes);
    let (status, body) = app.post("/v1/freeze", &json!({})).await;
    assert_eq!(status, 503, "{body}");
    let (_, health) = app.get("/healthz").await;
    assert_eq!(health["store_writable"], false, "{health}");
    let (status, _) = app.get("/readyz").await;
    assert_eq!(status, 503);
    faulty.set(Fault::None);
    app.stop().await;
}
