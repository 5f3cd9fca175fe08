"""Reference for the hashed logistic and softmax fits of tests/sparse.rs.

Writes tests/data/sparse/hashed.parquet (a small invented order log: zone, store, hour,
tags, distance, late, slot) and tests/data/sparse/hashed_expected.json: the objective of
DESIGN §4 (mean logistic loss + ridge/2 · ‖β‖², intercept not penalized; the numeric
column standardized by its mean and population standard deviation) minimized by
scipy.optimize.minimize(method="L-BFGS-B") over a scipy.sparse CSR design built here,
independently of outcore, with the hashing described in src/features/hashing.rs:

- seed of a hashed feature = XXH3-64 (seed 0) of its name ("zone", "zone*hour");
- a value is its UTF-8 text (integers in decimal), a null is the byte 0xFF, the parts
  of a cross are joined by 0xFE, a binned part COL/W is the text of floor(value / W);
- bucket = low `bits` bits of XXH3-64(value bytes, seed), sign = -1 when the top bit is
  set; a token list hashes each token (a null list: one 0xFF entry).

Softmax (tests/data/sparse/hashed_softmax_expected.json): the 3-class target `slot`
(0, 1, 2) on the same hashed design, one coefficient vector per class (intercept,
distance, buckets), mean loss log(sum_k exp z_k) - z_y + ridge/2 times the squared norm
of every non-intercept coefficient of every class, minimized the same way; the
intercepts are unpenalized, so only their differences are determined: they are
reported centred to sum to zero.

XXH3-64 comes from the `xxhash` package (python-xxhash 4.1.0, bindings of the reference
C library). Run: python3 tests/reference/sparse_hashed.py (numpy, scipy, pyarrow, xxhash).
"""

import json
import math
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import scipy
import scipy.sparse as sp
import xxhash
from scipy.optimize import minimize

HERE = os.path.dirname(os.path.abspath(__file__))
DATA = os.path.join(HERE, "..", "data", "sparse")
BITS = 12
RIDGE = 1e-3


def make_data(n=3000, seed=20261201):
    rng = np.random.default_rng(seed)
    zones = ["harbor", "hill", "mill", "quay", "orchard", "fen", "moor", "glen"]
    stores = [f"LF-{i:02d}" for i in range(30)]
    words = ["eggs", "milk", "bread", "kale", "rice", "tea", "figs"]
    zone = [None if rng.random() < 0.03 else zones[rng.integers(8)] for _ in range(n)]
    store = [stores[rng.integers(30)] for _ in range(n)]
    hour = rng.integers(0, 24, size=n).astype(np.int64)
    tags = []
    for _ in range(n):
        r = rng.random()
        if r < 0.05:
            tags.append(None)
        else:
            tags.append([words[k] for k in rng.integers(0, 7, size=rng.integers(0, 4))])
    distance = np.round(rng.gamma(2.0, 1.5, size=n), 2)
    effect_zone = {z: e for z, e in zip(zones, rng.normal(0, 0.6, 8))}
    effect_hour = rng.normal(0, 0.4, 24)
    margin = (
        -0.5
        + 0.3 * (distance - 3.0)
        + np.array([effect_zone.get(z, 0.8) for z in zone])
        + effect_hour[hour]
        + np.array([0.2 * (t is not None and "kale" in t) for t in tags])
    )
    late = (rng.random(n) < 1 / (1 + np.exp(-margin))).astype(np.int64)
    # The class target draws from a stream of its own, so the columns above stay as they
    # were before it was added.
    rng2 = np.random.default_rng(seed + 1)
    zone_effect = {z: rng2.normal(0, 0.7, 3) for z in zones}
    hour_effect = rng2.normal(0, 0.5, (24, 3))
    logits = np.array(
        [
            zone_effect.get(zone[i], np.zeros(3)) + hour_effect[hour[i]]
            + np.array([0.0, 0.25, -0.25]) * (distance[i] - 3.0)
            for i in range(n)
        ]
    )
    p = np.exp(logits - logits.max(axis=1, keepdims=True))
    p /= p.sum(axis=1, keepdims=True)
    u = rng2.random(n)
    slot = (u[:, None] > np.cumsum(p, axis=1)).sum(axis=1).clip(0, 2).astype(np.int64)
    return zone, store, hour, tags, distance, late, slot


def h64(seed, data):
    return xxhash.xxh3_64_intdigest(data, seed=seed)


def text(v):
    if v is None:
        return b"\xff"
    return str(v).encode("utf-8")


