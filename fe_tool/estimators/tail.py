"""How heavy the tail of the weights e^{−w} is: a generalised Pareto shape k for exponential averages.

An exponential work average −ln mean e^{−w} is an importance-sampling estimate with weights
e^{−w}. Its variance is finite only when the upper tail of the weights decays faster than a
Pareto tail of shape ½; with shape k ≥ ½ the central limit theorem does not apply, the
error bar of the average does not exist, and samples that miss the rare low works look
deceptively well behaved. Following Pareto-smoothed importance sampling (Vehtari, Simpson,
Gelman, Yao & Gabry 2024, J. Mach. Learn. Res. 25(72), 1), the shape is estimated by fitting a
generalised Pareto distribution to the M = min(N/5, 3√N) largest weights above the next one,
with the empirical-Bayes estimator of Zhang & Stephens 2009 (Technometrics 51, 316) and the
weakly informative prior that pulls k towards ½ with the weight of 10 observations (as in the
first reference). k̂ < ½: the average converges at the usual rate; k̂ ≥ ½: it does not, and the
estimate is to be reported as unreliable.
"""
from __future__ import annotations

import math

import numpy as np

MIN_TAIL = 5                 # fewer tail weights than this: no shape estimate
UNRELIABLE_SHAPE = 0.5       # k at which the variance of the weights becomes infinite
_PRIOR_WEIGHT = 10.0         # observations' worth of the prior towards k = ½ (Vehtari et al. 2024)
_PRIOR_SCALE = 3.0           # Zhang & Stephens 2009 grid constant


def generalised_pareto_fit(exceedances: np.ndarray) -> tuple[float, float]:
    """Shape k and scale σ of a generalised Pareto fitted to positive ``exceedances``.

    Zhang & Stephens (2009) empirical-Bayes estimate: a grid of θ = −k/σ values, each with its
    profile likelihood, averaged with the likelihood as weight; k from the averaged θ. The
    returned k includes the weak prior towards ½ described in the module docstring.

    Example:
        >>> x = scipy.stats.genpareto.rvs(0.3, size=2000, random_state=1)
        >>> generalised_pareto_fit(x)[0]        # ≈ 0.3
    """
    x = np.sort(np.asarray(exceedances, dtype=np.float64))
    n = x.size
    if n < MIN_TAIL or not np.all(np.isfinite(x)) or x[-1] <= 0:
        return math.nan, math.nan
    grid = 30 + int(math.sqrt(n))
    quartile = x[max(0, int(n / 4 + 0.5) - 1)]
    j = np.arange(1, grid + 1, dtype=np.float64)
    theta = 1.0 / x[-1] + (1.0 - np.sqrt(grid / (j - 0.5))) / (_PRIOR_SCALE * max(quartile, 1e-300))
    shapes = np.log1p(-theta[:, None] * x).mean(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        profile = n * (np.log(-theta / shapes) - shapes - 1.0)
    profile = np.where(np.isfinite(profile), profile, -np.inf)
    if not np.any(np.isfinite(profile)):
        return math.nan, math.nan
    weights = np.exp(profile - profile.max())
    weights /= weights.sum()
    theta_mean = float(np.sum(theta * weights))
    shape = float(np.log1p(-theta_mean * x).mean())
    scale = -shape / theta_mean if theta_mean != 0 else float(np.mean(x))
    shape = (n * shape + _PRIOR_WEIGHT * 0.5) / (n + _PRIOR_WEIGHT)
    return shape, scale


def weight_tail_shape(works: np.ndarray) -> float:
    """Generalised Pareto shape k̂ of the upper tail of the weights e^{−w} (``nan`` with too few works).

    Args:
        works: reduced works (finite values are used; +inf works weigh zero and are ignored).
    """
    w = np.asarray(works, dtype=np.float64)
    log_weights = -w[np.isfinite(w)]
    n = log_weights.size
    tail = int(min(0.2 * n, 3.0 * math.sqrt(n)))
    if tail < MIN_TAIL:
        return math.nan
    ordered = np.sort(log_weights)
    top, threshold = ordered[-tail:], ordered[-tail - 1]
    # exceedances of the weights over the threshold, scaled by the largest weight (scale-free shape)
    exceedances = np.exp(top - top[-1]) - np.exp(threshold - top[-1])
    return generalised_pareto_fit(exceedances[exceedances > 0])[0]
