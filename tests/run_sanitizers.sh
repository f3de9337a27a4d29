#!/usr/bin/env bash
# Sanitizer runs (DEVELOPERS.md, "Reliability"); CI runs this after ./tests/run.sh.
#  1. AddressSanitizer + UndefinedBehaviorSanitizer (build-asan/): the server's and clients'
#     tests, the crash, network-fault and bad-input tests, the router test.
#  2. ThreadSanitizer (build-tsan/): the store and plan-gate tests and the server's concurrency
#     tests (three robots streaming at once, the session stream, overload, the crash test).
# Every report stops the process that made it (halt_on_error), so the test that ran it fails.
# FORAY_SANITIZED=1 relaxes the few checks that measure time or memory.
#
#   ./tests/run_sanitizers.sh
set -euo pipefail
cd "$(dirname "$0")/.."
./deploy/install-deps.sh
export FORAY_SANITIZED=1
export UBSAN_OPTIONS=halt_on_error=1:print_stacktrace=1
export ASAN_OPTIONS=halt_on_error=1:detect_leaks=1:abort_on_error=1
export TSAN_OPTIONS="halt_on_error=1:second_deadlock_stack=1:suppressions=$PWD/tests/tsan.supp"

cmake -S . -B build-asan -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo -DFORAY_PORTABLE=ON \
  -DFORAY_SANITIZE="address;undefined" >/dev/null
cmake --build build-asan --parallel "$(nproc)"
(cd build-asan && ctest --output-on-failure --parallel "$(nproc)" \
  -R '^(server\.|client\.|reliability\.|deploy\.|interop\.|Store|PlanGate|SpecFile|TableFiles)')

cmake -S . -B build-tsan -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo -DFORAY_PORTABLE=ON \
  -DFORAY_SANITIZE=thread >/dev/null
cmake --build build-tsan --parallel "$(nproc)" --target forayd foray foray-sim crash_client watchdog_drill \
  foray_proto_python server_store_test server_sched_plan_gate_test
(cd build-tsan && ctest --output-on-failure --parallel "$(nproc)" \
  -R '^(server\.service|reliability\.crash|client\.cpp_session|Store|PlanGate)')
