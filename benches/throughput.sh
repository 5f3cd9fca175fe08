#!/usr/bin/env bash
# The throughput benchmarks of the block cache, side by side in one run, with a summary
# table of every ratio against its goal. One command:
#
#     bash benches/throughput.sh              # 4M rows x 32 features (item 4 as asked)
#     SCALE=small bash benches/throughput.sh  # 400k rows, a quick check
#     OOC=1 bash benches/throughput.sh        # also item 5 (1 GB and 8 GB, ~18 GB of disk)
#
# Data go to $WORK (default /tmp/cache-bench) and are deleted at the end (KEEP=1 keeps
# them). Needs python3 with numpy, scipy and pyarrow, and a release build.
set -euo pipefail
cd "$(dirname "$0")/.."
SCALE=${SCALE:-full}
WORK=${WORK:-/tmp/cache-bench}
case "$SCALE" in
  small) ROWS=400000 ;;
  full) ROWS=4000000 ;;
  *) echo "SCALE is small or full" >&2; exit 2 ;;
esac
mkdir -p "$WORK"
cleanup() { if [ "${KEEP:-0}" != 1 ]; then rm -rf "$WORK"; fi; }
trap cleanup EXIT
load() { cut -d' ' -f1-3 /proc/loadavg; }
summary="$WORK/summary.txt"
: > "$summary"
row() { printf '%-58s %12s %8s  load %s\n' "$1" "$2" "$3" "$(load)" | tee -a "$summary"; }

nice cargo build --release --quiet --bin outcore
BIN=target/release/outcore

echo "== data: $ROWS rows x 32 features (float64 and float32)"
python3 benches/gen_dense.py --rows "$ROWS" --features 32 --dtype float64 --out "$WORK/f64.parquet"
python3 benches/gen_dense.py --rows "$ROWS" --features 32 --dtype float32 --out "$WORK/f32.parquet"

for kind in f64 f32; do
  echo "== items 1-3 on $kind data (cargo bench --bench throughput)"
  out=$(OUTCORE_THROUGHPUT_DATA="$WORK/$kind.parquet" OUTCORE_THROUGHPUT_DIR="$WORK" \
        nice cargo bench --quiet --bench throughput 2>/dev/null)
  echo "$out"
  r1=$(echo "$out" | awk '/^1\. /{print $(NF-1)}')
  r2=$(echo "$out" | awk '/^2\. /{print $(NF-1)}')
  r3=$(echo "$out" | awk '/^3\. /{print $(NF-1)}')
  row "1. cached pass / read-and-sum sweep ($kind)" "$r1" ">=0.6"
  row "2. two threads vs one, cached pass ($kind)" "$r2" ">=1.7"
  row "3. first pass / bare Parquet decode ($kind)" "$r3" ">=0.8"
done

echo "== item 4: end to end vs scipy L-BFGS-B (ridge 1e-4, tol 1e-6, float64 data)"
sync
start=$(date +%s.%N)
"$BIN" fit --data "$WORK/f64.parquet" --target y --ridge 1e-4 --tol 1e-6 \
  --out "$WORK/m.json" --run "$WORK/m.run" --json --quiet > "$WORK/ours.json"
end=$(date +%s.%N)
python3 tests/reference/throughput_scipy.py "$WORK/f64.parquet" --ridge 1e-4 --tol 1e-6 > "$WORK/scipy.json"
python3 - "$WORK/ours.json" "$WORK/scipy.json" "$start" "$end" "$summary" "$(load)" <<'PY'
import json, sys
ours = json.load(open(sys.argv[1])); sp = json.load(open(sys.argv[2]))
wall = float(sys.argv[4]) - float(sys.argv[3])
rel = abs(ours["objective"] - sp["objective"]) / abs(sp["objective"])
print(f"outcore: {wall:.2f}s wall, {ours['passes']} passes (stats pass included), objective {ours['objective']!r}, "
      f"cache {ours['cache']['bytes']/1e6:.0f} MB, peak anon {ours['memory']['peak_anonymous_bytes']/1e6:.0f} MB")
