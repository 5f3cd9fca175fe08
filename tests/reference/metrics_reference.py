#!/usr/bin/env python3
"""Reference values for `outcore evaluate` (tests/evaluate.rs), from scikit-learn.

For every case this script

1. writes the case's data to tests/data/metrics/<case>/data.parquet (a copy of a
   reference fixture from tests/data/reference/, sometimes with a few columns changed or
   added as the case says, or seeded synthetic data);
2. fits a model on it with `outcore fit` -> model.json;
3. scores the data with `outcore predict` -> predictions.parquet (margins/probabilities
   beside the target and weight columns);
4. computes the metrics with scikit-learn from those predictions (the SAME scores
   `outcore evaluate` will compute from the same model and data) and writes
   expected.json with the library versions.

The test then runs `outcore evaluate` on model.json + data.parquet and compares with
expected.json; it also checks that `outcore predict` still reproduces
predictions.parquet, so that a drift in scoring is told apart from a metric error.

AUC is computed by scikit-learn on the margin (log-odds) column: the AUC depends on the
order of the scores only, and the margin keeps the order of rows whose probabilities
round to the same double near 0 or 1.

Run from the crate root (Python 3.11, numpy, scipy, scikit-learn, pyarrow, pandas):

    cargo build && python3 tests/reference/metrics_reference.py [--outcore target/debug/outcore]

Re-running it refits the models; the committed files are what the test checks.
"""

import argparse
import json
import platform
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import scipy
import sklearn
from sklearn.metrics import (
    accuracy_score,
    brier_score_loss,
    confusion_matrix,
    log_loss,
    mean_absolute_error,
    mean_poisson_deviance,
    mean_squared_error,
    r2_score,
    roc_auc_score,
)

ROOT = Path(__file__).resolve().parents[2]
REFERENCE = ROOT / "tests" / "data" / "reference"
OUT = ROOT / "tests" / "data" / "metrics"


def reference_table(case):
    return pq.read_table(REFERENCE / case / "data.parquet").to_pandas()


def reference_provenance(case):
    e = json.loads((REFERENCE / case / "expected.json").read_text())
    return {
        "source_case": f"tests/data/reference/{case}",
        "title": e.get("title"),
        "dataset": (e.get("provenance") or {}).get("dataset"),
        "see": "tests/data/reference/README.md (datasets, terms, citations)",
    }


def case_breast_cancer():
    df = reference_table("breast_cancer_logit_l2_1")
    return df, ["--loss", "logistic", "--ridge", "0.01"], reference_provenance(
        "breast_cancer_logit_l2_1"
    ), "unchanged copy"


def case_breast_cancer_weighted():
    df = reference_table("breast_cancer3_logit_freq_weights")
    return (
        df,
        ["--loss", "logistic", "--weight", "weight", "--ridge", "0.001"],
        reference_provenance("breast_cancer3_logit_freq_weights"),
        "unchanged copy (integer frequency weights in 'weight')",
    )


def case_synthetic_logistic():
    rng = np.random.default_rng(20240611)
    n = 4000
    x = rng.normal(size=(n, 3))
    z = -0.4 + x @ np.array([1.2, -0.7, 0.3])
    y = (rng.random(n) < 1 / (1 + np.exp(-z))).astype(np.int64)
    df = pd.DataFrame({"x0": x[:, 0], "x1": x[:, 1], "x2": x[:, 2], "y": y})
    return df, ["--loss", "logistic"], {
        "source": "synthetic, numpy default_rng(20240611), written by this script"
    }, "4000 rows, 3 normal features, logistic labels"


def case_tied_scores():
    # Two discrete features: only 8 distinct scores, so the AUC is all about ties.
    rng = np.random.default_rng(7)
    n = 3000
    a = rng.integers(0, 4, size=n).astype(np.float64)
    b = rng.integers(0, 2, size=n).astype(np.float64)
    z = -1.0 + 0.5 * a - 0.8 * b
    y = (rng.random(n) < 1 / (1 + np.exp(-z))).astype(np.int64)
    w = rng.integers(0, 4, size=n).astype(np.float64)  # zero weights included
    df = pd.DataFrame({"a": a, "b": b, "y": y, "w": w})
    return df, ["--loss", "logistic", "--weight", "w", "--ridge", "0.001"], {
        "source": "synthetic, numpy default_rng(7), written by this script"
    }, "3000 rows, two discrete features (8 distinct scores), weights 0..3"


def case_iris_weighted():
    df = reference_table("iris_multinomial_l2")
    names = np.array(["setosa", "versicolor", "virginica"])
    df["y"] = names[df["y"].to_numpy()]
    df["w"] = (np.arange(len(df)) % 3 + 1).astype(np.float64)
    return (
        df,
        ["--loss", "softmax", "--weight", "w", "--ridge", "0.01"],
        reference_provenance("iris_multinomial_l2"),
        "labels 0/1/2 renamed setosa/versicolor/virginica; weight w = 1 + row % 3 added",
    )


def case_diabetes():
    df = reference_table("diabetes_linear_l1")
    return df, ["--loss", "squared", "--ridge", "0.001"], reference_provenance(
        "diabetes_linear_l1"
    ), "unchanged copy"


def case_diabetes_weighted():
    df = reference_table("diabetes_linear_l1")
    df["w"] = (np.arange(len(df)) % 4 + 1).astype(np.float64) * 0.5
    return (
        df,
        ["--loss", "squared", "--weight", "w"],
        reference_provenance("diabetes_linear_l1"),
        "weight w = 0.5 * (1 + row % 4) added",
    )


