//! The schedule: what queues a run or a live gate, and when. A timer (`schedule.every`), a
//! count of new labels (`schedule.new_labels`), drift at the act band (`schedule.on_drift`,
//! checked every `drift.check_every`), a significant decline of the active model on recent
//! outcomes (`schedule.on_decline`, checked on the same timer), and the shadowing candidate: its live gate is queued
//! once it has `shadow.outcomes` outcomes (with a traffic share, once each arm has
//! `share.outcomes_per_arm` outcomes of the requests it answered), or once it is older than
//! `shadow.max_age`. It also
//! ends a wait for sign-off older than `gate.sign_off_expires` (`expired`, through the
//! registry: no training, so no queued run).
//!
//! Only the leading replica acts on any of them (on a store of its own, the process always
//! leads); a follower's timers tick and do nothing.

use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::Duration;

use tokio::sync::watch;

use super::{JobKind, Retrainer};
use crate::promotion::Trigger;
use crate::threads::lock;
use crate::time::now_ms;

impl Retrainer {
    /// Queues the live gate when the shadow has its outcomes, or has aged out.
    fn check_shadow(&self) {
        if !self.engine.leadership.leads() {
            return;
        }
        let shadow = &self.engine.config.shadow;
        let Ok(Some(state)) = self.engine.store.shadow_state() else {
            return;
        };
        let expired = shadow
            .max_age
            .is_some_and(|age| now_ms() - state.since > age.as_millis() as i64);
        let ready = if state.share.is_some() {
            // A traffic share: each arm needs its own outcomes.
            let needed = self.engine.config.share.outcomes_per_arm;
            match self.engine.store.shadowed_outcomes(&state.candidate_id) {
                Ok(rows) => {
                    let (candidate, active) = crate::store::arm_outcome_counts(&rows);
                    candidate >= needed && active >= needed
                }
                Err(e) => {
                    tracing::warn!(error = %e, "traffic share progress not read");
                    false
                }
            }
        } else {
            self.engine.store.shadowed_count(&state.candidate_id) as u64 >= shadow.outcomes
        };
        if !(ready || expired) || self.engine.live_gate_pending.swap(true, Ordering::SeqCst) {
            return;
        }
        match self.enqueue(
            Trigger::Shadow,
            JobKind::LiveGate { expired: !ready },
            None,
            None,
        ) {
            Ok(run) => tracing::info!(run_id = %run.run_id, expired = !ready, "live gate queued"),
            Err(e) => {
                self.engine.live_gate_pending.store(false, Ordering::SeqCst);
                tracing::warn!(error = %e, "live gate not queued");
            }
        }
    }

    /// Ends the wait for sign-off as `expired` once it is older than `gate.sign_off_expires`.
    /// The registry checks the age again under its lock, so a tick racing an approval can
    /// never end a wait twice or expire an approved candidate.
    fn check_sign_off(&self) {
        if !self.engine.leadership.leads() {
            return;
        }
        let registry = &self.engine.registry;
        match registry.pending_sign_off() {
            Ok(Some(wait)) if registry.sign_off_expired(wait.since, now_ms()) => {}
            Ok(_) => return,
            Err(e) => {
                tracing::warn!(error = %e, "sign-off expiry not checked");
                return;
            }
        }
        match registry.expire_sign_off(now_ms()) {
            Ok(Some(entry)) => {
                tracing::info!(run_id = %entry.run_id, reason = %entry.reason, "sign-off expired");
            }
            Ok(None) => {}
            Err(e) => tracing::warn!(error = %e, "sign-off expiry not logged"),
        }
    }

    /// Starts a run when drift reached the act band, once per active model.
    fn check_drift(&self) {
        let engine = &self.engine;
        if !engine.leadership.leads() {
            return;
        }
        let Some(model) = engine.registry.active() else {
            return;
        };
        if lock(&engine.drift_run_for).as_deref() == Some(model.id.as_str()) {
            return;
        }
        let report = match crate::monitor::drift_report(
            engine.store.as_ref(),
            &engine.schema,
            &engine.config,
            &model,
        ) {
            Ok(Some(report)) => report,
            Ok(None) => return,
            Err(e) => {
                tracing::warn!(error = %e, "drift check failed");
                return;
            }
        };
        let breaches = report.breaches();
        if breaches.is_empty() || engine.in_flight.load(Ordering::SeqCst) > 0 {
            return;
        }
        let detail = format!(
            "PSI at or above drift.act {} against {}: {}",
            report.act,
            model.id,
            breaches
                .iter()
                .map(|(name, psi)| format!("{name} {psi:.3}"))
                .collect::<Vec<_>>()
                .join(", ")
        );
        match self.enqueue(Trigger::Drift, JobKind::Train, Some(detail.clone()), None) {
            Ok(run) => {
                *lock(&engine.drift_run_for) = Some(model.id.clone());
                tracing::info!(run_id = %run.run_id, %detail, "drift run queued");
            }
            Err(e) => tracing::warn!(error = %e, "drift run not queued"),
        }
    }

