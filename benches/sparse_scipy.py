"""scipy.sparse + L-BFGS-B on the hashed design of the sparse benchmark.

Reads the Parquet files given, builds the same hashed CSR design as
`outcore fit --categorical c0,...,c7 --cross c0*c3 --cross c1*c4 --hash-bits B` (XXH3-64
from python-xxhash, seed = XXH3-64 of the feature name, bucket = low bits, sign = top
bit, cross parts joined by 0xFE; see src/features/hashing.rs), and minimizes the same
objective (mean logistic loss + ridge/2 · ‖w‖², intercept not penalized) with
scipy.optimize.minimize(method="L-BFGS-B", jac=True, maxcor=HISTORY, gtol=TOL, ftol=0).
Prints one JSON line: rows, objective, seconds to build the design, seconds to fit,
evaluations, iterations.
"""

import argparse
import json
import time

import numpy as np
import pyarrow.parquet as pq
import scipy.sparse as sp
import xxhash
from scipy.optimize import minimize


def texts(col):
    """(codes, list of value bytes) of a column: integers and dictionary strings."""
    import pyarrow as pa

    col = col.combine_chunks() if hasattr(col, "combine_chunks") else col
    if pa.types.is_dictionary(col.type):
        codes = col.indices.to_numpy(zero_copy_only=False).astype(np.int64)
        values = [v.encode() for v in col.dictionary.to_pylist()]
        return codes, values
    arr = col.to_numpy(zero_copy_only=False).astype(np.int64)
    uniq, codes = np.unique(arr, return_inverse=True)
    return codes.astype(np.int64), [str(int(v)).encode() for v in uniq]


def locate(name, values, bits):
    seed = xxhash.xxh3_64_intdigest(name.encode(), seed=0)
    h = np.array([xxhash.xxh3_64_intdigest(v, seed=seed) for v in values], dtype=np.uint64)
    bucket = (h & np.uint64((1 << bits) - 1)).astype(np.int64)
    sign = np.where(h >> np.uint64(63) == 1, -1.0, 1.0)
    return bucket, sign


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--data", nargs="+", required=True)
    ap.add_argument("--bits", type=int, default=22)
    ap.add_argument("--ridge", type=float, required=True)
    ap.add_argument("--tol", type=float, default=1e-6)
    ap.add_argument("--history", type=int, default=10)
    a = ap.parse_args()
    t0 = time.perf_counter()
    table = pq.read_table(a.data) if len(a.data) > 1 else pq.read_table(a.data[0])
    from pyarrow import concat_tables

    n = table.num_rows
    y = table.column("y").to_numpy().astype(float)
    cols = {f"c{k}": texts(table.column(f"c{k}")) for k in range(8)}
    rows_idx, cols_idx, vals = [], [], []
    ar = np.arange(n)
    feats = []
    for k in range(8):
        codes, values = cols[f"c{k}"]
        b, s = locate(f"c{k}", values, a.bits)
        feats.append((b[codes], s[codes]))
    for (p, q) in [(0, 3), (1, 4)]:
        cp, vp = cols[f"c{p}"]
        cq, vq = cols[f"c{q}"]
        key = cp * (len(vq) + 1) + cq
        uniq, inv = np.unique(key, return_inverse=True)
        values = [vp[u // (len(vq) + 1)] + b"\xfe" + vq[u % (len(vq) + 1)] for u in uniq]
        b, s = locate(f"c{p}*c{q}", values, a.bits)
        feats.append((b[inv], s[inv]))
    dim = 1 + (1 << a.bits)
    rows_idx = np.concatenate([ar] + [ar] * len(feats))
    cols_idx = np.concatenate([np.zeros(n, np.int64)] + [1 + b for b, _ in feats])
    vals = np.concatenate([np.ones(n)] + [s for _, s in feats])
    X = sp.csr_matrix((vals, (rows_idx, cols_idx)), shape=(n, dim))
    XT = X.T.tocsr()
    t1 = time.perf_counter()
    evals = [0]

    def f(w):
        evals[0] += 1
        z = X @ w
        loss = np.mean(np.logaddexp(0.0, z) - y * z)
        r = (0.5 * (1 + np.tanh(0.5 * z)) - y) / n
        g = XT @ r
        g[1:] += a.ridge * w[1:]
        return loss + 0.5 * a.ridge * np.dot(w[1:], w[1:]), g

    w0 = np.zeros(dim)
    p = y.mean()
    w0[0] = np.log(p / (1 - p))
    res = minimize(
        f,
        w0,
        jac=True,
        method="L-BFGS-B",
        options={"maxcor": a.history, "gtol": a.tol, "ftol": 0.0, "maxiter": 100000, "maxfun": 100000},
    )
    t2 = time.perf_counter()
    print(
        json.dumps(
            {
                "rows": n,
                "objective": float(res.fun),
                "gradient_max": float(np.max(np.abs(res.jac))),
                "seconds_build": t1 - t0,
                "seconds_fit": t2 - t1,
                "evaluations": evals[0],
                "iterations": int(res.nit),
                "message": str(res.message),
            }
        )
    )


if __name__ == "__main__":
    main()
