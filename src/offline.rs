//! One run without a server or a store: labeled rows in, the run record and a model file out.
//!
//! A data scientist uses it to try a config on a CSV before deploying it, and to inspect or
//! reproduce a fit outside the service: the model file holds the coefficients on both scales,
//! the intercept, the chosen setting and the whole cross-validation table, beside the model in
//! the exact form the service stores.

use serde::Serialize;

use crate::config::Config;
use crate::learn::window::{latest, parse_examples};
use crate::learn::{run_once, Example, Proposal, RunPlan, Window};
use crate::metrics::Report;
use crate::model::{Coefficients, FitSummary, Model, Setting};
use crate::promotion::{Entry, SettingResult, Trigger};
use crate::store::StoredExample;
use crate::time::now_ms;

/// Version of the model file's layout.
pub const MODEL_FILE_FORMAT: u32 = 1;

/// What `understudy train --model-out` writes.
#[derive(Debug, Serialize)]
pub struct ModelFile<'a> {
    pub format: u32,
    pub model_id: &'a str,
    pub chosen: Option<Setting>,
    pub choice: Option<&'a str>,
    pub fit: Option<&'a FitSummary>,
    /// Linear models: intercept and coefficients on the standardized and the original scale.
    pub coefficients: Option<Coefficients>,
    pub holdout: Option<&'a Report>,
    /// Every setting's fold values, mean and standard error.
    pub cross_validation: &'a [SettingResult],
    /// The model as the service stores it (preprocessing and estimator included).
    pub model: &'a Model,
}

impl<'a> ModelFile<'a> {
    pub fn new(entry: &'a Entry, model: &'a Model) -> ModelFile<'a> {
        ModelFile {
            format: MODEL_FILE_FORMAT,
            model_id: &model.id,
            chosen: entry.chosen,
            choice: entry.choice.as_deref(),
            fit: entry.fit.as_ref(),
            coefficients: model.coefficients(),
            holdout: model.holdout.as_ref(),
            cross_validation: &entry.search,
            model,
        }
    }
}

/// An offline run's result.
#[derive(Debug)]
pub struct OfflineRun {
    pub output: Proposal,
    /// Rows that did not fit the schema.
    pub skipped: usize,
    /// Older rows beyond `training.window_rows`, left out as the service would.
    pub beyond_window: usize,
}

/// Runs one retraining run on `rows` (already validated by the CSV reader), judged as a first
/// model: there is no incumbent offline.
pub fn train(config: &Config, rows: Vec<StoredExample>) -> OfflineRun {
    let (examples, skipped) = parse_examples(rows, &config.schema());
    train_examples(config, examples, skipped)
}

/// [`train`] on rows already validated into schema order (`cli::read_csv_examples`: no
/// named map per row); `skipped` rows were left out before.
pub fn train_examples(config: &Config, examples: Vec<Example>, skipped: usize) -> OfflineRun {
    let schema = config.schema();
    let Window {
        examples,
        skipped,
        beyond_window,
    } = latest(examples, skipped, config.training.window_rows);
    let plan = RunPlan::from_config(
        config,
        &schema,
        "offline".into(),
        Trigger::Manual,
        1,
        now_ms(),
        None,
        skipped,
    );
    OfflineRun {
        output: run_once(&plan, &examples),
        skipped,
        beyond_window,
    }
}

/// The run record for a person: the window, the cross-validation table, the choice, the fit
/// and the holdout metrics.
pub fn render(run: &OfflineRun) -> String {
    use std::fmt::Write;
    let entry = &run.output.entry;
    let mut out = String::new();
    let w = &entry.window;
    let _ = writeln!(
        out,
        "rows: {} ({} training, {} holdout, latest by event time); {} left out as older than the window, {} not fitting the schema",
        w.rows, w.training_rows, w.holdout_rows, run.beyond_window, run.skipped
    );
    if !entry.search.is_empty() {
        let _ = writeln!(
            out,
            "\n{:<52} {:>9} {:>9} {:>9} {:>6}",
            "setting",
            format!("cv {}", entry.metric.name()),
            "se",
            "sd",
            "folds"
        );
        for r in &entry.search {
            let mark = if Some(r.setting) == entry.chosen {
                "*"
            } else {
                " "
            };
            let cell = |v: Option<f64>| v.map_or_else(|| "-".to_owned(), |v| format!("{v:.4}"));
            let _ = writeln!(
                out,
                "{mark}{:<51} {:>9} {:>9} {:>9} {:>6}{}",
                r.setting.to_string(),
                cell(r.cv_mean),
                cell(r.cv_se),
                cell(r.cv_std),
                r.folds.len(),
                r.error
                    .as_deref()
                    .map(|e| format!("  error: {e}"))
                    .unwrap_or_default()
            );
        }
    }
    if let Some(windows) = crate::render::window_summary(entry) {
        let _ = writeln!(out, "\n{windows}");
    }
    if let Some(choice) = &entry.choice {
        let _ = writeln!(out, "\nchosen: {choice}");
    }
    if let Some(fit) = &entry.fit {
        let _ = write!(out, "fit: {} columns", fit.columns);
        if let Some(nonzero) = fit.nonzero {
            let _ = write!(out, ", {nonzero} non-zero coefficients");
        }
        if let (Some(steps), Some(passes)) = (fit.newton_steps, fit.passes) {
            let _ = write!(
                out,
                ", {steps} Newton steps and {passes} coordinate passes over {} lambdas",
                fit.path.len()
            );
        }
        let _ = writeln!(
            out,
            ", {}",
            if fit.converged {
                "converged"
            } else {
                "NOT converged"
            }
        );
    }
    if let Some(report) = &entry.candidate_holdout {
        let _ = writeln!(
            out,
            "holdout: {}",
            serde_json::to_string(report).unwrap_or_default()
        );
    }
    let _ = writeln!(
        out,
        "verdict: {} ({})",
        entry.verdict.as_str(),
        entry.reason
    );
    out
}
