//! The model lifecycle: which model answers, which one shadows it, and every change of either.
//!
//! `learn` proposes (a fitted candidate with its evidence); the registry is the one place that
//! turns a proposal into a verdict and changes the active model, the shadow or the freeze.
//! Each transition ([`Registry::settle_run`] for a promotion or the start of a shadow,
//! [`Registry::end_shadow`], [`Registry::rollback`], [`Registry::freeze`],
//! [`Registry::unfreeze`]) runs under one lock, applies the rules (promotions frozen, the
//! active model changed since the run started, the shadow's age), writes the log entry with
//! its effects in one store transaction, and only then swaps the pointers scoring reads.
//!
//! Scoring loads the active model with one atomic pointer read (`arc-swap`). A request holds
//! its own `Arc`, so it never sees a half-swapped state and an old model lives until its last
//! request ends. The shadowing candidate, if any, sits beside it the same way.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};

use arc_swap::ArcSwapOption;

use crate::config::GateConfig;
use crate::learn::{judge, Proposal};
use crate::model::Model;
use crate::promotion::{Entry, Trigger, Verdict};
use crate::schema::{LabelKind, Schema};
use crate::store::{EntryEffects, Freeze, ShadowState, Store, StoreError};
use crate::threads::lock;
use crate::time::now_ms;

#[derive(Debug, thiserror::Error)]
pub enum RestoreError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("the activation history names model {0}, which is not in the store")]
    MissingModel(String),
    #[error("{0}; restore the matching config or roll back to a compatible model")]
    Incompatible(String),
}

/// Why a rollback was refused.
#[derive(Debug, thiserror::Error)]
pub enum RollbackError {
    #[error("there is no earlier active model to roll back to")]
    NothingToRollBackTo,
    #[error("no model with id `{0}`")]
    UnknownModel(String),
    #[error("model `{0}` is already active")]
    AlreadyActive(String),
    #[error("{0}")]
    Incompatible(String),
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// The configured rules the transitions apply.
#[derive(Debug, Clone)]
pub struct Rules {
    /// Outcomes a candidate that passed the holdout gate must shadow before the live gate
    /// decides (`shadow.outcomes`); 0 promotes on the holdout gate alone.
    pub shadow_outcomes: u64,
    /// The gate: the live gate judges shadowed outcomes by it, and every entry names its
    /// metric and margin.
    pub gate: GateConfig,
    pub target: LabelKind,
}

/// The active model and the shadowing candidate, and the one door through which they change.
pub struct Registry {
    active: ArcSwapOption<Model>,
    shadow: ArcSwapOption<Model>,
    store: Arc<dyn Store>,
    schema: Arc<Schema>,
    rules: Rules,
    /// Serializes every transition: its checks, its store write and its swap.
    changes: Mutex<()>,
    /// Other processes change the store too (replicas on PostgreSQL): each transition reads
    /// the active model and the shadow from the store before it checks anything.
    shared: AtomicBool,
}

impl Registry {
    /// Loads the active model (the last entry of the activation history) and the shadowing
    /// candidate from the store.
    pub fn restore(
        store: Arc<dyn Store>,
        schema: Arc<Schema>,
        rules: Rules,
    ) -> Result<Registry, RestoreError> {
        let registry = Registry {
            active: ArcSwapOption::empty(),
            shadow: ArcSwapOption::empty(),
            store,
            schema,
            rules,
            changes: Mutex::new(()),
            shared: AtomicBool::new(false),
        };
        if let Some(id) = registry.store.active_history()?.last() {
            let model = registry
                .store
                .model(id)?
                .ok_or_else(|| RestoreError::MissingModel(id.clone()))?;
            model
                .compatible_with(&registry.schema)
                .map_err(RestoreError::Incompatible)?;
            registry.activate(Arc::new(model));
        }
        if let Some(state) = registry.store.shadow_state()? {
            // A shadow that no longer fits the schema is dropped, not fatal: it never answered.
            if let Some(model) = registry.store.model(&state.candidate_id)? {
                if model.compatible_with(&registry.schema).is_ok() {
                    registry.set_shadow(Some(Arc::new(model)));
                }
            }
        }
        Ok(registry)
    }

    /// Notes that other processes change the same store: from now on every transition first
    /// catches up with the store ([`Registry::follow_store`]).
    pub fn share_store(&self) {
        self.shared.store(true, Ordering::SeqCst);
    }

    /// Serves what the store says: the last model of the activation history and the shadowing
    /// candidate, swapped in when they differ from what is served (another replica promoted,
    /// rolled back, or started or ended a shadow). The restore path again, under the
    /// transitions' lock. Returns whether anything was swapped.
    pub fn follow_store(&self) -> Result<bool, RestoreError> {
        let _changes = lock(&self.changes);
        self.catch_up()
    }

