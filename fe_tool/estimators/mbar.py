"""Multistate reweighting estimate of free energies (Shirts & Chodera 2008, J. Chem. Phys.
129, 124105) from pooled equilibrium samples.

Inputs are ``reduced_energies[state, sample]`` = u_state(x_sample) for all K states on all N
pooled samples, and ``samples_per_state[k]`` = N_k, the samples being ordered by the state
they were drawn from (the first N_0 from state 0, and so on).  States with N_k = 0 are
allowed (evaluated but not sampled).

Estimating equations (f_0 = 0 fixed afterwards):

    f_i = −ln Σ_n exp(−u_i(x_n)) / Σ_k N_k exp(f_k − u_k(x_n)).

They are the stationarity conditions of the convex function

    F(f) = Σ_n ln Σ_k N_k exp(f_k − u_kn) − Σ_k N_k f_k,

with gradient g_i = N_i(Σ_n W_ni − 1) and Hessian H_ij = N_i δ_ij Σ_n W_ni − N_i N_j Σ_n W_ni W_nj,
where W_nk = exp(f_k − u_kn) / Σ_k′ N_k′ exp(f_k′ − u_k′n).  F is minimised by Newton steps
with a backtracking line search (analytic gradient and Hessian, one reference state held
fixed), starting from one self-consistent step from zero; an iteration whose Newton step
cannot be taken (singular Hessian, failed line search) makes a self-consistent step
f_i ← −ln Σ_n exp(−u_in)/Σ_k N_k exp(f_k − u_kn) instead.  Every
sum over states is a log-sum-exp, so any spread of energies is safe.

Asymptotic covariance, without N×N matrices: with the thin SVD W = U S Vᵀ (obtained from the
K×K factor R of W = QR),

    Θ = V S (I_K − S Vᵀ diag(N_k) V S)⁺ S Vᵀ,   Var(f_j − f_i) = Θ_ii + Θ_jj − 2Θ_ij.

The pseudo-inverse removes exactly the one null direction S Vᵀ diag(N_k) 1 that the
converged weights give; every other direction is inverted as it is, so weak overlap shows up
as a large variance rather than being cut away by a threshold.
"""
from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components
from scipy.special import logsumexp

from fe_tool.estimators.record import Estimate

__all__ = ["MultistateEstimate", "check_reduced_energies", "mbar", "mbar_expectations", "mbar_weights"]


@dataclasses.dataclass(frozen=True)
class MultistateEstimate:
    """Result of :func:`mbar`.

    Attributes:
        free_energies: reduced free energies f_k − f_0, shape ``(K,)`` (kT units).
        covariance: Cov(f_i − f_0, f_j − f_0), shape ``(K, K)`` (kT²); row/column 0 are zero.
        difference_stderr: standard error of f_j − f_i, shape ``(K, K)`` (kT).
        overlap: overlap matrix O = Wᵀ W diag(N_k), shape ``(K, K)``; rows sum to 1,
            O_ij is how much of state i's reweighted mass the samples of state j carry.
        endpoint: :class:`Estimate` of f_{K−1} − f_0 (``method="mbar"``).
        iterations: solver iterations used.
        converged: whether max_k |Σ_n W_nk − 1| reached the tolerance.
    """

    free_energies: np.ndarray
    covariance: np.ndarray
    difference_stderr: np.ndarray
    overlap: np.ndarray
    endpoint: Estimate
    iterations: int
    converged: bool


