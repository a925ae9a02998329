"""Equilibrium sampling of one state on the path: many chains of one kernel, judged for burn-in.

The kernels (:mod:`fe_tool.kernels`: MALA, BAOAB kinetic Langevin, generalised HMC) each take
one step of every chain; this module is the driver (:func:`sample_state`), which runs
``chains`` chains in parallel in fixed-length blocks (one compiled ``lax.scan`` per block
shape):

1. warm-up: the step size is adapted towards the kernel's target acceptance (MALA 0.574,
   Roberts & Rosenthal 1998, J. R. Stat. Soc. B 60, 255; for unadjusted BAOAB the acceptance a
   Metropolis test would have had, from its shadow work); for vector configurations a diagonal
   preconditioner (MALA) or inverse mass (kinetic) is estimated from the chains' variance in
   doubling windows;
2. burn-in: blocks are run until the integrated autocorrelation time τ of the recorded
   observables is below a tenth of the judged half of the trace and the chains agree (split
   potential-scale reduction below 1.1, Gelman & Rubin 1992 / Vehtari et al. 2021), or the
   budget share runs out. Watched: the reduced energy (every step), the coordinates for vector
   systems (every 5 steps) and ∂u/∂λ of the path at the target's λ (every
   :data:`DERIVATIVE_EVERY` steps; its cost, one path evaluation per chain per record, is
   counted). Chains may start from a start set (round-robin); chains that begin in different
   basins disagree in the split-R̂ check until they have mixed;
3. production: each chain is continued and sampled every ⌈τ⌉ steps, within the budget.

Chains whose acceptance collapses (stuck in a steep tail) are excluded from the samples,
counted and reported; their cost still counts. Particle models may carry a neighbour list
through the chains: it is rebuilt only when some particle has moved more than half its skin,
for all chains at once, and an overflow of its capacity is caught on the host after the
block, the capacity grown and the block run again — never a silent wrong energy.
"""
from __future__ import annotations

import dataclasses
import math
from typing import Any, NamedTuple

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np

from .kernels import KERNELS, ChainState, KernelParams, StepInfo, Target, end_target, window_target  # noqa: F401
from .kernels.kinetic import draw_momenta
from .timeseries import autocorrelation_time, split_mixing_statistic
from .types import Array, Configuration

BLOCK_STEPS = 50
STUCK_ACCEPTANCE = 0.02
EQUILIBRATION_TAUS = 10  # the judged second half of the burn-in must span this many autocorrelation times
MIXING_LIMIT = 1.1  # split potential-scale reduction below which chains agree (Gelman et al., "Bayesian Data Analysis", classic threshold)
BURN_IN_SHARE = 0.7  # of a call's budget; production sampling gets the rest
MIN_SAMPLES = 64
DERIVATIVE_EVERY = 10  # burn-in records ∂u/∂λ every this many steps (cost: one path evaluation per chain each time)
DEFAULT_DAMPING = 0.1  # kinetic kernels: γh, the momentum decay per step (1 − e^{−γh} ≈ 10 %)


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
    shadow_work: Array  # mean shadow work per step and chain (0 for exact kernels)


