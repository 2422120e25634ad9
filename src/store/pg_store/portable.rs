//! PostgreSQL's tables as portable records (`store::portable`), and those records written
//! back: what `store copy` and `store export`/`import` read and write.
//!
//! Each table is read in primary-key order after the last key of the previous page (keyset
//! paging, so a page costs the same at the end of a large table as at its start). `meta`
//! gives only its data keys (not the write probe), and the `layout` table stays with the
//! database. A restore writes each table's records with one `unnest` insert per table, in one
//! transaction per call; a key already present fails the whole call.

use super::{PgStore, Tx, TxError};
use crate::store::portable::{Columns, PageCursor, RawRecord, RecordPage, Table, META_KEYS};
use crate::store::StoreError;
use crate::threads::lock;

fn corrupt(e: impl std::fmt::Display) -> StoreError {
    StoreError::Corrupt(e.to_string())
}

/// The first page and the pages after a key, for the tables keyed by one text column; each
/// query returns (key, value text).
fn text_keyed(table: Table) -> (&'static str, &'static str) {
    match table {
        Table::Counters => (
            "SELECT name, value::text FROM counters ORDER BY name LIMIT $1",
            "SELECT name, value::text FROM counters WHERE name > $2 ORDER BY name LIMIT $1",
        ),
        Table::Meta => (
            "SELECT key, value FROM meta WHERE key = ANY($2) ORDER BY key LIMIT $1",
            "SELECT key, value FROM meta WHERE key = ANY($2) AND key > $3 ORDER BY key LIMIT $1",
        ),
        Table::Models => (
            "SELECT id, model FROM models ORDER BY id LIMIT $1",
            "SELECT id, model FROM models WHERE id > $2 ORDER BY id LIMIT $1",
        ),
        Table::Runs => (
            "SELECT run_id, run FROM runs ORDER BY run_id LIMIT $1",
            "SELECT run_id, run FROM runs WHERE run_id > $2 ORDER BY run_id LIMIT $1",
        ),
        Table::Scores => (
            "SELECT score_id, record FROM scores ORDER BY score_id LIMIT $1",
            "SELECT score_id, record FROM scores WHERE score_id > $2 ORDER BY score_id LIMIT $1",
        ),
        Table::Examples => (
            "SELECT id, example FROM examples ORDER BY id LIMIT $1",
            "SELECT id, example FROM examples WHERE id > $2 ORDER BY id LIMIT $1",
        ),
        Table::Log | Table::Shadowed => unreachable!("not keyed by one text column"),
    }
}

fn text_cursor(cursor: &PageCursor) -> Result<&str, StoreError> {
    std::str::from_utf8(&cursor.0).map_err(|_| StoreError::Corrupt("a page cursor".into()))
}

