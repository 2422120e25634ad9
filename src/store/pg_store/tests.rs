//! What only the PostgreSQL store has to show: several handles (processes) on one database,
//! and its migrations. The trait's promises are in `store::contract`, run on both backends.

use std::sync::{Arc, Barrier};
use std::time::Duration;

use super::testdb::{fresh_database, TestDb};
use super::*;
use crate::store::contract::{bare_entry, record, ulid_at};
use crate::store::OutcomeAck;

fn open(db: &TestDb) -> PgStore {
    let mut options = PgOptions::new(db.url.clone());
    options.pool_size = 2;
    PgStore::open(&options).unwrap()
}

fn sql(db: &TestDb) -> postgres::Client {
    postgres::Client::connect(&db.url, postgres::NoTls).unwrap()
}

#[test]
fn two_handles_racing_outcomes_for_the_same_scores_store_each_once_and_report_conflicts() {
    let Some(db) = fresh_database("racing_outcomes") else {
        return;
    };
    let first = Arc::new(open(&db));
    let second = Arc::new(open(&db));
    let at: Millis = 1_800_000_000_000;
    let ids: Vec<String> = (0..400).map(|i| ulid_at(at + i, 9)).collect();
    let records: Vec<ScoreRecord> = ids.iter().map(|id| record(id, at)).collect();
    first.record_scores(&records).unwrap();
    // The first handle sends label 1 for every score, the second 1 for even and 0 for odd
    // ones: 40 rounds of the same 10 scores sent by both at once (a barrier starts each
    // round), the second's group in reverse order.
    let label_of_second = |i: usize| if i.is_multiple_of(2) { 1.0 } else { 0.0 };
    let rounds = Arc::new(Barrier::new(2));
    let send = |store: Arc<PgStore>, reverse: bool, label: fn(usize) -> f64| {
        let ids = ids.clone();
        let rounds = Arc::clone(&rounds);
        std::thread::spawn(move || {
            let mut results = Vec::with_capacity(ids.len());
            for round in (0..ids.len()).collect::<Vec<_>>().chunks(10) {
                let mut group = round.to_vec();
                if reverse {
                    group.reverse();
                }
                let outcomes: Vec<NewOutcome> = group
                    .iter()
                    .map(|&i| NewOutcome {
                        score_id: ids[i].clone(),
                        label: label(i),
                        at: 5,
                        monitoring: Default::default(),
                    })
                    .collect();
                rounds.wait();
                let mut answers = store.put_outcomes(&outcomes).unwrap();
                if reverse {
                    answers.reverse();
                }
                results.extend(answers);
            }
            results
        })
    };
    let a = send(Arc::clone(&first), false, |_| 1.0);
    let b = send(Arc::clone(&second), true, label_of_second);
    let (a, b) = (a.join().unwrap(), b.join().unwrap());
    let mut recorded_by_second = 0;
    for i in 0..ids.len() {
        let recorded = |r: &OutcomeResult| matches!(r, Ok(OutcomeAck::Recorded));
        assert!(
            recorded(&a[i]) ^ recorded(&b[i]),
            "score {i} recorded exactly once: {:?} / {:?}",
            a[i],
            b[i]
        );
        let (winner, loser) = if recorded(&a[i]) {
            (1.0, &b[i])
        } else {
            recorded_by_second += 1;
            (label_of_second(i), &a[i])
        };
        let sent_by_loser = if recorded(&a[i]) {
            label_of_second(i)
        } else {
            1.0
        };
        if sent_by_loser == winner {
            assert!(matches!(loser, Ok(OutcomeAck::Duplicate)), "{i}: {loser:?}");
        } else {
            assert!(
                matches!(loser, Err(StoreError::ConflictingLabel { existing, sent, .. })
                    if *existing == winner && *sent == sent_by_loser),
                "{i}: {loser:?}"
            );
        }
        assert_eq!(first.example(&ids[i]).unwrap().unwrap().label, winner);
    }
    assert_eq!(first.example_count(), ids.len());
    eprintln!(
        "racing outcomes: the second handle recorded {recorded_by_second} of {}",
        ids.len()
    );
}

