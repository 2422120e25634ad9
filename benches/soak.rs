//! A bounded soak of the release binary on loopback: every kind of traffic at once, score
//! retention at small limits, the server's memory sampled throughout.
//!
//! ```sh
//! cargo bench --bench soak                    # 60 s
//! cargo bench --bench soak -- --minutes 30    # or UNDERSTUDY_SOAK_MINUTES=30
//! ```
//!
//! It starts `understudy serve` (the binary `cargo bench` built, so the release profile) with
//! the embedded config changed for the soak (retention at `scores_max_age = "2m"`,
//! `scores_max_count = 10000`, `check_every = "5s"`; the drift window shrunk to fit; the
//! store's cache at `server.cache_mb = 16`, so a few minutes fill it; no scheduled runs), backfills 2,000 labeled invoices and trains the first model, then for the
//! duration runs:
//!
//! - **score**: `POST /v1/score` from 4 clients at `--rate` requests per second in all
//!   (default 400), invoices of the invented scenario; the world changes after a third of the
//!   soak, so later runs have something to promote;
//! - **outcome**: `POST /v1/outcomes` for half of those scores, 1 to 5 s after each;
//! - **examples**: `POST /v1/examples`, 50 backfilled rows every second;
//! - **retrain**: `POST /v1/retrain` as soon as the previous run finished (polling
//!   `GET /v1/runs/{id}`);
//! - **compacted outcome**: outcomes for the soak's first 20 scores once retention has deleted
//!   them, which must be 404 (unknown score);
//! - **sampler**: every 5 s the server's `VmRSS` (`/proc/PID/status`), `GET /metrics` (score
//!   records stored and deleted) and the data dir's size.
//!
//! Every response is counted by kind and status. It exits non-zero when any response is not
//! the expected one (a 503 with `Retry-After` from scoring counts as deliberate shedding, not
//! an error), when the server logs an error or a panic or does not stop cleanly on SIGTERM,
//! when retention deleted nothing, or when memory keeps climbing: the mean RSS of the last third
//! of the samples above the middle third's by more than `--memory-tolerance` percent (default
//! 10). The report also goes to `target/bench-reports/soak.json`.

use std::collections::{BTreeMap, VecDeque};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};

use understudy::config::DEFAULT_CONFIG_TOML;
use understudy::demo::scenario::{invoice, Regime};
use understudy::time::{now_ms, to_rfc3339};

const SCORERS: usize = 4;
const SAMPLE_EVERY: Duration = Duration::from_secs(5);
const RETENTION_COUNT: u64 = 10_000;
const PROBES: usize = 20;

struct Options {
    duration: Duration,
    rate: f64,
    tolerance: f64,
    keep: bool,
}

fn options() -> Options {
    let mut minutes: Option<f64> = std::env::var("UNDERSTUDY_SOAK_MINUTES")
        .ok()
        .and_then(|s| s.parse().ok());
    let mut seconds: Option<f64> = None;
    let mut rate = 400.0;
    let mut tolerance = 10.0;
    let mut keep = false;
    let args: Vec<String> = std::env::args().skip(1).collect();
    let mut i = 0;
    while i < args.len() {
        let value = || -> f64 {
            args.get(i + 1)
                .and_then(|v| v.parse().ok())
                .unwrap_or_else(|| panic!("{} needs a number", args[i]))
        };
        match args[i].as_str() {
            "--minutes" => {
                minutes = Some(value());
                i += 1;
            }
            "--seconds" => {
                seconds = Some(value());
                i += 1;
            }
            "--rate" => {
                rate = value();
                i += 1;
            }
            "--memory-tolerance" => {
                tolerance = value();
                i += 1;
            }
            "--keep" => keep = true,
            // cargo bench passes --bench; anything else is a mistake.
            "--bench" => {}
            other => panic!("unknown argument {other}; see the top of benches/soak.rs"),
        }
        i += 1;
    }
    let duration = match (seconds, minutes) {
        (Some(s), _) => Duration::from_secs_f64(s),
        (None, Some(m)) => Duration::from_secs_f64(m * 60.0),
        (None, None) => Duration::from_secs(60),
    };
    Options {
        duration,
        rate,
        tolerance,
        keep,
    }
}

