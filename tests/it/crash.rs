//! Kills and stops of the real binary.
//!
//! `sigkill_at_seeded_moments_loses_no_acknowledged_write` drives concurrent outcomes,
//! examples and score requests plus operator retrains and rollbacks against the binary, kills
//! it with SIGKILL at moments chosen by a seeded generator (aimed at training runs, rollbacks
//! and the shadow's live gate as well as at random), and after each kill opens the store from
//! disk and restarts the binary on it: every write that got a 2xx must be there exactly once,
//! the active model must be the one the promotion log says, and a shadowing candidate must
//! keep its shadowed outcomes.
//!
//! `an_approval_killed_at_seeded_moments_*` kills the binary just after an operator's
//! sign-off was sent: after a restart the candidate is served and the approval logged once,
//! or neither (it still waits), never twice.
//!
//! `sigterm_under_load_*` stops the binary with SIGTERM while clients write, a request hangs
//! half-sent and a long run trains: it must exit 0 within a bound, having stored every
//! acknowledged write and logged the run it abandoned.
//!
//! The binary is the debug one cargo builds unless `UNDERSTUDY_CRASH_BIN` names another;
//! `UNDERSTUDY_CRASH_CYCLES` (default 20) sets the number of kills, `UNDERSTUDY_CRASH_SEED`
//! the seed. A long run:
//!
//! ```sh
//! cargo build --release
//! UNDERSTUDY_CRASH_BIN=target/release/understudy UNDERSTUDY_CRASH_CYCLES=200 \
//!     cargo test --test it crash -- --nocapture
//! ```

use std::collections::{HashMap, HashSet, VecDeque};
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};
use understudy::demo::scenario::{invoice, Regime};
use understudy::promotion::{Entry, RunState, Trigger, Verdict};
use understudy::store::{ShadowState, SledStore, Store};
use understudy::time::{now_ms, to_rfc3339};

const DEFAULT_SEED: u64 = 20_261_203;
const DEFAULT_CYCLES: u64 = 20;
/// Shadowed outcomes the live gate waits for in the crash config.
const SHADOW_OUTCOMES: u64 = 40;
/// Labeled history backfilled before the first model.
const HISTORY_ROWS: usize = 1200;

fn binary() -> PathBuf {
    match std::env::var_os("UNDERSTUDY_CRASH_BIN") {
        Some(path) => PathBuf::from(path),
        None => PathBuf::from(env!("CARGO_BIN_EXE_understudy")),
    }
}

fn env_number(name: &str, default: u64) -> u64 {
    match std::env::var(name) {
        Ok(text) => text
            .parse()
            .unwrap_or_else(|_| panic!("{name} must be a whole number, got `{text}`")),
        Err(_) => default,
    }
}

/// The embedded config with `edits` applied (each `from` must occur in it).
fn config_text(edits: &[(&str, &str)]) -> String {
    let mut text = understudy::config::DEFAULT_CONFIG_TOML.to_owned();
    for (from, to) in edits {
        assert!(text.contains(from), "the default config has no `{from}`");
        text = text.replacen(from, to, 1);
    }
    text
}

/// Quick runs (one l1_ratio, 8 lambdas, 3 folds, a 1,200-row window), a run after every 150
/// new labels, and shadowing for 40 outcomes.
const QUICK: &[(&str, &str)] = &[
    ("window_rows = 4800", "window_rows = 1200"),
    ("folds = 5", "folds = 3"),
    ("repeats = 2", "repeats = 1"),
    ("l1_ratio = [0.5, 1.0]", "l1_ratio = [0.5]"),
    ("lambda_count = 20", "lambda_count = 8"),
    ("outcomes = 0", "outcomes = 40"),
    ("every = \"6h\"", ""),
    ("new_labels = 2000", "new_labels = 150"),
];

fn write_config(dir: &Path, name: &str, text: &str) -> PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, text).unwrap();
    path
}

/// The binary serving on a free loopback port; its log is read on a thread (kept: the last
/// 300 lines) so the pipe never fills.
struct Server {
    child: Child,
    base: String,
    log: Arc<Mutex<VecDeque<String>>>,
}

impl Server {
    fn start(config: &Path, data: &Path) -> Server {
        let mut child = Command::new(binary())
            .arg("serve")
            .arg("--config")
            .arg(config)
            .args(["--listen", "127.0.0.1:0", "--log-json", "--data"])
            .arg(data)
            .env("RUST_LOG", "info")
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap_or_else(|e| panic!("cannot start {}: {e}", binary().display()));
        let stderr = child.stderr.take().unwrap();
        let log = Arc::new(Mutex::new(VecDeque::new()));
        let lines = Arc::clone(&log);
        let (found, listen) = std::sync::mpsc::channel::<String>();
        std::thread::spawn(move || {
            for line in BufReader::new(stderr).lines() {
                let Ok(line) = line else { break };
                if let Ok(event) = serde_json::from_str::<Json>(&line) {
                    if event["fields"]["message"] == "understudy serving" {
                        let at = event["fields"]["listen"].as_str().unwrap_or("").to_owned();
                        let _ = found.send(at);
                    }
                }
                let mut lines = lines.lock().unwrap();
                lines.push_back(line);
                if lines.len() > 300 {
                    lines.pop_front();
                }
            }
        });
        let mut server = Server {
            child,
            base: String::new(),
            log,
        };
        match listen.recv_timeout(Duration::from_secs(60)) {
            Ok(at) => server.base = format!("http://{at}"),
            Err(_) => {
                let _ = server.child.kill();
                let status = server.child.wait();
                panic!(
                    "the binary did not start serving ({status:?}); its log:\n{}",
                    server.log_text()
                );
            }
        }
        server
    }

    fn url(&self, path: &str) -> String {
        format!("{}{path}", self.base)
    }

    fn log_text(&self) -> String {
        self.log
            .lock()
            .unwrap()
            .iter()
            .cloned()
            .collect::<Vec<_>>()
            .join("\n")
    }

    /// Lines that must never appear: a panic or an internal error.
    fn bad_lines(&self) -> Vec<String> {
        self.log
            .lock()
            .unwrap()
            .iter()
            .filter(|l| l.contains("panicked") || l.contains("\"level\":\"ERROR\""))
            .cloned()
            .collect()
    }

    fn kill(&mut self) {
        self.child.kill().unwrap();
        self.child.wait().unwrap();
    }

    fn terminate(&self) {
        // SAFETY: kill(2) with a pid of our own child and a signal number; no memory involved.
        let sent = unsafe { libc::kill(self.child.id() as libc::pid_t, libc::SIGTERM) };
        assert_eq!(sent, 0, "SIGTERM not sent");
    }

