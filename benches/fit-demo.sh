#!/usr/bin/env bash
# Whole-tool benchmark: fit the demo model on ROWS rows (default 1 000 000) with one and
# with two threads, side by side in one run, and print passes, seconds and the ratio.
# Data go to ${TMPDIR:-/tmp}; nothing is committed.
set -euo pipefail
cd "$(dirname "$0")/.."
rows=${ROWS:-1000000}
data=${TMPDIR:-/tmp}/outcore-fit-bench-$rows
cargo build --release --quiet
bin=target/release/outcore
[ -f "$data/orders-00000.parquet" ] || $bin demo --out "$data" --rows "$rows" >/dev/null
features=distance_km,basket_items,courier_load,peak_hour,rain_mm,courier_tenure_years
out=$(mktemp -d)
declare -A secs
for threads in 1 2; do
  json=$($bin fit --data "$data" --target late --features $features --shards 2 \
    --threads $threads --out "$out/late-$threads.json" --json --quiet)
  passes=$(echo "$json" | python3 -c 'import json,sys; d=json.load(sys.stdin); print(d["passes"])')
  s=$(echo "$json" | python3 -c 'import json,sys; d=json.load(sys.stdin); print(d["seconds"])')
  secs[$threads]=$s
  echo "rows=$rows threads=$threads passes=$passes seconds=$s stop=$(echo "$json" | python3 -c 'import json,sys; print(json.load(sys.stdin)["stop"])')"
done
python3 -c "print('speedup 2 threads vs 1: %.2f' % (${secs[1]} / ${secs[2]}))"
cmp <(python3 -c "import json; print(json.load(open('$out/late-1.json'))['internal'])") \
    <(python3 -c "import json; print(json.load(open('$out/late-2.json'))['internal'])") \
  && echo "coefficients identical with 1 and 2 threads"
rm -rf "$out"
