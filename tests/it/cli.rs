//! The binary: config errors, `init`, `serve` flags, `import`, `log`, and the layout guard.

use std::path::Path;
use std::process::{Command, Output, Stdio};
use std::time::Duration;

use understudy::store::{SledStore, LAYOUT_VERSION};

use crate::helpers::{spawn_app_with, test_config};

fn understudy(args: &[&str], cwd: &Path) -> Output {
    Command::new(env!("CARGO_BIN_EXE_understudy"))
        .args(args)
        .current_dir(cwd)
        .output()
        .unwrap()
}

fn stderr(output: &Output) -> String {
    String::from_utf8_lossy(&output.stderr).into_owned()
}

#[test]
fn init_writes_a_starter_config_that_loads_and_refuses_to_overwrite() {
    let dir = tempfile::tempdir().unwrap();
    let out = understudy(&["init"], dir.path());
    assert!(out.status.success(), "{}", stderr(&out));
    let written = dir.path().join("understudy.toml");
    understudy::config::Config::load(&written).unwrap();
    let again = understudy(&["init"], dir.path());
    assert!(!again.status.success());
    assert!(stderr(&again).contains("--force"));
}

#[test]
fn an_invalid_config_exits_non_zero_naming_the_key_and_the_rule() {
    let dir = tempfile::tempdir().unwrap();
    let text = understudy::config::DEFAULT_CONFIG_TOML.replace("folds = 5", "folds = 1");
    std::fs::write(dir.path().join("bad.toml"), text).unwrap();
    let out = understudy(&["serve", "--config", "bad.toml"], dir.path());
    assert!(!out.status.success());
    let err = stderr(&out);
    assert!(
        err.contains("training.folds") && err.contains("between 2 and 50"),
        "{err}"
    );
}

#[test]
fn serve_honours_listen_and_data_flags_and_stops_cleanly_on_sigterm() {
    let dir = tempfile::tempdir().unwrap();
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let listen = format!("127.0.0.1:{port}");
    let mut child = Command::new(env!("CARGO_BIN_EXE_understudy"))
        .args(["serve", "--listen", &listen, "--data", "store"])
        .current_dir(dir.path())
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let url = format!("http://{listen}/healthz");
    let mut up = false;
    for _ in 0..100 {
        std::thread::sleep(Duration::from_millis(100));
        if let Ok(mut stream) = std::net::TcpStream::connect(&listen) {
            use std::io::{Read, Write};
            let _ = write!(
                stream,
                "GET /healthz HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n"
            );
            let mut reply = String::new();
            let _ = stream.read_to_string(&mut reply);
            up = reply.starts_with("HTTP/1.1 200");
            if up {
                break;
            }
        }
    }
    assert!(up, "no answer from {url}");
    assert!(
        dir.path().join("store").is_dir(),
        "--data overrides the data dir"
    );
    // The shell builtin, so the test needs no procps.
    let killed = Command::new("sh")
        .args(["-c", &format!("kill -TERM {}", child.id())])
        .status()
        .unwrap();
    assert!(killed.success());
    let status = child.wait().unwrap();
    assert!(status.success(), "exit after SIGTERM: {status}");
}

#[test]
fn a_data_dir_from_a_newer_layout_is_refused_with_a_clear_message() {
    let dir = tempfile::tempdir().unwrap();
    SledStore::open(&dir.path().join("store"))
        .unwrap()
        .set_layout_version_for_tests(LAYOUT_VERSION + 1);
    let out = understudy(&["log", "--data", "store"], dir.path());
    assert!(!out.status.success());
    assert!(
        stderr(&out).contains("newer than this binary"),
        "{}",
        stderr(&out)
    );
}

