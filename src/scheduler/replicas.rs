//! One replica among several on a shared store: the thread that follows the election and the
//! other replicas' changes.
//!
//! About once a [`TICK`] it asks the store's [`ReplicaLink`] whether this replica leads (the
//! first replica to ask takes leadership; the others follow until it goes), and in between it
//! waits on the link for notifications. On word of a change (another replica promoted, rolled
//! back, froze, or started or ended a shadow) the registry serves what the store now says; it
//! does so every [`RECHECK`] as well, so a lost notification costs at most that long.
//!
//! Becoming leader (and every [`RECHECK`] while it leads), the replica logs `failed` the runs
//! no live replica owns: left unfinished by a former leader, or by itself while it was cut off
//! (those still queued in the store are not interrupted: it will run them). It does so under
//! the bookkeeping lock and while it holds leadership, so one replica logs each once. Then, while
//! it leads, it takes queued retrains from the store into its own queue, and counts every
//! replica's new labels for `schedule.new_labels`. A lost link is lost leadership, at once:
//! the schedule and retention stop, jobs not started are left for the next leader, and a run
//! that finishes afterwards is not logged (the next leader logs it `failed`).

use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use super::{Engine, Job, JobKind, QUEUE_CAPACITY};
use crate::promotion::RunState;
use crate::store::replicas::{Heard, ReplicaLink, SharedStore};
use crate::threads::lock;

/// How often leadership is contended for (and confirmed), at most.
pub(super) const TICK: Duration = Duration::from_secs(1);
/// How often the registry re-reads the store without a notification.
pub(super) const RECHECK: Duration = Duration::from_secs(5);
/// How often a leader with a shadowing candidate checks its readiness (shadowed outcomes
/// arrive at every replica).
const SHADOW_CHECK: Duration = Duration::from_secs(5);

impl Engine {
    /// The follower loop; returns once `stop` is set (then within a [`TICK`]).
    pub(super) fn follow_replicas(&self, shared: &dyn SharedStore, stop: &AtomicBool) {
        let replica_id = self.leadership.replica_id().to_owned();
        let mut link: Option<Box<dyn ReplicaLink>> = None;
        let mut rechecked = Instant::now();
        let mut shadow_checked = Instant::now();
        let mut swept = Instant::now();
        let mut examples_seen: Option<u64> = None;
        let mut complained = false;
        while !stop.load(Ordering::SeqCst) {
            let heard = match self.tend_link(shared, &replica_id, &mut link) {
                Ok(heard) => {
                    complained = false;
                    heard
                }
                Err(e) => {
                    link = None;
                    if self.leadership.set(false, None) {
                        tracing::warn!(error = %e, "leadership lost with the replica link");
                    } else if !complained {
                        tracing::warn!(error = %e, "the replica link is down; retrying");
                    }
                    complained = true;
                    self.sleep_unless(stop, TICK);
                    Heard::default()
                }
            };
            if heard.changes || rechecked.elapsed() >= RECHECK {
                rechecked = Instant::now();
                match self.registry.follow_store() {
                    Ok(true) => tracing::info!(
                        active_model = self.registry.active_id().as_deref().unwrap_or("none"),
                        "now serving the store's models"
                    ),
                    Ok(false) => {}
                    Err(e) => tracing::warn!(error = %e, "cannot follow the store's models"),
                }
            }
            if !self.leadership.leads() {
                examples_seen = None;
                continue;
            }
            if swept.elapsed() >= RECHECK {
                // A run this replica dropped while it did not lead (its link was down) is
                // closed once it leads again: no one else will.
                swept = Instant::now();
                self.close_orphaned_runs(shared);
            }
            self.take_queued(shared);
            self.count_labels(shared, &mut examples_seen);
            if shadow_checked.elapsed() >= SHADOW_CHECK {
                shadow_checked = Instant::now();
                if self.registry.shadow().is_some() {
                    self.shadow_outcome.notify_one();
                }
            }
        }
        self.leadership.set(false, None);
    }

