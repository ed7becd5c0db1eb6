#!/usr/bin/env bash
# One-time set-up on a fresh Debian machine: system libraries for headless Qt/GL (napari tests),
# a virtual environment in .venv and volrecon with every extra. Safe to run again.
set -euo pipefail
cd "$(dirname "$0")"
PY=${PYTHON:-python3}
need_apt=()
for pkg in xvfb libxcb-icccm4 libxcb-keysyms1; do
  dpkg -s "$pkg" >/dev/null 2>&1 || need_apt+=("$pkg")
done
if ((${#need_apt[@]})); then
  if [ "$(id -u)" = 0 ]; then SUDO=""; else SUDO="sudo"; fi
  $SUDO apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq --no-install-recommends "${need_apt[@]}"
fi
[ -x .venv/bin/python ] || "$PY" -m venv .venv
.venv/bin/python -m pip install -q --upgrade pip 2>&1 | grep -v "^WARNING: Location" || true
.venv/bin/python -m pip install -q -e '.[all]' 2>&1 | grep -v "^WARNING: Location" || true
.venv/bin/python -c "import volrecon, napari, distributed" || { echo "setup.sh: install failed" >&2; exit 1; }
