"""Checks of user input made before any long computation: energies, starts, kT.

Each failure raises ``ValueError`` naming the problem and the fix.
"""
from __future__ import annotations

import math
from typing import Callable

import jax
import jax.numpy as jnp
import numpy as np


def check_energy(fn: Callable, start: jnp.ndarray, label: str, kT: float) -> None:
    if not callable(fn):
        raise ValueError(f"energy_{label} must be a callable taking one configuration array, got {type(fn).__name__}")
    try:
        value, grad = jax.value_and_grad(lambda x: jnp.asarray(fn(x)))(start)
    except TypeError as err:
        if "scalar" in str(err) or "shape" in str(err):
            out = jax.eval_shape(fn, start)
            raise ValueError(f"energy_{label} must return a scalar, but returns shape {getattr(out, 'shape', '?')}; "
                             "sum the terms (e.g. jnp.sum) before returning") from err
        raise ValueError(f"energy_{label} could not be traced by JAX at start_{label}: {err}. "
                         "Write it with jax.numpy operations only (no numpy conversions or Python branches on values)") from err
    if np.ndim(value) != 0:
        raise ValueError(f"energy_{label} must return a scalar, but returns shape {np.shape(value)}")
    if not np.isfinite(float(value)):
        raise ValueError(f"energy_{label} is not finite at start_{label} ({float(value)}); give a start configuration "
                         "where the energy is finite (no overlapping particles, inside any walls)")
    if not np.all(np.isfinite(np.asarray(grad))):
        raise ValueError(f"the gradient of energy_{label} is not finite at start_{label}; move the start away from "
                         "singular points (coincident particles, r = 0 of a pair term)")
    del kT


def validate_inputs(energy_a, energy_b, start_a, start_b, kT) -> tuple[jnp.ndarray, jnp.ndarray, float]:
    try:
        kT = float(kT)
    except (TypeError, ValueError):
        raise ValueError(f"kT must be a positive number in the energy functions' units, got {kT!r}") from None
    if not (kT > 0 and math.isfinite(kT)):
        raise ValueError(f"kT must be positive and finite (same units as the energies), got {kT}")
    arrays = []
    for label, s in (("a", start_a), ("b", start_b)):
        arr = np.asarray(s)
        if arr.dtype.kind not in "fiu" or arr.size == 0:
            raise ValueError(f"start_{label} must be a non-empty numeric array (a vector or N×3 coordinates)")
        if not np.all(np.isfinite(arr)):
            raise ValueError(f"start_{label} contains NaN or inf coordinates")
        arrays.append(jnp.asarray(arr, dtype=jnp.float64))
    if arrays[0].shape != arrays[1].shape:
        raise ValueError(f"start_a has shape {arrays[0].shape} but start_b has shape {arrays[1].shape}; both end states "
                         "must describe the same configuration space (same number of particles/coordinates)")
    check_energy(energy_a, arrays[0], "a", kT)
    check_energy(energy_b, arrays[1], "b", kT)
    return arrays[0], arrays[1], kT


