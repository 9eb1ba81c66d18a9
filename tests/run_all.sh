#!/usr/bin/env bash
# Build the test environment on a fresh Debian machine and run the whole suite.
# Installs the Debian packages the napari (Xvfb) and report (Chromium) tests need
# when they are missing, creates .venv, installs plexwash with all extras, runs pytest.
set -euo pipefail
cd "$(dirname "$0")/.."

need=()
for pkg in xvfb xauth libxcb-icccm4 libxcb-keysyms1 chromium; do
  dpkg-query -W -f='${Status}' "$pkg" 2>/dev/null | grep -q "install ok installed" || need+=("$pkg")
done
if [ ${#need[@]} -gt 0 ]; then
  echo "installing Debian packages: ${need[*]}"
  SUDO=""; [ "$(id -u)" -ne 0 ] && SUDO="sudo"
  $SUDO apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq --no-install-recommends "${need[@]}" >/dev/null
fi

PY=${PYTHON:-python3}
[ -x .venv/bin/python ] || "$PY" -m venv .venv
.venv/bin/python -m pip install -q --upgrade pip
.venv/bin/python -m pip install -q -e ".[studio,cluster,dev]"

export XDG_RUNTIME_DIR; XDG_RUNTIME_DIR=$(mktemp -d); chmod 700 "$XDG_RUNTIME_DIR"
unset QT_QPA_PLATFORM
export OMP_WAIT_POLICY=PASSIVE
export MPLBACKEND=Agg
xvfb-run -a -s "-screen 0 1280x1024x24" .venv/bin/python -m pytest "$@"
