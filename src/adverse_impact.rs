//! The adverse-impact check: does a model's decision favour one group of people over another
//! by more than a set bound?
//!
//! A team that scores people is often required to watch a group attribute it must never score
//! on (an age band, say). Examples may carry such *monitoring attributes*: stored, never
//! features. With `guardrails.adverse_impact`, a run turns each model's scores on the gate's
//! rows into decisions (a score on the favourable side of a threshold, or of the cut that gives
//! a set approval rate), computes every group's favourable rate, and divides it by the most
//! favoured group's rate: the adverse-impact ratio. A ratio below `min_ratio` (0.8 by default,
//! the four-fifths rule of the US Uniform Guidelines on Employee Selection Procedures,
//! 29 CFR 1607.4(D)) flags the group. Beside each ratio goes a two-sided test of the group's
//! rate against the reference group's: the pooled two-proportion z-test, or Fisher's exact test
//! when an expected cell count is below 5 (Cochran's rule of thumb; common practice, no source
//! here).
//!
//! This is a screening statistic, not a legal finding: the rules differ by country and by
//! domain, and counsel and local law decide. Pure: no I/O. Checked against scipy on two
//! datasets that ship with statsmodels (`tests/reference/adverse_impact_reference.py`).

use std::collections::BTreeMap;

use crate::config::{AdverseImpactConfig, Favourable};
use crate::metrics::normal_sf;
use crate::promotion::{AdverseImpact, GroupImpact, ModelImpact};

/// How scores become decisions.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Cut {
    /// `below`: favourable when the score is under it; `above`: when it is at least it.
    Threshold(f64),
    /// The share of all rows to favour: the cut is each model's own score at that rank
    /// (`below`: the ⌈r·n⌉-th smallest, favourable at or under it; `above`: the ⌈r·n⌉-th
    /// largest, favourable at or over it; ties at the cut are all favoured).
    ApprovalRate(f64),
}

/// The rules of one assessment.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Rules {
    pub favourable: Favourable,
    pub cut: Cut,
    /// Groups with fewer rows are shown and tested, never the reference and never flagged.
    pub min_group_rows: usize,
    /// A ratio below this flags its group.
    pub min_ratio: f64,
}

impl Rules {
    pub fn from_config(config: &AdverseImpactConfig) -> Rules {
        Rules {
            favourable: config.favourable,
            cut: match (config.threshold, config.approval_rate) {
                (_, Some(rate)) => Cut::ApprovalRate(rate),
                (threshold, None) => Cut::Threshold(threshold.unwrap_or(f64::NAN)),
            },
            min_group_rows: config.min_group_rows,
            min_ratio: config.min_ratio,
        }
    }

    /// The decision in words, for the log.
    fn describe(&self) -> String {
        let side = self.favourable.as_str();
        match self.cut {
            Cut::Threshold(t) => format!("favourable {side} a score of {t}"),
            Cut::ApprovalRate(r) => format!(
                "the {r} of rows scored most favourably ({side}) are favoured, each model at its own cut"
            ),
        }
    }
}

/// The check of a judged run: the candidate's decisions by group, and the active model's on
/// the same rows when there is one. `groups[i]` is gate row `i`'s value of the attribute.
pub fn evidence(
    config: &AdverseImpactConfig,
    groups: &[Option<&str>],
    candidate: &[f64],
    active: Option<&[f64]>,
) -> AdverseImpact {
    let rules = Rules::from_config(config);
    let candidate = assess(groups, candidate, &rules);
    let flagged = candidate
        .groups
        .iter()
        .filter(|g| g.flagged)
        .map(|g| g.group.clone())
        .collect();
    AdverseImpact {
        attribute: config.attribute.clone(),
        decision: rules.describe(),
        min_ratio: config.min_ratio,
        min_group_rows: config.min_group_rows,
        rows_without_group: groups.iter().filter(|g| g.is_none()).count(),
        active: active.map(|scores| assess(groups, scores, &rules)),
        candidate,
        flagged,
        on_flag: config.on_flag,
    }
}

