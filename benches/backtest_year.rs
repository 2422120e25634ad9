//! A year of daily steps on 100,000 rows: `understudy backtest` end to end, as its own process.
//!
//! `cargo bench --bench backtest_year` writes an invented history to `target/bench-data`
//! once (the demo scenario's invoices, one every 5.26 minutes for 365 days, the world
//! changing from `Regime::Before` to `Regime::After` at row 50,000), then times, with the
//! release binary:
//!
//! 1. the baseline: `understudy train` on the same CSV (one run on the latest window), and
//! 2. `understudy backtest --step 1d --label-delay 7d` with the embedded default config (a run
//!    at every step: `schedule.every` is 6 h), and, with `UNDERSTUDY_BENCH_SHARES=1`, again
//!    with `training.window_shares = [1.0, 0.5, 0.25]`.
//!
//! It prints wall and CPU seconds (the children's, from `getrusage`), the backtest's cost in
//! baseline runs, and the report's totals and recovery. No timing is asserted.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use understudy::demo::scenario::{labeled_csv_regimes, Regime};

const ROWS: usize = 100_000;
const CHANGE_AT: usize = 50_000;
const YEAR_MS: i64 = 365 * 24 * 3600 * 1000;

fn data_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-data/backtest")
}

fn write_history(path: &Path) {
    if path.exists() {
        return;
    }
    std::fs::create_dir_all(path.parent().expect("a parent")).expect("bench data dir");
    let mut rng = ChaCha8Rng::seed_from_u64(2026);
    // A year ending a few days ago (event times may not lie in the future); the rows
    // themselves depend only on the seed.
    let start = understudy::time::now_ms() - YEAR_MS - 5 * 24 * 3600 * 1000;
    let regimes = [
        (Regime::Before, CHANGE_AT),
        (Regime::After, ROWS - CHANGE_AT),
    ];
    let text = labeled_csv_regimes(&mut rng, &regimes, start, YEAR_MS / ROWS as i64);
    std::fs::write(path, text).expect("write the history");
}

/// CPU seconds (user + system) of the children waited for so far.
fn children_cpu() -> f64 {
    // SAFETY: getrusage fills the struct it is given.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    unsafe { libc::getrusage(libc::RUSAGE_CHILDREN, &mut usage) };
    let seconds = |t: libc::timeval| t.tv_sec as f64 + t.tv_usec as f64 / 1e6;
    seconds(usage.ru_utime) + seconds(usage.ru_stime)
}

/// Runs the binary; returns (wall seconds, CPU seconds, stdout).
fn timed(args: &[&str]) -> (f64, f64, Vec<u8>) {
    let cpu = children_cpu();
    let started = Instant::now();
    let out = Command::new(env!("CARGO_BIN_EXE_understudy"))
        .args(args)
        .current_dir(data_dir())
        .output()
        .expect("run understudy");
    let wall = started.elapsed().as_secs_f64();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    (wall, children_cpu() - cpu, out.stdout)
}

fn backtest(label: &str, config: Option<&str>, baseline: f64) {
    let mut args = vec![
        "backtest",
        "--csv",
        "history.csv",
        "--step",
        "1d",
        "--label-delay",
        "7d",
        "--json",
    ];
    let report_file = format!("report-{label}.html");
    args.extend(["--report", &report_file]);
    if let Some(config) = config {
        args.extend(["--config", config]);
    }
    let (wall, cpu, stdout) = timed(&args);
    let report: serde_json::Value = serde_json::from_slice(&stdout).expect("the JSON report");
    println!(
        "backtest ({label}): {wall:.1} s wall, {cpu:.1} s CPU ({:.2} cores busy), {:.0} × the baseline run; {} steps, {} periods scored",
        cpu / wall,
        wall / baseline,
        report["steps"],
        report["periods"].as_array().map_or(0, Vec::len)
    );
    for policy in ["configured", "never_retrained", "always_promote"] {
        let t = &report["totals"][policy];
        let r = &report["recovery"]["policies"][policy];
        println!(
            "  {policy:<16} mean auc {:.4}, mean log loss {:.4}, {} runs, {} promotions; recovery: {} rows{}",
            t["mean_metric"].as_f64().unwrap_or(f64::NAN),
            t["mean_log_loss"].as_f64().unwrap_or(f64::NAN),
            t["runs"],
            t["promotions"],
            r["rows"],
            if r["recovered"] == true { "" } else { " (not recovered)" }
        );
    }
    println!(
        "  largest change at period {} ({}), target {:.4}",
        report["recovery"]["period"],
        report["recovery"]["at"],
        report["recovery"]["target"].as_f64().unwrap_or(f64::NAN)
    );
}

fn main() {
    let dir = data_dir();
    write_history(&dir.join("history.csv"));
    let (baseline, cpu, _) = timed(&["train", "--csv", "history.csv", "--json"]);
    println!(
        "baseline: one `understudy train` on the same CSV (read 100,000 rows, one run on the latest 4,800): {baseline:.2} s wall, {cpu:.2} s CPU"
    );
    backtest("default", None, baseline);
    if std::env::var_os("UNDERSTUDY_BENCH_SHARES").is_some() {
        let config = understudy::config::DEFAULT_CONFIG_TOML.replace(
            "# window_shares = [1.0, 0.5, 0.25]",
            "window_shares = [1.0, 0.5, 0.25]",
        );
        std::fs::write(dir.join("shares.toml"), config).expect("write the config");
        backtest("window shares", Some("shares.toml"), baseline);
    }
}
