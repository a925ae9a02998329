"""Bennett acceptance ratio for forward and reverse works (nonequilibrium or equilibrium).

Maximum-likelihood form (Bennett 1976, J. Comput. Phys. 22, 245; Shirts, Bair, Hooker &
Pande 2003, Phys. Rev. Lett. 91, 140601): with M = ln(n_F/n_R) and the Fermi function
fermi(x) = 1/(1 + eˣ), Δf = f_B − f_A solves

    Σ_i fermi(M + w_F,i − Δf) = Σ_j fermi(−M + w_R,j + Δf).

For equilibrium data w_F = u_B − u_A on samples of A and w_R = u_A − u_B on samples of B.
The equation is solved in logs (log-sum-exp of −logaddexp(0, x)), so no sum underflows and no
exponential overflows; the left side minus the right side rises monotonically with Δf from
−∞ to +∞, so a bracket always exists and is found by widening from the range of the data.

Asymptotic variance (Shirts et al. 2003), with the average over all N = n_F + n_R pooled
values w ∈ {w_F} ∪ {−w_R}:

    Var(Δf) = (1/N) [ ⟨1/(2 + 2cosh(M + w − Δf))⟩⁻¹ − N/n_F − N/n_R ].

No overlap: when every forward work lies above every negated reverse work BAR still returns
the root, but it is then set by the tails of the Fermi functions, not by data in common.
The function does not raise in that case (a batch must not die on one bad pair); it returns
the estimate with ``details["warning"]`` set and the overlap scalar (see :func:`work_overlap`)
reported, so the diagnostics can say so in words.

Non-finite works follow :func:`fe_tool.estimators.jarzynski.check_works`: +inf works are kept
by default (their Fermi factors are exactly zero, they still count in n_F or n_R).
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy.optimize import brentq
from scipy.special import logsumexp

from fe_tool.estimators.jarzynski import as_generator, check_works
from fe_tool.estimators.record import Estimate

__all__ = ["bar", "bar_variance", "solve_bar", "work_overlap"]


def _log_fermi(x: np.ndarray) -> np.ndarray:
    """ln 1/(1 + eˣ), finite for all finite x and −inf at x = +inf, without overflow."""
    return -np.logaddexp(0.0, x)


def _imbalance(delta_f: float, forward: np.ndarray, reverse: np.ndarray, shift: float) -> float:
    """ln Σ fermi(M + w_F − Δf) − ln Σ fermi(−M + w_R + Δf); increasing in Δf."""
    return float(logsumexp(_log_fermi(shift + forward - delta_f))
                 - logsumexp(_log_fermi(-shift + reverse + delta_f)))


def solve_bar(work_forward: np.ndarray, work_reverse: np.ndarray, *, guess: float | None = None,
              width: float | None = None) -> float:
    """Root Δf of the BAR equation (arrays already validated; +inf works allowed).

    Args:
        work_forward, work_reverse: reduced works, 1-D, each with at least one finite value.
        guess, width: optional starting bracket ``[guess − width, guess + width]`` (e.g. from a
            previous solve); otherwise the bracket starts at the range of the pooled works.
    Returns:
        Δf in kT units.
    """
    forward = np.asarray(work_forward, dtype=np.float64)
    reverse = np.asarray(work_reverse, dtype=np.float64)
    for name, works in (("work_forward", forward), ("work_reverse", reverse)):
        if works.ndim != 1 or not np.any(np.isfinite(works)) or np.any(np.isnan(works) | (works == -np.inf)):
            raise ValueError(f"{name} must be 1-D with at least one finite value and no NaN or -inf "
                             "(use check_works first)")
    shift = math.log(forward.size / reverse.size)
    if guess is None:
        pooled = np.concatenate([forward[np.isfinite(forward)], -reverse[np.isfinite(reverse)]])
        low = float(pooled.min()) - abs(shift) - 1.0
        high = float(pooled.max()) + abs(shift) + 1.0
    else:
        step = 1.0 if width is None else max(float(width), 1e-3)
        low, high = guess - step, guess + step
    step = max(high - low, 1.0)
    for _ in range(200):   # doubling steps: 200 reach far beyond any float range of works
        if _imbalance(low, forward, reverse, shift) < 0.0:
            break
        low -= step
        step *= 2.0
    else:
        raise ValueError("BAR: no lower bracket found; are the works finite?")
    step = max(high - low, 1.0)
    for _ in range(200):
        if _imbalance(high, forward, reverse, shift) > 0.0:
            break
        high += step
        step *= 2.0
    else:
        raise ValueError("BAR: no upper bracket found; are the works finite?")
    return float(brentq(_imbalance, low, high, args=(forward, reverse, shift), xtol=1e-13, rtol=4.0 * np.finfo(np.float64).eps, maxiter=500))


def _fermi_products(delta_f: float, forward: np.ndarray, reverse: np.ndarray) -> np.ndarray:
    """fermi(x)·fermi(−x) = 1/(2 + 2cosh x) for x = M + w − Δf over the pooled works."""
    shift = math.log(forward.size / reverse.size)
    x = shift + np.concatenate([forward, -reverse]) - delta_f
    return np.exp(_log_fermi(x) + _log_fermi(-x))


def bar_variance(work_forward: np.ndarray, work_reverse: np.ndarray, delta_f: float) -> float:
    """Asymptotic variance of the BAR estimate (Shirts et al. 2003 form; module docstring).

    Returns ``inf`` when the Fermi products all vanish (no overlap at double precision).
    """
    forward = np.asarray(work_forward, dtype=np.float64)
    reverse = np.asarray(work_reverse, dtype=np.float64)
    nf, nr = forward.size, reverse.size
    total = nf + nr
    mean_product = float(_fermi_products(delta_f, forward, reverse).mean())
    if mean_product <= 0.0:
        return math.inf
    return max(0.0, (1.0 / mean_product - total / nf - total / nr) / total)


def work_overlap(work_forward: Any, work_reverse: Any, delta_f: float | None = None) -> float:
    """Overlap in [0, 1] of the forward works with the negated reverse works.

    overlap = (1/n_F + 1/n_R) Σ fermi(x)·fermi(−x), x = M + w − Δf over the pooled works.
    It equals O_AB + O_BA of the two-state overlap matrix of Shirts & Chodera 2008 (J. Chem.
    Phys. 129, 124105), i.e. one minus its second eigenvalue: 1 for identical distributions,
    0 for none in common.  The BAR variance is N/(n_F n_R)·(1/overlap − 1).

    Args:
        work_forward, work_reverse: reduced works (+inf allowed, NaN raises).
        delta_f: the BAR estimate; solved for when ``None``.
    """
    forward, _ = check_works(work_forward, "work_forward", "keep_inf")
    reverse, _ = check_works(work_reverse, "work_reverse", "keep_inf")
    if delta_f is None:
        delta_f = solve_bar(forward, reverse)
    products = _fermi_products(delta_f, forward, reverse)
    return float(min(1.0, products.sum() * (1.0 / forward.size + 1.0 / reverse.size)))


def bar(
    work_forward: Any,
    work_reverse: Any,
    *,
    n_bootstrap: int = 0,
    rng: np.random.Generator | int | None = None,
    nonfinite: str = "keep_inf",
) -> Estimate:
    """Δf = f_B − f_A by the Bennett acceptance ratio.

    Args:
        work_forward: reduced works of A→B trajectories (or u_B − u_A on samples of A),
            shape ``(n_forward,)``.
        work_reverse: reduced works of B→A trajectories (or u_A − u_B on samples of B),
            shape ``(n_reverse,)``.
        n_bootstrap: 0 (default) reports the asymptotic error; > 1 resamples each set
            ``n_bootstrap`` times and reports the bootstrap standard deviation instead
            (``error_kind="bootstrap"``; the asymptotic value stays in ``details``).
        rng: numpy Generator or int seed for the bootstrap; ``None`` uses a fixed seed.
        nonfinite: ``"keep_inf"`` (default), ``"raise"`` or ``"drop"``; see
            :func:`fe_tool.estimators.jarzynski.check_works`.

    Returns:
        :class:`Estimate` with ``method="bar"``; ``details``: ``overlap`` (see
        :func:`work_overlap`), ``stderr_asymptotic``, ``stderr_bootstrap`` (if requested),
        ``n_forward``, ``n_reverse``, ``infinite_works``, ``dropped_works`` and ``warning``
        when the two work sets do not overlap at all.

    Example:
        >>> g = np.random.default_rng(2)
        >>> bar(g.normal(4, 2, 200), g.normal(0, 2, 200)).delta_f   # ≈ 2 (Gaussian work)
    """
    forward, counts_f = check_works(work_forward, "work_forward", nonfinite)
    reverse, counts_r = check_works(work_reverse, "work_reverse", nonfinite)
    nf, nr = forward.size, reverse.size
    delta_f = solve_bar(forward, reverse)
    variance = bar_variance(forward, reverse, delta_f)
    stderr_asymptotic = math.sqrt(variance)
    details: dict[str, Any] = {
        "overlap": work_overlap(forward, reverse, delta_f),
        "stderr_asymptotic": stderr_asymptotic,
        "n_forward": nf,
        "n_reverse": nr,
        "infinite_works": counts_f["infinite_works"] + counts_r["infinite_works"],
        "dropped_works": counts_f["dropped_works"] + counts_r["dropped_works"],
    }
    finite_f = forward[np.isfinite(forward)]
    finite_r = reverse[np.isfinite(reverse)]
    if finite_f.min() > (-finite_r).max():
        details["warning"] = ("no overlap: every forward work exceeds every negated reverse work; "
                              "the BAR value rests on distribution tails only")
    stderr, kind = stderr_asymptotic, "asymptotic"
    if n_bootstrap:
        if n_bootstrap < 2:
            raise ValueError(f"n_bootstrap must be 0 or at least 2, got {n_bootstrap}")
        generator = as_generator(rng)
        width = 4.0 * stderr_asymptotic + 0.1 if math.isfinite(stderr_asymptotic) else None
        resampled = np.empty(n_bootstrap)
        for index in range(n_bootstrap):
            f_draw = forward[generator.integers(0, nf, size=nf)]
            r_draw = reverse[generator.integers(0, nr, size=nr)]
            if not (np.isfinite(f_draw).any() and np.isfinite(r_draw).any()):
                resampled[index] = np.nan   # only +inf works drawn: no estimate for this resample
                continue
            resampled[index] = solve_bar(f_draw, r_draw, guess=delta_f, width=width)
        details["degenerate_resamples"] = int(np.count_nonzero(np.isnan(resampled)))
        stderr, kind = float(np.nanstd(resampled, ddof=1)), "bootstrap"
        details["stderr_bootstrap"] = stderr
        details["n_bootstrap"] = int(n_bootstrap)
    return Estimate(delta_f, stderr, "bar", kind, nf + nr, details)
