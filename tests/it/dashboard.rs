//! The dashboard in a real browser: Debian's Chromium, headless, against a running server.
//!
//! `.ci/run` installs Chromium and sets `UNDERSTUDY_REQUIRE_BROWSER=1`, so there the test must
//! run; elsewhere it is skipped (with a note) when no Chromium is installed. The screenshot is
//! kept as `target/dashboard.png`.

use std::path::{Path, PathBuf};
use std::process::Command;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::json;
use understudy::demo::scenario::{invoice, Regime};

use crate::helpers::spawn_app;

pub fn chromium() -> Option<PathBuf> {
    let candidates = [
        std::env::var("UNDERSTUDY_CHROMIUM").unwrap_or_default(),
        "/usr/bin/chromium".into(),
        "/usr/bin/chromium-browser".into(),
    ];
    candidates
        .into_iter()
        .filter(|c| !c.is_empty())
        .map(PathBuf::from)
        .find(|p| p.exists())
}

/// Chromium's flags for a sandboxless, offline, headless run (the machine has no outside
/// network; background fetches would only fail).
pub fn headless(browser: &Path, profile: &Path) -> Command {
    let mut command = Command::new(browser);
    command.args([
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--hide-scrollbars",
        "--virtual-time-budget=15000",
    ]);
    command.arg(format!("--user-data-dir={}", profile.display()));
    command
}

fn count(dom: &str, needle: &str) -> usize {
    dom.matches(needle).count()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_dashboard_renders_the_apis_numbers_in_a_real_browser() {
    let Some(browser) = chromium() else {
        assert!(
            std::env::var("UNDERSTUDY_REQUIRE_BROWSER").is_err(),
            "UNDERSTUDY_REQUIRE_BROWSER is set but no Chromium was found (apt-get install chromium)"
        );
        eprintln!("skipped: no Chromium installed (apt-get install chromium)");
        return;
    };
    let app = spawn_app().await;
    app.with_first_model().await;
    app.backfill(3000, 12, Regime::After).await;
    let entry = app.retrain().await;
    assert_eq!(entry["verdict"], "promoted", "{entry}");
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    for _ in 0..250 {
        let features = invoice(&mut rng, Regime::After).features;
        app.post("/v1/score", &json!({"features": features})).await;
    }
    tokio::time::sleep(std::time::Duration::from_millis(300)).await;

    let (_, models) = app.get("/v1/models").await;
    let (_, log) = app.get("/v1/promotions?limit=50").await;
    let (_, drift) = app.get("/v1/drift").await;
    let entries = log["entries"].as_array().unwrap().clone();
    let judged = entries
        .iter()
        .filter(|e| !e["candidate_gate"].is_null() || !e["candidate_holdout"].is_null())
        .count();
    let bars = drift["drift"]["features"].as_array().unwrap().len()
        + usize::from(!drift["drift"]["score"].is_null());

    let profile = tempfile::tempdir().unwrap();
    let url = app.url("/");
    let screenshot = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/dashboard.png");
    let (dom, shot) = tokio::task::spawn_blocking({
        let (browser, profile, screenshot) = (
            browser.clone(),
            profile.path().to_owned(),
            screenshot.clone(),
        );
        move || {
            let dom = headless(&browser, &profile)
                .args(["--dump-dom", &url])
                .output()
                .unwrap();
            let shot = headless(&browser, &profile)
                .arg(format!("--screenshot={}", screenshot.display()))
                .args(["--window-size=1280,1700", &url])
                .output()
                .unwrap();
            (dom, shot)
        }
    })
    .await
    .unwrap();
    let dom = String::from_utf8_lossy(&dom.stdout).into_owned();
    assert!(
        dom.contains(r#"data-loaded="yes""#),
        "the page loaded its data:\n{dom}"
    );
    // Count in the rendered document only, not in the page's own script text.
    let dom = dom[..dom.find("<script>").unwrap_or(dom.len())].to_owned();
    let active = models["active"].as_str().unwrap();
    assert!(
        dom.contains(&format!(r#"<p class="big" id="active-id">{active}</p>"#)),
        "the active model's id: {active}"
    );
    assert_eq!(
        count(&dom, r#"class="entry""#),
        entries.len(),
        "one log row per entry"
    );
    assert_eq!(
        count(&dom, r#"class="gate-point""#),
        judged,
        "one point per judged run"
    );
    assert_eq!(
        count(&dom, r#"class="drift-bar "#),
        bars,
        "one bar per feature and the score"
    );
    assert_eq!(count(&dom, r#"class="roc-candidate""#), 1);
    assert_eq!(
        count(&dom, r#"class="roc-active""#),
        1,
        "the last run had an incumbent"
    );
    assert!(count(&dom, r#"class="calibration-point candidate""#) > 2);
    assert!(dom.contains("defer to local law and licensed practice"));
    // The AUC the page prints for the active model is the API's.
    let auc = models["models"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["active"] == true)
        .unwrap()["holdout"]["auc"]
        .as_f64()
        .unwrap();
    assert!(
        dom.contains(&format!(
            r#"<span data-metric="auc">auc <b>{auc:.4}</b></span>"#
        )),
        "active AUC {auc:.4} on the page"
    );
    assert!(
        shot.status.success(),
        "{}",
        String::from_utf8_lossy(&shot.stderr)
    );
    assert!(
        std::fs::metadata(&screenshot).unwrap().len() > 10_000,
        "a real screenshot"
    );
    app.stop().await;
}
