"""Shared fixtures. Randomness is always a seeded numpy Generator."""

import numpy as np
import pytest
import zmq
from hypothesis import HealthCheck, settings

# Property tests never fail on time: no per-example deadline and no "data generation too slow"
# health check, both of which measure wall-clock time on a machine that may be busy. Loaded
# here, before any test module builds its @settings, so those inherit it.
settings.register_profile("brimline", deadline=None,
                          suppress_health_check=[HealthCheck.too_slow])
settings.load_profile("brimline")


@pytest.fixture
def rng():
    """A fresh, seeded generator per test (reproducible, independent of test order)."""
    return np.random.default_rng(20261201)


@pytest.fixture
def ctx():
    """A private ZeroMQ context per test, destroyed with LINGER 0 so no test waits on another's
    unsent messages."""
    context = zmq.Context()
    yield context
    context.destroy(linger=0)
