//! Everything that touches disk: score records, outcomes, labeled examples, models, the
//! promotion log, run bookkeeping and the store's layout version.
//!
//! [`Store`] is the seam; [`sled_store::SledStore`] the embedded implementation, and
//! [`pg_store::PgStore`] the one on PostgreSQL that several processes share. Both pass the
//! same contract suite (`contract`). Writes that
//! callers acknowledge with a 2xx (outcomes, examples, log entries) return only after the data
//! is flushed, with concurrent flushes coalesced (group commit). Score records are written in
//! batches off the response path by [`recorder::ScoreRecorder`].

pub mod faults;
pub mod outcome_writer;
pub mod pg_store;
pub mod portable;
pub mod recorded;
pub mod recorder;
pub mod replicas;
pub mod retention;
pub mod score_pages;
pub mod sled_store;
pub mod transfer;
pub mod watched;

use serde::{Deserialize, Serialize};
use serde_json::{Map, Value as Json};

use crate::model::Model;
use crate::promotion::{Entry, RunStatus};
use crate::time::Millis;

pub use pg_store::{PgOptions, PgStore};
pub use sled_store::SledStore;

/// The store layout this binary writes; see `migrations/`.
pub const LAYOUT_VERSION: u32 = 5;

/// What a score request left behind.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct ScoreRecord {
    pub score_id: String,
    pub at: Millis,
    pub model_id: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reference: Option<String>,
    /// The features object as sent (validated against the schema before recording): its JSON
    /// text, or the validated values when every feature came with one (see `recorded`).
    /// Either is stored as the same JSON object a map would be, or as words in a sled page.
    pub features: recorded::RecordedFeatures,
    /// The model's output: the probability of 1, or the predicted number for numeric labels.
    #[serde(alias = "probability")]
    pub output: f64,
    /// The other model's output for the same request, never returned to the caller: the
    /// shadowing candidate's, or, when the candidate answered (`candidate_answered`), the
    /// active model's.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shadow: Option<ShadowScore>,
    /// The candidate holding a traffic share answered this request: `model_id` and `output`
    /// are the candidate's, `shadow` the active model's.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub candidate_answered: bool,
}

impl ScoreRecord {
    /// The row an outcome for this record adds to the shadowed outcomes, and the candidate it
    /// belongs to: both models' outputs when both scored the request. Both backends write it.
    pub fn shadowed_row(&self, label: f64) -> Option<(&str, ShadowedOutcome)> {
        let other = self.shadow.as_ref()?;
        Some(if self.candidate_answered {
            (
                self.model_id.as_str(),
                ShadowedOutcome {
                    active: other.output,
                    candidate: self.output,
                    label,
                    candidate_answered: true,
                },
            )
        } else {
            (
                other.model_id.as_str(),
                ShadowedOutcome {
                    active: self.output,
                    candidate: other.output,
                    label,
                    candidate_answered: false,
                },
            )
        })
    }
}

/// A shadowing candidate's answer to a live request.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShadowScore {
    pub model_id: String,
    pub output: f64,
}

/// One shadowed request that has its outcome: both models' outputs and the label.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ShadowedOutcome {
    pub active: f64,
    pub candidate: f64,
    pub label: f64,
    /// The candidate answered the request (its traffic share's arm); otherwise the active
    /// model did.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub candidate_answered: bool,
}

/// Outcomes per arm of a traffic share: (the candidate answered, the active model answered).
pub fn arm_outcome_counts(outcomes: &[ShadowedOutcome]) -> (u64, u64) {
    let candidate = outcomes.iter().filter(|o| o.candidate_answered).count() as u64;
    (candidate, outcomes.len() as u64 - candidate)
}

/// The candidate being shadowed, kept across restarts.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShadowState {
    pub candidate_id: String,
    /// The active model it is measured against.
    pub active_id: String,
    pub run_id: String,
    /// The log entry that started the shadow.
    pub entry_seq: u64,
    #[serde(with = "crate::time::rfc3339")]
    pub since: Millis,
    /// The traffic share the candidate holds, if it answers some requests itself.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub share: Option<ShareTerms>,
}

/// A candidate's traffic share, as it was started (kept across restarts with the shadow).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShareTerms {
    /// The share of sticky keys the candidate answers.
    pub fraction: f64,
    /// `"ref"` or `"features.NAME"` (`share.sticky_by`).
    pub sticky_by: String,
}

