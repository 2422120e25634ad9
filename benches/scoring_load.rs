//! The service under load on loopback, each phase against a baseline measured in the same run.
//!
//! `cargo bench --bench scoring_load` runs, with `CLIENTS` keep-alive clients unless noted:
//!
//! - **shadow**: `POST /v1/score` on the invented invoice scenario with and without a
//!   shadowing candidate, alternating in rounds (the candidate is taken out of and put back
//!   into the registry between rounds), medians reported;
//! - **ceiling**: the service on 30 numeric features against a bare axum endpoint that parses
//!   the same bodies into a fixed struct, takes a dot product and a sigmoid and answers (no
//!   validation, no recording, no middleware), alternating in rounds;
//! - **paced**: the service at half its measured maximum rate, idle and then while training
//!   runs back to back (p99 under training against idle p99), and the saturated rate during
//!   training;
//! - **batch**: rows per second through `POST /v1/score/batch` in 1,000-row batches;
//! - **ingest**: outcomes acknowledged per second through `POST /v1/outcomes` from 64 clients,
//!   against sled's own rate for 64 threads each inserting and flushing, in a fresh database in
//!   the same run.
//!
//! `UNDERSTUDY_LOAD=ceiling,batch` picks phases; `UNDERSTUDY_LOAD_SECONDS` sets seconds per
//! round (default 5). The load generator runs in the same process on the same two cores as the
//! service, so absolute numbers understate a dedicated machine; the ratios are the point. The
//! JSON report goes to `target/bench-reports/scoring_load.json`.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};

use understudy::app::{self, Service};
use understudy::config::Config;
use understudy::demo::scenario::{invoice, Regime};
use understudy::time::{now_ms, to_rfc3339};

mod support;
use support::bare;

const CLIENTS: usize = 8;
/// Rounds per alternating phase: `UNDERSTUDY_LOAD_ROUNDS`, default 3.
fn rounds() -> usize {
    std::env::var("UNDERSTUDY_LOAD_ROUNDS")
        .ok()
        .and_then(|s| s.parse().ok())
        .filter(|&n| n > 0)
        .unwrap_or(3)
}
const INGEST_CLIENTS: usize = 64;

