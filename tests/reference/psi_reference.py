"""Reference values for the PSI check in src/drift.rs.

Recipe: PSI = sum over bins of (a - e) * ln(a / e), with every share floored at 1e-4 before the
logarithm (the same floor as understudy's PSI_EPSILON), computed in numpy from decile counts.
The cases: an unchanged distribution, a mild shift, a strong shift, and a bin that empties.

Run: python3 tests/reference/psi_reference.py   (rewrites tests/fixtures/psi.json)
"""
import json
import pathlib

import numpy as np

EPS = 1e-4


def psi(expected, actual):
    e = np.maximum(np.asarray(expected, dtype=np.float64), EPS)
    a = np.maximum(np.asarray(actual, dtype=np.float64), EPS)
    return float(np.sum((a - e) * np.log(a / e)))


def shares(counts):
    c = np.asarray(counts, dtype=np.float64)
    return (c / c.sum()).tolist()


cases = []
ten = [100] * 10
for actual_counts in (
    [100] * 10,
    [80, 90, 95, 100, 100, 105, 105, 110, 110, 105],
    [30, 40, 60, 80, 100, 120, 130, 140, 150, 150],
    [0, 50, 100, 100, 100, 100, 100, 150, 150, 150],
):
    e, a = shares(ten), shares(actual_counts)
    cases.append({"expected": e, "actual": a, "psi": psi(e, a)})
path = pathlib.Path(__file__).resolve().parents[1] / "fixtures" / "psi.json"
path.write_text(json.dumps(cases, indent=1) + "\n")
print(f"wrote {path} (numpy {np.__version__})")
