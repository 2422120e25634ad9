//! Pieces shared by the benches: the 30-feature schema, a model with fixed weights on it, and
//! the bare axum ceiling.

#![allow(dead_code)] // each bench uses its own subset

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{Map, Value as Json};

use understudy::config::Config;
use understudy::model::Penalty;
use understudy::model::{Estimator, Model, Preprocessor, Setting, TrainingFacts};
use understudy::schema::LabelKind;
use understudy::schema::{Row, Schema};

pub const FEATURES: usize = 30;

/// A config with 30 numeric features `f00`..`f29` on [-1000, 1000] and a pinned L2 logistic.
pub fn wide_config() -> Config {
    let mut text = String::from(
        "[label]\nname = \"outcome\"\n\n[training]\nwindow_rows = 5000\nholdout_fraction = 0.25\nfolds = 5\nrepeats = 1\nmin_rows = 500\n\n[[training.families]]\nfamily = \"logistic\"\npenalty = \"l2\"\nlambda = [0.01]\n\n[gate]\nmetric = \"auc\"\nmargin = 0.02\nmin_rows = 200\n",
    );
    for j in 0..FEATURES {
        text.push_str(&format!(
            "\n[[features]]\nname = \"f{j:02}\"\nkind = \"number\"\nmin = -1000\nmax = 1000\n"
        ));
    }
    Config::from_toml(&text).expect("valid bench config")
}

/// A score request body with 30 features drawn uniformly on [-50, 50).
pub fn wide_body(rng: &mut ChaCha8Rng) -> Vec<u8> {
    let features: Map<String, Json> = (0..FEATURES)
        .map(|j| (format!("f{j:02}"), Json::from(rng.gen_range(-50.0..50.0))))
        .collect();
    serde_json::to_vec(&serde_json::json!({ "features": features })).expect("json")
}

/// `n` bodies from a fixed seed.
pub fn wide_bodies(n: usize) -> Vec<Vec<u8>> {
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    (0..n).map(|_| wide_body(&mut rng)).collect()
}

/// A logistic model on `schema` with fixed weights: only the arithmetic's cost is measured,
/// not its quality. The preprocessor is fitted on `rows`.
pub fn fixed_model(schema: &Schema, rows: &[Row]) -> Model {
    let refs: Vec<&Row> = rows.iter().collect();
    let preprocessor = Preprocessor::fit(schema, &refs);
    let weights: Vec<f64> = (0..preprocessor.width())
        .map(|j| (j as f64 - 15.0) / 30.0)
        .collect();
    Model::new(
        1,
        0,
        Setting::Logistic {
            penalty: Penalty::L2,
            l1_ratio: 0.0,
            lambda: 0.01,
        },
        LabelKind::Binary,
        preprocessor,
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
    )
}

/// A running service (no HTTP listener) on the 30-feature schema with the fixed model
/// active, and the bodies and rows it scores. Keep the returned directory alive.
pub struct WideService {
    pub service: std::sync::Arc<understudy::app::Service>,
    pub model: std::sync::Arc<Model>,
    pub schema: Schema,
    pub bodies: Vec<Vec<u8>>,
    pub rows: Vec<Row>,
    pub dir: tempfile::TempDir,
}

pub fn wide_service() -> WideService {
    let dir = tempfile::tempdir().expect("temp dir");
    let mut config = wide_config();
    config.server.data_dir = dir.path().to_owned();
    config.schedule.every = None;
    config.schedule.new_labels = None;
    let schema = config.schema();
    let bodies = wide_bodies(256);
    let rows: Vec<Row> = bodies
        .iter()
        .map(|b| {
            let v: Json = serde_json::from_slice(b).expect("json");
            schema
                .parse_row(v["features"].as_object().expect("features"))
                .expect("row")
        })
        .collect();
    let model = std::sync::Arc::new(fixed_model(&schema, &rows));
    let service = understudy::app::Service::open(config).expect("service opens");
    service.api.registry.activate(std::sync::Arc::clone(&model));
    WideService {
        service,
        model,
        schema,
        bodies,
        rows,
        dir,
    }
}

/// The ceiling: the same body into a fixed struct, a dot product and a sigmoid.
pub mod bare {
    use axum::Json;
    use serde::Deserialize;

    #[derive(Deserialize)]
    pub struct Body {
        pub features: Features,
    }

    #[derive(Deserialize)]
    pub struct Features {
        f00: f64,
        f01: f64,
        f02: f64,
        f03: f64,
        f04: f64,
        f05: f64,
        f06: f64,
        f07: f64,
        f08: f64,
        f09: f64,
        f10: f64,
        f11: f64,
        f12: f64,
        f13: f64,
        f14: f64,
        f15: f64,
        f16: f64,
        f17: f64,
        f18: f64,
        f19: f64,
        f20: f64,
        f21: f64,
        f22: f64,
        f23: f64,
        f24: f64,
        f25: f64,
        f26: f64,
        f27: f64,
        f28: f64,
        f29: f64,
    }

    impl Features {
        fn values(&self) -> [f64; 30] {
            [
                self.f00, self.f01, self.f02, self.f03, self.f04, self.f05, self.f06, self.f07,
                self.f08, self.f09, self.f10, self.f11, self.f12, self.f13, self.f14, self.f15,
                self.f16, self.f17, self.f18, self.f19, self.f20, self.f21, self.f22, self.f23,
                self.f24, self.f25, self.f26, self.f27, self.f28, self.f29,
            ]
        }
    }

    pub async fn score(Json(body): Json<Body>) -> Json<serde_json::Value> {
        Json(serde_json::json!({ "probability": body.features.probability() }))
    }

    impl Features {
        fn probability(&self) -> f64 {
            let z: f64 = self
                .values()
                .iter()
                .enumerate()
                .map(|(j, v)| v * (j as f64 - 15.0) / 30.0)
                .sum::<f64>()
                - 0.3;
            1.0 / (1.0 + (-z).exp())
        }
    }

    #[derive(Deserialize)]
    pub struct OutcomeBody {
        pub score_id: String,
        pub label: f64,
    }

    /// An outcome endpoint with nothing behind it: parses the body and answers 201 with an
    /// answer the size of the service's, storing nothing (HTTP's own cost, for the ingest
    /// bench).
    pub async fn outcome(
        Json(body): Json<OutcomeBody>,
    ) -> (axum::http::StatusCode, Json<serde_json::Value>) {
        (
            axum::http::StatusCode::CREATED,
            Json(
                serde_json::json!({ "score_id": body.score_id, "label": body.label, "duplicate": false }),
            ),
        )
    }

    #[derive(Deserialize)]
    pub struct RawBody {
        pub features: Box<serde_json::value::RawValue>,
    }

    /// The ceiling plus the one thing it leaves out that the service must do: keep a record
    /// of every score, through the service's own recorder into sled.
    pub async fn score_and_record(
        axum::extract::State(recorder): axum::extract::State<
            std::sync::Arc<understudy::store::recorder::ScoreRecorder>,
        >,
        Json(body): Json<RawBody>,
    ) -> Json<serde_json::Value> {
        let features: Features = serde_json::from_str(body.features.get()).expect("features");
        let probability = features.probability();
        recorder
            .reserve(1, std::time::Duration::from_secs(1))
            .await
            .expect("room");
        let score_id = recorder.push(understudy::store::ScoreRecord {
            score_id: String::new(),
            at: 0,
            model_id: "bare".into(),
            reference: None,
            features: body.features.into(),
            output: probability,
            shadow: None,
            candidate_answered: false,
        });
        Json(serde_json::json!({ "score_id": score_id, "probability": probability }))
    }
}