    /// [`Registry::follow_store`] with the lock held.
    fn catch_up(&self) -> Result<bool, RestoreError> {
        let mut swapped = false;
        let wanted = self.store.active_history()?.pop();
        if wanted != self.active_id() {
            match &wanted {
                Some(id) => {
                    let model = self
                        .store
                        .model(id)?
                        .ok_or_else(|| RestoreError::MissingModel(id.clone()))?;
                    model
                        .compatible_with(&self.schema)
                        .map_err(RestoreError::Incompatible)?;
                    self.activate(Arc::new(model));
                }
                None => self.active.store(None),
            }
            swapped = true;
        }
        let wanted = self.store.shadow_state()?.map(|s| s.candidate_id);
        let serving = self.shadow.load().as_ref().map(|m| m.id.clone());
        if wanted != serving {
            let model = match &wanted {
                Some(id) => self
                    .store
                    .model(id)?
                    .filter(|m| m.compatible_with(&self.schema).is_ok())
                    .map(Arc::new),
                None => None,
            };
            self.set_shadow(model);
            swapped = true;
        }
        Ok(swapped)
    }

    /// Before a transition on a shared store: serve what the store says, so the transition's
    /// checks see other replicas' changes. The caller holds `changes`.
    fn refresh(&self) -> Result<(), StoreError> {
        if !self.shared.load(Ordering::SeqCst) {
            return Ok(());
        }
        match self.catch_up() {
            Ok(_) => Ok(()),
            Err(RestoreError::Store(e)) => Err(e),
            Err(other) => {
                tracing::error!(error = %other, "cannot serve the store's active model");
                Ok(())
            }
        }
    }

    /// The active model, if any.
    pub fn active(&self) -> Option<Arc<Model>> {
        self.active.load_full()
    }

    pub fn active_id(&self) -> Option<String> {
        self.active.load().as_ref().map(|m| m.id.clone())
    }

    /// The candidate scoring live requests in the shadows, if any.
    pub fn shadow(&self) -> Option<Arc<Model>> {
        self.shadow.load_full()
    }

    /// Swaps the active model without a log entry or a store write. The service changes it
    /// only through the transitions; benches use this to score with a model they built.
    pub fn activate(&self, model: Arc<Model>) {
        self.active.store(Some(model));
    }

    /// Swaps the shadow without a log entry or a store write; see [`Registry::activate`].
    pub fn set_shadow(&self, model: Option<Arc<Model>>) {
        self.shadow.store(model);
    }

    /// An entry with no evidence, as of now, against today's active model.
    pub fn bare_entry(
        &self,
        run_id: &str,
        trigger: Trigger,
        verdict: Verdict,
        reason: String,
    ) -> Entry {
        let gate = &self.rules.gate;
        Entry::bare(
            run_id,
            trigger,
            now_ms(),
            (gate.metric, gate.margin),
            self.active_id(),
            verdict,
            reason,
        )
    }

    /// Logs an entry that changes nothing (a run that failed, or that a stop interrupted).
    pub fn log_unchanged(&self, entry: Entry) -> Result<Entry, StoreError> {
        let _changes = lock(&self.changes);
        self.store.append_entry(entry, EntryEffects::default())
    }

    /// Turns a run's proposal into its verdict, logs it and applies it.
    ///
    /// A candidate that passed the holdout gate is promoted, or starts shadowing when
    /// `shadow.outcomes` is set and there is an incumbent to shadow. It is `kept` instead when
    /// promotions are frozen, or when the active model changed while the run trained (its gate
    /// compared against a model that no longer answers). The candidate itself is stored
    /// whatever the verdict, so the log can name it.
    pub fn settle_run(
        &self,
        proposal: Proposal,
        trigger_detail: Option<String>,
    ) -> Result<Entry, StoreError> {
        let _changes = lock(&self.changes);
        self.refresh()?;
        let Proposal {
            mut entry,
            candidate,
        } = proposal;
        entry.trigger_detail = trigger_detail;
        if let Some(model) = &candidate {
            self.store.put_model(model)?;
        }
        if entry.verdict == Verdict::Promoted
            && entry.active_before.is_some()
            && self.rules.shadow_outcomes > 0
        {
            entry.verdict = Verdict::Shadowing;
            entry.active_after.clone_from(&entry.active_before);
            entry.reason = format!(
                "{}; it now shadows live requests until {} of them have outcomes (shadow.outcomes), then a live gate decides",
                entry.reason, self.rules.shadow_outcomes
            );
        }
        let active_now = self.active_id();
        let would_change = matches!(entry.verdict, Verdict::Promoted | Verdict::Shadowing);
        if would_change {
            if let Some(freeze) = self.store.freeze()? {
                entry.active_after.clone_from(&active_now);
                keep_frozen(&mut entry, &freeze);
            }
        }
        if would_change && active_now != entry.active_before {
            entry.verdict = Verdict::Kept;
            entry.active_after = active_now;
            entry.reason = format!(
                "the active model changed while this run trained (now {}); its gate no longer applies",
                entry.active_after.as_deref().unwrap_or("none")
            );
        } else if !would_change && entry.active_after != active_now {
            // A rollback while it trained: the entry says what is active after it.
            entry.reason = format!(
                "{}; the active model changed while this run trained (now {})",
                entry.reason,
                active_now.as_deref().unwrap_or("none")
            );
            entry.active_after = active_now;
        }
        match (entry.verdict, candidate) {
            (Verdict::Promoted, Some(model)) => self.promote(entry, model, None),
            (Verdict::Shadowing, Some(model)) => self.start_shadow(entry, model),
            _ => self.store.append_entry(entry, EntryEffects::default()),
        }
    }

