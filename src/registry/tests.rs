//! Each transition of the lifecycle against a real (temporary) sled store: what it logs, what
//! it changes in the store, what scoring sees afterwards, and what it refuses.

use std::sync::Arc;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::*;
use crate::config::Config;
use crate::demo::scenario::{invoice, Regime};
use crate::metrics::GateMetric;
use crate::model::{Estimator, Penalty, Preprocessor, Setting, TrainingFacts};
use crate::promotion::DataWindow;
use crate::schema::Row;
use crate::store::{ScoreRecord, ShadowScore, SledStore};

struct Fixture {
    _dir: tempfile::TempDir,
    store: Arc<dyn Store>,
    schema: Arc<Schema>,
    rows: Vec<Row>,
}

fn fixture() -> Fixture {
    let dir = tempfile::tempdir().unwrap();
    let store: Arc<dyn Store> = Arc::new(SledStore::open(dir.path()).unwrap());
    let schema = Arc::new(Config::embedded_default().schema());
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let rows = (0..50)
        .map(|_| schema.parse_row(&invoice(&mut rng, Regime::Before).features))
        .collect::<Result<Vec<_>, _>>()
        .unwrap();
    Fixture {
        _dir: dir,
        store,
        schema,
        rows,
    }
}

/// Rules with `gate.sign_off` on, `four_eyes` as given, expiring after `expires_ms`.
fn sign_off_rules(shadow_outcomes: u64, four_eyes: bool, expires_ms: u64) -> Rules {
    let mut rules = rules(shadow_outcomes);
    rules.gate.sign_off = true;
    rules.gate.four_eyes = four_eyes;
    rules.gate.sign_off_expires = Some(std::time::Duration::from_millis(expires_ms));
    rules
}

fn by(key: &str, reason: &str) -> Actor {
    Actor {
        key: Some(key.into()),
        reason: Some(reason.into()),
    }
}

fn rules(shadow_outcomes: u64) -> Rules {
    Rules {
        shadow_outcomes,
        gate: crate::config::GateConfig {
            metric: GateMetric::Auc,
            margin: 0.02,
            min_rows: 10,
            alpha: 0.05,
            ..crate::config::GateConfig::default()
        },
        target: LabelKind::Binary,
        share: crate::config::ShareConfig::default(),
    }
}

impl Fixture {
    fn registry(&self, shadow_outcomes: u64) -> Registry {
        Registry::restore(
            Arc::clone(&self.store),
            Arc::clone(&self.schema),
            rules(shadow_outcomes),
        )
        .unwrap()
    }

    /// A linear model whose log-odds is `slope` × the first standardized column.
    fn model(&self, seq: u64, slope: f64) -> Model {
        let rows: Vec<&Row> = self.rows.iter().collect();
        let preprocessor = Preprocessor::fit(&self.schema, &rows);
        let mut weights = vec![0.0; preprocessor.width()];
        weights[0] = slope;
        Model::new(
            seq,
            1_000,
            Setting::Logistic {
                penalty: Penalty::L2,
                l1_ratio: 0.0,
                lambda: 0.01,
            },
            LabelKind::Binary,
            preprocessor,
            Estimator::Linear {
                weights,
                intercept: 0.0,
            },
            TrainingFacts {
                run_id: format!("r-{seq}"),
                rows: 50,
                positives: 10,
                from: 0,
                cutoff: 1_000,
            },
        )
    }
}

/// What a run proposes: `passed` says whether its candidate passed the holdout gate.
fn proposal(run: &str, active: Option<&str>, candidate: Model, passed: bool) -> Proposal {
    let mut entry = Entry::bare(
        run,
        Trigger::Manual,
        now_ms(),
        (GateMetric::Auc, 0.02),
        active.map(str::to_owned),
        if passed {
            Verdict::Promoted
        } else {
            Verdict::Kept
        },
        if passed {
            "the gate passed".into()
        } else {
            "below the margin".into()
        },
    );
    entry.window = DataWindow::default();
    entry.candidate_id = Some(candidate.id.clone());
    if passed {
        entry.active_after = Some(candidate.id.clone());
    }
    Proposal {
        entry,
        candidate: Some(candidate),
    }
}

fn promote_first(f: &Fixture, registry: &Registry, seq: u64) -> Model {
    let model = f.model(seq, 1.0);
    let entry = registry
        .settle_run(
            proposal(&format!("r-{seq}"), None, model.clone(), true),
            None,
        )
        .unwrap();
    assert_eq!(entry.verdict, Verdict::Promoted, "{}", entry.reason);
    model
}

#[test]
fn a_passed_gate_promotes_logs_and_swaps_in_one_step() {
    let f = fixture();
    let registry = f.registry(0);
    assert!(registry.active().is_none());
    let first = promote_first(&f, &registry, 1);
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    let second = f.model(2, 2.0);
    let entry = registry
        .settle_run(
            proposal("r-2", Some(&first.id), second.clone(), true),
            Some("because".into()),
        )
        .unwrap();
    assert_eq!(entry.verdict, Verdict::Promoted);
    assert_eq!(entry.active_after.as_deref(), Some(second.id.as_str()));
    assert_eq!(entry.trigger_detail.as_deref(), Some("because"));
    assert_eq!(registry.active_id().as_deref(), Some(second.id.as_str()));
    // The store agrees, so a restart restores the same model.
    assert_eq!(
        f.store.active_history().unwrap(),
        vec![first.id.clone(), second.id.clone()]
    );
    assert_eq!(f.registry(0).active_id(), registry.active_id());
    assert_eq!(f.store.entries(10).unwrap().len(), 2);
}

