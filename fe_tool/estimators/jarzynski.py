"""Jarzynski's exponential work average for one switching direction, with an honest error.

The estimator (Jarzynski 1997, Phys. Rev. Lett. 78, 2690) for reduced works w = W/kT of
trajectories started in equilibrium is

    Δf_run = −ln (1/N) Σ_i exp(−w_i),

where Δf_run is the free energy of the state a trajectory ends in minus the one it starts in.
Forward works (A→B) give Δf = f_B − f_A directly; reverse works (B→A) give f_A − f_B, so
``direction="reverse"`` returns Δf = +ln (1/N) Σ exp(−w_R) for A→B.

Why the error bar is built the way it is: with few trajectories or large dissipation the
average is dominated by rare low-work trajectories that a small sample usually misses.  The
estimate is then biased (too high in its own direction) and both the delta-method and the
bootstrap error come out too small, precisely on the samples that missed the tail.  The
reported ``stderr`` (``error_kind="bias-aware"``) is the larger of

* ``sqrt(spread² + bias²)`` from the data: spread = max(delta-method, bootstrap) error, bias
  = max(leading-order 1/N bias from the data, bootstrap bias, Gaussian-model bias, 0), and
* the error of the same estimator on a Gaussian work model, expressed as a standard error:
  the 95th percentile of its |error| divided by 1.96, so that ±1.96·stderr is a 95 % interval
  under the model even when the model's errors are far from normal.

The model is the part that "sees" the unsampled tail.  It is a Gaussian matched to the
low-work half of the sample (centre = median, width from the works below it), because that
half decides the exponential average; the uncertainty of that width is propagated (a
replicate's width is drawn from its χ² sampling distribution), so a sample that happens to be
narrow does not get a narrow model.  Its finite-N errors are simulated, or taken from the
asymptotic formulas of Zuckerman & Woolf 2002 (Phys. Rev. Lett. 89, 180602) and Gore, Ritort
& Bustamante 2003 (PNAS 100, 12564) once N ≥ 10·exp(2·width²), where those are accurate.
Measured coverage of ±1.96·stderr (tests/test_estimators.py and development runs of 400–2000
repeats): 0.91–0.98 for Gaussian works with s = 0.5…3 and N = 10…1000 (the delta method
alone: 0.53–0.95), 0.96–0.98 for gamma-distributed works.  With fewer than about five works
the model width has one or two degrees of freedom and the error is large, as it should be.  For works with a heavier low-work
tail than a Gaussian no sample-based interval can be trusted; the diagnostics should say so.

Non-finite works (decided once here and shared by the other work estimators):

* NaN and −inf works are errors: ``ValueError`` naming the counts.
* +inf works (e.g. a trajectory that ran into a hard core) are legitimate in exponential
  averages: weight exp(−∞) = 0, still counted in N.  This is ``nonfinite="keep_inf"``, the
  default here and in :func:`fe_tool.estimators.bar.bar`; the count is reported in
  ``details["infinite_works"]``.
* ``nonfinite="raise"`` rejects any non-finite work; ``nonfinite="drop"`` removes all of them
  and reports the number in ``details["dropped_works"]``.  Nothing is ever dropped silently.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy.special import logsumexp

from fe_tool.estimators.record import Estimate
from fe_tool.estimators.tail import UNRELIABLE_SHAPE, weight_tail_shape

__all__ = [
    "DEFAULT_BOOTSTRAP_SEED",
    "as_generator",
    "check_works",
    "exponential_average",
    "exponential_average_asymptotics",
    "jarzynski",
]

DEFAULT_BOOTSTRAP_SEED = 731_905
"""Seed used when no generator is passed, so repeated calls give identical error bars."""

NONFINITE_POLICIES = ("keep_inf", "raise", "drop")

# Resampled arrays are built in blocks of at most this many numbers to bound memory.
_BLOCK_ELEMENTS = 1 << 21


def as_generator(rng: np.random.Generator | int | None) -> np.random.Generator:
    """A numpy Generator from ``rng``: a Generator is used as is, an int seeds a new one,
    ``None`` gives a Generator seeded with :data:`DEFAULT_BOOTSTRAP_SEED`."""
    if rng is None:
        return np.random.default_rng(DEFAULT_BOOTSTRAP_SEED)
    if isinstance(rng, np.random.Generator):
        return rng
    if isinstance(rng, (int, np.integer)) and not isinstance(rng, bool):
        return np.random.default_rng(int(rng))
    raise ValueError(f"rng must be a numpy Generator, an int seed or None, got {type(rng).__name__}")


def check_works(works: Any, name: str = "works", nonfinite: str = "keep_inf") -> tuple[np.ndarray, dict[str, int]]:
    """Validate a 1-D array of reduced works and apply the non-finite policy.

    Args:
        works: reduced works w = W/kT, shape ``(trajectories,)``.
        name: argument name used in error messages.
        nonfinite: ``"keep_inf"`` (+inf kept with zero weight; NaN/−inf raise),
            ``"raise"`` (any non-finite raises) or ``"drop"`` (all non-finite removed and counted).

    Returns:
        ``(works as float64, counts)`` with ``counts = {"infinite_works": kept +inf,
        "dropped_works": removed}``.

    Raises:
        ValueError: wrong shape, empty input, or non-finite works the policy does not allow.
    """
    if nonfinite not in NONFINITE_POLICIES:
        raise ValueError(f"nonfinite must be one of {NONFINITE_POLICIES}, got {nonfinite!r}")
    values = np.asarray(works, dtype=np.float64)
    if values.ndim != 1:
        raise ValueError(f"{name} must be a 1-D array of reduced works, got shape {values.shape}")
    nan_count = int(np.count_nonzero(np.isnan(values)))
    plus_inf = int(np.count_nonzero(values == np.inf))
    minus_inf = int(np.count_nonzero(values == -np.inf))
    bad = nan_count + plus_inf + minus_inf
    dropped = 0
    if bad:
        summary = (f"{name}: {nan_count} NaN, {plus_inf} +inf and {minus_inf} -inf among "
                   f"{values.size} works")
        if nonfinite == "raise":
            raise ValueError(f"{summary}; pass nonfinite='keep_inf' to keep +inf works with zero "
                             "weight or nonfinite='drop' to exclude all non-finite works (counted)")
        if nonfinite == "keep_inf" and (nan_count or minus_inf):
            raise ValueError(f"{summary}; NaN and -inf works have no meaning in a work average "
                             "(pass nonfinite='drop' to exclude them, they will be counted)")
        if nonfinite == "drop":
            values = values[np.isfinite(values)]
            dropped, plus_inf = bad, 0
    if values.size == 0:
        raise ValueError(f"{name} is empty (after applying nonfinite={nonfinite!r})")
    if not np.any(np.isfinite(values)):
        raise ValueError(f"{name}: all {values.size} works are +inf; no estimate is possible")
    return values, {"infinite_works": plus_inf, "dropped_works": dropped}


def exponential_average(works: np.ndarray, axis: int = -1) -> np.ndarray | float:
    """−ln of the mean of exp(−w) along ``axis`` (log-sum-exp; +inf works weigh zero).

    Args:
        works: reduced works, any shape.
    Returns:
        The exponential average in kT units; a float for 1-D input.
    """
    works = np.asarray(works, dtype=np.float64)
    count = works.shape[axis]
    value = -(logsumexp(-works, axis=axis) - math.log(count))
    return float(value) if np.ndim(value) == 0 else value


def exponential_average_asymptotics(work_variance: float, count: int) -> tuple[float, float]:
    """Large-N bias and variance of the exponential average for Gaussian works.

    ``bias = (exp(s²) − 1)/(2N)``, ``variance = (exp(s²) − 1)/N`` with s² the variance of the
    reduced work (Zuckerman & Woolf 2002, Phys. Rev. Lett. 89, 180602; Gore, Ritort &
    Bustamante 2003, PNAS 100, 12564).  Good to 5–10 % once N ≳ 10·exp(2s²); below that it
    overstates both.

    Example:
        >>> exponential_average_asymptotics(1.0, 100)   # (0.00859..., 0.01718...)
    """
    excess = math.expm1(float(work_variance)) if work_variance < 700 else math.inf
    return excess / (2 * count), excess / count


def _bootstrap_exponential_average(works: np.ndarray, resamples: int, rng: np.random.Generator) -> np.ndarray:
    """Exponential averages of ``resamples`` resamplings (with replacement) of ``works``."""
    count = works.size
    rows = max(1, _BLOCK_ELEMENTS // count)
    out = np.empty(resamples)
    for start in range(0, resamples, rows):
        stop = min(resamples, start + rows)
        picks = rng.integers(0, count, size=(stop - start, count))
        out[start:stop] = exponential_average(works[picks], axis=1)
    return out


_Z_90 = 1.2815515655446004  # standard normal 90 % quantile


def _lower_half_gaussian(works: np.ndarray) -> tuple[float, float, int]:
    """Centre, width and degrees of freedom of a Gaussian matched to the low-work side.

    The exponential average is governed by the low-work side, so the model copies that side:
    centre = median, width² = mean of (w − median)² over the works below the median (for a
    Gaussian both estimate μ and σ²; for works with a light left tail the model is not
    needlessly wide).  The degrees of freedom are the number of works below the median.

    A heavy low-work tail (left skew, e.g. the −(k_B − k_A)x²/2 terms of switching from a
    stiff to a soft well, whose tail is exponential) makes the deep quantiles lie further out
    than that width says; the width is then raised to (median − q_10%)/z_90%, the width of
    the Gaussian with the same 10 % quantile, with the degrees of freedom of the works below
    that quantile.  Without this, samples that missed the tail got the narrowest error bars.
    """
    centre = float(np.median(works))
    below = works[works < centre]
    if below.size == 0:
        return centre, 0.0, 0
    width = float(np.sqrt(np.mean((below - centre) ** 2)))
    degrees = max(1, int(below.size) - 1)
    if works.size >= 20:
        tail = float(np.quantile(works, 0.1))
        tail_width = (centre - tail) / _Z_90
        if tail_width > width:
            width, degrees = tail_width, max(1, int(np.sum(works < tail)) - 1)
    return centre, width, degrees


def _gaussian_model(centre: float, width: float, degrees: int, count: int, resamples: int,
                    rng: np.random.Generator) -> tuple[float, float, str]:
    """Bias and equivalent standard error of the N-sample exponential average on Gaussian works.

    Once N ≥ 10·exp(2·width²) the asymptotic closed forms are used (``"asymptotic"``:
    bias = v/2N, error² = v/N + bias², v = exp(width²) − 1).  Otherwise both are simulated
    (``"simulated"``) from ``resamples`` sets of N standard normal draws z:

    * bias: mean of ea(centre + width·z) − (centre − width²/2), the finite-N bias of a
      Gaussian with the fitted width (a bias estimate that sees the unsampled tail);
    * error: the 95th percentile of |error| / 1.96 when the width's own uncertainty is
      propagated: each set uses σ² = width²·ν/χ²_ν (ν = ``degrees``) and the error is measured
      from centre − σ²/2.  Without this a sample that happens to be narrow would get a narrow
      model too, and the interval would fail exactly where it is most needed.

    Returns ``(bias, error, mode)``.
    """
    variance = width * width
    if width == 0.0 or degrees == 0:
        return 0.0, 0.0, "asymptotic"
    if math.log(count) >= math.log(10.0) + 2.0 * variance:
        bias, var = exponential_average_asymptotics(variance, count)
        return bias, math.sqrt(var + bias * bias), "asymptotic"
    rows = max(1, _BLOCK_ELEMENTS // count)
    fixed = np.empty(resamples)
    spread = np.empty(resamples)
    for start in range(0, resamples, rows):
        stop = min(resamples, start + rows)
        normals = rng.standard_normal((stop - start, count))
        fixed[start:stop] = exponential_average(centre + width * normals, axis=1) - (centre - 0.5 * variance)
        variances = variance * degrees / rng.chisquare(degrees, stop - start)
        spread[start:stop] = (exponential_average(centre + np.sqrt(variances)[:, None] * normals, axis=1)
                              - (centre - 0.5 * variances))
    # The 95th percentile of |error| over 1.96: a root-mean-square would be ruled by the heavy
    # tail of width²·ν/χ²_ν at small ν (its mean is infinite for ν ≤ 2).
    return float(fixed.mean()), float(np.quantile(np.abs(spread), 0.95) / 1.959963984540054), "simulated"


TAIL_FRACTION = 0.2
MIN_TAIL_WORKS = 20  # θ̂ from fewer tail works is too noisy (relative s.d. 1/√n) to act on


def _tail_model(works: np.ndarray, count: int, resamples: int, rng: np.random.Generator) -> tuple[float, float, float]:
    """Bias and error of the exponential average when the low-work tail is exponential.

    The lowest ``TAIL_FRACTION`` of the works is fitted by an exponential tail below the
    quantile q: p(w) ∝ exp((w − q)/θ), θ by maximum likelihood (the mean distance below q).
    The weights e^{−w} then have a Pareto tail of shape θ, so their variance is infinite
    for θ ≥ ½ — the situation in which sample-based errors fail (a Pareto-tail check on
    importance weights as in Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25, 1).
    Sets of N works are redrawn from the fitted model (body resampled from the data, tail
    from the exponential with θ drawn from its own sampling distribution) and the spread of
    their exponential averages about the model's exact value gives the error: the 95th
    percentile of |error| over 1.96.  Returns ``(bias, error, θ)``.
    """
    q = float(np.quantile(works, TAIL_FRACTION))
    tail = works[works < q]
    body = works[works >= q]
    if tail.size < MIN_TAIL_WORKS or body.size < MIN_TAIL_WORKS:
        return 0.0, 0.0, math.nan  # too few works to judge the tail; the Gaussian model stands
    theta = float(np.mean(q - tail))
    if theta <= 0:
        return 0.0, 0.0, theta
    # exact exponential average under the model with the fitted θ (finite only for θ < 1)
    frac = tail.size / works.size
    log_body = logsumexp(-body) - math.log(body.size) + math.log(1 - frac)
    errors = np.empty(resamples)
    n_tail = rng.binomial(count, frac, resamples)
    thetas = theta * tail.size / rng.gamma(tail.size, 1.0, resamples)  # θ uncertainty (inverse-gamma)
    for i in range(resamples):
        if thetas[i] >= 1.0:   # the model's mean weight is infinite: the error is unbounded
            errors[i] = math.inf
            continue
        drawn = np.concatenate([rng.choice(body, count - n_tail[i]), q - rng.exponential(thetas[i], n_tail[i])])
        truth = -float(np.logaddexp(log_body, -q - math.log(1.0 - thetas[i]) + math.log(frac)))
        errors[i] = exponential_average(drawn) - truth
    finite = errors[np.isfinite(errors)]
    if finite.size < resamples // 2:
        return math.inf, math.inf, theta
    # draws with θ ≥ 1 are left out: whether the tail is that heavy is judged by the Pareto shape
    # of the weights (fe_tool.estimators.tail), which marks such averages unreliable
    return float(np.mean(finite)), float(np.quantile(np.abs(finite), 0.95) / 1.959963984540054), theta


def jarzynski(
    works: Any,
    *,
    direction: str = "forward",
    n_bootstrap: int = 400,
    rng: np.random.Generator | int | None = None,
    nonfinite: str = "keep_inf",
) -> Estimate:
    """Free-energy difference f_B − f_A from the works of one switching direction.

    Args:
        works: reduced works w = W/kT, shape ``(trajectories,)``; forward works come from
            A→B trajectories started in A, reverse works from B→A trajectories started in B.
        direction: ``"forward"`` gives Δf = −ln⟨exp(−w_F)⟩; ``"reverse"`` gives
            Δf = +ln⟨exp(−w_R)⟩ (the sign flip that turns a B→A estimate into A→B).
        n_bootstrap: resamples for the bootstrap and for the Gaussian-work model (≥ 2).
        rng: numpy Generator or int seed for the resampling; ``None`` uses a fixed seed so the
            result is reproducible.
        nonfinite: policy for non-finite works, see the module docstring (default: +inf kept
            with zero weight, NaN/−inf raise ``ValueError``).

    Returns:
        :class:`Estimate` with ``method="jarzynski"``, ``error_kind="bias-aware"`` and the
        ``stderr`` described in the module docstring.  ``details`` holds
        ``effective_sample_size`` (Kish: (Σx)²/Σx² with x = exp(−w)), ``stderr_delta_method``,
        ``stderr_bootstrap``, ``stderr_gaussian_model``, ``bias_leading_order``,
        ``bias_bootstrap``, ``bias_gaussian_model``, ``bias`` (the largest; all biases are
        signed as expected estimate minus truth for Δf(A→B)), ``mean_work``, ``work_std``,
        ``dissipated_work`` (mean finite work minus the estimate, in the run's direction),
        ``infinite_works``, ``dropped_works``, ``direction``, ``n_bootstrap``,
        ``gaussian_model`` (``"simulated"`` or ``"asymptotic"``), ``gaussian_model_width``.
        With fewer than two finite works ``stderr`` is ``nan`` and ``details["warning"]`` says
        why.

    Example:
        >>> w = np.random.default_rng(0).normal(2.5, 1.0, 500)   # Δf = 2.5 − 1/2 = 2
        >>> jarzynski(w).delta_f                                  # ≈ 2.0
    """
    if direction not in ("forward", "reverse"):
        raise ValueError(f"direction must be 'forward' or 'reverse', got {direction!r}")
    values, counts = check_works(works, "works", nonfinite)
    sign = 1.0 if direction == "forward" else -1.0
    count = values.size
    run_estimate = exponential_average(values)   # Δf in the direction the trajectories ran
    finite = values[np.isfinite(values)]
    details: dict[str, Any] = {"direction": direction, "n_bootstrap": int(n_bootstrap), **counts}
    details["mean_work"] = float(finite.mean())
    details["work_std"] = float(finite.std(ddof=1)) if finite.size > 1 else math.nan
    details["dissipated_work"] = float(finite.mean() - run_estimate)
    # Kish effective sample size of the weights exp(−w), in logs to avoid overflow.
    log_sum = logsumexp(-values)
    log_sum_squares = logsumexp(-2.0 * values)
    effective = math.exp(2.0 * log_sum - log_sum_squares)
    details["effective_sample_size"] = effective

    if count < 2 or finite.size < 2:
        details["warning"] = "fewer than two finite works: no error estimate"
        return Estimate(sign * run_estimate, math.nan, "jarzynski", "bias-aware", count, details)
    if n_bootstrap < 2:
        raise ValueError(f"n_bootstrap must be at least 2, got {n_bootstrap}")
    generator = as_generator(rng)

    # Delta method: relative sample variance of the weights, (N/(N−1))·(N/ESS − 1).
    relative_variance = max(0.0, count / (count - 1) * (count / effective - 1.0))
    stderr_delta = math.sqrt(relative_variance / count)
    bias_leading = relative_variance / (2 * count)

    resampled = _bootstrap_exponential_average(values, n_bootstrap, generator)
    stderr_boot = float(resampled.std(ddof=1))
    bias_boot = float(resampled.mean() - run_estimate)

    centre, left_width, degrees = _lower_half_gaussian(finite)
    bias_model, stderr_model, how = _gaussian_model(centre, left_width, degrees, count, n_bootstrap, generator)

    # the exponential-tail model always counts: a sample that missed a heavy tail looks light,
    # so gating the model on the sample's own tail would drop it exactly when it is needed
    bias_tail, stderr_tail, tail_scale = _tail_model(finite, count, n_bootstrap, generator)
    if not math.isfinite(stderr_tail):
        bias_tail = 0.0
    tail_shape = weight_tail_shape(values)

    bias = max(0.0, bias_leading, bias_boot, bias_model, bias_tail if math.isfinite(bias_tail) else 0.0)
    stderr = max(math.hypot(max(stderr_delta, stderr_boot), bias), stderr_model, stderr_tail)
    reliable = not (math.isfinite(tail_shape) and tail_shape >= UNRELIABLE_SHAPE)
    details.update(
        stderr_delta_method=stderr_delta,
        stderr_bootstrap=stderr_boot,
        stderr_gaussian_model=stderr_model,
        bias_leading_order=sign * bias_leading,
        bias_bootstrap=sign * bias_boot,
        bias_gaussian_model=sign * bias_model,
        bias=sign * bias,
        gaussian_model=how,
        gaussian_model_width=left_width,
        stderr_tail_model=stderr_tail,
        bias_tail_model=sign * bias_tail,
        tail_exponential_scale=tail_scale,
        tail_shape=tail_shape,
        reliable=reliable,
    )
    if not reliable:
        # the weights have infinite variance: no standard error exists, whatever the sample shows
        details["stderr_if_finite_variance"] = stderr
        details["unreliable_reason"] = (
            f"the weights e^(-w) have a heavy tail (Pareto shape {tail_shape:.2f} ≥ {UNRELIABLE_SHAPE}): "
            "their variance is infinite, so this one-sided average has no standard error and is usually "
            "too high in its own direction")
        stderr = math.inf
    return Estimate(sign * run_estimate, stderr, "jarzynski", "bias-aware", count, details)
