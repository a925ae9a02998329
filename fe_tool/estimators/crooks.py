"""Crooks Gaussian-crossing estimate from forward and reverse works.

Crooks' fluctuation theorem (Crooks 1999, Phys. Rev. E 60, 2721) says P_F(w)/P_R(−w) =
exp(w − Δf) for reduced works, so Δf is the work at which the forward density and the
mirrored reverse density cross.  Fitting a Gaussian to each set (Goette & Grubmüller 2009,
J. Comput. Chem. 30, 447) the crossing W* solves

    W²(1/σ_F² − 1/σ_R²) − 2W(μ_F/σ_F² + μ_R/σ_R²) + μ_F²/σ_F² − μ_R²/σ_R² + 2 ln(σ_F/σ_R) = 0,

taking the root between −μ_R and μ_F.  For Gaussian works this is exact; for other shapes it
is a model.  The error is a bootstrap over both work sets.  Non-finite works cannot be fitted:
any raises ``ValueError`` unless ``nonfinite="drop"`` (then counted in ``details``).
"""
from __future__ import annotations

from typing import Any

import numpy as np

from fe_tool.estimators.jarzynski import as_generator, check_works
from fe_tool.estimators.record import Estimate

__all__ = ["crooks_gaussian", "gaussian_crossing"]

_BLOCK_ELEMENTS = 1 << 21


def gaussian_crossing(mean_forward, std_forward, mean_reverse, std_reverse):
    """Work W* where N(W; μ_F, σ_F²) equals N(−W; μ_R, σ_R²) (arrays broadcast).

    The root between −μ_R and μ_F of the quadratic in the module docstring, computed with the
    cancellation-free form q = −(b + sign(b)√(b² − 4ac))/2, roots c/q and q/a.  When the two
    variances agree to within round-off the equation is linear and W* = (μ_F − μ_R)/2.  If no
    root lies between −μ_R and μ_F (possible for noisy samples) the root nearer to
    (μ_F − μ_R)/2 is taken.

    Example (Goette & Grubmüller 2009 form; docs/references.md §5c):
        >>> gaussian_crossing(5.0, 2.5, 1.0, 2.0)   # 1.85134071
    """
    mf, sf, mr, sr = np.broadcast_arrays(*(np.asarray(v, dtype=np.float64)
                                           for v in (mean_forward, std_forward, mean_reverse, std_reverse)))
    with np.errstate(divide="ignore", invalid="ignore"):   # a zero spread gives nan, checked by callers
        return _crossing(mf, sf, mr, sr)


def _crossing(mf, sf, mr, sr):
    inv_f, inv_r = 1.0 / (sf * sf), 1.0 / (sr * sr)
    a = inv_f - inv_r
    b = -2.0 * (mf * inv_f + mr * inv_r)
    c = mf * mf * inv_f - mr * mr * inv_r + 2.0 * np.log(sf / sr)
    midpoint = 0.5 * (mf - mr)
    equal = np.abs(a) <= 64.0 * np.finfo(np.float64).eps * (inv_f + inv_r)
    root_term = np.sqrt(np.maximum(b * b - 4.0 * a * c, 0.0))
    q = -0.5 * (b + np.where(b >= 0.0, root_term, -root_term))
    safe_q = np.where(q == 0.0, 1.0, q)
    safe_a = np.where(equal, 1.0, a)
    first = np.where(q == 0.0, midpoint, c / safe_q)
    second = np.where(equal, np.inf, q / safe_a)
    low, high = np.minimum(-mr, mf), np.maximum(-mr, mf)
    first_inside = (first >= low) & (first <= high)
    second_inside = (second >= low) & (second <= high)
    nearer_first = np.abs(first - midpoint) <= np.abs(second - midpoint)
    pick_first = (first_inside & ~second_inside) | ((first_inside == second_inside) & nearer_first)
    crossing = np.where(equal, midpoint, np.where(pick_first, first, second))
    return float(crossing) if crossing.ndim == 0 else crossing


def _moment_estimates(mf, vf, mr, vr) -> dict[str, Any]:
    """All Gaussian-model estimates from sample means and variances (arrays broadcast)."""
    return {
        "crossing": gaussian_crossing(mf, np.sqrt(vf), mr, np.sqrt(vr)),
        "mean_difference": 0.5 * (mf - mr),
        "fluctuation_dissipation": 0.5 * (mf - mr) - 0.25 * (vf - vr),
        "one_sided_forward": mf - 0.5 * vf,
        "one_sided_reverse": -mr + 0.5 * vr,
    }


