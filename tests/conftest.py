"""Shared pytest fixtures.  Seeds come from fixtures; no global seeding."""

from __future__ import annotations

import numpy as np
import pytest


@pytest.fixture
def rng() -> np.random.Generator:
    """A fresh generator with a fixed seed for each test."""
    return np.random.default_rng(12345)