def check_reduced_energies(reduced_energies: Any, samples_per_state: Any) -> tuple[np.ndarray, np.ndarray]:
    """Validate ``reduced_energies`` (K, N) and ``samples_per_state`` (K,); return float64 / int64 arrays.

    Raises ``ValueError`` for wrong shapes, counts that do not sum to N, NaN or −inf
    energies, or a sample with infinite energy in the state it was drawn from (+inf elsewhere
    is allowed: that configuration is impossible in that state).
    """
    energies = np.asarray(reduced_energies, dtype=np.float64)
    if energies.ndim != 2:
        raise ValueError(f"reduced_energies must have shape (states, samples), got {energies.shape}")
    counts = np.asarray(samples_per_state)
    if counts.ndim != 1 or counts.size != energies.shape[0]:
        raise ValueError(f"samples_per_state must have one entry per state ({energies.shape[0]}), "
                         f"got shape {counts.shape}")
    if not np.all(counts == np.round(counts)) or np.any(counts < 0):
        raise ValueError("samples_per_state must hold non-negative integers")
    counts = counts.astype(np.int64)
    if counts.sum() != energies.shape[1]:
        raise ValueError(f"samples_per_state sums to {counts.sum()} but reduced_energies has "
                         f"{energies.shape[1]} samples")
    if counts.sum() == 0:
        raise ValueError("no samples")
    nan_count = int(np.count_nonzero(np.isnan(energies)))
    minus_inf = int(np.count_nonzero(energies == -np.inf))
    if nan_count or minus_inf:
        raise ValueError(f"reduced_energies holds {nan_count} NaN and {minus_inf} -inf values; "
                         "only finite values and +inf (impossible configurations) are allowed")
    own_state = np.repeat(np.arange(counts.size), counts)
    own_energy = energies[own_state, np.arange(energies.shape[1])]
    if not np.all(np.isfinite(own_energy)):
        bad = int(np.count_nonzero(~np.isfinite(own_energy)))
        raise ValueError(f"{bad} samples have infinite reduced energy in the state they were drawn from")
    return energies, counts


class _Objective:
    """F, its gradient and Hessian over the sampled states, sharing one exponential pass."""

    def __init__(self, energies: np.ndarray, counts: np.ndarray):
        self.energies = energies            # (S, N): sampled states only
        self.counts = counts.astype(np.float64)
        self.log_counts = np.log(self.counts)

    def __call__(self, f: np.ndarray):
        # Log-sum-exp over states done by hand so the exponentials are reused as the weights.
        scaled = (f + self.log_counts)[:, None] - self.energies
        peak = scaled.max(axis=0)
        np.subtract(scaled, peak, out=scaled)
        np.exp(scaled, out=scaled)
        total = scaled.sum(axis=0)
        log_denominator = peak + np.log(total)
        scaled /= total                     # scaled[k, n] = N_k W_nk; columns sum to 1
        column = scaled.sum(axis=1)         # N_k Σ_n W_nk
        value = float(log_denominator.sum() - self.counts @ f)
        noise = 64.0 * np.finfo(np.float64).eps * float(np.abs(log_denominator).sum() + np.abs(self.counts @ f))
        gradient = column - self.counts
        hessian = np.diag(column) - scaled @ scaled.T
        return value, noise, gradient, hessian, log_denominator, column

    def self_consistent(self, log_denominator: np.ndarray) -> np.ndarray:
        """f_k = −ln Σ_n exp(−u_kn − ln D_n), in logs so no state's sum can underflow."""
        terms = -self.energies - log_denominator
        peak = terms.max(axis=1, keepdims=True)
        np.subtract(terms, peak, out=terms)
        np.exp(terms, out=terms)
        f = -(peak[:, 0] + np.log(terms.sum(axis=1)))
        return f - f[0]


