//! A run's evidence as one self-contained HTML page, for a committee pack or an audit file.
//!
//! A model-risk committee reads a promotion decision away from the service, often years later:
//! the page carries everything its log entries hold (every field, nested tables for nested
//! evidence) and the ROC curves of both models drawn as inline SVG, with no script, no style
//! sheet or font from elsewhere and no network access, so it opens the same anywhere and can be
//! archived as it is. Pure: log entries in, text out; `understudy log --evidence RUN_ID`
//! writes it.

use serde_json::Value as Json;

use crate::promotion::{Curves, Entry};
use crate::text::escape_markup as esc;

/// Keys shown first, in this order, in an entry's own table; the rest follow as stored.
const FIRST: [&str; 14] = [
    "seq",
    "run_id",
    "at",
    "trigger",
    "verdict",
    "reason",
    "actor",
    "active_before",
    "active_after",
    "candidate_id",
    "metric",
    "margin",
    "gain",
    "p_value",
];

/// The page for `entries` (a run's log entries, oldest first), generated at `now` (RFC 3339).
pub fn page(run_id: &str, entries: &[Entry], now: &str) -> String {
    let mut out = String::with_capacity(64 * 1024);
    out.push_str(&format!(
        "<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\
         <title>Evidence for run {id}</title>\n<style>{STYLE}</style></head><body>\n\
         <h1>Evidence for run {id}</h1>\n<p class=\"meta\">{n} log entr{ies}; page written {now} by understudy {version}.</p>\n\
         <p class=\"caution\">A promotion decision about a model whose scores may affect people. Metrics, segment \
         tables and adverse-impact ratios are evidence for a human review, not a substitute for it; \
         the adverse-impact screen is a screening statistic, not a legal finding. Defer to local law \
         and licensed practice.</p>\n",
        id = esc(run_id),
        n = entries.len(),
        ies = if entries.len() == 1 { "y" } else { "ies" },
        now = esc(now),
        version = env!("CARGO_PKG_VERSION"),
    ));
    for entry in entries {
        out.push_str(&format!(
            "<section><h2>Log entry {} · {} · {}</h2>\n",
            entry.seq,
            esc(entry.trigger.as_str()),
            esc(entry.verdict.as_str())
        ));
        if let Some(curves) = &entry.curves {
            let active = curves.active.as_ref();
            out.push_str(&roc_svg(&curves.candidate, active, curves.rows));
            out.push_str(&calibration_svg(&curves.candidate, active, curves.rows));
        }
        let mut value = serde_json::to_value(entry).unwrap_or(Json::Null);
        // The ROC points are drawn above; their numbers would only be noise in the tables (the
        // calibration bins stay: their row counts are not in the drawing).
        if let Some(curves) = value.get_mut("curves") {
            for model in ["candidate", "active"] {
                if let Some(Json::Object(c)) = curves.get_mut(model) {
                    c.remove("roc");
                }
            }
        }
        out.push_str(&ordered_table(&value));
        out.push_str("</section>\n");
    }
    out.push_str("</body></html>\n");
    out
}

const STYLE: &str =
    "body{font:14px/1.45 system-ui,sans-serif;margin:2rem;color:#1d2a33;max-width:1100px}\
h1{font-size:1.4rem}h2{font-size:1.1rem;margin-top:2rem;border-bottom:1px solid #ccc}\
table{border-collapse:collapse;margin:.3rem 0}td,th{border:1px solid #ddd;padding:2px 6px;\
vertical-align:top;text-align:left;overflow-wrap:anywhere}th{background:#f3f3f3;font-weight:600;white-space:nowrap;overflow-wrap:normal}\
.meta{color:#666}.caution{background:#efe6d2;padding:.5rem .8rem}\
svg{border:1px solid #ddd;margin:.5rem 0}";

/// An entry's object with the keys of [`FIRST`] first.
fn ordered_table(value: &Json) -> String {
    let Json::Object(map) = value else {
        return cell(value);
    };
    let mut keys: Vec<&String> = FIRST
        .iter()
        .filter_map(|k| map.get_key_value(*k).map(|(k, _)| k))
        .collect();
    keys.extend(map.keys().filter(|k| !FIRST.contains(&k.as_str())));
    rows(keys.into_iter().map(|k| (k, &map[k])))
}

/// A table of key/value rows.
fn rows<'a>(pairs: impl Iterator<Item = (&'a String, &'a Json)>) -> String {
    let mut out = String::from("<table>");
    for (key, value) in pairs {
        out.push_str(&format!(
            "<tr><th>{}</th><td>{}</td></tr>",
            esc(key),
            cell(value)
        ));
    }
    out.push_str("</table>\n");
    out
}

