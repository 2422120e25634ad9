//! The store on PostgreSQL, for more than one process on the same data.
//!
//! Tables mirror the sled store's trees (`migrations/postgres/`): one row per score record,
//! example, model, log entry, run and shadowed outcome, plus `meta` (activation history,
//! shadow, freeze) and `counters`. JSON columns hold the same serde JSON the sled store writes.
//!
//! Durability: every session runs with `synchronous_commit = on`, and every write is one
//! transaction, so `Ok` from any write means committed and flushed by the server; a group of
//! outcomes or a batch of examples or records is one transaction and one WAL flush (group
//! commit). `flush` has nothing left to do. Score records are committed synchronously too: the
//! recorder writes them off the response path, in batches of up to 512, so the flush is paid
//! once per batch.
//!
//! Several processes: an outcome checks for its example, then inserts it with
//! `ON CONFLICT DO NOTHING`; when another process got there first, the insert waits for that
//! transaction, finds the row and reads its label again, so the same label is a duplicate and
//! another a conflict whichever process commits first. Groups take their row locks in score id
//! order, so two overlapping groups cannot deadlock. The promotion log's sequence is a
//! `counters` row updated in the entry's own transaction, which also serializes entries
//! (and their history, shadow and freeze effects) across processes.
//!
//! The score id order rule (`Store::record_scores`) is per handle: each process's recorder
//! makes increasing ULIDs above the newest id stored when it started, and this handle refuses
//! ids at or below the last it wrote. Ids from different processes interleave in the table
//! (their time prefix keeps them close to time order); uniqueness comes from the ULID's 80
//! random bits, and a collision would fail its batch on the primary key, not overwrite.

use std::sync::Mutex;

use postgres::types::ToSql;
use postgres::Row;
use serde::de::DeserializeOwned;
use serde::Serialize;

use super::{
    Compacted, EntryEffects, ExamplesAck, Freeze, NewOutcome, OutcomeResult, PendingSignOff,
    ScoreLimits, ScoreRecord, ShadowState, ShadowedOutcome, Store, StoreError, StoredExample,
};
use crate::model::Model;
use crate::promotion::{Entry, RunStatus};
use crate::threads::lock;
use crate::time::Millis;

mod migrate;
mod outcomes;
mod pool;
mod portable;
mod replica;
mod scores;
mod state;
#[cfg(test)]
pub(crate) mod testdb;

pub use migrate::PG_LAYOUT_VERSION;
pub use pool::{redact_url, PgOptions};

use pool::{blocking, Connection, Pool};

pub struct PgStore {
    pool: Pool,
    /// The highest score id this handle wrote (or the table held when it opened).
    newest_score: Mutex<Option<String>>,
}

impl std::fmt::Debug for PgStore {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("PgStore")
            .field("dbname", &self.pool.dbname())
            .finish_non_exhaustive()
    }
}

/// What can end a transaction: the database (retried when PostgreSQL asks for it), or the
/// store's own verdict (returned as it is).
pub(super) enum TxError {
    Db(postgres::Error),
    Store(StoreError),
}

impl From<postgres::Error> for TxError {
    fn from(e: postgres::Error) -> Self {
        TxError::Db(e)
    }
}

impl From<StoreError> for TxError {
    fn from(e: StoreError) -> Self {
        TxError::Store(e)
    }
}

/// A transaction on a pooled connection, preparing each statement once per connection.
pub(super) struct Tx<'a> {
    tx: postgres::Transaction<'a>,
    statements: &'a mut std::collections::HashMap<&'static str, postgres::Statement>,
}

type Params<'p> = &'p [&'p (dyn ToSql + Sync)];

impl Tx<'_> {
    fn statement(&mut self, sql: &'static str) -> Result<postgres::Statement, postgres::Error> {
        if let Some(statement) = self.statements.get(sql) {
            return Ok(statement.clone());
        }
        let statement = self.tx.prepare(sql)?;
        self.statements.insert(sql, statement.clone());
        Ok(statement)
    }

    pub(super) fn query(
        &mut self,
        sql: &'static str,
        params: Params<'_>,
    ) -> Result<Vec<Row>, postgres::Error> {
        let statement = self.statement(sql)?;
        self.tx.query(&statement, params)
    }

    pub(super) fn query_opt(
        &mut self,
        sql: &'static str,
        params: Params<'_>,
    ) -> Result<Option<Row>, postgres::Error> {
        let statement = self.statement(sql)?;
        self.tx.query_opt(&statement, params)
    }

    pub(super) fn execute(
        &mut self,
        sql: &'static str,
        params: Params<'_>,
    ) -> Result<u64, postgres::Error> {
        let statement = self.statement(sql)?;
        self.tx.execute(&statement, params)
    }
}

