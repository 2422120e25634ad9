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
        if let Some(actor) = actor_summary(e) {
            let _ = writeln!(out, "      {actor}");
        }
        if let Some(windows) = window_summary(e) {
            let _ = writeln!(out, "      {windows}");
        }
        if let Some(segments) = segment_summary(e) {
            let _ = writeln!(out, "      {segments}");
        }
    }
    if entries.is_empty() {
        out.push_str("(no runs yet)\n");
    }
    out
}

/// Who asked for the entry through the API and why, in one line: `by KEY: REASON` (`by the
/// open API` without keys). `None` for entries no operator asked for (scheduled runs, the live
/// gate, an expiry).
pub(crate) fn actor_summary(e: &Entry) -> Option<String> {
    let actor = e.actor.as_ref()?;
    let key = actor.key.as_deref().unwrap_or("the open API");
    Some(match &actor.reason {
        Some(reason) => format!("by {key}: {reason}"),
        None => format!("by {key}"),
    })
}

/// A run's window search in one line: each candidate window (share of the rows before the
/// validation slice, rows) with its best validation metric ± SE; the chosen one in brackets.
/// `None` for a run with one window.
pub(crate) fn window_summary(e: &Entry) -> Option<String> {
    if e.windows.is_empty() {
        return None;
    }
    let cells: Vec<String> = e
        .windows
        .iter()
        .map(|w| {
            let value = match (w.mean, w.se, &w.error) {
                (Some(mean), Some(se), _) => format!("{mean:.4} ± {se:.4}"),
                (_, _, Some(error)) => format!("not validated: {error}"),
                _ => "-".to_owned(),
            };
            let cell = format!("{} ({} rows) {value}", w.share, w.rows);
            if w.chosen {
                format!("[{cell}]")
            } else {
                cell
            }
        })
        .collect();
    let validation_rows = e.windows[0].validation_rows;
    Some(format!(
        "windows ({} on the {validation_rows} rows before the holdout): {}",
        e.metric.name(),
        cells.join(" · ")
    ))
}

/// A judged run's segment table in one line: each segment's candidate and active metric and
/// rows; a breach marked `!`, a segment too small to judge in parentheses. `None` without
/// segments.
pub(crate) fn segment_summary(e: &Entry) -> Option<String> {
    if e.segments.is_empty() {
        return None;
    }
    let value = |v: Option<f64>| v.map_or("-".to_owned(), |v| format!("{v:.4}"));
    let cells: Vec<String> = e
        .segments
        .iter()
        .map(|s| {
            let cell = format!(
                "{}={} {}/{} ({} rows)",
                s.feature,
                s.segment,
                value(s.candidate),
                value(s.active),
                s.rows
            );
            match (s.breach, s.judged) {
                (true, _) => format!("!{cell}"),
                (false, true) => cell,
                (false, false) => format!("({cell})"),
            }
        })
        .collect();
    Some(format!(
        "segments ({} candidate/active): {}",
        e.metric.name(),
        cells.join(" · ")
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::metrics::GateMetric;
    use crate::promotion::{Actor, Trigger, Verdict};

    fn entry(actor: Option<Actor>) -> Entry {
        let mut entry = Entry::bare(
            "r-3",
            Trigger::Freeze,
            0,
            (GateMetric::Auc, 0.02),
            None,
            Verdict::Kept,
            "ops froze promotions".into(),
        );
        entry.actor = actor;
        entry
    }

    #[test]
    fn the_log_names_the_acting_key_and_its_reason_and_says_when_the_api_was_open() {
        let keyed = entry(Some(Actor {
            key: Some("ops".into()),
            reason: Some("audit week".into()),
        }));
        assert!(log_table(&[keyed]).contains("\n      by ops: audit week\n"));
        let open = entry(Some(Actor::default()));
        assert!(log_table(&[open]).contains("\n      by the open API\n"));
        let scheduled = entry(None);
        assert!(!log_table(&[scheduled]).contains("      by "));
    }
}
