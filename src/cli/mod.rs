//! The command line: what the user typed, validated, then handed to the library.
//!
//! `serve` runs the service; `init` writes a starter config; `demo` runs the whole loop on
//! invented data; `import` loads labeled rows from a CSV; `train` runs one run offline on a CSV;
//! `log` prints the promotion log from a store on disk or from a running server; `export`
//! writes a model as PMML 4.4 from either, or from a model file; `status`,
//! `models`, `retrain`, `rollback`, `freeze` and `unfreeze` talk to a running server;
//! `store copy`, `store export`, `store import` and `store digest` move and check a whole store
//! (`store_cmd`).
//!
//! Exit statuses say what kind of thing went wrong (the README's table): [`exit_status`].

mod export;
mod remote;
mod store_cmd;

use export::{export, ExportSource};
use remote::remote;

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{bail, Context};
use clap::{Args, Parser, Subcommand};
use indicatif::{ProgressBar, ProgressStyle};
use serde_json::Value as Json;

use crate::app::{self, Service};
use crate::client::{ApiClient, ClientError, RetryPolicy};
use crate::config::{Config, ConfigError, DEFAULT_CONFIG_TOML};
use crate::guess::GuessError;
use crate::ingest::csv::{read_csv_examples_from, read_csv_from, CsvError};
use crate::learn::Example;
use crate::promotion::Entry;
use crate::schema::Schema;
use crate::store::transfer::TransferError;
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
        /// With --write-csv: the world changes after this many rows (the scenario's second
        /// regime), a history to try `backtest` on.
        #[arg(long, value_name = "ROW", requires = "write_csv")]
        change_at: Option<usize>,
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
        #[arg(
            long = "csv",
            alias = "data",
            value_name = "FILE",
            required_unless_present = "reproduce"
        )]
        csv: Option<PathBuf>,
        /// Instead of a CSV: re-run this logged run from the store, with the same rows, config
        /// and seed, and say whether its candidate comes out bit for bit the same (and if not,
        /// which input changed). Exits 1 when it does not.
        #[arg(long, value_name = "RUN_ID", conflicts_with_all = ["csv", "model_out"])]
        reproduce: Option<String>,
        /// The data dir (sled) to re-run from with --reproduce (default: the config's
        /// `server.data_dir`; a PostgreSQL store comes from `[store]`).
        #[arg(long = "data-dir", env = "UNDERSTUDY_DATA", value_name = "DIR")]
        data_dir: Option<PathBuf>,
        /// With --reproduce: ask a running server to re-fit the run from its store under its
        /// running config (e.g. http://127.0.0.1:8080; an operator key).
        #[arg(long, requires = "reproduce", conflicts_with = "data_dir")]
        server: Option<String>,
        /// API key for --server (sent as a bearer token).
        #[arg(
            long,
            env = "UNDERSTUDY_KEY",
            hide_env_values = true,
            requires = "server"
        )]
        key: Option<String>,
        /// PEM certificate authority to trust for an https:// --server.
        #[arg(long, env = "UNDERSTUDY_CA_CERT", requires = "server")]
        ca_cert: Option<PathBuf>,
        /// Print the run record as JSON.
        #[arg(long)]
        json: bool,
        /// Write the fitted model, its coefficients and the cross-validation table here.
        #[arg(long)]
        model_out: Option<PathBuf>,
    },
    /// Replay the configured retraining policy over a CSV of labeled history, against a model
    /// never retrained and one that always promotes the latest fit, with the service's own
    /// search and gate; prints each period's metrics, the promotions and the totals.
    Backtest {
        #[arg(long, env = "UNDERSTUDY_CONFIG")]
        config: Option<PathBuf>,
        /// CSV of labeled rows: feature columns, the label column, event_time, optional id.
        #[arg(long = "csv", value_name = "FILE")]
        csv: PathBuf,
        /// A step (a run may start, then the next period is scored) every this much event
        /// time, e.g. 1d or 12h. The default when --step-rows is not given: 1d.
        #[arg(long, value_name = "DURATION", conflicts_with = "step_rows")]
        step: Option<String>,
        /// A step every this many rows instead.
        #[arg(long, value_name = "N")]
        step_rows: Option<usize>,
        /// How long after its event time a row's label is known, e.g. 7d.
        #[arg(long, value_name = "DURATION", default_value = "0s")]
        label_delay: String,
        /// The first step (RFC 3339); earlier rows are history only. Default: the first row.
        #[arg(long, value_name = "TIME")]
        start: Option<String>,
        /// Rows each side of a change that judge it, and that judge a recovery.
        #[arg(long, value_name = "N", default_value_t = 2000)]
        recovery_rows: usize,
        /// Threads for the two policies that train: 1 or 2.
        #[arg(long, default_value_t = 2)]
        threads: usize,
        /// Print the report as JSON instead of a table.
        #[arg(long)]
        json: bool,
        /// Also write the report as a self-contained HTML page (an SVG chart, no scripts).
        #[arg(long, value_name = "FILE")]
        report: Option<PathBuf>,
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
        /// Write the whole log as JSON Lines, oldest first, one entry per line (for an archive
        /// or an audit; --limit does not apply, --since does).
        #[arg(long, conflicts_with = "json")]
        jsonl: bool,
        /// Write one run's whole evidence (every log entry of RUN_ID, both models' ROC
        /// curves) as one self-contained HTML page, for a committee pack or an audit file.
        #[arg(long, value_name = "RUN_ID", conflicts_with_all = ["json", "jsonl"])]
        evidence: Option<String>,
        /// Newest entries to show.
        #[arg(long, default_value_t = 50)]
        limit: usize,
        /// Only entries at or after this time (RFC 3339, e.g. 2026-12-01T00:00:00Z).
        #[arg(long)]
        since: Option<String>,
    },
    /// Move or check a whole store: copy it between sled and PostgreSQL, export it to JSON
    /// Lines, import it back, print its digests.
    Store {
        #[command(subcommand)]
        command: store_cmd::StoreCommand,
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
        /// Why, for the log (the key's name is recorded too).
        #[arg(long)]
        reason: Option<String>,
    },
    /// Make the previous active model (or --to ID) active again.
    Rollback {
        #[command(flatten)]
        remote: Remote,
        #[arg(long)]
        to: Option<String>,
        /// Why, for the log (the key's name is recorded too).
        #[arg(long)]
        reason: Option<String>,
    },
    /// Freeze promotions: runs still train and log, nothing new becomes active.
    Freeze {
        #[command(flatten)]
        remote: Remote,
        /// Why, for the log (the key's name is recorded too).
        #[arg(long)]
        reason: Option<String>,
    },
    /// Let promotions through again.
    Unfreeze {
        #[command(flatten)]
        remote: Remote,
        /// Why, for the log (the key's name is recorded too).
        #[arg(long)]
        reason: Option<String>,
    },
    /// Approve the candidate of RUN_ID that waits for sign-off (gate.sign_off): it is promoted,
    /// or starts shadowing when [shadow] outcomes is set.
    Approve {
        #[command(flatten)]
        remote: Remote,
        /// The run whose candidate waits (`status` shows it).
        run_id: String,
        /// Why (required; logged with the key's name).
        #[arg(long)]
        reason: String,
    },
    /// Decline the candidate of RUN_ID that waits for sign-off: it is never served.
    Decline {
        #[command(flatten)]
        remote: Remote,
        run_id: String,
        /// Why (required; logged with the key's name).
        #[arg(long)]
        reason: String,
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
        if let Some(transfer) = cause.downcast_ref::<TransferError>() {
            return match transfer {
                TransferError::TargetNotEmpty(_) => exit::USAGE,
                TransferError::Line { .. } | TransferError::File(_) => exit::DATA,
                _ => exit::FAILURE,
            };
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
            change_at,
            ..
        } => {
            use crate::demo::scenario::{labeled_csv_regimes, Regime};
            use rand::SeedableRng;
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
            let start = crate::time::now_ms() - rows as i64 * 60_000;
            let before = change_at.unwrap_or(rows).min(rows);
            let regimes = [(Regime::Before, before), (Regime::After, rows - before)];
            let text = labeled_csv_regimes(&mut rng, &regimes, start, 60_000);
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
        | Command::Unfreeze { .. }
        | Command::Approve { .. }
        | Command::Decline { .. }) => remote(command),
        Command::Store { command } => store_cmd::run(command),
        // The server re-fits under its own config and store.
        Command::Train {
            reproduce: Some(run_id),
            server: Some(server),
            key,
            ca_cert,
            json,
            ..
        } => {
            let client = ApiClient::with_ca_cert(&server, key, ca_cert.as_deref())?;
            remote::reproduce_on(&client, &run_id, json)
        }
        Command::Train {
            config,
            csv,
            reproduce,
            data_dir,
            json,
            model_out,
            ..
        } => {
            let mut config = load_config(config.as_deref())?;
            match (reproduce, csv) {
                (Some(run_id), _) => {
                    if let Some(dir) = data_dir {
                        config.server.data_dir = dir;
                    }
                    reproduce_run(&config, &run_id, json)
                }
                (None, Some(csv)) => train(&config, &csv, json, model_out.as_deref()),
                (None, None) => {
                    Err(UsageError("train needs --csv FILE or --reproduce RUN_ID".into()).into())
                }
            }
        }
        Command::Backtest {
            config,
            csv,
            step,
            step_rows,
            label_delay,
            start,
            recovery_rows,
            threads,
            json,
            report,
        } => {
            let config = load_config(config.as_deref())?;
            let options = backtest_options(
                step.as_deref(),
                step_rows,
                &label_delay,
                start.as_deref(),
                recovery_rows,
                threads,
            )?;
            backtest(&config, &csv, &options, json, report.as_deref())
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
            jsonl,
            evidence,
            limit,
            since,
        } => {
            // The evidence page needs every entry of its run, wherever in the log they are.
            let jsonl = jsonl || evidence.is_some();
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
                    if jsonl {
                        whole_log(&client)?
                    } else {
                        let body = client.get(&format!("/v1/promotions?limit={limit}"))?;
                        serde_json::from_value(body["entries"].clone())?
                    }
                }
                None => crate::app::open_store(&config)?.entries(if jsonl {
                    usize::MAX
                } else {
                    limit
                })?,
            };
            if let Some(since) = since {
                entries.retain(|e| e.at >= since);
            }
            if let Some(run_id) = evidence {
                let mut of_run: Vec<Entry> =
                    entries.into_iter().filter(|e| e.run_id == run_id).collect();
                if of_run.is_empty() {
                    return Err(UsageError(format!(
                        "the log has no entry for run `{}`",
                        crate::text::clip(&run_id, 80)
                    ))
                    .into());
                }
                of_run.reverse();
                let now = crate::time::to_rfc3339(crate::time::now_ms());
                emit(&crate::evidence::page(&run_id, &of_run, &now))?;
            } else if jsonl {
                let mut out = String::new();
                for entry in entries.iter().rev() {
                    out.push_str(&serde_json::to_string(entry)?);
                    out.push('\n');
                }
                emit(&out)?;
            } else if json {
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

/// Every log entry from a server, newest first, a page at a time through the `before` cursor.
fn whole_log(client: &ApiClient) -> anyhow::Result<Vec<Entry>> {
    let mut entries: Vec<Entry> = vec![];
    let mut path = "/v1/promotions?limit=1000".to_owned();
    loop {
        let body = client.get(&path)?;
        let page: Vec<Entry> = serde_json::from_value(body["entries"].clone())?;
        entries.extend(page);
        match body["next_before"].as_u64() {
            Some(before) => path = format!("/v1/promotions?limit=1000&before={before}"),
            None => return Ok(entries),
        }
    }
}

/// `train --reproduce`: re-runs a logged run from the store and reports whether it matched.
fn reproduce_run(config: &Config, run_id: &str, json: bool) -> anyhow::Result<()> {
    let store = crate::app::open_store(config)?;
    let result = crate::reproduce::reproduce(store.as_ref(), config, run_id)?;
    print_reproduction(&result, json)
}

/// A re-fit's result as JSON or a sentence; an error (exit 1) when it did not reproduce.
fn print_reproduction(result: &crate::reproduce::Reproduction, json: bool) -> anyhow::Result<()> {
    if json {
        emit(&format!("{}\n", serde_json::to_string_pretty(result)?))?;
    } else {
        emit(&format!("{}\n", result.describe()))?;
    }
    if !result.reproduced {
        bail!("{}", result.describe());
    }
    Ok(())
}

/// The backtest's options from the command line, each refusal naming its flag.
fn backtest_options(
    step: Option<&str>,
    step_rows: Option<usize>,
    label_delay: &str,
    start: Option<&str>,
    recovery_rows: usize,
    threads: usize,
) -> Result<crate::backtest::Options, UsageError> {
    use crate::backtest::{Options, Step};
    let duration = |flag: &str, text: &str| {
        humantime::parse_duration(text)
            .map(|d| d.as_millis() as i64)
            .map_err(|e| {
                UsageError(format!(
                    "{flag} `{text}` is not a duration like 1d, 12h or 30m: {e}"
                ))
            })
    };
    let step = match (step_rows, step) {
        (Some(0), _) => return Err(UsageError("--step-rows must be at least 1".into())),
        (Some(rows), _) => Step::Rows(rows),
        (None, text) => {
            let ms = duration("--step", text.unwrap_or("1d"))?;
            if ms <= 0 {
                return Err(UsageError("--step must be longer than zero".into()));
            }
            Step::Every(ms)
        }
    };
    let start = start
        .map(|t| {
            crate::time::parse_rfc3339(t).ok_or_else(|| {
                UsageError(format!(
                    "--start `{t}` is not an RFC 3339 time such as 2026-12-01T00:00:00Z"
                ))
            })
        })
        .transpose()?;
    if !(1..=2).contains(&threads) {
        return Err(UsageError(format!(
            "--threads {threads}: must be 1 or 2 (two policies train)"
        )));
    }
    if recovery_rows == 0 {
        return Err(UsageError("--recovery-rows must be at least 1".into()));
    }
    Ok(Options {
        step,
        label_delay: duration("--label-delay", label_delay)?,
        start,
        threads,
        recovery_rows,
    })
}

/// `backtest`: reads the CSV, replays (with a progress bar when stderr is a terminal), prints
/// the table or the JSON, and writes the HTML report.
fn backtest(
    config: &Config,
    csv: &Path,
    options: &crate::backtest::Options,
    json: bool,
    report_path: Option<&Path>,
) -> anyhow::Result<()> {
    use std::io::IsTerminal;
    let rows = read_csv_examples(csv, &config.schema())?;
    let bar = if std::io::stderr().is_terminal() {
        let bar = ProgressBar::new(0);
        bar.set_style(
            ProgressStyle::with_template("{bar:40} {pos}/{len} policy steps {elapsed} eta {eta}")
                .unwrap_or_else(|_| ProgressStyle::default_bar()),
        );
        bar
    } else {
        ProgressBar::hidden()
    };
    let report = crate::backtest::run(config, rows, options, &|done, total| {
        bar.set_length(total);
        bar.set_position(done);
    })
    .map_err(|e| match e {
        crate::backtest::BacktestError::Empty => anyhow::Error::new(e),
        other => UsageError(other.to_string()).into(),
    })?;
    bar.finish_and_clear();
    if json {
        emit(&format!("{}\n", serde_json::to_string_pretty(&report)?))?;
    } else {
        emit(&crate::backtest::table(&report))?;
    }
    if let Some(path) = report_path {
        std::fs::write(path, crate::backtest::html(&report))
            .with_context(|| format!("writing {}", path.display()))?;
        eprintln!("report written to {}", path.display());
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

/// Reads labeled rows from a CSV file straight into the rows a run reads, in schema order, with
/// no named map per row: what `understudy train` uses. It accepts and refuses exactly what
/// [`read_csv`] does, with the same messages. A row without an `id` gets an empty one (a run
/// never reads ids).
pub fn read_csv_examples(path: &Path, schema: &Schema) -> anyhow::Result<Vec<Example>> {
    let file = open_data(path)?;
    Ok(read_csv_examples_from(
        file,
        &path.display().to_string(),
        schema,
    )?)
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
