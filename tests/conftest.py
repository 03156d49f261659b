"""Shared test configuration."""

import os

import numpy as np
import pytest
from hypothesis import settings

# Keep property tests quick on small CI machines; derandomised for reproducible CI runs.
settings.register_profile("ci", max_examples=40, deadline=None, derandomize=True)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))

# `dicert plan` caches results in the user's cache directory; tests use a private one.
if "DICERT_CACHE_DIR" not in os.environ:
    import atexit
    import shutil
    import tempfile

    _cache = tempfile.mkdtemp(prefix="dicert-test-cache-")
    os.environ["DICERT_CACHE_DIR"] = _cache
    atexit.register(shutil.rmtree, _cache, True)


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)
