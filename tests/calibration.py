"""Shared arithmetic of the calibration tests: interval coverage with binomial bounds, and width.

Coverage.  With R independent repeats of a well-calibrated 95 % interval the number of hits is
binomial, so the measured coverage has standard deviation sqrt(0.95·0.05/R) (0.0126 at R = 300).
Tests require coverage ≥ 0.95 − 4 of those (or ≥ 0.90, whichever is lower): a too-narrow interval
is the dangerous failure, and a 4σ margin leaves essentially no false alarms (common practice).

No claim.  An estimate whose stderr is +inf says "no error bar exists" (e.g. a one-sided
exponential average whose weights have infinite variance); its interval is the whole line and
counts as covering, and the tests report how many such estimates there were.

Width.  An upper limit on coverage cannot be both safe and informative at a few hundred repeats
(0.95 + 4σ ≈ 1), so needlessly wide error bars are caught instead by the ratio of the median reported
stderr (finite ones) to the observed root-mean-square error of the same estimates (the median,
not the rms, so that a few very wide intervals cannot decide it).  For a
calibrated estimator it is 1; its relative sampling spread is about 1/sqrt(2R) (4 % at R = 300).
"""
from __future__ import annotations

import math

import numpy as np

Z95 = 1.959963984540054


def coverage_floor(repeats: int, nominal: float = 0.95) -> float:
    """nominal − 4 binomial standard deviations, but never above 0.90."""
    return min(0.90, nominal - 4.0 * math.sqrt(nominal * (1.0 - nominal) / repeats))


def interval_coverage(estimates, errors, truth: float) -> dict:
    """Coverage of ±1.96·stderr intervals (an infinite stderr counts as covering) and the width ratio."""
    estimates = np.asarray(estimates, dtype=np.float64)
    errors = np.asarray(errors, dtype=np.float64)
    assert np.all(np.isfinite(estimates)), "every estimate must be a finite number"
    assert np.all(errors > 0) and not np.any(np.isnan(errors)), "every stderr must be positive (inf allowed)"
    deviation = estimates - truth
    claimed = np.isfinite(errors)
    hits = ~claimed | (np.abs(deviation) <= Z95 * np.where(claimed, errors, 1.0))
    rms_error = math.sqrt(float(np.mean(deviation[claimed] ** 2))) if claimed.any() else math.nan
    typical_stderr = float(np.median(errors[claimed])) if claimed.any() else math.nan
    return {"coverage": float(np.mean(hits)), "claimed": float(np.mean(claimed)),
            "coverage_claimed": float(np.mean(hits[claimed])) if claimed.any() else math.nan,
            "width_ratio": typical_stderr / rms_error if rms_error > 0 else math.nan,
            "mean_error": float(deviation.mean()), "repeats": int(estimates.size)}


def describe(name: str, report: dict) -> str:
    return (f"{name}: coverage {report['coverage']:.3f} over {report['repeats']} repeats "
            f"(floor {coverage_floor(report['repeats']):.3f}); claimed {report['claimed']:.2f}, coverage of claimed "
            f"{report['coverage_claimed']:.3f}; width ratio {report['width_ratio']:.2f}; mean error "
            f"{report['mean_error']:+.4f}")
