//! When runs happen and where they execute: a bounded queue of jobs ([`Retrainer`]), a pool of
//! training threads that run them (`pool`), the schedule that queues them (`policy`: a timer,
//! a new-label count, drift, the shadowing candidate's readiness and age), and the records
//! that follow each run from request to verdict (`runs`), and, on a store several replicas
//! share, the election and the word from other replicas (`replicas`).
//!
//! Only the leading replica runs the schedule and the training threads' work; on a store one
//! process owns (sled) that process always leads and nothing changes. On a shared store a
//! manual retrain is queued in the store, and the leader takes it from there.
//!
//! The scheduler decides nothing about the active model: a finished run's proposal goes to the
//! registry, which turns it into a verdict and applies it. Training threads are plain OS
//! threads, apart from the async runtime that answers requests, so a long fit never stalls
//! scoring.

mod policy;
mod pool;
mod replicas;
mod runs;

use std::collections::HashSet;
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::mpsc::{sync_channel, Receiver, SyncSender, TrySendError};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use tokio::sync::Notify;

use crate::config::Config;
use crate::promotion::{Actor, RunStatus, Trigger};
use crate::registry::Registry;
use crate::schema::Schema;
use crate::store::replicas::{Leadership, SharedStore};
use crate::store::{Store, StoreError};
use crate::threads::{lock, Threads};
use crate::time::now_ms;

/// Runs waiting for a training thread, at most.
const QUEUE_CAPACITY: usize = 8;

#[derive(Debug, thiserror::Error)]
pub enum RetrainError {
    #[error("{QUEUE_CAPACITY} runs are already waiting; try again when one finishes")]
    QueueFull,
    #[error("retraining is shutting down")]
    ShuttingDown,
    #[error(transparent)]
    Store(#[from] StoreError),
}

struct Job {
    run_id: String,
    trigger: Trigger,
    kind: JobKind,
    /// Recorded in the log entry (`trigger_detail`).
    detail: Option<String>,
    /// Who asked for it (a manual retrain through the API), recorded in the entry.
    actor: Option<Actor>,
}

/// What a queued job does.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum JobKind {
    /// A retraining run.
    Train,
    /// The shadowing candidate's live gate; `expired` ends it `kept` for its age.
    LiveGate { expired: bool },
}

/// Everything a training thread needs.
struct Engine {
    config: Arc<Config>,
    schema: Arc<Schema>,
    store: Arc<dyn Store>,
    registry: Arc<Registry>,
    telemetry: Arc<crate::telemetry::Telemetry>,
    /// Serializes a run's records (queued, running, finished with its log entry) and a stop's
    /// abandonment of the runs still going, so a run is never logged twice.
    bookkeeping: Mutex<()>,
    /// Runs queued or running.
    in_flight: AtomicUsize,
    /// Labels received since the last run started.
    labels_since_run: AtomicU64,
    labels_arrived: Notify,
    /// A shadowed request got its outcome.
    shadow_outcome: Notify,
    /// A live gate is queued or running.
    live_gate_pending: AtomicBool,
    /// The active model a drift run was last started for (one per model).
    drift_run_for: Mutex<Option<String>>,
    /// The active model a decline run was already started for (once per model).
    decline_run_for: Mutex<Option<String>>,
    /// The service is stopping: queued jobs are logged as not started instead of run.
    closing: AtomicBool,
    /// Runs started and not yet logged (changed under `bookkeeping`).
    running: Mutex<HashSet<String>>,
    /// The stop gave up waiting: the runs in `running` were logged `failed`, and their
    /// results, should they still arrive, are dropped (set under `bookkeeping`).
    abandoned: AtomicBool,
    /// Where jobs are queued for the training threads; `None` once stopping.
    sender: Mutex<Option<SyncSender<Job>>>,
    /// Whether this replica leads (always, on a store of its own).
    leadership: Arc<Leadership>,
    /// The store's side of several replicas, when it is shared.
    shared: Option<Arc<dyn SharedStore>>,
    /// Runs queued or running in this process (a new leader leaves them alone).
    owned: Mutex<HashSet<String>>,
}

/// Handle to the training pool and its queue.
pub struct Retrainer {
    engine: Arc<Engine>,
    /// The queue's receiving end, shared by the workers (and drained by a stop that gives up
    /// waiting for them).
    receiver: Arc<Mutex<Receiver<Job>>>,
    workers: Threads,
    /// The election and the notifications (a shared store only), stopped by `stop_following`.
    follower: Threads,
    stop_following: Arc<AtomicBool>,
}