    /// Opens the link if needed, waits on it for a tick (not on the first round, so a new
    /// replica contends at once), contends for leadership and takes over when newly elected.
    fn tend_link(
        &self,
        shared: &dyn SharedStore,
        replica_id: &str,
        link: &mut Option<Box<dyn ReplicaLink>>,
    ) -> Result<Heard, crate::store::StoreError> {
        let heard = match link {
            Some(link) => link.wait(TICK)?,
            None => {
                *link = Some(shared.link(replica_id)?);
                Heard {
                    changes: true,
                    run_requests: true,
                }
            }
        };
        let link = link.as_mut().expect("opened above");
        let leads = link.contend()?;
        let leader = if leads { None } else { link.leader()? };
        if self.leadership.set(leads, leader) {
            if leads {
                tracing::info!(replica = replica_id, "this replica leads");
                self.close_orphaned_runs(shared);
            } else {
                tracing::warn!(replica = replica_id, "this replica no longer leads");
            }
        }
        Ok(heard)
    }

    fn sleep_unless(&self, stop: &AtomicBool, total: Duration) {
        let until = Instant::now() + total;
        while !stop.load(Ordering::SeqCst) && Instant::now() < until {
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    /// Logs `failed` the runs a former leader left unfinished: neither queued in the store (the
    /// new leader runs those) nor this process's own. Run when this replica becomes leader and
    /// every [`RECHECK`] while it leads, on this thread, so it never runs between
    /// [`Engine::take_queued`]'s taking a run from the store and its noting the run as its own.
    fn close_orphaned_runs(&self, shared: &dyn SharedStore) {
        let _records = lock(&self.bookkeeping);
        let closed = (|| {
            // Unfinished first, then the queue: a run queued in between is in the queue.
            let unfinished = self.store.unfinished_runs()?;
            let queued = shared.queued_run_ids()?;
            let owned = lock(&self.owned).clone();
            let interrupted = unfinished
                .into_iter()
                .filter(|run| !queued.contains(&run.run_id) && !owned.contains(&run.run_id))
                .collect();
            self.close_interrupted_runs(
                interrupted,
                &format!(
                    "the replica running it stopped or lost leadership before it finished; {} took over",
                    self.leadership.replica_id()
                ),
            )
        })();
        if let Err(e) = closed {
            tracing::error!(error = %e, "the former leader's runs could not be closed");
        }
    }

    /// Moves retrains queued in the store into this leader's queue, as many as it has room for.
    fn take_queued(&self, shared: &dyn SharedStore) {
        if self.closing.load(Ordering::SeqCst) {
            return;
        }
        let room = QUEUE_CAPACITY.saturating_sub(self.in_flight.load(Ordering::SeqCst));
        let taken = match shared.take_queued_runs(room) {
            Ok(taken) => taken,
            Err(e) => {
                tracing::warn!(error = %e, "cannot take queued retrains");
                return;
            }
        };
        for queued in taken {
            let run_id = queued.run.run_id.clone();
            let job = Job {
                run_id: run_id.clone(),
                trigger: queued.run.trigger,
                kind: JobKind::Train,
                detail: queued.detail,
                actor: queued.run.requested_by.clone(),
            };
            if queued.run.state != RunState::Queued {
                continue;
            }
            let sent = {
                let guard = lock(&self.sender);
                self.in_flight.fetch_add(1, Ordering::SeqCst);
                lock(&self.owned).insert(run_id.clone());
                match guard.as_ref() {
                    Some(sender) => sender.try_send(job).map_err(|e| match e {
                        std::sync::mpsc::TrySendError::Full(job)
                        | std::sync::mpsc::TrySendError::Disconnected(job) => job,
                    }),
                    None => Err(job),
                }
            };
            match sent {
                Ok(()) => tracing::info!(%run_id, "queued retrain taken"),
                Err(job) => {
                    // Taken from the store but not runnable here (stopping): logged as not
                    // started, as a stop logs its own queued jobs.
                    self.in_flight.fetch_sub(1, Ordering::SeqCst);
                    lock(&self.owned).remove(&run_id);
                    let _records = lock(&self.bookkeeping);
                    if let Err(e) = self.close_unstarted(&job) {
                        tracing::error!(%run_id, error = %e, "a taken retrain could not be logged");
                    }
                }
            }
        }
    }

    /// Adds the examples every replica wrote since the last look to the new-label count.
    fn count_labels(&self, shared: &dyn SharedStore, seen: &mut Option<u64>) {
        if self.config.schedule.new_labels.is_none() {
            return;
        }
        let Ok(now) = shared.examples_written() else {
            return;
        };
        let added = match *seen {
            // The count starts again after a statistics reset: count from there.
            Some(before) if now >= before => now - before,
            _ => 0,
        };
        *seen = Some(now);
        if added > 0 {
            self.labels_since_run.fetch_add(added, Ordering::SeqCst);
            self.labels_arrived.notify_one();
        }
    }
}
