//! The sled store's trees as portable records (`store::portable`), and those records written
//! back: what `store copy` and `store export`/`import` read and write.
//!
//! Read out: counters (`meta`'s `seq/<name>` keys), the `meta` values that are data (history,
//! shadow, freeze), `models`, `runs`, `log`, score records page by page, `examples`, and
//! `shadowed`. Not read out: the layout key (the target keeps its own), the write probe, and
//! two indexes rebuilt on restore: `example_ids` (a backfilled example's id → its key) and
//! layout 2's `outcomes` rows.
//!
//! Restored: an example goes under its (event time, id) key; when that key does not follow
//! from its id (a backfilled row, or an outcome of a layout-2 record), `example_ids` points at
//! it, and when the id is a ULID (a score's id) an `outcomes` row carries its label too, so
//! the outcome stays found and a repeated label stays a duplicate, as PostgreSQL finds it by
//! id. Score records are written as pages, in id order, as the recorder writes them.

use std::ops::Bound;

use super::*;
use crate::store::portable::{Columns, PageCursor, RawRecord, RecordPage, Table, META_KEYS};

const COUNTER_PREFIX: &[u8] = b"seq/";

fn corrupt(e: impl std::fmt::Display) -> StoreError {
    StoreError::Corrupt(e.to_string())
}

fn utf8(bytes: &[u8], what: &str) -> Result<String, StoreError> {
    String::from_utf8(bytes.to_vec())
        .map_err(|_| StoreError::Corrupt(format!("{what} is not UTF-8")))
}

/// A record from a stored value's bytes.
fn record(
    table: Table,
    key: String,
    score_id: Option<String>,
    value: &[u8],
) -> Result<RawRecord, StoreError> {
    RawRecord::new(table, key, score_id, utf8(value, "a stored value")?).map_err(corrupt)
}

/// Up to `max` records of one prefix of `tree`, after the raw key `after`.
fn tree_page(
    tree: &sled::Tree,
    prefix: &[u8],
    after: Option<&PageCursor>,
    max: usize,
    mut make: impl FnMut(&[u8], &[u8]) -> Result<RawRecord, StoreError>,
) -> Result<RecordPage, StoreError> {
    let start = match after {
        Some(cursor) => Bound::Excluded(cursor.0.clone()),
        None => Bound::Included(prefix.to_vec()),
    };
    let mut page = RecordPage::default();
    for item in tree.range::<Vec<u8>, _>((start, Bound::Unbounded)) {
        let (key, value) = item.map_err(io)?;
        if !key.starts_with(prefix) {
            break;
        }
        page.records.push(make(&key, &value)?);
        if page.records.len() >= max {
            page.next = Some(PageCursor(key.to_vec()));
            break;
        }
    }
    Ok(page)
}

impl SledStore {
    pub(super) fn read_records_page(
        &self,
        table: Table,
        after: Option<&PageCursor>,
        max: usize,
    ) -> Result<RecordPage, StoreError> {
        let max = max.max(1);
        match table {
            Table::Counters => tree_page(&self.meta, COUNTER_PREFIX, after, max, |key, value| {
                let name = utf8(&key[COUNTER_PREFIX.len()..], "a counter's name")?;
                let value: [u8; 8] = value
                    .try_into()
                    .map_err(|_| StoreError::Corrupt(format!("counter {name}")))?;
                record(
                    Table::Counters,
                    name,
                    None,
                    u64::from_be_bytes(value).to_string().as_bytes(),
                )
            }),
            // Three keys at most: one page.
            Table::Meta => {
                let mut page = RecordPage::default();
                if after.is_some() {
                    return Ok(page);
                }
                for key in META_KEYS {
                    if let Some(value) = self.meta.get(key.as_bytes()).map_err(io)? {
                        page.records
                            .push(record(Table::Meta, key.to_owned(), None, &value)?);
                    }
                }
                Ok(page)
            }
            Table::Models => tree_page(&self.models, b"", after, max, |key, value| {
                record(Table::Models, utf8(key, "a model id")?, None, value)
            }),
            Table::Runs => tree_page(&self.runs, b"", after, max, |key, value| {
                record(Table::Runs, utf8(key, "a run id")?, None, value)
            }),
            Table::Log => tree_page(&self.log, b"", after, max, |key, value| {
                let seq: [u8; 8] = key
                    .try_into()
                    .map_err(|_| StoreError::Corrupt("a log key".into()))?;
                record(Table::Log, u64::from_be_bytes(seq).to_string(), None, value)
            }),
            Table::Scores => self.scores_page(after, max),
            Table::Examples => tree_page(&self.examples, b"", after, max, |key, value| {
                if key.len() < 8 {
                    return Err(StoreError::Corrupt("an examples key".into()));
                }
                record(
                    Table::Examples,
                    utf8(&key[8..], "an example id")?,
                    None,
                    value,
                )
            }),
            Table::Shadowed => tree_page(&self.shadowed, b"", after, max, |key, value| {
                let split = key
                    .iter()
                    .position(|&b| b == 0)
                    .ok_or_else(|| StoreError::Corrupt("a shadowed key".into()))?;
                record(
                    Table::Shadowed,
                    utf8(&key[..split], "a candidate id")?,
                    Some(utf8(&key[split + 1..], "a score id")?),
                    value,
                )
            }),
        }
    }

