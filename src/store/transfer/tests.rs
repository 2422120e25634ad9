//! Whole-store moves between the two backends and through the file, on stores filled by the
//! store's own write paths (`contract::fill_every_table`). The pages and the restore of each
//! backend are pinned by the store contract suite; these pin the moves.

use std::io::{BufRead, Cursor};

use super::*;
use crate::store::contract::fill_every_table;
use crate::store::pg_store::testdb::{fresh_database, TestDb};
use crate::store::{PgOptions, PgStore, SledStore};

fn postgres(db: &TestDb) -> PgStore {
    let mut options = PgOptions::new(db.url.clone());
    options.pool_size = 2;
    PgStore::open(&options).unwrap()
}

fn exported(store: &dyn Store) -> Vec<u8> {
    let mut out = Vec::new();
    export(store, "sled", &mut out, 16, &Quiet).unwrap();
    out
}

fn reader(bytes: Vec<u8>) -> impl Fn() -> Result<Box<dyn BufRead>, TransferError> {
    move || Ok(Box::new(Cursor::new(bytes.clone())) as Box<dyn BufRead>)
}

fn small() -> Options {
    Options {
        batch: 13,
        replace: false,
    }
}

#[test]
fn sled_to_postgres_to_sled_keeps_every_digest() {
    let Some(db) = fresh_database("copy_sled_pg_sled") else {
        return;
    };
    let (a, b) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
    let first = SledStore::open(a.path()).unwrap();
    fill_every_table(&first);
    let middle = postgres(&db);
    let there = copy(&first, &middle, small(), &Quiet).unwrap();
    there.check().unwrap();
    assert_eq!(there.records(), 2 + 3 + 2 + 2 + 2 + 150 + 45 + 30);
    let last = SledStore::open(b.path()).unwrap();
    let back = copy(&middle, &last, small(), &Quiet).unwrap();
    back.check().unwrap();
    let digests =
        |r: &Report| -> Vec<String> { r.tables.iter().map(|t| t.target_digest.clone()).collect() };
    assert_eq!(digests(&there), digests(&back));
    assert_eq!(
        digest(&first, 100, &Quiet).unwrap(),
        digest(&last, 100, &Quiet).unwrap()
    );
    // The file a store writes is the same whichever backend holds it, but for the header's
    // time and source.
    let strip = |bytes: Vec<u8>| -> Vec<String> {
        String::from_utf8(bytes)
            .unwrap()
            .lines()
            .skip(1)
            .map(str::to_owned)
            .collect()
    };
    let mut from_sled = strip(exported(&first));
    let mut from_pg = strip(exported(&middle));
    // (sled reads examples in event-time order, PostgreSQL by id: the same lines.)
    from_sled.sort();
    from_pg.sort();
    assert_eq!(from_sled, from_pg);
}

#[test]
fn a_non_empty_target_is_refused_unless_replaced() {
    let (a, b) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
    let source = SledStore::open(a.path()).unwrap();
    fill_every_table(&source);
    let target = SledStore::open(b.path()).unwrap();
    target.next_seq("other").unwrap();
    match copy(&source, &target, small(), &Quiet) {
        Err(TransferError::TargetNotEmpty(held)) => assert_eq!(held, "counters: 1"),
        other => panic!("expected a refusal, got {other:?}"),
    }
    assert_eq!(
        target.table_len(Table::Scores).unwrap(),
        0,
        "nothing written"
    );
    let options = Options {
        replace: true,
        ..small()
    };
    copy(&source, &target, options, &Quiet)
        .unwrap()
        .check()
        .unwrap();
    // The erased counter is gone, not merged.
    assert_eq!(target.next_seq("other").unwrap(), 1);
}

#[test]
fn export_then_import_into_postgres_checks_the_file_and_the_target() {
    let Some(db) = fresh_database("export_import_pg") else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let source = SledStore::open(dir.path()).unwrap();
    fill_every_table(&source);
    let bytes = exported(&source);
    let text = String::from_utf8(bytes.clone()).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(lines.len(), 1 + 236 + 1, "header, records, trailer");
    let header: Header = serde_json::from_str(lines[0]).unwrap();
    assert_eq!(
        (header.format.as_str(), header.format_version, header.layout),
        (FILE_FORMAT, 1, LAYOUT_VERSION)
    );
    assert_eq!(header.counts["scores"], 150);
    let target = postgres(&db);
    let (summary, report) = import(&reader(bytes), &target, small(), &Quiet).unwrap();
    report.check().unwrap();
    assert_eq!(summary.records(), 236);
    assert_eq!(
        digest(&source, 50, &Quiet).unwrap(),
        digest(&target, 50, &Quiet).unwrap()
    );
    assert_eq!(
        target.active_history().unwrap(),
        source.active_history().unwrap()
    );
}

