//! Labeled rows from outside (the `POST /v1/examples` body, a CSV file) into stored examples.
//!
//! One path for both, so a CSV import accepts and refuses exactly what the API does.

pub(crate) mod csv;

use std::collections::BTreeMap;

use serde_json::{Map, Value as Json};

use crate::schema::{FieldError, Row, RowError, Schema};
use crate::store::StoredExample;
use crate::time::{now_ms, parse_rfc3339, Millis};

const DAY_MS: Millis = 24 * 3600 * 1000;

/// Event times must not be more than this far in the future (clock skew allowance).
pub(crate) const MAX_FUTURE_MS: Millis = DAY_MS;

/// Event times must not be more than this far in the past (20 years of 365.25 days): a run
/// learns from recent history, and a time older than that is far more often a default value
/// (the Unix epoch, year 1) than a real event.
pub(crate) const MAX_PAST_MS: Millis = 20 * 36525 * DAY_MS / 100;

/// The `event_time` rule, as the API and the CSV importer state it.
pub(crate) const EVENT_TIME_RULE: &str =
    "must lie between 20 years before now and one day after now";

/// Validates one labeled row whose features are already a map (a CSV row). `id` defaults to
/// a fresh ULID (then the row is never a duplicate). The CSV reader now validates cell by cell;
/// this stays as the reference its property test compares it with.
#[cfg(test)]
pub(crate) fn example(
    schema: &Schema,
    features: &Map<String, Json>,
    label: f64,
    event_time: &str,
    id: Option<&str>,
) -> Result<StoredExample, RowError> {
    let row = schema.parse_row(features);
    finish(
        schema,
        row,
        features.clone(),
        label,
        event_time,
        id,
        Default::default(),
    )
}

/// The same for a features object still as JSON text (the API's body): the streaming parser
/// checks it, so a name given twice is refused here as on the scoring path.
pub(crate) fn example_from_text(
    schema: &Schema,
    features: &str,
    label: f64,
    event_time: &str,
    id: Option<&str>,
    monitoring: Monitoring,
) -> Result<StoredExample, RowError> {
    let row = schema.parse_row_text(features);
    // The text passed the streaming parser, so it is an object of finite numbers, strings and
    // nulls under distinct declared names: reading it as a map cannot fail. If it did, the
    // row is refused rather than stored half-read.
    let map = match (&row, serde_json::from_str::<Map<String, Json>>(features)) {
        (Err(_), _) => Map::new(),
        (Ok(_), Ok(map)) => map,
        (Ok(_), Err(_)) => {
            let error = FieldError {
                field: String::new(),
                rule: "must be a JSON object of named features".into(),
            };
            return finish(
                schema,
                Err(RowError(vec![error])),
                Map::new(),
                label,
                event_time,
                id,
                monitoring,
            );
        }
    };
    finish(schema, row, map, label, event_time, id, monitoring)
}

/// An example's monitoring attributes as sent: name to value (`None`: not recorded).
pub(crate) type Monitoring = BTreeMap<String, Option<String>>;

/// Longest value of a monitoring attribute.
const MAX_MONITORING_CHARS: usize = 200;

/// Monitoring attributes sent with an outcome: the same rules as an example's, every broken
/// one reported (fields named `monitoring.<name>`).
pub(crate) fn outcome_monitoring(
    schema: &Schema,
    monitoring: Monitoring,
) -> Result<BTreeMap<String, String>, RowError> {
    let mut errors = vec![];
    let kept = check_monitoring(schema, monitoring, &mut errors);
    if errors.is_empty() {
        Ok(kept)
    } else {
        Err(RowError(errors))
    }
}

/// Checks monitoring attributes against `monitoring.attributes`; keeps the recorded values.
fn check_monitoring(
    schema: &Schema,
    monitoring: Monitoring,
    errors: &mut Vec<FieldError>,
) -> BTreeMap<String, String> {
    let mut kept = BTreeMap::new();
    for (name, value) in monitoring {
        if !schema.monitoring().contains(&name) {
            errors.push(FieldError {
                field: format!("monitoring.{}", crate::text::clip(&name, 64)),
                rule: "is not a declared monitoring attribute (monitoring.attributes)".into(),
            });
            continue;
        }
        let Some(value) = value else { continue };
        if value.chars().count() > MAX_MONITORING_CHARS {
            errors.push(FieldError {
                field: format!("monitoring.{name}"),
                rule: format!("at most {MAX_MONITORING_CHARS} characters"),
            });
            continue;
        }
        if !value.trim().is_empty() {
            kept.insert(name, value.trim().to_owned());
        }
    }
    kept
}