#[test]
fn migrations_are_applied_once_when_processes_open_together() {
    let Some(db) = fresh_database("migrations_once") else {
        return;
    };
    let start = Arc::new(Barrier::new(4));
    let openers: Vec<_> = (0..4)
        .map(|_| {
            let start = Arc::clone(&start);
            let url = db.url.clone();
            std::thread::spawn(move || {
                start.wait();
                PgStore::open(&PgOptions::new(url)).map(|_| ())
            })
        })
        .collect();
    for opener in openers {
        opener.join().unwrap().unwrap();
    }
    let layout: Vec<(i32, String)> = sql(&db)
        .query("SELECT version, name FROM layout ORDER BY version", &[])
        .unwrap()
        .iter()
        .map(|row| (row.get(0), row.get(1)))
        .collect();
    let expected: Vec<(i32, String)> = migrate::MIGRATIONS
        .iter()
        .map(|(v, name, _)| (*v as i32, (*name).to_owned()))
        .collect();
    assert_eq!(layout, expected);
    // Opening again applies nothing and keeps the data.
    let store = open(&db);
    store.record_scores(&[record("s1", 1)]).unwrap();
    drop(store);
    assert_eq!(open(&db).score_count(), 1);
}

#[test]
fn a_database_of_a_newer_layout_is_refused() {
    let Some(db) = fresh_database("newer_layout") else {
        return;
    };
    drop(open(&db));
    let newer = PG_LAYOUT_VERSION as i32 + 1;
    sql(&db)
        .execute(
            "INSERT INTO layout (version, name) VALUES ($1, 'from a newer binary')",
            &[&newer],
        )
        .unwrap();
    match PgStore::open(&PgOptions::new(db.url.clone())) {
        Err(e @ StoreError::NewerSchema { found, supported }) => {
            assert_eq!((found, supported), (newer as u32, PG_LAYOUT_VERSION));
            assert!(e.to_string().contains("upgrade understudy"), "{e}");
        }
        Err(other) => panic!("expected NewerSchema, got {other}"),
        Ok(_) => panic!("a newer layout was opened"),
    }
}

#[test]
fn log_entries_from_two_handles_are_numbered_once_each() {
    let Some(db) = fresh_database("entries_numbered") else {
        return;
    };
    let stores = [Arc::new(open(&db)), Arc::new(open(&db))];
    let start = Arc::new(Barrier::new(2));
    let writers: Vec<_> = stores
        .iter()
        .enumerate()
        .map(|(w, store)| {
            let store = Arc::clone(store);
            let start = Arc::clone(&start);
            std::thread::spawn(move || {
                start.wait();
                (0..15)
                    .map(|i| {
                        store
                            .append_entry(
                                bare_entry(&format!("r-{w}-{i}")),
                                EntryEffects::default(),
                            )
                            .unwrap()
                            .seq
                    })
                    .collect::<Vec<u64>>()
            })
        })
        .collect();
    let mut seqs: Vec<u64> = writers
        .into_iter()
        .flat_map(|w| w.join().unwrap())
        .collect();
    seqs.sort_unstable();
    assert_eq!(seqs, (1..=30).collect::<Vec<u64>>());
    assert_eq!(stores[1].entries(100).unwrap().len(), 30);
}

#[test]
fn stored_json_is_the_serde_json_of_the_value() {
    let Some(db) = fresh_database("stored_json") else {
        return;
    };
    let store = open(&db);
    let r = record(&ulid_at(1_800_000_000_000, 1), 1_800_000_000_000);
    store.record_scores(std::slice::from_ref(&r)).unwrap();
    store.put_outcome(&r.score_id, 1.0, 7).unwrap();
    let entry = store
        .append_entry(bare_entry("r-1"), EntryEffects::default())
        .unwrap();
    let mut client = sql(&db);
    let mut text = |q: &str| -> String { client.query_one(q, &[]).unwrap().get(0) };
    assert_eq!(
        text("SELECT record FROM scores"),
        serde_json::to_string(&r).unwrap()
    );
    assert_eq!(
        text("SELECT entry FROM log"),
        serde_json::to_string(&entry).unwrap()
    );
    // The outcome's example, as the sled store writes it: the record's features verbatim
    // and the outcome's time.
    assert_eq!(
        text("SELECT example FROM examples"),
        format!(
            r#"{{"id":"{}","event_time":1800000000000,"label":1.0,"features":{{"a":1.0}},"outcome_at":7}}"#,
            r.score_id
        )
    );
}

#[test]
fn the_store_can_be_called_and_dropped_on_async_runtime_threads() {
    let Some(db) = fresh_database("async_threads") else {
        return;
    };
    // The blocking client panics when it starts its own runtime on a thread that drives one;
    // the store must not, whichever runtime calls it (see `pool::blocking`).
    let current = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    let multi = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    for (n, runtime) in [current, multi].into_iter().enumerate() {
        let url = db.url.clone();
        runtime.block_on(async move {
            let store = PgStore::open(&PgOptions::new(url)).unwrap();
            let id = format!("s{n}");
            store.record_scores(&[record(&id, 1)]).unwrap();
            assert_eq!(
                store.put_outcome(&id, 1.0, 2).unwrap(),
                OutcomeAck::Recorded
            );
            assert_eq!(store.score_count(), n as u64 + 1);
            drop(store);
        });
    }
}

