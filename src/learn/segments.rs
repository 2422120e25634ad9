//! The segment guardrail: a candidate that wins on the whole gate may still be worse for one
//! group of customers (a sector, a size band). With `guardrails.segments`, the gate's rows are
//! cut by each configured feature (a category feature by its categories, a number feature by
//! its bands), both models' gate metric is computed on every segment, and a segment with at
//! least `guardrails.segment_min_rows` rows on which the candidate is worse by more than
//! `guardrails.segment_tolerance` turns a promotion into `rejected`. The table goes in the log
//! for every judged run, breach or not. Pure: no I/O.

use crate::config::{GuardrailConfig, SegmentConfig};
use crate::metrics::{self, GateMetric};
use crate::promotion::SegmentResult;
use crate::schema::{Row, Schema, Value};

/// Which segment of `spec` a row falls in: its label, or `None` for a missing value.
fn segment_of(schema: &Schema, spec: &SegmentConfig, index: usize, row: &Row) -> Option<String> {
    match row.get(index)? {
        Value::Category(c) => schema.features()[index].categories.get(c as usize).cloned(),
        Value::Number(x) => Some(band_label(&spec.bands, x)),
        Value::Missing => None,
    }
}

/// The band `x` falls in, as a label: `below a`, `a to b`, `b and above`.
fn band_label(cuts: &[f64], x: f64) -> String {
    match cuts.iter().position(|&c| x < c) {
        Some(0) => format!("below {}", cuts[0]),
        Some(k) => format!("{} to {}", cuts[k - 1], cuts[k]),
        None => format!("{} and above", cuts[cuts.len() - 1]),
    }
}

/// Both models on every segment of every configured feature, in the order the segments are
/// first met within each feature (categories in declared order, bands from low to high).
pub fn table(
    schema: &Schema,
    guardrails: &GuardrailConfig,
    metric: GateMetric,
    rows: &[&Row],
    labels: &[f64],
    (candidate, active): (&[f64], &[f64]),
) -> Vec<SegmentResult> {
    let mut out = Vec::new();
    for spec in &guardrails.segments {
        let Some(index) = schema
            .features()
            .iter()
            .position(|f| f.name == spec.feature)
        else {
            continue;
        };
        let mut order: Vec<String> = if spec.bands.is_empty() {
            schema.features()[index].categories.clone()
        } else {
            let mut bands = vec![band_label(&spec.bands, f64::NEG_INFINITY)];
            bands.extend(spec.bands.iter().map(|&c| band_label(&spec.bands, c)));
            bands
        };
        order.dedup();
        for segment in order {
            let members: Vec<usize> = (0..rows.len())
                .filter(|&i| segment_of(schema, spec, index, rows[i]).as_deref() == Some(&segment))
                .collect();
            let pick = |values: &[f64]| members.iter().map(|&i| values[i]).collect::<Vec<_>>();
            let y = pick(labels);
            let (c, a) = (
                metrics::evaluate(metric, &pick(candidate), &y),
                metrics::evaluate(metric, &pick(active), &y),
            );
            let worse_by = match (c, a) {
                (Some(c), Some(a)) if metric.higher_is_better() => Some(a - c),
                (Some(c), Some(a)) => Some(c - a),
                _ => None,
            };
            let judged = members.len() >= guardrails.segment_min_rows && worse_by.is_some();
            out.push(SegmentResult {
                feature: spec.feature.clone(),
                segment,
                rows: members.len(),
                candidate: c,
                active: a,
                worse_by,
                judged,
                breach: judged && worse_by.is_some_and(|w| w > guardrails.segment_tolerance),
            });
        }
    }
    out
}

