//! PMML export, checked by an independent evaluator.
//!
//! Each family is trained through the real code (`offline::train`, the run the service does) on
//! invented rows, exported with `model::pmml::to_pmml`, and 1,200 fresh rows (missing values
//! under every missing rule, every category) are scored both by the service's own path
//! (`Schema::parse_row_text` then `Model::score`, as `POST /v1/score` does) and by
//! JPMML-Evaluator (PyPI `jpmml_evaluator`, Java), through `tests/pmml/evaluate.py`. The
//! outputs must agree to 1e-9 absolute, and rows the service refuses (out of bounds, unknown
//! category, a required value missing) must be refused by the evaluator as invalid.
//!
//! The format is the Data Mining Group's PMML 4.4 specification
//! (<https://dmg.org/pmml/v4-4-1/GeneralStructure.html>); the documents are also validated
//! against the PMML 4.4 XML Schema shipped in the evaluator's `pmml-model` jar.
//!
//! The evaluator's venv is made by `tests/pmml/setup.sh` (run by `.ci/run`). Where it is
//! missing the check is skipped with a note, except under `CI`, where it fails.

use std::path::{Path, PathBuf};
use std::process::Command;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Map, Value as Json};
use understudy::config::{Config, FeatureConfig, LabelConfig};
use understudy::metrics::GateMetric;
use understudy::model::pmml::to_pmml;
use understudy::model::FamilyGrid;
use understudy::model::Model;
use understudy::store::StoredExample;

use crate::helpers::{spawn_app_with, test_config};

/// Largest absolute difference allowed between the evaluator's output and the service's.
const TOLERANCE: f64 = 1e-9;
/// Accepted rows scored per model.
const ROWS: usize = 1200;

const FEATURES: &str = r#"
[[features]]
name = "amount"
kind = "number"
min = 0
max = 250000
missing = "median"

[[features]]
name = "tenure_days"
kind = "number"
min = 0
max = 3650
missing = 30

[[features]]
name = "utilisation"
kind = "number"
min = 0
max = 5

[[features]]
name = "rating"
kind = "number"
missing = "median"

[[features]]
name = "sector"
kind = "category"
categories = ["construction", "retail", "food & drink <ltd>", "\"quoted\" trade"]

[[features]]
name = "channel"
kind = "category"
categories = ["portal", "email", "edi"]
missing = "edi"
"#;

#[derive(serde::Deserialize)]
struct Parts {
    label: LabelConfig,
    features: Vec<FeatureConfig>,
    #[serde(default)]
    families: Vec<FamilyGrid>,
}

/// The embedded config with this test's features, label kind and one pinned family.
fn config(label_kind: &str, family: &str) -> Config {
    let text = format!(
        "[label]\nname = \"outcome\"\nkind = \"{label_kind}\"\n{FEATURES}\n[[families]]\n{family}\n"
    );
    let parts: Parts = toml::from_str(&text).unwrap();
    let mut config = Config::embedded_default();
    config.label = parts.label;
    config.features = parts.features;
    config.training.families = parts.families;
    config.training.window_rows = 100_000;
    if label_kind == "number" {
        config.gate.metric = GateMetric::Rmse;
    }
    config.validate().unwrap();
    config
}

/// One invented request: features as sent (`None` = left out), with missing values only where
/// the config allows them.
fn features(rng: &mut ChaCha8Rng, i: usize) -> Map<String, Json> {
    let sectors = [
        "construction",
        "retail",
        "food & drink <ltd>",
        "\"quoted\" trade",
    ];
    let channels = ["portal", "email", "edi"];
    let mut f = Map::new();
    let maybe = |f: &mut Map<String, Json>, name: &str, value: Json, rng: &mut ChaCha8Rng| {
        if rng.gen_bool(0.12) {
            // Left out, or sent as null: both are missing.
            if rng.gen_bool(0.5) {
                f.insert(name.into(), Json::Null);
            }
        } else {
            f.insert(name.into(), value);
        }
    };
    let amount = (rng.gen_range(2.0f64..12.0)).exp().min(250_000.0);
    maybe(
        &mut f,
        "amount",
        json!((amount * 100.0).round() / 100.0),
        rng,
    );
    maybe(&mut f, "tenure_days", json!(rng.gen_range(0..3650)), rng);
    f.insert("utilisation".into(), json!(rng.gen_range(0.0..2.5)));
    maybe(&mut f, "rating", json!(rng.gen_range(-3.0..3.0)), rng);
    f.insert("sector".into(), json!(sectors[i % sectors.len()]));
    maybe(
        &mut f,
        "channel",
        json!(channels[(i / 4) % channels.len()]),
        rng,
    );
    f
}

