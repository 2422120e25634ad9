//! Writes score records in batches on a background thread, so no disk write sits on the
//! scoring response path.
//!
//! Handlers call [`ScoreRecorder::push`] (a short mutex hold and a `Vec` push), which also
//! assigns the score id: ids are ULIDs that increase in push order, so every batch continues
//! the last and the store can write records many to a key (`score_pages`). The writer
//! thread wakes every [`FLUSH_EVERY`] or when [`BATCH`] records are pending and writes them in
//! one sled batch. The outcome writer drains it before it calls a score unknown, so "unknown
//! score id" is never an artefact of batching.

use std::sync::{Arc, Condvar, Mutex};
use std::time::Duration;

use tokio::sync::Semaphore;
use ulid::Ulid;

use super::{ScoreRecord, Store, StoreError};
use crate::threads::{lock, Threads};
use crate::time::Millis;

const FLUSH_EVERY: Duration = Duration::from_millis(20);
/// Records that wake the writer before its next [`FLUSH_EVERY`]: under load it writes about every
/// 20 ms rather than on every 512th record, as it did; each write also wakes sled's I/O threads,
/// and the larger batches took 0.5 us of CPU off a score (BENCHMARKS.md, "One front door").
const BATCH: usize = 4096;

/// Records the buffer holds at most (about 50 MB of 30-feature records). Scoring waits for
/// room beyond it ([`ScoreRecorder::reserve`]), so a burst the disk cannot keep up with slows
/// scoring down instead of growing memory without bound, and an outcome never waits behind
/// more than this many records.
pub const CAPACITY: usize = 65_536;

/// The buffer stayed full for the whole wait.
#[derive(Debug, thiserror::Error)]
#[error("{CAPACITY} score records are waiting to be written; the store is not keeping up")]
pub struct RecorderFull;

struct Shared {
    pending: Mutex<Pending>,
    wake: Condvar,
    /// Held while a batch is being written, so `drain` can wait for an in-flight write.
    writing: Mutex<()>,
    store: Arc<dyn Store>,
    /// Room in the buffer, in records: taken by `reserve`, given back once written.
    room: Semaphore,
}

struct Pending {
    records: Vec<ScoreRecord>,
    /// The last id assigned; the next is above it.
    last_id: Ulid,
    stopping: bool,
}

/// A fresh ULID above `last`: now and random if that is above it, else `last` plus one (in the
/// same millisecond, or when the clock stepped back).
fn next_id(last: Ulid) -> Ulid {
    let fresh = Ulid::new();
    if fresh > last {
        return fresh;
    }
    last.increment()
        .unwrap_or_else(|| Ulid::from_parts(last.timestamp_ms() + 1, 0))
}

/// Handle to the background score writer; stopping it drains what is pending.
pub struct ScoreRecorder {
    shared: Arc<Shared>,
    thread: Threads,
}

impl ScoreRecorder {
    pub fn start(store: Arc<dyn Store>) -> ScoreRecorder {
        // Ids continue above the newest stored one, even if the clock is behind it.
        let last_id = store
            .newest_score_id()
            .and_then(|id| Ulid::from_string(&id).ok())
            .unwrap_or(Ulid::nil());
        let shared = Arc::new(Shared {
            pending: Mutex::new(Pending {
                records: Vec::new(),
                last_id,
                stopping: false,
            }),
            wake: Condvar::new(),
            writing: Mutex::new(()),
            store,
            room: Semaphore::new(CAPACITY),
        });
        let worker = Arc::clone(&shared);
        ScoreRecorder {
            shared,
            thread: Threads::one("score-recorder", move || worker.run()),
        }
    }

    /// Waits up to `wait` for room for `records` more records (at most [`CAPACITY`]); each
    /// reserved record must then be [`push`](Self::push)ed.
    pub async fn reserve(&self, records: usize, wait: Duration) -> Result<(), RecorderFull> {
        let wanted = u32::try_from(records.min(CAPACITY)).unwrap_or(u32::MAX);
        // The usual case, room at once, without building a timer first.
        if let Ok(permit) = self.shared.room.try_acquire_many(wanted) {
            permit.forget();
            return Ok(());
        }
        match tokio::time::timeout(wait, self.shared.room.acquire_many(wanted)).await {
            Ok(Ok(permit)) => {
                permit.forget();
                Ok(())
            }
            _ => Err(RecorderFull),
        }
    }

