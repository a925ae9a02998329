"""The windows route: equilibrium sampling at a ladder of λ values, then MBAR / BAR / TI.

Plan → run → :class:`~fe_tool.results.Result`, the same shape as :func:`fe_tool.workflow.estimate`:

1. a ladder λ_0 = 0 < … < λ_{K−1} = 1 on one path (Gauss–Legendre nodes plus both end
   states, uniform, or any schedule of :data:`fe_tool.path.SCHEDULES`, or explicit values);
2. each window is equilibrated by the Metropolis-adjusted sampler of :mod:`fe_tool.sampling`
   (its own step-size adaptation and preconditioner, burn-in until equilibrated, stuck chains
   excluded and reported), with at most 60 % of an equal share of the budget; then its healthy
   chains continue and keep one sample every ⌈τ⌉ steps (τ measured by the sampler), the same
   number of samples in every window, sized so sampling plus analysis fit the budget;
3. optionally (``exchange=True``) a production phase with Hamiltonian replica exchange:
   after every sweep of sampler steps, configurations of neighbouring windows swap with
   probability min(1, exp(u_i(x_i) + u_j(x_j) − u_i(x_j) − u_j(x_i))) (Sugita, Kitao &
   Okamoto 2000, J. Chem. Phys. 113, 6042 for the Hamiltonian form), even and odd pairs
   alternating; acceptance per pair is reported;
4. the reduced energy of every sample at every window (``reduced_energies[window, sample]``,
   ``path.energies_at``; counted as ``path.evaluations_per_point(K)`` per sample);
5. MBAR endpoint (headline), neighbour BAR and TI as extra estimates; the MBAR overlap
   matrix with a warning and a suggested λ to insert where neighbours barely overlap.

The energy-evaluation count (``Result.energy_evaluations``) includes every sampler step of
every chain (stuck ones too), the exchange energies and the analysis energies.
"""
from __future__ import annotations

import dataclasses
import math
import time
from typing import Any

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np

from ..estimators import gauss_legendre_windows, mbar, neighbour_bar, thermodynamic_integration
from ..estimators.record import Estimate
from ..path import SCHEDULES, LinearPath, Path, make_schedule
from ..results import Result
from ..kernels import ChainState, KernelParams
from ..kernels.mala import mala_chain_step
from ..sampling import (
    DEFAULT_DAMPING,
    StateSamples,
    autocorrelation_time,
    init_chains,
    nonfinite_warnings,
    run_block,
    sample_state,
    window_target,
)
from ..options import InputError, Options, sampling_kernel
from ..progress import EvaluationMeter
from .ledger import Ledger

DEFAULT_WINDOWS = 10             # with a budget: at most this many (see _default_window_count)
OVERLAP_WARNING = 0.03           # smallest acceptable MBAR overlap between neighbouring windows
ANALYSIS_BATCH = 1024            # configurations per compiled call of the ladder energies
SPACINGS = ("gauss-legendre", "uniform", *sorted(SCHEDULES))
ASSUMED_THINNING = 8             # sampler steps per kept sample used to size the windows


# --------------------------------------------------------------------------- the ladder

def window_ladder(windows: int | np.ndarray | list | None = None,
                  spacing: str = "gauss-legendre") -> tuple[np.ndarray, np.ndarray | None]:
    """λ values of the windows, and the Gauss–Legendre weights of the interior nodes if any.

    Args:
        windows: ``None`` (:data:`DEFAULT_WINDOWS`), a count, or explicit increasing λ values
            in [0, 1] that include 0 and 1.  For ``spacing="gauss-legendre"`` a count ``n``
            places ``n`` Gauss–Legendre nodes *and* the two end states (n + 2 windows): the
            nodes exclude 0 and 1, and MBAR needs samples of both ends to give ΔF.
        spacing: ``"gauss-legendre"``, ``"uniform"`` or a schedule name of
            :data:`fe_tool.path.SCHEDULES` (``"linear"``, ``"cosine"``, ``"power"``).

    Returns:
        ``(lambdas, gl_weights)``: lambdas float64 (K,) with λ_0 = 0 and λ_{K−1} = 1;
        ``gl_weights`` (K − 2,) when lambdas[1:-1] are Gauss–Legendre nodes, else ``None``.

    Example:
        >>> window_ladder(3)   # (0, 0.1127, 0.5, 0.8873, 1), weights (5/18, 4/9, 5/18)
    """
    if windows is not None and not isinstance(windows, (int, np.integer)):
        lams = np.asarray(windows, dtype=np.float64)
        if lams.ndim != 1 or lams.size < 2:
            raise ValueError(f"windows as λ values must be a 1-D array of at least 2 values, got shape {lams.shape}")
        if not (abs(lams[0]) < 1e-12 and abs(lams[-1] - 1.0) < 1e-12 and np.all(np.diff(lams) > 0)):
            raise ValueError("windows as λ values must increase strictly from 0 to 1 (both end states are needed "
                             "for the MBAR endpoint estimate)")
        lams = lams.copy()
        lams[0], lams[-1] = 0.0, 1.0
        interior = lams[1:-1]
        if interior.size:
            nodes, weights = gauss_legendre_windows(interior.size)
            if np.max(np.abs(interior - nodes)) < 1e-10:
                return lams, weights
        return lams, None
    count = DEFAULT_WINDOWS if windows is None else int(windows)
    if spacing == "gauss-legendre":
        if count < 1:
            raise ValueError(f"windows must be at least 1 Gauss–Legendre node, got {count}")
        nodes, weights = gauss_legendre_windows(count)
        return np.concatenate([[0.0], nodes, [1.0]]), weights
    if count < 2:
        raise ValueError(f"windows must be at least 2 (both end states), got {count}")
    if spacing == "uniform":
        spacing = "linear"
    if spacing not in SCHEDULES:
        raise ValueError(f"unknown spacing {spacing!r}; choose one of {list(SPACINGS)} or pass λ values as windows")
    return make_schedule(spacing, count - 1), None


