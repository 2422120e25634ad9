//! Re-creating a logged run from its provenance, for an auditor: the same rows (by event time
//! and the data digest), the same config (by its digest), the same seed and the model that was
//! active, through the same `learn::run_once`. The candidate's id carries a hash of everything
//! fitted (setting, preprocessing, estimator, training facts), so equal ids mean a bit-for-bit
//! equal model. A mismatch says which input changed.

use serde::{Deserialize, Serialize};

use crate::config::Config;
use crate::learn::{data_digest, run_once, window, RunPlan};
use crate::promotion::Entry;
use crate::store::{Store, StoreError};

/// What re-running a logged run showed.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Reproduction {
    pub run_id: String,
    /// The candidate the log names, and the one fitted again (None: no candidate either time).
    pub logged_candidate: Option<String>,
    pub refitted_candidate: Option<String>,
    /// Which inputs still match the run's provenance.
    pub same_rows: bool,
    pub same_config: bool,
    pub same_binary: bool,
    /// The refitted candidate is the logged one, bit for bit.
    pub reproduced: bool,
}

impl Reproduction {
    /// One paragraph for a person: reproduced, or what differs.
    pub fn describe(&self) -> String {
        if self.reproduced {
            return format!(
                "run {} reproduced bit for bit: candidate {}",
                self.run_id,
                self.logged_candidate.as_deref().unwrap_or("(none)")
            );
        }
        let mut causes = vec![];
        if !self.same_rows {
            causes.push("the window's rows differ from the logged data digest (examples were added, changed or removed in its time range)");
        }
        if !self.same_config {
            causes.push(
                "the config differs from the one the run used (its normalized SHA-256 changed)",
            );
        }
        if !self.same_binary {
            causes.push("the binary is another version or revision");
        }
        if causes.is_empty() {
            causes.push("the inputs match but the fit differs (a change in the code the binary was built from)");
        }
        format!(
            "run {} NOT reproduced: logged candidate {}, refitted {}; {}",
            self.run_id,
            self.logged_candidate.as_deref().unwrap_or("(none)"),
            self.refitted_candidate.as_deref().unwrap_or("(none)"),
            causes.join("; ")
        )
    }
}

/// Why a run could not be re-run at all.
#[derive(Debug, thiserror::Error)]
pub enum ReproduceError {
    #[error("no run `{0}` in the promotion log")]
    UnknownRun(String),
    #[error(
        "run `{0}` has no provenance (it did not train, or it was logged by an older version)"
    )]
    NoProvenance(String),
    #[error("run `{run}` was judged against model `{model}`, which is no longer in the store")]
    MissingModel { run: String, model: String },
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// The log entry of `run_id`.
fn entry_of(store: &dyn Store, run_id: &str) -> Result<Entry, ReproduceError> {
    let unknown = || ReproduceError::UnknownRun(run_id.to_owned());
    let run = store.run(run_id)?.ok_or_else(unknown)?;
    let seq = run.entry_seq.ok_or_else(unknown)?;
    store.entry(seq)?.ok_or_else(unknown)
}

/// Re-runs `run_id` from `store` under `config`.
pub fn reproduce(
    store: &dyn Store,
    config: &Config,
    run_id: &str,
) -> Result<Reproduction, ReproduceError> {
    let entry = entry_of(store, run_id)?;
    let provenance = entry
        .provenance
        .clone()
        .ok_or_else(|| ReproduceError::NoProvenance(run_id.to_owned()))?;
    let schema = config.schema();
    // The window's rows: every example in the run's time range, then the latest
    // `window_rows` of them as the run took them.
    let stored = match entry.window.from {
        Some(from) => store.latest_examples(usize::MAX, Some(from))?,
        None => vec![],
    };
    let to = entry.window.to.unwrap_or(i64::MIN);
    let stored = stored.into_iter().filter(|e| e.event_time <= to).collect();
    let window = window(stored, &schema, config.training.window_rows);
    let active = match &entry.active_before {
        Some(id) => Some(
            store
                .model(id)?
                .ok_or_else(|| ReproduceError::MissingModel {
                    run: run_id.to_owned(),
                    model: id.clone(),
                })?,
        ),
        None => None,
    };
    // The candidate's id is `m-<seq>-<hash>`: the same sequence number, so equal ids mean
    // equal content.
    let model_seq = entry
        .candidate_id
        .as_deref()
        .and_then(|id| id.split('-').nth(1))
        .and_then(|seq| seq.parse().ok())
        .unwrap_or(0);
    let plan = RunPlan::from_config(
        config,
        &schema,
        entry.run_id.clone(),
        entry.trigger,
        model_seq,
        entry.at,
        active.as_ref(),
        window.skipped,
    );
    let refitted = run_once(&plan, &window.examples);
    let refitted_candidate = refitted.candidate.map(|m| m.id);
    let same_rows = data_digest(&window.examples) == provenance.data_sha256;
    let same_config = config.digest == provenance.config_sha256;
    let same_binary = provenance.version == env!("CARGO_PKG_VERSION")
        && provenance.revision == env!("UNDERSTUDY_GIT_REVISION");
    Ok(Reproduction {
        run_id: run_id.to_owned(),
        reproduced: same_rows && refitted_candidate == entry.candidate_id,
        logged_candidate: entry.candidate_id,
        refitted_candidate,
        same_rows,
        same_config,
        same_binary,
    })
}
