#!/usr/bin/env bash
# Renders the demo report in headless Chromium and checks it (tests/browser/check_report.py).
# Installs Debian's chromium when it is missing. Needs python3 with websocket-client and pillow
# (tests/python/requirements.txt) and a built candor binary.
# Usage: check_report.sh [CANDOR_BINARY] [--screenshot OUT.png]
set -euo pipefail
repo="$(cd "$(dirname "$0")/../.." && pwd)"
binary="${1:-$repo/target/debug/candor}"
shift || true
if ! command -v chromium >/dev/null 2>&1; then
  echo "installing Debian's chromium"
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq
  apt-get install -y -qq chromium >/dev/null
fi
chromium --version
python3 "$repo/tests/browser/check_report.py" "$binary" "$repo" "$@"
