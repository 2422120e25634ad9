//! The model lifecycle: which model answers, which one shadows it, and every change of either.
//!
//! `learn` proposes (a fitted candidate with its evidence); the registry is the one place that
//! turns a proposal into a verdict and changes the active model, the shadow or the freeze.
//! Each transition ([`Registry::settle_run`] for a promotion, the start of a shadow or of a
//! wait for sign-off, [`Registry::end_shadow`], [`Registry::approve`], [`Registry::decline`],
//! [`Registry::expire_sign_off`], [`Registry::rollback`], [`Registry::freeze`],
//! [`Registry::unfreeze`]) runs under one lock, applies the rules (promotions frozen, the
//! active model changed since the run started, the shadow's or the wait's age, four eyes),
//! writes the log entry with its effects in one store transaction, and only then swaps the
//! pointers scoring reads.
//!
//! Sign-off (`gate.sign_off`) comes after the holdout gate and before the shadow or the
//! promotion: a candidate that passed waits, stored but not served, until an operator
//! approves it (it is then promoted, or starts shadowing when `shadow.outcomes` is set, and
//! the live gate needs no second sign-off), declines it, or the wait expires. The approval's
//! entry, the new activation history (or shadow) and the end of the wait are one write, so a
//! stop between approval and swap restores either the old state (still waiting) or the new
//! one (approved, served), never an approval applied twice.
//!
//! A traffic share (`[share]`, see `registry::share`) is a shadow in which the candidate also answers
//! a sticky share of requests: the same `shadowing` verdict starts it (its reason names the
//! share), the same shadow state carries its terms (`ShadowState::share`, so a restart keeps
//! it), and [`Registry::end_shadow`] judges it with the two-sample live gate
//! (`learn::judge_arms`) instead of the paired one; [`Registry::stop_share`] ends it when its
//! error guardrail trips. A new verdict was not added: the candidate is live beside the
//! incumbent, as in a shadow, and every reader of the log already knows `shadowing`.
//!
//! Scoring loads the active model with one atomic pointer read (`arc-swap`). A request holds
//! its own `Arc`, so it never sees a half-swapped state and an old model lives until its last
//! request ends. The shadowing candidate, if any, sits beside it the same way.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};

use arc_swap::ArcSwapOption;

mod share;

pub use share::{bucket, Arm, ArmCounts, GuardTrip, ShareRoute};

use crate::config::{GateConfig, ShareConfig};
use crate::learn::{judge, judge_arms, Proposal};
use crate::model::Model;
use crate::promotion::{Actor, Entry, SignOff, SignOffDecision, Trigger, Verdict};
use crate::schema::{LabelKind, Schema};
use crate::store::{
    EntryEffects, Freeze, PendingSignOff, ShadowState, ShareTerms, Store, StoreError,
};
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
    #[error("model `{0}` was never active; with gate.sign_off a rollback goes only to a model that was, so no candidate is served without a sign-off")]
    NeverActive(String),
    #[error("{0}")]
    Incompatible(String),
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// Why an approval or a refusal of a waiting candidate was not applied.
#[derive(Debug, thiserror::Error)]
pub enum SignOffError {
    #[error("no candidate waits for sign-off from run `{run_id}`{}", match .waiting {
        Some(other) => format!(" (run {other}'s candidate waits)"),
        None => " (none waits)".to_owned(),
    })]
    NotWaiting {
        run_id: String,
        waiting: Option<String>,
    },
    #[error("gate.four_eyes: key `{key}` started run {run_id}, so a different operator key must approve its candidate")]
    FourEyes { key: String, run_id: String },
    #[error("run {run_id}'s candidate was judged against {judged}, but {active} is active now: its gate no longer applies (decline it, or start a new run)")]
    Stale {
        run_id: String,
        judged: String,
        active: String,
    },
    #[error("promotions are frozen since {since} (POST /v1/unfreeze first); run {run_id}'s candidate keeps waiting")]
    Frozen { since: String, run_id: String },
    #[error("run {run_id}'s candidate waited longer than gate.sign_off_expires and ended `expired` (log entry {seq})")]
    Expired { run_id: String, seq: u64 },
    #[error("the waiting candidate {0} is missing from the store")]
    MissingCandidate(String),
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
    /// metric and margin; its `sign_off`, `sign_off_expires` and `four_eyes` rule the wait
    /// for a person.
    pub gate: GateConfig,
    pub target: LabelKind,
    /// The traffic share (`[share]`): with `fraction` above 0 a candidate that passed the
    /// holdout gate (and sign-off) answers a sticky share of requests before a live gate
    /// compares the two arms.
    pub share: ShareConfig,
}

