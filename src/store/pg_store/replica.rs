//! Several replicas on one database: the leader election, the notifications that tell every
//! replica a change happened, and retrains queued for the leader (`run_requests`,
//! `migrations/postgres/0002-replicas.sql`).
//!
//! Leadership is a session-level advisory lock ([`LEADER_LOCK`]) taken with
//! `pg_try_advisory_lock` on a connection of its own ([`PgLink`]). The server releases it when
//! that session ends, however it ends (the process killed, the connection cut, the backend
//! terminated), so a dead leader never holds it; and while the session lives no other replica
//! can take it. The same connection `LISTEN`s: writes that change what replicas serve (a log
//! entry with its effects, the shadow, the freeze) `NOTIFY` [`CHANGES`] in their own
//! transaction, so the notification is sent exactly when the change commits, and a queued
//! retrain notifies [`RUNS`]. The link's session is named `understudy:<replica id>`
//! (`application_name`), which is how followers learn who leads: the holder of the lock in
//! `pg_locks`, by its session in `pg_stat_activity`.

use std::time::Duration;

use postgres::fallible_iterator::FallibleIterator;
use postgres::Client;

use super::pool::blocking;
use super::{PgStore, Tx};
use crate::promotion::RunStatus;
use crate::store::replicas::{Heard, QueuedRun, ReplicaLink, SharedStore};
use crate::store::StoreError;

/// The leadership's advisory lock key ("usleader" as a big-endian integer).
const LEADER_LOCK: i64 = i64::from_be_bytes(*b"usleader");
/// The channel a change of the active model, the shadow, the freeze or the log is announced on.
pub(super) const CHANGES: &str = "understudy_changes";
/// The channel a queued retrain is announced on.
const RUNS: &str = "understudy_runs";
/// What the link's session calls itself before the replica id.
const NAME_PREFIX: &str = "understudy:";

/// Announces a change to every listening replica when `tx` commits.
pub(super) fn announce(tx: &mut Tx<'_>, what: &str) -> Result<(), postgres::Error> {
    tx.execute("SELECT pg_notify($1, $2)", &[&CHANGES, &what])?;
    Ok(())
}

/// The held connection: the leadership lock and the notifications.
pub(super) struct PgLink {
    /// Always `Some` until dropped.
    client: Option<Client>,
    holds: bool,
}

impl PgLink {
    fn lost(e: &postgres::Error) -> StoreError {
        StoreError::Unavailable(format!("the replica's held connection failed: {e}"))
    }

    fn closed() -> StoreError {
        StoreError::Unavailable("the replica's held connection was closed".into())
    }

    fn client(&mut self) -> Result<&mut Client, StoreError> {
        self.client.as_mut().ok_or_else(PgLink::closed)
    }
}

impl ReplicaLink for PgLink {
    fn wait(&mut self, timeout: Duration) -> Result<Heard, StoreError> {
        blocking(|| {
            let mut heard = Heard::default();
            let mut note = |channel: &str| match channel {
                CHANGES => heard.changes = true,
                RUNS => heard.run_requests = true,
                _ => {}
            };
            let client = self.client()?;
            // The first waits; whatever else already arrived is taken without waiting.
            let first = client
                .notifications()
                .timeout_iter(timeout)
                .next()
                .map_err(|e| PgLink::lost(&e))?;
            if let Some(first) = first {
                note(first.channel());
                let mut notifications = client.notifications();
                let mut more = notifications.iter();
                while let Some(next) = more.next().map_err(|e| PgLink::lost(&e))? {
                    note(next.channel());
                }
            }
            if client.is_closed() {
                return Err(PgLink::closed());
            }
            Ok(heard)
        })
    }

    fn contend(&mut self) -> Result<bool, StoreError> {
        blocking(|| {
            if self.holds {
                // The lock lives as long as the session: a session that still answers holds it.
                self.client()?
                    .is_valid(Duration::from_secs(2))
                    .map_err(|e| PgLink::lost(&e))?;
                return Ok(true);
            }
            let row = self
                .client()?
                .query_one("SELECT pg_try_advisory_lock($1)", &[&LEADER_LOCK])
                .map_err(|e| PgLink::lost(&e))?;
            self.holds = row.get(0);
            Ok(self.holds)
        })
    }

