//! A backtest as text for a terminal: one line per period, then the recovery and the totals.

use std::fmt::Write;

use super::{Backtest, Policy};
use crate::time::to_rfc3339;

fn cell(value: Option<f64>) -> String {
    value.map_or_else(|| "-".to_owned(), |v| format!("{v:.4}"))
}

/// The report as a table: per period each policy's metric, log loss and Brier score, and what
/// changed at the step before it.
pub fn table(report: &Backtest) -> String {
    let mut out = String::new();
    let metric = report.metric;
    let _ = writeln!(
        out,
        "backtest: {} rows, a step every {}, labels known {} after the event; {} steps",
        report.rows,
        report.step,
        humantime::format_duration(std::time::Duration::from_millis(
            report.label_delay_ms.max(0) as u64
        )),
        report.steps
    );
    match &report.first_model {
        Some(first) => {
            let _ = writeln!(
                out,
                "first model {} at step {} ({}), shared by the three policies",
                first.model_id,
                first.period,
                to_rfc3339(first.at)
            );
        }
        None => {
            let _ = writeln!(out, "no model was ever promoted: nothing to score");
            return out;
        }
    }
    let _ = writeln!(
        out,
        "\n{:>6}  {:<20} {:>6}  {:<26} {:<26} {:<26}  events",
        "period",
        "from",
        "rows",
        format!("configured {metric}/ll/brier"),
        format!("never {metric}/ll/brier"),
        format!("always {metric}/ll/brier"),
    );
    for period in &report.periods {
        let triple = |policy: Policy| {
            let s = period.scores.get(policy);
            format!("{} {} {}", cell(s.metric), cell(s.log_loss), cell(s.brier))
        };
        let events: Vec<String> = report
            .runs
            .iter()
            .filter(|r| r.period == period.index && r.policy == Policy::Configured)
            .map(|r| {
                format!(
                    "{} {}{}",
                    r.trigger,
                    r.verdict.as_str(),
                    r.gain.map_or(String::new(), |g| format!(" {g:+.4}"))
                )
            })
            .collect();
        let always = report
            .promotions
            .iter()
            .filter(|p| p.period == period.index && p.policy == Policy::AlwaysPromote)
            .count();
        let mut events = events.join("; ");
        if always > 0 {
            if !events.is_empty() {
                events.push_str("; ");
            }
            events.push_str("always: new model");
        }
        // To the second: "2026-12-01T05:15:16Z".
        let from = to_rfc3339(period.from / 1000 * 1000).replace(".000Z", "Z");
        let _ = writeln!(
            out,
            "{:>6}  {:<20} {:>6}  {:<26} {:<26} {:<26}  {}",
            period.index,
            from,
            period.rows,
            triple(Policy::Configured),
            triple(Policy::NeverRetrained),
            triple(Policy::AlwaysPromote),
            events
        );
    }
    if let Some(recovery) = &report.recovery {
        let _ = writeln!(
            out,
            "\nlargest change: period {} ({}): the never-retrained model's {metric} over the {} rows after it is {:.4} below the {} rows before;\n\
             target {} (the configured policy's level before {}, the best level over the last {} rows {}); rows until a policy's next {} rows are within {} of it:",
            recovery.period,
            to_rfc3339(recovery.at),
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
                "  {:<16} level before {}  {}",
                policy.as_str(),
                cell(r.level_before),
                match r.period {
                    Some(p) if r.recovered => format!("{} rows (back at period {p})", r.rows),
                    _ => format!("not recovered ({} rows to the end)", r.rows),
                }
            );
        }
    }
    let _ = writeln!(
        out,
        "\n{:<16} {:>10} {:>10} {:>10} {:>6} {:>11}",
        "policy",
        format!("mean {metric}"),
        "mean ll",
        "mean brier",
        "runs",
        "promotions"
    );
    for policy in Policy::ALL {
        let t = report.totals.get(policy);
        let _ = writeln!(
            out,
            "{:<16} {:>10} {:>10} {:>10} {:>6} {:>11}",
            policy.as_str(),
            cell(t.mean_metric),
            cell(t.mean_log_loss),
            cell(t.mean_brier),
            t.runs,
            t.promotions
        );
    }
    if !report.not_simulated.is_empty() {
        let _ = writeln!(out, "\nnot simulated: {}", report.not_simulated.join("; "));
    }
    out
}
