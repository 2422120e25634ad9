//! `understudy store copy | export | import | digest`: moving a whole store between backends
//! and to or from a portable file, for a team that grows from one box (sled) to replicas on
//! PostgreSQL, or that wants a backup it can read without either.
//!
//! The work is `store::transfer`'s; this file turns what the user typed into stores, shows a
//! progress bar when stderr is a terminal, and prints the per-table check. A PostgreSQL URL
//! carries a password, so it is only ever printed through `redact_url`, and it may be given
//! as the name of an environment variable (`env:VAR`) to keep it out of the shell's history
//! and the process list.

use std::io::{BufRead, IsTerminal, Write};
use std::path::{Path, PathBuf};

use anyhow::Context;
use clap::Subcommand;
use indicatif::{ProgressBar, ProgressStyle};

use super::{emit, UsageError};
use crate::config::{Config, StoreBackend};
use crate::store::pg_store::redact_url;
use crate::store::transfer::{self, Options, Progress, Report, TransferError};
use crate::store::{PgOptions, PgStore, SledStore, Store};

const STORE_HELP: &str = "a sled data dir, a PostgreSQL URL (postgres://…), env:VAR (a variable holding the URL), or config:FILE (the store a config file names)";

#[derive(Subcommand)]
pub(super) enum StoreCommand {
    /// Copy a whole store into an empty one (sled to PostgreSQL or back, or the same
    /// backend), then read the target back and check every table's count and digest.
    Copy {
        /// The store to read.
        #[arg(long, value_name = "STORE", long_help = STORE_HELP)]
        from: String,
        /// The store to write: must be empty unless --replace.
        #[arg(long, value_name = "STORE", long_help = STORE_HELP)]
        to: String,
        /// Erase everything the target holds first.
        #[arg(long)]
        replace: bool,
        /// Records per page read and per write.
        #[arg(long, default_value_t = transfer::DEFAULT_BATCH, value_name = "N")]
        batch: usize,
        /// Print the check as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Write a whole store as JSON Lines: a header, one record a line, a trailer with the
    /// counts and digests.
    Export {
        /// The store to read.
        #[arg(long, value_name = "STORE", long_help = STORE_HELP)]
        from: String,
        /// The file to write (default: standard output).
        #[arg(long, value_name = "FILE")]
        to: Option<PathBuf>,
        /// Overwrite an existing file.
        #[arg(long)]
        force: bool,
        #[arg(long, default_value_t = transfer::DEFAULT_BATCH, value_name = "N")]
        batch: usize,
    },
    /// Read an export back into an empty store: the whole file is checked (every line, the
    /// counts and digests) before anything is written, and the target is checked after.
    Import {
        /// The file `store export` wrote.
        #[arg(long, value_name = "FILE")]
        from: PathBuf,
        /// The store to write: must be empty unless --replace.
        #[arg(long, value_name = "STORE", long_help = STORE_HELP)]
        to: String,
        /// Erase everything the target holds first.
        #[arg(long)]
        replace: bool,
        #[arg(long, default_value_t = transfer::DEFAULT_BATCH, value_name = "N")]
        batch: usize,
        /// Print the check as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Print every table's count and digest (the same digests `copy` and `export` check).
    Digest {
        #[arg(value_name = "STORE", long_help = STORE_HELP)]
        store: String,
        #[arg(long, default_value_t = transfer::DEFAULT_BATCH, value_name = "N")]
        batch: usize,
        #[arg(long)]
        json: bool,
    },
}

/// Where a store is, as the user named it.
enum Location {
    Sled(PathBuf),
    Postgres {
        options: PgOptions,
        /// How to name it in messages: the URL without its password.
        shown: String,
    },
}

/// An opened store, with its name for messages and its backend's name.
struct Opened {
    store: Box<dyn Store>,
    shown: String,
    backend: &'static str,
}

fn postgres(url: String, via: Option<&str>, config: Option<&Config>) -> Location {
    let shown = match via {
        Some(var) => format!("PostgreSQL at {} (from ${var})", redact_url(&url)),
        None => format!("PostgreSQL at {}", redact_url(&url)),
    };
    let mut options = PgOptions::new(url);
    if let Some(config) = config {
        options.pool_size = config.store.pool_size;
        options.connect_timeout = config.store.connect_timeout();
        options.statement_timeout = config.store.statement_timeout();
    }
    Location::Postgres { options, shown }
}

/// `flag`'s value as a store location. Never echoes a URL whole.
fn locate(flag: &str, text: &str) -> anyhow::Result<Location> {
    if text.starts_with("postgres://") || text.starts_with("postgresql://") {
        return Ok(postgres(text.to_owned(), None, None));
    }
    if let Some(var) = text.strip_prefix("env:") {
        let url = std::env::var(var).map_err(|_| {
            UsageError(format!(
                "{flag} env:{var}: the environment variable `{var}` is not set"
            ))
        })?;
        if url.trim().is_empty() {
            return Err(UsageError(format!(
                "{flag} env:{var}: the environment variable `{var}` is empty"
            ))
            .into());
        }
        return Ok(postgres(url, Some(var), None));
    }
    if let Some(path) = text.strip_prefix("config:") {
        let config = Config::load(Path::new(path))?;
        return Ok(match config.store.backend {
            StoreBackend::Sled => Location::Sled(config.server.data_dir.clone()),
            StoreBackend::Postgres => {
                let via = config.store.url_env.clone();
                postgres(config.store.postgres_url()?, via.as_deref(), Some(&config))
            }
        });
    }
    if text.contains("://") {
        return Err(UsageError(format!(
            "{flag}: only postgres:// and postgresql:// URLs name a database; anything else is a sled data dir"
        ))
        .into());
    }
    Ok(Location::Sled(PathBuf::from(text)))
}

/// Opens a location; a sled source must already exist (a typo must not read as an empty
/// store).
fn open(flag: &str, location: Location, source: bool) -> anyhow::Result<Opened> {
    match location {
        Location::Sled(dir) => {
            if source && !dir.is_dir() {
                return Err(
                    UsageError(format!("{flag} {}: no such data dir", dir.display())).into(),
                );
            }
            let store = SledStore::open(&dir)
                .with_context(|| format!("opening the sled store at {}", dir.display()))?;
            Ok(Opened {
                store: Box::new(store),
                shown: format!("sled store at {}", dir.display()),
                backend: "sled",
            })
        }
        Location::Postgres { options, shown } => {
            let store = PgStore::open(&options).with_context(|| format!("opening {shown}"))?;
            Ok(Opened {
                store: Box::new(store),
                shown,
                backend: "postgres",
            })
        }
    }
}

/// The same place twice would erase (with --replace) or refuse the source.
fn same_place(a: &Location, b: &Location) -> bool {
    match (a, b) {
        (Location::Sled(a), Location::Sled(b)) => {
            let canonical = |p: &Path| std::fs::canonicalize(p).unwrap_or_else(|_| p.to_owned());
            canonical(a) == canonical(b)
        }
        (Location::Postgres { options: a, .. }, Location::Postgres { options: b, .. }) => {
            a.url.trim() == b.url.trim()
        }
        _ => false,
    }
}

/// A progress bar on stderr when it is a terminal; nothing otherwise.
struct Bar(ProgressBar);

impl Bar {
    fn new() -> Bar {
        if std::io::stderr().is_terminal() {
            let bar = ProgressBar::new(0);
            bar.set_style(
                ProgressStyle::with_template(
                    "{msg:>22} {bar:40} {pos}/{len} records {per_sec} eta {eta}",
                )
                .unwrap_or_else(|_| ProgressStyle::default_bar()),
            );
            Bar(bar)
        } else {
            Bar(ProgressBar::hidden())
        }
    }
}

impl Progress for Bar {
    fn phase(&self, what: &str, total: u64) {
        self.0.set_message(what.to_owned());
        self.0.set_length(total);
        self.0.set_position(0);
    }

    fn advance(&self, records: u64) {
        self.0.inc(records);
    }
}

impl Drop for Bar {
    fn drop(&mut self) {
        self.0.finish_and_clear();
    }
}

/// The per-table check as a table.
fn table(report: &Report) -> String {
    let mut out = format!(
        "{:<9} {:>10} {:>10}  {:<64}  {}\n",
        "table", "source", "target", "digest (SHA-256, order-independent)", "check"
    );
    for t in &report.tables {
        out.push_str(&format!(
            "{:<9} {:>10} {:>10}  {:<64}  {}\n",
            t.table.name(),
            t.source_count,
            t.target_count,
            t.target_digest,
            if t.matches {
                "ok".to_owned()
            } else {
                format!("MISMATCH (source {})", t.source_digest)
            }
        ));
    }
    out
}

fn print_report(report: &Report, json: bool, summary: &str) -> anyhow::Result<()> {
    if json {
        emit(&format!("{}\n", serde_json::to_string_pretty(report)?))?;
    } else {
        emit(&table(report))?;
    }
    report.check()?;
    eprintln!("{summary}; every count and digest matches");
    Ok(())
}

pub(super) fn run(command: StoreCommand) -> anyhow::Result<()> {
    match command {
        StoreCommand::Copy {
            from,
            to,
            replace,
            batch,
            json,
        } => {
            let (source, target) = (locate("--from", &from)?, locate("--to", &to)?);
            if same_place(&source, &target) {
                return Err(UsageError("--from and --to name the same store".into()).into());
            }
            let source = open("--from", source, true)?;
            let target = open("--to", target, false)?;
            let report = transfer::copy(
                &*source.store,
                &*target.store,
                Options { batch, replace },
                &Bar::new(),
            )?;
            print_report(
                &report,
                json,
                &format!(
                    "copied {} records from the {} to the {}",
                    report.records(),
                    source.shown,
                    target.shown
                ),
            )
        }
        StoreCommand::Export {
            from,
            to,
            force,
            batch,
        } => {
            let source = open("--from", locate("--from", &from)?, true)?;
            match to.filter(|p| p.as_os_str() != "-") {
                None => {
                    let stdout = std::io::stdout();
                    let mut out = std::io::BufWriter::new(stdout.lock());
                    let trailer = transfer::export(
                        &*source.store,
                        source.backend,
                        &mut out,
                        batch,
                        &Bar::new(),
                    )?;
                    eprintln!(
                        "exported {} records from the {}",
                        trailer.counts.values().sum::<u64>(),
                        source.shown
                    );
                }
                Some(path) => {
                    if path.exists() && !force {
                        return Err(UsageError(format!(
                            "{} exists; pass --force to overwrite it",
                            path.display()
                        ))
                        .into());
                    }
                    // Written aside and renamed when complete, so a failed export never
                    // leaves a file that looks whole.
                    let mut partial = path.clone().into_os_string();
                    partial.push(".partial");
                    let partial = PathBuf::from(partial);
                    let result = (|| -> anyhow::Result<transfer::Trailer> {
                        let file = std::fs::File::create(&partial)
                            .with_context(|| format!("creating {}", partial.display()))?;
                        let mut out = std::io::BufWriter::new(file);
                        let trailer = transfer::export(
                            &*source.store,
                            source.backend,
                            &mut out,
                            batch,
                            &Bar::new(),
                        )?;
                        let file = out.into_inner().map_err(|e| e.into_error())?;
                        file.sync_all()
                            .with_context(|| format!("writing {}", partial.display()))?;
                        std::fs::rename(&partial, &path)
                            .with_context(|| format!("renaming to {}", path.display()))?;
                        Ok(trailer)
                    })();
                    let trailer = match result {
                        Ok(trailer) => trailer,
                        Err(e) => {
                            let _ = std::fs::remove_file(&partial);
                            return Err(e);
                        }
                    };
                    let mut out = String::new();
                    for table in crate::store::portable::Table::ALL {
                        let name = table.name();
                        out.push_str(&format!(
                            "{name:<9} {:>10}  {}\n",
                            trailer.counts[name], trailer.digests[name]
                        ));
                    }
                    emit(&out)?;
                    eprintln!(
                        "exported {} records from the {} to {}",
                        trailer.counts.values().sum::<u64>(),
                        source.shown,
                        path.display()
                    );
                }
            }
            Ok(())
        }
        StoreCommand::Import {
            from,
            to,
            replace,
            batch,
            json,
        } => {
            let open_file = || -> Result<Box<dyn BufRead>, TransferError> {
                let file = std::fs::File::open(&from).map_err(|e| {
                    TransferError::File(format!("cannot open {}: {e}", from.display()))
                })?;
                Ok(Box::new(std::io::BufReader::with_capacity(1 << 20, file)))
            };
            let target = open("--to", locate("--to", &to)?, false)?;
            let (summary, report) = transfer::import(
                &open_file,
                &*target.store,
                Options { batch, replace },
                &Bar::new(),
            )?;
            print_report(
                &report,
                json,
                &format!(
                    "imported {} records ({} export of {}) into the {}",
                    summary.records(),
                    summary.header.source,
                    summary.header.exported_at,
                    target.shown
                ),
            )
        }
        StoreCommand::Digest { store, batch, json } => {
            let opened = open("STORE", locate("STORE", &store)?, true)?;
            let bar = Bar::new();
            bar.phase(
                "digesting",
                transfer::counts(&*opened.store)?.values().sum(),
            );
            let digests = transfer::digest(&*opened.store, batch, &bar)?;
            drop(bar);
            let rows: Vec<serde_json::Value> = crate::store::portable::Table::ALL
                .iter()
                .map(|&t| {
                    let d = digests.get(&t).copied().unwrap_or_default();
                    serde_json::json!({"table": t, "count": d.count, "digest": d.hex(t)})
                })
                .collect();
            if json {
                emit(&format!("{}\n", serde_json::to_string_pretty(&rows)?))?;
            } else {
                let mut out = String::new();
                for row in &rows {
                    out.push_str(&format!(
                        "{:<9} {:>10}  {}\n",
                        row["table"].as_str().unwrap_or(""),
                        row["count"].as_u64().unwrap_or(0),
                        row["digest"].as_str().unwrap_or("")
                    ));
                }
                emit(&out)?;
            }
            let _ = std::io::stdout().flush();
            Ok(())
        }
    }
}
