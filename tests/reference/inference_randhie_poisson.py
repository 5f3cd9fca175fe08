"""Reference standard errors for the unpenalized Poisson fit of the RAND HIE data.

Reads tests/data/reference/randhie_poisson_l2/data.parquet (the statsmodels `randhie`
data, `mdvis` renamed to `y`; provenance in that case's expected.json), fits the
unpenalized Poisson GLM with log link and intercept by statsmodels' IRLS to a tight
tolerance, and writes the estimates, standard errors (sqrt of the diagonal of the
inverse Fisher information, scale 1), z statistics, two-sided p-values and 95% Wald
intervals to tests/data/inference/randhie_poisson_unpenalized.json.

A cross-check recomputes the standard errors with numpy from X' diag(mu) X at the
statsmodels optimum; the largest relative difference is stored.

Run from the crate root:  python3 tests/reference/inference_randhie_poisson.py
(needs numpy, scipy, statsmodels, pyarrow, pandas)
"""

import json
import platform
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow
import pyarrow.parquet as pq
import scipy
import statsmodels
import statsmodels.api as sm

ROOT = Path(__file__).resolve().parents[2]
DATA = ROOT / "tests/data/reference/randhie_poisson_l2/data.parquet"
OUT = ROOT / "tests/data/inference/randhie_poisson_unpenalized.json"
FEATURES = ["lncoins", "idp", "lpi", "fmde", "physlm", "disea", "hlthg", "hlthf", "hlthp"]


def main():
    df = pq.read_table(DATA).to_pandas()
    X = sm.add_constant(df[FEATURES].to_numpy(dtype=np.float64), prepend=True)
    y = df["y"].to_numpy(dtype=np.float64)
    res = sm.GLM(y, X, family=sm.families.Poisson()).fit(tol=1e-14, maxiter=200)
    params = np.asarray(res.params)
    bse = np.asarray(res.bse)
    z = np.asarray(res.tvalues)
    p = np.asarray(res.pvalues)
    ci = np.asarray(res.conf_int(alpha=0.05))

    mu = np.exp(X @ params)
    info = X.T @ (mu[:, None] * X)
    se_numpy = np.sqrt(np.diag(np.linalg.inv(info)))
    cross = float(np.max(np.abs(se_numpy - bse) / bse))
    grad = X.T @ (mu - y)

    names = ["intercept"] + FEATURES

    def entry(k):
        return {
            "estimate": float(params[k]),
            "se": float(bse[k]),
            "stat": float(z[k]),
            "p": float(p[k]),
            "low": float(ci[k, 0]),
            "high": float(ci[k, 1]),
        }

    out = {
        "case": "randhie_poisson_unpenalized",
        "title": "RAND HIE Poisson GLM (log link, intercept) without penalty: Wald table",
        "data_file": "tests/data/reference/randhie_poisson_l2/data.parquet",
        "label_column": "y",
        "feature_columns": FEATURES,
        "weight_column": None,
        "n_rows": int(len(y)),
        "statistic": "z",
        "level": 0.95,
        "expected": {
            "intercept": entry(0),
            "coefficients": {names[k]: entry(k) for k in range(1, len(names))},
        },
        "definition": "statsmodels GLM(family=Poisson()) .bse = sqrt(diag((X' diag(mu) X)^-1)) "
        "with X = [1, features] at the MLE, scale 1; .tvalues (z), .pvalues (two-sided normal), "
        ".conf_int(alpha=0.05) (Wald, normal quantile)",
        "tolerance": {"se": {"rel": 1e-5}, "estimate": {"rel": 1e-5, "abs": 1e-7}},
        "provenance": {
            "dataset": "statsmodels randhie (see tests/data/reference/randhie_poisson_l2/expected.json provenance.dataset)",
            "computed_by": "tests/reference/inference_randhie_poisson.py: statsmodels GLM IRLS, tol 1e-14",
            "iterations": int(res.fit_history["iteration"]),
            "max_abs_gradient_summed_loss_at_reference": float(np.max(np.abs(grad))),
            "cross_check": {
                "method": "numpy: sqrt(diag(inv(X' diag(mu) X))) at the statsmodels optimum",
                "max_rel_difference_se": cross,
            },
            "versions": {
                "python": platform.python_version(),
                "numpy": np.__version__,
                "scipy": scipy.__version__,
                "pandas": pd.__version__,
                "pyarrow": pyarrow.__version__,
                "statsmodels": statsmodels.__version__,
            },
            "recalled_from_memory": False,
        },
    }
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps(out, indent=2) + "\n")
    print(f"wrote {OUT}; cross-check max rel SE difference {cross:.2e}")


if __name__ == "__main__":
    main()
