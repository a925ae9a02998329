"""Equilibrium sampling of one state on the path: preconditioned MALA with many chains.

Kernel (Metropolis-adjusted Langevin, Roberts & Tweedie 1996, Bernoulli 2, 341)
with a constant diagonal preconditioner M and step ε, on the reduced energy u:

    proposal  y = x − ε M ∇u(x) + √(2ε M) ξ,          ξ ~ N(0, I)
    accept with probability  min(1, exp(−u(y) + u(x) + log q(x|y) − log q(y|x))),
    log q(y|x) = −|y − x + ε M ∇u(x)|²_{M⁻¹} / (4ε).

The driver (:func:`sample_state`) runs ``chains`` chains in parallel (vmap), in
fixed-length blocks (one compiled ``lax.scan`` per block shape):

1. warm-up: the step size is adapted towards an acceptance of 0.574, the optimum
   for MALA (Roberts & Rosenthal 1998, J. R. Stat. Soc. B 60, 255); for vector
   configurations a diagonal preconditioner is estimated from the chains' variance
   in doubling windows;
2. burn-in: blocks are run until the integrated autocorrelation time τ of the
   recorded observables is below a tenth of the judged half of the trace and the chains
   agree (split potential-scale reduction below 1.1, Gelman & Rubin 1992 / Vehtari et al.
   2021), or the budget share runs out. Watched: the reduced energy (every step), the
   coordinates for vector systems (every 5 steps) and ∂u/∂λ of the path at the target's λ
   (every :data:`DERIVATIVE_EVERY` steps, inside the compiled block; its cost, one path
   evaluation per chain per record, is counted). ∂u/∂λ is what the estimate depends on:
   a slow mode that moves it (e.g. trans/gauche hops under a torsion change) can leave the
   energy fast-decorrelating, and would otherwise pass unseen. Chains may start from a
   start set (round-robin); chains that begin in different basins disagree in the split-R̂
   check until they have mixed, which catches slow modes no chain has crossed yet;
3. production: each chain is continued and sampled every ⌈τ⌉ steps, as many samples
   as the rest of the budget affords (up to the number asked for).

Chains whose acceptance collapses (stuck in a steep tail) are excluded from the
samples, counted and reported; their cost still counts.
"""
from __future__ import annotations

import dataclasses
import math
from typing import NamedTuple

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np

from .path import LinearPath, Path
from .types import Array, Configuration

TARGET_ACCEPTANCE = 0.574
BLOCK_STEPS = 50
STUCK_ACCEPTANCE = 0.02
EQUILIBRATION_TAUS = 10  # the judged second half of the burn-in must span this many autocorrelation times
MIXING_LIMIT = 1.1  # split potential-scale reduction below which chains agree (Gelman et al., "Bayesian Data Analysis", classic threshold)
BURN_IN_SHARE = 0.7  # of a call's budget; production sampling gets the rest
MIN_SAMPLES = 64
DERIVATIVE_EVERY = 10  # burn-in records ∂u/∂λ every this many steps (cost: one path evaluation per chain each time)


class ChainState(NamedTuple):
    position: Array
    energy: Array
    grad: Array


class StepInfo(NamedTuple):
    acceptance: Array  # Metropolis acceptance probability of this step
    energy: Array
    proposal_nan: Array  # the proposal's energy was NaN (an error in the energy function)
    proposal_forbidden: Array  # the proposal's energy was +inf (a forbidden region; rejected)