    /// Score records after the id in `after`, read out of their pages.
    fn scores_page(
        &self,
        after: Option<&PageCursor>,
        max: usize,
    ) -> Result<RecordPage, StoreError> {
        let after = after.map(|c| c.0.as_slice());
        // The page holding the cursor's id starts at the last key at or before it.
        let start: Vec<u8> = match after {
            Some(id) => match self.scores.range(..=id).next_back() {
                Some(item) => item.map_err(io)?.0.to_vec(),
                None => id.to_vec(),
            },
            None => Vec::new(),
        };
        let mut page = RecordPage::default();
        for item in self.scores.range(start..) {
            let (key, value) = item.map_err(io)?;
            let Some(value) = self.page_bytes(&value)? else {
                continue;
            };
            let view = PageView::parse(&key, &value).map_err(page_error)?;
            for &(id, stored) in view.entries() {
                if after.is_some_and(|after| id.as_bytes() <= after) {
                    continue;
                }
                // A compact record leaves as the JSON its features render to.
                let json = match stored {
                    StoredRecord::Json(json) => std::borrow::Cow::Borrowed(json),
                    StoredRecord::Compact(_) => {
                        std::borrow::Cow::Owned(encode(&self.decode_record(&view, id, stored)?))
                    }
                };
                page.records
                    .push(record(Table::Scores, id.to_owned(), None, &json)?);
                if page.records.len() >= max {
                    page.next = Some(PageCursor(id.as_bytes().to_vec()));
                    return Ok(page);
                }
            }
        }
        Ok(page)
    }

