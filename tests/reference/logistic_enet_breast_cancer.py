"""Reference fits for the elastic-net / L1 logistic coordinate-descent solver.

Objective (glmnet convention, Friedman, Hastie & Tibshirani 2010, J. Stat. Softw. 33(1)):

    mean binomial log-loss + lambda * ((1 - a)/2 * ||w||^2 + a * ||w||_1),  a = l1_ratio,

intercept unpenalized.

Recipe: the Wisconsin diagnostic breast-cancer data (569 x 30) as scikit-learn ships it
(`sklearn.datasets.load_breast_cancer`; smartcore 0.7's `datasets` feature ships the same rows
and labels stored as float32 -- checked: smartcore's breast_cancer.xy equals
float32(sklearn X) exactly and the labels are identical -- so the data are rounded to float32
here as well), columns standardized with the population standard deviation (ddof = 0), exactly
as in logistic_l2_breast_cancer.py. Then, for a in {1.0, 0.5, 0.2} and
lambda in {0.001, 0.01, 0.05}:

    LogisticRegression(C = 1 / (N * lambda), l1_ratio = a, solver="saga", tol=1e-14,
                       max_iter=10_000_000, random_state=0)

Mapping: scikit-learn minimizes C * sum(log-loss) + (1 - rho)/2 ||w||^2 + rho ||w||_1;
dividing by C * N gives mean(log-loss) + 1/(C N) * (...), so C = 1/(N * lambda), rho = a.
In scikit-learn 1.9.1 the `penalty` argument is deprecated (since 1.8, removal in 1.10) and
`l1_ratio` alone selects the penalty, so `penalty` is left at its default here; the script
turns every warning into an error, so a deprecation or non-convergence warning stops it.

Convergence evidence written into the fixture (per fit and summarized in "solver_agreement"):
  * saga at tol=1e-12 versus the stored tol=1e-14 fit (same random_state): max |dw|, |db|;
  * the first-order optimality (KKT) conditions of the objective above, evaluated in numpy
    at the stored solution: for w_j != 0, |g_j + lambda a sign(w_j)|; for w_j == 0,
    max(|g_j| - lambda a, 0), with g = X'(p - y)/N + lambda (1 - a) w; and |mean(p - y)|
    for the intercept. The largest of these is "kkt_max_violation";
  * an independent solver: scipy L-BFGS-B on the smooth split w = u - v, u, v >= 0
    (gtol=1e-14, ftol=0), max |dw|, |db| against saga;
  * for a = 1 also liblinear (`solver="liblinear"`, tol=1e-12, intercept_scaling=1e5).
    liblinear penalizes the intercept: it fits b = intercept_scaling * w_b with |w_b| inside
    the L1 term, so its intercept carries a penalty lambda/intercept_scaling and its solution
    is off by O(1/intercept_scaling); the disagreement was seen to shrink tenfold per tenfold
    increase of intercept_scaling (1e2 .. 1e5), so it measures this bias, not saga's error.
"nonzero" counts weights that saga returns as exactly 0.0 (its proximal step produces exact
zeros); the script asserts the zero pattern is the same in the tol=1e-12 run and in the
L-BFGS-B run (|w| < 1e-8 counted as zero there).

lambda_max: the smallest lambda at which all weights are zero,
lambda_max = max_j |x_j'(y - ybar)| / (N * a), computed in numpy on the standardized data
(for a = 0 glmnet uses a = 0.001 in this formula; that row is included and checked with
l1_ratio=0.001). The check fits saga (tol=1e-12) at 1.01 * lambda_max (expect all weights 0)
and at 0.99 * lambda_max (expect at least one non-zero) and records what it saw.

Run: OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 python3 tests/reference/logistic_enet_breast_cancer.py
It rewrites tests/fixtures/logistic_enet_breast_cancer.json (about a minute on one core).
"""
import json
import pathlib
import warnings

