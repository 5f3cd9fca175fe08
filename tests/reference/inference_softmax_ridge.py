"""Reference coefficient tables for two inference checks of outcore.

1. Unpenalized softmax (reference parametrization, first class the reference):
   invented data (numpy seed 20240611, three classes, three features of unlike scales),
   written to tests/data/inference/softmax3_synthetic.parquet, and statsmodels MNLogit's
   standard errors, z, p-values and 95% intervals -> softmax3_synthetic.json.
2. Ridge-penalized logistic regression on the breast_cancer3 data
   (tests/data/reference/breast_cancer3_logit_unpenalized/data.parquet), standardized
   features (weighted mean, population sd), mean-form objective
   (1/W) sum loss + (ridge/2) ||gamma||^2 with ridge = 0.01, solved by Newton to machine
   precision; covariance conditional on the penalty: inv(Z' diag(p(1-p)) Z + W ridge P)
   (P = identity on the coefficients, 0 on the intercept), mapped to the original scale
   by beta = gamma / s, b = c - sum gamma m / s  ->  breast_cancer3_logit_ridge_conditional.json.

Run from the crate root:  python3 tests/reference/inference_softmax_ridge.py
(needs numpy, scipy, statsmodels, pyarrow, pandas)
"""

import json
import platform
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow
import pyarrow as pa
import pyarrow.parquet as pq
import scipy
import statsmodels
import statsmodels.api as sm
from scipy import stats

ROOT = Path(__file__).resolve().parents[2]
OUT = ROOT / "tests/data/inference"


def versions():
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "pandas": pd.__version__,
        "pyarrow": pyarrow.__version__,
        "statsmodels": statsmodels.__version__,
    }


def entry(est, se, q):
    z = est / se
    return {
        "estimate": float(est),
        "se": float(se),
        "stat": float(z),
        "p": float(2 * stats.norm.sf(abs(z))),
        "low": float(est - q * se),
        "high": float(est + q * se),
    }


def softmax_case():
    rng = np.random.default_rng(20240611)
    n = 600
    x1 = rng.normal(0.0, 1.0, n)
    x2 = rng.normal(50.0, 10.0, n)
    x3 = rng.uniform(0.0, 0.01, n)
    eta1 = -0.3 + 0.8 * x1 + 0.02 * (x2 - 50) + 40.0 * x3
    eta2 = 0.2 - 0.5 * x1 + 0.05 * (x2 - 50) - 30.0 * x3
    logits = np.stack([np.zeros(n), eta1, eta2], axis=1)
    p = np.exp(logits - logits.max(axis=1, keepdims=True))
    p /= p.sum(axis=1, keepdims=True)
    u = rng.uniform(size=n)
    y = (u[:, None] > np.cumsum(p, axis=1)).sum(axis=1).astype(np.int64)
    table = pa.table({"x1": x1, "x2": x2, "x3": x3, "y": y})
    pq.write_table(table, OUT / "softmax3_synthetic.parquet", row_group_size=250)

    X = sm.add_constant(np.stack([x1, x2, x3], axis=1), prepend=True)
    model = sm.MNLogit(y, X)
    res = model.fit(method="newton", tol=1e-12, maxiter=100, disp=False)
    score = float(np.max(np.abs(model.score(np.asarray(res.params).ravel(order="F")))))
    params = np.asarray(res.params)  # (p+1, K-1)
    bse = np.asarray(res.bse)
    zv = np.asarray(res.tvalues)
    pv = np.asarray(res.pvalues)
    names = ["x1", "x2", "x3"]
    q = stats.norm.ppf(0.975)
    by_class = {}
    for k in range(params.shape[1]):
        cls = str(k + 1)
        e = {}
        for j in range(params.shape[0]):
            d = entry(params[j, k], bse[j, k], q)
            # statsmodels' own z and p (equal to the formulas above).
            d["stat"] = float(zv[j, k])
            d["p"] = float(pv[j, k])
            e["intercept" if j == 0 else names[j - 1]] = d
        by_class[cls] = {
            "intercept": e.pop("intercept"),
            "coefficients": e,
        }
    out = {
        "case": "softmax3_synthetic",
        "title": "Unpenalized multinomial logit, first class the reference: Wald table",
        "data_file": "tests/data/inference/softmax3_synthetic.parquet",
        "label_column": "y",
        "feature_columns": names,
        "weight_column": None,
        "n_rows": n,
        "class_counts": {str(c): int((y == c).sum()) for c in range(3)},
        "statistic": "z",
        "reference_class": "0",
        "expected": by_class,
        "definition": "statsmodels MNLogit(y, [1, X]).fit(method='newton', tol=1e-12): "
        ".bse = sqrt(diag(inverse Hessian of the log-likelihood)), .tvalues, .pvalues; "
        "intervals estimate -/+ norm.ppf(0.975) se",
        "tolerance": {"se": {"rel": 1e-5}},
        "provenance": {
            "dataset": "invented by this script (numpy default_rng seed 20240611); no outside data",
            "computed_by": "tests/reference/inference_softmax_ridge.py",
            "converged": bool(res.mle_retvals["converged"]),
            "max_abs_score_summed_loglik_at_reference": score,
            "versions": versions(),
            "recalled_from_memory": False,
        },
    }
    (OUT / "softmax3_synthetic.json").write_text(json.dumps(out, indent=2) + "\n")


