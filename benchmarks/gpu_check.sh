#!/usr/bin/env bash
# The prepared GPU check: run on a machine with an NVIDIA GPU (never needed for CI).
# 1. make sure CuPy is importable (installs cupy-cuda12x into the active Python if missing and
#    the package index is reachable), 2. run the GPU tests (CuPy vs the CPU path on the same
#    input), 3. print `volrecon bench --device gpu` at 256²×32 and 1024²×64.
# Writes everything it prints to ${OUT:-.}/gpu_check.log as well.
set -uo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3}
log=${OUT:-.}/gpu_check.log
{
  nvidia-smi --query-gpu=name,driver_version,memory.total --format=csv || true
  "$PY" -c "import cupy" 2>/dev/null || "$PY" -m pip install -q cupy-cuda12x || true
  "$PY" -c "import cupy; print('cupy', cupy.__version__, 'device ok:', cupy.cuda.is_available())"
  "$PY" -m pip install -q --no-deps -e . 2>/dev/null || export PYTHONPATH=$PWD
  if "$PY" -c "import pytest" 2>/dev/null; then
    "$PY" -m pytest -q -p no:xvfb -p no:cacheprovider -o addopts="" tests/test_backend.py
  fi
  "$PY" -m volrecon.bench --device gpu --size 32 256 256 --size 64 1024 1024
  "$PY" -m volrecon.bench --device cpu --size 32 256 256
} 2>&1 | tee "$log"
