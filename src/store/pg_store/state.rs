//! What the registry and the scheduler keep on PostgreSQL: models, runs, the promotion log
//! with its effects (activation history, shadow, sign-off wait, freeze, in the entry's own
//! transaction),
//! named counters and the `meta` values.

use serde::de::DeserializeOwned;

use super::{decode, encode, PgStore, Tx, TxError};
use crate::model::Model;
use crate::promotion::{Entry, RunState, RunStatus};
use crate::store::{EntryEffects, PendingSignOff, ShadowState, StoreError};

pub(super) const HISTORY: &str = "active_history";
pub(super) const SHADOW: &str = "shadow";
pub(super) const FREEZE: &str = "freeze";
/// The candidate waiting for sign-off (`PendingSignOff`).
pub(super) const SIGN_OFF: &str = "sign_off";
/// The last time `check_writable` proved the store takes writes.
pub(super) const PROBE: &str = "write_probe";
/// The promotion log's counter (the sled store keeps it as `seq/log` beside the others).
const LOG_COUNTER: &str = "log";

/// The next value of a counter, taking its row lock until the transaction ends.
pub(super) fn next_in(tx: &mut Tx<'_>, counter: &str) -> Result<u64, postgres::Error> {
    let row = tx
        .query_opt(
            "INSERT INTO counters (name, value) VALUES ($1, 1)
             ON CONFLICT (name) DO UPDATE SET value = counters.value + 1
             RETURNING value",
            &[&counter],
        )?
        .expect("RETURNING gives the row");
    Ok(row.get::<_, i64>(0) as u64)
}

pub(super) fn put_meta(tx: &mut Tx<'_>, key: &str, value: &str) -> Result<(), postgres::Error> {
    tx.execute(
        "INSERT INTO meta (key, value) VALUES ($1, $2)
         ON CONFLICT (key) DO UPDATE SET value = excluded.value",
        &[&key, &value],
    )?;
    Ok(())
}

pub(super) fn delete_meta(tx: &mut Tx<'_>, key: &str) -> Result<(), postgres::Error> {
    tx.execute("DELETE FROM meta WHERE key = $1", &[&key])?;
    Ok(())
}

/// A `meta` value, its row locked until the transaction ends.
fn meta_for_update<T: DeserializeOwned>(tx: &mut Tx<'_>, key: &str) -> Result<Option<T>, TxError> {
    match tx.query_opt("SELECT value FROM meta WHERE key = $1 FOR UPDATE", &[&key])? {
        Some(row) => Ok(Some(decode(row.get::<_, &str>(0))?)),
        None => Ok(None),
    }
}

/// Applies a shadow change: sets or clears the state, and drops the shadowed rows of a
/// candidate that no longer shadows.
fn change_shadow(tx: &mut Tx<'_>, state: Option<&ShadowState>) -> Result<(), TxError> {
    let previous: Option<ShadowState> = meta_for_update(tx, SHADOW)?;
    match state {
        Some(state) => put_meta(tx, SHADOW, &encode(state))?,
        None => delete_meta(tx, SHADOW)?,
    }
    if let Some(previous) = previous {
        if state.is_none_or(|s| s.candidate_id != previous.candidate_id) {
            tx.execute(
                "DELETE FROM shadowed WHERE candidate_id = $1",
                &[&previous.candidate_id],
            )?;
        }
    }
    Ok(())
}

impl PgStore {
    pub(super) fn meta<T: DeserializeOwned>(&self, key: &str) -> Result<Option<T>, StoreError> {
        Ok(self
            .read_json("SELECT value FROM meta WHERE key = $1", &[&key])?
            .pop())
    }

    pub(super) fn write_model(&self, model: &Model) -> Result<(), StoreError> {
        let json = encode(model);
        self.write("cannot write a model", |tx| {
            tx.execute(
                "INSERT INTO models (id, created_at, model) VALUES ($1, $2, $3)
                 ON CONFLICT (id) DO UPDATE
                 SET created_at = excluded.created_at, model = excluded.model",
                &[&model.id, &model.created_at, &json],
            )?;
            Ok(())
        })
    }

    pub(super) fn write_run(&self, run: &RunStatus) -> Result<(), StoreError> {
        let json = encode(run);
        let finished = run.state == RunState::Finished;
        self.write("cannot write a run", |tx| {
            tx.execute(
                "INSERT INTO runs (run_id, finished, run) VALUES ($1, $2, $3)
                 ON CONFLICT (run_id) DO UPDATE
                 SET finished = excluded.finished, run = excluded.run",
                &[&run.run_id, &finished, &json],
            )?;
            Ok(())
        })
    }

    /// The entry, its sequence, and its effects in one transaction. The counter's row lock
    /// orders entries from every process: the second waits for the first to commit.
    pub(super) fn write_entry(
        &self,
        entry: Entry,
        effects: EntryEffects<'_>,
    ) -> Result<Entry, StoreError> {
        let history = effects.history.map(encode);
        self.write("cannot append to the promotion log", |tx| {
            let seq = next_in(tx, LOG_COUNTER)?;
            let mut numbered = entry.clone();
            numbered.seq = seq;
            tx.execute(
                "INSERT INTO log (seq, entry) VALUES ($1, $2)",
                &[&(seq as i64), &encode(&numbered)],
            )?;
            if let Some(history) = &history {
                put_meta(tx, HISTORY, history)?;
            }
            if let Some(shadow) = effects.shadow {
                let numbered_state = shadow.map(|state| ShadowState {
                    entry_seq: seq,
                    ..state.clone()
                });
                change_shadow(tx, numbered_state.as_ref())?;
            }
            match effects.sign_off {
                Some(Some(state)) => {
                    let numbered_state = PendingSignOff {
                        entry_seq: seq,
                        ..state.clone()
                    };
                    put_meta(tx, SIGN_OFF, &encode(&numbered_state))?;
                }
                Some(None) => delete_meta(tx, SIGN_OFF)?,
                None => {}
            }
            match effects.freeze {
                Some(Some(freeze)) => put_meta(tx, FREEZE, &encode(freeze))?,
                Some(None) => delete_meta(tx, FREEZE)?,
                None => {}
            }
            // Every replica reloads what it serves when this commits.
            super::replica::announce(tx, &seq.to_string())?;
            Ok(numbered)
        })
    }

    pub(super) fn write_shadow_state(&self, state: Option<&ShadowState>) -> Result<(), StoreError> {
        self.write("cannot write the shadow state", |tx| {
            change_shadow(tx, state)?;
            super::replica::announce(tx, "shadow")?;
            Ok(())
        })
    }
}