fn round_seconds() -> u64 {
    std::env::var("UNDERSTUDY_LOAD_SECONDS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(5)
}

fn wanted(phase: &str) -> bool {
    match std::env::var("UNDERSTUDY_LOAD") {
        Ok(list) if !list.trim().is_empty() => list.split(',').any(|p| p.trim() == phase),
        _ => true,
    }
}

/// Latencies of one round, how long it lasted, and the CPU time the whole process (server,
/// its background threads and the load generator) used meanwhile.
struct Round {
    requests: usize,
    seconds: f64,
    latencies_us: Vec<u64>,
    cpu_seconds: f64,
}

impl Round {
    /// Waits for the client tasks started at `started` (when the process had used
    /// `cpu_before` seconds of CPU) and puts their latencies together.
    async fn gather(
        tasks: Vec<tokio::task::JoinHandle<Vec<u64>>>,
        started: Instant,
        cpu_before: f64,
    ) -> Round {
        let mut latencies_us = Vec::new();
        for task in tasks {
            latencies_us.extend(task.await.expect("client task"));
        }
        Round {
            requests: latencies_us.len(),
            seconds: started.elapsed().as_secs_f64(),
            latencies_us,
            cpu_seconds: process_cpu_seconds() - cpu_before,
        }
    }
}

/// CPU time this process has used, user and system, from `/proc/self/stat` (Linux; 0 where
/// it cannot be read).
fn process_cpu_seconds() -> f64 {
    let Ok(stat) = std::fs::read_to_string("/proc/self/stat") else {
        return 0.0;
    };
    let Some((_, after_name)) = stat.rsplit_once(')') else {
        return 0.0;
    };
    // After the name, field 3 (state) comes first: utime is field 14, stime field 15.
    let fields: Vec<&str> = after_name.split_whitespace().collect();
    let ticks = |i: usize| {
        fields
            .get(i)
            .and_then(|f| f.parse::<f64>().ok())
            .unwrap_or(0.0)
    };
    // SAFETY: sysconf reads a constant of the system and touches no memory of ours.
    let per_second = unsafe { libc::sysconf(libc::_SC_CLK_TCK) } as f64;
    (ticks(11) + ticks(12)) / per_second.max(1.0)
}

impl Round {
    /// CPU microseconds per request, everything in the process counted.
    fn cpu_us_per_request(&self) -> f64 {
        self.cpu_seconds * 1e6 / self.requests.max(1) as f64
    }

    fn throughput(&self) -> f64 {
        self.requests as f64 / self.seconds
    }

    fn percentile(&self, q: f64) -> f64 {
        let mut sorted = self.latencies_us.clone();
        sorted.sort_unstable();
        let k = ((sorted.len() as f64 - 1.0) * q).round() as usize;
        sorted.get(k).copied().unwrap_or(0) as f64 / 1000.0
    }

    fn summary(&self) -> Json {
        json!({
            "requests": self.requests, "seconds": self.seconds,
            "throughput": self.throughput(), "p50_ms": self.percentile(0.5),
            "p99_ms": self.percentile(0.99), "p999_ms": self.percentile(0.999),
            "cpu_us_per_request": self.cpu_us_per_request(),
        })
    }
}

fn median(mut values: Vec<f64>) -> f64 {
    values.sort_by(f64::total_cmp);
    values[values.len() / 2]
}

/// Prints the rounds of one phase and returns its medians.
fn report(name: &str, rounds: &[Round]) -> Json {
    let med = |f: &dyn Fn(&Round) -> f64| median(rounds.iter().map(f).collect());
    let throughput = med(&|r| r.throughput());
    let (p50, p99, p999) = (
        med(&|r| r.percentile(0.5)),
        med(&|r| r.percentile(0.99)),
        med(&|r| r.percentile(0.999)),
    );
    let cpu = med(&|r| r.cpu_us_per_request());
    let each: Vec<String> = rounds
        .iter()
        .map(|r| format!("{:.0}", r.throughput()))
        .collect();
    println!(
        "{name:<34} {throughput:>9.0} /s   p50 {p50:>6.3} ms   p99 {p99:>6.3} ms   p99.9 {p999:>6.3} ms   cpu {cpu:>5.1} µs/req   rounds [{}]",
        each.join(", ")
    );
    json!({
        "phase": name, "throughput": throughput, "p50_ms": p50, "p99_ms": p99, "p999_ms": p999,
        "cpu_us_per_request": cpu,
        "rounds": rounds.iter().map(Round::summary).collect::<Vec<_>>(),
    })
}

async fn post(client: &reqwest::Client, url: &str, body: &Json) -> Json {
    let response = client.post(url).json(body).send().await.expect("request");
    response.json().await.expect("json body")
}

async fn post_examples(client: &reqwest::Client, base: &str, rows: Vec<Json>) {
    for chunk in rows.chunks(1000) {
        post(
            client,
            &format!("{base}/v1/examples"),
            &Json::Array(chunk.to_vec()),
        )
        .await;
    }
}

async fn backfill(client: &reqwest::Client, base: &str, n: usize, seed: u64, regime: Regime) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let start = now_ms() - 20 * 24 * 3600 * 1000 + seed as i64 * 100_000_000;
    let rows: Vec<Json> = (0..n)
        .map(|i| {
            let inv = invoice(&mut rng, regime);
            json!({"features": inv.features, "label": inv.draw_label(&mut rng),
                   "event_time": to_rfc3339(start + i as i64 * 1000), "id": format!("b{seed}-{i}")})
        })
        .collect();
    post_examples(client, base, rows).await;
}

async fn retrain(client: &reqwest::Client, base: &str) -> Json {
    let run = post(client, &format!("{base}/v1/retrain"), &json!({})).await;
    let id = run["run_id"].as_str().expect("run id").to_owned();
    loop {
        tokio::time::sleep(Duration::from_millis(100)).await;
        let status: Json = client
            .get(format!("{base}/v1/runs/{id}"))
            .send()
            .await
            .expect("run status")
            .json()
            .await
            .expect("json");
        if status["run"]["state"] == "finished" {
            return status["entry"].clone();
        }
    }
}

fn invoice_bodies() -> Vec<Json> {
    let mut rng = ChaCha8Rng::seed_from_u64(99);
    (0..1000)
        .map(|_| json!({"features": invoice(&mut rng, Regime::Before).features}))
        .collect()
}

