"""Reference fits for the Gaussian (numeric target) elastic-net / lasso / ridge solver.

Objective (glmnet convention, Friedman, Hastie & Tibshirani 2010, J. Stat. Softw. 33(1)):

    (1/(2N)) * sum_i (y_i - b0 - x_i w)^2 + lambda * ((1 - a)/2 * ||w||^2 + a * ||w||_1),

a = l1_ratio, intercept unpenalized.

Data: the diabetes data (442 x 10, Efron, Hastie, Johnstone & Tibshirani 2004, "Least Angle
Regression") exactly as smartcore 0.7.0 decodes it from src/dataset/diabetes.xy: header
[u64 LE num_features = 10][u64 LE num_samples = 442], then 4420 f32 LE values of X (row-major),
then 442 f32 LE targets (smartcore's `diabetes::load_dataset` casts the targets to u32; all 442
are whole numbers 25..346, so the cast loses nothing). The f32 values are widened to f64 here,
X is standardized with the population standard deviation (ddof = 0), y is used raw.

What smartcore's diabetes.xy is, compared with scikit-learn 1.9.1 `load_diabetes()` (whose X is
computed at load time from the raw file as (raw - mean) / (std * sqrt(N))):
  * same shape, same row order, identical targets (max |dy| = 0);
  * 8 of the 10 columns (age, sex, bmi, s1, s2, s3, s4, s6) equal float32(sklearn X) exactly;
  * column 3 (bp) differs by up to 1.20e-5 and column 8 (s5) by up to 4.84e-6 (absolute, in
    the scaled units, where values are of order 0.05); 884 of 4420 cells differ in all.
  * Mapping smartcore's columns back to raw units through the affine map fitted on the
    unaffected rows shows why: sklearn's raw file stores bp with two decimals (74.67, 103.33,
    ...) while smartcore's bp corresponds to the unrounded thirds (74.6667, 103.3333, ...,
    42 rows, which also shift that column's mean and scale and so touch every row), and
    sklearn's raw s5 (log of serum triglycerides) has four decimals while smartcore's s5
    carries more digits (raw 4.8598 -> 4.85981, max back-mapped difference 5.3e-5).
  So the two are the same data set, but smartcore's copy was scaled from less-rounded raw
  values; they are not bit-identical after float32 rounding. These fits use smartcore's copy
  so that a Rust test can load it with `smartcore::dataset::diabetes::load_dataset()`. The
  comparison figures are recomputed by this script and written to the fixture
  ("smartcore_vs_sklearn").

Fits:
  * a in {1.0, 0.5} x lambda in {0.1, 1.0, 5.0}:
        ElasticNet(alpha=lambda, l1_ratio=a, tol=1e-12, max_iter=10_000_000)
    scikit-learn's ElasticNet minimizes 1/(2N)||y - Xw - b||^2 + alpha*l1_ratio*||w||_1
    + 0.5*alpha*(1 - l1_ratio)*||w||^2, the same objective, so alpha = lambda, l1_ratio = a.
    With a = 0.5 these three lambdas leave 10, 10 and 9 of 10 weights non-zero, so one extra
    fit, a = 0.5, lambda = 20.0, is added to exercise a sparser elastic-net solution.
  * a = 0 (ridge), lambda in {0.01, 0.1, 1.0}:
        Ridge(alpha=N*lambda, fit_intercept=True)   (solver "auto", i.e. Cholesky here)
    Ridge minimizes ||y - Xw - b||^2 + alpha*||w||^2; dividing by 2N gives the objective above
    with lambda = alpha/N.
Cross-checks written per fit:
  * "closed_form_max_abs_weight_diff": given the zero pattern and signs of the fitted weights,
    the non-zero weights solve the linear system
        (X_A'X_A/N + lambda (1 - a) I) w_A = X_A'(y - ybar)/N - lambda a sign(w_A),
    solved with numpy.linalg.solve (for ridge A is all columns and a = 0);
  * "kkt_max_violation": first-order conditions of the objective in numpy at the stored
    solution (for w_j != 0, |g_j + lambda a sign(w_j)|; for w_j == 0, max(|g_j| - lambda a, 0),
    g = -X'(y - b0 - Xw)/N + lambda (1 - a) w; and |mean residual| for the intercept);
  * ElasticNet only: the same fit at tol=1e-8, "enet_tol_1e-8_max_abs_weight_diff".
"lambda_max" per a > 0 is max_j |x_j'(y - ybar)| / (N a) (numpy), with the number of non-zero
weights ElasticNet returns at 1.01x and 0.99x of it.

Run: OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 python3 tests/reference/linear_enet_diabetes.py
It rewrites tests/fixtures/linear_enet_diabetes.json. Set SMARTCORE_DIABETES_XY to the path of
diabetes.xy if it is not under ~/.cargo/registry/src/*/smartcore-0.7.0/src/dataset/.
"""
import glob
import json
import os
import pathlib
import warnings

