//! Text for a person: the promotion log as a table. The `log` command and the demo print it
//! the same way.

use crate::promotion::Entry;
use crate::time::to_rfc3339;

/// The promotion log as a human-readable table, newest first, each reason on its own line.
pub(crate) fn log_table(entries: &[Entry]) -> String {
    use std::fmt::Write;
    let mut out = String::new();
    let _ = writeln!(
        out,
        "{:>4}  {:<24} {:<7} {:<10} {:<9} {:>7} {:>7} {:>8} {:>6}  {:<20} active after",
        "seq", "time", "run", "trigger", "verdict", "cand", "active", "gain", "margin", "candidate",
    );
    let metric_of = |r: &Option<crate::metrics::Report>, e: &Entry| {
        r.as_ref()
            .and_then(|r| r.get(e.metric))
            .map_or("-".to_owned(), |v| format!("{v:.4}"))
    };
    for e in entries {
        let cand = metric_of(
            if e.candidate_gate.is_some() {
                &e.candidate_gate
            } else {
                &e.candidate_holdout
            },
            e,
        );
        let _ = writeln!(
            out,
            "{:>4}  {:<24} {:<7} {:<10} {:<9} {:>7} {:>7} {:>8} {:>6}  {:<20} {}",
            e.seq,
            to_rfc3339(e.at),
            e.run_id,
            e.trigger.as_str(),
            e.verdict.as_str(),
            cand,
            metric_of(&e.active_gate, e),
            e.gain.map_or("-".into(), |g| format!("{g:+.4}")),
            e.margin,
            e.candidate_id.as_deref().unwrap_or("-"),
            e.active_after.as_deref().unwrap_or("-"),
        );
        let _ = writeln!(
            out,
            "      {} ({}): {}",
            e.verdict.as_str(),
            e.metric.name(),
            e.reason
        );
    }
    if entries.is_empty() {
        out.push_str("(no runs yet)\n");
    }
    out
}
