//! `spawn_app`: the real service on port 0 with a temporary data dir, and backfill helpers.

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Duration;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};
use understudy::app::{self, Service};
use understudy::config::Config;
use understudy::demo::scenario::{invoice, Regime};
use understudy::store::Store;
use understudy::time::{now_ms, to_rfc3339};

pub struct TestApp {
    pub base: String,
    pub client: reqwest::Client,
    pub dir: PathBuf,
    _temp: Option<tempfile::TempDir>,
    stop: Option<tokio::sync::oneshot::Sender<()>>,
    handle: tokio::task::JoinHandle<std::io::Result<()>>,
}

/// The embedded default config with schedules off (tests start runs themselves).
pub fn test_config(dir: &Path) -> Config {
    let mut config = Config::embedded_default();
    config.server.data_dir = dir.to_owned();
    config.schedule.every = None;
    config.schedule.new_labels = None;
    config
}

pub async fn spawn_app() -> TestApp {
    let temp = tempfile::tempdir().unwrap();
    let dir = temp.path().to_owned();
    let mut app = spawn_app_with(test_config(&dir)).await;
    app._temp = Some(temp);
    app
}

pub async fn spawn_app_with(config: Config) -> TestApp {
    let service = tokio::task::spawn_blocking(move || open_when_unlocked(config))
        .await
        .unwrap();
    serve_service(service).await
}

/// Opens a store directly, waiting out sled's directory lock as [`open_when_unlocked`] does.
pub fn open_store(dir: &Path) -> understudy::store::SledStore {
    let deadline = std::time::Instant::now() + Duration::from_secs(5);
    loop {
        match understudy::store::SledStore::open(dir) {
            Err(understudy::store::StoreError::Locked { .. })
                if std::time::Instant::now() < deadline =>
            {
                std::thread::sleep(Duration::from_millis(20));
            }
            other => return other.unwrap(),
        }
    }
}

/// Opens the service, waiting out sled's directory lock for a moment: a store the test just
/// dropped in this process still holds it while sled's background threads wind down.
fn open_when_unlocked(config: Config) -> Arc<Service> {
    let deadline = std::time::Instant::now() + Duration::from_secs(5);
    loop {
        match Service::open(config.clone()) {
            Err(understudy::app::StartError::Store {
                source: understudy::store::StoreError::Locked { .. },
                ..
            }) if std::time::Instant::now() < deadline => {
                std::thread::sleep(Duration::from_millis(20));
            }
            other => return other.unwrap(),
        }
    }
}

/// The real service over a store the test opened (to inject faults).
pub async fn spawn_app_over(config: Config, store: Arc<dyn Store>) -> TestApp {
    let service = tokio::task::spawn_blocking(move || Service::open_with_store(config, store))
        .await
        .unwrap()
        .unwrap();
    serve_service(service).await
}

async fn serve_service(service: Arc<Service>) -> TestApp {
    let dir = service.api.config.server.data_dir.clone();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let base = format!("http://{}", listener.local_addr().unwrap());
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    let handle = tokio::spawn(app::serve(listener, service, async {
        let _ = stopped.await;
    }));
    TestApp {
        base,
        client: reqwest::Client::new(),
        dir,
        _temp: None,
        stop: Some(stop),
        handle,
    }
}

impl TestApp {
    pub fn url(&self, path: &str) -> String {
        format!("{}{path}", self.base)
    }

    pub async fn get(&self, path: &str) -> (u16, Json) {
        let response = self.client.get(self.url(path)).send().await.unwrap();
        split(response).await
    }

    pub async fn post(&self, path: &str, body: &Json) -> (u16, Json) {
        let response = self
            .client
            .post(self.url(path))
            .json(body)
            .send()
            .await
            .unwrap();
        split(response).await
    }

    /// A GET's body as text (the metrics exposition, the dashboard page).
    pub async fn get_text(&self, path: &str) -> String {
        let response = self.client.get(self.url(path)).send().await.unwrap();
        response.text().await.unwrap()
    }

