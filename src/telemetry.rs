//! The service's own numbers in the OpenMetrics text format (`GET /metrics`), which
//! Prometheus and other scrapers read when it is served as [`CONTENT_TYPE`].
//!
//! Counters and histograms are updated where things happen (the HTTP layer, scoring, outcomes,
//! the end of a run); gauges that describe state (the active model, its holdout metrics, the
//! freeze, shadow progress, pending score records, PSI) are set when the metrics are scraped,
//! from the registry, the store and the kept drift report, so they can never disagree with the
//! API. `understudy_build_info` carries the version and the git revision it was built from.

use std::sync::atomic::AtomicU64;

use arc_swap::ArcSwapOption;
use prometheus_client::encoding::text::encode;
use prometheus_client::encoding::EncodeLabelSet;
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::gauge::Gauge;
use prometheus_client::metrics::histogram::{exponential_buckets, Histogram};
use prometheus_client::metrics::info::Info;
use prometheus_client::registry::Registry;

/// The OpenMetrics 1.0 content type: what the text [`Telemetry::render`] writes is (metric
/// families with `# TYPE`, `# HELP`, `_total` counters, `# EOF`), and a scraper that is told
/// `text/plain; version=0.0.4` parses it as the older Prometheus format instead, losing the
/// metadata (OpenMetrics 1.0 specification, "Overall structure" and its content type).
pub const CONTENT_TYPE: &str = "application/openmetrics-text; version=1.0.0; charset=utf-8";

/// The git revision this binary was built from (`build.rs`: `UNDERSTUDY_GIT_REVISION` if set,
/// else `git rev-parse`, else "unknown").
pub const GIT_REVISION: &str = env!("UNDERSTUDY_GIT_REVISION");

type Labels = Vec<(String, String)>;

/// The labels of an HTTP request's counter and histogram: all `'static` or plain numbers, so
/// counting a request allocates nothing.
#[derive(Debug, Clone, PartialEq, Eq, Hash, EncodeLabelSet)]
struct RequestLabels {
    route: &'static str,
    method: &'static str,
    status: u16,
}
type FloatGauge = Gauge<f64, AtomicU64>;

fn latency_histogram() -> Histogram {
    // 0.1 ms to ~1.6 s, doubling.
    Histogram::new(exponential_buckets(0.0001, 2.0, 15))
}

/// Every metric the service exports.
pub struct Telemetry {
    registry: Registry,
    requests: Family<RequestLabels, Counter>,
    latency: Family<RequestLabels, Histogram, fn() -> Histogram>,
    scores: Family<Labels, Counter>,
    /// The scores counter of the model scored last (counters share their value when cloned),
    /// so the common case, the same model again, skips the labelled lookup.
    last_scores: ArcSwapOption<(String, Counter)>,
    outcomes: Counter,
    outcome_lag: Histogram,
    runs: Family<Labels, Counter>,
    last_run: FloatGauge,
    training: Histogram,
    active: Family<Labels, Gauge>,
    holdout: Family<Labels, FloatGauge>,
    psi: Family<Labels, FloatGauge>,
    score_records: Gauge,
    compacted: Counter,
    score_records_pending: Gauge,
    frozen: Gauge,
    leader: Family<Labels, Gauge>,
    shadow_outcomes: Family<Labels, Gauge>,
    shadow_needed: Family<Labels, Gauge>,
    share_fraction: Family<Labels, FloatGauge>,
    share_answers: Family<Labels, Gauge>,
    share_errors: Family<Labels, Gauge>,
    share_outcomes: Family<Labels, Gauge>,
    share_needed: Family<Labels, Gauge>,
    share_stops: Counter,
    drift_computed: FloatGauge,
}

fn labels(pairs: &[(&str, &str)]) -> Labels {
    pairs
        .iter()
        .map(|(k, v)| ((*k).to_owned(), (*v).to_owned()))
        .collect()
}

impl Default for Telemetry {
    fn default() -> Self {
        Telemetry::new()
    }
}