#[test]
fn a_failed_gate_is_logged_and_changes_nothing_but_keeps_the_candidate_for_the_record() {
    let f = fixture();
    let registry = f.registry(0);
    let first = promote_first(&f, &registry, 1);
    let challenger = f.model(2, 0.5);
    let entry = registry
        .settle_run(
            proposal("r-2", Some(&first.id), challenger.clone(), false),
            None,
        )
        .unwrap();
    assert_eq!(entry.verdict, Verdict::Kept);
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    assert!(f.store.model(&challenger.id).unwrap().is_some());
    assert_eq!(f.store.active_history().unwrap(), vec![first.id]);
}

#[test]
fn frozen_promotions_keep_the_incumbent_and_say_why() {
    let f = fixture();
    let registry = f.registry(0);
    let first = promote_first(&f, &registry, 1);
    let since = registry.freeze(Actor::default()).unwrap().since;
    // Freezing again keeps the first freeze's time.
    assert_eq!(registry.freeze(Actor::default()).unwrap().since, since);
    let entry = registry
        .settle_run(
            proposal("r-2", Some(&first.id), f.model(2, 2.0), true),
            None,
        )
        .unwrap();
    assert_eq!(entry.verdict, Verdict::Kept);
    assert!(entry.reason.starts_with("frozen:"), "{}", entry.reason);
    assert!(entry.reason.contains("the gate passed"), "{}", entry.reason);
    assert_eq!(entry.active_after.as_deref(), Some(first.id.as_str()));
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    registry.unfreeze(Actor::default()).unwrap();
    assert!(registry.frozen().unwrap().is_none());
    let third = f.model(3, 3.0);
    let entry = registry
        .settle_run(proposal("r-3", Some(&first.id), third.clone(), true), None)
        .unwrap();
    assert_eq!(entry.verdict, Verdict::Promoted);
    assert_eq!(registry.active_id().as_deref(), Some(third.id.as_str()));
}

#[test]
fn a_run_judged_against_a_model_that_is_no_longer_active_cannot_promote() {
    let f = fixture();
    let registry = f.registry(0);
    let first = promote_first(&f, &registry, 1);
    let second = f.model(2, 2.0);
    registry
        .settle_run(proposal("r-2", Some(&first.id), second.clone(), true), None)
        .unwrap();
    // Run 3 started while `first` was active and finished after `second` replaced it.
    let late = f.model(3, 3.0);
    let entry = registry
        .settle_run(proposal("r-3", Some(&first.id), late, true), None)
        .unwrap();
    assert_eq!(entry.verdict, Verdict::Kept);
    assert!(
        entry.reason.contains("changed while this run trained"),
        "{}",
        entry.reason
    );
    assert_eq!(entry.active_after.as_deref(), Some(second.id.as_str()));
    assert_eq!(registry.active_id().as_deref(), Some(second.id.as_str()));
}

#[test]
fn with_shadowing_configured_a_passed_gate_starts_a_shadow_and_a_newer_one_replaces_it() {
    let f = fixture();
    let registry = f.registry(50);
    // The first model has nobody to shadow: it is promoted at once.
    let first = promote_first(&f, &registry, 1);
    let candidate = f.model(2, 2.0);
    let entry = registry
        .settle_run(
            proposal("r-2", Some(&first.id), candidate.clone(), true),
            None,
        )
        .unwrap();
    assert_eq!(entry.verdict, Verdict::Shadowing, "{}", entry.reason);
    assert_eq!(entry.active_after.as_deref(), Some(first.id.as_str()));
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    assert_eq!(
        registry.shadow().map(|m| m.id.clone()).as_deref(),
        Some(candidate.id.as_str())
    );
    let state = f.store.shadow_state().unwrap().unwrap();
    assert_eq!(state.candidate_id, candidate.id);
    assert_eq!(state.active_id, first.id);
    assert_eq!(state.entry_seq, entry.seq);
    let newer = f.model(3, 3.0);
    let entry = registry
        .settle_run(proposal("r-3", Some(&first.id), newer.clone(), true), None)
        .unwrap();
    assert!(
        entry.reason.contains(&format!(
            "replaces the shadowing candidate {}",
            candidate.id
        )),
        "{}",
        entry.reason
    );
    assert_eq!(
        f.store.shadow_state().unwrap().unwrap().candidate_id,
        newer.id
    );
    // A restart restores the shadow too.
    assert_eq!(
        f.registry(50).shadow().map(|m| m.id.clone()),
        Some(newer.id.clone())
    );
}

/// Stores `records` and an outcome for each: 1 for even positions, 0 for odd ones (the
/// callers make even positions the positives).
fn store_with_outcomes(f: &Fixture, records: &[ScoreRecord]) {
    f.store.record_scores(records).unwrap();
    for (i, record) in records.iter().enumerate() {
        let label = if i % 2 == 0 { 1.0 } else { 0.0 };
        f.store
            .put_outcome(&record.score_id, label, now_ms())
            .unwrap();
    }
}

/// Records `n` shadowed scores with their outcomes: the candidate ranks every positive above
/// every negative, the active model ranks them backwards.
fn shadowed_outcomes(f: &Fixture, active: &Model, candidate: &Model, n: usize) {
    let base = ulid::Ulid::new();
    let records: Vec<ScoreRecord> = (0..n)
        .map(|i| {
            let positive = i % 2 == 0;
            let mut record = crate::store::test_record(
                &ulid::Ulid::from_parts(base.timestamp_ms(), base.random() + i as u128).to_string(),
            );
            record.model_id = active.id.clone();
            record.output = if positive { 0.2 } else { 0.8 };
            record.shadow = Some(ShadowScore {
                model_id: candidate.id.clone(),
                output: if positive { 0.9 } else { 0.1 },
            });
            record
        })
        .collect();
    store_with_outcomes(f, &records);
}

