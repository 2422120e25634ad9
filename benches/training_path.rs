//! Training speed: the elastic-net logistic path with 5-fold cross-validation on synthetic
//! data, against scikit-learn's `LogisticRegressionCV` on the same rows in the same run.
//!
//! `cargo bench --bench training_path` runs criterion on 100,000 × 30, then times one
//! cross-validated path per configuration here and in scikit-learn
//! (`benches/reference/sklearn_path_timing.py`, single-threaded BLAS) and prints the ratio.
//! `UNDERSTUDY_BENCH_LARGE=1` adds 1,000,000 × 30. The data are invented: standard-normal
//! columns, ten of them with a true effect, written to `target/bench-data` so both sides read
//! identical numbers. `UNDERSTUDY_BENCH_SKLEARN=0` skips scikit-learn (our side only);
//! `UNDERSTUDY_BENCH_STEPS=1` prints the Newton steps per lambda of each fold.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use criterion::{criterion_group, Criterion};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use understudy::learn::split::stratified_folds;
use understudy::metrics;
use understudy::model::elastic_net::{
    fit_path, lambda_max, lambda_path, Design, Response, SolverOptions,
};
use understudy::model::logistic::sigmoid;

const COLUMNS: usize = 30;
const FOLDS: usize = 5;
const LAMBDAS: usize = 10;
const MIN_RATIO: f64 = 1e-3;
const SEED: u64 = 7;

struct Data {
    x: Vec<f64>,
    y: Vec<f64>,
}

fn synthetic(n: usize) -> Data {
    let mut rng = ChaCha8Rng::seed_from_u64(SEED);
    let mut x = Vec::with_capacity(n * COLUMNS);
    let mut y = Vec::with_capacity(n);
    for _ in 0..n {
        let start = x.len();
        x.extend((0..COLUMNS).map(|_| -> f64 { StandardNormal.sample(&mut rng) }));
        let row = &x[start..];
        let z = -0.5
            + (0..10)
                .map(|j| row[j] * (0.8 - 0.15 * j as f64))
                .sum::<f64>();
        let u: f64 = rand::Rng::gen(&mut rng);
        y.push(f64::from(u8::from(u < sigmoid(z))));
    }
    Data { x, y }
}

/// The path's lambdas, from the whole data's lambda_max, as the service's search does.
fn path_for(data: &Data, l1_ratio: f64) -> Vec<f64> {
    let design = Design::from_rows(&data.x, COLUMNS);
    lambda_path(lambda_max(&design, &data.y, l1_ratio), LAMBDAS, MIN_RATIO)
}

/// Cross-validates the path on `FOLDS` stratified folds, picks the best mean AUC and refits on
/// all rows down to it: the work the service's search does for one family and `l1_ratio`.
fn cross_validated_path(data: &Data, l1_ratio: f64, lambdas: &[f64]) -> f64 {
    let labels = metrics::as_binary(&data.y);
    let fold_of = stratified_folds(&labels, FOLDS, SEED);
    let n = data.y.len();
    let mut auc_sum = vec![0.0; lambdas.len()];
    for fold in 0..FOLDS {
        let (train, valid): (Vec<usize>, Vec<usize>) = (0..n).partition(|&i| fold_of[i] != fold);
        let rows = |idx: &[usize]| -> Vec<f64> {
            idx.iter()
                .flat_map(|&i| data.x[i * COLUMNS..(i + 1) * COLUMNS].iter().copied())
                .collect()
        };
        let design = Design::from_rows(&rows(&train), COLUMNS);
        let y_train: Vec<f64> = train.iter().map(|&i| data.y[i]).collect();
        let x_valid = rows(&valid);
        let y_valid: Vec<u8> = valid.iter().map(|&i| labels[i]).collect();
        let points = fit_path(
            &design,
            &y_train,
            Response::Binomial,
            l1_ratio,
            lambdas,
            &SolverOptions::default(),
        )
        .expect("the path fits");
        if std::env::var("UNDERSTUDY_BENCH_STEPS").is_ok() {
            eprintln!(
                "fold {fold}: steps {:?} passes {}",
                points.iter().map(|p| p.newton_steps).collect::<Vec<_>>(),
                points.iter().map(|p| p.passes).sum::<usize>()
            );
        }
        for (k, point) in points.iter().enumerate() {
            let (b0, w) = design.to_input_scale(point.intercept, &point.weights);
            let scores: Vec<f64> = x_valid
                .chunks_exact(COLUMNS)
                .map(|z| b0 + w.iter().zip(z).map(|(a, b)| a * b).sum::<f64>())
                .collect();
            auc_sum[k] += metrics::auc(&scores, &y_valid).unwrap_or(0.5);
        }
    }
    let best = (0..lambdas.len())
        .max_by(|&a, &b| auc_sum[a].total_cmp(&auc_sum[b]))
        .unwrap_or(0);
    let design = Design::from_rows(&data.x, COLUMNS);
    let points = fit_path(
        &design,
        &data.y,
        Response::Binomial,
        l1_ratio,
        &lambdas[..=best],
        &SolverOptions::default(),
    )
    .expect("the final path fits");
    std::hint::black_box(points);
    auc_sum[best] / FOLDS as f64
}

