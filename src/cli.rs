//! The command line: what the user typed, validated, then handed to the library.
//!
//! `serve` runs the service; `init` writes a starter config; `demo` runs the whole loop on
//! invented data; `import` loads labeled rows from a CSV; `train` runs one run offline on a CSV;
//! `log` prints the promotion log from a store on disk or from a running server; `export`
//! writes a model as PMML 4.4 from either, or from a model file; `status`,
//! `models`, `retrain`, `rollback`, `freeze` and `unfreeze` talk to a running server.
//!
//! Exit statuses say what kind of thing went wrong (the README's table): [`exit_status`].

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{bail, Context};
use clap::{Args, Parser, Subcommand};
use indicatif::{ProgressBar, ProgressStyle};
use serde_json::{Map, Value as Json};

use crate::app::{self, Service};
use crate::client::{ApiClient, ClientError, RetryPolicy};
use crate::config::{Config, ConfigError, DEFAULT_CONFIG_TOML};
use crate::guess::GuessError;
use crate::ingest;
use crate::learn::Example;
use crate::promotion::Entry;
use crate::schema::{FeatureKind, FieldError, Row, Schema, Value};
use crate::store::{SledStore, Store, StoredExample};
use crate::time::to_rfc3339;
use crate::time::Millis;

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

/// Where a running server is, and the key to call it with.
#[derive(Args)]
struct Remote {
    /// The server's base URL.
    #[arg(
        long,
        env = "UNDERSTUDY_SERVER",
        default_value = "http://127.0.0.1:8080"
    )]
    server: String,
    /// API key (sent as a bearer token).
    #[arg(long, env = "UNDERSTUDY_KEY", hide_env_values = true)]
    key: Option<String>,
    /// PEM file of a certificate authority (or a self-signed certificate) to trust for an
    /// https:// server, beside the public roots.
    #[arg(long, env = "UNDERSTUDY_CA_CERT")]
    ca_cert: Option<PathBuf>,
    /// Print the server's JSON instead of text.
    #[arg(long)]
    json: bool,
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
    /// Write a commented starter config to edit: the demo scenario, or one guessed from a CSV
    /// of your own labeled rows (--from-csv).
    Init {
        #[arg(default_value = "understudy.toml")]
        path: PathBuf,
        /// Overwrite an existing file.
        #[arg(long)]
        force: bool,
        /// Guess the label, the event time and the features (kinds, bounds, categories) from
        /// this CSV, print the guess and write it as the config.
        #[arg(long, value_name = "FILE")]
        from_csv: Option<PathBuf>,
        /// The CSV's label column (default: a column named label, outcome, target or y, else
        /// a column of 0s and 1s).
        #[arg(long, value_name = "NAME", requires = "from_csv")]
        label: Option<String>,
    },
    /// Run the whole loop on invented data: score, outcomes, retrain, gate, log.
    Demo {
        /// Keep the demo's store here (default: a temporary dir removed afterwards).
        #[arg(long)]
        data: Option<PathBuf>,
        /// Seed of the invented data.
        #[arg(long, default_value_t = 7)]
        seed: u64,
        /// Instead of running the demo, write this many invented labeled invoices (one a
        /// minute, ending now) as a CSV to --write-csv, to try `init --from-csv` and `import` on.
        #[arg(long, value_name = "FILE")]
        write_csv: Option<PathBuf>,
        #[arg(long, default_value_t = 2000, requires = "write_csv")]
        rows: usize,
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
        /// API key for the server (sent as a bearer token).
        #[arg(long, env = "UNDERSTUDY_KEY", hide_env_values = true)]
        key: Option<String>,
        /// PEM certificate authority to trust for an https:// server.
        #[arg(long, env = "UNDERSTUDY_CA_CERT")]
        ca_cert: Option<PathBuf>,
    },
    /// Run one retraining run offline on a CSV of labeled rows (no server, no store) and print
    /// its record.
    Train {
        #[arg(long, env = "UNDERSTUDY_CONFIG")]
        config: Option<PathBuf>,
        /// CSV of labeled rows: feature columns, the label column, event_time, optional id.
        /// (`--data FILE` is still accepted.)
        #[arg(long = "csv", alias = "data", value_name = "FILE")]
        csv: PathBuf,
        /// Print the run record as JSON.
        #[arg(long)]
        json: bool,
        /// Write the fitted model, its coefficients and the cross-validation table here.
        #[arg(long)]
        model_out: Option<PathBuf>,
    },
    /// Write a model as a PMML 4.4 document (linear, logistic, decision tree, random forest),
    /// with its preprocessing and the config's missing-value rules.
    Export {
        /// The config the model is served under (its missing rules and bounds go into the
        /// document).
        #[arg(long, env = "UNDERSTUDY_CONFIG")]
        config: Option<PathBuf>,
        /// Read the model from this data dir (the server must not be running on it).
        #[arg(long, env = "UNDERSTUDY_DATA")]
        data: Option<PathBuf>,
        /// Ask a running server instead (e.g. http://127.0.0.1:8080).
        #[arg(long, env = "UNDERSTUDY_SERVER")]
        server: Option<String>,
        /// API key for the server (sent as a bearer token).
        #[arg(long, env = "UNDERSTUDY_KEY", hide_env_values = true)]
        key: Option<String>,
        /// Export the model in this file, written by `understudy train --model-out`.
        #[arg(long, conflicts_with_all = ["server", "model"])]
        model_file: Option<PathBuf>,
        /// The model's id (default: the active model).
        #[arg(long)]
        model: Option<String>,
        /// Write the document here instead of to stdout.
        #[arg(long, short)]
        out: Option<PathBuf>,
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
        /// API key for the server (sent as a bearer token).
        #[arg(long, env = "UNDERSTUDY_KEY", hide_env_values = true)]
        key: Option<String>,
        /// PEM certificate authority to trust for an https:// server.
        #[arg(long, env = "UNDERSTUDY_CA_CERT")]
        ca_cert: Option<PathBuf>,
        /// Print JSON instead of a table.
        #[arg(long)]
        json: bool,
        /// Newest entries to show.
        #[arg(long, default_value_t = 50)]
        limit: usize,
        /// Only entries at or after this time (RFC 3339, e.g. 2026-12-01T00:00:00Z).
        #[arg(long)]
        since: Option<String>,
    },
    /// A running server at a glance: active model, freeze, candidate, last run, drift.
    Status {
        #[command(flatten)]
        remote: Remote,
    },
    /// The models a running server holds.
    Models {
        #[command(flatten)]
        remote: Remote,
    },
    /// Start a run on a running server and wait for its verdict.
    Retrain {
        #[command(flatten)]
        remote: Remote,
        /// Return as soon as the run is queued.
        #[arg(long)]
        no_wait: bool,
    },
    /// Make the previous active model (or --to ID) active again.
    Rollback {
        #[command(flatten)]
        remote: Remote,
        #[arg(long)]
        to: Option<String>,
    },
    /// Freeze promotions: runs still train and log, nothing new becomes active.
    Freeze {
        #[command(flatten)]
        remote: Remote,
    },
    /// Let promotions through again.
    Unfreeze {
        #[command(flatten)]
        remote: Remote,
    },
}

