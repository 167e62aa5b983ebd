#!/usr/bin/env bash
# Debian packages prescreen needs beyond Python wheels. Idempotent; runs as root in CI.
set -euo pipefail
PKGS=(libxc-dev libopenblas-dev liblapack-dev libfftw3-dev)
missing=()
for p in "${PKGS[@]}"; do
  dpkg -s "$p" >/dev/null 2>&1 || missing+=("$p")
done
if [ ${#missing[@]} -gt 0 ]; then
  SUDO=""
  [ "$(id -u)" -eq 0 ] || SUDO="sudo"
  $SUDO apt-get update -q
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -q --no-install-recommends "${missing[@]}"
fi
