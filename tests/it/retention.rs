//! Score retention over HTTP: the background compaction deletes the oldest score records while
//! scoring goes on, keeps exactly the newest, and leaves outcomes and their examples alone.

use std::collections::HashSet;
use std::time::{Duration, Instant};

use serde_json::json;
use understudy::store::Store;

use crate::helpers::{spawn_app_with, test_config, valid_features, TestApp};

const KEEP: u64 = 300;

/// A counter or gauge's value in the `/metrics` exposition.
async fn metric(app: &TestApp, name: &str) -> u64 {
    let response = app.client.get(app.url("/metrics")).send().await.unwrap();
    assert_eq!(response.status(), 200);
    let text = response.text().await.unwrap();
    text.lines()
        .find_map(|line| line.strip_prefix(name)?.strip_prefix(' '))
        .unwrap_or_else(|| panic!("{name} not in /metrics:\n{text}"))
        .trim()
        .parse()
        .unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn retention_deletes_the_oldest_scores_in_the_background_while_scoring_goes_on() {
    let temp = tempfile::tempdir().unwrap();
    let mut config = test_config(temp.path());
    config.drift.window_rows = KEEP as usize;
    config.drift.min_rows = 100;
    config.retention.scores_max_age = None;
    config.retention.scores_max_count = Some(KEEP);
    config.retention.check_every = Duration::from_secs(1);
    config.validate().unwrap();
    let app = spawn_app_with(config).await;
    app.with_first_model().await;

    // Score in batches until compaction has run during scoring, then a few batches more.
    let mut ids: Vec<String> = Vec::new();
    let mut with_outcome: Vec<String> = Vec::new();
    let mut batches_after_compaction = 0;
    let deadline = Instant::now() + Duration::from_secs(300);
    while batches_after_compaction < 5 {
        assert!(
            Instant::now() < deadline,
            "no compaction after {} scores",
            ids.len()
        );
        let items: Vec<_> = (0..100)
            .map(|_| json!({"features": valid_features()}))
            .collect();
        let (status, body) = app
            .post("/v1/score/batch", &json!({ "items": items }))
            .await;
        assert_eq!(status, 200, "{body}");
        let batch: Vec<String> = body["results"]
            .as_array()
            .unwrap()
            .iter()
            .map(|r| r["score_id"].as_str().unwrap().to_owned())
            .collect();
        // One outcome per batch, sent while its score is still stored.
        let (status, body) = app
            .post(
                "/v1/outcomes",
                &json!({"score_id": batch[0], "label": ids.len() % 2}),
            )
            .await;
        assert_eq!(status, 201, "{body}");
        with_outcome.push(batch[0].clone());
        ids.extend(batch);
        let (status, body) = app
            .post("/v1/score", &json!({"features": valid_features()}))
            .await;
        assert_eq!(status, 200, "{body}");
        ids.push(body["score_id"].as_str().unwrap().to_owned());
        if metric(&app, "understudy_score_records_compacted_total").await > 0 {
            batches_after_compaction += 1;
        }
    }
    let scored = ids.len() as u64;
    assert!(scored > 2 * KEEP, "scored {scored}");

    // Once every record is written and a pass has run, exactly KEEP remain.
    loop {
        let compacted = metric(&app, "understudy_score_records_compacted_total").await;
        assert!(
            compacted <= scored - KEEP,
            "compacted {compacted} of {scored}"
        );
        if compacted == scored - KEEP {
            break;
        }
        assert!(
            Instant::now() < deadline,
            "compaction stopped at {compacted} of {}",
            scored - KEEP
        );
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
    assert_eq!(metric(&app, "understudy_score_records").await, KEEP);

    // A deleted score's outcome: new → unknown (404), repeated → still a duplicate.
    let oldest_without = ids.iter().find(|id| !with_outcome.contains(id)).unwrap();
    let (status, body) = app
        .post(
            "/v1/outcomes",
            &json!({"score_id": oldest_without, "label": 1}),
        )
        .await;
    assert_eq!(status, 404, "{body}");
    let (status, body) = app
        .post(
            "/v1/outcomes",
            &json!({"score_id": with_outcome[0], "label": 0}),
        )
        .await;
    assert_eq!((status, &body["duplicate"]), (200, &json!(true)), "{body}");

    app.stop().await;
    let store = crate::helpers::open_store(temp.path());
    assert_eq!(store.score_count(), KEEP);
    // The kept are exactly the newest by id (ULIDs sort by time).
    let mut sorted = ids.clone();
    sorted.sort();
    let kept: HashSet<&String> = ids
        .iter()
        .filter(|id| store.score(id).unwrap().is_some())
        .collect();
    let newest: HashSet<&String> = sorted[sorted.len() - KEEP as usize..].iter().collect();
    assert_eq!(kept, newest);
    // Every outcome stands as its example, its score deleted or not.
    assert_eq!(store.example_count(), 1500 + with_outcome.len());
    for id in &with_outcome {
        assert!(store.has_outcome(id).unwrap());
    }
}
