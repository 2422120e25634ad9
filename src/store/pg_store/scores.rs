//! Score records on PostgreSQL: one row each, written a batch per statement, deleted oldest
//! first in bounded transactions by compaction.

use super::{encode, PgStore};
use crate::store::{Compacted, ScoreLimits, ScoreRecord, StoreError};
use crate::threads::lock;

impl PgStore {
    pub(super) fn write_score_records(&self, records: &[ScoreRecord]) -> Result<(), StoreError> {
        let Some(last) = records.last() else {
            return Ok(());
        };
        // The order rule holds per handle (see the module docs): held across the write, so
        // two threads of one process cannot interleave their batches.
        let mut newest = lock(&self.newest_score);
        crate::store::check_score_order(newest.as_deref(), records)?;
        let ids: Vec<&str> = records.iter().map(|r| r.score_id.as_str()).collect();
        let ats: Vec<i64> = records.iter().map(|r| r.at).collect();
        let json: Vec<String> = records.iter().map(encode).collect();
        self.write("cannot write score records", |tx| {
            tx.execute(
                "INSERT INTO scores (score_id, at, record)
                 SELECT * FROM unnest($1::text[], $2::int8[], $3::text[])",
                &[&ids, &ats, &json],
            )?;
            Ok(())
        })?;
        *newest = Some(last.score_id.clone());
        Ok(())
    }

    /// The oldest records beyond `limits.keep` and those below the ULID of
    /// `limits.older_than`: both a prefix in id order, as in the sled store. At most
    /// `max_records` rows per call, in one transaction.
    pub(super) fn delete_old_scores(
        &self,
        limits: ScoreLimits,
        max_records: usize,
    ) -> Result<Compacted, StoreError> {
        if limits.keep.is_none() && limits.older_than.is_none() {
            return Ok(Compacted::default());
        }
        let bound = max_records.max(1);
        let boundary = limits
            .older_than
            .map(|t| ulid::Ulid::from_parts(t.max(0) as u64, 0).to_string());
        self.write("cannot delete old score records", |tx| {
            let excess = match limits.keep {
                Some(keep) => {
                    let count: i64 = tx
                        .query_opt("SELECT count(*) FROM scores", &[])?
                        .map_or(0, |row| row.get(0));
                    (count.max(0) as u64).saturating_sub(keep)
                }
                None => 0,
            };
            // One row past the bound tells whether more is due after this call.
            let fetch = i64::try_from(bound + 1).unwrap_or(i64::MAX);
            let rows = tx.query(
                "SELECT score_id FROM scores ORDER BY score_id LIMIT $1",
                &[&fetch],
            )?;
            let goes = |i: usize, id: &str| {
                (i as u64) < excess || boundary.as_ref().is_some_and(|b| id < b.as_str())
            };
            let doomed: Vec<&str> = rows
                .iter()
                .map(|row| row.get::<_, &str>(0))
                .enumerate()
                .take_while(|&(i, id)| goes(i, id))
                .map(|(_, id)| id)
                .collect();
            let more = doomed.len() > bound;
            let doomed = &doomed[..doomed.len().min(bound)];
            if doomed.is_empty() {
                return Ok(Compacted::default());
            }
            // Another process compacting at the same moment may have taken some already.
            let records = tx.execute("DELETE FROM scores WHERE score_id = ANY($1)", &[&doomed])?;
            Ok(Compacted {
                records,
                // The write's size in this backend's unit: one statement.
                pages: 1,
                more,
            })
        })
    }
}
