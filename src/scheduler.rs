//! When runs happen and where they execute: a bounded pool of training threads fed by a
//! bounded queue, the schedule (a timer, a new-label count, drift, and the shadowing
//! candidate's live gate and expiry), and the state changes that follow a verdict (promotion,
//! the start or end of a shadow) or an operator's rollback.
//!
//! Training threads are plain OS threads, apart from the async runtime that answers requests,
//! so a long fit never stalls scoring. State changes (the activation history, the log and the
//! registry) are serialized by one mutex and written to the store before the registry swaps.

use std::collections::HashSet;
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::mpsc::{sync_channel, Receiver, SyncSender, TrySendError};
use std::sync::{Arc, Mutex};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use tokio::sync::{watch, Notify};

use crate::config::Config;
use crate::learn::{judge, run_once, Example, RunOutput, RunPlan};
use crate::model::Model;
use crate::promotion::{DataWindow, Entry, RunState, RunStatus, Trigger, Verdict};
use crate::registry::Registry;
use crate::schema::Schema;
use crate::store::{EntryEffects, ShadowState, Store, StoreError, StoredExample};
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

#[derive(Debug, thiserror::Error)]
pub enum RollbackError {
    #[error("there is no earlier active model to roll back to")]
    NothingToRollBackTo,
    #[error("no model with id `{0}`")]
    UnknownModel(String),
    #[error("model `{0}` is already active")]
    AlreadyActive(String),
    #[error("{0}")]
    Incompatible(String),
    #[error(transparent)]
    Store(#[from] StoreError),
}

struct Job {
    run_id: String,
    trigger: Trigger,
    kind: JobKind,
    /// Recorded in the log entry (`trigger_detail`).
    detail: Option<String>,
}

/// What a queued job does.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum JobKind {
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
    /// Serializes changes of the active model (promotions and rollbacks).
    state_change: Mutex<()>,
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
    /// The service is stopping: queued jobs are logged as not started instead of run.
    closing: AtomicBool,
    /// Runs started and not yet logged (changed under `state_change`).
    running: Mutex<HashSet<String>>,
    /// The stop gave up waiting: the runs in `running` were logged `failed`, and their
    /// results, should they still arrive, are dropped (set under `state_change`).
    abandoned: AtomicBool,
}

/// A job's result before it is committed under `state_change`.
enum Computed {
    /// A run's output, or the panic that ended it.
    Run(Box<Result<RunOutput, String>>),
    LiveGate {
        expired: bool,
    },
}

/// Handle to the training pool.
pub struct Retrainer {
    engine: Arc<Engine>,
    sender: Mutex<Option<SyncSender<Job>>>,
    /// The queue's receiving end, shared by the workers (and drained by a stop that gives up
    /// waiting for them).
    receiver: Arc<Mutex<Receiver<Job>>>,
    workers: Mutex<Vec<JoinHandle<()>>>,
}

impl Retrainer {
    /// Starts `config.training.workers` training threads. Runs left unfinished by an earlier
    /// stop are closed in the log as `failed`.
    pub fn start(
        config: Arc<Config>,
        schema: Arc<Schema>,
        store: Arc<dyn Store>,
        registry: Arc<Registry>,
        telemetry: Arc<crate::telemetry::Telemetry>,
    ) -> Result<Retrainer, StoreError> {
        let engine = Arc::new(Engine {
            config,
            schema,
            store,
            registry,
            telemetry,
            state_change: Mutex::new(()),
            in_flight: AtomicUsize::new(0),
            labels_since_run: AtomicU64::new(0),
            labels_arrived: Notify::new(),
            shadow_outcome: Notify::new(),
            live_gate_pending: AtomicBool::new(false),
            drift_run_for: Mutex::new(None),
            closing: AtomicBool::new(false),
            running: Mutex::new(HashSet::new()),
            abandoned: AtomicBool::new(false),
        });
        engine.close_interrupted_runs()?;
        let (sender, receiver) = sync_channel::<Job>(QUEUE_CAPACITY);
        let receiver = Arc::new(Mutex::new(receiver));
        let workers = (0..engine.config.training.workers)
            .map(|i| {
                let engine = Arc::clone(&engine);
                let receiver = Arc::clone(&receiver);
                std::thread::Builder::new()
                    .name(format!("trainer-{i}"))
                    .spawn(move || work(&engine, &receiver))
                    .expect("spawn training thread")
            })
            .collect();
        Ok(Retrainer {
            engine,
            sender: Mutex::new(Some(sender)),
            receiver,
            workers: Mutex::new(workers),
        })
    }

