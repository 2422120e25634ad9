//! The training threads: each takes a job from the queue, reads its data, runs it (a panic
//! anywhere ends the run `failed`, never the thread), hands the result to the registry, and
//! records the run finished.

use std::sync::atomic::Ordering;
use std::sync::mpsc::Receiver;
use std::sync::Mutex;

use super::{Engine, Job, JobKind};
use crate::learn::{run_once, window, Proposal, RunPlan, Window};
use crate::model::Model;
use crate::promotion::{RunState, RunStatus, Verdict};
use crate::store::StoreError;
use crate::threads::lock;
use crate::time::now_ms;

/// A job's result before the registry settles it.
enum Computed {
    /// A run's proposal, or the panic that ended it.
    Run(Box<Result<Proposal, String>>),
    LiveGate {
        expired: bool,
    },
}

pub(super) fn work(engine: &Engine, receiver: &Mutex<Receiver<Job>>) {
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
        lock(&engine.owned).remove(&job.run_id);
        if matches!(job.kind, JobKind::LiveGate { .. }) {
            engine.live_gate_pending.store(false, Ordering::SeqCst);
        }
        engine.in_flight.fetch_sub(1, Ordering::SeqCst);
    }
}

impl Engine {
    /// Runs a job: marks it running (or, once the service is stopping, logs it as not
    /// started), computes without the bookkeeping lock, then has the registry settle the
    /// result and records the run finished under it.
    fn execute(&self, job: &Job) -> Result<(), StoreError> {
        let started = now_ms();
        // The model a run is judged against is the one active when it is marked running, so
        // a client that sees `running` knows which model the run will compare with.
        let (mut status, active) = {
            let _records = lock(&self.bookkeeping);
            if self.closing.load(Ordering::SeqCst) {
                return self.close_unstarted(job);
            }
            if !self.still_ours(job)? {
                return Ok(());
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
                requested_by: None,
            });
            status.state = RunState::Running;
            status.started_at = Some(started);
            let active = self.registry.active();
            self.store.put_run(&status)?;
            lock(&self.running).insert(job.run_id.clone());
            (status, active)
        };
        // A panic anywhere in the run (reading its data, fitting, judging) ends it `failed`;
        // the training thread lives on, and the active model is changed only by code that
        // runs after everything that can fail.
        let computed = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| match job.kind {
            JobKind::Train => {
                self.labels_since_run.store(0, Ordering::SeqCst);
                self.train(job, active.as_deref())
                    .map(|output| Computed::Run(Box::new(output)))
            }
            JobKind::LiveGate { expired } => Ok(Computed::LiveGate { expired }),
        }));
        let _records = lock(&self.bookkeeping);
        if self.abandoned.load(Ordering::SeqCst) {
            tracing::warn!(
                "the run finished after the shutdown gave up on it; its result is dropped"
            );
            return Ok(());
        }
        if !self.still_ours(job)? {
            return Ok(());
        }
        let outcome = computed
            .map_err(|panic| format!("the run panicked: {}", panic_message(&*panic)))
            .and_then(|computed| {
                std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                    computed.and_then(|computed| match computed {
                        Computed::Run(output) => match *output {
                            Ok(mut proposal) => {
                                proposal.entry.actor.clone_from(&job.actor);
                                self.registry.settle_run(proposal, job.detail.clone())
                            }
                            Err(what) => self.registry.log_unchanged(self.registry.bare_entry(
                                &job.run_id,
                                job.trigger,
                                Verdict::Failed,
                                format!("the run panicked: {what}"),
                            )),
                        },
                        Computed::LiveGate { expired } => {
                            self.registry.end_shadow(&job.run_id, job.trigger, expired)
                        }
                    })
                }))
                .map_err(|panic| format!("the run panicked: {}", panic_message(&*panic)))?
                .map_err(|e| format!("the run could not read its data: {e}"))
            });
        let entry = match outcome {
            Ok(entry) => entry,
            Err(reason) => self.registry.log_unchanged(self.registry.bare_entry(
                &job.run_id,
                job.trigger,
                Verdict::Failed,
                reason,
            ))?,
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

    /// On a shared store, whether this replica may still start or settle `job`: it leads, and
    /// no new leader has logged the run already (as interrupted, while this one was cut off).
    /// A job it may not is left alone: the leader logs it. Always true on a store of its own.
    /// Called under the bookkeeping lock.
    fn still_ours(&self, job: &Job) -> Result<bool, StoreError> {
        if self.shared.is_none() {
            return Ok(true);
        }
        if !self.leadership.leads() {
            tracing::warn!("this replica no longer leads: the run is left to the leader");
            return Ok(false);
        }
        if matches!(self.store.run(&job.run_id)?, Some(run) if run.state == RunState::Finished) {
            tracing::warn!("the run was already logged by another leader; its result is dropped");
            return Ok(false);
        }
        Ok(true)
    }

    /// Reads the window and runs `run_once` against `active`: the proposal, or the panic that
    /// ended it.
    fn train(
        &self,
        job: &Job,
        active: Option<&Model>,
    ) -> Result<Result<Proposal, String>, StoreError> {
        let training = &self.config.training;
        let since = training
            .window_age
            .map(|age| now_ms() - age.as_millis() as i64);
        let stored = self.store.latest_examples(training.window_rows, since)?;
        let Window {
            examples, skipped, ..
        } = window(stored, &self.schema, training.window_rows);
        let model_seq = self.store.next_seq("model")?;
        let plan = RunPlan::from_config(
            &self.config,
            &self.schema,
            job.run_id.clone(),
            job.trigger,
            model_seq,
            now_ms(),
            active,
            skipped,
        );
        let output =
            std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| run_once(&plan, &examples)));
        Ok(output.map_err(|panic| panic_message(&*panic)))
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
