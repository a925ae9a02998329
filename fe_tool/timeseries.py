"""Time-series statistics of sampler traces: integrated autocorrelation time and chain agreement.

Traces are ``trace[step, chain]``. Values that are infinite (∂u/∂λ where the other end forbids
a state) are rank-normalised first, which keeps the order and makes the moments finite.
"""
from __future__ import annotations

import math

import numpy as np


def ranked_if_infinite(trace: np.ndarray) -> np.ndarray:
    """Ranks of the values when some are infinite (e.g. ∂u/∂λ where the other end forbids a state).

    Rank-normalising keeps the order (so slow switching between finite and infinite values still
    shows as correlation and as chain disagreement; as in the rank-normalised R̂ of Vehtari et al.
    2021, Bayesian Analysis 16, 667) and makes the moments finite.
    """
    trace = np.asarray(trace, dtype=np.float64)
    if np.all(np.isfinite(trace)):
        return trace
    from scipy.stats import rankdata

    cleaned = np.where(np.isnan(trace), np.inf, trace)
    return rankdata(cleaned.reshape(-1)).reshape(trace.shape)



def autocorrelation_time(trace: np.ndarray, window_factor: float = 5.0) -> float:
    """Integrated autocorrelation time τ = 1 + 2 Σ ρ(t) of ``trace[step, chain]``.

    The autocovariance is centred on the grand mean over all chains (so chains that
    disagree show up as long correlation) and averaged over chains; the sum is cut
    by Sokal's automatic window (smallest M with M ≥ c·τ(M), c = 5; Sokal 1997,
    "Monte Carlo methods in statistical mechanics: foundations and new algorithms", in Functional Integration, NATO ASI Series B 361, Plenum [mem]).
    Returns ``len(trace)`` when no window fits (the trace is too short).
    """
    trace = ranked_if_infinite(trace)
    if trace.ndim == 1:
        trace = trace[:, None]
    n = trace.shape[0]
    centred = trace - trace.mean()
    variance = np.mean(centred**2)
    if n < 4 or variance <= 0 or not np.isfinite(variance):
        return 1.0
    size = 1 << int(math.ceil(math.log2(2 * n)))
    spectrum = np.fft.rfft(centred, n=size, axis=0)
    acov = np.fft.irfft(spectrum * np.conj(spectrum), n=size, axis=0)[:n].mean(axis=1)
    acov /= np.arange(n, 0, -1)
    rho = acov / acov[0]
    tau = 2.0 * np.cumsum(rho) - 1.0
    window = np.arange(n)
    ok = window >= window_factor * tau
    if not np.any(ok):
        return float(n)
    return float(max(1.0, tau[np.argmax(ok)]))


def split_mixing_statistic(trace: np.ndarray) -> float:
    """Split potential-scale reduction of ``trace[step, chain]`` (1.0 = chains agree).

    Each chain is split in halves; the between-half-chain variance of the means is
    compared with the mean within variance (Gelman & Rubin 1992, Stat. Sci. 7, 457;
    split form: Vehtari et al. 2021, Bayesian Analysis 16, 667).
    """
    trace = ranked_if_infinite(trace)
    n = trace.shape[0] // 2
    if n < 2:
        return float("nan")
    halves = np.concatenate([trace[:n], trace[n : 2 * n]], axis=1)
    within = np.mean(np.var(halves, axis=0, ddof=1))
    between = n * np.var(np.mean(halves, axis=0), ddof=1)
    if within <= 0:
        return 1.0 if between <= 0 else float("inf")
    pooled = (n - 1) / n * within + between / n
    return float(np.sqrt(pooled / within))