def main():
    zone, store, hour, tags, distance, late, slot = make_data()
    n = len(late)
    os.makedirs(DATA, exist_ok=True)
    table = pa.table(
        {
            "zone": pa.array(zone, pa.string()),
            "store": pa.array(store, pa.string()),
            "hour": pa.array(hour, pa.int64()),
            "tags": pa.array(tags, pa.list_(pa.string())),
            "distance": pa.array(distance, pa.float64()),
            "late": pa.array(late, pa.int64()),
            "slot": pa.array(slot, pa.int64()),
        }
    )
    pq.write_table(table, os.path.join(DATA, "hashed.parquet"))

    buckets = 1 << BITS
    mask = buckets - 1
    # Hashed features: (name, function row -> list of value bytes)
    def binned(x, w):
        return str(math.floor(x / w)).encode()

    features = [
        ("zone", lambda i: [text(zone[i])]),
        ("store", lambda i: [text(store[i])]),
        ("hour", lambda i: [text(int(hour[i]))]),
        ("tags", lambda i: [b"\xff"] if tags[i] is None else [t.encode() for t in tags[i]]),
        ("zone*hour", lambda i: [text(zone[i]) + b"\xfe" + text(int(hour[i]))]),
        ("store*distance/2", lambda i: [text(store[i]) + b"\xfe" + binned(distance[i], 2.0)]),
    ]
    rows, cols, vals = [], [], []
    mean = distance.mean()
    std = distance.std()  # population standard deviation (ddof 0)
    for i in range(n):
        rows.append(i)
        cols.append(0)
        vals.append(1.0)
        rows.append(i)
        cols.append(1)
        vals.append((distance[i] - mean) / std)
        for name, values in features:
            seed = h64(0, name.encode())
            for b in values(i):
                h = h64(seed, b)
                rows.append(i)
                cols.append(2 + (h & mask))
                vals.append(-1.0 if h >> 63 else 1.0)
    X = sp.csr_matrix((vals, (rows, cols)), shape=(n, 2 + buckets))  # duplicates summed
    y = late.astype(float)

    def f(w):
        z = X @ w
        loss = np.mean(np.logaddexp(0.0, z) - y * z)
        pen = 0.5 * RIDGE * np.dot(w[1:], w[1:])
        r = (1 / (1 + np.exp(-z)) - y) / n
        g = X.T @ r
        g[1:] += RIDGE * w[1:]
        return loss + pen, g

    res = minimize(
        f,
        np.zeros(2 + buckets),
        jac=True,
        method="L-BFGS-B",
        options={"maxiter": 20000, "maxcor": 20, "gtol": 1e-13, "ftol": 1e-16},
    )
    w = res.x
    out = {
        "source": "tests/reference/sparse_hashed.py: scipy.optimize.minimize L-BFGS-B on a scipy.sparse CSR design",
        "scipy": scipy.__version__,
        "xxhash": xxhash.VERSION,
        "bits": BITS,
        "ridge": RIDGE,
        "objective": float(res.fun),
        "gradient_max": float(np.max(np.abs(res.jac))),
        "intercept": float(w[0]),
        "distance": float(w[1]),
        "nonzero_buckets": int(np.count_nonzero(w[2:])),
        "weights_sample": {str(k): float(w[2 + k]) for k in np.flatnonzero(w[2:])[:20]},
        "message": str(res.message),
    }
    with open(os.path.join(DATA, "hashed_expected.json"), "w") as fh:
        json.dump(out, fh, indent=2)
        fh.write("\n")
    print(json.dumps({k: out[k] for k in ("objective", "gradient_max", "nonzero_buckets", "message")}))
    softmax(X, slot, buckets)


def softmax(X, slot, buckets):
    n, d = X.shape
    K = 3
    Y = np.zeros((n, K))
    Y[np.arange(n), slot] = 1.0

    def f(w):
        W = w.reshape(K, d)
        Z = np.asarray(X @ W.T)
        m = Z.max(axis=1, keepdims=True)
        lse = m[:, 0] + np.log(np.exp(Z - m).sum(axis=1))
        loss = np.mean(lse - Z[np.arange(n), slot])
        P = np.exp(Z - lse[:, None])
        G = np.asarray(X.T @ ((P - Y) / n)).T
        pen = 0.5 * RIDGE * np.sum(W[:, 1:] ** 2)
        G[:, 1:] += RIDGE * W[:, 1:]
        return loss + pen, G.ravel()

    res = minimize(
        f,
        np.zeros(K * d),
        jac=True,
        method="L-BFGS-B",
        options={"maxiter": 20000, "maxcor": 20, "gtol": 1e-13, "ftol": 1e-16},
    )
    W = res.x.reshape(K, d)
    b = W[:, 0] - W[:, 0].mean()
    sample = {}
    for k in range(K):
        nz = np.flatnonzero(W[k, 2:])
        sample[str(k)] = {str(j): float(W[k, 2 + j]) for j in nz[:10]}
    out = {
        "source": "tests/reference/sparse_hashed.py: scipy.optimize.minimize L-BFGS-B, softmax over the same scipy.sparse CSR design",
        "scipy": scipy.__version__,
        "xxhash": xxhash.VERSION,
        "bits": BITS,
        "ridge": RIDGE,
        "classes": [str(k) for k in range(K)],
        "objective": float(res.fun),
        "gradient_max": float(np.max(np.abs(res.jac))),
        "intercepts_centred": [float(v) for v in b],
        "distance": [float(W[k, 1]) for k in range(K)],
        "nonzero_buckets": int(np.count_nonzero(W[:, 2:])),
        "weights_sample": sample,
        "message": str(res.message),
    }
    with open(os.path.join(DATA, "hashed_softmax_expected.json"), "w") as fh:
        json.dump(out, fh, indent=2)
        fh.write("\n")
    print(json.dumps({k: out[k] for k in ("objective", "gradient_max", "nonzero_buckets", "message")}))


if __name__ == "__main__":
    main()
