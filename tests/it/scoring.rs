//! `POST /v1/score` and `/v1/score/batch`: validation, the no-model answer, results, records.

use serde_json::json;

use crate::helpers::{problem_fields, spawn_app, valid_features};

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn with_no_active_model_scoring_answers_503_saying_how_to_get_one() {
    let app = spawn_app().await;
    let response = app
        .client
        .post(app.url("/v1/score"))
        .json(&json!({"features": valid_features()}))
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 503);
    assert_eq!(
        response.headers()["content-type"],
        "application/problem+json"
    );
    let body: serde_json::Value = response.json().await.unwrap();
    assert_eq!(body["status"], 503);
    assert!(
        body["detail"].as_str().unwrap().contains("/v1/retrain"),
        "{body}"
    );
    // Ready all the same: a fresh service must be reachable to receive its first examples
    // and its first retrain.
    let (status, ready) = app.get("/readyz").await;
    assert_eq!(status, 200, "{ready}");
    assert_eq!(ready["active_model"], serde_json::Value::Null, "{ready}");
    assert!(
        ready["note"].as_str().unwrap().contains("no active model"),
        "{ready}"
    );
    let (status, _) = app.get("/healthz").await;
    assert_eq!(status, 200);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn invalid_features_get_422_naming_the_field_and_the_rule() {
    let app = spawn_app().await;
    let cases = [
        ("colour", json!("red"), "unknown feature"),
        ("days_to_due", json!("thirty"), "must be a JSON number"),
        ("days_to_due", json!(366), "<= 365"),
        ("invoice_amount", json!(-5), ">= 0"),
        ("debtor_sector", json!("mining"), "unknown category"),
        ("credit_utilisation", serde_json::Value::Null, "required"),
    ];
    for (field, value, rule) in cases {
        let mut features = valid_features();
        features[field] = value;
        let (status, body) = app.post("/v1/score", &json!({"features": features})).await;
        assert_eq!(status, 422, "{field}: {body}");
        assert_eq!(
            body["errors"][0]["field"],
            format!("features.{field}"),
            "{body}"
        );
        assert!(
            body["errors"][0]["rule"].as_str().unwrap().contains(rule),
            "{field}: {body}"
        );
    }
    // A missing feature under missing = "reject".
    let mut features = valid_features();
    features.as_object_mut().unwrap().remove("invoice_amount");
    let (status, body) = app.post("/v1/score", &json!({"features": features})).await;
    assert_eq!(
        (status, problem_fields(&body)),
        (422, vec!["features.invoice_amount".to_owned()])
    );
    // A number beyond f64 is valid JSON but no f64: refused naming the field, not a 500.
    let response = app
        .client
        .post(app.url("/v1/score"))
        .header("content-type", "application/json")
        .body(r#"{"features": {"invoice_amount": 1e999}}"#)
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 422);
    let body: serde_json::Value = response.json().await.unwrap();
    assert!(
        problem_fields(&body).contains(&"features.invoice_amount".to_owned()),
        "{body}"
    );
    // Wrong content type and unknown top-level keys.
    let response = app
        .client
        .post(app.url("/v1/score"))
        .body("{}")
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 415);
    let (status, _) = app
        .post(
            "/v1/score",
            &json!({"features": valid_features(), "extra": 1}),
        )
        .await;
    assert_eq!(status, 422);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_score_returns_probability_and_top_five_factors_and_is_recorded() {
    let app = spawn_app().await;
    let model_id = app.with_first_model().await;
    let (status, body) = app
        .post(
            "/v1/score",
            &json!({"features": valid_features(), "ref": "inv-1"}),
        )
        .await;
    assert_eq!(status, 200, "{body}");
    assert_eq!(body["model_id"], model_id);
    let p = body["probability"].as_f64().unwrap();
    assert!(p > 0.0 && p < 1.0);
    let factors = body["factors"].as_array().unwrap();
    assert_eq!(factors.len(), 5);
    let sizes: Vec<f64> = factors
        .iter()
        .map(|f| f["contribution"].as_f64().unwrap().abs())
        .collect();
    assert!(
        sizes.windows(2).all(|w| w[0] >= w[1]),
        "ordered by size: {sizes:?}"
    );
    // The record exists: its outcome is accepted (an unknown id would be 404).
    let (status, _) = app
        .post(
            "/v1/outcomes",
            &json!({"score_id": body["score_id"], "label": 1}),
        )
        .await;
    assert_eq!(status, 201);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_batch_is_answered_in_order_and_refused_whole_when_one_item_is_bad() {
    let app = spawn_app().await;
    app.with_first_model().await;
    let mut low = valid_features();
    low["prior_late_invoices"] = json!(0);
    low["credit_utilisation"] = json!(0.0);
    let mut high = valid_features();
    high["prior_late_invoices"] = json!(9);
    high["credit_utilisation"] = json!(1.2);
    let items = json!({"items": [{"features": low}, {"features": high}, {"features": low}]});
    let (status, body) = app.post("/v1/score/batch", &items).await;
    assert_eq!(status, 200, "{body}");
    let results = body["results"].as_array().unwrap();
    assert_eq!(results.len(), 3);
    let (single_status, single) = app.post("/v1/score", &json!({"features": high})).await;
    assert_eq!(single_status, 200);
    assert_eq!(
        results[1]["probability"], single["probability"],
        "item 2 is the high-risk one"
    );
    assert_eq!(results[0]["probability"], results[2]["probability"]);

    let mut bad = valid_features();
    bad["days_to_due"] = json!(-1);
    let (status, body) = app
        .post(
            "/v1/score/batch",
            &json!({"items": [{"features": low}, {"features": bad}]}),
        )
        .await;
    assert_eq!(
        (status, problem_fields(&body)),
        (422, vec!["items[1].features.days_to_due".to_owned()])
    );

    let too_many: Vec<_> = (0..1001).map(|_| json!({"features": low})).collect();
    let (status, body) = app
        .post("/v1/score/batch", &json!({"items": too_many}))
        .await;
    assert_eq!(
        (status, problem_fields(&body)),
        (422, vec!["items".to_owned()])
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_decision_tree_answers_with_its_path_contributions_as_factors() {
    let temp = tempfile::tempdir().unwrap();
    let logistic = "family = \"logistic\"\npenalty = \"elastic_net\"\nl1_ratio = [0.5, 1.0]\n\
                    lambda_count = 20\nlambda_min_ratio = 0.001\n";
    assert!(understudy::config::DEFAULT_CONFIG_TOML.contains(logistic));
    let text = understudy::config::DEFAULT_CONFIG_TOML.replace(
        logistic,
        "family = \"decision_tree\"\nmax_depth = [5]\nmin_leaf = [20]\n",
    );
    let mut config = understudy::config::Config::from_toml(&text).unwrap();
    config.server.data_dir = temp.path().to_owned();
    config.schedule.every = None;
    config.schedule.new_labels = None;
    let app = crate::helpers::spawn_app_with(config).await;
    app.with_first_model().await;
    let (status, body) = app
        .post("/v1/score", &json!({"features": valid_features()}))
        .await;
    assert_eq!(status, 200, "{body}");
    let features = [
        "invoice_amount",
        "days_to_due",
        "debtor_years_trading",
        "prior_late_invoices",
        "credit_utilisation",
        "debtor_sector",
        "submission_channel",
    ];
    let factors = body["factors"].as_array().unwrap();
    assert_eq!(factors.len(), 5, "{body}");
    let sizes: Vec<f64> = factors
        .iter()
        .map(|f| f["contribution"].as_f64().unwrap().abs())
        .collect();
    // Changes in a share of rows: each within [-1, 1], the largest first, and a depth-5 tree
    // on this data splits on something, so the largest is not zero.
    assert!(sizes.windows(2).all(|w| w[0] >= w[1]), "{body}");
    assert!(sizes[0] > 0.0 && sizes[0] <= 1.0, "{body}");
    assert!(
        factors
            .iter()
            .all(|f| features.contains(&f["feature"].as_str().unwrap())),
        "{body}"
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_score_is_answered_as_json_with_one_content_type_and_the_callers_request_id() {
    let app = spawn_app().await;
    app.with_first_model().await;
    for path in ["/v1/score", "/v1/score/batch"] {
        let body = if path == "/v1/score" {
            json!({"features": valid_features()})
        } else {
            json!({"items": [{"features": valid_features()}]})
        };
        let response = app
            .client
            .post(app.url(path))
            .header("x-request-id", "caller-chosen-id-7")
            .json(&body)
            .send()
            .await
            .unwrap();
        assert_eq!(response.status(), 200, "{path}");
        let types: Vec<_> = response.headers().get_all("content-type").iter().collect();
        assert_eq!(types, ["application/json"], "{path}");
        assert_eq!(
            response.headers()["x-request-id"],
            "caller-chosen-id-7",
            "{path}"
        );
        let answer: serde_json::Value = response.json().await.unwrap();
        assert!(answer.is_object(), "{path}: {answer}");
    }
    app.stop().await;
}
