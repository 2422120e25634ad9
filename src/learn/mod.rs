//! One retraining run: out-of-time split, cross-validated search, final fit, gate, verdict.
//!
//! [`run_once`] is pure computation over examples already read from the store ([`window`]
//! parses them): it returns a [`Proposal`], the promotion-log entry with its evidence and,
//! when one was fitted, the candidate model. Learning proposes; the registry decides what the
//! proposal becomes (promoted, shadowing, kept while frozen) and applies it. Tests call
//! `run_once` directly.

pub mod search;
pub mod segments;
pub mod split;
pub mod window;
pub mod windows;

pub use window::{window, Window};

use std::time::Instant;

use crate::config::{GateConfig, GuardrailConfig, TrainingConfig};
use crate::metrics;
use crate::metrics::GateMetric;
use crate::metrics::Report;
use crate::model::elastic_net::{self, Design, SolverOptions};
use crate::model::{Estimator, FitSummary, Model, Preprocessor, Setting, TrainingFacts};
use crate::promotion::{
    Curves, DataWindow, Entry, GateCurves, Provenance, SettingResult, Trigger, Verdict,
};
use crate::schema::LabelKind;
use crate::schema::{Row, Schema};
use crate::time::Millis;

/// One labeled row with its event time.
#[derive(Debug, Clone, PartialEq)]
pub struct Example {
    /// Inline up to 24 bytes (no allocation of its own for a short id): a window holds one
    /// per row.
    pub id: compact_str::CompactString,
    pub event_time: Millis,
    pub row: Row,
    /// 0/1 for binary labels, the target for numeric ones.
    pub label: f64,
    /// Its monitoring attributes: never features; the adverse-impact check groups by one.
    pub monitoring: std::collections::BTreeMap<String, String>,
}

/// Everything a run needs besides its examples.
pub struct RunPlan<'a> {
    pub run_id: String,
    pub trigger: Trigger,
    /// Sequence number for the candidate's id.
    pub model_seq: u64,
    pub now: Millis,
    pub schema: &'a Schema,
    pub target: LabelKind,
    pub training: &'a TrainingConfig,
    pub gate: &'a GateConfig,
    pub guardrails: &'a GuardrailConfig,
    pub active: Option<&'a Model>,
    /// Stored examples that did not fit the schema and were left out before the run.
    pub skipped: usize,
    /// The config's normalized SHA-256 ([`crate::config::Config::digest`]), for the record.
    pub config_digest: String,
}

/// A run's result: its log entry and, when one was fitted, the candidate. The entry's verdict
/// is what the evidence says (`promoted` means the candidate passed the gate); the registry
/// turns it into the logged verdict (a shadow first, or `kept` while promotions are frozen).
#[derive(Debug)]
pub struct Proposal {
    pub entry: Entry,
    pub candidate: Option<Model>,
}

/// Runs one retraining cycle on `examples`, which must be sorted by event time.
pub fn run_once(plan: &RunPlan<'_>, examples: &[Example]) -> Proposal {
    let started = Instant::now();
    let metric = plan.gate.metric;
    let active_id = plan.active.map(|m| m.id.clone());
    let mut entry = Entry::bare(
        &plan.run_id,
        plan.trigger,
        plan.now,
        (metric, plan.gate.margin),
        active_id,
        Verdict::Rejected,
        String::new(),
    );
    entry.window = window_of(examples, plan.skipped);
    entry.alpha = Some(plan.gate.alpha);
    entry.provenance = Some(Provenance {
        seed: plan.training.seed,
        config_sha256: plan.config_digest.clone(),
        version: env!("CARGO_PKG_VERSION").to_owned(),
        revision: env!("UNDERSTUDY_GIT_REVISION").to_owned(),
        data_sha256: data_digest(examples),
    });
    let candidate = decide(plan, examples, &mut entry);
    if entry.verdict == Verdict::Promoted {
        entry.active_after = candidate.as_ref().map(|m| m.id.clone());
    }
    entry.duration_ms = started.elapsed().as_millis() as u64;
    Proposal { entry, candidate }
}

