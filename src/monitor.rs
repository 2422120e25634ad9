//! What ops watch between runs: drift of recent requests against the active model's training
//! window, and how many recent scores already have their outcome (label delay).
//!
//! Reads recent score records through the store seam and hands the numbers to the pure
//! `drift` module; the API and the schedule both use it.

use std::sync::Arc;

use serde::Serialize;

use crate::config::{Config, DriftConfig};
use crate::drift::{Band, Drift, Thresholds};
use crate::model::Model;
use crate::schema::{Row, Schema};
use crate::store::{CoverageBucket, Store, StoreError};
use crate::time::{now_ms, Millis};

const DAY_MS: Millis = 24 * 3600 * 1000;

/// Score-age buckets for outcome coverage: (label, lower bound, upper bound) in days.
const COVERAGE_BUCKETS: [(&str, Millis, Millis); 4] = [
    ("0-1d", 0, 1),
    ("1-7d", 1, 7),
    ("7-30d", 7, 30),
    ("30d+", 30, Millis::MAX / DAY_MS),
];

/// The recent requests a report looked at.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Window {
    pub rows: usize,
    /// Records that no longer fit the schema, left out.
    pub skipped: usize,
    #[serde(with = "crate::time::rfc3339::option")]
    pub from: Option<Millis>,
    #[serde(with = "crate::time::rfc3339::option")]
    pub to: Option<Millis>,
    pub max_rows: usize,
    pub max_age_seconds: Option<u64>,
}

/// Drift of recent requests against the active model.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DriftReport {
    /// The model whose training window is the reference.
    pub model_id: String,
    pub window: Window,
    pub watch: f64,
    pub act: f64,
    /// False when the window holds fewer than `drift.min_rows` requests: the numbers are
    /// shown but no band is acted on.
    pub enough_rows: bool,
    /// `drift.min_rows`: the fewest requests a PSI is acted on (and the score's PSI computed) over.
    pub min_rows: usize,
    /// Requests in the window the active model answered: the score's PSI is over these only.
    pub score_rows: usize,
    /// The score's drift; `None` when fewer than `min_rows` requests were answered by the
    /// active model (just after a promotion, say), see `score_note`.
    pub score: Option<Drift>,
    /// Why there is no score drift ("not enough rows: ..."), when there is none.
    pub score_note: Option<String>,
    pub features: Vec<Drift>,
}

impl DriftReport {
    /// Names and PSI of what reached the `act` band (empty when the window is too small).
    pub fn breaches(&self) -> Vec<(String, f64)> {
        if !self.enough_rows {
            return vec![];
        }
        self.features
            .iter()
            .chain(self.score.iter())
            .filter(|d| d.band == Band::Act)
            .map(|d| (d.name.clone(), d.psi))
            .collect()
    }
}

fn window_since(config: &DriftConfig) -> Option<Millis> {
    config
        .window_age
        .map(|age| now_ms() - age.as_millis() as Millis)
}

/// Assesses drift of the recent requests scored by any model against `model`'s reference.
/// `None` when the model carries no reference (trained before drift was recorded).
pub fn drift_report(
    store: &dyn Store,
    schema: &Schema,
    config: &Config,
    model: &Model,
) -> Result<Option<DriftReport>, StoreError> {
    let Some(reference) = &model.reference else {
        return Ok(None);
    };
    let drift = &config.drift;
    let records = store.recent_scores(drift.window_rows, window_since(drift))?;
    let mut rows: Vec<Row> = Vec::with_capacity(records.len());
    let mut skipped = 0;
    for record in &records {
        // Validated again under today's schema, values records included (their rules may
        // have changed since).
        match schema.parse_row_text(&record.features.to_json_string()) {
            Ok(row) => rows.push(row),
            Err(_) => skipped += 1,
        }
    }
    let refs: Vec<&Row> = rows.iter().collect();
    let thresholds = Thresholds {
        watch: drift.watch,
        act: drift.act,
    };
    let features = reference.feature_drift(&refs, thresholds);
    // The score's reference is the model's own output on its training rows, so only requests
    // this model answered count toward the score's PSI (not those of an earlier model).
    let own: Vec<f64> = records
        .iter()
        .filter(|r| r.model_id == model.id)
        .map(|r| r.output)
        .collect();
    // A PSI over a handful of rows is noise (50 identical requests gave 8.3): below
    // drift.min_rows the score gets no PSI and no band, and so can never start a run.
    let enough_own = own.len() >= drift.min_rows.max(1);
    let score = enough_own.then(|| reference.score_drift(&own, thresholds));
    let score_note = (!enough_own).then(|| {
        format!(
            "not enough rows: {} recent requests were answered by {}, drift.min_rows is {}",
            own.len(),
            model.id,
            drift.min_rows
        )
    });
    Ok(Some(DriftReport {
        model_id: model.id.clone(),
        window: Window {
            rows: rows.len(),
            skipped,
            from: records.last().map(|r| r.at),
            to: records.first().map(|r| r.at),
            max_rows: drift.window_rows,
            max_age_seconds: drift.window_age.map(|d| d.as_secs()),
        },
        watch: drift.watch,
        act: drift.act,
        enough_rows: rows.len() >= drift.min_rows,
        min_rows: drift.min_rows,
        score_rows: own.len(),
        score,
        score_note,
        features,
    }))
}

