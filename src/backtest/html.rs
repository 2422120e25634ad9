//! A backtest as one self-contained HTML page: the metric over time for the three policies as
//! an inline SVG chart with the promotions marked, then the totals, the recovery, the
//! promotions and every period. No script and no external style or font, so the file can be
//! mailed or archived with a decision.

use std::fmt::Write;

use super::{Backtest, Policy};
use crate::text::escape_markup as escape;
use crate::time::to_rfc3339;

const WIDTH: f64 = 960.0;
const HEIGHT: f64 = 380.0;
const LEFT: f64 = 64.0;
const RIGHT: f64 = 24.0;
const TOP: f64 = 28.0;
const BOTTOM: f64 = 48.0;

fn colour(policy: Policy) -> &'static str {
    match policy {
        Policy::Configured => "#1f6fb2",
        Policy::NeverRetrained => "#8a8a8a",
        Policy::AlwaysPromote => "#d9822b",
    }
}

fn label(policy: Policy) -> &'static str {
    match policy {
        Policy::Configured => "configured policy",
        Policy::NeverRetrained => "never retrained",
        Policy::AlwaysPromote => "always promote the latest fit",
    }
}

fn cell(value: Option<f64>) -> String {
    value.map_or_else(|| "–".to_owned(), |v| format!("{v:.4}"))
}