fn finish(
    schema: &Schema,
    row: Result<Row, RowError>,
    features: Map<String, Json>,
    label: f64,
    event_time: &str,
    id: Option<&str>,
    monitoring: Monitoring,
) -> Result<StoredExample, RowError> {
    let mut errors = match row {
        Ok(_) => vec![],
        Err(e) => e.prefixed("features.").0,
    };
    let time = check_beside_features(schema, Some(label), event_time, id, &mut errors);
    let monitoring = check_monitoring(schema, monitoring, &mut errors);
    if !errors.is_empty() {
        return Err(RowError(errors));
    }
    Ok(StoredExample {
        id: id.map_or_else(|| ulid::Ulid::new().to_string(), str::to_owned),
        event_time: time,
        label,
        features,
        monitoring,
    })
}

/// The checks of a labeled row beside its features, in the order their errors are reported:
/// the label (`None` when it could not be read at all; its error is then the reader's), the
/// event time, the id. Appends each broken rule to `errors`; returns the event time (0 when it
/// is refused). The CSV reader, which validates features column by column, shares it.
pub(crate) fn check_beside_features(
    schema: &Schema,
    label: Option<f64>,
    event_time: &str,
    id: Option<&str>,
    errors: &mut Vec<FieldError>,
) -> Millis {
    if let Some(Err(rule)) = label.map(|label| schema.label_rule().check(label)) {
        errors.push(FieldError {
            field: "label".into(),
            rule,
        });
    }
    let time = parse_rfc3339(event_time);
    match time {
        None => errors.push(FieldError {
            field: "event_time".into(),
            rule: "must be an RFC 3339 timestamp such as 2026-03-01T12:00:00Z".into(),
        }),
        Some(t) if !event_time_allowed(t, now_ms()) => errors.push(FieldError {
            field: "event_time".into(),
            rule: EVENT_TIME_RULE.into(),
        }),
        Some(_) => {}
    }
    if let Some(id) = id {
        if id.is_empty() || id.len() > 128 {
            errors.push(FieldError {
                field: "id".into(),
                rule: "must be 1-128 characters".into(),
            });
        }
    }
    time.unwrap_or_default()
}

/// Whether an event at `time` may be stored when the clock reads `now`.
pub(crate) fn event_time_allowed(time: Millis, now: Millis) -> bool {
    time >= now - MAX_PAST_MS && time <= now + MAX_FUTURE_MS
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use serde_json::json;

    #[test]
    fn every_bad_part_of_a_labeled_row_is_named() {
        let schema = Config::embedded_default().schema();
        let features = json!({"days_to_due": 30}).as_object().cloned().unwrap();
        let errors = example(&schema, &features, 2.0, "3026-01-01T00:00:00Z", Some(""))
            .unwrap_err()
            .0;
        let fields: Vec<&str> = errors.iter().map(|e| e.field.as_str()).collect();
        assert!(fields.contains(&"features.invoice_amount"), "{fields:?}");
        assert!(fields.contains(&"label"));
        assert!(fields.contains(&"event_time"));
        assert!(fields.contains(&"id"));
    }
}

/// Properties of the one ingest path: the event-time window holds exactly, labels are 0 or 1,
/// the map and text forms agree, and nothing the caller sends makes it panic.
#[cfg(test)]
mod properties {
    use super::*;
    use crate::config::Config;
    use crate::time::to_rfc3339;
    use proptest::prelude::*;
    use proptest::test_runner::Config as Cases;
    use serde_json::json;

    const CASES: u32 = 1000;
    /// 0001-01-01T00:00:00Z and 9999-12-31T23:59:59Z in milliseconds.
    const YEAR_1: Millis = -62_135_596_800_000;
    const YEAR_9999: Millis = 253_402_300_799_000;
    /// Cases this close to a bound are skipped: the clock moves between drawing and checking.
    const NEAR_BOUND_MS: Millis = 60_000;

