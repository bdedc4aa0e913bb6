"""Shared fixtures: one seed for the whole suite, and the small demo session built once."""

from __future__ import annotations

import numpy as np
import pytest

SEED = 20261202


@pytest.fixture
def rng() -> np.random.Generator:
    """The suite's one random generator; every test that draws numbers takes it."""
    return np.random.default_rng(SEED)


@pytest.fixture(scope="session")
def demo_small_data(tmp_path_factory: pytest.TempPathFactory):
    """The small demo preset, generated once per test session (both input layouts)."""
    from demo_volume.generate import generate

    out = tmp_path_factory.mktemp("demo-small")
    generate(out, preset="small", seed=0, layout="both")
    return out


@pytest.fixture(scope="session")
def demo_default_data(tmp_path_factory: pytest.TempPathFactory):
    """The default demo preset (what ``make demo`` runs on), generated once per test session."""
    from demo_volume.generate import generate

    out = tmp_path_factory.mktemp("demo-default")
    generate(out, preset="default", seed=0, layout="per-volume")
    return out
