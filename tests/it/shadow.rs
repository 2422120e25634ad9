//! Shadow scoring and the live gate; drift and outcome coverage.

use std::time::Duration;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};
use understudy::demo::scenario::{invoice, Regime};

use crate::helpers::{spawn_app_with, test_config, TestApp};

const NEEDED: u64 = 240;

fn shadow_config(dir: &std::path::Path) -> understudy::config::Config {
    let mut config = test_config(dir);
    config.shadow.outcomes = NEEDED;
    config
}

/// An active model from the old world, then a candidate from the new one that passes the
/// holdout gate and starts shadowing. Returns (active id, candidate id).
async fn start_shadowing(app: &TestApp) -> (String, String) {
    let first = app.with_first_model().await;
    app.backfill(3000, 12, Regime::After).await;
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "shadowing", "{entry}");
    assert!(entry["reason"]
        .as_str()
        .unwrap()
        .contains("shadow.outcomes"));
    assert_eq!(
        entry["active_after"],
        first.as_str(),
        "nothing promoted yet"
    );
    (first, entry["candidate_id"].as_str().unwrap().to_owned())
}

/// Scores `n` live invoices drawn from `regime` and sends their outcomes.
async fn live_traffic(app: &TestApp, n: usize, seed: u64, regime: Regime, answering: &str) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    for _ in 0..n {
        let inv = invoice(&mut rng, regime);
        let (status, scored) = app
            .post("/v1/score", &json!({"features": inv.features}))
            .await;
        assert_eq!(status, 200, "{scored}");
        assert_eq!(scored["model_id"], answering, "the active model answers");
        let label = inv.draw_label(&mut rng);
        let (status, body) = app
            .post(
                "/v1/outcomes",
                &json!({"score_id": scored["score_id"], "label": label}),
            )
            .await;
        assert_eq!(status, 201, "{body}");
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_better_candidate_is_promoted_after_its_shadowed_outcomes_even_across_a_restart() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(shadow_config(temp.path())).await;
    let (first, candidate) = start_shadowing(&app).await;

    let (_, shown) = app.get("/v1/candidate").await;
    assert_eq!(shown["candidate"]["id"], candidate.as_str(), "{shown}");
    assert_eq!(shown["candidate"]["against"], first.as_str());
    assert_eq!(
        (shown["outcomes"].clone(), shown["needed"].clone()),
        (json!(0), json!(NEEDED))
    );

    // The new world arrives; half the outcomes, then a restart.
    live_traffic(&app, (NEEDED / 2) as usize, 21, Regime::After, &first).await;
    let (_, shown) = app.get("/v1/candidate").await;
    assert_eq!(shown["outcomes"], NEEDED / 2);
    assert!(
        shown["live"]["candidate"]["auc"].as_f64().is_some(),
        "{shown}"
    );
    app.stop().await;

    let app = spawn_app_with(shadow_config(temp.path())).await;
    let (_, shown) = app.get("/v1/candidate").await;
    assert_eq!(
        shown["candidate"]["id"],
        candidate.as_str(),
        "the shadow survives a restart"
    );
    assert_eq!(shown["outcomes"], NEEDED / 2, "and so does its progress");

    live_traffic(&app, (NEEDED / 2) as usize, 22, Regime::After, &first).await;
    let entry = app.newest_entry_by("shadow", 30).await;
    assert_eq!(entry["verdict"], "promoted", "{entry}");
    assert_eq!(entry["window"]["gate_rows"], NEEDED);
    assert!(
        entry["reason"]
            .as_str()
            .unwrap()
            .contains("shadowed outcomes"),
        "{entry}"
    );
    assert_eq!(entry["test"], "delong");
    assert_eq!(entry["active_after"], candidate.as_str());

    // The log entry is written just before the swap and the shadow's end: wait for both.
    let mut settled = false;
    for _ in 0..50 {
        let (_, models) = app.get("/v1/models").await;
        let (_, shown) = app.get("/v1/candidate").await;
        if models["active"] == candidate.as_str() && shown["candidate"].is_null() {
            settled = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    assert!(settled, "the candidate became active and the shadow ended");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_candidate_that_does_not_beat_the_incumbent_live_is_kept() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(shadow_config(temp.path())).await;
    let (first, replaced) = start_shadowing(&app).await;
    // A newer run that also wins on its holdout replaces the shadowing candidate.
    app.backfill(1000, 13, Regime::After).await;
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "shadowing", "{entry}");
    let reason = entry["reason"].as_str().unwrap();
    assert!(
        reason.contains(&format!("replaces the shadowing candidate {replaced}")),
        "{reason}"
    );
    let candidate = entry["candidate_id"].as_str().unwrap().to_owned();
    let (_, shown) = app.get("/v1/candidate").await;
    assert_eq!(shown["candidate"]["id"], candidate.as_str());
    // The world goes back to how it was: the incumbent's world.
    live_traffic(&app, NEEDED as usize, 23, Regime::Before, &first).await;
    let entry = app.newest_entry_by("shadow", 30).await;
    assert_eq!(entry["verdict"], "kept", "{entry}");
    assert_eq!(entry["candidate_id"], candidate.as_str());
    assert_eq!(entry["active_after"], first.as_str());
    let (_, models) = app.get("/v1/models").await;
    assert_eq!(models["active"], first.as_str());
    assert!(app.candidate_gone().await, "the shadow ended");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn drift_shows_a_shifted_feature_in_the_act_band_and_outcome_coverage() {
    let temp = tempfile::tempdir().unwrap();
    let mut config = test_config(temp.path());
    config.schedule.on_drift = true;
    config.drift.check_every = Some(Duration::from_secs(1));
    let app = spawn_app_with(config).await;
    let (status, _) = app.get("/v1/drift").await;
    assert_eq!(status, 503, "no active model yet");
    app.with_first_model().await;

    // Live requests from the same world, except credit utilisation up by 0.4.
    let mut rng = ChaCha8Rng::seed_from_u64(31);
    for i in 0..400 {
        let mut features = invoice(&mut rng, Regime::Before).features;
        let u = features["credit_utilisation"].as_f64().unwrap();
        features.insert("credit_utilisation".into(), json!((u + 0.4).min(5.0)));
        let (status, scored) = app.post("/v1/score", &json!({"features": features})).await;
        assert_eq!(status, 200);
        if i % 4 == 0 {
            app.post(
                "/v1/outcomes",
                &json!({"score_id": scored["score_id"], "label": 0}),
            )
            .await;
        }
    }
    // Score records are written in the background; give the recorder a moment.
    tokio::time::sleep(Duration::from_millis(300)).await;
    let (status, body) = app.get("/v1/drift").await;
    assert_eq!(status, 200, "{body}");
    let drift = &body["drift"];
    assert_eq!(drift["window"]["rows"], 400);
    assert_eq!(drift["enough_rows"], true);
    let feature = |name: &str| {
        drift["features"]
            .as_array()
            .unwrap()
            .iter()
            .find(|f| f["name"] == name)
            .unwrap()
            .clone()
    };
    let shifted = feature("credit_utilisation");
    assert_eq!(shifted["band"], "act", "{shifted}");
    assert!(shifted["psi"].as_f64().unwrap() > 0.25);
    let steady = feature("days_to_due");
    assert_eq!(steady["band"], "stable", "{steady}");
    let coverage = body["coverage"].as_array().unwrap();
    assert_eq!(coverage[0]["age"], "0-1d");
    assert_eq!(coverage[0]["scores"], 400);
    assert_eq!(coverage[0]["with_outcome"], 100);

    // schedule.on_drift starts a run, once, naming what breached.
    let mut drift_entry = None;
    for _ in 0..100 {
        let (_, log) = app.get("/v1/promotions?limit=5").await;
        drift_entry = log["entries"]
            .as_array()
            .unwrap()
            .iter()
            .find(|e| e["trigger"] == "drift")
            .cloned();
        if drift_entry.is_some() {
            break;
        }
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
    let entry = drift_entry.expect("a drift-triggered run");
    let detail = entry["trigger_detail"].as_str().unwrap();
    assert!(detail.contains("credit_utilisation"), "{detail}");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_score_psi_over_fewer_than_min_rows_has_no_band_and_starts_no_run() {
    let temp = tempfile::tempdir().unwrap();
    let mut config = test_config(temp.path());
    config.schedule.on_drift = true;
    config.drift.check_every = Some(Duration::from_secs(1));
    config.drift.min_rows = 100;
    let app = spawn_app_with(config).await;
    app.with_first_model().await;
    // Ordinary traffic answered by the first model fills the feature window.
    let mut rng = ChaCha8Rng::seed_from_u64(41);
    for _ in 0..300 {
        let features = invoice(&mut rng, Regime::After).features;
        let (status, _) = app.post("/v1/score", &json!({"features": features})).await;
        assert_eq!(status, 200);
    }
    app.backfill(3000, 12, Regime::After).await;
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "promoted", "{entry}");
    let second = entry["active_after"].as_str().unwrap().to_owned();
    // Just after the promotion: 50 identical requests answered by the new model. Their
    // scores all fall in one decile bin; a PSI over them alone would be far above drift.act.
    for _ in 0..50 {
        let (status, scored) = app
            .post(
                "/v1/score",
                &json!({"features": crate::helpers::valid_features()}),
            )
            .await;
        assert_eq!(status, 200);
        assert_eq!(scored["model_id"], second.as_str());
    }
    tokio::time::sleep(Duration::from_millis(300)).await;
    let (status, body) = app.get("/v1/drift").await;
    assert_eq!(status, 200, "{body}");
    let drift = &body["drift"];
    assert_eq!(drift["window"]["rows"], 350, "{drift}");
    assert_eq!(
        drift["enough_rows"], true,
        "the feature window is large enough"
    );
    assert_eq!(drift["min_rows"], 100);
    assert_eq!(drift["score_rows"], 50);
    assert_eq!(
        drift["score"],
        Json::Null,
        "no score PSI, so no band: {drift}"
    );
    let note = drift["score_note"].as_str().unwrap();
    assert!(note.starts_with("not enough rows"), "{note}");

    // Two drift checks later, no run was started for the score.
    tokio::time::sleep(Duration::from_millis(2500)).await;
    let (_, log) = app.get("/v1/promotions?limit=20").await;
    for entry in log["entries"].as_array().unwrap() {
        if entry["trigger"] == "drift" {
            let detail = entry["trigger_detail"].as_str().unwrap_or_default();
            assert!(
                !detail.contains("score"),
                "a drift run for the score: {detail}"
            );
        }
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_shadow_past_its_maximum_age_ends_kept() {
    let temp = tempfile::tempdir().unwrap();
    let mut config = shadow_config(temp.path());
    config.shadow.max_age = Some(Duration::from_secs(1));
    let app = spawn_app_with(config).await;
    let (first, candidate) = start_shadowing(&app).await;
    tokio::time::sleep(Duration::from_millis(1200)).await;
    // Any shadowed outcome (or the minute tick) makes the schedule look at the shadow.
    live_traffic(&app, 1, 24, Regime::After, &first).await;
    let entry = app.newest_entry_by("shadow", 30).await;
    assert_eq!(entry["verdict"], "kept", "{entry}");
    assert_eq!(entry["candidate_id"], candidate.as_str());
    let reason = entry["reason"].as_str().unwrap();
    assert!(reason.contains("shadow.max_age"), "{reason}");
    let (_, models) = app.get("/v1/models").await;
    assert_eq!(models["active"], first.as_str());
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_model_that_declines_on_recent_outcomes_starts_a_run_and_says_why() {
    let temp = tempfile::tempdir().unwrap();
    let mut config = test_config(temp.path());
    config.schedule.on_decline = true;
    config.schedule.decline_min_rows = 300;
    config.drift.check_every = Some(Duration::from_secs(1));
    let app = spawn_app_with(config).await;
    let first = app.with_first_model().await;
    // The same world after the first model's cutoff: two checks later, no decline run.
    app.backfill(400, 12, Regime::Before).await;
    tokio::time::sleep(Duration::from_millis(2500)).await;
    let (_, log) = app.get("/v1/promotions?limit=20").await;
    let declines = |log: &Json| {
        log["entries"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|e| e["trigger"] == "decline")
            .cloned()
            .collect::<Vec<_>>()
    };
    assert!(declines(&log).is_empty(), "{log}");
    // Then the way features relate to lateness changes: the check fires and a run starts.
    app.backfill(600, 13, Regime::After).await;
    let mut found = vec![];
    for _ in 0..100 {
        let (_, log) = app.get("/v1/promotions?limit=20").await;
        found = declines(&log);
        if !found.is_empty() {
            break;
        }
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
    let entry = found.first().expect("a decline-triggered run");
    let detail = entry["trigger_detail"].as_str().unwrap();
    assert!(
        detail.starts_with(&format!("auc of {first} on its latest")),
        "{detail}"
    );
    app.stop().await;
}
