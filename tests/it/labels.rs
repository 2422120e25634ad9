//! `POST /v1/outcomes` and `/v1/examples`: joins, idempotency, conflicts, durability.

use serde_json::json;

use crate::helpers::{
    open_store, problem_fields, spawn_app, spawn_app_with, test_config, valid_features,
};

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn outcomes_join_once_repeat_idempotently_and_refuse_conflicts() {
    let app = spawn_app().await;
    app.with_first_model().await;
    let (_, scored) = app
        .post("/v1/score", &json!({"features": valid_features()}))
        .await;
    let id = scored["score_id"].clone();

    let (status, body) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": 0}))
        .await;
    assert_eq!((status, body["duplicate"].clone()), (201, json!(false)));
    let (status, body) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": 0}))
        .await;
    assert_eq!((status, body["duplicate"].clone()), (200, json!(true)));
    let (status, body) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": 1}))
        .await;
    assert_eq!(status, 409, "{body}");
    assert_eq!(body["type"], "/problems/conflicting-label");
    let (status, _) = app
        .post(
            "/v1/outcomes",
            &json!({"score_id": "01NOSUCHSCORE", "label": 1}),
        )
        .await;
    assert_eq!(status, 404);
    let (status, body) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": 2}))
        .await;
    assert_eq!(
        (status, problem_fields(&body)),
        (422, vec!["label".to_owned()])
    );
    let (status, _) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": "1"}))
        .await;
    assert_eq!(status, 422);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn acknowledged_outcomes_and_examples_survive_a_restart() {
    let app = spawn_app().await;
    app.with_first_model().await;
    let mut ids = Vec::new();
    for _ in 0..20 {
        let (_, scored) = app
            .post("/v1/score", &json!({"features": valid_features()}))
            .await;
        let id = scored["score_id"].as_str().unwrap().to_owned();
        let (status, _) = app
            .post("/v1/outcomes", &json!({"score_id": id, "label": 1}))
            .await;
        assert_eq!(status, 201);
        ids.push(id);
    }
    let dir = app.dir.clone();
    let temp = app.stop().await;
    let app = spawn_app_with(test_config(&dir)).await;
    for id in &ids {
        let (status, body) = app
            .post("/v1/outcomes", &json!({"score_id": id, "label": 1}))
            .await;
        assert_eq!(
            (status, body["duplicate"].clone()),
            (200, json!(true)),
            "{id} was kept"
        );
    }
    // Backfilled rows with ids are idempotent too.
    let (status, body) = app
        .post("/v1/examples", &json!([{"id": "backfill11-0", "features": valid_features(), "label": 0, "event_time": "2026-01-01T00:00:00Z"}]))
        .await;
    assert_eq!(
        (status, body),
        (200, json!({"inserted": 0, "duplicates": 1}))
    );
    app.stop().await;
    drop(temp);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn examples_are_validated_row_by_row_and_refused_whole() {
    let app = spawn_app().await;
    let good =
        json!({"features": valid_features(), "label": 1, "event_time": "2026-02-01T08:00:00Z"});
    let mut bad_features = valid_features();
    bad_features["debtor_sector"] = json!("mining");
    let rows = json!([good, {"features": bad_features, "label": 3, "event_time": "last tuesday"}]);
    let (status, body) = app.post("/v1/examples", &rows).await;
    assert_eq!(status, 422, "{body}");
    let fields = problem_fields(&body);
    assert!(
        fields.contains(&"[1].features.debtor_sector".to_owned()),
        "{fields:?}"
    );
    assert!(fields.contains(&"[1].label".to_owned()), "{fields:?}");
    assert!(fields.contains(&"[1].event_time".to_owned()), "{fields:?}");
    let (status, body) = app.post("/v1/examples", &json!([good, good])).await;
    assert_eq!(
        (status, body),
        (200, json!({"inserted": 2, "duplicates": 0}))
    );
    let (status, _) = app.post("/v1/examples", &json!([])).await;
    assert_eq!(status, 422);
    app.stop().await;
}

/// A numeric-label service: days paid late, predicted by a penalized linear model.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn numeric_labels_train_a_linear_model_that_answers_with_a_prediction() {
    let temp = tempfile::tempdir().unwrap();
    let text = understudy::config::DEFAULT_CONFIG_TOML
        .replace(
            "kind = \"binary\"",
            "kind = \"number\"\nmin = -30\nmax = 365",
        )
        .replace("family = \"logistic\"", "family = \"linear\"")
        .replace("metric = \"auc\"", "metric = \"mae\"");
    let mut config = understudy::config::Config::from_toml(&text).unwrap();
    config.server.data_dir = temp.path().to_owned();
    config.schedule.every = None;
    config.schedule.new_labels = None;
    let app = spawn_app_with(config).await;

    // Invented history: days late grow with credit utilisation (rounded to whole days).
    let rows: Vec<serde_json::Value> = (0..1200)
        .map(|i| {
            let utilisation = (i % 100) as f64 / 100.0;
            let mut features = valid_features();
            features["credit_utilisation"] = json!(utilisation);
            json!({
                "features": features,
                "label": (20.0 * utilisation + (i % 7) as f64 - 3.0).round(),
                "event_time": format!("2026-0{}-{:02}T{:02}:00:00Z", 1 + i / 400, 1 + (i % 400) / 16, i % 16),
                "id": format!("n{i}"),
            })
        })
        .collect();
    for chunk in rows.chunks(600) {
        let (status, body) = app.post("/v1/examples", &json!(chunk)).await;
        assert_eq!(status, 200, "{body}");
    }
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "promoted", "{entry}");
    assert!(
        entry["candidate_holdout"]["mae"].as_f64().unwrap() < 3.0,
        "{entry}"
    );
    assert!(entry["candidate_holdout"]["auc"].is_null());

    let (status, scored) = app
        .post("/v1/score", &json!({"features": valid_features()}))
        .await;
    assert_eq!(status, 200, "{scored}");
    assert!(scored["prediction"].as_f64().is_some(), "{scored}");
    assert!(scored.get("probability").is_none(), "{scored}");

    let id = scored["score_id"].clone();
    let (status, body) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": 400}))
        .await;
    assert_eq!(status, 422, "{body}");
    assert_eq!(problem_fields(&body), vec!["label".to_owned()]);
    let (status, _) = app
        .post("/v1/outcomes", &json!({"score_id": id, "label": 12.5}))
        .await;
    assert_eq!(status, 201);
    app.stop().await;
}

