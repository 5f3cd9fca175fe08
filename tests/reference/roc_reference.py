"""ROC points of two metrics fixtures, from scikit-learn, for tests/report.rs.

Run from the crate root: python3 tests/reference/roc_reference.py

Reads tests/data/metrics/<case>/predictions.parquet (the scores outcore predict wrote,
see tests/data/metrics/README.md) and writes tests/data/metrics/<case>/roc.json with
sklearn.metrics.roc_curve(y, margin, sample_weight=w, drop_intermediate=False): one point
per distinct score, (0, 0) first. The thresholds are not kept (the test compares the
points only).
"""

import json
import platform
from pathlib import Path

import numpy as np
import pandas as pd
import sklearn
from sklearn.metrics import roc_curve, roc_auc_score

CASES = {
    "logistic_breast_cancer_weighted": "weight",
    "logistic_tied_scores": "w",
}

for case, weight in CASES.items():
    folder = Path("tests/data/metrics") / case
    frame = pd.read_parquet(folder / "predictions.parquet")
    y = frame["y"].to_numpy().astype(float)
    z = frame["margin"].to_numpy()
    w = frame[weight].to_numpy().astype(float)
    fpr, tpr, _ = roc_curve(y, z, sample_weight=w, drop_intermediate=False)
    out = {
        "case": case,
        "function": "sklearn.metrics.roc_curve(y, margin, sample_weight=%s, drop_intermediate=False)" % weight,
        "auc": roc_auc_score(y, z, sample_weight=w),
        "fpr": fpr.tolist(),
        "tpr": tpr.tolist(),
        "provenance": {
            "scores": "predictions.parquet of this folder",
            "python": platform.python_version(),
            "numpy": np.__version__,
            "pandas": pd.__version__,
            "scikit-learn": sklearn.__version__,
        },
    }
    (folder / "roc.json").write_text(json.dumps(out, indent=1) + "\n")
    print(case, len(fpr), "points")