/// The reason a breach gives, naming the worst breached segment; `None` without a breach.
pub fn breach_reason(
    table: &[SegmentResult],
    metric: GateMetric,
    tolerance: f64,
) -> Option<String> {
    let worst = table.iter().filter(|s| s.breach).max_by(|a, b| {
        a.worse_by
            .unwrap_or(0.0)
            .total_cmp(&b.worse_by.unwrap_or(0.0))
    })?;
    let breaches = table.iter().filter(|s| s.breach).count();
    Some(format!(
        "the candidate is worse than the active model on {breaches} segment(s), most on `{} = {}` ({} rows): {} {:.4} against {:.4}, worse by {:.4}, beyond guardrails.segment_tolerance {tolerance}",
        worst.feature,
        worst.segment,
        worst.rows,
        metric.name(),
        worst.candidate.unwrap_or(f64::NAN),
        worst.active.unwrap_or(f64::NAN),
        worst.worse_by.unwrap_or(f64::NAN),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;

    #[test]
    fn bands_are_labelled_from_low_to_high() {
        let cuts = [5000.0, 20000.0];
        assert_eq!(band_label(&cuts, 10.0), "below 5000");
        assert_eq!(band_label(&cuts, 5000.0), "5000 to 20000");
        assert_eq!(band_label(&cuts, 25000.0), "20000 and above");
    }

    #[test]
    fn a_candidate_better_overall_but_worse_on_one_sector_is_turned_away() {
        let mut config = Config::embedded_default();
        config.guardrails.segments = vec![SegmentConfig {
            feature: "debtor_sector".into(),
            bands: vec![],
        }];
        config.guardrails.segment_min_rows = 4;
        let schema = config.schema();
        let sectors = &schema
            .features()
            .iter()
            .find(|f| f.name == "debtor_sector")
            .unwrap()
            .categories;
        let row = |sector: &str| {
            let mut features = serde_json::Map::new();
            for f in schema.features() {
                let value = match f.kind {
                    crate::schema::FeatureKind::Category if f.name == "debtor_sector" => {
                        serde_json::json!(sector)
                    }
                    crate::schema::FeatureKind::Category => serde_json::json!(f.categories[0]),
                    crate::schema::FeatureKind::Number => serde_json::json!(f.min.unwrap_or(0.0)),
                };
                features.insert(f.name.clone(), value);
            }
            schema.parse_row(&features).unwrap()
        };
        // Eight rows of the first sector, eight of the second (labels 0,0,0,0,1,1,1,1 each).
        let (a, b) = (sectors[0].as_str(), sectors[1].as_str());
        let rows: Vec<Row> = (0..16).map(|i| row(if i < 8 { a } else { b })).collect();
        let refs: Vec<&Row> = rows.iter().collect();
        let labels: Vec<f64> = (0..16).map(|i| f64::from(i % 8 >= 4)).collect();
        // Sector a: the candidate ranks perfectly (AUC 1), the active model is a coin
        // (AUC 0.5). Sector b: the candidate swaps one pair (AUC 15/16 = 0.9375), the active
        // model is perfect (AUC 1). By hand, over all 16 rows the candidate's AUC is higher.
        let candidate = [
            0.1, 0.2, 0.3, 0.4, 0.6, 0.7, 0.8, 0.9, //
            0.1, 0.2, 0.3, 0.65, 0.6, 0.7, 0.8, 0.9,
        ];
        let active = [
            0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5, //
            0.1, 0.2, 0.3, 0.4, 0.6, 0.7, 0.8, 0.9,
        ];
        let binary = metrics::as_binary(&labels);
        let whole_c = metrics::auc(&candidate, &binary).unwrap();
        let whole_a = metrics::auc(&active, &binary).unwrap();
        assert!(whole_c > whole_a, "whole gate: {whole_c} vs {whole_a}");

        let table = table(
            &schema,
            &config.guardrails,
            GateMetric::Auc,
            &refs,
            &labels,
            (&candidate, &active),
        );
        let seg = |name: &str| table.iter().find(|s| s.segment == name).unwrap();
        assert_eq!(seg(a).candidate, Some(1.0));
        assert_eq!(seg(a).active, Some(0.5));
        assert!(!seg(a).breach);
        assert_eq!(seg(b).candidate, Some(0.9375));
        assert_eq!(seg(b).active, Some(1.0));
        assert!(seg(b).judged && seg(b).breach, "{:?}", seg(b));
        // Sectors with no rows are shown, not judged.
        assert!(table.iter().filter(|s| s.rows == 0).all(|s| !s.judged));
        let reason = breach_reason(&table, GateMetric::Auc, 0.02).unwrap();
        assert!(reason.contains(&format!("debtor_sector = {b}")), "{reason}");

        // Within tolerance (0.0625 worse, tolerance 0.1) it passes.
        let mut lenient = config.guardrails.clone();
        lenient.segment_tolerance = 0.1;
        let table = super::table(
            &schema,
            &lenient,
            GateMetric::Auc,
            &refs,
            &labels,
            (&candidate, &active),
        );
        assert!(breach_reason(&table, GateMetric::Auc, 0.1).is_none());
    }
}