impl PgStore {
    pub(super) fn read_records_page(
        &self,
        table: Table,
        after: Option<&PageCursor>,
        max: usize,
    ) -> Result<RecordPage, StoreError> {
        let limit = i64::try_from(max.max(1)).unwrap_or(i64::MAX);
        let meta_keys: Vec<&str> = META_KEYS.to_vec();
        let rows = match (table, after) {
            (Table::Log, None) => self.read(
                "SELECT seq, entry FROM log ORDER BY seq LIMIT $1",
                &[&limit],
            )?,
            (Table::Log, Some(cursor)) => {
                let seq: i64 = text_cursor(cursor)?
                    .parse()
                    .map_err(|_| StoreError::Corrupt("a log cursor".into()))?;
                self.read(
                    "SELECT seq, entry FROM log WHERE seq > $2 ORDER BY seq LIMIT $1",
                    &[&limit, &seq],
                )?
            }
            (Table::Shadowed, None) => self.read(
                "SELECT candidate_id, score_id, outcome FROM shadowed
                 ORDER BY candidate_id, score_id LIMIT $1",
                &[&limit],
            )?,
            (Table::Shadowed, Some(cursor)) => {
                let (candidate, score) = text_cursor(cursor)?
                    .split_once('\0')
                    .ok_or_else(|| StoreError::Corrupt("a shadowed cursor".into()))?;
                self.read(
                    "SELECT candidate_id, score_id, outcome FROM shadowed
                     WHERE (candidate_id, score_id) > ($2, $3)
                     ORDER BY candidate_id, score_id LIMIT $1",
                    &[&limit, &candidate, &score],
                )?
            }
            (Table::Meta, None) => self.read(text_keyed(table).0, &[&limit, &meta_keys])?,
            (Table::Meta, Some(cursor)) => {
                let key = text_cursor(cursor)?;
                self.read(text_keyed(table).1, &[&limit, &meta_keys, &key])?
            }
            (_, None) => self.read(text_keyed(table).0, &[&limit])?,
            (_, Some(cursor)) => {
                let key = text_cursor(cursor)?;
                self.read(text_keyed(table).1, &[&limit, &key])?
            }
        };
        let mut page = RecordPage::default();
        for row in &rows {
            let (key, score_id, value, cursor) = match table {
                Table::Log => {
                    let seq: i64 = row.get(0);
                    let key = seq.to_string();
                    (key.clone(), None, row.get::<_, String>(1), key)
                }
                Table::Shadowed => {
                    let candidate: String = row.get(0);
                    let score: String = row.get(1);
                    let cursor = format!("{candidate}\0{score}");
                    (candidate, Some(score), row.get::<_, String>(2), cursor)
                }
                _ => {
                    let key: String = row.get(0);
                    (key.clone(), None, row.get::<_, String>(1), key)
                }
            };
            page.records
                .push(RawRecord::new(table, key, score_id, value).map_err(corrupt)?);
            page.next = Some(PageCursor(cursor.into_bytes()));
        }
        if rows.len() < limit as usize {
            page.next = None;
        }
        Ok(page)
    }

