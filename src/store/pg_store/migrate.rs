//! The PostgreSQL layout: numbered SQL files in `migrations/postgres/`, embedded in the
//! binary, applied at open.
//!
//! Several processes may open one database at the same moment (replicas starting together),
//! so the check and the migrations run in one transaction that first takes a
//! transaction-level advisory lock: the first process applies what is missing, the others
//! wait for it and then find nothing to do. DDL is transactional in PostgreSQL, so a process
//! killed half-way leaves the database as it was. A database whose layout is newer than this
//! binary's is refused, as the sled store refuses a newer data dir.

use postgres::Client;

use crate::store::StoreError;

/// The migrations, in order; a file's number is the layout it brings the database to.
pub(super) const MIGRATIONS: &[(u32, &str, &str)] = &[
    (
        1,
        "0001-initial",
        include_str!("../../../migrations/postgres/0001-initial.sql"),
    ),
    (
        2,
        "0002-replicas",
        include_str!("../../../migrations/postgres/0002-replicas.sql"),
    ),
];

/// The layout this binary writes: the last migration's number.
pub const PG_LAYOUT_VERSION: u32 = MIGRATIONS[MIGRATIONS.len() - 1].0;

/// The advisory lock key taken while migrating ("usmigrat" as a big-endian integer), shared
/// by every process of every version, so migrations never run twice at once.
const MIGRATION_LOCK: i64 = i64::from_be_bytes(*b"usmigrat");

/// The layout table, created (under the lock) before anything reads it.
const LAYOUT_TABLE: &str = "CREATE TABLE IF NOT EXISTS layout (
    version    integer PRIMARY KEY,
    name       text NOT NULL,
    applied_at timestamptz NOT NULL DEFAULT now()
)";

/// Brings the database to [`PG_LAYOUT_VERSION`], or refuses a newer one. Returns the
/// migrations this call applied.
pub(super) fn migrate(client: &mut Client) -> Result<Vec<u32>, MigrateError> {
    let mut tx = client.transaction()?;
    // DDL waits behind the lock, not behind the session's statement timeout.
    tx.batch_execute("SET LOCAL statement_timeout = 0")?;
    tx.execute("SELECT pg_advisory_xact_lock($1)", &[&MIGRATION_LOCK])?;
    tx.batch_execute(LAYOUT_TABLE)?;
    let found: Option<i32> = tx.query_one("SELECT max(version) FROM layout", &[])?.get(0);
    let found = found.unwrap_or(0).max(0) as u32;
    if found > PG_LAYOUT_VERSION {
        return Err(MigrateError::Store(StoreError::NewerSchema {
            found,
            supported: PG_LAYOUT_VERSION,
        }));
    }
    let mut applied = Vec::new();
    for &(version, name, sql) in MIGRATIONS.iter().filter(|m| m.0 > found) {
        tracing::info!(version, name, "applying a PostgreSQL migration");
        tx.batch_execute(sql)?;
        tx.execute(
            "INSERT INTO layout (version, name) VALUES ($1, $2)",
            &[&(version as i32), &name],
        )?;
        applied.push(version);
    }
    tx.commit()?;
    Ok(applied)
}

#[derive(Debug)]
pub(super) enum MigrateError {
    Db(postgres::Error),
    Store(StoreError),
}

impl From<postgres::Error> for MigrateError {
    fn from(e: postgres::Error) -> Self {
        MigrateError::Db(e)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn migrations_are_numbered_one_after_another_from_one() {
        for (i, (version, name, sql)) in MIGRATIONS.iter().enumerate() {
            assert_eq!(*version as usize, i + 1);
            assert!(name.starts_with(&format!("{version:04}-")), "{name}");
            assert!(!sql.trim().is_empty());
        }
        assert_eq!(PG_LAYOUT_VERSION as usize, MIGRATIONS.len());
    }
}