# --------------------------------------------------------------------------- analysis energies

@eqx.filter_jit
def _ladder_energies(path: Path, points, lams):
    return jax.vmap(lambda x: path.energies_at(x, lams))(points)


@eqx.filter_jit
def _lambda_derivatives(path: Path, points, lam):
    return jax.vmap(lambda x: path.lambda_derivative(x, lam))(points)


def _batched(fn, path, points: np.ndarray, extra) -> np.ndarray:
    """Apply ``fn`` in fixed-size batches (padded) so each shape compiles once."""
    out = []
    n = points.shape[0]
    for start in range(0, n, ANALYSIS_BATCH):
        chunk = points[start:start + ANALYSIS_BATCH]
        pad = ANALYSIS_BATCH - chunk.shape[0] if n > ANALYSIS_BATCH else 0
        if pad:
            chunk = np.concatenate([chunk, np.repeat(chunk[-1:], pad, axis=0)])
        value = np.asarray(fn(path, jnp.asarray(chunk), extra))
        out.append(value[:value.shape[0] - pad] if pad else value)
    return np.concatenate(out)


def _statistical_inefficiency(values: np.ndarray, chains: int) -> float:
    """τ of a window's observable; samples are interleaved over ``chains`` healthy chains."""
    chains = max(1, int(chains))
    usable = (values.size // chains) * chains
    if usable < 4 * chains:
        return 1.0
    return max(1.0, autocorrelation_time(values[:usable].reshape(-1, chains)))


# --------------------------------------------------------------------------- production

def _stride(s: StateSamples) -> int:
    """Sampler steps between kept samples: the measured autocorrelation time, rounded up."""
    tau = s.autocorrelation_time
    return max(1, int(math.ceil(tau))) if math.isfinite(tau) else 1


def _production_cost(s: StateSamples, samples: int, per_call: int) -> int:
    """Evaluations :func:`_produce` spends for ``samples`` samples of window ``s``."""
    healthy = s.chains - s.stuck_chains
    per_chain = int(math.ceil(samples / healthy))
    return (healthy + healthy * _stride(s) * per_chain) * per_call


def _affordable_samples(sampled: list[StateSamples], left: int, cap: int, per_call: int, analysis: int) -> int:
    """Most samples per window (≤ ``cap``) whose production and analysis in every window fit ``left``."""
    def cost(n):
        return sum(_production_cost(s, n, per_call) for s in sampled) + n * len(sampled) * analysis

    low, high = 0, int(cap)
    while low < high:   # the cost rises with n: bisect for the largest affordable n
        middle = (low + high + 1) // 2
        low, high = (middle, high) if cost(middle) <= left else (low, middle - 1)
    return low


def _produce(key, target, s: StateSamples, samples: int, damping: float = DEFAULT_DAMPING, builder=None) -> int:
    """Continue the healthy chains of an equilibrated window and keep one sample every ⌈τ⌉ steps.

    Replaces ``s.samples`` (chains interleaved, as :func:`~fe_tool.sampling.sample_state` lays them
    out) and ``s.acceptance``; returns the energy evaluations spent.
    """
    healthy = s.chains - s.stuck_chains
    # sample_state interleaves chains: its first `healthy` samples are one per healthy chain
    starts = jnp.asarray(s.samples[:healthy])
    inverse_mass = jnp.asarray(s.preconditioner)
    states = init_chains(target, starts, kernel=s.kernel, key=jax.random.fold_in(key, 1), inverse_mass=inverse_mass,
                         builder=builder)
    stride = _stride(s)
    per_chain = int(math.ceil(samples / healthy))
    out = run_block(target, key, states, jnp.log(jnp.asarray(s.step_size, starts.dtype)), inverse_mass,
                    0.0, stride * per_chain, stride, kernel=s.kernel, damping=damping, builder=builder)
    acceptance, positions = out.acceptance, out.recorded
    s.nan_proposals += int(out.nonfinite[0])
    s.forbidden_proposals += int(out.nonfinite[1])
    if int(out.nonfinite[0]):
        s.warnings.extend(nonfinite_warnings(f"window λ = {float(target.lam):.4g} (production)",
                                             int(out.nonfinite[0]), 0))
    # positions are (per_chain, chains, ...): flattening interleaves the chains, so any prefix draws from all
    s.samples = np.asarray(positions).reshape((-1,) + starts.shape[1:])[:samples]
    s.acceptance = float(np.mean(np.asarray(acceptance)))
    s.effective_sample_size = float(samples)
    spent = (healthy + healthy * stride * per_chain) * target.evaluations()
    s.evaluations += spent
    return int(spent)


# --------------------------------------------------------------------------- replica exchange

def _exchange_run(path: Path, key, positions, lams, step_sizes, preconditioners, *, sweeps: int,
                  steps_per_sweep: int):
    """Production with Hamiltonian exchange between neighbouring windows.

    ``positions`` (K, C, ...) start configurations per window and chain; one jitted scan over
    sweeps, each sweep ``steps_per_sweep`` MALA steps in every window (vmap over windows and
    chains), then one swap attempt per neighbouring pair (even pairs on even sweeps, odd on odd).
    Returns the positions after every sweep (sweeps, K, C, ...), swap acceptance
    probabilities (sweeps, K − 1, C) (NaN for pairs not attempted), and the step acceptance.
    """
    windows = lams.shape[0]

    def energy(x, lam):
        return path.energy(x, lam)

    def init(x, lam):
        u, g = jax.value_and_grad(energy)(x, lam)
        return ChainState(x, u, g, jnp.zeros_like(x), None)

    states = jax.vmap(jax.vmap(init, in_axes=(0, None)), in_axes=(0, 0))(positions, lams)

    def mala_one(key, state, lam, step, precond):
        params = KernelParams(step, precond, jnp.zeros_like(step))
        return mala_chain_step(window_target(path, lam), key, state, params)

    # vmap over chains (inner) and windows (outer)
    step_all = jax.vmap(jax.vmap(mala_one, in_axes=(0, 0, None, None, None)), in_axes=(0, 0, 0, 0, 0))

    pair = jnp.arange(windows - 1)

    def sweep(carry, inputs):
        states, = carry
        key, parity = inputs
        key_steps, key_swap = jax.random.split(key)

        def one_step(states, k):
            keys = jax.random.split(k, windows * positions.shape[1]).reshape(windows, positions.shape[1])
            states, info = step_all(keys, states, lams, step_sizes, preconditioners)
            return states, info.acceptance

        states, acc = jax.lax.scan(one_step, states, jax.random.split(key_steps, steps_per_sweep))
        x = states.position
        # u_k(x_k) and u_{k+1}(x_k), u_k(x_{k+1})
        u_own = states.energy
        u_up = jax.vmap(jax.vmap(energy, in_axes=(0, None)), in_axes=(0, 0))(x[:-1], lams[1:])
        u_down = jax.vmap(jax.vmap(energy, in_axes=(0, None)), in_axes=(0, 0))(x[1:], lams[:-1])
        log_ratio = u_own[:-1] + u_own[1:] - u_up - u_down
        prob = jnp.exp(jnp.minimum(jnp.where(jnp.isfinite(log_ratio), log_ratio, -jnp.inf), 0.0))
        active = (pair % 2) == parity
        uniform = jax.random.uniform(key_swap, prob.shape)
        swap = active[:, None] & (uniform < prob)            # (K-1, C); active pairs are disjoint
        swap_up = jnp.concatenate([swap, jnp.zeros_like(swap[:1])])     # window k takes k+1
        swap_down = jnp.concatenate([jnp.zeros_like(swap[:1]), swap])   # window k takes k−1
        shape = (windows, x.shape[1]) + (1,) * (x.ndim - 2)
        x_up = jnp.concatenate([x[1:], x[-1:]])
        x_down = jnp.concatenate([x[:1], x[:-1]])
        new_x = jnp.where(swap_up.reshape(shape), x_up, jnp.where(swap_down.reshape(shape), x_down, x))
        states = jax.vmap(jax.vmap(init, in_axes=(0, None)), in_axes=(0, 0))(new_x, lams)
        prob_report = jnp.where(active[:, None], prob, jnp.nan)
        return (states,), (new_x, prob_report, jnp.mean(acc, axis=0))

    keys = jax.random.split(key, sweeps)
    parities = jnp.arange(sweeps) % 2
    _, (trace, swap_prob, acceptance) = jax.lax.scan(sweep, (states,), (keys, parities))
    return trace, swap_prob, acceptance


_exchange_jit = eqx.filter_jit(_exchange_run)


# --------------------------------------------------------------------------- the route

def _integration_estimates(lams, means, errors, gauss_legendre: bool, warnings: list[str]) -> dict[str, Estimate]:
    """TI by the trapezoid rule (and Gauss–Legendre on GL ladders); not applicable where ⟨∂u/∂λ⟩ is infinite.

    A region that one end forbids (u = +∞) and the other allows makes ∂u/∂λ = u_B − u_A infinite
    on samples there: the integrand of TI does not exist, while MBAR and BAR (which only need
    energy differences, with +∞ as zero weight) remain exact.
    """
    out = {}
    rules = [("ti_trapezoid", "trapezoid", slice(None))] + \
        ([("ti_gauss_legendre", "gauss-legendre", slice(1, -1))] if gauss_legendre else [])
    applicable = bool(np.all(np.isfinite(means)) and np.all(np.isfinite(errors)))
    for name, rule, part in rules:
        if applicable:
            out[name] = thermodynamic_integration(lams[part], means[part], errors[part], rule=rule)
        else:
            out[name] = Estimate(math.nan, math.nan, "ti", "not applicable", 0,
                                 {"warning": "⟨∂u/∂λ⟩ is infinite in some window (a region one end forbids): the integrand jumps at an end"})
    if not all(e.is_finite for e in out.values()):
        warnings.append("TI does not apply here: ⟨∂u/∂λ⟩ is infinite in some window, because one end state "
                        "forbids (u = +inf) a region the other allows; MBAR and BAR are unaffected.")
    return out


def _overlap_warnings(lams: np.ndarray, overlap: np.ndarray) -> tuple[list[str], list[float], list[float]]:
    warnings, inserts, neighbour = [], [], []
    for k in range(lams.size - 1):
        o = float(min(overlap[k, k + 1], overlap[k + 1, k]))
        neighbour.append(o)
        if o < OVERLAP_WARNING:
            # overlap decays roughly geometrically with the gap: split it so each piece reaches the threshold
            pieces = 2 if o <= 0 else int(min(8, max(2, math.ceil(math.log(max(o, 1e-300)) / math.log(OVERLAP_WARNING)))))
            new = [float(lams[k] + (lams[k + 1] - lams[k]) * j / pieces) for j in range(1, pieces)]
            inserts.extend(new)
            warnings.append(f"windows λ = {lams[k]:.4g} and λ = {lams[k + 1]:.4g} barely overlap (MBAR overlap "
                            f"{o:.3g} < {OVERLAP_WARNING}); the error bar there is unreliable. Insert windows at "
                            f"λ = {', '.join(f'{v:.4g}' for v in new)}.")
    return warnings, inserts, neighbour


@dataclasses.dataclass(frozen=True)
class WindowsPlan:
    """The ladder and the budget of a windows run, fixed before any computation.

    Attributes:
        budget: total evaluations; lams, gl_weights: the ladder (see :func:`window_ladder`).
        chains: sampler chains per window; per_call: evaluations per sampler step.
        analysis_per_sample: evaluations to score one sample at every window (and ∂u/∂λ).
        derivative_free: ∂u/∂λ comes from the ladder energies (linear path).
        sample_cap: most kept samples per window; equilibration_share: most evaluations a
            window's sampler may spend on warm-up and burn-in.
    """

    budget: int
    lams: np.ndarray
    gl_weights: np.ndarray | None
    chains: int
    per_call: int
    analysis_per_sample: int
    derivative_free: bool
    sample_cap: int
    equilibration_share: int

    @property
    def count(self) -> int:
        return int(self.lams.size)


def plan_windows(path: Path, opts: Options, budget: int) -> WindowsPlan:
    """The ladder, chains and budget split of a windows run; refuses a budget that cannot work."""
    if opts.exchange and opts.sampler not in ("auto", "mala"):
        raise InputError(f"exchange=True moves replicas with MALA steps, but sampler={opts.sampler!r}: "
                         "use sampler='mala' (or 'auto') with exchange, or exchange=False.")
    windows = opts.windows
    if windows is None:
        # every window needs ~25 000 evaluations for warm-up, burn-in and a few hundred samples
        total = int(np.clip(budget // 25_000, 4, DEFAULT_WINDOWS + 2))
        windows = total - 2 if opts.spacing == "gauss-legendre" else total
    lams, gl_weights = window_ladder(windows, opts.spacing)
    count = lams.size
    per_call = path.evaluations_per_point(1)
    derivative_free = isinstance(path, LinearPath)   # ∂u/∂λ = u_B − u_A comes from the ladder energies
    analysis = path.evaluations_per_point(count) + (0 if derivative_free else path.evaluations_per_point(1))
    share = budget / count
    chains = opts.chains or int(np.clip(share // (per_call * 2500), 4, 64))
    overhead = chains * per_call * 600     # warm-up and the shortest burn-in of one window
    sample_cap = 4096 if opts.samples_per_window is None else int(opts.samples_per_window)
    need = int(count * (overhead + 16 * (per_call * ASSUMED_THINNING + analysis)))
    if budget < need or sample_cap < 16:
        raise InputError(f"budget={budget:,} is too small for {count} windows with {chains} chains each: about {need:,} "
                         "evaluations are needed for 16 samples per window. Raise the budget (CLI --budget, API "
                         "budget=), use fewer windows (windows=) or chains (chains=), or the switching route "
                         "(method='switching').")
    return WindowsPlan(int(budget), lams, gl_weights, int(chains), per_call, analysis, derivative_free, sample_cap,
                       int(0.6 * share))


def _window_order(lams: np.ndarray, window_starts: str) -> list[int]:
    if window_starts == "ends":
        return list(range(lams.size))
    # inwards from both ends, so each window starts next to a sampled neighbour
    return [k for k in range(lams.size) if lams[k] < 0.5] + [k for k in range(lams.size) if lams[k] >= 0.5][::-1]


def _sample_windows(key, path, plan: WindowsPlan, x_a, x_b, starts, window_starts: str, ledger: Ledger,
                    kernel: str = "mala"):
    """Equilibrate every window (one sample per chain); production is sized afterwards."""
    lams, count = plan.lams, plan.count
    window_keys = jax.random.split(key, count)
    sampled: list[StateSamples | None] = [None] * count
    for k in _window_order(lams, window_starts):
        if window_starts == "chain" and k not in (0, count - 1):
            neighbour = k - 1 if lams[k] < 0.5 else k + 1
            x0 = jnp.asarray(sampled[neighbour].samples[-1])
        else:
            x0 = x_a if lams[k] < 0.5 else x_b
        from_end = window_starts == "ends" or k in (0, count - 1)
        start_set = (starts["a"] if lams[k] < 0.5 else starts["b"]) if from_end else None
        s = sample_state(window_keys[k], window_target(path, float(lams[k])), x0, samples=plan.chains,
                         chains=plan.chains, evaluation_budget=plan.equilibration_share,
                         name=f"window {k} (λ = {lams[k]:.4g})", starts=start_set, on_spent=ledger.spend,
                         kernel=kernel)
        sampled[k] = s
        ledger.cost["sampling"] += s.evaluations
        ledger.warnings.extend(s.warnings)
    return sampled


def _produce_windows(key, path, plan: WindowsPlan, sampled, ledger: Ledger) -> int:
    """Equal samples in every window, as many as the rest of the budget pays for exactly."""
    left = plan.budget - ledger.spent
    samples = _affordable_samples(sampled, left, plan.sample_cap, plan.per_call, plan.analysis_per_sample)
    if samples < 16:
        # too little left for a production run: analyse the chains' current positions only
        samples = min(len(s.samples) for s in sampled)
        ledger.warnings.append(f"equilibrating the windows used nearly the whole budget: only {samples} samples per "
                               "window (the chains' final positions) are analysed, and they may be too few for "
                               "trustworthy error bars. Raise the budget or use fewer windows.")
        ledger.flagged = True
        return samples
    production_keys = jax.random.split(key, plan.count)
    for k in range(plan.count):
        before = len(sampled[k].warnings)
        spent = _produce(production_keys[k], window_target(path, float(plan.lams[k])), sampled[k], samples)
        ledger.cost["sampling"] += spent
        ledger.spend(spent)
        ledger.warnings.extend(sampled[k].warnings[before:])
    return samples


def _exchange_production(key, path, plan: WindowsPlan, sampled, exchange_every: int, shape, ledger: Ledger):
    """Production with Hamiltonian replica exchange; replaces every window's samples."""
    lams, count, chains, per_call = plan.lams, plan.count, plan.chains, plan.per_call
    if count < 2:
        raise InputError("exchange needs at least two windows")
    starts = np.stack([s.samples[np.arange(chains) % len(s.samples)] for s in sampled])
    stride = max(1, int(math.ceil(np.median([s.autocorrelation_time for s in sampled]))))
    steps_per_sweep = max(exchange_every, 1)
    # keep positions every ceil(τ/steps_per_sweep) sweeps so kept samples stay decorrelated
    keep_every = max(1, int(math.ceil(stride / steps_per_sweep)))
    sweep_cost = chains * per_call * (count * (steps_per_sweep + 1) + 2 * (count - 1))
    per_kept_sweep = keep_every * sweep_cost + chains * count * plan.analysis_per_sample
    kept_sweeps = int(min((plan.budget - ledger.spent) // per_kept_sweep, max(1, math.ceil(plan.sample_cap / chains))))
    if kept_sweeps < 1:
        ledger.flagged = True
        ledger.warnings.append("equilibrating the windows used the whole budget: no replica-exchange sweep was "
                               "affordable, so the chains' final positions are analysed. Raise the budget.")
        return min(len(s.samples) for s in sampled), {}
    sweeps = kept_sweeps * keep_every
    samples = kept_sweeps * chains
    trace, swap_prob, step_acc = _exchange_jit(
        path, key, jnp.asarray(starts), jnp.asarray(lams),
        jnp.asarray([s.step_size for s in sampled]), jnp.asarray(np.stack([s.preconditioner for s in sampled])),
        sweeps=sweeps, steps_per_sweep=steps_per_sweep)
    kept = np.moveaxis(np.asarray(trace)[keep_every - 1::keep_every], 1, 0)    # (K, sweeps', C, ...)
    kept = kept.reshape((count, -1) + tuple(shape))[:, :samples]
    for k in range(count):
        sampled[k].samples = kept[k]
    pair_acceptance = np.nanmean(np.asarray(swap_prob), axis=(0, 2))
    ledger.cost["exchange"] = int(sweeps * sweep_cost)
    for k, a in enumerate(pair_acceptance):
        if a < 0.05:
            ledger.warnings.append(f"replica exchange between λ = {lams[k]:.4g} and λ = {lams[k + 1]:.4g} accepted only "
                                   f"{a:.1%} of swaps; the windows there are too far apart for exchange to help.")
    return samples, {"exchange_acceptance": pair_acceptance, "exchange_sweeps": sweeps,
                     "exchange_steps_per_sweep": steps_per_sweep,
                     "exchange_step_acceptance": np.asarray(step_acc).mean(axis=(0, 2))}


def _analyse(path, plan: WindowsPlan, sampled, ledger: Ledger):
    """Reduced energies of every sample at every window, and ∂u/∂λ per window."""
    lams, count = plan.lams, plan.count
    counts = np.array([len(s.samples) for s in sampled], dtype=np.int64)
    pooled = np.concatenate([np.asarray(s.samples) for s in sampled])
    reduced = _batched(_ladder_energies, path, pooled, jnp.asarray(lams)).T   # (K, N)
    ledger.cost["analysis"] = int(pooled.shape[0] * path.evaluations_per_point(count))
    edges = np.concatenate([[0], np.cumsum(counts)])
    derivative = []
    for k in range(count):
        if plan.derivative_free:
            derivative.append(reduced[-1, edges[k]:edges[k + 1]] - reduced[0, edges[k]:edges[k + 1]])
        else:
            derivative.append(_batched(_lambda_derivatives, path, pooled[edges[k]:edges[k + 1]], jnp.asarray(lams[k])))
    if not plan.derivative_free:
        ledger.cost["analysis"] += int(pooled.shape[0] * path.evaluations_per_point(1))
    return reduced, counts, derivative


def _estimate_windows(plan: WindowsPlan, reduced, counts, derivative, sampled, ledger: Ledger):
    """MBAR (headline), neighbour BAR and TI, with every diagnostic; returns estimates and what they need."""
    lams = plan.lams
    finite = np.isfinite(reduced) | (reduced == np.inf)
    if not np.all(finite):
        reduced = np.where(np.isnan(reduced) | (reduced == -np.inf), np.inf, reduced)
        ledger.warnings.append(f"{int((~finite).sum())} reduced energies were NaN or −inf and were treated as "
                               "impossible configurations (+inf).")
        ledger.flagged = True
    multistate = mbar(reduced, counts)
    estimates: dict[str, Estimate] = {"mbar": multistate.endpoint, "bar_ladder": neighbour_bar(reduced, counts)}
    inefficiency = [_statistical_inefficiency(d, s.chains - s.stuck_chains) for d, s in zip(derivative, sampled)]
    with np.errstate(invalid="ignore"):   # an infinite ∂u/∂λ (a forbidden region) gives inf/NaN: TI does not apply
        means = np.array([float(np.mean(d)) for d in derivative])
        errors = np.array([float(np.std(d, ddof=1) * math.sqrt(g / d.size)) for d, g in zip(derivative, inefficiency)])
    estimates.update(_integration_estimates(lams, means, errors, plan.gl_weights is not None, ledger.warnings))
    msgs, inserts, neighbour_overlap = _overlap_warnings(lams, multistate.overlap)
    ledger.warnings.extend(msgs)
    ledger.flagged |= bool(msgs)
    if "warning" in multistate.endpoint.details:
        ledger.warnings.append("MBAR: " + multistate.endpoint.details["warning"])
        ledger.flagged = True
    if max(inefficiency) > 2.0:
        worst = int(np.argmax(inefficiency))
        ledger.warnings.append(f"window λ = {lams[worst]:.4g}: kept samples are still correlated (∂u/∂λ "
                               f"autocorrelation {inefficiency[worst]:.1f} samples); TI errors are widened for it, "
                               "MBAR/BAR errors may be too small.")
    forbidden = sum(s.forbidden_proposals for s in sampled)
    if forbidden:
        ledger.warnings.extend(nonfinite_warnings("window sampling", 0, forbidden))
    if not all(s.equilibrated for s in sampled) or any(s.nan_proposals for s in sampled):
        ledger.flagged = True
    headline, reason = _windows_headline(estimates, neighbour_overlap, ledger)
    found = {"multistate": multistate, "inefficiency": inefficiency, "means": means, "errors": errors,
             "inserts": inserts, "neighbour_overlap": neighbour_overlap}
    return estimates, headline, reason, found


def _windows_headline(estimates: dict[str, Estimate], neighbour_overlap, ledger: Ledger) -> tuple[str, str]:
    if estimates["mbar"].is_finite:
        headline, reason = "mbar", ("MBAR uses the samples of every window at once and is the minimum-variance "
                                    f"estimator for them (smallest neighbour overlap {min(neighbour_overlap):.2f})")
    else:
        headline, reason = "bar_ladder", "MBAR did not give a finite answer; BAR between neighbouring windows shown"
    head = estimates[headline]
    for name, est in estimates.items():
        if name != headline and est.is_finite and head.is_finite:
            scale = math.hypot(est.stderr, head.stderr)
            if scale > 0 and abs(est.delta_f - head.delta_f) > 4 * scale:
                ledger.warnings.append(f"{name} ({est.delta_f:.3f} kT) differs from {headline} ({head.delta_f:.3f} kT) "
                                       f"by {abs(est.delta_f - head.delta_f) / scale:.1f} combined errors; for TI this "
                                       "usually means the λ grid is too coarse where ∂u/∂λ changes fast.")
    return headline, reason


def _report_windows(path, opts: Options, plan: WindowsPlan, kT, seed, sampled, samples_per_window, estimates,
                    headline, reason, found, exchange_info, ledger: Ledger) -> Result:
    window_diagnostics = [{"lambda": float(l), **s.diagnostics(), "samples": int(len(s.samples)),
                           "derivative_inefficiency": float(g)}
                          for l, s, g in zip(plan.lams, sampled, found["inefficiency"])]
    diagnostics = {
        "sampling_a": sampled[0].diagnostics(), "sampling_b": sampled[-1].diagnostics(),
        "windows": window_diagnostics, "neighbour_overlap": found["neighbour_overlap"],
        "smallest_neighbour_overlap": float(min(found["neighbour_overlap"])),
        "stuck_chains": int(sum(s.stuck_chains for s in sampled)),
        "mbar_converged": bool(found["multistate"].converged),
    }
    explicit = opts.windows is not None and not isinstance(opts.windows, (int, np.integer))
    settings = {
        "route": "windows", "windows": plan.count, "spacing": "explicit" if explicit else opts.spacing,
        "samples_per_window": int(samples_per_window), "chains": plan.chains, "budget": plan.budget, "seed": seed,
        "exchange": bool(opts.exchange), "window_starts": opts.window_starts, "path": path.description(),
    }
    extras = {
        "lambdas": plan.lams, "free_energies": found["multistate"].free_energies, "overlap": found["multistate"].overlap,
        "mean_derivative": found["means"], "stderr_derivative": found["errors"], "suggested_windows": found["inserts"],
        **exchange_info,
    }
    head = estimates[headline]
    return Result(
        delta_f=head.delta_f * kT, stderr=head.stderr * kT, estimator=headline, choice_reason=reason,
        estimates={k: v.scaled(kT) for k, v in estimates.items()},
        work_forward=np.zeros(0), work_reverse=np.zeros(0),
        energy_evaluations=ledger.spent, cost=dict(ledger.cost), kT=kT, units=opts.units,
        diagnostics=diagnostics, warnings=ledger.warnings, flagged=bool(ledger.flagged), settings=settings,
        timings=ledger.timings, reference=opts.reference, extras=extras)


def run_windows(path, x_a, x_b, kT: float, seed: int, starts, opts: Options, plan: WindowsPlan,
                t_start: float) -> Result:
    """Sample every window, (exchange,) score every sample at every window, estimate, report."""
    k_windows, k_production, k_exchange = jax.random.split(jax.random.key(seed), 3)
    ledger = Ledger(cost={"sampling": 0}, meter=EvaluationMeter(plan.budget, "ΔF by windows", enabled=opts.progress))
    ledger.meter.stage(f"sampling {plan.count} windows")
    t0 = time.perf_counter()
    sampled = _sample_windows(k_windows, path, plan, x_a, x_b, starts, opts.window_starts, ledger,
                              kernel=sampling_kernel(opts, x_a))
    exchange_info: dict[str, Any] = {}
    if opts.exchange:
        ledger.timings["sampling"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        samples, exchange_info = _exchange_production(k_exchange, path, plan, sampled, opts.exchange_every,
                                                      x_a.shape, ledger)
        ledger.timings["exchange"] = time.perf_counter() - t0
    else:
        samples = _produce_windows(k_production, path, plan, sampled, ledger)
        ledger.timings["sampling"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    ledger.meter.stage("energies of every sample at every window")
    reduced, counts, derivative = _analyse(path, plan, sampled, ledger)
    ledger.spend(ledger.cost["analysis"])
    ledger.timings["energies"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    estimates, headline, reason, found = _estimate_windows(plan, reduced, counts, derivative, sampled, ledger)
    ledger.timings["estimators"] = time.perf_counter() - t0
    ledger.timings["total"] = time.perf_counter() - t_start
    ledger.meter.close()
    return _report_windows(path, opts, plan, kT, seed, sampled, samples, estimates, headline, reason, found,
                           exchange_info, ledger)


def estimate_windows(energy_a, energy_b, start_a, start_b, *, kT: float = 1.0, seed: int = 0, **options) -> Result:
    """ΔF = F_B − F_A from equilibrium samples of a ladder of λ windows (MBAR headline).

    The same as :func:`fe_tool.estimate` with ``method="windows"``; the windows route's options
    are ``windows`` and ``spacing`` (the ladder, see :func:`window_ladder`; default one window per
    25 000 evaluations of budget, 4 to 12 windows), ``chains`` (per window; default from the
    budget, 4 to 64), ``samples_per_window`` (kept samples; default from the budget),
    ``exchange`` and ``exchange_every`` (Hamiltonian replica exchange between neighbouring
    windows, every so many sampler steps), ``window_starts`` (``"ends"``: windows with λ < 0.5
    start from ``start_a``, the others from ``start_b``; ``"chain"``: each from a sample of its
    neighbour, inwards from both ends), plus ``budget``, ``path``, ``starts_a``/``starts_b``,
    ``units`` and ``reference`` as for every route.

    Returns:
        :class:`~fe_tool.results.Result`; ``estimates``: ``mbar``, ``bar_ladder``,
        ``ti_trapezoid`` and (Gauss–Legendre ladders) ``ti_gauss_legendre``; ``extras``:
        ``lambdas``, ``free_energies`` (kT), ``overlap`` matrix, ``mean_derivative`` (kT),
        ``suggested_windows`` and, with exchange, ``exchange_acceptance`` per pair.

    Example:
        >>> import jax.numpy as jnp
        >>> r = estimate_windows(lambda x: 0.5 * jnp.sum(x**2), lambda x: 2.0 * jnp.sum((x - 1)**2),
        ...                      jnp.zeros(3), jnp.ones(3), budget=200_000)   # ΔF = 1.5 ln 4 kT
    """
    from ..workflow import estimate

    return estimate(energy_a, energy_b, start_a, start_b, kT=kT, seed=seed, method="windows", **options)
