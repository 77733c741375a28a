"""Shared pytest fixtures (keep small: every test module may use them)."""

from __future__ import annotations

import numpy as np
import pytest

SEED = 20261201


@pytest.fixture
def rng() -> np.random.Generator:
    """The one seeded generator every random test draws from."""
    return np.random.default_rng(SEED)


@pytest.fixture(autouse=True)
def _no_user_cache(tmp_path, monkeypatch):
    """Never touch the real user cache (WORLD analyses), whatever a test forgets to pass."""
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