import numpy as np
import scipy
import sklearn
from sklearn.datasets import load_diabetes
from sklearn.linear_model import ElasticNet, Ridge

warnings.simplefilter("error")


def smartcore_diabetes_path():
    env = os.environ.get("SMARTCORE_DIABETES_XY")
    if env:
        return pathlib.Path(env)
    pattern = os.path.expanduser("~/.cargo/registry/src/*/smartcore-0.7.0/src/dataset/diabetes.xy")
    found = sorted(glob.glob(pattern))
    if not found:
        raise SystemExit(f"diabetes.xy not found ({pattern}); set SMARTCORE_DIABETES_XY")
    return pathlib.Path(found[0])


def read_xy(path):
    """Decode smartcore's .xy format exactly as `dataset::deserialize_data` does."""
    raw = path.read_bytes()
    num_features, num_samples = (int(v) for v in np.frombuffer(raw[:16], dtype="<u8"))
    nx = num_features * num_samples
    assert len(raw) >= 16 + 4 * nx + 4 * num_samples
    x = np.frombuffer(raw[16 : 16 + 4 * nx], dtype="<f4").reshape(num_samples, num_features)
    y = np.frombuffer(raw[16 + 4 * nx : 16 + 4 * nx + 4 * num_samples], dtype="<f4")
    return x, y


XY_PATH = smartcore_diabetes_path()
x32, y32 = read_xy(XY_PATH)
assert np.all(y32 == np.round(y32)) and y32.min() >= 0  # smartcore casts y to u32

# How smartcore's copy compares with scikit-learn's.
x_sk, y_sk = load_diabetes(return_X_y=True)
diff32 = np.abs(x32.astype(np.float64) - x_sk.astype(np.float32).astype(np.float64))
smartcore_vs_sklearn = {
    "shape_equal": bool(x32.shape == x_sk.shape),
    "targets_identical": bool(np.array_equal(y32.astype(np.float64), y_sk)),
    "x_max_abs_diff_vs_float32_sklearn_per_column": [float(v) for v in diff32.max(axis=0)],
    "x_cells_differing_from_float32_sklearn": int((diff32 > 0).sum()),
    "x_cells": int(diff32.size),
}

x = x32.astype(np.float64)
y = y32.astype(np.float64)
n, p = x.shape
data_check = {
    "note": "smartcore 0.7.0 diabetes.xy before standardization, widened to f64",
    "x_first_row": [float(v) for v in x[0]],
    "x_column_means": [float(v) for v in x.mean(axis=0)],
    "x_column_population_std": [float(v) for v in x.std(axis=0)],
    "y_first": [float(v) for v in y[:5]],
    "y_sum": float(y.sum()),
}
x = (x - x.mean(axis=0)) / x.std(axis=0)
ybar = y.mean()


def kkt_violation(b0, w, lam, a):
    r = y - b0 - x @ w
    g = -x.T @ r / n + lam * (1.0 - a) * w
    per_coef = np.where(w != 0.0, np.abs(g + lam * a * np.sign(w)), np.maximum(np.abs(g) - lam * a, 0.0))
    return float(max(per_coef.max(), abs(r.mean())))


def closed_form(w, lam, a):
    active = np.flatnonzero(w)
    xa = x[:, active]
    lhs = xa.T @ xa / n + lam * (1.0 - a) * np.eye(active.size)
    rhs = xa.T @ (y - ybar) / n - lam * a * np.sign(w[active])
    out = np.zeros(p)
    out[active] = np.linalg.solve(lhs, rhs)
    return out


