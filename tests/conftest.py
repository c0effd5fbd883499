"""Shared fixtures: small synthetic stacks written in every supported format."""

from __future__ import annotations

import numpy as np
import pytest


@pytest.fixture
def small_stack_array():
    """A tiny TZCYX uint16 array with distinct values per timepoint and channel."""
    rng = np.random.default_rng(0)
    a = rng.integers(0, 1000, size=(4, 3, 2, 24, 20), dtype=np.uint16)
    a[:, :, 0] += np.arange(4, dtype=np.uint16)[:, None, None, None] * 1000
    return a