fn bench_path(c: &mut Criterion) {
    let data = synthetic(100_000);
    let mut group = c.benchmark_group("cv_path_100k_x30");
    group.sample_size(10);
    for l1_ratio in [0.5, 0.0] {
        let lambdas = path_for(&data, l1_ratio);
        group.bench_function(format!("l1_ratio_{l1_ratio}"), |b| {
            b.iter(|| cross_validated_path(&data, l1_ratio, &lambdas))
        });
    }
    group.finish();
}

criterion_group!(benches, bench_path);

fn write_raw(dir: &Path, n: usize, data: &Data) -> (PathBuf, PathBuf) {
    std::fs::create_dir_all(dir).expect("bench data dir");
    let x_path = dir.join(format!("x_{n}x{COLUMNS}.f64"));
    let y_path = dir.join(format!("y_{n}.u8"));
    let x_bytes: Vec<u8> = data.x.iter().flat_map(|v| v.to_le_bytes()).collect();
    let y_bytes: Vec<u8> = data.y.iter().map(|&v| v as u8).collect();
    std::fs::write(&x_path, x_bytes).expect("write x");
    std::fs::write(&y_path, y_bytes).expect("write y");
    (x_path, y_path)
}

/// Times scikit-learn on the same rows; `None` (with a note) if Python or scikit-learn is
/// missing.
fn sklearn_seconds(
    x: &Path,
    y: &Path,
    l1_ratio: f64,
    lambdas: &[f64],
) -> Option<(f64, String, f64)> {
    let script =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("benches/reference/sklearn_path_timing.py");
    let lambdas_arg = lambdas
        .iter()
        .map(|l| format!("{l:e}"))
        .collect::<Vec<_>>()
        .join(",");
    let output = Command::new("python3")
        .env("OPENBLAS_NUM_THREADS", "1")
        .env("OMP_NUM_THREADS", "1")
        .arg(script)
        .args([
            "--x",
            &x.display().to_string(),
            "--y",
            &y.display().to_string(),
        ])
        .args(["--p", &COLUMNS.to_string(), "--folds", &FOLDS.to_string()])
        .args([
            "--l1-ratio",
            &l1_ratio.to_string(),
            "--lambdas",
            &lambdas_arg,
        ])
        .args(["--seed", &SEED.to_string()])
        .output()
        .ok()?;
    if !output.status.success() {
        eprintln!(
            "scikit-learn timing failed: {}",
            String::from_utf8_lossy(&output.stderr)
        );
        return None;
    }
    let line = String::from_utf8_lossy(&output.stdout);
    let json: serde_json::Value = serde_json::from_str(line.trim().lines().last()?).ok()?;
    let best_auc = json["cv_auc_mean_per_lambda"]
        .as_array()?
        .iter()
        .filter_map(serde_json::Value::as_f64)
        .fold(f64::NAN, f64::max);
    Some((
        json["seconds"].as_f64()?,
        json["solver"].as_str().unwrap_or("?").to_owned(),
        best_auc,
    ))
}