/// Why a flagged check stops a promotion, naming the lowest ratio; `None` without a flag.
pub fn flag_reason(impact: &AdverseImpact) -> Option<String> {
    let worst = impact
        .candidate
        .groups
        .iter()
        .filter(|g| g.flagged)
        .min_by(|a, b| a.ratio.unwrap_or(0.0).total_cmp(&b.ratio.unwrap_or(0.0)))?;
    let active = impact.active.as_ref().and_then(|a| {
        a.groups
            .iter()
            .find(|g| g.group == worst.group)
            .and_then(|g| g.ratio)
    });
    Some(format!(
        "adverse-impact screen: under the candidate, `{} = {}` ({} rows) is favoured at {:.3} of the rate of `{}`, below guardrails.adverse_impact.min_ratio {}{}{}; {} group(s) flagged. A screening statistic, not a legal finding",
        impact.attribute,
        worst.group,
        worst.rows,
        worst.ratio.unwrap_or(f64::NAN),
        impact.candidate.reference.as_deref().unwrap_or("-"),
        impact.min_ratio,
        match (&worst.test, worst.p_value) {
            (Some(test), Some(p)) => format!(" ({test} test p = {p:.2e})"),
            _ => String::new(),
        },
        match active {
            Some(r) => format!(", against {r:.3} under the active model"),
            None => String::new(),
        },
        impact.flagged.len(),
    ))
}

/// One model's decisions on the rows, by group. `groups[i]` is row `i`'s group (`None`: not
/// recorded; such rows count towards an approval rate's cut but belong to no group). Groups
/// are listed in name order.
pub fn assess(groups: &[Option<&str>], scores: &[f64], rules: &Rules) -> ModelImpact {
    let threshold = cut_of(scores, rules.favourable, rules.cut);
    let cut = threshold.unwrap_or(f64::NAN);
    let inclusive = matches!(rules.cut, Cut::ApprovalRate(_));
    let favoured = |s: f64| match (rules.favourable, inclusive) {
        (Favourable::Below, false) => s < cut,
        (Favourable::Below, true) => s <= cut,
        (Favourable::Above, _) => s >= cut,
    };
    let mut counts: BTreeMap<&str, (usize, usize)> = BTreeMap::new();
    for (group, &score) in groups.iter().zip(scores) {
        if let Some(group) = group {
            let entry = counts.entry(group).or_default();
            entry.0 += 1;
            entry.1 += usize::from(favoured(score));
        }
    }
    let rate = |(rows, favourable): (usize, usize)| favourable as f64 / rows as f64;
    // The reference: the eligible group with the highest rate, the first by name on a tie.
    let mut reference: Option<(&str, (usize, usize))> = None;
    for (&group, &count) in &counts {
        if count.0 >= rules.min_group_rows
            && reference.is_none_or(|(_, best)| rate(count) > rate(best))
        {
            reference = Some((group, count));
        }
    }
    let reference = reference.filter(|&(_, count)| count.1 > 0);
    let groups = counts
        .iter()
        .map(|(&group, &count)| {
            let mut impact = GroupImpact {
                group: group.to_owned(),
                rows: count.0,
                favourable: count.1,
                rate: rate(count),
                ratio: None,
                test: None,
                z: None,
                p_value: None,
                flagged: false,
            };
            if let Some((name, best)) = reference {
                let ratio = rate(count) / rate(best);
                impact.ratio = Some(ratio);
                if name != group {
                    let (test, z, p) = compare(count, best);
                    impact.test = Some(test.to_owned());
                    impact.z = z;
                    impact.p_value = Some(p);
                }
                impact.flagged = count.0 >= rules.min_group_rows && ratio < rules.min_ratio;
            }
            impact
        })
        .collect();
    ModelImpact {
        threshold,
        reference: reference.map(|(name, _)| name.to_owned()),
        groups,
    }
}

/// The score at which decisions are cut.
fn cut_of(scores: &[f64], favourable: Favourable, cut: Cut) -> Option<f64> {
    Some(match cut {
        Cut::Threshold(t) => t,
        Cut::ApprovalRate(r) => {
            if scores.is_empty() {
                return None;
            }
            let n = scores.len();
            let k = ((r * n as f64).ceil() as usize).clamp(1, n);
            let mut sorted = scores.to_vec();
            match favourable {
                Favourable::Below => *sorted.select_nth_unstable_by(k - 1, f64::total_cmp).1,
                Favourable::Above => {
                    *sorted
                        .select_nth_unstable_by(k - 1, |a, b| b.total_cmp(a))
                        .1
                }
            }
        }
    })
}