    /// The embedded schema, built once (loading the config dominates a case's time).
    fn schema() -> &'static Schema {
        static SCHEMA: std::sync::OnceLock<Schema> = std::sync::OnceLock::new();
        SCHEMA.get_or_init(|| Config::embedded_default().schema())
    }

    fn features() -> Map<String, Json> {
        json!({
            "invoice_amount": 12500.0, "days_to_due": 30, "debtor_years_trading": 4,
            "prior_late_invoices": 1, "credit_utilisation": 0.4,
            "debtor_sector": "retail", "submission_channel": "edi"
        })
        .as_object()
        .cloned()
        .unwrap()
    }

    fn near_a_bound(t: Millis, now: Millis) -> bool {
        (t - (now - MAX_PAST_MS)).abs() < NEAR_BOUND_MS
            || (t - (now + MAX_FUTURE_MS)).abs() < NEAR_BOUND_MS
    }

    /// Times across the whole RFC 3339 range, and times near now (where real data is).
    fn any_time() -> impl Strategy<Value = Millis> {
        let now = now_ms();
        prop_oneof![
            YEAR_1..=YEAR_9999,
            (now - 2 * MAX_PAST_MS)..=(now + 30 * DAY_MS),
            prop::sample::select(vec![YEAR_1, 0, YEAR_9999, now, now - MAX_PAST_MS + DAY_MS]),
        ]
    }

    proptest! {
        #![proptest_config(Cases::with_cases(CASES))]

        #[test]
        fn an_event_time_is_stored_exactly_when_it_lies_in_the_window(t in any_time()) {
            let now = now_ms();
            prop_assume!(!near_a_bound(t, now));
            let text = to_rfc3339(t);
            let result = example(schema(), &features(), 1.0, &text, None);
            if event_time_allowed(t, now) {
                prop_assert_eq!(result.map(|e| e.event_time), Ok(t), "{}", text);
            } else {
                let errors = result.unwrap_err().0;
                prop_assert_eq!(errors.len(), 1);
                prop_assert_eq!(errors[0].field.as_str(), "event_time");
                prop_assert_eq!(errors[0].rule.as_str(), EVENT_TIME_RULE);
            }
        }

        #[test]
        fn any_event_time_text_is_refused_by_name_or_stored_in_the_window(text in "\\PC{0,40}") {
            match example(schema(), &features(), 0.0, &text, None) {
                Ok(stored) => prop_assert!(event_time_allowed(stored.event_time, now_ms())),
                Err(RowError(errors)) => {
                    prop_assert_eq!(errors.len(), 1);
                    prop_assert_eq!(errors[0].field.as_str(), "event_time");
                    prop_assert!(!errors[0].rule.is_empty());
                }
            }
        }

        #[test]
        fn a_binary_label_is_stored_only_when_it_is_0_or_1(label in prop_oneof![
            any::<f64>(),
            prop::sample::select(vec![0.0, 1.0, -0.0, 2.0, -1.0, 0.5, f64::NAN, f64::INFINITY]),
        ]) {
            let result = example(schema(), &features(), label, "2026-01-01T00:00:00Z", None);
            if label == 0.0 || label == 1.0 {
                prop_assert!(result.is_ok());
            } else {
                let errors = result.unwrap_err().0;
                prop_assert_eq!(errors[0].field.as_str(), "label");
                prop_assert!(errors[0].rule.contains("must be 0 or 1"));
            }
        }

        #[test]
        fn the_text_and_map_forms_agree_on_any_object(
            members in prop::collection::btree_map(
                prop_oneof![
                    prop::sample::select(schema().feature_names()),
                    "[a-z_]{0,8}",
                ],
                prop_oneof![
                    Just(Json::Null),
                    any::<i32>().prop_map(Json::from),
                    (-10.0..10.0f64).prop_map(Json::from),
                    prop::sample::select(vec!["retail", "edi", "mining", ""]).prop_map(Json::from),
                    any::<bool>().prop_map(Json::Bool),
                ],
                0..9,
            ),
            id in prop::option::of("\\PC{0,130}"),
        ) {
            let map: Map<String, Json> = members.into_iter().collect();
            let text = Json::Object(map.clone()).to_string();
            let when = "2026-02-01T00:00:00Z";
            let from_map = example(schema(), &map, 0.0, when, id.as_deref());
            let from_text = example_from_text(schema(), &text, 0.0, when, id.as_deref(), Default::default());
            match (from_map, from_text) {
                (Ok(a), Ok(b)) => {
                    prop_assert_eq!(a.features, b.features);
                    prop_assert_eq!(a.event_time, b.event_time);
                }
                (Err(a), Err(b)) => {
                    prop_assert_eq!(&a, &b);
                    for e in &a.0 {
                        prop_assert!(
                            e.field.starts_with("features.") || e.field == "id",
                            "{:?}", e
                        );
                        prop_assert!(!e.rule.is_empty());
                    }
                }
                (a, b) => prop_assert!(false, "map {:?} but text {:?}", a, b),
            }
        }
    }

    #[test]
    fn a_feature_named_twice_is_refused_in_the_text_form() {
        let text = r#"{"invoice_amount": 1, "invoice_amount": 2, "days_to_due": 30,
            "credit_utilisation": 0.1, "debtor_sector": "retail"}"#;
        let errors = example_from_text(
            schema(),
            text,
            0.0,
            "2026-01-01T00:00:00Z",
            None,
            Default::default(),
        )
        .unwrap_err()
        .0;
        assert_eq!(errors[0].field, "features.invoice_amount");
        assert!(errors[0].rule.contains("given twice"), "{errors:?}");
        let errors = example_from_text(
            schema(),
            "[1]",
            0.0,
            "2026-01-01T00:00:00Z",
            None,
            Default::default(),
        )
        .unwrap_err()
        .0;
        assert_eq!(errors[0].field, "features", "{errors:?}");
    }
}