fn median(values: &mut [f64]) -> f64 {
    values.sort_by(f64::total_cmp);
    values.get(values.len() / 2).copied().unwrap_or(f64::NAN)
}

fn compare_with_scikit_learn() {
    let large = std::env::var("UNDERSTUDY_BENCH_LARGE").is_ok_and(|v| v == "1");
    let sizes: &[usize] = if large {
        &[100_000, 1_000_000]
    } else {
        &[100_000]
    };
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-data");
    let mut report = Vec::new();
    println!(
        "\nsame rows, same lambdas, {FOLDS} folds, one thread each, median of alternating rounds (ratio = ours / scikit-learn):"
    );
    for &n in sizes {
        let data = synthetic(n);
        let (x_path, y_path) = write_raw(&dir, n, &data);
        for l1_ratio in [0.5, 0.0] {
            let lambdas = path_for(&data, l1_ratio);
            // Alternate the two sides and take medians, so a slow spell of the shared machine
            // does not land on one side only. saga is slow enough to time once.
            let rounds = if l1_ratio > 0.0 { 1 } else { 3 };
            let skip = std::env::var("UNDERSTUDY_BENCH_SKLEARN").is_ok_and(|v| v == "0");
            let (mut ours_times, mut theirs_times) = (Vec::new(), Vec::new());
            let mut auc = f64::NAN;
            let mut reference = None;
            for _ in 0..rounds {
                let started = Instant::now();
                auc = cross_validated_path(&data, l1_ratio, &lambdas);
                ours_times.push(started.elapsed().as_secs_f64());
                if !skip {
                    reference = sklearn_seconds(&x_path, &y_path, l1_ratio, &lambdas);
                    if let Some((seconds, _, _)) = &reference {
                        theirs_times.push(*seconds);
                    }
                }
            }
            let ours = median(&mut ours_times);
            let reference =
                reference.map(|(_, solver, auc)| (median(&mut theirs_times), solver, auc));
            let (theirs, solver, their_auc) =
                reference.unwrap_or((f64::NAN, "unavailable".into(), f64::NAN));
            println!(
                "  {n:>9} x {COLUMNS}  l1_ratio {l1_ratio}: understudy {ours:8.2} s (best cv auc {auc:.4}), scikit-learn {solver} {theirs:8.2} s (best cv auc {their_auc:.4}), ratio {:.3}",
                ours / theirs
            );
            report.push(serde_json::json!({
                "rows": n, "columns": COLUMNS, "folds": FOLDS, "lambdas": lambdas.len(),
                "l1_ratio": l1_ratio, "understudy_seconds": ours, "sklearn_seconds": theirs,
                "sklearn_solver": solver, "ratio": ours / theirs,
                "understudy_best_cv_auc": auc, "sklearn_best_cv_auc": their_auc,
                "rounds": rounds,
            }));
        }
    }
    let out = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-reports");
    let _ = std::fs::create_dir_all(&out);
    let _ = std::fs::write(
        out.join("training_path.json"),
        serde_json::to_vec_pretty(&report).unwrap_or_default(),
    );
}

/// A field of `/proc/self/status` in bytes (`VmRSS`, `VmHWM`).
fn status_bytes(field: &str) -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|text| {
            text.lines()
                .find(|l| l.starts_with(field))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|kb| kb.parse::<u64>().ok())
        })
        .map_or(0, |kb| kb * 1024)
}

/// Gives freed memory back and restarts the peak-RSS counter (Linux `clear_refs` 5), so the
/// next `VmHWM` is the peak of what follows.
fn fresh_peak() -> u64 {
    // SAFETY: malloc_trim only returns free heap pages to the kernel.
    unsafe {
        libc::malloc_trim(0);
    }
    let _ = std::fs::write("/proc/self/clear_refs", "5");
    status_bytes("VmRSS:")
}

/// Peak resident memory `f` adds over what was resident before it.
fn peak_of<T>(f: impl FnOnce() -> T) -> (T, u64) {
    let before = fresh_peak();
    let value = f();
    (value, status_bytes("VmHWM:").saturating_sub(before))
}

