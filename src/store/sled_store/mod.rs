//! The embedded store on sled 0.34.
//!
//! Trees: `meta` (layout version, counters, activation history), `scores` (pages of score
//! records, see [`super::score_pages`]), `outcomes` (layout 2's outcome rows, read only for the
//! scores they labeled), `examples` (keyed by event time, then id; an outcome is the example it
//! makes of its score), `example_ids` (a backfilled example's id → its examples key), `models`,
//! `log` (keyed by sequence), `runs`, `shadowed` (a shadowing candidate's rows with outcomes,
//! keyed by candidate id then score id). Values other than score pages are JSON. The layout is
//! described in `migrations/`.
//!
//! Durability: sled's `flush` writes its log with `sync_file_range`; that survives a killed
//! process but is not an `fsync` of the file and its metadata, so a power loss can still lose
//! the last acknowledged writes on disks with volatile caches.

use std::path::Path;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};

use serde::de::DeserializeOwned;
use serde::Serialize;
use sled::transaction::{ConflictableTransactionError, TransactionError};
use sled::Transactional;

use super::recorded::{FeatureLayout, LayoutCache, RecordedFeatures};
use super::score_pages::{self, PageError, PageView, StoredRecord};
use super::{
    Compacted, EntryEffects, ExamplesAck, Freeze, NewOutcome, OutcomeAck, OutcomeResult,
    PendingSignOff, ScoreLimits, ScoreRecord, ShadowState, ShadowedOutcome, Store, StoreError,
    StoredExample, LAYOUT_VERSION,
};
use crate::model::Model;
use crate::promotion::{Entry, RunStatus};
use crate::threads::lock;
use crate::time::Millis;

const LAYOUT_KEY: &[u8] = b"layout";

/// sled's page cache unless configured (`server.cache_mb`).
pub const DEFAULT_CACHE_BYTES: u64 = crate::config::DEFAULT_CACHE_MB * 1024 * 1024;
const HISTORY_KEY: &[u8] = b"active_history";
/// Written by `check_writable`: the last time the store proved it could take a write.
const PROBE_KEY: &[u8] = b"write_probe";

pub struct SledStore {
    db: sled::Db,
    meta: sled::Tree,
    scores: sled::Tree,
    outcomes: sled::Tree,
    examples: sled::Tree,
    example_ids: sled::Tree,
    models: sled::Tree,
    log: sled::Tree,
    runs: sled::Tree,
    shadowed: sled::Tree,
    /// Records in `scores`: counted when the store opens (sled's `len` walks the whole tree),
    /// then kept by `record_scores` and `compact_scores`.
    score_count: AtomicU64,
    /// The highest score id written: records must come after it (see `score_pages`).
    newest_score: Mutex<Option<String>>,
    /// The feature layout of the pages written or read last, with its bytes.
    layouts: LayoutCache,
    /// Where score pages written since layout 5 live; `scores` holds pointers to them.
    score_log: score_log::ScoreLog,
    /// Group commit: writes applied so far, and the highest one known flushed.
    written: AtomicU64,
    flushed: Mutex<u64>,
}

/// The score log's directory inside the data dir.
const SCORE_LOG_DIR: &str = "score-log";

fn log_io(e: std::io::Error) -> StoreError {
    StoreError::Unavailable(format!("score log: {e}"))
}

fn io(e: sled::Error) -> StoreError {
    StoreError::Unavailable(e.to_string())
}

fn encode<T: Serialize>(value: &T) -> Vec<u8> {
    serde_json::to_vec(value).expect("store records serialize")
}

fn decode<T: DeserializeOwned>(bytes: &[u8]) -> Result<T, StoreError> {
    serde_json::from_slice(bytes).map_err(|e| StoreError::Corrupt(e.to_string()))
}

fn page_error(e: PageError) -> StoreError {
    StoreError::Corrupt(e.to_string())
}

/// Just the label of a stored outcome row or example.
#[derive(serde::Deserialize)]
struct StoredLabel {
    label: f64,
}

/// Event times sort correctly as unsigned big-endian after flipping the sign bit.
fn time_key(t: Millis) -> [u8; 8] {
    ((t as u64) ^ (1 << 63)).to_be_bytes()
}

fn time_from_key(key: &[u8]) -> Millis {
    let mut bytes = [0u8; 8];
    bytes.copy_from_slice(&key[..8]);
    (u64::from_be_bytes(bytes) ^ (1 << 63)) as Millis
}

/// `candidate id`, a 0 byte, then the score id: one candidate's rows are one prefix.
fn shadow_key(candidate_id: &str, score_id: &str) -> Vec<u8> {
    let mut key = candidate_id.as_bytes().to_vec();
    key.push(0);
    key.extend_from_slice(score_id.as_bytes());
    key
}

fn shadow_prefix(candidate_id: &str) -> Vec<u8> {
    let mut key = candidate_id.as_bytes().to_vec();
    key.push(0);
    key
}

const SHADOW_KEY: &[u8] = b"shadow";
const FREEZE_KEY: &[u8] = b"freeze";
const SIGN_OFF_KEY: &[u8] = b"sign_off";

fn example_key(e: &StoredExample) -> Vec<u8> {
    example_key_of(e.event_time, &e.id)
}

fn example_key_of(event_time: Millis, id: &str) -> Vec<u8> {
    let mut key = time_key(event_time).to_vec();
    key.extend_from_slice(id.as_bytes());
    key
}

impl SledStore {
    /// Opens (or creates) the store in `dir` with a cache of [`DEFAULT_CACHE_BYTES`],
    /// refusing a layout newer than this binary's.
    pub fn open(dir: &Path) -> Result<SledStore, StoreError> {
        SledStore::open_with_cache(dir, DEFAULT_CACHE_BYTES)
    }

