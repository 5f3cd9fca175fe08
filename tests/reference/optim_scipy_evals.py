#!/usr/bin/env python3
"""Evaluation counts of scipy's L-BFGS-B on the Moré–Garbow–Hillstrom test functions.

Source of the functions: J. J. Moré, B. S. Garbow and K. E. Hillstrom (1981), "Testing
unconstrained optimization software", ACM TOMS 7(1), 17-41; the same residual forms and
standard starting points as tests/optim/mgh.rs.

scipy runs with maxcor=10 (10 history pairs, as outcore's default), gtol equal to
outcore's tol for the problem (scipy tests max|g_i| <= gtol; outcore tests
max|g_i| <= tol * max(1, |f|), the same thing once f < 1, which holds near every
minimum in the table), ftol=0 (no stop on relative decrease) and generous maxfun/maxiter.

Usage:
    python3 tests/reference/optim_scipy_evals.py [OURS.json] [--write-fixture]

OURS.json is written by `cargo test --test optim mgh_evaluation_counts` to
target/tmp/optim_mgh_evals.json (the default). The script prints a markdown table with
both counts side by side; with --write-fixture it also stores scipy's counts in
tests/data/optim/scipy_mgh_evals.json, which the Rust test compares against.
"""
import json
import math
import os
import sys

import numpy as np
import scipy
from scipy.optimize import minimize

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))


def rosenbrock(x):
    r = np.array([10 * (x[1] - x[0] ** 2), 1 - x[0]])
    j = np.array([[-20 * x[0], 10.0], [-1.0, 0.0]])
    return r, j


def extended_rosenbrock(x):
    n = len(x)
    r = np.zeros(n)
    j = np.zeros((n, n))
    for k in range(0, n, 2):
        r[k] = 10 * (x[k + 1] - x[k] ** 2)
        j[k, k] = -20 * x[k]
        j[k, k + 1] = 10
        r[k + 1] = 1 - x[k]
        j[k + 1, k] = -1
    return r, j


def powell_singular(x):
    n = len(x)
    r = np.zeros(n)
    j = np.zeros((n, n))
    s5, s10 = math.sqrt(5), math.sqrt(10)
    for k in range(0, n, 4):
        a, b, c, d = x[k : k + 4]
        r[k] = a + 10 * b
        j[k, k], j[k, k + 1] = 1, 10
        r[k + 1] = s5 * (c - d)
        j[k + 1, k + 2], j[k + 1, k + 3] = s5, -s5
        u = b - 2 * c
        r[k + 2] = u * u
        j[k + 2, k + 1], j[k + 2, k + 2] = 2 * u, -4 * u
        v = a - d
        r[k + 3] = s10 * v * v
        j[k + 3, k], j[k + 3, k + 3] = 2 * s10 * v, -2 * s10 * v
    return r, j


def wood(x):
    s90, s10 = math.sqrt(90), math.sqrt(10)
    r = np.array(
        [
            10 * (x[1] - x[0] ** 2),
            1 - x[0],
            s90 * (x[3] - x[2] ** 2),
            1 - x[2],
            s10 * (x[1] + x[3] - 2),
            (x[1] - x[3]) / s10,
        ]
    )
    j = np.zeros((6, 4))
    j[0, 0], j[0, 1] = -20 * x[0], 10
    j[1, 0] = -1
    j[2, 2], j[2, 3] = -2 * s90 * x[2], s90
    j[3, 2] = -1
    j[4, 1], j[4, 3] = s10, s10
    j[5, 1], j[5, 3] = 1 / s10, -1 / s10
    return r, j


def beale(x):
    y = [1.5, 2.25, 2.625]
    r = np.zeros(3)
    j = np.zeros((3, 2))
    for i in range(3):
        p = i + 1
        r[i] = y[i] - x[0] * (1 - x[1] ** p)
        j[i, 0] = -(1 - x[1] ** p)
        j[i, 1] = x[0] * p * x[1] ** (p - 1)
    return r, j


def helical_valley(x):
    if x[0] > 0:
        theta = math.atan(x[1] / x[0]) / (2 * math.pi)
    elif x[0] < 0:
        theta = math.atan(x[1] / x[0]) / (2 * math.pi) + 0.5
    else:
        theta = 0.25 * math.copysign(1.0, x[1])
    rho2 = x[0] ** 2 + x[1] ** 2
    rho = math.sqrt(rho2)
    r = np.array([10 * (x[2] - 10 * theta), 10 * (rho - 1), x[2]])
    j = np.array(
        [
            [100 * x[1] / (2 * math.pi * rho2), -100 * x[0] / (2 * math.pi * rho2), 10],
            [10 * x[0] / rho, 10 * x[1] / rho, 0],
            [0, 0, 1],
        ]
    )
    return r, j


