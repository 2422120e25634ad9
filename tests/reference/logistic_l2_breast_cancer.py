"""Reference fit for the L2 logistic check in src/model/logistic.rs.

Recipe: the Wisconsin diagnostic breast-cancer data (569 x 30) as scikit-learn ships it
(`sklearn.datasets.load_breast_cancer`; smartcore's `datasets` feature ships the same rows and
labels, stored as float32, so the data are rounded to float32 here as well), columns
standardized with the population standard deviation, then
`LogisticRegression(C = 1 / (N * lambda), solver="lbfgs", tol=1e-12, max_iter=100000)`.
scikit-learn minimizes C * sum(log-loss) + 0.5 * ||w||^2, i.e. sum(log-loss) + 1/(2C) ||w||^2,
so C = 1/(N * lambda) is the mean-loss + lambda/2 ||w||^2 objective understudy uses.

Run: OPENBLAS_NUM_THREADS=1 python3 tests/reference/logistic_l2_breast_cancer.py
It rewrites tests/fixtures/logistic_l2_breast_cancer.json.
"""
import json
import pathlib

import numpy as np
import sklearn
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression

x, y = load_breast_cancer(return_X_y=True)
x = x.astype(np.float32).astype(np.float64)
x = (x - x.mean(axis=0)) / x.std(axis=0)
n = x.shape[0]
fits = []
for lam in [0.001, 0.01, 0.1]:
    model = LogisticRegression(C=1.0 / (n * lam), solver="lbfgs", tol=1e-12, max_iter=100000)
    model.fit(x, y)
    fits.append({
        "lambda": lam,
        "intercept": float(model.intercept_[0]),
        "weights": [float(w) for w in model.coef_[0]],
    })
out = {
    "source": "sklearn.datasets.load_breast_cancer, standardized, LogisticRegression lbfgs",
    "sklearn_version": sklearn.__version__,
    "numpy_version": np.__version__,
    "rows": int(n),
    "fits": fits,
}
path = pathlib.Path(__file__).resolve().parents[1] / "fixtures" / "logistic_l2_breast_cancer.json"
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path}")
