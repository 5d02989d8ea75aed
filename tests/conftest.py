"""Shared fixtures. Randomness is always a seeded numpy Generator."""

import numpy as np
import pytest
import zmq


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
