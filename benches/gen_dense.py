#!/usr/bin/env python3
"""Dense logistic benchmark data: ROWS rows of FEATURES float features (standard normal,
then shifted and scaled per column) and a 0/1 target `y` drawn from a logistic model with
known coefficients, written as Parquet in row groups, chunk by chunk (bounded memory).

    python3 benches/gen_dense.py --rows 4000000 --features 32 --dtype float64 --out F.parquet

Needs numpy and pyarrow. Seeded: the same arguments give the same file.
"""
import argparse

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, required=True)
    ap.add_argument("--features", type=int, default=32)
    ap.add_argument("--dtype", choices=["float64", "float32"], default="float64")
    ap.add_argument("--out", required=True)
    ap.add_argument("--seed", type=int, default=20261201)
    ap.add_argument("--row-group", type=int, default=262144)
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)
    p = args.features
    beta = rng.normal(0.0, 0.5, p) / np.sqrt(p / 8)
    shift = rng.uniform(-3, 3, p)
    scale = rng.uniform(0.5, 4, p)
    names = [f"x{j:02d}" for j in range(p)]
    schema = pa.schema([(n, args.dtype) for n in names] + [("y", "float64")])
    writer = pq.ParquetWriter(args.out, schema, compression="snappy")
    done = 0
    while done < args.rows:
        n = min(args.row_group, args.rows - done)
        z = rng.standard_normal((n, p))
        margin = -0.4 + z @ beta
        y = (rng.random(n) < 1.0 / (1.0 + np.exp(-margin))).astype(np.float64)
        x = (z * scale + shift).astype(args.dtype)
        cols = [pa.array(x[:, j]) for j in range(p)] + [pa.array(y)]
        writer.write_table(pa.Table.from_arrays(cols, schema=schema), row_group_size=n)
        done += n
    writer.close()


if __name__ == "__main__":
    main()