def enet(lam, a, tol):
    model = ElasticNet(alpha=lam, l1_ratio=a, tol=tol, max_iter=10_000_000)
    model.fit(x, y)
    return float(model.intercept_), model.coef_.copy(), int(model.n_iter_)


def record(kind, a, lam, b0, w, extra):
    fit = {
        "estimator": kind,
        "l1_ratio": a,
        "lambda": lam,
        "intercept": b0,
        "weights": [float(v) for v in w],
        "nonzero": int((w != 0.0).sum()),
        "kkt_max_violation": kkt_violation(b0, w, lam, a),
        "closed_form_max_abs_weight_diff": float(np.abs(w - closed_form(w, lam, a)).max()),
        "intercept_minus_ybar": b0 - ybar,
    }
    fit.update(extra)
    print(f"{kind} a={a} lambda={lam} nonzero={fit['nonzero']} kkt={fit['kkt_max_violation']:.1e} "
          f"closed-form diff={fit['closed_form_max_abs_weight_diff']:.1e}")
    return fit


fits = []
for a, lambdas in [(1.0, [0.1, 1.0, 5.0]), (0.5, [0.1, 1.0, 5.0, 20.0])]:
    for lam in lambdas:
        b0, w, iters = enet(lam, a, 1e-12)
        _, w_loose, _ = enet(lam, a, 1e-8)
        fits.append(record(
            f"ElasticNet(alpha={lam}, l1_ratio={a}, tol=1e-12)", a, lam, b0, w,
            {"cd_epochs": iters, "enet_tol_1e-8_max_abs_weight_diff": float(np.abs(w - w_loose).max())},
        ))
for lam in [0.01, 0.1, 1.0]:
    model = Ridge(alpha=n * lam, fit_intercept=True)
    model.fit(x, y)
    fits.append(record(f"Ridge(alpha=N*{lam})", 0.0, lam, float(model.intercept_), model.coef_.copy(), {}))

score = np.abs(x.T @ (y - ybar))
lambda_max = []
for a in [1.0, 0.5]:
    lmax = float(score.max() / (n * a))
    _, w_above, _ = enet(1.01 * lmax, a, 1e-12)
    _, w_below, _ = enet(0.99 * lmax, a, 1e-12)
    lambda_max.append({
        "l1_ratio": a,
        "lambda_max": lmax,
        "argmax_column": int(score.argmax()),
        "nonzero_at_1.01_lambda_max": int((w_above != 0.0).sum()),
        "nonzero_at_0.99_lambda_max": int((w_below != 0.0).sum()),
    })

out = {
    "source": (
        "smartcore 0.7.0 src/dataset/diabetes.xy (f32 -> f64), X standardized (population std), "
        "y raw; scikit-learn ElasticNet(alpha=lambda, l1_ratio=a, tol=1e-12) and "
        "Ridge(alpha=N*lambda); objective 1/(2N)||y-b0-Xw||^2 + lambda*((1-a)/2||w||^2 + a||w||_1) "
        "(glmnet, Friedman, Hastie & Tibshirani 2010)"
    ),
    "sklearn_version": sklearn.__version__,
    "numpy_version": np.__version__,
    "scipy_version": scipy.__version__,
    "rows": int(n),
    "columns": int(p),
    "smartcore_vs_sklearn": smartcore_vs_sklearn,
    "data_check": data_check,
    "solver_agreement": {
        "note": "max over all fits; see module docstring",
        "max_closed_form_abs_weight_diff": max(f["closed_form_max_abs_weight_diff"] for f in fits),
        "max_enet_tol_1e-12_vs_1e-8_abs_weight_diff": max(
            f["enet_tol_1e-8_max_abs_weight_diff"] for f in fits if "enet_tol_1e-8_max_abs_weight_diff" in f
        ),
        "max_kkt_violation": max(f["kkt_max_violation"] for f in fits),
    },
    "lambda_max": lambda_max,
    "fits": fits,
}
path = pathlib.Path(__file__).resolve().parents[1] / "fixtures" / "linear_enet_diabetes.json"
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path}")
