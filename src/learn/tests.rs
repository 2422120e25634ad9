//! Behaviour of a whole run on synthetic data from the demo scenario.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::*;
use crate::config::Config;
use crate::demo::scenario::{invoice, Regime};

fn examples(schema: &Schema, seed: u64, start: Millis, n: usize, regime: Regime) -> Vec<Example> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    (0..n)
        .map(|i| {
            let inv = invoice(&mut rng, regime);
            Example {
                id: format!("e{seed}-{i}"),
                event_time: start + i as Millis,
                row: schema
                    .parse_row(&inv.features)
                    .expect("scenario rows fit the schema"),
                label: inv.draw_label(&mut rng),
            }
        })
        .collect()
}

fn plan<'a>(
    config: &'a Config,
    schema: &'a Schema,
    active: Option<&'a Model>,
    seq: u64,
) -> RunPlan<'a> {
    RunPlan {
        run_id: format!("r-{seq}"),
        trigger: Trigger::Manual,
        model_seq: seq,
        now: 0,
        schema,
        training: &config.training,
        gate: &config.gate,
        active,
        skipped: 0,
    }
}

#[test]
fn the_first_run_that_passes_the_guardrails_is_promoted() {
    let config = Config::embedded_default();
    let schema = Schema::from_config(&config);
    let data = examples(&schema, 1, 0, 2000, Regime::Before);
    let out = run_once(&plan(&config, &schema, None, 1), &data);
    assert_eq!(out.entry.verdict, Verdict::Promoted, "{}", out.entry.reason);
    let model = out.candidate.unwrap();
    assert_eq!(out.entry.active_after.as_deref(), Some(model.id.as_str()));
    assert_eq!(out.entry.window.training_rows, 1500);
    assert_eq!(out.entry.window.holdout_rows, 500);
    assert_eq!(out.entry.search.len(), 3);
    assert!(out
        .entry
        .search
        .iter()
        .all(|r| r.folds.len() == 5 && r.cv_mean.is_some()));
    // The training cutoff is the last training row; the holdout is strictly later.
    assert_eq!(model.trained.cutoff, data[1499].event_time);
    let auc = model.holdout.unwrap().auc.unwrap();
    assert!(auc > 0.7, "a real signal is learnt: holdout AUC {auc}");
}

#[test]
fn same_world_keeps_the_incumbent_and_a_changed_world_promotes() {
    let config = Config::embedded_default();
    let schema = Schema::from_config(&config);
    let first = examples(&schema, 2, 0, 2400, Regime::Before);
    let active = run_once(&plan(&config, &schema, None, 1), &first)
        .candidate
        .unwrap();

    let mut same = first.clone();
    same.extend(examples(&schema, 3, 10_000, 2400, Regime::Before));
    let out = run_once(
        &plan(&config, &schema, Some(&active), 2),
        &same[same.len() - 4800..],
    );
    assert_eq!(out.entry.verdict, Verdict::Kept, "{}", out.entry.reason);
    assert!(out.entry.gain.unwrap() < config.gate.margin);
    assert_eq!(out.entry.active_after.as_deref(), Some(active.id.as_str()));

    let mut changed = first;
    changed.extend(examples(&schema, 4, 10_000, 4800, Regime::After));
    let out = run_once(
        &plan(&config, &schema, Some(&active), 3),
        &changed[changed.len() - 4800..],
    );
    assert_eq!(out.entry.verdict, Verdict::Promoted, "{}", out.entry.reason);
    let gain = out.entry.gain.unwrap();
    assert!(gain >= config.gate.margin, "gain {gain}");
    assert_eq!(
        out.entry.candidate_gate.as_ref().unwrap().rows,
        out.entry.active_gate.as_ref().unwrap().rows
    );
}

