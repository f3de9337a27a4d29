#!/usr/bin/env bash
# Starts a local Foray: installs what is missing, builds, runs forayd on the embedded default
# (SQLite under ./foray-data) on 127.0.0.1:50151 and four simulated robots (foray-sim: an
# overhead gantry, a two-link arm, and on MuJoCo a paddle that strikes a puck along a bench and
# a rod that pushes a puck over a table) that learn through it, until Ctrl-C (data is kept).
#
#   ./deploy/demo.sh               # until Ctrl-C
#   ./deploy/demo.sh --minutes 5   # stop by itself after five minutes
set -euo pipefail
cd "$(dirname "$0")/.."

MINUTES=0
while [ $# -gt 0 ]; do
  case "$1" in
    --minutes) MINUTES="$2"; shift 2 ;;
    --minutes=*) MINUTES="${1#*=}"; shift ;;
    -h|--help) sed -n '2,7p' "$0"; exit 0 ;;
    *) echo "demo.sh: unknown option '$1' (try --help)" >&2; exit 2 ;;
  esac
done

cat <<'CAUTION'
CAUTION: Foray plans robot motions but is not a safety system. Keep hardware emergency stops
and safety-rated speed and force limits in place, and follow your lab's risk assessment and
local rules before any plan reaches a real robot.
CAUTION

./deploy/install-deps.sh
BUILD_DIR="${FORAY_BUILD_DIR:-build}"
cmake -S . -B "$BUILD_DIR" -G Ninja -DCMAKE_BUILD_TYPE=Release >/dev/null
cmake --build "$BUILD_DIR" --parallel "$(nproc)" --target forayd foray-sim foray_proto_python

ADDRESS="127.0.0.1:50151"
DATA_DIR="$PWD/foray-data"
HTTP_PORT=50152
"$BUILD_DIR/server/forayd" --listen="$ADDRESS" --data_dir="$DATA_DIR" --http_port="$HTTP_PORT" &
SERVER_PID=$!
SIM_PID=""
stop() {
  if [ -n "$SIM_PID" ]; then
    kill -TERM "$SIM_PID" 2>/dev/null || true
    wait "$SIM_PID" 2>/dev/null || true
  fi
  kill -TERM "$SERVER_PID" 2>/dev/null || true
  wait "$SERVER_PID" 2>/dev/null || true
  echo "demo: stopped; data kept in $DATA_DIR"
}
trap stop EXIT
trap 'exit 0' INT TERM

PYTHONPATH="$PWD/client/python" /usr/bin/python3 -m foray_client.probe \
  --address "$ADDRESS" --wait 20 --services

echo
echo "demo: forayd is serving gRPC on $ADDRESS with data in $DATA_DIR."
echo "demo: the admin token (for registering robots) is in $DATA_DIR/admin-token."
echo "demo: dashboard at http://127.0.0.1:$HTTP_PORT/ (metrics at /metrics)."
echo "demo: four simulated robots now learn in real time; a line per episode shows whether it"
echo "      explored or evaluated, its outcome (goal reached, lost, time up), the return (steps"
echo "      at the goal they are not told about), the model version and the information gain of"
echo "      their plans. Every fourth episode evaluates. Press Ctrl-C to stop."
"$BUILD_DIR/client/foray-sim" --address="$ADDRESS" --admin_token_file="$DATA_DIR/admin-token" \
  --state_dir="$DATA_DIR/sim" --robots=gantry,arm,bench,table --episodes=0 --realtime --evaluate_every=3 &
SIM_PID=$!
if [ "$MINUTES" != "0" ]; then
  sleep "$(awk "BEGIN {print $MINUTES * 60}")" &
  wait $! || true
else
  wait "$SIM_PID"
fi