/// The export of a filled store, as lines.
fn export_lines() -> Vec<String> {
    let dir = tempfile::tempdir().unwrap();
    let source = SledStore::open(dir.path()).unwrap();
    fill_every_table(&source);
    String::from_utf8(exported(&source))
        .unwrap()
        .lines()
        .map(str::to_owned)
        .collect()
}

/// Imports `lines` into a fresh sled store; the error, and whether the target stayed empty.
fn import_refused(lines: &[String]) -> (TransferError, bool) {
    let dir = tempfile::tempdir().unwrap();
    let target = SledStore::open(dir.path()).unwrap();
    let bytes = (lines.join("\n") + "\n").into_bytes();
    let err = import(&reader(bytes), &target, small(), &Quiet).unwrap_err();
    let empty = counts(&target).unwrap().values().all(|&n| n == 0);
    (err, empty)
}

#[test]
fn a_corrupted_line_is_refused_with_its_number_before_anything_is_written() {
    let lines = export_lines();
    // A line cut in the middle of its JSON.
    let mut cut = lines.clone();
    let half = cut[100].len() / 2;
    cut[100].truncate(half);
    match import_refused(&cut) {
        (TransferError::Line { line: 101, reason }, true) => {
            assert!(reason.contains("not a store record"), "{reason}")
        }
        other => panic!("expected line 101 refused, got {other:?}"),
    }
    // Valid JSON whose value was edited: the digest tells.
    let mut edited = lines.clone();
    let at = edited
        .iter()
        .position(|l| l.contains(r#""table":"scores""#))
        .unwrap();
    edited[at] = edited[at].replace(r#""output":0.25"#, r#""output":0.35"#);
    assert_ne!(edited[at], lines[at]);
    match import_refused(&edited) {
        (TransferError::File(why), true) => assert!(why.contains("scores"), "{why}"),
        other => panic!("expected the digest to refuse the file, got {other:?}"),
    }
    // A record moved under another key.
    let mut moved = lines.clone();
    let at = moved
        .iter()
        .position(|l| l.contains(r#""table":"runs""#))
        .unwrap();
    moved[at] = moved[at].replacen(r#""key":"r-1""#, r#""key":"r-9""#, 1);
    match import_refused(&moved) {
        (TransferError::Line { line, reason }, true) => {
            assert_eq!(line as usize, at + 1);
            assert!(reason.contains("not the key"), "{reason}");
        }
        other => panic!("expected the moved record refused, got {other:?}"),
    }
    // Cut short: no trailer.
    let short = lines[..lines.len() - 1].to_vec();
    match import_refused(&short) {
        (TransferError::File(why), true) => assert!(why.contains("cut short"), "{why}"),
        other => panic!("expected the short file refused, got {other:?}"),
    }
    // Score records out of order.
    let mut swapped = lines.clone();
    let first = swapped
        .iter()
        .position(|l| l.contains(r#""table":"scores""#))
        .unwrap();
    swapped.swap(first, first + 1);
    match import_refused(&swapped) {
        (TransferError::Line { line, reason }, true) => {
            assert_eq!(line as usize, first + 2);
            assert!(reason.contains("increasing id order"), "{reason}");
        }
        other => panic!("expected the order refused, got {other:?}"),
    }
    // A header of another version.
    let mut newer = lines.clone();
    newer[0] = newer[0].replace(r#""format_version":1"#, r#""format_version":2"#);
    match import_refused(&newer) {
        (TransferError::Line { line: 1, reason }, true) => {
            assert!(reason.contains("format version 2"), "{reason}")
        }
        other => panic!("expected the header refused, got {other:?}"),
    }
    // The unchanged file goes in.
    let dir = tempfile::tempdir().unwrap();
    let target = SledStore::open(dir.path()).unwrap();
    let bytes = (lines.join("\n") + "\n").into_bytes();
    let (_, report) = import(&reader(bytes), &target, small(), &Quiet).unwrap();
    report.check().unwrap();
}
