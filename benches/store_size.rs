//! Bytes on disk per million score records, and what compaction gives back.
//!
//! `cargo bench --bench store_size` writes `UNDERSTUDY_SIZE_RECORDS` (default 1,000,000) score
//! records into a fresh store, the way the service's recorder does (sled batches of 512, fresh
//! ULIDs one millisecond apart, every feature sent so the record keeps the validated values,
//! see `store::recorded`), for two kinds of record:
//!
//! - **invoice**: the 7 features of the invented invoice scenario (`demo::scenario::invoice`);
//! - **wide**: 30 numeric features drawn uniformly on [-50, 50) at full f64 precision, the
//!   bodies of the scoring benchmark (`support::wide_body`).
//!
//! For each it flushes and measures, then deletes the older half in `retention::CHUNK`-record
//! chunks through `Store::compact_scores` (what the background thread calls), timing each
//! chunk, flushes and measures,
//! then writes as many new records as were deleted, reopens the store and measures again.
//! "sled" is `Db::size_on_disk`; "allocated" is the blocks the files hold (`du`); "files" the
//! files' lengths. The report goes to `target/bench-reports/store_size.json`; the store lives
//! under `target/bench-data/` (same disk as the build) and is deleted afterwards.

use std::os::unix::fs::MetadataExt;
use std::path::Path;
use std::sync::Arc;
use std::time::Instant;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};

use understudy::demo::scenario::{invoice, Regime};
use understudy::schema::Schema;
use understudy::store::recorded::{FeatureLayout, RecordedFeatures};
use understudy::store::retention::CHUNK;
use understudy::store::{ScoreLimits, ScoreRecord, SledStore, Store};

mod support;

const BATCH: usize = 512;

/// Allocated bytes (blocks × 512, as `du` counts) and file lengths under `dir`.
fn disk_usage(dir: &Path) -> (u64, u64) {
    let mut allocated = 0;
    let mut length = 0;
    let mut stack = vec![dir.to_owned()];
    while let Some(path) = stack.pop() {
        for entry in std::fs::read_dir(&path).expect("read dir") {
            let entry = entry.expect("dir entry");
            let meta = entry.metadata().expect("metadata");
            if meta.is_dir() {
                stack.push(entry.path());
            } else {
                allocated += meta.blocks() * 512;
                length += meta.len();
            }
        }
    }
    (allocated, length)
}

struct Sizes {
    sled: u64,
    allocated: u64,
    files: u64,
}

fn measure(store: &SledStore, dir: &Path) -> Sizes {
    store.flush().expect("flush");
    let (allocated, files) = disk_usage(dir);
    Sizes {
        sled: store.size_on_disk().expect("size"),
        allocated,
        files,
    }
}

/// MB per million records (which is bytes per record).
fn per_million(bytes: u64, records: u64) -> f64 {
    bytes as f64 / records as f64
}

/// Writes `n` records from index `from`; returns the mean record's JSON length (the size it
/// would take as text, as before compact records).
fn write_records(
    store: &SledStore,
    (schema, layout): (&Schema, &Arc<FeatureLayout>),
    kind: &str,
    from: u64,
    n: u64,
    start_ms: u64,
    rng: &mut ChaCha8Rng,
) -> f64 {
    let mut bytes = 0u64;
    let mut batch = Vec::with_capacity(BATCH);
    for i in from..from + n {
        let features: Json = match kind {
            "invoice" => Json::Object(invoice(rng, Regime::Before).features),
            _ => {
                let body: Json = serde_json::from_slice(&support::wide_body(rng)).expect("json");
                body["features"].clone()
            }
        };
        // As the service records a score: the validated values when every feature was sent.
        let text = serde_json::value::to_raw_value(&features).expect("raw");
        let features = match schema.parse_row_text_as_sent(text.get()) {
            Ok((values, true)) => RecordedFeatures::Values {
                values,
                layout: Arc::clone(layout),
            },
            _ => RecordedFeatures::Text(text),
        };
        let at = start_ms + i;
        let record = ScoreRecord {
            score_id: ulid::Ulid::from_parts(at, rand::Rng::gen(rng)).to_string(),
            at: at as i64,
            model_id: "m-12-0a1b2c3d".into(),
            reference: None,
            features,
            output: rand::Rng::gen(rng),
            shadow: None,
            candidate_answered: false,
        };
        bytes += serde_json::to_vec(&record).expect("json").len() as u64;
        batch.push(record);
        if batch.len() == BATCH {
            store.record_scores(&batch).expect("record");
            batch.clear();
        }
    }
    store.record_scores(&batch).expect("record");
    bytes as f64 / n as f64
}