class Target(eqx.Module):
    """The reduced energy of one state of a path: an end (``end="a"|"b"``) or λ (``end=None``)."""

    path: Path
    lam: Array
    end: str | None = eqx.field(static=True)

    def energy(self, x: Configuration) -> Array:
        if self.end is not None:
            return self.path.end_energy(x, self.end)
        return self.path.energy(x, self.lam)

    def energy_and_grad(self, x: Configuration) -> tuple[Array, Array]:
        return jax.value_and_grad(self.energy)(x)

    def evaluations(self) -> int:
        """Energy evaluations per energy-and-gradient call."""
        return self.path.end_evaluations() if self.end is not None else self.path.evaluations_per_point(1)

    def _linear_end(self) -> bool:
        return self.end is not None and isinstance(self.path, LinearPath)

    def lambda_derivative(self, x: Configuration, u_x: Array) -> Array:
        """∂u/∂λ of the path at this target's λ, at ``x`` whose reduced energy here is ``u_x``.

        The integrand of thermodynamic integration, and the observable that ΔF depends on.
        At an end of the linear path it is u_B − u_A, which needs only the other end's
        energy; otherwise one forward-mode derivative of ``path.energy`` in λ.
        """
        if self._linear_end():
            other = self.path.end_energy(x, "b" if self.end == "a" else "a")
            return other - u_x if self.end == "a" else u_x - other
        lam = jnp.asarray(self.lam, dtype=jnp.result_type(float))
        return jax.jvp(lambda l: self.path.energy(x, l), (lam,), (jnp.ones_like(lam),))[1]

    def derivative_evaluations(self) -> int:
        """Energy evaluations counted per :meth:`lambda_derivative` call."""
        return self.path.end_evaluations() if self._linear_end() else self.path.evaluations_per_point(1)


def end_target(path: Path, end: str) -> Target:
    return Target(path, jnp.asarray(0.0 if end == "a" else 1.0), end)


def window_target(path: Path, lam: float) -> Target:
    return Target(path, jnp.asarray(lam, dtype=jnp.float64), None)


def init_state(target: Target, position: Configuration) -> ChainState:
    energy, grad = target.energy_and_grad(position)
    return ChainState(position, energy, grad)


def mala_kernel(target: Target):
    """Build ``kernel(key, state, step_size, preconditioner) -> (state, StepInfo)``."""

    def kernel(key, state: ChainState, step_size, preconditioner):
        key_noise, key_accept = jax.random.split(key)
        x, u_x, g_x = state
        noise = jax.random.normal(key_noise, x.shape, x.dtype)
        y = x - step_size * preconditioner * g_x + jnp.sqrt(2.0 * step_size * preconditioner) * noise
        u_y, g_y = target.energy_and_grad(y)
        forward = jnp.sum(noise**2) / 2.0
        back_residual = x - y + step_size * preconditioner * g_y
        backward = jnp.sum(back_residual**2 / preconditioner) / (4.0 * step_size)
        log_ratio = -(u_y - u_x) - backward + forward
        log_ratio = jnp.where(jnp.isfinite(log_ratio), log_ratio, -jnp.inf)
        acceptance = jnp.exp(jnp.minimum(log_ratio, 0.0))
        accept = jax.random.uniform(key_accept, (), x.dtype) < acceptance
        new = jax.tree_util.tree_map(lambda a, b: jnp.where(accept, a, b), ChainState(y, u_y, g_y), state)
        return new, StepInfo(acceptance, new.energy, jnp.isnan(u_y), u_y == jnp.inf)

    return kernel


class BlockOutput(NamedTuple):
    """What :func:`run_block` returns (see there)."""

    states: ChainState
    log_step: Array
    mean_log_step: Array
    acceptance: Array
    energies: Array
    recorded: Array | None
    derivatives: Array | None
    nonfinite: Array  # (NaN proposals, +inf proposals) summed over the block's steps and chains