    pub(super) fn write_records(&self, records: &[RawRecord]) -> Result<(), StoreError> {
        let mut checked = Vec::with_capacity(records.len());
        for r in records {
            checked.push((r, r.columns().map_err(corrupt)?));
        }
        let newest_written = checked
            .iter()
            .filter(|(_, c)| matches!(c, Columns::Score { .. }))
            .map(|(r, _)| r.key.as_str())
            .max()
            .map(str::to_owned);
        self.write("cannot restore records", |tx| {
            for table in Table::ALL {
                let of: Vec<&(&RawRecord, Columns<'_>)> =
                    checked.iter().filter(|(r, _)| r.table == table).collect();
                if !of.is_empty() {
                    insert(tx, table, &of)?;
                }
            }
            Ok(())
        })?;
        if let Some(id) = newest_written {
            let mut newest = lock(&self.newest_score);
            if newest.as_deref().is_none_or(|n| n < id.as_str()) {
                *newest = Some(id);
            }
        }
        Ok(())
    }

    pub(super) fn count_records(&self, table: Table) -> Result<u64, StoreError> {
        let meta_keys: Vec<&str> = META_KEYS.to_vec();
        let row = match table {
            Table::Counters => self.read_one("SELECT count(*) FROM counters", &[])?,
            Table::Meta => self.read_one(
                "SELECT count(*) FROM meta WHERE key = ANY($1)",
                &[&meta_keys],
            )?,
            Table::Models => self.read_one("SELECT count(*) FROM models", &[])?,
            Table::Runs => self.read_one("SELECT count(*) FROM runs", &[])?,
            Table::Log => self.read_one("SELECT count(*) FROM log", &[])?,
            Table::Scores => self.read_one("SELECT count(*) FROM scores", &[])?,
            Table::Examples => self.read_one("SELECT count(*) FROM examples", &[])?,
            Table::Shadowed => self.read_one("SELECT count(*) FROM shadowed", &[])?,
        };
        Ok(row.map_or(0, |row| row.get::<_, i64>(0).max(0) as u64))
    }

    pub(super) fn erase_records(&self) -> Result<(), StoreError> {
        self.write("cannot erase the store", |tx| {
            tx.execute(
                "TRUNCATE meta, counters, scores, examples, models, log, runs, shadowed",
                &[],
            )?;
            Ok(())
        })?;
        *lock(&self.newest_score) = None;
        Ok(())
    }
}

/// One table's records in one statement.
fn insert(
    tx: &mut Tx<'_>,
    table: Table,
    records: &[&(&RawRecord, Columns<'_>)],
) -> Result<(), TxError> {
    let keys: Vec<&str> = records.iter().map(|(r, _)| r.key.as_str()).collect();
    let values: Vec<&str> = records.iter().map(|(r, _)| r.value.get()).collect();
    let int =
        |f: fn(&Columns<'_>) -> i64| -> Vec<i64> { records.iter().map(|(_, c)| f(c)).collect() };
    match table {
        Table::Counters => {
            let numbers = int(|c| match c {
                Columns::Counter { value } => *value as i64,
                _ => 0,
            });
            tx.execute(
                "INSERT INTO counters (name, value) SELECT * FROM unnest($1::text[], $2::int8[])",
                &[&keys, &numbers],
            )?;
        }
        Table::Meta => {
            tx.execute(
                "INSERT INTO meta (key, value) SELECT * FROM unnest($1::text[], $2::text[])",
                &[&keys, &values],
            )?;
        }
        Table::Models => {
            let created = int(|c| match c {
                Columns::Model { created_at } => *created_at,
                _ => 0,
            });
            tx.execute(
                "INSERT INTO models (id, created_at, model)
                 SELECT * FROM unnest($1::text[], $2::int8[], $3::text[])",
                &[&keys, &created, &values],
            )?;
        }
        Table::Runs => {
            let finished: Vec<bool> = records
                .iter()
                .map(|(_, c)| matches!(c, Columns::Run { finished: true }))
                .collect();
            tx.execute(
                "INSERT INTO runs (run_id, finished, run)
                 SELECT * FROM unnest($1::text[], $2::bool[], $3::text[])",
                &[&keys, &finished, &values],
            )?;
        }
        Table::Log => {
            let seqs = int(|c| match c {
                Columns::Log { seq } => *seq as i64,
                _ => 0,
            });
            tx.execute(
                "INSERT INTO log (seq, entry) SELECT * FROM unnest($1::int8[], $2::text[])",
                &[&seqs, &values],
            )?;
        }
        Table::Scores => {
            let ats = int(|c| match c {
                Columns::Score { at } => *at,
                _ => 0,
            });
            tx.execute(
                "INSERT INTO scores (score_id, at, record)
                 SELECT * FROM unnest($1::text[], $2::int8[], $3::text[])",
                &[&keys, &ats, &values],
            )?;
        }
        Table::Examples => {
            let times = int(|c| match c {
                Columns::Example { event_time, .. } => *event_time,
                _ => 0,
            });
            let labels: Vec<f64> = records
                .iter()
                .map(|(_, c)| match c {
                    Columns::Example { label, .. } => *label,
                    _ => 0.0,
                })
                .collect();
            tx.execute(
                "INSERT INTO examples (id, event_time, label, example)
                 SELECT * FROM unnest($1::text[], $2::int8[], $3::float8[], $4::text[])",
                &[&keys, &times, &labels, &values],
            )?;
        }
        Table::Shadowed => {
            let score_ids: Vec<&str> = records
                .iter()
                .map(|(_, c)| match c {
                    Columns::Shadowed { score_id } => *score_id,
                    _ => "",
                })
                .collect();
            tx.execute(
                "INSERT INTO shadowed (candidate_id, score_id, outcome)
                 SELECT * FROM unnest($1::text[], $2::text[], $3::text[])",
                &[&keys, &score_ids, &values],
            )?;
        }
    }
    Ok(())
}
