//! Group commit for outcomes: one writer thread turns whatever outcomes are waiting into one
//! store transaction, and a flusher thread makes the written groups durable, then answers
//! each caller.
//!
//! Sixty-four callers each flushing their own write made sled flush sixty-four times; queued
//! here, the writer takes everything that arrived while the previous group was being written,
//! so a busier service writes bigger groups and flushes no more often. The flush of one group
//! overlaps the writing of the next (with 64 clients each caller waited for both, one after the
//! other). A caller's future resolves only after a flush that covers its group: a 2xx still
//! means durable.
//!
//! An outcome whose score is still in the [`ScoreRecorder`](super::recorder::ScoreRecorder)'s
//! buffer would read as unknown; the writer drains the recorder and retries those once, so
//! "unknown score id" is never an artefact of batching.
//!
//! On a store several replicas share, a score another replica answered reaches the store only
//! with that replica's next recorder batch, which this one cannot drain. An outcome for a score
//! id of the last seconds that reads as unknown therefore waits for it a little, retrying every
//! [`LAG_STEP`] for up to the `others_lag` given at start, before it is called unknown. The wait
//! is in the caller's task, not in the writer, so other outcomes never wait behind it.

use std::sync::{Arc, Condvar, Mutex};

use tokio::sync::oneshot;

use super::recorder::RecorderDrain;
use super::{NewOutcome, OutcomeResult, Store, StoreError};
use crate::threads::{lock, Threads};

/// Outcomes written in one transaction, at most.
const MAX_GROUP: usize = 4096;

/// How long an outcome for another replica's record waits between tries.
const LAG_STEP: std::time::Duration = std::time::Duration::from_millis(10);

/// Score ids younger than this may still be in another replica's recorder; older unknown
/// ones are not waited for.
const RECENT_MS: i64 = 5_000;

struct Waiting {
    outcome: NewOutcome,
    reply: oneshot::Sender<OutcomeResult>,
}

#[derive(Default)]
struct Queue {
    waiting: Vec<Waiting>,
    stopping: bool,
}

/// Groups written and not yet durable, with the answers they will get once they are.
#[derive(Default)]
struct Written {
    answers: Vec<(oneshot::Sender<OutcomeResult>, OutcomeResult)>,
    /// The writer has stopped: flush what is here and stop too.
    stopping: bool,
}

struct Shared {
    queue: Mutex<Queue>,
    wake: Condvar,
    written: Mutex<Written>,
    written_wake: Condvar,
    store: Arc<dyn Store>,
    recorder: RecorderDrain,
}

/// Handle to the outcome writer and flusher threads; stopping them writes what is queued
/// first.
pub struct OutcomeWriter {
    shared: Arc<Shared>,
    threads: Threads,
    /// How long an outcome for a recent, unknown score id waits for another replica's record.
    others_lag: std::time::Duration,
}

impl OutcomeWriter {
    /// `others_lag`: zero when this process is the only one writing score records; else how
    /// long an outcome for a recent score id waits for its record before it is called unknown.
    pub fn start(
        store: Arc<dyn Store>,
        recorder: RecorderDrain,
        others_lag: std::time::Duration,
    ) -> OutcomeWriter {
        let shared = Arc::new(Shared {
            queue: Mutex::new(Queue::default()),
            wake: Condvar::new(),
            written: Mutex::new(Written::default()),
            written_wake: Condvar::new(),
            store,
            recorder,
        });
        let writer = Arc::clone(&shared);
        let flusher = Arc::clone(&shared);
        let threads = Threads::default();
        threads.spawn("outcome-writer", move || writer.run());
        threads.spawn("outcome-flusher", move || flusher.run_flusher());
        OutcomeWriter {
            shared,
            threads,
            others_lag,
        }
    }

