//! The command line against servers as they are met in practice: behind TLS with a private
//! certificate, shedding load with 503 and `Retry-After`; its exit statuses; and a first
//! config guessed from one's own CSV.

use std::io::{BufRead, BufReader};
use std::path::Path;
use std::process::{Command, Output, Stdio};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;
use std::time::Duration;

use tokio::io::AsyncWriteExt;
use tokio_rustls::rustls;
use understudy::config::Config;
use understudy::schema::{FeatureKind, LabelKind, MissingRule};

use crate::cli::write_csv;
use crate::helpers::{spawn_app, spawn_app_with, test_config};

fn understudy(args: &[&str], cwd: &Path) -> Output {
    Command::new(env!("CARGO_BIN_EXE_understudy"))
        .args(args)
        .current_dir(cwd)
        .output()
        .unwrap()
}

async fn understudy_async(args: &[&str], cwd: &Path) -> Output {
    let args: Vec<String> = args.iter().map(|a| a.to_string()).collect();
    let cwd = cwd.to_owned();
    tokio::task::spawn_blocking(move || {
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        understudy(&args, &cwd)
    })
    .await
    .unwrap()
}

fn text(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}

/// A TLS-terminating front on a free loopback port that forwards each connection's plain
/// bytes to `backend`, with a self-signed certificate for 127.0.0.1 made here. Returns its
/// port, the certificate as PEM, and a count of completed TLS handshakes.
async fn tls_front(backend: String) -> (u16, String, Arc<AtomicUsize>) {
    let certified = rcgen::generate_simple_self_signed(vec!["127.0.0.1".to_owned()]).unwrap();
    let pem = certified.cert.pem();
    let key = rustls::pki_types::PrivateKeyDer::Pkcs8(certified.signing_key.serialize_der().into());
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let config = rustls::ServerConfig::builder_with_provider(provider)
        .with_safe_default_protocol_versions()
        .unwrap()
        .with_no_client_auth()
        .with_single_cert(vec![certified.cert.der().clone()], key)
        .unwrap();
    let acceptor = tokio_rustls::TlsAcceptor::from(Arc::new(config));
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let port = listener.local_addr().unwrap().port();
    let handshakes = Arc::new(AtomicUsize::new(0));
    let counted = handshakes.clone();
    tokio::spawn(async move {
        loop {
            let Ok((tcp, _)) = listener.accept().await else {
                return;
            };
            let (acceptor, backend, counted) = (acceptor.clone(), backend.clone(), counted.clone());
            tokio::spawn(async move {
                // A client that refuses the certificate ends the handshake: nothing to forward.
                let Ok(mut tls) = acceptor.accept(tcp).await else {
                    return;
                };
                counted.fetch_add(1, Ordering::SeqCst);
                let mut plain = tokio::net::TcpStream::connect(&backend).await.unwrap();
                let _ = tokio::io::copy_bidirectional(&mut tls, &mut plain).await;
            });
        }
    });
    (port, pem, handshakes)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn status_talks_to_an_https_server_with_a_self_signed_certificate() {
    let app = spawn_app().await;
    let backend = app.base.trim_start_matches("http://").to_owned();
    let (port, pem, handshakes) = tls_front(backend).await;
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("ca.pem"), pem).unwrap();
    let server = format!("https://127.0.0.1:{port}");

    let out = understudy_async(
        &[
            "status",
            "--server",
            &server,
            "--ca-cert",
            "ca.pem",
            "--json",
        ],
        dir.path(),
    )
    .await;
    assert!(out.status.success(), "{}", text(&out.stderr));
    let status: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(
        status["models"]["models"],
        serde_json::json!([]),
        "{status}"
    );
    assert!(status["drift"].is_null(), "{status}");
    assert!(handshakes.load(Ordering::SeqCst) >= 1, "no TLS handshake");

    // Without the certificate the client refuses the server: a server error, exit 3.
    let before = handshakes.load(Ordering::SeqCst);
    let out = understudy_async(&["status", "--server", &server], dir.path()).await;
    assert_eq!(out.status.code(), Some(3), "{}", text(&out.stderr));
    assert!(
        text(&out.stderr).contains("cannot reach"),
        "{}",
        text(&out.stderr)
    );
    assert_eq!(handshakes.load(Ordering::SeqCst), before);
    app.stop().await;
}

