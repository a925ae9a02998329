"""BAR along a ladder of windows: Δf(0 → K−1) = Σ_k Δf(k → k+1), each step by BAR.

For neighbouring windows k and k+1 the forward works are u_{k+1} − u_k on the samples of k
and the reverse works u_k − u_{k+1} on the samples of k+1 (Bennett 1976, J. Comput. Phys. 22,
245).  Variances are added.  Window k's samples enter both the (k−1, k) and the (k, k+1) step,
so the steps are not strictly independent; the neglected covariance is usually small, and
:func:`fe_tool.estimators.mbar.mbar` gives the full covariance when it matters.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np

from fe_tool.estimators.bar import bar
from fe_tool.estimators.mbar import check_reduced_energies
from fe_tool.estimators.record import Estimate

__all__ = ["neighbour_bar"]


def neighbour_bar(reduced_energies: Any, samples_per_state: Any) -> Estimate:
    """Sum of BAR estimates between neighbouring windows.

    Args:
        reduced_energies: u_k(x_n) (dimensionless), shape ``(K, N)``; only the rows k−1, k,
            k+1 of each window's own samples are used.  Finite, or +inf outside a sample's own
            window (validated as for :func:`~fe_tool.estimators.mbar.mbar`).
        samples_per_state: N_k > 0, shape ``(K,)``, summing to N; samples are ordered by the
            window they were drawn from (the same layout as :func:`~fe_tool.estimators.mbar.mbar`).

    Returns:
        :class:`Estimate` of f_{K−1} − f_0 (``method="bar-ladder"``, asymptotic error);
        ``details``: ``step_delta_f``, ``step_stderr``, ``step_overlap`` (lists of K−1),
        ``smallest_overlap`` and any per-step ``warnings``.

    Example:
        >>> neighbour_bar(reduced_energies, [500] * 11).delta_f
    """
    energies, counts = check_reduced_energies(reduced_energies, samples_per_state)
    if counts.size < 2:
        raise ValueError("neighbour_bar needs at least two windows")
    if np.any(counts == 0):
        raise ValueError(f"every window needs samples; samples_per_state has zeros at {np.flatnonzero(counts == 0).tolist()}")
    edges = np.concatenate([[0], np.cumsum(counts.astype(np.int64))])
    steps, errors, overlaps, warnings = [], [], [], []
    for k in range(counts.size - 1):
        here = slice(edges[k], edges[k + 1])
        there = slice(edges[k + 1], edges[k + 2])
        forward = energies[k + 1, here] - energies[k, here]
        reverse = energies[k, there] - energies[k + 1, there]
        step = bar(forward, reverse)   # +inf energies give +inf works: zero weight, counted
        steps.append(step.delta_f)
        errors.append(step.stderr)
        overlaps.append(step.details["overlap"])
        if "warning" in step.details:
            warnings.append(f"windows {k}-{k + 1}: {step.details['warning']}")
    details: dict[str, Any] = {
        "step_delta_f": [float(v) for v in steps],
        "step_stderr": [float(v) for v in errors],
        "step_overlap": [float(v) for v in overlaps],
        "smallest_overlap": float(min(overlaps)),
    }
    if warnings:
        details["warnings"] = warnings
    total_error = math.sqrt(sum(e * e for e in errors))
    return Estimate(float(sum(steps)), total_error, "bar-ladder", "asymptotic", int(counts.sum()), details)
