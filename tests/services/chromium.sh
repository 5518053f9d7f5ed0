#!/usr/bin/env bash
# chromium.sh - make sure Debian's headless-capable Chromium is installed (needs root).
set -euo pipefail
if ! command -v chromium >/dev/null; then
  apt-get update -q >/dev/null
  DEBIAN_FRONTEND=noninteractive apt-get install -y -q --no-install-recommends chromium >/dev/null
fi
command -v chromium
