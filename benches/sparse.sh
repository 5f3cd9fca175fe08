#!/usr/bin/env bash
# Sparse benchmark (issue 5): hashed fit of an invented log with 8 categorical columns
# (cardinalities 10 ... 1e6) and 2 crosses into 2^BITS buckets, logistic, tol 1e-6,
# 2 threads; then, side by side in the same run, outcore and scipy.sparse + L-BFGS-B
# (benches/sparse_scipy.py) on the first SCIPY_ROWS rows of the same data.
#
#   benches/sparse.sh                 # 10M rows, 2^22 buckets, scipy on 2M rows
#   SCALE=small benches/sparse.sh     # 400k rows, 2^18 buckets, scipy on 200k rows
#
# Knobs: ROWS, SCIPY_ROWS, BITS, RIDGE, HISTORY, THREADS, DIR (data; deleted at the end
# unless KEEP=1). Needs python3 with numpy, scipy, pyarrow and xxhash. Peak memory:
# "Maximum resident set size" of /usr/bin/time -v (it counts the mapped block-cache pages,
# which the kernel can drop) and the peak anonymous memory the fit reports in --json
# (what the fit itself holds). Each run writes its run directory (checkpoints, block
# cache) beside its model in DIR.
set -euo pipefail
cd "$(dirname "$0")/.."
if [ "${SCALE:-full}" = small ]; then
  rows=${ROWS:-400000}; scipy_rows=${SCIPY_ROWS:-200000}; bits=${BITS:-18}; per_file=100000
else
  rows=${ROWS:-10000000}; scipy_rows=${SCIPY_ROWS:-2000000}; bits=${BITS:-22}; per_file=1000000
fi
ridge=${RIDGE:-1e-4}
history=${HISTORY:-5}
threads=${THREADS:-2}
dir=${DIR:-/tmp/sparse-bench}
mkdir -p "$dir"
nice cargo build --release --quiet
bin=target/release/outcore
if [ ! -f "$dir/data/part-00000.parquet" ]; then
  python3 benches/sparse_data.py --rows "$rows" --out "$dir/data" --per-file "$per_file"
fi
files=$(ls "$dir"/data/part-*.parquet)
nfiles=$(( (scipy_rows + per_file - 1) / per_file ))
subset=$(ls "$dir"/data/part-*.parquet | head -n "$nfiles")
flags=(--target y --categorical c0,c1,c2,c3,c4,c5,c6,c7 --cross 'c0*c3' --cross 'c1*c4'
  --hash-bits "$bits" --ridge "$ridge" --tol 1e-6 --history "$history" --threads "$threads")

run_ours() { # name, files...
  local name=$1; shift
  local load; load=$(uptime | sed 's/.*load average: //')
  /usr/bin/time -v "$bin" fit --data "$@" "${flags[@]}" --out "$dir/$name.json" --quiet \
    --json >"$dir/$name.out" 2>"$dir/$name.time" || true
  python3 - "$dir/$name" "$load" <<'PY'
import json, re, sys
base, load = sys.argv[1], sys.argv[2]
t = open(base + ".time").read()
m = json.load(open(base + ".json"))
f = m["fit"]
rss = int(re.search(r"Maximum resident set size \(kbytes\): (\d+)", t).group(1))
wall = re.search(r"Elapsed \(wall clock\) time.*: (.*)", t).group(1)
out = json.loads(open(base + ".out").read())
anon = (out.get("memory") or {}).get("peak_anonymous_bytes") or 0
cache = (out.get("cache") or {}).get("mode", "?")
json.dump({"rows": f["rows"], "stop": f["stop"], "passes": f["passes"], "seconds": f["seconds"],
           "seconds_per_pass": f["seconds"] / f["passes"], "objective": f["objective"],
           "peak_rss_mb": rss / 1024, "peak_anon_mb": anon / 2**20, "cache": cache,
           "wall": wall, "nonzero": m["hashed"]["nonzero"],
           "uptime_load": load}, open(base + ".summary", "w"))
PY
}

run_ours full $files
cp "$dir/full.run/log.jsonl" "$dir/full.log.jsonl" 2>/dev/null || true
run_ours side $subset
load=$(uptime | sed 's/.*load average: //')
/usr/bin/time -v python3 benches/sparse_scipy.py --data $subset --bits "$bits" --ridge "$ridge" \
  --tol 1e-6 --history "$history" >"$dir/scipy.out" 2>"$dir/scipy.time"
python3 - "$dir" "$load" "$rows" "$scipy_rows" "$bits" "$ridge" "$history" "$threads" <<'PY'
import json, re, sys
d, load, rows, srows, bits, ridge, history, threads = sys.argv[1:]
full = json.load(open(d + "/full.summary"))
side = json.load(open(d + "/side.summary"))
sc = json.loads(open(d + "/scipy.out").read().strip().splitlines()[-1])
t = open(d + "/scipy.time").read()
sc_rss = int(re.search(r"Maximum resident set size \(kbytes\): (\d+)", t).group(1)) / 1024
print(f"sparse benchmark: 2^{bits} buckets, ridge {ridge}, tol 1e-6, history {history}, {threads} threads")
print(f"| run | rows | stop | passes | s/pass | seconds | objective | peak RSS MB | peak anonymous MB | load (1/5/15 min) |")
print(f"|---|---|---|---|---|---|---|---|---|---|")
for name, r in [("outcore, all rows", full), ("outcore, side by side", side)]:
    print(f"| {name} ({r['cache']}) | {r['rows']} | {r['stop']} | {r['passes']} | {r['seconds_per_pass']:.3f} | "
          f"{r['seconds']:.1f} | {r['objective']:.10f} | {r['peak_rss_mb']:.0f} | {r['peak_anon_mb']:.0f} | {r['uptime_load']} |")
total = sc["seconds_build"] + sc["seconds_fit"]
print(f"| scipy L-BFGS-B, side by side | {sc['rows']} | {sc['message'][:30]} | {sc['evaluations']} evals | "
      f"{sc['seconds_fit'] / max(1, sc['evaluations']):.3f} | {sc['seconds_fit']:.1f} fit + {sc['seconds_build']:.1f} build | "
      f"{sc['objective']:.10f} | {sc_rss:.0f} | | {load} |")
rel = abs(side["objective"] - sc["objective"]) / abs(sc["objective"])
print(f"wall ratio outcore / scipy (fit only): {side['seconds'] / sc['seconds_fit']:.2f}; "
      f"(scipy build + fit): {side['seconds'] / total:.2f}; objective relative difference {rel:.2e}")
PY
[ "${KEEP:-0}" = 1 ] || rm -rf "$dir"
