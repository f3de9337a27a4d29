#!/usr/bin/env bash
# Installs forayd as a systemd service from a Release build: the binaries to /usr/local/bin,
# the unit, /etc/foray/forayd.conf (kept if present), and a system user "foray". Run as root
# from the repository after `cmake --build build`.
#
#   sudo deploy/systemd/install.sh [BUILD_DIR]
#   sudo systemctl enable --now forayd
set -euo pipefail
cd "$(dirname "$0")/../.."
BUILD_DIR="${1:-build}"
install -m 0755 "$BUILD_DIR/server/forayd" "$BUILD_DIR/client/foray" /usr/local/bin/
install -d -m 0755 /usr/local/share/doc/foray
install -m 0644 README.md /usr/local/share/doc/foray/
id foray >/dev/null 2>&1 || useradd --system --home-dir /var/lib/foray --no-create-home \
  --shell /usr/sbin/nologin foray
install -d -m 0750 -o root -g foray /etc/foray
[ -e /etc/foray/forayd.conf ] || install -m 0640 -o root -g foray deploy/systemd/forayd.conf /etc/foray/
install -m 0644 deploy/systemd/forayd.service /etc/systemd/system/forayd.service
systemctl daemon-reload
echo "installed; start with: systemctl enable --now forayd; the admin token is in /var/lib/foray/admin-token"
