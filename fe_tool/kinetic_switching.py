r"""Nonequilibrium switching with kinetic (underdamped) Langevin dynamics and its exact work.

Positions x, momenta p ~ N(0, M) with a diagonal mass M = 1/``inverse_mass``, reduced energy
u_λ (kT = 1), Hamiltonian H_λ(x, p) = u_λ(x) + ½ pᵀM⁻¹p. Levels λ_0 < … < λ_K. Each
transition moves by one BAOAB step (Leimkuhler & Matthews 2013, Appl. Math. Res. Express
2013, 34; the splitting of :mod:`fe_tool.kernels.kinetic`) with a kick force F_λ(x) = −∇u_λ(x)
+ f(x, λ), f an optional extra force (a control), time step h and O-step decay a = e^{−γh}::

    B: p ← p + (h/2) F_λ(x)    A: x ← x + (h/2) M⁻¹p    O: p ← a p + √(1 − a²) M^{1/2} ξ    A    B

*Forward* (A → B), for k = 0 … K−1: the level changes λ_k → λ_{k+1} at fixed (x, p)
(protocol work u_{k+1}(x) − u_k(x)), then one BAOAB step at λ_{k+1}, whose shadow work
ΔH_{λ_{k+1}} − Q (Q = the kinetic-energy change of its O substep, the heat) is work too
(Sivak, Chodera & Crooks 2013, Phys. Rev. X 3, 011007, from memory).
*Reverse* (B → A) is the exact time reversal: for k = K−1 … 0, one BAOAB step at λ_{k+1},
then the level change λ_{k+1} → λ_k. Nothing is undone or rejected: an undo is a device of
samplers and would break the identity below.

**Why the work is exact.** Write a forward path as z_0 → … with z = (x, p). B and A are
shears, so volume preserving, and reversible under momentum flip R(x, p) = (x, −p):
R∘B∘R = B⁻¹ (x is fixed while p moves by (h/2)F(x), for *any* position-dependent F,
gradient or not) and R∘A∘R = A⁻¹. O satisfies detailed balance for the Gaussian momenta,
N(p) O(p → p′) = N(p′) O(p′ → p), and both are even in p. A level change moves nothing.
The reverse process applies the same substeps in the opposite order; since BAOAB is a
palindrome (and with them the extra force f at the same level — no sign flip, unlike the
overdamped kernel pair of :mod:`fe_tool.switching`, where the drift enters a Gaussian
transition density) the reverse of a forward path is a path of the reverse process with
flipped momenta, and the flips need not be made explicitly because N(0, M) is symmetric.
The path densities therefore differ only by the end distributions and the O factors:

    ln dP_F/dP_R = [−H_{λ_0}(z_0) + f_0] − [−H_{λ_K}(z_K) + f_K] − Σ_O ΔK
                 = H_{λ_K}(z_K) − H_{λ_0}(z_0) − Q − Δf = w − Δf,

with f = −ln Z and w = protocol work + shadow work (every change of H that is not heat).
Hence ⟨e^{−w}⟩_F = e^{−Δf} (Jarzynski) and P_F(w)/P_R(−w) = e^{w−Δf} (Crooks 1998,
J. Stat. Phys. 90, 1481) at any h, γ, K and f, given exact equilibrium starts.

**How it is accumulated.** The intermediate energies cancel in the sum, so the work is taken
as w = u_end(x_K) − u_start(x_0) + Σ (kinetic-energy changes of the B kicks): a trajectory
that passes through a region an intermediate level forbids (u = +∞ with a finite force, e.g. a
hard wall written with ``jnp.where``) keeps a finite, exact work, and one that ends in a region
the final level forbids gets w = +∞ (weight zero), never ∞ − ∞. The per-transition increments
(protocol + shadow) are reported as they are and are NaN across such a region.

**Forbidden and undefined regions** (the rules, also in :func:`_arrive`):

* a kick force that is not finite where u = +∞ cannot be integrated: the trajectory stops
  (frozen where it was) with w = +∞, weight zero. This is exact only if the reverse process
  cannot reach such points either; otherwise ⟨e^{−w}⟩ misses its probability of reaching them.
* a NaN energy anywhere, or a non-finite force where the energy is finite, is an error in the
  energy function: w = NaN (the routes count the trajectory as diverged), also frozen.
* a start whose energy is not finite is not an equilibrium sample: w = NaN.

**One force per point.** Between two steps the closing half-kick of the first and the opening
half-kick of the second act at the same point; they are merged into one kick at the level in
force there (forward: the level just switched to; reverse: the level about to be left), so
every visited point needs the force at one level only. The merged scheme is still a sequence
of level changes, shears and O steps whose time reversal is the reverse process (the reverse
kicks at the mirrored levels), so the identity above holds unchanged; with λ fixed it is
BAOAB exactly. The work needs no intermediate energies (they telescope): w = u_{l_K}(x_K) −
u_{l_0}(x_0) + Σ kicks, where the end energies come from the kick-level energies and the level
change made at the first (forward) or last (reverse) point.

**Cost.** Each point costs one energy and force at its kick level plus the level change made
there, u_to(x) − u_from(x): from :meth:`Path.energy_change` where that costs less than an
energy (a decoupling path sums only the changing particles' pairs: ≈ 4/n of an evaluation for
one particle in n), else one more energy (counted as a full evaluation):
:func:`kinetic_switching_evaluations`. The level changes are the protocol work of each
transition; the rest of an increment (kicks and energy changes at fixed level) is its shadow
work.

Carried neighbour lists (particle models) are brought up to date once per step for the whole
batch, between the A-A move and the force evaluation, outside the per-trajectory map.
"""
from __future__ import annotations