/// SHA-256 (hex) of the window as a run saw it: every example's id, event time and label, in
/// order, one line each (`id\tevent_time\tlabel`, the label in Rust's shortest round-trip
/// form). The same rows give the same digest on any machine.
pub fn data_digest(examples: &[Example]) -> String {
    use sha2::{Digest, Sha256};
    let mut hasher = Sha256::new();
    for e in examples {
        hasher.update(format!("{}\t{}\t{}\n", e.id, e.event_time, e.label).as_bytes());
    }
    hasher
        .finalize()
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect()
}

fn window_of(examples: &[Example], skipped: usize) -> DataWindow {
    DataWindow {
        from: examples.first().map(|e| e.event_time),
        to: examples.last().map(|e| e.event_time),
        rows: examples.len(),
        positives: examples.iter().filter(|e| e.label == 1.0).count(),
        skipped,
        ..DataWindow::default()
    }
}

fn reject(entry: &mut Entry, verdict: Verdict, reason: String) -> Option<Model> {
    entry.verdict = verdict;
    entry.reason = reason;
    None
}

/// Fills the entry's evidence and verdict; returns the candidate if one was fitted.
fn decide(plan: &RunPlan<'_>, examples: &[Example], entry: &mut Entry) -> Option<Model> {
    let training = plan.training;
    let guardrails = plan.guardrails;
    let binary = plan.target == LabelKind::Binary;
    let n = examples.len();
    if n < training.min_rows {
        return reject(
            entry,
            Verdict::Rejected,
            format!(
            "only {n} labeled examples in the window; a run needs at least {} (training.min_rows)",
            training.min_rows
        ),
        );
    }
    let holdout_n = split::holdout_len(n, training.holdout_fraction);
    let (train, holdout) = examples.split_at(n - holdout_n);
    entry.window.training_rows = train.len();
    entry.window.holdout_rows = holdout.len();
    if holdout.len() < guardrails.min_holdout_rows {
        return reject(
            entry,
            Verdict::Rejected,
            format!(
                "the holdout has {} rows; judging a candidate needs at least {} (guardrails.min_holdout_rows)",
                holdout.len(),
                guardrails.min_holdout_rows
            ),
        );
    }

    let train_positives = train.iter().filter(|e| e.label == 1.0).count();
    if binary {
        let per_class_min = train_positives.min(train.len() - train_positives);
        if per_class_min < training.folds {
            return reject(entry, Verdict::Rejected, format!(
                "the training part has {train_positives} positives of {} rows; each class needs at least {} (one per fold)",
                train.len(),
                training.folds
            ));
        }
        let holdout_positives = holdout.iter().filter(|e| e.label == 1.0).count();
        let holdout_negatives = holdout.len() - holdout_positives;
        if holdout_positives == 0 || holdout_negatives == 0 {
            return reject(
                entry,
                Verdict::Rejected,
                format!(
                    "the holdout's {} rows hold a single class; it cannot judge a model",
                    holdout.len()
                ),
            );
        }
        let fewest = holdout_positives.min(holdout_negatives);
        if fewest < guardrails.min_holdout_positives {
            return reject(
                entry,
                Verdict::Rejected,
                format!(
                    "the holdout has {holdout_positives} positives and {holdout_negatives} negatives; each class needs at least {} (guardrails.min_holdout_positives)",
                    guardrails.min_holdout_positives
                ),
            );
        }
    }

    let fitted = if training.window_shares.len() > 1 {
        windows::search(plan, train, entry)
    } else {
        search_folds(plan, train, entry)
    };
    let Fitted {
        setting,
        preprocessor,
        estimator,
        summary,
        rows: fit_rows,
    } = match fitted {
        Ok(fitted) => fitted,
        Err(Refusal(verdict, reason)) => return reject(entry, verdict, reason),
    };
    if let (Some(half_life), Some(choice)) = (training.half_life, entry.choice.as_mut()) {
        choice.push_str(&format!(
            "; rows weighted by recency, half-life {}",
            humantime::format_duration(half_life)
        ));
    }
    if !summary.converged {
        let steps = summary.newton_steps.unwrap_or(0);
        entry.fit = Some(summary);
        return reject(
            entry,
            Verdict::Failed,
            format!(
                "the solver did not converge on the final fit of {setting} ({steps} Newton steps); no candidate"
            ),
        );
    }
    entry.fit = Some(summary);
    let fit_rows_only: Vec<&Row> = fit_rows.iter().map(|e| &e.row).collect();
    let facts = TrainingFacts {
        run_id: plan.run_id.clone(),
        rows: fit_rows.len(),
        positives: fit_rows.iter().filter(|e| e.label == 1.0).count(),
        from: fit_rows.first().map_or(0, |e| e.event_time),
        cutoff: fit_rows.last().map_or(0, |e| e.event_time),
    };
    let mut candidate = Model::new(
        plan.model_seq,
        plan.now,
        setting,
        plan.target,
        preprocessor,
        estimator,
        facts,
    );
    let holdout_rows: Vec<&Row> = holdout.iter().map(|e| &e.row).collect();
    let holdout_labels: Vec<f64> = holdout.iter().map(|e| e.label).collect();
    let report = Report::for_labels(
        binary,
        &candidate.predictions(&holdout_rows),
        &holdout_labels,
    );
    candidate.holdout = Some(report.clone());
    let training_outputs = candidate.predictions(&fit_rows_only);
    candidate.reference = Some(crate::drift::Reference::fit(
        plan.schema,
        &fit_rows_only,
        &training_outputs,
    ));
    entry.candidate_id = Some(candidate.id.clone());
    entry.candidate_holdout = Some(report);

    gate(plan, holdout, &candidate, entry);
    Some(candidate)
}