    /// Logs `entry` and makes `model` active, in one write, then swaps. `shadow` also sets or
    /// ends the shadow in the same write. The caller holds `changes`.
    fn promote(
        &self,
        mut entry: Entry,
        model: Model,
        shadow: Option<Option<&ShadowState>>,
    ) -> Result<Entry, StoreError> {
        let mut history = self.store.active_history()?;
        history.push(model.id.clone());
        entry.active_after = Some(model.id.clone());
        let effects = EntryEffects {
            history: Some(&history),
            shadow,
        };
        let entry = self.store.append_entry(entry, effects)?;
        self.activate(Arc::new(model));
        Ok(entry)
    }

    /// Logs `entry` and makes `model` the shadowing candidate, in one write, then swaps. A
    /// candidate already shadowing is replaced (its shadowed outcomes are dropped). The caller
    /// holds `changes`.
    fn start_shadow(&self, mut entry: Entry, model: Model) -> Result<Entry, StoreError> {
        if let Some(previous) = self.store.shadow_state()? {
            entry.reason = format!(
                "{}; it replaces the shadowing candidate {} ({} of {} shadowed outcomes)",
                entry.reason,
                previous.candidate_id,
                self.store.shadowed_count(&previous.candidate_id),
                self.rules.shadow_outcomes
            );
        }
        // The entry and the shadow it starts are one write: a stop between the two would
        // leave the log naming one candidate and the store shadowing another.
        let state = ShadowState {
            candidate_id: model.id.clone(),
            active_id: entry.active_before.clone().unwrap_or_default(),
            run_id: entry.run_id.clone(),
            entry_seq: 0,
            since: now_ms(),
        };
        let effects = EntryEffects {
            history: None,
            shadow: Some(Some(&state)),
        };
        let entry = self.store.append_entry(entry, effects)?;
        self.set_shadow(Some(Arc::new(model)));
        Ok(entry)
    }

    /// Ends the shadow, logged as run `run_id`: `expired` ends it `kept` for its age;
    /// otherwise the live gate judges the candidate against the active model on the shadowed
    /// outcomes and promotes it if it passes (unless promotions are frozen, or the active model
    /// changed while it shadowed).
    pub fn end_shadow(
        &self,
        run_id: &str,
        trigger: Trigger,
        expired: bool,
    ) -> Result<Entry, StoreError> {
        let _changes = lock(&self.changes);
        self.refresh()?;
        let Some(state) = self.store.shadow_state()? else {
            let entry = self.bare_entry(
                run_id,
                trigger,
                Verdict::Kept,
                "no candidate was shadowing when the live gate ran".into(),
            );
            return self.store.append_entry(entry, EntryEffects::default());
        };
        let outcomes = self.store.shadowed_outcomes(&state.candidate_id)?;
        let candidate = self.store.model(&state.candidate_id)?;
        let active_id = self.active_id();
        let mut entry = self.bare_entry(run_id, trigger, Verdict::Kept, String::new());
        entry.candidate_id = Some(state.candidate_id.clone());
        entry.candidate_holdout = candidate.as_ref().and_then(|m| m.holdout.clone());
        entry.window.gate_rows = Some(outcomes.len());
        let needed = self.rules.shadow_outcomes;
        let shadow_of = format!(
            "live gate of {} (shadowing since run {}, log entry {})",
            state.candidate_id, state.run_id, state.entry_seq
        );
        let mut promote = None;
        if active_id.as_deref() != Some(state.active_id.as_str()) {
            entry.reason = format!(
                "{shadow_of}: the active model changed from {} while it shadowed; kept",
                state.active_id
            );
        } else if expired {
            let days = (now_ms() - state.since) as f64 / 86_400_000.0;
            entry.reason = format!(
                "{shadow_of}: shadow.max_age passed after {days:.1} days with {} of {needed} shadowed outcomes; kept",
                outcomes.len()
            );
        } else if let Some(model) = candidate {
            let labels: Vec<f64> = outcomes.iter().map(|o| o.label).collect();
            let cand: Vec<f64> = outcomes.iter().map(|o| o.candidate).collect();
            let act: Vec<f64> = outcomes.iter().map(|o| o.active).collect();
            let judgement = judge(
                &self.rules.gate,
                self.rules.target,
                &cand,
                &act,
                &labels,
                "shadowed outcomes",
            );
            judgement.write_to(&mut entry);
            entry.reason = format!("{shadow_of}: {}", entry.reason);
            if entry.verdict == Verdict::Promoted {
                promote = Some(model);
            }
        } else {
            entry.reason = format!("{shadow_of}: the candidate is missing from the store; kept");
        }
        if promote.is_some() {
            if let Some(freeze) = self.store.freeze()? {
                promote = None;
                keep_frozen(&mut entry, &freeze);
            }
        }
        // The verdict, the promotion if any and the shadow's end are one write.
        let entry = match promote {
            Some(model) => self.promote(entry, model, Some(None))?,
            None => {
                let ends_shadow = EntryEffects {
                    history: None,
                    shadow: Some(None),
                };
                self.store.append_entry(entry, ends_shadow)?
            }
        };
        self.set_shadow(None);
        Ok(entry)
    }