/// Every number as an `f64`: an integer the caller sent reads back from a values record as the
/// float of the same value (`30` as `30.0`), as every reader parses it.
fn as_floats(json: &serde_json::Value) -> serde_json::Value {
    match json {
        serde_json::Value::Number(n) => json!(n.as_f64().unwrap()),
        serde_json::Value::Object(map) => {
            serde_json::Value::Object(map.iter().map(|(k, v)| (k.clone(), as_floats(v))).collect())
        }
        other => other.clone(),
    }
}

/// A score that sent every feature is recorded as its values, one with a feature sent as
/// `null` (imputed by the schema) as its text; either way the example its outcome makes
/// carries the features as sent, read back after a restart.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_example_an_outcome_makes_carries_the_features_as_sent() {
    use understudy::store::recorded::RecordedFeatures;
    use understudy::store::Store;

    let app = spawn_app().await;
    app.with_first_model().await;
    let every = valid_features();
    let mut with_null = valid_features();
    with_null["prior_late_invoices"] = serde_json::Value::Null;
    let mut ids = Vec::new();
    for features in [&every, &with_null] {
        let (status, scored) = app
            .post("/v1/score", &json!({ "features": features }))
            .await;
        assert_eq!(status, 200, "{scored}");
        let id = scored["score_id"].as_str().unwrap().to_owned();
        let (status, body) = app
            .post("/v1/outcomes", &json!({"score_id": id, "label": 1}))
            .await;
        assert_eq!(status, 201, "{body}");
        ids.push(id);
    }
    let dir = app.dir.clone();
    let temp = app.stop().await;
    let store = open_store(&dir);

    let record = store.score(&ids[0]).unwrap().unwrap();
    assert!(matches!(record.features, RecordedFeatures::Values { .. }));
    let example = store.example(&ids[0]).unwrap().unwrap();
    assert_eq!(
        as_floats(&serde_json::Value::Object(example.features)),
        as_floats(&every)
    );

    let record = store.score(&ids[1]).unwrap().unwrap();
    assert!(matches!(record.features, RecordedFeatures::Text(_)));
    let example = store.example(&ids[1]).unwrap().unwrap();
    assert_eq!(serde_json::Value::Object(example.features), with_null);
    drop(store);
    drop(temp);
}
