//! The dashboard in a real browser: Debian's Chromium, headless, against a running server.
//!
//! `.ci/run` installs Chromium and sets `UNDERSTUDY_REQUIRE_BROWSER=1`, so there the test must
//! run; elsewhere it is skipped (with a note) when no Chromium is installed. The screenshot is
//! kept as `target/dashboard.png`.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::json;
use understudy::demo::scenario::{invoice, Regime};

use crate::helpers::spawn_app;

fn chromium() -> Option<PathBuf> {
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

/// Chromium for a browser check, or `None` after saying the check is skipped; under
/// `UNDERSTUDY_REQUIRE_BROWSER` (CI) a missing Chromium fails the test instead.
pub fn browser() -> Option<PathBuf> {
    let found = chromium();
    if found.is_none() {
        assert!(
            std::env::var("UNDERSTUDY_REQUIRE_BROWSER").is_err(),
            "UNDERSTUDY_REQUIRE_BROWSER is set but no Chromium was found (apt-get install chromium)"
        );
        eprintln!("skipped: no Chromium installed (apt-get install chromium)");
    }
    found
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

/// The page at `url` as headless Chromium renders it, 1280 pixels wide and `height` tall: its
/// DOM after the page's scripts ran, and the result of writing a screenshot to `target/{name}`
/// (to look at for overlaps and clipped text).
/// The document `url` leaves after its scripts ran, in headless Chromium.
pub async fn dump_dom(browser: &Path, url: String) -> String {
    let profile = tempfile::tempdir().unwrap();
    let (browser, profile_dir) = (browser.to_owned(), profile.path().to_owned());
    let output = tokio::task::spawn_blocking(move || {
        headless(&browser, &profile_dir)
            .args(["--dump-dom", &url])
            .output()
            .unwrap()
    })
    .await
    .unwrap();
    String::from_utf8_lossy(&output.stdout).into_owned()
}

pub async fn render(browser: &Path, url: String, name: &str, height: u32) -> (String, Output) {
    let profile = tempfile::tempdir().unwrap();
    let screenshot = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("target")
        .join(name);
    let size = format!("--window-size=1280,{height}");
    let (browser, profile_dir) = (browser.to_owned(), profile.path().to_owned());
    let (dom, shot) = tokio::task::spawn_blocking(move || {
        let dom = headless(&browser, &profile_dir)
            .args([size.as_str(), "--dump-dom", &url])
            .output()
            .unwrap();
        let shot = headless(&browser, &profile_dir)
            .arg(format!("--screenshot={}", screenshot.display()))
            .args([size.as_str(), &url])
            .output()
            .unwrap();
        (dom, shot)
    })
    .await
    .unwrap();
    (String::from_utf8_lossy(&dom.stdout).into_owned(), shot)
}

fn count(dom: &str, needle: &str) -> usize {
    dom.matches(needle).count()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_dashboard_renders_the_apis_numbers_in_a_real_browser() {
    let Some(browser) = browser() else {
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
    let (status, body) = app.post("/v1/freeze", &json!({})).await;
    assert_eq!(status, 200, "{body}");

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

    let (dom, shot) = render(&browser, app.url("/"), "dashboard.png", 1700).await;
    assert!(
        dom.contains(r#"data-loaded="yes""#),
        "the page loaded its data:\n{dom}"
    );
    drift_panel_text_does_not_collide(&dom);
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
    assert!(
        dom.contains(r#"<span class="chip frozen" id="frozen">promotions frozen</span>"#),
        "the freeze has its own chip, not the `rejected` one"
    );
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
        std::fs::metadata(Path::new(env!("CARGO_MANIFEST_DIR")).join("target/dashboard.png"))
            .unwrap()
            .len()
            > 10_000,
        "a real screenshot"
    );
    app.stop().await;
}

/// One laid-out box of the drift panel, as the page measured it (`data-boxes` on the panel's
/// SVG: `getBoundingClientRect` of every text and bar, relative to the panel).
#[derive(Debug, serde::Deserialize)]
struct LaidOut {
    kind: String,
    cls: String,
    text: String,
    x: f64,
    y: f64,
    w: f64,
    h: f64,
}

#[derive(Debug, serde::Deserialize)]
struct Frame {
    w: f64,
    h: f64,
}

/// The value of attribute `name` on the element with `id`, unescaped.
fn attribute(dom: &str, id: &str, name: &str) -> String {
    let element = dom
        .find(&format!(r#"id="{id}""#))
        .unwrap_or_else(|| panic!("no element {id}"));
    let key = format!(r#" {name}=""#);
    let start = element + dom[element..].find(&key).expect(name) + key.len();
    let end = start + dom[start..].find('"').unwrap();
    dom[start..end]
        .replace("&quot;", "\"")
        .replace("&lt;", "<")
        .replace("&gt;", ">")
        .replace("&nbsp;", "\u{a0}")
        .replace("&amp;", "&")
}

/// Pixels two boxes share along both axes (0 when they only touch).
fn overlap(a: &LaidOut, b: &LaidOut) -> f64 {
    let x = (a.x + a.w).min(b.x + b.w) - a.x.max(b.x);
    let y = (a.y + a.h).min(b.y + b.h) - a.y.max(b.y);
    x.max(0.0).min(y.max(0.0))
}

/// Significant digits of a decimal number as printed ("0.001235" → 4, "12350" → 4).
fn significant_digits(number: &str) -> usize {
    let digits: String = number.chars().filter(char::is_ascii_digit).collect();
    let digits = digits.trim_start_matches('0');
    let digits = if number.contains('.') {
        digits
    } else {
        digits.trim_end_matches('0')
    };
    digits.len()
}

/// The drift panel as laid out: no text box meets another, a bar or a threshold line, every
/// box stays inside the panel, and the bins' bounds are printed to at most four significant
/// digits.
fn drift_panel_text_does_not_collide(dom: &str) {
    let boxes: Vec<LaidOut> =
        serde_json::from_str(&attribute(dom, "drift-bars", "data-boxes")).unwrap();
    let frame: Frame = serde_json::from_str(&attribute(dom, "drift-bars", "data-frame")).unwrap();
    let texts: Vec<&LaidOut> = boxes.iter().filter(|b| b.kind == "text").collect();
    let bars: Vec<&LaidOut> = boxes
        .iter()
        .filter(|b| b.kind == "rect" && b.cls.starts_with("drift-bar"))
        .collect();
    let lines: Vec<&LaidOut> = boxes
        .iter()
        .filter(|b| b.kind == "line" && b.cls == "threshold")
        .collect();
    assert!(!lines.is_empty(), "the watch and act lines are drawn");
    assert!(
        texts
            .iter()
            .any(|t| t.cls == "threshold-label" && t.text.starts_with("watch"))
            && texts
                .iter()
                .any(|t| t.cls == "threshold-label" && t.text.starts_with("act")),
        "both threshold labels are drawn: {texts:?}"
    );
    assert!(!bars.is_empty(), "bars are drawn");
    // Half a pixel of tolerance for anti-aliased glyph boxes that merely touch.
    const TOUCH: f64 = 0.5;
    for (i, a) in texts.iter().enumerate() {
        assert!(a.w > 0.0 && a.h > 0.0, "a laid-out text: {a:?}");
        for b in &texts[i + 1..] {
            assert!(
                overlap(a, b) <= TOUCH,
                "text boxes overlap in the drift panel:\n{a:?}\n{b:?}"
            );
        }
        for bar in &bars {
            assert!(
                overlap(a, bar) <= TOUCH,
                "text over a bar in the drift panel:\n{a:?}\n{bar:?}"
            );
        }
        // A vertical line's box has no width: it crosses a text when its x falls inside the
        // text's span and their heights meet.
        for line in &lines {
            let crosses = line.x > a.x + TOUCH
                && line.x < a.x + a.w - TOUCH
                && (a.y + a.h).min(line.y + line.h) - a.y.max(line.y) > TOUCH;
            assert!(
                !crosses,
                "a threshold line crosses a text in the drift panel:\n{a:?}\n{line:?}"
            );
        }
        assert!(
            a.x >= -TOUCH
                && a.y >= -TOUCH
                && a.x + a.w <= frame.w + TOUCH
                && a.y + a.h <= frame.h + TOUCH,
            "text runs past the panel ({} x {}): {a:?}",
            frame.w,
            frame.h
        );
    }
    let bins: Vec<&&LaidOut> = texts.iter().filter(|t| t.cls == "drift-bin").collect();
    assert!(!bins.is_empty(), "the most-moved bins are shown");
    for bin in bins {
        for n in regex_lite_numbers(&bin.text) {
            assert!(
                significant_digits(&n) <= 4,
                "`{n}` in `{}` has more than 4 significant digits",
                bin.text
            );
        }
    }
}

/// The decimal numbers in `text` (digits with an optional fraction and sign).
fn regex_lite_numbers(text: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut current = String::new();
    for c in text.chars() {
        if c.is_ascii_digit() || (c == '.' && !current.is_empty()) {
            current.push(c);
        } else if !current.is_empty() {
            out.push(std::mem::take(&mut current));
        }
    }
    if !current.is_empty() {
        out.push(current);
    }
    out
}

#[test]
fn significant_digits_count_what_a_reader_sees() {
    assert_eq!(significant_digits("0.001235"), 4);
    assert_eq!(significant_digits("12350"), 4);
    assert_eq!(significant_digits("0.12345678901234567"), 17);
    assert_eq!(significant_digits("12.3"), 3);
    assert_eq!(
        regex_lite_numbers("most moved: (0.1235, 12350] 9.5% → 31.0%"),
        ["0.1235", "12350", "9.5", "31.0"]
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_sign_off_panel_shows_the_waiting_candidate_with_its_evidence_buttons_and_commands() {
    let Some(browser) = browser() else {
        return;
    };
    let temp = tempfile::tempdir().unwrap();
    let mut config = crate::helpers::test_config(temp.path());
    config.gate.sign_off = true;
    let app = crate::helpers::spawn_app_with(config).await;
    app.backfill(1500, 11, Regime::Before).await;
    let first = app.retrain().await;
    assert_eq!(first["verdict"], "waiting", "{first}");
    let run = first["run_id"].as_str().unwrap();
    let (status, body) = app
        .post(
            &format!("/v1/sign-off/{run}/approve"),
            &json!({"reason": "first model reviewed by the risk desk"}),
        )
        .await;
    assert_eq!(status, 200, "{body}");
    app.backfill(3000, 12, Regime::After).await;
    let waiting = app.retrain().await;
    assert_eq!(waiting["verdict"], "waiting", "{waiting}");
    let run = waiting["run_id"].as_str().unwrap().to_owned();
    let candidate = waiting["candidate_id"].as_str().unwrap().to_owned();
    let auc = waiting["candidate_gate"]["auc"].as_f64().unwrap();
    let (_, log) = app.get("/v1/promotions?limit=50").await;
    let with_actor = log["entries"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|e| !e["actor"].is_null())
        .count();

    let (dom, shot) = render(&browser, app.url("/"), "dashboard-sign-off.png", 2300).await;
    assert!(
        dom.contains(r#"data-loaded="yes""#),
        "the page loaded:\n{dom}"
    );
    let dom = dom[..dom.find("<script>").unwrap_or(dom.len())].to_owned();
    assert!(
        dom.contains(&format!(
            r#"<p class="big" id="sign-off-candidate">{candidate}</p>"#
        )),
        "the waiting candidate's id"
    );
    assert!(
        dom.contains(&format!("auc candidate <b>{auc:.4}</b>")),
        "the candidate's gate AUC {auc:.4} from the run's entry"
    );
    assert!(dom.contains(&format!(r#"id="sign-off-approve" data-run="{run}""#)));
    assert!(dom.contains(&format!(r#"id="sign-off-decline" data-run="{run}""#)));
    assert!(dom.contains(&format!(r#"understudy approve {run} --reason "...""#)));
    assert!(
        dom.contains(&format!("/v1/sign-off/{run}/approve")),
        "the curl line"
    );
    assert!(
        dom.contains(r#"id="sign-off" data-fits="true""#),
        "nothing wider than the panel"
    );
    assert_eq!(
        count(&dom, r#"<div class="actor">"#),
        with_actor,
        "one actor line per acted entry"
    );
    assert!(dom.contains("by <b>the open API</b>: first model reviewed by the risk desk"));
    assert!(dom.contains(r#"<span class="chip waiting">waiting</span>"#));
    assert!(
        shot.status.success(),
        "{}",
        String::from_utf8_lossy(&shot.stderr)
    );
    app.stop().await;
}