/// The latest drift report, kept between drift checks so a metrics scrape reads it instead
/// of binning the whole window again: `/metrics` recomputes only when the kept report is for
/// another model or older than `drift.check_every`; `GET /v1/drift` always recomputes and
/// keeps what it computed.
#[derive(Debug, Default)]
pub struct DriftCache {
    last: std::sync::Mutex<Option<(Millis, Arc<DriftReport>)>>,
}

impl DriftCache {
    pub fn new() -> DriftCache {
        DriftCache::default()
    }

    /// Keeps `report`, computed at `at`; returns it shared.
    pub fn keep(&self, report: DriftReport, at: Millis) -> Arc<DriftReport> {
        let report = Arc::new(report);
        if let Ok(mut last) = self.last.lock() {
            *last = Some((at, Arc::clone(&report)));
        }
        report
    }

    /// The kept report and when it was computed, if it is for `model_id` and not older than
    /// `max_age` at `now`.
    pub fn fresh(
        &self,
        model_id: &str,
        now: Millis,
        max_age: std::time::Duration,
    ) -> Option<(Millis, Arc<DriftReport>)> {
        let last = self.last.lock().ok()?;
        let (at, report) = last.as_ref()?;
        (report.model_id == model_id && now - *at <= max_age.as_millis() as Millis)
            .then(|| (*at, Arc::clone(report)))
    }
}

/// Outcome coverage of the recent scores (the drift window), by score age.
/// The active model's decline check on its latest labeled rows after its training cutoff
/// (`schedule.decline_rows` at most); `None` with fewer than `schedule.decline_min_rows` such
/// rows, without a holdout report, or when the metric is undefined on them.
pub fn decline_check(
    store: &dyn Store,
    schema: &Schema,
    config: &Config,
    model: &Model,
) -> Result<Option<crate::decline::Decline>, StoreError> {
    let schedule = &config.schedule;
    let Some(holdout) = &model.holdout else {
        return Ok(None);
    };
    let stored = store.latest_examples(schedule.decline_rows, Some(model.trained.cutoff + 1))?;
    let (examples, _) = crate::learn::window::parse_examples(stored, schema);
    if examples.len() < schedule.decline_min_rows {
        return Ok(None);
    }
    let rows: Vec<&Row> = examples.iter().map(|e| &e.row).collect();
    let labels: Vec<f64> = examples.iter().map(|e| e.label).collect();
    Ok(crate::decline::check(
        config.gate.metric,
        holdout,
        &model.predictions(&rows),
        &labels,
        schedule.decline_alpha,
    ))
}

pub fn coverage(store: &dyn Store, config: &Config) -> Result<Vec<CoverageBucket>, StoreError> {
    let drift = &config.drift;
    let records = store.recent_scores(drift.window_rows, None)?;
    let now = now_ms();
    let mut buckets: Vec<CoverageBucket> = COVERAGE_BUCKETS
        .iter()
        .map(|(age, _, _)| CoverageBucket {
            age: (*age).to_owned(),
            scores: 0,
            with_outcome: 0,
        })
        .collect();
    for record in &records {
        let days = (now - record.at).max(0) / DAY_MS;
        let Some(k) = COVERAGE_BUCKETS
            .iter()
            .position(|(_, lo, hi)| days >= *lo && days < *hi)
        else {
            continue;
        };
        buckets[k].scores += 1;
        if store.has_outcome(&record.score_id)? {
            buckets[k].with_outcome += 1;
        }
    }
    Ok(buckets)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn report(model_id: &str) -> DriftReport {
        DriftReport {
            model_id: model_id.into(),
            window: Window {
                rows: 0,
                skipped: 0,
                from: None,
                to: None,
                max_rows: 10,
                max_age_seconds: None,
            },
            watch: 0.1,
            act: 0.25,
            enough_rows: false,
            min_rows: 10,
            score_rows: 0,
            score: None,
            score_note: Some("not enough rows".into()),
            features: vec![],
        }
    }

    #[test]
    fn a_kept_report_is_served_for_its_model_until_it_is_older_than_the_limit() {
        let cache = DriftCache::new();
        let age = std::time::Duration::from_secs(900);
        assert!(cache.fresh("m-1", 1_000, age).is_none(), "nothing kept yet");
        cache.keep(report("m-1"), 1_000);
        let (at, kept) = cache.fresh("m-1", 1_000 + 900_000, age).unwrap();
        assert_eq!((at, kept.model_id.as_str()), (1_000, "m-1"));
        assert!(
            cache.fresh("m-1", 1_000 + 900_001, age).is_none(),
            "too old"
        );
        assert!(cache.fresh("m-2", 1_000, age).is_none(), "another model's");
    }

    #[test]
    fn a_report_without_a_score_psi_breaches_nothing_for_the_score() {
        let mut r = report("m-1");
        r.enough_rows = true;
        assert!(r.breaches().is_empty());
    }
}