#[test]
fn the_live_gate_promotes_a_better_shadow_and_ends_the_shadow_in_the_same_write() {
    let f = fixture();
    let registry = f.registry(40);
    let first = promote_first(&f, &registry, 1);
    let candidate = f.model(2, 2.0);
    registry
        .settle_run(
            proposal("r-2", Some(&first.id), candidate.clone(), true),
            None,
        )
        .unwrap();
    shadowed_outcomes(&f, &first, &candidate, 40);
    assert_eq!(f.store.shadowed_count(&candidate.id), 40);
    let entry = registry.end_shadow("r-3", Trigger::Shadow, false).unwrap();
    assert_eq!(entry.verdict, Verdict::Promoted, "{}", entry.reason);
    assert_eq!(entry.window.gate_rows, Some(40));
    assert_eq!(entry.gain.map(|g| g > 0.9), Some(true));
    assert_eq!(registry.active_id().as_deref(), Some(candidate.id.as_str()));
    assert!(registry.shadow().is_none());
    assert!(f.store.shadow_state().unwrap().is_none());
    assert_eq!(
        f.store.active_history().unwrap(),
        vec![first.id.clone(), candidate.id.clone()]
    );
}

#[test]
fn the_live_gate_refuses_while_frozen_when_expired_and_when_the_incumbent_changed() {
    let f = fixture();
    let registry = f.registry(40);
    let first = promote_first(&f, &registry, 1);
    let start_shadow = |seq: u64| {
        let candidate = f.model(seq, 2.0);
        let active = registry.active_id();
        registry
            .settle_run(
                proposal(
                    &format!("r-{seq}"),
                    active.as_deref(),
                    candidate.clone(),
                    true,
                ),
                None,
            )
            .unwrap();
        candidate
    };

    // Frozen: the live gate passes but the incumbent stays; the shadow ends.
    let candidate = start_shadow(2);
    shadowed_outcomes(&f, &first, &candidate, 40);
    registry.freeze(Actor::default()).unwrap();
    let entry = registry.end_shadow("r-3", Trigger::Shadow, false).unwrap();
    assert_eq!(entry.verdict, Verdict::Kept);
    assert!(entry.reason.starts_with("frozen:"), "{}", entry.reason);
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    assert!(registry.shadow().is_none());
    registry.unfreeze(Actor::default()).unwrap();

    // Expired: kept for its age, whatever its outcomes say.
    let candidate = start_shadow(4);
    shadowed_outcomes(&f, &first, &candidate, 40);
    let entry = registry.end_shadow("r-5", Trigger::Shadow, true).unwrap();
    assert_eq!(entry.verdict, Verdict::Kept);
    assert!(entry.reason.contains("shadow.max_age"), "{}", entry.reason);
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));

    // The incumbent changed while it shadowed (a rollback to a model rolled away from).
    let candidate = start_shadow(6);
    shadowed_outcomes(&f, &first, &candidate, 40);
    let other = f.model(7, -1.0);
    f.store.put_model(&other).unwrap();
    registry
        .rollback(Some(&other.id), Actor::default())
        .unwrap();
    // The rollback ended the shadow it invalidated.
    assert!(f.store.shadow_state().unwrap().is_none());
    let entry = registry.end_shadow("r-8", Trigger::Shadow, false).unwrap();
    assert_eq!(entry.verdict, Verdict::Kept);
    assert_eq!(
        entry.reason,
        "no candidate was shadowing when the live gate ran"
    );
    assert_eq!(registry.active_id().as_deref(), Some(other.id.as_str()));
}

#[test]
fn rollback_goes_back_one_step_or_to_a_named_model_and_refuses_what_it_cannot_do() {
    let f = fixture();
    let registry = f.registry(0);
    assert!(matches!(
        registry.rollback(None, Actor::default()),
        Err(RollbackError::NothingToRollBackTo)
    ));
    let first = promote_first(&f, &registry, 1);
    assert!(matches!(
        registry.rollback(None, Actor::default()),
        Err(RollbackError::NothingToRollBackTo)
    ));
    let second = f.model(2, 2.0);
    registry
        .settle_run(proposal("r-2", Some(&first.id), second.clone(), true), None)
        .unwrap();
    assert!(matches!(
        registry.rollback(Some(&second.id), Actor::default()),
        Err(RollbackError::AlreadyActive(_))
    ));
    assert!(matches!(
        registry.rollback(Some("m-99-00000000"), Actor::default()),
        Err(RollbackError::UnknownModel(_))
    ));
    let entry = registry.rollback(None, Actor::default()).unwrap();
    assert_eq!(entry.trigger, Trigger::Rollback);
    assert_eq!(entry.verdict, Verdict::Promoted);
    assert_eq!(entry.active_before.as_deref(), Some(second.id.as_str()));
    assert_eq!(entry.active_after.as_deref(), Some(first.id.as_str()));
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    assert_eq!(f.store.active_history().unwrap(), vec![first.id.clone()]);
    // Forward again, by name: the history grows.
    registry
        .rollback(Some(&second.id), Actor::default())
        .unwrap();
    assert_eq!(registry.active_id().as_deref(), Some(second.id.as_str()));
    assert_eq!(
        f.store.active_history().unwrap(),
        vec![first.id.clone(), second.id.clone()]
    );
}