/// Entry point of the binary.
pub fn main() -> ExitCode {
    let cli = Cli::parse();
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            ExitCode::from(exit_status(&e))
        }
    }
}

/// A command line that asks for something impossible (a file that exists without --force, a
/// time that is not one); it exits with [`exit::USAGE`].
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct UsageError(pub String);

/// A data file that cannot be opened; it exits with [`exit::DATA`].
#[derive(Debug, thiserror::Error)]
#[error("cannot open {path}: {reason}")]
pub struct OpenError {
    pub path: String,
    pub reason: String,
}

fn open_data(path: &Path) -> Result<std::fs::File, OpenError> {
    std::fs::File::open(path).map_err(|e| OpenError {
        path: path.display().to_string(),
        reason: e.to_string(),
    })
}

/// The exit statuses (the README's table). clap exits with 2 on arguments it cannot parse.
pub mod exit {
    /// The command ran and failed: a run rejected or failed, a store that cannot be opened.
    pub const FAILURE: u8 = 1;
    /// The command line or the config file is wrong.
    pub const USAGE: u8 = 2;
    /// The server could not be reached, or refused the request.
    pub const SERVER: u8 = 3;
    /// The data is refused: a CSV that cannot be read, has bad rows, or gives no guess.
    pub const DATA: u8 = 4;
}