pub fn write_csv(path: &Path, rows: usize, extra_bad_line: bool) {
    use rand::SeedableRng;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
    let mut text = String::from(
        "id,event_time,invoice_amount,days_to_due,debtor_years_trading,prior_late_invoices,credit_utilisation,debtor_sector,submission_channel,paid_late\n",
    );
    for i in 0..rows {
        let inv = understudy::demo::scenario::invoice(
            &mut rng,
            understudy::demo::scenario::Regime::Before,
        );
        let f = &inv.features;
        let cell = |k: &str| match &f.get(k) {
            Some(serde_json::Value::String(s)) => s.clone(),
            Some(serde_json::Value::Number(n)) => n.to_string(),
            _ => String::new(),
        };
        text.push_str(&format!(
            "row-{i},2026-0{}-{:02}T10:00:00Z,{},{},{},{},{},{},{},{}\n",
            1 + i / 600,
            1 + (i % 600) / 24,
            cell("invoice_amount"),
            cell("days_to_due"),
            cell("debtor_years_trading"),
            cell("prior_late_invoices"),
            cell("credit_utilisation"),
            cell("debtor_sector"),
            cell("submission_channel"),
            inv.draw_label(&mut rng)
        ));
    }
    if extra_bad_line {
        text.push_str("row-x,2026-01-01T00:00:00Z,1,2\n");
    }
    std::fs::write(path, text).unwrap();
}

#[test]
fn a_csv_with_a_short_row_is_refused_naming_the_line() {
    let dir = tempfile::tempdir().unwrap();
    write_csv(&dir.path().join("rows.csv"), 10, true);
    let out = understudy(&["import", "rows.csv", "--data", "store"], dir.path());
    assert!(!out.status.success());
    assert!(stderr(&out).contains("line 12"), "{}", stderr(&out));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn imported_rows_train_a_model_and_the_log_command_reads_the_store() {
    let dir = tempfile::tempdir().unwrap();
    write_csv(&dir.path().join("rows.csv"), 1800, false);
    let cwd = dir.path().to_owned();
    let out = tokio::task::spawn_blocking(move || {
        understudy(&["import", "rows.csv", "--data", "store"], &cwd)
    })
    .await
    .unwrap();
    assert!(out.status.success(), "{}", stderr(&out));
    assert!(String::from_utf8_lossy(&out.stdout).contains("imported 1800 examples"));
    // Importing again finds every id already there.
    let cwd = dir.path().to_owned();
    let again = tokio::task::spawn_blocking(move || {
        understudy(&["import", "rows.csv", "--data", "store"], &cwd)
    })
    .await
    .unwrap();
    assert!(String::from_utf8_lossy(&again.stdout)
        .contains("imported 0 examples (1800 already present)"));

    let store = dir.path().join("store");
    let app = spawn_app_with(test_config(&store)).await;
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "promoted", "{entry}");
    assert_eq!(entry["window"]["rows"], 1800);
    // While the server holds the store, `log --data` says to ask the server.
    let cwd = dir.path().to_owned();
    let held = tokio::task::spawn_blocking(move || understudy(&["log", "--data", "store"], &cwd))
        .await
        .unwrap();
    assert!(!held.status.success());
    assert!(stderr(&held).contains("--server"), "{}", stderr(&held));
    let base = app.base.clone();
    let cwd = dir.path().to_owned();
    let remote = tokio::task::spawn_blocking(move || understudy(&["log", "--server", &base], &cwd))
        .await
        .unwrap();
    assert!(String::from_utf8_lossy(&remote.stdout).contains("promoted"));
    // The whole log as JSON Lines through the server's cursor: one entry per line.
    let base = app.base.clone();
    let cwd = dir.path().to_owned();
    let lines = tokio::task::spawn_blocking(move || {
        understudy(&["log", "--server", &base, "--jsonl"], &cwd)
    })
    .await
    .unwrap();
    let text = String::from_utf8_lossy(&lines.stdout).into_owned();
    assert!(lines.status.success(), "{}", stderr(&lines));
    let parsed: Vec<serde_json::Value> = text
        .lines()
        .map(|line| serde_json::from_str(line).unwrap())
        .collect();
    assert_eq!(parsed.len(), 1, "{text}");
    assert_eq!(parsed[0]["run_id"], "r-1");
    app.stop().await;

    let cwd = dir.path().to_owned();
    let table = tokio::task::spawn_blocking(move || understudy(&["log", "--data", "store"], &cwd))
        .await
        .unwrap();
    let text = String::from_utf8_lossy(&table.stdout);
    assert!(table.status.success(), "{}", stderr(&table));
    assert!(text.contains("promoted") && text.contains("r-1"), "{text}");
    let cwd = dir.path().to_owned();
    let json = tokio::task::spawn_blocking(move || {
        understudy(&["log", "--data", "store", "--json"], &cwd)
    })
    .await
    .unwrap();
    let entries: serde_json::Value = serde_json::from_slice(&json.stdout).unwrap();
    assert_eq!(entries[0]["verdict"], "promoted");
    let cwd = dir.path().to_owned();
    let lines = tokio::task::spawn_blocking(move || {
        understudy(&["log", "--data", "store", "--jsonl"], &cwd)
    })
    .await
    .unwrap();
    let text = String::from_utf8_lossy(&lines.stdout);
    assert_eq!(text.lines().count(), 1, "{text}");
    let entry: serde_json::Value = serde_json::from_str(text.lines().next().unwrap()).unwrap();
    assert_eq!(entry["provenance"]["seed"], 20261201);
    // One run's evidence as one HTML page; an unknown run is refused by name.
    let cwd = dir.path().to_owned();
    let page = tokio::task::spawn_blocking(move || {
        understudy(&["log", "--data", "store", "--evidence", "r-1"], &cwd)
    })
    .await
    .unwrap();
    assert!(page.status.success(), "{}", stderr(&page));
    let html = String::from_utf8_lossy(&page.stdout);
    assert!(html.starts_with("<!doctype html>"), "{html}");
    assert!(html.contains("<h1>Evidence for run r-1</h1>"), "{html}");
    assert!(
        html.contains("class=\"roc-candidate\""),
        "the first model's ROC curve"
    );
    let cwd = dir.path().to_owned();
    let missing = tokio::task::spawn_blocking(move || {
        understudy(&["log", "--data", "store", "--evidence", "r-99"], &cwd)
    })
    .await
    .unwrap();
    assert_eq!(missing.status.code(), Some(2), "{}", stderr(&missing));
    assert!(
        stderr(&missing).contains("no entry for run `r-99`"),
        "{}",
        stderr(&missing)
    );
}

