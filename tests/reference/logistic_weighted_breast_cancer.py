"""Reference fits for the weighted logistic check in src/model/elastic_net.rs.

Recipe: the Wisconsin diagnostic breast-cancer data (569 x 30) as scikit-learn ships it
(`sklearn.datasets.load_breast_cancer`; rounded to float32 as smartcore ships it), columns
standardized with the population standard deviation (unweighted, as understudy's design is),
and recency weights as the window search would give them: row i of n has weight
0.5 ** ((n - 1 - i) / half_life), half-life 150 rows, scaled to mean 1.

L2: `LogisticRegression(C = 1 / (N * lambda), solver="newton-cholesky", tol=1e-14)` with
`sample_weight`. scikit-learn minimizes C * sum(w * log-loss) + 0.5 * ||b||^2; divided by C*N
that is mean(w * log-loss) + lambda/2 ||b||^2, understudy's weighted objective.
Elastic net: `solver="saga", penalty="elasticnet", l1_ratio=0.5`, C = 1 / (N * lambda), which
is mean(w * log-loss) + lambda * (0.5/2 ||b||^2 + 0.5 ||b||_1) on the same scale.

Run: OPENBLAS_NUM_THREADS=1 target/reference-venv/bin/python \
       tests/reference/logistic_weighted_breast_cancer.py
(target/reference-venv: `python3 -m venv target/reference-venv &&
 target/reference-venv/bin/pip install scikit-learn==1.9.1`). It rewrites
tests/fixtures/logistic_weighted_breast_cancer.json.
"""
import json
import pathlib
import warnings

import numpy as np
import sklearn
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression

x, y = load_breast_cancer(return_X_y=True)
x = x.astype(np.float32).astype(np.float64)
x = (x - x.mean(axis=0)) / x.std(axis=0)
n = x.shape[0]
half_life = 150.0
w = 0.5 ** ((n - 1 - np.arange(n)) / half_life)
w = w * n / w.sum()


def objective(b0, b, lam, a):
    z = b0 + x @ b
    loss = np.logaddexp(0.0, z) - y * z
    return float(np.mean(w * loss) + lam * ((1 - a) / 2 * b @ b + a * np.abs(b).sum()))


fits = []
for lam in [0.001, 0.01, 0.1]:
    model = LogisticRegression(C=1.0 / (n * lam), solver="newton-cholesky", tol=1e-14,
                               max_iter=1000)
    model.fit(x, y, sample_weight=w)
    b0, b = float(model.intercept_[0]), model.coef_[0]
    fits.append({"l1_ratio": 0.0, "lambda": lam, "intercept": b0,
                 "weights": [float(v) for v in b], "objective": objective(b0, b, lam, 0.0)})
for lam in [0.01, 0.05]:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = LogisticRegression(C=1.0 / (n * lam), solver="saga", penalty="elasticnet",
                                   l1_ratio=0.5, tol=1e-15, max_iter=2_000_000)
        model.fit(x, y, sample_weight=w)
    b0, b = float(model.intercept_[0]), model.coef_[0]
    fits.append({"l1_ratio": 0.5, "lambda": lam, "intercept": b0,
                 "weights": [float(v) for v in b], "objective": objective(b0, b, lam, 0.5)})
out = {
    "source": "sklearn.datasets.load_breast_cancer, standardized, recency weights (half-life "
              "150 rows, mean 1), LogisticRegression newton-cholesky (L2) and saga (elastic net) "
              "with sample_weight",
    "sklearn_version": sklearn.__version__,
    "numpy_version": np.__version__,
    "rows": int(n),
    "half_life_rows": half_life,
    "fits": fits,
}
path = pathlib.Path(__file__).resolve().parents[1] / "fixtures" / "logistic_weighted_breast_cancer.json"
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path}")
