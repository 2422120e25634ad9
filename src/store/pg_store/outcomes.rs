//! Outcomes and backfilled examples on PostgreSQL: joining a label to its score record,
//! writing the example (and the shadowed row), and refusing a conflicting label, whichever
//! process wrote the first one.

use super::{decode, encode, PgStore, Tx, TxError};
use crate::store::{
    ExamplesAck, NewOutcome, OutcomeAck, OutcomeResult, ScoreRecord, StoreError, StoredExample,
};

fn judge(new: &NewOutcome, existing: f64) -> OutcomeResult {
    if existing == new.label {
        Ok(OutcomeAck::Duplicate)
    } else {
        Err(StoreError::ConflictingLabel {
            score_id: new.score_id.clone(),
            existing,
            sent: new.label,
        })
    }
}

const LABEL_OF: &str = "SELECT label FROM examples WHERE id = $1";

/// One outcome inside its group's transaction. Reads see the group's earlier writes, so the
/// same score twice in a group is a duplicate or a conflict, as in two groups.
fn one_outcome(tx: &mut Tx<'_>, new: &NewOutcome) -> Result<OutcomeResult, TxError> {
    // The example outlives its score record (retention deletes only the record), so an
    // earlier label is looked for first.
    if let Some(row) = tx.query_opt(LABEL_OF, &[&new.score_id])? {
        return Ok(judge(new, row.get(0)));
    }
    let Some(row) = tx.query_opt(
        "SELECT record FROM scores WHERE score_id = $1",
        &[&new.score_id],
    )?
    else {
        return Ok(Err(StoreError::UnknownScore(new.score_id.clone())));
    };
    let record: ScoreRecord = match decode(row.get::<_, &str>(0)) {
        Ok(record) => record,
        Err(e) => return Ok(Err(e)),
    };
    let example = encode(&crate::store::ExampleText {
        id: &record.score_id,
        event_time: record.at,
        label: new.label,
        features: &record.features,
        outcome_at: new.at,
        monitoring: &new.monitoring,
    });
    let inserted = tx.execute(
        "INSERT INTO examples (id, event_time, label, example) VALUES ($1, $2, $3, $4)
         ON CONFLICT (id) DO NOTHING",
        &[&record.score_id, &record.at, &new.label, &example],
    )?;
    if inserted == 0 {
        // Another process committed this score's label after the look above: the insert
        // waited for its transaction, and a new statement sees its row.
        let row = tx.query_opt(LABEL_OF, &[&new.score_id])?.ok_or_else(|| {
            StoreError::Unavailable("an example vanished during an outcome's write".into())
        })?;
        return Ok(judge(new, row.get(0)));
    }
    if let Some((candidate, row)) = record.shadowed_row(new.label) {
        let outcome = encode(&row);
        tx.execute(
            "INSERT INTO shadowed (candidate_id, score_id, outcome) VALUES ($1, $2, $3)
             ON CONFLICT DO NOTHING",
            &[&candidate, &new.score_id, &outcome],
        )?;
    }
    Ok(Ok(OutcomeAck::Recorded))
}

impl PgStore {
    /// A group of outcomes in one transaction (one commit, one WAL flush). They are written
    /// in score id order, results in the order given: two processes writing overlapping
    /// groups then lock the same rows in the same order and never deadlock.
    pub(super) fn write_outcomes(
        &self,
        outcomes: &[NewOutcome],
    ) -> Result<Vec<OutcomeResult>, StoreError> {
        let mut order: Vec<usize> = (0..outcomes.len()).collect();
        order.sort_by(|&a, &b| outcomes[a].score_id.cmp(&outcomes[b].score_id));
        self.write("cannot write outcomes", |tx| {
            let mut results: Vec<Option<OutcomeResult>> = vec![None; outcomes.len()];
            for &i in &order {
                results[i] = Some(one_outcome(tx, &outcomes[i])?);
            }
            Ok(results.into_iter().flatten().collect())
        })
    }

    /// Backfilled examples in one statement; an id already stored (by a backfill or an
    /// outcome, or earlier in the same batch) counts as a duplicate.
    pub(super) fn write_examples(
        &self,
        examples: &[StoredExample],
    ) -> Result<ExamplesAck, StoreError> {
        if examples.is_empty() {
            return Ok(ExamplesAck::default());
        }
        // Id order, for the same reason as outcomes; a stable sort keeps the first of two
        // rows with one id as the one stored.
        let mut sorted: Vec<&StoredExample> = examples.iter().collect();
        sorted.sort_by(|a, b| a.id.cmp(&b.id));
        let ids: Vec<&str> = sorted.iter().map(|e| e.id.as_str()).collect();
        let times: Vec<i64> = sorted.iter().map(|e| e.event_time).collect();
        let labels: Vec<f64> = sorted.iter().map(|e| e.label).collect();
        let json: Vec<String> = sorted.iter().map(|e| encode(*e)).collect();
        let inserted = self.write("cannot write examples", |tx| {
            Ok(tx.execute(
                "INSERT INTO examples (id, event_time, label, example)
                 SELECT e.id, e.event_time, e.label, e.example
                 FROM unnest($1::text[], $2::int8[], $3::float8[], $4::text[])
                     WITH ORDINALITY AS e(id, event_time, label, example, n)
                 ORDER BY n
                 ON CONFLICT (id) DO NOTHING",
                &[&ids, &times, &labels, &json],
            )?)
        })? as usize;
        Ok(ExamplesAck {
            inserted,
            duplicates: examples.len() - inserted,
        })
    }
}