/// A candidate that passed its gate and waits for an operator's sign-off, kept across
/// restarts. At most one waits; a later run that passes replaces it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PendingSignOff {
    pub candidate_id: String,
    /// The active model its gate compared it with (`None` for a first model): an approval is
    /// refused once another model is active.
    pub active_id: Option<String>,
    pub run_id: String,
    /// The `waiting` log entry (the store sets it to the entry's seq).
    pub entry_seq: u64,
    #[serde(with = "crate::time::rfc3339")]
    pub since: Millis,
    /// The configured name of the key that started the run (a manual retrain), for the
    /// four-eyes rule; `None` for scheduled runs and an open API.
    #[serde(default)]
    pub started_by: Option<String>,
}

/// What a log entry changes besides the log, written in the entry's own transaction, so a
/// stop at any moment leaves the log, the active model, the shadow, the candidate waiting for
/// sign-off and the freeze in agreement.
#[derive(Debug, Clone, Copy, Default)]
pub struct EntryEffects<'a> {
    /// The activation history after the entry (a promotion or a rollback).
    pub history: Option<&'a [String]>,
    /// The shadow after the entry: `Some(None)` ends it, `Some(Some(state))` starts one (the
    /// store sets its `entry_seq` to the entry's).
    pub shadow: Option<Option<&'a ShadowState>>,
    /// The candidate waiting for sign-off after the entry: `Some(None)` ends the wait,
    /// `Some(Some(state))` starts one (the store sets its `entry_seq` to the entry's).
    pub sign_off: Option<Option<&'a PendingSignOff>>,
    /// The freeze after the entry: `Some(None)` lifts it, `Some(Some(freeze))` sets it.
    pub freeze: Option<Option<&'a Freeze>>,
}

/// Promotions are frozen: runs still train and log, but nothing new becomes active.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Freeze {
    #[serde(with = "crate::time::rfc3339")]
    pub since: Millis,
    /// The configured name of the key that froze (`None`: an open API, or a freeze written
    /// before names were recorded).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub by: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reason: Option<String>,
}

/// Whether recent scores have their outcome, by how old the score is.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CoverageBucket {
    /// `"0-1d"`, `"1-7d"`, `"7-30d"`, `"30d+"`.
    pub age: String,
    pub scores: usize,
    pub with_outcome: usize,
}

/// A labeled example as stored: named features, so a changed schema can still read it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StoredExample {
    pub id: String,
    pub event_time: Millis,
    /// 0/1 for binary labels, the target for numeric ones.
    pub label: f64,
    pub features: Map<String, Json>,
    /// Monitoring attributes (`monitoring.attributes`): stored, never features.
    #[serde(default, skip_serializing_if = "std::collections::BTreeMap::is_empty")]
    pub monitoring: std::collections::BTreeMap<String, String>,
}

/// Which score records compaction deletes: those older than `older_than`, and the oldest
/// beyond the newest `keep`. `None` is no limit.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct ScoreLimits {
    pub older_than: Option<Millis>,
    pub keep: Option<u64>,
}

/// What one compaction write deleted.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Compacted {
    /// Score records deleted.
    pub records: u64,
    /// The write's size in the backend's own units (sled: score pages deleted or rewritten).
    pub pages: usize,
    /// The write stopped at its limit with records still to delete.
    pub more: bool,
}

/// How an outcome write ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum OutcomeAck {
    Recorded,
    /// The same label was already recorded for this score.
    Duplicate,
}

/// A label for a recorded score, as it arrives.
#[derive(Debug, Clone, PartialEq)]
pub struct NewOutcome {
    pub score_id: String,
    pub label: f64,
    pub at: Millis,
    /// Monitoring attributes sent with the outcome, stored on the example it makes.
    pub monitoring: std::collections::BTreeMap<String, String>,
}

/// How one outcome of a group ended.
pub type OutcomeResult = Result<OutcomeAck, StoreError>;

/// Counts from an examples write.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize)]
pub struct ExamplesAck {
    pub inserted: usize,
    pub duplicates: usize,
}

#[derive(Debug, Clone, thiserror::Error)]
pub enum StoreError {
    #[error("no score with id `{0}` was recorded")]
    UnknownScore(String),
    #[error("score `{score_id}` already has label {existing}; refusing label {sent}")]
    ConflictingLabel {
        score_id: String,
        existing: f64,
        sent: f64,
    },
    #[error("the data dir {dir} is in use by another process (a running server?); ask it with --server instead")]
    Locked { dir: String },
    #[error("the data dir was written by store layout {found}, newer than this binary's {supported}; upgrade understudy")]
    NewerLayout { found: u32, supported: u32 },
    #[error("the PostgreSQL database has layout {found}, newer than this binary's {supported}; upgrade understudy")]
    NewerSchema { found: u32, supported: u32 },
    #[error("the store cannot write: {0}")]
    Unavailable(String),
    #[error("stored data is unreadable: {0}")]
    Corrupt(String),
    #[error(
        "score id `{id}` does not come after `{after}`; score records are written in id order"
    )]
    ScoreOrder { id: String, after: String },
}

