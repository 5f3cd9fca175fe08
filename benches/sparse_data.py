"""Invented click-style log for the sparse benchmark (benches/sparse.sh).

Rows of 8 categorical columns of cardinalities 10 ... 1e6 (c0..c3 dictionary-encoded
strings, c4..c7 integer ids) with a skewed (power-law) frequency of levels, and a 0/1
target `y` drawn from a logistic model whose per-level effects come from a fixed
function of the level. Files of --per-file rows under --out. Deterministic in --seed.

    python3 benches/sparse_data.py --rows 10000000 --out /tmp/sparse-bench/data
"""

import argparse
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

CARDS = [10, 50, 300, 2000, 10_000, 60_000, 300_000, 1_000_000]
STRING_COLUMNS = 4


def effect(code, k):
    # A fixed, bounded per-level effect (larger for the low-cardinality columns).
    scale = 0.8 / (1 + k) ** 0.5
    return scale * np.sin(code * (1.618 + 0.37 * k) + k)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, required=True)
    ap.add_argument("--out", required=True)
    ap.add_argument("--per-file", type=int, default=1_000_000)
    ap.add_argument("--seed", type=int, default=5)
    a = ap.parse_args()
    os.makedirs(a.out, exist_ok=True)
    rng = np.random.default_rng(a.seed)
    dictionaries = [
        pa.array([f"v{k}_{i}" for i in range(CARDS[k])], pa.string()) for k in range(STRING_COLUMNS)
    ]
    done = 0
    part = 0
    while done < a.rows:
        n = min(a.per_file, a.rows - done)
        codes = [np.minimum((c * rng.random(n) ** 2.5).astype(np.int64), c - 1) for c in CARDS]
        margin = -1.0 + sum(effect(codes[k], k) for k in range(len(CARDS)))
        # Two interactions, matching the crosses of the benchmark (c0*c3, c1*c4).
        margin += 0.3 * np.sin(codes[0] * 7 + codes[3] * 0.11)
        margin += 0.2 * np.cos(codes[1] * 3 + codes[4] * 0.013)
        y = (rng.random(n) < 1 / (1 + np.exp(-margin))).astype(np.int64)
        cols = {}
        for k in range(len(CARDS)):
            if k < STRING_COLUMNS:
                cols[f"c{k}"] = pa.DictionaryArray.from_arrays(
                    pa.array(codes[k].astype(np.int32)), dictionaries[k]
                )
            else:
                cols[f"c{k}"] = pa.array(codes[k])
        cols["y"] = pa.array(y)
        pq.write_table(
            pa.table(cols),
            os.path.join(a.out, f"part-{part:05d}.parquet"),
            row_group_size=256 * 1024,
        )
        done += n
        part += 1
    print(f"wrote {done} rows in {part} files to {a.out}")


if __name__ == "__main__":
    main()