/// Opens a connection and sends a request head and part of its body, so it holds its place in
/// flight until the rest arrives (`limits.rs` does the same).
async fn stalled_request(base: &str) -> tokio::net::TcpStream {
    let address = base.trim_start_matches("http://");
    let mut stream = tokio::net::TcpStream::connect(address).await.unwrap();
    stream
        .write_all(
            b"POST /v1/score HTTP/1.1\r\nHost: test\r\nContent-Type: application/json\r\nContent-Length: 100\r\n\r\n{\"features\":",
        )
        .await
        .unwrap();
    stream
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn import_waits_out_a_server_that_sheds_load_and_stores_every_row() {
    let dir = tempfile::tempdir().unwrap();
    let mut config = test_config(&dir.path().join("store"));
    config.server.max_in_flight = 1;
    let app = spawn_app_with(config).await;
    write_csv(&dir.path().join("rows.csv"), 300, false);
    // Batches of 10 rows (about 3 KB) reach the server whole, so the shed request is answered
    // with its 503 rather than a connection closed under a body still being written (which
    // the importer also retries, but without a `Retry-After` to read).
    let importer =
        understudy::config::DEFAULT_CONFIG_TOML.replace("max_batch = 1000", "max_batch = 10");
    std::fs::write(dir.path().join("importer.toml"), importer).unwrap();

    // Hold the only place in flight, and make sure it is held: a probe is shed. Up to 10 s:
    // with the whole suite running on two cores, 2 s was once not enough for the stalled
    // request to reach the front door.
    let mut stalled = stalled_request(&app.base).await;
    let mut shed = false;
    for _ in 0..1000 {
        let response = app.client.get(app.url("/healthz")).send().await.unwrap();
        if response.status() == 503 {
            assert_eq!(response.headers()["retry-after"], "1");
            shed = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    assert!(shed, "the stalled request never held the place");

    let mut child = Command::new(env!("CARGO_BIN_EXE_understudy"))
        .args([
            "import",
            "rows.csv",
            "--config",
            "importer.toml",
            "--server",
            &app.base,
        ])
        .current_dir(dir.path())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let stderr = child.stderr.take().unwrap();
    // Read the importer's messages until it says it is waiting; keep draining after that.
    let (said, rest) = tokio::sync::oneshot::channel::<String>();
    let reader = tokio::task::spawn_blocking(move || {
        let mut said = Some(said);
        let mut all = String::new();
        for line in BufReader::new(stderr).lines() {
            let line = line.unwrap();
            if line.contains("server busy (503)") {
                if let Some(said) = said.take() {
                    let _ = said.send(line.clone());
                }
            }
            all.push_str(&line);
            all.push('\n');
        }
        all
    });
    let waiting = tokio::time::timeout(Duration::from_secs(60), rest).await;
    let line = match waiting {
        Ok(Ok(line)) => line,
        _ => {
            let output = child.wait_with_output().unwrap();
            panic!(
                "the importer never waited on a 503: {}{}",
                text(&output.stdout),
                reader.await.unwrap()
            );
        }
    };
    assert!(line.contains("attempt 2 of 10"), "{line}");

    // Let the stalled request finish (its body completes as unreadable JSON), freeing the place.
    stalled.write_all(&[b' '; 88]).await.unwrap();
    let output = tokio::task::spawn_blocking(move || child.wait_with_output().unwrap())
        .await
        .unwrap();
    let messages = reader.await.unwrap();
    assert!(output.status.success(), "{messages}");
    assert!(
        text(&output.stdout).contains("imported 300 examples (0 already present)"),
        "{}",
        text(&output.stdout)
    );
    drop(stalled);
    // Every row is stored: importing again finds all 300.
    let again = understudy_async(&["import", "rows.csv", "--server", &app.base], dir.path()).await;
    assert!(again.status.success(), "{}", text(&again.stderr));
    assert!(
        text(&again.stdout).contains("imported 0 examples (300 already present)"),
        "{}",
        text(&again.stdout)
    );
    app.stop().await;
}

#[test]
fn exit_statuses_tell_usage_server_and_data_errors_apart() {
    let dir = tempfile::tempdir().unwrap();
    let code = |args: &[&str]| understudy(args, dir.path()).status.code();
    // 2: the command line or the config.
    assert_eq!(code(&["serve", "--no-such-flag"]), Some(2));
    let bad = understudy::config::DEFAULT_CONFIG_TOML.replace("folds = 5", "folds = 1");
    std::fs::write(dir.path().join("bad.toml"), bad).unwrap();
    assert_eq!(code(&["serve", "--config", "bad.toml"]), Some(2));
    assert_eq!(
        code(&["log", "--data", "store", "--since", "yesterday"]),
        Some(2)
    );
    // 3: no server there (port 1 on loopback refuses connections).
    assert_eq!(code(&["status", "--server", "http://127.0.0.1:1"]), Some(3));
    // 4: the data is refused.
    write_csv(&dir.path().join("short-row.csv"), 10, true);
    assert_eq!(
        code(&["import", "short-row.csv", "--data", "store"]),
        Some(4)
    );
    assert_eq!(code(&["train", "--csv", "missing.csv"]), Some(4));
    // 1: the command ran and failed (too few rows for a run).
    write_csv(&dir.path().join("few.csv"), 100, false);
    assert_eq!(code(&["train", "--csv", "few.csv"]), Some(1));
}

/// A CSV whose kinds, bounds and categories are known by construction.
fn own_csv(rows: usize) -> String {
    let grades = ["A", "B", "C", "D"];
    let mut out = String::from("event_time,loan_amount,term_months,grade,region,defaulted\n");
    for i in 0..rows {
        let amount = 500 + (i * 37) % 9_000;
        let term = [6, 12, 24, 36][i % 4];
        let grade = grades[(i / 4) % 4];
        let region = if i % 10 == 0 {
            ""
        } else if i % 3 == 0 {
            "north"
        } else {
            "south"
        };
        // Later grades and larger amounts default more often (a deterministic pattern).
        let risk = (i / 4) % 4 * 20 + amount / 300 + (i * 7919) % 50;
        let defaulted = u8::from(risk > 75);
        out.push_str(&format!(
            "2026-03-{:02}T{:02}:{:02}:00Z,{amount},{term},{grade},{region},{defaulted}\n",
            1 + i / 1440 % 28,
            i / 60 % 24,
            i % 60
        ));
    }
    out
}

#[test]
fn init_from_csv_guesses_kinds_bounds_and_categories_and_the_guess_trains() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("loans.csv"), own_csv(1200)).unwrap();
    let out = understudy(
        &["init", "mine.toml", "--from-csv", "loans.csv"],
        dir.path(),
    );
    assert!(out.status.success(), "{}", text(&out.stderr));
    let said = text(&out.stdout);
    assert!(
        said.contains("label       defaulted — binary (0/1)"),
        "{said}"
    );
    let amounts = (0..1200).map(|i| 500 + (i * 37) % 9_000);
    let (low, high) = (amounts.clone().min().unwrap(), amounts.max().unwrap());
    assert!(
        said.contains(&format!(
            "feature     loan_amount — number, {low} to {high}"
        )),
        "{said}"
    );
    assert!(
        said.contains("feature     region — category, 2 values"),
        "{said}"
    );
    assert!(said.contains("event time  event_time"), "{said}");

    let config = Config::load(&dir.path().join("mine.toml")).unwrap();
    assert_eq!(config.label.name, "defaulted");
    assert_eq!(config.label.kind, LabelKind::Binary);
    let names: Vec<&str> = config.features.iter().map(|f| f.name.as_str()).collect();
    assert_eq!(names, ["loan_amount", "term_months", "grade", "region"]);
    let amount = &config.features[0];
    assert_eq!(amount.kind, FeatureKind::Number);
    assert_eq!(
        (amount.min, amount.max),
        (Some(f64::from(low)), Some(f64::from(high)))
    );
    let term = &config.features[1];
    assert_eq!((term.min, term.max), (Some(6.0), Some(36.0)));
    let grade = &config.features[2];
    assert_eq!(grade.kind, FeatureKind::Category);
    let mut grades = grade.categories.clone();
    grades.sort();
    assert_eq!(grades, ["A", "B", "C", "D"]);
    assert_eq!(grade.missing, MissingRule::Reject);
    // One row in ten has no region: the most frequent value stands in.
    let region = &config.features[3];
    assert_eq!(region.categories, ["south", "north"]);
    assert_eq!(region.missing, MissingRule::Category("south".into()));

    // The written config trains on the same file.
    let run = understudy(
        &[
            "train",
            "--config",
            "mine.toml",
            "--csv",
            "loans.csv",
            "--json",
        ],
        dir.path(),
    );
    assert!(run.status.success(), "{}", text(&run.stderr));
    let entry: serde_json::Value = serde_json::from_slice(&run.stdout).unwrap();
    assert_eq!(entry["verdict"], "promoted", "{entry}");

    // --label picks another column; a file that exists is not overwritten without --force.
    let again = understudy(
        &[
            "init",
            "mine.toml",
            "--from-csv",
            "loans.csv",
            "--label",
            "term_months",
        ],
        dir.path(),
    );
    assert_eq!(again.status.code(), Some(2), "{}", text(&again.stderr));
    let forced = understudy(
        &[
            "init",
            "mine.toml",
            "--from-csv",
            "loans.csv",
            "--label",
            "term_months",
            "--force",
        ],
        dir.path(),
    );
    assert!(forced.status.success(), "{}", text(&forced.stderr));
    let config = Config::load(&dir.path().join("mine.toml")).unwrap();
    assert_eq!(config.label.name, "term_months");
    assert_eq!(config.label.kind, LabelKind::Number);
    assert_eq!(config.gate.metric.name(), "rmse");
    assert!(config.features.iter().any(|f| f.name == "defaulted"));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_server_that_logged_a_run_re_fits_it_bit_for_bit_and_names_what_changed() {
    use serde_json::json;
    use understudy::demo::scenario::Regime;
    let app = spawn_app().await;
    app.with_first_model().await;
    // A judged run: the active model it was measured against is part of what is re-run.
    app.backfill(1500, 12, Regime::Before).await;
    let entry = app.retrain().await;
    let run = entry["run_id"].as_str().unwrap().to_owned();
    assert!(entry["active_before"].is_string(), "{entry}");

    let (status, body) = app
        .post(&format!("/v1/runs/{run}/reproduce"), &json!({}))
        .await;
    assert_eq!(status, 200, "{body}");
    assert_eq!(body["reproduced"], true, "{body}");
    assert_eq!(body["refitted_candidate"], entry["candidate_id"], "{body}");
    assert!(
        body["same_rows"] == true && body["same_config"] == true && body["same_binary"] == true
    );

    // The command line asks the same server.
    let dir = tempfile::tempdir().unwrap();
    let server = app.url("");
    let out = understudy_async(
        &["train", "--reproduce", &run, "--server", &server],
        dir.path(),
    )
    .await;
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(
        text(&out.stdout).contains("reproduced bit for bit"),
        "{}",
        text(&out.stdout)
    );

    // An unknown run is a 404 naming it, and the command exits non-zero.
    let (status, body) = app.post("/v1/runs/r-999/reproduce", &json!({})).await;
    assert_eq!(status, 404, "{body}");
    assert!(body["detail"].as_str().unwrap().contains("r-999"), "{body}");
    let out = understudy_async(
        &["train", "--reproduce", "r-999", "--server", &server],
        dir.path(),
    )
    .await;
    assert!(!out.status.success());

    // A row added inside the run's window after the fact: the rows no longer match the
    // logged digest, and the answer says so (still a 200: the re-fit ran).
    let from = entry["window"]["from"].as_str().unwrap();
    let late = json!([{
        "features": crate::helpers::valid_features(),
        "label": 1,
        "event_time": from,
        "id": "added-after-the-run",
    }]);
    let (status, body) = app.post("/v1/examples", &late).await;
    assert_eq!(status, 200, "{body}");
    let (status, body) = app
        .post(&format!("/v1/runs/{run}/reproduce"), &json!({}))
        .await;
    assert_eq!(status, 200, "{body}");
    assert!(
        body["reproduced"] == false && body["same_rows"] == false,
        "{body}"
    );
    assert!(body["same_config"] == true, "{body}");
    let out = understudy_async(
        &["train", "--reproduce", &run, "--server", &server],
        dir.path(),
    )
    .await;
    assert!(!out.status.success());
    assert!(
        text(&out.stdout).contains("NOT reproduced"),
        "{}",
        text(&out.stdout)
    );
    assert!(
        text(&out.stdout).contains("rows differ"),
        "{}",
        text(&out.stdout)
    );
}
