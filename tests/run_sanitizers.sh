#!/usr/bin/env bash
# Sanitizer runs (DEVELOPERS.md, "Reliability"); CI runs this after ./tests/run.sh.
# AddressSanitizer + UndefinedBehaviorSanitizer (build-asan/): the server's and clients'
#     tests, the crash, network-fault and bad-input tests, the router test.
# ThreadSanitizer (build-tsan/): the server's concurrency tests without the network (robot
#     runtime, trainer thread, plan gate and scheduler, session stream inbox, store, directory,
#     the trainer's and the planner's split over threads) and the server's, clients' and
#     fault tests over loopback. Debian's Abseil is rebuilt for TSan from its own source
#     (tests/build_tsan_abseil.sh) and the TSan binaries load it through their RPATH, so every
#     absl::Mutex, gRPC's too, is seen. gRPC and protobuf themselves are not rebuilt: reports
#     inside them are suppressed by tests/tsan.supp, each entry with its reason.
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
export TSAN_OPTIONS="halt_on_error=1 second_deadlock_stack=1 suppressions=$PWD/tests/tsan.supp"

cmake -S . -B build-asan -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo \
  -DFORAY_SANITIZE="address;undefined" >/dev/null
cmake --build build-asan --parallel "$(nproc)"
(cd build-asan && ctest --output-on-failure --parallel "$(nproc)" \
  -R '^(server\.|client\.|reliability\.|deploy\.|interop\.|Store|PlanGate|PlanScheduler|SessionCommitter|Inbox|ConvertTest|CoverageGrid|EpisodeTracker|DatasetMirror|PlanState|RecordsTest|SpecFile|TableFiles|RuntimeConcurrency|DirectoryConcurrency|HelperPool)')

./tests/build_tsan_abseil.sh build-tsan-abseil/prefix
cmake -S . -B build-tsan -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo \
  -DFORAY_SANITIZE=thread \
  "-DCMAKE_EXE_LINKER_FLAGS=-Wl,--disable-new-dtags,-rpath,$PWD/build-tsan-abseil/prefix/lib" >/dev/null
cmake --build build-tsan --parallel "$(nproc)"
# The server binary must load the TSan Abseil, or every Mutex is invisible and the run means
# nothing.
# (ldd's output is read whole first: grep -q stops at the first match, and under pipefail the
# SIGPIPE that ldd may then get would fail the check.)
loaded="$(ldd build-tsan/server/forayd)"
if ! grep -q "libabsl_synchronization.so.* => $PWD/build-tsan-abseil/prefix/lib/" <<<"$loaded"; then
  echo "build-tsan/server/forayd does not load the TSan Abseil" >&2
  exit 1
fi
(cd build-tsan && ctest --output-on-failure --parallel "$(nproc)" \
  -R '^(RuntimeConcurrency|DirectoryConcurrency|HelperPool|TrainingSplit|PlanGate|PlanScheduler|SessionCommitter|Inbox|Store|PlannerTest\.Parallel|TrainerTest\.Parallel|server\.|client\.|reliability\.(network_faults|rate_limits|bad_input|storage_faults)|interop\.)')
