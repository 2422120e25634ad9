//! Runs, the gate's verdicts, the promotion log, models, rollback and restart.

use serde_json::json;
use understudy::demo::scenario::Regime;

use crate::helpers::{spawn_app, spawn_app_with, test_config};

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_run_with_too_little_data_is_rejected_and_logged() {
    let app = spawn_app().await;
    app.backfill(200, 3, Regime::Before).await;
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "rejected");
    assert!(
        entry["reason"]
            .as_str()
            .unwrap()
            .contains("training.min_rows"),
        "{entry}"
    );
    let (_, log) = app.get("/v1/promotions").await;
    assert_eq!(log["entries"].as_array().unwrap().len(), 1);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_log_explains_each_verdict_and_the_models_list_marks_the_active_one() {
    let app = spawn_app().await;
    let first = app.with_first_model().await;
    // More of the same world: the challenger cannot beat the incumbent by the margin.
    app.backfill(1500, 12, Regime::Before).await;
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "kept", "{entry}");
    assert_eq!(entry["active_after"], first);
    for key in ["candidate_gate", "active_gate", "gain", "chosen", "choice"] {
        assert!(!entry[key].is_null(), "{key} missing from {entry}");
    }
    let search = entry["search"].as_array().unwrap();
    // The default grid: two l1_ratio paths of 20 lambdas, 5 folds × 2 repeats each.
    assert_eq!(search.len(), 40, "one result per grid value");
    for setting in search {
        assert_eq!(setting["folds"].as_array().unwrap().len(), 10);
        assert!(setting["cv_std"].as_f64().is_some());
        assert!(setting["cv_se"].as_f64().is_some());
    }
    assert!(
        entry["fit"]["nonzero"].as_u64().is_some(),
        "{}",
        entry["fit"]
    );
    assert_eq!(entry["fit"]["converged"], true);
    let window = &entry["window"];
    assert_eq!(window["rows"], 3000);
    assert_eq!(window["holdout_rows"], 750);

    let (_, log) = app.get("/v1/promotions?limit=1").await;
    assert_eq!(log["entries"].as_array().unwrap().len(), 1);
    assert_eq!(log["entries"][0]["seq"], 2, "newest first");
    let (status, _) = app.get("/v1/promotions?limit=0").await;
    assert_eq!(status, 422);
    // The cursor pages through the whole log: seq 2, then seq 1, then nothing more.
    assert_eq!(log["next_before"], 2);
    let (_, older) = app.get("/v1/promotions?limit=1&before=2").await;
    assert_eq!(older["entries"][0]["seq"], 1);
    assert_eq!(older["next_before"], serde_json::Value::Null);
    let (_, none) = app.get("/v1/promotions?before=1").await;
    assert_eq!(none["entries"].as_array().unwrap().len(), 0);
    let (status, problem) = app.get("/v1/promotions?before=soon").await;
    assert_eq!(status, 422);
    assert!(problem.to_string().contains("before"), "{problem}");

    let (_, models) = app.get("/v1/models").await;
    assert_eq!(models["active"], first);
    let listed = models["models"].as_array().unwrap();
    assert_eq!(listed.len(), 2);
    assert_eq!(listed.iter().filter(|m| m["active"] == true).count(), 1);
    let (status, model) = app.get(&format!("/v1/models/{first}")).await;
    assert_eq!(status, 200);
    assert_eq!(model["model"]["estimator"]["kind"], "linear");
    let columns = model["coefficients"]["columns"].as_array().unwrap();
    assert_eq!(
        columns.len(),
        model["model"]["estimator"]["weights"]
            .as_array()
            .unwrap()
            .len()
    );
    assert!(columns
        .iter()
        .any(|c| c["column"] == "debtor_sector=retail"));
    let (status, _) = app.get("/v1/models/m-999-00000000").await;
    assert_eq!(status, 404);
    let (status, _) = app.get("/v1/runs/r-999").await;
    assert_eq!(status, 404);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_changed_world_promotes_the_challenger_and_rollback_undoes_it_across_a_restart() {
    let app = spawn_app().await;
    let first = app.with_first_model().await;
    app.backfill(4800, 13, Regime::After).await;
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "promoted", "{entry}");
    let second = entry["active_after"].as_str().unwrap().to_owned();
    assert_ne!(second, first);
    assert!(entry["gain"].as_f64().unwrap() >= 0.02);
    let (_, ready) = app.get("/readyz").await;
    assert_eq!(ready["active_model"], second);

    // Restart: the promotion survives.
    let dir = app.dir.clone();
    let temp = app.stop().await;
    let app = spawn_app_with(test_config(&dir)).await;
    let (_, ready) = app.get("/readyz").await;
    assert_eq!(ready["active_model"], second);

    let (status, body) = app.post("/v1/rollback", &json!({})).await;
    assert_eq!(status, 200, "{body}");
    assert_eq!(body["entry"]["trigger"], "rollback");
    assert_eq!(body["entry"]["active_after"], first);
    let (_, ready) = app.get("/readyz").await;
    assert_eq!(ready["active_model"], first);
    let (status, _) = app.post("/v1/rollback", &json!({})).await;
    assert_eq!(status, 409, "nothing earlier than the first model");
    let (status, _) = app
        .post("/v1/rollback", &json!({"to": "m-999-00000000"}))
        .await;
    assert_eq!(status, 404);
    let (status, body) = app.post("/v1/rollback", &json!({"to": second})).await;
    assert_eq!(status, 200, "{body}");

    // And the rollback survives a restart too.
    let temp2 = app.stop().await;
    let app = spawn_app_with(test_config(&dir)).await;
    let (_, ready) = app.get("/readyz").await;
    assert_eq!(ready["active_model"], second);
    let (_, log) = app.get("/v1/promotions").await;
    let verdicts: Vec<&str> = log["entries"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["trigger"].as_str().unwrap())
        .collect();
    assert_eq!(verdicts, ["rollback", "rollback", "manual", "manual"]);
    app.stop().await;
    drop((temp, temp2));
}