/// The chart: each policy's metric per period, the configured policy's promotions as
/// triangles (filled: holdout gate, open: live gate) and the always-promote policy's new
/// models as small ticks.
fn chart(report: &Backtest) -> String {
    let mut svg = String::new();
    let periods = &report.periods;
    let values: Vec<f64> = periods
        .iter()
        .flat_map(|p| Policy::ALL.map(|policy| p.scores.get(policy).metric))
        .flatten()
        .collect();
    let (Some(first), Some(last)) = (periods.first(), periods.last()) else {
        return "<p>No period was scored.</p>".to_owned();
    };
    let (mut low, mut high) = values
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), &v| {
            (l.min(v), h.max(v))
        });
    if !low.is_finite() {
        (low, high) = (0.0, 1.0);
    }
    let pad = ((high - low) * 0.08).max(0.005);
    (low, high) = (low - pad, high + pad);
    let span = (last.index - first.index).max(1) as f64;
    let x = |index: usize| LEFT + (index - first.index) as f64 / span * (WIDTH - LEFT - RIGHT);
    let y = |v: f64| TOP + (high - v) / (high - low) * (HEIGHT - TOP - BOTTOM);
    let _ = write!(
        svg,
        r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {WIDTH} {HEIGHT}" width="{WIDTH}" height="{HEIGHT}" role="img" aria-label="{} per period for the three policies">"#,
        report.metric
    );
    let _ = write!(
        svg,
        r##"<rect x="{LEFT}" y="{TOP}" width="{}" height="{}" fill="#fafafa" stroke="#ccc"/>"##,
        WIDTH - LEFT - RIGHT,
        HEIGHT - TOP - BOTTOM
    );
    for i in 0..=4 {
        let v = low + (high - low) * i as f64 / 4.0;
        let _ = write!(
            svg,
            r##"<line x1="{LEFT}" x2="{}" y1="{y:.1}" y2="{y:.1}" stroke="#e4e4e4"/><text x="{}" y="{:.1}" text-anchor="end" font-size="11">{v:.3}</text>"##,
            WIDTH - RIGHT,
            LEFT - 6.0,
            y(v) + 4.0,
            y = y(v)
        );
    }
    // Six labels fit the width without meeting (the end ones anchored inward).
    let ticks = periods.len().min(6);
    for i in 0..ticks {
        let at = if ticks == 1 {
            0
        } else {
            i * (periods.len() - 1) / (ticks - 1)
        };
        let p = &periods[at];
        let date = to_rfc3339(p.from);
        let anchor = match at {
            0 => "start",
            a if a + 1 == periods.len() => "end",
            _ => "middle",
        };
        let _ = write!(
            svg,
            r#"<text x="{:.1}" y="{}" text-anchor="{anchor}" font-size="11">{} · {}</text>"#,
            x(p.index),
            HEIGHT - BOTTOM + 16.0,
            p.index,
            escape(&date[..date.len().min(10)])
        );
    }
    let _ = write!(
        svg,
        r#"<text x="{}" y="{}" text-anchor="middle" font-size="12">period · start date</text><text x="14" y="{}" font-size="12" transform="rotate(-90 14 {})" text-anchor="middle">{}</text>"#,
        (LEFT + WIDTH - RIGHT) / 2.0,
        HEIGHT - 8.0,
        HEIGHT / 2.0,
        HEIGHT / 2.0,
        escape(report.metric)
    );
    if let Some(change) = &report.recovery {
        let cx = x(change.period);
        let _ = write!(
            svg,
            r##"<line x1="{cx:.1}" x2="{cx:.1}" y1="{TOP}" y2="{}" stroke="#c0392b" stroke-width="1.5"/><text x="{:.1}" y="{}" font-size="11" fill="#c0392b">largest change</text>"##,
            HEIGHT - BOTTOM,
            cx + 4.0,
            HEIGHT - BOTTOM - 10.0
        );
    }
    for promotion in report
        .promotions
        .iter()
        .filter(|p| p.policy == Policy::Configured)
    {
        let px = x(promotion.period);
        let fill = if promotion.gate == "live" {
            "none"
        } else {
            colour(Policy::Configured)
        };
        let _ = write!(
            svg,
            r##"<line x1="{px:.1}" x2="{px:.1}" y1="{TOP}" y2="{}" stroke="{}" stroke-dasharray="3 3" stroke-opacity="0.5"/><path d="M{:.1} {} l6 -10 l-12 0 z" fill="{fill}" stroke="{}"><title>promoted {} at period {} ({} gate{})</title></path>"##,
            HEIGHT - BOTTOM,
            colour(Policy::Configured),
            px,
            TOP + 12.0,
            colour(Policy::Configured),
            escape(&promotion.model_id),
            promotion.period,
            promotion.gate,
            promotion
                .gain
                .map_or(String::new(), |g| format!(", gain {g:+.4}"))
        );
    }
    for promotion in report
        .promotions
        .iter()
        .filter(|p| p.policy == Policy::AlwaysPromote)
    {
        let px = x(promotion.period);
        let _ = write!(
            svg,
            r#"<line x1="{px:.1}" x2="{px:.1}" y1="{}" y2="{}" stroke="{}"><title>always-promote: {} from period {}</title></line>"#,
            HEIGHT - BOTTOM,
            HEIGHT - BOTTOM - 6.0,
            colour(Policy::AlwaysPromote),
            escape(&promotion.model_id),
            promotion.period
        );
    }
    for policy in [
        Policy::NeverRetrained,
        Policy::AlwaysPromote,
        Policy::Configured,
    ] {
        // A gap where a period has no metric (no rows, or one class).
        let mut segments: Vec<Vec<(f64, f64)>> = vec![vec![]];
        for p in periods {
            match p.scores.get(policy).metric {
                Some(v) => segments
                    .last_mut()
                    .expect("never empty")
                    .push((x(p.index), y(v))),
                None => segments.push(vec![]),
            }
        }
        for segment in segments.iter().filter(|s| !s.is_empty()) {
            let points: Vec<String> = segment
                .iter()
                .map(|(px, py)| format!("{px:.1},{py:.1}"))
                .collect();
            let width = if policy == Policy::Configured {
                2.2
            } else {
                1.5
            };
            let _ = write!(
                svg,
                r#"<polyline fill="none" stroke="{}" stroke-width="{width}" points="{}"/>"#,
                colour(policy),
                points.join(" ")
            );
            if segment.len() == 1 {
                let (px, py) = segment[0];
                let _ = write!(
                    svg,
                    r#"<circle cx="{px:.1}" cy="{py:.1}" r="2" fill="{}"/>"#,
                    colour(policy)
                );
            }
        }
    }
    let _ = write!(svg, "</svg>");
    svg
}

