//! The service on PostgreSQL (`[store] backend = "postgres"`): it scores, takes outcomes
//! idempotently, and restarts on the same database with its data. The store's own promises
//! are tested on both backends by the store contract suite (`src/store/contract.rs`).

use serde_json::json;
use understudy::config::StoreBackend;

use crate::helpers::{spawn_app_with, test_config, valid_features};
use crate::pg_testdb::fresh_database;

/// The tests' config with its store on the database at `url` (the data dir stays unused).
fn on_postgres(dir: &std::path::Path, url: &str) -> understudy::config::Config {
    let mut config = test_config(dir);
    config.store.backend = StoreBackend::Postgres;
    config.store.url = Some(url.to_owned());
    config.store.pool_size = 4;
    config
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_service_on_postgres_scores_takes_outcomes_and_restarts_with_its_data() {
    let Some(db) = fresh_database("service_on_postgres") else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let config = on_postgres(dir.path(), &db.url);

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

/// Rows in `scores`, read straight from the database.
async fn stored_scores(url: &str) -> i64 {
    let url = url.to_owned();
    tokio::task::spawn_blocking(move || {
        let mut client = postgres::Client::connect(&url, postgres::NoTls).unwrap();
        client
            .query_one("SELECT count(*) FROM scores", &[])
            .unwrap()
            .get(0)
    })
    .await
    .unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_services_on_one_database_store_each_outcome_once() {
    let Some(db) = fresh_database("two_services") else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let config = on_postgres(dir.path(), &db.url);
    let a = spawn_app_with(config.clone()).await;
    let model_id = a.with_first_model().await;
    // The second process starts on the database the first trained on.
    let b = spawn_app_with(config).await;
    let mut ids = Vec::new();
    for app in [&a, &b].into_iter().cycle().take(20) {
        let (status, scored) = app
            .post("/v1/score", &json!({"features": valid_features()}))
            .await;
        assert_eq!(status, 200, "{scored}");
        assert_eq!(scored["model_id"], model_id.as_str());
        ids.push(scored["score_id"].as_str().unwrap().to_owned());
    }
    let unique: std::collections::HashSet<&String> = ids.iter().collect();
    assert_eq!(
        unique.len(),
        ids.len(),
        "score ids are unique across the two"
    );
    // Records are written off the response path by each process's recorder: wait until
    // both have written theirs (an outcome for a record still in the other process's buffer
    // would be an unknown score).
    for _ in 0..500 {
        if stored_scores(&db.url).await == ids.len() as i64 {
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(10)).await;
    }
    assert_eq!(stored_scores(&db.url).await, ids.len() as i64);
    // Every outcome goes to both at once: label 1 to the first, 1 or 0 to the second.
    for (i, id) in ids.iter().enumerate() {
        let second_label = (i % 2) as u8;
        let to_first = json!({"score_id": id, "label": 1});
        let to_second = json!({"score_id": id, "label": second_label});
        let (first, second) = tokio::join!(
            a.post("/v1/outcomes", &to_first),
            b.post("/v1/outcomes", &to_second),
        );
        let statuses = [first.0, second.0];
        assert_eq!(
            statuses.iter().filter(|&&s| s == 201).count(),
            1,
            "score {id} recorded once: {first:?} {second:?}"
        );
        let other = if first.0 == 201 { second.0 } else { first.0 };
        let same_label = second_label == 1;
        assert_eq!(other, if same_label { 200 } else { 409 }, "{id}");
    }
    a.stop().await;
    b.stop().await;
}