impl Rules {
    /// Whether a candidate that passed its gates goes live beside the active model first
    /// (shadowing, with or without a traffic share) instead of being promoted at once.
    fn goes_live_first(&self) -> bool {
        self.shadow_outcomes > 0 || self.share.on()
    }

    /// The share a new shadow starts with, when `[share]` is on.
    fn share_terms(&self) -> Option<ShareTerms> {
        self.share.on().then(|| ShareTerms {
            fraction: self.share.fraction,
            sticky_by: self.share.sticky_by.clone(),
        })
    }

    /// What a candidate does from its `shadowing` entry on, for the entry's reason.
    fn live_phase(&self) -> String {
        match self.share_terms() {
            Some(terms) => format!(
                "it now answers {:.1}% of live requests (share.fraction {}, sticky by {}) and shadows the rest until each arm has {} outcomes (share.outcomes_per_arm), then a live gate compares the two arms",
                100.0 * terms.fraction,
                terms.fraction,
                terms.sticky_by,
                self.share.outcomes_per_arm
            ),
            None => format!(
                "it now shadows live requests until {} of them have outcomes (shadow.outcomes), then a live gate decides",
                self.shadow_outcomes
            ),
        }
    }
}

/// See [`Registry::for_scoring`].
pub struct ScoringModels {
    pub active: arc_swap::Guard<Option<Arc<Model>>>,
    pub shadow: arc_swap::Guard<Option<Arc<Model>>>,
    pub share: arc_swap::Guard<Option<Arc<ShareRoute>>>,
}

/// The active model and the shadowing candidate, and the one door through which they change.
pub struct Registry {
    active: ArcSwapOption<Model>,
    shadow: ArcSwapOption<Model>,
    /// The shadowing candidate's traffic share, when it holds one.
    share: ArcSwapOption<ShareRoute>,
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
            share: ArcSwapOption::empty(),
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
                    registry.route_share(Some(&state));
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
        let state = self.store.shadow_state()?;
        let wanted = state.as_ref().map(|s| s.candidate_id.clone());
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
            let served = model.is_some();
            self.set_shadow(model);
            self.route_share(state.as_ref().filter(|_| served));
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

    /// No model is active (yet): read without a reference count.
    pub fn has_no_active(&self) -> bool {
        self.active.load().is_none()
    }

    pub fn active_id(&self) -> Option<String> {
        self.active.load().as_ref().map(|m| m.id.clone())
    }

    /// The candidate scoring live requests in the shadows, if any.
    pub fn shadow(&self) -> Option<Arc<Model>> {
        self.shadow.load_full()
    }

    /// The shadowing candidate's traffic share, if it holds one: which requests it answers,
    /// and the guardrail's counts.
    pub fn share(&self) -> Option<Arc<ShareRoute>> {
        self.share.load_full()
    }

    /// The active model, the shadowing candidate and its traffic share as the scoring path
    /// reads them on every request: `arc_swap` guards, which take no reference count (three
    /// shared counters bounced between the cores on every score). Hold them only for a
    /// request's synchronous part, never across an `.await`.
    pub fn for_scoring(&self) -> ScoringModels {
        ScoringModels {
            active: self.active.load(),
            shadow: self.shadow.load(),
            share: self.share.load(),
        }
    }

