"""Thermodynamic integration: Δf = ∫₀¹ ⟨∂u/∂λ⟩_λ dλ from per-window means.

Each window λ_i supplies the mean of the reduced derivative ∂u/∂λ (kT units) and its
standard error (from the window's own sampling, e.g. corrected for correlation).  The
integral is a weighted sum Σ_i c_i m_i and, windows being independent, its variance is
Σ_i c_i² s_i² (Kirkwood 1935, J. Chem. Phys. 3, 300 for the method).

Rules: ``"trapezoid"`` on any increasing λ grid; ``"gauss-legendre"`` at the nodes given by
:func:`gauss_legendre_windows` (exact for polynomials of degree 2n − 1; place the windows
there).  The discretisation error is not part of ``stderr``; for the trapezoid rule
``details["spline_minus_trapezoid"]`` (a cubic-spline integral minus the trapezoid value)
indicates its size.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy.interpolate import CubicSpline

from fe_tool.estimators.record import Estimate

__all__ = ["gauss_legendre_windows", "thermodynamic_integration", "trapezoid_weights"]


def gauss_legendre_windows(count: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss–Legendre nodes and weights on [0, 1] for ``count`` windows.

    Returns:
        ``(lambdas, weights)``, each of shape ``(count,)``; lambdas increasing, weights sum to 1.

    Example:
        >>> gauss_legendre_windows(2)   # (0.2113..., 0.7886...), (0.5, 0.5)
    """
    if int(count) != count or count < 1:
        raise ValueError(f"count must be a positive integer, got {count}")
    nodes, weights = np.polynomial.legendre.leggauss(int(count))
    return 0.5 * (nodes + 1.0), 0.5 * weights


def trapezoid_weights(lambdas: Any) -> np.ndarray:
    """Trapezoid weights c_i with ∫ g dλ ≈ Σ c_i g(λ_i) on an increasing grid."""
    grid = np.asarray(lambdas, dtype=np.float64)
    if grid.ndim != 1 or grid.size < 2:
        raise ValueError(f"lambdas must be 1-D with at least 2 values, got shape {grid.shape}")
    gaps = np.diff(grid)
    if not np.all(gaps > 0.0):
        raise ValueError("lambdas must be strictly increasing")
    weights = np.zeros_like(grid)
    weights[:-1] += 0.5 * gaps
    weights[1:] += 0.5 * gaps
    return weights


def thermodynamic_integration(
    lambdas: Any,
    mean_derivative: Any,
    stderr_derivative: Any | None = None,
    *,
    rule: str = "trapezoid",
    require_endpoints: bool = True,
) -> Estimate:
    """Δf = f_B − f_A by integrating per-window means of ∂u/∂λ over λ.

    Args:
        lambdas: window positions, shape ``(windows,)``, strictly increasing in [0, 1].
        mean_derivative: ⟨∂u/∂λ⟩ in each window (kT units), shape ``(windows,)``.
        stderr_derivative: standard error of each mean (kT), shape ``(windows,)``; ``None``
            gives ``stderr = nan``.
        rule: ``"trapezoid"`` or ``"gauss-legendre"`` (lambdas must then be the nodes of
            :func:`gauss_legendre_windows` for that count, to 1e-10).
        require_endpoints: for the trapezoid rule, insist on λ = 0 and λ = 1 being present
            (a partial integral over [λ_first, λ_last] otherwise).

    Returns:
        :class:`Estimate` (``method="ti-trapezoid"`` or ``"ti-gauss-legendre"``,
        ``error_kind="asymptotic"``); ``details``: ``windows``, ``lambda_range`` and, for the
        trapezoid rule with ≥ 3 windows, ``spline_minus_trapezoid``.

    Example:
        >>> lam, _ = gauss_legendre_windows(6)
        >>> thermodynamic_integration(lam, 1.5 / (1 + 3 * lam), 0.01 * np.ones(6), rule="gauss-legendre")
    """
    grid = np.asarray(lambdas, dtype=np.float64)
    means = np.asarray(mean_derivative, dtype=np.float64)
    if means.shape != grid.shape:
        raise ValueError(f"mean_derivative shape {means.shape} differs from lambdas shape {grid.shape}")
    if not np.all(np.isfinite(means)):
        raise ValueError(f"mean_derivative holds {int(np.count_nonzero(~np.isfinite(means)))} non-finite values")
    if stderr_derivative is None:
        errors = np.full(grid.shape, np.nan)
    else:
        errors = np.asarray(stderr_derivative, dtype=np.float64)
        if errors.shape != grid.shape:
            raise ValueError(f"stderr_derivative shape {errors.shape} differs from lambdas shape {grid.shape}")
        if np.any(errors < 0.0):
            raise ValueError("stderr_derivative must be non-negative")
    details: dict[str, Any] = {"windows": int(grid.size)}
    if rule == "trapezoid":
        weights = trapezoid_weights(grid)
        if require_endpoints and (abs(grid[0]) > 1e-12 or abs(grid[-1] - 1.0) > 1e-12):
            raise ValueError(f"trapezoid TI needs windows at λ = 0 and λ = 1, got [{grid[0]}, {grid[-1]}]; "
                             "pass require_endpoints=False for a partial integral")
        if grid.size >= 3:
            spline = float(CubicSpline(grid, means).integrate(grid[0], grid[-1]))
            details["spline_minus_trapezoid"] = spline - float(weights @ means)
    elif rule == "gauss-legendre":
        nodes, weights = gauss_legendre_windows(grid.size)
        if grid.ndim != 1 or np.max(np.abs(grid - nodes)) > 1e-10:
            raise ValueError(f"gauss-legendre TI needs windows at {np.round(nodes, 12).tolist()}; "
                             "use gauss_legendre_windows(count) to place them")
    else:
        raise ValueError(f"rule must be 'trapezoid' or 'gauss-legendre', got {rule!r}")
    details["lambda_range"] = [float(grid[0]), float(grid[-1])]
    delta_f = float(weights @ means)
    stderr = float(math.sqrt(np.sum(weights**2 * errors**2)))
    return Estimate(delta_f, stderr, "ti-" + rule, "asymptotic", int(grid.size), details)
