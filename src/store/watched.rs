//! Whether the store takes writes, learned from the writes the service makes anyway.
//!
//! A probe that proves writability with a durable write of its own costs a flush per call, and
//! orchestrators probe every few seconds from several places. Instead, [`Watched`] wraps the
//! store and notes how each write that passes through it ended (score batches, outcome
//! groups, examples, log entries, flushes, retention): the last result is in [`WriteWatch`],
//! which `/healthz` reads without touching the disk. Readiness asks [`WriteWatch::needs_proof`]
//! first and makes one small write of its own only when the last write failed (to see the
//! store recover while traffic is refused) or when nothing has been written for
//! [`PROOF_MAX_AGE`] (to notice a disk that failed while the service was idle): at most one
//! durable probe write per [`PROOF_MAX_AGE`] while the store is healthy, however often it is
//! probed.
//!
//! Only [`StoreError::Unavailable`] counts as a refused write; refusals about the data (an
//! unknown score, a conflicting label, ids out of order) say nothing about the disk.

use std::sync::atomic::{AtomicBool, AtomicI64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use super::{
    Compacted, EntryEffects, ExamplesAck, Freeze, NewOutcome, OutcomeResult, PendingSignOff,
    ScoreLimits, ScoreRecord, ShadowState, ShadowedOutcome, Store, StoreError, StoredExample,
};
use crate::model::Model;
use crate::promotion::{Entry, RunStatus};
use crate::time::{now_ms, Millis};

/// How long a successful write counts as proof that the store takes writes.
pub const PROOF_MAX_AGE: Duration = Duration::from_secs(5);

/// The outcome of the store's latest writes.
#[derive(Debug, Default)]
pub struct WriteWatch {
    /// When a write last succeeded (ms since the epoch); 0 before the first.
    last_ok: AtomicI64,
    /// When a write last failed; 0 before the first.
    last_failure: AtomicI64,
    /// The last write failed (and none has succeeded since).
    failing: AtomicBool,
    /// Why the last failed write failed.
    cause: Mutex<String>,
}

/// What a probe reports: the state of the latest writes, read without writing.
#[derive(Debug, Clone, PartialEq)]
pub struct WriteState {
    /// The latest write succeeded (false before any write).
    pub writable: bool,
    pub last_ok: Option<Millis>,
    pub last_failure: Option<Millis>,
    /// Why the latest write failed, while it is the latest.
    pub cause: Option<String>,
}

fn nonzero(ms: i64) -> Option<Millis> {
    (ms != 0).then_some(ms)
}

impl WriteWatch {
    pub fn new() -> WriteWatch {
        WriteWatch::default()
    }

    fn succeeded(&self, at: Millis) {
        self.last_ok.store(at, Ordering::Relaxed);
        if self.failing.load(Ordering::Relaxed) {
            self.failing.store(false, Ordering::SeqCst);
        }
    }

    fn failed(&self, at: Millis, cause: &str) {
        if let Ok(mut slot) = self.cause.lock() {
            cause.clone_into(&mut slot);
        }
        self.last_failure.store(at, Ordering::Relaxed);
        self.failing.store(true, Ordering::SeqCst);
    }

    /// Notes how one write ended.
    fn note<T>(&self, result: &Result<T, StoreError>) {
        match result {
            Ok(_) => self.succeeded(now_ms()),
            Err(StoreError::Unavailable(cause)) => self.failed(now_ms(), cause),
            Err(_) => {}
        }
    }

    /// The latest writes' state; no I/O.
    pub fn state(&self) -> WriteState {
        let failing = self.failing.load(Ordering::SeqCst);
        let last_ok = nonzero(self.last_ok.load(Ordering::Relaxed));
        WriteState {
            writable: !failing && last_ok.is_some(),
            last_ok,
            last_failure: nonzero(self.last_failure.load(Ordering::Relaxed)),
            cause: failing.then(|| self.cause.lock().map(|c| c.clone()).unwrap_or_default()),
        }
    }

    /// Whether a caller that must know the store takes writes *now* has to write to find out:
    /// the latest write failed, or none succeeded within `max_age` of `now`.
    pub fn needs_proof(&self, now: Millis, max_age: Duration) -> bool {
        let state = self.state();
        !state.writable
            || state
                .last_ok
                .is_none_or(|at| now - at > max_age.as_millis() as Millis)
    }
}

/// A store that notes the outcome of every write in a [`WriteWatch`] and otherwise passes
/// every call through.
pub struct Watched {
    inner: Arc<dyn Store>,
    watch: Arc<WriteWatch>,
}

impl Watched {
    pub fn new(inner: Arc<dyn Store>) -> Watched {
        Watched {
            inner,
            watch: Arc::new(WriteWatch::new()),
        }
    }

    pub fn watch(&self) -> Arc<WriteWatch> {
        Arc::clone(&self.watch)
    }

    fn noted<T>(&self, result: Result<T, StoreError>) -> Result<T, StoreError> {
        self.watch.note(&result);
        result
    }
}

impl Store for Watched {
    fn record_scores(&self, records: &[ScoreRecord]) -> Result<(), StoreError> {
        self.noted(self.inner.record_scores(records))
    }
    fn newest_score_id(&self) -> Option<String> {
        self.inner.newest_score_id()
    }
    fn score(&self, score_id: &str) -> Result<Option<ScoreRecord>, StoreError> {
        self.inner.score(score_id)
    }
    fn put_outcomes(&self, outcomes: &[NewOutcome]) -> Result<Vec<OutcomeResult>, StoreError> {
        self.noted(self.inner.put_outcomes(outcomes))
    }
    fn apply_outcomes(&self, outcomes: &[NewOutcome]) -> Result<Vec<OutcomeResult>, StoreError> {
        self.noted(self.inner.apply_outcomes(outcomes))
    }
    fn put_examples(&self, examples: &[StoredExample]) -> Result<ExamplesAck, StoreError> {
        self.noted(self.inner.put_examples(examples))
    }
    fn latest_examples(
        &self,
        max_rows: usize,
        since: Option<Millis>,
    ) -> Result<Vec<StoredExample>, StoreError> {
        self.inner.latest_examples(max_rows, since)
    }
    fn example_count(&self) -> usize {
        self.inner.example_count()
    }
    fn example(&self, id: &str) -> Result<Option<StoredExample>, StoreError> {
        self.inner.example(id)
    }
    fn next_seq(&self, counter: &str) -> Result<u64, StoreError> {
        self.noted(self.inner.next_seq(counter))
    }
    fn put_model(&self, model: &Model) -> Result<(), StoreError> {
        self.noted(self.inner.put_model(model))
    }
    fn model(&self, id: &str) -> Result<Option<Model>, StoreError> {
        self.inner.model(id)
    }
    fn models(&self) -> Result<Vec<Model>, StoreError> {
        self.inner.models()
    }
    fn append_entry(&self, entry: Entry, effects: EntryEffects<'_>) -> Result<Entry, StoreError> {
        self.noted(self.inner.append_entry(entry, effects))
    }
    fn entries(&self, limit: usize) -> Result<Vec<Entry>, StoreError> {
        self.inner.entries(limit)
    }
    fn entry(&self, seq: u64) -> Result<Option<Entry>, StoreError> {
        self.inner.entry(seq)
    }
    fn unfinished_runs(&self) -> Result<Vec<RunStatus>, StoreError> {
        self.inner.unfinished_runs()
    }
    fn active_history(&self) -> Result<Vec<String>, StoreError> {
        self.inner.active_history()
    }
    fn put_run(&self, run: &RunStatus) -> Result<(), StoreError> {
        self.noted(self.inner.put_run(run))
    }
    fn run(&self, run_id: &str) -> Result<Option<RunStatus>, StoreError> {
        self.inner.run(run_id)
    }
    fn flush(&self) -> Result<(), StoreError> {
        self.noted(self.inner.flush())
    }
    fn check_writable(&self) -> Result<(), StoreError> {
        self.noted(self.inner.check_writable())
    }
    fn recent_scores(
        &self,
        max: usize,
        since: Option<Millis>,
    ) -> Result<Vec<ScoreRecord>, StoreError> {
        self.inner.recent_scores(max, since)
    }
    fn score_count(&self) -> u64 {
        self.inner.score_count()
    }
    fn compact_scores(
        &self,
        limits: ScoreLimits,
        max_records: usize,
    ) -> Result<Compacted, StoreError> {
        self.noted(self.inner.compact_scores(limits, max_records))
    }
    fn has_outcome(&self, score_id: &str) -> Result<bool, StoreError> {
        self.inner.has_outcome(score_id)
    }
    fn shadow_state(&self) -> Result<Option<ShadowState>, StoreError> {
        self.inner.shadow_state()
    }
    fn set_shadow_state(&self, state: Option<&ShadowState>) -> Result<(), StoreError> {
        self.noted(self.inner.set_shadow_state(state))
    }
    fn shadowed_outcomes(&self, candidate_id: &str) -> Result<Vec<ShadowedOutcome>, StoreError> {
        self.inner.shadowed_outcomes(candidate_id)
    }
    fn shadowed_count(&self, candidate_id: &str) -> usize {
        self.inner.shadowed_count(candidate_id)
    }
    fn freeze(&self) -> Result<Option<Freeze>, StoreError> {
        self.inner.freeze()
    }
    fn pending_sign_off(&self) -> Result<Option<PendingSignOff>, StoreError> {
        self.inner.pending_sign_off()
    }
    fn set_freeze(&self, freeze: Option<&Freeze>) -> Result<(), StoreError> {
        self.noted(self.inner.set_freeze(freeze))
    }
    fn records_page(
        &self,
        table: crate::store::portable::Table,
        after: Option<&crate::store::portable::PageCursor>,
        max: usize,
    ) -> Result<crate::store::portable::RecordPage, StoreError> {
        self.inner.records_page(table, after, max)
    }
    fn restore_records(
        &self,
        records: &[crate::store::portable::RawRecord],
    ) -> Result<(), StoreError> {
        self.noted(self.inner.restore_records(records))
    }
    fn table_len(&self, table: crate::store::portable::Table) -> Result<u64, StoreError> {
        self.inner.table_len(table)
    }
    fn erase_all_records(&self) -> Result<(), StoreError> {
        self.noted(self.inner.erase_all_records())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::faults::{Fault, FaultyStore};
    use crate::store::SledStore;

    const AGE: Duration = Duration::from_secs(5);

    #[test]
    fn a_fresh_watch_knows_nothing_and_asks_for_proof() {
        let watch = WriteWatch::new();
        let state = watch.state();
        assert!(!state.writable);
        assert_eq!(state.last_ok, None);
        assert!(watch.needs_proof(1_000_000, AGE));
    }

    #[test]
    fn a_recent_success_is_proof_until_it_is_older_than_the_limit() {
        let watch = WriteWatch::new();
        watch.succeeded(1_000_000);
        assert!(watch.state().writable);
        assert!(!watch.needs_proof(1_000_000, AGE));
        assert!(
            !watch.needs_proof(1_005_000, AGE),
            "exactly 5 s old still counts"
        );
        assert!(watch.needs_proof(1_005_001, AGE), "older than 5 s does not");
    }

    #[test]
    fn a_failure_asks_for_proof_at_once_and_a_later_success_clears_it() {
        let watch = WriteWatch::new();
        watch.succeeded(1_000_000);
        watch.failed(1_000_100, "disk full");
        let state = watch.state();
        assert!(!state.writable);
        assert_eq!(state.cause.as_deref(), Some("disk full"));
        assert_eq!(state.last_failure, Some(1_000_100));
        assert!(watch.needs_proof(1_000_100, AGE));
        watch.succeeded(1_000_200);
        let state = watch.state();
        assert!(state.writable);
        assert_eq!(state.cause, None);
        assert_eq!(
            state.last_failure,
            Some(1_000_100),
            "the failure stays on record"
        );
        assert!(!watch.needs_proof(1_000_200, AGE));
    }

    #[test]
    fn writes_through_the_wrapper_are_noted_and_reads_and_data_refusals_are_not() {
        let dir = tempfile::tempdir().unwrap();
        let sled: Arc<dyn Store> = Arc::new(SledStore::open(dir.path()).unwrap());
        let faulty = Arc::new(FaultyStore::new(sled));
        let watched = Watched::new(Arc::clone(&faulty) as Arc<dyn Store>);
        let watch = watched.watch();
        assert!(!watch.state().writable, "nothing written yet");
        watched
            .record_scores(&[crate::store::test_record("01B")])
            .unwrap();
        assert!(watch.state().writable);

        faulty.set(Fault::Writes);
        // A read passes through without changing what the watch knows.
        watched.models().unwrap();
        assert!(watch.state().writable);
        let frozen = Freeze {
            since: 1_000,
            by: None,
            reason: None,
        };
        assert!(watched.set_freeze(Some(&frozen)).is_err());
        let state = watch.state();
        assert!(!state.writable);
        assert!(state.cause.unwrap().contains("injected fault"), "the cause");

        faulty.set(Fault::None);
        // Refused for its data (an id out of order), not for the disk: nothing learned.
        let refused = watched.record_scores(&[crate::store::test_record("01A")]);
        assert!(matches!(refused, Err(StoreError::ScoreOrder { .. })));
        assert!(!watch.state().writable);
        watched.check_writable().unwrap();
        assert!(watch.state().writable, "the probe write proved it again");
    }
}