/// A run's fitted candidate before it is judged: the setting, its fit, and the rows it was
/// fitted on (the whole training part, or the chosen window of it).
struct Fitted<'e> {
    setting: Setting,
    preprocessor: Preprocessor,
    estimator: Estimator,
    summary: FitSummary,
    rows: &'e [Example],
}

/// Why a run ends without a candidate: its verdict and reason.
struct Refusal(Verdict, String);

/// The search on one window: repeated k-fold cross-validation over the training part (or the
/// one pinned setting), then the chosen setting's fit on the whole training part.
fn search_folds<'e>(
    plan: &RunPlan<'_>,
    train: &'e [Example],
    entry: &mut Entry,
) -> Result<Fitted<'e>, Refusal> {
    let training = plan.training;
    let guardrails = plan.guardrails;
    let train_labels: Vec<f64> = train.iter().map(|e| e.label).collect();
    // One preprocessing and one standardized design for the whole training part: the
    // automatic lambda paths start from its lambda_max, and the final fit reads it.
    let train_rows: Vec<&Row> = train.iter().map(|e| &e.row).collect();
    let weights = recency_weights(train, training.half_life);
    let standardize = || {
        let (preprocessor, columns) = Preprocessor::fit_columns(plan.schema, &train_rows);
        let design = Design::from_columns(columns, train_rows.len(), preprocessor.width());
        (preprocessor, design)
    };
    let (mut preprocessor, mut design) = standardize();
    let tracks = search::tracks(training, &design, &train_labels, weights.as_deref());
    let settings: Vec<Setting> = tracks.iter().flat_map(|t| t.settings().to_vec()).collect();

    // Search, unless the config pins a single setting.
    let chosen_index = if settings.len() == 1 {
        entry.pinned = true;
        entry.search = vec![SettingResult::pinned(settings[0])];
        entry.choice = Some(format!(
            "pinned: the config names one setting ({}); parameters refitted, no search",
            settings[0]
        ));
        0
    } else {
        // The search's folds build designs of their own: the whole part's is freed for them
        // and built again (the same numbers) for the final fit, so the two never sit in
        // memory together (a run's peak is then the rows and one design, not two).
        drop(design);
        entry.search = search::cross_validate(
            plan.schema,
            &train_rows,
            &train_labels,
            weights.as_deref(),
            &tracks,
            training,
            plan.target,
            plan.gate.metric,
        );
        let Some((best, choice)) =
            search::choose(&entry.search, plan.gate.metric, training.selection)
        else {
            let first_error = entry
                .search
                .iter()
                .find_map(|r| r.error.clone())
                .unwrap_or_default();
            return Err(Refusal(
                Verdict::Failed,
                format!("no grid setting could be cross-validated ({first_error})"),
            ));
        };
        entry.choice = Some(choice);
        (preprocessor, design) = standardize();
        best
    };
    let setting = settings[chosen_index];
    entry.chosen = Some(setting);
    if let (Some(limit), Some(spread)) =
        (guardrails.max_cv_spread, entry.search[chosen_index].cv_std)
    {
        if spread > limit {
            return Err(Refusal(
                Verdict::Rejected,
                format!(
                    "{setting}'s {} varies by {spread:.4} (standard deviation) across folds, above guardrails.max_cv_spread {limit}",
                    plan.gate.metric.name()
                ),
            ));
        }
    }

    // Final fit on the whole training part: the chosen setting's path down to its lambda.
    let x_train = || preprocessor.transform_all(&train_rows);
    let (estimator, summary) = match final_fit(
        &tracks,
        chosen_index,
        &design,
        x_train,
        (&train_labels, weights.as_deref()),
    ) {
        Ok(fit) => fit,
        Err(e) => {
            return Err(Refusal(
                Verdict::Failed,
                format!("the final fit of {setting} failed: {e}"),
            ))
        }
    };
    Ok(Fitted {
        setting,
        preprocessor,
        estimator,
        summary,
        rows: train,
    })
}