/// Checks that `records`' ids increase, from above `after` (the newest id already written):
/// the rule [`Store::record_scores`] states, shared by the backends.
pub(crate) fn check_score_order(
    after: Option<&str>,
    records: &[ScoreRecord],
) -> Result<(), StoreError> {
    let mut after = after;
    for r in records {
        if let Some(after) = after.filter(|after| r.score_id.as_str() <= *after) {
            return Err(StoreError::ScoreOrder {
                id: r.score_id.clone(),
                after: after.to_owned(),
            });
        }
        after = Some(&r.score_id);
    }
    Ok(())
}

/// The example an outcome makes of its score, written straight from the features' JSON text
/// as the score recorded it: the same bytes a [`StoredExample`] serializes to, without parsing
/// them into a map and writing them out again. Both backends store this text.
#[derive(Serialize)]
pub(crate) struct ExampleText<'a> {
    pub(crate) id: &'a str,
    pub(crate) event_time: Millis,
    pub(crate) label: f64,
    pub(crate) features: &'a recorded::RecordedFeatures,
    pub(crate) outcome_at: Millis,
    /// As [`StoredExample::monitoring`].
    #[serde(skip_serializing_if = "std::collections::BTreeMap::is_empty")]
    pub(crate) monitoring: &'a std::collections::BTreeMap<String, String>,
}