print(f"scipy:   {sp['seconds']:.2f}s wall ({sp['load_seconds']:.2f}s load), {sp['nfev']} evaluations, objective {sp['objective']!r}, {sp['message']}")
with open(sys.argv[5], "a") as f:
    for name, v, goal in [
        ("4. wall time outcore / scipy", f"{wall / sp['seconds']:.3f}", "<=0.3"),
        ("4. passes outcore (evaluations + stats) / scipy nfev", f"{ours['passes']}/{sp['nfev']}", "<=1"),
        ("4. objective relative difference", f"{rel:.1e}", "<=1e-8"),
    ]:
        line = f"{name:<58} {v:>12} {goal:>8}  load {sys.argv[6]}"
        print(line); f.write(line + "\n")
PY

if [ "${OOC:-0}" = 1 ]; then
  echo "== item 5: out of core, float32 data at 1 GB and 8 GB on disk"
  rm -f "$WORK"/f64.parquet "$WORK"/f32.parquet; rm -rf "$WORK/m.run"
  for size in 1 8; do
    # 32 float32 + 1 float64 per row take 197 bytes on disk as gen_dense.py writes them
    # (measured 2026-12-02: 60.6M rows made an 11.9 GB file), so this gives SIZE GB.
    rows=$(( size * 1000000000 / 197 ))
    python3 benches/gen_dense.py --rows "$rows" --features 32 --dtype float32 --out "$WORK/ooc$size.parquet"
    disk=$(du -b "$WORK/ooc$size.parquet" | cut -f1)
    # Plain disk read throughput of the same file, page cache dropped where allowed.
    sync; (echo 3 > /proc/sys/vm/drop_caches) 2>/dev/null || true
    t0=$(date +%s.%N); cat "$WORK/ooc$size.parquet" > /dev/null; t1=$(date +%s.%N)
    read_gbs=$(python3 -c "print(f'{$disk/($t1-$t0)/1e9:.2f}')")
    # A 2 GB memory limit on the 8 GB fit: a systemd scope where systemd runs, else a
    # cgroup (v1) memory controller of our own, else none (and the summary says so).
    limit=()
    cg=""
    if [ "$size" = 8 ] && systemd-run --scope -q -p MemoryMax=2G true 2>/dev/null; then
      limit=(systemd-run --scope -q -p MemoryMax=2G)
    elif [ "$size" = 8 ] && [ -w /sys/fs/cgroup/memory ]; then
      cg=/sys/fs/cgroup/memory/outcore-bench-$$
      if mkdir -p "$cg" && echo $((2 * 1024 * 1024 * 1024)) > "$cg/memory.limit_in_bytes"; then
        limit=(sh -c 'echo $$ > "$0/cgroup.procs" && exec "$@"' "$cg")
      else
        cg=""
      fi
    fi
    t0=$(date +%s.%N)
    "${limit[@]}" "$BIN" fit --data "$WORK/ooc$size.parquet" --target y --ridge 1e-4 --tol 1e-6 \
      --out "$WORK/ooc$size.json" --run "$WORK/ooc$size.run" --json --quiet > "$WORK/ooc$size.out"
    t1=$(date +%s.%N)
    if [ -n "$cg" ]; then
      echo "cgroup $cg: limit $(cat "$cg/memory.limit_in_bytes"), peak use (RSS + page cache charged)" \
        "$(cat "$cg/memory.max_usage_in_bytes"), limit hits $(cat "$cg/memory.failcnt")" | tee -a "$summary"
      rmdir "$cg" 2>/dev/null || true
    fi
    python3 - "$WORK/ooc$size.out" "$disk" "$t0" "$t1" "$read_gbs" "$size" "${#limit[@]}" "$summary" "$(load)" <<'PY'
import json, sys
o = json.load(open(sys.argv[1])); disk = int(sys.argv[2]); wall = float(sys.argv[4]) - float(sys.argv[3])
gbs = disk * o["passes"] / wall / 1e9
limited = "under a 2 GB memory limit" if sys.argv[7] != "0" else "no memory limit available"
line = (f"5. {sys.argv[6]} GB: {o['passes']} passes {wall:.0f}s, {gbs:.2f} GB/s vs disk read {sys.argv[5]} GB/s; "
        f"peak anon {o['memory']['peak_anonymous_bytes']/1e6:.0f} MB ({limited})")
print(line)
with open(sys.argv[8], "a") as f: f.write(line + f"  load {sys.argv[9]}\n")
PY
    rm -rf "$WORK/ooc$size.run" "$WORK/ooc$size.parquet"
  done
fi

echo
echo "== summary ($(date -u +%F), SCALE=$SCALE, $(nproc) cores)"
cat "$summary"
