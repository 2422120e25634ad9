//! Which model answers a request while a candidate holds a traffic share, and the share's
//! error guardrail.
//!
//! A request's sticky key (its `ref`, or the value of the feature `share.sticky_by` names) is
//! hashed with SHA-256 together with the candidate's id; the digest's top 53 bits, read as an
//! integer and divided by 2^53, place the key in [0, 1). A key below the
//! share's fraction is answered by the candidate, every other key by the active model. The
//! same key therefore always gets the same model for as long as one candidate holds the share,
//! in every process and across restarts, and each new candidate draws a different set of keys
//! (the id is part of the hash), so no group of callers carries every trial. A request without
//! a sticky key is answered by the active model.
//!
//! Both models score every request while the share lasts: the one that did not answer rides
//! in the score record as the other output, exactly as a shadow does. That costs one more
//! prediction per request (for the linear families, a dot product) and keeps the paired
//! comparison on every shadowed outcome as evidence beside the two-sample live gate, which
//! uses only each arm's own answers.
//!
//! The guardrail counts, per arm, the requests routed to it and those where its model failed:
//! an output that is not a finite number (or, for binary labels, outside [0, 1]), or a panic
//! while scoring. Scoring has no time limit of its own (it is a bounded computation on the
//! request's thread; the route's time limit covers the whole request), so there is no
//! timeout to count. A failed candidate answer falls back to the active model's (the caller is
//! answered, and the answer names the active model). Once the candidate's arm has
//! `share.guard_min_answers` routed requests and its error rate exceeds the active arm's by
//! more than `share.max_error_excess`, routing to the candidate stops at once and the
//! registry logs the end of the share (`Registry::stop_share`). The counts live in memory,
//! per process: they start again at a restart (the outcomes the live gate judges are stored).

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};

use sha2::{Digest, Sha256};

use crate::config::ShareConfig;
use crate::schema::{Row, Schema, Value};
use crate::store::ShareTerms;

/// Who answers one request.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Arm {
    Active,
    Candidate,
}

/// Where a sticky key comes from.
#[derive(Debug, Clone, PartialEq)]
enum Sticky {
    Reference,
    /// A feature's position in the schema.
    Feature(usize),
}

/// Counts of one arm since the share started in this process.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize)]
pub struct ArmCounts {
    /// Requests routed to the arm.
    pub answers: u64,
    /// Of those, the ones its model failed.
    pub errors: u64,
}

impl ArmCounts {
    pub fn error_rate(&self) -> f64 {
        if self.answers == 0 {
            0.0
        } else {
            self.errors as f64 / self.answers as f64
        }
    }
}

/// What tripped the guardrail, for the log.
#[derive(Debug, Clone, PartialEq)]
pub struct GuardTrip {
    pub candidate: ArmCounts,
    pub active: ArmCounts,
    pub max_excess: f64,
}

impl GuardTrip {
    pub fn describe(&self) -> String {
        format!(
            "the candidate's arm failed {} of {} requests ({:.2}%), the active arm {} of {} ({:.2}%): more than share.max_error_excess {} apart",
            self.candidate.errors,
            self.candidate.answers,
            100.0 * self.candidate.error_rate(),
            self.active.errors,
            self.active.answers,
            100.0 * self.active.error_rate(),
            self.max_excess
        )
    }
}

/// The routing of one candidate's traffic share, and its guardrail's counts.
#[derive(Debug)]
pub struct ShareRoute {
    pub candidate_id: String,
    pub terms: ShareTerms,
    sticky: Option<Sticky>,
    max_excess: f64,
    min_answers: u64,
    answers: [AtomicU64; 2],
    errors: [AtomicU64; 2],
    /// Set once the guardrail tripped: from then on every request goes to the active model.
    stopped: AtomicBool,
}

/// The place of `key` in [0, 1) for `candidate_id`'s share (see the module docs).
pub fn bucket(candidate_id: &str, key: &str) -> f64 {
    let mut hasher = Sha256::new();
    hasher.update(candidate_id.as_bytes());
    hasher.update([0u8]);
    hasher.update(key.as_bytes());
    let digest = hasher.finalize();
    let mut first = [0u8; 8];
    first.copy_from_slice(&digest[..8]);
    // 53 bits: exact in an f64, and the quotient is below 1.
    (u64::from_be_bytes(first) >> 11) as f64 / (1u64 << 53) as f64
}