/// Each row's recency weight with `training.half_life` set: 0.5 ^ (age / half-life), its age
/// counted back from the latest row's event time (the solver scales the weights to mean 1).
/// `None` without a half-life: every row weighs the same.
fn recency_weights(rows: &[Example], half_life: Option<std::time::Duration>) -> Option<Vec<f64>> {
    let half_life = half_life?.as_millis().max(1) as f64;
    let latest = rows.last()?.event_time;
    Some(
        rows.iter()
            .map(|e| 0.5f64.powf((latest - e.event_time).max(0) as f64 / half_life))
            .collect(),
    )
}

/// Fits the chosen setting on the whole training design.
fn final_fit(
    tracks: &[search::Track],
    chosen: usize,
    design: &Design,
    // The row-major training matrix, made only for a family that needs it (the linear paths
    // read the design).
    x: impl FnOnce() -> Vec<f64>,
    // The labels and the rows' recency weights (the penalized paths take them).
    (labels, weights): (&[f64], Option<&[f64]>),
) -> Result<(Estimator, FitSummary), crate::model::FitError> {
    let mut offset = 0;
    for track in tracks {
        let count = track.settings().len();
        if chosen >= offset + count {
            offset += count;
            continue;
        }
        let position = chosen - offset;
        match track {
            search::Track::Path {
                response,
                l1_ratio,
                lambdas,
                ..
            } => {
                let path = &lambdas[..=position];
                let points = elastic_net::fit_path_weighted(
                    design,
                    labels,
                    weights,
                    *response,
                    *l1_ratio,
                    path,
                    &SolverOptions::default(),
                )?;
                let last = points.last().ok_or(crate::model::FitError::Empty)?;
                let (intercept, weights) = design.to_input_scale(last.intercept, &last.weights);
                if !intercept.is_finite() || weights.iter().any(|w| !w.is_finite()) {
                    return Err(crate::model::FitError::NonFinite);
                }
                let summary = FitSummary {
                    nonzero: Some(last.nonzero()),
                    columns: design.width(),
                    newton_steps: Some(points.iter().map(|p| p.newton_steps).sum()),
                    passes: Some(points.iter().map(|p| p.passes).sum()),
                    converged: points.iter().all(|p| p.converged),
                    path: path.to_vec(),
                };
                return Ok((Estimator::Linear { weights, intercept }, summary));
            }
            search::Track::Single(setting) => {
                let estimator = Estimator::fit_family(
                    setting,
                    &x(),
                    design.width(),
                    &metrics::as_binary(labels),
                )?;
                let summary = FitSummary {
                    nonzero: None,
                    columns: design.width(),
                    newton_steps: None,
                    passes: None,
                    converged: true,
                    path: vec![],
                };
                return Ok((estimator, summary));
            }
        }
    }
    Err(crate::model::FitError::Empty)
}