import dataclasses
import math
from typing import Any, Callable, NamedTuple

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np

from .kernels.kinetic import draw_momenta, kinetic_energy, refresh
from .path import Path
from .switching import padded_trajectories
from .types import Array

ForceFunction = Callable[[Array, Array], Array]
"""f(x, λ) -> extra force with the shape of x (reduced units, added to −∇u in the kicks)."""


class KineticState(NamedTuple):
    """One trajectory at a visited point (stacked: a batch)."""

    position: Array
    momentum: Array
    energy: Array  # u at the level of the next step (the point's "opening" level)
    force: Array  # −∇u + f at that level
    kicks: Array  # Σ kinetic-energy changes of the B kicks so far
    forbidden: Array  # stopped in a region where u = +∞ and the force is undefined (w = +∞)
    undefined: Array  # stopped by a NaN energy or an undefined force (w = NaN)


def direction_sign(direction, dtype=jnp.float64):
    """+1.0 forward, −1.0 reverse, from ``"forward"``/``"reverse"`` or a (possibly traced) number."""
    if isinstance(direction, str):
        if direction not in ("forward", "reverse"):
            raise ValueError(f"direction must be 'forward' or 'reverse', got {direction!r}")
        direction = 1.0 if direction == "forward" else -1.0
    return jnp.asarray(direction, dtype=dtype)


def _run_levels(lams, sign):
    """Levels l_0 … l_K in the run's time order (forward λ_0 … λ_K, reverse λ_K … λ_0)."""
    return jnp.where(sign > 0, lams, lams[::-1])


def _point_levels(levels, sign):
    """For every point i = 0 … K: the kick level and the level change made there (from, to).

    Forward, the level changes l_i → l_{i+1} at point i before its kick (none at the last
    point); reverse, the mirror image, l_{i−1} → l_i at point i after its kick (none at the
    first). The kick level is the one in force at the kick: forward l_{i+1} (l_K at the end),
    reverse l_{i−1} (l_0 at the start).
    """
    after = jnp.concatenate([levels[1:], levels[-1:]])
    before = jnp.concatenate([levels[:1], levels[:-1]])
    kick = jnp.where(sign > 0, after, before)
    change_from = jnp.where(sign > 0, levels, before)
    change_to = jnp.where(sign > 0, after, levels)
    return kick, change_from, change_to