const WIDE: usize = 30;

/// 30 named features drawn uniformly on [-2, 2); the label follows a fixed logistic rule.
fn wide_row(rng: &mut ChaCha8Rng) -> (serde_json::Map<String, Json>, u8) {
    let values: Vec<f64> = (0..WIDE).map(|_| rng.gen_range(-2.0..2.0)).collect();
    let z: f64 = -0.2
        + values
            .iter()
            .take(8)
            .enumerate()
            .map(|(j, v)| v * (0.6 - 0.07 * j as f64))
            .sum::<f64>();
    let label = u8::from(rng.gen::<f64>() < 1.0 / (1.0 + (-z).exp()));
    let features = values
        .iter()
        .enumerate()
        .map(|(j, v)| (format!("f{j:02}"), json!((v * 1000.0).round() / 1000.0)))
        .collect();
    (features, label)
}

/// The 30-feature service. Its search (elastic net over three mixes, an automatic path of 20
/// lambdas, 5 folds on 20,000 rows) makes a run long enough to score through.
fn wide_config(dir: &std::path::Path) -> Config {
    let mut text = String::from(
        "[label]\nname = \"outcome\"\n\n[training]\nwindow_rows = 20000\nholdout_fraction = 0.25\nfolds = 5\nrepeats = 1\nmin_rows = 500\n\n[[training.families]]\nfamily = \"logistic\"\npenalty = \"elastic_net\"\nl1_ratio = [0.0, 0.5, 1.0]\n\n[gate]\nmetric = \"auc\"\nmargin = 0.02\nmin_rows = 200\n",
    );
    for j in 0..WIDE {
        text.push_str(&format!(
            "\n[[features]]\nname = \"f{j:02}\"\nkind = \"number\"\nmin = -10\nmax = 10\n"
        ));
    }
    let mut config = Config::from_toml(&text).expect("valid wide config");
    config.server.data_dir = dir.to_owned();
    config.server.max_batch = 1000;
    config.schedule.every = None;
    config.schedule.new_labels = None;
    // `UNDERSTUDY_LOAD_NICE` tries another `training.nice` (the default is the config's).
    if let Some(nice) = std::env::var("UNDERSTUDY_LOAD_NICE")
        .ok()
        .and_then(|s| s.parse().ok())
    {
        config.training.nice = nice;
    }
    config
}

/// How the clients of a round send.
#[derive(Clone, Copy)]
enum Pace {
    /// Each client sends its next request as soon as the last one is answered.
    Closed,
    /// All clients together send `rate` requests per second on a fixed schedule.
    Rate(f64),
}

/// One round: `clients` keep-alive clients post `bodies` (in turn) to `url` for `seconds`.
async fn load(url: &str, bodies: &Arc<Vec<Vec<u8>>>, clients: usize, pace: Pace) -> Round {
    let seconds = round_seconds();
    let deadline = Instant::now() + Duration::from_secs(seconds);
    let started = Instant::now();
    let cpu_before = process_cpu_seconds();
    let tasks: Vec<_> = (0..clients)
        .map(|c| {
            let bodies = Arc::clone(bodies);
            let url = reqwest::Url::parse(url).expect("url");
            tokio::spawn(async move {
                let client = reqwest::Client::new();
                let mut latencies = Vec::new();
                let mut k = c;
                let interval = match pace {
                    Pace::Rate(rate) => Some(Duration::from_secs_f64(clients as f64 / rate)),
                    Pace::Closed => None,
                };
                let first = tokio::time::Instant::now()
                    + interval.map_or(Duration::ZERO, |i| i.mul_f64(c as f64 / clients as f64));
                let mut n = 0u32;
                while Instant::now() < deadline {
                    if let Some(interval) = interval {
                        tokio::time::sleep_until(first + interval * n).await;
                        n += 1;
                    }
                    let sent = Instant::now();
                    let response = client
                        .post(url.clone())
                        .header("content-type", "application/json")
                        .body(bodies[k % bodies.len()].clone())
                        .send()
                        .await
                        .expect("request");
                    assert!(response.status().is_success(), "{}", response.status());
                    let _ = response.bytes().await;
                    latencies.push(sent.elapsed().as_micros() as u64);
                    k += clients;
                }
                latencies
            })
        })
        .collect();
    Round::gather(tasks, started, cpu_before).await
}

