"""Reference values for the traffic share's live gate: two arms, each judged on its own rows.

Two independent samples (the requests the candidate answered, and those the active model
answered), so the tests are unpaired:

- AUC: each arm's AUC (sklearn.metrics.roc_auc_score) and its variance by Hanley & McNeil
  (1982, "The meaning and use of the area under a receiver operating characteristic (ROC)
  curve", Radiology 143:29-36, equation 2): Q1 = A/(2-A), Q2 = 2A^2/(1+A),
  var = (A(1-A) + (n1-1)(Q1-A^2) + (n0-1)(Q2-A^2)) / (n1 n0), n1 positives, n0 negatives;
  z = (AUC_c - AUC_a - margin) / sqrt(var_c + var_a), one-sided p = scipy.stats.norm.sf(z).
- Numeric labels: each arm's RMSE (sqrt of sklearn.metrics.mean_squared_error) and Welch's
  t-test on the per-row squared errors, one-sided that the active arm's mean squared error is
  the larger: scipy.stats.ttest_ind(sq_active, sq_candidate, equal_var=False,
  alternative="greater"), with the Welch-Satterthwaite degrees of freedom written out too.

Data (public datasets bundled inside scikit-learn, no download):

1-2. sklearn.datasets.load_breast_cancer (569 rows): label = target. Row i (0-based) is in the
     candidate's arm when i % 5 == 1, else in the active model's arm. Candidate output =
     1 - "worst concave points" / max; active output = 1 - "mean texture" / max (a weaker
     score). Case 1 margin 0.0, case 2 margin 0.15 (a p-value away from 0).
3.   sklearn.datasets.load_diabetes (442 rows, unscaled target): candidate's arm i % 4 == 0.
     Candidate prediction = 152.13 + 949.4 * bmi + 500.0 * s5 (scaled features as shipped);
     active prediction = 152.13 + 600.0 * bmi. Margin 0.0.

Library versions are written into the fixture.

Run (from the repository root; the adverse-impact venv plus scikit-learn):
  python3 -m venv target/adverse-impact-venv
  target/adverse-impact-venv/bin/pip install -r tests/reference/adverse_impact_requirements.txt
  OPENBLAS_NUM_THREADS=1 target/adverse-impact-venv/bin/python tests/reference/live_share_reference.py
Writes tests/fixtures/live_share_reference.json.
"""
import json
import math
import pathlib

import numpy as np
import scipy
import sklearn
from scipy.stats import norm, ttest_ind
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.metrics import mean_squared_error, roc_auc_score


def hanley_mcneil_variance(a, n1, n0):
    q1 = a / (2 - a)
    q2 = 2 * a * a / (1 + a)
    return (a * (1 - a) + (n1 - 1) * (q1 - a * a) + (n0 - 1) * (q2 - a * a)) / (n1 * n0)


def auc_arm(outputs, labels):
    auc = float(roc_auc_score(labels, outputs))
    n1 = int(sum(labels))
    n0 = len(labels) - n1
    return {
        "outputs": [float(x) for x in outputs],
        "labels": [float(y) for y in labels],
        "n": len(labels),
        "positives": n1,
        "metric": auc,
        "variance": hanley_mcneil_variance(auc, n1, n0),
    }


def auc_case(name, cand_out, cand_lab, act_out, act_lab, margin):
    c = auc_arm(cand_out, cand_lab)
    a = auc_arm(act_out, act_lab)
    z = (c["metric"] - a["metric"] - margin) / math.sqrt(c["variance"] + a["variance"])
    return {
        "name": name,
        "metric": "auc",
        "margin": margin,
        "candidate": c,
        "active": a,
        "statistic": z,
        "df": None,
        "p_value": float(norm.sf(z)),
    }


def rmse_arm(predictions, targets):
    sq = (np.asarray(predictions) - np.asarray(targets)) ** 2
    return {
        "outputs": [float(x) for x in predictions],
        "labels": [float(y) for y in targets],
        "n": len(targets),
        "positives": None,
        "metric": float(math.sqrt(mean_squared_error(targets, predictions))),
        # The variance of the arm's mean squared error: s^2 / n, s^2 with ddof 1.
        "variance": float(np.var(sq, ddof=1) / len(sq)),
    }, sq


def rmse_case(name, cand_pred, cand_y, act_pred, act_y, margin):
    c, sq_c = rmse_arm(cand_pred, cand_y)
    a, sq_a = rmse_arm(act_pred, act_y)
    result = ttest_ind(sq_a, sq_c, equal_var=False, alternative="greater")
    vc, va = c["variance"], a["variance"]
    df = (vc + va) ** 2 / (vc * vc / (len(sq_c) - 1) + va * va / (len(sq_a) - 1))
    return {
        "name": name,
        "metric": "rmse",
        "margin": margin,
        "candidate": c,
        "active": a,
        "statistic": float(result.statistic),
        "df": float(df),
        "p_value": float(result.pvalue),
    }


def main():
    cancer = load_breast_cancer()
    names = list(cancer.feature_names)
    x = cancer.data
    y = cancer.target.astype(float)
    strong = x[:, names.index("worst concave points")]
    weak = x[:, names.index("mean texture")]
    cand_out = 1.0 - strong / strong.max()
    act_out = 1.0 - weak / weak.max()
    in_cand = np.arange(len(y)) % 5 == 1
    cases = [
        auc_case("breast_cancer_auc", cand_out[in_cand], y[in_cand], act_out[~in_cand], y[~in_cand], 0.0),
        auc_case("breast_cancer_auc_margin", cand_out[in_cand], y[in_cand], act_out[~in_cand], y[~in_cand], 0.15),
    ]

    diabetes = load_diabetes()
    dnames = list(diabetes.feature_names)
    d = diabetes.data
    t = diabetes.target.astype(float)
    bmi = d[:, dnames.index("bmi")]
    s5 = d[:, dnames.index("s5")]
    cand_pred = 152.13 + 949.4 * bmi + 500.0 * s5
    act_pred = 152.13 + 600.0 * bmi
    in_cand = np.arange(len(t)) % 4 == 0
    cases.append(rmse_case("diabetes_rmse", cand_pred[in_cand], t[in_cand], act_pred[~in_cand], t[~in_cand], 0.0))

    out = {
        "source": "tests/reference/live_share_reference.py",
        "versions": {"numpy": np.__version__, "scipy": scipy.__version__, "scikit-learn": sklearn.__version__},
        "cases": cases,
    }
    path = pathlib.Path(__file__).resolve().parents[1] / "fixtures" / "live_share_reference.json"
    path.write_text(json.dumps(out, indent=1) + "\n")
    for c in cases:
        print(c["name"], c["candidate"]["metric"], c["active"]["metric"], c["statistic"], c["p_value"])


if __name__ == "__main__":
    main()
