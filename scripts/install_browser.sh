#!/usr/bin/env bash
# Headless Chromium for the report's browser test (Debian's `chromium` package).
# Idempotent: does nothing when /usr/bin/chromium is already there.
set -euo pipefail
CHROMIUM=/usr/bin/chromium
if [ -x "$CHROMIUM" ]; then
  exit 0
fi
SUDO=""
[ "$(id -u)" -eq 0 ] || SUDO="sudo"
if ! DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -q chromium; then
  # the package lists may be stale on a fresh machine
  $SUDO apt-get update -q
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -q chromium
fi
test -x "$CHROMIUM"
"$CHROMIUM" --version
