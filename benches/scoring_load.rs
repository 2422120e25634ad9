//! Scoring under load, with and without a shadowing candidate, on loopback.
//!
//! `cargo bench --bench scoring_load` starts the service in-process on a free port with a
//! temporary store, trains a first model on invented invoices, then drives `POST /v1/score`
//! from `CLIENTS` concurrent keep-alive clients for `SECONDS` seconds and reports throughput
//! and latency percentiles. It then makes a candidate shadow the active model (a run on data
//! from a changed world, with `shadow.outcomes` set) and repeats the same load. The load
//! generator runs in the same process and on the same two cores as the service, so absolute
//! numbers understate a dedicated machine; the ratio between the two phases is the point.
//!
//! A second pair of phases measures the ceiling: the service on a 30-feature schema against a
//! bare axum endpoint that parses the same bodies into a fixed struct, takes a dot product and
//! a sigmoid, and answers (no validation, no recording).

use std::sync::Arc;
use std::time::{Duration, Instant};

use rand::{Rng, SeedableRng};
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

fn invoice_bodies() -> Vec<Json> {
    let mut rng = ChaCha8Rng::seed_from_u64(99);
    (0..1000)
        .map(|_| json!({"features": invoice(&mut rng, Regime::Before).features}))
        .collect()
}

const WIDE: usize = 30;

/// 30 named features drawn standard normal; the label follows a fixed logistic rule.
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

fn wide_config(dir: &std::path::Path) -> Config {
    let mut text = String::from(
        "[label]\nname = \"outcome\"\n\n[training]\nwindow_rows = 5000\nholdout_fraction = 0.25\nfolds = 5\nmin_rows = 500\n\n[[training.families]]\nfamily = \"logistic\"\npenalty = \"l2\"\nlambda = [0.01]\n\n[gate]\nmetric = \"auc\"\nmargin = 0.02\nmin_rows = 200\n",
    );
    for j in 0..WIDE {
        text.push_str(&format!(
            "\n[[features]]\nname = \"f{j:02}\"\nkind = \"number\"\nmin = -10\nmax = 10\n"
        ));
    }
    let mut config = Config::from_toml(&text).expect("valid wide config");
    config.server.data_dir = dir.to_owned();
    config.schedule.every = None;
    config.schedule.new_labels = None;
    config
}

/// The ceiling: the same body into a fixed struct, a dot product and a sigmoid.
mod bare {
    use axum::Json;
    use serde::Deserialize;

    #[derive(Deserialize)]
    pub struct Body {
        pub features: Features,
    }

    #[derive(Deserialize)]
    pub struct Features {
        f00: f64,
        f01: f64,
        f02: f64,
        f03: f64,
        f04: f64,
        f05: f64,
        f06: f64,
        f07: f64,
        f08: f64,
        f09: f64,
        f10: f64,
        f11: f64,
        f12: f64,
        f13: f64,
        f14: f64,
        f15: f64,
        f16: f64,
        f17: f64,
        f18: f64,
        f19: f64,
        f20: f64,
        f21: f64,
        f22: f64,
        f23: f64,
        f24: f64,
        f25: f64,
        f26: f64,
        f27: f64,
        f28: f64,
        f29: f64,
    }

    impl Features {
        fn values(&self) -> [f64; 30] {
            [
                self.f00, self.f01, self.f02, self.f03, self.f04, self.f05, self.f06, self.f07,
                self.f08, self.f09, self.f10, self.f11, self.f12, self.f13, self.f14, self.f15,
                self.f16, self.f17, self.f18, self.f19, self.f20, self.f21, self.f22, self.f23,
                self.f24, self.f25, self.f26, self.f27, self.f28, self.f29,
            ]
        }
    }

    pub async fn score(Json(body): Json<Body>) -> Json<serde_json::Value> {
        let z: f64 = body
            .features
            .values()
            .iter()
            .enumerate()
            .map(|(j, v)| v * (j as f64 - 15.0) / 30.0)
            .sum::<f64>()
            - 0.3;
        Json(serde_json::json!({ "probability": 1.0 / (1.0 + (-z).exp()) }))
    }
}

async fn load(base: &str, bodies: Vec<Json>) -> Phase {
    let bodies = Arc::new(bodies);
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
        let alone = load(&base, invoice_bodies()).await.report("active model only");

        backfill(&client, &base, 3000, 2, Regime::After).await;
        let second = retrain(&client, &base).await;
        assert_eq!(second["verdict"], "shadowing", "{second}");
        let shadowed = load(&base, invoice_bodies()).await.report("with a shadow");
        let ratio = shadowed["throughput"].as_f64().unwrap_or(f64::NAN)
            / alone["throughput"].as_f64().unwrap_or(f64::NAN);
        println!("throughput with a shadow / without: {ratio:.3}");

        let _ = stop.send(());
        let _ = server.await;

        // The ceiling, on 30 named features.
        let wide_dir = tempfile::tempdir().expect("temp dir");
        let service = {
            let config = wide_config(wide_dir.path());
            tokio::task::spawn_blocking(move || Service::open(config))
                .await
                .expect("join")
                .expect("service opens")
        };
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.expect("bind");
        let wide_base = format!("http://{}", listener.local_addr().expect("addr"));
        let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
        let server = tokio::spawn(app::serve(listener, service, async {
            let _ = stopped.await;
        }));
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let start = now_ms() - 10 * 24 * 3600 * 1000;
        let rows: Vec<Json> = (0..3000)
            .map(|i| {
                let (features, label) = wide_row(&mut rng);
                json!({"features": features, "label": label, "event_time": to_rfc3339(start + i * 1000), "id": format!("w{i}")})
            })
            .collect();
        for chunk in rows.chunks(1000) {
            post(&client, &format!("{wide_base}/v1/examples"), &Json::Array(chunk.to_vec())).await;
        }
        let wide = retrain(&client, &wide_base).await;
        assert_eq!(wide["verdict"], "promoted", "{wide}");
        let wide_bodies: Vec<Json> = (0..1000)
            .map(|_| json!({"features": wide_row(&mut rng).0}))
            .collect();
        let service_wide = load(&wide_base, wide_bodies.clone()).await.report("service, 30 features");
        let _ = stop.send(());
        let _ = server.await;

        let bare_listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.expect("bind");
        let bare_base = format!("http://{}", bare_listener.local_addr().expect("addr"));
        let bare_router = axum::Router::new().route("/v1/score", axum::routing::post(bare::score));
        let bare_server = tokio::spawn(async move { axum::serve(bare_listener, bare_router).await });
        let ceiling = load(&bare_base, wide_bodies).await.report("bare axum ceiling");
        bare_server.abort();
        let ceiling_ratio = service_wide["throughput"].as_f64().unwrap_or(f64::NAN)
            / ceiling["throughput"].as_f64().unwrap_or(f64::NAN);
        println!("service / bare-axum ceiling throughput, 30 features: {ceiling_ratio:.3}");

        let out = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-reports");
        let _ = std::fs::create_dir_all(&out);
        let _ = std::fs::write(
            out.join("scoring_load.json"),
            serde_json::to_vec_pretty(&json!({
                "phases": [alone, shadowed, service_wide, ceiling],
                "shadow_ratio": ratio,
                "ceiling_ratio": ceiling_ratio,
            }))
            .unwrap_or_default(),
        );
    });
}