/// Compares the candidate with the active model on holdout rows later than the active model's
/// own training cutoff, and sets the verdict.
fn gate(plan: &RunPlan<'_>, holdout: &[Example], candidate: &Model, entry: &mut Entry) {
    let binary = plan.target == LabelKind::Binary;
    let Some(active) = plan.active else {
        if binary {
            let rows: Vec<&Row> = holdout.iter().map(|e| &e.row).collect();
            let labels: Vec<u8> = holdout.iter().map(|e| u8::from(e.label == 1.0)).collect();
            entry.curves = Some(GateCurves {
                rows: rows.len(),
                candidate: Curves::of(&candidate.predictions(&rows), &labels),
                active: None,
            });
        }
        entry.verdict = Verdict::Promoted;
        entry.reason =
            "no model was active; the first candidate that passes the guardrails becomes active"
                .into();
        if let Some(config) = &plan.guardrails.adverse_impact {
            let examples: Vec<&Example> = holdout.iter().collect();
            let rows: Vec<&Row> = holdout.iter().map(|e| &e.row).collect();
            screen(
                config,
                &examples,
                &candidate.predictions(&rows),
                None,
                entry,
            );
        }
        return;
    };
    let later: Vec<&Example> = holdout
        .iter()
        .filter(|e| e.event_time > active.trained.cutoff)
        .collect();
    entry.window.gate_rows = Some(later.len());
    if later.len() < plan.gate.min_rows {
        entry.verdict = Verdict::Kept;
        entry.reason = format!(
            "only {} holdout rows are later than {}'s training cutoff; the gate needs {} (gate.min_rows) it never trained on",
            later.len(),
            active.id,
            plan.gate.min_rows
        );
        return;
    }
    let rows: Vec<&Row> = later.iter().map(|e| &e.row).collect();
    let labels: Vec<f64> = later.iter().map(|e| e.label).collect();
    let (candidate_outputs, active_outputs) =
        (candidate.predictions(&rows), active.predictions(&rows));
    if binary {
        let classes = metrics::as_binary(&labels);
        entry.curves = Some(GateCurves {
            rows: rows.len(),
            candidate: Curves::of(&candidate_outputs, &classes),
            active: Some(Curves::of(&active_outputs, &classes)),
        });
    }
    let judgement = judge(
        plan.gate,
        plan.target,
        &candidate_outputs,
        &active_outputs,
        &labels,
        "later rows",
    );
    judgement.write_to(entry);
    if !plan.guardrails.segments.is_empty() {
        entry.segments = segments::table(
            plan.schema,
            plan.guardrails,
            plan.gate.metric,
            &rows,
            &labels,
            (&candidate_outputs, &active_outputs),
        );
        let tolerance = plan.guardrails.segment_tolerance;
        if let Some(reason) = segments::breach_reason(&entry.segments, plan.gate.metric, tolerance)
        {
            if entry.verdict == Verdict::Promoted {
                entry.verdict = Verdict::Rejected;
                entry.reason = reason;
            }
        }
    }
    if let Some(config) = &plan.guardrails.adverse_impact {
        screen(
            config,
            &later,
            &candidate_outputs,
            Some(&active_outputs),
            entry,
        );
    }
}

/// The adverse-impact screen on the gate's rows (`guardrails.adverse_impact`): the evidence
/// goes in the entry for every judged run; a flag turns a promotion into `rejected`, or (with
/// `on_flag = "sign_off"`) leaves it for the registry to hold for an operator.
fn screen(
    config: &crate::config::AdverseImpactConfig,
    examples: &[&Example],
    candidate: &[f64],
    active: Option<&[f64]>,
    entry: &mut Entry,
) {
    let groups: Vec<Option<&str>> = examples
        .iter()
        .map(|e| e.monitoring.get(&config.attribute).map(String::as_str))
        .collect();
    let impact = crate::adverse_impact::evidence(config, &groups, candidate, active);
    if let Some(reason) = crate::adverse_impact::flag_reason(&impact) {
        if entry.verdict == Verdict::Promoted {
            match config.on_flag {
                crate::config::OnFlag::Reject => {
                    entry.verdict = Verdict::Rejected;
                    entry.reason = reason;
                }
                crate::config::OnFlag::SignOff => {
                    entry.reason = format!("{}; {reason}", entry.reason);
                }
            }
        }
    }
    entry.adverse_impact = Some(impact);
}