import numpy as np
import scipy
import sklearn
from scipy.optimize import minimize
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression

warnings.simplefilter("error")

L1_RATIOS = [1.0, 0.5, 0.2]
LAMBDAS = [0.001, 0.01, 0.05]
TOL = 1e-14
TOL_CHECK = 1e-12

x, y = load_breast_cancer(return_X_y=True)
x = x.astype(np.float32).astype(np.float64)
x = (x - x.mean(axis=0)) / x.std(axis=0)
y = y.astype(np.float64)
n, p = x.shape


def saga(lam, a, tol):
    model = LogisticRegression(
        C=1.0 / (n * lam), l1_ratio=a, solver="saga", tol=tol, max_iter=10_000_000, random_state=0
    )
    model.fit(x, y)
    return float(model.intercept_[0]), model.coef_[0].copy(), int(model.n_iter_[0])


def kkt_violation(b0, w, lam, a):
    prob = 1.0 / (1.0 + np.exp(-(b0 + x @ w)))
    g = x.T @ (prob - y) / n + lam * (1.0 - a) * w
    per_coef = np.where(w != 0.0, np.abs(g + lam * a * np.sign(w)), np.maximum(np.abs(g) - lam * a, 0.0))
    return float(max(per_coef.max(), abs((prob - y).mean())))


def lbfgsb(lam, a):
    def fun(z):
        b0, u, v = z[0], z[1 : p + 1], z[p + 1 :]
        w = u - v
        eta = b0 + x @ w
        r = 1.0 / (1.0 + np.exp(-eta)) - y
        gw = x.T @ r / n + lam * (1.0 - a) * w
        f = np.mean(np.logaddexp(0.0, eta) - y * eta) + lam * ((1.0 - a) / 2.0 * w @ w + a * (u.sum() + v.sum()))
        return f, np.concatenate([[r.mean()], gw + lam * a, -gw + lam * a])

    res = minimize(
        fun, np.zeros(2 * p + 1), jac=True, method="L-BFGS-B",
        bounds=[(None, None)] + [(0.0, None)] * (2 * p),
        options=dict(maxiter=100_000, maxfun=200_000, ftol=0.0, gtol=1e-14, maxcor=50),
    )
    return float(res.x[0]), res.x[1 : p + 1] - res.x[p + 1 :]


def liblinear_l1(lam):
    model = LogisticRegression(
        C=1.0 / (n * lam), l1_ratio=1.0, solver="liblinear", tol=1e-12, max_iter=1_000_000,
        intercept_scaling=1e5, random_state=0,
    )
    model.fit(x, y)
    return float(model.intercept_[0]), model.coef_[0].copy()


fits = []
for a in L1_RATIOS:
    for lam in LAMBDAS:
        b0, w, iters = saga(lam, a, TOL)
        cb0, cw, _ = saga(lam, a, TOL_CHECK)
        lb0, lw = lbfgsb(lam, a)
        assert np.array_equal(w == 0.0, cw == 0.0), (a, lam, "zero pattern differs between tolerances")
        assert np.array_equal(w == 0.0, np.abs(lw) < 1e-8), (a, lam, "zero pattern differs from L-BFGS-B")
        fit = {
            "l1_ratio": a,
            "lambda": lam,
            "intercept": b0,
            "weights": [float(v) for v in w],
            "nonzero": int((w != 0.0).sum()),
            "saga_epochs": iters,
            "kkt_max_violation": kkt_violation(b0, w, lam, a),
            "saga_tol_1e-12_max_abs_weight_diff": float(np.abs(w - cw).max()),
            "saga_tol_1e-12_intercept_diff": abs(b0 - cb0),
            "scipy_lbfgsb_max_abs_weight_diff": float(np.abs(w - lw).max()),
            "scipy_lbfgsb_intercept_diff": abs(b0 - lb0),
        }
        if a == 1.0:
            llb0, llw = liblinear_l1(lam)
            fit["liblinear_max_abs_weight_diff"] = float(np.abs(w - llw).max())
            fit["liblinear_intercept_diff"] = abs(b0 - llb0)
            fit["liblinear_same_zero_pattern"] = bool(np.array_equal(w == 0.0, llw == 0.0))
        fits.append(fit)
        print(f"a={a} lambda={lam} nonzero={fit['nonzero']} kkt={fit['kkt_max_violation']:.1e} "
              f"tol-diff={fit['saga_tol_1e-12_max_abs_weight_diff']:.1e} "
              f"lbfgsb-diff={fit['scipy_lbfgsb_max_abs_weight_diff']:.1e}")