/// The exit status for an error: the first cause in its chain that says what kind it is.
pub fn exit_status(error: &anyhow::Error) -> u8 {
    for cause in error.chain() {
        if cause.is::<ConfigError>() || cause.is::<UsageError>() {
            return exit::USAGE;
        }
        if let Some(client) = cause.downcast_ref::<ClientError>() {
            return match client {
                ClientError::CaCertificate { .. } => exit::USAGE,
                _ => exit::SERVER,
            };
        }
        if cause.is::<CsvError>() || cause.is::<GuessError>() || cause.is::<OpenError>() {
            return exit::DATA;
        }
    }
    exit::FAILURE
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
    // Colours only for a person at a terminal (and not when NO_COLOR is set, no-color.org).
    use std::io::IsTerminal;
    let ansi = std::io::stderr().is_terminal() && std::env::var_os("NO_COLOR").is_none();
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(ansi)
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
        Command::Init {
            path,
            force,
            from_csv,
            label,
        } => {
            if path.exists() && !force {
                return Err(UsageError(format!(
                    "{} exists; pass --force to overwrite it",
                    path.display()
                ))
                .into());
            }
            if let Some(csv) = from_csv {
                return init_from_csv(&path, &csv, label.as_deref());
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
        Command::Demo {
            write_csv: Some(path),
            seed,
            rows,
            ..
        } => {
            use rand::SeedableRng;
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
            let start = crate::time::now_ms() - rows as i64 * 60_000;
            let text = crate::demo::scenario::labeled_csv(&mut rng, rows, start);
            std::fs::write(&path, text).with_context(|| format!("writing {}", path.display()))?;
            emit(&format!(
                "wrote {rows} invented labeled invoices to {}\n",
                path.display()
            ))
        }
        Command::Demo { data, seed, .. } => {
            init_logging(false, "warn");
            runtime()?.block_on(crate::demo::run(data, seed))
        }
        Command::Import {
            file,
            config,
            data,
            server,
            key,
            ca_cert,
        } => {
            let mut config = load_config(config.as_deref())?;
            if let Some(data) = data {
                config.server.data_dir = data;
            }
            let remote = server
                .map(|server| ApiClient::with_ca_cert(&server, key, ca_cert.as_deref()))
                .transpose()?;
            import(&file, &config, remote.as_ref())
        }
        command @ (Command::Status { .. }
        | Command::Models { .. }
        | Command::Retrain { .. }
        | Command::Rollback { .. }
        | Command::Freeze { .. }
        | Command::Unfreeze { .. }) => remote(command),
        Command::Train {
            config,
            csv,
            json,
            model_out,
        } => {
            let config = load_config(config.as_deref())?;
            train(&config, &csv, json, model_out.as_deref())
        }
        Command::Export {
            config,
            data,
            server,
            key,
            model_file,
            model,
            out,
        } => {
            let mut config = load_config(config.as_deref())?;
            if let Some(data) = data {
                config.server.data_dir = data;
            }
            let source = match (model_file, server) {
                (Some(file), _) => ExportSource::File(file),
                (None, Some(server)) => ExportSource::Server { server, key },
                (None, None) => ExportSource::Store,
            };
            export(&config, source, model.as_deref(), out.as_deref())
        }
        Command::Log {
            config,
            data,
            server,
            key,
            ca_cert,
            json,
            limit,
            since,
        } => {
            let mut config = load_config(config.as_deref())?;
            if let Some(data) = data {
                config.server.data_dir = data;
            }
            let since = since
                .map(|t| {
                    crate::time::parse_rfc3339(&t).ok_or_else(|| {
                        UsageError(format!(
                            "--since `{t}` is not an RFC 3339 time such as 2026-12-01T00:00:00Z"
                        ))
                    })
                })
                .transpose()?;
            let mut entries: Vec<Entry> = match server {
                Some(server) => {
                    let client = ApiClient::with_ca_cert(&server, key, ca_cert.as_deref())?;
                    let body = client.get(&format!("/v1/promotions?limit={limit}"))?;
                    serde_json::from_value(body["entries"].clone())?
                }
                None => SledStore::open(&config.server.data_dir)?.entries(limit)?,
            };
            if let Some(since) = since {
                entries.retain(|e| e.at >= since);
            }
            if json {
                emit(&format!("{}\n", serde_json::to_string_pretty(&entries)?))?;
            } else {
                emit(&crate::render::log_table(&entries))?;
            }
            Ok(())
        }
    }
}

/// `init --from-csv`: guess, check that the guess loads, write it, and say what was guessed.
fn init_from_csv(path: &Path, csv: &Path, label: Option<&str>) -> anyhow::Result<()> {
    let file = open_data(csv)?;
    let guess = crate::guess::guess(std::io::BufReader::new(file), label)
        .with_context(|| format!("guessing a config from {}", csv.display()))?;
    let text = guess.config_toml(&csv.display().to_string());
    // The guess only writes values the loader accepts; checked here all the same.
    let config = Config::from_toml(&text).context("the guessed config does not load")?;
    std::fs::write(path, &text).with_context(|| format!("writing {}", path.display()))?;
    let mut out = guess.summary();
    if guess.rows < config.training.min_rows {
        out.push_str(&format!(
            "note        {} rows: a run needs at least training.min_rows ({}) labeled rows\n",
            guess.rows, config.training.min_rows
        ));
    }
    out.push_str(&format!(
        "wrote {}; review it, then `understudy serve --config {}` and import the rows with \
         `understudy import {} --server http://{}`\n",
        path.display(),
        path.display(),
        csv.display(),
        config.server.listen
    ));
    emit(&out)
}

fn train(config: &Config, csv: &Path, json: bool, model_out: Option<&Path>) -> anyhow::Result<()> {
    let rows = read_csv_examples(csv, &config.schema())?;
    let run = crate::offline::train_examples(config, rows, 0);
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

/// Where `understudy export` finds the model.
enum ExportSource {
    /// The config's data dir (or `--data`).
    Store,
    Server {
        server: String,
        key: Option<String>,
    },
    /// A file written by `train --model-out`.
    File(PathBuf),
}

fn export(
    config: &Config,
    source: ExportSource,
    id: Option<&str>,
    out: Option<&Path>,
) -> anyhow::Result<()> {
    let schema = config.schema();
    let (model_id, document) = match source {
        ExportSource::Server { server, key } => {
            let client = ApiClient::new(&server, key)?;
            let id = match id {
                Some(id) => id.to_owned(),
                None => client.get("/v1/models")?["active"]
                    .as_str()
                    .context("the server has no active model; name one with --model ID")?
                    .to_owned(),
            };
            let document = client.get_text(&format!("/v1/models/{}/pmml", path_segment(&id)))?;
            (id, document)
        }
        ExportSource::Store | ExportSource::File(_) => {
            let model = match source {
                ExportSource::File(path) => {
                    let text = std::fs::read_to_string(&path)
                        .with_context(|| format!("reading {}", path.display()))?;
                    let file: Json = serde_json::from_str(&text)
                        .with_context(|| format!("{} is not JSON", path.display()))?;
                    serde_json::from_value::<crate::model::Model>(file["model"].clone())
                        .with_context(|| {
                            format!(
                                "{} is not a model file written by `understudy train --model-out` \
                                 (its `model` member does not read as a model)",
                                path.display()
                            )
                        })?
                }
                _ => {
                    let store = SledStore::open(&config.server.data_dir)?;
                    let id = match id {
                        Some(id) => id.to_owned(),
                        None => store.active_history()?.pop().with_context(|| {
                            format!(
                                "the store in {} has no active model; name one with --model ID",
                                config.server.data_dir.display()
                            )
                        })?,
                    };
                    store.model(&id)?.with_context(|| {
                        format!(
                            "no model with id `{id}` in {}",
                            config.server.data_dir.display()
                        )
                    })?
                }
            };
            let document = crate::model::pmml::to_pmml(&model, &schema)
                .with_context(|| format!("cannot export model {}", model.id))?;
            (model.id, document)
        }
    };
    match out {
        Some(path) => {
            std::fs::write(path, &document)
                .with_context(|| format!("writing {}", path.display()))?;
            eprintln!("wrote model {model_id} as PMML 4.4 to {}", path.display());
            Ok(())
        }
        None => emit(&document),
    }
}

/// A model id as one URL path segment.
fn path_segment(id: &str) -> String {
    id.bytes()
        .map(|b| match b {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'-' | b'_' | b'.' | b'~' => {
                (b as char).to_string()
            }
            b => format!("%{b:02X}"),
        })
        .collect()
}

fn remote(command: Command) -> anyhow::Result<()> {
    let (remote, json) = match &command {
        Command::Status { remote }
        | Command::Models { remote }
        | Command::Retrain { remote, .. }
        | Command::Rollback { remote, .. }
        | Command::Freeze { remote }
        | Command::Unfreeze { remote } => (remote, remote.json),
        _ => unreachable!("only remote commands come here"),
    };
    let client = ApiClient::with_ca_cert(
        &remote.server,
        remote.key.clone(),
        remote.ca_cert.as_deref(),
    )?;
    let print = |value: &Json, text: String| -> anyhow::Result<()> {
        if json {
            emit(&format!("{}\n", serde_json::to_string_pretty(value)?))
        } else {
            emit(&text)
        }
    };
    match command {
        Command::Status { .. } => {
            let models = client.get("/v1/models")?;
            let candidate = client.get("/v1/candidate")?;
            let log = client.get("/v1/promotions?limit=1")?;
            // No active model yet means no drift report: that is a state, not a failure.
            let drift = match client.get("/v1/drift") {
                Ok(drift) => drift,
                Err(ClientError::Refused { status: 503, .. }) => Json::Null,
                Err(e) => return Err(e.into()),
            };
            let status = serde_json::json!({
                "models": models, "candidate": candidate, "last": log["entries"][0], "drift": drift,
            });
            print(&status, status_text(&status))
        }
        Command::Models { .. } => {
            let models = client.get("/v1/models")?;
            print(&models, models_text(&models))
        }
        Command::Retrain { no_wait, .. } => {
            let run = client.post("/v1/retrain", &serde_json::json!({}))?;
            let run_id = run["run_id"].as_str().unwrap_or_default().to_owned();
            if no_wait {
                return print(&run, format!("run {run_id} queued\n"));
            }
            let spinner = ProgressBar::new_spinner();
            spinner.set_message(format!("run {run_id}: queued"));
            spinner.enable_steady_tick(std::time::Duration::from_millis(120));
            let finished = loop {
                std::thread::sleep(std::time::Duration::from_millis(500));
                let status = client.get(&format!("/v1/runs/{run_id}"))?;
                let state = status["run"]["state"].as_str().unwrap_or("?").to_owned();
                spinner.set_message(format!("run {run_id}: {state}"));
                if state == "finished" {
                    break status;
                }
            };
            spinner.finish_and_clear();
            let entry = &finished["entry"];
            print(
                &finished,
                format!(
                    "run {run_id}: {} ({})\n",
                    entry["verdict"].as_str().unwrap_or("?"),
                    entry["reason"].as_str().unwrap_or("")
                ),
            )?;
            if entry["verdict"] == "failed" {
                bail!("run {run_id} failed");
            }
            Ok(())
        }
        Command::Rollback { to, .. } => {
            let body = match to {
                Some(to) => serde_json::json!({ "to": to }),
                None => serde_json::json!({}),
            };
            let reply = client.post("/v1/rollback", &body)?;
            let text = format!(
                "{}\n",
                reply["entry"]["reason"].as_str().unwrap_or("rolled back")
            );
            print(&reply, text)
        }
        Command::Freeze { .. } => {
            let reply = client.post("/v1/freeze", &serde_json::json!({}))?;
            let text = format!(
                "promotions frozen since {}\n",
                reply["since"].as_str().unwrap_or("?")
            );
            print(&reply, text)
        }
        Command::Unfreeze { .. } => {
            let reply = client.post("/v1/unfreeze", &serde_json::json!({}))?;
            print(&reply, "promotions unfrozen\n".to_owned())
        }
        _ => unreachable!("only remote commands come here"),
    }
}

/// The `status` command's text: one line per part.
fn status_text(status: &Json) -> String {
    use std::fmt::Write;
    let mut out = String::new();
    let models = &status["models"];
    let active_id = models["active"].as_str();
    let active = models["models"]
        .as_array()
        .and_then(|list| list.iter().find(|m| m["active"] == true));
    match (active_id, active) {
        (Some(id), Some(model)) => {
            let setting = serde_json::from_value::<crate::model::Setting>(model["setting"].clone())
                .map(|s| s.to_string())
                .unwrap_or_default();
            let holdout = model["holdout"]
                .as_object()
                .map(|h| {
                    ["auc", "log_loss", "rmse", "mae"]
                        .iter()
                        .filter_map(|k| {
                            h.get(*k)
                                .and_then(Json::as_f64)
                                .map(|v| format!("{k} {v:.4}"))
                        })
                        .collect::<Vec<_>>()
                        .join(", ")
                })
                .unwrap_or_default();
            let _ = writeln!(
                out,
                "active model  {id}  {setting}  holdout {holdout}  created {}",
                model["created_at"].as_str().unwrap_or("?")
            );
        }
        _ => out.push_str("active model  none yet\n"),
    }
    if models["frozen"] == true {
        let _ = writeln!(
            out,
            "promotions    frozen since {}",
            models["frozen_since"].as_str().unwrap_or("?")
        );
    } else {
        out.push_str("promotions    not frozen\n");
    }
    let candidate = &status["candidate"];
    match candidate["candidate"]["id"].as_str() {
        Some(id) => {
            let _ = writeln!(
                out,
                "candidate     {id} shadowing: {} of {} outcomes since {}",
                candidate["outcomes"],
                candidate["needed"],
                candidate["candidate"]["since"].as_str().unwrap_or("?")
            );
        }
        None => out.push_str("candidate     none shadowing\n"),
    }
    let last = &status["last"];
    if last.is_null() {
        out.push_str("last run      none yet\n");
    } else {
        let _ = writeln!(
            out,
            "last run      {} {} {} → {}: {}",
            last["run_id"].as_str().unwrap_or("?"),
            last["at"].as_str().unwrap_or("?"),
            last["trigger"].as_str().unwrap_or("?"),
            last["verdict"].as_str().unwrap_or("?"),
            last["reason"].as_str().unwrap_or("")
        );
    }
    let drift = &status["drift"]["drift"];
    match drift["features"].as_array() {
        Some(features) => {
            let band = |name: &str| {
                features
                    .iter()
                    .filter(|f| f["band"] == name)
                    .map(|f| {
                        format!(
                            "{} {:.3}",
                            f["name"].as_str().unwrap_or("?"),
                            f["psi"].as_f64().unwrap_or(0.0)
                        )
                    })
                    .collect::<Vec<_>>()
            };
            let (act, watch) = (band("act"), band("watch"));
            let _ = writeln!(
                out,
                "drift         {} requests: act [{}], watch [{}], score {}",
                drift["window"]["rows"],
                act.join(", "),
                watch.join(", "),
                drift["score"]["band"].as_str().unwrap_or("-")
            );
        }
        None => out.push_str("drift         no report (no active model, or it predates drift)\n"),
    }
    out
}

/// The `models` command's text: one line per model, the active one marked.
fn models_text(models: &Json) -> String {
    use std::fmt::Write;
    let mut out = String::new();
    let list = models["models"].as_array().cloned().unwrap_or_default();
    if list.is_empty() {
        return "(no models yet)\n".to_owned();
    }
    for model in list {
        let setting = serde_json::from_value::<crate::model::Setting>(model["setting"].clone())
            .map(|s| s.to_string())
            .unwrap_or_default();
        let _ = writeln!(
            out,
            "{} {:<20} {:<24} {}",
            if model["active"] == true { "*" } else { " " },
            model["id"].as_str().unwrap_or("?"),
            model["created_at"].as_str().unwrap_or("?"),
            setting
        );
    }
    out
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
            active_model = service.api.registry.active_id().as_deref().unwrap_or("none"),
            "understudy serving"
        );
        app::serve(listener, service, app::shutdown_signal()).await?;
        Ok(())
    })
}