/// Any JSON value as HTML: objects as key/value tables, arrays of objects as one table with a
/// column per key (in first-seen order), other arrays as lists, scalars as text.
fn cell(value: &Json) -> String {
    match value {
        Json::Null => "–".into(),
        Json::String(s) => esc(s),
        Json::Bool(_) | Json::Number(_) => esc(&value.to_string()),
        Json::Object(map) => rows(map.iter()),
        Json::Array(items) if items.iter().all(Json::is_object) && !items.is_empty() => {
            let mut columns: Vec<&String> = Vec::new();
            for item in items {
                for key in item.as_object().into_iter().flat_map(|m| m.keys()) {
                    if !columns.contains(&key) {
                        columns.push(key);
                    }
                }
            }
            let mut out = String::from("<table><tr>");
            for c in &columns {
                out.push_str(&format!("<th>{}</th>", esc(c)));
            }
            out.push_str("</tr>");
            for item in items {
                out.push_str("<tr class=\"row\">");
                for c in &columns {
                    out.push_str(&format!(
                        "<td>{}</td>",
                        cell(item.get(c.as_str()).unwrap_or(&Json::Null))
                    ));
                }
                out.push_str("</tr>");
            }
            out.push_str("</table>");
            out
        }
        Json::Array(items) => {
            let parts: Vec<String> = items.iter().map(cell).collect();
            parts.join(", ")
        }
    }
}

/// Both models' ROC curves as an inline SVG square (false positive rate across, true positive
/// rate up), the diagonal for reference.
fn roc_svg(candidate: &Curves, active: Option<&Curves>, rows: usize) -> String {
    let roc = |c: &Curves| c.roc.clone();
    square_plot(
        "roc",
        &format!("ROC, {rows} gate rows"),
        "false positive rate →, true positive rate ↑",
        &roc(candidate),
        active.map(roc).as_deref(),
    )
}

/// Both models' calibration (reliability) curves: each non-empty probability bin's mean
/// predicted probability across and its observed rate of 1s up; on the diagonal a model's
/// probabilities mean what they say.
fn calibration_svg(candidate: &Curves, active: Option<&Curves>, rows: usize) -> String {
    let bins = |c: &Curves| {
        c.calibration
            .iter()
            .map(|b| (b.mean_probability, b.observed_rate))
            .collect::<Vec<_>>()
    };
    square_plot(
        "calibration",
        &format!("Calibration, {rows} gate rows"),
        "mean predicted probability →, observed rate ↑",
        &bins(candidate),
        active.map(bins).as_deref(),
    )
}

/// A unit square plot of the candidate's and the active model's points (x and y in [0, 1]),
/// joined, with the diagonal; the title and legend in a column to its right. Classes
/// `{name}`, `{name}-candidate` and `{name}-active`.
fn square_plot(
    name: &str,
    title: &str,
    axes: &str,
    candidate: &[(f64, f64)],
    active: Option<&[(f64, f64)]>,
) -> String {
    const SIDE: f64 = 240.0;
    const PAD: f64 = 30.0;
    let points = |xy: &[(f64, f64)]| {
        xy.iter()
            .map(|&(x, y)| format!("{:.1},{:.1}", PAD + x * SIDE, PAD + (1.0 - y) * SIDE))
            .collect::<Vec<_>>()
            .join(" ")
    };
    let mut svg = format!(
        "<svg class=\"{name}\" width=\"{w}\" height=\"{h}\" viewBox=\"0 0 {w} {h}\" role=\"img\" \
         aria-label=\"{title}\">\
         <text x=\"{t}\" y=\"{PAD}\" font-size=\"13\" font-weight=\"600\">{title}</text>\
         <text x=\"{t}\" y=\"{l1}\" font-size=\"12\" fill=\"#1f7a6d\">━ candidate</text>\
         <text x=\"{t}\" y=\"{l2}\" font-size=\"12\" fill=\"#c9731e\">━ active</text>\
         <text x=\"{t}\" y=\"{l3}\" font-size=\"11\" fill=\"#666\">{axes}</text>\
         <line x1=\"{PAD}\" y1=\"{b}\" x2=\"{b}\" y2=\"{PAD}\" stroke=\"#bbb\"/>\
         <rect x=\"{PAD}\" y=\"{PAD}\" width=\"{SIDE}\" height=\"{SIDE}\" fill=\"none\" stroke=\"#999\"/>",
        title = esc(title),
        axes = esc(axes),
        w = SIDE + 2.0 * PAD + 280.0,
        h = SIDE + 2.0 * PAD,
        t = SIDE + 2.0 * PAD,
        l1 = PAD + 22.0,
        l2 = PAD + 40.0,
        l3 = PAD + 62.0,
        b = PAD + SIDE,
    );
    for (model, color, xy) in [
        ("active", "#c9731e", active),
        ("candidate", "#1f7a6d", Some(candidate)),
    ] {
        let Some(xy) = xy else { continue };
        svg.push_str(&format!(
            "<polyline class=\"{name}-{model}\" fill=\"none\" stroke=\"{color}\" stroke-width=\"2\" points=\"{}\"/>",
            points(xy)
        ));
    }
    svg.push_str("</svg>\n");
    svg
}

