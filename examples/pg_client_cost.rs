//! What one PostgreSQL call costs a synchronous caller, with the blocking `postgres` crate
//! (what `PgStore` uses) and with `tokio-postgres` reached through a runtime bridge (a
//! `Handle::block_on` in every call, the connection driven by a multi-threaded runtime), beside
//! sled's durable and non-durable one-record writes. Backs the client choice in DEVELOPERS.md.
//!
//! ```sh
//! UNDERSTUDY_PG_URL='host=/path/to/socket/dir user=postgres dbname=postgres' \
//!   cargo run --example pg_client_cost -- 3000
//! ```
//!
//! Each series runs three times, alternating, on one caller thread; the figures are medians of
//! the three: wall time per call and this process's CPU time per call (the server's CPU is
//! not counted). Writes go to a scratch table it creates and drops.

use std::time::{Duration, Instant};

fn cpu_time() -> Duration {
    let mut usage = std::mem::MaybeUninit::<libc::rusage>::uninit();
    // SAFETY: getrusage fills the struct it is given; RUSAGE_SELF is always valid.
    let usage = unsafe {
        libc::getrusage(libc::RUSAGE_SELF, usage.as_mut_ptr());
        usage.assume_init()
    };
    let micros = |t: libc::timeval| t.tv_sec as u64 * 1_000_000 + t.tv_usec as u64;
    Duration::from_micros(micros(usage.ru_utime) + micros(usage.ru_stime))
}

/// (wall, cpu) per call of `n` calls of `call`.
fn measure(n: usize, mut call: impl FnMut(usize)) -> (f64, f64) {
    let (wall, cpu) = (Instant::now(), cpu_time());
    for i in 0..n {
        call(i);
    }
    let per = |d: Duration| d.as_secs_f64() * 1e6 / n as f64;
    (per(wall.elapsed()), per(cpu_time() - cpu))
}

fn main() {
    let n: usize = std::env::args()
        .nth(1)
        .and_then(|a| a.parse().ok())
        .unwrap_or(2000);
    let url = std::env::var("UNDERSTUDY_PG_URL").expect("set UNDERSTUDY_PG_URL");
    let mut blocking = postgres::Client::connect(&url, postgres::NoTls).unwrap();
    blocking
        .batch_execute(
            "SET synchronous_commit = on;
             DROP TABLE IF EXISTS client_cost;
             CREATE TABLE client_cost (id bigint PRIMARY KEY, body text NOT NULL)",
        )
        .unwrap();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let handle = runtime.handle().clone();
    let bridged = handle.block_on(async {
        let (client, connection) = tokio_postgres::connect(&url, tokio_postgres::NoTls)
            .await
            .unwrap();
        tokio::spawn(connection);
        client
            .batch_execute("SET synchronous_commit = on")
            .await
            .unwrap();
        client
    });
    // Beside the PostgreSQL data (under target/), not in /tmp, which may be memory.
    let sled_dir = tempfile::tempdir_in(concat!(env!("CARGO_MANIFEST_DIR"), "/target")).unwrap();
    let sled = sled::open(sled_dir.path()).unwrap();
    let body = "x".repeat(200);

    let select_blocking = blocking.prepare("SELECT 1").unwrap();
    let insert_blocking = blocking
        .prepare("INSERT INTO client_cost (id, body) VALUES ($1, $2)")
        .unwrap();
    let (select_bridged, insert_bridged) = handle.block_on(async {
        (
            bridged.prepare("SELECT 1").await.unwrap(),
            bridged
                .prepare("INSERT INTO client_cost (id, body) VALUES ($1, $2)")
                .await
                .unwrap(),
        )
    });

    let names = [
        "SELECT 1, blocking postgres",
        "SELECT 1, tokio-postgres via block_on",
        "INSERT one row + commit, blocking postgres",
        "INSERT one row + commit, tokio-postgres via block_on",
        "sled insert + flush",
        "sled insert, no flush",
    ];
    let mut results: Vec<Vec<(f64, f64)>> = vec![Vec::new(); names.len()];
    let mut next_id = 0i64;
    for _round in 0..3 {
        results[0].push(measure(n, |_| {
            blocking.query_one(&select_blocking, &[]).unwrap();
        }));
        results[1].push(measure(n, |_| {
            handle
                .block_on(bridged.query_one(&select_bridged, &[]))
                .unwrap();
        }));
        results[2].push(measure(n, |_| {
            next_id += 1;
            blocking
                .execute(&insert_blocking, &[&next_id, &body])
                .unwrap();
        }));
        results[3].push(measure(n, |_| {
            next_id += 1;
            handle
                .block_on(bridged.execute(&insert_bridged, &[&next_id, &body]))
                .unwrap();
        }));
        results[4].push(measure(n, |i| {
            sled.insert((i as u64).to_be_bytes(), body.as_bytes())
                .unwrap();
            sled.flush().unwrap();
        }));
        results[5].push(measure(n, |i| {
            sled.insert(((i as u64 + 1) << 32).to_be_bytes(), body.as_bytes())
                .unwrap();
        }));
    }
    blocking.batch_execute("DROP TABLE client_cost").unwrap();
    println!("{n} calls per series, 3 alternating rounds, medians (µs per call):");
    println!("| series | wall | client CPU |");
    println!("| --- | --- | --- |");
    for (name, rounds) in names.iter().zip(&mut results) {
        let median = |mut v: Vec<f64>| {
            v.sort_by(f64::total_cmp);
            v[v.len() / 2]
        };
        let wall = median(rounds.iter().map(|r| r.0).collect());
        let cpu = median(rounds.iter().map(|r| r.1).collect());
        println!("| {name} | {wall:.1} | {cpu:.1} |");
    }
}
