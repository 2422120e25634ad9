//! Backtests on invented scenarios (the demo's `Regime::Before` and `After`), generated here.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::*;
use crate::demo::scenario::{invoice, Regime};
use crate::model::{FamilyGrid, PenalizedGrid, Penalty};

const MINUTE: Millis = 60_000;

/// Labeled invoices, one a minute, regime by regime; with each row the data-generating
/// model's probability.
fn history(seed: u64, regimes: &[(Regime, usize)]) -> (Vec<Example>, Vec<f64>) {
    let schema = Config::embedded_default().schema();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let start = 1_790_000_000_000;
    let mut examples = vec![];
    let mut truth = vec![];
    for &(regime, rows) in regimes {
        for _ in 0..rows {
            let inv = invoice(&mut rng, regime);
            let label = inv.draw_label(&mut rng);
            let i = examples.len() as Millis;
            examples.push(Example {
                id: format!("inv-{i}"),
                event_time: start + i * MINUTE,
                row: schema.parse_row(&inv.features).unwrap(),
                label: f64::from(label),
            });
            truth.push(inv.probability);
        }
    }
    (examples, truth)
}

/// A small, quick policy: a run at every step (no schedule), an elastic-net path of a few
/// lambdas, 3 folds once.
fn small_config(window_rows: usize, shares: &[f64]) -> Config {
    let mut config = Config::embedded_default();
    config.schedule.every = None;
    config.schedule.new_labels = None;
    config.training.window_rows = window_rows;
    config.training.window_shares = shares.to_vec();
    config.training.folds = 3;
    config.training.repeats = 1;
    config.training.families = vec![FamilyGrid::Logistic(PenalizedGrid {
        penalty: Penalty::ElasticNet,
        l1_ratio: Some(vec![0.5]),
        lambda: None,
        lambda_count: 6,
        lambda_min_ratio: 0.01,
    })];
    config.gate.margin = 0.01;
    config
}

fn options(step_rows: usize) -> Options {
    Options {
        step: Step::Rows(step_rows),
        label_delay: 0,
        start: None,
        threads: 2,
        recovery_rows: 1500,
    }
}

#[test]
fn scratch() {
    for seed in [11, 12, 13] {
    let (examples, _) = history(seed, &[(Regime::Before, 4000), (Regime::After, 4000)]);
    for shares in [vec![1.0], vec![1.0, 0.5, 0.25]] {
        let started = std::time::Instant::now();
        let mut config = small_config(3000, &shares);
        config.training.min_rows = 1500;
        let report = run(&config, examples.clone(), &options(250), &|_, _| {}).unwrap();
        let r = report.recovery.as_ref().unwrap();
        let promos: Vec<usize> = report.promotions.iter().filter(|p| p.policy == Policy::Configured).map(|p| p.period).collect();
        eprintln!("seed {seed} {:?}: {:?} change {} target {:.4} rows {} {} {} promotions at {promos:?} runs {}", shares, started.elapsed(), r.period, r.target, r.policies.configured.rows, r.policies.never_retrained.rows, r.policies.always_promote.rows, report.totals.configured.runs);
    }
    }
}