/// Reads labeled rows from a CSV file (the label's column, `event_time`, declared features,
/// optionally `id`); every row goes through `ingest`, so it accepts and refuses what
/// `POST /v1/examples` does. Any bad row refuses the whole file.
pub fn read_csv(path: &Path, schema: &Schema) -> anyhow::Result<Vec<StoredExample>> {
    let file = open_data(path)?;
    Ok(read_csv_from(file, &path.display().to_string(), schema)?)
}

/// Why a CSV of labeled rows was refused; nothing from it is kept.
#[derive(Debug, thiserror::Error)]
pub enum CsvError {
    #[error("reading {source_name}: {source}")]
    Read {
        source_name: String,
        source: csv::Error,
    },
    #[error("{source_name}: the header's column `{column}` {rule}")]
    Header {
        source_name: String,
        column: String,
        rule: String,
    },
    #[error("{} problems in {source_name}, nothing imported:\n  {}", .problems.len(), shown(.problems))]
    Rows {
        source_name: String,
        problems: Vec<CsvProblem>,
    },
}

/// One broken rule on one line: `row` for the row as a whole (its column count, its
/// encoding), else the field as the API names it (`features.days_to_due`, `label`).
#[derive(Debug, Clone, PartialEq)]
pub struct CsvProblem {
    pub line: u64,
    pub field: String,
    pub rule: String,
}

/// The first 20 problems, one a line.
fn shown(problems: &[CsvProblem]) -> String {
    problems
        .iter()
        .take(20)
        .map(|p| format!("line {}: `{}`: {}", p.line, p.field, p.rule))
        .collect::<Vec<_>>()
        .join("\n  ")
}

