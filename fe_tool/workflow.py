"""``estimate()``: from two energy functions to ΔF with an honest error bar.

The entry point every caller uses (the CLI, batches and notebooks too): one validation of
every input and option (:func:`validate_call`, before any computation; refusals raise
:class:`~fe_tool.options.InputError`), then the chosen route of :mod:`fe_tool.routes` —
each route plans its budget before it computes anything, then runs its stages.
"""
from __future__ import annotations

import time
from typing import Any

import equinox as eqx
import jax.numpy as jnp
import numpy as np

from .inputs import check_energy, validate_inputs
from .options import CONTROL_MODES, METHODS, OPTION_NAMES, InputError, Options, check_options, check_seed  # noqa: F401
from .path import LinearPath
from .results import Result
from .routes.switching import DEFAULT_BUDGET, mark_diverged, plan_switching, run_switching

__all__ = ["DEFAULT_BUDGET", "OPTION_NAMES", "Options", "estimate", "mark_diverged", "validate_call"]


# ------------------------------------------------------------------ validation

def check_start_set(starts: Any, energy: Any, start: jnp.ndarray, label: str, kT: float) -> jnp.ndarray | None:
    """Validate a start set (``starts_a``/``starts_b``): k ≥ 1 configurations of ``start``'s shape, finite energies."""
    if starts is None:
        return None
    try:
        arr = np.asarray(starts, dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError(f"starts_{label} must be a list of configurations (k × {start.shape}), "
                         f"got {type(starts).__name__}") from None
    if arr.ndim != start.ndim + 1 or arr.shape[1:] != tuple(start.shape) or arr.shape[0] < 1:
        raise ValueError(f"starts_{label} must stack k ≥ 1 configurations of start_{label}'s shape {tuple(start.shape)} "
                         f"on a first axis (shape (k, {', '.join(map(str, start.shape))})), got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"starts_{label} contains NaN or inf coordinates")
    for i, x in enumerate(arr):
        try:
            check_energy(energy, jnp.asarray(x), label, kT)
        except ValueError as err:
            raise ValueError(f"starts_{label}[{i}]: {err}") from None
    return jnp.asarray(arr)


def _check_path(path, x_a, x_b) -> None:
    """A custom path must compile and be finite at both starts halfway along λ."""
    if isinstance(path, LinearPath):
        return
    for label, x in (("a", x_a), ("b", x_b)):
        try:
            u, g = eqx.filter_jit(lambda p, y: p.energy_and_grad(y, jnp.asarray(0.5)))(path, x)
        except Exception as err:  # noqa: BLE001 - a user path can raise anything
            raise ValueError(f"path: its energy at λ = 0.5 could not be computed at start_{label} "
                             f"({type(err).__name__}: {str(err)[:200]})") from None
        if not (np.isfinite(float(u)) and np.all(np.isfinite(np.asarray(g)))):
            raise ValueError(f"path: the energy or its gradient at λ = 0.5 is not finite at start_{label}; "
                             "give starts where every state along the path is finite")


def _check_reused_control(opts: Options, path, x_a) -> None:
    """A saved control must fit this system: checked from its header before any sampling."""
    if isinstance(opts.control, str) and opts.control not in CONTROL_MODES:
        from .control import check_control_fits

        check_control_fits(opts.control, path, x_a)


def validate_call(energy_a, energy_b, start_a, start_b, kT, seed, options: dict):
    """Every check of one ``estimate`` call, before any sampling: ``(opts, x_a, x_b, kT, seed, starts)``."""
    opts = check_options(options)
    seed = check_seed(seed)
    x_a, x_b, kT = validate_inputs(energy_a, energy_b, start_a, start_b, kT)
    starts = {"a": check_start_set(opts.starts_a, energy_a, x_a, "a", kT),
              "b": check_start_set(opts.starts_b, energy_b, x_b, "b", kT)}
    if opts.path is not None:
        _check_path(opts.path, x_a, x_b)
    return opts, x_a, x_b, kT, seed, starts


def estimate(energy_a, energy_b, start_a, start_b, *, kT: float = 1.0, seed: int = 0, **options) -> Result:
    """ΔF = F_B − F_A between two end-state potentials, with an honest error bar.

    Args:
        energy_a, energy_b: JAX-traceable functions U(x) -> scalar of one configuration
            (any shape: a vector, or N×3 coordinates), in the user's energy units.
        start_a, start_b: configurations where sampling of A and B begins (same shape).
        kT: thermal energy in the same units as the energies.
        seed: integer seed; the same seed reproduces the same numbers.
        **options: see :class:`~fe_tool.options.Options` (e.g. ``budget``, ``switching_steps``,
            ``trajectories``, ``schedule``, ``method``).

    Returns:
        :class:`~fe_tool.results.Result` with ``delta_f`` and ``stderr`` in the user's units.

    Raises:
        ValueError: bad input of any kind, before any sampling (the message names the fix).

    Example:
        >>> import jax.numpy as jnp, fe_tool
        >>> r = fe_tool.estimate(lambda x: 0.5 * jnp.sum(x**2), lambda x: 2.0 * jnp.sum((x - 1)**2),
        ...                      jnp.zeros(3), jnp.ones(3))   # ΔF = 1.5 ln 4 kT
    """
    t_start = time.perf_counter()
    try:
        opts, x_a, x_b, kT, seed, starts = validate_call(energy_a, energy_b, start_a, start_b, kT, seed, options)
    except ValueError as err:   # every refusal before computing is bad input, whatever raised it
        raise InputError(str(err)) from None
    path = opts.path if opts.path is not None else LinearPath(energy_a, energy_b, kT)
    if opts.method == "windows":
        from .routes.windows import plan_windows, run_windows

        try:
            plan = plan_windows(path, opts, opts.budget or DEFAULT_BUDGET)
        except ValueError as err:
            raise InputError(str(err)) from None
        return run_windows(path, x_a, x_b, kT, seed, starts, opts, plan, t_start)
    try:
        _check_reused_control(opts, path, x_a)
        budget, plan = plan_switching(path, opts)
    except ValueError as err:
        raise InputError(str(err)) from None
    return run_switching(path, x_a, x_b, kT, seed, starts, opts, budget, plan, t_start)