    /// Waits up to `seconds` for the newest log entry to have `trigger` (a live gate's or a
    /// share's end is logged off the request path); returns it.
    pub async fn newest_entry_by(&self, trigger: &str, seconds: u64) -> Json {
        for _ in 0..seconds * 10 {
            let (_, log) = self.get("/v1/promotions?limit=1").await;
            let newest = &log["entries"][0];
            if newest["trigger"] == trigger {
                return newest.clone();
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        panic!("no log entry with trigger `{trigger}` within {seconds} s");
    }

    /// Whether `/v1/candidate` shows no candidate within a second (a shadow's or a share's end
    /// clears it just after its log entry).
    pub async fn candidate_gone(&self) -> bool {
        for _ in 0..50 {
            let (_, shown) = self.get("/v1/candidate").await;
            if shown["candidate"].is_null() {
                return true;
            }
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
        false
    }

    /// Stops the server gracefully and keeps the temporary dir alive for a restart.
    pub async fn stop(mut self) -> Option<tempfile::TempDir> {
        if let Some(stop) = self.stop.take() {
            let _ = stop.send(());
        }
        (&mut self.handle).await.unwrap().unwrap();
        self._temp.take()
    }

    /// Backfills `n` labeled invoices (event times in the past) from `seed`.
    pub async fn backfill(&self, n: usize, seed: u64, regime: Regime) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        // Each seed gets its own later stretch of time, so later backfills are later data.
        let start = now_ms() - 30 * 24 * 3600 * 1000 + seed as i64 * 10_000_000;
        let rows: Vec<Json> = (0..n)
            .map(|i| {
                let inv = invoice(&mut rng, regime);
                json!({"features": inv.features, "label": inv.draw_label(&mut rng),
                       "event_time": to_rfc3339(start + i as i64 * 1000), "id": format!("backfill{seed}-{i}")})
            })
            .collect();
        for chunk in rows.chunks(1000) {
            let (status, body) = self
                .post("/v1/examples", &Json::Array(chunk.to_vec()))
                .await;
            assert_eq!(status, 200, "{body}");
        }
    }

    /// Starts a run and waits for it; returns its log entry.
    pub async fn retrain(&self) -> Json {
        let (status, body) = self.post("/v1/retrain", &json!({})).await;
        assert_eq!(status, 202, "{body}");
        let run_id = body["run_id"].as_str().unwrap().to_owned();
        for _ in 0..600 {
            tokio::time::sleep(Duration::from_millis(100)).await;
            let (status, body) = self.get(&format!("/v1/runs/{run_id}")).await;
            assert_eq!(status, 200);
            if body["run"]["state"] == "finished" {
                return body["entry"].clone();
            }
        }
        panic!("run {run_id} did not finish in 60 s");
    }

    /// Backfills history and trains the first model; returns its id.
    pub async fn with_first_model(&self) -> String {
        self.backfill(1500, 11, Regime::Before).await;
        let entry = self.retrain().await;
        assert_eq!(entry["verdict"], "promoted", "{entry}");
        entry["active_after"].as_str().unwrap().to_owned()
    }
}

pub async fn split(response: reqwest::Response) -> (u16, Json) {
    let status = response.status().as_u16();
    let text = response.text().await.unwrap();
    (
        status,
        serde_json::from_str(&text).unwrap_or(Json::String(text)),
    )
}

/// Valid features for the embedded schema.
pub fn valid_features() -> Json {
    json!({
        "invoice_amount": 12500.0, "days_to_due": 30, "debtor_years_trading": 4,
        "prior_late_invoices": 1, "credit_utilisation": 0.4,
        "debtor_sector": "retail", "submission_channel": "edi"
    })
}

/// The `errors[].field` values of a problem body.
pub fn problem_fields(body: &Json) -> Vec<String> {
    body["errors"]
        .as_array()
        .map(|a| {
            a.iter()
                .map(|e| e["field"].as_str().unwrap_or("").to_owned())
                .collect()
        })
        .unwrap_or_default()
}