    /// Queues one outcome and waits until its group is durable (and, for a recent score id
    /// another replica may still be writing, until its record arrived or `others_lag` passed).
    pub async fn write(&self, outcome: NewOutcome) -> OutcomeResult {
        if self.others_lag.is_zero() {
            return self.write_once(outcome).await;
        }
        let deadline = tokio::time::Instant::now() + self.others_lag;
        loop {
            let result = self.write_once(outcome.clone()).await;
            let waits = matches!(result, Err(StoreError::UnknownScore(_)))
                && tokio::time::Instant::now() + LAG_STEP <= deadline
                && recent_score_id(&outcome.score_id, outcome.at);
            if !waits {
                return result;
            }
            tokio::time::sleep(LAG_STEP).await;
        }
    }

    async fn write_once(&self, outcome: NewOutcome) -> OutcomeResult {
        let (reply, answer) = oneshot::channel();
        let first = {
            let mut queue = lock(&self.shared.queue);
            if queue.stopping {
                return Err(StoreError::Unavailable(
                    "the service is shutting down".into(),
                ));
            }
            queue.waiting.push(Waiting { outcome, reply });
            queue.waiting.len() == 1
        };
        // The writer waits only on an empty queue, so only the outcome that ends one wakes it
        // (a notify is a system call even with no one waiting).
        if first {
            self.shared.wake.notify_one();
        }
        answer.await.unwrap_or_else(|_| {
            Err(StoreError::Unavailable(
                "the outcome writer stopped before answering".into(),
            ))
        })
    }

    /// Writes and flushes what is queued and stops both threads. Later writes are refused.
    pub fn stop(&self) {
        lock(&self.shared.queue).stopping = true;
        self.shared.wake.notify_one();
        // The writer stops first and then tells the flusher, so nothing written is left
        // unflushed or unanswered.
        self.threads.join();
    }
}

/// Whether `score_id` is a ULID of the last [`RECENT_MS`] before `now` (or a little after it:
/// replicas' clocks differ).
fn recent_score_id(score_id: &str, now: crate::time::Millis) -> bool {
    ulid::Ulid::from_string(score_id).is_ok_and(|id| {
        let age = now - id.timestamp_ms() as i64;
        (-RECENT_MS..=RECENT_MS).contains(&age)
    })
}

impl Drop for OutcomeWriter {
    fn drop(&mut self) {
        self.stop();
    }
}

impl Shared {
    fn run(&self) {
        loop {
            let (group, stopping) = {
                let mut queue = self
                    .wake
                    .wait_while(lock(&self.queue), |q| q.waiting.is_empty() && !q.stopping)
                    .unwrap_or_else(|p| p.into_inner());
                let take = queue.waiting.len().min(MAX_GROUP);
                let group: Vec<Waiting> = queue.waiting.drain(..take).collect();
                (group, queue.stopping && queue.waiting.is_empty())
            };
            if !group.is_empty() {
                self.write_group(group);
            }
            if stopping {
                lock(&self.written).stopping = true;
                self.written_wake.notify_one();
                return;
            }
        }
    }

    /// Flushes every written group it finds waiting, then answers their callers: the answers
    /// stand when the flush succeeds, and all become the flush's error when it fails (a
    /// duplicate may be a duplicate of a write that flush was to make durable).
    fn run_flusher(&self) {
        loop {
            let (answers, stopping) = {
                let mut written = self
                    .written_wake
                    .wait_while(lock(&self.written), |w| w.answers.is_empty() && !w.stopping)
                    .unwrap_or_else(|p| p.into_inner());
                (std::mem::take(&mut written.answers), written.stopping)
            };
            let flushed = if answers.iter().any(|(_, result)| result.is_ok()) {
                self.store.flush()
            } else {
                Ok(())
            };
            for (reply, result) in answers {
                let _ = reply.send(match (&flushed, result) {
                    (Err(e), Ok(_)) => Err(e.clone()),
                    (_, result) => result,
                });
            }
            if stopping && lock(&self.written).answers.is_empty() {
                return;
            }
        }
    }

