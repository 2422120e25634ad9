//! `understudy demo`: the whole loop on its own, on invented data, over real HTTP.
//!
//! It starts the service in-process on a free loopback port with the embedded default config,
//! backfills a quarter of labeled history, then lives through monthly periods: score invoices,
//! receive their outcomes a month later, ask for a retrain and wait for the verdict. Half-way
//! the world changes (see [`scenario`]). It ends by printing the promotion log, then one line
//! per policy from a backtest of the same history (`backtest`). Nothing is scripted: every
//! verdict comes from the run itself.

pub mod scenario;

use std::path::PathBuf;
use std::time::Duration;

use anyhow::{bail, Context};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};

use crate::app::{self, Service};
use crate::config::Config;
use crate::learn::Example;
use crate::schema::Schema;
use crate::time::{now_ms, to_rfc3339};
use scenario::{invoice, Regime};

/// Invoices backfilled as history before the first model.
const HISTORY: usize = 4800;
/// Invoices scored per period.
const PER_PERIOD: usize = 1200;
/// Periods before and after the change.
const PERIODS_BEFORE: usize = 3;
const PERIODS_AFTER: usize = 3;
/// Concurrent score requests.
const CLIENTS: usize = 8;

/// What the demo saw, for the caller (and the test) to check.
#[derive(Debug)]
pub struct DemoSummary {
    pub verdicts_before_change: Vec<String>,
    pub verdicts_after_change: Vec<String>,
    pub log: Vec<crate::promotion::Entry>,
    /// The backtest of the same history (one step a month, the same config).
    pub backtest: Option<crate::backtest::Backtest>,
    /// Its wall-clock time.
    pub backtest_took: Duration,
}

/// The demo's config: the embedded default with the training window searched over the whole
/// window, its latest half and its latest quarter (`training.window_shares`), so a run after
/// the change can learn from the new rows alone. As TOML, so a kept store can be re-fitted
/// with the same config (`train --reproduce RUN --config DIR/demo-config.toml`).
pub fn config_toml() -> String {
    let searched = crate::config::DEFAULT_CONFIG_TOML.replace(
        "# window_shares = [1.0, 0.5, 0.25]",
        "window_shares = [1.0, 0.5, 0.25]",
    );
    debug_assert_ne!(searched, crate::config::DEFAULT_CONFIG_TOML);
    searched
}

/// The name of the demo's config in a kept data dir.
pub const CONFIG_FILE: &str = "demo-config.toml";

/// Runs the demo and prints its progress and the promotion log.
pub async fn run(data: Option<PathBuf>, seed: u64) -> anyhow::Result<()> {
    let temp;
    let kept = data.is_some();
    let dir = match data {
        Some(dir) => dir,
        None => {
            temp = tempfile::tempdir()?;
            temp.path().to_owned()
        }
    };
    let summary = run_in(dir.clone(), seed, true).await?;
    println!(
        "\npromotion log (newest first):\n{}",
        crate::render::log_table(&summary.log)
    );
    println!(
        "before the change: {}; after it: {}.",
        summary.verdicts_before_change.join(", "),
        summary.verdicts_after_change.join(", ")
    );
    if let Some(report) = &summary.backtest {
        println!(
            "\n{}",
            backtest_lines(report, &summary.log, summary.backtest_took)
        );
    }
    if kept {
        println!(
            "store kept in {0}; `understudy log --data {0}` shows the log again, and \
             `understudy train --reproduce RUN --data-dir {0} --config {0}/{CONFIG_FILE}` re-fits a run",
            dir.display()
        );
    } else {
        println!("the store was temporary; pass --data DIR to keep it");
    }
    Ok(())
}