#[test]
fn rollback_refuses_a_model_that_does_not_fit_todays_schema() {
    let f = fixture();
    let registry = f.registry(0);
    let first = promote_first(&f, &registry, 1);
    // A model fitted on another schema: one feature fewer.
    let mut config = Config::embedded_default();
    config.features.pop();
    let narrow_schema = config.schema();
    let rows: Vec<Row> = {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        (0..20)
            .map(|_| {
                let mut features = invoice(&mut rng, Regime::Before).features;
                features.remove(&Config::embedded_default().features.last().unwrap().name);
                narrow_schema.parse_row(&features).unwrap()
            })
            .collect()
    };
    let refs: Vec<&Row> = rows.iter().collect();
    let preprocessor = Preprocessor::fit(&narrow_schema, &refs);
    let width = preprocessor.width();
    let narrow = Model::new(
        9,
        1_000,
        first.setting,
        LabelKind::Binary,
        preprocessor,
        Estimator::Linear {
            weights: vec![0.0; width],
            intercept: 0.0,
        },
        first.trained.clone(),
    );
    f.store.put_model(&narrow).unwrap();
    assert!(matches!(
        registry.rollback(Some(&narrow.id), Actor::default()),
        Err(RollbackError::Incompatible(_))
    ));
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
}

#[test]
fn a_replica_follows_promotions_shadows_and_rollbacks_another_made_in_the_store() {
    // Two registries on one store stand for two replicas on one database.
    let f = fixture();
    let writer = f.registry(50);
    let follower = f.registry(50);
    assert!(!follower.follow_store().unwrap(), "nothing to follow yet");
    let first = promote_first(&f, &writer, 1);
    assert_eq!(
        follower.active_id(),
        None,
        "a follower swaps only when told"
    );
    assert!(follower.follow_store().unwrap());
    assert_eq!(follower.active_id().as_deref(), Some(first.id.as_str()));
    assert!(!follower.follow_store().unwrap(), "once");

    let candidate = f.model(2, 2.0);
    writer
        .settle_run(
            proposal("r-2", Some(&first.id), candidate.clone(), true),
            None,
        )
        .unwrap();
    assert!(follower.follow_store().unwrap());
    assert_eq!(
        follower.shadow().map(|m| m.id.clone()),
        Some(candidate.id.clone())
    );
    // A rollback to the candidate ends the shadow: the follower serves both changes.
    writer
        .rollback(Some(&candidate.id), Actor::default())
        .unwrap();
    assert!(follower.follow_store().unwrap());
    assert_eq!(follower.active_id().as_deref(), Some(candidate.id.as_str()));
    assert!(follower.shadow().is_none());
}

#[test]
fn on_a_shared_store_a_transition_sees_another_replicas_rollback_first() {
    let f = fixture();
    let leader = f.registry(0);
    leader.share_store();
    let operator = f.registry(0);
    let first = promote_first(&f, &leader, 1);
    let second = f.model(2, 2.0);
    leader
        .settle_run(proposal("r-2", Some(&first.id), second.clone(), true), None)
        .unwrap();
    // Another replica rolls back while the leader trains against `second`.
    operator.follow_store().unwrap();
    operator.rollback(None, Actor::default()).unwrap();
    assert_eq!(leader.active_id().as_deref(), Some(second.id.as_str()));
    let third = f.model(3, 3.0);
    let entry = leader
        .settle_run(proposal("r-3", Some(&second.id), third, true), None)
        .unwrap();
    assert_eq!(entry.verdict, Verdict::Kept, "{}", entry.reason);
    assert!(
        entry
            .reason
            .contains("the active model changed while this run trained"),
        "{}",
        entry.reason
    );
    assert_eq!(leader.active_id().as_deref(), Some(first.id.as_str()));
    assert_eq!(f.store.active_history().unwrap(), vec![first.id.clone()]);
}

impl Fixture {
    fn registry_with(&self, rules: Rules) -> Registry {
        Registry::restore(Arc::clone(&self.store), Arc::clone(&self.schema), rules).unwrap()
    }
}

/// A run started by `starter` whose candidate passes the gate: with sign-off it waits.
fn waiting_run(
    registry: &Registry,
    run: &str,
    active: Option<&str>,
    candidate: &Model,
    starter: Option<&str>,
) -> Entry {
    let mut proposal = proposal(run, active, candidate.clone(), true);
    proposal.entry.actor = starter.map(|key| Actor {
        key: Some(key.into()),
        reason: None,
    });
    let entry = registry.settle_run(proposal, None).unwrap();
    assert_eq!(entry.verdict, Verdict::Waiting, "{}", entry.reason);
    entry
}

#[test]
fn a_passed_gate_waits_for_sign_off_stored_but_not_served_and_an_approval_promotes_once() {
    let f = fixture();
    let plain = f.registry(0);
    let first = promote_first(&f, &plain, 1);
    let registry = f.registry_with(sign_off_rules(0, false, 3_600_000));
    let second = f.model(2, 2.0);
    let waiting = waiting_run(&registry, "r-2", Some(&first.id), &second, Some("alice"));
    assert_eq!(waiting.active_after.as_deref(), Some(first.id.as_str()));
    assert!(
        waiting.reason.contains("gate.sign_off"),
        "{}",
        waiting.reason
    );
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    assert!(f.store.model(&second.id).unwrap().is_some(), "stored");
    let wait = f.store.pending_sign_off().unwrap().unwrap();
    assert_eq!(
        (
            wait.run_id.as_str(),
            wait.entry_seq,
            wait.started_by.as_deref()
        ),
        ("r-2", waiting.seq, Some("alice"))
    );

    let approved = registry
        .approve("r-2", by("bob", "reviewed the evidence"))
        .unwrap();
    assert_eq!(approved.verdict, Verdict::Promoted);
    assert_eq!(approved.trigger, Trigger::SignOff);
    assert_eq!(approved.active_after.as_deref(), Some(second.id.as_str()));
    let record = approved.sign_off.as_ref().unwrap();
    assert_eq!(record.decision, SignOffDecision::Approved);
    assert_eq!(
        (record.run_id.as_str(), record.entry_seq),
        ("r-2", waiting.seq)
    );
    assert_eq!(approved.actor, Some(by("bob", "reviewed the evidence")));
    assert!(
        approved.reason.contains("bob approved run r-2"),
        "{}",
        approved.reason
    );
    assert_eq!(registry.active_id().as_deref(), Some(second.id.as_str()));
    // One write: the wait is over, the history moved, and a second approval finds nothing.
    assert!(f.store.pending_sign_off().unwrap().is_none());
    assert_eq!(
        f.store.active_history().unwrap(),
        vec![first.id.clone(), second.id.clone()]
    );
    assert!(matches!(
        registry.approve("r-2", by("bob", "again")),
        Err(SignOffError::NotWaiting { waiting: None, .. })
    ));
    assert_eq!(
        f.registry(0).active_id().as_deref(),
        Some(second.id.as_str())
    );
}

