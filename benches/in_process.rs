//! The scoring path's pieces in process, on a 30-feature schema: reading the JSON body,
//! validating it into a row, preprocessing, and scoring one row.
//!
//! `cargo bench --bench in_process`. The schema and data are invented (30 numeric features
//! `f00`..`f29`); the model's weights are fixed numbers, since only the arithmetic's cost is
//! measured here, not its quality.

use criterion::{black_box, criterion_group, criterion_main, Criterion};
use serde_json::{Map, Value as Json};

use understudy::schema::Row;

mod support;
use support::{fixed_model, wide_bodies, wide_config};

fn bench(c: &mut Criterion) {
    let config = wide_config();
    let schema = config.schema();
    let bodies = wide_bodies(256);
    let parse = |bytes: &[u8]| -> Row {
        let request: Json = serde_json::from_slice(bytes).expect("json");
        schema
            .parse_row(request["features"].as_object().expect("features"))
            .expect("valid row")
    };
    let rows: Vec<Row> = bodies.iter().map(|b| parse(b)).collect();
    let model = fixed_model(&schema, &rows);
    let preprocessor = &model.preprocessor;

    let mut k = 0;
    c.bench_function("json body to row (30 features)", |b| {
        b.iter(|| {
            k = (k + 1) % bodies.len();
            black_box(parse(&bodies[k]))
        })
    });
    #[derive(serde::Deserialize)]
    struct Request {
        features: Box<serde_json::value::RawValue>,
    }
    c.bench_function("json body to row, streaming (30 features)", |b| {
        b.iter(|| {
            k = (k + 1) % bodies.len();
            let request: Request = serde_json::from_slice(&bodies[k]).expect("json");
            black_box(
                schema
                    .parse_row_text(request.features.get())
                    .expect("valid row"),
            )
        })
    });
    let maps: Vec<Map<String, Json>> = bodies
        .iter()
        .map(|b| {
            let v: Json = serde_json::from_slice(b).expect("json");
            v["features"].as_object().cloned().expect("features")
        })
        .collect();
    c.bench_function("validate map into row (30 features)", |b| {
        b.iter(|| {
            k = (k + 1) % maps.len();
            black_box(schema.parse_row(&maps[k]).expect("valid"))
        })
    });
    let mut z = vec![0.0; preprocessor.width()];
    c.bench_function("preprocess one row", |b| {
        b.iter(|| {
            k = (k + 1) % rows.len();
            preprocessor.transform_into(&rows[k], &mut z);
            black_box(&z);
        })
    });
    c.bench_function("score one row with factors", |b| {
        b.iter(|| {
            k = (k + 1) % rows.len();
            black_box(model.score(&rows[k]).output)
        })
    });
}

/// One request through each whole router in process (every layer, no socket): what the
/// service does per request beyond what the bare ceiling does.
fn routers(c: &mut Criterion) {
    use axum::body::Body;
    use axum::http::Request;
    use http_body_util::BodyExt;
    use std::sync::Arc;
    use tower::ServiceExt;

    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    let support::WideService {
        service,
        bodies,
        dir: _dir,
        ..
    } = support::wide_service();
    // Both as one boxed service type (one more box per call on each side alike).
    type Served = tower::util::BoxCloneSyncService<
        Request<Body>,
        axum::response::Response,
        std::convert::Infallible,
    >;
    let router: Served = Served::new(understudy::api::router(Arc::clone(&service.api)));
    let bare_router: Served = Served::new(
        axum::Router::new().route("/v1/score", axum::routing::post(support::bare::score)),
    );
    let bodies: Vec<axum::body::Bytes> = bodies.into_iter().map(axum::body::Bytes::from).collect();
    let mut k = 0;
    let mut call = |router: &Served| {
        k = (k + 1) % bodies.len();
        let request = Request::post("/v1/score")
            .header("content-type", "application/json")
            .body(Body::from(bodies[k].clone()))
            .expect("request");
        runtime.block_on(async {
            let response = router.clone().oneshot(request).await.expect("infallible");
            response
                .into_body()
                .collect()
                .await
                .expect("body")
                .to_bytes()
        })
    };
    c.bench_function("service router, one score request", |b| {
        b.iter(|| black_box(call(&router)))
    });
    c.bench_function("bare ceiling router, one score request", |b| {
        b.iter(|| black_box(call(&bare_router)))
    });
    service.close();
}

criterion_group!(benches, bench, routers);
criterion_main!(benches);