/// The storage seam. All methods block; async callers use `spawn_blocking`.
pub trait Store: Send + Sync + 'static {
    /// Writes score records (not flushed; the next durable write or the background flush
    /// carries them to disk). Their ids must increase, from above [`Store::newest_score_id`];
    /// otherwise nothing is written ([`StoreError::ScoreOrder`]).
    fn record_scores(&self, records: &[ScoreRecord]) -> Result<(), StoreError>;
    /// The highest score id written, where the recorder's ids continue from.
    fn newest_score_id(&self) -> Option<String>;
    fn score(&self, score_id: &str) -> Result<Option<ScoreRecord>, StoreError>;
    /// Joins labels to recorded scores and stores their examples, in one transaction and one
    /// flush (group commit). Each outcome gets its own result (an unknown score or a
    /// conflicting label fails only that one); the outer error means nothing was written.
    /// Durable on `Ok`.
    fn put_outcomes(&self, outcomes: &[NewOutcome]) -> Result<Vec<OutcomeResult>, StoreError>;
    /// [`Store::put_outcomes`] without its flush: the results stand, but nothing is durable
    /// until a later [`Store::flush`]. For a writer that flushes one group while it writes
    /// the next.
    fn apply_outcomes(&self, outcomes: &[NewOutcome]) -> Result<Vec<OutcomeResult>, StoreError>;
    /// One outcome through [`Store::put_outcomes`].
    fn put_outcome(&self, score_id: &str, label: f64, at: Millis) -> OutcomeResult {
        let new = NewOutcome {
            score_id: score_id.to_owned(),
            label,
            at,
            monitoring: Default::default(),
        };
        self.put_outcomes(std::slice::from_ref(&new))?
            .pop()
            .unwrap_or_else(|| Err(StoreError::Unavailable("no result for the outcome".into())))
    }
    /// Stores backfilled examples; those whose id is already stored count as duplicates.
    /// Durable on `Ok`.
    fn put_examples(&self, examples: &[StoredExample]) -> Result<ExamplesAck, StoreError>;
    /// The latest `max_rows` examples not older than `since`, oldest first.
    fn latest_examples(
        &self,
        max_rows: usize,
        since: Option<Millis>,
    ) -> Result<Vec<StoredExample>, StoreError>;
    fn example_count(&self) -> usize;
    /// The stored example with this id (a backfilled row's id, or an outcome's score id).
    fn example(&self, id: &str) -> Result<Option<StoredExample>, StoreError>;
    /// The next value of a named counter (1, 2, …); durable.
    fn next_seq(&self, counter: &str) -> Result<u64, StoreError>;
    fn put_model(&self, model: &Model) -> Result<(), StoreError>;
    fn model(&self, id: &str) -> Result<Option<Model>, StoreError>;
    /// Every model, oldest first.
    fn models(&self) -> Result<Vec<Model>, StoreError>;
    /// Appends a log entry (assigning its `seq`) and applies its `effects` (activation
    /// history, shadow state) in the same atomic, durable write. Returns the stored entry.
    /// Ending or replacing a shadow also drops the old candidate's shadowed outcomes.
    fn append_entry(&self, entry: Entry, effects: EntryEffects<'_>) -> Result<Entry, StoreError>;
    /// Log entries, newest first, at most `limit`.
    fn entries(&self, limit: usize) -> Result<Vec<Entry>, StoreError>;
    fn entry(&self, seq: u64) -> Result<Option<Entry>, StoreError>;
    /// Runs that were queued or running (left so by a stop before they finished).
    fn unfinished_runs(&self) -> Result<Vec<RunStatus>, StoreError>;
    /// Models in the order they became active; the last one is the active model.
    fn active_history(&self) -> Result<Vec<String>, StoreError>;
    fn put_run(&self, run: &RunStatus) -> Result<(), StoreError>;
    fn run(&self, run_id: &str) -> Result<Option<RunStatus>, StoreError>;
    /// Forces everything written so far to disk.
    fn flush(&self) -> Result<(), StoreError>;
    /// Writes and flushes a small marker: `Ok` means the store can take writes right now.
    fn check_writable(&self) -> Result<(), StoreError>;
    /// The newest `max` score records not older than `since`, newest first.
    fn recent_scores(
        &self,
        max: usize,
        since: Option<Millis>,
    ) -> Result<Vec<ScoreRecord>, StoreError>;
    /// Score records stored (kept in memory, counted once when the store opens).
    fn score_count(&self) -> u64;
    /// Deletes the oldest score records that break `limits`, at most about `max_records` of
    /// them in one short write (a backend may round up to its own unit of writing), so that
    /// other reads and writes never wait long behind retention. Score ids are ULIDs, so the
    /// oldest records are the lowest ids. Outcomes, examples and shadowed rows are left alone.
    fn compact_scores(
        &self,
        limits: ScoreLimits,
        max_records: usize,
    ) -> Result<Compacted, StoreError>;
    /// Whether the score has its outcome.
    fn has_outcome(&self, score_id: &str) -> Result<bool, StoreError>;
    /// The candidate being shadowed, if any.
    fn shadow_state(&self) -> Result<Option<ShadowState>, StoreError>;
    /// Sets or clears the shadow state; durable on `Ok`. Clearing also drops the shadowed
    /// outcomes of the candidate that was shadowed.
    fn set_shadow_state(&self, state: Option<&ShadowState>) -> Result<(), StoreError>;
    /// Outcomes of requests the candidate shadowed, in arrival order.
    fn shadowed_outcomes(&self, candidate_id: &str) -> Result<Vec<ShadowedOutcome>, StoreError>;
    fn shadowed_count(&self, candidate_id: &str) -> usize;
    /// Whether promotions are frozen, and since when.
    fn freeze(&self) -> Result<Option<Freeze>, StoreError>;
    /// The candidate waiting for sign-off, if any (changed only through
    /// [`Store::append_entry`]'s effects).
    fn pending_sign_off(&self) -> Result<Option<PendingSignOff>, StoreError>;
    /// Freezes (`Some`) or unfreezes (`None`); durable on `Ok`.
    fn set_freeze(&self, freeze: Option<&Freeze>) -> Result<(), StoreError>;

    /// Up to `max` records of `table` in the backend's key order, starting after `after`
    /// (the previous page's `next`; `None` for the first page): how a whole store is read out
    /// in bounded memory (`store copy`, `store export`).
    fn records_page(
        &self,
        table: portable::Table,
        after: Option<&portable::PageCursor>,
        max: usize,
    ) -> Result<portable::RecordPage, StoreError>;
    /// Writes records read from another store (of either backend) as they are, for a restore
    /// into an empty store; durable on `Ok`. Score records must come in increasing id order.
    /// A record that does not hold what its table needs is refused ([`StoreError::Corrupt`]).
    fn restore_records(&self, records: &[portable::RawRecord]) -> Result<(), StoreError>;
    /// How many records `table` holds.
    fn table_len(&self, table: portable::Table) -> Result<u64, StoreError>;
    /// Deletes every record of every table (the layout version stays): only for
    /// `store copy --replace`, never called by the service. Durable on `Ok`.
    fn erase_all_records(&self) -> Result<(), StoreError>;
}

#[cfg(test)]
mod contract;

/// A score record for the store's own tests: one feature, output 0.5.
#[cfg(test)]
pub(crate) fn test_record(score_id: &str) -> ScoreRecord {
    ScoreRecord {
        score_id: score_id.to_owned(),
        at: 1_000,
        model_id: "m-1-00000000".into(),
        reference: None,
        features: serde_json::value::RawValue::from_string(r#"{"a":1.0}"#.into())
            .unwrap()
            .into(),
        output: 0.5,
        shadow: None,
        candidate_answered: false,
    }
}