/// The demo against a store in `dir`; prints progress when `verbose`.
pub async fn run_in(dir: PathBuf, seed: u64, verbose: bool) -> anyhow::Result<DemoSummary> {
    let text = config_toml();
    let mut config = Config::from_toml(&text).context("the demo's config")?;
    std::fs::create_dir_all(&dir)?;
    std::fs::write(dir.join(CONFIG_FILE), &text)?;
    config.server.data_dir = dir;
    config.server.listen = "127.0.0.1:0".parse()?;
    // The demo asks for each run itself, once a period's outcomes are in.
    config.schedule.every = None;
    config.schedule.new_labels = None;
    let replay_config = config.clone();
    let schema = config.schema();
    // Every labeled row in the order the service saw it, for the backtest at the end.
    let mut seen: Vec<Example> = vec![];
    let service = tokio::task::spawn_blocking(move || Service::open(config)).await??;
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
    let base = format!("http://{}", listener.local_addr()?);
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(app::serve(listener, service, async {
        let _ = stopped.await;
    }));
    let say = |line: String| {
        if verbose {
            println!("{line}");
        }
    };

    let client = reqwest::Client::new();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    say(format!(
        "Harbourline Trade Credit (invented): scoring invoices for late payment at {base}"
    ));

    // A quarter of labeled history, backfilled with event times in the past.
    let span_ms: i64 = 90 * 24 * 3600 * 1000;
    let start = now_ms() - span_ms;
    let step = span_ms / HISTORY as i64;
    let history: Vec<Json> = (0..HISTORY)
        .map(|i| {
            let inv = invoice(&mut rng, Regime::Before);
            let label = inv.draw_label(&mut rng);
            let event_time = start + (i as i64) * step;
            seen.extend(example(&schema, &inv, label, event_time));
            json!({
                "features": inv.features,
                "label": label,
                "event_time": to_rfc3339(event_time),
            })
        })
        .collect();
    for chunk in history.chunks(1000) {
        post(
            &client,
            &format!("{base}/v1/examples"),
            &Json::Array(chunk.to_vec()),
        )
        .await?;
    }
    let verdict = retrain_and_wait(&client, &base).await?;
    say(format!(
        "history: {HISTORY} labeled invoices backfilled → {verdict}"
    ));

    let mut before = Vec::new();
    let mut after = Vec::new();
    for period in 1..=(PERIODS_BEFORE + PERIODS_AFTER) {
        let regime = if period <= PERIODS_BEFORE {
            Regime::Before
        } else {
            Regime::After
        };
        let invoices: Vec<_> = (0..PER_PERIOD).map(|_| invoice(&mut rng, regime)).collect();
        let scored = score_all(&client, &base, &invoices).await?;
        // A month later the outcomes arrive.
        for (inv, score_id) in invoices.iter().zip(&scored) {
            let label = inv.draw_label(&mut rng);
            // The backtest places the month's rows after everything before, in scoring order.
            let event_time = start + seen.len() as i64 * step;
            seen.extend(example(&schema, inv, label, event_time));
            post(
                &client,
                &format!("{base}/v1/outcomes"),
                &json!({"score_id": score_id, "label": label}),
            )
            .await?;
        }
        let verdict = retrain_and_wait(&client, &base).await?;
        let when = if regime == Regime::Before {
            "before the change"
        } else {
            "after the change"
        };
        say(format!(
            "month {period} ({when}): {PER_PERIOD} invoices scored, outcomes received → {verdict}"
        ));
        let verdict_word = verdict.split(':').next().unwrap_or_default().to_owned();
        if regime == Regime::Before {
            before.push(verdict_word);
        } else {
            after.push(verdict_word);
        }
    }

    // Drift: the change was in how features relate to late payment, not in the features.
    let drift: Json = client
        .get(format!("{base}/v1/drift"))
        .send()
        .await?
        .json()
        .await?;
    if let Some(features) = drift["drift"]["features"].as_array() {
        let worst = features.iter().max_by(|a, b| {
            a["psi"]
                .as_f64()
                .unwrap_or(0.0)
                .total_cmp(&b["psi"].as_f64().unwrap_or(0.0))
        });
        if let Some(worst) = worst {
            say(format!(
                "drift of the last {} requests against {}: largest feature PSI {:.3} ({}, band {}); \
                 the change was in how the features relate to late payment, which PSI cannot see \
                 and the outcomes and the gate did",
                drift["drift"]["window"]["rows"],
                drift["drift"]["model_id"].as_str().unwrap_or("?"),
                worst["psi"].as_f64().unwrap_or(f64::NAN),
                worst["name"].as_str().unwrap_or("?"),
                worst["band"].as_str().unwrap_or("?"),
            ));
        }
    }

    let log: Json = client
        .get(format!("{base}/v1/promotions?limit=100"))
        .send()
        .await?
        .json()
        .await?;
    let log = serde_json::from_value(log["entries"].clone())?;
    let _ = stop.send(());
    server.await??;

    // The same history replayed offline: a step at the end of the backfill and after each
    // month, the same config, the same search and gate (`backtest`).
    let options = crate::backtest::Options {
        step: crate::backtest::Step::Rows(PER_PERIOD),
        label_delay: 0,
        start: Some(start + HISTORY as i64 * step),
        threads: 2,
        recovery_rows: PER_PERIOD,
    };
    let started = std::time::Instant::now();
    let backtest = tokio::task::spawn_blocking(move || {
        crate::backtest::run(&replay_config, seen, &options, &|_, _| {})
    })
    .await?
    .ok();
    let backtest_took = started.elapsed();
    Ok(DemoSummary {
        verdicts_before_change: before,
        verdicts_after_change: after,
        log,
        backtest,
        backtest_took,
    })
}