def ridge_case():
    data = ROOT / "tests/data/reference/breast_cancer3_logit_unpenalized/data.parquet"
    names = ["mean_radius", "mean_texture", "mean_smoothness"]
    df = pq.read_table(data).to_pandas()
    X = df[names].to_numpy(dtype=np.float64)
    y = df["y"].to_numpy(dtype=np.float64)
    n = len(y)
    W = float(n)
    m = X.mean(axis=0)
    s = X.std(axis=0)  # population sd
    Z = np.column_stack([np.ones(n), (X - m) / s])
    ridge = 0.01
    P = np.diag([0.0, 1.0, 1.0, 1.0])
    theta = np.zeros(4)
    for _ in range(100):
        p = 1 / (1 + np.exp(-(Z @ theta)))
        g = Z.T @ (p - y) / W + ridge * (P @ theta)
        H = Z.T @ (Z * (p * (1 - p))[:, None]) / W + ridge * P
        step = np.linalg.solve(H, g)
        theta -= step
        if np.max(np.abs(step)) < 1e-15:
            break
    p = 1 / (1 + np.exp(-(Z @ theta)))
    grad = Z.T @ (p - y) / W + ridge * (P @ theta)
    info = Z.T @ (Z * (p * (1 - p))[:, None]) + W * ridge * P
    cov = np.linalg.inv(info)
    A = np.zeros((4, 4))
    A[0, 0] = 1.0
    A[0, 1:] = -m / s
    A[1:, 1:] = np.diag(1 / s)
    est = A @ theta
    cov_o = A @ cov @ A.T
    se = np.sqrt(np.diag(cov_o))
    q = stats.norm.ppf(0.975)
    out = {
        "case": "breast_cancer3_logit_ridge_conditional",
        "title": "breast_cancer3 logistic with ridge 0.01 (mean form, standardized): table conditional on the penalty",
        "data_file": "tests/data/reference/breast_cancer3_logit_unpenalized/data.parquet",
        "label_column": "y",
        "feature_columns": names,
        "weight_column": None,
        "ridge_mean_form": ridge,
        "statistic": "z",
        "expected": {
            "intercept": entry(est[0], se[0], q),
            "coefficients": {names[j]: entry(est[j + 1], se[j + 1], q) for j in range(3)},
        },
        "definition": "cov = A inv(Z' diag(p(1-p)) Z + W ridge P) A', Z = [1, (X - m)/s], "
        "m the mean and s the population sd of each column, P = diag(0, 1, 1, 1), "
        "A the map to the original scale; p at the penalized optimum",
        "tolerance": {"se": {"rel": 1e-6}, "estimate": {"rel": 1e-6, "abs": 1e-8}},
        "provenance": {
            "dataset": "breast_cancer3 (see tests/data/reference/breast_cancer3_logit_unpenalized/expected.json provenance)",
            "computed_by": "tests/reference/inference_softmax_ridge.py: numpy Newton on the mean-form objective",
            "max_abs_gradient_mean_form_at_reference": float(np.max(np.abs(grad))),
            "versions": versions(),
            "recalled_from_memory": False,
        },
    }
    (OUT / "breast_cancer3_logit_ridge_conditional.json").write_text(json.dumps(out, indent=2) + "\n")


if __name__ == "__main__":
    OUT.mkdir(parents=True, exist_ok=True)
    softmax_case()
    ridge_case()
    print("wrote", OUT)
