"""The code itself: lint clean and strictly typed (STYLE.md §3, §10)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_ruff_clean():
    result = subprocess.run([sys.executable, "-m", "ruff", "check", "volrecon", "tests"],
                            cwd=ROOT, capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr


def test_mypy_strict_clean():
    result = subprocess.run([sys.executable, "-m", "mypy", "volrecon"], cwd=ROOT,
                            capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr
