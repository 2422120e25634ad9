//! The store contract: what every [`Store`] promises its callers, as one suite of tests run
//! against each backend (`on_sled`, `on_postgres` below).
//!
//! Each test takes a [`Fixture`] that opens the same store again (to show what survives a
//! restart). Tests of one backend's internals (sled's pages and layout upgrades, PostgreSQL's
//! migrations and several processes on one database) stay with that backend.

use super::portable::{RawRecord, Table};
use super::{
    EntryEffects, ExamplesAck, Freeze, NewOutcome, OutcomeAck, PendingSignOff, ScoreLimits,
    ScoreRecord, ShadowScore, ShadowState, Store, StoreError, StoredExample,
};
use crate::promotion::{Entry, RunState, RunStatus};
use crate::time::Millis;

/// Opens one store, again and again.
pub(crate) trait Fixture {
    fn open(&self) -> Box<dyn Store>;
    /// A second, empty store of the same backend (the target of a restore); the same one on
    /// every call.
    fn open_twin(&self) -> Box<dyn Store>;
}

pub(crate) fn record(id: &str, at: Millis) -> ScoreRecord {
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

/// A score id as the service makes them: a ULID at `at`.
pub(crate) fn ulid_at(at: Millis, n: u128) -> String {
    ulid::Ulid::from_parts(at as u64, n).to_string()
}

pub(crate) fn bare_entry(run_id: &str) -> Entry {
    serde_json::from_value(serde_json::json!({
        "seq": 0, "run_id": run_id, "at": "2026-12-01T00:00:00Z", "trigger": "manual",
        "window": crate::promotion::DataWindow::default(), "metric": "auc", "margin": 0.02, "search": [], "pinned": false,
        "verdict": "shadowing", "reason": "test", "duration_ms": 0
    }))
    .unwrap()
}

fn ids_newest_first(store: &dyn Store) -> Vec<String> {
    store
        .recent_scores(usize::MAX, None)
        .unwrap()
        .into_iter()
        .map(|r| r.score_id)
        .collect()
}

pub(crate) fn outcomes_join_scores_once_and_refuse_a_conflicting_label(f: &dyn Fixture) {
    let store = f.open();
    store.record_scores(&[record("s1", 100)]).unwrap();
    assert_eq!(
        store.put_outcome("s1", 1.0, 200).unwrap(),
        OutcomeAck::Recorded
    );
    assert_eq!(
        store.put_outcome("s1", 1.0, 300).unwrap(),
        OutcomeAck::Duplicate
    );
    assert!(matches!(
        store.put_outcome("s1", 0.0, 300),
        Err(StoreError::ConflictingLabel { existing: 1.0, .. })
    ));
    assert!(matches!(
        store.put_outcome("nope", 1.0, 300),
        Err(StoreError::UnknownScore(_))
    ));
    assert!(store.has_outcome("s1").unwrap());
    assert!(!store.has_outcome("nope").unwrap());
    let examples = store.latest_examples(10, None).unwrap();
    assert_eq!(examples.len(), 1);
    assert_eq!(
        (examples[0].event_time, examples[0].label),
        (100, 1.0),
        "event time is the score's time"
    );
    assert_eq!(
        serde_json::Value::Object(examples[0].features.clone()),
        serde_json::json!({"a": 1.0}),
        "the example carries the features the score recorded"
    );
    assert_eq!(store.example("s1").unwrap().unwrap(), examples[0]);
}

pub(crate) fn a_group_of_outcomes_fails_only_its_bad_members(f: &dyn Fixture) {
    let store = f.open();
    store
        .record_scores(&[record("s1", 100), record("s2", 110)])
        .unwrap();
    let new = |id: &str, label: f64| NewOutcome {
        score_id: id.into(),
        label,
        at: 500,
        // An attribute sent with the outcome lands on the example it makes.
        monitoring: [("region".to_owned(), format!("north-{id}"))].into(),
    };
    let results = store
        .put_outcomes(&[
            new("s1", 1.0),
            new("nope", 1.0),
            new("s1", 1.0),
            new("s2", 0.0),
            new("s2", 1.0),
        ])
        .unwrap();
    assert_eq!(results[0].as_ref().ok(), Some(&OutcomeAck::Recorded));
    assert!(matches!(results[1], Err(StoreError::UnknownScore(_))));
    // The same score again within the group sees the group's own first write.
    assert_eq!(results[2].as_ref().ok(), Some(&OutcomeAck::Duplicate));
    assert_eq!(results[3].as_ref().ok(), Some(&OutcomeAck::Recorded));
    assert!(matches!(
        results[4],
        Err(StoreError::ConflictingLabel {
            existing: 0.0,
            sent: 1.0,
            ..
        })
    ));
    drop(store);
    let store = f.open();
    let examples = store.latest_examples(10, None).unwrap();
    let labels: Vec<(String, f64)> = examples.iter().map(|e| (e.id.clone(), e.label)).collect();
    assert_eq!(labels, vec![("s1".into(), 1.0), ("s2".into(), 0.0)]);
    for example in &examples {
        assert_eq!(
            example.monitoring.get("region"),
            Some(&format!("north-{}", example.id)),
            "{example:?}"
        );
    }
}

pub(crate) fn latest_examples_come_oldest_first_within_the_window(f: &dyn Fixture) {
    let store = f.open();
    let examples: Vec<StoredExample> = [30, -5, 10, 20]
        .iter()
        .map(|&t| StoredExample {
            monitoring: Default::default(),
            id: format!("e{t}"),
            event_time: t,
            label: 0.0,
            features: Default::default(),
        })
        .collect();
    assert_eq!(
        store.put_examples(&examples).unwrap(),
        ExamplesAck {
            inserted: 4,
            duplicates: 0
        }
    );
    assert_eq!(
        store.put_examples(&examples[..1]).unwrap(),
        ExamplesAck {
            inserted: 0,
            duplicates: 1
        }
    );
    // The same id twice in one batch: the first is stored, the second is a duplicate.
    let mut twice = examples[0].clone();
    twice.id = "e-twice".into();
    let mut again = twice.clone();
    again.label = 1.0;
    assert_eq!(
        store.put_examples(&[twice, again]).unwrap(),
        ExamplesAck {
            inserted: 1,
            duplicates: 1
        }
    );
    assert_eq!(store.example("e-twice").unwrap().unwrap().label, 0.0);
    assert_eq!(store.example_count(), 5);
    let times = |v: Vec<StoredExample>| v.iter().map(|e| e.event_time).collect::<Vec<_>>();
    assert_eq!(
        times(store.latest_examples(10, None).unwrap()),
        vec![-5, 10, 20, 30, 30]
    );
    assert_eq!(times(store.latest_examples(2, None).unwrap()), vec![30, 30]);
    assert_eq!(
        times(store.latest_examples(10, Some(10)).unwrap()),
        vec![10, 20, 30, 30]
    );
}

pub(crate) fn data_survives_reopening(f: &dyn Fixture) {
    {
        let store = f.open();
        assert_eq!(store.next_seq("model").unwrap(), 1);
        assert_eq!(store.next_seq("model").unwrap(), 2);
        assert_eq!(store.next_seq("run").unwrap(), 1, "counters are separate");
        store.record_scores(&[record("s1", 1)]).unwrap();
        store.put_outcome("s1", 0.0, 2).unwrap();
        store.check_writable().unwrap();
        store.flush().unwrap();
    }
    let store = f.open();
    assert_eq!(store.next_seq("model").unwrap(), 3);
    assert_eq!(store.example_count(), 1);
    assert_eq!(store.score_count(), 1);
    assert_eq!(store.newest_score_id().as_deref(), Some("s1"));
    assert_eq!(store.score("s1").unwrap().unwrap().output, 0.25);
    assert!(store.score("s2").unwrap().is_none());
}

pub(crate) fn records_out_of_id_order_are_refused_whole(f: &dyn Fixture) {
    let store = f.open();
    assert_eq!(store.newest_score_id(), None);
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
    assert_eq!(ids_newest_first(&*store), ["b2", "b1"]);
    assert_eq!(store.score_count(), 2);
    assert_eq!(store.newest_score_id().as_deref(), Some("b2"));
    drop(store);
    // The order continues across a restart.
    let store = f.open();
    assert_eq!(store.newest_score_id().as_deref(), Some("b2"));
    assert!(store.record_scores(&[record("b2", 5)]).is_err());
    store.record_scores(&[record("b3", 5)]).unwrap();
}

pub(crate) fn recent_scores_come_newest_first_within_the_window(f: &dyn Fixture) {
    let store = f.open();
    let at: Millis = 1_800_000_000_000;
    let ids: Vec<String> = (0..6).map(|i| ulid_at(at + i * 1000, 3)).collect();
    let records: Vec<ScoreRecord> = ids
        .iter()
        .enumerate()
        .map(|(i, id)| record(id, at + i as Millis * 1000))
        .collect();
    store.record_scores(&records[..4]).unwrap();
    store.record_scores(&records[4..]).unwrap();
    let got = |max, since| -> Vec<String> {
        store
            .recent_scores(max, since)
            .unwrap()
            .into_iter()
            .map(|r| r.score_id)
            .collect()
    };
    let newest_first: Vec<String> = ids.iter().rev().cloned().collect();
    assert_eq!(got(10, None), newest_first);
    assert_eq!(got(2, None), newest_first[..2].to_vec());
    assert_eq!(got(10, Some(at + 3000)), newest_first[..3].to_vec());
    assert_eq!(store.score_count(), 6);
}

/// 100 records one minute apart from `start`, written ten at a time, the 10th of them with
/// an outcome and a shadowing candidate's output; returns their ids, oldest first.
fn minute_records(store: &dyn Store, start: Millis) -> Vec<String> {
    let records: Vec<ScoreRecord> = (0..100)
        .map(|i| {
            let at = start + i * 60_000;
            let mut r = record(&ulid_at(at, 7), at);
            if i == 9 {
                r.shadow = Some(ShadowScore {
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

/// Compacts in writes of at most `max_records` until nothing more is due; returns records
/// deleted.
fn compact_fully(store: &dyn Store, limits: ScoreLimits, max_records: usize) -> u64 {
    let mut deleted = 0;
    for _ in 0..1000 {
        let done = store.compact_scores(limits, max_records).unwrap();
        deleted += done.records;
        if !done.more {
            return deleted;
        }
        assert!(done.records > 0, "a write that says more must delete some");
    }
    panic!("compaction never finished");
}

pub(crate) fn compaction_by_age_deletes_exactly_the_older_records(f: &dyn Fixture) {
    let store = f.open();
    let start: Millis = 1_800_000_000_000;
    let ids = minute_records(&*store, start);
    assert_eq!(store.score_count(), 100);
    let examples_before = store.example_count();
    // Older than minute 35: the first 35 records (minute 35 itself stays).
    let limits = ScoreLimits {
        older_than: Some(start + 35 * 60_000),
        keep: None,
    };
    assert_eq!(compact_fully(&*store, limits, 1), 35);
    let mut kept = ids_newest_first(&*store);
    kept.reverse();
    assert_eq!(kept, ids[35..].to_vec());
    assert_eq!(store.score_count(), 65);
    assert!(store.score(&ids[34]).unwrap().is_none());
    assert_eq!(store.score(&ids[35]).unwrap().unwrap().score_id, ids[35]);
    // The compacted score's outcome still stands as its example and its shadowed row.
    assert_eq!(store.example_count(), examples_before);
    let examples = store.latest_examples(10, None).unwrap();
    assert_eq!(examples.len(), 1);
    assert_eq!(examples[0].id, ids[9]);
    assert_eq!(store.shadowed_count("m-2-00000000"), 1);
    // Sending that outcome again is still a duplicate (or a conflict), not unknown.
    assert_eq!(
        store.put_outcome(&ids[9], 1.0, start).unwrap(),
        OutcomeAck::Duplicate
    );
    assert!(matches!(
        store.put_outcome(&ids[9], 0.0, start),
        Err(StoreError::ConflictingLabel { .. })
    ));
    // A compacted score without an outcome is unknown now; a kept one still takes one.
    assert!(matches!(
        store.put_outcome(&ids[10], 1.0, start),
        Err(StoreError::UnknownScore(_))
    ));
    assert_eq!(
        store.put_outcome(&ids[35], 0.0, start).unwrap(),
        OutcomeAck::Recorded
    );
    // Nothing more is due.
    assert_eq!(store.compact_scores(limits, 2).unwrap().records, 0);
}

pub(crate) fn compaction_by_count_keeps_the_newest_and_survives_reopening(f: &dyn Fixture) {
    let start: Millis = 1_800_000_000_000;
    let ids = {
        let store = f.open();
        let ids = minute_records(&*store, start);
        let limits = ScoreLimits {
            older_than: None,
            keep: Some(25),
        };
        assert_eq!(compact_fully(&*store, limits, 1000), 75);
        assert_eq!(store.compact_scores(limits, 1000).unwrap().records, 0);
        let mut kept = ids_newest_first(&*store);
        kept.reverse();
        assert_eq!(kept, ids[75..].to_vec());
        assert_eq!(store.score_count(), 25);
        assert_eq!(store.example_count(), 1);
        ids
    };
    let store = f.open();
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
    assert_eq!(compact_fully(&*store, limits, 1000), 15);
    assert_eq!(ids_newest_first(&*store).last(), Some(&ids[90]));
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

pub(crate) fn an_entry_starts_and_ends_a_shadow_in_its_own_write(f: &dyn Fixture) {
    let state = |candidate: &str| ShadowState {
        candidate_id: candidate.into(),
        active_id: "m-1-00000000".into(),
        run_id: "r-2".into(),
        entry_seq: 0,
        since: 5,
        share: None,
    };
    {
        let store = f.open();
        let first = state("m-2-00000000");
        let effects = EntryEffects {
            history: None,
            shadow: Some(Some(&first)),
            ..EntryEffects::default()
        };
        let entry = store.append_entry(bare_entry("r-2"), effects).unwrap();
        let stored = store.shadow_state().unwrap().unwrap();
        assert_eq!(stored.entry_seq, entry.seq, "the state names its entry");
        let mut shadowed = record("s1", 10);
        shadowed.shadow = Some(ShadowScore {
            model_id: "m-2-00000000".into(),
            output: 0.5,
        });
        store.record_scores(&[shadowed]).unwrap();
        store.put_outcome("s1", 1.0, 20).unwrap();
        assert_eq!(store.shadowed_count("m-2-00000000"), 1);
        assert_eq!(
            store.shadowed_outcomes("m-2-00000000").unwrap(),
            [crate::store::ShadowedOutcome {
                active: 0.25,
                candidate: 0.5,
                label: 1.0,
                candidate_answered: false,
            }]
        );
        // A newer candidate replaces it: the old one's rows go.
        let second = state("m-3-00000000");
        let effects = EntryEffects {
            history: None,
            shadow: Some(Some(&second)),
            ..EntryEffects::default()
        };
        let entry = store.append_entry(bare_entry("r-3"), effects).unwrap();
        assert_eq!(store.shadow_state().unwrap().unwrap().entry_seq, entry.seq);
        assert_eq!(store.shadowed_count("m-2-00000000"), 0);
        let history = vec!["m-1-00000000".to_owned(), "m-3-00000000".to_owned()];
        let effects = EntryEffects {
            history: Some(&history),
            shadow: Some(None),
            ..EntryEffects::default()
        };
        store.append_entry(bare_entry("r-4"), effects).unwrap();
    }
    let store = f.open();
    assert_eq!(store.shadow_state().unwrap(), None);
    assert_eq!(
        store.active_history().unwrap().last().unwrap(),
        "m-3-00000000"
    );
    let entries = store.entries(10).unwrap();
    let seqs: Vec<u64> = entries.iter().map(|e| e.seq).collect();
    assert_eq!(seqs, [3, 2, 1], "newest first, numbered from 1");
    assert_eq!(entries[0].run_id, "r-4");
    assert_eq!(store.entries(1).unwrap().len(), 1);
    assert_eq!(store.entry(2).unwrap().unwrap().run_id, "r-3");
    assert!(store.entry(9).unwrap().is_none());
}

pub(crate) fn an_entry_starts_and_ends_a_sign_off_wait_and_a_freeze_in_its_own_write(
    f: &dyn Fixture,
) {
    let waiting = PendingSignOff {
        candidate_id: "m-2-00000000".into(),
        active_id: Some("m-1-00000000".into()),
        run_id: "r-2".into(),
        entry_seq: 0,
        since: 5,
        started_by: Some("alice".into()),
    };
    let frozen = Freeze {
        since: 7,
        by: Some("bob".into()),
        reason: Some("quarter end".into()),
    };
    {
        let store = f.open();
        assert_eq!(store.pending_sign_off().unwrap(), None);
        let effects = EntryEffects {
            sign_off: Some(Some(&waiting)),
            ..EntryEffects::default()
        };
        let entry = store.append_entry(bare_entry("r-2"), effects).unwrap();
        let stored = store.pending_sign_off().unwrap().unwrap();
        assert_eq!(stored.entry_seq, entry.seq, "the wait names its entry");
        assert_eq!(stored.started_by.as_deref(), Some("alice"));
        let effects = EntryEffects {
            freeze: Some(Some(&frozen)),
            ..EntryEffects::default()
        };
        store.append_entry(bare_entry("r-3"), effects).unwrap();
    }
    // Both survive a reopen; an approval's entry ends the wait and moves the active model in
    // the same write, and an unfreeze's entry lifts the freeze.
    let store = f.open();
    assert_eq!(store.freeze().unwrap(), Some(frozen));
    assert_eq!(store.pending_sign_off().unwrap().unwrap().run_id, "r-2");
    let history = vec!["m-1-00000000".to_owned(), "m-2-00000000".to_owned()];
    let effects = EntryEffects {
        history: Some(&history),
        sign_off: Some(None),
        ..EntryEffects::default()
    };
    store.append_entry(bare_entry("r-4"), effects).unwrap();
    assert_eq!(store.pending_sign_off().unwrap(), None);
    assert_eq!(store.active_history().unwrap(), history);
    let effects = EntryEffects {
        freeze: Some(None),
        ..EntryEffects::default()
    };
    store.append_entry(bare_entry("r-5"), effects).unwrap();
    assert_eq!(store.freeze().unwrap(), None);
    drop(store);
    let store = f.open();
    assert_eq!(store.pending_sign_off().unwrap(), None);
    assert_eq!(store.freeze().unwrap(), None);
    let runs: Vec<String> = store
        .entries(10)
        .unwrap()
        .into_iter()
        .map(|e| e.run_id)
        .collect();
    assert_eq!(runs, ["r-5", "r-4", "r-3", "r-2"]);
}

pub(crate) fn shadow_state_and_freeze_are_set_and_cleared(f: &dyn Fixture) {
    let store = f.open();
    assert_eq!(store.freeze().unwrap(), None);
    store
        .set_freeze(Some(&Freeze {
            since: 42,
            by: None,
            reason: None,
        }))
        .unwrap();
    assert_eq!(
        store.freeze().unwrap(),
        Some(Freeze {
            since: 42,
            by: None,
            reason: None
        })
    );
    let state = ShadowState {
        candidate_id: "m-5-00000000".into(),
        active_id: "m-1-00000000".into(),
        run_id: "r-5".into(),
        entry_seq: 7,
        since: 9,
        share: None,
    };
    store.set_shadow_state(Some(&state)).unwrap();
    let mut shadowed = record("s1", 10);
    shadowed.shadow = Some(ShadowScore {
        model_id: "m-5-00000000".into(),
        output: 0.75,
    });
    store.record_scores(&[shadowed]).unwrap();
    store.put_outcome("s1", 0.0, 20).unwrap();
    assert_eq!(store.shadowed_count("m-5-00000000"), 1);
    drop(store);
    let store = f.open();
    assert_eq!(
        store.freeze().unwrap(),
        Some(Freeze {
            since: 42,
            by: None,
            reason: None
        })
    );
    assert_eq!(store.shadow_state().unwrap(), Some(state));
    // Clearing the shadow drops its rows; clearing the freeze unfreezes.
    store.set_shadow_state(None).unwrap();
    assert_eq!(store.shadow_state().unwrap(), None);
    assert_eq!(store.shadowed_count("m-5-00000000"), 0);
    store.set_freeze(None).unwrap();
    assert_eq!(store.freeze().unwrap(), None);
}

/// A traffic share: the shadow state keeps its terms across a restart, and each outcome's
/// shadowed row says which model answered, with both outputs the right way round, whichever
/// model the record names.
pub(crate) fn a_traffic_share_keeps_its_terms_and_which_model_answered(f: &dyn Fixture) {
    let state = ShadowState {
        candidate_id: "m-6-00000000".into(),
        active_id: "m-1-00000000".into(),
        run_id: "r-6".into(),
        entry_seq: 3,
        since: 9,
        share: Some(super::ShareTerms {
            fraction: 0.2,
            sticky_by: "features.a".into(),
        }),
    };
    {
        let store = f.open();
        store.set_shadow_state(Some(&state)).unwrap();
        // The active model answered s1 (the candidate shadowed it); the candidate answered s2.
        let mut by_active = record("s1", 10);
        by_active.shadow = Some(ShadowScore {
            model_id: "m-6-00000000".into(),
            output: 0.75,
        });
        let mut by_candidate = record("s2", 11);
        by_candidate.model_id = "m-6-00000000".into();
        by_candidate.output = 0.9;
        by_candidate.candidate_answered = true;
        by_candidate.shadow = Some(ShadowScore {
            model_id: "m-1-00000000".into(),
            output: 0.35,
        });
        store.record_scores(&[by_active, by_candidate]).unwrap();
        let results = store
            .put_outcomes(&[
                NewOutcome {
                    score_id: "s1".into(),
                    label: 0.0,
                    at: 20,
                    monitoring: Default::default(),
                },
                NewOutcome {
                    score_id: "s2".into(),
                    label: 1.0,
                    at: 21,
                    monitoring: Default::default(),
                },
            ])
            .unwrap();
        assert!(results.iter().all(|r| r.is_ok()), "{results:?}");
        let stored = store.score("s2").unwrap().unwrap();
        assert!(stored.candidate_answered);
        assert_eq!(stored.model_id, "m-6-00000000");
    }
    let store = f.open();
    assert_eq!(store.shadow_state().unwrap(), Some(state));
    assert_eq!(
        store.shadowed_outcomes("m-6-00000000").unwrap(),
        [
            super::ShadowedOutcome {
                active: 0.25,
                candidate: 0.75,
                label: 0.0,
                candidate_answered: false,
            },
            super::ShadowedOutcome {
                active: 0.35,
                candidate: 0.9,
                label: 1.0,
                candidate_answered: true,
            },
        ]
    );
    assert_eq!(
        super::arm_outcome_counts(&store.shadowed_outcomes("m-6-00000000").unwrap()),
        (1, 1)
    );
    // Nothing is filed under the active model's id.
    assert_eq!(store.shadowed_count("m-1-00000000"), 0);
}

pub(crate) fn runs_and_models_are_kept(f: &dyn Fixture) {
    let run = |id: &str, state: RunState| RunStatus {
        run_id: id.into(),
        trigger: crate::promotion::Trigger::Manual,
        state,
        requested_at: 1,
        started_at: None,
        finished_at: None,
        entry_seq: None,
        verdict: None,
        requested_by: None,
    };
    let model = test_model;
    let (older, newer) = (model(2, 1_000), model(1, 2_000));
    {
        let store = f.open();
        store.put_run(&run("r-1", RunState::Queued)).unwrap();
        store.put_run(&run("r-2", RunState::Running)).unwrap();
        store.put_run(&run("r-3", RunState::Finished)).unwrap();
        store.put_run(&run("r-1", RunState::Finished)).unwrap();
        store.put_model(&newer).unwrap();
        store.put_model(&older).unwrap();
    }
    let store = f.open();
    let unfinished: Vec<String> = store
        .unfinished_runs()
        .unwrap()
        .into_iter()
        .map(|r| r.run_id)
        .collect();
    assert_eq!(unfinished, ["r-2"]);
    assert_eq!(store.run("r-1").unwrap().unwrap().state, RunState::Finished);
    assert!(store.run("r-9").unwrap().is_none());
    let ids: Vec<String> = store.models().unwrap().into_iter().map(|m| m.id).collect();
    assert_eq!(ids, [older.id.clone(), newer.id.clone()], "oldest first");
    let read = store.model(&newer.id).unwrap().unwrap();
    assert_eq!(
        serde_json::to_string(&read).unwrap(),
        serde_json::to_string(&newer).unwrap(),
        "a model reads back as it was written"
    );
    assert!(store.model("m-9-00000000").unwrap().is_none());
}

pub(crate) fn a_backfilled_example_under_a_scores_id_is_its_outcome(f: &dyn Fixture) {
    let store = f.open();
    let at: Millis = 1_800_000_000_000;
    let id = ulid_at(at, 1);
    store.record_scores(&[record(&id, at)]).unwrap();
    assert_eq!(
        store.put_outcome(&id, 1.0, at + 5).unwrap(),
        OutcomeAck::Recorded
    );
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
    // And the other way round: a backfilled row's id takes no outcome of another label.
    let other = ulid_at(at + 10, 1);
    store
        .put_examples(&[StoredExample {
            monitoring: Default::default(),
            id: other.clone(),
            event_time: at + 10,
            label: 0.0,
            features: serde_json::Map::new(),
        }])
        .unwrap();
    store.record_scores(&[record(&other, at + 10)]).unwrap();
    assert!(matches!(
        store.put_outcome(&other, 1.0, at + 20),
        Err(StoreError::ConflictingLabel { .. })
    ));
    assert_eq!(store.example_count(), 2);
}

/// A model as training makes them (`m-<seq>-<hash8>`), for the tests that keep models.
pub(crate) fn test_model(seq: u64, created_at: Millis) -> crate::model::Model {
    let schema = crate::config::Config::embedded_default().schema();
    let preprocessor = crate::model::Preprocessor::fit(&schema, &[]);
    crate::model::Model::new(
        seq,
        created_at,
        crate::model::Setting::Logistic {
            penalty: crate::model::Penalty::L2,
            l1_ratio: 0.0,
            lambda: 0.01,
        },
        crate::schema::LabelKind::Binary,
        preprocessor.clone(),
        crate::model::Estimator::Linear {
            weights: vec![0.5; preprocessor.width()],
            intercept: 0.1,
        },
        crate::model::TrainingFacts {
            run_id: format!("r-{seq}"),
            rows: 50,
            positives: 10,
            from: 0,
            cutoff: 1_000,
        },
    )
}

/// What [`fill_every_table`] wrote.
pub(crate) struct Filled {
    pub(crate) counts: std::collections::BTreeMap<Table, u64>,
    /// Every score id, oldest first.
    pub(crate) score_ids: Vec<String>,
    /// Score ids with an outcome (label 1 when the index is even).
    pub(crate) labeled: Vec<String>,
    pub(crate) candidate: String,
}

/// Writes a record into every table through the store's own write paths, as a running
/// service would: counters, two models, two runs, two log entries (a promotion with its
/// history, then a shadow), a freeze, 150 score records in batches of 50 (every third
/// shadowed), 40 outcomes, and 5 backfilled examples (one before 1970).
pub(crate) fn fill_every_table(store: &dyn Store) -> Filled {
    let at: Millis = 1_800_000_000_000;
    assert_eq!(store.next_seq("model").unwrap(), 1);
    assert_eq!(store.next_seq("model").unwrap(), 2);
    let (first, second) = (test_model(1, at), test_model(2, at + 1));
    store.put_model(&first).unwrap();
    store.put_model(&second).unwrap();
    let run = |id: &str, state: RunState| RunStatus {
        run_id: id.into(),
        trigger: crate::promotion::Trigger::Manual,
        state,
        requested_at: at,
        started_at: Some(at),
        finished_at: None,
        entry_seq: None,
        verdict: None,
        requested_by: None,
    };
    store.put_run(&run("r-1", RunState::Finished)).unwrap();
    store.put_run(&run("r-2", RunState::Running)).unwrap();
    let history = [first.id.clone()];
    store
        .append_entry(
            bare_entry("r-1"),
            EntryEffects {
                history: Some(&history),
                ..EntryEffects::default()
            },
        )
        .unwrap();
    let shadow = ShadowState {
        candidate_id: second.id.clone(),
        active_id: first.id.clone(),
        run_id: "r-2".into(),
        entry_seq: 0,
        since: at,
        share: None,
    };
    store
        .append_entry(
            bare_entry("r-2"),
            EntryEffects {
                shadow: Some(Some(&shadow)),
                ..EntryEffects::default()
            },
        )
        .unwrap();
    store
        .set_freeze(Some(&Freeze {
            since: at + 2,
            by: None,
            reason: None,
        }))
        .unwrap();
    let records: Vec<ScoreRecord> = (0..150)
        .map(|i| {
            let t = at + i * 1_000;
            let mut r = record(&ulid_at(t, 3), t);
            r.model_id = first.id.clone();
            if i % 3 == 0 {
                r.shadow = Some(ShadowScore {
                    model_id: second.id.clone(),
                    output: 0.75,
                });
            }
            r
        })
        .collect();
    for batch in records.chunks(50) {
        store.record_scores(batch).unwrap();
    }
    let labeled: Vec<String> = records
        .iter()
        .step_by(3)
        .take(30)
        .chain(records.iter().skip(1).step_by(15).take(10))
        .map(|r| r.score_id.clone())
        .collect();
    let outcomes: Vec<NewOutcome> = labeled
        .iter()
        .enumerate()
        .map(|(i, id)| NewOutcome {
            score_id: id.clone(),
            label: if i % 2 == 0 { 1.0 } else { 0.0 },
            at: at + 500_000,
            monitoring: Default::default(),
        })
        .collect();
    for result in store.put_outcomes(&outcomes).unwrap() {
        assert_eq!(result.unwrap(), OutcomeAck::Recorded);
    }
    let shadowed = labeled
        .iter()
        .filter(|id| {
            records
                .iter()
                .any(|r| &r.score_id == *id && r.shadow.is_some())
        })
        .count() as u64;
    let backfilled: Vec<StoredExample> = (0..5)
        .map(|i| StoredExample {
            monitoring: Default::default(),
            id: format!("backfill-{i}"),
            event_time: if i == 0 { -86_400_000 } else { at - i * 60_000 },
            label: (i % 2) as f64,
            features: serde_json::json!({"a": i}).as_object().unwrap().clone(),
        })
        .collect();
    store.put_examples(&backfilled).unwrap();
    let counts = [
        (Table::Counters, 2),
        (Table::Meta, 3),
        (Table::Models, 2),
        (Table::Runs, 2),
        (Table::Log, 2),
        (Table::Scores, 150),
        (Table::Examples, 45),
        (Table::Shadowed, shadowed),
    ]
    .into_iter()
    .collect();
    Filled {
        counts,
        score_ids: records.into_iter().map(|r| r.score_id).collect(),
        labeled,
        candidate: second.id,
    }
}

/// Every record of `table`, read `page` at a time.
fn every_record(store: &dyn Store, table: Table, page: usize) -> Vec<RawRecord> {
    let mut out = Vec::new();
    let mut after = None;
    loop {
        let got = store.records_page(table, after.as_ref(), page).unwrap();
        assert!(got.records.len() <= page, "a page holds at most its size");
        out.extend(got.records);
        match got.next {
            Some(next) => after = Some(next),
            None => return out,
        }
    }
}

pub(crate) fn every_table_pages_out_and_restores_into_an_empty_store_that_behaves_alike(
    f: &dyn Fixture,
) {
    let source = f.open();
    let filled = fill_every_table(&*source);
    let twin = f.open_twin();
    for table in Table::ALL {
        assert_eq!(
            source.table_len(table).unwrap(),
            filled.counts[&table],
            "{table} counted"
        );
        // Pages of 7 cut sled's score pages (64 records) in their middle.
        let records = every_record(&*source, table, 7);
        assert_eq!(
            records.len() as u64,
            filled.counts[&table],
            "{table} read out"
        );
        let mut keys: Vec<(String, Option<String>)> = records
            .iter()
            .map(|r| (r.key.clone(), r.score_id.clone()))
            .collect();
        keys.sort();
        keys.dedup();
        assert_eq!(keys.len(), records.len(), "{table}: no record twice");
        if table == Table::Scores {
            let ids: Vec<String> = records.iter().map(|r| r.key.clone()).collect();
            assert_eq!(ids, filled.score_ids, "score records in id order");
        }
        for chunk in records.chunks(40) {
            twin.restore_records(chunk).unwrap();
        }
        assert_eq!(
            twin.table_len(table).unwrap(),
            filled.counts[&table],
            "{table} restored"
        );
    }
    let quiet = crate::store::transfer::Quiet;
    assert_eq!(
        crate::store::transfer::digest(&*source, 11, &quiet).unwrap(),
        crate::store::transfer::digest(&*twin, 1000, &quiet).unwrap(),
        "the same records, whatever the page size"
    );
    // The copy answers as the source does.
    assert_eq!(
        twin.active_history().unwrap(),
        source.active_history().unwrap()
    );
    assert_eq!(twin.shadow_state().unwrap(), source.shadow_state().unwrap());
    assert_eq!(twin.freeze().unwrap(), source.freeze().unwrap());
    let entries = |s: &dyn Store| serde_json::to_value(s.entries(10).unwrap()).unwrap();
    assert_eq!(entries(&*twin), entries(&*source));
    let models = |s: &dyn Store| serde_json::to_value(s.models().unwrap()).unwrap();
    assert_eq!(models(&*twin), models(&*source));
    assert_eq!(
        twin.unfinished_runs().unwrap(),
        source.unfinished_runs().unwrap()
    );
    assert_eq!(
        twin.shadowed_outcomes(&filled.candidate).unwrap(),
        source.shadowed_outcomes(&filled.candidate).unwrap()
    );
    assert_eq!(twin.score_count(), 150);
    assert_eq!(twin.example_count(), 45);
    assert_eq!(twin.newest_score_id(), source.newest_score_id());
    let recent = |s: &dyn Store| {
        s.recent_scores(20, None)
            .unwrap()
            .iter()
            .map(|r| serde_json::to_string(r).unwrap())
            .collect::<Vec<_>>()
    };
    assert_eq!(recent(&*twin), recent(&*source));
    assert_eq!(
        twin.latest_examples(100, None).unwrap(),
        source.latest_examples(100, None).unwrap()
    );
    assert_eq!(
        twin.example("backfill-0").unwrap(),
        source.example("backfill-0").unwrap()
    );
    // Outcomes stay idempotent on the copy: the same label is a duplicate, another a conflict.
    let labeled = &filled.labeled[0];
    assert!(twin.has_outcome(labeled).unwrap());
    assert_eq!(
        twin.put_outcome(labeled, 1.0, 9).unwrap(),
        OutcomeAck::Duplicate
    );
    assert!(matches!(
        twin.put_outcome(labeled, 0.0, 9),
        Err(StoreError::ConflictingLabel { .. })
    ));
    // Counters and the log continue where the source stopped.
    assert_eq!(twin.next_seq("model").unwrap(), 3);
    let entry = twin
        .append_entry(bare_entry("r-3"), EntryEffects::default())
        .unwrap();
    assert_eq!(entry.seq, 3);
    // Score ids continue above the newest copied one.
    let newest = filled.score_ids.last().unwrap();
    let before_newest = record(&filled.score_ids[0], 1);
    assert!(matches!(
        twin.record_scores(&[before_newest]),
        Err(StoreError::ScoreOrder { .. })
    ));
    let later = ulid_at(1_900_000_000_000, 1);
    assert!(later.as_str() > newest.as_str());
    twin.record_scores(&[record(&later, 1_900_000_000_000)])
        .unwrap();
    let unlabeled = filled
        .score_ids
        .iter()
        .find(|id| !filled.labeled.contains(id))
        .unwrap();
    assert_eq!(
        twin.put_outcome(unlabeled, 1.0, 9).unwrap(),
        OutcomeAck::Recorded
    );
    drop(twin);
    // And it was durable.
    let twin = f.open_twin();
    assert_eq!(twin.table_len(Table::Scores).unwrap(), 151);
    assert_eq!(twin.freeze().unwrap(), source.freeze().unwrap());
}

pub(crate) fn erasing_leaves_an_empty_store_that_takes_writes_again(f: &dyn Fixture) {
    let store = f.open();
    let filled = fill_every_table(&*store);
    store.erase_all_records().unwrap();
    for table in Table::ALL {
        assert_eq!(store.table_len(table).unwrap(), 0, "{table} erased");
        assert!(every_record(&*store, table, 5).is_empty());
    }
    assert_eq!(store.active_history().unwrap(), Vec::<String>::new());
    assert_eq!(store.shadow_state().unwrap(), None);
    assert_eq!(store.freeze().unwrap(), None);
    assert_eq!(store.newest_score_id(), None);
    assert_eq!(store.score_count(), 0);
    assert_eq!(store.next_seq("model").unwrap(), 1);
    // Any id goes again, even one below those erased.
    store
        .record_scores(&[record(&filled.score_ids[0], 5)])
        .unwrap();
    drop(store);
    let store = f.open();
    assert_eq!(store.table_len(Table::Scores).unwrap(), 1);
    assert_eq!(store.table_len(Table::Counters).unwrap(), 1);
}

pub(crate) fn a_restored_record_that_contradicts_its_key_is_refused_whole(f: &dyn Fixture) {
    let store = f.open();
    let good = RawRecord::new(
        Table::Runs,
        "r-1".into(),
        None,
        serde_json::to_string(&RunStatus {
            run_id: "r-1".into(),
            trigger: crate::promotion::Trigger::Manual,
            state: RunState::Queued,
            requested_at: 1,
            started_at: None,
            finished_at: None,
            entry_seq: None,
            verdict: None,
            requested_by: None,
        })
        .unwrap(),
    )
    .unwrap();
    let moved = RawRecord::new(
        Table::Scores,
        ulid_at(10, 1),
        None,
        serde_json::to_string(&record(&ulid_at(20, 1), 20)).unwrap(),
    )
    .unwrap();
    match store.restore_records(&[good.clone(), moved]) {
        Err(StoreError::Corrupt(why)) => assert!(why.contains("not the key"), "{why}"),
        other => panic!("expected a refusal, got {other:?}"),
    }
    for table in Table::ALL {
        assert_eq!(
            store.table_len(table).unwrap(),
            0,
            "nothing of the call written"
        );
    }
    store.restore_records(&[good]).unwrap();
    assert_eq!(store.unfinished_runs().unwrap().len(), 1);
}

/// Instantiates every contract test for one backend: `$fixture` is an expression of type
/// `Option<impl Fixture>` (`None` skips, the fixture having said why), evaluated with `$name`,
/// the test's name, in scope as `test_name`.
macro_rules! contract_tests {
    ($fixture:expr) => {
        contract_tests!(@each $fixture;
            outcomes_join_scores_once_and_refuse_a_conflicting_label,
            a_group_of_outcomes_fails_only_its_bad_members,
            latest_examples_come_oldest_first_within_the_window,
            data_survives_reopening,
            records_out_of_id_order_are_refused_whole,
            recent_scores_come_newest_first_within_the_window,
            compaction_by_age_deletes_exactly_the_older_records,
            compaction_by_count_keeps_the_newest_and_survives_reopening,
            an_entry_starts_and_ends_a_shadow_in_its_own_write,
            an_entry_starts_and_ends_a_sign_off_wait_and_a_freeze_in_its_own_write,
            shadow_state_and_freeze_are_set_and_cleared,
            a_traffic_share_keeps_its_terms_and_which_model_answered,
            runs_and_models_are_kept,
            a_backfilled_example_under_a_scores_id_is_its_outcome,
            every_table_pages_out_and_restores_into_an_empty_store_that_behaves_alike,
            erasing_leaves_an_empty_store_that_takes_writes_again,
            a_restored_record_that_contradicts_its_key_is_refused_whole,
        );
    };
    (@each $fixture:expr; $($name:ident),* $(,)?) => {
        $(
            #[test]
            fn $name() {
                let test_name = stringify!($name);
                let fixture = $fixture(test_name);
                if let Some(fixture) = fixture {
                    crate::store::contract::$name(&fixture);
                }
            }
        )*
    };
}

mod on_sled {
    use super::Fixture;
    use crate::store::{SledStore, Store, StoreError};

    struct Sled(tempfile::TempDir, tempfile::TempDir);

    /// Waits out sled's background threads of a handle just dropped in this process: they
    /// hold the directory's lock for a moment after the drop.
    fn open_when_unlocked(dir: &std::path::Path) -> Box<dyn Store> {
        let deadline = std::time::Instant::now() + std::time::Duration::from_secs(5);
        loop {
            match SledStore::open(dir) {
                Err(StoreError::Locked { .. }) if std::time::Instant::now() < deadline => {
                    std::thread::sleep(std::time::Duration::from_millis(20));
                }
                other => return Box::new(other.unwrap()),
            }
        }
    }

    impl Fixture for Sled {
        fn open(&self) -> Box<dyn Store> {
            open_when_unlocked(self.0.path())
        }

        fn open_twin(&self) -> Box<dyn Store> {
            open_when_unlocked(self.1.path())
        }
    }

    fn sled(_test: &str) -> Option<Sled> {
        Some(Sled(
            tempfile::tempdir().unwrap(),
            tempfile::tempdir().unwrap(),
        ))
    }

    contract_tests!(sled);
}

mod on_postgres {
    use super::Fixture;
    use crate::store::pg_store::testdb::{fresh_database, TestDb};
    use crate::store::{PgOptions, PgStore, Store};

    /// The test's database, and a second one made when a test first asks for it.
    struct Postgres(TestDb, String, std::sync::OnceLock<TestDb>);

    fn open_at(url: &str) -> Box<dyn Store> {
        let mut options = PgOptions::new(url.to_owned());
        options.pool_size = 3;
        Box::new(PgStore::open(&options).unwrap())
    }

    impl Fixture for Postgres {
        fn open(&self) -> Box<dyn Store> {
            open_at(&self.0.url)
        }

        fn open_twin(&self) -> Box<dyn Store> {
            let twin = self.2.get_or_init(|| {
                fresh_database(&format!("{}_twin", self.1))
                    .expect("the server that made the first database makes a second")
            });
            open_at(&twin.url)
        }
    }

    fn postgres(test: &str) -> Option<Postgres> {
        fresh_database(test).map(|db| Postgres(db, test.to_owned(), std::sync::OnceLock::new()))
    }

    contract_tests!(postgres);
}