    /// Makes an earlier model active again and logs it as a run of its own: the previous one
    /// in the activation history, or `to`. A shadow measured against the model rolled away
    /// from ends in the same write. Works while promotions are frozen.
    pub fn rollback(&self, to: Option<&str>) -> Result<Entry, RollbackError> {
        let _changes = lock(&self.changes);
        self.refresh()?;
        let mut history = self.store.active_history()?;
        let current = history.last().cloned();
        let target: Model = match to {
            Some(id) => {
                if current.as_deref() == Some(id) {
                    return Err(RollbackError::AlreadyActive(id.to_owned()));
                }
                let model = self
                    .store
                    .model(id)?
                    .ok_or_else(|| RollbackError::UnknownModel(id.to_owned()))?;
                history.push(model.id.clone());
                model
            }
            None => {
                if history.len() < 2 {
                    return Err(RollbackError::NothingToRollBackTo);
                }
                history.pop();
                let id = history.last().cloned().unwrap_or_default();
                self.store
                    .model(&id)?
                    .ok_or(RollbackError::UnknownModel(id))?
            }
        };
        target
            .compatible_with(&self.schema)
            .map_err(RollbackError::Incompatible)?;
        let seq = self.store.next_seq("run")?;
        let mut entry = self.bare_entry(
            &format!("r-{seq}"),
            Trigger::Rollback,
            Verdict::Promoted,
            format!(
                "operator rollback from {} to {}",
                current.as_deref().unwrap_or("none"),
                target.id
            ),
        );
        entry.candidate_id = Some(target.id.clone());
        entry.candidate_holdout = target.holdout.clone();
        entry.active_after = Some(target.id.clone());
        let shadow = self.store.shadow_state()?;
        if let Some(shadow) = &shadow {
            entry.reason = format!(
                "{}; this ends the shadow of {}, which was measured against {}",
                entry.reason, shadow.candidate_id, shadow.active_id
            );
        }
        // The rollback and the end of the shadow it invalidates are one write.
        let effects = EntryEffects {
            history: Some(&history),
            shadow: shadow.is_some().then_some(None),
        };
        let entry = self.store.append_entry(entry, effects)?;
        self.activate(Arc::new(target));
        if shadow.is_some() {
            self.set_shadow(None);
        }
        Ok(entry)
    }

    /// Whether promotions are frozen, and since when.
    pub fn frozen(&self) -> Result<Option<Freeze>, StoreError> {
        self.store.freeze()
    }

    /// Freezes promotions: runs still train and log, but every verdict that would promote (or
    /// start a shadow) is `kept` with the reason "frozen"; rollback still works. Survives
    /// restarts. Freezing again keeps the first freeze's time.
    pub fn freeze(&self) -> Result<Freeze, StoreError> {
        let _changes = lock(&self.changes);
        if let Some(current) = self.store.freeze()? {
            return Ok(current);
        }
        let state = Freeze { since: now_ms() };
        self.store.set_freeze(Some(&state))?;
        Ok(state)
    }

    /// Lets verdicts promote again.
    pub fn unfreeze(&self) -> Result<(), StoreError> {
        let _changes = lock(&self.changes);
        self.store.set_freeze(None)
    }
}

/// Turns a verdict that would change the active model into `kept`, saying why.
fn keep_frozen(entry: &mut Entry, freeze: &Freeze) {
    entry.verdict = Verdict::Kept;
    entry.reason = format!(
        "frozen: promotions are frozen since {} (POST /v1/unfreeze); the gate said: {}",
        crate::time::to_rfc3339(freeze.since),
        entry.reason
    );
}

#[cfg(test)]
mod tests;
