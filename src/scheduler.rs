//! When runs happen and where they execute: a bounded pool of training threads fed by a
//! bounded queue, the schedule (a timer and a new-label count), and the state changes that
//! follow a verdict (promotion) or an operator's rollback.
//!
//! Training threads are plain OS threads, apart from the async runtime that answers requests,
//! so a long fit never stalls scoring. State changes (the activation history, the log and the
//! registry) are serialized by one mutex and written to the store before the registry swaps.

use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::mpsc::{sync_channel, Receiver, SyncSender, TrySendError};
use std::sync::{Arc, Mutex};
use std::thread::JoinHandle;
use std::time::Duration;

use tokio::sync::{watch, Notify};

use crate::config::Config;
use crate::learn::{run_once, Example, RunOutput, RunPlan};
use crate::model::Model;
use crate::promotion::{DataWindow, Entry, RunState, RunStatus, Trigger, Verdict};
use crate::registry::Registry;
use crate::schema::Schema;
use crate::store::{Store, StoreError, StoredExample};
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
}

/// Everything a training thread needs.
struct Engine {
    config: Arc<Config>,
    schema: Arc<Schema>,
    store: Arc<dyn Store>,
    registry: Arc<Registry>,
    /// Serializes changes of the active model (promotions and rollbacks).
    state_change: Mutex<()>,
    /// Runs queued or running.
    in_flight: AtomicUsize,
    /// Labels received since the last run started.
    labels_since_run: AtomicU64,
    labels_arrived: Notify,
}

/// Handle to the training pool.
pub struct Retrainer {
    engine: Arc<Engine>,
    sender: Mutex<Option<SyncSender<Job>>>,
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
    ) -> Result<Retrainer, StoreError> {
        let engine = Arc::new(Engine {
            config,
            schema,
            store,
            registry,
            state_change: Mutex::new(()),
            in_flight: AtomicUsize::new(0),
            labels_since_run: AtomicU64::new(0),
            labels_arrived: Notify::new(),
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
            workers: Mutex::new(workers),
        })
    }

    /// Queues a run; returns its status (state `queued`).
    pub fn request(&self, trigger: Trigger) -> Result<RunStatus, RetrainError> {
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
        match sender.try_send(Job {
            run_id: status.run_id.clone(),
            trigger,
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

    /// Stops taking runs and waits for the training threads to finish the current one.
    pub fn shutdown(&self) {
        lock(&self.sender).take();
        for worker in lock(&self.workers).drain(..) {
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
        loop {
            tokio::select! {
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
        self.shutdown();
    }
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|p| p.into_inner())
}

fn work(engine: &Engine, receiver: &Mutex<Receiver<Job>>) {
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
        engine.in_flight.fetch_sub(1, Ordering::SeqCst);
    }
}

impl Engine {
    fn close_interrupted_runs(&self) -> Result<(), StoreError> {
        for mut run in self.store.unfinished_runs()? {
            let entry = self.bare_entry(
                &run.run_id,
                run.trigger,
                Verdict::Failed,
                "the service stopped before this run finished".into(),
            );
            let entry = self.store.append_entry(entry, None)?;
            run.state = RunState::Finished;
            run.finished_at = Some(now_ms());
            run.entry_seq = Some(entry.seq);
            run.verdict = Some(Verdict::Failed);
            self.store.put_run(&run)?;
        }
        Ok(())
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

    fn execute(&self, job: &Job) -> Result<(), StoreError> {
        let started = now_ms();
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
        self.labels_since_run.store(0, Ordering::SeqCst);

        let entry = match self.train(job) {
            Ok(entry) => entry,
            Err(e) => {
                let entry = self.bare_entry(
                    &job.run_id,
                    job.trigger,
                    Verdict::Failed,
                    format!("the run could not read its data: {e}"),
                );
                self.store.append_entry(entry, None)?
            }
        };
        tracing::info!(verdict = entry.verdict.as_str(), reason = %entry.reason, "run finished");
        status.state = RunState::Finished;
        status.finished_at = Some(now_ms());
        status.entry_seq = Some(entry.seq);
        status.verdict = Some(entry.verdict);
        self.store.put_run(&status)
    }

    fn train(&self, job: &Job) -> Result<Entry, StoreError> {
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
        };
        let output =
            std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| run_once(&plan, &examples)));
        let RunOutput {
            mut entry,
            candidate,
        } = match output {
            Ok(output) => output,
            Err(panic) => {
                let what = panic
                    .downcast_ref::<&str>()
                    .map(|s| s.to_string())
                    .or_else(|| panic.downcast_ref::<String>().cloned())
                    .unwrap_or_else(|| "unknown panic".into());
                let entry = self.bare_entry(
                    &job.run_id,
                    job.trigger,
                    Verdict::Failed,
                    format!("the run panicked: {what}"),
                );
                return self.store.append_entry(entry, None);
            }
        };
        if let Some(model) = &candidate {
            self.store.put_model(model)?;
        }
        let _state = lock(&self.state_change);
        let active_now = self.registry.active_id();
        if entry.verdict == Verdict::Promoted && active_now != entry.active_before {
            entry.verdict = Verdict::Kept;
            entry.active_after = active_now;
            entry.reason = format!(
                "the active model changed while this run trained (now {}); its gate no longer applies",
                entry.active_after.as_deref().unwrap_or("none")
            );
        }
        match (entry.verdict, candidate) {
            (Verdict::Promoted, Some(model)) => {
                let mut history = self.store.active_history()?;
                history.push(model.id.clone());
                let entry = self.store.append_entry(entry, Some(&history))?;
                self.registry.activate(Arc::new(model));
                Ok(entry)
            }
            _ => self.store.append_entry(entry, None),
        }
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
        let entry = self.store.append_entry(entry, Some(&history))?;
        self.registry.activate(Arc::new(target));
        Ok(entry)
    }
}