    pub(super) fn write_records(&self, records: &[RawRecord]) -> Result<(), StoreError> {
        let mut checked = Vec::with_capacity(records.len());
        for r in records {
            checked.push((r, r.columns().map_err(corrupt)?));
        }
        let mut meta = sled::Batch::default();
        let mut models = sled::Batch::default();
        let mut runs = sled::Batch::default();
        let mut log = sled::Batch::default();
        let mut examples = sled::Batch::default();
        let mut example_ids = sled::Batch::default();
        let mut outcomes = sled::Batch::default();
        let mut shadowed = sled::Batch::default();
        let mut scores: Vec<(&str, &[u8])> = Vec::new();
        for (r, columns) in &checked {
            let value = r.value.get().as_bytes();
            match columns {
                Columns::Counter { value } => {
                    let mut key = COUNTER_PREFIX.to_vec();
                    key.extend_from_slice(r.key.as_bytes());
                    meta.insert(key, &value.to_be_bytes());
                }
                Columns::Meta => meta.insert(r.key.as_bytes(), value),
                Columns::Model { .. } => models.insert(r.key.as_bytes(), value),
                Columns::Run { .. } => runs.insert(r.key.as_bytes(), value),
                Columns::Log { seq } => log.insert(&seq.to_be_bytes(), value),
                Columns::Score { .. } => scores.push((r.key.as_str(), value)),
                Columns::Example {
                    event_time,
                    label,
                    outcome_at,
                } => {
                    let key = example_key_of(*event_time, &r.key);
                    if derived_example_key(&r.key).as_deref() != Some(key.as_slice()) {
                        example_ids.insert(r.key.as_bytes(), key.as_slice());
                        if ulid::Ulid::from_string(&r.key).is_ok() {
                            outcomes.insert(
                                r.key.as_bytes(),
                                encode(&serde_json::json!({
                                    "label": label,
                                    "at": outcome_at.unwrap_or(*event_time),
                                })),
                            );
                        }
                    }
                    examples.insert(key, value);
                }
                Columns::Shadowed { score_id } => {
                    shadowed.insert(shadow_key(&r.key, score_id), value);
                }
            }
        }
        if !scores.is_empty() {
            self.write_raw_scores(&scores)?;
        }
        for (tree, batch) in [
            (&self.meta, meta),
            (&self.models, models),
            (&self.runs, runs),
            (&self.log, log),
            (&self.examples, examples),
            (&self.example_ids, example_ids),
            (&self.outcomes, outcomes),
            (&self.shadowed, shadowed),
        ] {
            tree.apply_batch(batch).map_err(io)?;
        }
        self.make_durable()
    }

    /// Score records as stored JSON, in pages, refusing ids out of order as
    /// `record_scores` does.
    fn write_raw_scores(&self, scores: &[(&str, &[u8])]) -> Result<(), StoreError> {
        let mut newest = lock(&self.newest_score);
        let mut after = newest.clone();
        for (id, _) in scores {
            if let Some(after) = after.as_deref().filter(|after| *id <= *after) {
                return Err(StoreError::ScoreOrder {
                    id: (*id).to_owned(),
                    after: after.to_owned(),
                });
            }
            after = Some((*id).to_owned());
        }
        let stored: Vec<(&str, StoredRecord)> = scores
            .iter()
            .map(|&(id, json)| (id, StoredRecord::Json(json)))
            .collect();
        let mut batch = sled::Batch::default();
        for page in score_pages::split(&stored) {
            batch.insert(
                page[0].0.as_bytes(),
                score_pages::encode(&[], page).map_err(page_error)?,
            );
        }
        self.scores.apply_batch(batch).map_err(io)?;
        *newest = after;
        self.score_count
            .fetch_add(scores.len() as u64, Ordering::SeqCst);
        Ok(())
    }

    pub(super) fn count_records(&self, table: Table) -> Result<u64, StoreError> {
        Ok(match table {
            Table::Counters => self.meta.scan_prefix(COUNTER_PREFIX).count() as u64,
            Table::Meta => {
                let mut n = 0;
                for key in META_KEYS {
                    n += u64::from(self.meta.contains_key(key.as_bytes()).map_err(io)?);
                }
                n
            }
            Table::Models => self.models.len() as u64,
            Table::Runs => self.runs.len() as u64,
            Table::Log => self.log.len() as u64,
            Table::Scores => self.score_count(),
            Table::Examples => self.examples.len() as u64,
            Table::Shadowed => self.shadowed.len() as u64,
        })
    }

    pub(super) fn erase_records(&self) -> Result<(), StoreError> {
        for tree in [
            &self.scores,
            &self.outcomes,
            &self.examples,
            &self.example_ids,
            &self.models,
            &self.log,
            &self.runs,
            &self.shadowed,
        ] {
            tree.clear().map_err(io)?;
        }
        // `meta` keeps its layout key.
        for key in self.meta.iter().keys() {
            let key = key.map_err(io)?;
            if key.as_ref() != LAYOUT_KEY {
                self.meta.remove(key).map_err(io)?;
            }
        }
        self.score_log.clear().map_err(log_io)?;
        self.score_count.store(0, Ordering::SeqCst);
        *lock(&self.newest_score) = None;
        self.make_durable()
    }
}