#[test]
fn a_first_model_waits_too_and_an_approval_with_a_shadow_configured_starts_the_shadow() {
    let f = fixture();
    let registry = f.registry_with(sign_off_rules(50, false, 3_600_000));
    let first = f.model(1, 1.0);
    waiting_run(&registry, "r-1", None, &first, None);
    assert!(
        registry.active().is_none(),
        "nothing serves before the sign-off"
    );
    let entry = registry.approve("r-1", by("ops", "first model")).unwrap();
    // No incumbent to shadow: promoted at once.
    assert_eq!(entry.verdict, Verdict::Promoted);
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    let second = f.model(2, 2.0);
    waiting_run(&registry, "r-2", Some(&first.id), &second, None);
    let entry = registry.approve("r-2", by("ops", "looks right")).unwrap();
    assert_eq!(entry.verdict, Verdict::Shadowing);
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    assert_eq!(registry.shadow().unwrap().id, second.id);
    let shadow = f.store.shadow_state().unwrap().unwrap();
    assert_eq!(
        (shadow.entry_seq, shadow.run_id.as_str()),
        (entry.seq, entry.run_id.as_str())
    );
    assert!(f.store.pending_sign_off().unwrap().is_none());
}

#[test]
fn a_decline_is_logged_with_the_key_and_reason_and_nothing_is_served() {
    let f = fixture();
    let first = promote_first(&f, &f.registry(0), 1);
    let registry = f.registry_with(sign_off_rules(0, true, 3_600_000));
    let second = f.model(2, 2.0);
    waiting_run(&registry, "r-2", Some(&first.id), &second, Some("alice"));
    // A wrong run id names the one that waits.
    let refused = registry.decline("r-9", by("alice", "x")).unwrap_err();
    assert!(
        refused.to_string().contains("run r-2's candidate waits"),
        "{refused}"
    );
    // The starter may withdraw her own candidate: four eyes is about approving.
    let entry = registry
        .decline("r-2", by("alice", "trained on a bad week"))
        .unwrap();
    assert_eq!(entry.verdict, Verdict::Declined);
    assert_eq!(
        entry.sign_off.as_ref().unwrap().decision,
        SignOffDecision::Declined
    );
    assert!(
        entry.reason.contains("alice declined run r-2"),
        "{}",
        entry.reason
    );
    assert!(
        entry.reason.contains("trained on a bad week"),
        "{}",
        entry.reason
    );
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    assert!(f.store.pending_sign_off().unwrap().is_none());
    assert_eq!(f.store.active_history().unwrap(), vec![first.id]);
}

#[test]
fn four_eyes_refuses_the_starters_approval_and_takes_another_keys() {
    let f = fixture();
    let first = promote_first(&f, &f.registry(0), 1);
    let registry = f.registry_with(sign_off_rules(0, true, 3_600_000));
    let second = f.model(2, 2.0);
    waiting_run(&registry, "r-2", Some(&first.id), &second, Some("alice"));
    let refused = registry.approve("r-2", by("alice", "mine")).unwrap_err();
    assert!(
        matches!(refused, SignOffError::FourEyes { .. }),
        "{refused}"
    );
    assert!(refused.to_string().contains("gate.four_eyes"), "{refused}");
    assert!(
        f.store.pending_sign_off().unwrap().is_some(),
        "still waiting"
    );
    let entry = registry.approve("r-2", by("bob", "checked")).unwrap();
    assert_eq!(entry.verdict, Verdict::Promoted);
    // A scheduled run has no starter: any operator key may approve it.
    let third = f.model(3, 3.0);
    waiting_run(&registry, "r-3", Some(&second.id), &third, None);
    assert!(registry.approve("r-3", by("alice", "scheduled")).is_ok());
}

#[test]
fn an_approval_is_refused_while_frozen_or_once_the_active_model_changed() {
    let f = fixture();
    let first = promote_first(&f, &f.registry(0), 1);
    let registry = f.registry_with(sign_off_rules(0, false, 3_600_000));
    let second = f.model(2, 2.0);
    waiting_run(&registry, "r-2", Some(&first.id), &second, None);
    registry.freeze(by("ops", "quarter end")).unwrap();
    let refused = registry.approve("r-2", by("ops", "go")).unwrap_err();
    assert!(matches!(refused, SignOffError::Frozen { .. }), "{refused}");
    registry.unfreeze(Actor::default()).unwrap();
    // With sign-off on, a rollback may not serve a model that was never active (the waiting
    // candidate, or any other stored one).
    let refused = registry
        .rollback(Some(&second.id), by("ops", "shortcut"))
        .unwrap_err();
    assert!(
        matches!(refused, RollbackError::NeverActive(_)),
        "{refused}"
    );
    // Another model becomes active while the candidate waits (a run settled by a service
    // without sign-off, then this one restarted over the same store).
    let other = f.model(3, -1.0);
    f.registry(0)
        .settle_run(proposal("r-3", Some(&first.id), other.clone(), true), None)
        .unwrap();
    let registry = f.registry_with(sign_off_rules(0, false, 3_600_000));
    let refused = registry.approve("r-2", by("ops", "go")).unwrap_err();
    assert!(matches!(refused, SignOffError::Stale { .. }), "{refused}");
    assert!(refused.to_string().contains(&first.id), "{refused}");
    assert_eq!(registry.active_id().as_deref(), Some(other.id.as_str()));
    assert!(f.store.pending_sign_off().unwrap().is_some());
    // Rolling back to the first model (active before) is allowed, and then the candidate's
    // gate applies again: it was judged against the model that answers now.
    registry
        .rollback(Some(&first.id), by("ops", "incident"))
        .unwrap();
    assert!(registry.approve("r-2", by("ops", "go")).is_ok());
}