    /// As [`SledStore::open`], with sled's page cache at most `cache_bytes` (sled's own
    /// default, 1 GiB, let a long-running service's memory follow the store's size).
    pub fn open_with_cache(dir: &Path, cache_bytes: u64) -> Result<SledStore, StoreError> {
        std::fs::create_dir_all(dir)
            .map_err(|e| StoreError::Unavailable(format!("{}: {e}", dir.display())))?;
        let db = sled::Config::new()
            .path(dir)
            .flush_every_ms(Some(200))
            .cache_capacity(cache_bytes)
            .open()
            .map_err(|e| match e {
                sled::Error::Io(ref io)
                    if io.kind() == std::io::ErrorKind::WouldBlock
                        || io.to_string().contains("lock") =>
                {
                    StoreError::Locked {
                        dir: dir.display().to_string(),
                    }
                }
                other => io(other),
            })?;
        let tree = |name: &str| db.open_tree(name).map_err(io);
        let store = SledStore {
            meta: tree("meta")?,
            scores: tree("scores")?,
            outcomes: tree("outcomes")?,
            examples: tree("examples")?,
            example_ids: tree("example_ids")?,
            models: tree("models")?,
            log: tree("log")?,
            runs: tree("runs")?,
            shadowed: tree("shadowed")?,
            score_count: AtomicU64::new(0),
            newest_score: Mutex::new(None),
            layouts: LayoutCache::default(),
            score_log: score_log::ScoreLog::open(&dir.join(SCORE_LOG_DIR))
                .map_err(|e| StoreError::Unavailable(format!("{}: {e}", dir.display())))?,
            db,
            written: AtomicU64::new(0),
            flushed: Mutex::new(0),
        };
        match store.meta.get(LAYOUT_KEY).map_err(io)? {
            None => {
                store
                    .meta
                    .insert(LAYOUT_KEY, &LAYOUT_VERSION.to_be_bytes())
                    .map_err(io)?;
                store.db.flush().map_err(io)?;
            }
            Some(bytes) => {
                let found = u32::from_be_bytes(
                    bytes
                        .as_ref()
                        .try_into()
                        .map_err(|_| StoreError::Corrupt("layout version".into()))?,
                );
                if found > LAYOUT_VERSION {
                    return Err(StoreError::NewerLayout {
                        found,
                        supported: LAYOUT_VERSION,
                    });
                }
                if found < LAYOUT_VERSION {
                    store.upgrade(found)?;
                }
            }
        }
        let mut count = 0u64;
        let mut newest = None;
        // Pointers carry their page's record count; only the newest page is read for its
        // last id.
        let mut last_pointed = None;
        for item in store.scores.iter() {
            let (key, value) = item.map_err(io)?;
            match score_log::Pointer::decode(&value) {
                Some(pointer) => {
                    count += u64::from(pointer.records);
                    store.score_log.append_after(pointer.segment);
                    last_pointed = Some((key, value));
                }
                None => {
                    let page = PageView::parse(&key, &value).map_err(page_error)?;
                    count += page.len() as u64;
                    last_pointed = None;
                    if !page.is_empty() {
                        newest = Some(page.id(page.len() - 1).to_owned());
                    }
                }
            }
        }
        if let Some((key, value)) = last_pointed {
            if let Some(bytes) = store.page_bytes(&value)? {
                let page = PageView::parse(&key, &bytes).map_err(page_error)?;
                if !page.is_empty() {
                    newest = Some(page.id(page.len() - 1).to_owned());
                }
            } else {
                // The newest page was lost in a crash: ids continue above its first.
                newest = Some(String::from_utf8_lossy(&key).into_owned());
            }
        }
        store.score_count.store(count, Ordering::SeqCst);
        *lock(&store.newest_score) = newest;
        Ok(store)
    }

    /// Bytes the store's files take: sled's as sled counts them, and the score log's segments.
    pub fn size_on_disk(&self) -> Result<u64, StoreError> {
        Ok(self.db.size_on_disk().map_err(io)? + self.score_log.size().map_err(log_io)?)
    }

    /// Makes every write applied before this call durable, sharing one flush among the
    /// callers that arrive while a flush is running (group commit).
    fn make_durable(&self) -> Result<(), StoreError> {
        let ticket = self.written.fetch_add(1, Ordering::SeqCst) + 1;
        let mut flushed = lock(&self.flushed);
        if *flushed >= ticket {
            return Ok(());
        }
        let target = self.written.load(Ordering::SeqCst);
        // Score pages first: a durable outcome never names a score whose page a power cut
        // could still take.
        self.score_log.sync().map_err(log_io)?;
        self.db.flush().map_err(io)?;
        *flushed = target;
        Ok(())
    }

    /// Removes a candidate's shadowed outcomes (not flushed).
    fn drop_shadowed(&self, candidate_id: &str) -> Result<(), StoreError> {
        for key in self
            .shadowed
            .scan_prefix(shadow_prefix(candidate_id))
            .keys()
        {
            self.shadowed.remove(key.map_err(io)?).map_err(io)?;
        }
        Ok(())
    }

    /// Brings a store of an older layout up to this binary's (see `migrations/`).
    fn upgrade(&self, from: u32) -> Result<(), StoreError> {
        // 1 → 2: labels became numbers (1 → 1.0), score records' `probability` became
        // `output`, settings and reports gained fields. Every layout-2 reader accepts layout-1
        // values as they are (serde aliases and defaults), so only the marker changes; binaries
        // of layout 1 must not open the store afterwards, since they cannot read `1.0` labels.
        // 2 → 3: score records are written as pages and an outcome as its example alone.
        // Layout-2 records read as pages of one and layout-2 outcome rows are still consulted,
        // so again only the marker changes; a layout-2 binary cannot read pages.
        // 3 → 4: pages of format 2, whose records may keep their feature values as words
        // (`store::recorded`). Format-1 pages still read, so only the marker changes; a
        // layout-3 binary cannot read format 2.
        // 4 → 5: new score pages go to the score log (`score_log`) and `scores` keeps a
        // pointer to each. Pages stored in the tree still read, so only the marker changes; a
        // layout-4 binary cannot read pointers.
        tracing::info!(from, to = LAYOUT_VERSION, "upgrading the store layout");
        self.meta
            .insert(LAYOUT_KEY, &LAYOUT_VERSION.to_be_bytes())
            .map_err(io)?;
        self.db.flush().map_err(io)?;
        Ok(())
    }

    /// Test hook: overwrites the layout version (to simulate a newer binary's data dir).
    #[doc(hidden)]
    pub fn set_layout_version_for_tests(&self, version: u32) {
        self.meta
            .insert(LAYOUT_KEY, &version.to_be_bytes())
            .expect("meta write");
        self.db.flush().expect("flush");
    }
}
impl Store for SledStore {
    fn record_scores(&self, records: &[ScoreRecord]) -> Result<(), StoreError> {
        self.write_score_records(records)
    }

    fn newest_score_id(&self) -> Option<String> {
        lock(&self.newest_score).clone()
    }
    fn score(&self, score_id: &str) -> Result<Option<ScoreRecord>, StoreError> {
        self.read_score(score_id)
    }

    fn put_outcomes(&self, outcomes: &[NewOutcome]) -> Result<Vec<OutcomeResult>, StoreError> {
        let results = self.apply_outcomes(outcomes)?;
        if results
            .iter()
            .any(|r| matches!(r, Ok(OutcomeAck::Recorded)))
        {
            self.make_durable()?;
        }
        Ok(results)
    }
    fn apply_outcomes(&self, outcomes: &[NewOutcome]) -> Result<Vec<OutcomeResult>, StoreError> {
        self.write_outcomes(outcomes)
    }