impl Retrainer {
    /// Starts `config.training.workers` training threads. Runs left unfinished by an earlier
    /// stop are closed in the log as `failed`: at once on a store of its own, and on a shared
    /// store by whichever replica is elected leader (`shared`: the thread that follows the
    /// election and the other replicas' changes starts here too).
    #[allow(clippy::too_many_arguments)]
    pub fn start(
        config: Arc<Config>,
        schema: Arc<Schema>,
        store: Arc<dyn Store>,
        registry: Arc<Registry>,
        telemetry: Arc<crate::telemetry::Telemetry>,
        leadership: Arc<Leadership>,
        shared: Option<Arc<dyn SharedStore>>,
    ) -> Result<Retrainer, StoreError> {
        let (sender, receiver) = sync_channel::<Job>(QUEUE_CAPACITY);
        let engine = Arc::new(Engine {
            config,
            schema,
            store,
            registry,
            telemetry,
            bookkeeping: Mutex::new(()),
            in_flight: AtomicUsize::new(0),
            labels_since_run: AtomicU64::new(0),
            labels_arrived: Notify::new(),
            shadow_outcome: Notify::new(),
            live_gate_pending: AtomicBool::new(false),
            drift_run_for: Mutex::new(None),
            decline_run_for: Mutex::new(None),
            closing: AtomicBool::new(false),
            running: Mutex::new(HashSet::new()),
            abandoned: AtomicBool::new(false),
            sender: Mutex::new(Some(sender)),
            leadership,
            shared,
            owned: Mutex::new(HashSet::new()),
        });
        if engine.shared.is_none() {
            let unfinished = engine.store.unfinished_runs()?;
            engine.close_interrupted_runs(
                unfinished,
                "the service stopped before this run finished",
            )?;
        }
        let receiver = Arc::new(Mutex::new(receiver));
        let workers = Threads::default();
        for i in 0..engine.config.training.workers {
            let engine = Arc::clone(&engine);
            let receiver = Arc::clone(&receiver);
            workers.spawn(format!("trainer-{i}"), move || {
                pool::work(&engine, &receiver)
            });
        }
        let follower = Threads::default();
        let stop_following = Arc::new(AtomicBool::new(false));
        if let Some(shared) = engine.shared.clone() {
            let engine = Arc::clone(&engine);
            let stop = Arc::clone(&stop_following);
            follower.spawn("replica-link", move || {
                engine.follow_replicas(shared.as_ref(), &stop)
            });
        }
        Ok(Retrainer {
            engine,
            receiver,
            workers,
            follower,
            stop_following,
        })
    }

    /// Queues a run; returns its status (state `queued`). On a shared store the run is queued
    /// in the store, for whichever replica leads.
    pub fn request(&self, trigger: Trigger) -> Result<RunStatus, RetrainError> {
        self.request_as(trigger, None)
    }

    /// Queues a run an operator asked for: `actor` (the key's name and reason) is kept on the
    /// run record and in its log entry, and the four-eyes rule keeps that key from approving
    /// the run's candidate.
    pub fn request_by(&self, trigger: Trigger, actor: Actor) -> Result<RunStatus, RetrainError> {
        self.request_as(trigger, Some(actor))
    }

    fn request_as(
        &self,
        trigger: Trigger,
        actor: Option<Actor>,
    ) -> Result<RunStatus, RetrainError> {
        let Some(shared) = &self.engine.shared else {
            return self.enqueue(trigger, JobKind::Train, None, actor);
        };
        if lock(&self.engine.sender).is_none() {
            return Err(RetrainError::ShuttingDown);
        }
        let seq = self.engine.store.next_seq("run")?;
        let status = RunStatus::queued(format!("r-{seq}"), trigger, now_ms(), actor.clone());
        if !shared.queue_run(&status, None, QUEUE_CAPACITY)? {
            return Err(RetrainError::QueueFull);
        }
        Ok(status)
    }

    fn enqueue(
        &self,
        trigger: Trigger,
        kind: JobKind,
        detail: Option<String>,
        actor: Option<Actor>,
    ) -> Result<RunStatus, RetrainError> {
        self.engine.enqueue(trigger, kind, detail, actor)
    }
}