#[test]
fn a_wait_older_than_sign_off_expires_ends_expired_once() {
    let f = fixture();
    let first = promote_first(&f, &f.registry(0), 1);
    let registry = f.registry_with(sign_off_rules(0, false, 60_000));
    let second = f.model(2, 2.0);
    waiting_run(&registry, "r-2", Some(&first.id), &second, None);
    let since = f.store.pending_sign_off().unwrap().unwrap().since;
    assert!(
        registry.expire_sign_off(since + 30_000).unwrap().is_none(),
        "too young"
    );
    let entry = registry.expire_sign_off(since + 61_000).unwrap().unwrap();
    assert_eq!(entry.verdict, Verdict::Expired);
    assert_eq!(
        entry.sign_off.as_ref().unwrap().decision,
        SignOffDecision::Expired
    );
    assert!(entry.actor.is_none());
    assert!(
        registry.expire_sign_off(since + 62_000).unwrap().is_none(),
        "once"
    );
    assert!(f.store.pending_sign_off().unwrap().is_none());
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
}

#[test]
fn a_newer_passed_run_replaces_the_waiting_candidate_and_frozen_runs_do_not_wait() {
    let f = fixture();
    let first = promote_first(&f, &f.registry(0), 1);
    let registry = f.registry_with(sign_off_rules(0, false, 3_600_000));
    waiting_run(&registry, "r-2", Some(&first.id), &f.model(2, 2.0), None);
    let third = f.model(3, 3.0);
    let entry = waiting_run(&registry, "r-3", Some(&first.id), &third, None);
    assert!(
        entry.reason.contains("replaces the candidate"),
        "{}",
        entry.reason
    );
    assert!(matches!(
        registry.approve("r-2", by("ops", "old")),
        Err(SignOffError::NotWaiting { .. })
    ));
    registry.freeze(Actor::default()).unwrap();
    let entry = registry
        .settle_run(
            proposal("r-4", Some(&first.id), f.model(4, 4.0), true),
            None,
        )
        .unwrap();
    assert_eq!(entry.verdict, Verdict::Kept);
    assert_eq!(f.store.pending_sign_off().unwrap().unwrap().run_id, "r-3");
}

#[test]
fn freeze_unfreeze_and_rollback_log_the_acting_key_and_reason() {
    let f = fixture();
    let registry = f.registry(0);
    let first = promote_first(&f, &registry, 1);
    let frozen = registry.freeze(by("carol", "audit week")).unwrap();
    assert_eq!(
        (frozen.by.as_deref(), frozen.reason.as_deref()),
        (Some("carol"), Some("audit week"))
    );
    // A second freeze keeps the first and logs nothing.
    assert_eq!(registry.freeze(by("dan", "again")).unwrap(), frozen);
    let entry = registry.unfreeze(by("dan", "audit done")).unwrap().unwrap();
    assert_eq!(entry.trigger, Trigger::Unfreeze);
    assert!(
        registry.unfreeze(Actor::default()).unwrap().is_none(),
        "not frozen: nothing logged"
    );
    let second = f.model(2, 2.0);
    registry
        .settle_run(proposal("r-2", Some(&first.id), second, true), None)
        .unwrap();
    let rolled = registry.rollback(None, by("erin", "bad scores")).unwrap();
    assert!(rolled.reason.ends_with(": bad scores"), "{}", rolled.reason);
    let log = f.store.entries(10).unwrap();
    let actions: Vec<(&str, Option<&str>, Option<&str>)> = log
        .iter()
        .filter_map(|e| {
            e.actor
                .as_ref()
                .map(|a| (e.trigger.as_str(), a.key.as_deref(), a.reason.as_deref()))
        })
        .collect();
    assert_eq!(
        actions,
        [
            ("rollback", Some("erin"), Some("bad scores")),
            ("unfreeze", Some("dan"), Some("audit done")),
            ("freeze", Some("carol"), Some("audit week")),
        ]
    );
}

#[test]
fn on_a_shared_store_any_replica_approves_the_leaders_waiting_candidate_and_the_leader_follows() {
    // Two registries on one store stand for the leader (which settled the run) and the replica
    // the operator's approval reached.
    let f = fixture();
    let first = promote_first(&f, &f.registry(0), 1);
    let leader = f.registry_with(sign_off_rules(0, false, 3_600_000));
    leader.share_store();
    let replica = f.registry_with(sign_off_rules(0, false, 3_600_000));
    replica.share_store();
    let second = f.model(2, 2.0);
    waiting_run(&leader, "r-2", Some(&first.id), &second, None);
    let entry = replica.approve("r-2", by("ops", "reviewed")).unwrap();
    assert_eq!(entry.verdict, Verdict::Promoted);
    assert_eq!(replica.active_id().as_deref(), Some(second.id.as_str()));
    assert_eq!(
        leader.active_id().as_deref(),
        Some(first.id.as_str()),
        "until it follows"
    );
    assert!(leader.follow_store().unwrap());
    assert_eq!(leader.active_id().as_deref(), Some(second.id.as_str()));
    // The leader's next run is judged against what the replica promoted.
    let third = f.model(3, 3.0);
    let entry = waiting_run(&leader, "r-3", Some(&second.id), &third, None);
    assert_eq!(entry.active_after.as_deref(), Some(second.id.as_str()));
}

