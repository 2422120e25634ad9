//! Heap allocations per scored request, counted, not timed.
//!
//! `cargo bench --bench allocations` drives 2,000 score requests through the service's whole
//! router in process (`tower::ServiceExt::oneshot`, every layer included, no socket) and
//! through the bare axum ceiling's router, with a counting global allocator, and prints
//! allocations and bytes per request, then the same for the scoring path's pieces. The service
//! is counted twice: on the thread that answers the request (the response path) and in the
//! whole process (the score recorder's thread and sled's included, which write the record
//! after the answer). The counts are deterministic for a given build (the whole-process one
//! nearly: the recorder's batches vary), so they compare across changes exactly where timings
//! on this machine wander by ±20 %.

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use axum::body::Body;
use axum::http::Request;
use http_body_util::BodyExt;
use serde_json::json;
use tower::ServiceExt;

mod support;
use support::{bare, wide_service, WideService};

struct Counting;

static ALLOCATIONS: AtomicU64 = AtomicU64::new(0);
static BYTES: AtomicU64 = AtomicU64::new(0);
static THREAD_ALLOCATIONS: AtomicU64 = AtomicU64::new(0);
static THREAD_BYTES: AtomicU64 = AtomicU64::new(0);

thread_local! {
    /// Set on the thread that drives the requests: its allocations are also counted apart.
    static REQUEST_THREAD: std::cell::Cell<bool> = const { std::cell::Cell::new(false) };
}

fn count(bytes: usize) {
    ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
    BYTES.fetch_add(bytes as u64, Ordering::Relaxed);
    // `try_with`: a thread being torn down has no locals left, and is not the request thread.
    if REQUEST_THREAD.try_with(|c| c.get()).unwrap_or(false) {
        THREAD_ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        THREAD_BYTES.fetch_add(bytes as u64, Ordering::Relaxed);
    }
}

// SAFETY: every call is passed straight to the system allocator; only counters are added.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        count(layout.size());
        System.alloc(layout)
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        System.dealloc(ptr, layout)
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        count(new_size);
        System.realloc(ptr, layout, new_size)
    }
}

#[global_allocator]
static GLOBAL: Counting = Counting;

const REQUESTS: usize = 2000;

/// Allocations and bytes per call of `f` over `n` calls (after one warm-up call), counted on
/// this thread and in the whole process.
fn per_call(n: usize, mut f: impl FnMut(usize)) -> Counts {
    REQUEST_THREAD.with(|c| c.set(true));
    f(0);
    let read = || {
        [&THREAD_ALLOCATIONS, &THREAD_BYTES, &ALLOCATIONS, &BYTES]
            .map(|c| c.load(Ordering::Relaxed))
    };
    let before = read();
    for i in 0..n {
        f(i);
    }
    let after = read();
    let per = |k: usize| (after[k] - before[k]) as f64 / n as f64;
    Counts {
        thread: (per(0), per(1)),
        process: (per(2), per(3)),
    }
}

/// Allocations and bytes per call.
struct Counts {
    thread: (f64, f64),
    process: (f64, f64),
}

fn main() {
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    let WideService {
        service,
        model,
        schema,
        bodies,
        rows,
        dir: _dir,
    } = wide_service();
    // Both as one boxed service type (one more box per call on each side alike).
    type Served = tower::util::BoxCloneSyncService<
        Request<Body>,
        axum::response::Response,
        std::convert::Infallible,
    >;
    let router: Served = Served::new(understudy::api::router(Arc::clone(&service.api)));
    let bare_router: Served =
        Served::new(axum::Router::new().route("/v1/score", axum::routing::post(bare::score)));

    let call = |router: &Served, body: &[u8]| {
        let request = Request::post("/v1/score")
            .header("content-type", "application/json")
            .body(Body::from(body.to_vec()))
            .expect("request");
        runtime.block_on(async {
            let response = router.clone().oneshot(request).await.expect("infallible");
            assert!(response.status().is_success(), "{}", response.status());
            response
                .into_body()
                .collect()
                .await
                .expect("body")
                .to_bytes()
        });
    };
    // The request's own body copy is counted on both sides alike.
    let service_counts = per_call(REQUESTS, |i| call(&router, &bodies[i % bodies.len()]));
    let bare_counts = per_call(REQUESTS, |i| call(&bare_router, &bodies[i % bodies.len()]));

    #[derive(serde::Deserialize)]
    struct ScoreBody {
        features: Box<serde_json::value::RawValue>,
    }
    let parse = per_call(REQUESTS, |i| {
        let request: ScoreBody = serde_json::from_slice(&bodies[i % bodies.len()]).expect("json");
        std::hint::black_box(schema.parse_row_text(request.features.get()).expect("row"));
    });
    let score = per_call(REQUESTS, |i| {
        std::hint::black_box(model.score(&rows[i % rows.len()]).output);
    });

    println!("\nheap allocations per request (bytes), {REQUESTS} requests, 30 features:");
    let lines = [
        ("service router, all layers", service_counts.thread),
        (
            "  the same, whole process (record written)",
            service_counts.process,
        ),
        ("bare axum ceiling router", bare_counts.thread),
        ("body -> validated row", parse.thread),
        ("score one row with factors", score.thread),
    ];
    for (name, (allocations, bytes)) in lines {
        println!("{name:<42} {allocations:>7.1} allocations {bytes:>9.0} bytes");
    }
    service.close();
    let out = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-reports");
    let _ = std::fs::create_dir_all(&out);
    let report: serde_json::Map<String, serde_json::Value> = lines
        .iter()
        .map(|(name, (a, b))| (name.to_string(), json!({"allocations": a, "bytes": b})))
        .collect();
    let _ = std::fs::write(
        out.join("allocations.json"),
        serde_json::to_vec_pretty(&report).unwrap_or_default(),
    );
}
