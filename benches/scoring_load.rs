//! Scoring under load, with and without a shadowing candidate, on loopback.
//!
//! `cargo bench --bench scoring_load` starts the service in-process on a free port with a
//! temporary store, trains a first model on invented invoices, then drives `POST /v1/score`
//! from `CLIENTS` concurrent keep-alive clients for `SECONDS` seconds and reports throughput
//! and latency percentiles. It then makes a candidate shadow the active model (a run on data
//! from a changed world, with `shadow.outcomes` set) and repeats the same load. The load
//! generator runs in the same process and on the same two cores as the service, so absolute
//! numbers understate a dedicated machine; the ratio between the two phases is the point.

use std::sync::Arc;
use std::time::{Duration, Instant};

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};

use understudy::app::{self, Service};
use understudy::config::Config;
use understudy::demo::scenario::{invoice, Regime};
use understudy::time::{now_ms, to_rfc3339};

const CLIENTS: usize = 8;
const SECONDS: u64 = 10;

struct Phase {
    requests: usize,
    seconds: f64,
    latencies_us: Vec<u64>,
}

impl Phase {
    fn percentile(&self, q: f64) -> f64 {
        let mut sorted = self.latencies_us.clone();
        sorted.sort_unstable();
        let k = ((sorted.len() as f64 - 1.0) * q).round() as usize;
        sorted.get(k).copied().unwrap_or(0) as f64 / 1000.0
    }

    fn report(&self, name: &str) -> Json {
        let throughput = self.requests as f64 / self.seconds;
        println!(
            "{name:<22} {throughput:>9.0} req/s   p50 {:>6.3} ms   p99 {:>6.3} ms   p99.9 {:>6.3} ms",
            self.percentile(0.5),
            self.percentile(0.99),
            self.percentile(0.999)
        );
        json!({
            "phase": name, "requests": self.requests, "seconds": self.seconds,
            "throughput": throughput, "p50_ms": self.percentile(0.5),
            "p99_ms": self.percentile(0.99), "p999_ms": self.percentile(0.999),
        })
    }
}

async fn post(client: &reqwest::Client, url: &str, body: &Json) -> Json {
    let response = client.post(url).json(body).send().await.expect("request");
    response.json().await.expect("json body")
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
    for chunk in rows.chunks(1000) {
        post(
            client,
            &format!("{base}/v1/examples"),
            &Json::Array(chunk.to_vec()),
        )
        .await;
    }
}

async fn retrain(client: &reqwest::Client, base: &str) -> Json {
    let run = post(client, &format!("{base}/v1/retrain"), &json!({})).await;
    let id = run["run_id"].as_str().expect("run id").to_owned();
    loop {
        tokio::time::sleep(Duration::from_millis(200)).await;
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

async fn load(base: &str) -> Phase {
    let bodies: Arc<Vec<Json>> = Arc::new({
        let mut rng = ChaCha8Rng::seed_from_u64(99);
        (0..1000)
            .map(|_| json!({"features": invoice(&mut rng, Regime::Before).features}))
            .collect()
    });
    let deadline = Instant::now() + Duration::from_secs(SECONDS);
    let started = Instant::now();
    let tasks: Vec<_> = (0..CLIENTS)
        .map(|c| {
            let bodies = Arc::clone(&bodies);
            let url = format!("{base}/v1/score");
            tokio::spawn(async move {
                let client = reqwest::Client::new();
                let mut latencies = Vec::new();
                let mut k = c;
                while Instant::now() < deadline {
                    let sent = Instant::now();
                    let response = client
                        .post(&url)
                        .json(&bodies[k % bodies.len()])
                        .send()
                        .await
                        .expect("score");
                    assert!(response.status().is_success());
                    let _ = response.bytes().await;
                    latencies.push(sent.elapsed().as_micros() as u64);
                    k += CLIENTS;
                }
                latencies
            })
        })
        .collect();
    let mut latencies_us = Vec::new();
    for task in tasks {
        latencies_us.extend(task.await.expect("client task"));
    }
    Phase {
        requests: latencies_us.len(),
        seconds: started.elapsed().as_secs_f64(),
        latencies_us,
    }
}

fn main() {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .expect("runtime");
    runtime.block_on(async {
        let dir = tempfile::tempdir().expect("temp dir");
        let mut config = Config::embedded_default();
        config.server.data_dir = dir.path().to_owned();
        config.schedule.every = None;
        config.schedule.new_labels = None;
        config.shadow.outcomes = 1_000_000;
        let service = tokio::task::spawn_blocking(move || Service::open(config))
            .await
            .expect("join")
            .expect("service opens");
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
            .await
            .expect("bind");
        let base = format!("http://{}", listener.local_addr().expect("addr"));
        let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
        let server = tokio::spawn(app::serve(listener, service, async {
            let _ = stopped.await;
        }));
        let client = reqwest::Client::new();

        backfill(&client, &base, 3000, 1, Regime::Before).await;
        let first = retrain(&client, &base).await;
        assert_eq!(first["verdict"], "promoted", "{first}");
        println!("\nPOST /v1/score, {CLIENTS} clients, {SECONDS} s each, loopback, same process:");
        let alone = load(&base).await.report("active model only");

        backfill(&client, &base, 3000, 2, Regime::After).await;
        let second = retrain(&client, &base).await;
        assert_eq!(second["verdict"], "shadowing", "{second}");
        let shadowed = load(&base).await.report("with a shadow");
        let ratio = shadowed["throughput"].as_f64().unwrap_or(f64::NAN)
            / alone["throughput"].as_f64().unwrap_or(f64::NAN);
        println!("throughput with a shadow / without: {ratio:.3}");

        let out = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-reports");
        let _ = std::fs::create_dir_all(&out);
        let _ = std::fs::write(
            out.join("scoring_load.json"),
            serde_json::to_vec_pretty(&json!({"phases": [alone, shadowed], "ratio": ratio}))
                .unwrap_or_default(),
        );
        let _ = stop.send(());
        let _ = server.await;
    });
}
