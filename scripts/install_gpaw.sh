#!/usr/bin/env bash
# Install GPAW (GPL, https://gpaw.readthedocs.io) into a virtualenv, built from its PyPI
# source distribution against the Debian libraries that scripts/install_system_deps.sh
# provides (libxc, OpenBLAS, LAPACK, FFTW). PAW setups and dzp basis sets come from the
# `gpaw-data` wheel on PyPI, so nothing is downloaded when a calculation runs.
#
# Usage: bash scripts/install_gpaw.sh [VENV]        (VENV defaults to .venv)
#
# Idempotent: returns within seconds when the pinned GPAW is already importable with its
# compiled extension and data. Serial build (mpi = False): the labeller runs independent
# single-threaded jobs side by side, which beats MPI ranks on a small machine. Debian's
# own `gpaw` package must not be installed alongside: its MPI compiler wrapper without
# headers breaks this build.
set -euo pipefail

VENV="${1:-.venv}"
PY="$VENV/bin/python"
GPAW_VERSION="${GPAW_VERSION:-26.7.0}"
GPAW_DATA_VERSION="${GPAW_DATA_VERSION:-1.2.1}"
HERE="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"

if [ ! -x "$PY" ]; then
  echo "install_gpaw: no python at $PY; create the virtualenv first (make venv)" >&2
  exit 2
fi

# The check that decides "already installed": right version, compiled extension with
# libxc, and PAW setups + basis sets found through gpaw-data.
check() {
  OPENBLAS_NUM_THREADS=1 "$PY" - "$GPAW_VERSION" <<'PYEOF'
import sys
import _gpaw  # the compiled extension
import gpaw, gpaw.spinorbit  # noqa: F401
from gpaw.setup_data import search_for_file
want = sys.argv[1]
if gpaw.__version__ != want:
    sys.exit(f"gpaw {gpaw.__version__} installed, {want} wanted")
if not hasattr(_gpaw, "lxcXCFunctional"):
    sys.exit("gpaw was built without libxc")
if getattr(_gpaw, "have_mpi", False):
    sys.exit("gpaw was built with MPI; prescreen wants the serial build")
for name in ("Bi.PBE", "Bi.dzp.basis"):
    search_for_file(name)  # raises if the data files cannot be found
print(f"gpaw {gpaw.__version__} OK (libxc, setups from gpaw-data)")
PYEOF
}

if check 2>/dev/null; then
  exit 0
fi

# System libraries (no-op when present).
need_sys=0
for h in /usr/include/xc.h /usr/include/fftw3.h; do
  [ -e "$h" ] || need_sys=1
done
if [ "$need_sys" -eq 1 ]; then
  bash "$HERE/install_system_deps.sh"
fi

CFG="$(mktemp -d)/siteconfig.py"
cat > "$CFG" <<'CFGEOF'
# GPAW build configuration written by prescreen's scripts/install_gpaw.sh
mpi = False            # serial build; mpicc may exist on the machine but is not wanted
compiler = 'g++'       # GPAW 26.x compiles its C sources as C++
fftw = True
libraries += ['fftw3', 'blas']
noblas = False         # fail loudly instead of silently building without BLAS
nolibxc = False        # fail loudly instead of silently building without libxc
CFGEOF

echo "install_gpaw: building gpaw==$GPAW_VERSION from source (a few minutes)"
# --no-cache-dir: never reuse a wheel cached from a build with another configuration.
# The project's constraints keep numpy/scipy/ase at the versions the rest was tested with.
CONSTRAINTS=()
[ -f constraints.txt ] && CONSTRAINTS=(-c constraints.txt)
GPAW_CONFIG="$CFG" "$PY" -m pip install -q --no-cache-dir "${CONSTRAINTS[@]}" \
  --no-binary gpaw \
  "gpaw==$GPAW_VERSION" "gpaw-data==$GPAW_DATA_VERSION"
rm -rf "$(dirname "$CFG")"

check
