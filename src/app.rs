//! Start-up and shutdown: builds the [`Service`] from a config, serves the API on a listener
//! until a shutdown future resolves, then drains and flushes.
//!
//! `serve(listener, service, shutdown)` takes its listener and its shutdown signal as
//! arguments, so tests run the real service on port 0 and stop it when they are done.
//!
//! A stop is bounded by `server.shutdown_grace`, counted from the signal: in-flight requests
//! get until then to finish (new connections are refused at once), and so does a training
//! run; whatever is left is cut off, every acknowledged write being already on disk, and the
//! unfinished run is logged `failed`.

use std::future::{Future, IntoFuture};
use std::sync::Arc;
use std::time::Instant;

use tokio::net::TcpListener;
use tokio::sync::watch;

use crate::api::ApiState;
use crate::config::{Config, StoreBackend};
use crate::registry::{Registry, RestoreError, Rules};
use crate::scheduler::Retrainer;
use crate::store::outcome_writer::OutcomeWriter;
use crate::store::recorder::ScoreRecorder;
use crate::store::replicas::{new_replica_id, Leadership, SharedStore};
use crate::store::retention::{Compactor, Retention};
use crate::store::{PgOptions, PgStore, SledStore, Store, StoreError};

#[derive(Debug, thiserror::Error)]
pub enum StartError {
    #[error("cannot open the store in {dir}: {source}")]
    Store { dir: String, source: StoreError },
    /// The PostgreSQL store (`[store] backend = "postgres"`) did not open; the message never
    /// holds the connection string.
    #[error("cannot open the PostgreSQL store: {0}")]
    Postgres(StoreError),
    #[error(transparent)]
    Config(#[from] crate::config::ConfigError),
    #[error("cannot restore the active model: {0}")]
    Restore(#[from] RestoreError),
    #[error(transparent)]
    Keys(#[from] crate::access::KeyringError),
}

/// The running service: the parts the API reaches, and score retention beside them.
pub struct Service {
    pub api: Arc<ApiState>,
    /// Deletes score records beyond `[retention]` in the background.
    pub compactor: Compactor,
}

impl Service {
    /// Opens the configured store ([`open_store`]), restores the active model and starts the
    /// score recorder, the outcome writer, score retention and the training threads.
    pub fn open(config: Config) -> Result<Arc<Service>, StartError> {
        let backend = open_backend(&config)?;
        Service::open_on(config, backend.store, backend.shared)
    }

    /// As [`Service::open`], over a store the caller opened (tests wrap it to inject faults),
    /// as the only process on it.
    pub fn open_with_store(
        config: Config,
        store: Arc<dyn Store>,
    ) -> Result<Arc<Service>, StartError> {
        Service::open_on(config, store, None)
    }

    /// As [`Service::open`], over a store the caller opened; `shared` when other replicas use
    /// the same store (the election and the notifications run, retrains queue in the store).
    pub fn open_on(
        config: Config,
        store: Arc<dyn Store>,
        shared: Option<Arc<dyn SharedStore>>,
    ) -> Result<Arc<Service>, StartError> {
        let dir = match config.store.backend {
            StoreBackend::Sled => config.server.data_dir.display().to_string(),
            StoreBackend::Postgres => "the PostgreSQL database".to_owned(),
        };
        // Every write below goes through the watch, so the probes know whether the store takes
        // writes without writing themselves.
        let watched = crate::store::watched::Watched::new(store);
        let writes = watched.watch();
        let store: Arc<dyn Store> = Arc::new(watched);
        // One small durable write at start, so the probes know from the first request.
        if let Err(e) = store.check_writable() {
            tracing::warn!(error = %e, "the store does not take writes at start");
        }
        let keyring = Arc::new(config.access.keyring()?);
        let config = Arc::new(config);
        let schema = Arc::new(config.schema());
        let rules = Rules {
            shadow_outcomes: config.shadow.outcomes,
            gate: config.gate.clone(),
            target: config.label.kind,
            share: config.share.clone(),
        };
        let registry = Arc::new(Registry::restore(
            Arc::clone(&store),
            Arc::clone(&schema),
            rules,
        )?);
        let replica_id = new_replica_id();
        let leadership = Arc::new(match shared {
            Some(_) => {
                registry.share_store();
                Leadership::shared(replica_id)
            }
            None => Leadership::alone(replica_id),
        });
        let recorder = ScoreRecorder::start(Arc::clone(&store));
        // Another replica's score records reach the shared store up to a recorder flush after
        // its answer: an outcome for one waits that long before it is called unknown.
        let others_lag = match shared {
            Some(_) => OTHERS_RECORDS_LAG,
            None => std::time::Duration::ZERO,
        };
        let outcomes = OutcomeWriter::start(Arc::clone(&store), recorder.drainer(), others_lag);
        let telemetry = Arc::new(crate::telemetry::Telemetry::new());
        let compactor = {
            let telemetry = Arc::clone(&telemetry);
            let r = &config.retention;
            Compactor::start(
                Arc::clone(&store),
                Retention {
                    max_age: r.scores_max_age,
                    max_count: r.scores_max_count,
                    check_every: r.check_every,
                },
                Arc::clone(&leadership),
                move |n| telemetry.observe_compacted(n),
            )
        };
        let retrainer = Retrainer::start(
            Arc::clone(&config),
            Arc::clone(&schema),
            Arc::clone(&store),
            Arc::clone(&registry),
            Arc::clone(&telemetry),
            leadership,
            shared,
        )
        .map_err(|source| StartError::Store { dir, source })?;
        let api = Arc::new(ApiState {
            config,
            record_layout: Arc::new(crate::store::recorded::FeatureLayout::of(&schema)),
            schema,
            store,
            registry,
            recorder: Arc::new(recorder),
            outcomes: Arc::new(outcomes),
            retrainer: Arc::new(retrainer),
            keyring,
            telemetry,
            writes,
            drift_cache: crate::monitor::DriftCache::new(),
        });
        Ok(Arc::new(Service { api, compactor }))
    }

    /// Stops score retention (between chunks), writes pending outcomes and score records, gives
    /// a run in progress `server.shutdown_grace` to finish, and flushes the store.
    pub fn close(&self) {
        self.close_by(Instant::now() + self.api.config.server.shutdown_grace);
    }

    /// [`close`](Self::close), with a run in progress given until `deadline`; queued runs are
    /// logged as not started, and a run still going at `deadline` as interrupted.
    pub fn close_by(&self, deadline: Instant) {
        let api = &self.api;
        self.compactor.stop();
        api.outcomes.stop();
        if let Err(e) = api.recorder.stop() {
            tracing::error!(error = %e, "pending score records could not be written at shutdown");
        }
        api.retrainer.shutdown(deadline);
        if let Err(e) = api.store.flush() {
            tracing::error!(error = %e, "final flush failed");
        }
    }
}

/// The store `[store]` selects: sled in `server.data_dir` (the default), or PostgreSQL at
/// `store.url` (or the variable `store.url_env` names), its migrations applied.
pub fn open_store(config: &Config) -> Result<Arc<dyn Store>, StartError> {
    Ok(open_backend(config)?.store)
}

/// How long an outcome for a score id of the last seconds waits for its record before it is
/// called unknown, on a store other replicas write too: their recorders write every 20 ms
/// (`recorder::FLUSH_EVERY`), but on a loaded machine (the full test suite's replicas on two
/// cores) a record took more than 250 ms to land. The wait is a sleeping task, not a thread,
/// and only outcomes for recent score ids that read as unknown pay it.
pub const OTHERS_RECORDS_LAG: std::time::Duration = std::time::Duration::from_secs(1);

/// An opened store, and its side for several replicas when it is shared.
pub struct Backend {
    pub store: Arc<dyn Store>,
    pub shared: Option<Arc<dyn SharedStore>>,
}

/// [`open_store`], with the shared side of a PostgreSQL store.
pub fn open_backend(config: &Config) -> Result<Backend, StartError> {
    let store: Arc<dyn Store> = match config.store.backend {
        StoreBackend::Sled => {
            let dir = &config.server.data_dir;
            let cache_bytes = config.server.cache_mb * 1024 * 1024;
            let store = SledStore::open_with_cache(dir, cache_bytes).map_err(|source| {
                StartError::Store {
                    dir: dir.display().to_string(),
                    source,
                }
            })?;
            Arc::new(store)
        }
        StoreBackend::Postgres => {
            let s = &config.store;
            let options = PgOptions {
                url: s.postgres_url()?,
                pool_size: s.pool_size,
                connect_timeout: s.connect_timeout(),
                statement_timeout: s.statement_timeout(),
            };
            let store = Arc::new(PgStore::open(&options).map_err(StartError::Postgres)?);
            tracing::info!(store = ?store, pool_size = s.pool_size, "PostgreSQL store open");
            return Ok(Backend {
                store: Arc::clone(&store) as Arc<dyn Store>,
                shared: Some(store),
            });
        }
    };
    Ok(Backend {
        store,
        shared: None,
    })
}

/// Serves the API on `listener` until `shutdown` resolves, then stops accepting, drains
/// in-flight requests for at most `server.shutdown_grace`, stops the schedule and closes the
/// service (a run in progress gets what is left of the grace).
pub async fn serve(
    listener: TcpListener,
    service: Arc<Service>,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    let (stop_schedule, schedule_stopped) = watch::channel(false);
    let schedule = tokio::spawn(Arc::clone(&service.api.retrainer).run_schedule(schedule_stopped));
    let app = crate::api::router(Arc::clone(&service.api));
    let grace = service.api.config.server.shutdown_grace;
    let (signalled, mut signal) = watch::channel(None::<Instant>);
    let retrainer = Arc::clone(&service.api.retrainer);
    let shutdown = async move {
        shutdown.await;
        retrainer.stop_starting();
        let _ = signalled.send(Some(Instant::now() + grace));
    };
    let serving = axum::serve(
        listener,
        axum::ServiceExt::<axum::extract::Request>::into_make_service(app),
    )
    .with_graceful_shutdown(shutdown)
    .into_future();
    let cut_off = async {
        let at = signal
            .wait_for(Option::is_some)
            .await
            .ok()
            .map(|at| (*at).unwrap_or_else(Instant::now));
        match at {
            Some(at) => tokio::time::sleep_until(at.into()).await,
            // The signal's sender went with the server: nothing to cut off.
            None => std::future::pending().await,
        }
    };
    let served = tokio::select! {
        served = serving => served,
        () = cut_off => {
            tracing::warn!(
                grace = %humantime::format_duration(grace),
                "requests still in flight after server.shutdown_grace; closing without them"
            );
            Ok(())
        }
    };
    // Signalled: what is left of the grace; otherwise (the server failed) a whole grace.
    let deadline = (*signal.borrow()).unwrap_or_else(|| Instant::now() + grace);
    let _ = stop_schedule.send(true);
    let _ = schedule.await;
    let closing = Arc::clone(&service);
    let _ = tokio::task::spawn_blocking(move || closing.close_by(deadline)).await;
    served
}

/// Resolves on Ctrl-C or SIGTERM.
pub async fn shutdown_signal() {
    let ctrl_c = async {
        let _ = tokio::signal::ctrl_c().await;
    };
    #[cfg(unix)]
    let terminate = async {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut signal) => {
                signal.recv().await;
            }
            Err(_) => std::future::pending::<()>().await,
        }
    };
    #[cfg(not(unix))]
    let terminate = std::future::pending::<()>();
    tokio::select! {
        _ = ctrl_c => {},
        _ = terminate => {},
    }
    tracing::info!("shutdown requested; draining");
}