def _solve(energies: np.ndarray, counts: np.ndarray, initial: np.ndarray | None,
           tolerance: float, max_iterations: int) -> tuple[np.ndarray, np.ndarray, int, bool, float, str]:
    """Free energies of the sampled states (first one fixed at 0) and log denominators."""
    sampled = counts > 0
    objective = _Objective(energies[sampled], counts[sampled])
    size = int(sampled.sum())
    free = np.arange(1, size)
    if initial is None:
        f = np.zeros(size)
    else:
        start = np.asarray(initial, dtype=np.float64)
        if start.shape != counts.shape or not np.all(np.isfinite(start)):
            raise ValueError(f"initial_free_energies must be finite with shape {counts.shape}")
        f = start[sampled] - start[sampled][0]
    value, noise, gradient, hessian, log_den, column = objective(f)
    if initial is None:                     # one self-consistent step from zero
        f = objective.self_consistent(log_den)
        value, noise, gradient, hessian, log_den, column = objective(f)
    fallback_steps = 0
    iterations = 0

    def error_of(col):
        return float(np.max(np.abs(col / objective.counts - 1.0))) if size > 1 else 0.0

    error = error_of(column)
    while error > tolerance and iterations < max_iterations:
        iterations += 1
        accepted = None
        try:
            step = np.linalg.solve(hessian[np.ix_(free, free)], -gradient[free])
        except np.linalg.LinAlgError:
            step = None
        if step is not None and np.all(np.isfinite(step)):
            slope = float(gradient[free] @ step)
            scale = 1.0
            for _ in range(60):
                trial = f.copy()
                trial[free] += scale * step
                result = objective(trial)
                trial_error = error_of(result[5])
                # Objective decrease (Armijo, with round-off slack) or a halved equation error.
                if np.isfinite(result[0]) and (result[0] <= value + 1e-4 * scale * slope + noise
                                               or trial_error < 0.5 * error):
                    accepted = trial, result, trial_error
                    break
                scale *= 0.5
        if accepted is None:                # singular Hessian or failed line search
            fallback_steps += 1
            trial = objective.self_consistent(log_den)
            result = objective(trial)
            accepted = trial, result, error_of(result[5])
        f, (value, noise, gradient, hessian, log_den, column), error = accepted
    solver = "newton" if fallback_steps == 0 else f"newton with {fallback_steps} self-consistent steps"
    return f, log_den, iterations, error <= tolerance, error, solver


def _all_free_energies(energies: np.ndarray, counts: np.ndarray, f_sampled: np.ndarray,
                       log_den: np.ndarray) -> np.ndarray:
    """f for every state (unsampled ones from the converged denominators), shifted to f_0 = 0."""
    f = np.empty(counts.size)
    sampled = counts > 0
    f[sampled] = f_sampled
    for k in np.flatnonzero(~sampled):
        f[k] = -float(logsumexp(-energies[k] - log_den))
    return f - f[0]


def _log_denominator(energies: np.ndarray, counts: np.ndarray, f: np.ndarray) -> np.ndarray:
    """ln Σ_k N_k exp(f_k − u_kn) for every sample (log-sum-exp over the sampled states).

    Written out (max shift, exp, sum, log) because scipy's logsumexp is several times slower
    along the short state axis of a (K, N) array; the arithmetic is the same.
    """
    sampled = counts > 0
    scaled = (f[sampled] + np.log(counts[sampled]))[:, None] - energies[sampled]
    peak = scaled.max(axis=0)
    np.subtract(scaled, peak, out=scaled)
    np.exp(scaled, out=scaled)
    return peak + np.log(scaled.sum(axis=0))


def mbar_weights(reduced_energies: Any, samples_per_state: Any, free_energies: np.ndarray) -> np.ndarray:
    """Weights W[state, sample] = exp(f_k − u_kn)/Σ_k′ N_k′ exp(f_k′ − u_k′n), shape ``(K, N)``.

    Each row sums to 1 (at convergence) and Σ_k N_k W[k, n] = 1 for every sample.
    ``free_energies`` may carry any common shift.
    """
    energies, counts = check_reduced_energies(reduced_energies, samples_per_state)
    f = np.asarray(free_energies, dtype=np.float64)
    log_den = _log_denominator(energies, counts, f)
    return np.exp(f[:, None] - energies - log_den)


def _overlap_groups(overlap: np.ndarray) -> np.ndarray:
    """Labels of the groups of states linked by any non-zero overlap (connected components)."""
    _, labels = connected_components(csr_matrix((overlap + overlap.T) > 0.0), directed=False)
    return labels