/// Rows the service refuses, each for one rule.
fn refused_requests() -> Vec<Map<String, Json>> {
    let base = json!({"amount": 1200.0, "tenure_days": 400, "utilisation": 0.7, "rating": 0.5,
                      "sector": "retail", "channel": "portal"});
    let variants = [
        ("utilisation", json!(5.5)),
        ("utilisation", Json::Null),
        ("amount", json!(-1.0)),
        ("amount", json!(250_000.5)),
        ("tenure_days", json!(4000)),
        ("sector", json!("mining")),
        ("sector", Json::Null),
        ("channel", json!("fax")),
    ];
    variants
        .into_iter()
        .map(|(name, value)| {
            let mut f = base.as_object().unwrap().clone();
            f.insert(name.into(), value);
            f
        })
        .collect()
}

/// The truth behind the invented labels: a log-odds (binary) or a mean (number).
fn signal(f: &Map<String, Json>) -> f64 {
    let number = |name: &str, default: f64| f.get(name).and_then(Json::as_f64).unwrap_or(default);
    let sector = match f.get("sector").and_then(Json::as_str) {
        Some("construction") => 0.8,
        Some("retail") => -0.3,
        Some("food & drink <ltd>") => 0.4,
        _ => 0.0,
    };
    let channel = match f.get("channel").and_then(Json::as_str) {
        Some("email") => 0.5,
        Some("edi") => -0.4,
        _ => 0.0,
    };
    -1.2 + 0.3 * (number("amount", 1000.0) + 1.0).ln() / 3.0 - 0.0003 * number("tenure_days", 30.0)
        + 1.1 * number("utilisation", 1.0)
        + 0.25 * number("rating", 0.0)
        + sector
        + channel
}

fn training_rows(numeric: bool) -> Vec<StoredExample> {
    let mut rng = ChaCha8Rng::seed_from_u64(20261202);
    (0..2400)
        .map(|i| {
            let features = features(&mut rng, i);
            let s = signal(&features);
            let label = if numeric {
                10.0 * s + rng.gen_range(-3.0..3.0)
            } else {
                f64::from(u8::from(rng.gen_bool(1.0 / (1.0 + (-s).exp()))))
            };
            StoredExample {
                monitoring: Default::default(),
                id: format!("t{i}"),
                event_time: 1_780_000_000_000 + i as i64 * 60_000,
                label,
                features,
            }
        })
        .collect()
}

fn train(config: &Config) -> Model {
    let numeric = config.label.kind == understudy::schema::LabelKind::Number;
    let run = understudy::offline::train(config, training_rows(numeric));
    run.output
        .candidate
        .unwrap_or_else(|| panic!("no model: {:?}", run.output.entry.reason))
}

/// Writes `model.pmml` and `rows.csv` (features, `accepted`, the service's `expected` output)
/// into `dir`, and returns how many rows the service accepted and refused.
fn write_case(dir: &Path, model: &Model, config: &Config) -> (usize, usize) {
    let schema = config.schema();
    std::fs::create_dir_all(dir).unwrap();
    std::fs::write(dir.join("model.pmml"), to_pmml(model, &schema).unwrap()).unwrap();

    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let mut requests: Vec<Map<String, Json>> = (0..ROWS).map(|i| features(&mut rng, i)).collect();
    requests.extend(refused_requests());
    let names = schema.feature_names();
    let mut csv = csv::Writer::from_path(dir.join("rows.csv")).unwrap();
    let mut header = names.clone();
    header.extend(["accepted".into(), "expected".into()]);
    csv.write_record(&header).unwrap();
    let (mut accepted, mut refused_count) = (0, 0);
    let mut missing = vec![0usize; names.len()];
    let mut categories_seen = std::collections::BTreeSet::new();
    for request in &requests {
        // The scoring path's own parser, on the JSON text a caller would send.
        let text = serde_json::to_string(request).unwrap();
        let (flag, expected) = match schema.parse_row_text(&text) {
            Ok(row) => {
                accepted += 1;
                ("1", format!("{:?}", model.score(&row).output))
            }
            Err(_) => {
                refused_count += 1;
                ("0", String::new())
            }
        };
        let mut record: Vec<String> = names
            .iter()
            .enumerate()
            .map(|(j, name)| match request.get(name) {
                None | Some(Json::Null) => {
                    missing[j] += usize::from(flag == "1");
                    String::new()
                }
                Some(Json::String(s)) => {
                    categories_seen.insert(s.clone());
                    s.clone()
                }
                Some(v) => format!("{:?}", v.as_f64().unwrap()),
            })
            .collect();
        record.extend([flag.to_owned(), expected]);
        csv.write_record(&record).unwrap();
    }
    csv.flush().unwrap();
    // The rows cover what the export must get right: each nullable feature missing in many
    // accepted rows, and every declared category.
    for (j, name) in names.iter().enumerate() {
        if ["amount", "tenure_days", "rating", "channel"].contains(&name.as_str()) {
            assert!(
                missing[j] > 50,
                "`{name}` missing in only {} rows",
                missing[j]
            );
        }
    }
    for feature in schema.features() {
        for category in &feature.categories {
            assert!(categories_seen.contains(category), "{category} never sent");
        }
    }
    (accepted, refused_count)
}

