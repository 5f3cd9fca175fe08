"""Reference values for tests/numerics.rs: data sets and scikit-learn fits.

Run from the repository root:  python3 tests/reference/numerics_reference.py
Writes tests/data/numerics/cases.json (data and reference values; committed).
Computed with Python 3.11, numpy 2.4, scipy 1.17, scikit-learn 1.9 (versions recorded
in the file). The tests do not need Python.

Conventions of outcore (DESIGN §4): the objective is the mean weighted loss plus
ridge/2 ‖β‖² (intercept not penalized). With --no-standardize the penalty is on the raw
coefficients, which is scikit-learn's LogisticRegression(C = 1 / (n · ridge)) with the
lbfgs solver (it does not penalize the intercept).
"""

import json
import platform

import numpy as np
import scipy
import sklearn
from sklearn.linear_model import LogisticRegression


def logit_fit(X, y, C=None):
    kw = dict(C=np.inf) if C is None else dict(C=C)
    m = LogisticRegression(solver="lbfgs", tol=1e-12, max_iter=100000, **kw)
    m.fit(X, y)
    return float(m.intercept_[0]), [float(v) for v in m.coef_[0]], m


def mean_log_loss(m, X, y):
    p = m.predict_proba(X)[:, 1]
    p = np.clip(p, 1e-300, 1 - 1e-16)
    return float(-np.mean(y * np.log(p) + (1 - y) * np.log1p(-p)))


rng = np.random.default_rng(20261201)
out = {
    "provenance": "tests/reference/numerics_reference.py",
    "versions": {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "scikit-learn": sklearn.__version__,
    },
}

# 1. Collinear and duplicated columns: c = a + b, d = a.
n = 300
a = rng.normal(size=n)
b = rng.normal(size=n)
c = a + b
d = a.copy()
y = (rng.uniform(size=n) < 1 / (1 + np.exp(-(0.5 + a - b)))).astype(int)
X = np.column_stack([a, b, c, d])
ridge = 0.1
b0, w, m = logit_fit(X, y, C=1 / (n * ridge))
# Unpenalized: the objective at the optimum is that of the model on (a, b) alone.
_, _, reduced = logit_fit(np.column_stack([a, b]), y)
out["collinear"] = {
    "columns": {"a": a.tolist(), "b": b.tolist(), "c": c.tolist(), "d": d.tolist()},
    "y": y.tolist(),
    "ridge": ridge,
    "ridge_intercept": b0,
    "ridge_coefficients": dict(zip("abcd", w)),
    "unpenalized_mean_loss": mean_log_loss(reduced, np.column_stack([a, b]), y),
}

# 2. Columns on wildly different scales: s_j = u_j * scale_j.
n = 400
u = rng.normal(size=(n, 3))
scales = [1e-6, 1.0, 1e8]
eta = 0.3 + u[:, 0] - 0.7 * u[:, 1] + 0.5 * u[:, 2]
y = (rng.uniform(size=n) < 1 / (1 + np.exp(-eta))).astype(int)
b0, w, m = logit_fit(u, y)
out["scales"] = {
    "u": {f"u{j + 1}": u[:, j].tolist() for j in range(3)},
    "scales": scales,
    "y": y.tolist(),
    # The fit on the well-scaled columns, mapped to the scaled ones: β_s = β_u / scale.
    "intercept": b0,
    "coefficients": {f"s{j + 1}": w[j] / scales[j] for j in range(3)},
    "mean_loss": mean_log_loss(m, u, y),
}

# 3. Logistic margins of 1e4: a well-behaved bulk plus rows with |x| = 1e4 on the side
# the bulk predicts (at the optimum their margins are about ±1e4 · β).
n = 300
x = rng.uniform(-1, 1, size=n)
y = (rng.uniform(size=n) < 1 / (1 + np.exp(-(0.2 + 2.0 * x)))).astype(int)
x = np.concatenate([x, [1e4, 2e4, -1e4, -1.5e4]])
y = np.concatenate([y, [1, 1, 0, 0]])
b0, w, m = logit_fit(x[:, None], y)
out["margins_logistic"] = {
    "x": x.tolist(),
    "y": y.tolist(),
    "intercept": b0,
    "coefficient": w[0],
    "max_abs_margin": float(np.max(np.abs(b0 + w[0] * x))),
}

# 4. Softmax margins of 1e4: three classes along x1, x2, plus far rows in each class's
# direction.
n = 450
X = rng.normal(size=(n, 2))
B = np.array([[0.0, 0.0], [1.5, -0.5], [-1.0, 1.2]])
z = X @ B.T + np.array([0.0, 0.2, -0.1])
p = np.exp(z - z.max(axis=1, keepdims=True))
p /= p.sum(axis=1, keepdims=True)
cls = np.array([rng.choice(3, p=row) for row in p])
far = np.array([[1e4, -1e4], [-1e4, 1e4], [2e4, -5e3], [-5e3, 1.5e4]])
far_cls = np.argmax(far @ B.T, axis=1)
X = np.vstack([X, far])
cls = np.concatenate([cls, far_cls])
m = LogisticRegression(C=np.inf, solver="lbfgs", tol=1e-12, max_iter=100000)
m.fit(X, cls)
names = ["k0", "k1", "k2"]
# Relative to class k0 (outcore's unpenalized softmax makes the first class the
# reference).
out["margins_softmax"] = {
    "x1": X[:, 0].tolist(),
    "x2": X[:, 1].tolist(),
    "cls": [names[k] for k in cls],
    "intercept_vs_first": [float(m.intercept_[k] - m.intercept_[0]) for k in range(3)],
    "coefficients_vs_first": [
        [float(m.coef_[k, j] - m.coef_[0, j]) for j in range(2)] for k in range(3)
    ],
    "max_abs_margin": float(np.max(np.abs(X @ (m.coef_ - m.coef_[0]).T))),
}

with open("tests/data/numerics/cases.json", "w") as f:
    json.dump(out, f, indent=1)
    f.write("\n")
print({k: v for k, v in out.items() if k in ("versions",)})
print("collinear ridge", out["collinear"]["ridge_coefficients"])
print("scales", out["scales"]["coefficients"])
print("margins", out["margins_logistic"]["coefficient"], out["margins_logistic"]["max_abs_margin"])
print("softmax", out["margins_softmax"]["coefficients_vs_first"], out["margins_softmax"]["max_abs_margin"])
