"""Reference values for the adverse-impact (selection-rate ratio) check.

For each case and each model (candidate, active) this computes, per group: rows, favourable
count, favourable rate, the ratio of that rate to the reference group's rate, a two-sided test
of "group vs reference group" and whether the group is flagged (eligible and ratio < min_ratio).

Rules, written out below with plain Python / numpy:

- Decision threshold: either fixed (favourable "below": score < t; "above": score >= t) or
  from an approval rate r: n = all rows (rows with a null group included), k = ceil(r * n)
  clamped to [1, n]; "below": t = k-th smallest score, favourable iff score <= t; "above":
  t = k-th largest score, favourable iff score >= t.
- Rows with a null group belong to no group. Groups are sorted by label (Python str sort).
- Eligible groups have rows >= min_group_rows. Reference = eligible group with the highest
  rate, ties to the first in name order. No eligible group or a reference rate of 0 makes
  reference, every ratio, test, z and p_value null.
- Reference group: ratio 1.0, no test. Other groups: 2x2 table
  [[fav_g, rows_g - fav_g], [fav_ref, rows_ref - fav_ref]]; if a column total is 0 or the
  smallest expected count (row total * column total / grand total) is < 5, the test is
  "fisher" (scipy.stats.fisher_exact, two-sided); otherwise "z", the pooled two-proportion
  z-test with p = 2 * scipy.stats.norm.sf(|z|). As an independent cross-check the z-test
  p-values are compared with statsmodels.stats.proportion.proportions_ztest (pooled).

Data (public datasets bundled inside the statsmodels package, no download):

1-2. statsmodels.datasets.ccard (Greene's credit-card expenditure data, 72 rows): group =
     OWNRENT (1 -> "owner", 0 -> "renter"), candidate = INCOME / max(INCOME),
     active = AGE / max(AGE), favourable "above"; case 1 fixed threshold 0.45, case 2
     approval rate 0.5; min_group_rows 10.
3-4. statsmodels.datasets.anes96 (944 rows): group = "educ-<educ>", candidate = income / 24,
     active = 1 - age / 100, favourable "below", min_group_rows 30; case 3 approval rate 0.6,
     case 4 fixed threshold 0.5 with the group set to null for every row whose (0-based)
     position is divisible by 10.
Column names used are those of statsmodels 0.15.0 (no adaptation was needed).

Library versions: numpy==2.4.6, scipy==1.17.1, statsmodels==0.15.0
(tests/reference/adverse_impact_requirements.txt).

Run (from the repository root):
  python3 -m venv target/adverse-impact-venv
  target/adverse-impact-venv/bin/pip install -r tests/reference/adverse_impact_requirements.txt
  OPENBLAS_NUM_THREADS=1 target/adverse-impact-venv/bin/python tests/reference/adverse_impact_reference.py
Writes tests/fixtures/adverse_impact_reference.json.
"""
import json
import math
import pathlib

import numpy as np
import scipy
import statsmodels
import statsmodels.api as sm
from scipy.stats import fisher_exact, norm
from statsmodels.stats.proportion import proportions_ztest

MIN_RATIO = 0.8


def decide(scores, favourable, threshold, approval_rate):
    """Return (t, list of bools: favourable per row)."""
    scores = [float(s) for s in scores]
    if threshold is not None:
        t = float(threshold)
        if favourable == "below":
            return t, [s < t for s in scores]
        return t, [s >= t for s in scores]
    n = len(scores)
    k = min(max(math.ceil(approval_rate * n), 1), n)
    if favourable == "below":
        t = sorted(scores)[k - 1]
        return t, [s <= t for s in scores]
    t = sorted(scores, reverse=True)[k - 1]
    return t, [s >= t for s in scores]


def two_by_two(fav_g, rows_g, fav_r, rows_r):
    """Return (test, z, p_value) for group vs reference."""
    table = [[fav_g, rows_g - fav_g], [fav_r, rows_r - fav_r]]
    row_tot = [rows_g, rows_r]
    col_tot = [fav_g + fav_r, (rows_g - fav_g) + (rows_r - fav_r)]
    grand = rows_g + rows_r
    min_expected = min(rt * ct / grand for rt in row_tot for ct in col_tot)
    if min(col_tot) == 0 or min_expected < 5:
        p = float(fisher_exact(table, alternative="two-sided").pvalue)
        assert 0.0 <= p <= 1.0, p
        return "fisher", None, p
    rate_g, rate_r = fav_g / rows_g, fav_r / rows_r
    pooled = (fav_g + fav_r) / (rows_g + rows_r)
    z = (rate_g - rate_r) / math.sqrt(pooled * (1 - pooled) * (1 / rows_g + 1 / rows_r))
    p = float(2 * norm.sf(abs(z)))
    # Independent cross-check (statsmodels pools the proportion under H0 by default).
    z_sm, p_sm = proportions_ztest([fav_g, fav_r], [rows_g, rows_r], value=0,
                                   alternative="two-sided", prop_var=False)
    assert abs(p - float(p_sm)) <= 1e-12, (p, p_sm)
    assert abs(z - float(z_sm)) <= 1e-12, (z, z_sm)
    return "z", float(z), p