/// The venv's Python with the evaluator, or why there is none.
fn evaluator_python() -> Result<PathBuf, String> {
    if let Ok(python) = std::env::var("UNDERSTUDY_PMML_PYTHON") {
        return Ok(PathBuf::from(python));
    }
    // CARGO_TARGET_TMPDIR is <target>/tmp; the venv is <target>/pmml-venv.
    let target = Path::new(env!("CARGO_TARGET_TMPDIR")).parent().unwrap();
    let python = target.join("pmml-venv/bin/python");
    if !python.exists() {
        return Err(format!(
            "{} is missing; run `bash tests/pmml/setup.sh`",
            python.display()
        ));
    }
    Ok(python)
}

#[test]
fn an_independent_pmml_evaluator_reproduces_every_exported_family() {
    let python = match evaluator_python() {
        Ok(python) => python,
        Err(why) if std::env::var_os("CI").is_some() => {
            panic!("the PMML evaluator must run in CI: {why}")
        }
        Err(why) => {
            eprintln!("skipping the PMML evaluator check: {why}");
            return;
        }
    };
    let cases = [
        (
            "logistic-l2",
            "binary",
            "family = \"logistic\"\npenalty = \"l2\"\nlambda = [0.005]",
        ),
        (
            "logistic-elastic-net",
            "binary",
            "family = \"logistic\"\npenalty = \"elastic_net\"\nl1_ratio = [0.5]\nlambda = [0.02]",
        ),
        (
            "linear-numeric",
            "number",
            "family = \"linear\"\npenalty = \"elastic_net\"\nl1_ratio = [0.3]\nlambda = [0.05]",
        ),
        (
            "decision-tree",
            "binary",
            "family = \"decision_tree\"\nmax_depth = [6]\nmin_leaf = [10]",
        ),
        (
            "random-forest",
            "binary",
            "family = \"random_forest\"\ntrees = [40]\nmax_depth = [5]\nmin_leaf = [4]",
        ),
    ];
    let temp = tempfile::tempdir().unwrap();
    let mut dirs = Vec::new();
    let mut refused_expected = Vec::new();
    for (name, label, family) in cases {
        let config = config(label, family);
        let model = train(&config);
        if name == "logistic-elastic-net" {
            let Some(c) = model.coefficients() else {
                panic!("linear")
            };
            assert!(
                c.columns.iter().any(|c| c.standardized == 0.0),
                "the elastic net should zero some coefficients at this lambda"
            );
        }
        let dir = temp.path().join(name);
        let (accepted, refused) = write_case(&dir, &model, &config);
        assert!(accepted >= 1000, "{name}: only {accepted} rows accepted");
        assert_eq!(
            refused,
            refused_requests().len(),
            "{name}: each invalid row is refused"
        );
        refused_expected.push(refused);
        dirs.push(dir);
    }

    let output = Command::new(&python)
        .arg(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/pmml/evaluate.py"
        ))
        .args(&dirs)
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert!(
        output.status.success(),
        "evaluate.py failed:\n{stdout}\n{}",
        String::from_utf8_lossy(&output.stderr)
    );
    let reports: Vec<Json> = stdout
        .lines()
        .map(|line| serde_json::from_str(line).unwrap())
        .collect();
    assert_eq!(reports.len(), cases.len() + 1, "{stdout}");
    for ((report, (name, ..)), refused) in reports.iter().zip(cases).zip(refused_expected) {
        eprintln!("{report}");
        assert_eq!(report["case"], name);
        assert_eq!(report["xsd_valid"], true, "{name}: {report}");
        assert_eq!(report["failure_count"], 0, "{name}: {report}");
        assert!(
            report["rows_compared"].as_u64().unwrap() >= 1000,
            "{name}: {report}"
        );
        let diff = report["max_abs_diff"].as_f64().unwrap();
        assert!(
            diff <= TOLERANCE,
            "{name}: max |difference| {diff}: {report}"
        );
        assert_eq!(report["refused_rows"], refused, "{name}: {report}");
        assert_eq!(
            report["refused_as_invalid"], refused,
            "{name}: the evaluator scored a row the service refuses: {report}"
        );
    }
    // The outputs vary (a constant model would agree trivially), and the forest has leaves
    // with a tie, where the service's trees vote 0.
    for report in &reports[..cases.len()] {
        assert!(
            report["distinct_outputs"].as_u64().unwrap() > 20,
            "{report}"
        );
    }
    assert!(
        reports[4]["even_leaves"].as_u64().unwrap() > 0,
        "{}",
        reports[4]
    );
    eprintln!("{}", reports.last().unwrap());
}

