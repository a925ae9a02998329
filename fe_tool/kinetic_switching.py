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

**Forbidden and undefined regions** (the rules, also in :func:`_second_half`):

* a kick force that is not finite where u = +∞ cannot be integrated: the trajectory stops
  (frozen where it was) with w = +∞, weight zero. This is exact only if the reverse process
  cannot reach such points either; otherwise ⟨e^{−w}⟩ misses its probability of reaching them.
* a NaN energy anywhere, or a non-finite force where the energy is finite, is an error in the
  energy function: w = NaN (the routes count the trajectory as diverged), also frozen.
* a start whose energy is not finite is not an equilibrium sample: w = NaN.

**Cost.** Every visited point (the start and the end of each step) is evaluated at two
levels in one call: the level of the step that ended there (energy for the shadow work, force
for the closing kick) and the next one (energy for the protocol work, force for the next
opening kick): :func:`kinetic_switching_evaluations` = T (K + 1) ×
``path.evaluations_per_point(2)`` — the same as overdamped switching for a linear path, twice
that for paths that evaluate each level separately.

Carried neighbour lists (particle models) are brought up to date once per step for the whole
batch, between the A-A move and the force evaluation, outside the per-trajectory map.
"""
from __future__ import annotations

import dataclasses
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
    """The start level and the level of every step in the run's time order, then the final level.

    ``levels[j]`` is the level of step j (j < K) and ``levels[K]`` the final one: forward
    (λ_1 … λ_K, λ_K), reverse (λ_K … λ_0); the start level is λ_0 forward, λ_K reverse.
    """
    forward = jnp.concatenate([lams[1:], lams[-1:]])
    levels = jnp.where(sign > 0, forward, lams[::-1])
    return jnp.where(sign > 0, lams[0], lams[-1]), levels


def _evaluate(path: Path, force: ForceFunction | None, x, levels, neighbours):
    """Energies and kick forces −∇u + f at two levels on one point (``path.evaluations_per_point(2)``)."""

    def one(lam):
        # a user's path may define energy(x, lam) only: a list is passed only when there is one
        u, g = path.energy_and_grad(x, lam) if neighbours is None else path.energy_and_grad(x, lam, neighbours)
        return u, -g if force is None else -g + force(x, lam)

    return jax.vmap(one)(levels)


def _first_half(key, s: KineticState, h, decay, inverse_mass):
    """B A O A of one trajectory: position, momentum before the closing kick, heat, kick energy,
    and whether the opening force was undefined (then nothing moves)."""
    bad_open = ~jnp.all(jnp.isfinite(s.force))
    p1 = s.momentum + 0.5 * h * s.force
    x1 = s.position + 0.5 * h * inverse_mass * p1
    k1 = kinetic_energy(p1, inverse_mass)
    p2 = refresh(key, p1, inverse_mass, decay)
    heat = kinetic_energy(p2, inverse_mass) - k1
    x2 = x1 + 0.5 * h * inverse_mass * p2
    moving = ~(s.forbidden | s.undefined | bad_open)
    x2 = jnp.where(moving, x2, s.position)  # a stopped trajectory stays finite where it was
    return x2, p2, heat, k1 - kinetic_energy(s.momentum, inverse_mass), bad_open


def _second_half(path, force, s: KineticState, x, p, heat, kick, bad_open, levels, h, inverse_mass, neighbours):
    """Forces at the new point, the closing kick, the stop rules; returns (state, shadow, protocol)."""
    (u_close, u_next), (f_close, f_next) = _evaluate(path, force, x, levels, neighbours)
    p3 = p + 0.5 * h * f_close
    k3 = kinetic_energy(p3, inverse_mass)
    shadow = u_close + k3 - (s.energy + kinetic_energy(s.momentum, inverse_mass)) - heat
    alive = ~(s.forbidden | s.undefined)
    bad_close = ~jnp.all(jnp.isfinite(f_close))
    # Rules: an undefined kick force where u = +inf cannot be integrated (stop, w = +inf); a NaN
    # energy or an undefined force where u is finite is an error (stop, w = NaN). A finite force
    # through a forbidden region is integrated as it is: the work stays exact (module doc).
    stop_forbidden = alive & jnp.where(bad_open, s.energy == jnp.inf, bad_close & (u_close == jnp.inf))
    stop_undefined = alive & jnp.where(
        bad_open, s.energy != jnp.inf,
        (bad_close & (u_close != jnp.inf)) | jnp.isnan(u_close) | jnp.isnan(u_next))
    moved = alive & ~stop_forbidden & ~stop_undefined
    keep = lambda new, old: jnp.where(moved, new, old)  # noqa: E731
    new = KineticState(keep(x, s.position), keep(p3, s.momentum), keep(u_next, s.energy), keep(f_next, s.force),
                       s.kicks + jnp.where(moved, kick + k3 - kinetic_energy(p, inverse_mass), 0.0),
                       s.forbidden | stop_forbidden, s.undefined | stop_undefined)
    stopped_value = jnp.where(stop_undefined, jnp.nan, jnp.where(stop_forbidden, jnp.inf, 0.0))
    return new, jnp.where(moved, shadow, stopped_value), jnp.where(moved, u_next - u_close, 0.0)


def _start(path, force, key, starts, start_level, first_level, inverse_mass, builder):
    """States at the starts (two levels evaluated: the start's and the first step's) and lists."""
    lists = None if builder is None else builder.build_batch(starts)
    levels = jnp.stack([start_level, first_level])
    u, f = jax.vmap(lambda x, nb: _evaluate(path, force, x, levels, nb),
                    in_axes=(0, 0 if lists is not None else None))(starts, lists)
    undefined = ~jnp.isfinite(u[:, 0]) | jnp.isnan(u[:, 1])
    momenta = draw_momenta(key, starts, inverse_mass)
    zeros = jnp.zeros_like(u[:, 0])
    states = KineticState(starts, momenta, u[:, 1], f[:, 1], zeros, jnp.zeros_like(undefined), undefined)
    return states, lists, u[:, 0], u[:, 1] - u[:, 0]


def _switch(path, force, key, starts, lams, step_size, inverse_mass, damping, direction, builder):
    """:func:`switch_kinetic`'s body; also returns the final lists (or ``None``)."""
    sign = direction_sign(direction, starts.dtype)
    lams = jnp.asarray(lams, starts.dtype)
    steps = lams.shape[0] - 1
    inverse_mass = jnp.asarray(inverse_mass, starts.dtype)
    per_step = lambda a: jnp.broadcast_to(jnp.asarray(a, starts.dtype), (steps,))  # noqa: E731
    sizes, decays = per_step(step_size), jnp.exp(-per_step(damping))
    sizes, decays = jnp.where(sign > 0, sizes, sizes[::-1]), jnp.where(sign > 0, decays, decays[::-1])
    start_level, levels = _run_levels(lams, sign)
    key_momenta, key_steps = jax.random.split(key)
    states, lists, u_start, protocol_start = _start(path, force, key_momenta, starts, start_level, levels[0],
                                                    inverse_mass, builder)
    trajectories = starts.shape[0]

    def body(carry, inputs):
        states, lists = carry
        key_j, h, decay, pair = inputs
        keys = jax.random.split(key_j, trajectories)
        x, p, heat, kick, bad_open = jax.vmap(lambda k, s: _first_half(k, s, h, decay, inverse_mass))(keys, states)
        lists = None if builder is None else builder.update_batch(x, lists)
        states, shadow, protocol = jax.vmap(
            lambda s, xi, pi, qi, ki, bi, nb: _second_half(path, force, s, xi, pi, qi, ki, bi, pair, h,
                                                           inverse_mass, nb),
            in_axes=(0, 0, 0, 0, 0, 0, 0 if lists is not None else None))(states, x, p, heat, kick, bad_open, lists)
        return (states, lists), (shadow, protocol)

    pairs = jnp.stack([levels[:-1], levels[1:]], axis=1)
    inputs = (jax.random.split(key_steps, steps), sizes, decays, pairs)
    (states, lists), (shadow, protocol) = jax.lax.scan(body, (states, lists), inputs)
    shadow, protocol = shadow.T, protocol.T  # (T, K)
    protocols = jnp.concatenate([protocol_start[:, None], protocol], axis=1)  # at points 0 … K
    # forward: the level change at point j opens transition j; reverse: the one at point j+1 closes it
    increments = shadow + jnp.where(sign > 0, protocols[:, :-1], protocols[:, 1:])
    works = states.energy - u_start + states.kicks
    works = jnp.where(states.undefined, jnp.nan, jnp.where(states.forbidden, jnp.inf, works))
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
                                                       damping, direction, builder)
    overflow = jnp.asarray(False) if lists is None else jnp.any(lists.overflow)
    if record_shadow:
        return works, increments, finals, overflow, shadow
    return works, increments, finals, overflow


def kinetic_switching_evaluations(path: Path, trajectories: int, steps: int) -> int:
    """Energy evaluations of ``trajectories`` kinetic trajectories of ``steps`` transitions: every
    visited point (start and K step ends) is evaluated at two levels (module doc, "Cost")."""
    return int(trajectories) * (int(steps) + 1) * path.evaluations_per_point(2)


@eqx.filter_jit
def _switch_jit(path, force, key, starts, lams, step_size, inverse_mass, damping, sign, builder):
    return _switch(path, force, key, starts, lams, step_size, inverse_mass, damping, sign, builder)


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