def brown_badly_scaled(x):
    r = np.array([x[0] - 1e6, x[1] - 2e-6, x[0] * x[1] - 2])
    j = np.array([[1, 0], [0, 1], [x[1], x[0]]], dtype=float)
    return r, j


def trigonometric(x):
    n = len(x)
    sc = np.sum(np.cos(x))
    w = np.arange(1, n + 1)
    r = n - sc + w * (1 - np.cos(x)) - np.sin(x)
    j = np.tile(np.sin(x), (n, 1))
    j[np.arange(n), np.arange(n)] += w * np.sin(x) - np.cos(x)
    return r, j


def variably_dimensioned(x):
    n = len(x)
    w = np.arange(1, n + 1)
    s = np.sum(w * (x - 1))
    r = np.concatenate([x - 1, [s, s * s]])
    j = np.vstack([np.eye(n), w, 2 * s * w])
    return r, j


# name, residual function, x0, f*, tol (the same per-problem tol as tests/optim.rs)
PROBLEMS = [
    ("rosenbrock", rosenbrock, [-1.2, 1.0]),
    ("extended_rosenbrock_100", extended_rosenbrock, [-1.2, 1.0] * 50),
    ("powell_singular", powell_singular, [3.0, -1.0, 0.0, 1.0]),
    ("extended_powell_40", powell_singular, [3.0, -1.0, 0.0, 1.0] * 10),
    ("wood", wood, [-3.0, -1.0, -3.0, -1.0]),
    ("beale", beale, [1.0, 1.0]),
    ("helical_valley", helical_valley, [-1.0, 0.0, 0.0]),
    ("brown_badly_scaled", brown_badly_scaled, [1.0, 1.0]),
    ("trigonometric_10", trigonometric, [0.1] * 10),
    ("variably_dimensioned_10", variably_dimensioned, [1 - j / 10 for j in range(1, 11)]),
]

# Gradient tolerances, shared with tests/optim.rs (MGH_TOL there).
TOL = {name: 1e-10 for name, _, _ in PROBLEMS}
TOL["trigonometric_10"] = 1e-8


def fun_and_grad(res):
    def fg(x):
        r, j = res(x)
        return float(r @ r), 2 * (j.T @ r)

    return fg


def run_scipy(name, res, x0):
    out = minimize(
        fun_and_grad(res),
        np.array(x0, dtype=float),
        jac=True,
        method="L-BFGS-B",
        options={
            "maxcor": 10,
            "gtol": TOL[name],
            "ftol": 0.0,
            "maxfun": 20000,
            "maxiter": 20000,
        },
    )
    return {
        "evaluations": int(out.nfev),
        "f": float(out.fun),
        "gradient_max": float(np.max(np.abs(out.jac))),
        "message": str(out.message),
    }


def main():
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    ours_path = args[0] if args else os.path.join(ROOT, "target", "tmp", "optim_mgh_evals.json")
    ours = {}
    if os.path.exists(ours_path):
        with open(ours_path) as fh:
            ours = {row["name"]: row for row in json.load(fh)["problems"]}
    else:
        print(f"(no {ours_path}: run `cargo test --test optim mgh_evaluation_counts` first)\n")

    theirs = {name: run_scipy(name, res, x0) for name, res, x0 in PROBLEMS}

    print(f"scipy {scipy.__version__}, numpy {np.__version__}\n")
    print("| problem | n | tol | outcore evals | scipy L-BFGS-B evals | outcore f | scipy f | outcore stop | scipy message |")
    print("|---|---|---|---|---|---|---|---|---|")
    wins = 0
    for name, _, x0 in PROBLEMS:
        t = theirs[name]
        o = ours.get(name)
        oe = str(o["evaluations"]) if o else "?"
        of = f"{o['f']:.3e}" if o else "?"
        os_ = o["stop"] if o else "?"
        if o and o["evaluations"] <= t["evaluations"]:
            wins += 1
        print(
            f"| {name} | {len(x0)} | {TOL[name]:g} | {oe} | {t['evaluations']} | {of} | {t['f']:.3e} | {os_} | {t['message']} |"
        )
    if ours:
        print(f"\noutcore uses no more evaluations than scipy on {wins} of {len(PROBLEMS)} problems.")

    if "--write-fixture" in sys.argv:
        path = os.path.join(ROOT, "tests", "data", "optim", "scipy_mgh_evals.json")
        with open(path, "w") as fh:
            json.dump(
                {
                    "provenance": "tests/reference/optim_scipy_evals.py --write-fixture; "
                    f"scipy {scipy.__version__} L-BFGS-B, maxcor=10, gtol=tol, ftol=0",
                    "problems": [
                        {"name": name, "tol": TOL[name], **theirs[name]} for name, _, _ in PROBLEMS
                    ],
                },
                fh,
                indent=1,
            )
            fh.write("\n")
        print(f"\nwrote {path}")


if __name__ == "__main__":
    main()