impl Telemetry {
    pub fn new() -> Telemetry {
        let mut registry = Registry::with_prefix("understudy");
        let requests = Family::<RequestLabels, Counter>::default();
        let latency = Family::<RequestLabels, Histogram, fn() -> Histogram>::new_with_constructor(
            latency_histogram,
        );
        let scores = Family::<Labels, Counter>::default();
        let outcomes = Counter::default();
        // One minute to about half a year, quadrupling.
        let outcome_lag = Histogram::new(exponential_buckets(60.0, 4.0, 10));
        let runs = Family::<Labels, Counter>::default();
        let last_run = FloatGauge::default();
        let training = Histogram::new(exponential_buckets(0.1, 2.0, 14));
        let active = Family::<Labels, Gauge>::default();
        let holdout = Family::<Labels, FloatGauge>::default();
        let psi = Family::<Labels, FloatGauge>::default();
        let score_records = Gauge::default();
        let compacted = Counter::default();
        let score_records_pending = Gauge::default();
        let frozen = Gauge::default();
        let leader = Family::<Labels, Gauge>::default();
        let shadow_outcomes = Family::<Labels, Gauge>::default();
        let shadow_needed = Family::<Labels, Gauge>::default();
        let share_fraction = Family::<Labels, FloatGauge>::default();
        let share_answers = Family::<Labels, Gauge>::default();
        let share_errors = Family::<Labels, Gauge>::default();
        let share_outcomes = Family::<Labels, Gauge>::default();
        let share_needed = Family::<Labels, Gauge>::default();
        let share_stops = Counter::default();
        let drift_computed = FloatGauge::default();
        registry.register(
            "share_fraction",
            "The share of sticky keys the candidate answers, while it holds a traffic share",
            share_fraction.clone(),
        );
        registry.register(
            "share_answers",
            "Requests routed to each arm of the traffic share in this process (arm: candidate, active)",
            share_answers.clone(),
        );
        registry.register(
            "share_errors",
            "Routed requests whose arm's model failed (a non-finite output or a panic), in this process",
            share_errors.clone(),
        );
        registry.register(
            "share_outcomes",
            "Outcomes of requests each arm of the traffic share answered",
            share_outcomes.clone(),
        );
        registry.register(
            "share_outcomes_needed",
            "Outcomes each arm needs before the live gate compares them (share.outcomes_per_arm)",
            share_needed.clone(),
        );
        registry.register(
            "share_guardrail_stops",
            "Traffic shares the error guardrail stopped in this process",
            share_stops.clone(),
        );
        registry.register(
            "build",
            "The version and git revision of this binary",
            Info::new(labels(&[
                ("version", env!("CARGO_PKG_VERSION")),
                ("revision", GIT_REVISION),
            ])),
        );
        registry.register(
            "score_records_pending",
            "Score records held in memory, not yet written to the store",
            score_records_pending.clone(),
        );
        registry.register(
            "promotions_frozen",
            "1 while promotions are frozen (POST /v1/freeze), else 0",
            frozen.clone(),
        );
        registry.register(
            "leader",
            "1 while this replica leads (runs the schedule, retention and training), else 0",
            leader.clone(),
        );
        registry.register(
            "shadow_outcomes",
            "Shadowed requests of the shadowing candidate that have their outcome",
            shadow_outcomes.clone(),
        );
        registry.register(
            "shadow_outcomes_needed",
            "Shadowed outcomes the live gate waits for (shadow.outcomes)",
            shadow_needed.clone(),
        );
        registry.register(
            "drift_report_timestamp_seconds",
            "When the drift report behind understudy_psi was computed (Unix time)",
            drift_computed.clone(),
        );
        registry.register(
            "http_requests",
            "HTTP requests by route, method and status",
            requests.clone(),
        );
        registry.register(
            "http_request_duration_seconds",
            "HTTP request latency by route, method and status",
            latency.clone(),
        );
        registry.register(
            "scores",
            "Score requests answered, by model",
            scores.clone(),
        );
        registry.register("outcomes", "New outcomes recorded", outcomes.clone());
        registry.register(
            "outcome_lag_seconds",
            "Time from a score to its outcome",
            outcome_lag.clone(),
        );
        registry.register("runs", "Finished runs by verdict and trigger", runs.clone());
        registry.register(
            "last_run_timestamp_seconds",
            "When the last run finished (Unix time)",
            last_run.clone(),
        );
        registry.register(
            "training_duration_seconds",
            "Wall time of a retraining run",
            training.clone(),
        );
        registry.register(
            "active_model_info",
            "The active model (value 1, its id and family as labels)",
            active.clone(),
        );
        registry.register(
            "active_model_holdout",
            "The active model's metrics on its run's holdout",
            holdout.clone(),
        );
        registry.register(
            "psi",
            "Population Stability Index of recent requests against the active model, by feature (and `score`)",
            psi.clone(),
        );
        registry.register(
            "score_records",
            "Score records in the store",
            score_records.clone(),
        );
        registry.register(
            "score_records_compacted",
            "Score records deleted by retention",
            compacted.clone(),
        );
        Telemetry {
            registry,
            requests,
            latency,
            scores,
            last_scores: ArcSwapOption::empty(),
            outcomes,
            outcome_lag,
            runs,
            last_run,
            training,
            active,
            holdout,
            psi,
            score_records,
            compacted,
            score_records_pending,
            frozen,
            leader,
            shadow_outcomes,
            shadow_needed,
            share_fraction,
            share_answers,
            share_errors,
            share_outcomes,
            share_needed,
            share_stops,
            drift_computed,
        }
    }

