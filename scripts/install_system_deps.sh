#!/usr/bin/env bash
# Debian packages prescreen needs beyond Python wheels. Idempotent; runs as root in CI.
set -euo pipefail
# python3-venv/python3-dev/build-essential/pkg-config: a fresh Debian python3 cannot make
# a venv or compile GPAW without them. libxc, OpenBLAS, LAPACK, FFTW: GPAW's libraries.
PKGS=(python3-venv python3-dev build-essential pkg-config
      libxc-dev libopenblas-dev liblapack-dev libfftw3-dev)
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