@eqx.filter_jit
def run_block(target: Target, key, states: ChainState, log_step, inverse_mass, adapt_rate, steps: int,
              record_every: int, observe_every: int = 0, *, kernel: str = "mala", damping: float = DEFAULT_DAMPING,
              builder=None) -> BlockOutput:
    """Advance all chains ``steps`` steps of ``kernel``.

    The step size exp(log_step) is shared by all chains; when ``adapt_rate`` > 0 it follows a
    Robbins–Monro update towards the kernel's target acceptance after every step. Records the
    energy every step, positions every ``record_every`` steps (none when 0) and ∂u/∂λ
    (:meth:`Target.lambda_derivative`) every ``observe_every`` steps (none when 0), which must be
    a multiple of ``record_every`` when both are given. ``damping`` is γh of the kinetic kernels;
    ``builder`` brings carried neighbour lists up to date (particle models).
    """
    spec = KERNELS[kernel]
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
        size = jnp.exp(log_step)
        params = KernelParams(size, inverse_mass, jnp.asarray(damping, size.dtype) / size)
        states, info, shadow = spec.step(target, keys, states, params, builder)
        log_step = log_step + adapt_rate * (jnp.mean(info.acceptance) - spec.target_acceptance)
        odd = jnp.stack([jnp.sum(info.proposal_nan), jnp.sum(info.proposal_forbidden)])
        return (states, log_step), (info.acceptance, info.energy, log_step, odd, shadow)

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
    (states, log_step_end), (((acc, energies, log_steps, odd, shadow), recorded), du) = jax.lax.scan(
        observe, (states, log_step), keys)
    flat = lambda a: a.reshape((steps,) + a.shape[3:])  # noqa: E731
    acc, energies, log_steps, shadow = flat(acc), flat(energies), flat(log_steps), flat(shadow)
    if recorded is not None:
        recorded = recorded.reshape((steps // every,) + recorded.shape[2:])
    odd = jnp.sum(odd.reshape(steps, 2), axis=0)
    return BlockOutput(states, log_step_end, jnp.mean(log_steps), jnp.mean(acc, axis=0), energies, recorded, du, odd,
                       jnp.mean(shadow))


def init_chains(target: Target, positions, *, kernel: str = "mala", key=None, inverse_mass=None, builder=None
                ) -> ChainState:
    """Chains at ``positions`` (stacked): energies, gradients, momenta (kinetic kernels) and lists."""
    lists = None if builder is None else builder.build_batch(positions)
    energy, grad = jax.vmap(target.energy_and_grad, in_axes=(0, 0 if lists is not None else None))(positions, lists)
    if KERNELS[kernel].kinetic:
        momentum = draw_momenta(key, positions, jnp.ones(positions.shape[1:], positions.dtype)
                                if inverse_mass is None else inverse_mass)
    else:
        momentum = jnp.zeros_like(positions)
    return ChainState(positions, energy, grad, momentum, lists)


@dataclasses.dataclass
class StateSamples:
    """Equilibrium samples of one state and the sampler's diagnostics.

    Attributes:
        samples: configurations, shape (n, *configuration shape), from healthy chains only.
        step_size: adapted step (MALA ε, kinetic h; reduced units, scaled by ``preconditioner``).
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
        kernel: the sampling kernel used; shadow_work_per_step: mean shadow work (kT) per step and
            chain in the second half of burn-in (unadjusted kinetic kernel; 0 for exact ones).
        neighbour_list_grown: times a carried neighbour list overflowed and was enlarged.
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
    kernel: str = "mala"
    shadow_work_per_step: float = 0.0
    neighbour_list_grown: int = 0

    @property
    def overdamped_step(self) -> float:
        """The step of overdamped Langevin equivalent to this sampler's: MALA's ε itself; for the
        kinetic kernels h²/2, since one velocity-Verlet step from fresh momenta is a Langevin
        proposal with ε = h²/2 (common practice; e.g. Neal 2011, Handbook of MCMC ch. 5, from
        memory). Switching steps are scaled from it."""
        return self.step_size if self.kernel == "mala" else 0.5 * self.step_size ** 2

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
            "kernel": self.kernel,
            "shadow_work_per_step": self.shadow_work_per_step,
            "neighbour_list_grown": self.neighbour_list_grown,
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


def _judge(traces) -> tuple[float, float, dict[str, float]]:
    """Slowest τ (steps), worst split-R̂, and τ (steps) per observable kind."""
    taus: dict[str, float] = {}
    rhat = 0.0
    for name, trace, spacing in traces:
        taus[name] = max(taus.get(name, 0.0), autocorrelation_time(trace) * spacing)
        rhat = max(rhat, split_mixing_statistic(trace))
    return float(max(taus.values())), float(rhat), taus




# ------------------------------------------------------------------ the driver

@dataclasses.dataclass
class _Chains:
    """The chains of one :func:`sample_state` call and what they have spent (host side)."""

    target: Target
    kernel: str
    states: ChainState
    log_step: Any
    inverse_mass: Any
    keys: Any
    chains: int
    per_call: int
    per_derivative: int
    budget: int
    damping: float = DEFAULT_DAMPING
    builder: Any = None
    on_spent: Any = None
    spent: int = 0
    derivative_spent: int = 0
    nonfinite: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(2, dtype=np.int64))
    shadow: list = dataclasses.field(default_factory=list)
    grown: int = 0

    def cost(self, steps: int, observe_every: int = 0) -> int:
        observed = steps // observe_every * self.per_derivative if observe_every else 0
        return self.chains * (steps * self.per_call + observed)

    def run(self, adapt_rate: float, steps: int = BLOCK_STEPS, record_every: int = 0, observe_every: int = 0,
            log_step=None) -> BlockOutput:
        """One block from the current states (rerun with a larger list after an overflow); books its cost."""
        key = next(self.keys)
        log_step = self.log_step if log_step is None else log_step
        while True:
            out = run_block(self.target, key, self.states, log_step, self.inverse_mass, adapt_rate, steps,
                            record_every, observe_every, kernel=self.kernel, damping=self.damping,
                            builder=self.builder)
            if self.builder is None or not bool(np.any(np.asarray(out.states.neighbours.overflow))):
                break
            self.spent += self.cost(steps, observe_every)  # the discarded block was computed: book it
            self._grow(out.states.neighbours)
        self.states = out.states
        cost = self.cost(steps, observe_every)
        self.spent += cost
        self.derivative_spent += cost - self.cost(steps)
        self.nonfinite += np.asarray(out.nonfinite, dtype=np.int64)
        self.shadow.append(float(out.shadow_work))
        if self.on_spent is not None:
            self.on_spent(cost)
        return out

    def _grow(self, overflowed) -> None:
        """A list overflowed: make room (×1.3 of what was needed) and rebuild from the block's start."""
        from .energy.neighbours import grown_capacity

        pairs, cells = grown_capacity(overflowed)
        self.builder = self.builder.with_capacity(pairs, cells)
        self.states = self.states._replace(neighbours=self.builder.build_batch(self.states.position))
        self.grown += 1


def _start(key, target, start, starts, chains, kernel, builder, jitter: float = 1e-3):
    """Chain start positions (start set round-robin, tiny jitter) and the first states."""
    key_jitter, key_run = jax.random.split(key)
    if starts is None:
        origins = jnp.broadcast_to(start, (chains,) + start.shape)
    else:
        starts = jnp.asarray(starts, dtype=start.dtype)
        if starts.ndim != start.ndim + 1 or starts.shape[1:] != start.shape or starts.shape[0] < 1:
            raise ValueError(f"starts must stack configurations of shape {start.shape} on a first axis, "
                             f"got shape {starts.shape}")
        origins = starts[jnp.arange(chains) % starts.shape[0]]  # round-robin over the chains
    positions = origins + jitter * jax.random.normal(key_jitter, (chains,) + start.shape, start.dtype)
    states = init_chains(target, positions, kernel=kernel, key=jax.random.fold_in(key_jitter, 1), builder=builder)
    return states, iter(jax.random.split(key_run, 10_000))


def _first_step_size(states: ChainState, kernel: str, start) -> float:
    """The scale of the inverse gradient norm: a safe first guess (MALA ε; kinetic h = √(2ε))."""
    chains = states.energy.shape[0]
    gnorm2 = float(jnp.mean(jnp.sum(states.grad.reshape(chains, -1) ** 2, axis=1)))
    dim = int(np.prod(start.shape)) or 1
    epsilon = float(np.clip(dim / max(gnorm2, 1e-12), 1e-6, 1.0)) * 0.1
    return math.sqrt(2.0 * epsilon) if KERNELS[kernel].kinetic else epsilon


def _warm_up(ch: _Chains, precondition: bool, record: int, min_warmup: int, start) -> None:
    """Step-size adaptation (and the preconditioner / inverse mass in doubling windows)."""
    warm_blocks = max(1, min_warmup // BLOCK_STEPS)
    power = KERNELS[ch.kernel].step_scale_power
    window, done_blocks = 1, 0
    while done_blocks < warm_blocks or (precondition and window <= 4):
        recorded = []
        for _ in range(window if precondition else warm_blocks):
            out = ch.run(0.05, record_every=record)
            ch.log_step = out.log_step
            done_blocks += 1
            if out.recorded is not None:
                recorded.append(np.asarray(out.recorded))
            if ch.spent > ch.budget * 0.5:
                break
        if precondition and recorded:
            pos = np.concatenate(recorded).reshape(-1, *start.shape)
            var = np.var(pos, axis=0)
            scale = np.median(var[var > 0]) if np.any(var > 0) else 1.0
            var = np.clip(var, scale * 1e-4, scale * 1e4) if scale > 0 else np.ones_like(var)
            # keep the step's reach fixed when the metric changes so adaptation resumes near its optimum
            old_mean = float(jnp.mean(ch.inverse_mass))
            ch.inverse_mass = jnp.asarray(var, start.dtype)
            ch.log_step = ch.log_step + power * jnp.log(old_mean / float(jnp.mean(ch.inverse_mass)))
            if KERNELS[ch.kernel].kinetic:   # momenta of the new mass
                ch.states = ch.states._replace(momentum=draw_momenta(next(ch.keys), ch.states.position, ch.inverse_mass))
        window *= 2
        if not precondition or ch.spent > ch.budget * 0.5:
            break
    out = ch.run(0.05)   # one more adaptation block with the final metric
    ch.log_step = out.mean_log_step


@dataclasses.dataclass
class _BurnIn:
    tau: float
    rhat: float
    taus: dict
    equilibrated: bool
    acceptance_blocks: list
    blocks: int
    observe: int


def _burn_in(ch: _Chains, record: int) -> _BurnIn:
    """Blocks until τ fits ten times into the judged half and the chains agree (or the share ends)."""
    energies, pos_trace, du_trace, acc_blocks = [], [], [], []
    observe = DERIVATIVE_EVERY
    tau, rhat, equilibrated, taus = float("nan"), float("nan"), False, {}
    while True:
        out = ch.run(0.0, record_every=record, observe_every=observe)
        energies.append(np.asarray(out.energies))
        acc_blocks.append(np.asarray(out.acceptance))
        if out.recorded is not None:
            pos_trace.append(np.asarray(out.recorded))
        if out.derivatives is not None:
            du = np.asarray(out.derivatives)
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
        if ch.spent + ch.cost(BLOCK_STEPS, observe) > BURN_IN_SHARE * ch.budget:
            break
    if not np.isfinite(tau):  # the budget ended burn-in after one block: judge the whole trace
        tau, rhat, taus = _judge(_observables(energies, pos_trace or None, du_trace or None, record, observe))
    return _BurnIn(tau, rhat, taus, equilibrated, acc_blocks, len(energies), observe)


def _healthy_chains(acc_blocks, chains: int, name: str, warnings: list[str]):
    acc_chain = np.mean(np.stack(acc_blocks[-max(1, len(acc_blocks) // 2):]), axis=0)
    stuck = acc_chain < STUCK_ACCEPTANCE
    if np.all(stuck):
        raise RuntimeError(
            f"{name}: every sampling chain is stuck (acceptance below {STUCK_ACCEPTANCE}); "
            "check that the energy is smooth and finite near the start configuration")
    if stuck.any():
        warnings.append(f"{name}: {int(stuck.sum())} of {chains} sampling chains were stuck (acceptance below "
                        f"{STUCK_ACCEPTANCE:.0%}) and were excluded from the samples (their cost still counts).")
    return np.flatnonzero(~stuck), stuck, acc_chain


def _production(ch: _Chains, samples: int, healthy, acc_chain, tau: float, name: str, warnings: list[str], shape):
    """Every chain continues; one sample every ⌈τ⌉ steps, chains interleaved, within the budget."""
    stride = max(1, int(math.ceil(tau))) if np.isfinite(tau) else 1
    remaining = max(ch.budget - ch.spent, 0)
    stride, per_chain, note = _production_plan(samples, len(healthy), ch.chains, stride, ch.per_call, remaining, tau)
    if note:
        warnings.append(f"{name}: {note}")
    if per_chain > 0:
        out = ch.run(0.0, steps=stride * per_chain, record_every=stride)
        pos = np.asarray(out.recorded)
        acceptance = float(np.mean(np.asarray(out.acceptance)[healthy]))
    else:  # nothing left to spend: the chains' current positions are the samples
        pos = np.asarray(ch.states.position)[None]
        acceptance = float(np.mean(acc_chain[healthy]))
        per_chain = 1
    pos = pos[:, healthy]
    # interleave chains so that a prefix of the array draws from every chain
    flat = np.moveaxis(pos, 0, 1).reshape((len(healthy), per_chain) + tuple(shape))
    return np.swapaxes(flat, 0, 1).reshape((-1,) + tuple(shape))[:samples], stride, acceptance


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
    kernel: str = "mala",
    damping: float = DEFAULT_DAMPING,
    builder=None,
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
        precondition: diagonal preconditioning (inverse mass for the kinetic kernels); default
            on for vector configurations (shape (d,)) and off for particle coordinates.
        name: used in warnings.
        on_spent: optional callback ``on_spent(evaluations)`` after each block (progress meters).
        kernel: ``"mala"``, ``"kinetic"`` or ``"kinetic_exact"`` (:data:`fe_tool.kernels.KERNELS`).
        damping: γh of the kinetic kernels.
        builder: a neighbour-list builder with a skin for particle models that carry a list;
            by default the path's own (:meth:`Path.dynamics_neighbour_builder`), if any.
    """
    start = jnp.asarray(start)
    builder = builder if builder is not None else target.path.dynamics_neighbour_builder()
    if kernel not in KERNELS:
        raise ValueError(f"kernel must be one of {sorted(KERNELS)}, got {kernel!r}")
    if precondition is None:
        precondition = start.ndim == 1
    states, keys = _start(key, target, start, starts, chains, kernel, builder)
    step0 = initial_step_size if initial_step_size is not None else _first_step_size(states, kernel, start)
    ch = _Chains(target, kernel, states, jnp.log(jnp.asarray(step0, start.dtype)), jnp.ones(start.shape, start.dtype),
                 keys, chains, target.evaluations(), target.derivative_evaluations(), int(evaluation_budget),
                 float(damping), builder, on_spent, spent=chains * target.evaluations())
    record = 5 if precondition else 0
    warnings: list[str] = []
    _warm_up(ch, precondition, record, min_warmup, start)
    warmup_steps = ch.spent // (chains * ch.per_call)
    burn = _burn_in(ch, record)
    healthy, stuck, acc_chain = _healthy_chains(burn.acceptance_blocks, chains, name, warnings)
    flat, stride, acceptance = _production(ch, samples, healthy, acc_chain, burn.tau, name, warnings, start.shape)
    return _finish(ch, flat, stride, acceptance, burn, stuck, warmup_steps, name, warnings)


def _finish(ch: _Chains, flat, stride, acceptance, burn: _BurnIn, stuck, warmup_steps, name, warnings) -> StateSamples:
    tau, rhat = burn.tau, burn.rhat
    if not burn.equilibrated:
        warnings.append(
            f"{name}: sampling did not pass the equilibration checks within its share of the budget "
            f"(autocorrelation time {tau:.0f} steps, chain agreement statistic {rhat:.2f}; want < {MIXING_LIMIT}). "
            "The end state may be multimodal or slow to mix: raise the budget or give a better start configuration.")
    if acceptance < 0.2:
        warnings.append(f"{name}: low sampler acceptance {acceptance:.2f}; the energy may be very rough.")
    warnings.extend(nonfinite_warnings(name, int(ch.nonfinite[0]), 0))  # +inf ones: summarised by the route
    ess = float(len(flat) * min(1.0, stride / max(tau, 1.0))) if np.isfinite(tau) else float("nan")
    return StateSamples(
        samples=flat, step_size=float(jnp.exp(ch.log_step)), preconditioner=np.asarray(ch.inverse_mass),
        acceptance=acceptance, autocorrelation_time=float(tau), effective_sample_size=ess,
        evaluations=int(ch.spent), chains=ch.chains, stuck_chains=int(stuck.sum()),
        burn_in_steps=int(warmup_steps + burn.blocks * BLOCK_STEPS), equilibrated=burn.equilibrated,
        mixing_statistic=float(rhat), warnings=warnings,
        autocorrelation_times={k: float(v) for k, v in burn.taus.items()},
        derivative_evaluations=int(ch.derivative_spent), nan_proposals=int(ch.nonfinite[0]),
        forbidden_proposals=int(ch.nonfinite[1]), kernel=ch.kernel,
        shadow_work_per_step=float(np.mean(ch.shadow[-max(1, len(ch.shadow) // 2):])) if ch.shadow else 0.0,
        neighbour_list_grown=ch.grown)


def continue_sampling(key, target: Target, previous: StateSamples, positions, *, samples: int, evaluation_budget: int,
                      name: str = "end state", on_spent=None, damping: float = DEFAULT_DAMPING,
                      builder=None) -> StateSamples:
    """More samples from chains that are already in equilibrium: no warm-up, no burn-in.

    ``positions`` (one configuration per chain, e.g. each chain's last sample) continue with
    ``previous``'s kernel, step size, preconditioner and thinning stride (its autocorrelation
    time); momenta are drawn afresh, which leaves the equilibrium distribution unchanged. The
    returned samples are interleaved over the chains like :func:`sample_state`'s; the diagnostics
    are ``previous``'s, with this call's evaluations.
    """
    positions = jnp.asarray(positions)
    builder = builder if builder is not None else target.path.dynamics_neighbour_builder()
    chains = positions.shape[0]
    states, keys = _start(key, target, positions[0], positions, chains, previous.kernel, builder, jitter=0.0)
    dtype = positions.dtype
    ch = _Chains(target, previous.kernel, states, jnp.log(jnp.asarray(previous.step_size, dtype)),
                 jnp.asarray(previous.preconditioner, dtype), keys, chains, target.evaluations(),
                 target.derivative_evaluations(), int(evaluation_budget), float(damping), builder, on_spent,
                 spent=chains * target.evaluations())
    warnings: list[str] = []
    healthy = np.arange(chains)
    flat, _, acceptance = _production(ch, samples, healthy, np.ones(chains), previous.autocorrelation_time, name,
                                      warnings, positions.shape[1:])
    return dataclasses.replace(previous, samples=flat, evaluations=int(ch.spent), acceptance=acceptance,
                               warnings=warnings, chains=chains, stuck_chains=0,
                               effective_sample_size=float(len(flat)), neighbour_list_grown=ch.grown)