/// PostgreSQL asks for the transaction to be tried again (a deadlock it broke, or a
/// serialization failure); nothing of it was written.
fn worth_retrying(e: &postgres::Error) -> bool {
    use postgres::error::SqlState;
    e.code().is_some_and(|code| {
        *code == SqlState::T_R_DEADLOCK_DETECTED || *code == SqlState::T_R_SERIALIZATION_FAILURE
    })
}

/// The server ended the session (an operator's `pg_terminate_backend`, a shutdown, a
/// restart not yet taking connections): it rolled back whatever the session had open, so the
/// work may go again on a new connection.
fn session_ended(e: &postgres::Error) -> bool {
    use postgres::error::SqlState;
    e.code().is_some_and(|code| {
        *code == SqlState::ADMIN_SHUTDOWN
            || *code == SqlState::CRASH_SHUTDOWN
            || *code == SqlState::CANNOT_CONNECT_NOW
    })
}

/// Attempts at a transaction PostgreSQL rolled back as a deadlock or serialization failure.
const ATTEMPTS: usize = 5;

pub(super) fn encode<T: Serialize + ?Sized>(value: &T) -> String {
    serde_json::to_string(value).expect("store records serialize")
}

pub(super) fn decode<T: DeserializeOwned>(text: &str) -> Result<T, StoreError> {
    serde_json::from_str(text).map_err(|e| StoreError::Corrupt(e.to_string()))
}

impl PgStore {
    /// Connects, applies the migrations this database lacks (once, however many processes
    /// open it at the same moment), and refuses a database of a newer layout
    /// ([`StoreError::NewerSchema`]).
    pub fn open(options: &PgOptions) -> Result<PgStore, StoreError> {
        blocking(|| PgStore::open_here(options))
    }

    fn open_here(options: &PgOptions) -> Result<PgStore, StoreError> {
        let pool = Pool::new(options)?;
        {
            let mut connection = pool.take()?;
            migrate::migrate(&mut connection.client).map_err(|e| match e {
                migrate::MigrateError::Store(e) => e,
                migrate::MigrateError::Db(e) => {
                    pool.error("cannot apply the PostgreSQL migrations", &e)
                }
            })?;
        }
        let store = PgStore {
            pool,
            newest_score: Mutex::new(None),
        };
        let newest = store
            .read_one("SELECT max(score_id) FROM scores", &[])?
            .and_then(|row| row.get::<_, Option<String>>(0));
        *lock(&store.newest_score) = newest;
        Ok(store)
    }

    /// A connection of its own, outside the pool, for work that holds one for long (a
    /// session-level advisory lock, LISTEN).
    /// Like every use of the blocking client, it must be used off the async runtime's
    /// threads (`spawn_blocking`, a thread of its own).
    pub fn dedicated_connection(&self) -> Result<postgres::Client, StoreError> {
        blocking(|| self.pool.connect())
    }