fn encoded(bodies: &[Json]) -> Arc<Vec<Vec<u8>>> {
    Arc::new(
        bodies
            .iter()
            .map(|b| serde_json::to_vec(b).expect("json"))
            .collect(),
    )
}

/// A service on its own port and temporary store; `stop` ends it.
struct Running {
    base: String,
    service: Arc<Service>,
    stop: tokio::sync::oneshot::Sender<()>,
    server: tokio::task::JoinHandle<std::io::Result<()>>,
    _dir: tempfile::TempDir,
}

async fn start(config: impl FnOnce(&std::path::Path) -> Config) -> Running {
    let dir = tempfile::tempdir().expect("temp dir");
    let config = config(dir.path());
    let service = tokio::task::spawn_blocking(move || Service::open(config))
        .await
        .expect("join")
        .expect("service opens");
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let base = format!("http://{}", listener.local_addr().expect("addr"));
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(app::serve(listener, Arc::clone(&service), async {
        let _ = stopped.await;
    }));
    Running {
        base,
        service,
        stop,
        server,
        _dir: dir,
    }
}

impl Running {
    async fn stop(self) {
        let _ = self.stop.send(());
        let _ = self.server.await;
    }
}

async fn shadow_phase(client: &reqwest::Client) -> Json {
    let running = start(|dir| {
        let mut config = Config::embedded_default();
        config.server.data_dir = dir.to_owned();
        config.schedule.every = None;
        config.schedule.new_labels = None;
        config.shadow.outcomes = 1_000_000;
        config
    })
    .await;
    let base = running.base.clone();
    backfill(client, &base, 3000, 1, Regime::Before).await;
    let first = retrain(client, &base).await;
    assert_eq!(first["verdict"], "promoted", "{first}");
    backfill(client, &base, 3000, 2, Regime::After).await;
    let second = retrain(client, &base).await;
    assert_eq!(second["verdict"], "shadowing", "{second}");
    let candidate = running.service.api.registry.shadow();
    assert!(candidate.is_some(), "the run left a shadowing candidate");

    let bodies = encoded(&invoice_bodies());
    let url = format!("{base}/v1/score");
    let (mut alone, mut shadowed) = (Vec::new(), Vec::new());
    for _ in 0..rounds() {
        running.service.api.registry.set_shadow(None);
        alone.push(load(&url, &bodies, CLIENTS, Pace::Closed).await);
        running.service.api.registry.set_shadow(candidate.clone());
        shadowed.push(load(&url, &bodies, CLIENTS, Pace::Closed).await);
    }
    let alone = report("invoices, active model only", &alone);
    let shadowed = report("invoices, with a shadow", &shadowed);
    let ratio = shadowed["throughput"].as_f64().unwrap_or(f64::NAN)
        / alone["throughput"].as_f64().unwrap_or(f64::NAN);
    println!("  throughput with a shadow / without: {ratio:.3}");
    running.stop().await;
    json!({"alone": alone, "shadowed": shadowed, "ratio": ratio})
}

/// The 30-feature service with a promoted model, and the bodies to score.
async fn wide_service(client: &reqwest::Client) -> (Running, Vec<Json>) {
    let running = start(wide_config).await;
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let start = now_ms() - 10 * 24 * 3600 * 1000;
    let rows: Vec<Json> = (0..20_000)
        .map(|i| {
            let (features, label) = wide_row(&mut rng);
            json!({"features": features, "label": label,
                   "event_time": to_rfc3339(start + i * 40), "id": format!("w{i}")})
        })
        .collect();
    post_examples(client, &running.base, rows).await;
    let trained = Instant::now();
    let wide = retrain(client, &running.base).await;
    assert_eq!(wide["verdict"], "promoted", "{wide}");
    println!(
        "(one training run on the 30-feature service: {:.1} s)",
        trained.elapsed().as_secs_f64()
    );
    let bodies = (0..1000)
        .map(|_| json!({"features": wide_row(&mut rng).0}))
        .collect();
    (running, bodies)
}

