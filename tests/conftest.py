"""Shared pytest fixtures and the Hypothesis settings profile."""

import os

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


@pytest.fixture(autouse=True, scope="session")
def _loop_cache_in_a_temporary_folder(tmp_path_factory):
    """The chain's on-disk design cache (stages/loop_cache.py) writes to the session's
    temporary folder, not the user's cache (subprocesses inherit the setting)."""
    before = os.environ.get("AUDIODSM_LOOP_CACHE")
    os.environ["AUDIODSM_LOOP_CACHE"] = str(tmp_path_factory.mktemp("loop-cache"))
    yield
    if before is None:
        os.environ.pop("AUDIODSM_LOOP_CACHE", None)
    else:
        os.environ["AUDIODSM_LOOP_CACHE"] = before
