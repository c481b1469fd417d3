"""Shared pytest fixtures and the Hypothesis settings profile."""

import numpy as np
import pytest
from hypothesis import settings

# Property tests run derandomized everywhere (CI included): the examples come from a fixed
# seed, so a run is repeatable and a failure reproduces on any machine.
settings.register_profile("audiodsm", derandomize=True, print_blob=True)
settings.load_profile("audiodsm")


@pytest.fixture
def rng():
    """A seeded generator so every test is reproducible."""
    return np.random.default_rng(20261201)