def _evaluate(path: Path, force: ForceFunction | None, x, kick_level, change_from, change_to, cheap_change: bool,
              neighbours):
    """At one point: u and the kick force −∇u + f at the kick level, the level change made there,
    and u at the other level of that change (u itself where there is none).

    One energy-and-gradient call, plus the change u_to(x) − u_from(x): from
    :meth:`Path.energy_change` when that is cheaper than an energy (a decoupling path touches
    only the changing particles' pairs), else from one more energy at the level that is not the
    kick level (then an infinite energy at one level cannot turn the other into ∞ − ∞).
    """
    extra = () if neighbours is None else (neighbours,)
    u, g = path.energy_and_grad(x, kick_level, *extra)
    kick = -g if force is None else -g + force(x, kick_level)
    kick_is_to = kick_level == change_to
    if cheap_change:
        change = path.energy_change(x, change_from, change_to)
        other = jnp.where(kick_is_to, u - change, u + change)
    else:
        other = path.energy(x, jnp.where(kick_is_to, change_from, change_to), *extra)
        change = jnp.where(kick_is_to, u - other, other - u)
    none = change_from == change_to
    return u, kick, jnp.where(none, 0.0, change), jnp.where(none, u, other)


def _kick(s: KineticState, size, inverse_mass):
    """p ← p + size·F at the state's point; returns the state and the kick's kinetic-energy change."""
    p = s.momentum + size * s.force
    change = kinetic_energy(p, inverse_mass) - kinetic_energy(s.momentum, inverse_mass)
    return s._replace(momentum=p), change


def _drift_refresh(key, s: KineticState, h, decay, inverse_mass):
    """A O A: the new position and momentum (a stopped trajectory stays where it was)."""
    x = s.position + 0.5 * h * inverse_mass * s.momentum
    p = refresh(key, s.momentum, inverse_mass, decay)
    x = x + 0.5 * h * inverse_mass * p
    alive = ~(s.forbidden | s.undefined)
    return jnp.where(alive, x, s.position), jnp.where(alive, p, s.momentum)


def _arrive(path, force, s: KineticState, x, p, levels, cheap_change, neighbours):
    """Evaluate the new point and apply the stop rules (module doc).

    Returns (state, level change, u at the change's other level, what the stop adds to the
    work: +∞ or NaN at the step that stops, else 0)."""
    u, f, change, other = _evaluate(path, force, x, *levels, cheap_change, neighbours)
    alive = ~(s.forbidden | s.undefined)
    bad_force = ~jnp.all(jnp.isfinite(f))
    # Rules: an undefined kick force where u = +inf cannot be integrated (stop, w = +inf); a NaN
    # energy or an undefined force where u is finite is an error (stop, w = NaN). A finite force
    # through a forbidden region is integrated as it is: the work stays exact (module doc).
    stop_forbidden = alive & bad_force & (u == jnp.inf)
    stop_undefined = alive & ((bad_force & (u != jnp.inf)) | jnp.isnan(u))
    moved = alive & ~stop_forbidden & ~stop_undefined
    keep = lambda new, old: jnp.where(moved, new, old)  # noqa: E731
    new = KineticState(keep(x, s.position), keep(p, s.momentum), keep(u, s.energy), keep(f, s.force), s.kicks,
                       s.forbidden | stop_forbidden, s.undefined | stop_undefined)
    stop = jnp.where(stop_undefined, jnp.nan, jnp.where(stop_forbidden, jnp.inf, 0.0))
    return new, jnp.where(moved, change, 0.0), jnp.where(moved, other, s.energy), stop


def _start(path, force, key, starts, levels, inverse_mass, cheap_change, builder):
    """States at the starts (kick level of point 0) and lists; the level change made at point 0."""
    lists = None if builder is None else builder.build_batch(starts)
    u, f, change, other = jax.vmap(lambda x, nb: _evaluate(path, force, x, *levels, cheap_change, nb),
                                   in_axes=(0, 0 if lists is not None else None))(starts, lists)
    bad_force = ~jnp.all(jnp.isfinite(f.reshape(f.shape[0], -1)), axis=1)
    forbidden = bad_force & (u == jnp.inf)
    undefined = jnp.isnan(u) | jnp.isnan(other) | (bad_force & (u != jnp.inf))
    momenta = draw_momenta(key, starts, inverse_mass)
    states = KineticState(starts, momenta, u, f, jnp.zeros_like(u), forbidden, undefined)
    return states, lists, change, other