fn understudy(args: &[&str], cwd: &Path) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_understudy"))
        .args(args)
        .current_dir(cwd)
        .output()
        .unwrap()
}

/// A kNN model on the same features as `model`, stored beside it: a family with no PMML form.
fn store_a_knn_model(dir: &Path, like: &Model) -> String {
    use understudy::model::family::KnnParams;
    use understudy::model::{Estimator, Setting};
    use understudy::store::Store;
    let p = like.preprocessor.width();
    let x: Vec<f64> = (0..10 * p).map(|v| (v % 7) as f64).collect();
    let y: Vec<u8> = (0..10).map(|i| (i % 2) as u8).collect();
    let setting = Setting::Knn(KnnParams { k: 3 });
    let estimator = Estimator::fit_family(&setting, &x, p, &y).unwrap();
    let knn = Model::new(
        99,
        like.created_at,
        setting,
        like.target,
        like.preprocessor.clone(),
        estimator,
        like.trained.clone(),
    );
    let store = crate::helpers::open_store(dir);
    store.put_model(&knn).unwrap();
    knn.id
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn models_export_over_http_and_from_the_command_line() {
    let temp = tempfile::tempdir().unwrap();
    let dir = temp.path().to_owned();
    let config = test_config(&dir);
    let schema = config.schema();
    let app = spawn_app_with(config.clone()).await;
    let id = app.with_first_model().await;

    let response = app
        .client
        .get(app.url(&format!("/v1/models/{id}/pmml")))
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 200);
    assert_eq!(response.headers()["content-type"], "application/xml");
    let document = response.text().await.unwrap();
    let (_, detail) = app.get(&format!("/v1/models/{id}")).await;
    let model: Model = serde_json::from_value(detail["model"].clone()).unwrap();
    assert_eq!(document, to_pmml(&model, &schema).unwrap());
    assert!(document.contains("<PMML xmlns=\"http://www.dmg.org/PMML-4_4\" version=\"4.4\">"));
    assert!(
        document.contains("normalizationMethod=\"logit\""),
        "{document}"
    );

    let (status, body) = app.get("/v1/models/m-9-00000000/pmml").await;
    assert_eq!(status, 404, "{body}");
    assert!(body["detail"].as_str().unwrap().contains("m-9-00000000"));

    // From the running server: the active model by default, to a file.
    let (base, cwd) = (app.base.clone(), dir.clone());
    let out = tokio::task::spawn_blocking(move || {
        understudy(&["export", "--server", &base, "--out", "remote.pmml"], &cwd)
    })
    .await
    .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(
        std::fs::read_to_string(dir.join("remote.pmml")).unwrap(),
        document
    );
    app.stop().await;

    // From the store on disk, to stdout; a kNN model is refused with the reason.
    let store_dir = dir.to_str().unwrap().to_owned();
    let out = understudy(&["export", "--data", &store_dir], &dir);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(String::from_utf8(out.stdout).unwrap(), document);
    let knn = store_a_knn_model(&dir, &model);
    let out = understudy(&["export", "--data", &store_dir, "--model", &knn], &dir);
    assert!(!out.status.success());
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains(&knn) && stderr.contains("knn models cannot be exported as PMML"),
        "{stderr}"
    );

    // Over HTTP the same refusal is a 409 problem.
    let app = spawn_app_with(config).await;
    let (status, body) = app.get(&format!("/v1/models/{knn}/pmml")).await;
    assert_eq!(status, 409, "{body}");
    assert_eq!(body["type"], "/problems/not-exportable");
    assert!(body["detail"].as_str().unwrap().contains("knn"), "{body}");
    app.stop().await;
}

#[test]
fn a_model_file_from_train_exports_as_the_service_would() {
    let dir = tempfile::tempdir().unwrap();
    crate::cli::write_csv(&dir.path().join("rows.csv"), 1200, false);
    let out = understudy(
        &["train", "--data", "rows.csv", "--model-out", "model.json"],
        dir.path(),
    );
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let out = understudy(&["export", "--model-file", "model.json"], dir.path());
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let file: Json =
        serde_json::from_slice(&std::fs::read(dir.path().join("model.json")).unwrap()).unwrap();
    let model: Model = serde_json::from_value(file["model"].clone()).unwrap();
    let schema = Config::embedded_default().schema();
    assert_eq!(
        String::from_utf8(out.stdout).unwrap(),
        to_pmml(&model, &schema).unwrap()
    );

    let out = understudy(&["export", "--model-file", "rows.csv"], dir.path());
    assert!(!out.status.success());
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("rows.csv is not JSON"),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}