#[test]
fn a_gain_that_meets_the_margin_but_not_the_significance_level_keeps_the_incumbent() {
    let mut config = Config::embedded_default();
    let schema = Schema::from_config(&config);
    let first = examples(&schema, 2, 0, 2400, Regime::Before);
    let active = run_once(&plan(&config, &schema, None, 1), &first)
        .candidate
        .unwrap();
    let mut changed = first;
    changed.extend(examples(&schema, 4, 10_000, 4800, Regime::After));
    let window = &changed[changed.len() - 4800..];

    let out = run_once(&plan(&config, &schema, Some(&active), 2), window);
    assert_eq!(out.entry.verdict, Verdict::Promoted, "{}", out.entry.reason);
    assert_eq!(out.entry.test.as_deref(), Some("delong"));
    let p = out.entry.p_value.unwrap();
    assert!(p < 0.05 && p > 0.0, "p = {p}");

    // The same evidence held to an impossibly strict level is not enough.
    config.gate.alpha = p / 10.0;
    let out = run_once(&plan(&config, &schema, Some(&active), 3), window);
    assert_eq!(out.entry.verdict, Verdict::Kept);
    assert!(
        out.entry.reason.contains("not significant"),
        "{}",
        out.entry.reason
    );

    // Loss metrics use the paired test on per-row losses.
    config.gate.alpha = 0.05;
    config.gate.metric = crate::config::GateMetric::LogLoss;
    config.gate.margin = 0.0;
    let out = run_once(&plan(&config, &schema, Some(&active), 4), window);
    assert_eq!(out.entry.test.as_deref(), Some("paired_loss"));
    assert_eq!(out.entry.verdict, Verdict::Promoted, "{}", out.entry.reason);
}

#[test]
fn the_incumbent_is_judged_only_on_rows_after_its_cutoff() {
    let config = Config::embedded_default();
    let schema = Schema::from_config(&config);
    let data = examples(&schema, 5, 0, 2000, Regime::Before);
    // Trained on rows 0..1500: its cutoff is row 1499's event time.
    let active = run_once(&plan(&config, &schema, None, 1), &data)
        .candidate
        .unwrap();
    // A run over rows 0..1600 holds out rows 1200..1600, of which only 1500..1600 are later
    // than the incumbent's cutoff: 100 rows, fewer than gate.min_rows = 200.
    let out = run_once(&plan(&config, &schema, Some(&active), 2), &data[..1600]);
    assert_eq!(out.entry.window.holdout_rows, 400);
    assert_eq!(out.entry.window.gate_rows, Some(100));
    assert_eq!(out.entry.verdict, Verdict::Kept);
    assert!(
        out.entry.reason.contains("gate.min_rows"),
        "{}",
        out.entry.reason
    );
    assert!(
        out.entry.active_gate.is_none(),
        "the incumbent was not scored on rows it trained on"
    );

    // With a lower bar the comparison runs on exactly those 100 rows, for both models.
    let mut lenient = config.clone();
    lenient.gate.min_rows = 50;
    let out = run_once(&plan(&lenient, &schema, Some(&active), 3), &data[..1600]);
    assert_eq!(out.entry.active_gate.as_ref().unwrap().rows, 100);
    assert_eq!(out.entry.candidate_gate.as_ref().unwrap().rows, 100);
}

#[test]
fn guardrails_reject_too_little_data_and_a_single_class() {
    let config = Config::embedded_default();
    let schema = Schema::from_config(&config);
    let data = examples(&schema, 7, 0, 300, Regime::Before);
    let out = run_once(&plan(&config, &schema, None, 1), &data);
    assert_eq!(out.entry.verdict, Verdict::Rejected);
    assert!(out.entry.reason.contains("training.min_rows"));
    assert!(out.candidate.is_none());

    let mut one_class = examples(&schema, 8, 0, 1000, Regime::Before);
    for e in &mut one_class {
        e.label = 0;
    }
    let out = run_once(&plan(&config, &schema, None, 1), &one_class);
    assert_eq!(out.entry.verdict, Verdict::Rejected, "{}", out.entry.reason);
}