/// One labeled row as a run reads it (the demo's invoices always fit the schema).
fn example(
    schema: &Schema,
    inv: &scenario::Invoice,
    label: u8,
    event_time: i64,
) -> Option<Example> {
    Some(Example {
        monitoring: Default::default(),
        id: Default::default(),
        event_time,
        row: schema.parse_row(&inv.features).ok()?,
        label: f64::from(label),
    })
}

/// The runs of the configured policy in the backtest next to the service's own verdicts
/// (oldest first), as `(service, backtest)`: the backtest replays all but the last month's
/// run (no later month to score).
pub fn replayed_verdicts(
    report: &crate::backtest::Backtest,
    log: &[crate::promotion::Entry],
) -> Vec<(String, String)> {
    let service = log.iter().rev().map(|e| e.verdict.as_str().to_owned());
    let replayed = report
        .runs
        .iter()
        .filter(|r| r.policy == crate::backtest::Policy::Configured)
        .map(|r| r.verdict.as_str().to_owned());
    service.zip(replayed).collect()
}

/// One line per policy from the demo's backtest, and how its verdicts compare with the
/// service's.
fn backtest_lines(
    report: &crate::backtest::Backtest,
    log: &[crate::promotion::Entry],
    took: Duration,
) -> String {
    use crate::backtest::Policy;
    let pairs = replayed_verdicts(report, log);
    let same = pairs.iter().filter(|(a, b)| a == b).count();
    let mut out = String::from(
        "backtest of the same history (a step a month, this config's search and gate; `understudy backtest` does this on a CSV):\n",
    );
    let took = format!("{:.1} s", took.as_secs_f64());
    for (policy, name) in [
        (Policy::Configured, "configured policy"),
        (Policy::NeverRetrained, "never retrained"),
        (Policy::AlwaysPromote, "always promote"),
    ] {
        let totals = report.totals.get(policy);
        let auc = totals
            .mean_metric
            .map_or("-".to_owned(), |v| format!("{v:.4}"));
        out.push_str(&format!(
            "  {name:<18} mean {} {auc} over {} months, {} promotions in {} runs\n",
            report.metric,
            report.periods.len(),
            totals.promotions,
            totals.runs
        ));
    }
    out.push_str(&format!(
        "  the replayed runs gave the service's verdicts in {same} of {} (the last month's run has no later month to score); the backtest took {took}",
        pairs.len()
    ));
    out
}

async fn post(client: &reqwest::Client, url: &str, body: &Json) -> anyhow::Result<Json> {
    let response = client
        .post(url)
        .json(body)
        .send()
        .await
        .with_context(|| format!("POST {url}"))?;
    let status = response.status();
    let reply: Json = response.json().await?;
    if !status.is_success() {
        bail!("POST {url} → {status}: {}", reply["detail"]);
    }
    Ok(reply)
}

/// Scores every invoice, `CLIENTS` requests at a time; returns the score ids in order.
async fn score_all(
    client: &reqwest::Client,
    base: &str,
    invoices: &[scenario::Invoice],
) -> anyhow::Result<Vec<String>> {
    let url = format!("{base}/v1/score");
    let mut ids = vec![String::new(); invoices.len()];
    for (c, chunk) in invoices.chunks(CLIENTS).enumerate() {
        let bodies: Vec<Json> = chunk
            .iter()
            .map(|inv| json!({"features": inv.features}))
            .collect();
        let requests = bodies.iter().map(|body| post(client, &url, body));
        let replies = futures::future::join_all(requests).await;
        for (k, reply) in replies.into_iter().enumerate() {
            let reply = reply?;
            ids[c * CLIENTS + k] = reply["score_id"].as_str().unwrap_or_default().to_owned();
        }
    }
    Ok(ids)
}

/// Starts a run and polls it to the end; returns "verdict: reason".
async fn retrain_and_wait(client: &reqwest::Client, base: &str) -> anyhow::Result<String> {
    let started = post(client, &format!("{base}/v1/retrain"), &json!({})).await?;
    let run_id = started["run_id"].as_str().context("run id")?.to_owned();
    loop {
        tokio::time::sleep(Duration::from_millis(100)).await;
        let status: Json = client
            .get(format!("{base}/v1/runs/{run_id}"))
            .send()
            .await?
            .json()
            .await?;
        if status["run"]["state"] == "finished" {
            let entry = &status["entry"];
            return Ok(format!(
                "{}: {}",
                entry["verdict"].as_str().unwrap_or("?"),
                entry["reason"].as_str().unwrap_or("")
            ));
        }
    }
}