async fn ceiling_phase(running: &Running, bodies: &Arc<Vec<Vec<u8>>>) -> Json {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let bare_url = format!("http://{}/v1/score", listener.local_addr().expect("addr"));
    let router = axum::Router::new().route("/v1/score", axum::routing::post(bare::score));
    let bare_server = tokio::spawn(async move { axum::serve(listener, router).await });
    // The ceiling with the service's recording added: what the service could reach if
    // everything but the record were free.
    let record_dir = tempfile::tempdir().expect("temp dir");
    let record_store: Arc<dyn understudy::store::Store> =
        Arc::new(understudy::store::SledStore::open(record_dir.path()).expect("store opens"));
    let recorder = Arc::new(understudy::store::recorder::ScoreRecorder::start(
        record_store,
    ));
    let recording_listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let recording_url = format!(
        "http://{}/v1/score",
        recording_listener.local_addr().expect("addr")
    );
    let recording_router = axum::Router::new()
        .route("/v1/score", axum::routing::post(bare::score_and_record))
        .with_state(Arc::clone(&recorder));
    let recording_server =
        tokio::spawn(async move { axum::serve(recording_listener, recording_router).await });
    let url = format!("{}/v1/score", running.base);
    let (mut service, mut ceiling, mut recording) = (Vec::new(), Vec::new(), Vec::new());
    // `UNDERSTUDY_LOAD=service` loads the service alone, `UNDERSTUDY_LOAD=bare` the ceiling
    // alone and `UNDERSTUDY_LOAD=recording` the ceiling with recording alone (for a profiler).
    let both = wanted("ceiling");
    let bare_alone = !both && wanted("bare");
    let recording_alone = !both && !bare_alone && wanted("recording");
    for round in 0..rounds() {
        if bare_alone {
            ceiling.push(load(&bare_url, bodies, CLIENTS, Pace::Closed).await);
            continue;
        }
        if recording_alone {
            recording.push(load(&recording_url, bodies, CLIENTS, Pace::Closed).await);
            continue;
        }
        if !both {
            service.push(load(&url, bodies, CLIENTS, Pace::Closed).await);
            continue;
        }
        // The order turns each round, so no series always runs first (or after another).
        for k in 0..3 {
            match (round + k) % 3 {
                0 => service.push(load(&url, bodies, CLIENTS, Pace::Closed).await),
                1 => ceiling.push(load(&bare_url, bodies, CLIENTS, Pace::Closed).await),
                _ => recording.push(load(&recording_url, bodies, CLIENTS, Pace::Closed).await),
            }
        }
    }
    recording_server.abort();
    let _ = recorder.stop();
    if bare_alone {
        bare_server.abort();
        let ceiling = report("bare axum ceiling, 30 features", &ceiling);
        return json!({ "ceiling": ceiling });
    }
    if recording_alone {
        bare_server.abort();
        let recording = report("bare ceiling + recording each score", &recording);
        return json!({ "ceiling_with_recording": recording });
    }
    if !both {
        bare_server.abort();
        let service = report("service, 30 features", &service);
        return json!({ "service": service });
    }
    bare_server.abort();
    // The machine's speed drifts from round to round (a shared host); a ratio within each
    // round cancels that drift, and their median is the steadier figure.
    let per_round = median(
        service
            .iter()
            .zip(&ceiling)
            .map(|(s, c)| s.throughput() / c.throughput())
            .collect(),
    );
    let service = report("service, 30 features", &service);
    let ceiling = report("bare axum ceiling, 30 features", &ceiling);
    let recording = report("bare ceiling + recording each score", &recording);
    let rate = |phase: &Json| phase["throughput"].as_f64().unwrap_or(f64::NAN);
    let ratio = rate(&service) / rate(&ceiling);
    let recorded_ratio = rate(&service) / rate(&recording);
    println!(
        "  service / ceiling throughput: {ratio:.3} (median of per-round ratios {per_round:.3})"
    );
    println!(
        "  ceiling with recording / ceiling: {:.3}; service / ceiling with recording: {recorded_ratio:.3}",
        rate(&recording) / rate(&ceiling)
    );
    json!({"service": service, "ceiling": ceiling, "ceiling_with_recording": recording,
           "ratio": ratio, "ratio_median_per_round": per_round,
           "ratio_to_ceiling_with_recording": recorded_ratio})
}

