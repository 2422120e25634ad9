//! The scoring path's pieces in process, on a 30-feature schema: reading the JSON body,
//! validating it into a row, preprocessing, and scoring one row.
//!
//! `cargo bench --bench in_process`. The schema and data are invented (30 numeric features
//! `f00`..`f29`); the model's weights are fixed numbers, since only the arithmetic's cost is
//! measured here, not its quality.

use criterion::{black_box, criterion_group, criterion_main, Criterion};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{Map, Value as Json};

use understudy::config::{Config, LabelKind, Penalty};
use understudy::model::{Estimator, Model, Preprocessor, Setting, TrainingFacts};
use understudy::schema::{Row, Schema};

const FEATURES: usize = 30;

fn config() -> Config {
    let mut text = String::from(
        "[label]\nname = \"outcome\"\n\n[training]\nwindow_rows = 5000\nholdout_fraction = 0.25\nfolds = 5\nmin_rows = 500\n\n[[training.families]]\nfamily = \"logistic\"\npenalty = \"l2\"\nlambda = [0.01]\n\n[gate]\nmetric = \"auc\"\nmargin = 0.02\nmin_rows = 200\n",
    );
    for j in 0..FEATURES {
        text.push_str(&format!(
            "\n[[features]]\nname = \"f{j:02}\"\nkind = \"number\"\nmin = -1000\nmax = 1000\n"
        ));
    }
    Config::from_toml(&text).expect("valid bench config")
}

fn body(rng: &mut ChaCha8Rng) -> Vec<u8> {
    let features: Map<String, Json> = (0..FEATURES)
        .map(|j| (format!("f{j:02}"), Json::from(rng.gen_range(-50.0..50.0))))
        .collect();
    serde_json::to_vec(&serde_json::json!({ "features": features })).expect("json")
}

fn bench(c: &mut Criterion) {
    let config = config();
    let schema = Schema::from_config(&config);
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    let bodies: Vec<Vec<u8>> = (0..256).map(|_| body(&mut rng)).collect();
    let parse = |bytes: &[u8]| -> Row {
        let request: Json = serde_json::from_slice(bytes).expect("json");
        schema
            .parse_row(request["features"].as_object().expect("features"))
            .expect("valid row")
    };
    let rows: Vec<Row> = bodies.iter().map(|b| parse(b)).collect();
    let refs: Vec<&Row> = rows.iter().collect();
    let preprocessor = Preprocessor::fit(&schema, &refs);
    let weights: Vec<f64> = (0..preprocessor.width())
        .map(|j| (j as f64 - 15.0) / 30.0)
        .collect();
    let model = Model::new(
        1,
        0,
        Setting::Logistic {
            penalty: Penalty::L2,
            l1_ratio: 0.0,
            lambda: 0.01,
        },
        LabelKind::Binary,
        preprocessor.clone(),
        Estimator::Linear {
            weights,
            intercept: -0.3,
        },
        TrainingFacts {
            run_id: "bench".into(),
            rows: rows.len(),
            positives: 0,
            from: 0,
            cutoff: 0,
        },
    );

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

criterion_group!(benches, bench);
criterion_main!(benches);