    /// Waits up to `bound` for the process to exit; kills it and fails beyond that.
    fn wait_exit(&mut self, bound: Duration) -> (ExitStatus, Duration) {
        let start = Instant::now();
        loop {
            if let Some(status) = self.child.try_wait().unwrap() {
                return (status, start.elapsed());
            }
            if start.elapsed() > bound {
                self.kill();
                panic!(
                    "no exit within {bound:?} of SIGTERM; the log:\n{}",
                    self.log_text()
                );
            }
            std::thread::sleep(Duration::from_millis(20));
        }
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        if let Ok(None) = self.child.try_wait() {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

fn client() -> reqwest::Client {
    reqwest::Client::builder()
        .timeout(Duration::from_secs(30))
        .build()
        .unwrap()
}

/// A request's status and JSON body, or the transport error (no answer).
async fn send(
    http: &reqwest::Client,
    method: reqwest::Method,
    url: String,
    body: Option<&Json>,
) -> Result<(u16, Json), reqwest::Error> {
    let mut request = http.request(method, url);
    if let Some(body) = body {
        request = request.json(body);
    }
    let response = request.send().await?;
    let status = response.status().as_u16();
    let text = response.text().await?;
    Ok((
        status,
        serde_json::from_str(&text).unwrap_or(Json::String(text)),
    ))
}

async fn get(http: &reqwest::Client, url: String) -> (u16, Json) {
    send(http, reqwest::Method::GET, url, None)
        .await
        .unwrap_or_else(|e| panic!("GET failed against a live server: {e}"))
}

async fn post(http: &reqwest::Client, url: String, body: &Json) -> (u16, Json) {
    send(http, reqwest::Method::POST, url, Some(body))
        .await
        .unwrap_or_else(|e| panic!("POST failed against a live server: {e}"))
}

/// What the clients were told: each write that got a 2xx, and each sent without an answer
/// (a kill or the shutdown came first; it may or may not be stored).
#[derive(Default)]
struct Ledger {
    outcomes: Vec<(String, f64)>,
    outcomes_unanswered: Vec<(String, f64)>,
    examples: Vec<(String, f64)>,
    examples_unanswered: Vec<(String, f64)>,
    scores: usize,
    /// Answers a live server must not give (a 5xx, a 404 for a score it just answered...).
    unexpected: Vec<String>,
}

type Shared = Arc<Mutex<Ledger>>;

/// Labeled history in the past, `rows` rows from `rng`, as `hist-{i}`.
async fn backfill_history(
    http: &reqwest::Client,
    server: &Server,
    rng: &mut ChaCha8Rng,
    rows: usize,
) -> Vec<(String, f64)> {
    let start = now_ms() - 6 * 3600 * 1000;
    let mut backfilled = Vec::new();
    let all: Vec<Json> = (0..rows)
        .map(|i| {
            let inv = invoice(rng, Regime::Before);
            let label = f64::from(inv.draw_label(rng));
            backfilled.push((format!("hist-{i}"), label));
            json!({"features": inv.features, "label": label,
                   "event_time": to_rfc3339(start + i as i64 * 5_000), "id": format!("hist-{i}")})
        })
        .collect();
    for chunk in all.chunks(500) {
        let (status, body) = post(http, server.url("/v1/examples"), &Json::from(chunk)).await;
        assert_eq!(status, 200, "{body}");
    }
    backfilled
}

/// Starts a run and waits for its log entry.
async fn retrain_and_wait(http: &reqwest::Client, server: &Server) -> Json {
    let (status, body) = post(http, server.url("/v1/retrain"), &json!({})).await;
    assert_eq!(status, 202, "{body}");
    let run = body["run_id"].as_str().unwrap().to_owned();
    let start = Instant::now();
    while start.elapsed() < Duration::from_secs(300) {
        let (_, body) = get(http, server.url(&format!("/v1/runs/{run}"))).await;
        if body["run"]["state"] == "finished" {
            return body["entry"].clone();
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    panic!("run {run} did not finish");
}

/// Trains until a model is active (the backfill's labels may already have started a run that
/// promoted one); returns the last run's log entry.
async fn first_model(http: &reqwest::Client, server: &Server) -> Json {
    let entry = retrain_and_wait(http, server).await;
    let (_, models) = get(http, server.url("/v1/models")).await;
    assert!(
        models["active"].is_string(),
        "no active model after {} ({})",
        entry["verdict"],
        entry["reason"]
    );
    entry
}

/// Scores an invoice and sends its outcome, again and again, until `stop`.
async fn outcome_writer(
    base: String,
    mut rng: ChaCha8Rng,
    regime: Regime,
    ledger: Shared,
    stop: Arc<AtomicBool>,
) {
    let http = client();
    while !stop.load(Ordering::SeqCst) {
        let inv = invoice(&mut rng, regime);
        let scored = send(
            &http,
            reqwest::Method::POST,
            format!("{base}/v1/score"),
            Some(&json!({"features": inv.features})),
        )
        .await;
        let score_id = match scored {
            Ok((200, body)) => body["score_id"].as_str().unwrap().to_owned(),
            Ok((status, body)) => {
                ledger
                    .lock()
                    .unwrap()
                    .unexpected
                    .push(format!("score: {status} {body}"));
                continue;
            }
            Err(_) => {
                tokio::time::sleep(Duration::from_millis(2)).await;
                continue;
            }
        };
        let label = f64::from(inv.draw_label(&mut rng));
        let answer = send(
            &http,
            reqwest::Method::POST,
            format!("{base}/v1/outcomes"),
            Some(&json!({"score_id": score_id, "label": label})),
        )
        .await;
        let mut ledger = ledger.lock().unwrap();
        ledger.scores += 1;
        match answer {
            Ok((201, body)) if body["duplicate"] == false => {
                ledger.outcomes.push((score_id, label));
            }
            Ok((status, body)) => ledger
                .unexpected
                .push(format!("outcome for {score_id}: {status} {body}")),
            Err(_) => ledger.outcomes_unanswered.push((score_id, label)),
        }
    }
}

/// Posts batches of new examples (ids `{prefix}-{n}`) until `stop`.
async fn example_writer(
    base: String,
    mut rng: ChaCha8Rng,
    regime: Regime,
    prefix: String,
    ledger: Shared,
    stop: Arc<AtomicBool>,
) {
    let http = client();
    let mut n = 0;
    while !stop.load(Ordering::SeqCst) {
        let mut batch = Vec::new();
        let mut rows = Vec::new();
        for _ in 0..25 {
            let inv = invoice(&mut rng, regime);
            let label = f64::from(inv.draw_label(&mut rng));
            let id = format!("{prefix}-{n}");
            n += 1;
            // Slightly in the past: live outcomes stay the latest rows of the window.
            let at = now_ms() - rng.gen_range(1_000..600_000);
            rows.push(json!({"features": inv.features, "label": label,
                             "event_time": to_rfc3339(at), "id": id}));
            batch.push((id, label));
        }
        let answer = send(
            &http,
            reqwest::Method::POST,
            format!("{base}/v1/examples"),
            Some(&Json::Array(rows)),
        )
        .await;
        let unanswered = answer.is_err();
        {
            let mut ledger = ledger.lock().unwrap();
            match answer {
                Ok((200, body)) if body["inserted"] == 25 => ledger.examples.extend(batch),
                Ok((status, body)) => ledger
                    .unexpected
                    .push(format!("examples {prefix}-{n}: {status} {body}")),
                Err(_) => ledger.examples_unanswered.extend(batch),
            }
        }
        tokio::time::sleep(Duration::from_millis(if unanswered { 2 } else { 5 })).await;
    }
}

/// Scores batches (no outcome follows) until `stop`.
async fn scorer(base: String, mut rng: ChaCha8Rng, ledger: Shared, stop: Arc<AtomicBool>) {
    let http = client();
    while !stop.load(Ordering::SeqCst) {
        let items: Vec<Json> = (0..10)
            .map(|_| json!({"features": invoice(&mut rng, Regime::Before).features}))
            .collect();
        match send(
            &http,
            reqwest::Method::POST,
            format!("{base}/v1/score/batch"),
            Some(&json!({ "items": items })),
        )
        .await
        {
            Ok((200, _)) => {
                ledger.lock().unwrap().scores += 10;
                // Load, not a flood: the rest of the suite shares the cores.
                tokio::time::sleep(Duration::from_millis(5)).await;
            }
            Ok((status, body)) => ledger
                .lock()
                .unwrap()
                .unexpected
                .push(format!("score batch: {status} {body}")),
            Err(_) => tokio::time::sleep(Duration::from_millis(2)).await,
        }
    }
}

/// What the kill was aimed at.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Aim {
    Anytime,
    /// A run we started, once it is `running`.
    Training,
    /// Within a few milliseconds of sending a rollback.
    Rollback,
    /// Around the moment the shadow has its outcomes and the live gate runs.
    LiveGate,
}

/// The shadow as `GET /v1/candidate` showed it just before a kill.
#[derive(Debug, Clone)]
struct SeenShadow {
    candidate: String,
    entry_seq: u64,
    outcomes: u64,
}

async fn seen_shadow(http: &reqwest::Client, server: &Server) -> Option<SeenShadow> {
    let (status, body) = send(
        http,
        reqwest::Method::GET,
        server.url("/v1/candidate"),
        None,
    )
    .await
    .ok()?;
    assert_eq!(status, 200, "{body}");
    let candidate = body["candidate"]["id"].as_str()?.to_owned();
    Some(SeenShadow {
        candidate,
        entry_seq: body["candidate"]["entry_seq"].as_u64().unwrap(),
        outcomes: body["outcomes"].as_u64().unwrap(),
    })
}

/// What one cycle did before its kill.
struct Cycle {
    aim: Aim,
    run: Option<String>,
    rollback_answer: Option<(u16, Json)>,
    shadow: Option<SeenShadow>,
    killed_at: i64,
}

/// Tallies for the summary line.
#[derive(Default, Debug)]
struct Tally {
    aims: HashMap<String, usize>,
    run_running_at_kill: usize,
    run_in_flight_at_kill: usize,
    aimed_run_interrupted: usize,
    aimed_run_finished_first: usize,
    rollback_answered: usize,
    rollback_applied_unanswered: usize,
    rollback_not_applied: usize,
    rollback_refused: usize,
    kill_within_50ms_of_state_change: usize,
    live_gate_run_interrupted: usize,
    shadow_alive_at_kill: usize,
    shadow_kept_progress: usize,
    shadow_ended_by_log: usize,
    state_changes: usize,
}

/// The store as the kill left it, read with the server stopped.
struct OnDisk {
    entries: Vec<Entry>,
    history: Vec<String>,
    shadow: Option<ShadowState>,
    shadowed: usize,
    /// Runs the kill caught running, with their trigger.
    running_runs: Vec<(String, Trigger)>,
    unfinished_runs: usize,
}

/// Whether `e` ends the shadow that started at log entry `since`.
fn ends_shadow(e: &Entry, since: u64) -> bool {
    e.seq > since
        && (e.verdict == Verdict::Shadowing
            || e.trigger == Trigger::Rollback
            || (e.trigger == Trigger::Shadow && e.verdict != Verdict::Failed))
}

/// Agreement between the log, the activation history and the shadow state.
fn log_problems(disk: &OnDisk) -> Vec<String> {
    let mut problems = Vec::new();
    let newest = disk.entries.last();
    if let Some(newest) = newest {
        if newest.active_after.as_ref() != disk.history.last() {
            problems.push(format!(
                "the newest log entry {} says active {:?}, the activation history {:?}",
                newest.seq,
                newest.active_after,
                disk.history.last()
            ));
        }
    }
    let mut runs = HashSet::new();
    for e in &disk.entries {
        if !runs.insert(e.run_id.clone()) {
            problems.push(format!("run {} has more than one log entry", e.run_id));
        }
    }
    // The shadow the log leaves open: the last `shadowing` entry nothing ended.
    let open = disk
        .entries
        .iter()
        .rfind(|e| e.verdict == Verdict::Shadowing)
        .filter(|s| !disk.entries.iter().any(|e| ends_shadow(e, s.seq)));
    match (open, &disk.shadow) {
        (None, None) => {}
        (Some(e), Some(s)) if e.candidate_id.as_ref() == Some(&s.candidate_id) => {
            if s.entry_seq != e.seq {
                problems.push(format!(
                    "shadow state names entry {}, log {}",
                    s.entry_seq, e.seq
                ));
            }
        }
        (open, state) => problems.push(format!(
            "the log leaves {:?} shadowing, the shadow state is {:?}",
            open.map(|e| (&e.candidate_id, e.seq)),
            state.as_ref().map(|s| (&s.candidate_id, s.entry_seq))
        )),
    }
    problems
}

/// Opens the store the kill left and checks every write acknowledged since the last check
/// (`from`), and that the log, history and shadow agree.
fn check_disk(
    dir: &Path,
    ledger: &Ledger,
    from: (usize, usize),
    backfilled: usize,
    shadowed_acks: &mut HashMap<String, usize>,
    fail: &dyn Fn(String) -> String,
) -> OnDisk {
    let store = SledStore::open(dir)
        .unwrap_or_else(|e| panic!("{}", fail(format!("the store does not reopen: {e}"))));
    for (id, label) in &ledger.outcomes[from.0..] {
        let example = store.example(id).unwrap();
        assert!(
            store.has_outcome(id).unwrap() && example.as_ref().map(|e| e.label) == Some(*label),
            "{}",
            fail(format!(
                "acknowledged outcome {id} ({label}) is stored as {example:?}"
            ))
        );
        if let Some(shadow) = store.score(id).unwrap().and_then(|r| r.shadow) {
            *shadowed_acks.entry(shadow.model_id).or_default() += 1;
        }
    }
    for (id, label) in &ledger.examples[from.1..] {
        let example = store.example(id).unwrap();
        assert_eq!(
            example.as_ref().map(|e| e.label),
            Some(*label),
            "{}",
            fail(format!(
                "acknowledged example {id} is stored as {example:?}"
            ))
        );
    }
    for (id, label) in ledger
        .outcomes_unanswered
        .iter()
        .chain(&ledger.examples_unanswered)
    {
        if let Some(example) = store.example(id).unwrap() {
            assert_eq!(
                example.label,
                *label,
                "{}",
                fail(format!("unanswered {id}"))
            );
        }
    }
    let acknowledged = backfilled + ledger.outcomes.len() + ledger.examples.len();
    let unanswered = ledger.outcomes_unanswered.len() + ledger.examples_unanswered.len();
    let count = store.example_count();
    assert!(
        (acknowledged..=acknowledged + unanswered).contains(&count),
        "{}",
        fail(format!(
            "{count} examples stored; {acknowledged} acknowledged, {unanswered} unanswered"
        ))
    );
    let mut entries = store.entries(usize::MAX).unwrap();
    entries.reverse();
    let shadow = store.shadow_state().unwrap();
    let shadowed = shadow
        .as_ref()
        .map_or(0, |s| store.shadowed_count(&s.candidate_id));
    if let Some(s) = &shadow {
        let acked = shadowed_acks.get(&s.candidate_id).copied().unwrap_or(0);
        assert!(
            shadowed >= acked,
            "{}",
            fail(format!(
                "{} has {shadowed} shadowed outcomes, {acked} acknowledged",
                s.candidate_id
            ))
        );
    }
    let unfinished = store.unfinished_runs().unwrap();
    OnDisk {
        entries,
        history: store.active_history().unwrap(),
        shadow,
        shadowed,
        running_runs: unfinished
            .iter()
            .filter(|r| r.state == RunState::Running)
            .map(|r| (r.run_id.clone(), r.trigger))
            .collect(),
        unfinished_runs: unfinished.len(),
    }
}

/// Right after a restart: the API agrees with what was on disk and with the log, and
/// acknowledged outcomes answer as duplicates (and conflicts with the other label).
async fn check_restarted(
    http: &reqwest::Client,
    server: &Server,
    disk: &OnDisk,
    recent_outcomes: &[(String, f64)],
    fail: &dyn Fn(String) -> String,
) {
    // The active model the API shows is the one the newest log entry names. A run may finish
    // between the reads (the registry swaps just after the entry is written): only a
    // disagreement that lasts counts.
    let mut tries = 0;
    loop {
        let (_, log) = get(http, server.url("/v1/promotions?limit=1")).await;
        let (_, models) = get(http, server.url("/v1/models")).await;
        let newest = &log["entries"][0];
        if models["active"] == newest["active_after"] {
            break;
        }
        tries += 1;
        assert!(
            tries < 40,
            "{}",
            fail(format!(
                "GET /v1/models says {}, the newest log entry {} says {}",
                models["active"], newest["seq"], newest["active_after"]
            ))
        );
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    let (_, candidate) = get(http, server.url("/v1/candidate")).await;
    let shown = candidate["candidate"]["id"].as_str();
    let on_disk = disk.shadow.as_ref().map(|s| s.candidate_id.as_str());
    // A shadow that already had its outcomes may be judged as soon as the schedule starts
    // (its rows are dropped then, possibly between the answer's reads of the candidate and of
    // its count); nothing else may end it.
    let judged_since = || async {
        let (_, log) = get(http, server.url("/v1/promotions?limit=20")).await;
        log["entries"].as_array().unwrap().iter().any(|e| {
            e["trigger"] == "shadow"
                && e["verdict"] != "failed"
                && e["candidate_id"].as_str() == on_disk
        })
    };
    let dropped_by_its_gate = shown == on_disk
        && disk.shadow.is_some()
        && candidate["outcomes"].as_u64() < Some(disk.shadowed as u64)
        && disk.shadowed as u64 >= SHADOW_OUTCOMES
        && judged_since().await;
    if shown == on_disk && !dropped_by_its_gate {
        if disk.shadow.is_some() {
            assert!(
                candidate["outcomes"].as_u64() >= Some(disk.shadowed as u64),
                "{}",
                fail(format!(
                    "shadow progress {candidate}, {} on disk",
                    disk.shadowed
                ))
            );
        }
    } else if !dropped_by_its_gate {
        let judged = judged_since().await;
        assert!(
            shown.is_none() && judged && disk.shadowed as u64 >= SHADOW_OUTCOMES,
            "{}",
            fail(format!(
                "shadowing {on_disk:?} with {} outcomes before the restart, {candidate} after",
                disk.shadowed
            ))
        );
    }
    for (i, (id, label)) in recent_outcomes.iter().rev().take(12).enumerate() {
        let (status, body) = post(
            http,
            server.url("/v1/outcomes"),
            &json!({"score_id": id, "label": label}),
        )
        .await;
        assert!(
            status == 200 && body["duplicate"] == true,
            "{}",
            fail(format!("outcome {id} sent again: {status} {body}"))
        );
        if i < 3 {
            let (status, body) = post(
                http,
                server.url("/v1/outcomes"),
                &json!({"score_id": id, "label": 1.0 - label}),
            )
            .await;
            assert_eq!(
                status,
                409,
                "{}",
                fail(format!("outcome {id} with the other label: {body}"))
            );
        }
    }
}

/// Load, an operator action and a kill at a seeded moment.
async fn cycle(
    server: &mut Server,
    rng: &mut ChaCha8Rng,
    cycle: u64,
    run_ms: u64,
    ledger: &Shared,
) -> Cycle {
    let regime = if (cycle / 3).is_multiple_of(2) {
        Regime::After
    } else {
        Regime::Before
    };
    let stop = Arc::new(AtomicBool::new(false));
    let mut tasks = Vec::new();
    for _ in 0..2 {
        tasks.push(tokio::spawn(outcome_writer(
            server.base.clone(),
            ChaCha8Rng::seed_from_u64(rng.gen()),
            regime,
            Arc::clone(ledger),
            Arc::clone(&stop),
        )));
    }
    tasks.push(tokio::spawn(example_writer(
        server.base.clone(),
        ChaCha8Rng::seed_from_u64(rng.gen()),
        regime,
        format!("c{cycle}"),
        Arc::clone(ledger),
        Arc::clone(&stop),
    )));
    tasks.push(tokio::spawn(scorer(
        server.base.clone(),
        ChaCha8Rng::seed_from_u64(rng.gen()),
        Arc::clone(ledger),
        Arc::clone(&stop),
    )));
    let http = client();
    let aim = match rng.gen_range(0..10) {
        0..=2 => Aim::Anytime,
        3..=5 => Aim::Training,
        6..=7 => Aim::Rollback,
        _ => Aim::LiveGate,
    };
    tokio::time::sleep(Duration::from_millis(rng.gen_range(100..400))).await;
    let mut run = None;
    let mut rollback = None;
    let shadow;
    match aim {
        Aim::Anytime => {
            shadow = seen_shadow(&http, server).await;
            tokio::time::sleep(Duration::from_millis(rng.gen_range(0..600))).await;
        }
        Aim::Training => {
            let (status, body) = post(&http, server.url("/v1/retrain"), &json!({})).await;
            assert!(status == 202 || status == 429, "retrain: {status} {body}");
            if status == 202 {
                let id = body["run_id"].as_str().unwrap().to_owned();
                let start = Instant::now();
                while start.elapsed() < Duration::from_secs(20) {
                    let (_, body) = get(&http, server.url(&format!("/v1/runs/{id}"))).await;
                    if body["run"]["state"] != "queued" {
                        break;
                    }
                    tokio::time::sleep(Duration::from_millis(5)).await;
                }
                run = Some(id);
            }
            shadow = seen_shadow(&http, server).await;
            let wait = rng.gen_range(0..run_ms * 6 / 5 + 1);
            tokio::time::sleep(Duration::from_millis(wait)).await;
        }
        Aim::Rollback => {
            shadow = seen_shadow(&http, server).await;
            let url = server.url("/v1/rollback");
            let asked = http.post(url).send();
            let answer = Arc::new(Mutex::new(None));
            let into = Arc::clone(&answer);
            let request = tokio::spawn(async move {
                if let Ok(response) = asked.await {
                    let status = response.status().as_u16();
                    let body = response.json::<Json>().await.unwrap_or(Json::Null);
                    *into.lock().unwrap() = Some((status, body));
                }
            });
            tokio::time::sleep(Duration::from_micros(rng.gen_range(0..80_000))).await;
            server.kill();
            let _ = request.await;
            rollback = answer.lock().unwrap().take();
        }
        Aim::LiveGate => {
            let start = Instant::now();
            let mut last = None;
            while start.elapsed() < Duration::from_millis(1500) {
                last = seen_shadow(&http, server).await;
                if last
                    .as_ref()
                    .is_some_and(|s| s.outcomes + 3 >= SHADOW_OUTCOMES)
                {
                    break;
                }
                tokio::time::sleep(Duration::from_millis(10)).await;
            }
            shadow = last;
            tokio::time::sleep(Duration::from_micros(rng.gen_range(0..40_000))).await;
        }
    }
    if aim != Aim::Rollback {
        server.kill();
    }
    let killed_at = now_ms();
    stop.store(true, Ordering::SeqCst);
    for task in tasks {
        task.await.unwrap();
    }
    Cycle {
        aim,
        run,
        rollback_answer: rollback,
        shadow,
        killed_at,
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigkill_at_seeded_moments_loses_no_acknowledged_write() {
    let seed = env_number("UNDERSTUDY_CRASH_SEED", DEFAULT_SEED);
    let cycles = env_number("UNDERSTUDY_CRASH_CYCLES", DEFAULT_CYCLES);
    let started = Instant::now();
    let temp = tempfile::tempdir().unwrap();
    let data = temp.path().join("store");
    let config = write_config(temp.path(), "crash.toml", &config_text(QUICK));
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let http = client();

    let mut server = Server::start(&config, &data);
    let backfilled = backfill_history(&http, &server, &mut rng, HISTORY_ROWS).await;
    let first = first_model(&http, &server).await;
    let mut run_ms = first["duration_ms"].as_u64().unwrap().max(50);

    let ledger: Shared = Arc::default();
    let mut checked = (0, 0);
    let mut shadowed_acks: HashMap<String, usize> = HashMap::new();
    let mut tally = Tally::default();
    for n in 0..cycles {
        let fail = |what: String| format!("seed {seed}, cycle {n}: {what}");
        let done = cycle(&mut server, &mut rng, n, run_ms, &ledger).await;
        let bad = server.bad_lines();
        assert!(bad.is_empty(), "{}", fail(format!("log: {bad:#?}")));
        let (before, recent) = {
            let ledger_now = ledger.lock().unwrap();
            assert!(
                ledger_now.unexpected.is_empty(),
                "{}",
                fail(format!("unexpected answers: {:#?}", ledger_now.unexpected))
            );
            let before = check_disk(
                &data,
                &ledger_now,
                checked,
                backfilled.len(),
                &mut shadowed_acks,
                &fail,
            );
            let recent = ledger_now.outcomes[checked.0..].to_vec();
            checked = (ledger_now.outcomes.len(), ledger_now.examples.len());
            (before, recent)
        };
        let problems = log_problems(&before);
        assert!(problems.is_empty(), "{}", fail(format!("{problems:#?}")));

        // Tally where the kill landed.
        *tally.aims.entry(format!("{:?}", done.aim)).or_default() += 1;
        tally.run_running_at_kill += usize::from(!before.running_runs.is_empty());
        tally.run_in_flight_at_kill += usize::from(before.unfinished_runs > 0);
        tally.live_gate_run_interrupted += usize::from(
            before
                .running_runs
                .iter()
                .any(|(_, trigger)| *trigger == Trigger::Shadow),
        );
        let state_changes: Vec<&Entry> = before
            .entries
            .iter()
            .filter(|e| {
                e.verdict == Verdict::Shadowing
                    || (e.verdict == Verdict::Promoted)
                    || (e.trigger == Trigger::Shadow && e.verdict != Verdict::Failed)
            })
            .collect();
        tally.state_changes = state_changes.len();
        if state_changes
            .iter()
            .any(|e| (0..=50).contains(&(done.killed_at - e.at)))
        {
            tally.kill_within_50ms_of_state_change += 1;
        }
        if let Some(run) = &done.run {
            if before.running_runs.iter().any(|(id, _)| id == run) {
                tally.aimed_run_interrupted += 1;
            } else {
                tally.aimed_run_finished_first += 1;
            }
        }
        if done.aim == Aim::Rollback {
            match &done.rollback_answer {
                Some((200, body)) => {
                    tally.rollback_answered += 1;
                    let seq = body["entry"]["seq"].as_u64().unwrap();
                    assert!(
                        before
                            .entries
                            .iter()
                            .any(|e| e.seq == seq && e.trigger == Trigger::Rollback),
                        "{}",
                        fail(format!("acknowledged rollback {seq} is not in the log"))
                    );
                }
                Some((409, _)) => tally.rollback_refused += 1,
                Some((status, body)) => panic!("{}", fail(format!("rollback: {status} {body}"))),
                None => {
                    let newest_rollback = before
                        .entries
                        .iter()
                        .rev()
                        .find(|e| e.trigger == Trigger::Rollback);
                    if newest_rollback.is_some_and(|e| done.killed_at - e.at < 1_000) {
                        tally.rollback_applied_unanswered += 1;
                    } else {
                        tally.rollback_not_applied += 1;
                    }
                }
            }
        }
        if let Some(seen) = &done.shadow {
            tally.shadow_alive_at_kill += 1;
            let ended = before
                .entries
                .iter()
                .any(|e| ends_shadow(e, seen.entry_seq));
            if ended {
                tally.shadow_ended_by_log += 1;
            } else {
                let on_disk = before.shadow.as_ref().map(|s| s.candidate_id.as_str());
                assert_eq!(
                    on_disk,
                    Some(seen.candidate.as_str()),
                    "{}",
                    fail("a shadowing candidate was lost".into())
                );
                assert!(
                    before.shadowed as u64 >= seen.outcomes,
                    "{}",
                    fail(format!(
                        "shadow progress fell from {} to {}",
                        seen.outcomes, before.shadowed
                    ))
                );
                tally.shadow_kept_progress += 1;
            }
        }

        server = Server::start(&config, &data);
        check_restarted(&http, &server, &before, &recent, &fail).await;
        if let Some(ms) = before
            .entries
            .iter()
            .rev()
            .find(|e| e.verdict != Verdict::Failed && e.trigger != Trigger::Rollback)
            .map(|e| e.duration_ms)
        {
            run_ms = ms.max(50);
        }
    }

    // A last graceful stop, then everything on disk at once.
    server.terminate();
    let (status, _) = server.wait_exit(Duration::from_secs(30));
    assert!(status.success(), "exit after SIGTERM: {status}");
    let store = SledStore::open(&data).unwrap();
    let ledger = ledger.lock().unwrap();
    let stored = store.latest_examples(usize::MAX, None).unwrap();
    let mut by_id: HashMap<&str, f64> = HashMap::new();
    for e in &stored {
        assert!(
            by_id.insert(e.id.as_str(), e.label).is_none(),
            "seed {seed}: example {} is stored twice",
            e.id
        );
    }
    let known: HashMap<&str, f64> = backfilled
        .iter()
        .chain(&ledger.outcomes)
        .chain(&ledger.examples)
        .map(|(id, label)| (id.as_str(), *label))
        .collect();
    for (id, label) in &known {
        assert_eq!(by_id.get(id), Some(label), "seed {seed}: acknowledged {id}");
    }
    let unanswered: HashMap<&str, f64> = ledger
        .outcomes_unanswered
        .iter()
        .chain(&ledger.examples_unanswered)
        .map(|(id, label)| (id.as_str(), *label))
        .collect();
    for (id, label) in &by_id {
        assert!(
            known.contains_key(id) || unanswered.get(id) == Some(label),
            "seed {seed}: {id} is stored but was never sent"
        );
    }
    assert!(store.unfinished_runs().unwrap().is_empty());
    println!(
        "crash: seed {seed}, {cycles} SIGKILLs in {:.1} s ({}); a run queued or running at {} kills, running at {} (a live gate at {}) \
         (runs we started and caught running: {} interrupted, {} finished first); \
         rollbacks in flight: {} answered, {} applied unanswered, {} not applied, {} refused; \
         {} kills within 50 ms after a promotion, shadow start or live gate was logged \
         ({} such log entries); shadow alive at {} kills: kept its progress {} times, \
         ended by a logged verdict {} times; acknowledged {} outcomes, {} examples, {} scores; \
         unanswered {} outcomes, {} examples; {} stored rows checked once each",
        started.elapsed().as_secs_f64(),
        {
            let mut aims: Vec<_> = tally.aims.iter().collect();
            aims.sort();
            aims.iter()
                .map(|(k, v)| format!("{k} {v}"))
                .collect::<Vec<_>>()
                .join(", ")
        },
        tally.run_in_flight_at_kill,
        tally.run_running_at_kill,
        tally.live_gate_run_interrupted,
        tally.aimed_run_interrupted,
        tally.aimed_run_finished_first,
        tally.rollback_answered,
        tally.rollback_applied_unanswered,
        tally.rollback_not_applied,
        tally.rollback_refused,
        tally.kill_within_50ms_of_state_change,
        tally.state_changes,
        tally.shadow_alive_at_kill,
        tally.shadow_kept_progress,
        tally.shadow_ended_by_log,
        ledger.outcomes.len(),
        ledger.examples.len(),
        ledger.scores,
        ledger.outcomes_unanswered.len(),
        ledger.examples_unanswered.len(),
        stored.len(),
    );
}

/// Long runs (2,000-tree forests on 10 folds × 3 repeats) and a 2-second grace.
const SLOW: &[(&str, &str)] = &[
    ("folds = 5", "folds = 10"),
    ("repeats = 2", "repeats = 3"),
    (
        "family = \"logistic\"\npenalty = \"elastic_net\"\nl1_ratio = [0.5, 1.0]\nlambda_count = 20\nlambda_min_ratio = 0.001",
        "family = \"random_forest\"\ntrees = [2000]\nmax_depth = [16]\nmin_leaf = [1]",
    ),
    ("shutdown_grace = \"10s\"", "shutdown_grace = \"2s\""),
    ("every = \"6h\"", ""),
    ("new_labels = 2000", ""),
];

/// One example per fresh connection (ids `late-{n}`) until `stop`: after a SIGTERM each is
/// refused or answered; a 2xx goes in the ledger like any other.
async fn late_writer(base: String, ledger: Shared, stop: Arc<AtomicBool>) -> (usize, usize) {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let (mut refused, mut answered) = (0, 0);
    let mut n = 0;
    while !stop.load(Ordering::SeqCst) {
        let http = reqwest::Client::builder()
            .pool_max_idle_per_host(0)
            .timeout(Duration::from_secs(30))
            .build()
            .unwrap();
        let inv = invoice(&mut rng, Regime::Before);
        let label = f64::from(inv.draw_label(&mut rng));
        let id = format!("late-{n}");
        n += 1;
        let row = json!([{"features": inv.features, "label": label,
                          "event_time": to_rfc3339(now_ms() - 1_000), "id": id}]);
        match send(
            &http,
            reqwest::Method::POST,
            format!("{base}/v1/examples"),
            Some(&row),
        )
        .await
        {
            Ok((status, _)) => {
                answered += 1;
                if status == 200 {
                    ledger.lock().unwrap().examples.push((id, label));
                }
            }
            Err(_) => {
                refused += 1;
                ledger.lock().unwrap().examples_unanswered.push((id, label));
            }
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    (refused, answered)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigterm_under_load_exits_0_within_the_grace_and_keeps_every_acknowledged_write() {
    let temp = tempfile::tempdir().unwrap();
    let data = temp.path().join("store");
    let mut rng = ChaCha8Rng::seed_from_u64(DEFAULT_SEED + 1);
    let http = client();
    let quick = write_config(temp.path(), "quick.toml", &config_text(QUICK));
    let mut server = Server::start(&quick, &data);
    let backfilled = backfill_history(&http, &server, &mut rng, HISTORY_ROWS).await;
    first_model(&http, &server).await;
    server.terminate();
    let (status, _) = server.wait_exit(Duration::from_secs(10));
    assert!(status.success(), "idle exit after SIGTERM: {status}");

    let slow = write_config(temp.path(), "slow.toml", &config_text(SLOW));
    let server = Server::start(&slow, &data);
    let ledger: Shared = Arc::default();
    let stop = Arc::new(AtomicBool::new(false));
    let mut tasks = Vec::new();
    for k in 0..6 {
        tasks.push(tokio::spawn(outcome_writer(
            server.base.clone(),
            ChaCha8Rng::seed_from_u64(100 + k),
            Regime::Before,
            Arc::clone(&ledger),
            Arc::clone(&stop),
        )));
    }
    for k in 0..2 {
        tasks.push(tokio::spawn(example_writer(
            server.base.clone(),
            ChaCha8Rng::seed_from_u64(200 + k),
            Regime::Before,
            format!("term{k}"),
            Arc::clone(&ledger),
            Arc::clone(&stop),
        )));
    }
    // One run trains, two wait behind it.
    let mut runs = Vec::new();
    for _ in 0..3 {
        let (status, body) = post(&http, server.url("/v1/retrain"), &json!({})).await;
        assert_eq!(status, 202, "{body}");
        runs.push(body["run_id"].as_str().unwrap().to_owned());
    }
    let start = Instant::now();
    loop {
        let (_, body) = get(&http, server.url(&format!("/v1/runs/{}", runs[0]))).await;
        if body["run"]["state"] == "running" {
            break;
        }
        assert!(start.elapsed() < Duration::from_secs(30), "{body}");
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    // A request that never completes: its headers and a piece of its body.
    let address = server.base.trim_start_matches("http://").to_owned();
    let mut stalled = std::net::TcpStream::connect(&address).unwrap();
    std::io::Write::write_all(
        &mut stalled,
        b"POST /v1/examples HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n\
          Content-Length: 4096\r\n\r\n[{\"features\":",
    )
    .unwrap();
    tokio::time::sleep(Duration::from_millis(600)).await;

    server.terminate();
    let late = tokio::spawn(late_writer(
        server.base.clone(),
        Arc::clone(&ledger),
        Arc::clone(&stop),
    ));
    let mut server = server;
    let (status, took, server) = tokio::task::spawn_blocking(move || {
        let (status, took) = server.wait_exit(Duration::from_secs(10));
        (status, took, server)
    })
    .await
    .unwrap();
    stop.store(true, Ordering::SeqCst);
    for task in tasks {
        task.await.unwrap();
    }
    let (refused, answered) = late.await.unwrap();
    drop(stalled);
    assert!(
        status.success(),
        "exit after SIGTERM: {status}; log:\n{}",
        server.log_text()
    );
    let bad = server.bad_lines();
    assert!(bad.is_empty(), "{bad:#?}");

    let ledger = ledger.lock().unwrap();
    assert!(ledger.unexpected.is_empty(), "{:#?}", ledger.unexpected);
    assert!(
        !ledger.outcomes.is_empty() && !ledger.examples.is_empty(),
        "the writers wrote nothing"
    );
    let store = SledStore::open(&data).unwrap();
    for (id, label) in ledger.outcomes.iter().chain(&ledger.examples) {
        let stored = store.example(id).unwrap().map(|e| e.label);
        assert_eq!(stored, Some(*label), "acknowledged {id}");
    }
    for (id, _) in &ledger.outcomes {
        assert!(store.has_outcome(id).unwrap(), "acknowledged outcome {id}");
    }
    for (id, label) in ledger
        .outcomes_unanswered
        .iter()
        .chain(&ledger.examples_unanswered)
    {
        if let Some(e) = store.example(id).unwrap() {
            assert_eq!(e.label, *label, "unanswered {id}");
        }
    }
    assert_eq!(
        store.example_count(),
        backfilled.len()
            + ledger.outcomes.len()
            + ledger.examples.len()
            + ledger
                .outcomes_unanswered
                .iter()
                .chain(&ledger.examples_unanswered)
                .filter(|(id, _)| store.example(id).unwrap().is_some())
                .count(),
        "stored examples are the acknowledged ones and some unanswered ones, each once"
    );
    // The run in progress was abandoned at the deadline, the queued ones never started;
    // each is logged once.
    assert!(store.unfinished_runs().unwrap().is_empty());
    let entries = store.entries(usize::MAX).unwrap();
    for (i, run) in runs.iter().enumerate() {
        let logged: Vec<&Entry> = entries.iter().filter(|e| &e.run_id == run).collect();
        assert_eq!(logged.len(), 1, "{run}: {logged:#?}");
        let expected = if i == 0 {
            "interrupted by shutdown"
        } else {
            "not started"
        };
        assert_eq!(logged[0].verdict, Verdict::Failed);
        assert!(logged[0].reason.contains(expected), "{}", logged[0].reason);
    }
    assert_eq!(
        entries[0].active_after.as_ref(),
        store.active_history().unwrap().last()
    );
    println!(
        "sigterm: exit 0 after {:.2} s (grace 2 s) with a half-sent request and a run in \
         progress; acknowledged {} outcomes and {} examples, all stored; {} sent without an answer (cut off, or refused after the \
         listener closed); after the signal {} new connections refused, {} answered",
        took.as_secs_f64(),
        ledger.outcomes.len(),
        ledger.examples.len(),
        ledger.outcomes_unanswered.len() + ledger.examples_unanswered.len(),
        refused,
        answered,
    );
}

/// A kill between a run's log entry and its own record leaves the record `running` with the
/// entry already written; the restart finishes the record from that entry instead of logging
/// the run a second time as failed.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_run_logged_just_before_a_kill_is_not_logged_again() {
    let temp = tempfile::tempdir().unwrap();
    let app = crate::helpers::spawn_app_with(crate::helpers::test_config(temp.path())).await;
    let model = app.with_first_model().await;
    app.stop().await;
    {
        let store = crate::helpers::open_store(temp.path());
        let mut run = store.run("r-1").unwrap().unwrap();
        assert_eq!(run.entry_seq, Some(1));
        run.state = RunState::Running;
        run.finished_at = None;
        run.entry_seq = None;
        run.verdict = None;
        store.put_run(&run).unwrap();
    }
    let app = crate::helpers::spawn_app_with(crate::helpers::test_config(temp.path())).await;
    let (_, run) = app.get("/v1/runs/r-1").await;
    assert_eq!(run["run"]["state"], "finished", "{run}");
    assert_eq!(run["run"]["entry_seq"], 1);
    assert_eq!(run["run"]["verdict"], "promoted");
    let (_, log) = app.get("/v1/promotions").await;
    let entries = log["entries"].as_array().unwrap();
    assert_eq!(entries.len(), 1, "{log}");
    assert_eq!(entries[0]["active_after"], model.as_str());
    app.stop().await;
}

/// Copies a stopped service's data dir (sled's files) so each kill starts from the same state.
fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for entry in std::fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let target = to.join(entry.file_name());
        if entry.file_type().unwrap().is_dir() {
            copy_dir(&entry.path(), &target);
        } else {
            std::fs::copy(entry.path(), target).unwrap();
        }
    }
}

/// The approvals of `run` in the log, and the active model and waiting run the server reports.
async fn sign_off_state(http: &reqwest::Client, server: &Server, run: &str) -> (usize, Json, Json) {
    let (_, log) = get(http, server.url("/v1/promotions?limit=100")).await;
    let approvals = log["entries"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|e| e["sign_off"]["run_id"] == run && e["sign_off"]["decision"] == "approved")
        .count();
    let (_, models) = get(http, server.url("/v1/models")).await;
    let (_, waiting) = get(http, server.url("/v1/sign-off")).await;
    (
        approvals,
        models["active"].clone(),
        waiting["waiting"]["run_id"].clone(),
    )
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_approval_killed_at_seeded_moments_is_applied_once_or_not_at_all() {
    let seed = env_number("UNDERSTUDY_CRASH_SEED", DEFAULT_SEED);
    let cycles = env_number("UNDERSTUDY_SIGN_OFF_CYCLES", 8);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let temp = tempfile::tempdir().unwrap();
    let mut edits: Vec<(&str, &str)> = QUICK[..5].to_vec();
    edits.extend([
        ("every = \"6h\"", ""),
        ("new_labels = 2000", ""),
        ("sign_off = false", "sign_off = true"),
    ]);
    let config = write_config(temp.path(), "sign-off.toml", &config_text(&edits));
    let http = client();

    // One waiting first model, made once; each cycle starts from a copy of it.
    let base = temp.path().join("base");
    let mut server = Server::start(&config, &base);
    backfill_history(&http, &server, &mut rng, HISTORY_ROWS).await;
    let entry = retrain_and_wait(&http, &server).await;
    assert_eq!(entry["verdict"], "waiting", "{entry}");
    let run = entry["run_id"].as_str().unwrap().to_owned();
    let candidate = entry["candidate_id"].as_str().unwrap().to_owned();
    server.terminate();
    server.wait_exit(Duration::from_secs(30));

    let (mut before, mut after) = (0, 0);
    for cycle in 0..cycles {
        let data = temp.path().join(format!("cycle-{cycle}"));
        copy_dir(&base, &data);
        let mut server = Server::start(&config, &data);
        let url = server.url(&format!("/v1/sign-off/{run}/approve"));
        let sender = http.clone();
        let sent = tokio::spawn(async move {
            send(
                &sender,
                reqwest::Method::POST,
                url,
                Some(&json!({"reason": "reviewed"})),
            )
            .await
        });
        // From before the request arrives to after its answer (an approval takes about a
        // millisecond here).
        // The first cycle kills at once, so the "not at all" side is always exercised.
        let delay = if cycle == 0 {
            0
        } else {
            rng.gen_range(0..1_500u64)
        };
        std::thread::sleep(Duration::from_micros(delay));
        server.kill();
        let answered = matches!(sent.await.unwrap(), Ok((200, _)));

        let server = Server::start(&config, &data);
        let (approvals, active, waiting) = sign_off_state(&http, &server, &run).await;
        match approvals {
            0 => {
                assert!(!answered, "cycle {cycle}: a 2xx approval was lost");
                assert_eq!(
                    (active.clone(), waiting.clone()),
                    (Json::Null, json!(run)),
                    "cycle {cycle}"
                );
                before += 1;
                let (status, body) = post(
                    &http,
                    server.url(&format!("/v1/sign-off/{run}/approve")),
                    &json!({"reason": "again"}),
                )
                .await;
                assert_eq!(status, 200, "cycle {cycle}: {body}");
            }
            1 => {
                assert_eq!(
                    (active.clone(), waiting.clone()),
                    (json!(candidate), Json::Null),
                    "cycle {cycle}"
                );
                after += 1;
                let (status, body) = post(
                    &http,
                    server.url(&format!("/v1/sign-off/{run}/approve")),
                    &json!({"reason": "again"}),
                )
                .await;
                assert_eq!(status, 404, "cycle {cycle}: approved twice? {body}");
            }
            n => panic!("cycle {cycle}: {n} approvals of one run"),
        }
        let (approvals, active, waiting) = sign_off_state(&http, &server, &run).await;
        assert_eq!(
            (approvals, active, waiting),
            (1, json!(candidate), Json::Null),
            "cycle {cycle}"
        );
        let bad = server.bad_lines();
        assert!(bad.is_empty(), "cycle {cycle}: {bad:?}");
    }
    eprintln!(
        "sign-off kills: {before} before the approval was written, {after} after (seed {seed})"
    );
}
