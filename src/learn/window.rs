//! What a run reads: stored examples parsed against today's schema, the latest
//! `training.window_rows` of them, and the plan that says how to judge them.
//!
//! The service's runs (`scheduler`), the offline `train` command and any replay of history all
//! start from here, so a run sees the same rows whoever starts it.

use crate::config::Config;
use crate::model::Model;
use crate::promotion::Trigger;
use crate::schema::Schema;
use crate::store::StoredExample;
use crate::time::Millis;

use super::{Example, RunPlan};

/// The examples a run fits and judges, with what was left out.
#[derive(Debug, Default)]
pub struct Window {
    /// Oldest first, by event time.
    pub examples: Vec<Example>,
    /// Stored examples that no longer fit the schema.
    pub skipped: usize,
    /// Older examples beyond `max_rows`, left out.
    pub beyond_window: usize,
}

/// Parses `stored` against `schema` and keeps the latest `max_rows` by event time (a stable
/// sort: rows with the same time keep their stored order).
pub fn window(stored: Vec<StoredExample>, schema: &Schema, max_rows: usize) -> Window {
    let (examples, skipped) = parse_examples(stored, schema);
    latest(examples, skipped, max_rows)
}

/// Stored examples parsed against today's schema, and how many no longer fit it.
pub fn parse_examples(stored: Vec<StoredExample>, schema: &Schema) -> (Vec<Example>, usize) {
    let mut skipped = 0;
    let examples = stored
        .into_iter()
        .filter_map(|stored| match schema.parse_row(&stored.features) {
            Ok(row) => Some(Example {
                monitoring: stored.monitoring,
                id: stored.id.into(),
                event_time: stored.event_time,
                row,
                label: stored.label,
            }),
            Err(_) => {
                skipped += 1;
                None
            }
        })
        .collect();
    (examples, skipped)
}

/// The latest `max_rows` of `examples` by event time, oldest first (a stable sort: rows with
/// the same time keep their order); the rows kept are not copied.
pub fn latest(mut examples: Vec<Example>, skipped: usize, max_rows: usize) -> Window {
    examples.sort_by_key(|e| e.event_time);
    let beyond_window = examples.len().saturating_sub(max_rows);
    examples.drain(..beyond_window);
    Window {
        examples,
        skipped,
        beyond_window,
    }
}

impl<'a> RunPlan<'a> {
    /// The plan for run `run_id` under `config`, against `active` (none offline).
    #[allow(clippy::too_many_arguments)]
    pub fn from_config(
        config: &'a Config,
        schema: &'a Schema,
        run_id: String,
        trigger: Trigger,
        model_seq: u64,
        now: Millis,
        active: Option<&'a Model>,
        skipped: usize,
    ) -> RunPlan<'a> {
        RunPlan {
            run_id,
            trigger,
            model_seq,
            now,
            schema,
            target: config.label.kind,
            training: &config.training,
            gate: &config.gate,
            guardrails: &config.guardrails,
            active,
            skipped,
            config_digest: config.digest.clone(),
        }
    }
}

#[cfg(test)]
mod tests {
    use serde_json::json;

    use super::*;

    fn stored(id: &str, event_time: Millis, amount: serde_json::Value) -> StoredExample {
        let mut features = json!({
            "invoice_amount": 12500.0, "days_to_due": 30, "debtor_years_trading": 4,
            "prior_late_invoices": 1, "credit_utilisation": 0.4,
            "debtor_sector": "retail", "submission_channel": "edi"
        });
        features["invoice_amount"] = amount;
        StoredExample {
            monitoring: Default::default(),
            id: id.into(),
            event_time,
            label: 1.0,
            features: features.as_object().cloned().unwrap(),
        }
    }

    #[test]
    fn rows_that_no_longer_fit_are_skipped_and_only_the_latest_are_kept_in_time_order() {
        let schema = Config::embedded_default().schema();
        let rows = vec![
            stored("c", 30, json!(100.0)),
            stored("bad", 5, json!("not a number")),
            stored("a", 10, json!(100.0)),
            stored("b", 20, json!(100.0)),
        ];
        let window = window(rows, &schema, 2);
        assert_eq!(window.skipped, 1);
        assert_eq!(window.beyond_window, 1);
        let ids: Vec<&str> = window.examples.iter().map(|e| e.id.as_str()).collect();
        assert_eq!(ids, ["b", "c"]);
    }
}
