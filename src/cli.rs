//! The command line: what the user typed, validated, then handed to the library.
//!
//! `serve` runs the service; `init` writes a starter config; `demo` runs the whole loop on
//! invented data; `import` loads labeled rows from a CSV; `train` runs one run offline on a CSV;
//! `log` prints the promotion log from a store on disk or from a running server.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{bail, Context};
use clap::{Parser, Subcommand};
use indicatif::{ProgressBar, ProgressStyle};
use serde_json::{Map, Value as Json};

use crate::app::{self, Service};
use crate::config::{Config, FeatureKind, DEFAULT_CONFIG_TOML};
use crate::ingest;
use crate::promotion::Entry;
use crate::schema::{FieldError, Schema};
use crate::store::{SledStore, Store, StoredExample};
use crate::time::to_rfc3339;

#[derive(Parser)]
#[command(
    name = "understudy",
    version,
    about = "Scoring service with cross-validated, gated retraining"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Run the HTTP service.
    Serve {
        /// Config file (default: the embedded demo-scenario config).
        #[arg(long, env = "UNDERSTUDY_CONFIG")]
        config: Option<PathBuf>,
        /// Listen address, overriding the config's server.listen.
        #[arg(long, env = "UNDERSTUDY_LISTEN")]
        listen: Option<SocketAddr>,
        /// Data dir, overriding the config's server.data_dir.
        #[arg(long, env = "UNDERSTUDY_DATA")]
        data: Option<PathBuf>,
        /// Log lines as JSON instead of human-readable text.
        #[arg(long)]
        log_json: bool,
    },
    /// Write a commented starter config (the demo scenario) to edit.
    Init {
        #[arg(default_value = "understudy.toml")]
        path: PathBuf,
        /// Overwrite an existing file.
        #[arg(long)]
        force: bool,
    },
    /// Run the whole loop on invented data: score, outcomes, retrain, gate, log.
    Demo {
        /// Keep the demo's store here (default: a temporary dir removed afterwards).
        #[arg(long)]
        data: Option<PathBuf>,
        /// Seed of the invented data.
        #[arg(long, default_value_t = 7)]
        seed: u64,
    },
    /// Load labeled rows from a CSV file (feature columns, the label column, event_time, optional id).
    Import {
        file: PathBuf,
        #[arg(long, env = "UNDERSTUDY_CONFIG")]
        config: Option<PathBuf>,
        /// Write into this data dir (the server must not be running on it).
        #[arg(long, env = "UNDERSTUDY_DATA")]
        data: Option<PathBuf>,
        /// Send to a running server instead (e.g. http://127.0.0.1:8080).
        #[arg(long, env = "UNDERSTUDY_SERVER")]
        server: Option<String>,
    },
    /// Run one retraining run offline on a CSV of labeled rows (no server, no store) and print
    /// its record.
    Train {
        #[arg(long, env = "UNDERSTUDY_CONFIG")]
        config: Option<PathBuf>,
        /// CSV of labeled rows: feature columns, the label column, event_time, optional id.
        #[arg(long)]
        data: PathBuf,
        /// Print the run record as JSON.
        #[arg(long)]
        json: bool,
        /// Write the fitted model, its coefficients and the cross-validation table here.
        #[arg(long)]
        model_out: Option<PathBuf>,
    },
    /// Print the promotion log.
    Log {
        #[arg(long, env = "UNDERSTUDY_CONFIG")]
        config: Option<PathBuf>,
        /// Read this data dir directly.
        #[arg(long, env = "UNDERSTUDY_DATA")]
        data: Option<PathBuf>,
        /// Ask a running server instead (e.g. http://127.0.0.1:8080).
        #[arg(long, env = "UNDERSTUDY_SERVER")]
        server: Option<String>,
        /// Print JSON instead of a table.
        #[arg(long)]
        json: bool,
        /// Newest entries to show.
        #[arg(long, default_value_t = 50)]
        limit: usize,
    },
}

/// Entry point of the binary.
pub fn main() -> ExitCode {
    let cli = Cli::parse();
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            ExitCode::FAILURE
        }
    }
}