    fn put_examples(&self, examples: &[StoredExample]) -> Result<ExamplesAck, StoreError> {
        let result = (&self.examples, &self.example_ids).transaction(|(e, ids)| {
            let mut ack = ExamplesAck::default();
            for example in examples {
                let outcome_example = match derived_example_key(&example.id) {
                    Some(key) => e.get(key)?.is_some(),
                    None => false,
                };
                if outcome_example || ids.get(example.id.as_bytes())?.is_some() {
                    ack.duplicates += 1;
                    continue;
                }
                let key = example_key(example);
                e.insert(key.as_slice(), encode(example))?;
                ids.insert(example.id.as_bytes(), key.as_slice())?;
                ack.inserted += 1;
            }
            Ok::<_, ConflictableTransactionError<StoreError>>(ack)
        });
        let ack = match result {
            Ok(ack) => ack,
            Err(TransactionError::Abort(e)) => return Err(e),
            Err(TransactionError::Storage(e)) => return Err(io(e)),
        };
        self.make_durable()?;
        Ok(ack)
    }

    fn latest_examples(
        &self,
        max_rows: usize,
        since: Option<Millis>,
    ) -> Result<Vec<StoredExample>, StoreError> {
        let mut out = Vec::new();
        for item in self.examples.iter().rev() {
            if out.len() >= max_rows {
                break;
            }
            let (key, value) = item.map_err(io)?;
            if since.is_some_and(|s| time_from_key(&key) < s) {
                break;
            }
            out.push(decode::<StoredExample>(&value)?);
        }
        out.reverse();
        Ok(out)
    }

    fn example_count(&self) -> usize {
        self.examples.len()
    }

    fn example(&self, id: &str) -> Result<Option<StoredExample>, StoreError> {
        if let Some(key) = derived_example_key(id) {
            if let Some(bytes) = self.examples.get(key).map_err(io)? {
                return decode(&bytes).map(Some);
            }
        }
        let Some(key) = self.example_ids.get(id.as_bytes()).map_err(io)? else {
            return Ok(None);
        };
        match self.examples.get(key).map_err(io)? {
            Some(bytes) => decode(&bytes).map(Some),
            None => Err(StoreError::Corrupt(format!(
                "example id {id} points at no example"
            ))),
        }
    }

    fn next_seq(&self, counter: &str) -> Result<u64, StoreError> {
        let key = format!("seq/{counter}");
        let updated = self
            .meta
            .update_and_fetch(key.as_bytes(), |old| {
                let current = old
                    .and_then(|b| b.try_into().ok())
                    .map_or(0, u64::from_be_bytes);
                Some((current + 1).to_be_bytes().to_vec())
            })
            .map_err(io)?
            .ok_or_else(|| StoreError::Corrupt("counter vanished".into()))?;
        self.make_durable()?;
        let bytes: [u8; 8] = updated
            .as_ref()
            .try_into()
            .map_err(|_| StoreError::Corrupt("counter".into()))?;
        Ok(u64::from_be_bytes(bytes))
    }

    fn put_model(&self, model: &Model) -> Result<(), StoreError> {
        self.models
            .insert(model.id.as_bytes(), encode(model))
            .map_err(io)?;
        self.make_durable()
    }

    fn model(&self, id: &str) -> Result<Option<Model>, StoreError> {
        self.models
            .get(id.as_bytes())
            .map_err(io)?
            .map(|v| decode(&v))
            .transpose()
    }

    fn models(&self) -> Result<Vec<Model>, StoreError> {
        let mut models: Vec<Model> = self
            .models
            .iter()
            .values()
            .map(|v| v.map_err(io).and_then(|v| decode(&v)))
            .collect::<Result<_, _>>()?;
        models.sort_by_key(|m| m.created_at);
        Ok(models)
    }

    fn append_entry(
        &self,
        mut entry: Entry,
        effects: EntryEffects<'_>,
    ) -> Result<Entry, StoreError> {
        let history_bytes = effects.history.map(|h| encode(&h));
        let previous_shadow = match effects.shadow {
            Some(_) => self.shadow_state()?,
            None => None,
        };
        let result = (&self.log, &self.meta).transaction(|(log, meta)| {
            let last = meta
                .get(b"seq/log")?
                .and_then(|b| b.as_ref().try_into().ok())
                .map_or(0, u64::from_be_bytes);
            let seq = last + 1;
            meta.insert(b"seq/log", &seq.to_be_bytes())?;
            let mut numbered = entry.clone();
            numbered.seq = seq;
            log.insert(&seq.to_be_bytes(), encode(&numbered))?;
            if let Some(bytes) = &history_bytes {
                meta.insert(HISTORY_KEY, bytes.as_slice())?;
            }
            match effects.shadow {
                Some(Some(state)) => {
                    let mut state = state.clone();
                    state.entry_seq = seq;
                    meta.insert(SHADOW_KEY, encode(&state))?;
                }
                Some(None) => {
                    meta.remove(SHADOW_KEY)?;
                }
                None => {}
            }
            match effects.sign_off {
                Some(Some(state)) => {
                    let mut state = state.clone();
                    state.entry_seq = seq;
                    meta.insert(SIGN_OFF_KEY, encode(&state))?;
                }
                Some(None) => {
                    meta.remove(SIGN_OFF_KEY)?;
                }
                None => {}
            }
            match effects.freeze {
                Some(Some(freeze)) => {
                    meta.insert(FREEZE_KEY, encode(freeze))?;
                }
                Some(None) => {
                    meta.remove(FREEZE_KEY)?;
                }
                None => {}
            }
            Ok::<_, ConflictableTransactionError<StoreError>>(seq)
        });
        match result {
            Ok(seq) => entry.seq = seq,
            Err(TransactionError::Abort(e)) => return Err(e),
            Err(TransactionError::Storage(e)) => return Err(io(e)),
        }
        self.make_durable()?;
        if let (Some(previous), Some(now)) = (previous_shadow, effects.shadow) {
            if now.is_none_or(|s| s.candidate_id != previous.candidate_id) {
                // After the commit: rows of a candidate that no longer shadows are only
                // clutter, so a stop before this finishes loses nothing.
                if let Err(e) = self.drop_shadowed(&previous.candidate_id) {
                    tracing::warn!(error = %e, candidate = %previous.candidate_id, "old shadowed outcomes not dropped");
                }
            }
        }
        Ok(entry)
    }

    fn entries(&self, limit: usize) -> Result<Vec<Entry>, StoreError> {
        self.log
            .iter()
            .rev()
            .take(limit)
            .map(|item| item.map_err(io).and_then(|(_, v)| decode(&v)))
            .collect()
    }

    fn entry(&self, seq: u64) -> Result<Option<Entry>, StoreError> {
        self.log
            .get(seq.to_be_bytes())
            .map_err(io)?
            .map(|v| decode(&v))
            .transpose()
    }