/// The embedded config, changed for the soak.
fn soak_config() -> String {
    let mut text = DEFAULT_CONFIG_TOML.to_owned();
    let count = format!("scores_max_count = {RETENTION_COUNT}");
    for (from, to) in [
        ("cache_mb = 128", "cache_mb = 16"),
        ("window_rows = 5000", "window_rows = 2000"),
        ("window_age = \"7d\"", "window_age = \"1m\""),
        ("check_every = \"15m\"", "check_every = \"1m\""),
        ("every = \"6h\"", "# every = \"6h\""),
        ("new_labels = 2000", "# new_labels = 2000"),
        ("scores_max_age = \"90d\"", "scores_max_age = \"2m\""),
        ("scores_max_count = 5000000", count.as_str()),
        ("check_every = \"10m\"", "check_every = \"5s\""),
    ] {
        assert!(text.contains(from), "`{from}` not in the default config");
        text = text.replacen(from, to, 1);
    }
    text
}

/// Responses by kind and status, and which were unexpected.
#[derive(Default)]
struct Counts {
    by: Mutex<BTreeMap<(String, String), u64>>,
    unexpected: AtomicU64,
    shown: AtomicU64,
}

impl Counts {
    fn add(&self, kind: &str, status: String, unexpected: bool, detail: &str) {
        *self
            .by
            .lock()
            .unwrap()
            .entry((kind.to_owned(), status.clone()))
            .or_default() += 1;
        if unexpected {
            self.unexpected.fetch_add(1, Ordering::SeqCst);
            if self.shown.fetch_add(1, Ordering::SeqCst) < 10 {
                eprintln!("unexpected: {kind} {status}: {detail}");
            }
        }
    }
}

struct Soak {
    base: String,
    client: reqwest::Client,
    counts: Counts,
    stop: AtomicBool,
    started: Instant,
    duration: Duration,
    /// Outcomes to send: (due, score id, label).
    due: Mutex<VecDeque<(Instant, String, u8)>>,
    verdicts: Mutex<BTreeMap<String, u64>>,
    compacted: AtomicU64,
}

impl Soak {
    /// Sends a request and counts its answer; returns the body when the status is expected.
    async fn send(
        &self,
        kind: &str,
        request: reqwest::RequestBuilder,
        expected: &[u16],
    ) -> Option<Json> {
        let response = match request.send().await {
            Ok(r) => r,
            Err(e) => {
                self.counts
                    .add(kind, "transport error".into(), true, &e.to_string());
                return None;
            }
        };
        let status = response.status().as_u16();
        let retry_after = response.headers().contains_key("retry-after");
        let text = response.text().await.unwrap_or_default();
        if expected.contains(&status) {
            self.counts.add(kind, status.to_string(), false, "");
            return Some(serde_json::from_str(&text).unwrap_or(Json::Null));
        }
        if status == 503 && retry_after && kind == "score" {
            self.counts.add(kind, "503 shed".into(), false, "");
            return None;
        }
        self.counts.add(kind, status.to_string(), true, &text);
        None
    }

    fn post(&self, path: &str, body: &Json) -> reqwest::RequestBuilder {
        self.client.post(format!("{}{path}", self.base)).json(body)
    }

    fn get(&self, path: &str) -> reqwest::RequestBuilder {
        self.client.get(format!("{}{path}", self.base))
    }

    fn regime(&self) -> Regime {
        if self.started.elapsed() < self.duration / 3 {
            Regime::Before
        } else {
            Regime::After
        }
    }

    fn stopping(&self) -> bool {
        self.stop.load(Ordering::SeqCst)
    }

    async fn score(&self, rng: &mut ChaCha8Rng) -> Option<(String, u8)> {
        let inv = invoice(rng, self.regime());
        let label = inv.draw_label(rng);
        let body = self
            .send(
                "score",
                self.post("/v1/score", &json!({ "features": inv.features })),
                &[200],
            )
            .await?;
        Some((body["score_id"].as_str()?.to_owned(), label))
    }