@eqx.filter_jit
def run_block(target: Target, key, states: ChainState, log_step, preconditioner, adapt_rate,
              steps: int, record_every: int, observe_every: int = 0):
    """Advance all chains ``steps`` MALA steps.

    The step size ε = exp(log_step) is shared by all chains; when ``adapt_rate`` > 0
    it follows a Robbins–Monro update towards :data:`TARGET_ACCEPTANCE` after every
    step. Returns the new states, the final log step, the mean log step over the
    block, per-chain mean acceptance, the energy trace (steps, chains), positions
    recorded every ``record_every`` steps (or ``None`` when ``record_every`` is 0) and
    ∂u/∂λ (:meth:`Target.lambda_derivative`) recorded every ``observe_every`` steps,
    shape (steps // observe_every, chains) (or ``None`` when ``observe_every`` is 0), and the
    number of proposals whose energy was NaN or +inf (:class:`BlockOutput`).
    ``observe_every`` must be a multiple of ``record_every`` when both are given.
    """
    kernel = jax.vmap(mala_kernel(target), in_axes=(0, 0, None, None))
    derivative = jax.vmap(target.lambda_derivative)
    chains = states.energy.shape[0]
    every = record_every or observe_every or 1
    group = observe_every or every
    if group % every:
        raise ValueError(f"observe_every ({observe_every}) must be a multiple of record_every ({record_every})")
    if steps % group:
        raise ValueError(f"steps ({steps}) must be a multiple of record_every ({record_every}) "
                         f"and observe_every ({observe_every})")

    def step(carry, key_step):
        states, log_step = carry
        keys = jax.random.split(key_step, chains)
        states, info = kernel(keys, states, jnp.exp(log_step), preconditioner)
        log_step = log_step + adapt_rate * (jnp.mean(info.acceptance) - TARGET_ACCEPTANCE)
        odd = jnp.stack([jnp.sum(info.proposal_nan), jnp.sum(info.proposal_forbidden)])
        return (states, log_step), (info.acceptance, info.energy, log_step, odd)

    def record(carry, keys):
        # inner scan between two recordings: only every `every`-th position is kept in memory
        carry, outputs = jax.lax.scan(step, carry, keys)
        return carry, (outputs, carry[0].position if record_every else None)

    def observe(carry, keys):
        # every `group` steps: ∂u/∂λ at the current positions (costs one path evaluation per chain)
        carry, outputs = jax.lax.scan(record, carry, keys)
        du = derivative(carry[0].position, carry[0].energy) if observe_every else None
        return carry, (outputs, du)

    keys = jax.random.split(key, steps).reshape((steps // group, group // every, every) + key.shape)
    (states, log_step_end), (((acc, energies, log_steps, odd), recorded), du) = jax.lax.scan(
        observe, (states, log_step), keys)
    flat = lambda a: a.reshape((steps,) + a.shape[3:])  # noqa: E731
    acc, energies, log_steps = flat(acc), flat(energies), flat(log_steps)
    if recorded is not None:
        recorded = recorded.reshape((steps // every,) + recorded.shape[2:])
    odd = jnp.sum(odd.reshape(steps, 2), axis=0)
    return BlockOutput(states, log_step_end, jnp.mean(log_steps), jnp.mean(acc, axis=0), energies, recorded, du, odd)


@dataclasses.dataclass
class StateSamples:
    """Equilibrium samples of one state and the sampler's diagnostics.

    Attributes:
        samples: configurations, shape (n, *configuration shape), from healthy chains only.
        step_size: adapted MALA step ε (reduced units, scaled by ``preconditioner``).
        preconditioner: the diagonal preconditioner M (configuration shape), 1 where unused.
        acceptance: mean acceptance over healthy chains in production.
        autocorrelation_time: integrated autocorrelation time τ (steps) of the slowest observable.
        effective_sample_size: estimated number of independent samples among ``samples``.
        evaluations: energy evaluations spent (all chains, warm-up and burn-in included).
        chains, stuck_chains: chain counts.
        burn_in_steps: steps per chain discarded before production.
        equilibrated: True when the burn-in criteria were met within the budget.
        mixing_statistic: worst split potential-scale reduction of the watched observables (1 = well mixed).
        warnings: plain-language problems found.
        autocorrelation_times: τ (steps) per watched observable in the judged burn-in trace:
            ``"energy"``, ``"du_dlambda"`` (∂u/∂λ at the target's λ; absent when it is constant
            there) and ``"coordinates"`` (slowest coordinate, vector systems).
        derivative_evaluations: the part of ``evaluations`` spent on ∂u/∂λ.
        nan_proposals: proposals whose energy was NaN (rejected; an error in the energy function,
            which flags the result).
        forbidden_proposals: proposals whose energy was +∞ (rejected; a forbidden region such as
            a hard wall, which is legitimate).
    """

    samples: np.ndarray
    step_size: float
    preconditioner: np.ndarray
    acceptance: float
    autocorrelation_time: float
    effective_sample_size: float
    evaluations: int
    chains: int
    stuck_chains: int
    burn_in_steps: int
    equilibrated: bool
    mixing_statistic: float
    warnings: list[str]
    autocorrelation_times: dict[str, float] = dataclasses.field(default_factory=dict)
    derivative_evaluations: int = 0
    nan_proposals: int = 0
    forbidden_proposals: int = 0

    def diagnostics(self) -> dict:
        return {
            "acceptance": self.acceptance,
            "step_size": self.step_size,
            "autocorrelation_time": self.autocorrelation_time,
            "effective_sample_size": self.effective_sample_size,
            "chains": self.chains,
            "stuck_chains": self.stuck_chains,
            "burn_in_steps": self.burn_in_steps,
            "equilibrated": self.equilibrated,
            "mixing_statistic": self.mixing_statistic,
            "autocorrelation_times": dict(self.autocorrelation_times),
            "evaluations": self.evaluations,
            "derivative_evaluations": self.derivative_evaluations,
            "nan_proposals": self.nan_proposals,
            "forbidden_proposals": self.forbidden_proposals,
        }


def nonfinite_warnings(name: str, nan_count: int, forbidden_count: int) -> list[str]:
    """Plain words about proposals whose energy was NaN (an error) or +∞ (a forbidden region)."""
    out = []
    if nan_count:
        out.append(f"{name}: {nan_count:,} sampler proposals had a NaN energy and were rejected. NaN is not an energy: "
                   "the energy function fails somewhere the sampler went (return +inf for a region that is "
                   "forbidden, or fix the formula); the result is not trustworthy.")
    if forbidden_count:
        out.append(f"{name}: {forbidden_count:,} sampler proposals had energy +inf (a forbidden region, e.g. a hard "
                   "wall) and were rejected; this is legitimate and the estimators treat such states as impossible.")
    return out


# ------------------------------------------------------------------ time-series analysis

def autocorrelation_time(trace: np.ndarray, window_factor: float = 5.0) -> float:
    """Integrated autocorrelation time τ = 1 + 2 Σ ρ(t) of ``trace[step, chain]``.

    The autocovariance is centred on the grand mean over all chains (so chains that
    disagree show up as long correlation) and averaged over chains; the sum is cut
    by Sokal's automatic window (smallest M with M ≥ c·τ(M), c = 5; Sokal 1997,
    "Monte Carlo methods in statistical mechanics: foundations and new algorithms", in Functional Integration, NATO ASI Series B 361, Plenum [mem]).
    Returns ``len(trace)`` when no window fits (the trace is too short).
    """
    trace = _ranked_if_infinite(trace)
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
    trace = _ranked_if_infinite(trace)
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


# ------------------------------------------------------------------ the driver

def _production_plan(samples: int, healthy: int, chains: int, stride: int, per_call: int, remaining: int,
                     tau: float) -> tuple[int, int, str]:
    """``(stride, samples per chain, warning)`` for production within ``remaining`` evaluations.

    Every chain (stuck ones too) runs ``stride × per_chain`` steps. When fewer than
    :data:`MIN_SAMPLES` samples fit at stride ⌈τ⌉ the stride is shortened (and the samples are
    correlated, which the warning says); when not even one step per chain fits, ``per_chain`` is
    0 and the chains' current positions are the samples.
    """
    wanted = int(math.ceil(samples / healthy))
    affordable = remaining // (chains * stride * per_call)
    if affordable >= wanted:
        return stride, wanted, ""
    if affordable * healthy >= MIN_SAMPLES:
        note = ""
        if affordable * healthy < 2 * MIN_SAMPLES:
            note = (f"the budget affords only {affordable * healthy} decorrelated samples (autocorrelation time "
                    f"{tau:.0f} steps); raise the budget for more trajectories.")
        return stride, int(affordable), note
    per_chain = max(1, min(wanted, int(math.ceil(MIN_SAMPLES / healthy))))
    short = int(remaining // (chains * per_chain * per_call))
    if short < 1:
        per_chain = int(remaining // (chains * per_call))
        short = 1
    return short, per_chain, (f"the budget left {remaining:,} evaluations for production, too few for {MIN_SAMPLES} "
                              f"samples one autocorrelation time ({tau:.0f} steps) apart; they are {short} steps "
                              "apart and correlated, so error bars may be too small. Raise the budget.")


def _observables(energies: list[np.ndarray], positions: list[np.ndarray] | None,
                 derivatives: list[np.ndarray] | None, record: int, observe: int):
    """``(name, trace[step, chain], spacing in steps)`` of every watched observable."""
    traces = [("energy", np.concatenate(energies, axis=0), 1)]
    if positions:
        pos = np.concatenate(positions, axis=0)  # (recordings, chains, ...)
        pos = pos.reshape(pos.shape[0], pos.shape[1], -1)
        traces.extend(("coordinates", pos[:, :, i], record) for i in range(pos.shape[2]))
    if derivatives:
        traces.append(("du_dlambda", np.concatenate(derivatives, axis=0), observe))
    return traces


def _ranked_if_infinite(trace: np.ndarray) -> np.ndarray:
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


def _judge(traces) -> tuple[float, float, dict[str, float]]:
    """Slowest τ (steps), worst split-R̂, and τ (steps) per observable kind."""
    taus: dict[str, float] = {}
    rhat = 0.0
    for name, trace, spacing in traces:
        taus[name] = max(taus.get(name, 0.0), autocorrelation_time(trace) * spacing)
        rhat = max(rhat, split_mixing_statistic(trace))
    return float(max(taus.values())), float(rhat), taus


def sample_state(
    key,
    target: Target,
    start: Configuration,
    *,
    samples: int,
    chains: int = 64,
    evaluation_budget: int,
    precondition: bool | None = None,
    min_warmup: int = 200,
    name: str = "end state",
    initial_step_size: float | None = None,
    starts: Configuration | None = None,
    on_spent=None,
) -> StateSamples:
    """Draw ``samples`` equilibrium configurations of ``target`` starting from ``start``.

    Args:
        key: PRNG key.
        target: the state to sample (reduced energy).
        start: one configuration where every chain starts (a tiny jitter separates them).
        starts: optional start set, k configurations stacked on a first axis, each of
            ``start``'s shape; chain i then starts at ``starts[i mod k]`` (``start`` only
            fixes the shape). Starts in different basins make chains disagree in the
            split-R̂ check until they have mixed, so a slow mode cannot pass unseen.
        samples: number of configurations to return.
        chains: number of parallel chains.
        evaluation_budget: most energy evaluations this call may spend; when burn-in
            has not converged by then, sampling stops early and says so.
        precondition: diagonal preconditioning; default on for vector configurations
            (shape (d,)) and off for particle coordinates (periodic wrapping makes
            coordinate variances meaningless there).
        name: used in warnings.
        on_spent: optional callback ``on_spent(evaluations)`` after each block (progress meters).
    """
    start = jnp.asarray(start)
    if precondition is None:
        precondition = start.ndim == 1
    per_call = target.evaluations()
    per_derivative = target.derivative_evaluations()
    key_jitter, key_run = jax.random.split(key)
    keys = iter(jax.random.split(key_run, 10_000))
    if starts is None:
        origins = jnp.broadcast_to(start, (chains,) + start.shape)
    else:
        starts = jnp.asarray(starts, dtype=start.dtype)
        if starts.ndim != start.ndim + 1 or starts.shape[1:] != start.shape or starts.shape[0] < 1:
            raise ValueError(f"starts must stack configurations of shape {start.shape} on a first axis, "
                             f"got shape {starts.shape}")
        origins = starts[jnp.arange(chains) % starts.shape[0]]  # round-robin over the chains
    positions = origins + 1e-3 * jax.random.normal(key_jitter, (chains,) + start.shape, start.dtype)
    states = jax.vmap(target.energy_and_grad)(positions)
    states = ChainState(positions, states[0], states[1])
    spent = chains * per_call
    derivative_spent = 0
    preconditioner = jnp.ones(start.shape, start.dtype)
    record = 5 if precondition else 0
    warnings: list[str] = []

    # initial step: scale of the inverse gradient norm is a safe first guess
    if initial_step_size is None:
        gnorm2 = float(jnp.mean(jnp.sum(states.grad.reshape(chains, -1) ** 2, axis=1)))
        dim = int(np.prod(start.shape)) or 1
        initial_step_size = float(np.clip(dim / max(gnorm2, 1e-12), 1e-6, 1.0)) * 0.1
    log_step = jnp.log(jnp.asarray(initial_step_size, start.dtype))

    def block_cost(observe_every=0):
        return chains * (BLOCK_STEPS * per_call + (BLOCK_STEPS // observe_every * per_derivative if observe_every else 0))

    nonfinite = np.zeros(2, dtype=np.int64)  # proposals with NaN energy, with +inf energy

    def block(states, log_step, adapt_rate, record_every, observe_every=0):
        nonlocal spent, derivative_spent, nonfinite
        out = run_block(target, next(keys), states, log_step, preconditioner, adapt_rate, BLOCK_STEPS, record_every,
                        observe_every)
        spent += block_cost(observe_every)
        derivative_spent += block_cost(observe_every) - block_cost(0)
        nonfinite += np.asarray(out.nonfinite, dtype=np.int64)
        if on_spent is not None:
            on_spent(block_cost(observe_every))
        return out[:7]

    # ---- warm-up: step size (and preconditioner, in doubling windows)
    warm_blocks = max(1, min_warmup // BLOCK_STEPS)
    window, done_blocks = 1, 0
    mean_log_step = log_step
    while done_blocks < warm_blocks or (precondition and window <= 4):
        recorded = []
        for _ in range(window if precondition else warm_blocks):
            states, log_step, mean_log_step, acc, _, pos, _ = block(states, log_step, 0.05, record)
            done_blocks += 1
            if pos is not None:
                recorded.append(np.asarray(pos))
            if spent > evaluation_budget * 0.5:
                break
        if precondition and recorded:
            pos = np.concatenate(recorded).reshape(-1, *start.shape)
            var = np.var(pos, axis=0)
            scale = np.median(var[var > 0]) if np.any(var > 0) else 1.0
            var = np.clip(var, scale * 1e-4, scale * 1e4) if scale > 0 else np.ones_like(var)
            # keep εM fixed in magnitude when M changes so adaptation resumes near its optimum
            old_mean = float(jnp.mean(preconditioner))
            preconditioner = jnp.asarray(var, start.dtype)
            log_step = log_step + jnp.log(old_mean / float(jnp.mean(preconditioner)))
            mean_log_step = log_step
        window *= 2
        if not precondition or spent > evaluation_budget * 0.5:
            break
    # one more adaptation block with the final preconditioner
    states, log_step, mean_log_step, acc, _, _, _ = block(states, log_step, 0.05, 0)
    log_step = mean_log_step
    warmup_steps = (spent // (chains * per_call))

    # ---- burn-in with measurement: the energy every step, coordinates every `record` steps
    # (vector systems) and ∂u/∂λ, the observable ΔF depends on, every `observe` steps
    energies: list[np.ndarray] = []
    pos_trace: list[np.ndarray] = []
    du_trace: list[np.ndarray] = []
    acc_blocks: list[np.ndarray] = []
    observe = DERIVATIVE_EVERY
    tau, rhat, equilibrated, taus = float("nan"), float("nan"), False, {}
    while True:
        states, _, _, acc, energy_trace, pos, du = block(states, log_step, 0.0, record, observe)
        energies.append(np.asarray(energy_trace))
        acc_blocks.append(np.asarray(acc))
        if pos is not None:
            pos_trace.append(np.asarray(pos))
        if du is not None:
            du = np.asarray(du)
            if len(du_trace) == 0 and np.all(du == du.flat[0]):
                # ∂u/∂λ is exactly constant here (e.g. a smooth stage shape at an end of a decoupling path):
                # it carries no information, so stop paying for it
                observe = 0
            else:
                du_trace.append(du)
        half = len(energies) // 2
        if half >= 1:
            # judge the second half of the trace; the first half is burn-in
            late_d = du_trace[-half:] if len(du_trace) >= half else None
            tau, rhat, taus = _judge(_observables(energies[-half:], pos_trace[-half:] if pos_trace else None,
                                                  late_d, record, observe))
            if half * BLOCK_STEPS >= EQUILIBRATION_TAUS * tau and rhat < MIXING_LIMIT:
                equilibrated = True
                break
        # burn-in may use BURN_IN_SHARE of the budget; the rest is for production
        if spent + block_cost(observe) > BURN_IN_SHARE * evaluation_budget:
            break
    if not np.isfinite(tau):  # the budget ended burn-in after one block: judge the whole trace
        tau, rhat, taus = _judge(_observables(energies, pos_trace or None, du_trace or None, record, observe))
    burn_in = warmup_steps + len(energies) * BLOCK_STEPS

    # ---- stuck chains
    acc_chain = np.mean(np.stack(acc_blocks[-max(1, len(acc_blocks) // 2):]), axis=0)
    stuck = acc_chain < STUCK_ACCEPTANCE
    if np.all(stuck):
        raise RuntimeError(
            f"{name}: every sampling chain is stuck (acceptance below {STUCK_ACCEPTANCE}); "
            "check that the energy is smooth and finite near the start configuration")
    healthy = np.flatnonzero(~stuck)
    if stuck.any():
        warnings.append(f"{name}: {int(stuck.sum())} of {chains} sampling chains were stuck (acceptance below "
                        f"{STUCK_ACCEPTANCE:.0%}) and were excluded from the samples (their cost still counts).")

    # ---- production: every chain continues, sampled every ceil(tau) steps, within the budget
    stride = max(1, int(math.ceil(tau))) if np.isfinite(tau) else 1
    remaining = max(evaluation_budget - spent, 0)
    stride, per_chain, note = _production_plan(samples, len(healthy), chains, stride, per_call, remaining, tau)
    if note:
        warnings.append(f"{name}: {note}")
    if per_chain > 0:
        out = run_block(target, next(keys), states, log_step, preconditioner, 0.0, stride * per_chain, stride)
        states, _, _, acc, _, pos, _ = out[:7]
        nonfinite += np.asarray(out.nonfinite, dtype=np.int64)
        spent += chains * stride * per_chain * per_call
        if on_spent is not None:
            on_spent(chains * stride * per_chain * per_call)
        pos = np.asarray(pos)
        acceptance = float(np.mean(np.asarray(acc)[healthy]))
    else:  # nothing left to spend: the chains' current positions are the samples
        pos = np.asarray(states.position)[None]
        acceptance = float(np.mean(acc_chain[healthy]))
        per_chain = 1
    pos = pos[:, healthy]
    # interleave chains so that a prefix of the array draws from every chain
    flat = np.moveaxis(pos, 0, 1).reshape((len(healthy), per_chain) + start.shape)
    flat = np.swapaxes(flat, 0, 1).reshape((-1,) + start.shape)[:samples]

    if not equilibrated:
        warnings.append(
            f"{name}: sampling did not pass the equilibration checks within its share of the budget "
            f"(autocorrelation time {tau:.0f} steps, chain agreement statistic {rhat:.2f}; want < {MIXING_LIMIT}). "
            "The end state may be multimodal or slow to mix: raise the budget or give a better start configuration.")
    if acceptance < 0.2:
        warnings.append(f"{name}: low sampler acceptance {acceptance:.2f}; the energy may be very rough.")
    warnings.extend(nonfinite_warnings(name, int(nonfinite[0]), 0))  # +inf ones: summarised by the route
    ess = float(len(flat) * min(1.0, stride / max(tau, 1.0))) if np.isfinite(tau) else float("nan")
    return StateSamples(
        samples=flat,
        step_size=float(jnp.exp(log_step)),
        preconditioner=np.asarray(preconditioner),
        acceptance=acceptance,
        autocorrelation_time=float(tau),
        effective_sample_size=ess,
        evaluations=int(spent),
        chains=chains,
        stuck_chains=int(stuck.sum()),
        burn_in_steps=int(burn_in),
        equilibrated=equilibrated,
        mixing_statistic=float(rhat),
        warnings=warnings,
        autocorrelation_times={k: float(v) for k, v in taus.items()},
        derivative_evaluations=int(derivative_spent),
        nan_proposals=int(nonfinite[0]),
        forbidden_proposals=int(nonfinite[1]),
    )