    fn leader(&mut self) -> Result<Option<String>, StoreError> {
        blocking(|| {
            // A bigint key shows in pg_locks as its high 32 bits (classid) and low 32 bits
            // (objid) with objsubid 1 (PostgreSQL 15 documentation, "pg_locks").
            let row = self
                .client()?
                .query_opt(
                    "SELECT a.application_name FROM pg_locks l
                     JOIN pg_stat_activity a ON a.pid = l.pid
                     WHERE l.locktype = 'advisory' AND l.granted AND l.objsubid = 1
                       AND l.database = (SELECT oid FROM pg_database
                                         WHERE datname = current_database())
                       AND l.classid::bigint = ($1::bigint >> 32)
                       AND l.objid::bigint = ($1::bigint & 4294967295)
                     LIMIT 1",
                    &[&LEADER_LOCK],
                )
                .map_err(|e| PgLink::lost(&e))?;
            Ok(row.map(|row| {
                let name: String = row.get(0);
                name.strip_prefix(NAME_PREFIX).unwrap_or(&name).to_owned()
            }))
        })
    }
}

impl Drop for PgLink {
    fn drop(&mut self) {
        // Dropping the blocking client runs its runtime: keep that off async threads.
        if let Some(client) = self.client.take() {
            blocking(move || drop(client));
        }
    }
}

impl SharedStore for PgStore {
    fn link(&self, replica_id: &str) -> Result<Box<dyn ReplicaLink>, StoreError> {
        let name: String = format!("{NAME_PREFIX}{replica_id}")
            .chars()
            .take(63)
            .collect();
        let client = blocking(|| -> Result<Client, StoreError> {
            let mut client = self.pool.connect()?;
            let lost = |e: postgres::Error| self.pool.error("cannot set up the replica link", &e);
            client
                .execute("SELECT set_config('application_name', $1, false)", &[&name])
                .map_err(lost)?;
            client
                .batch_execute(&format!("LISTEN {CHANGES}; LISTEN {RUNS}"))
                .map_err(lost)?;
            Ok(client)
        })?;
        Ok(Box::new(PgLink {
            client: Some(client),
            holds: false,
        }))
    }

    fn queue_run(
        &self,
        run: &RunStatus,
        detail: Option<&str>,
        capacity: usize,
    ) -> Result<bool, StoreError> {
        let json = super::encode(run);
        let capacity = i64::try_from(capacity).unwrap_or(i64::MAX);
        self.write("cannot queue a retrain", |tx| {
            // One queue at a time: counting and inserting must not interleave with another
            // replica's.
            tx.execute("LOCK TABLE run_requests IN SHARE ROW EXCLUSIVE MODE", &[])?;
            let waiting: i64 = tx
                .query_opt("SELECT count(*) FROM run_requests", &[])?
                .map_or(0, |row| row.get(0));
            if waiting >= capacity {
                return Ok(false);
            }
            tx.execute(
                "INSERT INTO runs (run_id, finished, run) VALUES ($1, false, $2)",
                &[&run.run_id, &json],
            )?;
            tx.execute(
                "INSERT INTO run_requests (run_id, requested_at, detail) VALUES ($1, $2, $3)",
                &[&run.run_id, &run.requested_at, &detail],
            )?;
            tx.execute("SELECT pg_notify($1, $2)", &[&RUNS, &run.run_id])?;
            Ok(true)
        })
    }

    fn take_queued_runs(&self, max: usize) -> Result<Vec<QueuedRun>, StoreError> {
        if max == 0 {
            return Ok(Vec::new());
        }
        let max = i64::try_from(max).unwrap_or(i64::MAX);
        self.write("cannot take queued retrains", |tx| {
            let taken = tx.query(
                "DELETE FROM run_requests WHERE run_id IN (
                     SELECT run_id FROM run_requests ORDER BY requested_at, run_id
                     LIMIT $1 FOR UPDATE SKIP LOCKED)
                 RETURNING run_id, requested_at, detail",
                &[&max],
            )?;
            let mut taken: Vec<(String, i64, Option<String>)> = taken
                .iter()
                .map(|row| (row.get(0), row.get(1), row.get(2)))
                .collect();
            taken.sort_by(|a, b| (a.1, &a.0).cmp(&(b.1, &b.0)));
            let mut runs = Vec::with_capacity(taken.len());
            for (run_id, _, detail) in taken {
                let Some(row) =
                    tx.query_opt("SELECT run FROM runs WHERE run_id = $1", &[&run_id])?
                else {
                    continue;
                };
                let run: RunStatus = super::decode(row.get::<_, &str>(0))?;
                runs.push(QueuedRun { run, detail });
            }
            Ok(runs)
        })
    }

    fn queued_run_ids(&self) -> Result<Vec<String>, StoreError> {
        Ok(self
            .read(
                "SELECT run_id FROM run_requests ORDER BY requested_at, run_id",
                &[],
            )?
            .iter()
            .map(|row| row.get(0))
            .collect())
    }

    fn examples_written(&self) -> Result<u64, StoreError> {
        Ok(self
            .read_one(
                "SELECT coalesce(n_tup_ins, 0) FROM pg_stat_user_tables
                 WHERE relid = 'examples'::regclass",
                &[],
            )?
            .map_or(0, |row| row.get::<_, i64>(0).max(0) as u64))
    }
}
