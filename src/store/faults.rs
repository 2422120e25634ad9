//! A store that fails on demand, for proving what the service does when its disk does.
//!
//! [`FaultyStore`] wraps any [`Store`] and passes every call through until a fault is switched
//! on: [`Fault::Writes`] makes every write fail as a full or read-only disk would
//! (`StoreError::Unavailable`), [`Fault::Flushes`] lets writes apply but makes every flush
//! fail (nothing becomes durable), [`Fault::ExampleReads`] makes reading the training window
//! fail, and [`Fault::ExampleReadsPanic`] makes it panic. Faults switch off as they switch on, while
//! the service runs, so tests can watch it recover without a restart.

use std::sync::atomic::{AtomicU8, AtomicUsize, Ordering};
use std::sync::Arc;

use super::{
    Compacted, EntryEffects, ExamplesAck, Freeze, NewOutcome, OutcomeResult, PendingSignOff,
    ScoreLimits, ScoreRecord, ShadowState, ShadowedOutcome, Store, StoreError, StoredExample,
};
use crate::model::Model;
use crate::promotion::{Entry, RunStatus};
use crate::time::Millis;

/// What fails.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u8)]
pub enum Fault {
    None = 0,
    Writes = 1,
    ExampleReads = 2,
    ExampleReadsPanic = 3,
    Flushes = 4,
}

pub struct FaultyStore {
    inner: Arc<dyn Store>,
    fault: AtomicU8,
    /// Calls of `check_writable` (a durable write made only to prove the store takes writes).
    probes: AtomicUsize,
}

impl FaultyStore {
    pub fn new(inner: Arc<dyn Store>) -> FaultyStore {
        FaultyStore {
            inner,
            fault: AtomicU8::new(Fault::None as u8),
            probes: AtomicUsize::new(0),
        }
    }

    /// How many probe writes (`check_writable`) have reached this store.
    pub fn probe_writes(&self) -> usize {
        self.probes.load(Ordering::SeqCst)
    }

    pub fn set(&self, fault: Fault) {
        self.fault.store(fault as u8, Ordering::SeqCst);
    }

    fn is(&self, fault: Fault) -> bool {
        self.fault.load(Ordering::SeqCst) == fault as u8
    }

    fn write(&self) -> Result<(), StoreError> {
        if self.is(Fault::Writes) {
            Err(StoreError::Unavailable(
                "injected fault: the disk refuses writes".into(),
            ))
        } else {
            Ok(())
        }
    }
}

impl Store for FaultyStore {
    fn record_scores(&self, records: &[ScoreRecord]) -> Result<(), StoreError> {
        self.write()?;
        self.inner.record_scores(records)
    }
    fn newest_score_id(&self) -> Option<String> {
        self.inner.newest_score_id()
    }
    fn score(&self, score_id: &str) -> Result<Option<ScoreRecord>, StoreError> {
        self.inner.score(score_id)
    }
    fn put_outcomes(&self, outcomes: &[NewOutcome]) -> Result<Vec<OutcomeResult>, StoreError> {
        self.write()?;
        self.inner.put_outcomes(outcomes)
    }
    fn apply_outcomes(&self, outcomes: &[NewOutcome]) -> Result<Vec<OutcomeResult>, StoreError> {
        self.write()?;
        self.inner.apply_outcomes(outcomes)
    }
    fn put_examples(&self, examples: &[StoredExample]) -> Result<ExamplesAck, StoreError> {
        self.write()?;
        self.inner.put_examples(examples)
    }
    fn latest_examples(
        &self,
        max_rows: usize,
        since: Option<Millis>,
    ) -> Result<Vec<StoredExample>, StoreError> {
        if self.is(Fault::ExampleReads) {
            return Err(StoreError::Unavailable(
                "injected fault: the examples cannot be read".into(),
            ));
        }
        if self.is(Fault::ExampleReadsPanic) {
            panic!("injected fault: reading the examples panicked");
        }
        self.inner.latest_examples(max_rows, since)
    }
    fn example_count(&self) -> usize {
        self.inner.example_count()
    }
    fn next_seq(&self, counter: &str) -> Result<u64, StoreError> {
        self.write()?;
        self.inner.next_seq(counter)
    }
    fn put_model(&self, model: &Model) -> Result<(), StoreError> {
        self.write()?;
        self.inner.put_model(model)
    }
    fn model(&self, id: &str) -> Result<Option<Model>, StoreError> {
        self.inner.model(id)
    }
    fn models(&self) -> Result<Vec<Model>, StoreError> {
        self.inner.models()
    }
    fn append_entry(&self, entry: Entry, effects: EntryEffects<'_>) -> Result<Entry, StoreError> {
        self.write()?;
        self.inner.append_entry(entry, effects)
    }
    fn example(&self, id: &str) -> Result<Option<StoredExample>, StoreError> {
        self.inner.example(id)
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
        self.write()?;
        self.inner.put_run(run)
    }
    fn run(&self, run_id: &str) -> Result<Option<RunStatus>, StoreError> {
        self.inner.run(run_id)
    }
    fn flush(&self) -> Result<(), StoreError> {
        self.write()?;
        if self.is(Fault::Flushes) {
            return Err(StoreError::Unavailable(
                "injected fault: the disk does not complete a flush".into(),
            ));
        }
        self.inner.flush()
    }
    fn check_writable(&self) -> Result<(), StoreError> {
        self.probes.fetch_add(1, Ordering::SeqCst);
        self.write()?;
        self.inner.check_writable()
    }
    fn recent_scores(
        &self,
        max: usize,
        since: Option<Millis>,
    ) -> Result<Vec<ScoreRecord>, StoreError> {
        self.inner.recent_scores(max, since)
    }
    fn has_outcome(&self, score_id: &str) -> Result<bool, StoreError> {
        self.inner.has_outcome(score_id)
    }
    fn shadow_state(&self) -> Result<Option<ShadowState>, StoreError> {
        self.inner.shadow_state()
    }
    fn set_shadow_state(&self, state: Option<&ShadowState>) -> Result<(), StoreError> {
        self.write()?;
        self.inner.set_shadow_state(state)
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
        self.write()?;
        self.inner.set_freeze(freeze)
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
        self.write()?;
        self.inner.restore_records(records)
    }
    fn table_len(&self, table: crate::store::portable::Table) -> Result<u64, StoreError> {
        self.inner.table_len(table)
    }
    fn erase_all_records(&self) -> Result<(), StoreError> {
        self.write()?;
        self.inner.erase_all_records()
    }
    fn score_count(&self) -> u64 {
        self.inner.score_count()
    }
    fn compact_scores(
        &self,
        limits: ScoreLimits,
        max_records: usize,
    ) -> Result<Compacted, StoreError> {
        self.write()?;
        self.inner.compact_scores(limits, max_records)
    }
}
