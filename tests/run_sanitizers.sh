#!/usr/bin/env bash
# Sanitizer runs (DEVELOPERS.md, "Reliability"); CI runs this after ./tests/run.sh.
# AddressSanitizer + UndefinedBehaviorSanitizer (build-asan/): the server's and clients'
#     tests, the crash, network-fault and bad-input tests, the router test.
# ThreadSanitizer is not run: Debian's Abseil is not built for it, so every absl::Mutex is
# invisible to it and each guarded access is reported as a race (DEVELOPERS.md).
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

cmake -S . -B build-asan -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo -DFORAY_PORTABLE=ON \
  -DFORAY_SANITIZE="address;undefined" >/dev/null
cmake --build build-asan --parallel "$(nproc)"
(cd build-asan && ctest --output-on-failure --parallel "$(nproc)" \
  -R '^(server\.|client\.|reliability\.|deploy\.|interop\.|Store|PlanGate|SpecFile|TableFiles)')
