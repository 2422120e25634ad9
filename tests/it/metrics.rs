//! `/metrics` as a scraper sees it: the OpenMetrics content type, and text that a strict
//! OpenMetrics parser reads with every family's type and the state gauges' values.
//!
//! The parser is the Prometheus project's Python client (`prometheus_client.openmetrics.parser`,
//! pinned in tests/openmetrics/requirements.txt), installed into `target/openmetrics-venv` on
//! first use. Without Python or PyPI the test is skipped with a note, except under CI (`CI`
//! set), where it fails.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::Mutex;

use serde_json::{json, Value as Json};

use crate::helpers::{spawn_app, valid_features};

static VENV: Mutex<()> = Mutex::new(());

/// The venv's python with the pinned parser installed, or why it could not be made.
fn parser_python() -> Result<PathBuf, String> {
    let _one_at_a_time = VENV.lock().unwrap_or_else(|e| e.into_inner());
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let requirements = root.join("tests/openmetrics/requirements.txt");
    let venv = root.join("target/openmetrics-venv");
    let python = venv.join("bin/python");
    let stamp = venv.join("requirements.txt");
    let wanted = std::fs::read_to_string(&requirements).map_err(|e| e.to_string())?;
    if std::fs::read_to_string(&stamp).ok().as_deref() == Some(wanted.as_str()) {
        return Ok(python);
    }
    let _ = std::fs::remove_dir_all(&venv);
    let run = |command: &mut Command| -> Result<(), String> {
        let out = command.output().map_err(|e| format!("{command:?}: {e}"))?;
        if out.status.success() {
            Ok(())
        } else {
            Err(format!(
                "{command:?}: {}",
                String::from_utf8_lossy(&out.stderr)
            ))
        }
    };
    run(Command::new("python3").arg("-m").arg("venv").arg(&venv))?;
    run(Command::new(&python)
        .args([
            "-m",
            "pip",
            "install",
            "--quiet",
            "--disable-pip-version-check",
            "-r",
        ])
        .arg(&requirements))?;
    std::fs::write(&stamp, wanted).map_err(|e| e.to_string())?;
    Ok(python)
}

/// The families the parser read, or its refusal.
fn parse_openmetrics(python: &Path, text: &str) -> Result<Vec<Json>, String> {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/openmetrics/parse.py");
    let mut child = Command::new(python)
        .arg(script)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .map_err(|e| e.to_string())?;
    child
        .stdin
        .take()
        .unwrap()
        .write_all(text.as_bytes())
        .map_err(|e| e.to_string())?;
    let out = child.wait_with_output().map_err(|e| e.to_string())?;
    if !out.status.success() {
        return Err(String::from_utf8_lossy(&out.stderr).into_owned());
    }
    serde_json::from_slice(&out.stdout).map_err(|e| e.to_string())
}

fn family<'a>(families: &'a [Json], name: &str) -> &'a Json {
    families
        .iter()
        .find(|f| f["name"] == name)
        .unwrap_or_else(|| panic!("no family {name} in {families:#?}"))
}