    /// Starts a run when the active model's metric on its latest labeled rows fell
    /// significantly below its holdout's, once per active model.
    fn check_decline(&self) {
        let engine = &self.engine;
        if !engine.leadership.leads() {
            return;
        }
        let Some(model) = engine.registry.active() else {
            return;
        };
        if lock(&engine.decline_run_for).as_deref() == Some(model.id.as_str())
            || engine.in_flight.load(Ordering::SeqCst) > 0
        {
            return;
        }
        let check = match crate::monitor::decline_check(
            engine.store.as_ref(),
            &engine.schema,
            &engine.config,
            &model,
        ) {
            Ok(Some(check)) => check,
            Ok(None) => return,
            Err(e) => {
                tracing::warn!(error = %e, "decline check failed");
                return;
            }
        };
        if !check.declined {
            return;
        }
        let detail = check.describe(&model.id);
        match self.enqueue(Trigger::Decline, JobKind::Train, Some(detail.clone()), None) {
            Ok(run) => {
                *lock(&engine.decline_run_for) = Some(model.id.clone());
                tracing::info!(run_id = %run.run_id, %detail, "decline run queued");
            }
            Err(e) => tracing::warn!(error = %e, "decline run not queued"),
        }
    }

    /// The schedule: starts runs on the `schedule.every` timer and once `schedule.new_labels`
    /// labels have arrived, until `shutdown` turns true.
    pub async fn run_schedule(self: Arc<Self>, mut shutdown: watch::Receiver<bool>) {
        let schedule = self.engine.config.schedule.clone();
        let period = schedule
            .every
            .unwrap_or(Duration::from_secs(365 * 24 * 3600));
        let mut timer = tokio::time::interval_at(tokio::time::Instant::now() + period, period);
        timer.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        // Shadow expiry is checked every minute; drift every drift.check_every.
        let mut minute = tokio::time::interval(Duration::from_secs(60));
        minute.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        // The wait for sign-off every minute, or every tenth of gate.sign_off_expires when
        // that is shorter (at least once a second), so a short expiry ends close to its age.
        let sign_off_period = self
            .engine
            .config
            .gate
            .sign_off_expires
            .map_or(Duration::from_secs(60), |age| {
                (age / 10).clamp(Duration::from_secs(1), Duration::from_secs(60))
            });
        let mut sign_off_timer = tokio::time::interval(sign_off_period);
        sign_off_timer.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        let drift_period = self
            .engine
            .config
            .drift
            .check_every
            .unwrap_or(Duration::from_secs(900));
        let mut drift_timer =
            tokio::time::interval_at(tokio::time::Instant::now() + drift_period, drift_period);
        drift_timer.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            tokio::select! {
                _ = self.engine.shadow_outcome.notified() => {
                    let this = Arc::clone(&self);
                    let _ = tokio::task::spawn_blocking(move || this.check_shadow()).await;
                }
                _ = minute.tick() => {
                    let this = Arc::clone(&self);
                    let _ = tokio::task::spawn_blocking(move || this.check_shadow()).await;
                }
                _ = sign_off_timer.tick() => {
                    let this = Arc::clone(&self);
                    let _ = tokio::task::spawn_blocking(move || this.check_sign_off()).await;
                }
                _ = drift_timer.tick(), if schedule.on_drift || schedule.on_decline => {
                    let this = Arc::clone(&self);
                    let _ = tokio::task::spawn_blocking(move || {
                        if this.engine.config.schedule.on_drift {
                            this.check_drift();
                        }
                        if this.engine.config.schedule.on_decline {
                            this.check_decline();
                        }
                    })
                    .await;
                }
                _ = timer.tick(), if schedule.every.is_some() => {
                    if let Some(run) = self.request_if_idle(Trigger::Interval) {
                        tracing::info!(run_id = %run.run_id, "interval run queued");
                    }
                }
                _ = self.engine.labels_arrived.notified(), if schedule.new_labels.is_some() => {
                    let threshold = schedule.new_labels.unwrap_or(u64::MAX);
                    if self.engine.labels_since_run.load(Ordering::SeqCst) >= threshold {
                        if let Some(run) = self.request_if_idle(Trigger::NewLabels) {
                            tracing::info!(run_id = %run.run_id, "new-label run queued");
                        }
                    }
                }
                _ = shutdown.changed() => return,
            }
        }
    }
}
