"""Shared fixtures. Randomness is always a seeded numpy Generator."""

import numpy as np
import pytest


@pytest.fixture
def rng():
    """A fresh, seeded generator per test (reproducible, independent of test order)."""
    return np.random.default_rng(20261201)
