#!/usr/bin/env python3
"""Reference solutions for the optimizer's lasso and elastic-net checks.

Generates a small least-squares problem (40 rows, 8 features, fixed seed) and solves it
with scikit-learn's coordinate descent at a very tight tolerance. Writes
tests/data/optim/lasso_reference.json, read by tests/optim.rs.

scikit-learn's objectives (fit_intercept=True: the intercept is not penalized):
    Lasso:      (1/(2n)) ||y - Xw - b||^2 + alpha ||w||_1
    ElasticNet: (1/(2n)) ||y - Xw - b||^2 + alpha*l1_ratio ||w||_1
                + (alpha*(1-l1_ratio)/2) ||w||^2

Usage: python3 tests/reference/optim_lasso_reference.py
"""
import json
import os

import numpy as np
import sklearn
from sklearn.linear_model import ElasticNet, Lasso

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(os.path.dirname(HERE), "data", "optim", "lasso_reference.json")

SEED = 20240611
N, P = 40, 8
ALPHA = 0.15
EN_ALPHA, EN_L1_RATIO = 0.2, 0.5


def kkt_residual(X, y, w, b, l1, l2):
    """Largest violation of the subgradient conditions of the objective above."""
    n = len(y)
    r = y - X @ w - b
    g = -(X.T @ r) / n + l2 * w
    gb = -np.sum(r) / n
    viol = abs(gb)
    for j in range(len(w)):
        if w[j] != 0:
            viol = max(viol, abs(g[j] + l1 * np.sign(w[j])))
        else:
            viol = max(viol, max(0.0, abs(g[j]) - l1))
    return viol


def main():
    rng = np.random.default_rng(SEED)
    X = rng.standard_normal((N, P))
    # Correlated columns make the problem less trivial.
    X[:, 1] += 0.5 * X[:, 0]
    X[:, 5] += 0.3 * X[:, 4]
    w_true = np.array([1.5, -2.0, 0.0, 0.0, 0.8, 0.0, 0.05, 0.0])
    y = X @ w_true + 0.7 + 0.5 * rng.standard_normal(N)

    lasso = Lasso(alpha=ALPHA, fit_intercept=True, tol=1e-14, max_iter=1_000_000)
    lasso.fit(X, y)
    en = ElasticNet(
        alpha=EN_ALPHA, l1_ratio=EN_L1_RATIO, fit_intercept=True, tol=1e-14, max_iter=1_000_000
    )
    en.fit(X, y)

    out = {
        "provenance": (
            "tests/reference/optim_lasso_reference.py: numpy default_rng(%d) design, "
            "scikit-learn %s Lasso/ElasticNet(fit_intercept=True, tol=1e-14, max_iter=1e6)"
            % (SEED, sklearn.__version__)
        ),
        "objective": "(1/(2n))||y - Xw - b||^2 + l1 ||w||_1 + (l2/2) ||w||^2, b unpenalized",
        "x": X.tolist(),
        "y": y.tolist(),
        "lasso": {
            "alpha": ALPHA,
            "l1": ALPHA,
            "l2": 0.0,
            "coef": lasso.coef_.tolist(),
            "intercept": float(lasso.intercept_),
            "kkt_residual": kkt_residual(X, y, lasso.coef_, lasso.intercept_, ALPHA, 0.0),
        },
        "elastic_net": {
            "alpha": EN_ALPHA,
            "l1_ratio": EN_L1_RATIO,
            "l1": EN_ALPHA * EN_L1_RATIO,
            "l2": EN_ALPHA * (1 - EN_L1_RATIO),
            "coef": en.coef_.tolist(),
            "intercept": float(en.intercept_),
            "kkt_residual": kkt_residual(
                X, y, en.coef_, en.intercept_, EN_ALPHA * EN_L1_RATIO, EN_ALPHA * (1 - EN_L1_RATIO)
            ),
        },
    }
    with open(OUT, "w") as fh:
        json.dump(out, fh, indent=1)
        fh.write("\n")
    print("lasso coef", lasso.coef_, "intercept", lasso.intercept_, "kkt", out["lasso"]["kkt_residual"])
    print("enet  coef", en.coef_, "intercept", en.intercept_, "kkt", out["elastic_net"]["kkt_residual"])
    print("wrote", OUT)


if __name__ == "__main__":
    main()