    async fn scorer(&self, seed: u64, per_second: f64) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut tick = tokio::time::interval(Duration::from_secs_f64(1.0 / per_second));
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        while !self.stopping() {
            tick.tick().await;
            if let Some((id, label)) = self.score(&mut rng).await {
                if rng.gen_bool(0.5) {
                    let due = Instant::now() + Duration::from_millis(rng.gen_range(1000..5000));
                    self.due.lock().unwrap().push_back((due, id, label));
                }
            }
        }
    }

    async fn outcome_sender(&self) {
        while !self.stopping() {
            let next = {
                let mut due = self.due.lock().unwrap();
                // Delays differ, so take any due one near the front.
                let pos = due
                    .iter()
                    .take(64)
                    .position(|(at, _, _)| *at <= Instant::now());
                pos.and_then(|p| due.remove(p))
            };
            match next {
                Some((_, id, label)) => {
                    self.send(
                        "outcome",
                        self.post("/v1/outcomes", &json!({"score_id": id, "label": label})),
                        &[201],
                    )
                    .await;
                }
                None => tokio::time::sleep(Duration::from_millis(20)).await,
            }
        }
    }

    async fn examples(&self) {
        let mut rng = ChaCha8Rng::seed_from_u64(99);
        let mut n = 0u64;
        let mut tick = tokio::time::interval(Duration::from_secs(1));
        while !self.stopping() {
            tick.tick().await;
            let rows: Vec<Json> = (0..50)
                .map(|_| {
                    n += 1;
                    let inv = invoice(&mut rng, self.regime());
                    let at = now_ms() - rng.gen_range(1_000..3_600_000);
                    json!({"features": inv.features, "label": inv.draw_label(&mut rng),
                           "event_time": to_rfc3339(at), "id": format!("soak-{n}")})
                })
                .collect();
            self.send(
                "examples",
                self.post("/v1/examples", &Json::Array(rows)),
                &[200],
            )
            .await;
        }
    }

    /// One run after another; returns when stopping (after the current run finishes).
    async fn retrainer(&self) {
        while !self.stopping() {
            let Some(run) = self
                .send("retrain", self.post("/v1/retrain", &json!({})), &[202])
                .await
            else {
                tokio::time::sleep(Duration::from_secs(1)).await;
                continue;
            };
            let id = run["run_id"].as_str().unwrap_or_default().to_owned();
            loop {
                tokio::time::sleep(Duration::from_millis(250)).await;
                let Some(body) = self
                    .send("run status", self.get(&format!("/v1/runs/{id}")), &[200])
                    .await
                else {
                    break;
                };
                if body["run"]["state"] == "finished" {
                    let verdict = body["entry"]["verdict"].as_str().unwrap_or("?").to_owned();
                    *self.verdicts.lock().unwrap().entry(verdict).or_default() += 1;
                    break;
                }
            }
        }
    }

    /// Once retention has deleted the first scores, their outcomes must be unknown (404).
    async fn compacted_probe(&self, ids: &[String]) {
        let mut sent = false;
        while !self.stopping() {
            tokio::time::sleep(Duration::from_secs(1)).await;
            if sent || self.compacted.load(Ordering::SeqCst) < ids.len() as u64 {
                continue;
            }
            for id in ids {
                self.send(
                    "compacted outcome",
                    self.post("/v1/outcomes", &json!({"score_id": id, "label": 1})),
                    &[404],
                )
                .await;
            }
            sent = true;
        }
    }

    async fn metrics(&self) -> Option<(u64, u64)> {
        let response = self.get("/metrics").send().await;
        let text = match response {
            Ok(r) if r.status() == 200 => {
                self.counts.add("metrics", "200".into(), false, "");
                r.text().await.ok()?
            }
            Ok(r) => {
                let status = r.status().as_u16().to_string();
                self.counts.add("metrics", status, true, "");
                return None;
            }
            Err(e) => {
                self.counts
                    .add("metrics", "transport error".into(), true, &e.to_string());
                return None;
            }
        };
        let value = |name: &str| -> Option<u64> {
            text.lines()
                .find_map(|l| l.strip_prefix(name)?.strip_prefix(' '))?
                .trim()
                .parse()
                .ok()
        };
        Some((
            value("understudy_score_records")?,
            value("understudy_score_records_compacted_total")?,
        ))
    }
}