    /// Queues a run; returns its status (state `queued`).
    pub fn request(&self, trigger: Trigger) -> Result<RunStatus, RetrainError> {
        self.enqueue(trigger, JobKind::Train, None)
    }

    fn enqueue(
        &self,
        trigger: Trigger,
        kind: JobKind,
        detail: Option<String>,
    ) -> Result<RunStatus, RetrainError> {
        let guard = lock(&self.sender);
        let sender = guard.as_ref().ok_or(RetrainError::ShuttingDown)?;
        let seq = self.engine.store.next_seq("run")?;
        let status = RunStatus {
            run_id: format!("r-{seq}"),
            trigger,
            state: RunState::Queued,
            requested_at: now_ms(),
            started_at: None,
            finished_at: None,
            entry_seq: None,
            verdict: None,
        };
        self.engine.in_flight.fetch_add(1, Ordering::SeqCst);
        // Held until the record is written, so a worker that takes the job at once cannot
        // have its `running` record overwritten by this `queued` one.
        let _state = lock(&self.engine.state_change);
        match sender.try_send(Job {
            run_id: status.run_id.clone(),
            trigger,
            kind,
            detail,
        }) {
            Ok(()) => {}
            Err(TrySendError::Full(_)) => {
                self.engine.in_flight.fetch_sub(1, Ordering::SeqCst);
                return Err(RetrainError::QueueFull);
            }
            Err(TrySendError::Disconnected(_)) => {
                self.engine.in_flight.fetch_sub(1, Ordering::SeqCst);
                return Err(RetrainError::ShuttingDown);
            }
        }
        self.engine.store.put_run(&status)?;
        Ok(status)
    }

