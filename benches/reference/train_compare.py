"""scikit-learn's side of `benches/train_compare.sh`: the same labeled CSV that
`understudy train` reads, end to end in one process: pandas reads the CSV (timed), the rows
are ordered by event time and the latest `--holdout` fraction held out (as understudy's run
does), the training part is standardized (population std, on the training part only), then
LogisticRegressionCV fits the same lambda path with 5-fold stratified CV, refits at the best,
and scores the holdout.

Objective mapping (as in sklearn_path_timing.py beside this file): understudy minimizes mean
log-loss + lambda*((1 - a)/2 ||w||^2 + a ||w||_1); scikit-learn C*sum(log-loss) + the same
penalty, so inside a fold of N_fold rows C = 1/(N_fold*lambda).

Solvers: lbfgs for a = 0, saga for a > 0; tol 1e-4 and max_iter 100 (scikit-learn's defaults);
BLAS and OpenMP limited to one thread.

Output: one JSON line: seconds_read (pandas), seconds_fit, seconds_total (read to holdout
AUC), holdout_auc, best_lambda, solver, sklearn and pandas versions, convergence warnings.
"""
import argparse
import json
import os
import sys
import time
import warnings

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import sklearn  # noqa: E402
from sklearn.exceptions import ConvergenceWarning  # noqa: E402
from sklearn.linear_model import LogisticRegressionCV  # noqa: E402
from sklearn.metrics import roc_auc_score  # noqa: E402
from sklearn.model_selection import StratifiedKFold  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--csv", required=True)
    ap.add_argument("--label", default="y")
    ap.add_argument("--l1-ratio", type=float, required=True)
    ap.add_argument("--lambdas", required=True, help="comma-separated, decreasing")
    ap.add_argument("--folds", type=int, default=5)
    ap.add_argument("--holdout", type=float, default=0.2)
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args(argv)
    lambdas = [float(v) for v in args.lambdas.split(",") if v.strip()]
    a = args.l1_ratio
    solver = "saga" if a > 0.0 else "lbfgs"

    with threadpool_limits(limits=1):
        start = time.perf_counter()
        frame = pd.read_csv(args.csv)
        seconds_read = time.perf_counter() - start
        frame = frame.sort_values("event_time", kind="stable")
        features = [c for c in frame.columns if c not in ("id", "event_time", args.label)]
        x = frame[features].to_numpy(dtype=np.float64)
        y = frame[args.label].to_numpy(dtype=np.int64)
        n = len(y)
        holdout_n = min(int(np.ceil(n * args.holdout)), n)  # as understudy's holdout_len
        x_train, y_train = x[: n - holdout_n], y[: n - holdout_n]
        x_hold, y_hold = x[n - holdout_n :], y[n - holdout_n :]
        mean, sd = x_train.mean(axis=0), x_train.std(axis=0)
        sd[sd == 0] = 1.0
        x_train = (x_train - mean) / sd
        x_hold = (x_hold - mean) / sd
        n_fold = len(y_train) * (args.folds - 1) / args.folds
        cs = [1.0 / (n_fold * lam) for lam in lambdas]
        model = LogisticRegressionCV(
            Cs=cs,
            l1_ratios=[a],
            solver=solver,
            cv=StratifiedKFold(args.folds, shuffle=True, random_state=args.seed),
            scoring="roc_auc",
            tol=1e-4,
            max_iter=100,
            n_jobs=1,
            refit=True,
            random_state=args.seed,
            use_legacy_attributes=False,
        )
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", ConvergenceWarning)
            fit_start = time.perf_counter()
            model.fit(x_train, y_train)
            seconds_fit = time.perf_counter() - fit_start
        auc = roc_auc_score(y_hold, model.predict_proba(x_hold)[:, 1])
        seconds_total = time.perf_counter() - start
    best_c = float(np.ravel(model.C_)[0])
    print(json.dumps({
        "rows": int(n), "features": len(features), "holdout_rows": int(holdout_n),
        "l1_ratio": a, "solver": solver, "seconds_read": round(seconds_read, 4),
        "seconds_fit": round(seconds_fit, 4), "seconds_total": round(seconds_total, 4),
        "holdout_auc": float(auc), "best_lambda": 1.0 / (n_fold * best_c),
        "convergence_warnings": int(sum(issubclass(w.category, ConvergenceWarning) for w in caught)),
        "sklearn_version": sklearn.__version__, "pandas_version": pd.__version__,
    }))


if __name__ == "__main__":
    sys.exit(main())
