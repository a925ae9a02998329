"""Energies that are +inf (a forbidden region) or NaN (an error) somewhere the samplers go.

Hard wall: A is a 2-D unit harmonic well, B the same well confined to the square |x_i| < ½
(U_B = +inf outside).  Z_B/Z_A is the probability of the square under A, so
ΔF = −2 ln erf(½/√2) kT (Gaussian integral, docs/references.md §3c).  A forbidden region is
legitimate: every route must get this right, with +inf energies rejected by the samplers and
+inf works kept with zero weight.  A NaN energy is an error in the energy function: it must be
counted, said and flagged.
"""
from __future__ import annotations

import math

import jax.numpy as jnp
import numpy as np
import pytest
from scipy.special import erf

import fe_tool

EXACT_WALL = -2.0 * math.log(erf(0.5 / math.sqrt(2.0)))


def well(x):
    return 0.5 * jnp.sum(x**2)


def walled(x):
    return well(x) + jnp.where(jnp.all(jnp.abs(x) < 0.5), 0.0, jnp.inf)


@pytest.mark.parametrize("method", ["switching", "windows"])
def test_hard_wall_matches_its_closed_form(method):
    options = {"windows": np.array([0.0, 0.001, 0.01, 0.05, 0.2, 0.5, 1.0])} if method == "windows" else {}
    r = fe_tool.estimate(well, walled, np.zeros(2), np.zeros(2), budget=300_000, method=method, seed=3,
                         progress=False, **options)
    print(method, r.delta_f, r.stderr, EXACT_WALL, r.flagged, r.warnings)
    assert abs(r.delta_f - EXACT_WALL) < max(4.0 * r.stderr, 0.02)
    assert r.stderr < 0.2
    assert any("forbidden region" in w for w in r.warnings)
    assert sum(r.diagnostics[f"sampling_{e}"]["forbidden_proposals"] for e in "ab") > 0


@pytest.mark.parametrize("method", ["switching", "windows"])
def test_nan_energy_somewhere_is_counted_and_flagged(method):
    def broken(x):   # NaN wherever x_0 > 1 (a log of a negative number), else a harmonic well
        return 0.5 * jnp.sum((x - 0.3) ** 2) + jnp.where(x[0] > 1.0, jnp.log(-1.0), 0.0)

    r = fe_tool.estimate(well, broken, np.zeros(2), np.zeros(2), budget=150_000, method=method, seed=4,
                         progress=False)
    assert r.flagged
    assert any("NaN energy" in w for w in r.warnings)
