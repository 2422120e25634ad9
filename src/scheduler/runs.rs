//! A run's records from request to verdict: closing runs an earlier stop left unfinished,
//! logging queued runs a stop came before, and abandoning a run that outlived the stop's
//! grace. Every change here happens under the engine's `bookkeeping` lock.

use std::sync::atomic::Ordering;

use super::{Engine, Job};
use crate::promotion::{Entry, RunState, RunStatus, Verdict};
use crate::store::StoreError;
use crate::threads::lock;
use crate::time::now_ms;

impl Engine {
    /// Logs `unfinished` runs (left queued or running by an earlier stop, or by a leader
    /// that stopped leading) as `failed`, saying `reason`. A run whose entry is already in the
    /// log (the stop came between the entry and the run's own record) only has its record
    /// finished.
    pub(super) fn close_interrupted_runs(
        &self,
        unfinished: Vec<RunStatus>,
        reason: &str,
    ) -> Result<(), StoreError> {
        let Some(oldest) = unfinished.iter().map(|r| r.requested_at).min() else {
            return Ok(());
        };
        let logged = self.entries_since(oldest)?;
        for run in unfinished {
            match logged.iter().find(|e| e.run_id == run.run_id) {
                Some(entry) => self.finish_run(run, entry)?,
                None => {
                    tracing::info!(run_id = %run.run_id, reason, "interrupted run logged failed");
                    self.log_failed_run(run, reason.to_owned())?;
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
        let entry = self
            .registry
            .bare_entry(&run.run_id, run.trigger, Verdict::Failed, reason);
        let entry = self.registry.log_unchanged(entry)?;
        self.finish_run(run, &entry)
    }

    /// A queued job the stop came before: logged `failed`, never started.
    pub(super) fn close_unstarted(&self, job: &Job) -> Result<(), StoreError> {
        let Some(run) = self.store.run(&job.run_id)? else {
            return Ok(());
        };
        tracing::info!(run_id = %job.run_id, "queued run not started: shutting down");
        self.log_failed_run(run, "not started: the service shut down first".into())
    }

    /// The stop's deadline passed with runs in progress: log them `failed` and drop whatever
    /// they produce later.
    pub(super) fn abandon_running(&self) {
        let _records = lock(&self.bookkeeping);
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
}