/// Polls the log until an entry with `trigger` appears (or 60 s pass).
async fn wait_for_trigger(app: &crate::helpers::TestApp, trigger: &str) -> serde_json::Value {
    for _ in 0..600 {
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
        let (_, log) = app.get("/v1/promotions").await;
        if let Some(entry) = log["entries"]
            .as_array()
            .unwrap()
            .iter()
            .find(|e| e["trigger"] == trigger)
        {
            return entry.clone();
        }
    }
    panic!("no run with trigger {trigger} within 60 s");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn enough_new_labels_start_a_run_on_their_own() {
    let temp = tempfile::tempdir().unwrap();
    let mut config = test_config(temp.path());
    config.schedule.new_labels = Some(1000);
    let app = spawn_app_with(config).await;
    app.backfill(900, 21, Regime::Before).await;
    tokio::time::sleep(std::time::Duration::from_millis(500)).await;
    let (_, log) = app.get("/v1/promotions").await;
    assert!(
        log["entries"].as_array().unwrap().is_empty(),
        "900 labels are below the threshold"
    );
    app.backfill(200, 22, Regime::Before).await;
    let entry = wait_for_trigger(&app, "new_labels").await;
    assert_eq!(entry["verdict"], "promoted", "{entry}");
    assert_eq!(entry["window"]["rows"], 1100);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_interval_starts_runs_on_its_own() {
    let temp = tempfile::tempdir().unwrap();
    let mut config = test_config(temp.path());
    config.schedule.every = Some(std::time::Duration::from_secs(1));
    let app = spawn_app_with(config).await;
    app.backfill(1000, 23, Regime::Before).await;
    let entry = wait_for_trigger(&app, "interval").await;
    assert!(
        ["promoted", "rejected"].contains(&entry["verdict"].as_str().unwrap()),
        "{entry}"
    );
    app.stop().await;
}

/// The (nice value, scheduling policy) of every thread of this process named `name` (Linux
/// `/proc`, fields 19 and 41 of `stat`, counted after the parenthesised command name; policy
/// 0 is `SCHED_OTHER`, 5 `SCHED_IDLE`).
#[cfg(target_os = "linux")]
fn priorities_of_threads(name: &str) -> Vec<(i64, i64)> {
    let mut values = Vec::new();
    for task in std::fs::read_dir("/proc/self/task").unwrap().flatten() {
        let comm = std::fs::read_to_string(task.path().join("comm")).unwrap_or_default();
        if comm.trim() != name {
            continue;
        }
        let stat = std::fs::read_to_string(task.path().join("stat")).unwrap_or_default();
        if let Some(after) = stat.rsplit_once(')').map(|(_, rest)| rest) {
            // After the name: state is field 3, so field k is the (k - 3)th.
            let fields: Vec<&str> = after.split_whitespace().collect();
            if let (Some(nice), Some(policy)) = (fields.get(16), fields.get(38)) {
                values.push((nice.parse().unwrap(), policy.parse().unwrap()));
            }
        }
    }
    values
}

const SCHED_OTHER: i64 = 0;
const SCHED_IDLE: i64 = 5;

#[cfg(target_os = "linux")]
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn training_threads_run_at_the_configured_priority() {
    // Values no other test uses, so these services' threads are the ones seen.
    for (nice, idle_cpu_only, policy) in [(13i32, true, SCHED_IDLE), (14, false, SCHED_OTHER)] {
        let dir = tempfile::tempdir().unwrap();
        let mut config = test_config(dir.path());
        config.training.nice = nice;
        config.training.idle_cpu_only = idle_cpu_only;
        let app = spawn_app_with(config).await;
        let mut seen = Vec::new();
        for _ in 0..100 {
            seen = priorities_of_threads("trainer-0");
            if seen.contains(&(i64::from(nice), policy)) {
                break;
            }
            tokio::time::sleep(std::time::Duration::from_millis(20)).await;
        }
        assert!(
            seen.contains(&(i64::from(nice), policy)),
            "trainer threads' (nice, policy): {seen:?}"
        );
        // Scoring threads keep the default priority and class.
        let scoring = priorities_of_threads("tokio-rt-worker");
        assert!(
            !scoring.is_empty() && scoring.iter().all(|&p| p == (0, SCHED_OTHER)),
            "{scoring:?}"
        );
        app.stop().await;
    }
}

/// A rollback while a run trains: the run's entry, written after the rollback, names the model
/// the rollback made active, so the newest log entry agrees with the active model.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_rollback_while_a_run_trains_is_what_that_runs_entry_says_is_active() {
    let temp = tempfile::tempdir().unwrap();
    let app = spawn_app_with(test_config(temp.path())).await;
    let first = app.with_first_model().await;
    app.backfill(3000, 13, Regime::After).await;
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "promoted", "{entry}");
    let second = entry["active_after"].as_str().unwrap().to_owned();
    app.stop().await;

    // Longer runs (5 folds × 5 repeats), so the rollback lands while one trains.
    let mut config = test_config(temp.path());
    config.training.repeats = 5;
    let app = spawn_app_with(config).await;
    let (status, body) = app.post("/v1/retrain", &json!({})).await;
    assert_eq!(status, 202, "{body}");
    let run = format!("/v1/runs/{}", body["run_id"].as_str().unwrap());
    while app.get(&run).await.1["run"]["state"] == "queued" {
        tokio::time::sleep(std::time::Duration::from_millis(5)).await;
    }
    // A running run has taken the active model it is judged against; the rollback lands while
    // it reads its window or trains.
    tokio::time::sleep(std::time::Duration::from_millis(200)).await;
    let (status, body) = app.post("/v1/rollback", &json!({})).await;
    assert_eq!(status, 200, "{body}");
    assert_eq!(body["entry"]["active_after"], first);
    assert_eq!(
        app.get(&run).await.1["run"]["state"],
        "running",
        "the run must still be training when the rollback lands"
    );
    let entry = loop {
        let (_, body) = app.get(&run).await;
        if body["run"]["state"] == "finished" {
            break body["entry"].clone();
        }
        tokio::time::sleep(std::time::Duration::from_millis(50)).await;
    };
    assert_eq!(
        entry["active_before"],
        second.as_str(),
        "the run was judged against the model the rollback replaced: {}",
        entry["reason"]
    );
    assert_eq!(entry["active_after"], first.as_str(), "{entry}");
    let (_, models) = app.get("/v1/models").await;
    assert_eq!(models["active"], first.as_str());
    let (_, log) = app.get("/v1/promotions?limit=1").await;
    assert_eq!(log["entries"][0]["active_after"], first.as_str());
    app.stop().await;
}

#[tokio::test]
async fn alone_on_its_store_the_service_always_leads_and_says_so() {
    let app = spawn_app().await;
    let (status, health) = app.get("/healthz").await;
    assert_eq!(status, 200, "{health}");
    assert_eq!(health["leader"], true, "{health}");
    let id = health["replica_id"].as_str().unwrap();
    assert!(id.contains(&std::process::id().to_string()), "{health}");
    assert_eq!(health["leader_id"], id, "{health}");
    let metrics = app.get_text("/metrics").await;
    assert!(
        metrics.contains(&format!("understudy_leader{{replica=\"{id}\"}} 1")),
        "{metrics}"
    );
    app.stop().await;
}
