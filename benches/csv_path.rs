//! A labeled CSV into the rows a run reads: 100,000 rows × 30 numeric features (plus `id`,
//! `event_time` and the label), the path `understudy train` takes before any fitting.
//!
//! `cargo bench --bench csv_path` writes the file to `target/bench-data` once, then times, in
//! alternating rounds (median of 5), the CSV read straight into schema-order rows
//! (`cli::read_csv_examples`, what `train` does) against the map-per-row path (`cli::read_csv`
//! into named maps, as `import` stores them, then `Schema::parse_row` per map: what `train`
//! did before). Prints seconds and the ratio; no timing is asserted.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::Instant;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use understudy::config::Config;
use understudy::learn::Example;
use understudy::schema::Schema;

const ROWS: usize = 100_000;
const COLUMNS: usize = 30;

fn config() -> Config {
    let mut text = String::from(
        "[label]\nname = \"y\"\n\n[training]\nwindow_rows = 1000000\nholdout_fraction = 0.2\nfolds = 5\nmin_rows = 500\n\n[[training.families]]\nfamily = \"logistic\"\npenalty = \"l2\"\nlambda_count = 10\n\n[gate]\nmetric = \"auc\"\nmargin = 0.02\nmin_rows = 200\n",
    );
    for j in 0..COLUMNS {
        text.push_str(&format!(
            "\n[[features]]\nname = \"x{j:02}\"\nkind = \"number\"\nmin = -100\nmax = 100\n"
        ));
    }
    Config::from_toml(&text).expect("valid bench config")
}

fn write_csv(path: &Path) {
    if path.exists() {
        return;
    }
    std::fs::create_dir_all(path.parent().expect("a parent")).expect("bench data dir");
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut out = std::io::BufWriter::new(std::fs::File::create(path).expect("create csv"));
    let names: Vec<String> = (0..COLUMNS).map(|j| format!("x{j:02}")).collect();
    writeln!(out, "id,event_time,{},y", names.join(",")).expect("write");
    let start = understudy::time::now_ms() - 200 * 24 * 3600 * 1000;
    for i in 0..ROWS {
        let values: Vec<String> = (0..COLUMNS)
            .map(|_| {
                let v: f64 = StandardNormal.sample(&mut rng);
                format!("{v}")
            })
            .collect();
        writeln!(
            out,
            "r{i},{},{},{}",
            understudy::time::to_rfc3339(start + i as i64 * 60_000),
            values.join(","),
            i % 2
        )
        .expect("write");
    }
}

/// What `train` did before: a named map per row, then the map validated into a row.
fn through_maps(path: &Path, schema: &Schema) -> Vec<Example> {
    understudy::cli::read_csv(path, schema)
        .expect("valid csv")
        .into_iter()
        .map(|e| Example {
            row: schema.parse_row(&e.features).expect("valid row"),
            id: e.id.into(),
            event_time: e.event_time,
            label: e.label,
            monitoring: e.monitoring,
        })
        .collect()
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() {
    let path: PathBuf =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-data/labeled_100000x30.csv");
    write_csv(&path);
    let schema = config().schema();
    let bytes = std::fs::metadata(&path).map(|m| m.len()).unwrap_or(0);
    let (mut direct, mut maps) = (Vec::new(), Vec::new());
    for _ in 0..5 {
        let started = Instant::now();
        let rows = understudy::cli::read_csv_examples(&path, &schema).expect("valid csv");
        direct.push(started.elapsed().as_secs_f64());
        assert_eq!(rows.len(), ROWS);
        drop(rows);
        let started = Instant::now();
        let rows = through_maps(&path, &schema);
        maps.push(started.elapsed().as_secs_f64());
        assert_eq!(rows.len(), ROWS);
    }
    let (direct, maps) = (median(direct), median(maps));
    println!(
        "{ROWS} x {COLUMNS} CSV ({:.1} MB) into rows, median of 5 alternating rounds: straight into schema order {direct:.3} s, through a map per row {maps:.3} s, ratio {:.3}",
        bytes as f64 / 1e6,
        direct / maps
    );
}