    /// The share's guardrail tripped.
    pub fn observe_share_stop(&self) {
        self.share_stops.inc();
    }

    pub fn observe_compacted(&self, records: u64) {
        self.compacted.inc_by(records);
    }

    pub fn observe_request(
        &self,
        route: &'static str,
        method: &'static str,
        status: u16,
        seconds: f64,
    ) {
        let key = RequestLabels {
            route,
            method,
            status,
        };
        self.requests.get_or_create(&key).inc();
        self.latency.get_or_create(&key).observe(seconds);
    }

    pub fn observe_scores(&self, model_id: &str, count: u64) {
        if let Some(last) = self.last_scores.load().as_ref() {
            if last.0 == model_id {
                last.1.inc_by(count);
                return;
            }
        }
        let counter = self
            .scores
            .get_or_create(&labels(&[("model", model_id)]))
            .clone();
        counter.inc_by(count);
        self.last_scores
            .store(Some(std::sync::Arc::new((model_id.to_owned(), counter))));
    }

    pub fn observe_outcome(&self, lag_seconds: Option<f64>) {
        self.outcomes.inc();
        if let Some(lag) = lag_seconds {
            self.outcome_lag.observe(lag.max(0.0));
        }
    }

    pub fn observe_run(&self, verdict: &str, trigger: &str, seconds: f64, finished_at_ms: i64) {
        self.runs
            .get_or_create(&labels(&[("verdict", verdict), ("trigger", trigger)]))
            .inc();
        self.training.observe(seconds);
        self.last_run.set(finished_at_ms as f64 / 1000.0);
    }