impl ShareRoute {
    /// The route for a share started with `terms`; `guard` is the configured guardrail. A
    /// `sticky_by` that names no feature of `schema` (the config changed since the share
    /// started) routes every request to the active model.
    pub fn new(
        candidate_id: &str,
        terms: ShareTerms,
        guard: &ShareConfig,
        schema: &Schema,
    ) -> Self {
        let sticky = if terms.sticky_by == "ref" {
            Some(Sticky::Reference)
        } else {
            terms.sticky_by.strip_prefix("features.").and_then(|name| {
                schema
                    .features()
                    .iter()
                    .position(|f| f.name == name)
                    .map(Sticky::Feature)
            })
        };
        ShareRoute {
            candidate_id: candidate_id.to_owned(),
            terms,
            sticky,
            max_excess: guard.max_error_excess,
            min_answers: guard.guard_min_answers,
            answers: [AtomicU64::new(0), AtomicU64::new(0)],
            errors: [AtomicU64::new(0), AtomicU64::new(0)],
            stopped: AtomicBool::new(false),
        }
    }

    /// The request's sticky key: its `ref`, or the named feature's value as text (a
    /// category's name, a number's shortest decimal form). `None` when absent or missing.
    pub fn key_of(&self, reference: Option<&str>, row: &Row, schema: &Schema) -> Option<String> {
        match self.sticky.as_ref()? {
            Sticky::Reference => reference.map(str::to_owned),
            Sticky::Feature(i) => match row.get(*i)? {
                Value::Number(x) => Some(format!("{x}")),
                Value::Category(c) => schema
                    .features()
                    .get(*i)
                    .and_then(|f| f.categories.get(c as usize))
                    .cloned(),
                Value::Missing => None,
            },
        }
    }

    /// Which arm answers a request with this sticky key.
    pub fn arm_for(&self, key: Option<&str>) -> Arm {
        match key {
            Some(key)
                if !self.stopped.load(Ordering::Relaxed)
                    && bucket(&self.candidate_id, key) < self.terms.fraction =>
            {
                Arm::Candidate
            }
            _ => Arm::Active,
        }
    }

    /// Counts one routed request and whether its arm's model failed it. Returns the evidence
    /// the first time the guardrail trips (never again for this share).
    pub fn note(&self, arm: Arm, failed: bool) -> Option<GuardTrip> {
        let i = arm as usize;
        self.answers[i].fetch_add(1, Ordering::Relaxed);
        if failed {
            self.errors[i].fetch_add(1, Ordering::Relaxed);
        }
        let (candidate, active) = (self.counts(Arm::Candidate), self.counts(Arm::Active));
        let trips = candidate.answers >= self.min_answers
            && candidate.error_rate() - active.error_rate() > self.max_excess;
        (trips && !self.stopped.swap(true, Ordering::SeqCst)).then_some(GuardTrip {
            candidate,
            active,
            max_excess: self.max_excess,
        })
    }

    pub fn counts(&self, arm: Arm) -> ArmCounts {
        let i = arm as usize;
        ArmCounts {
            answers: self.answers[i].load(Ordering::Relaxed),
            errors: self.errors[i].load(Ordering::Relaxed),
        }
    }