fn rss_kb(pid: u32) -> Option<u64> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    status
        .lines()
        .find_map(|l| l.strip_prefix("VmRSS:"))?
        .trim()
        .trim_end_matches("kB")
        .trim()
        .parse()
        .ok()
}

fn dir_bytes(dir: &Path) -> u64 {
    let mut total = 0;
    let mut stack = vec![dir.to_owned()];
    while let Some(path) = stack.pop() {
        let Ok(entries) = std::fs::read_dir(&path) else {
            continue;
        };
        for entry in entries.flatten() {
            match entry.metadata() {
                Ok(m) if m.is_dir() => stack.push(entry.path()),
                Ok(m) => total += m.len(),
                Err(_) => {}
            }
        }
    }
    total
}

#[derive(Clone, Copy)]
struct Sample {
    seconds: f64,
    rss_kb: u64,
    score_records: u64,
    compacted: u64,
    store_bytes: u64,
    requests: u64,
}

/// Kills the server if the soak itself fails before stopping it.
struct ServerGuard(Option<Child>);

impl Drop for ServerGuard {
    fn drop(&mut self) {
        if let Some(child) = &mut self.0 {
            let _ = child.kill();
            let _ = child.wait();
        }
    }
}

fn mean(values: &[f64]) -> f64 {
    values.iter().sum::<f64>() / values.len().max(1) as f64
}