    /// Sets the state gauges, then renders everything.
    pub fn render(&self, state: &ScrapeState) -> String {
        self.active.clear();
        if let Some((id, family)) = &state.active {
            self.active
                .get_or_create(&labels(&[("model", id), ("family", family)]))
                .set(1);
        }
        self.holdout.clear();
        for (metric, value) in &state.holdout {
            self.holdout
                .get_or_create(&labels(&[("metric", metric)]))
                .set(*value);
        }
        self.score_records
            .set(i64::try_from(state.score_records).unwrap_or(i64::MAX));
        self.score_records_pending
            .set(i64::try_from(state.score_records_pending).unwrap_or(i64::MAX));
        self.frozen.set(i64::from(state.frozen));
        self.leader.clear();
        if let Some((replica, leads)) = &state.leader {
            self.leader
                .get_or_create(&labels(&[("replica", replica)]))
                .set(i64::from(*leads));
        }
        self.shadow_outcomes.clear();
        self.shadow_needed.clear();
        if let Some(shadow) = &state.shadow {
            let key = labels(&[("candidate", &shadow.candidate)]);
            self.shadow_outcomes
                .get_or_create(&key)
                .set(i64::try_from(shadow.outcomes).unwrap_or(i64::MAX));
            self.shadow_needed
                .get_or_create(&key)
                .set(i64::try_from(shadow.needed).unwrap_or(i64::MAX));
        }
        for family in [
            &self.share_answers,
            &self.share_errors,
            &self.share_outcomes,
            &self.share_needed,
        ] {
            family.clear();
        }
        self.share_fraction.clear();
        if let Some(share) = &state.share {
            let candidate = share.candidate.as_str();
            self.share_fraction
                .get_or_create(&labels(&[("candidate", candidate)]))
                .set(share.fraction);
            self.share_needed
                .get_or_create(&labels(&[("candidate", candidate)]))
                .set(i64::try_from(share.needed_per_arm).unwrap_or(i64::MAX));
            for (arm, answers, errors, outcomes) in [
                (
                    "candidate",
                    share.answers.0,
                    share.errors.0,
                    share.outcomes.0,
                ),
                ("active", share.answers.1, share.errors.1, share.outcomes.1),
            ] {
                let key = labels(&[("candidate", candidate), ("arm", arm)]);
                let count = |n: u64| i64::try_from(n).unwrap_or(i64::MAX);
                self.share_answers.get_or_create(&key).set(count(answers));
                self.share_errors.get_or_create(&key).set(count(errors));
                self.share_outcomes.get_or_create(&key).set(count(outcomes));
            }
        }
        self.drift_computed
            .set(state.drift_computed_at.map_or(0.0, |ms| ms as f64 / 1000.0));
        self.psi.clear();
        for (feature, value) in &state.psi {
            self.psi
                .get_or_create(&labels(&[("feature", feature)]))
                .set(*value);
        }
        let mut out = String::new();
        // Writing into a String cannot fail.
        let _ = encode(&mut out, &self.registry);
        out
    }
}

/// The state gauges' values at scrape time.
#[derive(Debug, Default)]
pub struct ScrapeState {
    /// The active model's id and family.
    pub active: Option<(String, String)>,
    pub holdout: Vec<(String, f64)>,
    pub psi: Vec<(String, f64)>,
    /// Score records in the store.
    pub score_records: u64,
    /// Score records waiting in memory.
    pub score_records_pending: u64,
    pub frozen: bool,
    /// This replica's id and whether it leads.
    pub leader: Option<(String, bool)>,
    /// The shadowing candidate's progress, when one is shadowing.
    pub shadow: Option<ShadowProgress>,
    /// The traffic share's progress, when the candidate holds one.
    pub share: Option<ShareProgress>,
    /// When the drift report behind `psi` was computed.
    pub drift_computed_at: Option<i64>,
}

/// How far the shadowing candidate is toward its live gate.
#[derive(Debug, Clone, PartialEq)]
pub struct ShadowProgress {
    pub candidate: String,
    /// Shadowed requests that have their outcome.
    pub outcomes: u64,
    /// What the live gate needs (`shadow.outcomes`).
    pub needed: u64,
}