def worst(key):
    return max(f[key] for f in fits if key in f)


solver_agreement = {
    "note": "max over all fits; saga tol=1e-14 (stored) against each cross-check; see module docstring",
    "saga_tol_1e-14_vs_1e-12_max_abs_weight_diff": worst("saga_tol_1e-12_max_abs_weight_diff"),
    "saga_tol_1e-14_vs_1e-12_max_intercept_diff": worst("saga_tol_1e-12_intercept_diff"),
    "saga_vs_scipy_lbfgsb_max_abs_weight_diff": worst("scipy_lbfgsb_max_abs_weight_diff"),
    "saga_vs_scipy_lbfgsb_max_intercept_diff": worst("scipy_lbfgsb_intercept_diff"),
    "saga_vs_liblinear_l1_max_abs_weight_diff": worst("liblinear_max_abs_weight_diff"),
    "saga_vs_liblinear_l1_max_intercept_diff": worst("liblinear_intercept_diff"),
    "max_kkt_violation": worst("kkt_max_violation"),
}

ybar = y.mean()
score = np.abs(x.T @ (y - ybar))
lambda_max = []
for a_label in L1_RATIOS + [0.0]:
    a = a_label if a_label > 0.0 else 0.001
    lmax = float(score.max() / (n * a))
    _, w_above, _ = saga(1.01 * lmax, a, TOL_CHECK)
    _, w_below, _ = saga(0.99 * lmax, a, TOL_CHECK)
    entry = {
        "l1_ratio": a_label,
        "l1_ratio_used": a,
        "lambda_max": lmax,
        "argmax_column": int(score.argmax()),
        "nonzero_at_1.01_lambda_max": int((w_above != 0.0).sum()),
        "nonzero_at_0.99_lambda_max": int((w_below != 0.0).sum()),
        "nonzero_columns_at_0.99_lambda_max": [int(j) for j in np.flatnonzero(w_below)],
    }
    entry["check_passed"] = entry["nonzero_at_1.01_lambda_max"] == 0 and entry["nonzero_at_0.99_lambda_max"] >= 1
    lambda_max.append(entry)
    print(f"lambda_max a={a_label}: {lmax:.6g} above={entry['nonzero_at_1.01_lambda_max']} "
          f"below={entry['nonzero_at_0.99_lambda_max']}")

out = {
    "source": (
        "sklearn.datasets.load_breast_cancer rounded to float32, standardized (population std); "
        "scikit-learn LogisticRegression(C=1/(N*lambda), l1_ratio=a, solver='saga', tol=1e-14, "
        "max_iter=1e7, random_state=0); objective mean log-loss + lambda*((1-a)/2||w||^2 + a||w||_1) "
        "(glmnet, Friedman, Hastie & Tibshirani 2010)"
    ),
    "sklearn_version": sklearn.__version__,
    "numpy_version": np.__version__,
    "scipy_version": scipy.__version__,
    "rows": int(n),
    "columns": int(p),
    "solver_agreement": solver_agreement,
    "lambda_max": lambda_max,
    "fits": fits,
}
path = pathlib.Path(__file__).resolve().parents[1] / "fixtures" / "logistic_enet_breast_cancer.json"
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path}")