/// A two-sided test of two groups' favourable rates, each given as `(rows, favourable)`:
/// Fisher's exact test when the smallest expected count of the 2×2 table is below 5, else the
/// pooled two-proportion z-test. Returns the test's name, z (for the z-test) and the p-value.
fn compare(group: (usize, usize), reference: (usize, usize)) -> (&'static str, Option<f64>, f64) {
    let table = [
        [group.1, group.0 - group.1],
        [reference.1, reference.0 - reference.1],
    ];
    let total = (group.0 + reference.0) as f64;
    let columns = [table[0][0] + table[1][0], table[0][1] + table[1][1]];
    let smallest_expected = [group.0, reference.0]
        .iter()
        .flat_map(|&row| {
            columns
                .iter()
                .map(move |&col| row as f64 * col as f64 / total)
        })
        .fold(f64::INFINITY, f64::min);
    if smallest_expected < 5.0 {
        return ("fisher", None, fisher_exact(table));
    }
    let (n1, n2) = (group.0 as f64, reference.0 as f64);
    let pooled = columns[0] as f64 / total;
    let z = (group.1 as f64 / n1 - reference.1 as f64 / n2)
        / (pooled * (1.0 - pooled) * (1.0 / n1 + 1.0 / n2)).sqrt();
    ("z", Some(z), (2.0 * normal_sf(z.abs())).min(1.0))
}