def _switch(path, force, key, starts, lams, step_size, inverse_mass, damping, direction, builder, cheap_change):
    """:func:`switch_kinetic`'s body; also returns the final lists (or ``None``).

    The run's steps are B A O A B with the closing half-kick of one step and the opening
    half-kick of the next merged into one kick at the point between them (module doc), so every
    point costs one force: the first and last points get half kicks, the others
    (h_j + h_{j+1})/2.
    """
    sign = direction_sign(direction, starts.dtype)
    lams = jnp.asarray(lams, starts.dtype)
    steps = lams.shape[0] - 1
    inverse_mass = jnp.asarray(inverse_mass, starts.dtype)
    per_step = lambda a: jnp.broadcast_to(jnp.asarray(a, starts.dtype), (steps,))  # noqa: E731
    sizes, decays = per_step(step_size), jnp.exp(-per_step(damping))
    sizes, decays = jnp.where(sign > 0, sizes, sizes[::-1]), jnp.where(sign > 0, decays, decays[::-1])
    kick_levels, change_from, change_to = _point_levels(_run_levels(lams, sign), sign)
    key_momenta, key_steps = jax.random.split(key)
    states, lists, change0, other0 = _start(path, force, key_momenta, starts, (kick_levels[0], change_from[0], change_to[0]),
                                    inverse_mass, cheap_change, builder)
    u_kick0, start_forbidden, start_undefined = states.energy, states.forbidden, states.undefined
    states, kick0 = jax.vmap(lambda s: _kick(s, 0.5 * sizes[0], inverse_mass))(states)
    trajectories = starts.shape[0]
    next_kick = 0.5 * (sizes + jnp.concatenate([sizes[1:], jnp.zeros((1,), sizes.dtype)]))

    def body(carry, inputs):
        states, lists = carry
        key_j, h, decay, kick_size, levels = inputs
        keys = jax.random.split(key_j, trajectories)
        x, p = jax.vmap(lambda k, s: _drift_refresh(k, s, h, decay, inverse_mass))(keys, states)
        lists = None if builder is None else builder.update_batch(x, lists)
        before, was_alive = states.energy, ~(states.forbidden | states.undefined)
        states, change, other, stop = jax.vmap(
            lambda s, xi, pi, nb: _arrive(path, force, s, xi, pi, levels, cheap_change, nb),
            in_axes=(0, 0, 0, 0 if lists is not None else None))(states, x, p, lists)
        alive = ~(states.forbidden | states.undefined)
        states, kicked = jax.vmap(lambda s: _kick(s, kick_size, inverse_mass))(states)
        kicked = jnp.where(alive, kicked, 0.0)
        states = states._replace(kicks=states.kicks + kicked)
        move = jnp.where(was_alive & alive, states.energy - before + kicked, 0.0) + stop
        return (states, lists), (move, change, other)

    point_levels = (kick_levels[1:], change_from[1:], change_to[1:])
    inputs = (jax.random.split(key_steps, steps), sizes, decays, next_kick, point_levels)
    (states, lists), (moves, changes, others) = jax.lax.scan(body, (states, lists), inputs)
    moves, changes = moves.T, changes.T  # (T, K): energy change at the kick levels + kick; change at points 1 … K
    # forward: the change at point j opens transition j; reverse: the one at point j+1 closes it
    protocol = jnp.where(sign > 0, jnp.concatenate([change0[:, None], changes[:, :-1]], axis=1), changes)
    # w = u_{l_K}(x_K) − u_{l_0}(x_0) + Σ kicks: forward, u_{l_K}(x_K) is the last kick-level energy and
    # u_{l_0}(x_0) the other level's at the start; reverse, the other way round
    first = jnp.where(sign > 0, other0, u_kick0)
    last = jnp.where(sign > 0, states.energy, others[-1])
    works = last - first + kick0 + states.kicks
    stopped0 = jnp.where(start_undefined, jnp.nan, jnp.where(start_forbidden, jnp.inf, 0.0))
    increments = moves.at[:, 0].add(jnp.where(start_undefined | start_forbidden, stopped0,
                                              kick0 + jnp.where(sign > 0, change0, 0.0)))
    increments = increments.at[:, -1].add(jnp.where(sign > 0, 0.0, changes[:, -1]))
    works = jnp.where(states.undefined, jnp.nan, jnp.where(states.forbidden, jnp.inf, works))
    shadow = increments - protocol
    return works, increments, states.position, shadow, lists


