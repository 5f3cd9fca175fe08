#!/usr/bin/env python3
"""The scipy side of benchmark 4 (benches/throughput.sh): the objective of DESIGN §4 for
logistic loss with ridge, on the data of benches/gen_dense.py, minimized by scipy's
L-BFGS-B with a vectorized numpy cost and gradient. Load time (Parquet → numpy) counts.

    python3 tests/reference/throughput_scipy.py DATA.parquet --ridge 1e-4 --tol 1e-6

Objective, matched to outcore's exactly:
    f(b, β) = (1/n) Σ [log(1 + e^{z_i}) − y_i z_i] + ridge/2 ‖β‖²,  z = b + X_std β
with X_std = (X − mean) / std (population std, ddof = 0, as outcore's weighted std with
unit weights) and the intercept b unpenalized.

Tolerance mapping: outcore stops when max|g| ≤ tol · max(1, |f|); for this objective
|f| < 1 (mean logistic loss starts at ≤ log 2), so that is max|g| ≤ tol, which is
L-BFGS-B's `gtol` (max |projected gradient|; no bounds here, so the gradient itself).
`ftol = 0` switches off scipy's relative-reduction stop so both stop on the gradient
alone; `maxcor = 10` is outcore's default history. Start: outcore's null model (the
intercept at the log-odds of the mean label, coefficients 0).

Prints one JSON line: seconds (load + fit), load_seconds, nfev, nit, objective, gradient
max, message.
"""
import argparse
import json
import time

import numpy as np
import pyarrow.parquet as pq
from scipy.optimize import minimize


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("data")
    ap.add_argument("--target", default="y")
    ap.add_argument("--ridge", type=float, default=1e-4)
    ap.add_argument("--tol", type=float, default=1e-6)
    args = ap.parse_args()
    t0 = time.perf_counter()
    table = pq.read_table(args.data)
    names = [c for c in table.column_names if c != args.target]
    y = table.column(args.target).to_numpy().astype(np.float64)
    x = np.empty((table.num_rows, len(names)), dtype=np.float64)
    for j, c in enumerate(names):
        x[:, j] = table.column(c).to_numpy()
    del table
    x -= x.mean(axis=0)
    x /= x.std(axis=0)
    load = time.perf_counter() - t0
    n, p = x.shape
    ridge = args.ridge

    def cost_grad(theta):
        b, beta = theta[0], theta[1:]
        z = b + x @ beta
        # log(1 + e^z) stably, and the sigmoid
        loss = np.logaddexp(0.0, z) - y * z
        r = (0.5 * (1.0 + np.tanh(0.5 * z))) - y
        f = loss.mean() + 0.5 * ridge * beta @ beta
        g = np.empty(p + 1)
        g[0] = r.mean()
        g[1:] = x.T @ r / n + ridge * beta
        return f, g

    ybar = y.mean()
    theta0 = np.zeros(p + 1)
    theta0[0] = np.log(ybar / (1 - ybar))
    res = minimize(
        cost_grad,
        theta0,
        jac=True,
        method="L-BFGS-B",
        options={"maxcor": 10, "gtol": args.tol, "ftol": 0.0, "maxiter": 10000},
    )
    seconds = time.perf_counter() - t0
    print(
        json.dumps(
            {
                "seconds": seconds,
                "load_seconds": load,
                "nfev": int(res.nfev),
                "nit": int(res.nit),
                "objective": float(res.fun),
                "gradient_max": float(np.abs(res.jac).max()),
                "message": str(res.message),
            }
        )
    )


if __name__ == "__main__":
    main()