def case_randhie():
    df = reference_table("randhie_poisson_l2").iloc[:3000].reset_index(drop=True)
    df["w"] = (np.arange(len(df)) % 3 + 1).astype(np.float64)
    return (
        df,
        ["--loss", "poisson", "--weight", "w", "--ridge", "0.001"],
        reference_provenance("randhie_poisson_l2"),
        "first 3000 rows; weight w = 1 + row % 3 added",
    )


CASES = {
    "logistic_breast_cancer": case_breast_cancer,
    "logistic_breast_cancer_weighted": case_breast_cancer_weighted,
    "logistic_synthetic": case_synthetic_logistic,
    "logistic_tied_scores": case_tied_scores,
    "softmax_iris_weighted": case_iris_weighted,
    "squared_diabetes": case_diabetes,
    "squared_diabetes_weighted": case_diabetes_weighted,
    "poisson_randhie_weighted": case_randhie,
}


def flag(args, name):
    return args[args.index(name) + 1] if name in args else None


def run(cmd):
    r = subprocess.run(cmd, capture_output=True, text=True)
    if r.returncode != 0:
        sys.exit(f"{' '.join(map(str, cmd))} failed ({r.returncode}):\n{r.stderr}")
    return r


def metrics(loss, pred, y, w):
    out = {}
    if loss == "logistic":
        z = pred["margin"].to_numpy()
        p = pred["probability"].to_numpy()
        y = y.astype(np.int64)
        out["log_loss"] = log_loss(y, p, sample_weight=w, labels=[0, 1])
        out["auc"] = roc_auc_score(y, z, sample_weight=w)
        out["accuracy"] = accuracy_score(y, (p >= 0.5).astype(np.int64), sample_weight=w)
        out["brier"] = brier_score_loss(y, p, sample_weight=w)
        # Cross-check of the log-loss from the margins (no clipping, no 1 - p).
        ww = np.ones_like(z) if w is None else w
        stable = np.sum(ww * (np.logaddexp(0.0, z) - y * z)) / np.sum(ww)
        out["cross_check"] = {"log_loss_from_margins": stable}
    elif loss == "softmax":
        classes = [c[len("probability_"):] for c in pred.columns if c.startswith("probability_")]
        probs = pred[[f"probability_{c}" for c in classes]].to_numpy()
        out["classes"] = classes
        out["log_loss"] = log_loss(y, probs, sample_weight=w, labels=classes)
        predicted = pred["predicted_class"].to_numpy()
        out["accuracy"] = accuracy_score(y, predicted, sample_weight=w)
        out["confusion_matrix"] = confusion_matrix(
            y, predicted, labels=classes, sample_weight=w
        ).tolist()
    elif loss == "squared":
        yhat = pred["prediction"].to_numpy()
        out["rmse"] = float(np.sqrt(mean_squared_error(y, yhat, sample_weight=w)))
        out["mse"] = mean_squared_error(y, yhat, sample_weight=w)
        out["mae"] = mean_absolute_error(y, yhat, sample_weight=w)
        out["r2"] = r2_score(y, yhat, sample_weight=w)
    elif loss == "poisson":
        mu = pred["prediction"].to_numpy()
        out["mean_deviance"] = mean_poisson_deviance(y, mu, sample_weight=w)
    return {k: (float(v) if isinstance(v, (np.floating, float)) else v) for k, v in out.items()}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--outcore", default=str(ROOT / "target" / "debug" / "outcore"))
    ap.add_argument("cases", nargs="*", default=list(CASES))
    opts = ap.parse_args()
    versions = {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "scikit-learn": sklearn.__version__,
        "pyarrow": pa.__version__,
        "pandas": pd.__version__,
    }
    for name in opts.cases:
        df, fit_flags, provenance, modification = CASES[name]()
        loss = flag(fit_flags, "--loss")
        weight = flag(fit_flags, "--weight")
        case = OUT / name
        case.mkdir(parents=True, exist_ok=True)
        data = case / "data.parquet"
        pq.write_table(pa.Table.from_pandas(df, preserve_index=False), data)
        with tempfile.TemporaryDirectory() as tmp:
            model = case / "model.json"
            run([opts.outcore, "fit", "--data", data, "--target", "y", *fit_flags,
                 "--out", model, "--run", Path(tmp) / "run", "--quiet"])
            keep = "y" if weight is None else f"y,{weight}"
            scores = case / "predictions.parquet"
            if scores.exists():
                scores.unlink()
            run([opts.outcore, "predict", "--model", model, "--data", data,
                 "--out", scores, "--keep", keep])
        pred = pq.read_table(scores).to_pandas()
        y = pred["y"].to_numpy()
        w = None if weight is None else pred[weight].to_numpy(dtype=np.float64)
        expected = {
            "case": name,
            "loss": loss,
            "rows": int(len(pred)),
            "weight_column": weight,
            "weight_sum": float(len(pred) if w is None else np.sum(w)),
            "fit_flags": fit_flags,
            "metrics": metrics(loss, pred, y, w),
            "provenance": {
                "data": provenance,
                "modification": modification,
                "model": "model.json was fit by `outcore fit` with fit_flags",
                "predictions": "predictions.parquet was written by `outcore predict`",
                "reference_values": "scikit-learn metrics on predictions.parquet (tests/reference/metrics_reference.py)",
                "versions": versions,
            },
        }
        (case / "expected.json").write_text(json.dumps(expected, indent=2) + "\n")
        m = expected["metrics"]
        shown = {k: v for k, v in m.items() if isinstance(v, float)}
        print(f"{name}: {shown}")
        if "cross_check" in m:
            a, b = m["log_loss"], m["cross_check"]["log_loss_from_margins"]
            print(f"  log-loss sklearn vs margins: rel diff {abs(a - b) / abs(b):.2e}")


if __name__ == "__main__":
    main()