/// A traffic share's progress: (candidate arm, active arm) pairs.
#[derive(Debug, Clone, PartialEq)]
pub struct ShareProgress {
    pub candidate: String,
    pub fraction: f64,
    /// Requests routed to each arm in this process, and those its model failed.
    pub answers: (u64, u64),
    pub errors: (u64, u64),
    /// Outcomes of requests each arm answered (stored).
    pub outcomes: (u64, u64),
    /// `share.outcomes_per_arm`.
    pub needed_per_arm: u64,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_exposition_carries_counters_histograms_and_state_gauges() {
        let telemetry = Telemetry::new();
        telemetry.observe_request("/v1/score", "POST", 200, 0.0004);
        telemetry.observe_request("/v1/score", "POST", 200, 0.0009);
        telemetry.observe_scores("m-1-abc", 2);
        telemetry.observe_outcome(Some(120.0));
        telemetry.observe_run("kept", "manual", 3.5, 1_700_000_000_000);
        telemetry.observe_compacted(2048);
        telemetry.observe_compacted(10);
        let text = telemetry.render(&ScrapeState {
            active: Some(("m-1-abc".into(), "logistic".into())),
            holdout: vec![("auc".into(), 0.75)],
            psi: vec![("credit_utilisation".into(), 0.31)],
            score_records: 5000,
            score_records_pending: 12,
            frozen: true,
            leader: Some(("host-1".into(), true)),
            shadow: Some(ShadowProgress {
                candidate: "m-2-def".into(),
                outcomes: 40,
                needed: 500,
            }),
            share: Some(ShareProgress {
                candidate: "m-2-def".into(),
                fraction: 0.2,
                answers: (30, 120),
                errors: (1, 0),
                outcomes: (12, 41),
                needed_per_arm: 200,
            }),
            drift_computed_at: Some(1_700_000_000_500),
        });
        for line in [
            r#"understudy_http_requests_total{route="/v1/score",method="POST",status="200"} 2"#,
            r#"understudy_scores_total{model="m-1-abc"} 2"#,
            "understudy_outcomes_total 1",
            r#"understudy_runs_total{verdict="kept",trigger="manual"} 1"#,
            "understudy_last_run_timestamp_seconds 1700000000.0",
            r#"understudy_active_model_info{model="m-1-abc",family="logistic"} 1"#,
            r#"understudy_active_model_holdout{metric="auc"} 0.75"#,
            r#"understudy_psi{feature="credit_utilisation"} 0.31"#,
            "understudy_score_records 5000",
            "understudy_score_records_compacted_total 2058",
            r#"understudy_http_request_duration_seconds_count{route="/v1/score",method="POST",status="200"} 2"#,
            "understudy_score_records_pending 12",
            "understudy_promotions_frozen 1",
            r#"understudy_leader{replica="host-1"} 1"#,
            r#"understudy_shadow_outcomes{candidate="m-2-def"} 40"#,
            r#"understudy_shadow_outcomes_needed{candidate="m-2-def"} 500"#,
            r#"understudy_share_fraction{candidate="m-2-def"} 0.2"#,
            r#"understudy_share_answers{candidate="m-2-def",arm="candidate"} 30"#,
            r#"understudy_share_answers{candidate="m-2-def",arm="active"} 120"#,
            r#"understudy_share_errors{candidate="m-2-def",arm="candidate"} 1"#,
            r#"understudy_share_outcomes{candidate="m-2-def",arm="active"} 41"#,
            r#"understudy_share_outcomes_needed{candidate="m-2-def"} 200"#,
            "understudy_drift_report_timestamp_seconds 1700000000.5",
            "# TYPE understudy_build info",
            "# EOF",
        ] {
            assert!(text.contains(line), "missing `{line}` in\n{text}");
        }
        // Both latencies fall at or under the 1.6 ms bucket bound (0.0001·2⁴).
        assert!(text.contains(r#"le="0.0016""#), "{text}");
        let build = format!(
            r#"understudy_build_info{{version="{}",revision="{GIT_REVISION}"}} 1"#,
            env!("CARGO_PKG_VERSION")
        );
        assert!(text.contains(&build), "missing `{build}` in\n{text}");
        // A model that is no longer active leaves the info gauge; so does an ended shadow.
        let text = telemetry.render(&ScrapeState::default());
        assert!(!text.contains("understudy_active_model_info{"), "{text}");
        assert!(!text.contains("understudy_shadow_outcomes{"), "{text}");
        assert!(text.contains("understudy_promotions_frozen 0"), "{text}");
    }
}