async fn paced_phase(
    client: &reqwest::Client,
    running: &Running,
    bodies: &Arc<Vec<Vec<u8>>>,
    max_rate: f64,
) -> Json {
    let url = format!("{}/v1/score", running.base);
    let rate = max_rate / 2.0;
    println!("  paced at {rate:.0} req/s (half the saturated rate):");
    let idle = load(&url, bodies, CLIENTS, Pace::Rate(rate)).await;

    // Runs back to back while the next rounds score.
    let training = Arc::new(std::sync::atomic::AtomicBool::new(true));
    let runs = Arc::new(AtomicUsize::new(0));
    let trainer = {
        let (client, base) = (client.clone(), running.base.clone());
        let (training, runs) = (Arc::clone(&training), Arc::clone(&runs));
        tokio::spawn(async move {
            while training.load(Ordering::SeqCst) {
                retrain(&client, &base).await;
                runs.fetch_add(1, Ordering::SeqCst);
            }
        })
    };
    // Let the first run get going before measuring.
    tokio::time::sleep(Duration::from_millis(300)).await;
    let busy = load(&url, bodies, CLIENTS, Pace::Rate(rate)).await;
    let saturated_busy = load(&url, bodies, CLIENTS, Pace::Closed).await;
    training.store(false, Ordering::SeqCst);
    let _ = trainer.await;
    let idle = report("paced, idle", &[idle]);
    let busy = report("paced, training running", &[busy]);
    let saturated_busy = report("saturated, training running", &[saturated_busy]);
    let ratio =
        busy["p99_ms"].as_f64().unwrap_or(f64::NAN) / idle["p99_ms"].as_f64().unwrap_or(f64::NAN);
    println!(
        "  p99 training / idle: {ratio:.2} ({} runs finished meanwhile)",
        runs.load(Ordering::SeqCst)
    );
    json!({"rate": rate, "idle": idle, "training": busy, "saturated_training": saturated_busy,
           "p99_ratio": ratio, "runs": runs.load(Ordering::SeqCst)})
}

async fn batch_phase(running: &Running, bodies: &[Json]) -> Json {
    let batch = json!({ "items": bodies.iter().take(1000).cloned().collect::<Vec<_>>() });
    let batches = Arc::new(vec![serde_json::to_vec(&batch).expect("json")]);
    let url = format!("{}/v1/score/batch", running.base);
    let rounds = vec![load(&url, &batches, 2, Pace::Closed).await];
    let rows_per_second = rounds[0].throughput() * 1000.0;
    let batches = report("batch of 1,000 rows, 2 clients", &rounds);
    println!("  rows per second through /v1/score/batch: {rows_per_second:.0}");
    json!({"batches": batches, "rows_per_second": rows_per_second})
}

/// sled's own rate in a fresh database: `threads` threads each insert a 200-byte value and
/// flush, for `seconds`.
fn raw_sled_flushed_inserts(threads: usize, seconds: u64) -> f64 {
    let dir = tempfile::tempdir().expect("temp dir");
    let db = sled::Config::new()
        .path(dir.path())
        .flush_every_ms(Some(200))
        .open()
        .expect("sled opens");
    let tree = db.open_tree("raw").expect("tree");
    let done = AtomicUsize::new(0);
    let deadline = Instant::now() + Duration::from_secs(seconds);
    let started = Instant::now();
    std::thread::scope(|scope| {
        for t in 0..threads {
            let (db, tree, done) = (&db, &tree, &done);
            scope.spawn(move || {
                let value = [7u8; 200];
                let mut i = 0u64;
                while Instant::now() < deadline {
                    let key = format!("{t:03}-{i:012}");
                    tree.insert(key.as_bytes(), &value[..]).expect("insert");
                    db.flush().expect("flush");
                    done.fetch_add(1, Ordering::Relaxed);
                    i += 1;
                }
            });
        }
    });
    done.load(Ordering::Relaxed) as f64 / started.elapsed().as_secs_f64()
}

