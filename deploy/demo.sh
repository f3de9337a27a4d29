#!/usr/bin/env bash
# Starts a local Foray: installs what is missing, builds, and runs forayd on the embedded
# default (SQLite under ./foray-data) on 127.0.0.1:50151 until Ctrl-C (data is kept).
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
cmake --build "$BUILD_DIR" --parallel "$(nproc)" --target forayd foray_proto_python

ADDRESS="127.0.0.1:50151"
DATA_DIR="$PWD/foray-data"
"$BUILD_DIR/server/forayd" --listen="$ADDRESS" --data_dir="$DATA_DIR" &
SERVER_PID=$!
stop() {
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
echo "demo: the admin token (for registering robots) is in $DATA_DIR/admin-token;"
echo "      README.md, 'How a robot connects', registers a robot and asks for a plan."
echo "demo: simulated robots and the dashboard are not part of this build yet, so no robot"
echo "      is learning until a client connects. Press Ctrl-C to stop."
if [ "$MINUTES" != "0" ]; then
  sleep "$(awk "BEGIN {print $MINUTES * 60}")" &
  wait $! || true
else
  wait "$SERVER_PID"
fi