/// Writes to stdout; a reader that went away (`| head`) is not an error.
fn emit(text: &str) -> anyhow::Result<()> {
    use std::io::Write;
    match std::io::stdout().lock().write_all(text.as_bytes()) {
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Ok(()),
        other => Ok(other?),
    }
}

fn load_config(path: Option<&Path>) -> anyhow::Result<Config> {
    match path {
        Some(path) => Ok(Config::load(path)?),
        None => Ok(Config::embedded_default()),
    }
}

fn init_logging(json: bool, default_level: &str) {
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| default_level.into());
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    let _ = if json {
        builder.json().try_init()
    } else {
        builder.try_init()
    };
}

fn runtime() -> anyhow::Result<tokio::runtime::Runtime> {
    Ok(tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?)
}

fn run(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Serve {
            config,
            listen,
            data,
            log_json,
        } => {
            init_logging(log_json, "info");
            let mut config = load_config(config.as_deref())?;
            if let Some(listen) = listen {
                config.server.listen = listen;
            }
            if let Some(data) = data {
                config.server.data_dir = data;
            }
            serve(config)
        }
        Command::Init { path, force } => {
            if path.exists() && !force {
                bail!("{} exists; pass --force to overwrite it", path.display());
            }
            std::fs::write(&path, DEFAULT_CONFIG_TOML)
                .with_context(|| format!("writing {}", path.display()))?;
            println!(
                "wrote {}; edit it, then run `understudy serve --config {}`",
                path.display(),
                path.display()
            );
            Ok(())
        }
        Command::Demo { data, seed } => {
            init_logging(false, "warn");
            runtime()?.block_on(crate::demo::run(data, seed))
        }
        Command::Import {
            file,
            config,
            data,
            server,
        } => {
            let mut config = load_config(config.as_deref())?;
            if let Some(data) = data {
                config.server.data_dir = data;
            }
            import(&file, &config, server.as_deref())
        }
        Command::Train {
            config,
            data,
            json,
            model_out,
        } => {
            let config = load_config(config.as_deref())?;
            train(&config, &data, json, model_out.as_deref())
        }
        Command::Log {
            config,
            data,
            server,
            json,
            limit,
        } => {
            let mut config = load_config(config.as_deref())?;
            if let Some(data) = data {
                config.server.data_dir = data;
            }
            let entries = match server {
                Some(server) => fetch_log(&server, limit)?,
                None => SledStore::open(&config.server.data_dir)?.entries(limit)?,
            };
            if json {
                emit(&format!("{}\n", serde_json::to_string_pretty(&entries)?))?;
            } else {
                emit(&log_table(&entries))?;
            }
            Ok(())
        }
    }
}

fn train(config: &Config, csv: &Path, json: bool, model_out: Option<&Path>) -> anyhow::Result<()> {
    let rows = read_csv(csv, &Schema::from_config(config))?;
    let run = crate::offline::train(config, rows);
    let entry = &run.output.entry;
    if json {
        emit(&format!("{}\n", serde_json::to_string_pretty(entry)?))?;
    } else {
        emit(&crate::offline::render(&run))?;
    }
    let Some(model) = &run.output.candidate else {
        bail!("no model was fitted: {}", entry.reason);
    };
    if let Some(path) = model_out {
        let file = crate::offline::ModelFile::new(entry, model);
        std::fs::write(path, serde_json::to_vec_pretty(&file)?)
            .with_context(|| format!("writing {}", path.display()))?;
        if !json {
            emit(&format!(
                "model {} written to {}\n",
                model.id,
                path.display()
            ))?;
        }
    }
    Ok(())
}

fn serve(config: Config) -> anyhow::Result<()> {
    runtime()?.block_on(async move {
        // The command line may have moved the listen address: the access rule applies again.
        config.validate()?;
        let listen = config.server.listen;
        if config.access.keys.is_empty() {
            tracing::info!(%listen, "no access keys configured: the API is open, on loopback only");
        } else {
            tracing::info!(
                keys = config.access.keys.len(),
                "API keys required (Authorization: Bearer)"
            );
        }
        let data_dir = config.server.data_dir.clone();
        let service = tokio::task::spawn_blocking(move || Service::open(config)).await??;
        let listener = tokio::net::TcpListener::bind(listen)
            .await
            .with_context(|| format!("binding {listen}"))?;
        tracing::info!(
            listen = %listener.local_addr()?,
            data_dir = %data_dir.display(),
            active_model = service.registry.active_id().as_deref().unwrap_or("none"),
            "understudy serving"
        );
        app::serve(listener, service, app::shutdown_signal()).await?;
        Ok(())
    })
}