    /// Runs `body` in one transaction and commits it; a deadlock or serialization failure
    /// runs it again, any other database error is [`StoreError::Unavailable`].
    pub(super) fn write<T: Send>(
        &self,
        context: &str,
        body: impl FnMut(&mut Tx<'_>) -> Result<T, TxError> + Send,
    ) -> Result<T, StoreError> {
        blocking(|| self.write_here(context, body))
    }

    fn write_here<T>(
        &self,
        context: &str,
        mut body: impl FnMut(&mut Tx<'_>) -> Result<T, TxError>,
    ) -> Result<T, StoreError> {
        let mut attempt = 0;
        loop {
            attempt += 1;
            let mut taken = self.pool.take()?;
            let Connection { client, statements } = &mut *taken;
            let mut began = false;
            let result = (|| {
                let tx = client.transaction()?;
                began = true;
                let mut tx = Tx { tx, statements };
                let value = body(&mut tx)?;
                tx.tx.commit()?;
                Ok(value)
            })();
            match result {
                Ok(value) => return Ok(value),
                Err(TxError::Store(e)) => return Err(e),
                Err(TxError::Db(e)) => {
                    taken.forget_statements();
                    // A connection the server closed while it sat idle (a restart, a killed
                    // backend) fails at BEGIN, before anything of the write was sent, or
                    // answers that the server ended the session (which rolled the transaction
                    // back): the write goes again on a new connection, and its idle siblings,
                    // most likely dead too, are closed. A connection lost silently after
                    // BEGIN is not retried: the commit's fate is unknown, and the caller gets
                    // the error.
                    let lost_idle = session_ended(&e) || (!began && taken.client.is_closed());
                    if lost_idle {
                        self.pool.discard_idle();
                    }
                    if (lost_idle || worth_retrying(&e)) && attempt < ATTEMPTS {
                        tracing::debug!(error = %e, attempt, "PostgreSQL transaction retried");
                        continue;
                    }
                    return Err(self.pool.error(context, &e));
                }
            }
        }
    }

    /// One statement outside a transaction.
    pub(super) fn read(
        &self,
        sql: &'static str,
        params: Params<'_>,
    ) -> Result<Vec<Row>, StoreError> {
        blocking(|| self.read_here(sql, params))
    }

    /// Reads change nothing, so one that failed on a connection the server had closed goes
    /// again on a new one.
    fn read_here(&self, sql: &'static str, params: Params<'_>) -> Result<Vec<Row>, StoreError> {
        let mut attempt = 0;
        loop {
            attempt += 1;
            let mut taken = self.pool.take()?;
            let result = taken
                .statement(sql)
                .and_then(|statement| taken.client.query(&statement, params));
            match result {
                Ok(rows) => return Ok(rows),
                Err(e) => {
                    taken.forget_statements();
                    if (taken.client.is_closed() || session_ended(&e)) && attempt < ATTEMPTS {
                        self.pool.discard_idle();
                        continue;
                    }
                    return Err(self.pool.error("cannot read from PostgreSQL", &e));
                }
            }
        }
    }

    pub(super) fn read_one(
        &self,
        sql: &'static str,
        params: Params<'_>,
    ) -> Result<Option<Row>, StoreError> {
        Ok(self.read(sql, params)?.into_iter().next())
    }

    /// The JSON in the first column of each row.
    pub(super) fn read_json<T: DeserializeOwned>(
        &self,
        sql: &'static str,
        params: Params<'_>,
    ) -> Result<Vec<T>, StoreError> {
        self.read(sql, params)?
            .iter()
            .map(|row| decode(row.get::<_, &str>(0)))
            .collect()
    }

    /// A `count(*)` for the methods that answer a plain number: a failed read is logged and
    /// counts as 0.
    fn count(&self, sql: &'static str, params: Params<'_>) -> u64 {
        match self.read_one(sql, params) {
            Ok(Some(row)) => row.get::<_, i64>(0).max(0) as u64,
            Ok(None) => 0,
            Err(e) => {
                tracing::warn!(error = %e, "a PostgreSQL count failed");
                0
            }
        }
    }
}

impl Store for PgStore {
    fn record_scores(&self, records: &[ScoreRecord]) -> Result<(), StoreError> {
        self.write_score_records(records)
    }

    fn newest_score_id(&self) -> Option<String> {
        lock(&self.newest_score).clone()
    }

    fn score(&self, score_id: &str) -> Result<Option<ScoreRecord>, StoreError> {
        Ok(self
            .read_json(
                "SELECT record FROM scores WHERE score_id = $1",
                &[&score_id],
            )?
            .pop())
    }

    fn put_outcomes(&self, outcomes: &[NewOutcome]) -> Result<Vec<OutcomeResult>, StoreError> {
        self.write_outcomes(outcomes)
    }

    /// Committed (and so durable) on return, like `put_outcomes`.
    fn apply_outcomes(&self, outcomes: &[NewOutcome]) -> Result<Vec<OutcomeResult>, StoreError> {
        self.write_outcomes(outcomes)
    }

    fn put_examples(&self, examples: &[StoredExample]) -> Result<ExamplesAck, StoreError> {
        self.write_examples(examples)
    }

    fn latest_examples(
        &self,
        max_rows: usize,
        since: Option<Millis>,
    ) -> Result<Vec<StoredExample>, StoreError> {
        let since = since.unwrap_or(Millis::MIN);
        let limit = i64::try_from(max_rows).unwrap_or(i64::MAX);
        let mut examples: Vec<StoredExample> = self.read_json(
            "SELECT example FROM examples WHERE event_time >= $1
             ORDER BY event_time DESC, id DESC LIMIT $2",
            &[&since, &limit],
        )?;
        examples.reverse();
        Ok(examples)
    }

    fn example_count(&self) -> usize {
        self.count("SELECT count(*) FROM examples", &[]) as usize
    }

    fn example(&self, id: &str) -> Result<Option<StoredExample>, StoreError> {
        Ok(self
            .read_json("SELECT example FROM examples WHERE id = $1", &[&id])?
            .pop())
    }

    fn next_seq(&self, counter: &str) -> Result<u64, StoreError> {
        self.write("cannot advance a counter", |tx| {
            Ok(state::next_in(tx, counter)?)
        })
    }

    fn put_model(&self, model: &Model) -> Result<(), StoreError> {
        self.write_model(model)
    }

    fn model(&self, id: &str) -> Result<Option<Model>, StoreError> {
        Ok(self
            .read_json("SELECT model FROM models WHERE id = $1", &[&id])?
            .pop())
    }

    fn models(&self) -> Result<Vec<Model>, StoreError> {
        self.read_json("SELECT model FROM models ORDER BY created_at, id", &[])
    }

    fn append_entry(&self, entry: Entry, effects: EntryEffects<'_>) -> Result<Entry, StoreError> {
        self.write_entry(entry, effects)
    }

    fn entries(&self, limit: usize) -> Result<Vec<Entry>, StoreError> {
        let limit = i64::try_from(limit).unwrap_or(i64::MAX);
        self.read_json(
            "SELECT entry FROM log ORDER BY seq DESC LIMIT $1",
            &[&limit],
        )
    }

    fn entry(&self, seq: u64) -> Result<Option<Entry>, StoreError> {
        let Ok(seq) = i64::try_from(seq) else {
            return Ok(None);
        };
        Ok(self
            .read_json("SELECT entry FROM log WHERE seq = $1", &[&seq])?
            .pop())
    }

    fn unfinished_runs(&self) -> Result<Vec<RunStatus>, StoreError> {
        self.read_json(
            "SELECT run FROM runs WHERE NOT finished ORDER BY run_id",
            &[],
        )
    }

    fn active_history(&self) -> Result<Vec<String>, StoreError> {
        Ok(self.meta(state::HISTORY)?.unwrap_or_default())
    }

    fn put_run(&self, run: &RunStatus) -> Result<(), StoreError> {
        self.write_run(run)
    }

    fn run(&self, run_id: &str) -> Result<Option<RunStatus>, StoreError> {
        Ok(self
            .read_json("SELECT run FROM runs WHERE run_id = $1", &[&run_id])?
            .pop())
    }

    /// Every write committed with `synchronous_commit = on`: nothing waits to be flushed.
    fn flush(&self) -> Result<(), StoreError> {
        Ok(())
    }

    fn check_writable(&self) -> Result<(), StoreError> {
        let now = crate::time::now_ms().to_string();
        self.write("the write probe failed", |tx| {
            state::put_meta(tx, state::PROBE, &now)?;
            Ok(())
        })
    }

    fn recent_scores(
        &self,
        max: usize,
        since: Option<Millis>,
    ) -> Result<Vec<ScoreRecord>, StoreError> {
        // In id order, as the sled store reads its pages. A record's `at` is its ULID's time
        // (the recorder makes both), so the ids below the ULID of `since` can be skipped
        // through the primary key instead of read and filtered.
        let floor = since.map_or(String::new(), |t| {
            ulid::Ulid::from_parts(t.max(0) as u64, 0).to_string()
        });
        let since = since.unwrap_or(Millis::MIN);
        let limit = i64::try_from(max).unwrap_or(i64::MAX);
        self.read_json(
            "SELECT record FROM scores WHERE score_id >= $3 AND at >= $1
             ORDER BY score_id DESC LIMIT $2",
            &[&since, &limit, &floor],
        )
    }

    /// Counted by the database on each call (other processes write too).
    fn score_count(&self) -> u64 {
        self.count("SELECT count(*) FROM scores", &[])
    }

    fn compact_scores(
        &self,
        limits: ScoreLimits,
        max_records: usize,
    ) -> Result<Compacted, StoreError> {
        self.delete_old_scores(limits, max_records)
    }

    fn has_outcome(&self, score_id: &str) -> Result<bool, StoreError> {
        Ok(self
            .read_one("SELECT 1 FROM examples WHERE id = $1", &[&score_id])?
            .is_some())
    }

    fn shadow_state(&self) -> Result<Option<ShadowState>, StoreError> {
        self.meta(state::SHADOW)
    }

    fn set_shadow_state(&self, state: Option<&ShadowState>) -> Result<(), StoreError> {
        self.write_shadow_state(state)
    }

    fn shadowed_outcomes(&self, candidate_id: &str) -> Result<Vec<ShadowedOutcome>, StoreError> {
        self.read_json(
            "SELECT outcome FROM shadowed WHERE candidate_id = $1 ORDER BY score_id",
            &[&candidate_id],
        )
    }

    fn shadowed_count(&self, candidate_id: &str) -> usize {
        self.count(
            "SELECT count(*) FROM shadowed WHERE candidate_id = $1",
            &[&candidate_id],
        ) as usize
    }

    fn freeze(&self) -> Result<Option<Freeze>, StoreError> {
        self.meta(state::FREEZE)
    }

    fn pending_sign_off(&self) -> Result<Option<PendingSignOff>, StoreError> {
        self.meta(state::SIGN_OFF)
    }

    fn set_freeze(&self, freeze: Option<&Freeze>) -> Result<(), StoreError> {
        let value = freeze.map(encode);
        self.write("cannot write the freeze", |tx| {
            match &value {
                Some(value) => state::put_meta(tx, state::FREEZE, value)?,
                None => state::delete_meta(tx, state::FREEZE)?,
            }
            replica::announce(tx, "freeze")?;
            Ok(())
        })
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

#[cfg(test)]
mod tests;