/// Two-sided p-value of Fisher's exact test on a 2×2 table: the probability, under the
/// hypergeometric law with the table's margins, of every table no more probable than the one
/// seen (Fisher 1935; as scipy.stats.fisher_exact computes it). Probabilities within a relative
/// 1e-7 of the observed one count as equal, as R's `fisher.test` does, so rounding in the
/// log-factorials cannot drop a table of the same probability.
fn fisher_exact(table: [[usize; 2]; 2]) -> f64 {
    let row1 = table[0][0] + table[0][1];
    let row2 = table[1][0] + table[1][1];
    let col1 = table[0][0] + table[1][0];
    let n = row1 + row2;
    let mut ln_fact = Vec::with_capacity(n + 1);
    let mut acc = 0.0;
    ln_fact.push(0.0);
    for i in 1..=n {
        acc += (i as f64).ln();
        ln_fact.push(acc);
    }
    let ln_choose = |a: usize, b: usize| ln_fact[a] - ln_fact[b] - ln_fact[a - b];
    // P(X = x): x of the first column's col1 in row 1.
    let ln_total = ln_choose(n, col1);
    let pmf = |x: usize| (ln_choose(row1, x) + ln_choose(row2, col1 - x) - ln_total).exp();
    let low = col1.saturating_sub(row2);
    let high = col1.min(row1);
    let observed = pmf(table[0][0]);
    let p: f64 = (low..=high)
        .map(pmf)
        .filter(|&p| p <= observed * (1.0 + 1e-7))
        .sum();
    p.min(1.0)
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde::Deserialize;

    #[derive(Deserialize)]
    struct Fixture {
        cases: Vec<Case>,
    }

    #[derive(Deserialize)]
    struct Case {
        name: String,
        groups: Vec<Option<String>>,
        candidate: Vec<f64>,
        active: Vec<f64>,
        favourable: Favourable,
        threshold: Option<f64>,
        approval_rate: Option<f64>,
        min_group_rows: usize,
        min_ratio: f64,
        expected: Expected,
    }

    #[derive(Deserialize)]
    struct Expected {
        candidate: ModelImpact,
        active: ModelImpact,
    }

    fn close(a: Option<f64>, b: Option<f64>, tolerance: f64) -> bool {
        match (a, b) {
            (None, None) => true,
            (Some(a), Some(b)) => {
                (a - b).abs() <= tolerance * b.abs().max(1e-300) || (a - b).abs() < 1e-15
            }
            _ => false,
        }
    }

    /// Four cases on two public datasets that ship with statsmodels 0.15.0 (Greene's credit-card
    /// data `ccard`, groups by home ownership; the 1996 American National Election Study
    /// `anes96`, groups by education), expected values from numpy and scipy 1.17.1
    /// (`scipy.stats.fisher_exact`, `scipy.stats.norm.sf`), the z-tests also checked there
    /// against `statsmodels.stats.proportion.proportions_ztest`. Produced by
    /// tests/reference/adverse_impact_reference.py. p-values to a relative 1e-6 (our normal
    /// tail is Numerical Recipes' erfc, fractional error below 1.2e-7); counts, references,
    /// tests and flags exactly.
    #[test]
    fn rates_ratios_and_tests_match_scipy_on_two_public_datasets() {
        let fixture: Fixture = serde_json::from_str(include_str!(
            "../tests/fixtures/adverse_impact_reference.json"
        ))
        .unwrap();
        assert_eq!(fixture.cases.len(), 4);
        let (mut fisher, mut z) = (0, 0);
        for case in &fixture.cases {
            let groups: Vec<Option<&str>> = case.groups.iter().map(|g| g.as_deref()).collect();
            let rules = Rules {
                favourable: case.favourable,
                cut: match (case.threshold, case.approval_rate) {
                    (Some(t), None) => Cut::Threshold(t),
                    (None, Some(r)) => Cut::ApprovalRate(r),
                    other => panic!("{}: {other:?}", case.name),
                },
                min_group_rows: case.min_group_rows,
                min_ratio: case.min_ratio,
            };
            for (scores, expected, model) in [
                (&case.candidate, &case.expected.candidate, "candidate"),
                (&case.active, &case.expected.active, "active"),
            ] {
                let got = assess(&groups, scores, &rules);
                let at = format!("{} ({model})", case.name);
                assert_eq!(got.threshold, expected.threshold, "{at}");
                assert_eq!(got.reference, expected.reference, "{at}");
                assert_eq!(got.groups.len(), expected.groups.len(), "{at}");
                for (g, e) in got.groups.iter().zip(&expected.groups) {
                    let at = format!("{at}, group {}", e.group);
                    assert_eq!(
                        (&g.group, g.rows, g.favourable, &g.test, g.flagged),
                        (&e.group, e.rows, e.favourable, &e.test, e.flagged),
                        "{at}"
                    );
                    assert!((g.rate - e.rate).abs() < 1e-15, "{at}");
                    assert!(
                        close(g.ratio, e.ratio, 1e-12),
                        "{at}: {:?} {:?}",
                        g.ratio,
                        e.ratio
                    );
                    assert!(close(g.z, e.z, 1e-12), "{at}: {:?} {:?}", g.z, e.z);
                    assert!(
                        close(g.p_value, e.p_value, 1e-6),
                        "{at}: {:?} {:?}",
                        g.p_value,
                        e.p_value
                    );
                    match g.test.as_deref() {
                        Some("fisher") => fisher += 1,
                        Some("z") => z += 1,
                        _ => {}
                    }
                }
            }
        }
        // Both tests are exercised.
        assert_eq!((fisher, z), (4, 24));
    }

    #[test]
    fn fisher_exact_matches_the_tea_tasting_table() {
        // Fisher (1935), the lady tasting tea: [[3, 1], [1, 3]], two-sided p = 34/70
        // (scipy.stats.fisher_exact gives 0.48571428571428527).
        assert!((fisher_exact([[3, 1], [1, 3]]) - 34.0 / 70.0).abs() < 1e-12);
        // A table with an empty column: every table has the margins' only arrangement.
        assert_eq!(fisher_exact([[0, 5], [0, 7]]), 1.0);
    }

    #[test]
    fn no_eligible_group_or_no_favoured_reference_leaves_ratios_unset() {
        let groups = [Some("a"), Some("a"), Some("b")];
        let rules = Rules {
            favourable: Favourable::Above,
            cut: Cut::Threshold(0.5),
            min_group_rows: 5,
            min_ratio: 0.8,
        };
        let impact = assess(&groups, &[0.9, 0.1, 0.2], &rules);
        assert_eq!(impact.reference, None);
        assert!(impact
            .groups
            .iter()
            .all(|g| g.ratio.is_none() && !g.flagged));
        let rules = Rules {
            min_group_rows: 1,
            ..rules
        };
        let impact = assess(&groups, &[0.1, 0.1, 0.2], &rules);
        assert_eq!(impact.reference, None, "no group is favoured at all");
    }
}
