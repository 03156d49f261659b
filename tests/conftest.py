"""Shared test configuration."""

import os

import numpy as np
import pytest
from hypothesis import settings

# Keep property tests quick on small CI machines; derandomised for reproducible CI runs.
settings.register_profile("ci", max_examples=40, deadline=None, derandomize=True)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)