    fn write_group(&self, group: Vec<Waiting>) {
        let outcomes: Vec<NewOutcome> = group.iter().map(|w| w.outcome.clone()).collect();
        let mut results = self.store.apply_outcomes(&outcomes);
        let unknown = |results: &Result<Vec<OutcomeResult>, StoreError>| {
            results.as_ref().is_ok_and(|r| {
                r.iter()
                    .any(|r| matches!(r, Err(StoreError::UnknownScore(_))))
            })
        };
        if unknown(&results) {
            // Scores still in the recorder's buffer: write them out, then retry only those.
            if let Err(e) = self.recorder.drain() {
                tracing::error!(error = %e, "score records could not be written for an outcome");
            }
            if let Ok(first) = &mut results {
                let retry: Vec<usize> = (0..first.len())
                    .filter(|&i| matches!(first[i], Err(StoreError::UnknownScore(_))))
                    .collect();
                let again: Vec<NewOutcome> = retry.iter().map(|&i| outcomes[i].clone()).collect();
                match self.store.apply_outcomes(&again) {
                    Ok(second) => {
                        for (i, result) in retry.into_iter().zip(second) {
                            first[i] = result;
                        }
                    }
                    Err(e) => {
                        for i in retry {
                            first[i] = Err(e.clone());
                        }
                    }
                }
            }
        }
        let answers: Vec<(oneshot::Sender<OutcomeResult>, OutcomeResult)> = match results {
            Ok(results) => group.into_iter().map(|w| w.reply).zip(results).collect(),
            Err(e) => group
                .into_iter()
                .map(|w| (w.reply, Err(e.clone())))
                .collect(),
        };
        lock(&self.written).answers.extend(answers);
        self.written_wake.notify_one();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::recorder::ScoreRecorder;
    use crate::store::{OutcomeAck, ScoreRecord, SledStore};

    fn record(id: String) -> ScoreRecord {
        crate::store::test_record(&id)
    }

    #[test]
    fn a_failed_flush_answers_every_outcome_of_its_groups_with_the_error() {
        use crate::store::faults::{Fault, FaultyStore};
        let dir = tempfile::tempdir().unwrap();
        let faulty = Arc::new(FaultyStore::new(Arc::new(
            SledStore::open(dir.path()).unwrap(),
        )));
        let store: Arc<dyn Store> = Arc::clone(&faulty) as Arc<dyn Store>;
        let records: Vec<ScoreRecord> = (0..2)
            .map(|i| {
                let mut r = record(ulid::Ulid::from_parts(1_000, i).to_string());
                r.at = 1_000;
                r
            })
            .collect();
        store.record_scores(&records).unwrap();
        let recorder = ScoreRecorder::start(Arc::clone(&store));
        let writer = OutcomeWriter::start(
            Arc::clone(&store),
            recorder.drainer(),
            std::time::Duration::ZERO,
        );
        let runtime = tokio::runtime::Builder::new_current_thread()
            .build()
            .unwrap();
        let outcome = |i: usize, label: f64| NewOutcome {
            score_id: records[i].score_id.clone(),
            label,
            at: 2_000,
            monitoring: Default::default(),
        };
        // The write applies, the flush fails: the caller hears the failure, not a 2xx.
        faulty.set(Fault::Flushes);
        assert!(matches!(
            runtime.block_on(writer.write(outcome(0, 1.0))),
            Err(StoreError::Unavailable(_))
        ));
        // Once flushes work again, the applied label is found and answered as stored, and a
        // new one is recorded.
        faulty.set(Fault::None);
        assert!(matches!(
            runtime.block_on(writer.write(outcome(0, 1.0))),
            Ok(OutcomeAck::Duplicate)
        ));
        assert!(matches!(
            runtime.block_on(writer.write(outcome(1, 0.0))),
            Ok(OutcomeAck::Recorded)
        ));
        writer.stop();
        assert_eq!(store.example_count(), 2);
    }

    #[test]
    fn an_outcome_for_another_writers_fresh_score_waits_for_its_record_within_the_lag() {
        let dir = tempfile::tempdir().unwrap();
        let store: Arc<dyn Store> = Arc::new(SledStore::open(dir.path()).unwrap());
        let recorder = ScoreRecorder::start(Arc::clone(&store));
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_time()
            .build()
            .unwrap();
        let now = crate::time::now_ms();
        let fresh = |i: u128| ulid::Ulid::from_parts(now as u64, i).to_string();
        let outcome = |score_id: &str| NewOutcome {
            score_id: score_id.to_owned(),
            label: 1.0,
            at: now,
            monitoring: Default::default(),
        };
        // Another process writes the record a moment after the outcome arrives here.
        let late = |id: String, delay: std::time::Duration| {
            let store = Arc::clone(&store);
            std::thread::spawn(move || {
                std::thread::sleep(delay);
                store.record_scores(&[record(id)]).unwrap();
            })
        };
        let patient = OutcomeWriter::start(
            Arc::clone(&store),
            recorder.drainer(),
            std::time::Duration::from_secs(5),
        );
        let writer = late(fresh(1), std::time::Duration::from_millis(40));
        assert!(matches!(
            runtime.block_on(patient.write(outcome(&fresh(1)))),
            Ok(OutcomeAck::Recorded)
        ));
        writer.join().unwrap();
        // An id that is not a recent ULID is not waited for: unknown at once.
        assert!(matches!(
            runtime.block_on(patient.write(outcome("not-a-ulid"))),
            Err(StoreError::UnknownScore(_))
        ));
        patient.stop();
        // Alone on its store, a writer calls it unknown without waiting.
        let alone = OutcomeWriter::start(
            Arc::clone(&store),
            recorder.drainer(),
            std::time::Duration::ZERO,
        );
        let writer = late(fresh(2), std::time::Duration::from_millis(500));
        assert!(matches!(
            runtime.block_on(alone.write(outcome(&fresh(2)))),
            Err(StoreError::UnknownScore(_))
        ));
        writer.join().unwrap();
        alone.stop();
    }

    #[test]
    fn concurrent_outcomes_are_all_written_even_for_scores_still_buffered() {
        let dir = tempfile::tempdir().unwrap();
        let store: Arc<dyn Store> = Arc::new(SledStore::open(dir.path()).unwrap());
        let recorder = ScoreRecorder::start(Arc::clone(&store));
        let writer = Arc::new(OutcomeWriter::start(
            Arc::clone(&store),
            recorder.drainer(),
            std::time::Duration::ZERO,
        ));
        let runtime = tokio::runtime::Builder::new_multi_thread()
            .worker_threads(2)
            .enable_time()
            .build()
            .unwrap();
        // Pushed, not yet written: the recorder's thread writes every 20 ms at the earliest.
        runtime
            .block_on(recorder.reserve(300, std::time::Duration::from_secs(1)))
            .unwrap();
        let ids: Vec<String> = (0..300)
            .map(|i| recorder.push(record(format!("s{i:04}"))))
            .collect();
        let results: Vec<OutcomeResult> = runtime.block_on(async {
            let tasks: Vec<_> = (0..300)
                .map(|i| {
                    let writer = Arc::clone(&writer);
                    let score_id = ids[i].clone();
                    tokio::spawn(async move {
                        writer
                            .write(NewOutcome {
                                score_id,
                                label: (i % 2) as f64,
                                at: 2_000,
                                monitoring: Default::default(),
                            })
                            .await
                    })
                })
                .collect();
            let mut results = Vec::new();
            for task in tasks {
                results.push(task.await.unwrap());
            }
            results
        });
        assert!(
            results
                .iter()
                .all(|r| matches!(r, Ok(OutcomeAck::Recorded))),
            "{:?}",
            results.iter().find(|r| r.is_err())
        );
        writer.stop();
        assert!(matches!(
            runtime.block_on(writer.write(NewOutcome {
                score_id: ids[0].clone(),
                label: 0.0,
                at: 3_000,
                monitoring: Default::default(),
            })),
            Err(StoreError::Unavailable(_))
        ));
        assert_eq!(store.example_count(), 300);
    }
}