#[test]
fn connections_the_server_ended_are_replaced_without_an_error() {
    let Some(db) = fresh_database("ended_connections") else {
        return;
    };
    let store = open(&db);
    store.record_scores(&[record("s1", 1)]).unwrap();
    assert_eq!(store.score_count(), 1);
    // End every connection of the store, as a server restart or an operator would.
    let ended: i64 = sql(&db)
        .query_one(
            "SELECT count(pg_terminate_backend(pid)) FROM pg_stat_activity
             WHERE datname = current_database() AND pid <> pg_backend_pid()",
            &[],
        )
        .unwrap()
        .get(0);
    assert!(ended >= 1, "the store held a connection");
    // The pooled connections are dead; reads and writes go on over new ones.
    assert_eq!(store.score_count(), 1);
    sql(&db)
        .execute(
            "SELECT pg_terminate_backend(pid) FROM pg_stat_activity
             WHERE datname = current_database() AND pid <> pg_backend_pid()",
            &[],
        )
        .unwrap();
    assert_eq!(
        store.put_outcome("s1", 1.0, 2).unwrap(),
        OutcomeAck::Recorded
    );
    assert!(store.has_outcome("s1").unwrap());
}

#[test]
fn sessions_commit_synchronously_with_the_configured_timeout_whatever_the_url_asks() {
    let Some(db) = fresh_database("session_settings") else {
        return;
    };
    // A URL that asks for asynchronous commits.
    let url = if db.url.contains("://") {
        let sep = if db.url.contains('?') { '&' } else { '?' };
        format!("{}{sep}options=-c%20synchronous_commit%3Doff", db.url)
    } else {
        format!("{} options='-c synchronous_commit=off'", db.url)
    };
    let mut options = PgOptions::new(url);
    options.statement_timeout = Duration::from_millis(1234);
    let store = PgStore::open(&options).unwrap();
    let settings = store
        .read(
            "SELECT current_setting('synchronous_commit'), current_setting('statement_timeout')",
            &[],
        )
        .unwrap();
    let (commit, timeout): (String, String) = (settings[0].get(0), settings[0].get(1));
    assert_eq!((commit.as_str(), timeout.as_str()), ("on", "1234ms"));
}

#[test]
fn the_test_helper_points_urls_and_key_value_strings_at_a_database() {
    use super::testdb::with_dbname;
    assert_eq!(
        with_dbname("postgres://u:p@h:5432/postgres?sslmode=disable", "t1"),
        "postgres://u:p@h:5432/t1?sslmode=disable"
    );
    assert_eq!(with_dbname("postgresql://u@h", "t1"), "postgresql://u@h/t1");
    assert_eq!(
        with_dbname("host=/run/pg port=5432 user=postgres", "t1"),
        "host=/run/pg port=5432 user=postgres dbname=t1"
    );
}

/// A run record as a replica queues it.
fn queued_run(run_id: &str, requested_at: Millis) -> RunStatus {
    RunStatus {
        run_id: run_id.into(),
        trigger: crate::promotion::Trigger::Manual,
        state: crate::promotion::RunState::Queued,
        requested_at,
        started_at: None,
        finished_at: None,
        entry_seq: None,
        verdict: None,
        requested_by: None,
    }
}

#[test]
fn one_link_leads_at_a_time_others_name_it_and_leadership_moves_when_its_session_ends() {
    use crate::store::replicas::SharedStore;
    let Some(db) = fresh_database("leader_election") else {
        return;
    };
    let store = open(&db);
    let mut first = store.link("host-a-1").unwrap();
    let mut second = store.link("host-b-2").unwrap();
    assert!(first.contend().unwrap(), "the first to ask leads");
    assert!(!second.contend().unwrap(), "the second follows");
    assert!(first.contend().unwrap(), "the leader keeps leading");
    assert_eq!(second.leader().unwrap().as_deref(), Some("host-a-1"));
    assert_eq!(first.leader().unwrap().as_deref(), Some("host-a-1"));
    // The leader's session ends as a killed process's would: the server frees the lock.
    let ended: i64 = sql(&db)
        .query_one(
            "SELECT count(pg_terminate_backend(pid)) FROM pg_stat_activity
             WHERE application_name = 'understudy:host-a-1'",
            &[],
        )
        .unwrap()
        .get(0);
    assert_eq!(ended, 1);
    assert!(
        first.contend().is_err() || first.wait(Duration::from_millis(50)).is_err(),
        "the old leader hears its link is gone"
    );
    let deadline = std::time::Instant::now() + Duration::from_secs(10);
    while !second.contend().unwrap() {
        assert!(std::time::Instant::now() < deadline, "no new leader");
        std::thread::sleep(Duration::from_millis(20));
    }
    assert_eq!(second.leader().unwrap().as_deref(), Some("host-b-2"));
    // Leadership is per database: another database's replicas elect their own.
    let Some(other) = fresh_database("leader_election_other") else {
        return;
    };
    let mut elsewhere = open(&other).link("host-c-3").unwrap();
    assert!(elsewhere.contend().unwrap());
    assert_eq!(second.leader().unwrap().as_deref(), Some("host-b-2"));
}