    /// Queues a run unless one is already queued or running (for scheduled triggers).
    pub fn request_if_idle(&self, trigger: Trigger) -> Option<RunStatus> {
        if self.engine.in_flight.load(Ordering::SeqCst) > 0 {
            return None;
        }
        match self.request(trigger) {
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

    /// Queues the live gate when the shadow has its outcomes, or has aged out.
    fn check_shadow(&self) {
        let shadow = &self.engine.config.shadow;
        let Ok(Some(state)) = self.engine.store.shadow_state() else {
            return;
        };
        let expired = shadow
            .max_age
            .is_some_and(|age| now_ms() - state.since > age.as_millis() as i64);
        let ready = self.engine.store.shadowed_count(&state.candidate_id) as u64 >= shadow.outcomes;
        if !(ready || expired) || self.engine.live_gate_pending.swap(true, Ordering::SeqCst) {
            return;
        }
        match self.enqueue(Trigger::Shadow, JobKind::LiveGate { expired: !ready }, None) {
            Ok(run) => tracing::info!(run_id = %run.run_id, expired = !ready, "live gate queued"),
            Err(e) => {
                self.engine.live_gate_pending.store(false, Ordering::SeqCst);
                tracing::warn!(error = %e, "live gate not queued");
            }
        }
    }

    /// Starts a run when drift reached the act band, once per active model.
    fn check_drift(&self) {
        let engine = &self.engine;
        let Some(model) = engine.registry.active() else {
            return;
        };
        if lock(&engine.drift_run_for).as_deref() == Some(model.id.as_str()) {
            return;
        }
        let report = match crate::monitor::drift_report(
            engine.store.as_ref(),
            &engine.schema,
            &engine.config,
            &model,
        ) {
            Ok(Some(report)) => report,
            Ok(None) => return,
            Err(e) => {
                tracing::warn!(error = %e, "drift check failed");
                return;
            }
        };
        let breaches = report.breaches();
        if breaches.is_empty() || engine.in_flight.load(Ordering::SeqCst) > 0 {
            return;
        }
        let detail = format!(
            "PSI at or above drift.act {} against {}: {}",
            report.act,
            model.id,
            breaches
                .iter()
                .map(|(name, psi)| format!("{name} {psi:.3}"))
                .collect::<Vec<_>>()
                .join(", ")
        );
        match self.enqueue(Trigger::Drift, JobKind::Train, Some(detail.clone())) {
            Ok(run) => {
                *lock(&engine.drift_run_for) = Some(model.id.clone());
                tracing::info!(run_id = %run.run_id, %detail, "drift run queued");
            }
            Err(e) => tracing::warn!(error = %e, "drift run not queued"),
        }
    }

    /// Counts newly arrived labels toward `schedule.new_labels`.
    pub fn note_labels(&self, count: u64) {
        if count > 0 {
            self.engine
                .labels_since_run
                .fetch_add(count, Ordering::SeqCst);
            self.engine.labels_arrived.notify_one();
        }
    }

    /// Runs queued or running right now.
    pub fn in_flight(&self) -> usize {
        self.engine.in_flight.load(Ordering::SeqCst)
    }

    /// Makes an earlier model active again and logs it: the previous one in the activation
    /// history, or `to`.
    pub fn rollback(&self, to: Option<&str>) -> Result<Entry, RollbackError> {
        self.engine.rollback(to)
    }

    /// Logs the jobs still queued as not started, when no worker is waiting on the queue (a
    /// waiting worker takes them itself and does the same).
    fn close_queued(&self) {
        let Ok(receiver) = self.receiver.try_lock() else {
            return;
        };
        while let Ok(job) = receiver.try_recv() {
            let _state = lock(&self.engine.state_change);
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
        lock(&self.sender).take();
        let workers: Vec<JoinHandle<()>> = lock(&self.workers).drain(..).collect();
        while !workers.iter().all(JoinHandle::is_finished) {
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

    /// The schedule: starts runs on the `schedule.every` timer and once `schedule.new_labels`
    /// labels have arrived, until `shutdown` turns true.
    pub async fn run_schedule(self: Arc<Self>, mut shutdown: watch::Receiver<bool>) {
        let schedule = self.engine.config.schedule.clone();
        let period = schedule
            .every
            .unwrap_or(Duration::from_secs(365 * 24 * 3600));
        let mut timer = tokio::time::interval_at(tokio::time::Instant::now() + period, period);
        timer.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        // Shadow expiry is checked every minute; drift every drift.check_every.
        let mut minute = tokio::time::interval(Duration::from_secs(60));
        minute.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        let drift_period = self
            .engine
            .config
            .drift
            .check_every
            .unwrap_or(Duration::from_secs(900));
        let mut drift_timer =
            tokio::time::interval_at(tokio::time::Instant::now() + drift_period, drift_period);
        drift_timer.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            tokio::select! {
                _ = self.engine.shadow_outcome.notified() => {
                    let this = Arc::clone(&self);
                    let _ = tokio::task::spawn_blocking(move || this.check_shadow()).await;
                }
                _ = minute.tick() => {
                    let this = Arc::clone(&self);
                    let _ = tokio::task::spawn_blocking(move || this.check_shadow()).await;
                }
                _ = drift_timer.tick(), if schedule.on_drift => {
                    let this = Arc::clone(&self);
                    let _ = tokio::task::spawn_blocking(move || this.check_drift()).await;
                }
                _ = timer.tick(), if schedule.every.is_some() => {
                    if let Some(run) = self.request_if_idle(Trigger::Interval) {
                        tracing::info!(run_id = %run.run_id, "interval run queued");
                    }
                }
                _ = self.engine.labels_arrived.notified(), if schedule.new_labels.is_some() => {
                    let threshold = schedule.new_labels.unwrap_or(u64::MAX);
                    if self.engine.labels_since_run.load(Ordering::SeqCst) >= threshold {
                        if let Some(run) = self.request_if_idle(Trigger::NewLabels) {
                            tracing::info!(run_id = %run.run_id, "new-label run queued");
                        }
                    }
                }
                _ = shutdown.changed() => return,
            }
        }
    }
}

impl Drop for Retrainer {
    fn drop(&mut self) {
        self.shutdown(Instant::now() + self.engine.config.server.shutdown_grace);
    }
}

/// Turns a verdict that would change the active model into `kept`, saying why.
fn keep_frozen(entry: &mut Entry, freeze: &crate::store::Freeze) {
    entry.verdict = Verdict::Kept;
    entry.reason = format!(
        "frozen: promotions are frozen since {} (POST /v1/unfreeze); the gate said: {}",
        crate::time::to_rfc3339(freeze.since),
        entry.reason
    );
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|p| p.into_inner())
}

fn work(engine: &Engine, receiver: &Mutex<Receiver<Job>>) {
    lower_thread_priority(
        engine.config.training.nice,
        engine.config.training.idle_cpu_only,
    );
    loop {
        let job = match lock(receiver).recv() {
            Ok(job) => job,
            Err(_) => return,
        };
        let span = tracing::info_span!("run", run_id = %job.run_id, trigger = job.trigger.as_str());
        let _enter = span.enter();
        if let Err(e) = engine.execute(&job) {
            tracing::error!(error = %e, "run could not be recorded");
        }
        lock(&engine.running).remove(&job.run_id);
        if matches!(job.kind, JobKind::LiveGate { .. }) {
            engine.live_gate_pending.store(false, Ordering::SeqCst);
        }
        engine.in_flight.fetch_sub(1, Ordering::SeqCst);
    }
}

impl Engine {
    /// Logs runs left queued or running by an earlier stop as `failed`. A run whose entry
    /// is already in the log (the stop came between the entry and the run's own record) only
    /// has its record finished.
    fn close_interrupted_runs(&self) -> Result<(), StoreError> {
        let unfinished = self.store.unfinished_runs()?;
        let Some(oldest) = unfinished.iter().map(|r| r.requested_at).min() else {
            return Ok(());
        };
        let logged = self.entries_since(oldest)?;
        for run in unfinished {
            match logged.iter().find(|e| e.run_id == run.run_id) {
                Some(entry) => self.finish_run(run, entry)?,
                None => {
                    let reason = "the service stopped before this run finished".into();
                    self.log_failed_run(run, reason)?;
                }
            }
        }
        Ok(())
    }

    /// Log entries written at or after `since`, newest first.
    fn entries_since(&self, since: crate::time::Millis) -> Result<Vec<Entry>, StoreError> {
        let mut limit = 64;
        loop {
            let entries = self.store.entries(limit)?;
            let complete = entries.len() < limit || entries.last().is_some_and(|e| e.at < since);
            if complete {
                return Ok(entries.into_iter().filter(|e| e.at >= since).collect());
            }
            limit *= 4;
        }
    }

    fn finish_run(&self, mut run: RunStatus, entry: &Entry) -> Result<(), StoreError> {
        run.state = RunState::Finished;
        run.finished_at = Some(now_ms());
        run.entry_seq = Some(entry.seq);
        run.verdict = Some(entry.verdict);
        self.store.put_run(&run)
    }

    fn log_failed_run(&self, run: RunStatus, reason: String) -> Result<(), StoreError> {
        let entry = self.bare_entry(&run.run_id, run.trigger, Verdict::Failed, reason);
        let entry = self.store.append_entry(entry, EntryEffects::default())?;
        self.finish_run(run, &entry)
    }

    /// A queued job the stop came before: logged `failed`, never started.
    fn close_unstarted(&self, job: &Job) -> Result<(), StoreError> {
        let Some(run) = self.store.run(&job.run_id)? else {
            return Ok(());
        };
        tracing::info!(run_id = %job.run_id, "queued run not started: shutting down");
        self.log_failed_run(run, "not started: the service shut down first".into())
    }

    /// The stop's deadline passed with runs in progress: log them `failed` and drop whatever
    /// they produce later.
    fn abandon_running(&self) {
        let _state = lock(&self.state_change);
        self.abandoned.store(true, Ordering::SeqCst);
        let grace = humantime::format_duration(self.config.server.shutdown_grace);
        for run_id in lock(&self.running).drain() {
            tracing::warn!(%run_id, "run abandoned: it did not finish within server.shutdown_grace");
            let reason = format!(
                "interrupted by shutdown: the run did not finish within server.shutdown_grace ({grace})"
            );
            let logged = match self.store.run(&run_id) {
                Ok(Some(run)) => self.log_failed_run(run, reason),
                Ok(None) => Ok(()),
                Err(e) => Err(e),
            };
            if let Err(e) = logged {
                tracing::error!(%run_id, error = %e, "the abandoned run could not be logged");
            }
        }
    }

    fn bare_entry(
        &self,
        run_id: &str,
        trigger: Trigger,
        verdict: Verdict,
        reason: String,
    ) -> Entry {
        let active = self.registry.active_id();
        Entry {
            seq: 0,
            run_id: run_id.to_owned(),
            at: now_ms(),
            trigger,
            trigger_detail: None,
            window: DataWindow::default(),
            metric: self.config.gate.metric,
            margin: self.config.gate.margin,
            search: vec![],
            chosen: None,
            choice: None,
            pinned: false,
            fit: None,
            candidate_id: None,
            candidate_holdout: None,
            curves: None,
            candidate_gate: None,
            active_gate: None,
            gain: None,
            test: None,
            p_value: None,
            alpha: None,
            active_before: active.clone(),
            active_after: active,
            verdict,
            reason,
            duration_ms: 0,
        }
    }

    /// The labeled examples in the configured window, validated against today's schema.
    fn window(&self) -> Result<(Vec<Example>, usize), StoreError> {
        let training = &self.config.training;
        let since = training
            .window_age
            .map(|age| now_ms() - age.as_millis() as i64);
        let stored = self.store.latest_examples(training.window_rows, since)?;
        let mut skipped = 0;
        let examples = stored
            .into_iter()
            .filter_map(
                |StoredExample {
                     id,
                     event_time,
                     label,
                     features,
                 }| {
                    match self.schema.parse_row(&features) {
                        Ok(row) => Some(Example {
                            id,
                            event_time,
                            row,
                            label,
                        }),
                        Err(_) => {
                            skipped += 1;
                            None
                        }
                    }
                },
            )
            .collect();
        Ok((examples, skipped))
    }

    /// Runs a job: marks it running (or, once the service is stopping, logs it as not
    /// started), computes without the state lock, then logs and applies the result under it.
    fn execute(&self, job: &Job) -> Result<(), StoreError> {
        let started = now_ms();
        let mut status = {
            let _state = lock(&self.state_change);
            if self.closing.load(Ordering::SeqCst) {
                return self.close_unstarted(job);
            }
            let mut status = self.store.run(&job.run_id)?.unwrap_or(RunStatus {
                run_id: job.run_id.clone(),
                trigger: job.trigger,
                state: RunState::Queued,
                requested_at: started,
                started_at: None,
                finished_at: None,
                entry_seq: None,
                verdict: None,
            });
            status.state = RunState::Running;
            status.started_at = Some(started);
            self.store.put_run(&status)?;
            lock(&self.running).insert(job.run_id.clone());
            status
        };
        // A panic anywhere in the run (reading its data, fitting, judging) ends it `failed`;
        // the training thread lives on, and the active model is changed only by code that
        // runs after everything that can fail.
        let computed = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| match job.kind {
            JobKind::Train => {
                self.labels_since_run.store(0, Ordering::SeqCst);
                self.train(job)
                    .map(|output| Computed::Run(Box::new(output)))
            }
            JobKind::LiveGate { expired } => Ok(Computed::LiveGate { expired }),
        }));
        let _state = lock(&self.state_change);
        if self.abandoned.load(Ordering::SeqCst) {
            tracing::warn!(
                "the run finished after the shutdown gave up on it; its result is dropped"
            );
            return Ok(());
        }
        let outcome = computed
            .map_err(|panic| format!("the run panicked: {}", panic_message(&*panic)))
            .and_then(|computed| {
                std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                    computed.and_then(|computed| match computed {
                        Computed::Run(output) => self.commit_run(job, *output),
                        Computed::LiveGate { expired } => self.live_gate(job, expired),
                    })
                }))
                .map_err(|panic| format!("the run panicked: {}", panic_message(&*panic)))?
                .map_err(|e| format!("the run could not read its data: {e}"))
            });
        let entry = match outcome {
            Ok(entry) => entry,
            Err(reason) => {
                let entry = self.bare_entry(&job.run_id, job.trigger, Verdict::Failed, reason);
                self.store.append_entry(entry, EntryEffects::default())?
            }
        };
        tracing::info!(verdict = entry.verdict.as_str(), reason = %entry.reason, "run finished");
        let finished = now_ms();
        self.telemetry.observe_run(
            entry.verdict.as_str(),
            entry.trigger.as_str(),
            (finished - started) as f64 / 1000.0,
            finished,
        );
        status.state = RunState::Finished;
        status.finished_at = Some(finished);
        status.entry_seq = Some(entry.seq);
        status.verdict = Some(entry.verdict);
        self.store.put_run(&status)
    }

    /// Reads the window and runs `run_once`: the output, or the panic that ended it.
    fn train(&self, job: &Job) -> Result<Result<RunOutput, String>, StoreError> {
        let (examples, skipped) = self.window()?;
        let active = self.registry.active();
        let model_seq = self.store.next_seq("model")?;
        let plan = RunPlan {
            run_id: job.run_id.clone(),
            trigger: job.trigger,
            model_seq,
            now: now_ms(),
            schema: &self.schema,
            target: self.config.label.kind,
            training: &self.config.training,
            gate: &self.config.gate,
            guardrails: &self.config.guardrails,
            active: active.as_deref(),
            skipped,
            shadow_outcomes: self.config.shadow.outcomes,
        };
        let output =
            std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| run_once(&plan, &examples)));
        Ok(output.map_err(|panic| panic_message(&*panic)))
    }

    /// Logs a run's verdict and applies it (promotion, shadow start); the caller holds
    /// `state_change`.
    fn commit_run(
        &self,
        job: &Job,
        output: Result<RunOutput, String>,
    ) -> Result<Entry, StoreError> {
        let RunOutput {
            mut entry,
            candidate,
        } = match output {
            Ok(output) => output,
            Err(what) => {
                let entry = self.bare_entry(
                    &job.run_id,
                    job.trigger,
                    Verdict::Failed,
                    format!("the run panicked: {what}"),
                );
                return self.store.append_entry(entry, EntryEffects::default());
            }
        };
        entry.trigger_detail.clone_from(&job.detail);
        if let Some(model) = &candidate {
            self.store.put_model(model)?;
        }
        let active_now = self.registry.active_id();
        let would_change = matches!(entry.verdict, Verdict::Promoted | Verdict::Shadowing);
        if would_change {
            if let Some(freeze) = self.store.freeze()? {
                entry.active_after = active_now.clone();
                keep_frozen(&mut entry, &freeze);
            }
        }
        if would_change && active_now != entry.active_before {
            entry.verdict = Verdict::Kept;
            entry.active_after = active_now;
            entry.reason = format!(
                "the active model changed while this run trained (now {}); its gate no longer applies",
                entry.active_after.as_deref().unwrap_or("none")
            );
        } else if !would_change && entry.active_after != active_now {
            // A rollback while it trained: the entry says what is active after it.
            entry.reason = format!(
                "{}; the active model changed while this run trained (now {})",
                entry.reason,
                active_now.as_deref().unwrap_or("none")
            );
            entry.active_after = active_now;
        }
        match (entry.verdict, candidate) {
            (Verdict::Promoted, Some(model)) => {
                let mut history = self.store.active_history()?;
                history.push(model.id.clone());
                let effects = EntryEffects {
                    history: Some(&history),
                    shadow: None,
                };
                let entry = self.store.append_entry(entry, effects)?;
                self.registry.activate(Arc::new(model));
                Ok(entry)
            }
            (Verdict::Shadowing, Some(model)) => {
                if let Some(previous) = self.store.shadow_state()? {
                    entry.reason = format!(
                        "{}; it replaces the shadowing candidate {} ({} of {} shadowed outcomes)",
                        entry.reason,
                        previous.candidate_id,
                        self.store.shadowed_count(&previous.candidate_id),
                        self.config.shadow.outcomes
                    );
                }
                // The entry and the shadow it starts are one write: a stop between the two
                // would leave the log naming one candidate and the store shadowing another.
                let state = ShadowState {
                    candidate_id: model.id.clone(),
                    active_id: entry.active_before.clone().unwrap_or_default(),
                    run_id: entry.run_id.clone(),
                    entry_seq: 0,
                    since: now_ms(),
                };
                let effects = EntryEffects {
                    history: None,
                    shadow: Some(Some(&state)),
                };
                let entry = self.store.append_entry(entry, effects)?;
                self.registry.set_shadow(Some(Arc::new(model)));
                Ok(entry)
            }
            _ => self.store.append_entry(entry, EntryEffects::default()),
        }
    }

    /// Ends the shadow: with the live gate on the shadowed outcomes, or `kept` for its age.
    /// The caller holds `state_change`.
    fn live_gate(&self, job: &Job, expired: bool) -> Result<Entry, StoreError> {
        let Some(state) = self.store.shadow_state()? else {
            let entry = self.bare_entry(
                &job.run_id,
                job.trigger,
                Verdict::Kept,
                "no candidate was shadowing when the live gate ran".into(),
            );
            return self.store.append_entry(entry, EntryEffects::default());
        };
        let outcomes = self.store.shadowed_outcomes(&state.candidate_id)?;
        let candidate = self.store.model(&state.candidate_id)?;
        let active_id = self.registry.active_id();
        let mut entry = self.bare_entry(&job.run_id, job.trigger, Verdict::Kept, String::new());
        entry.candidate_id = Some(state.candidate_id.clone());
        entry.candidate_holdout = candidate.as_ref().and_then(|m| m.holdout.clone());
        entry.window.gate_rows = Some(outcomes.len());
        let needed = self.config.shadow.outcomes;
        let shadow_of = format!(
            "live gate of {} (shadowing since run {}, log entry {})",
            state.candidate_id, state.run_id, state.entry_seq
        );
        let mut promote = None;
        if active_id.as_deref() != Some(state.active_id.as_str()) {
            entry.reason = format!(
                "{shadow_of}: the active model changed from {} while it shadowed; kept",
                state.active_id
            );
        } else if expired {
            let days = (now_ms() - state.since) as f64 / 86_400_000.0;
            entry.reason = format!(
                "{shadow_of}: shadow.max_age passed after {days:.1} days with {} of {needed} shadowed outcomes; kept",
                outcomes.len()
            );
        } else if let Some(model) = candidate {
            let labels: Vec<f64> = outcomes.iter().map(|o| o.label).collect();
            let cand: Vec<f64> = outcomes.iter().map(|o| o.candidate).collect();
            let act: Vec<f64> = outcomes.iter().map(|o| o.active).collect();
            let judgement = judge(
                &self.config.gate,
                self.config.label.kind,
                &cand,
                &act,
                &labels,
                "shadowed outcomes",
            );
            judgement.write_to(&mut entry);
            entry.reason = format!("{shadow_of}: {}", entry.reason);
            if entry.verdict == Verdict::Promoted {
                promote = Some(model);
            }
        } else {
            entry.reason = format!("{shadow_of}: the candidate is missing from the store; kept");
        }
        if promote.is_some() {
            if let Some(freeze) = self.store.freeze()? {
                promote = None;
                keep_frozen(&mut entry, &freeze);
            }
        }
        // The verdict, the promotion if any and the shadow's end are one write.
        let ends_shadow = EntryEffects {
            history: None,
            shadow: Some(None),
        };
        let entry = match promote {
            Some(model) => {
                let mut history = self.store.active_history()?;
                history.push(model.id.clone());
                entry.active_after = Some(model.id.clone());
                let effects = EntryEffects {
                    history: Some(&history),
                    ..ends_shadow
                };
                let entry = self.store.append_entry(entry, effects)?;
                self.registry.activate(Arc::new(model));
                entry
            }
            None => self.store.append_entry(entry, ends_shadow)?,
        };
        self.registry.set_shadow(None);
        Ok(entry)
    }

    fn rollback(&self, to: Option<&str>) -> Result<Entry, RollbackError> {
        let _state = lock(&self.state_change);
        let mut history = self.store.active_history()?;
        let current = history.last().cloned();
        let target: Model = match to {
            Some(id) => {
                if current.as_deref() == Some(id) {
                    return Err(RollbackError::AlreadyActive(id.to_owned()));
                }
                let model = self
                    .store
                    .model(id)?
                    .ok_or_else(|| RollbackError::UnknownModel(id.to_owned()))?;
                history.push(model.id.clone());
                model
            }
            None => {
                if history.len() < 2 {
                    return Err(RollbackError::NothingToRollBackTo);
                }
                history.pop();
                let id = history.last().cloned().unwrap_or_default();
                self.store
                    .model(&id)?
                    .ok_or(RollbackError::UnknownModel(id))?
            }
        };
        target
            .compatible_with(&self.schema)
            .map_err(RollbackError::Incompatible)?;
        let seq = self.store.next_seq("run")?;
        let mut entry = self.bare_entry(
            &format!("r-{seq}"),
            Trigger::Rollback,
            Verdict::Promoted,
            format!(
                "operator rollback from {} to {}",
                current.as_deref().unwrap_or("none"),
                target.id
            ),
        );
        entry.candidate_id = Some(target.id.clone());
        entry.candidate_holdout = target.holdout.clone();
        entry.active_after = Some(target.id.clone());
        let shadow = self.store.shadow_state()?;
        if let Some(shadow) = &shadow {
            entry.reason = format!(
                "{}; this ends the shadow of {}, which was measured against {}",
                entry.reason, shadow.candidate_id, shadow.active_id
            );
        }
        // The rollback and the end of the shadow it invalidates are one write.
        let effects = EntryEffects {
            history: Some(&history),
            shadow: shadow.is_some().then_some(None),
        };
        let entry = self.store.append_entry(entry, effects)?;
        self.registry.activate(Arc::new(target));
        if shadow.is_some() {
            self.registry.set_shadow(None);
        }
        Ok(entry)
    }
}

