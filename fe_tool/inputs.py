"""Checks of user input made before any long computation: energies, starts, kT.

Each failure raises ``ValueError`` naming the problem and the fix.
"""
from __future__ import annotations

from typing import Callable

import jax
import jax.numpy as jnp
import numpy as np

from .options import check_kT

_TRACE_ERRORS = (jax.errors.ConcretizationTypeError, jax.errors.TracerBoolConversionError,
                 jax.errors.TracerIntegerConversionError, jax.errors.TracerArrayConversionError)


def _trace_value_and_grad(fn: Callable, start: jnp.ndarray, label: str):
    """Energy and gradient at ``start`` through ``jax.jit``, as every sampler calls it.

    Tracing under ``jit`` (not only ``grad``) finds Python branches on values and numpy
    conversions now, with our message, instead of seconds into sampling.
    """
    try:
        return jax.jit(jax.value_and_grad(lambda x: jnp.asarray(fn(x))))(start)
    except _TRACE_ERRORS as err:
        raise ValueError(f"energy_{label} cannot be compiled by JAX: it branches on or converts a traced value "
                         f"({type(err).__name__}). Write it with jax.numpy operations only: use jnp.where instead "
                         "of `if` on values, jnp instead of numpy or math functions, no float()/int() of "
                         "coordinates") from None
    except TypeError as err:
        try:
            out = jax.eval_shape(fn, start)
        except Exception:  # noqa: BLE001 - any failure here means the function cannot be traced
            out = None
        if out is not None and getattr(out, "shape", ()) != ():
            raise ValueError(f"energy_{label} must return a scalar, but returns shape {out.shape}; "
                             "sum the terms (e.g. jnp.sum) before returning") from None
        raise ValueError(f"energy_{label} could not be traced by JAX at start_{label} ({type(err).__name__}: "
                         f"{str(err)[:200]}). Write it with jax.numpy operations only") from None
    except Exception as err:  # noqa: BLE001 - a user function can raise anything; say which one failed
        raise ValueError(f"energy_{label} failed at start_{label} ({type(err).__name__}: {str(err)[:200]}); "
                         "check it can be called on one configuration array of the start's shape") from None


def check_energy(fn: Callable, start: jnp.ndarray, label: str, kT: float) -> None:
    """``fn`` is a JAX-compilable scalar function with a finite value and gradient at ``start``."""
    if not callable(fn):
        raise ValueError(f"energy_{label} must be a callable taking one configuration array, got {type(fn).__name__}")
    value, grad = _trace_value_and_grad(fn, start, label)
    if np.ndim(value) != 0:
        raise ValueError(f"energy_{label} must return a scalar, but returns shape {np.shape(value)}")
    if not np.isfinite(float(value)):
        raise ValueError(f"energy_{label} is not finite at start_{label} ({float(value)}); give a start configuration "
                         "where the energy is finite (no overlapping particles, inside any walls)")
    if not np.all(np.isfinite(np.asarray(grad))):
        raise ValueError(f"the gradient of energy_{label} is not finite at start_{label}; move the start away from "
                         "singular points (coincident particles, r = 0 of a pair term)")
    del kT


def check_start(start, label: str) -> jnp.ndarray:
    """A start configuration: a non-empty real array of at least one dimension, all finite."""
    try:
        arr = np.asarray(start)
    except Exception:  # noqa: BLE001 - ragged lists and the like
        arr = np.asarray([], dtype=object)
    if arr.dtype.kind not in "fiu" or arr.size == 0 or arr.ndim == 0:
        raise ValueError(f"start_{label} must be a non-empty array of numbers with at least one dimension (a vector "
                         f"or N×3 coordinates), got {type(start).__name__} with shape {getattr(arr, 'shape', '?')}; "
                         "wrap a single number as [x]")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"start_{label} contains NaN or inf coordinates")
    return jnp.asarray(arr, dtype=jnp.float64)


def validate_inputs(energy_a, energy_b, start_a, start_b, kT) -> tuple[jnp.ndarray, jnp.ndarray, float]:
    kT = check_kT(kT)
    x_a, x_b = check_start(start_a, "a"), check_start(start_b, "b")
    if x_a.shape != x_b.shape:
        raise ValueError(f"start_a has shape {x_a.shape} but start_b has shape {x_b.shape}; both end states "
                         "must describe the same configuration space (same number of particles/coordinates)")
    check_energy(energy_a, x_a, "a", kT)
    check_energy(energy_b, x_b, "b", kT)
    return x_a, x_b, kT
