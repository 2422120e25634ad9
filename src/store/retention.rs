//! Deletes old score records in the background, so the `scores` tree stops growing with
//! traffic.
//!
//! A thread of its own wakes every `check_every` and, in the leading replica only, deletes, oldest first, the records older
//! than the age limit or beyond the count limit, at most [`CHUNK`] records (sled: whole pages
//! of up to 64 records, see `score_pages`) per store write, until none are left. A page that holds both records to
//! delete and records to keep is written again with only the kept ones, so the limits hold to
//! the record. Each chunk is one short sled batch; nothing here holds a lock the request path takes
//! between chunks, so scoring and outcomes interleave with a long compaction.
//!
//! What stays: outcomes and the examples made from them, shadowed rows, models and the log.
//! A score with an outcome lives on as a labeled example; an outcome that arrives after its
//! score was deleted is refused as an unknown score.

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Condvar, Mutex};
use std::time::{Duration, Instant};

use super::replicas::Leadership;
use super::{ScoreLimits, Store, StoreError};
use crate::threads::{lock, Threads};
use crate::time::{now_ms, Millis};

/// Score records deleted per store write at most (sled: 256 pages of 64). Every other store read
/// and write waits while one applies: on the 2-core development machine 2,048 sled key removals
/// took 25-40 ms per chunk (up to 90 ms), so a chunk is an eighth of that (RELIABILITY.md,
/// "Soak and retention").
pub const CHUNK: usize = 256 * 64;

/// What to keep.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Retention {
    pub max_age: Option<Duration>,
    pub max_count: Option<u64>,
    pub check_every: Duration,
}

impl Retention {
    /// The limits as of `now`.
    pub fn limits(&self, now: Millis) -> ScoreLimits {
        ScoreLimits {
            older_than: self
                .max_age
                .map(|age| now.saturating_sub(age.as_millis() as Millis)),
            keep: self.max_count,
        }
    }
}

/// One compaction pass.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Pass {
    pub deleted: u64,
    pub chunks: u64,
    /// Cut short by a stop request.
    pub stopped: bool,
}

struct Shared {
    store: Arc<dyn Store>,
    retention: Retention,
    leadership: Arc<Leadership>,
    stopping: Mutex<bool>,
    wake: Condvar,
    deleted: AtomicU64,
    passes: AtomicU64,
    /// Called with each chunk's count (the service counts them in its metrics).
    on_delete: Box<dyn Fn(u64) + Send + Sync>,
}

/// Handle to the compaction thread; dropping it stops the thread between chunks.
pub struct Compactor {
    shared: Arc<Shared>,
    thread: Threads,
}

/// Runs passes until nothing is left to delete or `stop` turns true. Exposed for tests and
/// the store-size measurement, which call it without the thread.
pub fn compact(
    store: &dyn Store,
    limits: ScoreLimits,
    stop: &dyn Fn() -> bool,
    on_delete: &dyn Fn(u64),
) -> Result<Pass, StoreError> {
    let mut pass = Pass::default();
    if limits.older_than.is_none() && limits.keep.is_none() {
        return Ok(pass);
    }
    loop {
        if stop() {
            pass.stopped = true;
            return Ok(pass);
        }
        let done = store.compact_scores(limits, CHUNK)?;
        if done.records > 0 {
            pass.deleted += done.records;
            pass.chunks += 1;
            on_delete(done.records);
        }
        if !done.more {
            return Ok(pass);
        }
        // Let the writers that queued behind the chunk's write go first.
        std::thread::yield_now();
    }
}

impl Compactor {
    /// Starts the thread; its first pass runs one `check_every` after the start.
    /// Passes run only while `leadership` says this process leads: with several replicas on
    /// one store, one of them deletes.
    pub fn start(
        store: Arc<dyn Store>,
        retention: Retention,
        leadership: Arc<Leadership>,
        on_delete: impl Fn(u64) + Send + Sync + 'static,
    ) -> Compactor {
        let shared = Arc::new(Shared {
            store,
            retention,
            leadership,
            stopping: Mutex::new(false),
            wake: Condvar::new(),
            deleted: AtomicU64::new(0),
            passes: AtomicU64::new(0),
            on_delete: Box::new(on_delete),
        });
        let worker = Arc::clone(&shared);
        Compactor {
            shared,
            thread: Threads::one("score-retention", move || worker.run()),
        }
    }

    /// Records deleted since the start.
    pub fn deleted(&self) -> u64 {
        self.shared.deleted.load(Ordering::SeqCst)
    }

    /// Passes finished since the start.
    pub fn passes(&self) -> u64 {
        self.shared.passes.load(Ordering::SeqCst)
    }

    /// Stops the thread (a pass in progress ends after its current chunk).
    pub fn stop(&self) {
        *lock(&self.shared.stopping) = true;
        self.shared.wake.notify_all();
        self.thread.join();
    }
}

impl Drop for Compactor {
    fn drop(&mut self) {
        self.stop();
    }
}

impl Shared {
    fn run(&self) {
        loop {
            {
                let stopping = lock(&self.stopping);
                let (stopping, _) = self
                    .wake
                    .wait_timeout_while(stopping, self.retention.check_every, |s| !*s)
                    .unwrap_or_else(|p| p.into_inner());
                if *stopping {
                    return;
                }
            }
            if !self.leadership.leads() {
                continue;
            }
            let started = Instant::now();
            let limits = self.retention.limits(now_ms());
            let result = compact(
                self.store.as_ref(),
                limits,
                &|| *lock(&self.stopping),
                &|n| {
                    self.deleted.fetch_add(n, Ordering::SeqCst);
                    (self.on_delete)(n);
                },
            );
            self.passes.fetch_add(1, Ordering::SeqCst);
            match result {
                Ok(pass) if pass.deleted > 0 => tracing::info!(
                    deleted = pass.deleted,
                    chunks = pass.chunks,
                    kept = self.store.score_count(),
                    ms = started.elapsed().as_millis() as u64,
                    "score records compacted"
                ),
                Ok(_) => tracing::debug!("score retention: nothing to delete"),
                Err(e) => {
                    tracing::error!(error = %e, "score retention failed; retrying next check")
                }
            }
        }
    }
}