/// Peak memory against the data matrix (rows × 30 × 8 bytes): the solver's path with its
/// fold copies, and the service's whole run (`learn::run_once`: preprocessing, the search over
/// folds, the holdout gate) on the same rows held as the service holds them.
fn memory_report() {
    use understudy::config::Config;
    use understudy::learn::{run_once, Example, RunPlan};
    use understudy::promotion::Trigger;
    use understudy::schema::Value;

    let large = std::env::var("UNDERSTUDY_BENCH_LARGE").is_ok_and(|v| v == "1");
    let sizes: &[usize] = if large {
        &[100_000, 1_000_000]
    } else {
        &[100_000]
    };
    let mut text = String::from(
        "[label]\nname = \"y\"\n\n[training]\nwindow_rows = 2000000\nholdout_fraction = 0.2\nfolds = 5\nrepeats = 1\nmin_rows = 500\n\n[[training.families]]\nfamily = \"logistic\"\npenalty = \"elastic_net\"\nl1_ratio = [0.5]\nlambda_count = 10\n\n[gate]\nmetric = \"auc\"\nmargin = 0.02\nmin_rows = 200\n",
    );
    for j in 0..COLUMNS {
        text.push_str(&format!(
            "\n[[features]]\nname = \"x{j:02}\"\nkind = \"number\"\nmin = -100\nmax = 100\n"
        ));
    }
    let config = Config::from_toml(&text).expect("valid memory bench config");
    let schema = config.schema();
    let mb = |b: u64| b as f64 / 1e6;
    println!(
        "
peak memory added, against the data matrix (rows x {COLUMNS} x 8 bytes):"
    );
    let mut report = Vec::new();
    for &n in sizes {
        let data = synthetic(n);
        let matrix = (n * COLUMNS * 8) as u64;
        let lambdas = path_for(&data, 0.5);
        let (_, solver_peak) = peak_of(|| cross_validated_path(&data, 0.5, &lambdas));
        let (examples, examples_bytes) = peak_of(|| {
            data.x
                .chunks_exact(COLUMNS)
                .zip(&data.y)
                .enumerate()
                .map(|(i, (x, &y))| Example {
                    monitoring: Default::default(),
                    id: format!("e{i}").into(),
                    event_time: i as i64 * 1000,
                    row: x.iter().map(|&v| Value::Number(v)).collect(),
                    label: y,
                })
                .collect::<Vec<_>>()
        });
        let plan = RunPlan {
            run_id: "memory".into(),
            trigger: Trigger::Manual,
            model_seq: 1,
            now: n as i64 * 1000,
            schema: &schema,
            target: config.label.kind,
            training: &config.training,
            gate: &config.gate,
            guardrails: &config.guardrails,
            active: None,
            skipped: 0,
            config_digest: config.digest.clone(),
        };
        let (output, run_peak) = peak_of(|| run_once(&plan, &examples));
        assert!(output.candidate.is_some(), "{:?}", output.entry.reason);
        drop(examples);
        println!(
            "  {n:>9} rows: matrix {:8.1} MB | solver path, 5 folds: {:8.1} MB ({:.2}x) | examples as the service holds them: {:8.1} MB ({:.2}x) | whole run on them: {:8.1} MB ({:.2}x)",
            mb(matrix),
            mb(solver_peak),
            solver_peak as f64 / matrix as f64,
            mb(examples_bytes),
            examples_bytes as f64 / matrix as f64,
            mb(run_peak),
            run_peak as f64 / matrix as f64,
        );
        report.push(serde_json::json!({
            "rows": n, "matrix_bytes": matrix, "solver_path_peak_bytes": solver_peak,
            "examples_bytes": examples_bytes, "run_peak_bytes": run_peak,
        }));
    }
    let out = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-reports");
    let _ = std::fs::create_dir_all(&out);
    let _ = std::fs::write(
        out.join("training_memory.json"),
        serde_json::to_vec_pretty(&report).unwrap_or_default(),
    );
}

fn main() {
    if std::env::var("UNDERSTUDY_BENCH_MEMORY_ONLY").is_ok_and(|v| v == "1") {
        memory_report();
        return;
    }
    benches();
    Criterion::default().configure_from_args().final_summary();
    compare_with_scikit_learn();
    memory_report();
}