/// The store alone: `threads` threads record outcomes for scores already written, straight
/// through `Store::put_outcome` (no HTTP), for `seconds`.
fn store_outcomes(threads: usize, seconds: u64) -> f64 {
    use understudy::store::{ScoreRecord, SledStore, Store};
    let dir = tempfile::tempdir().expect("temp dir");
    let store = SledStore::open(dir.path()).expect("store opens");
    let features = serde_json::value::RawValue::from_string(
        serde_json::to_string(&wide_row(&mut ChaCha8Rng::seed_from_u64(5)).0).expect("json"),
    )
    .expect("raw json");
    let n = 40_000 * seconds as usize;
    // Ids as the recorder makes them: ULIDs in write order, each record's time its id's.
    let start = now_ms() as u64;
    let ids: Vec<String> = (0..n)
        .map(|i| ulid::Ulid::from_parts(start + (i / 64) as u64, i as u128).to_string())
        .collect();
    let records: Vec<ScoreRecord> = (0..n)
        .map(|i| ScoreRecord {
            score_id: ids[i].clone(),
            at: (start + (i / 64) as u64) as i64,
            model_id: "m".into(),
            reference: None,
            features: features.clone().into(),
            output: 0.5,
            shadow: None,
            candidate_answered: false,
        })
        .collect();
    for chunk in records.chunks(1000) {
        store.record_scores(chunk).expect("scores recorded");
    }
    let next = AtomicUsize::new(0);
    let deadline = Instant::now() + Duration::from_secs(seconds);
    let started = Instant::now();
    std::thread::scope(|scope| {
        for _ in 0..threads {
            scope.spawn(|| {
                while Instant::now() < deadline {
                    let i = next.fetch_add(1, Ordering::Relaxed);
                    if i >= n {
                        break;
                    }
                    store
                        .put_outcome(&ids[i], (i % 2) as f64, now_ms())
                        .expect("outcome");
                }
            });
        }
    });
    next.load(Ordering::Relaxed).min(n) as f64 / started.elapsed().as_secs_f64()
}

/// `INGEST_CLIENTS` keep-alive clients post `bodies` in turn to `url` for one round, each
/// expecting 201.
async fn post_outcomes(url: reqwest::Url, bodies: Arc<Vec<axum::body::Bytes>>) -> Round {
    let next = Arc::new(AtomicUsize::new(0));
    let deadline = Instant::now() + Duration::from_secs(round_seconds());
    let started = Instant::now();
    let cpu_before = process_cpu_seconds();
    let tasks: Vec<_> = (0..INGEST_CLIENTS)
        .map(|_| {
            let (bodies, next, url) = (Arc::clone(&bodies), Arc::clone(&next), url.clone());
            tokio::spawn(async move {
                let client = reqwest::Client::new();
                let mut latencies = Vec::new();
                while Instant::now() < deadline {
                    let i = next.fetch_add(1, Ordering::Relaxed);
                    let Some(body) = bodies.get(i) else { break };
                    let sent = Instant::now();
                    let response = client
                        .post(url.clone())
                        .header(reqwest::header::CONTENT_TYPE, "application/json")
                        .body(body.clone())
                        .send()
                        .await
                        .expect("outcome");
                    assert_eq!(response.status(), reqwest::StatusCode::CREATED);
                    let _ = response.bytes().await;
                    latencies.push(sent.elapsed().as_micros() as u64);
                }
                latencies
            })
        })
        .collect();
    Round::gather(tasks, started, cpu_before).await
}

