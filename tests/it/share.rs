//! The live traffic share through the real service: sticky routing by `ref`, every answer
//! naming its model, the two-sample live gate promoting a better candidate and keeping a worse
//! one, and the error guardrail stopping a candidate that fails its answers.

use std::collections::HashMap;
use std::sync::Arc;

use futures::StreamExt;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};
use understudy::demo::scenario::{invoice, Regime};
use understudy::model::preprocess::FeatureTransform;
use understudy::model::Estimator;
use understudy::store::Store;

use crate::helpers::{open_store, spawn_app_over, spawn_app_with, test_config, TestApp};

fn share_config(dir: &std::path::Path, fraction: f64, per_arm: u64) -> understudy::config::Config {
    let mut config = test_config(dir);
    config.share.fraction = fraction;
    config.share.outcomes_per_arm = per_arm;
    config
}

/// An active model from the old world, then a candidate from the new one that passes the
/// holdout gate and takes the traffic share. Returns (active id, candidate id).
async fn start_share(app: &TestApp) -> (String, String) {
    let first = app.with_first_model().await;
    app.backfill(3000, 12, Regime::After).await;
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "shadowing", "{entry}");
    assert!(
        entry["reason"].as_str().unwrap().contains("share.fraction"),
        "{entry}"
    );
    (first, entry["candidate_id"].as_str().unwrap().to_owned())
}

/// Scores `items` (features and ref) in batches; returns each answer's (ref, model, score id).
async fn score_all(app: &TestApp, items: &[(Json, String)]) -> Vec<(String, String, String)> {
    let mut answers = Vec::with_capacity(items.len());
    for chunk in items.chunks(1000) {
        let body: Vec<Json> = chunk
            .iter()
            .map(|(features, reference)| json!({"features": features, "ref": reference}))
            .collect();
        let (status, scored) = app.post("/v1/score/batch", &json!({ "items": body })).await;
        assert_eq!(status, 200, "{scored}");
        let results = scored["results"].as_array().unwrap();
        assert_eq!(results.len(), chunk.len());
        for ((_, reference), result) in chunk.iter().zip(results) {
            answers.push((
                reference.clone(),
                result["model_id"].as_str().unwrap().to_owned(),
                result["score_id"].as_str().unwrap().to_owned(),
            ));
        }
    }
    answers
}