/// The report as a self-contained HTML document.
pub fn html(report: &Backtest) -> String {
    let mut out = String::new();
    let metric = escape(report.metric);
    let _ = write!(
        out,
        r#"<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>understudy backtest</title>
<style>
body {{ font-family: system-ui, sans-serif; margin: 2em; color: #222; max-width: 1100px; }}
table {{ border-collapse: collapse; margin: 0.5em 0 1.5em; font-size: 13px; }}
th, td {{ border-bottom: 1px solid #ddd; padding: 3px 8px; text-align: right; }}
th:first-child, td:first-child {{ text-align: left; }}
.legend span {{ display: inline-block; margin-right: 1.5em; }}
.swatch {{ display: inline-block; width: 18px; height: 3px; vertical-align: middle; margin-right: 6px; }}
.note {{ color: #555; font-size: 13px; }}
</style></head><body>
<h1>Backtest</h1>
<p>{} rows, a step every {}, labels known {} after the event; {} steps, {} periods scored.
Each period is scored by the model each policy had active at its start.</p>
"#,
        report.rows,
        escape(&report.step),
        escape(
            &humantime::format_duration(std::time::Duration::from_millis(
                report.label_delay_ms.max(0) as u64
            ))
            .to_string()
        ),
        report.steps,
        report.periods.len()
    );
    let _ = write!(out, r#"<p class="legend">"#);
    for policy in Policy::ALL {
        let _ = write!(
            out,
            r#"<span><span class="swatch" style="background:{}"></span>{}</span>"#,
            colour(policy),
            label(policy)
        );
    }
    let _ = writeln!(
        out,
        "<span>▼ promotion of the configured policy (open: live gate); ticks at the bottom: \
         always-promote's new models; red: the largest change</span></p>"
    );
    out.push_str(&chart(report));

    let _ = writeln!(
        out,
        "<h2>Totals</h2><table><tr><th>policy</th><th>mean {metric}</th><th>mean log loss</th><th>mean Brier</th><th>runs</th><th>promotions</th></tr>"
    );
    for policy in Policy::ALL {
        let t = report.totals.get(policy);
        let _ = writeln!(
            out,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            label(policy),
            cell(t.mean_metric),
            cell(t.mean_log_loss),
            cell(t.mean_brier),
            t.runs,
            t.promotions
        );
    }
    out.push_str("</table>\n");

    if let Some(recovery) = &report.recovery {
        let _ = writeln!(
            out,
            "<h2>Recovery from the largest change</h2><p>The world changed most at period {} ({}): the never-retrained model's {metric} over the {} rows after it is {:.4} below the {} rows before. The target is {} (the better of the configured policy's level before, {}, and the best level over the last {} rows, {}). Rows from the change until the next {} rows a policy answers are within {} of the target:</p><table><tr><th>policy</th><th>level before</th><th>rows to recovery</th><th>back at period</th></tr>",
            recovery.period,
            escape(&to_rfc3339(recovery.at)),
            recovery.rows_compared,
            recovery.worsening,
            recovery.rows_compared,
            cell(Some(recovery.target)),
            cell(recovery.level_before),
            recovery.rows_compared,
            cell(recovery.settled_level),
            recovery.rows_compared,
            recovery.tolerance
        );
        for policy in Policy::ALL {
            let r = recovery.policies.get(policy);
            let _ = writeln!(
                out,
                "<tr><td>{}</td><td>{}</td><td>{}{}</td><td>{}</td></tr>",
                label(policy),
                cell(r.level_before),
                r.rows,
                if r.recovered { "" } else { " (not recovered)" },
                r.period.map_or("–".to_owned(), |p| p.to_string())
            );
        }
        out.push_str("</table>\n");
    }

    out.push_str("<h2>Promotions</h2><table><tr><th>policy</th><th>period</th><th>time</th><th>model</th><th>gate</th><th>gain</th><th>p</th></tr>\n");
    for p in report.first_model.iter().chain(&report.promotions) {
        let _ = writeln!(
            out,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            if p.gate == "first" {
                "all (first model)"
            } else {
                label(p.policy)
            },
            p.period,
            escape(&to_rfc3339(p.at)),
            escape(&p.model_id),
            p.gate,
            p.gain.map_or("–".to_owned(), |g| format!("{g:+.4}")),
            p.p_value.map_or("–".to_owned(), |v| format!("{v:.2e}"))
        );
    }
    out.push_str("</table>\n");

    let _ = writeln!(
        out,
        "<details><summary>Every period ({metric} / log loss / Brier)</summary><table><tr><th>period</th><th>from</th><th>rows</th><th>configured</th><th>never retrained</th><th>always promote</th></tr>"
    );
    for period in &report.periods {
        let triple = |policy: Policy| {
            let s = period.scores.get(policy);
            format!(
                "{} / {} / {}",
                cell(s.metric),
                cell(s.log_loss),
                cell(s.brier)
            )
        };
        let _ = writeln!(
            out,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            period.index,
            escape(&to_rfc3339(period.from)),
            period.rows,
            triple(Policy::Configured),
            triple(Policy::NeverRetrained),
            triple(Policy::AlwaysPromote)
        );
    }
    out.push_str("</table></details>\n");
    if !report.not_simulated.is_empty() {
        let _ = writeln!(
            out,
            r#"<p class="note">Not simulated: {}.</p>"#,
            escape(&report.not_simulated.join("; "))
        );
    }
    out.push_str(
        r#"<p class="note">A backtest replays history; it does not show how a policy will behave on a future that differs from it. Decisions about people (credit, insurance, employment) remain subject to model-risk governance, human review and local law.</p>
</body></html>
"#,
    );
    out
}