/// The value of the family's sample with these labels (all of them, exactly).
fn sample(family: &Json, sample_name: &str, labels: Json) -> f64 {
    family["samples"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["name"] == sample_name && s["labels"] == labels)
        .unwrap_or_else(|| panic!("no {sample_name} {labels} in {family:#}"))["value"]
        .as_f64()
        .unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_openmetrics_parser_reads_the_metrics_with_their_types_and_state() {
    let python = match tokio::task::spawn_blocking(parser_python).await.unwrap() {
        Ok(python) => python,
        Err(why) => {
            assert!(
                std::env::var("CI").is_err(),
                "CI is set but the OpenMetrics parser could not be installed: {why}"
            );
            eprintln!("skipped: no OpenMetrics parser ({why})");
            return;
        }
    };
    let app = spawn_app().await;
    // Before any model: the exposition is still whole.
    let response = app.client.get(app.url("/metrics")).send().await.unwrap();
    assert_eq!(response.status(), 200);
    assert_eq!(
        response.headers()["content-type"],
        "application/openmetrics-text; version=1.0.0; charset=utf-8"
    );
    let text = response.text().await.unwrap();
    let families = parse_openmetrics(&python, &text).unwrap_or_else(|e| panic!("{e}\n{text}"));
    assert_eq!(
        family(&families, "understudy_promotions_frozen")["type"],
        "gauge"
    );

    let first = app.with_first_model().await;
    for _ in 0..3 {
        let (status, _) = app
            .post("/v1/score", &json!({"features": valid_features()}))
            .await;
        assert_eq!(status, 200);
    }
    let (status, _) = app.post("/v1/freeze", &json!({})).await;
    assert_eq!(status, 200);
    let text = app.get_text("/metrics").await;
    let families = parse_openmetrics(&python, &text).unwrap_or_else(|e| panic!("{e}\n{text}"));

    let build = family(&families, "understudy_build");
    assert_eq!(build["type"], "info", "{build}");
    let build_labels = &build["samples"][0]["labels"];
    assert_eq!(build_labels["version"], env!("CARGO_PKG_VERSION"));
    assert!(
        !build_labels["revision"].as_str().unwrap().is_empty(),
        "{build}"
    );

    let requests = family(&families, "understudy_http_requests");
    assert_eq!(requests["type"], "counter");
    assert_eq!(
        sample(
            requests,
            "understudy_http_requests_total",
            json!({"route": "/v1/score", "method": "POST", "status": "200"})
        ),
        3.0
    );
    let scores = family(&families, "understudy_scores");
    assert_eq!(
        sample(scores, "understudy_scores_total", json!({ "model": first })),
        3.0
    );
    let latency = family(&families, "understudy_http_request_duration_seconds");
    assert_eq!(latency["type"], "histogram");
    let frozen = family(&families, "understudy_promotions_frozen");
    assert_eq!(
        sample(frozen, "understudy_promotions_frozen", json!({})),
        1.0
    );
    let pending = family(&families, "understudy_score_records_pending");
    assert_eq!(pending["type"], "gauge");
    assert!(sample(pending, "understudy_score_records_pending", json!({})) <= 3.0);
    let active = family(&families, "understudy_active_model_info");
    assert_eq!(
        sample(
            active,
            "understudy_active_model_info",
            json!({"model": first, "family": "logistic"})
        ),
        1.0
    );
    // No candidate is shadowing: the shadow gauges have no samples.
    let shadow = family(&families, "understudy_shadow_outcomes");
    assert_eq!(shadow["samples"], json!([]), "{shadow}");
    // PSI per feature, from the drift report the scrape computed and kept.
    let psi = family(&families, "understudy_psi");
    assert_eq!(psi["type"], "gauge");
    assert!(
        psi["samples"].as_array().unwrap().len() >= 7,
        "one per feature: {psi}"
    );
    let computed = sample(
        family(&families, "understudy_drift_report_timestamp_seconds"),
        "understudy_drift_report_timestamp_seconds",
        json!({}),
    );
    assert!(computed > 1.7e9, "{computed}");

    // The next scrape reads the kept report: same computation time (drift.check_every is
    // minutes), where a recomputation would carry a later one.
    tokio::time::sleep(std::time::Duration::from_millis(20)).await;
    let text = app.get_text("/metrics").await;
    let families = parse_openmetrics(&python, &text).unwrap_or_else(|e| panic!("{e}\n{text}"));
    let again = sample(
        family(&families, "understudy_drift_report_timestamp_seconds"),
        "understudy_drift_report_timestamp_seconds",
        json!({}),
    );
    assert_eq!(again, computed, "the scrape reused the kept drift report");
    app.stop().await;
}

#[test]
fn the_parser_refuses_text_that_is_not_openmetrics() {
    // The check must be able to fail: the older Prometheus format without `# EOF` is refused.
    let Ok(python) = parser_python() else {
        assert!(std::env::var("CI").is_err(), "CI is set but no parser");
        return;
    };
    let old = "# TYPE x counter\nx 1\n";
    assert!(parse_openmetrics(&python, old).is_err());
    let good = "# TYPE x counter\nx_total 1\n# EOF\n";
    let families = parse_openmetrics(&python, good).unwrap();
    assert_eq!(families[0]["name"], "x");
}
