#!/usr/bin/env bash
# chromium.sh - make sure Debian's headless-capable Chromium is installed (needs root).
set -euo pipefail
# Installs take a lock of their own: the test processes may start services at once.
if ! command -v chromium >/dev/null; then
  flock /tmp/orbitledger-apt.lock apt-get update -q >/dev/null
  DEBIAN_FRONTEND=noninteractive flock /tmp/orbitledger-apt.lock apt-get install -y -q --no-install-recommends chromium >/dev/null
fi
command -v chromium
