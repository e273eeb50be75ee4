"""Shared fixtures: a seeded random generator and small real input files."""

from __future__ import annotations

import numpy as np
import pytest

from eigenstream.warmup import use_numba_cache_dir

# Before any test module imports pynndescent: this process then compiles into the same
# per-machine numba cache as the runs and workers the tests start (one fill, not two).
use_numba_cache_dir()


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20261202)