impl Engine {
    /// Queues a job in this process (the leader's own triggers); returns its status.
    fn enqueue(
        &self,
        trigger: Trigger,
        kind: JobKind,
        detail: Option<String>,
        actor: Option<Actor>,
    ) -> Result<RunStatus, RetrainError> {
        let guard = lock(&self.sender);
        let sender = guard.as_ref().ok_or(RetrainError::ShuttingDown)?;
        let seq = self.store.next_seq("run")?;
        let status = RunStatus::queued(format!("r-{seq}"), trigger, now_ms(), actor.clone());
        self.in_flight.fetch_add(1, Ordering::SeqCst);
        // Held until the record is written, so a worker that takes the job at once cannot
        // have its `running` record overwritten by this `queued` one.
        let _records = lock(&self.bookkeeping);
        lock(&self.owned).insert(status.run_id.clone());
        match sender.try_send(Job {
            run_id: status.run_id.clone(),
            trigger,
            kind,
            detail,
            actor,
        }) {
            Ok(()) => {}
            Err(e) => {
                self.in_flight.fetch_sub(1, Ordering::SeqCst);
                lock(&self.owned).remove(&status.run_id);
                return Err(match e {
                    TrySendError::Full(_) => RetrainError::QueueFull,
                    TrySendError::Disconnected(_) => RetrainError::ShuttingDown,
                });
            }
        }
        self.store.put_run(&status)?;
        Ok(status)
    }
}

impl Retrainer {
    /// Queues a run unless one is already queued or running (for scheduled triggers, which
    /// only the leader runs).
    pub fn request_if_idle(&self, trigger: Trigger) -> Option<RunStatus> {
        if self.engine.in_flight.load(Ordering::SeqCst) > 0 || !self.engine.leadership.leads() {
            return None;
        }
        match self.enqueue(trigger, JobKind::Train, None, None) {
            Ok(status) => Some(status),
            Err(e) => {
                tracing::warn!(error = %e, trigger = trigger.as_str(), "scheduled run not queued");
                None
            }
        }
    }

    /// Notes that a request the shadowing candidate scored got its outcome.
    pub fn note_shadow_outcome(&self) {
        self.engine.shadow_outcome.notify_one();
    }

    /// Counts newly arrived labels toward `schedule.new_labels`. On a shared store the leader
    /// counts every replica's labels from the store instead (`replicas`).
    pub fn note_labels(&self, count: u64) {
        if count > 0 && self.engine.shared.is_none() {
            self.engine
                .labels_since_run
                .fetch_add(count, Ordering::SeqCst);
            self.engine.labels_arrived.notify_one();
        }
    }

    /// Whether this replica leads, and who does.
    pub fn leadership(&self) -> &Leadership {
        &self.engine.leadership
    }

    /// Runs queued or running right now.
    pub fn in_flight(&self) -> usize {
        self.engine.in_flight.load(Ordering::SeqCst)
    }

    /// Logs the jobs still queued as not started, when no worker is waiting on the queue (a
    /// waiting worker takes them itself and does the same).
    fn close_queued(&self) {
        let Ok(receiver) = self.receiver.try_lock() else {
            return;
        };
        while let Ok(job) = receiver.try_recv() {
            let _records = lock(&self.engine.bookkeeping);
            if let Err(e) = self.engine.close_unstarted(&job) {
                tracing::error!(run_id = %job.run_id, error = %e, "queued run could not be logged");
            }
        }
    }

    /// From now on queued jobs are not started (the first step of a stop; does not block).
    pub fn stop_starting(&self) {
        self.engine.closing.store(true, Ordering::SeqCst);
    }

    /// Stops: queued jobs are logged `failed` as not started, and a run in progress gets
    /// until `deadline` to finish. One still running then is logged `failed` ("interrupted by
    /// shutdown") and left to the process exit; its result, should it arrive, is dropped.
    pub fn shutdown(&self, deadline: Instant) {
        self.stop_starting();
        lock(&self.engine.sender).take();
        self.stop_workers(deadline);
        // Leadership ends with the link's session, once the runs are settled: the next leader
        // can take over at once.
        self.stop_following.store(true, Ordering::SeqCst);
        self.follower.join();
    }

    fn stop_workers(&self, deadline: Instant) {
        let workers = self.workers.take();
        while !workers.iter().all(|w| w.is_finished()) {
            if Instant::now() >= deadline {
                self.engine.abandon_running();
                self.close_queued();
                return;
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        for worker in workers {
            let _ = worker.join();
        }
    }
}

impl Drop for Retrainer {
    fn drop(&mut self) {
        self.shutdown(Instant::now() + self.engine.config.server.shutdown_grace);
    }
}