def _theta(weights: np.ndarray, counts: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """Θ = V S (I − S Vᵀ diag(N) V S)⁺ S Vᵀ from weights of shape (columns, N).

    ``groups`` labels each column by its overlap group.  At convergence the null space of
    I − S Vᵀ diag(N) V S is spanned exactly by S Vᵀ diag(N) 1_g for each group g; the
    pseudo-inverse is taken by projecting out those directions and inverting the rest as it
    is (no eigenvalue threshold that could hide weak overlap).
    """
    factor = np.linalg.qr(weights.T, mode="r")          # W = Q R, R is (columns, columns)
    _, singular, right_t = np.linalg.svd(factor)
    scaled = right_t.T * singular                       # V S
    size = singular.size
    inner = np.eye(size) - (scaled.T * counts) @ scaled
    inner = 0.5 * (inner + inner.T)
    indicator = (groups[:, None] == np.unique(groups)[None, :]).astype(np.float64)
    null = scaled.T @ (counts[:, None] * indicator)     # one null direction per group
    null = null[:, np.linalg.norm(null, axis=0) > 0.0]
    basis = np.linalg.qr(null)[0] if null.shape[1] else np.zeros((size, 0))
    projector = np.eye(size) - basis @ basis.T
    try:
        inverse = np.linalg.inv(projector @ inner @ projector + basis @ basis.T)
    except np.linalg.LinAlgError:                       # overlap lost to round-off: no finite error
        return np.full((size, size), np.inf)
    return scaled @ (projector @ inverse @ projector) @ scaled.T


def mbar(
    reduced_energies: Any,
    samples_per_state: Any,
    *,
    initial_free_energies: np.ndarray | None = None,
    tolerance: float = 1e-12,
    max_iterations: int = 200,
) -> MultistateEstimate:
    """Reduced free energies of K states from pooled samples, relative to state 0.

    Args:
        reduced_energies: u_k(x_n) (dimensionless), shape ``(K, N)``; finite or +inf, and
            finite in the state each sample was drawn from.
        samples_per_state: N_k, shape ``(K,)``, summing to N; samples are ordered by state.
        initial_free_energies: optional starting point, shape ``(K,)``.
        tolerance: convergence when max_k |Σ_n W_nk − 1| ≤ tolerance.
        max_iterations: Newton (or fallback) iterations.

    Returns:
        :class:`MultistateEstimate`; its ``endpoint`` is the :class:`Estimate` of
        f_{K−1} − f_0 with ``details``: ``free_energies``, ``stderr_from_first`` (lists),
        ``iterations``, ``converged``, ``weight_sum_error``, ``solver``,
        ``smallest_neighbour_overlap`` (min over k of O[k, k+1] and O[k+1, k]).

    Example:
        >>> result = mbar(reduced_energies, [200, 200, 200])
        >>> result.free_energies, result.endpoint.stderr
    """
    energies, counts = check_reduced_energies(reduced_energies, samples_per_state)
    states, total = energies.shape
    f_sampled, log_den, iterations, converged, error, solver = _solve(
        energies, counts, initial_free_energies, tolerance, max_iterations)
    f = _all_free_energies(energies, counts, f_sampled, log_den)
    weights = np.exp(f[:, None] - energies - _log_denominator(energies, counts, f))
    counts_float = counts.astype(np.float64)
    overlap = (weights @ weights.T) * counts_float[None, :]
    groups = _overlap_groups(overlap)
    theta = _theta(weights, counts_float, groups)
    apart = groups[:, None] != groups[None, :]
    with np.errstate(invalid="ignore"):                 # inf − inf when the inverse failed
        diagonal = np.diag(theta)
        difference_var = diagonal[:, None] + diagonal[None, :] - 2.0 * theta
        covariance = theta - theta[0][None, :] - theta[:, 0][:, None] + theta[0, 0]
    difference_var = np.where(np.isnan(difference_var) | apart, np.inf, np.maximum(difference_var, 0.0))
    np.fill_diagonal(difference_var, 0.0)
    outside = groups != groups[0]
    covariance = np.where(np.isnan(covariance) | outside[:, None] | outside[None, :], np.inf, covariance)
    covariance[0, :] = 0.0
    covariance[:, 0] = 0.0
    neighbour = [min(overlap[k, k + 1], overlap[k + 1, k]) for k in range(states - 1)]
    difference_stderr = np.sqrt(difference_var)
    details_extra = {}
    if groups.max() > 0:
        details_extra["warning"] = (f"the states fall into {groups.max() + 1} groups with no overlap between "
                                    "them; differences across groups are undetermined (stderr inf)")
    endpoint = Estimate(
        float(f[-1]), float(difference_stderr[0, -1]), "mbar", "asymptotic", int(total),
        {
            "states": int(states),
            "free_energies": [float(v) for v in f],
            "stderr_from_first": [float(v) for v in difference_stderr[0]],
            "iterations": int(iterations),
            "converged": bool(converged),
            "weight_sum_error": float(error),
            "solver": solver,
            "smallest_neighbour_overlap": float(min(neighbour)) if neighbour else 1.0,
            "overlap_groups": int(groups.max() + 1),
            **details_extra,
        },
    )
    return MultistateEstimate(f, covariance, difference_stderr, overlap, endpoint, iterations, converged)


def mbar_expectations(
    reduced_energies: Any,
    samples_per_state: Any,
    observable: Any,
    free_energies: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Equilibrium average of an observable in every state, with asymptotic standard errors.

    ⟨A⟩_k = Σ_n W_nk A(x_n).  The error follows Shirts & Chodera 2008 [equation form from
    memory]: each state gets an extra unsampled column W_nk a_n/⟨a⟩_k (a = A shifted to be
    positive, which leaves the variance unchanged) and
    Var⟨a⟩_k = ⟨a⟩_k² (Θ_kk + Θ_aa − 2Θ_ka) from the augmented Θ.

    Args:
        reduced_energies, samples_per_state: as for :func:`mbar`.
        observable: A(x_n) on the pooled samples, shape ``(N,)``, finite.
        free_energies: converged f (any common shift); solved for when ``None``.

    Returns:
        ``(averages, stderr)``, each of shape ``(K,)``, in the observable's units.
    """
    energies, counts = check_reduced_energies(reduced_energies, samples_per_state)
    values = np.asarray(observable, dtype=np.float64)
    if values.shape != (energies.shape[1],):
        raise ValueError(f"observable must have shape ({energies.shape[1]},), got {values.shape}")
    if not np.all(np.isfinite(values)):
        raise ValueError("observable holds non-finite values")
    if free_energies is None:
        f_sampled, log_den, *_ = _solve(energies, counts, None, 1e-12, 200)
        free_energies = _all_free_energies(energies, counts, f_sampled, log_den)
    f = np.asarray(free_energies, dtype=np.float64)
    weights = np.exp(f[:, None] - energies - _log_denominator(energies, counts, f))
    averages = weights @ values
    spread = float(values.max() - values.min())
    positive = values - values.min() + (spread if spread > 0.0 else 1.0)
    positive_averages = weights @ positive
    augmented = np.concatenate([weights, weights * positive[None, :] / positive_averages[:, None]])
    states = counts.size
    groups = _overlap_groups((weights @ weights.T) * counts[None, :])
    theta = _theta(augmented, np.concatenate([counts.astype(np.float64), np.zeros(states)]),
                   np.concatenate([groups, groups]))
    index = np.arange(states)
    with np.errstate(invalid="ignore"):
        variance = positive_averages ** 2 * (theta[index, index] + theta[index + states, index + states]
                                             - 2.0 * theta[index, index + states])
    variance = np.where(np.isnan(variance), np.inf, np.maximum(variance, 0.0))
    return averages, np.sqrt(variance)