#[test]
fn an_adverse_impact_flag_with_on_flag_sign_off_holds_a_passed_candidate_for_an_operator() {
    use crate::config::OnFlag;
    use crate::promotion::{AdverseImpact, ModelImpact};
    let f = fixture();
    let registry = f.registry(0);
    let first = promote_first(&f, &registry, 1);
    let flagged = |on_flag: OnFlag, flagged: Vec<String>| AdverseImpact {
        attribute: "owner_group".into(),
        decision: "favourable below a score of 0.3".into(),
        min_ratio: 0.8,
        min_group_rows: 30,
        rows_without_group: 0,
        candidate: ModelImpact {
            threshold: Some(0.3),
            reference: Some("a".into()),
            groups: vec![],
        },
        active: None,
        flagged,
        on_flag,
    };
    // Flagged, to be signed off: the gate has no sign-off, yet the candidate waits.
    let second = f.model(2, 2.0);
    let mut held = proposal("r-2", Some(&first.id), second.clone(), true);
    held.entry.adverse_impact = Some(flagged(OnFlag::SignOff, vec!["b".into()]));
    let entry = registry.settle_run(held, None).unwrap();
    assert_eq!(entry.verdict, Verdict::Waiting, "{}", entry.reason);
    assert!(
        entry.reason.contains("guardrails.adverse_impact.on_flag"),
        "{}",
        entry.reason
    );
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    assert_eq!(f.store.pending_sign_off().unwrap().unwrap().run_id, "r-2");
    let approved = registry
        .approve("r-2", by("risk-officer", "reviewed the groups"))
        .unwrap();
    assert_eq!(approved.verdict, Verdict::Promoted);
    // Screened and not flagged: promoted at once.
    let third = f.model(3, 3.0);
    let mut clear = proposal("r-3", Some(&second.id), third.clone(), true);
    clear.entry.adverse_impact = Some(flagged(OnFlag::SignOff, vec![]));
    let entry = registry.settle_run(clear, None).unwrap();
    assert_eq!(entry.verdict, Verdict::Promoted, "{}", entry.reason);
    assert_eq!(registry.active_id().as_deref(), Some(third.id.as_str()));
}

/// A registry whose candidates take a traffic share of `fraction`, sticky by `ref`.
fn share_registry(f: &Fixture, fraction: f64) -> Registry {
    let mut rules = rules(0);
    rules.share = crate::config::ShareConfig {
        fraction,
        outcomes_per_arm: 20,
        ..crate::config::ShareConfig::default()
    };
    Registry::restore(Arc::clone(&f.store), Arc::clone(&f.schema), rules).unwrap()
}

/// Records `n` outcomes on each arm of a share: on its own arm the candidate ranks
/// positives above negatives when `candidate_better`, else at random-looking order; the
/// active model on its arm the other way.
fn share_outcomes(
    f: &Fixture,
    active: &Model,
    candidate: &Model,
    n: usize,
    candidate_better: bool,
) {
    let base = ulid::Ulid::new();
    let (good, poor) = (
        |positive: bool| if positive { 0.9 } else { 0.1 },
        |positive: bool, i: usize| {
            if (i / 2).is_multiple_of(3) {
                if positive {
                    0.3
                } else {
                    0.7
                }
            } else if positive {
                0.6
            } else {
                0.4
            }
        },
    );
    let records: Vec<ScoreRecord> = (0..2 * n)
        .map(|i| {
            let positive = i % 2 == 0;
            let by_candidate = i % 4 < 2;
            let mut record = crate::store::test_record(
                &ulid::Ulid::from_parts(base.timestamp_ms(), base.random() + i as u128).to_string(),
            );
            let (mine, other) = if by_candidate == candidate_better {
                (good(positive), poor(positive, i))
            } else {
                (poor(positive, i), good(positive))
            };
            if by_candidate {
                record.model_id = candidate.id.clone();
                record.candidate_answered = true;
                record.output = mine;
                record.shadow = Some(ShadowScore {
                    model_id: active.id.clone(),
                    output: other,
                });
            } else {
                record.model_id = active.id.clone();
                record.output = mine;
                record.shadow = Some(ShadowScore {
                    model_id: candidate.id.clone(),
                    output: other,
                });
            }
            record
        })
        .collect();
    store_with_outcomes(f, &records);
}

/// Starts a share: a first model, then a candidate that passed its holdout gate.
fn start_share(f: &Fixture, registry: &Registry) -> (Model, Model) {
    let first = promote_first(f, registry, 1);
    let candidate = f.model(2, 2.0);
    let entry = registry
        .settle_run(
            proposal("r-2", Some(&first.id), candidate.clone(), true),
            None,
        )
        .unwrap();
    assert_eq!(entry.verdict, Verdict::Shadowing, "{}", entry.reason);
    assert!(
        entry.reason.contains("% of live requests (share.fraction"),
        "{}",
        entry.reason
    );
    (first, candidate)
}