/// A comparison of a candidate with the active model on the same rows.
#[derive(Debug, Clone, PartialEq)]
pub struct Judgement {
    pub verdict: Verdict,
    pub reason: String,
    pub candidate: Report,
    pub active: Report,
    pub gain: Option<f64>,
    pub test: Option<String>,
    pub p_value: Option<f64>,
}

impl Judgement {
    /// Copies the evidence and the verdict into a log entry.
    pub fn write_to(self, entry: &mut Entry) {
        entry.verdict = self.verdict;
        entry.reason = self.reason;
        entry.candidate_gate = Some(self.candidate);
        entry.active_gate = Some(self.active);
        entry.gain = self.gain;
        entry.test = self.test;
        entry.p_value = self.p_value;
    }
}

/// The gate's rule on one set of rows: promote when the gain in `gate.metric` is at least
/// `gate.margin` and its one-sided p-value at most `gate.alpha`; keep otherwise. Used by the
/// holdout gate and by the live gate on shadowed outcomes. `rows_name` says which rows these
/// are in the reason.
pub fn judge(
    gate: &GateConfig,
    target: LabelKind,
    candidate: &[f64],
    active: &[f64],
    labels: &[f64],
    rows_name: &str,
) -> Judgement {
    let metric = gate.metric;
    let binary = target == LabelKind::Binary;
    let cand = Report::for_labels(binary, candidate, labels);
    let act = Report::for_labels(binary, active, labels);
    let (Some(c), Some(a)) = (cand.get(metric), act.get(metric)) else {
        return Judgement {
            verdict: Verdict::Kept,
            reason: format!(
                "{} is undefined on the {} {rows_name} (one class)",
                metric.name(),
                labels.len()
            ),
            candidate: cand,
            active: act,
            gain: None,
            test: None,
            p_value: None,
        };
    };
    let gain = if metric.higher_is_better() {
        c - a
    } else {
        a - c
    };
    let (margin, alpha) = (gate.margin, gate.alpha);
    let (test, p_value) = significance(metric, candidate, active, labels);
    let p = p_value.unwrap_or(1.0);
    let evidence = format!(
        "{} {c:.4} vs {a:.4} on {} {rows_name}: gain {gain:+.4}",
        metric.name(),
        labels.len()
    );
    let (verdict, judgement) = if gain < margin {
        (Verdict::Kept, format!("is below the margin {margin}"))
    } else if p > alpha {
        (
            Verdict::Kept,
            format!(
                "meets the margin {margin} but is not significant: p = {} ({test}) > alpha {alpha}",
                format_p(p)
            ),
        )
    } else {
        (
            Verdict::Promoted,
            format!(
                "meets the margin {margin} and p = {} ({test}) is at most alpha {alpha}",
                format_p(p)
            ),
        )
    };
    Judgement {
        verdict,
        reason: format!("{evidence} {judgement}"),
        candidate: cand,
        active: act,
        gain: Some(gain),
        test: Some(test.to_owned()),
        p_value,
    }
}

/// A traffic share's live gate: the candidate's arm and the active model's arm, each on the
/// outcomes of the requests it answered, compared with a test for two independent samples
/// ([`crate::two_sample::compare_arms`]), and the gate's rule (gain at least `gate.margin`,
/// one-sided p at most `gate.alpha`). The paired judgement on every shadowed outcome (both
/// models scored each request) comes along as evidence; it does not decide.
pub struct ArmsJudgement {
    pub judgement: Judgement,
    pub arms: Option<crate::two_sample::ArmComparison>,
    pub paired: Judgement,
}

