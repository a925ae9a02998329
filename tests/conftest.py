"""Shared fixtures: float64 everywhere, a seeded key, warnings as errors (set in pyproject)."""
import os

os.environ.setdefault("FE_TOOL_PROGRESS", "0")  # no progress bars in test logs

import jax

jax.config.update("jax_enable_x64", True)

import pytest


@pytest.fixture
def key():
    return jax.random.key(20261202)


@pytest.fixture(autouse=True, scope="module")
def _release_compiled_code():
    """Drop JAX's compiled executables after each test module.

    A single process that compiles several hundred executables crashed natively inside
    XLA (once in the cache writer, once in compilation) after ~140 tests; releasing them
    per module keeps the process small.
    """
    yield
    jax.clear_caches()


@pytest.fixture
def saved_figures(monkeypatch):
    """Every matplotlib Figure written by savefig during a test, in order."""
    from matplotlib.figure import Figure

    saved = []
    original = Figure.savefig

    def spy(self, *args, **kwargs):
        saved.append(self)
        return original(self, *args, **kwargs)

    monkeypatch.setattr(Figure, "savefig", spy)
    return saved
