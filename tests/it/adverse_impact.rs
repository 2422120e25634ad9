//! The adverse-impact screen through the service: examples carry a monitoring attribute over
//! HTTP (stored, never scored on), and every judged run logs each group's decisions.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};
use understudy::config::{AdverseImpactConfig, Config, Favourable, OnFlag};
use understudy::demo::scenario::{invoice, Regime};
use understudy::time::{now_ms, to_rfc3339};

use crate::dashboard::{browser, render};
use crate::helpers::{spawn_app_with, valid_features, TestApp};

/// Rows of the demo scenario, each with `owner_group`: `b` for the sectors whose risk rises
/// most after the change, `a` otherwise, not recorded on every tenth row. Invented data.
async fn backfill_with_groups(app: &TestApp, n: usize, seed: u64, regime: Regime) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let start = now_ms() - 30 * 24 * 3600 * 1000 + seed as i64 * 10_000_000;
    let rows: Vec<Json> = (0..n)
        .map(|i| {
            let inv = invoice(&mut rng, regime);
            let sector = inv.features["debtor_sector"].as_str().unwrap().to_owned();
            let mut row = json!({"features": inv.features, "label": inv.draw_label(&mut rng),
                "event_time": to_rfc3339(start + i as i64 * 1000), "id": format!("g{seed}-{i}")});
            if i % 10 != 0 {
                let b = ["construction", "wholesale", "hospitality"].contains(&sector.as_str());
                row["monitoring"] = json!({"owner_group": if b { "b" } else { "a" }});
            }
            row
        })
        .collect();
    for chunk in rows.chunks(1000) {
        let (status, body) = app.post("/v1/examples", &Json::Array(chunk.to_vec())).await;
        assert_eq!(status, 200, "{body}");
    }
}

/// The embedded default over `dir` with runs only on request and `owner_group` declared as a
/// monitoring attribute.
fn grouped_config(dir: &std::path::Path) -> Config {
    let mut config = Config::embedded_default();
    config.server.data_dir = dir.to_owned();
    config.schedule.every = None;
    config.schedule.new_labels = None;
    config.monitoring.attributes = vec!["owner_group".into()];
    config
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn examples_carry_a_monitoring_attribute_and_a_flagged_win_is_turned_away() {
    let dir = tempfile::tempdir().unwrap();
    let mut config = grouped_config(dir.path());
    config.guardrails.adverse_impact = Some(AdverseImpactConfig {
        attribute: "owner_group".into(),
        favourable: Favourable::Below,
        threshold: None,
        approval_rate: Some(0.7),
        min_ratio: 0.8,
        min_group_rows: 30,
        on_flag: OnFlag::Reject,
    });
    let app = spawn_app_with(config).await;

    // Refused by name and rule: an undeclared attribute, a value that is not text.
    let row = |monitoring: Json| {
        json!([{"features": valid_features(), "label": 1, "id": "m-1",
                "event_time": to_rfc3339(now_ms() - 1000), "monitoring": monitoring}])
    };
    let (status, body) = app
        .post("/v1/examples", &row(json!({"age": "40-49"})))
        .await;
    assert_eq!(status, 422, "{body}");
    assert_eq!(body["errors"][0]["field"], "[0].monitoring.age", "{body}");
    assert!(
        body["errors"][0]["rule"]
            .as_str()
            .unwrap()
            .contains("monitoring.attributes"),
        "{body}"
    );
    let (status, body) = app
        .post("/v1/examples", &row(json!({"owner_group": 7})))
        .await;
    assert_eq!(status, 422, "{body}");
    assert!(body.to_string().contains("monitoring"), "{body}");

    // The first model: screened on its holdout, no active model beside it.
    backfill_with_groups(&app, 2400, 2, Regime::Before).await;
    let first = app.retrain().await;
    let impact = &first["adverse_impact"];
    assert_eq!(impact["attribute"], "owner_group", "{first}");
    assert!(impact["active"].is_null(), "{impact}");
    assert_eq!(impact["candidate"]["groups"][0]["group"], "a", "{impact}");
    assert_eq!(impact["candidate"]["groups"][1]["group"], "b", "{impact}");

    // The world changes: the challenger wins on the whole gate, but favours group b at under
    // four fifths of group a's rate, so the win is turned away and the log says why.
    backfill_with_groups(&app, 2400, 3, Regime::After).await;
    let second = app.retrain().await;
    assert!(
        second["gain"].as_f64().unwrap() >= 0.02,
        "a win on the gate: {second}"
    );
    assert_eq!(second["verdict"], "rejected", "{second}");
    let reason = second["reason"].as_str().unwrap();
    assert!(reason.contains("adverse-impact screen"), "{reason}");
    assert_eq!(
        second["adverse_impact"]["flagged"],
        json!(["b"]),
        "{second}"
    );
    let groups = &second["adverse_impact"]["active"]["groups"];
    assert_eq!(groups.as_array().unwrap().len(), 2, "{second}");

    // The dashboard's log row shows both models' ratios, the flagged group marked, in a real
    // browser (skipped without Chromium unless UNDERSTUDY_REQUIRE_BROWSER is set).
    if let Some(browser) = browser() {
        // The screenshot is there to look at for overlaps and clipped text.
        let (dom, _) = render(&browser, app.url("/"), "dashboard-adverse-impact.png", 2200).await;
        assert!(dom.contains(r#"data-loaded="yes""#), "{dom}");
        let dom = &dom[..dom.find("<script>").unwrap_or(dom.len())];
        let ratio = second["adverse_impact"]["candidate"]["groups"][1]["ratio"]
            .as_f64()
            .unwrap();
        assert!(
            dom.contains("adverse-impact ratio by owner_group (candidate/active, screening only)"),
            "the screen's line on the log row"
        );
        assert!(
            dom.contains(&format!(r#"<b class="breach">b {ratio:.4}/"#)),
            "group b flagged at ratio {ratio:.4}"
        );
        assert!(dom.contains("not legal findings"), "the caution");
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_outcome_carries_a_monitoring_attribute_onto_the_example_it_makes() {
    let dir = tempfile::tempdir().unwrap();
    let config = grouped_config(dir.path());
    let app = spawn_app_with(config).await;
    app.with_first_model().await;
    let (status, scored) = app
        .post("/v1/score", &json!({"features": valid_features()}))
        .await;
    assert_eq!(status, 200, "{scored}");
    let score_id = scored["score_id"].as_str().unwrap().to_owned();

    // An undeclared name is refused by name and rule, and nothing is recorded.
    let (status, body) = app
        .post(
            "/v1/outcomes",
            &json!({"score_id": score_id, "label": 1, "monitoring": {"age": "40-49"}}),
        )
        .await;
    assert_eq!(status, 422, "{body}");
    assert_eq!(body["errors"][0]["field"], "monitoring.age", "{body}");
    // A declared one is stored on the example the outcome makes (201: the first label).
    let (status, body) = app
        .post(
            "/v1/outcomes",
            &json!({"score_id": score_id, "label": 1, "monitoring": {"owner_group": "b"}}),
        )
        .await;
    assert_eq!(status, 201, "{body}");
    let _dir = app.stop().await;
    let store = crate::helpers::open_store(dir.path());
    let example = understudy::store::Store::example(&store, &score_id)
        .unwrap()
        .expect("the outcome's example");
    assert_eq!(
        example.monitoring,
        [("owner_group".to_owned(), "b".to_owned())].into()
    );
}