pub fn judge_arms(
    gate: &GateConfig,
    target: LabelKind,
    outcomes: &[crate::store::ShadowedOutcome],
) -> ArmsJudgement {
    use crate::two_sample::{compare_arms, Arm};
    let binary = target == LabelKind::Binary;
    let (mut cand_out, mut cand_labels, mut act_out, mut act_labels) =
        (vec![], vec![], vec![], vec![]);
    for o in outcomes {
        if o.candidate_answered {
            cand_out.push(o.candidate);
            cand_labels.push(o.label);
        } else {
            act_out.push(o.active);
            act_labels.push(o.label);
        }
    }
    let all_labels: Vec<f64> = outcomes.iter().map(|o| o.label).collect();
    let all_cand: Vec<f64> = outcomes.iter().map(|o| o.candidate).collect();
    let all_act: Vec<f64> = outcomes.iter().map(|o| o.active).collect();
    let paired = judge(
        gate,
        target,
        &all_cand,
        &all_act,
        &all_labels,
        "shadowed outcomes",
    );
    let candidate = Report::for_labels(binary, &cand_out, &cand_labels);
    let active = Report::for_labels(binary, &act_out, &act_labels);
    let compared = compare_arms(
        gate.metric,
        gate.margin,
        Arm {
            outputs: &cand_out,
            labels: &cand_labels,
        },
        Arm {
            outputs: &act_out,
            labels: &act_labels,
        },
    );
    let arms = match compared {
        Err(e) => {
            return ArmsJudgement {
                judgement: Judgement {
                    verdict: Verdict::Kept,
                    reason: format!("the arms cannot be compared: {e}"),
                    candidate,
                    active,
                    gain: None,
                    test: None,
                    p_value: None,
                },
                arms: None,
                paired,
            }
        }
        Ok(arms) => arms,
    };
    let (margin, alpha) = (gate.margin, gate.alpha);
    let evidence = format!(
        "{} {:.4} on the candidate's {} answered outcomes vs {:.4} on the active model's {}: gain {:+.4}, {} {:.3}{}",
        gate.metric.name(),
        arms.candidate.metric,
        arms.candidate.n,
        arms.active.metric,
        arms.active.n,
        arms.gain,
        arms.test,
        arms.statistic,
        arms.df.map(|df| format!(" (df {df:.1})")).unwrap_or_default()
    );
    let p = arms.p_value;
    let (verdict, judgement) = if arms.gain.is_nan() || arms.gain < margin {
        (Verdict::Kept, format!("is below the margin {margin}"))
    } else if p.is_nan() || p > alpha {
        (
            Verdict::Kept,
            format!(
                "meets the margin {margin} but is not significant: p = {} > alpha {alpha}",
                format_p(p)
            ),
        )
    } else {
        (
            Verdict::Promoted,
            format!(
                "meets the margin {margin} and p = {} is at most alpha {alpha}",
                format_p(p)
            ),
        )
    };
    ArmsJudgement {
        judgement: Judgement {
            verdict,
            reason: format!("{evidence} {judgement}"),
            candidate,
            active,
            gain: Some(arms.gain),
            test: Some(arms.test.clone()),
            p_value: Some(p),
        },
        arms: Some(arms),
        paired,
    }
}

/// A p-value for a log line: four decimals, or scientific notation when smaller.
fn format_p(p: f64) -> String {
    if p < 1e-4 {
        format!("{p:.1e}")
    } else {
        format!("{p:.4}")
    }
}

/// The one-sided p-value that the candidate beats the active model on these rows: DeLong's
/// test for AUC, a paired test on per-row losses (squared or absolute error, log loss) for the
/// others.
fn significance(
    metric: GateMetric,
    candidate: &[f64],
    active: &[f64],
    labels: &[f64],
) -> (&'static str, Option<f64>) {
    let per_row = |outputs: &[f64]| -> Vec<f64> {
        match metric {
            GateMetric::LogLoss => metrics::row_log_losses(outputs, &metrics::as_binary(labels)),
            GateMetric::Brier | GateMetric::Rmse => metrics::row_squared_errors(outputs, labels),
            GateMetric::Mae | GateMetric::Auc => metrics::row_absolute_errors(outputs, labels),
        }
    };
    match metric {
        GateMetric::Auc => (
            "delong",
            metrics::delong(candidate, active, &metrics::as_binary(labels)).map(|d| d.p_a_better),
        ),
        _ => {
            let test = metrics::paired_loss_test(&per_row(candidate), &per_row(active));
            ("paired_loss", test.map(|t| t.p_a_better))
        }
    }
}

#[cfg(test)]
mod tests;
