"""A work spread that a rare far tail cannot decide: 1.4826 × the median absolute deviation.

Equal to the standard deviation for Gaussian works (1.4826 = 1/Φ⁻¹(3/4); Hampel 1974, J. Am.
Stat. Assoc. 69, 383). Insertion-type switching produces rare overlap works of 1e3–1e30 kT that lie
far outside the region BAR uses; the standard deviation follows them, this measure does not.
"""
from __future__ import annotations

import numpy as np

MAD_TO_SD = 1.4826


def robust_spread(works) -> float:
    """1.4826 × median |w − median w| over the finite works; ``nan`` with fewer than two."""
    finite = np.asarray(works, dtype=np.float64)
    finite = finite[np.isfinite(finite)]
    if finite.size < 2:
        return float("nan")
    return float(MAD_TO_SD * np.median(np.abs(finite - np.median(finite))))