    /// Routes by `state`'s share (or routes nothing to a candidate): a share of the same
    /// candidate keeps its route and counts, a new one starts from zero.
    fn route_share(&self, state: Option<&ShadowState>) {
        let wanted = state.and_then(|s| s.share.clone().map(|terms| (s, terms)));
        match wanted {
            None => self.share.store(None),
            Some((state, terms)) => {
                let current = self.share.load();
                let same = current
                    .as_ref()
                    .is_some_and(|r| r.candidate_id == state.candidate_id && r.terms == terms);
                if !same {
                    self.share.store(Some(Arc::new(ShareRoute::new(
                        &state.candidate_id,
                        terms,
                        &self.rules.share,
                        &self.schema,
                    ))));
                }
            }
        }
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
    /// A candidate that passed the holdout gate waits for sign-off when `gate.sign_off` is
    /// set (stored, not served; see [`Registry::approve`]), else is promoted, or starts
    /// shadowing when `shadow.outcomes` is set and there is an incumbent to shadow. A run's
    /// `actor` (a manual retrain's key) is kept on the wait for the four-eyes rule. It is
    /// `kept` instead when
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
        // An adverse-impact flag with `on_flag = "sign_off"` holds the candidate for a person
        // even when the gate does not ask for one.
        let flagged_for_sign_off = entry.adverse_impact.as_ref().is_some_and(|impact| {
            !impact.flagged.is_empty() && impact.on_flag == crate::config::OnFlag::SignOff
        });
        if entry.verdict == Verdict::Promoted
            && (self.rules.gate.sign_off || flagged_for_sign_off)
            && candidate.is_some()
        {
            entry.verdict = Verdict::Waiting;
            entry.active_after.clone_from(&entry.active_before);
            entry.reason = format!(
                "{}; it waits for an operator's sign-off ({}){}",
                entry.reason,
                if self.rules.gate.sign_off {
                    "gate.sign_off"
                } else {
                    "guardrails.adverse_impact.on_flag"
                },
                match self.rules.gate.sign_off_expires {
                    Some(age) => format!(
                        " until {}",
                        crate::time::to_rfc3339(now_ms() + age.as_millis() as i64)
                    ),
                    None => String::new(),
                }
            );
        } else if entry.verdict == Verdict::Promoted
            && entry.active_before.is_some()
            && self.rules.goes_live_first()
        {
            entry.verdict = Verdict::Shadowing;
            entry.active_after.clone_from(&entry.active_before);
            entry.reason = format!("{}; {}", entry.reason, self.rules.live_phase());
        }
        let active_now = self.active_id();
        let would_change = matches!(
            entry.verdict,
            Verdict::Promoted | Verdict::Shadowing | Verdict::Waiting
        );
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
            (Verdict::Promoted, Some(model)) => self.promote(entry, model, None, false),
            (Verdict::Shadowing, Some(model)) => self.start_shadow(entry, model, false),
            (Verdict::Waiting, Some(model)) => self.start_wait(entry, &model),
            _ => self.store.append_entry(entry, EntryEffects::default()),
        }
    }

    /// Logs `entry` and makes `model` the candidate waiting for sign-off, in one write. A
    /// candidate already waiting is replaced (it can no longer be approved). The caller holds
    /// `changes`.
    fn start_wait(&self, mut entry: Entry, model: &Model) -> Result<Entry, StoreError> {
        if let Some(previous) = self.store.pending_sign_off()? {
            entry.reason = format!(
                "{}; it replaces the candidate {} of run {}, which waited for sign-off since {}",
                entry.reason,
                previous.candidate_id,
                previous.run_id,
                crate::time::to_rfc3339(previous.since)
            );
        }
        let state = PendingSignOff {
            candidate_id: model.id.clone(),
            active_id: entry.active_before.clone(),
            run_id: entry.run_id.clone(),
            entry_seq: 0,
            since: now_ms(),
            started_by: entry.actor.as_ref().and_then(|a| a.key.clone()),
        };
        let effects = EntryEffects {
            sign_off: Some(Some(&state)),
            ..EntryEffects::default()
        };
        self.store.append_entry(entry, effects)
    }

    /// The candidate waiting for sign-off, if any.
    pub fn pending_sign_off(&self) -> Result<Option<PendingSignOff>, StoreError> {
        self.store.pending_sign_off()
    }

    /// Whether a wait that began at `since` has outlived `gate.sign_off_expires` at `now`.
    pub fn sign_off_expired(&self, since: crate::time::Millis, now: crate::time::Millis) -> bool {
        self.rules
            .gate
            .sign_off_expires
            .is_some_and(|age| now - since > age.as_millis() as i64)
    }

    /// An entry of the registry's own (a run id of its own, no evidence) ending the wait of
    /// `wait` with `decision`.
    fn sign_off_entry(
        &self,
        wait: &PendingSignOff,
        decision: SignOffDecision,
        verdict: Verdict,
        reason: String,
        actor: Option<Actor>,
    ) -> Result<Entry, StoreError> {
        let seq = self.store.next_seq("run")?;
        let mut entry = self.bare_entry(&format!("r-{seq}"), Trigger::SignOff, verdict, reason);
        entry.candidate_id = Some(wait.candidate_id.clone());
        entry.actor = actor;
        entry.sign_off = Some(SignOff {
            decision,
            run_id: wait.run_id.clone(),
            entry_seq: wait.entry_seq,
            started_by: wait.started_by.clone(),
            waiting_since: wait.since,
        });
        Ok(entry)
    }

    /// The waiting candidate of run `run_id`, or why there is none. The caller holds
    /// `changes`.
    fn waiting_for(&self, run_id: &str) -> Result<PendingSignOff, SignOffError> {
        match self.store.pending_sign_off()? {
            Some(wait) if wait.run_id == run_id => Ok(wait),
            other => Err(SignOffError::NotWaiting {
                run_id: run_id.to_owned(),
                waiting: other.map(|w| w.run_id),
            }),
        }
    }

    /// Logs the end of `wait` as `expired`, in one write with the end of the wait. The caller
    /// holds `changes`.
    fn expire(&self, wait: &PendingSignOff) -> Result<Entry, StoreError> {
        let days = (now_ms() - wait.since) as f64 / 86_400_000.0;
        let reason = format!(
            "run {}'s candidate {} waited {days:.2} days for sign-off, longer than gate.sign_off_expires; it is not served",
            wait.run_id, wait.candidate_id
        );
        let entry = self.sign_off_entry(
            wait,
            SignOffDecision::Expired,
            Verdict::Expired,
            reason,
            None,
        )?;
        let effects = EntryEffects {
            sign_off: Some(None),
            ..EntryEffects::default()
        };
        self.store.append_entry(entry, effects)
    }

    /// Ends the wait for sign-off as `expired` when it outlived `gate.sign_off_expires` at
    /// `now` (the schedule's tick); `None` when nothing waits or the wait is younger.
    pub fn expire_sign_off(&self, now: crate::time::Millis) -> Result<Option<Entry>, StoreError> {
        let _changes = lock(&self.changes);
        match self.store.pending_sign_off()? {
            Some(wait) if self.sign_off_expired(wait.since, now) => self.expire(&wait).map(Some),
            _ => Ok(None),
        }
    }

    /// An operator approves the candidate of run `run_id` that waits for sign-off: it is
    /// promoted, or starts shadowing when `shadow.outcomes` is set and a model is active. The
    /// entry (trigger `sign_off`, the key's name and reason), the activation history or the
    /// shadow, and the end of the wait are one write; then the swap.
    ///
    /// Refused when no such candidate waits, when the wait has expired (which is logged),
    /// under `gate.four_eyes` when `actor` is the key that started the run, when the active
    /// model changed since the run (its gate no longer applies), or while frozen.
    pub fn approve(&self, run_id: &str, actor: Actor) -> Result<Entry, SignOffError> {
        let _changes = lock(&self.changes);
        self.refresh()?;
        let wait = self.waiting_for(run_id)?;
        if self.sign_off_expired(wait.since, now_ms()) {
            let entry = self.expire(&wait)?;
            return Err(SignOffError::Expired {
                run_id: wait.run_id,
                seq: entry.seq,
            });
        }
        if self.rules.gate.four_eyes {
            if let Some(starter) = &wait.started_by {
                if actor.key.as_deref() == Some(starter.as_str()) {
                    return Err(SignOffError::FourEyes {
                        key: starter.clone(),
                        run_id: wait.run_id,
                    });
                }
            }
        }
        let active = self.active_id();
        if active != wait.active_id {
            return Err(SignOffError::Stale {
                run_id: wait.run_id,
                judged: wait.active_id.unwrap_or_else(|| "no model".into()),
                active: active.unwrap_or_else(|| "no model".into()),
            });
        }
        if let Some(freeze) = self.store.freeze()? {
            return Err(SignOffError::Frozen {
                since: crate::time::to_rfc3339(freeze.since),
                run_id: wait.run_id,
            });
        }
        let model = self
            .store
            .model(&wait.candidate_id)?
            .ok_or_else(|| SignOffError::MissingCandidate(wait.candidate_id.clone()))?;
        model
            .compatible_with(&self.schema)
            .map_err(SignOffError::Incompatible)?;
        let shadows = active.is_some() && self.rules.goes_live_first();
        let by = actor.key.as_deref().unwrap_or("the open API").to_owned();
        let mut entry = self.sign_off_entry(
            &wait,
            SignOffDecision::Approved,
            if shadows {
                Verdict::Shadowing
            } else {
                Verdict::Promoted
            },
            String::new(),
            Some(actor.clone()),
        )?;
        entry.candidate_holdout = model.holdout.clone();
        entry.reason = format!(
            "{by} approved run {}'s candidate {} (log entry {}){}{}",
            wait.run_id,
            wait.candidate_id,
            wait.entry_seq,
            actor
                .reason
                .as_deref()
                .map(|r| format!(": {r}"))
                .unwrap_or_default(),
            if shadows {
                format!("; {}", self.rules.live_phase())
            } else {
                String::new()
            }
        );
        let entry = if shadows {
            self.start_shadow(entry, model, true)?
        } else {
            self.promote(entry, model, None, true)?
        };
        Ok(entry)
    }

    /// An operator declines the candidate of run `run_id` that waits for sign-off: it is
    /// never served. Logged with the key's name and reason, in one write with the end of the
    /// wait. Works while frozen, after the active model changed, and for the key that started
    /// the run (withdrawing one's own candidate needs no second pair of eyes).
    pub fn decline(&self, run_id: &str, actor: Actor) -> Result<Entry, SignOffError> {
        let _changes = lock(&self.changes);
        let wait = self.waiting_for(run_id)?;
        let by = actor.key.as_deref().unwrap_or("the open API").to_owned();
        let reason = format!(
            "{by} declined run {}'s candidate {} (log entry {}){}; it is not served",
            wait.run_id,
            wait.candidate_id,
            wait.entry_seq,
            actor
                .reason
                .as_deref()
                .map(|r| format!(": {r}"))
                .unwrap_or_default(),
        );
        let entry = self.sign_off_entry(
            &wait,
            SignOffDecision::Declined,
            Verdict::Declined,
            reason,
            Some(actor),
        )?;
        let effects = EntryEffects {
            sign_off: Some(None),
            ..EntryEffects::default()
        };
        Ok(self.store.append_entry(entry, effects)?)
    }

    /// Logs `entry` and makes `model` active, in one write, then swaps. `shadow` also sets or
    /// ends the shadow in the same write, and `ends_wait` the wait for sign-off. The caller
    /// holds `changes`.
    fn promote(
        &self,
        mut entry: Entry,
        model: Model,
        shadow: Option<Option<&ShadowState>>,
        ends_wait: bool,
    ) -> Result<Entry, StoreError> {
        let mut history = self.store.active_history()?;
        history.push(model.id.clone());
        entry.active_after = Some(model.id.clone());
        let effects = EntryEffects {
            history: Some(&history),
            shadow,
            sign_off: ends_wait.then_some(None),
            ..EntryEffects::default()
        };
        let entry = self.store.append_entry(entry, effects)?;
        self.activate(Arc::new(model));
        Ok(entry)
    }

    /// Logs `entry` and makes `model` the shadowing candidate, in one write, then swaps. A
    /// candidate already shadowing is replaced (its shadowed outcomes are dropped).
    /// `ends_wait` ends the wait for sign-off in the same write. The caller holds `changes`.
    fn start_shadow(
        &self,
        mut entry: Entry,
        model: Model,
        ends_wait: bool,
    ) -> Result<Entry, StoreError> {
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
            share: self.rules.share_terms(),
        };
        let effects = EntryEffects {
            shadow: Some(Some(&state)),
            sign_off: ends_wait.then_some(None),
            ..EntryEffects::default()
        };
        let entry = self.store.append_entry(entry, effects)?;
        self.set_shadow(Some(Arc::new(model)));
        self.route_share(Some(&state));
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
            let progress = if state.share.is_some() {
                let (c, a) = crate::store::arm_outcome_counts(&outcomes);
                format!(
                    "{c} outcomes on the candidate's arm and {a} on the active model's, of {} each (share.outcomes_per_arm)",
                    self.rules.share.outcomes_per_arm
                )
            } else {
                format!("{} of {needed} shadowed outcomes", outcomes.len())
            };
            entry.reason = format!(
                "{shadow_of}: shadow.max_age passed after {days:.1} days with {progress}; kept"
            );
        } else if let (Some(model), Some(terms)) = (&candidate, &state.share) {
            let judged = judge_arms(&self.rules.gate, self.rules.target, &outcomes);
            entry.share = Some(self.share_evidence(terms, &judged, false));
            judged.judgement.write_to(&mut entry);
            entry.reason = format!(
                "{shadow_of}, which answered {:.1}% of requests: {}",
                100.0 * terms.fraction,
                entry.reason
            );
            if entry.verdict == Verdict::Promoted {
                promote = Some(model.clone());
            }
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
            Some(model) => self.promote(entry, model, Some(None), false)?,
            None => {
                let ends_shadow = EntryEffects {
                    shadow: Some(None),
                    ..EntryEffects::default()
                };
                self.store.append_entry(entry, ends_shadow)?
            }
        };
        self.set_shadow(None);
        self.route_share(None);
        Ok(entry)
    }

    /// The evidence a share's entry carries: the arms' comparison, the paired check and the
    /// guardrail's counts in this process.
    fn share_evidence(
        &self,
        terms: &ShareTerms,
        judged: &crate::learn::ArmsJudgement,
        stopped: bool,
    ) -> crate::promotion::ShareEvidence {
        let route = self.share();
        let counts = |arm| route.as_ref().map(|r| r.counts(arm)).unwrap_or_default();
        let (c, a): (ArmCounts, ArmCounts) = (counts(Arm::Candidate), counts(Arm::Active));
        crate::promotion::ShareEvidence {
            fraction: terms.fraction,
            sticky_by: terms.sticky_by.clone(),
            arms: judged.arms.clone(),
            paired_gain: judged.paired.gain,
            paired_test: judged.paired.test.clone(),
            paired_p_value: judged.paired.p_value,
            candidate_answers: c.answers,
            candidate_errors: c.errors,
            active_answers: a.answers,
            active_errors: a.errors,
            stopped,
        }
    }

    /// The guardrail tripped (`trip`, from [`ShareRoute::note`]): ends `candidate_id`'s
    /// traffic share and its shadow at once, logged `kept` (trigger `shadow`) with the error
    /// counts and the arms' evidence so far, as a run of its own. Routing to the candidate
    /// already stopped when the guardrail tripped; this makes it durable. `None` when that
    /// candidate no longer holds a share (another transition ended it first).
    pub fn stop_share(
        &self,
        candidate_id: &str,
        trip: &GuardTrip,
    ) -> Result<Option<Entry>, StoreError> {
        let _changes = lock(&self.changes);
        self.refresh()?;
        let Some(state) = self.store.shadow_state()? else {
            return Ok(None);
        };
        let Some(terms) = state
            .share
            .clone()
            .filter(|_| state.candidate_id == candidate_id)
        else {
            return Ok(None);
        };
        let outcomes = self.store.shadowed_outcomes(&state.candidate_id)?;
        let judged = judge_arms(&self.rules.gate, self.rules.target, &outcomes);
        let seq = self.store.next_seq("run")?;
        let mut entry = self.bare_entry(
            &format!("r-{seq}"),
            Trigger::Shadow,
            Verdict::Kept,
            format!(
                "traffic share of {} (shadowing since run {}, log entry {}) stopped by its error guardrail: {}; kept",
                state.candidate_id,
                state.run_id,
                state.entry_seq,
                trip.describe()
            ),
        );
        entry.candidate_id = Some(state.candidate_id.clone());
        entry.window.gate_rows = Some(outcomes.len());
        let mut evidence = self.share_evidence(&terms, &judged, true);
        // The counts that tripped it, not whatever arrived since.
        evidence.candidate_answers = trip.candidate.answers;
        evidence.candidate_errors = trip.candidate.errors;
        evidence.active_answers = trip.active.answers;
        evidence.active_errors = trip.active.errors;
        entry.share = Some(evidence);
        let ends_shadow = EntryEffects {
            shadow: Some(None),
            ..EntryEffects::default()
        };
        let entry = self.store.append_entry(entry, ends_shadow)?;
        self.set_shadow(None);
        self.route_share(None);
        Ok(Some(entry))
    }

    /// Makes an earlier model active again and logs it as a run of its own: the previous one
    /// in the activation history, or `to`. A shadow measured against the model rolled away
    /// from ends in the same write. Works while promotions are frozen. `actor` (the key's
    /// name and reason) is recorded in the entry.
    pub fn rollback(&self, to: Option<&str>, actor: Actor) -> Result<Entry, RollbackError> {
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
                if self.rules.gate.sign_off && !history.iter().any(|h| h == id) {
                    return Err(RollbackError::NeverActive(id.to_owned()));
                }
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
        if let Some(reason) = &actor.reason {
            entry.reason = format!("{}: {reason}", entry.reason);
        }
        entry.actor = Some(actor);
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
            ..EntryEffects::default()
        };
        let entry = self.store.append_entry(entry, effects)?;
        self.activate(Arc::new(target));
        if shadow.is_some() {
            self.set_shadow(None);
            self.route_share(None);
        }
        Ok(entry)
    }

    /// Whether promotions are frozen, and since when.
    pub fn frozen(&self) -> Result<Option<Freeze>, StoreError> {
        self.store.freeze()
    }

    /// Freezes promotions: runs still train and log, but every verdict that would promote,
    /// start a shadow or wait for sign-off is `kept` with the reason "frozen", and approvals
    /// are refused; rollback still works. Survives restarts. Logged (trigger `freeze`, the
    /// key's name and reason) in one write with the freeze. Freezing again keeps the first
    /// freeze (its time, key and reason) and logs nothing.
    pub fn freeze(&self, actor: Actor) -> Result<Freeze, StoreError> {
        let _changes = lock(&self.changes);
        if let Some(current) = self.store.freeze()? {
            return Ok(current);
        }
        let state = Freeze {
            since: now_ms(),
            by: actor.key.clone(),
            reason: actor.reason.clone(),
        };
        let entry = self.operator_entry(Trigger::Freeze, "froze promotions", actor)?;
        let effects = EntryEffects {
            freeze: Some(Some(&state)),
            ..EntryEffects::default()
        };
        self.store.append_entry(entry, effects)?;
        Ok(state)
    }

    /// Lets verdicts promote again. Logged (trigger `unfreeze`) in one write with the lifted
    /// freeze; `None` (nothing logged) when promotions were not frozen.
    pub fn unfreeze(&self, actor: Actor) -> Result<Option<Entry>, StoreError> {
        let _changes = lock(&self.changes);
        if self.store.freeze()?.is_none() {
            return Ok(None);
        }
        let entry =
            self.operator_entry(Trigger::Unfreeze, "let promotions through again", actor)?;
        let effects = EntryEffects {
            freeze: Some(None),
            ..EntryEffects::default()
        };
        self.store.append_entry(entry, effects).map(Some)
    }

    /// An entry for an operator's action that changes no model: its own run id, `kept`, the
    /// key's name and reason.
    fn operator_entry(
        &self,
        trigger: Trigger,
        what: &str,
        actor: Actor,
    ) -> Result<Entry, StoreError> {
        let seq = self.store.next_seq("run")?;
        let by = actor.key.as_deref().unwrap_or("the open API");
        let reason = match &actor.reason {
            Some(reason) => format!("{by} {what}: {reason}"),
            None => format!("{by} {what}"),
        };
        let mut entry = self.bare_entry(&format!("r-{seq}"), trigger, Verdict::Kept, reason);
        entry.actor = Some(actor);
        Ok(entry)
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