#[cfg(test)]
mod tests {
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    use super::*;
    use crate::config::{Config, SegmentConfig};
    use crate::demo::scenario::{invoice, Regime};
    use crate::learn::{run_once, Example, RunPlan};
    use crate::promotion::Trigger;

    fn examples(config: &Config, seed: u64, start: i64, n: usize, regime: Regime) -> Vec<Example> {
        let schema = config.schema();
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        (0..n)
            .map(|i| {
                let inv = invoice(&mut rng, regime);
                Example {
                    id: format!("e{seed}-{i}").into(),
                    event_time: start + i as i64,
                    row: schema.parse_row(&inv.features).unwrap(),
                    label: f64::from(inv.draw_label(&mut rng)),
                    monitoring: Default::default(),
                }
            })
            .collect()
    }

    #[test]
    fn a_judged_run_becomes_one_page_with_every_field_both_curves_and_nothing_from_elsewhere() {
        let mut config = Config::embedded_default();
        config.guardrails.segments = vec![SegmentConfig {
            feature: "debtor_sector".into(),
            bands: vec![],
        }];
        config.guardrails.segment_min_rows = 30;
        let schema = config.schema();
        let plan = |seq: u64, active| {
            RunPlan::from_config(
                &config,
                &schema,
                format!("r-{seq}"),
                Trigger::Manual,
                seq,
                0,
                active,
                0,
            )
        };
        let first = examples(&config, 2, 0, 2400, Regime::Before);
        let active = run_once(&plan(1, None), &first).candidate.unwrap();
        let changed = examples(&config, 3, 10_000, 2400, Regime::After);
        let mut entry = run_once(&plan(2, Some(&active)), &changed).entry;
        entry.seq = 7;
        // A reason is shown as text, never as markup.
        entry.reason = format!("{} <b>as sent</b>", entry.reason);
        let html = page("r-2", std::slice::from_ref(&entry), "2026-12-03T08:00:00Z");

        assert!(html.starts_with("<!doctype html>"));
        assert!(html.contains("<h1>Evidence for run r-2</h1>"));
        assert!(html.contains(&format!(
            "Log entry 7 · manual · {}",
            entry.verdict.as_str()
        )));
        assert!(html.contains("&lt;b&gt;as sent&lt;/b&gt;") && !html.contains("<b>as sent</b>"));
        // Every setting the search tried is a row of the search table, every segment a row of
        // the segment table.
        let search = cell(&serde_json::to_value(&entry.search).unwrap());
        assert!(html.contains(&format!("<th>search</th><td>{search}</td>")));
        assert_eq!(
            search.matches("<tr class=\"row\">").count(),
            entry.search.len(),
            "one row per setting"
        );
        assert!(!entry.segments.is_empty());
        for s in &entry.segments {
            assert!(
                html.contains(&format!("<td>{}</td>", esc(&s.segment))),
                "{}",
                s.segment
            );
        }
        assert!(html.contains(&entry.provenance.as_ref().unwrap().config_sha256));
        // Both models' ROC and calibration curves, drawn in the page.
        assert_eq!(html.matches("<svg").count(), 2);
        let candidate = &entry.curves.as_ref().unwrap().candidate;
        let points = |class: &str| -> Vec<(f64, f64)> {
            let line = &html[html.find(&format!("class=\"{class}\"")).unwrap()..];
            let points = &line[line.find("points=\"").unwrap() + 8..];
            points[..points.find('"').unwrap()]
                .split(' ')
                .map(|xy| {
                    let (x, y) = xy.split_once(',').unwrap();
                    (x.parse().unwrap(), y.parse().unwrap())
                })
                .collect()
        };
        assert_eq!(points("roc-candidate").len(), candidate.roc.len());
        assert!(html.contains("class=\"roc-active\""));
        // One point per calibration bin, at (mean probability, observed rate) in the square
        // (30 px of padding, 240 px a side, y pointing down).
        let drawn = points("calibration-candidate");
        assert_eq!(drawn.len(), candidate.calibration.len());
        for (bin, (x, y)) in candidate.calibration.iter().zip(drawn) {
            assert!(
                (x - (30.0 + bin.mean_probability * 240.0)).abs() <= 0.05,
                "{bin:?}"
            );
            assert!(
                (y - (30.0 + (1.0 - bin.observed_rate) * 240.0)).abs() <= 0.05,
                "{bin:?}"
            );
        }
        assert!(html.contains("class=\"calibration-active\""));
        // Nothing is fetched from anywhere: no script, no link, no remote reference.
        for needle in [
            "<script", "<link", "src=", "http://", "https://", "@import", "url(",
        ] {
            assert!(!html.contains(needle), "{needle}");
        }
        assert!(html.contains("not a legal finding"));
    }
}
