#!/usr/bin/env bash
# Builds Debian's own Abseil (the source of the installed libabsl, same version and patches, so
# the same inline namespace and library names) with ThreadSanitizer into $1 (default
# build-tsan-abseil/prefix). The ThreadSanitizer build of tests/run_sanitizers.sh links its
# binaries with an RPATH to it, so that every absl::Mutex in the process, gRPC's too, tells
# TSan what it orders. Python keeps the system's Abseil (it has no TSan runtime).
#
#   ./tests/build_tsan_abseil.sh [prefix]
set -euo pipefail
cd "$(dirname "$0")/.."
PREFIX="$(realpath -m "${1:-build-tsan-abseil/prefix}")"
WORK="$(dirname "$PREFIX")"
if [ -f "$PREFIX/lib/libabsl_synchronization.so.20220623" ]; then
  echo "TSan Abseil already in $PREFIX"
  exit 0
fi
VERSION="$(dpkg-query -W -f='${source:Version}' libabsl20220623)"
# Debian's source packages: apt verifies the signed index and the files' checksums.
if [ ! -f /etc/apt/sources.list.d/foray-src.sources ]; then
  cat > /etc/apt/sources.list.d/foray-src.sources <<'SRC'
Types: deb-src
URIs: http://deb.debian.org/debian
Suites: bookworm bookworm-updates
Components: main
Signed-By: /usr/share/keyrings/debian-archive-keyring.gpg

Types: deb-src
URIs: http://deb.debian.org/debian-security
Suites: bookworm-security
Components: main
Signed-By: /usr/share/keyrings/debian-archive-keyring.gpg
SRC
  apt-get update -qq
fi
rm -rf "$WORK/src" && mkdir -p "$WORK/src"
(cd "$WORK/src" && apt-get source -qq "abseil=$VERSION" >/dev/null)
SRC_DIR="$(find "$WORK/src" -maxdepth 1 -type d -name 'abseil-*' | head -1)"
# The options of Debian's shared build (debian/rules), plus TSan.
cmake -S "$SRC_DIR" -B "$WORK/build" -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo \
  -DCMAKE_CXX_STANDARD=17 -DBUILD_SHARED_LIBS=ON -DABSL_PROPAGATE_CXX_STD=ON \
  -DCMAKE_CXX_FLAGS="-fsanitize=thread -fno-omit-frame-pointer" -DCMAKE_C_FLAGS="-fsanitize=thread" \
  -DCMAKE_SHARED_LINKER_FLAGS="-fsanitize=thread" -DCMAKE_INSTALL_PREFIX="$PREFIX" >/dev/null
cmake --build "$WORK/build" --parallel "$(nproc)" >/dev/null
cmake --install "$WORK/build" >/dev/null
# Same exported symbols as the installed library (the TSan build adds a few of its own).
missing="$(comm -23 <(nm -D --defined-only /usr/lib/x86_64-linux-gnu/libabsl_synchronization.so.20220623 | awk '{print $3}' | sort) \
                    <(nm -D --defined-only "$PREFIX/lib/libabsl_synchronization.so.20220623" | awk '{print $3}' | sort))"
if [ -n "$missing" ]; then
  echo "the TSan Abseil lacks symbols of the installed one:" >&2
  echo "$missing" >&2
  exit 1
fi
echo "TSan Abseil $VERSION in $PREFIX"
