"""Shared fixtures: float64 everywhere, a seeded key, warnings as errors (set in pyproject)."""
import os

os.environ.setdefault("FE_TOOL_PROGRESS", "0")  # no progress bars in test logs

import jax

jax.config.update("jax_enable_x64", True)

import pytest


@pytest.fixture
def key():
    return jax.random.key(20261202)
