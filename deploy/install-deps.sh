#!/usr/bin/env bash
# Installs every Debian package Foray needs to build, run and test. Idempotent: when all
# packages are present it only checks and exits. Works as root or through sudo.
set -euo pipefail

PACKAGES=(
  build-essential        # g++ 12 (C++20) and make
  cmake                  # build system (3.22 or newer)
  ninja-build            # fast parallel builds
  pkg-config             # library lookup
  libgrpc++-dev          # gRPC C++ (server, client library, health, reflection)
  protobuf-compiler      # protoc
  protobuf-compiler-grpc # grpc_cpp_plugin and grpc_python_plugin
  libprotobuf-dev        # Protocol Buffers C++ runtime
  libabsl-dev            # Abseil: status, flags, strings, synchronisation
  libeigen3-dev          # Eigen: the linear algebra of the models and planner
  libhwy-dev             # Highway: the model's SIMD kernels, dispatched at run time (core/model)
  libmujoco-dev          # MuJoCo 2.2: the physics of the simulated contact robots (client/sim)
  libqhull-dev           # headers MuJoCo's CMake package names (/usr/include/libqhull_r)
  libsqlite3-dev         # SQLite: the embedded store
  libssl-dev             # OpenSSL: SHA-256 of tokens
  openssl                # certificates for the TLS tests
  libgtest-dev           # GoogleTest: C++ unit tests
  libgmock-dev           # GoogleMock
  libbenchmark-dev       # Google Benchmark
  python3                # /usr/bin/python3, the interpreter that sees Debian's Python packages
  python3-grpcio         # Python gRPC: client package and loopback tests
  python3-protobuf       # Python protobuf runtime for the generated modules
  python3-numpy          # reference arrays in tests
  python3-scipy          # reference integrators and statistics in tests
  python3-torch          # reference network computations and benchmarks
  python3-pytest         # Python test runner
  python3-pip            # installs the Python client package (client/python)
  python3-setuptools     # builds it
  python3-wheel          # (with setuptools)
  python3-yaml           # reads the Kubernetes manifests in the deploy test
  python3-matplotlib     # plots of the exploration benchmark
  python3-prometheus-client # parses /metrics in the tests
  libcpp-httplib-dev     # HTTP server of /metrics, the JSON API and the dashboard
  nlohmann-json3-dev     # the foray CLI reads robot spec files (JSON)
  clang-14               # builds the fuzz targets (libFuzzer) in tests/fuzz
  libfuzzer-14-dev
  nginx                  # the router in front of several forayd shards (deploy/router, its test)
  chromium               # the browser of the dashboard test (headless)
  nodejs                 # runs the browser test's driver (npm: with it, or Debian's npm below)
  libopenblas0-pthread   # optimised BLAS, so the numpy and PyTorch references run at full speed
)

SUDO=""
if [ "$(id -u)" -ne 0 ] && command -v sudo >/dev/null 2>&1; then SUDO="sudo"; fi

missing=()
for pkg in "${PACKAGES[@]}"; do
  if ! dpkg-query -W -f='${Status}' "$pkg" 2>/dev/null | grep -q "install ok installed"; then
    missing+=("$pkg")
  fi
done

# Node.js packages of the tests, pinned in each folder's package.json and installed once into
# its node_modules: tests/browser (playwright-core drives the dashboard test) and
# tests/interop (@grpc/grpc-js and @grpc/proto-loader, an independent gRPC client).
install_node_modules() {
  local root dir
  root="$(cd "$(dirname "$0")/.." && pwd)"
  if ! command -v npm >/dev/null 2>&1; then
    # Debian's nodejs comes without npm; a nodejs from elsewhere may bring its own.
    $SUDO env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends npm
  fi
  for dir in "$root/tests/browser" "$root/tests/interop"; do
    if [ ! -d "$dir/node_modules" ] || [ "$dir/package.json" -nt "$dir/node_modules" ]; then
      echo "install-deps: npm install in ${dir#"$root"/}"
      (cd "$dir" && npm install --no-audit --no-fund --loglevel=error && touch node_modules)
    fi
  done
}

if [ ${#missing[@]} -eq 0 ]; then
  echo "install-deps: all ${#PACKAGES[@]} packages present"
  install_node_modules
  exit 0
fi

SUDO=""
if [ "$(id -u)" -ne 0 ]; then
  if command -v sudo >/dev/null 2>&1; then
    SUDO="sudo"
  else
    echo "install-deps: need root or sudo to install: ${missing[*]}" >&2
    exit 1
  fi
fi

echo "install-deps: installing ${missing[*]}"
$SUDO env DEBIAN_FRONTEND=noninteractive apt-get update -qq
# Packages with a service (nginx) must not start it on installing: the router test runs its own
# nginx on loopback, and a default site on port 80 is nothing we asked for. policy-rc.d says so
# to Debian's maintainer scripts, for this install only.
POLICY=/usr/sbin/policy-rc.d
OWN_POLICY=0
if [ ! -e "$POLICY" ]; then
  printf '#!/bin/sh\nexit 101\n' | $SUDO tee "$POLICY" >/dev/null
  $SUDO chmod 755 "$POLICY"
  OWN_POLICY=1
fi
$SUDO env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "${missing[@]}"
if [ "$OWN_POLICY" = 1 ]; then $SUDO rm -f "$POLICY"; fi
install_node_modules
echo "install-deps: done"