def evaluate(groups, scores, favourable, threshold, approval_rate, min_group_rows):
    t, fav = decide(scores, favourable, threshold, approval_rate)
    names = sorted({g for g in groups if g is not None})
    stats = []
    for name in names:
        rows = sum(1 for g in groups if g == name)
        nfav = sum(1 for g, f in zip(groups, fav) if g == name and f)
        stats.append({"group": name, "rows": rows, "favourable": nfav, "rate": nfav / rows})
    eligible = [s for s in stats if s["rows"] >= min_group_rows]
    ref = None
    for s in eligible:  # name order; strict > keeps the first on ties
        if ref is None or s["rate"] > ref["rate"]:
            ref = s
    if ref is not None and ref["rate"] == 0:
        ref = None
    out = []
    for s in stats:
        row = dict(s, ratio=None, test=None, z=None, p_value=None)
        if ref is not None:
            if s is ref:
                row["ratio"] = 1.0
            else:
                row["ratio"] = s["rate"] / ref["rate"]
                row["test"], row["z"], row["p_value"] = two_by_two(
                    s["favourable"], s["rows"], ref["favourable"], ref["rows"])
        row["flagged"] = bool(s["rows"] >= min_group_rows and row["ratio"] is not None
                              and row["ratio"] < MIN_RATIO)
        out.append(row)
    return {"threshold": t, "reference": None if ref is None else ref["group"], "groups": out}


def make_case(name, groups, candidate, active, favourable, threshold, approval_rate, min_group_rows):
    candidate = [float(x) for x in candidate]
    active = [float(x) for x in active]
    expected = {
        model: evaluate(groups, scores, favourable, threshold, approval_rate, min_group_rows)
        for model, scores in (("candidate", candidate), ("active", active))
    }
    return {
        "name": name,
        "groups": groups,
        "candidate": candidate,
        "active": active,
        "favourable": favourable,
        "threshold": threshold,
        "approval_rate": approval_rate,
        "min_group_rows": min_group_rows,
        "min_ratio": MIN_RATIO,
        "expected": expected,
    }


ccard = sm.datasets.ccard.load_pandas().data
cc_groups = ["owner" if v == 1 else "renter" for v in ccard["OWNRENT"].to_numpy()]
assert set(ccard["OWNRENT"].unique()) <= {0.0, 1.0}
cc_income = ccard["INCOME"].to_numpy(dtype=float)
cc_age = ccard["AGE"].to_numpy(dtype=float)
cc_cand = cc_income / cc_income.max()
cc_act = cc_age / cc_age.max()

anes = sm.datasets.anes96.load_pandas().data
an_groups = [f"educ-{int(e)}" for e in anes["educ"].to_numpy()]
an_cand = anes["income"].to_numpy(dtype=float) / 24
an_act = 1 - anes["age"].to_numpy(dtype=float) / 100
an_groups_missing = [None if i % 10 == 0 else g for i, g in enumerate(an_groups)]

cases = [
    make_case("ccard OWNRENT, threshold 0.45 above", cc_groups, cc_cand, cc_act,
              "above", 0.45, None, 10),
    make_case("ccard OWNRENT, approval rate 0.5 above", cc_groups, cc_cand, cc_act,
              "above", None, 0.5, 10),
    make_case("anes96 educ, approval rate 0.6 below", an_groups, an_cand, an_act,
              "below", None, 0.6, 30),
    make_case("anes96 educ with every 10th group missing, threshold 0.5 below",
              an_groups_missing, an_cand, an_act, "below", 0.5, None, 30),
]

out = {
    "source": (f"tests/reference/adverse_impact_reference.py; statsmodels {statsmodels.__version__}, "
               f"scipy {scipy.__version__}, numpy {np.__version__}; datasets statsmodels ccard, anes96"),
    "cases": cases,
}
path = pathlib.Path(__file__).resolve().parents[1] / "fixtures" / "adverse_impact_reference.json"
path.write_text(json.dumps(out) + "\n")

for case in cases:
    print(case["name"])
    for model in ("candidate", "active"):
        e = case["expected"][model]
        tests = [g["test"] for g in e["groups"]]
        flagged = [g["group"] for g in e["groups"] if g["flagged"]]
        print(f"  {model}: t={e['threshold']!r} reference={e['reference']} flagged={flagged} "
              f"fisher={tests.count('fisher')} z={tests.count('z')}")
        for g in e["groups"]:
            print(f"    {g['group']}: {g['favourable']}/{g['rows']} rate={g['rate']:.4f} "
                  f"ratio={g['ratio'] if g['ratio'] is None else round(g['ratio'], 4)} "
                  f"test={g['test']} p={'-' if g['p_value'] is None else format(g['p_value'], '.3g')}")
print(f"wrote {path}")
