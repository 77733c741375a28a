"""Shared pytest fixtures (keep small: every test module may use them)."""

from __future__ import annotations

import numpy as np
import pytest

SEED = 20261201


@pytest.fixture
def rng() -> np.random.Generator:
    """The one seeded generator every random test draws from."""
    return np.random.default_rng(SEED)