def switch_kinetic(path: Path, force: ForceFunction | None, key, starts: Array, lams: Array, step_size,
                   inverse_mass, damping, direction="forward", builder=None, record_shadow: bool = False):
    """Run kinetic-Langevin switching trajectories (pure; no jit inside; module doc for the method).

    Args:
        path: the path u(x, λ).
        force: extra force f(x, λ) added to −∇u in every kick (the same in both directions), or ``None``.
        key: PRNG key (momenta and the O-step noise).
        starts: (T, *shape) equilibrium samples of the starting end (A forward, B reverse).
        lams: (K+1,) levels λ_0 … λ_K, always in forward order.
        step_size: time step h, a scalar or (K,) per transition (forward order).
        inverse_mass: M⁻¹, broadcastable to one configuration; momenta are drawn p ~ N(0, M).
        damping: γh, the O step's decay is e^{−γh}; a scalar or (K,) (forward order).
        direction: ``"forward"``, ``"reverse"`` or a (traced) ±1.0: one compilation serves both.
        builder: a :class:`~fe_tool.energy.neighbours.NeighbourListBuilder` with a skin
            (e.g. ``path.dynamics_neighbour_builder()``) to carry neighbour lists, or ``None``.
        record_shadow: also return the shadow work of every transition.

    Returns:
        ``(works (T,), increments (T, K), final positions (T, *shape), overflow)``, and with
        ``record_shadow`` also ``shadow (T, K)``; increments (protocol + shadow work) and shadow
        work are in the run's own time order; ``overflow`` is True when a carried list overflowed
        (its energies are invalid; grow the builder and rerun, see :func:`run_kinetic_in_batches`).

    Example:
        >>> works, _, _, _ = jax.jit(lambda k, x: switch_kinetic(path, None, k, x, lams, 0.3, 1.0, 0.5))(key, starts)
    """
    starts = jnp.asarray(starts)
    if jnp.ndim(lams) != 1 or jnp.shape(lams)[0] < 2:
        raise ValueError(f"lams must be a vector of at least 2 levels, got shape {jnp.shape(lams)}")
    works, increments, finals, shadow, lists = _switch(path, force, key, starts, lams, step_size, inverse_mass,
                                                       damping, direction, builder, cheap_level_change(path))
    overflow = jnp.asarray(False) if lists is None else jnp.any(lists.overflow)
    if record_shadow:
        return works, increments, finals, overflow, shadow
    return works, increments, finals, overflow


def cheap_level_change(path: Path) -> bool:
    """Whether :meth:`Path.energy_change` costs less than one energy (then it gives the level changes)."""
    return float(path.energy_change_cost()) < 1.0


def kinetic_point_cost(path: Path) -> float:
    """Evaluations per visited point: one energy and force, plus the level change (module doc, "Cost")."""
    change = float(path.energy_change_cost()) if cheap_level_change(path) else 1.0
    return float(path.evaluations_per_point(1)) + change


def kinetic_switching_evaluations(path: Path, trajectories: int, steps: int) -> int:
    """Energy evaluations of ``trajectories`` kinetic trajectories of ``steps`` transitions
    (``steps`` + 1 points each at :func:`kinetic_point_cost`, the total rounded up)."""
    return int(math.ceil(int(trajectories) * (int(steps) + 1) * kinetic_point_cost(path) - 1e-9))


@eqx.filter_jit
def _switch_jit(path, force, key, starts, lams, step_size, inverse_mass, damping, sign, builder):
    return _switch(path, force, key, starts, lams, step_size, inverse_mass, damping, sign, builder,
                   cheap_level_change(path))


@dataclasses.dataclass
class KineticSwitchingRun:
    """What :func:`run_kinetic_in_batches` returns (numpy, float64).

    Attributes:
        works: (T,) reduced works; +∞ for a trajectory stopped in a forbidden region, NaN for an error.
        increments: (T, K) protocol + shadow work per transition, in the run's own time order.
        finals: (T, *shape) final positions.
        shadow_per_transition: (K,) mean shadow work (kT) per transition in the run's order, over
            trajectories whose work and shadow work are finite (NaN where there are none).
        evaluations: energy evaluations spent, padding and batches rerun after a list overflow included.
        lists_grown: times a carried neighbour list overflowed and the batch was rerun larger.
        builder: the (possibly grown) builder, ``None`` without lists.
    """

    works: np.ndarray
    increments: np.ndarray
    finals: np.ndarray
    shadow_per_transition: np.ndarray
    evaluations: int
    lists_grown: int
    builder: Any = None