/// [`read_csv`] over any reader; `source_name` names it in errors. Each row is validated
/// straight from its cells into schema order ([`read_csv_rows`]); the named map the store keeps
/// is built only for rows that passed.
pub fn read_csv_from(
    input: impl std::io::Read,
    source_name: &str,
    schema: &Schema,
) -> Result<Vec<StoredExample>, CsvError> {
    let mut examples = Vec::new();
    read_csv_rows(input, source_name, schema, |layout, row| {
        // The map holds every feature column of the header: an empty cell as `null` (whatever
        // the feature's missing rule made of it in the row), a number as read, a category as
        // its text.
        let mut features = Map::new();
        for &(c, j) in &layout.feature_columns {
            let cell = row.record[c].trim();
            let value = match (row.row.0[j], cell) {
                (_, "") => Json::Null,
                (Value::Number(v), _) => {
                    serde_json::Number::from_f64(v).map_or(Json::Null, Json::Number)
                }
                _ => Json::String(cell.to_owned()),
            };
            features.insert(layout.headers[c].clone(), value);
        }
        examples.push(StoredExample {
            id: row
                .id
                .map_or_else(|| ulid::Ulid::new().to_string(), str::to_owned),
            event_time: row.event_time,
            label: row.label,
            features,
        });
    })?;
    Ok(examples)
}

/// Reads labeled rows from a CSV file straight into the rows a run reads, in schema order, with
/// no named map per row: what `understudy train` uses. It accepts and refuses exactly what
/// [`read_csv`] does, with the same messages. A row without an `id` gets an empty one (a run
/// never reads ids).
pub fn read_csv_examples(path: &Path, schema: &Schema) -> anyhow::Result<Vec<Example>> {
    let file = std::fs::File::open(path).with_context(|| format!("opening {}", path.display()))?;
    Ok(read_csv_examples_from(
        file,
        &path.display().to_string(),
        schema,
    )?)
}

/// [`read_csv_examples`] over any reader; `source_name` names it in errors.
pub fn read_csv_examples_from(
    input: impl std::io::Read,
    source_name: &str,
    schema: &Schema,
) -> Result<Vec<Example>, CsvError> {
    let mut examples = Vec::new();
    read_csv_rows(input, source_name, schema, |_, row| {
        examples.push(Example {
            id: row.id.map(str::to_owned).unwrap_or_default(),
            event_time: row.event_time,
            row: row.row,
            label: row.label,
        })
    })?;
    Ok(examples)
}

/// Where a CSV's columns go.
struct CsvLayout {
    headers: Vec<String>,
    /// `(column, feature)` for each declared feature the header names, in header order.
    feature_columns: Vec<(usize, usize)>,
}

/// One valid row of a CSV: its features validated into schema order, and its cells.
struct CsvRow<'r> {
    id: Option<&'r str>,
    event_time: Millis,
    label: f64,
    row: Row,
    record: &'r csv::StringRecord,
}

/// One cell of a declared feature's column, read by its kind.
#[derive(Clone, Copy)]
enum Cell {
    /// The column is absent or the cell is empty.
    Empty,
    Number(f64),
    /// A category column's cell, by its column.
    Text(usize),
    /// A number column's cell that is no finite number; its error is already reported.
    Unreadable,
}

