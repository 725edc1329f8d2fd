"""Shared test fixtures."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.profile import demo_profile_path, load_profile


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)


@pytest.fixture(scope="session")
def demo_profile():
    return load_profile(demo_profile_path())