def crooks_gaussian(
    work_forward: Any,
    work_reverse: Any,
    *,
    n_bootstrap: int = 400,
    rng: np.random.Generator | int | None = None,
    nonfinite: str = "raise",
) -> Estimate:
    """Δf = f_B − f_A at the crossing of the Gaussian fits to P_F(w) and P_R(−w).

    Args:
        work_forward: reduced works of A→B trajectories, shape ``(n_forward,)``, ≥ 2 values.
        work_reverse: reduced works of B→A trajectories, shape ``(n_reverse,)``, ≥ 2 values.
        n_bootstrap: bootstrap resamples (each set resampled on its own), ≥ 2.
        rng: numpy Generator or int seed; ``None`` uses a fixed seed (reproducible).
        nonfinite: ``"raise"`` (default) or ``"drop"``; ``"keep_inf"`` is refused because a
            Gaussian cannot be fitted to infinite works.

    Returns:
        :class:`Estimate` (``method="crooks-gaussian"``, ``error_kind="bootstrap"``).
        ``details``: ``mean_difference`` (μ_F − μ_R)/2, ``fluctuation_dissipation``
        (μ_F − μ_R)/2 − (σ_F² − σ_R²)/4, ``one_sided_forward`` μ_F − σ_F²/2,
        ``one_sided_reverse`` −μ_R + σ_R²/2, each with a bootstrap ``*_stderr``; the fitted
        ``mean_forward``, ``std_forward``, ``mean_reverse``, ``std_reverse``; counts.

    Example:
        >>> g = np.random.default_rng(1)
        >>> crooks_gaussian(g.normal(4, 2, 300), g.normal(0, 2, 300)).delta_f   # ≈ 2
    """
    if nonfinite == "keep_inf":
        raise ValueError("crooks_gaussian cannot fit +inf works; use nonfinite='raise' or 'drop'")
    forward, counts_f = check_works(work_forward, "work_forward", nonfinite)
    reverse, counts_r = check_works(work_reverse, "work_reverse", nonfinite)
    nf, nr = forward.size, reverse.size
    if nf < 2 or nr < 2:
        raise ValueError(f"crooks_gaussian needs at least 2 works per direction, got {nf} and {nr}")
    if n_bootstrap < 2:
        raise ValueError(f"n_bootstrap must be at least 2, got {n_bootstrap}")
    if forward.std() == 0.0 or reverse.std() == 0.0:
        raise ValueError("crooks_gaussian: a work set has zero spread; no Gaussian can be fitted")
    generator = as_generator(rng)
    point = _moment_estimates(forward.mean(), forward.var(ddof=1), reverse.mean(), reverse.var(ddof=1))

    rows = max(1, _BLOCK_ELEMENTS // max(nf, nr))
    resampled = {name: np.empty(n_bootstrap) for name in point}
    for start in range(0, n_bootstrap, rows):
        stop = min(n_bootstrap, start + rows)
        f_draw = forward[generator.integers(0, nf, size=(stop - start, nf))]
        r_draw = reverse[generator.integers(0, nr, size=(stop - start, nr))]
        block = _moment_estimates(f_draw.mean(1), f_draw.var(1, ddof=1), r_draw.mean(1), r_draw.var(1, ddof=1))
        for name, value in block.items():
            resampled[name][start:stop] = value
    # A resample whose works are all equal has no Gaussian fit (nan); it is left out and counted.
    degenerate = int(np.count_nonzero(~np.isfinite(resampled["crossing"])))
    stderr = {name: float(np.nanstd(value, ddof=1)) for name, value in resampled.items()}

    details: dict[str, Any] = {
        "mean_forward": float(forward.mean()), "std_forward": float(forward.std(ddof=1)),
        "mean_reverse": float(reverse.mean()), "std_reverse": float(reverse.std(ddof=1)),
        "n_forward": nf, "n_reverse": nr, "n_bootstrap": int(n_bootstrap), "degenerate_resamples": degenerate,
        "dropped_works": counts_f["dropped_works"] + counts_r["dropped_works"],
    }
    for name in ("mean_difference", "fluctuation_dissipation", "one_sided_forward", "one_sided_reverse"):
        details[name] = float(point[name])
        details[name + "_stderr"] = stderr[name]
    return Estimate(float(point["crossing"]), stderr["crossing"], "crooks-gaussian", "bootstrap", nf + nr, details)