#[test]
fn train_runs_one_offline_run_and_writes_an_inspectable_model_file() {
    let dir = tempfile::tempdir().unwrap();
    write_csv(&dir.path().join("rows.csv"), 1800, false);
    let out = understudy(
        &["train", "--data", "rows.csv", "--model-out", "model.json"],
        dir.path(),
    );
    assert!(out.status.success(), "{}", stderr(&out));
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("chosen: one-SE rule"), "{text}");
    assert!(text.contains("non-zero coefficients"), "{text}");
    assert!(text.contains("verdict: promoted"), "{text}");

    let file: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.path().join("model.json")).unwrap()).unwrap();
    assert_eq!(file["format"], 1);
    assert_eq!(file["chosen"]["family"], "logistic");
    let columns = file["coefficients"]["columns"].as_array().unwrap();
    // 5 numbers + 6 sectors + 3 channels.
    assert_eq!(columns.len(), 14);
    assert!(columns
        .iter()
        .all(|c| c["standardized"].is_f64() && c["original"].is_f64()));
    assert_eq!(file["cross_validation"].as_array().unwrap().len(), 40);
    // The stored model inside is the service's own format.
    let model: understudy::model::Model = serde_json::from_value(file["model"].clone()).unwrap();
    assert_eq!(file["model_id"], model.id.as_str());

    // --json prints the run record; the same seed reproduces the same choice.
    let out = understudy(&["train", "--data", "rows.csv", "--json"], dir.path());
    assert!(out.status.success(), "{}", stderr(&out));
    let entry: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(entry["chosen"], file["chosen"]);
    assert_eq!(entry["verdict"], "promoted");
}

