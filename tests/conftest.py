"""Shared fixtures: one seed for the whole suite, and the small demo session built once."""

from __future__ import annotations

import numpy as np
import pytest

SEED = 20261202


@pytest.fixture
def rng() -> np.random.Generator:
    """The suite's one random generator; every test that draws numbers takes it."""
    return np.random.default_rng(SEED)