#[test]
fn a_traffic_share_and_its_routing_survive_a_restart() {
    let f = fixture();
    let registry = share_registry(&f, 0.2);
    let (first, candidate) = start_share(&f, &registry);
    let entry = &f.store.entries(1).unwrap()[0];
    assert!(
        entry.reason.contains("answers 20.0% of live requests"),
        "{}",
        entry.reason
    );
    let terms = f.store.shadow_state().unwrap().unwrap().share;
    assert_eq!(
        terms,
        Some(ShareTerms {
            fraction: 0.2,
            sticky_by: "ref".into()
        })
    );
    let route = registry.share().expect("the candidate holds a share");
    assert_eq!(route.candidate_id, candidate.id);
    let arms: Vec<Arm> = (0..200)
        .map(|i| route.arm_for(Some(&format!("c-{i}"))))
        .collect();
    assert!(arms.contains(&Arm::Candidate) && arms.contains(&Arm::Active));
    drop(registry);

    // A restart, with [share] since turned off in the config: the share started stays as it
    // was started, and routes every key to the same arm as before.
    let restarted = f.registry(0);
    assert_eq!(restarted.active_id().as_deref(), Some(first.id.as_str()));
    assert_eq!(
        restarted.shadow().map(|m| m.id.clone()),
        Some(candidate.id.clone())
    );
    let route = restarted.share().expect("the share survives a restart");
    assert_eq!(route.terms.fraction, 0.2);
    let again: Vec<Arm> = (0..200)
        .map(|i| route.arm_for(Some(&format!("c-{i}"))))
        .collect();
    assert_eq!(arms, again);
}

#[test]
fn the_share_live_gate_promotes_a_better_arm_and_keeps_a_worse_one_with_both_tests_logged() {
    for candidate_better in [true, false] {
        let f = fixture();
        let registry = share_registry(&f, 0.2);
        let (first, candidate) = start_share(&f, &registry);
        share_outcomes(&f, &first, &candidate, 40, candidate_better);
        let entry = registry.end_shadow("r-3", Trigger::Shadow, false).unwrap();
        let share = entry.share.clone().expect("share evidence");
        let arms = share.arms.clone().expect("the arms were compared");
        assert_eq!((arms.candidate.n, arms.active.n), (40, 40));
        assert_eq!(arms.test, "hanley_mcneil_z");
        assert_eq!(entry.test.as_deref(), Some("hanley_mcneil_z"));
        assert_eq!(share.paired_test.as_deref(), Some("delong"));
        assert!(!share.stopped);
        if candidate_better {
            assert_eq!(entry.verdict, Verdict::Promoted, "{}", entry.reason);
            assert!(arms.gain > 0.5 && arms.p_value < 0.05, "{arms:?}");
            assert_eq!(registry.active_id().as_deref(), Some(candidate.id.as_str()));
        } else {
            assert_eq!(entry.verdict, Verdict::Kept, "{}", entry.reason);
            assert!(arms.gain < 0.0, "{arms:?}");
            assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
        }
        assert!(
            entry.reason.contains("answered outcomes"),
            "{}",
            entry.reason
        );
        assert!(registry.shadow().is_none() && registry.share().is_none());
        assert!(f.store.shadow_state().unwrap().is_none());
    }
}

#[test]
fn a_tripped_guardrail_ends_the_share_kept_once_with_its_counts() {
    let f = fixture();
    let mut rules = rules(0);
    rules.share = crate::config::ShareConfig {
        fraction: 0.5,
        guard_min_answers: 5,
        ..crate::config::ShareConfig::default()
    };
    let registry = Registry::restore(Arc::clone(&f.store), Arc::clone(&f.schema), rules).unwrap();
    let (first, candidate) = start_share(&f, &registry);
    let route = registry.share().unwrap();
    let mut trip = None;
    for _ in 0..5 {
        route.note(Arm::Active, false);
        trip = trip.or(route.note(Arm::Candidate, true));
    }
    let trip = trip.expect("5 of 5 failed against none");
    let entry = registry
        .stop_share(&candidate.id, &trip)
        .unwrap()
        .expect("logged");
    assert_eq!(entry.verdict, Verdict::Kept);
    assert_eq!(entry.trigger, Trigger::Shadow);
    assert!(entry.reason.contains("error guardrail"), "{}", entry.reason);
    let share = entry.share.unwrap();
    assert!(share.stopped);
    assert_eq!((share.candidate_answers, share.candidate_errors), (5, 5));
    assert_eq!((share.active_answers, share.active_errors), (5, 0));
    assert_eq!(registry.active_id().as_deref(), Some(first.id.as_str()));
    assert!(registry.shadow().is_none() && registry.share().is_none());
    assert!(f.store.shadow_state().unwrap().is_none());
    // A second report of the same trip finds no share to stop.
    assert!(registry.stop_share(&candidate.id, &trip).unwrap().is_none());
}

#[test]
fn with_sign_off_the_share_starts_only_after_the_approval() {
    let f = fixture();
    let mut rules = sign_off_rules(0, false, 3_600_000);
    rules.share = crate::config::ShareConfig {
        fraction: 0.3,
        ..crate::config::ShareConfig::default()
    };
    let registry = f.registry_with(rules);
    let first = f.model(1, 1.0);
    waiting_run(&registry, "r-1", None, &first, None);
    registry.approve("r-1", by("ops", "first model")).unwrap();
    let second = f.model(2, 2.0);
    waiting_run(&registry, "r-2", Some(&first.id), &second, None);
    assert!(registry.share().is_none(), "no share while it waits");
    assert!(f.store.shadow_state().unwrap().is_none());
    let entry = registry.approve("r-2", by("ops", "go live")).unwrap();
    assert_eq!(entry.verdict, Verdict::Shadowing);
    assert!(
        entry.reason.contains("answers 30.0% of live requests"),
        "{}",
        entry.reason
    );
    let route = registry.share().expect("the approval starts the share");
    assert_eq!(route.candidate_id, second.id);
    assert_eq!(
        f.store
            .shadow_state()
            .unwrap()
            .unwrap()
            .share
            .map(|t| t.fraction),
        Some(0.3)
    );
}