def _check_inputs(starts, lams, step_size, inverse_mass, damping, direction):
    """Clear errors before any computation."""
    if direction not in ("forward", "reverse"):
        raise ValueError(f"direction must be 'forward' or 'reverse', got {direction!r}")
    lams = np.asarray(lams, dtype=float)
    if lams.ndim != 1 or lams.shape[0] < 2 or not np.all(np.isfinite(lams)):
        raise ValueError(f"lams must be a finite vector of at least 2 levels (K + 1), got shape {lams.shape}")
    steps = lams.shape[0] - 1
    for name, value in (("step_size", step_size), ("damping", damping)):
        value = np.asarray(value, dtype=float)
        if value.ndim > 1 or (value.ndim == 1 and value.shape[0] != steps):
            raise ValueError(f"{name} must be a scalar or one value per transition ({steps}), got shape {value.shape}")
        if not np.all(np.isfinite(value)) or np.any(value < 0) or (name == "step_size" and np.any(value == 0)):
            raise ValueError(f"{name} must be finite and {'positive' if name == 'step_size' else 'non-negative'}")
    if not np.all(np.asarray(inverse_mass) > 0):
        raise ValueError("inverse_mass must be positive")
    if np.ndim(starts) < 2 or np.shape(starts)[0] < 1:
        raise ValueError(f"starts must stack at least one configuration on a first axis, got shape {np.shape(starts)}")


def run_kinetic_in_batches(path, force, key, starts, lams, step_size, inverse_mass, damping, direction,
                           batch: int = 128, on_spent=None, builder=None) -> KineticSwitchingRun:
    """:func:`switch_kinetic` over ``starts`` in equal batches (bounded memory, one compilation).

    Batches are as equal as possible (:func:`fe_tool.switching.padded_trajectories`); the last
    one is padded with copies of its first start, computed, counted and dropped. When a carried
    list overflows, the builder is grown (:func:`~fe_tool.energy.neighbours.grown_capacity`) and
    the batch rerun with the same key, so its works are those a large enough list gives; the
    discarded batch's evaluations count. ``on_spent(evaluations)`` is called after every batch run.
    """
    from .energy.neighbours import grown_capacity

    _check_inputs(starts, lams, step_size, inverse_mass, damping, direction)
    sign = direction_sign(direction)
    starts, lams = jnp.asarray(starts), jnp.asarray(lams, dtype=jnp.asarray(starts).dtype)
    total, steps = starts.shape[0], lams.shape[0] - 1
    size, _ = padded_trajectories(total, batch)
    per_batch = kinetic_switching_evaluations(path, size, steps)
    out, spent, grown = [], 0, 0
    shadow_sum, shadow_count = np.zeros(steps), np.zeros(steps)
    for i, k in enumerate(jax.random.split(key, -(-total // size))):
        chunk = starts[i * size:(i + 1) * size]
        n = chunk.shape[0]
        if n < size:
            chunk = jnp.concatenate([chunk, jnp.repeat(chunk[:1], size - n, axis=0)])
        while True:
            result = _switch_jit(path, force, k, chunk, lams, jnp.asarray(step_size), jnp.asarray(inverse_mass),
                                 jnp.asarray(damping), sign, builder)
            spent += per_batch
            if on_spent is not None:
                on_spent(per_batch)
            lists = result[-1]
            if lists is None or not bool(np.any(np.asarray(lists.overflow))):
                break
            builder = builder.with_capacity(*grown_capacity(lists))
            grown += 1
        works, increments, finals, shadow = (np.asarray(a[:n]) for a in result[:4])
        good = np.isfinite(works)[:, None] & np.isfinite(shadow)
        shadow_sum += np.where(good, shadow, 0.0).sum(axis=0)
        shadow_count += good.sum(axis=0)
        out.append((works.astype(np.float64), increments.astype(np.float64), finals))
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_shadow = np.where(shadow_count > 0, shadow_sum / np.maximum(shadow_count, 1), np.nan)
    works, increments, finals = (np.concatenate(parts) for parts in zip(*out))
    return KineticSwitchingRun(works, increments, finals, mean_shadow, int(spent), grown, builder)


__all__ = ["ForceFunction", "KineticSwitchingRun", "KineticState", "direction_sign", "kinetic_switching_evaluations",
           "run_kinetic_in_batches", "switch_kinetic"]