fn row(stage: &str, records: u64, s: &Sizes, seconds: f64) -> Json {
    if records == 0 {
        println!(
            "  {stage:<34} {records:>9} records  sled {:>8.1} MB  allocated {:>8.1} MB  files {:>8.1} MB",
            s.sled as f64 / 1e6,
            s.allocated as f64 / 1e6,
            s.files as f64 / 1e6,
        );
        return json!({"stage": stage, "records": 0, "sled_bytes": s.sled,
                      "allocated_bytes": s.allocated, "file_bytes": s.files});
    }
    println!(
        "  {stage:<34} {records:>9} records  sled {:>8.1} MB ({:>6.1} MB/M)  allocated {:>8.1} MB ({:>6.1} MB/M)  files {:>8.1} MB  {seconds:>6.1} s",
        s.sled as f64 / 1e6,
        per_million(s.sled, records),
        s.allocated as f64 / 1e6,
        per_million(s.allocated, records),
        s.files as f64 / 1e6,
    );
    json!({"stage": stage, "records": records, "sled_bytes": s.sled,
           "allocated_bytes": s.allocated, "file_bytes": s.files, "seconds": seconds})
}

fn run(kind: &str, n: u64, root: &Path) -> Json {
    let dir = root.join(kind);
    let _ = std::fs::remove_dir_all(&dir);
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let start_ms = 1_800_000_000_000u64;
    println!("{kind}:");
    let mut rows = Vec::new();
    let store = SledStore::open(&dir).expect("open");
    let empty = measure(&store, &dir);
    rows.push(row("empty", 0, &empty, 0.0));

    let t = Instant::now();
    let schema = match kind {
        "invoice" => understudy::config::Config::embedded_default().schema(),
        _ => support::wide_config().schema(),
    };
    let layout = Arc::new(FeatureLayout::of(&schema));
    let mean_record = write_records(&store, (&schema, &layout), kind, 0, n, start_ms, &mut rng);
    let written = measure(&store, &dir);
    rows.push(row("written", n, &written, t.elapsed().as_secs_f64()));
    println!("  mean record: {mean_record:.0} bytes of JSON");

    // The older half, chunk by chunk as the retention thread deletes them, each chunk timed.
    let t = Instant::now();
    let limits = ScoreLimits {
        older_than: None,
        keep: Some(n / 2),
    };
    let mut chunk_ms = Vec::new();
    let mut deleted = 0u64;
    loop {
        let c = Instant::now();
        let done = store.compact_scores(limits, CHUNK).expect("compact");
        chunk_ms.push(c.elapsed().as_secs_f64() * 1e3);
        deleted += done.records;
        if !done.more {
            break;
        }
    }
    let compact_seconds = t.elapsed().as_secs_f64();
    let compacted = measure(&store, &dir);
    rows.push(row(
        "older half compacted",
        store.score_count(),
        &compacted,
        compact_seconds,
    ));
    let k = chunk_ms.len().min(10);
    let first = chunk_ms[..k].iter().sum::<f64>() / k as f64;
    let last = chunk_ms[chunk_ms.len() - k..].iter().sum::<f64>() / k as f64;
    let slowest = chunk_ms.iter().cloned().fold(0.0, f64::max);
    println!(
        "  compaction: {deleted} records in {} chunks of up to {CHUNK} records; ms per chunk: first 10 {first:.2}, last 10 {last:.2}, slowest {slowest:.2}",
        chunk_ms.len()
    );

    let t = Instant::now();
    write_records(
        &store,
        (&schema, &layout),
        kind,
        n,
        deleted,
        start_ms,
        &mut rng,
    );
    let refilled = measure(&store, &dir);
    rows.push(row(
        "as many written again",
        store.score_count(),
        &refilled,
        t.elapsed().as_secs_f64(),
    ));
    drop(store);

    let t = Instant::now();
    let store = SledStore::open(&dir).expect("reopen");
    let open_seconds = t.elapsed().as_secs_f64();
    let reopened = measure(&store, &dir);
    rows.push(row(
        "reopened",
        store.score_count(),
        &reopened,
        open_seconds,
    ));
    drop(store);
    let _ = std::fs::remove_dir_all(&dir);
    json!({"kind": kind, "mean_record_bytes": mean_record, "compaction_chunks": chunk_ms.len(),
           "chunk_ms_first_10": first, "chunk_ms_last_10": last, "chunk_ms_slowest": slowest,
           "compaction_seconds": compact_seconds, "open_seconds": open_seconds, "stages": rows})
}

fn main() {
    // `cargo bench` passes `--bench`; `cargo test --benches` runs this with a tiny count.
    let testing = std::env::args().any(|a| a == "--test") || cfg!(debug_assertions);
    let n: u64 = std::env::var("UNDERSTUDY_SIZE_RECORDS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(if testing { 10_000 } else { 1_000_000 });
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-data/store_size");
    std::fs::create_dir_all(&root).expect("bench dir");
    let reports: Vec<Json> = ["invoice", "wide"]
        .iter()
        .map(|kind| run(kind, n, &root))
        .collect();
    let out = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-reports");
    std::fs::create_dir_all(&out).expect("report dir");
    std::fs::write(
        out.join("store_size.json"),
        serde_json::to_vec_pretty(&json!({ "records": n, "runs": reports })).expect("json"),
    )
    .expect("write report");
}
