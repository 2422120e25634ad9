//! The service on PostgreSQL (`[store] backend = "postgres"`): it scores, takes outcomes
//! idempotently, and restarts on the same database with its data. The store's own promises
//! are tested on both backends by the store contract suite (`src/store/contract.rs`).

use serde_json::json;
use understudy::config::StoreBackend;

use crate::helpers::{spawn_app_with, test_config, valid_features};
use crate::pg_testdb::fresh_database;

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_service_on_postgres_scores_takes_outcomes_and_restarts_with_its_data() {
    let Some(db) = fresh_database("service_on_postgres") else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let mut config = test_config(dir.path());
    config.store.backend = StoreBackend::Postgres;
    config.store.url = Some(db.url.clone());
    config.store.pool_size = 4;

    let app = spawn_app_with(config.clone()).await;
    let model_id = app.with_first_model().await;
    let (status, scored) = app
        .post("/v1/score", &json!({"features": valid_features()}))
        .await;
    assert_eq!(status, 200, "{scored}");
    assert_eq!(scored["model_id"], model_id.as_str());
    let id = scored["score_id"].clone();
    let (status, body) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": 1}))
        .await;
    assert_eq!((status, body["duplicate"].clone()), (201, json!(false)));
    let (status, body) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": 1}))
        .await;
    assert_eq!((status, body["duplicate"].clone()), (200, json!(true)));
    let (status, body) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": 0}))
        .await;
    assert_eq!(status, 409, "{body}");
    assert_eq!(body["type"], "/problems/conflicting-label");
    let (status, body) = app.get("/readyz").await;
    assert_eq!(status, 200, "{body}");
    app.stop().await;
    // Nothing went to the data dir: sled was never opened.
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);

    // A new process on the same database: the same active model, the same outcomes.
    let app = spawn_app_with(config).await;
    let (status, again) = app
        .post("/v1/score", &json!({"features": valid_features()}))
        .await;
    assert_eq!(status, 200, "{again}");
    assert_eq!(again["model_id"], model_id.as_str());
    assert!(
        again["score_id"].as_str().unwrap() > id.as_str().unwrap(),
        "score ids continue above the stored ones"
    );
    let (status, body) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": 1}))
        .await;
    assert_eq!((status, body["duplicate"].clone()), (200, json!(true)));
    let (status, body) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": 0}))
        .await;
    assert_eq!(status, 409, "{body}");
    let (status, models) = app.get("/v1/models").await;
    assert_eq!(status, 200, "{models}");
    assert!(models.to_string().contains(&model_id), "{models}");
    app.stop().await;
}
