"""Reference values for src/metrics.rs (AUC, KS, log loss, Brier, ECE, DeLong).

Data: 300 rows from a seeded numpy generator (labels ~ Bernoulli(0.3), two correlated score
vectors rounded to 2 decimals so that ties occur). Invented data; only the computations are the
reference:

- AUC: sklearn.metrics.roc_auc_score
- log loss, Brier: sklearn.metrics.log_loss, brier_score_loss
- KS: scipy.stats.ks_2samp(scores of positives, scores of negatives).statistic
- ECE: 10 equal-width bins over [0, 1], sum over bins of (n_b / N) * |mean(p) - mean(y)|
  (Naeini, Cooper & Hauskrecht 2015), written out below with numpy
- DeLong, DeLong & Clarke-Pearson (1988): placement values computed from their O(m*n)
  definition (psi = 1 if X > Y, 1/2 if equal), sample covariances with m-1 and n-1, the
  variance of the AUC difference, z, and normal p-values from scipy.stats.norm. The Rust code
  uses the fast mid-rank algorithm of Sun & Xu (2014), so this is an independent computation.

Run: OPENBLAS_NUM_THREADS=1 python3 tests/reference/metrics_reference.py
"""
import json
import pathlib

import numpy as np
import scipy
import sklearn
from scipy.stats import ks_2samp, norm, ttest_rel
from sklearn.metrics import brier_score_loss, log_loss, roc_auc_score

rng = np.random.default_rng(20261201)
n = 300
y = (rng.random(n) < 0.3).astype(int)
signal = y * 1.0 + rng.normal(0, 1.0, n)
a = np.round(1 / (1 + np.exp(-(signal - 0.8))), 2)
b = np.round(1 / (1 + np.exp(-(0.6 * signal + rng.normal(0, 0.7, n) - 0.8))), 2)


def ece(p, y, bins=10):
    idx = np.minimum((p * bins).astype(int), bins - 1)
    total = 0.0
    for k in range(bins):
        mask = idx == k
        if mask.any():
            total += mask.sum() / len(p) * abs(p[mask].mean() - y[mask].mean())
    return float(total)


def placements(s, y):
    x, z = s[y == 1], s[y == 0]
    psi = (x[:, None] > z[None, :]).astype(float) + 0.5 * (x[:, None] == z[None, :])
    return psi.mean(axis=1), psi.mean(axis=0)  # V10 (per positive), V01 (per negative)


v10a, v01a = placements(a, y)
v10b, v01b = placements(b, y)
m, k = len(v10a), len(v01a)
s10 = np.cov(np.vstack([v10a, v10b]))  # ddof = 1
s01 = np.cov(np.vstack([v01a, v01b]))
s = s10 / m + s01 / k
auc_a, auc_b = v10a.mean(), v10b.mean()
var = s[0, 0] + s[1, 1] - 2 * s[0, 1]
z = (auc_a - auc_b) / np.sqrt(var)

# Paired test on per-row log losses (clipped like sklearn): b minus a, so positive = a better.
eps = np.finfo(float).eps
def row_log_loss(p, y):
    p = np.clip(p, eps, 1 - eps)
    return -(y * np.log(p) + (1 - y) * np.log(1 - p))
paired = ttest_rel(row_log_loss(b, y), row_log_loss(a, y))

out = {
    "versions": {"sklearn": sklearn.__version__, "scipy": scipy.__version__, "numpy": np.__version__},
    "labels": y.tolist(),
    "a": a.tolist(),
    "b": b.tolist(),
    "auc_a": roc_auc_score(y, a),
    "auc_b": roc_auc_score(y, b),
    "ks_a": float(ks_2samp(a[y == 1], a[y == 0]).statistic),
    "log_loss_a": log_loss(y, a),
    "brier_a": brier_score_loss(y, a),
    "ece_a": ece(a, y),
    "delong": {
        "auc_a": float(auc_a),
        "auc_b": float(auc_b),
        "var_a": float(s[0, 0]),
        "var_b": float(s[1, 1]),
        "cov_ab": float(s[0, 1]),
        "z": float(z),
        "p_two_sided": float(2 * norm.sf(abs(z))),
        "p_a_better": float(norm.sf(z)),
    },
    "paired_log_loss": {"statistic": float(paired.statistic), "p_a_better_normal": float(norm.sf(paired.statistic))},
    "normal_sf": {str(t): float(norm.sf(t)) for t in [-3.0, -1.0, 0.0, 0.5, 1.6448536269514722, 2.5, 4.0, 6.0]},
}
path = pathlib.Path(__file__).resolve().parents[1] / "fixtures" / "metrics_reference.json"
path.write_text(json.dumps(out) + "\n")
print(f"wrote {path}: DeLong z = {z:.4f}")