    /// Gives back room taken by [`reserve`](Self::reserve) for records that will not be
    /// pushed after all.
    pub fn release(&self, records: usize) {
        self.shared.room.add_permits(records.min(CAPACITY));
    }

    /// Records queued and not yet written.
    pub fn pending(&self) -> usize {
        CAPACITY.saturating_sub(self.shared.room.available_permits())
    }

    /// Queues a record for writing (room for it taken by `reserve`), giving it its score id
    /// and time (whatever `score_id` and `at` it came with are replaced). Returns the id.
    pub fn push(&self, mut record: ScoreRecord) -> String {
        let mut pending = lock(&self.shared.pending);
        let id = next_id(pending.last_id);
        pending.last_id = id;
        record.score_id = id.to_string();
        record.at = id.timestamp_ms() as Millis;
        let score_id = record.score_id.clone();
        pending.records.push(record);
        if pending.records.len() >= BATCH {
            self.shared.wake.notify_one();
        }
        score_id
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
        self.thread.join();
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
        self.room.add_permits(batch.len().min(CAPACITY));
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::SledStore;

    fn record(i: usize) -> ScoreRecord {
        crate::store::test_record(&format!("s{i:06}"))
    }

    #[test]
    fn a_full_buffer_refuses_more_until_records_are_written() {
        let dir = tempfile::tempdir().unwrap();
        let store: Arc<dyn Store> = Arc::new(SledStore::open(dir.path()).unwrap());
        let recorder = ScoreRecorder::start(Arc::clone(&store));
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_time()
            .build()
            .unwrap();
        let short = Duration::from_millis(50);
        runtime
            .block_on(recorder.reserve(CAPACITY, short))
            .expect("an empty buffer has room for CAPACITY records");
        assert_eq!(recorder.pending(), CAPACITY);
        assert!(runtime.block_on(recorder.reserve(1, short)).is_err());
        // Ten records written give back exactly ten places.
        let ids: Vec<String> = (0..10).map(|i| recorder.push(record(i))).collect();
        recorder.drain().unwrap();
        assert_eq!(recorder.pending(), CAPACITY - 10);
        runtime
            .block_on(recorder.reserve(10, short))
            .expect("room for the ten written");
        assert!(runtime.block_on(recorder.reserve(1, short)).is_err());
        assert!(store.score(&ids[9]).unwrap().is_some());
    }

    #[test]
    fn room_released_unused_can_be_reserved_again() {
        let dir = tempfile::tempdir().unwrap();
        let store: Arc<dyn Store> = Arc::new(SledStore::open(dir.path()).unwrap());
        let recorder = ScoreRecorder::start(store);
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_time()
            .build()
            .unwrap();
        let short = Duration::from_millis(50);
        runtime.block_on(recorder.reserve(CAPACITY, short)).unwrap();
        assert!(runtime.block_on(recorder.reserve(3, short)).is_err());
        recorder.release(3);
        assert_eq!(recorder.pending(), CAPACITY - 3);
        runtime
            .block_on(recorder.reserve(3, short))
            .expect("the three released places");
        assert!(runtime.block_on(recorder.reserve(1, short)).is_err());
    }

    #[test]
    fn a_score_waiting_for_room_gets_it_when_room_is_given_back_meanwhile() {
        let dir = tempfile::tempdir().unwrap();
        let store: Arc<dyn Store> = Arc::new(SledStore::open(dir.path()).unwrap());
        let recorder = Arc::new(ScoreRecorder::start(store));
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_time()
            .build()
            .unwrap();
        runtime
            .block_on(recorder.reserve(CAPACITY, Duration::from_millis(50)))
            .unwrap();
        // Nothing is pushed, so only the release below can make room: the reserve must wait.
        let given = Arc::new(std::sync::atomic::AtomicBool::new(false));
        let giver = {
            let (recorder, given) = (Arc::clone(&recorder), Arc::clone(&given));
            std::thread::spawn(move || {
                std::thread::sleep(Duration::from_millis(100));
                given.store(true, std::sync::atomic::Ordering::SeqCst);
                recorder.release(2);
            })
        };
        runtime
            .block_on(recorder.reserve(2, Duration::from_secs(10)))
            .expect("the two places given back");
        assert!(
            given.load(std::sync::atomic::Ordering::SeqCst),
            "the reserve returned only after the room was given back"
        );
        giver.join().unwrap();
        assert_eq!(recorder.pending(), CAPACITY);
    }
}