#[test]
fn changes_are_announced_when_they_commit_and_queued_runs_wake_the_leader() {
    use crate::store::replicas::SharedStore;
    let Some(db) = fresh_database("change_notices") else {
        return;
    };
    let store = open(&db);
    let mut link = store.link("listener").unwrap();
    let quiet = link.wait(Duration::from_millis(100)).unwrap();
    assert_eq!(quiet, Default::default(), "nothing happened");
    store
        .append_entry(bare_entry("r-1"), EntryEffects::default())
        .unwrap();
    let heard = link.wait(Duration::from_secs(5)).unwrap();
    assert!(heard.changes && !heard.run_requests, "{heard:?}");
    store
        .set_freeze(Some(&crate::store::Freeze {
            since: 5,
            by: None,
            reason: None,
        }))
        .unwrap();
    assert!(link.wait(Duration::from_secs(5)).unwrap().changes);
    store.set_shadow_state(None).unwrap();
    assert!(link.wait(Duration::from_secs(5)).unwrap().changes);
    assert!(store.queue_run(&queued_run("r-2", 10), None, 8).unwrap());
    let heard = link.wait(Duration::from_secs(5)).unwrap();
    assert!(heard.run_requests && !heard.changes, "{heard:?}");
}

#[test]
fn queued_runs_are_taken_once_oldest_first_and_refused_beyond_the_capacity() {
    use crate::store::replicas::SharedStore;
    let Some(db) = fresh_database("queued_runs") else {
        return;
    };
    let first = open(&db);
    let second = open(&db);
    for (i, store) in [&first, &second, &first].into_iter().enumerate() {
        let run = queued_run(&format!("r-{}", i + 1), 100 + i as Millis);
        assert!(store.queue_run(&run, Some("asked"), 3).unwrap());
        assert_eq!(
            store.run(&run.run_id).unwrap(),
            Some(run),
            "the run row is written too"
        );
    }
    assert!(
        !second.queue_run(&queued_run("r-4", 200), None, 3).unwrap(),
        "three are waiting"
    );
    assert_eq!(
        second.run("r-4").unwrap(),
        None,
        "a refused run leaves nothing"
    );
    assert_eq!(second.queued_run_ids().unwrap(), ["r-1", "r-2", "r-3"]);
    let taken = second.take_queued_runs(2).unwrap();
    let ids: Vec<&str> = taken.iter().map(|q| q.run.run_id.as_str()).collect();
    assert_eq!(ids, ["r-1", "r-2"]);
    assert_eq!(taken[0].detail.as_deref(), Some("asked"));
    let rest = first.take_queued_runs(8).unwrap();
    assert_eq!(rest.len(), 1);
    assert_eq!(rest[0].run.run_id, "r-3");
    assert!(first.take_queued_runs(8).unwrap().is_empty());
    assert!(first.queued_run_ids().unwrap().is_empty());
    // Taken runs stay unfinished until their leader finishes them.
    assert_eq!(first.unfinished_runs().unwrap().len(), 3);
}

#[test]
fn examples_written_by_any_handle_are_counted_for_the_leaders_label_trigger() {
    use crate::store::replicas::SharedStore;
    let Some(db) = fresh_database("examples_written") else {
        return;
    };
    let leader = open(&db);
    let other = open(&db);
    let before = leader.examples_written().unwrap();
    let examples: Vec<StoredExample> = (0..25)
        .map(|i| StoredExample {
            monitoring: Default::default(),
            id: format!("e-{i}"),
            event_time: i,
            label: 1.0,
            features: serde_json::Map::new(),
        })
        .collect();
    other.put_examples(&examples).unwrap();
    // The writer's session reports its statistics when it goes idle, not at once (it took
    // about 15 s here): waited for, with a generous bound.
    let deadline = std::time::Instant::now() + Duration::from_secs(60);
    while leader.examples_written().unwrap() < before + 25 {
        assert!(
            std::time::Instant::now() < deadline,
            "the count did not grow: {}",
            leader.examples_written().unwrap()
        );
        std::thread::sleep(Duration::from_millis(100));
    }
}