/// Live invoices from `regime`, each with a distinct ref; scored, then their outcomes sent (16
/// at a time). Returns how many each model answered.
async fn live_traffic(
    app: &TestApp,
    n: usize,
    seed: u64,
    regime: Regime,
) -> HashMap<String, usize> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let invoices: Vec<_> = (0..n).map(|_| invoice(&mut rng, regime)).collect();
    let items: Vec<(Json, String)> = invoices
        .iter()
        .enumerate()
        .map(|(i, inv)| (json!(inv.features), format!("live-{seed}-{i}")))
        .collect();
    let answers = score_all(app, &items).await;
    let labels: Vec<u8> = invoices
        .iter()
        .map(|inv| inv.draw_label(&mut rng))
        .collect();
    let mut by_model = HashMap::new();
    for (_, model, _) in &answers {
        *by_model.entry(model.clone()).or_insert(0) += 1;
    }
    let sent = futures::stream::iter(answers.iter().zip(&labels))
        .map(|((_, _, score_id), label)| async move {
            app.post(
                "/v1/outcomes",
                &json!({"score_id": score_id, "label": label}),
            )
            .await
        })
        .buffer_unordered(16)
        .collect::<Vec<_>>()
        .await;
    for (status, body) in sent {
        assert_eq!(status, 201, "{body}");
    }
    by_model
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_fifth_of_ten_thousand_references_go_to_the_candidate_and_each_reference_keeps_its_model()
{
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(share_config(temp.path(), 0.2, 200)).await;
    let (first, candidate) = start_share(&app).await;

    let mut rng = ChaCha8Rng::seed_from_u64(41);
    let items: Vec<(Json, String)> = (0..10_000)
        .map(|i| {
            (
                json!(invoice(&mut rng, Regime::After).features),
                format!("customer-{i}"),
            )
        })
        .collect();
    let answers = score_all(&app, &items).await;
    let mut model_of: HashMap<String, String> = HashMap::new();
    for (reference, model, _) in &answers {
        assert!(
            model == &first || model == &candidate,
            "every answer names one of the two models: {model}"
        );
        model_of.insert(reference.clone(), model.clone());
    }
    let by_candidate = answers.iter().filter(|(_, m, _)| m == &candidate).count();
    let share = by_candidate as f64 / answers.len() as f64;
    eprintln!(
        "candidate answered {by_candidate} of {} (share {share:.4})",
        answers.len()
    );
    // Binomial(10000, 0.2) has sd 0.004: 0.2 ± 0.015 is more than 3.7 sd.
    assert!((share - 0.2).abs() <= 0.015, "candidate share {share}");

    // The first 2,000 references again, twice, with other features: the same model each time.
    let mut candidate_answers = by_candidate;
    for round in 0..2 {
        let again: Vec<(Json, String)> = (0..2000)
            .map(|i| {
                (
                    json!(invoice(&mut rng, Regime::Before).features),
                    format!("customer-{i}"),
                )
            })
            .collect();
        for (reference, model, _) in score_all(&app, &again).await {
            assert_eq!(model_of[&reference], model, "round {round}: {reference}");
            candidate_answers += usize::from(model == candidate);
        }
    }
    // No ref: the active model answers.
    let (_, scored) = app
        .post(
            "/v1/score",
            &json!({"features": invoice(&mut rng, Regime::After).features}),
        )
        .await;
    assert_eq!(scored["model_id"], first.as_str());

    // The share shows in /v1/candidate and /metrics.
    let (_, shown) = app.get("/v1/candidate").await;
    assert_eq!(shown["share"]["fraction"], 0.2, "{shown}");
    assert_eq!(
        shown["share"]["candidate"]["answers"], candidate_answers as u64,
        "{shown}"
    );
    assert_eq!(shown["share"]["stopped"], false);
    let metrics = app.get_text("/metrics").await;
    let line = format!(r#"understudy_share_fraction{{candidate="{candidate}"}} 0.2"#);
    assert!(metrics.contains(&line), "{metrics}");
    let line = format!(
        r#"understudy_share_answers{{candidate="{candidate}",arm="candidate"}} {candidate_answers}"#
    );
    assert!(metrics.contains(&line), "{line} in\n{metrics}");

    // The dashboard's share lines, in a real browser (skipped without Chromium, as the
    // dashboard test is).
    if let Some(browser) = crate::dashboard::browser() {
        let (dom, _) =
            crate::dashboard::render(&browser, app.url("/"), "dashboard-share.png", 1700).await;
        let dom = dom[..dom.find("<script>").unwrap_or(dom.len())].to_owned();
        assert!(dom.contains(r#"id="share-line""#), "{dom}");
        assert!(dom.contains("<b>20.0%</b>"), "{dom}");
        let arm = format!("{candidate_answers} answers · 0 failed");
        assert!(dom.contains(&arm), "{arm} in\n{dom}");
        assert!(!dom.contains(r#"id="share-stopped""#));
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_live_gate_promotes_a_better_candidate_on_its_own_arm_and_keeps_a_worse_one() {
    const PER_ARM: u64 = 300;
    for (better, regime, seed) in [(true, Regime::After, 51), (false, Regime::Before, 52)] {
        let temp = tempfile::tempdir().unwrap();
        // The starter's gate: margin 0.02, alpha 0.05.
        let app = spawn_app_with(share_config(temp.path(), 0.5, PER_ARM)).await;
        let (first, candidate) = start_share(&app).await;
        // Enough traffic for both arms to reach PER_ARM outcomes (each gets about half).
        let answered = live_traffic(&app, 2 * PER_ARM as usize + 200, seed, regime).await;
        assert!(
            answered.get(&candidate).copied().unwrap_or(0) as u64 >= PER_ARM,
            "{answered:?}"
        );
        assert!(
            answered.get(&first).copied().unwrap_or(0) as u64 >= PER_ARM,
            "{answered:?}"
        );
        let entry = app.newest_entry_by("shadow", 60).await;
        eprintln!("{}: {}", entry["verdict"], entry["reason"]);
        let arms = &entry["share"]["arms"];
        assert_eq!(arms["test"], "hanley_mcneil_z", "{entry}");
        assert!(
            arms["candidate"]["n"].as_u64().unwrap() >= PER_ARM,
            "{entry}"
        );
        assert!(arms["active"]["n"].as_u64().unwrap() >= PER_ARM, "{entry}");
        assert!(arms["candidate"]["variance"].as_f64().unwrap() > 0.0);
        assert_eq!(entry["share"]["stopped"], false);
        assert!(entry["share"]["paired_p_value"].is_number(), "{entry}");
        assert_eq!(entry["candidate_id"], candidate.as_str());
        if better {
            assert_eq!(entry["verdict"], "promoted", "{entry}");
            assert_eq!(entry["active_after"], candidate.as_str());
        } else {
            assert_eq!(entry["verdict"], "kept", "{entry}");
            assert_eq!(entry["active_after"], first.as_str());
        }
        app.stop().await;
    }
}

/// Makes a stored candidate fail every answer: its first numeric column is divided by a zero
/// scale (an infinite value) and weighted by zero, so its log-odds is 0 × ∞, not a number.
fn break_candidate(store: &dyn Store, id: &str) {
    let mut model = store.model(id).unwrap().unwrap();
    let mut column = 0;
    let mut broken = None;
    for feature in &mut model.preprocessor.features {
        match feature {
            FeatureTransform::Number { scale, .. } => {
                *scale = 0.0;
                broken = Some(column);
                break;
            }
            FeatureTransform::Category { means, .. } => column += means.len(),
        }
    }
    let column = broken.expect("a numeric feature");
    match &mut model.estimator {
        Estimator::Linear { weights, .. } => weights[column] = 0.0,
        other => panic!("expected a linear candidate, got {other:?}"),
    }
    store.put_model(&model).unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_candidate_that_fails_its_answers_trips_the_guardrail_and_the_active_model_answers() {
    let temp = tempfile::tempdir().unwrap();
    let mut config = share_config(temp.path(), 0.5, 200);
    config.share.guard_min_answers = 10;
    let store: Arc<dyn Store> = Arc::new(open_store(temp.path()));
    let app = spawn_app_over(config.clone(), Arc::clone(&store)).await;
    let (first, candidate) = start_share(&app).await;
    app.stop().await;
    break_candidate(store.as_ref(), &candidate);

    let app = spawn_app_over(config, Arc::clone(&store)).await;
    let (_, shown) = app.get("/v1/candidate").await;
    assert_eq!(
        shown["candidate"]["id"],
        candidate.as_str(),
        "the share survived the restart"
    );
    let mut rng = ChaCha8Rng::seed_from_u64(61);
    let items: Vec<(Json, String)> = (0..200)
        .map(|i| {
            (
                json!(invoice(&mut rng, Regime::After).features),
                format!("guard-{i}"),
            )
        })
        .collect();
    for (reference, model, _) in score_all(&app, &items).await {
        assert_eq!(
            model, first,
            "{reference}: a failed candidate answer falls back"
        );
    }
    let entry = app.newest_entry_by("shadow", 60).await;
    assert_eq!(entry["verdict"], "kept", "{entry}");
    assert_eq!(entry["share"]["stopped"], true, "{entry}");
    assert!(
        entry["reason"]
            .as_str()
            .unwrap()
            .contains("error guardrail"),
        "{entry}"
    );
    let errors = entry["share"]["candidate_errors"].as_u64().unwrap();
    assert!(errors >= 10, "{entry}");
    assert_eq!(
        entry["share"]["candidate_answers"].as_u64().unwrap(),
        errors
    );
    assert_eq!(entry["share"]["active_errors"], 0);
    assert_eq!(entry["active_after"], first.as_str());
    assert!(app.candidate_gone().await, "the share ended");
    app.stop().await;
}