    fn unfinished_runs(&self) -> Result<Vec<RunStatus>, StoreError> {
        let mut out = Vec::new();
        for value in self.runs.iter().values() {
            let run: RunStatus = decode(&value.map_err(io)?)?;
            if run.state != crate::promotion::RunState::Finished {
                out.push(run);
            }
        }
        Ok(out)
    }

    fn active_history(&self) -> Result<Vec<String>, StoreError> {
        match self.meta.get(HISTORY_KEY).map_err(io)? {
            Some(bytes) => decode(&bytes),
            None => Ok(vec![]),
        }
    }

    fn put_run(&self, run: &RunStatus) -> Result<(), StoreError> {
        self.runs
            .insert(run.run_id.as_bytes(), encode(run))
            .map_err(io)?;
        self.make_durable()
    }

    fn run(&self, run_id: &str) -> Result<Option<RunStatus>, StoreError> {
        self.runs
            .get(run_id.as_bytes())
            .map_err(io)?
            .map(|v| decode(&v))
            .transpose()
    }

    fn flush(&self) -> Result<(), StoreError> {
        self.make_durable()
    }

    fn check_writable(&self) -> Result<(), StoreError> {
        self.meta
            .insert(PROBE_KEY, &crate::time::now_ms().to_be_bytes())
            .map_err(io)?;
        self.make_durable()
    }
    fn recent_scores(
        &self,
        max: usize,
        since: Option<Millis>,
    ) -> Result<Vec<ScoreRecord>, StoreError> {
        self.read_recent_scores(max, since)
    }

    fn score_count(&self) -> u64 {
        self.score_count.load(Ordering::SeqCst)
    }
    fn compact_scores(
        &self,
        limits: ScoreLimits,
        max_records: usize,
    ) -> Result<Compacted, StoreError> {
        // A write deletes or rewrites whole pages of up to PAGE_RECORDS records.
        let max_pages = max_records
            .div_ceil(super::score_pages::PAGE_RECORDS)
            .max(1);
        self.delete_old_scores(limits, max_pages)
    }

    fn has_outcome(&self, score_id: &str) -> Result<bool, StoreError> {
        if let Some(key) = derived_example_key(score_id) {
            if self.examples.contains_key(key).map_err(io)? {
                return Ok(true);
            }
        }
        self.outcomes.contains_key(score_id.as_bytes()).map_err(io)
    }

    fn shadow_state(&self) -> Result<Option<ShadowState>, StoreError> {
        self.meta
            .get(SHADOW_KEY)
            .map_err(io)?
            .map(|v| decode(&v))
            .transpose()
    }

    fn set_shadow_state(&self, state: Option<&ShadowState>) -> Result<(), StoreError> {
        let previous = self.shadow_state()?;
        match state {
            Some(state) => {
                self.meta.insert(SHADOW_KEY, encode(state)).map_err(io)?;
            }
            None => {
                self.meta.remove(SHADOW_KEY).map_err(io)?;
            }
        }
        if let Some(previous) = previous {
            if state.is_none_or(|s| s.candidate_id != previous.candidate_id) {
                self.drop_shadowed(&previous.candidate_id)?;
            }
        }
        self.make_durable()
    }

    fn shadowed_outcomes(&self, candidate_id: &str) -> Result<Vec<ShadowedOutcome>, StoreError> {
        self.shadowed
            .scan_prefix(shadow_prefix(candidate_id))
            .values()
            .map(|v| decode(&v.map_err(io)?))
            .collect()
    }

    fn freeze(&self) -> Result<Option<Freeze>, StoreError> {
        self.meta
            .get(FREEZE_KEY)
            .map_err(io)?
            .map(|v| decode(&v))
            .transpose()
    }

    fn pending_sign_off(&self) -> Result<Option<PendingSignOff>, StoreError> {
        self.meta
            .get(SIGN_OFF_KEY)
            .map_err(io)?
            .map(|v| decode(&v))
            .transpose()
    }

    fn set_freeze(&self, freeze: Option<&Freeze>) -> Result<(), StoreError> {
        match freeze {
            Some(f) => self.meta.insert(FREEZE_KEY, encode(f)).map(|_| ()),
            None => self.meta.remove(FREEZE_KEY).map(|_| ()),
        }
        .map_err(io)?;
        self.make_durable()
    }

    fn shadowed_count(&self, candidate_id: &str) -> usize {
        self.shadowed
            .scan_prefix(shadow_prefix(candidate_id))
            .keys()
            .count()
    }

    fn records_page(
        &self,
        table: super::portable::Table,
        after: Option<&super::portable::PageCursor>,
        max: usize,
    ) -> Result<super::portable::RecordPage, StoreError> {
        self.read_records_page(table, after, max)
    }

    fn restore_records(&self, records: &[super::portable::RawRecord]) -> Result<(), StoreError> {
        self.write_records(records)
    }

    fn table_len(&self, table: super::portable::Table) -> Result<u64, StoreError> {
        self.count_records(table)
    }

    fn erase_all_records(&self) -> Result<(), StoreError> {
        self.erase_records()
    }
}

