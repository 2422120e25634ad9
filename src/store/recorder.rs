//! Writes score records in batches on a background thread, so no disk write sits on the
//! scoring response path.
//!
//! Handlers call [`ScoreRecorder::push`] (a short mutex hold and a `Vec` push). The writer
//! thread wakes every [`FLUSH_EVERY`] or when [`BATCH`] records are pending and writes them in
//! one sled batch. The outcome writer drains it before it calls a score unknown, so "unknown
//! score id" is never an artefact of batching.

use std::sync::{Arc, Condvar, Mutex};
use std::thread::JoinHandle;
use std::time::Duration;

use super::{ScoreRecord, Store, StoreError};

const FLUSH_EVERY: Duration = Duration::from_millis(20);
const BATCH: usize = 512;

struct Shared {
    pending: Mutex<Pending>,
    wake: Condvar,
    /// Held while a batch is being written, so `drain` can wait for an in-flight write.
    writing: Mutex<()>,
    store: Arc<dyn Store>,
}

#[derive(Default)]
struct Pending {
    records: Vec<ScoreRecord>,
    stopping: bool,
}

/// Handle to the background score writer; stopping it drains what is pending.
pub struct ScoreRecorder {
    shared: Arc<Shared>,
    thread: Mutex<Option<JoinHandle<()>>>,
}

impl ScoreRecorder {
    pub fn start(store: Arc<dyn Store>) -> ScoreRecorder {
        let shared = Arc::new(Shared {
            pending: Mutex::new(Pending::default()),
            wake: Condvar::new(),
            writing: Mutex::new(()),
            store,
        });
        let worker = Arc::clone(&shared);
        let thread = std::thread::Builder::new()
            .name("score-recorder".into())
            .spawn(move || worker.run())
            .expect("spawn score recorder");
        ScoreRecorder {
            shared,
            thread: Mutex::new(Some(thread)),
        }
    }

    /// Queues a record for writing.
    pub fn push(&self, record: ScoreRecord) {
        let mut pending = lock(&self.shared.pending);
        pending.records.push(record);
        if pending.records.len() >= BATCH {
            self.shared.wake.notify_one();
        }
    }

    /// Writes everything queued so far (and waits for a batch already being written).
    pub fn drain(&self) -> Result<(), StoreError> {
        self.shared.write_pending()
    }

    /// A handle that can only drain, for writers that join on score records.
    pub fn drainer(&self) -> RecorderDrain {
        RecorderDrain(Arc::clone(&self.shared))
    }

    /// Drains and stops the writer thread.
    pub fn stop(&self) -> Result<(), StoreError> {
        lock(&self.shared.pending).stopping = true;
        self.shared.wake.notify_one();
        if let Some(thread) = lock(&self.thread).take() {
            let _ = thread.join();
        }
        self.shared.write_pending()
    }
}

/// Drains a [`ScoreRecorder`]'s buffer; see [`ScoreRecorder::drainer`].
#[derive(Clone)]
pub struct RecorderDrain(Arc<Shared>);

impl RecorderDrain {
    pub fn drain(&self) -> Result<(), StoreError> {
        self.0.write_pending()
    }
}

impl Drop for ScoreRecorder {
    fn drop(&mut self) {
        let _ = self.stop();
    }
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|p| p.into_inner())
}

impl Shared {
    fn run(&self) {
        loop {
            let stopping = {
                let pending = lock(&self.pending);
                let (pending, _) = self
                    .wake
                    .wait_timeout_while(pending, FLUSH_EVERY, |p| {
                        p.records.len() < BATCH && !p.stopping
                    })
                    .unwrap_or_else(|p| p.into_inner());
                pending.stopping
            };
            if let Err(e) = self.write_pending() {
                tracing::error!(error = %e, "score records could not be written; they stay queued");
            }
            if stopping {
                return;
            }
        }
    }

    fn write_pending(&self) -> Result<(), StoreError> {
        let _writing = lock(&self.writing);
        let batch = std::mem::take(&mut lock(&self.pending).records);
        if batch.is_empty() {
            return Ok(());
        }
        if let Err(e) = self.store.record_scores(&batch) {
            // Put them back in front so nothing is dropped; the next attempt retries.
            let mut pending = lock(&self.pending);
            let newer = std::mem::replace(&mut pending.records, batch);
            pending.records.extend(newer);
            return Err(e);
        }
        Ok(())
    }
}