fn client() -> anyhow::Result<reqwest::Client> {
    Ok(reqwest::Client::builder()
        .timeout(std::time::Duration::from_secs(60))
        .build()?)
}

fn fetch_log(server: &str, limit: usize) -> anyhow::Result<Vec<Entry>> {
    runtime()?.block_on(async {
        let url = format!(
            "{}/v1/promotions?limit={limit}",
            server.trim_end_matches('/')
        );
        let response = client()?
            .get(&url)
            .send()
            .await
            .with_context(|| format!("GET {url}"))?;
        let status = response.status();
        let body: Json = response.json().await?;
        if !status.is_success() {
            bail!(
                "{status}: {}",
                body["detail"].as_str().unwrap_or("request failed")
            );
        }
        Ok(serde_json::from_value(body["entries"].clone())?)
    })
}

/// The promotion log as a human-readable table, newest first, each reason on its own line.
pub fn log_table(entries: &[Entry]) -> String {
    use std::fmt::Write;
    let mut out = String::new();
    let _ = writeln!(
        out,
        "{:>4}  {:<24} {:<7} {:<10} {:<9} {:>7} {:>7} {:>8} {:>6}  {:<20} active after",
        "seq", "time", "run", "trigger", "verdict", "cand", "active", "gain", "margin", "candidate",
    );
    let metric_of = |r: &Option<crate::metrics::Report>, e: &Entry| {
        r.as_ref()
            .and_then(|r| r.get(e.metric))
            .map_or("-".to_owned(), |v| format!("{v:.4}"))
    };
    for e in entries {
        let cand = metric_of(
            if e.candidate_gate.is_some() {
                &e.candidate_gate
            } else {
                &e.candidate_holdout
            },
            e,
        );
        let _ = writeln!(
            out,
            "{:>4}  {:<24} {:<7} {:<10} {:<9} {:>7} {:>7} {:>8} {:>6}  {:<20} {}",
            e.seq,
            to_rfc3339(e.at),
            e.run_id,
            e.trigger.as_str(),
            e.verdict.as_str(),
            cand,
            metric_of(&e.active_gate, e),
            e.gain.map_or("-".into(), |g| format!("{g:+.4}")),
            e.margin,
            e.candidate_id.as_deref().unwrap_or("-"),
            e.active_after.as_deref().unwrap_or("-"),
        );
        let _ = writeln!(
            out,
            "      {} ({}): {}",
            e.verdict.as_str(),
            e.metric.name(),
            e.reason
        );
    }
    if entries.is_empty() {
        out.push_str("(no runs yet)\n");
    }
    out
}

