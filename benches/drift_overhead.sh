#!/usr/bin/env bash
# Served throughput with drift monitoring on and off, measured side by side: the same release
# binary, model, images and load (`convoy bench`, closed loop), alternating on/off runs so that
# the machine's other load falls on both alike. Prints each run and the ratio of the medians.
#
#   benches/drift_overhead.sh [BUNDLE_DIR] [IMAGES_DIR] [ROUNDS] [SECONDS] [CALLERS]
#
# Defaults: the demo model (models/, whose bundle carries a drift reference), its sample photos,
# 5 rounds of 10 s each, 16 callers. Needs only cargo; builds the release binary first.
set -euo pipefail
cd "$(dirname "$0")/.."
models=${1:-models}
images=${2:-models/stamped-parts/samples}
rounds=${3:-5}
seconds=${4:-10}
callers=${5:-16}
cargo build --release --quiet
bin=target/release/convoy
work=$(mktemp -d)
trap 'kill $(jobs -p) 2>/dev/null || true; rm -rf "$work"' EXIT
port=7391
for mode in true false; do
  printf 'listen = "127.0.0.1:%s"\nmodels = "%s"\ndrift_monitoring = %s\n' \
    "$port" "$models" "$mode" > "$work/$mode.toml"
done

run() { # $1 = true|false; prints requests/s
  "$bin" serve --config "$work/$1.toml" 2>"$work/serve-$1.log" &
  local pid=$!
  for _ in $(seq 100); do
    "$bin" versions list --server "127.0.0.1:$port" >/dev/null 2>&1 && break
    sleep 0.1
  done
  "$bin" bench --server "127.0.0.1:$port" --images "$images" --concurrency "$callers" \
    --duration "$seconds" --json > "$work/bench.json"
  kill "$pid"; wait "$pid" 2>/dev/null || true
  python3 -c 'import json,sys; r=json.load(open(sys.argv[1])); print(r["throughput_per_s"], sum(r["errors"].values()))' "$work/bench.json"
}

on=(); off=()
for r in $(seq "$rounds"); do
  read -r a ea < <(run true)
  read -r b eb < <(run false)
  echo "round $r: monitoring on $a requests/s ($ea errors), off $b requests/s ($eb errors)"
  on+=("$a"); off+=("$b")
done
python3 - "${on[*]}" "${off[*]}" <<'PY'
import statistics, sys
on = [float(x) for x in sys.argv[1].split()]
off = [float(x) for x in sys.argv[2].split()]
m_on, m_off = statistics.median(on), statistics.median(off)
print(f"median: on {m_on:.0f} requests/s, off {m_off:.0f} requests/s, on/off = {m_on / m_off:.3f}")
PY