#[test]
fn train_on_too_few_rows_prints_the_rejection_and_exits_non_zero() {
    let dir = tempfile::tempdir().unwrap();
    write_csv(&dir.path().join("rows.csv"), 100, false);
    let out = understudy(&["train", "--data", "rows.csv"], dir.path());
    assert!(!out.status.success());
    assert!(
        stderr(&out).contains("training.min_rows"),
        "{}",
        stderr(&out)
    );
    assert!(String::from_utf8_lossy(&out.stdout).contains("verdict: rejected"));
}

#[test]
fn backtest_prints_json_and_writes_a_self_contained_html_report() {
    let dir = tempfile::tempdir().unwrap();
    let out = understudy(
        &[
            "demo",
            "--write-csv",
            "history.csv",
            "--rows",
            "3000",
            "--change-at",
            "1500",
        ],
        dir.path(),
    );
    assert!(out.status.success(), "{}", stderr(&out));
    // A quick search: 5 lambdas, 3 folds once.
    let config = understudy::config::DEFAULT_CONFIG_TOML
        .replace("lambda_count = 20", "lambda_count = 5")
        .replace("folds = 5", "folds = 3")
        .replace("repeats = 2", "repeats = 1");
    std::fs::write(dir.path().join("quick.toml"), config).unwrap();
    let out = understudy(
        &[
            "backtest",
            "--config",
            "quick.toml",
            "--csv",
            "history.csv",
            "--step-rows",
            "500",
            "--recovery-rows",
            "500",
            "--json",
            "--report",
            "report.html",
        ],
        dir.path(),
    );
    assert!(out.status.success(), "{}", stderr(&out));
    let report: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(report["metric"], "auc");
    assert_eq!(report["rows"], 3000);
    assert_eq!(report["steps"], 6);
    // The first model at the first step with 500 labels (training.min_rows), then every
    // period is scored by all three policies.
    assert_eq!(report["first_model"]["period"], 1);
    let periods = report["periods"].as_array().unwrap();
    assert_eq!(periods.len(), 5);
    for period in periods {
        for policy in ["configured", "never_retrained", "always_promote"] {
            assert!(
                period["scores"][policy]["metric"].is_f64(),
                "{policy}: {period}"
            );
        }
    }
    assert!(report["totals"]["configured"]["runs"].as_u64().unwrap() >= 1);
    let page = std::fs::read_to_string(dir.path().join("report.html")).unwrap();
    assert!(page.starts_with("<!DOCTYPE html>") && page.contains("<svg"));
    assert!(!page.contains("<script") && !page.contains("<link"));
}

#[test]
fn backtest_refuses_a_bad_flag_naming_it() {
    let dir = tempfile::tempdir().unwrap();
    let out = understudy(
        &["demo", "--write-csv", "history.csv", "--rows", "50"],
        dir.path(),
    );
    assert!(out.status.success(), "{}", stderr(&out));
    for (flag, value, says) in [
        ("--step-rows", "0", "--step-rows must be at least 1"),
        (
            "--label-delay",
            "soon",
            "--label-delay `soon` is not a duration",
        ),
        (
            "--start",
            "yesterday",
            "--start `yesterday` is not an RFC 3339 time",
        ),
    ] {
        let out = understudy(
            &["backtest", "--csv", "history.csv", flag, value],
            dir.path(),
        );
        assert_eq!(out.status.code(), Some(2), "{flag}: {}", stderr(&out));
        assert!(stderr(&out).contains(says), "{flag}: {}", stderr(&out));
    }
}