    /// Whether the guardrail stopped routing to the candidate.
    pub fn stopped(&self) -> bool {
        self.stopped.load(Ordering::SeqCst)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::schema::{Feature, FeatureKind, MissingRule};

    fn schema() -> Schema {
        Schema::new(
            vec![
                Feature {
                    name: "amount".into(),
                    kind: FeatureKind::Number,
                    min: None,
                    max: None,
                    categories: vec![],
                    missing: MissingRule::Reject,
                },
                Feature {
                    name: "region".into(),
                    kind: FeatureKind::Category,
                    min: None,
                    max: None,
                    categories: vec!["north".into(), "south".into()],
                    missing: MissingRule::Reject,
                },
            ],
            "label".into(),
        )
    }

    fn route(fraction: f64, sticky_by: &str, guard: &ShareConfig) -> ShareRoute {
        let terms = ShareTerms {
            fraction,
            sticky_by: sticky_by.into(),
        };
        ShareRoute::new("m-2-abcdef12", terms, guard, &schema())
    }

    #[test]
    fn the_same_key_always_gets_the_same_arm_and_the_share_is_about_the_fraction() {
        let r = route(0.2, "ref", &ShareConfig::default());
        let n = 20_000;
        let to_candidate = (0..n)
            .filter(|i| r.arm_for(Some(&format!("customer-{i}"))) == Arm::Candidate)
            .count();
        // Binomial(20000, 0.2): sd 0.0028, so 0.2 ± 0.012 is more than 4 sd.
        let share = to_candidate as f64 / n as f64;
        assert!((share - 0.2).abs() < 0.012, "{share}");
        for i in 0..500 {
            let key = format!("customer-{i}");
            assert_eq!(r.arm_for(Some(&key)), r.arm_for(Some(&key)));
        }
        assert_eq!(r.arm_for(None), Arm::Active, "no key: the active model");
    }

    #[test]
    fn a_different_candidate_draws_different_keys() {
        let same = (0..2000)
            .filter(|i| {
                let key = format!("k{i}");
                (bucket("m-2-aaaaaaaa", &key) < 0.2) == (bucket("m-3-bbbbbbbb", &key) < 0.2)
            })
            .count();
        // Independent draws agree on about 0.8² + 0.2² = 68% of keys, not all of them.
        assert!((1200..1520).contains(&same), "{same}");
    }

    #[test]
    fn a_feature_is_a_sticky_key_by_its_value() {
        let r = route(0.5, "features.region", &ShareConfig::default());
        let s = schema();
        let south = Row::from(vec![Value::Number(3.0), Value::Category(1)]);
        assert_eq!(
            r.key_of(Some("ignored"), &south, &s).as_deref(),
            Some("south")
        );
        let by_amount = route(0.5, "features.amount", &ShareConfig::default());
        assert_eq!(by_amount.key_of(None, &south, &s).as_deref(), Some("3"));
        let missing = Row::from(vec![Value::Missing, Value::Category(0)]);
        assert_eq!(by_amount.key_of(None, &missing, &s), None);
        // A config that no longer declares the feature: no key, so the active model answers.
        let gone = route(0.5, "features.gone", &ShareConfig::default());
        assert_eq!(gone.key_of(Some("r"), &south, &s), None);
    }

    #[test]
    fn the_guardrail_trips_once_when_the_candidate_fails_more_than_allowed() {
        let guard = ShareConfig {
            max_error_excess: 0.05,
            guard_min_answers: 10,
            ..ShareConfig::default()
        };
        let r = route(0.5, "ref", &guard);
        for _ in 0..100 {
            assert_eq!(r.note(Arm::Active, false), None);
        }
        // 9 answers, all failed: not enough answers to judge yet.
        for _ in 0..9 {
            assert_eq!(r.note(Arm::Candidate, true), None);
        }
        let trip = r
            .note(Arm::Candidate, false)
            .expect("9 of 10 failed: trips");
        assert_eq!(
            trip.candidate,
            ArmCounts {
                answers: 10,
                errors: 9
            }
        );
        assert_eq!(
            trip.active,
            ArmCounts {
                answers: 100,
                errors: 0
            }
        );
        assert!(trip.describe().contains("9 of 10"), "{}", trip.describe());
        assert!(r.stopped());
        assert_eq!(r.note(Arm::Candidate, true), None, "only once");
        let key = (0..100)
            .map(|i| format!("k{i}"))
            .find(|k| bucket(&r.candidate_id, k) < 0.5)
            .unwrap();
        assert_eq!(
            r.arm_for(Some(&key)),
            Arm::Active,
            "stopped: the active model answers"
        );
    }

    #[test]
    fn equal_error_rates_do_not_trip_the_guardrail() {
        // Both arms fail one request in ten. With few answers the rates differ by chance (1 of
        // 5 against 1 of 6 is 3 points apart), which is what guard_min_answers is for.
        let guard = ShareConfig {
            max_error_excess: 0.01,
            guard_min_answers: 100,
            ..ShareConfig::default()
        };
        let r = route(0.5, "ref", &guard);
        for i in 0..200 {
            assert_eq!(r.note(Arm::Active, i % 10 == 0), None);
            assert_eq!(r.note(Arm::Candidate, i % 10 == 0), None);
        }
        assert!(!r.stopped());
    }
}