/// The one CSV reader: checks the header, then validates each row cell by cell into schema
/// order and hands every valid row to `keep`. Any bad row refuses the whole file, with every
/// problem named by line and field as `POST /v1/examples` names it: per row, unreadable
/// number cells (in header order), an unreadable label, then the features' own rules (in
/// schema order), the label's rule, the event time and the id ([`ingest`]'s checks).
fn read_csv_rows(
    input: impl std::io::Read,
    source_name: &str,
    schema: &Schema,
    mut keep: impl FnMut(&CsvLayout, CsvRow<'_>),
) -> Result<(), CsvError> {
    let mut reader = csv::Reader::from_reader(input);
    let read_error = |source| CsvError::Read {
        source_name: source_name.to_owned(),
        source,
    };
    let header_error = |column: &str, rule: String| CsvError::Header {
        source_name: source_name.to_owned(),
        // An empty column name is shown as `""`, so the error still names it.
        column: if column.is_empty() {
            "\"\"".to_owned()
        } else {
            clip(column)
        },
        rule,
    };
    let headers: Vec<String> = reader
        .headers()
        .map_err(read_error)?
        .iter()
        .map(str::to_owned)
        .collect();
    for (i, h) in headers.iter().enumerate() {
        if headers[..i].contains(h) {
            return Err(header_error(
                h,
                "appears twice; give each column once".into(),
            ));
        }
    }
    let label_col = headers.iter().position(|h| h == schema.label());
    let time_col = headers.iter().position(|h| h == "event_time");
    let id_col = headers.iter().position(|h| h == "id");
    let (Some(label_col), Some(time_col)) = (label_col, time_col) else {
        let missing = if label_col.is_none() {
            schema.label()
        } else {
            "event_time"
        };
        return Err(header_error(
            missing,
            format!(
                "is missing; the header needs a `{}` column (the label) and an `event_time` column",
                schema.label()
            ),
        ));
    };
    let features = schema.features();
    let mut feature_columns = Vec::new();
    for (i, h) in headers.iter().enumerate() {
        if i == label_col || i == time_col || Some(i) == id_col {
            continue;
        }
        match features.iter().position(|f| &f.name == h) {
            Some(j) => feature_columns.push((i, j)),
            None => {
                return Err(header_error(
                    h,
                    "is not a declared feature, the label, `event_time` or `id`".into(),
                ))
            }
        }
    }
    let layout = CsvLayout {
        headers,
        feature_columns,
    };
    let mut problems: Vec<CsvProblem> = Vec::new();
    let mut record = csv::StringRecord::new();
    let mut cells: Vec<Cell> = Vec::with_capacity(features.len());
    let mut last_line = 1;
    loop {
        let line = last_line + 1;
        match reader.read_record(&mut record) {
            Ok(false) => break,
            Ok(true) => {}
            Err(e) => {
                let line = e.position().map_or(line, csv::Position::line);
                last_line = line;
                let rule = match e.kind() {
                    csv::ErrorKind::UnequalLengths {
                        expected_len, len, ..
                    } => format!(
                        "has {len} columns; the header has {expected_len} (one value per column)"
                    ),
                    csv::ErrorKind::Utf8 { .. } => "must be UTF-8 text".to_owned(),
                    _ => return Err(read_error(e)),
                };
                problems.push(CsvProblem {
                    line,
                    field: "row".into(),
                    rule,
                });
                continue;
            }
        }
        let line = record.position().map_or(line, csv::Position::line);
        last_line = line;
        let mut errors: Vec<FieldError> = Vec::new();
        // The cells, each read by its feature's kind, in header order (so unreadable numbers
        // are reported in the order of the file's columns).
        cells.clear();
        cells.resize(features.len(), Cell::Empty);
        for &(c, j) in &layout.feature_columns {
            cells[j] = match (features[j].kind, record[c].trim()) {
                (_, "") => Cell::Empty,
                (FeatureKind::Number, text) => match text.parse::<f64>() {
                    Ok(v) if v.is_finite() => Cell::Number(v),
                    _ => {
                        errors.push(FieldError {
                            field: format!("features.{}", layout.headers[c]),
                            rule: format!("must be a finite number, got `{}`", clip(text)),
                        });
                        Cell::Unreadable
                    }
                },
                (FeatureKind::Category, _) => Cell::Text(c),
            };
        }
        let label_text = record[label_col].trim();
        let label = match label_text.parse::<f64>() {
            Ok(value) => Some(value),
            Err(_) => {
                errors.push(FieldError {
                    field: "label".into(),
                    rule: format!("must be a number, got `{}`", clip(label_text)),
                });
                None
            }
        };
        // Each feature's own rules, in schema order; an unreadable cell's error is the one
        // already reported, not the "required" its absence would cause.
        let mut row = Vec::with_capacity(features.len());
        for (feature, cell) in features.iter().zip(&cells) {
            let value = match *cell {
                Cell::Empty => feature.when_missing(),
                Cell::Number(v) => feature.number(v),
                Cell::Text(c) => feature.category(record[c].trim()),
                Cell::Unreadable => Ok(Value::Missing),
            };
            row.push(value.unwrap_or_else(|rule| {
                errors.push(FieldError {
                    field: format!("features.{}", feature.name),
                    rule,
                });
                Value::Missing
            }));
        }
        let id = id_col.map(|c| record[c].trim()).filter(|s| !s.is_empty());
        let event_time =
            ingest::check_beside_features(schema, label, record[time_col].trim(), id, &mut errors);
        if errors.is_empty() {
            keep(
                &layout,
                CsvRow {
                    id,
                    event_time,
                    label: label.unwrap_or_default(),
                    row: Row(row),
                    record: &record,
                },
            );
        }
        problems.extend(errors.into_iter().map(|e| CsvProblem {
            line,
            field: e.field,
            rule: e.rule,
        }));
    }
    if !problems.is_empty() {
        return Err(CsvError::Rows {
            source_name: source_name.to_owned(),
            problems,
        });
    }
    Ok(())
}

/// A cell's text cut for an error message.
fn clip(text: &str) -> String {
    crate::text::clip(text, crate::text::ECHO_CHARS)
}

fn progress(len: usize) -> ProgressBar {
    let bar = ProgressBar::new(len as u64);
    bar.set_style(
        ProgressStyle::with_template("{bar:40} {pos}/{len} rows {per_sec} {eta}")
            .unwrap_or_else(|_| ProgressStyle::default_bar()),
    );
    bar
}

/// Loads a CSV into a store on disk, or sends it to a server (`client`) in batches of
/// `server.max_batch`. A busy server's 503 is waited out as its `Retry-After` asks (bounded by
/// [`RetryPolicy`]): examples carry their ids, so a batch sent twice is stored once.
fn import(file: &Path, config: &Config, client: Option<&ApiClient>) -> anyhow::Result<()> {
    let schema = config.schema();
    let examples = read_csv(file, &schema)?;
    let batch = config.server.max_batch;
    let bar = progress(examples.len());
    let (mut inserted, mut duplicates) = (0usize, 0usize);
    match client {
        None => {
            let store = SledStore::open(&config.server.data_dir)?;
            for chunk in examples.chunks(batch) {
                let ack = store.put_examples(chunk)?;
                inserted += ack.inserted;
                duplicates += ack.duplicates;
                bar.inc(chunk.len() as u64);
            }
        }
        Some(client) => {
            for chunk in examples.chunks(batch) {
                let body: Vec<Json> = chunk
                    .iter()
                    .map(|e| {
                        serde_json::json!({"id": e.id, "features": e.features, "label": e.label, "event_time": to_rfc3339(e.event_time)})
                    })
                    .collect();
                let policy = RetryPolicy::default();
                let reply = client.post_retrying(
                    "/v1/examples",
                    &Json::Array(body),
                    policy,
                    |attempt, wait, why| {
                        bar.suspend(|| {
                            eprintln!(
                                "{why}; retrying in {} ms (attempt {} of {})",
                                wait.as_millis(),
                                attempt + 1,
                                policy.attempts
                            )
                        })
                    },
                )?;
                inserted += reply["inserted"].as_u64().unwrap_or(0) as usize;
                duplicates += reply["duplicates"].as_u64().unwrap_or(0) as usize;
                bar.inc(chunk.len() as u64);
            }
        }
    }
    bar.finish();
    println!(
        "imported {inserted} examples ({duplicates} already present) from {}",
        file.display()
    );
    Ok(())
}

/// The CSV importer under generated files: valid files load row for row, one broken rule is
/// reported on its line under its field, and no text makes it panic.
#[cfg(test)]
mod csv_properties {
    use super::*;
    use crate::demo::scenario::{invoice, Regime};
    use crate::time::{now_ms, to_rfc3339};
    use proptest::prelude::*;
    use proptest::test_runner::Config as Cases;
    use rand::SeedableRng;

    const CASES: u32 = 256;
    const HEADER: &str = "id,event_time,invoice_amount,days_to_due,debtor_years_trading,\
        prior_late_invoices,credit_utilisation,debtor_sector,submission_channel,paid_late";

    /// The embedded schema, built once (loading the config dominates a case's time).
    fn schema() -> &'static Schema {
        static SCHEMA: std::sync::OnceLock<Schema> = std::sync::OnceLock::new();
        SCHEMA.get_or_init(|| Config::embedded_default().schema())
    }

    /// `rows` rows of the invented scenario as CSV lines (no header), with their labels.
    fn scenario_lines(seed: u64, rows: usize) -> Vec<(String, u8)> {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let start = now_ms() - 90 * 24 * 3600 * 1000;
        (0..rows)
            .map(|i| {
                let inv = invoice(&mut rng, Regime::Before);
                let cell = |k: &str| match inv.features.get(k) {
                    Some(Json::String(s)) => s.clone(),
                    Some(Json::Number(n)) => n.to_string(),
                    _ => String::new(),
                };
                let label = inv.draw_label(&mut rng);
                let line = format!(
                    "r{i},{},{},{},{},{},{},{},{},{label}",
                    to_rfc3339(start + i as i64 * 60_000),
                    cell("invoice_amount"),
                    cell("days_to_due"),
                    cell("debtor_years_trading"),
                    cell("prior_late_invoices"),
                    cell("credit_utilisation"),
                    cell("debtor_sector"),
                    cell("submission_channel"),
                );
                (line, label)
            })
            .collect()
    }

    fn file(lines: &[String]) -> String {
        format!("{HEADER}\n{}\n", lines.join("\n"))
    }

    fn problems(text: &str) -> Vec<CsvProblem> {
        match read_csv_from(text.as_bytes(), "rows.csv", schema()) {
            Err(CsvError::Rows { problems, .. }) => problems,
            other => panic!("expected row problems, got {other:?}"),
        }
    }

    proptest! {
        #![proptest_config(Cases::with_cases(CASES))]

        #[test]
        fn a_valid_file_loads_every_row_as_written(seed in any::<u64>(), rows in 1..40usize) {
            let lines = scenario_lines(seed, rows);
            let text = file(&lines.iter().map(|(l, _)| l.clone()).collect::<Vec<_>>());
            let examples = read_csv_from(text.as_bytes(), "rows.csv", schema()).unwrap();
            prop_assert_eq!(examples.len(), rows);
            for (i, (example, (_, label))) in examples.iter().zip(&lines).enumerate() {
                prop_assert_eq!(&example.id, &format!("r{i}"));
                prop_assert_eq!(example.label, f64::from(*label));
            }
        }

        #[test]
        fn a_row_with_the_wrong_column_count_is_named_by_line(
            seed in any::<u64>(),
            rows in 1..30usize,
            pick in any::<prop::sample::Index>(),
            change in prop_oneof![Just(-9i32), -3..0i32, 1..4i32],
        ) {
            let mut lines: Vec<String> =
                scenario_lines(seed, rows).into_iter().map(|(l, _)| l).collect();
            let at = pick.index(rows);
            let mut cells: Vec<&str> = lines[at].split(',').collect();
            if change < 0 {
                cells.truncate((10 + change) as usize);
            } else {
                cells.extend(std::iter::repeat_n("7", change as usize));
            }
            let expected = format!("has {} columns; the header has 10", cells.len());
            lines[at] = cells.join(",");
            let problems = problems(&file(&lines));
            prop_assert_eq!(problems.len(), 1, "{:?}", problems);
            prop_assert_eq!(problems[0].line, at as u64 + 2);
            prop_assert_eq!(problems[0].field.as_str(), "row");
            prop_assert!(problems[0].rule.starts_with(&expected), "{}", problems[0].rule);
        }

        #[test]
        fn one_bad_cell_is_named_by_line_and_field(
            seed in any::<u64>(),
            rows in 1..30usize,
            pick in any::<prop::sample::Index>(),
            (column, value, field, rule) in prop::sample::select(vec![
                (1, "9999-01-01T00:00:00Z", "event_time", "between"),
                (1, "0001-01-01T00:00:00Z", "event_time", "between"),
                (1, "1970-01-01T00:00:00Z", "event_time", "between"),
                (1, "yesterday", "event_time", "RFC 3339"),
                (2, "-5", "features.invoice_amount", ">= 0"),
                (2, "NaN", "features.invoice_amount", "finite number"),
                (2, "1e999", "features.invoice_amount", "finite number"),
                (3, "thirty", "features.days_to_due", "finite number"),
                (7, "mining", "features.debtor_sector", "unknown category"),
                (7, "", "features.debtor_sector", "required"),
                (9, "2", "label", "must be 0 or 1"),
                (9, "-1", "label", "must be 0 or 1"),
                (9, "0.5", "label", "must be 0 or 1"),
                (9, "true", "label", "must be a number"),
                (9, "", "label", "must be a number"),
            ]),
        ) {
            let mut lines: Vec<String> =
                scenario_lines(seed, rows).into_iter().map(|(l, _)| l).collect();
            let at = pick.index(rows);
            let mut cells: Vec<String> = lines[at].split(',').map(str::to_owned).collect();
            cells[column] = value.to_owned();
            lines[at] = cells.join(",");
            let problems = problems(&file(&lines));
            prop_assert_eq!(problems.len(), 1, "{:?}", problems);
            prop_assert_eq!(problems[0].line, at as u64 + 2);
            prop_assert_eq!(problems[0].field.as_str(), field);
            prop_assert!(problems[0].rule.contains(rule), "{}", problems[0].rule);
        }

        #[test]
        fn any_text_is_loaded_or_refused_naming_what_broke(
            body in prop_oneof![
                "\\PC{0,200}",
                prop::collection::vec(
                    prop::sample::select(vec![
                        ",", "\n", "\"", "paid_late", "event_time", "id", "invoice_amount",
                        "debtor_sector", "retail", "1", "0", "2026-06-01T00:00:00Z", "NaN", " ",
                        "\r\n", "é", "\u{0}",
                    ]),
                    0..60,
                ).prop_map(|p| p.concat()),
            ],
            with_header in any::<bool>(),
        ) {
            let text = if with_header { format!("{HEADER}\n{body}") } else { body };
            match read_csv_from(text.as_bytes(), "rows.csv", schema()) {
                Ok(_) => {}
                Err(CsvError::Rows { problems, .. }) => {
                    prop_assert!(!problems.is_empty());
                    for p in problems {
                        prop_assert!(p.line >= 2, "{:?}", p);
                        prop_assert!(!p.field.is_empty() && !p.rule.is_empty(), "{:?}", p);
                    }
                }
                Err(CsvError::Header { column, rule, .. }) => {
                    prop_assert!(!column.is_empty() && !rule.is_empty(), "{} {}", column, rule);
                }
                Err(CsvError::Read { source, .. }) => {
                    prop_assert!(!source.to_string().is_empty());
                }
            }
        }
    }

    /// The reader as it was before rows went straight into schema order: a named map per row,
    /// validated by `ingest::example` (kept here as the reference the new readers must match).
    fn read_csv_through_maps(
        input: impl std::io::Read,
        source_name: &str,
        schema: &Schema,
    ) -> Result<Vec<StoredExample>, CsvError> {
        let mut reader = csv::Reader::from_reader(input);
        let read_error = |source| CsvError::Read {
            source_name: source_name.to_owned(),
            source,
        };
        let header_error = |column: &str, rule: String| CsvError::Header {
            source_name: source_name.to_owned(),
            // An empty column name is shown as `""`, so the error still names it.
            column: if column.is_empty() {
                "\"\"".to_owned()
            } else {
                clip(column)
            },
            rule,
        };
        let headers: Vec<String> = reader
            .headers()
            .map_err(read_error)?
            .iter()
            .map(str::to_owned)
            .collect();
        for (i, h) in headers.iter().enumerate() {
            if headers[..i].contains(h) {
                return Err(header_error(
                    h,
                    "appears twice; give each column once".into(),
                ));
            }
        }
        let label_col = headers.iter().position(|h| h == schema.label());
        let time_col = headers.iter().position(|h| h == "event_time");
        let id_col = headers.iter().position(|h| h == "id");
        let (Some(label_col), Some(time_col)) = (label_col, time_col) else {
            let missing = if label_col.is_none() {
                schema.label()
            } else {
                "event_time"
            };
            return Err(header_error(
                missing,
                format!(
                    "is missing; the header needs a `{}` column (the label) and an `event_time` column",
                    schema.label()
                ),
            ));
        };
        let mut kinds: Vec<Option<FeatureKind>> = Vec::with_capacity(headers.len());
        for (i, h) in headers.iter().enumerate() {
            if i == label_col || i == time_col || Some(i) == id_col {
                kinds.push(None);
                continue;
            }
            match schema.features().iter().find(|f| &f.name == h) {
                Some(f) => kinds.push(Some(f.kind)),
                None => {
                    return Err(header_error(
                        h,
                        "is not a declared feature, the label, `event_time` or `id`".into(),
                    ))
                }
            }
        }
        let mut examples = Vec::new();
        let mut problems: Vec<CsvProblem> = Vec::new();
        let mut record = csv::StringRecord::new();
        let mut last_line = 1;
        loop {
            let line = last_line + 1;
            match reader.read_record(&mut record) {
                Ok(false) => break,
                Ok(true) => {}
                Err(e) => {
                    let line = e.position().map_or(line, csv::Position::line);
                    last_line = line;
                    let rule = match e.kind() {
                        csv::ErrorKind::UnequalLengths {
                            expected_len, len, ..
                        } => format!(
                            "has {len} columns; the header has {expected_len} (one value per column)"
                        ),
                        csv::ErrorKind::Utf8 { .. } => "must be UTF-8 text".to_owned(),
                        _ => return Err(read_error(e)),
                    };
                    problems.push(CsvProblem {
                        line,
                        field: "row".into(),
                        rule,
                    });
                    continue;
                }
            }
            let line = record.position().map_or(line, csv::Position::line);
            last_line = line;
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
                                rule: format!("must be a finite number, got `{}`", clip(text)),
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
                        rule: format!("must be a number, got `{}`", clip(record[label_col].trim())),
                    });
                    0.0
                }
            };
            let id = id_col.map(|c| record[c].trim()).filter(|s| !s.is_empty());
            // A cell that is no number was left out of the features; its error is the one to
            // report, not the "required" that its absence causes.
            let unreadable: Vec<String> = errors.iter().map(|e| e.field.clone()).collect();
            match ingest::example(schema, &features, label, record[time_col].trim(), id) {
                Ok(example) if errors.is_empty() => examples.push(example),
                Ok(_) => {}
                Err(e) => errors.extend(e.0.into_iter().filter(|e| !unreadable.contains(&e.field))),
            }
            problems.extend(errors.into_iter().map(|e| CsvProblem {
                line,
                field: e.field,
                rule: e.rule,
            }));
        }
        if !problems.is_empty() {
            return Err(CsvError::Rows {
                source_name: source_name.to_owned(),
                problems,
            });
        }
        Ok(examples)
    }

    proptest! {
        #![proptest_config(Cases::with_cases(CASES))]

        /// `train` reads rows straight into schema order and `import` keeps named maps: the
        /// same file gives what the map-per-row reader gave (the same maps, or the same rows
        /// as the API's rules make of those maps) or the same problems, word for word.
        #[test]
        fn both_readers_accept_and_refuse_what_the_map_per_row_reader_did(
            seed in any::<u64>(),
            rows in 1..20usize,
            edits in prop::collection::vec(
                (any::<prop::sample::Index>(), 1..10usize, prop::sample::select(vec![
                    "", "-5", "NaN", "1e999", "thirty", "mining", "retail", "2", "0.5", "x",
                    "yesterday", "1970-01-01T00:00:00Z", " 7 ",
                ])),
                0..4,
            ),
            drop_column in prop::option::of(2..9usize),
        ) {
            let mut lines: Vec<Vec<String>> = scenario_lines(seed, rows)
                .into_iter()
                .map(|(l, _)| l.split(',').map(str::to_owned).collect())
                .collect();
            for (pick, column, value) in edits {
                let at = pick.index(rows);
                lines[at][column] = value.to_owned();
            }
            let mut header: Vec<&str> = HEADER.split(',').collect();
            if let Some(c) = drop_column {
                header.remove(c);
                for line in &mut lines {
                    line.remove(c);
                }
            }
            let text = format!(
                "{}\n{}\n",
                header.join(","),
                lines.iter().map(|l| l.join(",")).collect::<Vec<_>>().join("\n")
            );
            let by_rows = read_csv_examples_from(text.as_bytes(), "rows.csv", schema());
            let by_maps = read_csv_from(text.as_bytes(), "rows.csv", schema());
            let before = read_csv_through_maps(text.as_bytes(), "rows.csv", schema());
            match (&by_maps, &before) {
                (Ok(stored), Ok(reference)) => {
                    prop_assert_eq!(stored.len(), reference.len());
                    for (s, r) in stored.iter().zip(reference) {
                        prop_assert_eq!(&s.features, &r.features);
                        prop_assert_eq!((s.event_time, s.label), (r.event_time, r.label));
                        prop_assert_eq!(&s.id, &r.id);
                    }
                }
                (Err(CsvError::Rows { problems: a, .. }), Err(CsvError::Rows { problems: b, .. })) => {
                    prop_assert_eq!(a, b);
                }
                (a, b) => prop_assert!(false, "maps {:?} but before {:?}", a, b),
            }
            match (by_rows, before) {
                (Ok(examples), Ok(stored)) => {
                    prop_assert_eq!(examples.len(), stored.len());
                    for (e, s) in examples.iter().zip(&stored) {
                        prop_assert_eq!(&e.id, &s.id);
                        prop_assert_eq!(e.event_time, s.event_time);
                        prop_assert_eq!(e.label, s.label);
                        prop_assert_eq!(Ok(e.row.clone()), schema().parse_row(&s.features));
                    }
                }
                (Err(CsvError::Rows { problems: a, .. }), Err(CsvError::Rows { problems: b, .. })) => {
                    prop_assert_eq!(a, b);
                }
                (Err(CsvError::Header { column: a, rule: r, .. }), Err(CsvError::Header { column: b, rule: s, .. })) => {
                    prop_assert_eq!((a, r), (b, s));
                }
                (a, b) => prop_assert!(false, "rows {:?} but maps {:?}", a.map(|v| v.len()), b.map(|v| v.len())),
            }
        }
    }

    #[test]
    fn a_column_given_twice_in_the_header_is_refused() {
        let text = format!("{HEADER},days_to_due\n");
        match read_csv_from(text.as_bytes(), "rows.csv", schema()) {
            Err(CsvError::Header { column, rule, .. }) => {
                assert_eq!(column, "days_to_due");
                assert!(rule.contains("twice"), "{rule}");
            }
            other => panic!("expected a header error, got {other:?}"),
        }
    }
}