mod outcomes;
use outcomes::derived_example_key;
mod portable;
mod score_log;
mod scores;

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::score_pages::PAGE_RECORDS;

    /// Opens the store in `dir`, waiting out sled's background threads of a handle just
    /// dropped in this process: they hold the directory's lock for a moment after the drop
    /// (seen once in about twenty runs of these tests).
    fn open_store(dir: &Path) -> SledStore {
        open_when_unlocked(dir).unwrap()
    }

    fn open_when_unlocked(dir: &Path) -> Result<SledStore, StoreError> {
        let deadline = std::time::Instant::now() + std::time::Duration::from_secs(5);
        loop {
            match SledStore::open(dir) {
                Err(StoreError::Locked { .. }) if std::time::Instant::now() < deadline => {
                    std::thread::sleep(std::time::Duration::from_millis(20));
                }
                other => return other,
            }
        }
    }

    fn record(id: &str, at: Millis) -> ScoreRecord {
        ScoreRecord {
            score_id: id.into(),
            at,
            model_id: "m-1-00000000".into(),
            reference: None,
            features: serde_json::value::RawValue::from_string(r#"{"a":1.0}"#.into())
                .unwrap()
                .into(),
            output: 0.25,
            shadow: None,
            candidate_answered: false,
        }
    }

    // The trait's promises (outcomes, examples, the log and its effects, compaction by the
    // trait's rules, ...) are tested on both backends by `store::contract`; these tests are
    // about sled's own layout: pages, layout upgrades, the directory lock.

    #[test]
    fn data_survives_reopening_and_a_newer_layout_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        {
            let store = open_store(dir.path());
            assert_eq!(store.next_seq("model").unwrap(), 1);
            assert_eq!(store.next_seq("model").unwrap(), 2);
            store.record_scores(&[record("s1", 1)]).unwrap();
            store.put_outcome("s1", 0.0, 2).unwrap();
        }
        {
            let store = open_store(dir.path());
            assert_eq!(store.next_seq("model").unwrap(), 3);
            assert_eq!(store.example_count(), 1);
            store.set_layout_version_for_tests(LAYOUT_VERSION + 1);
        }
        assert!(matches!(
            open_when_unlocked(dir.path()),
            Err(StoreError::NewerLayout { .. })
        ));
    }

    #[test]
    fn a_layout_1_store_opens_upgraded_and_its_values_still_read() {
        let dir = tempfile::tempdir().unwrap();
        {
            let store = open_store(dir.path());
            // Values exactly as layout 1 wrote them (migrations/0001-initial.md).
            store
                .scores
                .insert(
                    "s1",
                    br#"{"score_id":"s1","at":5,"model_id":"m-1-00000000","features":{},"probability":0.25}"#.as_slice(),
                )
                .unwrap();
            store
                .examples
                .insert(
                    time_key(5).as_slice(),
                    br#"{"id":"s1","event_time":5,"label":1,"features":{}}"#.as_slice(),
                )
                .unwrap();
            store
                .outcomes
                .insert("s1", br#"{"label":1,"at":6}"#.as_slice())
                .unwrap();
            store.set_layout_version_for_tests(1);
        }
        let store = open_store(dir.path());
        let version = store.meta.get(LAYOUT_KEY).unwrap().unwrap();
        assert_eq!(
            u32::from_be_bytes(version.as_ref().try_into().unwrap()),
            LAYOUT_VERSION
        );
        assert_eq!(store.score("s1").unwrap().unwrap().output, 0.25);
        assert_eq!(store.latest_examples(10, None).unwrap()[0].label, 1.0);
        // The same label again is a duplicate, a different one a conflict, as before.
        assert_eq!(
            store.put_outcome("s1", 1.0, 7).unwrap(),
            OutcomeAck::Duplicate
        );
        assert!(matches!(
            store.put_outcome("s1", 0.0, 7),
            Err(StoreError::ConflictingLabel { .. })
        ));
    }

    /// A score id as the service makes them: a ULID at `at`.
    fn ulid_at(at: Millis, n: u128) -> String {
        ulid::Ulid::from_parts(at as u64, n).to_string()
    }

    /// The ids `recent_scores` gives, newest first (at most 10).
    fn recent_ids(store: &SledStore) -> Vec<String> {
        store
            .recent_scores(10, None)
            .unwrap()
            .into_iter()
            .map(|r| r.score_id)
            .collect()
    }

    /// Every stored record's id, in key order, read page by page.
    fn stored_ids(store: &SledStore) -> Vec<String> {
        let mut ids = Vec::new();
        for item in store.scores.iter() {
            let (key, value) = item.unwrap();
            let value = store.page_bytes(&value).unwrap().expect("no page is lost");
            let page = PageView::parse(&key, &value).unwrap();
            assert_eq!(
                page.id(0).as_bytes(),
                &key[..],
                "a page's key is its first id"
            );
            ids.extend(page.entries().iter().map(|(id, _)| id.to_string()));
        }
        ids
    }

    /// Everything retention must leave alone, as (tree name, key count).
    fn other_trees(store: &SledStore) -> Vec<(String, usize)> {
        [
            &store.meta,
            &store.outcomes,
            &store.examples,
            &store.example_ids,
            &store.models,
            &store.log,
            &store.runs,
            &store.shadowed,
        ]
        .iter()
        .map(|t| (String::from_utf8_lossy(&t.name()).into_owned(), t.len()))
        .collect()
    }

    /// 100 records one minute apart from `start`, written ten at a time (ten pages), the 10th
    /// of them with an outcome and a shadowing candidate's output; returns their ids, oldest
    /// first.
    fn minute_records(store: &SledStore, start: Millis) -> Vec<String> {
        let records: Vec<ScoreRecord> = (0..100)
            .map(|i| {
                let at = start + i * 60_000;
                let mut r = record(&ulid_at(at, 7), at);
                if i == 9 {
                    r.shadow = Some(crate::store::ShadowScore {
                        model_id: "m-2-00000000".into(),
                        output: 0.5,
                    });
                }
                r
            })
            .collect();
        for ten in records.chunks(10) {
            store.record_scores(ten).unwrap();
        }
        store.put_outcome(&records[9].score_id, 1.0, start).unwrap();
        records.into_iter().map(|r| r.score_id).collect()
    }

    #[test]
    fn compaction_by_age_deletes_whole_pages_rewrites_the_boundary_one_and_nothing_else() {
        let dir = tempfile::tempdir().unwrap();
        let store = open_store(dir.path());
        let start: Millis = 1_800_000_000_000;
        let ids = minute_records(&store, start);
        let before = other_trees(&store);
        assert_eq!(store.score_count(), 100);
        // Older than minute 35: the first 35 records (minute 35 itself stays): three whole
        // pages, and half of the fourth, which is written again with its five newer records.
        let limits = ScoreLimits {
            older_than: Some(start + 35 * 60_000),
            keep: None,
        };
        let chunk = |records, pages, more| Compacted {
            records,
            pages,
            more,
        };
        // Two pages per write: the first stops at its limit, the second ends the work.
        assert_eq!(
            store.compact_scores(limits, 2 * PAGE_RECORDS).unwrap(),
            chunk(20, 2, true)
        );
        assert_eq!(
            store.compact_scores(limits, 2 * PAGE_RECORDS).unwrap(),
            chunk(15, 2, false)
        );
        assert_eq!(stored_ids(&store), ids[35..].to_vec());
        assert_eq!(store.score_count(), 65);
        assert!(store.score(&ids[34]).unwrap().is_none());
        assert_eq!(store.score(&ids[35]).unwrap().unwrap().score_id, ids[35]);
        assert_eq!(other_trees(&store), before);
        // What compaction leaves of outcomes and examples is the contract suite's
        // (`store::contract`, run on sled too); here: whole pages, a rewritten one, no other tree.
        // Nothing more is due.
        assert_eq!(
            store.compact_scores(limits, 2 * PAGE_RECORDS).unwrap(),
            Compacted::default()
        );
    }

    #[test]
    fn compaction_by_count_keeps_the_newest_and_survives_reopening() {
        let dir = tempfile::tempdir().unwrap();
        let start: Millis = 1_800_000_000_000;
        let ids = {
            let store = open_store(dir.path());
            let ids = minute_records(&store, start);
            let before = other_trees(&store);
            let limits = ScoreLimits {
                older_than: None,
                keep: Some(25),
            };
            assert_eq!(store.compact_scores(limits, 1000).unwrap().records, 75);
            assert_eq!(store.compact_scores(limits, 1000).unwrap().records, 0);
            assert_eq!(stored_ids(&store), ids[75..].to_vec());
            assert_eq!(store.score_count(), 25);
            assert_eq!(other_trees(&store), before);
            ids
        };
        // The count is re-read on open.
        let store = open_store(dir.path());
        assert_eq!(store.score_count(), 25);
        store
            .record_scores(&[record(&ulid_at(start + 200 * 60_000, 1), start)])
            .unwrap();
        assert_eq!(store.score_count(), 26);
        // Both limits at once: whichever deletes more wins.
        let limits = ScoreLimits {
            older_than: Some(start + 90 * 60_000),
            keep: Some(20),
        };
        assert_eq!(store.compact_scores(limits, 1000).unwrap().records, 15);
        assert_eq!(stored_ids(&store)[0], ids[90]);
        assert_eq!(store.score_count(), 11);
        // No limits: nothing is deleted.
        assert_eq!(
            store
                .compact_scores(ScoreLimits::default(), 1000)
                .unwrap()
                .records,
            0
        );
        assert_eq!(store.score_count(), 11);
    }

    #[test]
    fn an_outcome_on_a_recorder_score_is_one_examples_key_and_nothing_else() {
        let dir = tempfile::tempdir().unwrap();
        let store = open_store(dir.path());
        let at: Millis = 1_800_000_000_000;
        let id = ulid_at(at, 1);
        store.record_scores(&[record(&id, at)]).unwrap();
        assert_eq!(
            store.put_outcome(&id, 1.0, at + 5).unwrap(),
            OutcomeAck::Recorded
        );
        assert_eq!(
            (
                store.examples.len(),
                store.outcomes.len(),
                store.example_ids.len()
            ),
            (1, 0, 0)
        );
        assert!(store.has_outcome(&id).unwrap());
        let example = store.example(&id).unwrap().unwrap();
        assert_eq!((example.event_time, example.label), (at, 1.0));
        assert_eq!(
            store.put_outcome(&id, 1.0, at + 9).unwrap(),
            OutcomeAck::Duplicate
        );
        assert!(matches!(
            store.put_outcome(&id, 0.0, at + 9),
            Err(StoreError::ConflictingLabel { .. })
        ));
        // A backfilled example under the same id is that example again, not a second one.
        let ack = store
            .put_examples(&[StoredExample {
                monitoring: Default::default(),
                id: id.clone(),
                event_time: at,
                label: 1.0,
                features: serde_json::Map::new(),
            }])
            .unwrap();
        assert_eq!((ack.inserted, ack.duplicates), (0, 1));
    }

    #[test]
    fn records_out_of_id_order_are_refused_whole() {
        let dir = tempfile::tempdir().unwrap();
        let store = open_store(dir.path());
        store
            .record_scores(&[record("b1", 1), record("b2", 2)])
            .unwrap();
        for batch in [
            vec![record("b3", 3), record("b3", 3)],
            vec![record("b0", 3)],
            vec![record("b4", 4), record("a9", 4)],
        ] {
            assert!(matches!(
                store.record_scores(&batch),
                Err(StoreError::ScoreOrder { .. })
            ));
        }
        assert_eq!(stored_ids(&store), ["b1", "b2"]);
        assert_eq!(store.score_count(), 2);
        assert_eq!(store.newest_score_id().as_deref(), Some("b2"));
    }

    /// Three record ids from `at` on, and each record's JSON as earlier layouts stored it.
    fn three_old_records(at: Millis) -> (Vec<String>, Vec<Vec<u8>>) {
        let ids: Vec<String> = (0..3).map(|i| ulid_at(at + i, 5)).collect();
        let json = ids
            .iter()
            .enumerate()
            .map(|(i, id)| encode(&record(id, at + i as Millis)))
            .collect();
        (ids, json)
    }

    /// Whether `scores` holds a pointer into the score log under `key`, or the page itself.
    fn points_into_the_log(store: &SledStore, key: &str) -> bool {
        let value = store.scores.get(key.as_bytes()).unwrap().unwrap();
        score_log::Pointer::decode(&value).is_some()
    }

    #[test]
    fn a_layout_4_store_reads_its_pages_in_the_tree_beside_pages_in_the_score_log() {
        let dir = tempfile::tempdir().unwrap();
        let at: Millis = 1_800_000_000_000;
        // Layout 4 kept each page in the tree (migrations/0004-score-pages-of-values.md).
        let (old, json) = three_old_records(at);
        {
            let store = open_store(dir.path());
            let stored: Vec<(&str, StoredRecord)> = old
                .iter()
                .zip(&json)
                .map(|(id, json)| (id.as_str(), StoredRecord::Json(json)))
                .collect();
            let page = score_pages::encode(&[], &stored).unwrap();
            store.scores.insert(old[0].as_bytes(), page).unwrap();
            store.set_layout_version_for_tests(4);
        }
        let store = open_store(dir.path());
        let version = store.meta.get(LAYOUT_KEY).unwrap().unwrap();
        assert_eq!(u32::from_be_bytes(version.as_ref().try_into().unwrap()), 5);
        assert_eq!(store.score_count(), 3);
        assert!(!points_into_the_log(&store, &old[0]));
        // New records go to the score log, one segment per opening of the store here.
        let new: Vec<String> = (0..4).map(|i| ulid_at(at + 100 + i, 1)).collect();
        store
            .record_scores(&[record(&new[0], at + 100), record(&new[1], at + 101)])
            .unwrap();
        drop(store);
        let store = open_store(dir.path());
        store
            .record_scores(&[record(&new[2], at + 102), record(&new[3], at + 103)])
            .unwrap();
        assert!(points_into_the_log(&store, &new[0]));
        assert!(points_into_the_log(&store, &new[2]));
        assert_eq!(store.score_count(), 7);
        assert_eq!(stored_ids(&store), [old.clone(), new.clone()].concat());
        for id in old.iter().chain(&new) {
            assert_eq!(
                store.score(id).unwrap().unwrap().features.to_json_string(),
                r#"{"a":1.0}"#
            );
        }
        assert_eq!(recent_ids(&store)[0], new[3]);
        assert!(store.score_log.size().unwrap() > 0);
        let segments = || {
            let mut found =
                score_log::ScoreLog::segments_in(&dir.path().join(SCORE_LOG_DIR)).unwrap();
            found.sort();
            found
        };
        assert_eq!(segments().len(), 2);
        // Compaction of the old page and the first new one frees the first segment's file.
        let limits = ScoreLimits {
            older_than: None,
            keep: Some(2),
        };
        assert_eq!(store.compact_scores(limits, 100).unwrap().records, 5);
        assert_eq!(stored_ids(&store), new[2..].to_vec());
        assert_eq!(segments().len(), 1);
        assert_eq!(store.score(&new[3]).unwrap().unwrap().score_id, new[3]);
        assert!(store.score(&new[1]).unwrap().is_none());
    }

    #[test]
    fn a_score_page_lost_in_a_crash_reads_as_absent_and_compaction_takes_its_pointer() {
        let dir = tempfile::tempdir().unwrap();
        let at: Millis = 1_800_000_000_000;
        let ids: Vec<String> = (0..4).map(|i| ulid_at(at + i, 1)).collect();
        {
            let store = open_store(dir.path());
            store
                .record_scores(&[record(&ids[0], at), record(&ids[1], at + 1)])
                .unwrap();
            store
                .record_scores(&[record(&ids[2], at + 2), record(&ids[3], at + 3)])
                .unwrap();
            store.flush().unwrap();
        }
        // What a power cut can leave: the pointers durable, the log's last bytes not.
        let segment = dir.path().join(SCORE_LOG_DIR).join("0000000000000000.seg");
        let len = std::fs::metadata(&segment).unwrap().len();
        let file = std::fs::OpenOptions::new()
            .write(true)
            .open(&segment)
            .unwrap();
        file.set_len(len - 20).unwrap();
        drop(file);
        let store = open_store(dir.path());
        // The counts come from the pointers; the newest readable id comes from the lost page's key.
        assert_eq!(store.score_count(), 4);
        assert!(store.score(&ids[3]).unwrap().is_none());
        assert!(store.score(&ids[2]).unwrap().is_none());
        assert_eq!(store.score(&ids[1]).unwrap().unwrap().score_id, ids[1]);
        assert_eq!(recent_ids(&store), vec![ids[1].clone(), ids[0].clone()]);
        // New records still go in after the lost ones.
        let next = ulid_at(at + 10, 1);
        store.record_scores(&[record(&next, at + 10)]).unwrap();
        assert_eq!(store.score(&next).unwrap().unwrap().score_id, next);
        let limits = ScoreLimits {
            older_than: Some(at + 5),
            keep: None,
        };
        assert_eq!(store.compact_scores(limits, 100).unwrap().records, 4);
        assert_eq!(recent_ids(&store), vec![next]);
        assert_eq!(store.score_count(), 1);
    }

    #[test]
    fn a_layout_3_store_reads_its_json_pages_beside_pages_of_values() {
        use crate::schema::{Row, Value};
        let dir = tempfile::tempdir().unwrap();
        let at: Millis = 1_800_000_000_000;
        // Layout 3 wrote pages of format 1: no feature layout, each record's JSON bare
        // (migrations/0003-score-pages-and-single-key-outcomes.md).
        let (old, json) = three_old_records(at);
        {
            let store = open_store(dir.path());
            let mut page = vec![1u8];
            page.extend_from_slice(&(old.len() as u32).to_le_bytes());
            for (id, json) in old.iter().zip(&json) {
                page.push(id.len() as u8);
                page.extend_from_slice(id.as_bytes());
                page.extend_from_slice(&(json.len() as u32).to_le_bytes());
            }
            for json in &json {
                page.extend_from_slice(json);
            }
            store.scores.insert(old[0].as_bytes(), page).unwrap();
            store.set_layout_version_for_tests(3);
        }
        let store = open_store(dir.path());
        let version = store.meta.get(LAYOUT_KEY).unwrap().unwrap();
        assert_eq!(
            u32::from_be_bytes(version.as_ref().try_into().unwrap()),
            LAYOUT_VERSION
        );
        assert_eq!(store.score_count(), 3);
        // New records keep their values, in pages of format 2 above the old ids.
        let layout = Arc::new(
            FeatureLayout::from_bytes(br#"{"names":["a","b"],"categories":[[],["x","y"]]}"#)
                .unwrap(),
        );
        let new: Vec<String> = (0..3).map(|i| ulid_at(at + 100 + i, 1)).collect();
        let records: Vec<ScoreRecord> = new
            .iter()
            .enumerate()
            .map(|(i, id)| ScoreRecord {
                features: RecordedFeatures::Values {
                    values: Row::from(vec![Value::Number(i as f64 + 0.5), Value::Category(1)]),
                    layout: Arc::clone(&layout),
                },
                ..record(id, at + 100 + i as Millis)
            })
            .collect();
        store.record_scores(&records).unwrap();
        assert_eq!(stored_ids(&store), [old.clone(), new.clone()].concat());
        let features = |store: &SledStore, id: &str| {
            store.score(id).unwrap().unwrap().features.to_json_string()
        };
        let values_json = |i: usize| format!(r#"{{"a":{i}.5,"b":"y"}}"#);
        for id in &old {
            assert_eq!(features(&store, id), r#"{"a":1.0}"#);
        }
        for (i, id) in new.iter().enumerate() {
            assert_eq!(features(&store, id), values_json(i));
        }
        // An outcome on either kind makes its example with the record's features.
        for id in [&old[1], &new[2]] {
            assert_eq!(
                store.put_outcome(id, 1.0, 10).unwrap(),
                OutcomeAck::Recorded
            );
            let example = store.example(id).unwrap().unwrap();
            assert_eq!(
                serde_json::Value::Object(example.features),
                serde_json::from_str::<serde_json::Value>(&features(&store, id)).unwrap()
            );
        }
        // Compaction that cuts into the old page writes its rest again, in format 2.
        let limits = ScoreLimits {
            older_than: None,
            keep: Some(4),
        };
        assert_eq!(store.compact_scores(limits, 100).unwrap().records, 2);
        assert_eq!(
            stored_ids(&store),
            [vec![old[2].clone()], new.clone()].concat()
        );
        assert_eq!(features(&store, &old[2]), r#"{"a":1.0}"#);
        // Reopened, the layout is read from the pages themselves.
        drop(store);
        let store = open_store(dir.path());
        for (i, id) in new.iter().enumerate() {
            assert_eq!(features(&store, id), values_json(i));
        }
        let recent = recent_ids(&store);
        assert_eq!(recent.len(), 4);
        assert_eq!(recent[0], new[2]);
    }

    #[test]
    fn a_layout_2_store_reads_its_records_and_outcomes_beside_layout_3_pages() {
        let dir = tempfile::tempdir().unwrap();
        let at: Millis = 1_800_000_000_000;
        // Layout 2 wrote one key per record, its `at` taken a moment after its ULID's time,
        // and an outcome as an `outcomes` row, an example and an `example_ids` entry
        // (migrations/0002-numeric-labels-and-families.md).
        let old: Vec<String> = (0..3).map(|i| ulid_at(at + i, 5)).collect();
        {
            let store = open_store(dir.path());
            for (i, id) in old.iter().enumerate() {
                let r = record(id, at + i as Millis + 1);
                store.scores.insert(id.as_bytes(), encode(&r)).unwrap();
            }
            let key = example_key_of(at + 1, &old[0]);
            let example = format!(
                r#"{{"id":"{}","event_time":{},"label":1.0,"features":{{"a":1.0}}}}"#,
                old[0],
                at + 1
            );
            store.examples.insert(&key, example.as_bytes()).unwrap();
            store.example_ids.insert(old[0].as_bytes(), key).unwrap();
            store
                .outcomes
                .insert(old[0].as_bytes(), br#"{"label":1.0,"at":9}"#.as_slice())
                .unwrap();
            store.set_layout_version_for_tests(2);
        }
        let store = open_store(dir.path());
        let version = store.meta.get(LAYOUT_KEY).unwrap().unwrap();
        assert_eq!(
            u32::from_be_bytes(version.as_ref().try_into().unwrap()),
            LAYOUT_VERSION
        );
        assert_eq!(store.score_count(), 3);
        assert_eq!(store.newest_score_id().as_ref(), old.last());
        // New records continue above the old ids, as pages.
        let new: Vec<String> = (0..3).map(|i| ulid_at(at + 100 + i, 1)).collect();
        let records: Vec<ScoreRecord> = new
            .iter()
            .enumerate()
            .map(|(i, id)| record(id, at + 100 + i as Millis))
            .collect();
        store.record_scores(&records).unwrap();
        assert_eq!(stored_ids(&store), [old.clone(), new.clone()].concat());
        for id in old.iter().chain(&new) {
            assert_eq!(&store.score(id).unwrap().unwrap().score_id, id);
        }
        let recent = recent_ids(&store);
        let newest_first: Vec<String> = old.iter().chain(&new).rev().cloned().collect();
        assert_eq!(recent, newest_first);
        // The old outcome still answers as before.
        assert!(store.has_outcome(&old[0]).unwrap());
        assert_eq!(
            store.put_outcome(&old[0], 1.0, 10).unwrap(),
            OutcomeAck::Duplicate
        );
        assert!(matches!(
            store.put_outcome(&old[0], 0.0, 10),
            Err(StoreError::ConflictingLabel { .. })
        ));
        // An old record's new outcome is written the old way (its examples key is not its
        // id's time), and found again; a new record's is one key.
        for id in [&old[1], &new[1]] {
            assert!(!store.has_outcome(id).unwrap());
            assert_eq!(
                store.put_outcome(id, 0.0, 10).unwrap(),
                OutcomeAck::Recorded
            );
            assert!(store.has_outcome(id).unwrap());
            assert_eq!(store.example(id).unwrap().unwrap().label, 0.0);
            assert_eq!(
                store.put_outcome(id, 0.0, 11).unwrap(),
                OutcomeAck::Duplicate
            );
        }
        assert_eq!(store.outcomes.len(), 2);
        assert_eq!(store.example_ids.len(), 2);
        assert_eq!(store.example_count(), 3);
        // Compaction walks both kinds of key.
        let limits = ScoreLimits {
            older_than: None,
            keep: Some(2),
        };
        assert_eq!(
            store
                .compact_scores(limits, 100 * PAGE_RECORDS)
                .unwrap()
                .records,
            4
        );
        assert_eq!(stored_ids(&store), new[1..].to_vec());
        assert_eq!(
            store.put_outcome(&old[1], 0.0, 12).unwrap(),
            OutcomeAck::Duplicate
        );
    }

    #[test]
    fn a_second_open_of_the_same_dir_is_refused_as_locked() {
        let dir = tempfile::tempdir().unwrap();
        let _held = SledStore::open(dir.path()).unwrap();
        match SledStore::open(dir.path()) {
            Err(StoreError::Locked { .. }) => {}
            Err(other) => panic!("expected Locked, got {other}"),
            Ok(_) => panic!("expected Locked, got a second handle"),
        }
    }

    #[test]
    fn a_layout_2_outcome_keeps_its_label_through_a_copy() {
        use crate::store::portable::Table;
        let at: Millis = 1_800_000_000_000;
        let (a, b) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
        let source = open_store(a.path());
        // As layout 2 wrote an outcome (see `a_layout_2_store_reads_its_records...` above):
        // the record's `at` a moment after its ULID's time, so its example's key does not
        // follow from its id, and an `outcomes` row and an `example_ids` entry find it.
        let old = ulid_at(at, 5);
        let r = record(&old, at + 1);
        source.scores.insert(old.as_bytes(), encode(&r)).unwrap();
        source.score_count.store(1, Ordering::SeqCst);
        *lock(&source.newest_score) = Some(old.clone());
        assert_eq!(
            source.put_outcome(&old, 1.0, 9).unwrap(),
            OutcomeAck::Recorded
        );
        assert_eq!((source.outcomes.len(), source.example_ids.len()), (1, 1));
        let target = open_store(b.path());
        for table in Table::ALL {
            let page = source.records_page(table, None, 100).unwrap();
            assert!(page.next.is_none());
            target.restore_records(&page.records).unwrap();
        }
        // The indexes were rebuilt from the example: found by id, a duplicate, a conflict.
        assert_eq!((target.outcomes.len(), target.example_ids.len()), (1, 1));
        assert!(target.has_outcome(&old).unwrap());
        assert_eq!(target.example(&old).unwrap(), source.example(&old).unwrap());
        assert_eq!(
            target.put_outcome(&old, 1.0, 10).unwrap(),
            OutcomeAck::Duplicate
        );
        assert!(matches!(
            target.put_outcome(&old, 0.0, 10),
            Err(StoreError::ConflictingLabel { .. })
        ));
        assert_eq!(target.example_count(), 1);
        // A backfilled row with an id of its own gets its index entry, not an outcome row.
        let backfilled = StoredExample {
            monitoring: Default::default(),
            id: "row-1".into(),
            event_time: at,
            label: 0.0,
            features: serde_json::Map::new(),
        };
        source
            .put_examples(std::slice::from_ref(&backfilled))
            .unwrap();
        let page = source.records_page(Table::Examples, None, 100).unwrap();
        let row = page.records.iter().find(|r| r.key == "row-1").unwrap();
        target.restore_records(std::slice::from_ref(row)).unwrap();
        assert_eq!(target.example("row-1").unwrap(), Some(backfilled));
        assert_eq!(target.outcomes.len(), 1);
        assert_eq!(
            target
                .put_examples(&[target.example("row-1").unwrap().unwrap()])
                .unwrap()
                .duplicates,
            1
        );
    }
}