fn main() {
    let opts = options();
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-data/soak");
    let _ = std::fs::remove_dir_all(&root);
    std::fs::create_dir_all(&root).expect("soak dir");
    let config_path = root.join("understudy.toml");
    std::fs::write(&config_path, soak_config()).expect("write config");
    let data = root.join("data");
    let log_path = root.join("server.log");
    let binary = PathBuf::from(env!("CARGO_BIN_EXE_understudy"));
    println!(
        "soak: {} for {:.0} s at {} scores/s, retention {} records / 2 min every 5 s",
        binary.display(),
        opts.duration.as_secs_f64(),
        opts.rate,
        RETENTION_COUNT
    );
    let log = std::fs::File::create(&log_path).expect("log file");
    let child = Command::new(&binary)
        .args(["serve", "--log-json", "--listen", "127.0.0.1:0", "--config"])
        .arg(&config_path)
        .arg("--data")
        .arg(&data)
        .env("RUST_LOG", "info")
        .stdout(Stdio::from(log.try_clone().expect("log")))
        .stderr(Stdio::from(log))
        .spawn()
        .expect("start the server");
    let pid = child.id();
    let mut guard = ServerGuard(Some(child));

    let mut listen = None;
    for _ in 0..600 {
        let text = std::fs::read_to_string(&log_path).unwrap_or_default();
        // The line that names the bound address (an earlier one names the configured :0).
        let serving = text.lines().find(|l| l.contains("understudy serving"));
        if let Some(rest) = serving.and_then(|l| l.split("\"listen\":\"").nth(1)) {
            listen = rest.split('"').next().map(str::to_owned);
            break;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    let listen = listen.expect("the server did not log its address within 60 s");
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .expect("runtime");
    let soak = Arc::new(Soak {
        base: format!("http://{listen}"),
        client: reqwest::Client::new(),
        counts: Counts::default(),
        stop: AtomicBool::new(false),
        started: Instant::now(),
        duration: opts.duration,
        due: Mutex::new(VecDeque::new()),
        verdicts: Mutex::new(BTreeMap::new()),
        compacted: AtomicU64::new(0),
    });

    let samples = runtime.block_on(async {
        // History and the first model.
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let start = now_ms() - 20 * 24 * 3600 * 1000;
        let rows: Vec<Json> = (0..2000)
            .map(|i| {
                let inv = invoice(&mut rng, Regime::Before);
                json!({"features": inv.features, "label": inv.draw_label(&mut rng),
                       "event_time": to_rfc3339(start + i * 60_000), "id": format!("history-{i}")})
            })
            .collect();
        for chunk in rows.chunks(1000) {
            soak.send(
                "examples",
                soak.post("/v1/examples", &Json::Array(chunk.to_vec())),
                &[200],
            )
            .await
            .expect("backfill");
        }
        let run = soak
            .send("retrain", soak.post("/v1/retrain", &json!({})), &[202])
            .await
            .expect("first run");
        let id = run["run_id"].as_str().expect("run id").to_owned();
        loop {
            tokio::time::sleep(Duration::from_millis(250)).await;
            let body = soak
                .send("run status", soak.get(&format!("/v1/runs/{id}")), &[200])
                .await
                .expect("run status");
            if body["run"]["state"] == "finished" {
                assert_eq!(body["entry"]["verdict"], "promoted", "first run: {body}");
                break;
            }
        }
        // The first scores, strictly older than the rest: retention must delete them.
        let mut rng = ChaCha8Rng::seed_from_u64(2);
        let mut probes = Vec::new();
        for _ in 0..PROBES {
            probes.push(soak.score(&mut rng).await.expect("first scores").0);
        }
        tokio::time::sleep(Duration::from_millis(5)).await;
        println!("first model trained; load starts");

        let began = Instant::now();
        let mut tasks = Vec::new();
        for s in 0..SCORERS {
            let soak = Arc::clone(&soak);
            let per = opts.rate / SCORERS as f64;
            tasks.push(tokio::spawn(async move {
                soak.scorer(10 + s as u64, per).await
            }));
        }
        for _ in 0..2 {
            let soak = Arc::clone(&soak);
            tasks.push(tokio::spawn(async move { soak.outcome_sender().await }));
        }
        {
            let soak = Arc::clone(&soak);
            tasks.push(tokio::spawn(async move { soak.examples().await }));
        }
        {
            let soak = Arc::clone(&soak);
            tasks.push(tokio::spawn(async move { soak.retrainer().await }));
        }
        {
            let soak = Arc::clone(&soak);
            tasks.push(tokio::spawn(
                async move { soak.compacted_probe(&probes).await },
            ));
        }

        println!(
            "{:>7} {:>9} {:>13} {:>10} {:>9} {:>10}",
            "t (s)", "RSS (MB)", "score records", "compacted", "store MB", "requests"
        );
        let mut samples: Vec<Sample> = Vec::new();
        let mut tick = tokio::time::interval(SAMPLE_EVERY);
        loop {
            tick.tick().await;
            let (records, compacted) = soak.metrics().await.unwrap_or((0, 0));
            soak.compacted.store(compacted, Ordering::SeqCst);
            let requests: u64 = soak.counts.by.lock().unwrap().values().sum();
            let sample = Sample {
                seconds: began.elapsed().as_secs_f64(),
                rss_kb: rss_kb(pid).unwrap_or(0),
                score_records: records,
                compacted,
                store_bytes: dir_bytes(&data),
                requests,
            };
            println!(
                "{:>7.0} {:>9.1} {:>13} {:>10} {:>9.1} {:>10}",
                sample.seconds,
                sample.rss_kb as f64 / 1024.0,
                sample.score_records,
                sample.compacted,
                sample.store_bytes as f64 / 1e6,
                sample.requests
            );
            samples.push(sample);
            if began.elapsed() >= opts.duration {
                break;
            }
        }
        soak.stop.store(true, Ordering::SeqCst);
        for task in tasks {
            let _ = task.await;
        }
        samples
    });

    // Stop the server as an operator would, and wait for it.
    let mut child = guard.0.take().expect("server");
    let stopped = Instant::now();
    // SAFETY: kill(2) on the child this process started and has not reaped.
    unsafe { libc::kill(pid as libc::pid_t, libc::SIGTERM) };
    let status = child.wait().expect("wait for the server");
    println!(
        "server stopped on SIGTERM in {:.1} s: {status}",
        stopped.elapsed().as_secs_f64()
    );
    let log = std::fs::read_to_string(&log_path).unwrap_or_default();
    let log_errors: Vec<&str> = log
        .lines()
        .filter(|l| l.contains("\"level\":\"ERROR\"") || l.contains("panicked"))
        .collect();
    let passes = log
        .lines()
        .filter(|l| l.contains("score records compacted"))
        .count();

    println!("\nresponses by kind and status:");
    let by = soak.counts.by.lock().unwrap().clone();
    for ((kind, status), n) in &by {
        println!("  {kind:<18} {status:<16} {n:>9}");
    }
    let verdicts = soak.verdicts.lock().unwrap().clone();
    println!("runs finished during the load: {verdicts:?}");
    println!("compaction passes that deleted records (server log): {passes}");

    let mut failures = Vec::new();
    let unexpected = soak.counts.unexpected.load(Ordering::SeqCst);
    if unexpected > 0 {
        failures.push(format!("{unexpected} unexpected responses"));
    }
    if !status.success() {
        failures.push(format!("the server exited with {status}"));
    }
    if !log_errors.is_empty() {
        failures.push(format!(
            "{} error or panic lines in the server log, the first: {}",
            log_errors.len(),
            log_errors[0]
        ));
    }
    let last = samples.last().copied();
    if last.is_none_or(|s| s.compacted == 0) {
        failures.push("retention deleted nothing".into());
    }
    if by
        .get(&("compacted outcome".to_owned(), "404".to_owned()))
        .copied()
        .unwrap_or(0)
        < PROBES as u64
    {
        failures.push("the outcomes of compacted scores were not all probed".into());
    }

    // Memory: the last third of the samples against the middle third.
    let rss: Vec<f64> = samples.iter().map(|s| s.rss_kb as f64 / 1024.0).collect();
    let third = rss.len() / 3;
    let (middle, last_third) = if third >= 2 {
        (mean(&rss[third..2 * third]), mean(&rss[2 * third..]))
    } else {
        (f64::NAN, f64::NAN)
    };
    let growth = (last_third / middle - 1.0) * 100.0;
    println!(
        "RSS: min {:.1} MB, max {:.1} MB; mean of the middle third {middle:.1} MB, of the last third {last_third:.1} MB ({growth:+.1} %, tolerance {:.0} %)",
        rss.iter().cloned().fold(f64::INFINITY, f64::min),
        rss.iter().cloned().fold(0.0, f64::max),
        opts.tolerance
    );
    if third < 2 {
        failures.push(format!("{} memory samples are too few to judge", rss.len()));
    } else if growth > opts.tolerance {
        failures.push(format!(
            "memory keeps climbing: the last third's mean is {growth:+.1} % above the middle third's"
        ));
    }

    let report = json!({
        "seconds": opts.duration.as_secs_f64(),
        "rate": opts.rate,
        "responses": by.iter().map(|((k, s), n)| json!({"kind": k, "status": s, "count": n})).collect::<Vec<_>>(),
        "unexpected": unexpected,
        "verdicts": verdicts,
        "compaction_passes": passes,
        "samples": samples.iter().map(|s| json!({"seconds": s.seconds, "rss_kb": s.rss_kb,
            "score_records": s.score_records, "compacted": s.compacted,
            "store_bytes": s.store_bytes, "requests": s.requests})).collect::<Vec<_>>(),
        "rss_middle_third_mb": middle,
        "rss_last_third_mb": last_third,
        "failures": failures,
    });
    let out = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-reports");
    std::fs::create_dir_all(&out).expect("report dir");
    std::fs::write(
        out.join("soak.json"),
        serde_json::to_vec_pretty(&report).expect("json"),
    )
    .expect("write report");
    if !opts.keep {
        let _ = std::fs::remove_dir_all(&data);
    }
    if failures.is_empty() {
        println!("soak passed");
    } else {
        for f in &failures {
            eprintln!("soak FAILED: {f}");
        }
        std::process::exit(1);
    }
}