/// Sets this thread's nice value and, with `idle_only`, moves it to the `SCHED_IDLE` class
/// (Linux: per-thread attributes, inherited by the threads it spawns, so a run's fold threads
/// share them). A failure leaves the thread as it was.
///
/// At nice 10 alone, scoring's p99 while runs trained back to back was 2.0-2.6 × its idle
/// p99 (nice 19: 2.0-2.1); in `SCHED_IDLE` it was 0.89-0.91 × (`BENCHMARKS.md`).
fn lower_thread_priority(nice: i32, idle_only: bool) {
    #[cfg(target_os = "linux")]
    {
        // SAFETY: gettid, setpriority and sched_setscheduler take plain integers and a
        // pointer to a parameter block that lives across the call.
        let tid = unsafe { libc::syscall(libc::SYS_gettid) } as libc::id_t;
        if unsafe { libc::setpriority(libc::PRIO_PROCESS, tid, nice) } != 0 {
            tracing::warn!(
                nice,
                error = %std::io::Error::last_os_error(),
                "could not lower the training thread's priority"
            );
        }
        let idle = libc::sched_param { sched_priority: 0 };
        if idle_only
            && unsafe { libc::sched_setscheduler(tid as libc::pid_t, libc::SCHED_IDLE, &idle) } != 0
        {
            tracing::warn!(
                error = %std::io::Error::last_os_error(),
                "could not move the training thread to SCHED_IDLE"
            );
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = (nice, idle_only);
}

/// The text a panic carried, if it was text.
fn panic_message(panic: &(dyn std::any::Any + Send)) -> String {
    panic
        .downcast_ref::<&str>()
        .map(|s| (*s).to_owned())
        .or_else(|| panic.downcast_ref::<String>().cloned())
        .unwrap_or_else(|| "a panic without a message".into())
}
