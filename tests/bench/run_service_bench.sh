#!/usr/bin/env bash
# Service benchmark: starts a fresh forayd on loopback (its own data directory under
# build/bench/), runs tests/bench/service_bench.cc against it (gRPC overhead of a small plan,
# streaming throughput and SQLite bytes per transition, the load test with 1..16 robots), stops
# it, and prints the figures. Writes build/bench/service_bench.json (one JSON object per line).
#
#   ./tests/bench/run_service_bench.sh [service_bench flags, e.g. --load_robots=1,8 --load_seconds=20]
set -euo pipefail
cd "$(dirname "$0")/../.."
BUILD_DIR="${FORAY_BUILD_DIR:-build}"
cmake --build "$BUILD_DIR" --target forayd foray_service_bench >/dev/null
mkdir -p "$BUILD_DIR/bench"
DATA="$(mktemp -d "$BUILD_DIR/bench/service-data.XXXXXX")"
LOG="$DATA/forayd.log"
"$BUILD_DIR/server/forayd" --listen=127.0.0.1:0 --data_dir="$DATA" >"$LOG" 2>&1 &
PID=$!
trap 'kill "$PID" 2>/dev/null || true; wait "$PID" 2>/dev/null || true; rm -rf "$DATA"' EXIT
PORT=""
for _ in $(seq 1 200); do
  PORT="$(sed -n 's/.*(port \([0-9]*\)).*/\1/p' "$LOG" | head -n 1)"
  [ -n "$PORT" ] && break
  sleep 0.05
done
[ -n "$PORT" ] || { cat "$LOG"; echo "run_service_bench: forayd did not start" >&2; exit 1; }
OUT="$BUILD_DIR/bench/service_bench.json"
"$BUILD_DIR/tests/bench/foray_service_bench" --address="127.0.0.1:$PORT" \
  --admin_token_file="$DATA/admin-token" --data_dir="$DATA" --server_pid="$PID" "$@" | grep '^{' >"$OUT"
/usr/bin/python3 - "$OUT" <<'PY'
import json, sys
rows = [json.loads(line) for line in open(sys.argv[1])]
for r in rows:
    if r["name"].startswith("load_"):
        continue
    extra = f" (vs {r['reference']}: {r['ratio']:.3g}x)" if "ratio" in r else ""
    extra += f", overall {r['overall']:.0f}" if "overall" in r else ""
    print(f"{r['name']:30} median {r['median']:10.4g} {r['unit']:14} min {r['min']:.4g} max {r['max']:.4g}{extra}")
load = [r for r in rows if r["name"].startswith("load_")]
if load:
    print(f"{'robots':>6} {'plans':>6} {'p50 ms':>8} {'p99 ms':>8} {'misses':>7} {'train rounds':>13} "
          f"{'s/round/robot':>14} {'server MB':>10} {'kB/robot':>9}")
    for r in load:
        print(f"{r['robots']:6d} {r['plans']:6d} {r['median']:8.1f} {r['p99']:8.1f} {r['deadline_misses']:7d} "
              f"{r['training_rounds']:13d} {r['seconds_per_round_per_robot']:14.1f} {r['server_rss_kb'] / 1024:10.1f} "
              f"{r['server_rss_kb_per_robot']:9.0f}")
    print("kB/robot: the server's resident growth since the first round over all robots registered so far "
          "(earlier rounds' robots stay registered)")
PY
