//! Outcomes in the sled store: joining a label to its score record, writing the example it
//! makes (and the shadowed row), refusing a conflicting label, in one transaction per group.

use super::*;

/// Where an outcome's example lives when its key can be told from the score id alone: the id
/// is a ULID whose time is the record's (true of every record the recorder writes since
/// layout 3), so the examples key is that time and the id, and no index is needed.
pub(super) fn derived_example_key(score_id: &str) -> Option<Vec<u8>> {
    let ulid = ulid::Ulid::from_string(score_id).ok()?;
    Some(example_key_of(ulid.timestamp_ms() as Millis, score_id))
}

#[derive(Serialize, serde::Deserialize)]
struct StoredOutcome {
    label: f64,
    at: Millis,
}

/// What an outcome writes once it is known to be new.
struct PreparedOutcome {
    example_key: Vec<u8>,
    example: Vec<u8>,
    /// The examples key follows from the score id (every record since layout 3): an earlier
    /// label is found there, and the example is the only write. Otherwise the outcome also
    /// writes layout 2's `outcomes` row and `example_ids` entry, and is looked for there.
    key_from_id: bool,
    shadowed: Option<(Vec<u8>, Vec<u8>)>,
}

impl SledStore {
    /// The bytes an outcome writes: the example it makes of its score (carrying the outcome's
    /// time), and the shadowing candidate's row when the score was also shadowed.
    fn prepare_outcome(&self, new: &NewOutcome) -> Result<PreparedOutcome, StoreError> {
        let record = self
            .score(&new.score_id)?
            .ok_or_else(|| StoreError::UnknownScore(new.score_id.clone()))?;
        let example = crate::store::ExampleText {
            id: &record.score_id,
            event_time: record.at,
            label: new.label,
            features: &record.features,
            outcome_at: new.at,
            monitoring: &new.monitoring,
        };
        let example_key = example_key_of(record.at, &record.score_id);
        let key_from_id = derived_example_key(&record.score_id).is_some_and(|k| k == example_key);
        Ok(PreparedOutcome {
            key_from_id,
            example_key,
            example: encode(&example),
            shadowed: record
                .shadowed_row(new.label)
                .map(|(candidate, row)| (shadow_key(candidate, &new.score_id), encode(&row))),
        })
    }

    pub(super) fn write_outcomes(
        &self,
        outcomes: &[NewOutcome],
    ) -> Result<Vec<OutcomeResult>, StoreError> {
        // Everything that does not depend on the written trees is prepared outside the
        // transaction, which sled may run more than once.
        let prepared: Vec<Result<PreparedOutcome, StoreError>> =
            outcomes.iter().map(|o| self.prepare_outcome(o)).collect();
        let result = (
            &self.outcomes,
            &self.examples,
            &self.example_ids,
            &self.shadowed,
        )
            .transaction(|(o, e, ids, sh)| {
                let mut results = Vec::with_capacity(outcomes.len());
                for (new, prepared) in outcomes.iter().zip(&prepared) {
                    // Reads inside the transaction see its own earlier writes, so the same
                    // score twice in one group is a duplicate or a conflict, as it would be
                    // in two groups. A record whose examples key follows from its id finds any
                    // earlier label there (layout 2 wrote its examples under the same key).
                    // The example outlives its score record (retention deletes only the
                    // record), so without the record a ULID's key is still tried, and then the
                    // `outcomes` row where a layout-2 label would be.
                    let from_id;
                    let (look_in, outcome_row) = match prepared {
                        Ok(p) if p.key_from_id => (Some(p.example_key.as_slice()), false),
                        Ok(_) => (None, true),
                        Err(_) => {
                            from_id = derived_example_key(&new.score_id);
                            (from_id.as_deref(), true)
                        }
                    };
                    let existing = match look_in {
                        Some(key) => e.get(key)?,
                        None => None,
                    };
                    let existing = match existing {
                        None if outcome_row => o.get(new.score_id.as_bytes())?,
                        found => found,
                    };
                    if let Some(existing) = existing {
                        results.push(match serde_json::from_slice::<StoredLabel>(&existing) {
                            Err(err) => Err(StoreError::Corrupt(err.to_string())),
                            Ok(existing) if existing.label == new.label => {
                                Ok(OutcomeAck::Duplicate)
                            }
                            Ok(existing) => Err(StoreError::ConflictingLabel {
                                score_id: new.score_id.clone(),
                                existing: existing.label,
                                sent: new.label,
                            }),
                        });
                        continue;
                    }
                    let prepared = match prepared {
                        Ok(p) => p,
                        Err(e) => {
                            results.push(Err(e.clone()));
                            continue;
                        }
                    };
                    e.insert(prepared.example_key.as_slice(), prepared.example.as_slice())?;
                    if !prepared.key_from_id {
                        o.insert(
                            new.score_id.as_bytes(),
                            encode(&StoredOutcome {
                                label: new.label,
                                at: new.at,
                            }),
                        )?;
                        ids.insert(new.score_id.as_bytes(), prepared.example_key.as_slice())?;
                    }
                    if let Some((key, value)) = &prepared.shadowed {
                        sh.insert(key.as_slice(), value.as_slice())?;
                    }
                    results.push(Ok(OutcomeAck::Recorded));
                }
                Ok::<_, ConflictableTransactionError<StoreError>>(results)
            });
        match result {
            Ok(results) => Ok(results),
            Err(TransactionError::Abort(e)) => Err(e),
            Err(TransactionError::Storage(e)) => Err(io(e)),
        }
    }
}