/// Reads a CSV of labeled rows into validated examples; errors name the line and the field.
pub fn read_csv(path: &Path, schema: &Schema) -> anyhow::Result<Vec<StoredExample>> {
    let mut reader =
        csv::Reader::from_path(path).with_context(|| format!("opening {}", path.display()))?;
    let headers: Vec<String> = reader.headers()?.iter().map(str::to_owned).collect();
    let label_col = headers.iter().position(|h| h == schema.label());
    let time_col = headers.iter().position(|h| h == "event_time");
    let id_col = headers.iter().position(|h| h == "id");
    let (Some(label_col), Some(time_col)) = (label_col, time_col) else {
        bail!(
            "the CSV header needs a `{}` column (the label) and an `event_time` column",
            schema.label()
        );
    };
    let kinds: Vec<Option<FeatureKind>> = headers
        .iter()
        .enumerate()
        .map(|(i, h)| {
            if i == label_col || i == time_col || Some(i) == id_col {
                return Ok(None);
            }
            schema
                .features()
                .iter()
                .find(|f| &f.name == h)
                .map(|f| Some(f.kind))
                .ok_or_else(|| {
                    anyhow::anyhow!(
                        "column `{h}` is not a declared feature, the label, `event_time` or `id`"
                    )
                })
        })
        .collect::<anyhow::Result<_>>()?;
    let mut examples = Vec::new();
    let mut problems: Vec<String> = Vec::new();
    for (n, record) in reader.records().enumerate() {
        let line = n + 2;
        let record = record.with_context(|| format!("line {line}"))?;
        let mut features = Map::new();
        let mut errors: Vec<FieldError> = Vec::new();
        for (i, cell) in record.iter().enumerate() {
            let Some(kind) = kinds[i] else { continue };
            let value = match (kind, cell.trim()) {
                (_, "") => Json::Null,
                (FeatureKind::Number, text) => match text
                    .parse::<f64>()
                    .ok()
                    .and_then(serde_json::Number::from_f64)
                {
                    Some(number) => Json::Number(number),
                    None => {
                        errors.push(FieldError {
                            field: format!("features.{}", headers[i]),
                            rule: format!("must be a finite number, got `{text}`"),
                        });
                        continue;
                    }
                },
                (FeatureKind::Category, text) => Json::String(text.to_owned()),
            };
            features.insert(headers[i].clone(), value);
        }
        let label = match record[label_col].trim().parse::<f64>() {
            Ok(value) => value,
            Err(_) => {
                errors.push(FieldError {
                    field: "label".into(),
                    rule: format!("must be a number, got `{}`", record[label_col].trim()),
                });
                0.0
            }
        };
        let id = id_col.map(|c| record[c].trim()).filter(|s| !s.is_empty());
        match ingest::example(schema, &features, label, record[time_col].trim(), id) {
            Ok(example) if errors.is_empty() => examples.push(example),
            Ok(_) => {}
            Err(e) => errors.extend(e.0),
        }
        for e in errors {
            problems.push(format!("line {line}: `{}`: {}", e.field, e.rule));
        }
    }
    if !problems.is_empty() {
        let shown = problems
            .iter()
            .take(20)
            .cloned()
            .collect::<Vec<_>>()
            .join("\n  ");
        bail!(
            "{} problems in {}, nothing imported:\n  {shown}",
            problems.len(),
            path.display()
        );
    }
    Ok(examples)
}

fn progress(len: usize) -> ProgressBar {
    let bar = ProgressBar::new(len as u64);
    bar.set_style(
        ProgressStyle::with_template("{bar:40} {pos}/{len} rows {per_sec} {eta}")
            .unwrap_or_else(|_| ProgressStyle::default_bar()),
    );
    bar
}

fn import(file: &Path, config: &Config, server: Option<&str>) -> anyhow::Result<()> {
    let schema = Schema::from_config(config);
    let examples = read_csv(file, &schema)?;
    let batch = config.server.max_batch;
    let bar = progress(examples.len());
    let (mut inserted, mut duplicates) = (0usize, 0usize);
    match server {
        None => {
            let store = SledStore::open(&config.server.data_dir)?;
            for chunk in examples.chunks(batch) {
                let ack = store.put_examples(chunk)?;
                inserted += ack.inserted;
                duplicates += ack.duplicates;
                bar.inc(chunk.len() as u64);
            }
        }
        Some(server) => runtime()?.block_on(async {
            let client = client()?;
            let url = format!("{}/v1/examples", server.trim_end_matches('/'));
            for chunk in examples.chunks(batch) {
                let body: Vec<Json> = chunk
                    .iter()
                    .map(|e| {
                        serde_json::json!({"id": e.id, "features": e.features, "label": e.label, "event_time": to_rfc3339(e.event_time)})
                    })
                    .collect();
                let response = client.post(&url).json(&body).send().await?;
                let status = response.status();
                let reply: Json = response.json().await?;
                if !status.is_success() {
                    bail!("{status}: {}", reply["detail"].as_str().unwrap_or("request failed"));
                }
                inserted += reply["inserted"].as_u64().unwrap_or(0) as usize;
                duplicates += reply["duplicates"].as_u64().unwrap_or(0) as usize;
                bar.inc(chunk.len() as u64);
            }
            Ok::<_, anyhow::Error>(())
        })?,
    }
    bar.finish();
    println!(
        "imported {inserted} examples ({duplicates} already present) from {}",
        file.display()
    );
    Ok(())
}