async fn ingest_phase(client: &reqwest::Client, running: &Running, bodies: &[Json]) -> Json {
    // Scores to label: enough for the round at a generous rate.
    let wanted = 40_000 * round_seconds() as usize;
    let mut score_ids = Vec::with_capacity(wanted);
    let batch = json!({ "items": bodies.iter().take(1000).cloned().collect::<Vec<_>>() });
    while score_ids.len() < wanted {
        let answer = post(client, &format!("{}/v1/score/batch", running.base), &batch).await;
        score_ids.extend(
            answer["results"]
                .as_array()
                .expect("results")
                .iter()
                .map(|r| r["score_id"].as_str().expect("score id").to_owned()),
        );
    }
    // The round starts with every score record written, so the recorder's backlog from the
    // batches above does not share the round's CPU.
    let service = Arc::clone(&running.service);
    tokio::task::spawn_blocking(move || service.api.recorder.drain())
        .await
        .expect("join")
        .expect("records written");
    // Bodies encoded and the URL parsed before the round: the load generator shares the two
    // cores, so its own per-request work comes off the service's share.
    let bodies: Arc<Vec<axum::body::Bytes>> = Arc::new(
        score_ids
            .iter()
            .enumerate()
            .map(|(i, id)| {
                serde_json::to_vec(&json!({"score_id": id, "label": (i % 2) as u8}))
                    .expect("json")
                    .into()
            })
            .collect(),
    );
    let url = reqwest::Url::parse(&format!("{}/v1/outcomes", running.base)).expect("url");
    let round = post_outcomes(url, Arc::clone(&bodies)).await;
    // The same bodies to a bare endpoint that parses them and answers 201 without storing
    // anything: what HTTP on loopback with 64 clients costs on these two cores.
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let bare_url = reqwest::Url::parse(&format!(
        "http://{}/v1/outcomes",
        listener.local_addr().expect("addr")
    ))
    .expect("url");
    let router = axum::Router::new().route("/v1/outcomes", axum::routing::post(bare::outcome));
    let bare_server = tokio::spawn(async move { axum::serve(listener, router).await });
    let bare_round = post_outcomes(bare_url, bodies).await;
    bare_server.abort();
    let service = report("outcomes, 64 clients, durable", &[round]);
    let bare_http = report("bare endpoint, same bodies, no store", &[bare_round]);
    let seconds = round_seconds();
    let raw_64 = tokio::task::spawn_blocking(move || raw_sled_flushed_inserts(64, seconds))
        .await
        .expect("join");
    let raw_1 = tokio::task::spawn_blocking(move || raw_sled_flushed_inserts(1, seconds))
        .await
        .expect("join");
    let store_64 = tokio::task::spawn_blocking(move || store_outcomes(64, seconds))
        .await
        .expect("join");
    println!("store alone, put_outcome, 64 threads   {store_64:>9.0} /s");
    println!("sled alone, insert + flush, 64 threads {raw_64:>9.0} /s");
    println!("sled alone, insert + flush, 1 thread   {raw_1:>9.0} /s");
    let rate = |phase: &Json| phase["throughput"].as_f64().unwrap_or(f64::NAN);
    let ratio = rate(&service) / raw_64;
    let http_ratio = rate(&service) / rate(&bare_http);
    println!("  outcomes / sled's 64-thread flushed inserts: {ratio:.3}");
    println!("  outcomes / the bare endpoint's rate: {http_ratio:.3}");
    json!({"service": service, "bare_http": bare_http, "store_64_threads": store_64,
           "sled_flushed_64_threads": raw_64, "sled_flushed_1_thread": raw_1, "ratio": ratio,
           "ratio_to_bare_http": http_ratio})
}

fn main() {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .expect("runtime");
    runtime.block_on(async {
        let client = reqwest::Client::new();
        let mut out = serde_json::Map::new();
        println!(
            "\n{CLIENTS} keep-alive clients unless noted, {} alternating rounds of {} s, loopback, same process:",
            rounds(),
            round_seconds()
        );
        if wanted("shadow") {
            out.insert("shadow".into(), shadow_phase(&client).await);
        }
        if ["ceiling", "service", "bare", "recording", "paced", "batch", "ingest"]
            .iter()
            .any(|p| wanted(p))
        {
            let (running, bodies) = wide_service(&client).await;
            let encoded_bodies = encoded(&bodies);
            let mut max_rate = None;
            if ["ceiling", "service", "bare", "recording"]
                .iter()
                .any(|p| wanted(p))
            {
                let ceiling = ceiling_phase(&running, &encoded_bodies).await;
                max_rate = ceiling["service"]["throughput"].as_f64();
                out.insert("ceiling".into(), ceiling);
            }
            if wanted("paced") {
                let max_rate = match max_rate {
                    Some(rate) => rate,
                    None => load(
                        &format!("{}/v1/score", running.base),
                        &encoded_bodies,
                        CLIENTS,
                        Pace::Closed,
                    )
                    .await
                    .throughput(),
                };
                out.insert(
                    "paced".into(),
                    paced_phase(&client, &running, &encoded_bodies, max_rate).await,
                );
            }
            if wanted("batch") {
                out.insert("batch".into(), batch_phase(&running, &bodies).await);
            }
            if wanted("ingest") {
                out.insert(
                    "ingest".into(),
                    ingest_phase(&client, &running, &bodies).await,
                );
            }
            running.stop().await;
        }
        let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-reports");
        let _ = std::fs::create_dir_all(&dir);
        let _ = std::fs::write(
            dir.join("scoring_load.json"),
            serde_json::to_vec_pretty(&Json::Object(out)).unwrap_or_default(),
        );
    });
}
