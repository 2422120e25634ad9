//! A config of only `[label]` and `[[features]]`: every other key takes its default, and the
//! service, the offline run and the whole examples → retrain → promote → score loop work on it.

use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Duration;

use serde_json::json;
use understudy::config::{Config, DEFAULT_CONFIG_TOML};
use understudy::demo::scenario::Regime;

use crate::cli::write_csv;
use crate::helpers::{spawn_app_with, valid_features};

/// The starter file cut down to its `[label]` and `[[features]]` tables (the invoice schema).
pub fn short_config_text() -> String {
    let from = DEFAULT_CONFIG_TOML.find("[label]").unwrap();
    let to = DEFAULT_CONFIG_TOML.find("[training]").unwrap();
    let text = DEFAULT_CONFIG_TOML[from..to].to_owned();
    let tables: Vec<&str> = text
        .lines()
        .filter(|l| l.starts_with('['))
        .map(str::trim)
        .collect();
    assert_eq!(tables[0], "[label]");
    assert!(
        tables[1..].iter().all(|t| *t == "[[features]]"),
        "{tables:?}"
    );
    text
}

fn short_config(dir: &Path) -> Config {
    let mut config = Config::from_toml(&short_config_text()).unwrap();
    config.server.data_dir = dir.to_owned();
    config
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_short_config_takes_examples_retrains_promotes_and_scores() {
    let dir = tempfile::tempdir().unwrap();
    let config = short_config(dir.path());
    // No schedule by default: runs happen on request.
    assert_eq!(config.schedule.every, None);
    let app = spawn_app_with(config).await;
    let (status, _) = app.get("/healthz").await;
    assert_eq!(status, 200);

    let model = app.with_first_model().await;
    let (status, body) = app.get("/readyz").await;
    assert_eq!(status, 200, "{body}");
    let (status, scored) = app
        .post("/v1/score", &json!({"features": valid_features()}))
        .await;
    assert_eq!(status, 200, "{scored}");
    assert_eq!(scored["model_id"], model.as_str(), "{scored}");
    let p = scored["probability"].as_f64().unwrap();
    assert!(p > 0.0 && p < 1.0, "{p}");
    let (status, body) = app
        .post(
            "/v1/outcomes",
            &json!({"score_id": scored["score_id"], "label": 1}),
        )
        .await;
    assert_eq!(status, 201, "{body}");

    // A second run judges a challenger against the incumbent with the default gate.
    app.backfill(1500, 12, Regime::After).await;
    let entry = app.retrain().await;
    assert_eq!(entry["metric"], "auc", "{entry}");
    assert_eq!(entry["margin"], 0.02, "{entry}");
    assert!(
        entry["verdict"] == "promoted" || entry["verdict"] == "kept",
        "{entry}"
    );
    app.stop().await;
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

fn bin(args: &[&str], cwd: &Path) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_understudy"))
        .args(args)
        .current_dir(cwd)
        .output()
        .unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn serve_runs_a_short_config_and_scores_once_a_model_exists() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("short.toml"), short_config_text()).unwrap();
    write_csv(&dir.path().join("rows.csv"), 1800, false);
    let listen = format!("127.0.0.1:{}", free_port());
    // The log goes to a file, not a terminal: it must carry no colour codes.
    let log = std::fs::File::create(dir.path().join("serve.log")).unwrap();
    let mut child = Command::new(env!("CARGO_BIN_EXE_understudy"))
        .args([
            "serve",
            "--config",
            "short.toml",
            "--listen",
            &listen,
            "--data",
            "store",
        ])
        .env_remove("NO_COLOR")
        .current_dir(dir.path())
        .stdout(Stdio::null())
        .stderr(Stdio::from(log))
        .spawn()
        .unwrap();
    let base = format!("http://{listen}");
    let client = reqwest::Client::new();
    let mut up = false;
    for _ in 0..150 {
        tokio::time::sleep(Duration::from_millis(100)).await;
        if let Ok(response) = client.get(format!("{base}/healthz")).send().await {
            up = response.status() == 200;
            if up {
                break;
            }
        }
    }
    assert!(up, "the server did not come up on {listen}");
    // Answered either way (ready, or not ready for want of a model), with a JSON body.
    let readyz = client.get(format!("{base}/readyz")).send().await.unwrap();
    assert!(matches!(readyz.status().as_u16(), 200 | 503));
    readyz.json::<serde_json::Value>().await.unwrap();

    let cwd = dir.path().to_owned();
    let server = base.clone();
    let (import, retrain) = tokio::task::spawn_blocking(move || {
        (
            bin(
                &[
                    "import",
                    "rows.csv",
                    "--config",
                    "short.toml",
                    "--server",
                    &server,
                ],
                &cwd,
            ),
            bin(&["retrain", "--server", &server], &cwd),
        )
    })
    .await
    .unwrap();
    assert!(
        import.status.success(),
        "{}",
        String::from_utf8_lossy(&import.stderr)
    );
    assert!(String::from_utf8_lossy(&import.stdout).contains("imported 1800 examples"));
    assert!(
        retrain.status.success(),
        "{}",
        String::from_utf8_lossy(&retrain.stderr)
    );
    assert!(
        String::from_utf8_lossy(&retrain.stdout).contains("promoted"),
        "{}",
        String::from_utf8_lossy(&retrain.stdout)
    );

    let readyz = client.get(format!("{base}/readyz")).send().await.unwrap();
    assert_eq!(readyz.status(), 200);
    let scored = client
        .post(format!("{base}/v1/score"))
        .json(&json!({"features": valid_features()}))
        .send()
        .await
        .unwrap();
    assert_eq!(scored.status(), 200);
    let body: serde_json::Value = scored.json().await.unwrap();
    assert!(body["probability"].as_f64().is_some(), "{body}");

    let killed = Command::new("sh")
        .args(["-c", &format!("kill -TERM {}", child.id())])
        .status()
        .unwrap();
    assert!(killed.success());
    let status = tokio::task::spawn_blocking(move || child.wait().unwrap())
        .await
        .unwrap();
    assert!(status.success(), "exit after SIGTERM: {status}");
    let log = std::fs::read_to_string(dir.path().join("serve.log")).unwrap();
    assert!(log.contains("understudy serving"), "{log}");
    assert!(
        !log.contains('\u{1b}'),
        "colour codes in a log that is not a terminal:\n{log}"
    );
}

#[test]
fn train_runs_a_short_config_on_a_csv_and_data_still_names_the_csv() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("short.toml"), short_config_text()).unwrap();
    write_csv(&dir.path().join("rows.csv"), 1800, false);
    let out = bin(
        &[
            "train",
            "--config",
            "short.toml",
            "--csv",
            "rows.csv",
            "--json",
        ],
        dir.path(),
    );
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let entry: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(entry["verdict"], "promoted", "{entry}");
    assert_eq!(entry["window"]["rows"], 1800, "{entry}");
    // The older spelling is a hidden alias, and gives the same run.
    let old = bin(
        &[
            "train",
            "--config",
            "short.toml",
            "--data",
            "rows.csv",
            "--json",
        ],
        dir.path(),
    );
    assert!(
        old.status.success(),
        "{}",
        String::from_utf8_lossy(&old.stderr)
    );
    let again: serde_json::Value = serde_json::from_slice(&old.stdout).unwrap();
    assert_eq!(again["chosen"], entry["chosen"]);
    let help = bin(&["train", "--help"], dir.path());
    let help = String::from_utf8_lossy(&help.stdout);
    assert!(
        help.contains("--csv <FILE>") && !help.contains("--data <"),
        "{help}"
    );
}
