"""Time scikit-learn's cross-validated logistic regularization path on a data set the Rust
benchmark wrote, so the Rust path timing has an outside point of comparison.

Input (written by the Rust benchmark):
  --x FILE        raw little-endian f64, row-major n x p (n is taken from --y)
  --y FILE        raw u8 labels 0/1, n bytes
  --p P           number of columns
  --folds K       number of CV folds (default 5)
  --l1-ratio A    elastic-net mixing a (glmnet convention; 1 = lasso, 0 = ridge)
  --lambdas L     comma-separated lambdas, decreasing (glmnet convention)
  --seed S        StratifiedKFold shuffle seed, also saga's random_state
  --mode M        "path" (default): a as given, solver saga for a > 0 and lbfgs for a == 0;
                  "l2-lbfgs": a = 0 with lbfgs whatever --l1-ratio says, same lambdas
  --max-iter M    solver max_iter (default 100, scikit-learn's default)

Objective and mapping: understudy (like glmnet, Friedman, Hastie & Tibshirani 2010,
J. Stat. Softw. 33(1)) minimizes mean log-loss + lambda*((1 - a)/2 ||w||^2 + a ||w||_1) with
an unpenalized intercept; scikit-learn minimizes C*sum(log-loss) + (1 - a)/2 ||w||^2 +
a ||w||_1, so C = 1/(N*lambda). Inside cross-validation each fold is fitted on
N_train_fold = N*(K - 1)/K rows, so the grid is Cs = [1/(N_train_fold*lambda)]; increasing C
(decreasing lambda) is the order scikit-learn walks the path in with warm starts. The refit on
all N rows uses the chosen C, which on N rows corresponds to lambda*(K-1)/K.

What is timed (time.perf_counter, fit only; reading and standardizing are not timed):
  LogisticRegressionCV(Cs=..., l1_ratios=[a], solver=..., cv=StratifiedKFold(K, shuffle=True,
      random_state=S), scoring="roc_auc", tol=1e-4, max_iter=M, n_jobs=1, refit=True,
      random_state=S, use_legacy_attributes=False).fit(X, y)
with X standardized by column (population std, ddof = 0) on all rows, and BLAS/OpenMP pools
limited to one thread (threadpoolctl, plus OPENBLAS_NUM_THREADS=OMP_NUM_THREADS=1 set before
numpy is imported). scikit-learn 1.9.1's `penalty` argument is deprecated; `l1_ratios` alone
selects the penalty, so `penalty` is not passed.

Output: one JSON line with n, p, folds, lambdas, l1_ratio, solver, seconds, sklearn_version,
best_C, cv_auc_mean_per_lambda (mean over folds, in --lambdas order), plus best_lambda (the
fold-scale lambda of best_C), lambda_max (max_j |x_j'(y - ybar)|/(N*a), with a = 0.001 when
a = 0, on all rows), max_iter, convergence_warnings (how many ConvergenceWarnings the fit
raised) and mode.

Example:
  OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 python3 benches/reference/sklearn_path_timing.py \
      --x /tmp/x.f64 --y /tmp/y.u8 --p 30 --folds 5 --l1-ratio 0.5 \
      --lambdas 0.2,0.1,0.05 --seed 7
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
import sklearn  # noqa: E402
from sklearn.exceptions import ConvergenceWarning  # noqa: E402
from sklearn.linear_model import LogisticRegressionCV  # noqa: E402
from sklearn.model_selection import StratifiedKFold  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402


def parse_args(argv):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--x", required=True)
    ap.add_argument("--y", required=True)
    ap.add_argument("--p", type=int, required=True)
    ap.add_argument("--folds", type=int, default=5)
    ap.add_argument("--l1-ratio", type=float, required=True)
    ap.add_argument("--lambdas", required=True)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--mode", choices=["path", "l2-lbfgs"], default="path")
    ap.add_argument("--max-iter", type=int, default=100)
    return ap.parse_args(argv)


def load(args):
    y = np.fromfile(args.y, dtype=np.uint8)
    n = y.size
    x = np.fromfile(args.x, dtype="<f8")
    if x.size != n * args.p:
        sys.exit(f"{args.x}: {x.size} values, expected n*p = {n}*{args.p} = {n * args.p}")
    if not np.all((y == 0) | (y == 1)):
        sys.exit(f"{args.y}: labels must be bytes 0 or 1")
    x = x.reshape(n, args.p)
    sd = x.std(axis=0)
    if np.any(sd == 0):
        sys.exit("a column is constant; cannot standardize")
    return (x - x.mean(axis=0)) / sd, y.astype(np.int64)


def main(argv=None):
    args = parse_args(argv)
    lambdas = [float(v) for v in args.lambdas.split(",") if v.strip()]
    if any(b >= a for a, b in zip(lambdas, lambdas[1:])) or min(lambdas) <= 0:
        sys.exit("--lambdas must be positive and strictly decreasing")
    a = 0.0 if args.mode == "l2-lbfgs" else args.l1_ratio
    if not 0.0 <= a <= 1.0:
        sys.exit("--l1-ratio must be in [0, 1]")
    solver = "saga" if a > 0.0 else "lbfgs"

    x, y = load(args)
    n, p = x.shape
    n_train_fold = n * (args.folds - 1) / args.folds
    cs = [1.0 / (n_train_fold * lam) for lam in lambdas]
    a_for_max = a if a > 0.0 else 0.001
    lambda_max = float(np.abs(x.T @ (y - y.mean())).max() / (n * a_for_max))

    model = LogisticRegressionCV(
        Cs=cs,
        l1_ratios=[a],
        solver=solver,
        cv=StratifiedKFold(args.folds, shuffle=True, random_state=args.seed),
        scoring="roc_auc",
        tol=1e-4,
        max_iter=args.max_iter,
        n_jobs=1,
        refit=True,
        random_state=args.seed,
        use_legacy_attributes=False,
    )
    with threadpool_limits(limits=1), warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ConvergenceWarning)
        start = time.perf_counter()
        model.fit(x, y)
        seconds = time.perf_counter() - start
    convergence = sum(issubclass(w.category, ConvergenceWarning) for w in caught)
    for w in caught:
        if not issubclass(w.category, ConvergenceWarning):
            print(f"warning: {w.category.__name__}: {w.message}", file=sys.stderr)

    # Cs_ keeps the order given, so scores line up with --lambdas.
    assert np.allclose(np.ravel(model.Cs_), cs), "scikit-learn reordered Cs"
    # scores_: (n_folds, n_l1_ratios, n_cs) with use_legacy_attributes=False.
    scores = np.asarray(model.scores_)
    auc_mean = scores.reshape(args.folds, -1, len(cs))[:, 0, :].mean(axis=0)
    best_c = float(np.ravel(model.C_)[0])
    print(json.dumps({
        "n": int(n),
        "p": int(p),
        "folds": args.folds,
        "lambdas": lambdas,
        "l1_ratio": a,
        "solver": solver,
        "seconds": round(seconds, 4),
        "sklearn_version": sklearn.__version__,
        "best_C": best_c,
        "cv_auc_mean_per_lambda": [float(v) for v in auc_mean],
        "best_lambda": 1.0 / (n_train_fold * best_c),
        "lambda_max": lambda_max,
        "max_iter": args.max_iter,
        "convergence_warnings": int(convergence),
        "mode": args.mode,
    }))


if __name__ == "__main__":
    main()
