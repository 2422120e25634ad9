"""Reference probabilities for the Gaussian naive Bayes check in src/model/families.rs.

Recipe: the Wisconsin diagnostic breast-cancer data (569 x 30) as scikit-learn ships it
(`sklearn.datasets.load_breast_cancer`), rounded to float32 as smartcore's `datasets` feature
stores it, every column standardized over all rows with the population standard deviation.
Rows whose index is a multiple of 4 are held out (143 rows); the other 426 train
`GaussianNB()` (default var_smoothing = 1e-9). For each held-out row the fixture keeps
`predict_proba[:, 1]` and the log-odds `predict_joint_log_proba[:, 1] - [:, 0]`. The labels and
the float32 column means are kept too, so the Rust test can check that both sides hold the
same data.

Run: OPENBLAS_NUM_THREADS=1 python3 tests/reference/naive_bayes_breast_cancer.py
It rewrites tests/fixtures/naive_bayes_breast_cancer.json.
"""
import json
import pathlib

import numpy as np
import sklearn
from sklearn.datasets import load_breast_cancer
from sklearn.naive_bayes import GaussianNB

x, y = load_breast_cancer(return_X_y=True)
x = x.astype(np.float32).astype(np.float64)
column_means = x.mean(axis=0)
x = (x - x.mean(axis=0)) / x.std(axis=0)
held_out = np.arange(x.shape[0]) % 4 == 0

model = GaussianNB().fit(x[~held_out], y[~held_out])
probabilities = model.predict_proba(x[held_out])[:, 1]
joint = model.predict_joint_log_proba(x[held_out])
log_odds = joint[:, 1] - joint[:, 0]

out = {
    "source": "sklearn.datasets.load_breast_cancer as float32, standardized, GaussianNB()",
    "sklearn_version": sklearn.__version__,
    "numpy_version": np.__version__,
    "held_out": "rows with index % 4 == 0",
    "labels": [int(v) for v in y],
    "column_means": [float(v) for v in column_means],
    "epsilon": float(model.epsilon_),
    "probabilities": [float(v) for v in probabilities],
    "log_odds": [float(v) for v in log_odds],
}
path = pathlib.Path(__file__).resolve().parents[1] / "fixtures" / "naive_bayes_breast_cancer.json"
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path}")
