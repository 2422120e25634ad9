//! Group commit for outcomes: one writer thread turns whatever outcomes are waiting into one
//! store transaction and one flush, then answers each caller.
//!
//! Sixty-four callers each flushing their own write made sled flush sixty-four times; queued
//! here, the writer takes everything that arrived while the previous group was being written,
//! so a busier service writes bigger groups and flushes no more often. A caller's future
//! resolves only after its group is flushed: a 2xx still means durable.
//!
//! An outcome whose score is still in the [`ScoreRecorder`](super::recorder::ScoreRecorder)'s
//! buffer would read as unknown; the writer drains the recorder and retries those once, so
//! "unknown score id" is never an artefact of batching.

use std::sync::{Arc, Condvar, Mutex};
use std::thread::JoinHandle;

use tokio::sync::oneshot;

use super::recorder::RecorderDrain;
use super::{NewOutcome, OutcomeResult, Store, StoreError};

/// Outcomes written in one transaction, at most.
const MAX_GROUP: usize = 4096;

struct Waiting {
    outcome: NewOutcome,
    reply: oneshot::Sender<OutcomeResult>,
}

#[derive(Default)]
struct Queue {
    waiting: Vec<Waiting>,
    stopping: bool,
}

struct Shared {
    queue: Mutex<Queue>,
    wake: Condvar,
    store: Arc<dyn Store>,
    recorder: RecorderDrain,
}

/// Handle to the outcome writer thread; stopping it writes what is queued first.
pub struct OutcomeWriter {
    shared: Arc<Shared>,
    thread: Mutex<Option<JoinHandle<()>>>,
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|p| p.into_inner())
}

impl OutcomeWriter {
    pub fn start(store: Arc<dyn Store>, recorder: RecorderDrain) -> OutcomeWriter {
        let shared = Arc::new(Shared {
            queue: Mutex::new(Queue::default()),
            wake: Condvar::new(),
            store,
            recorder,
        });
        let worker = Arc::clone(&shared);
        let thread = std::thread::Builder::new()
            .name("outcome-writer".into())
            .spawn(move || worker.run())
            .expect("spawn outcome writer");
        OutcomeWriter {
            shared,
            thread: Mutex::new(Some(thread)),
        }
    }

    /// Queues one outcome and waits until its group is durable.
    pub async fn write(&self, outcome: NewOutcome) -> OutcomeResult {
        let (reply, answer) = oneshot::channel();
        {
            let mut queue = lock(&self.shared.queue);
            if queue.stopping {
                return Err(StoreError::Unavailable(
                    "the service is shutting down".into(),
                ));
            }
            queue.waiting.push(Waiting { outcome, reply });
        }
        self.shared.wake.notify_one();
        answer.await.unwrap_or_else(|_| {
            Err(StoreError::Unavailable(
                "the outcome writer stopped before answering".into(),
            ))
        })
    }

    /// Writes what is queued and stops the thread. Later writes are refused.
    pub fn stop(&self) {
        lock(&self.shared.queue).stopping = true;
        self.shared.wake.notify_one();
        if let Some(thread) = lock(&self.thread).take() {
            let _ = thread.join();
        }
    }
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
                return;
            }
        }
    }

    fn write_group(&self, group: Vec<Waiting>) {
        let outcomes: Vec<NewOutcome> = group.iter().map(|w| w.outcome.clone()).collect();
        let mut results = self.store.put_outcomes(&outcomes);
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
                match self.store.put_outcomes(&again) {
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
        match results {
            Ok(results) => {
                for (waiting, result) in group.into_iter().zip(results) {
                    let _ = waiting.reply.send(result);
                }
            }
            Err(e) => {
                for waiting in group {
                    let _ = waiting.reply.send(Err(e.clone()));
                }
            }
        }
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
    fn concurrent_outcomes_are_all_written_even_for_scores_still_buffered() {
        let dir = tempfile::tempdir().unwrap();
        let store: Arc<dyn Store> = Arc::new(SledStore::open(dir.path()).unwrap());
        let recorder = ScoreRecorder::start(Arc::clone(&store));
        let writer = Arc::new(OutcomeWriter::start(Arc::clone(&store), recorder.drainer()));
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
                at: 3_000
            })),
            Err(StoreError::Unavailable(_))
        ));
        assert_eq!(store.example_count(), 300);
    }
}
