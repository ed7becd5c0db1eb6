"""Shared fixtures."""

from __future__ import annotations

import numpy as np
import pytest


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator: every test's random data is reproducible."""
    return np.random.default_rng(20261201)
