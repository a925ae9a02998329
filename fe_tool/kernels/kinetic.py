"""Kinetic (underdamped) Langevin dynamics: BAOAB, and its Metropolis-adjusted relative.

Positions x, momenta p with a diagonal mass M (unit for particles; for vector systems the
inverse of the preconditioner, so the dynamics is isotropic in whitened coordinates), reduced
energy u (kT = 1, so p ~ N(0, M) at equilibrium), time step h and friction γ.

**BAOAB** (Leimkuhler & Matthews 2013, Appl. Math. Res. Express 2013, 34), one gradient per step::

    B: p ← p − (h/2)∇u(x)      A: x ← x + (h/2) M⁻¹p      O: p ← a p + √(1 − a²) M^{1/2} ξ,  a = e^{−γh}
    A: x ← x + (h/2) M⁻¹p      B: p ← p − (h/2)∇u(x)

It is chosen over other splittings because its configurational sampling error is the smallest
of the common ones (second order, with a vanishing leading term at high friction; same
reference), which is what free energies need. It is not exactly invariant for π ∝ e^{−u}: its
error shows as *shadow work*, the energy change H = u + ½pᵀM⁻¹p over a step that the O
(heat) part does not explain, w_shadow = ΔH − Q, Q = ΔK over the O substep (Sivak, Chodera &
Crooks 2013, Phys. Rev. X 3, 011007). The step size is adapted so that exp(−w_shadow),
capped at 1, the acceptance a Metropolis test of the step would have, averages
:data:`TARGET_ACCEPTANCE`; its measured bias is reported by ``benchmarks/bench_kernels.py``.

**Adjusted (generalised HMC, Horowitz 1991, Phys. Lett. B 268, 247)**: O(h/2), then a
velocity-Verlet step B A B accepted with min(1, e^{−ΔH}), on rejection the momentum flipped,
then O(h/2). Exact for π at any h; each rejection reverses the motion, which slows mixing.

Both keep a carried neighbour list up to date between the move and the force evaluation, for
all chains at once (:meth:`NeighbourListBuilder.update_batch`), outside the per-chain map.
"""
from __future__ import annotations

import jax
import jax.numpy as jnp

from .state import ChainState, KernelParams, StepInfo

TARGET_ACCEPTANCE = 0.95
"""Unadjusted BAOAB: mean min(1, e^{−w_shadow}) the step size is adapted to."""
TARGET_ACCEPTANCE_ADJUSTED = 0.97
"""Generalised HMC: mean acceptance the step size is adapted to. High, because every rejection
reverses the momentum and so the motion: on the 108-particle LJ fluid the energy's
autocorrelation time was 96 steps at 0.97 against 172 at 0.90 (one run each of
``benchmarks/bench_kernels.py``'s kernel on the coupled end, budget 1.5e5; such single estimates
vary by up to 2×)."""
SHADOW_WORK_LIMIT = 5.0
"""BAOAB: a step whose shadow work (kT) exceeds this is undone and its momentum reversed."""


def kinetic_energy(p, inverse_mass):
    return 0.5 * jnp.sum(p * p * inverse_mass)


def refresh(key, p, inverse_mass, decay):
    """The O step: p ← a p + √(1 − a²) M^{1/2} ξ (exact Ornstein–Uhlenbeck in momentum)."""
    noise = jax.random.normal(key, p.shape, p.dtype)
    return decay * p + jnp.sqrt((1.0 - decay * decay) / inverse_mass) * noise


def draw_momenta(key, positions, inverse_mass):
    """Equilibrium momenta p ~ N(0, M) for a batch of positions."""
    noise = jax.random.normal(key, positions.shape, positions.dtype)
    return noise / jnp.sqrt(inverse_mass)


def _baoab_first(key, state: ChainState, params: KernelParams):
    """B A O A of one chain: the new position, the momentum before the last B, and the heat."""
    h, m = params.step_size, params.inverse_mass
    p = state.momentum - 0.5 * h * state.grad
    x = state.position + 0.5 * h * m * p
    before = kinetic_energy(p, m)
    p = refresh(key, p, m, jnp.exp(-params.friction * h))
    heat = kinetic_energy(p, m) - before
    x = x + 0.5 * h * m * p
    return x, p, heat


def _baoab_last(target, state: ChainState, x, p, heat, params: KernelParams, neighbours):
    """The force at the new position and the closing B; the shadow work decides the acceptance."""
    h, m = params.step_size, params.inverse_mass
    u, g = target.energy_and_grad(x, neighbours)
    p = p - 0.5 * h * g
    shadow = (u + kinetic_energy(p, m)) - (state.energy + kinetic_energy(state.momentum, m)) - heat
    undefined = ~jnp.isfinite(u) | ~jnp.all(jnp.isfinite(g))
    bad = undefined | ~(shadow < SHADOW_WORK_LIMIT)
    # a move into a forbidden (+inf) or undefined (NaN) region cannot be integrated, and one whose
    # shadow work passes SHADOW_WORK_LIMIT has left the integrator's stable range (two particles
    # driven into each other): it is undone and the momentum reversed, the reflection a
    # Metropolis rejection makes (which would have rejected it with probability ≥ 1 − e^−limit)
    moved = ChainState(x, u, g, p, None)
    kept = ChainState(state.position, state.energy, state.grad, -state.momentum, None)
    new = jax.tree_util.tree_map(lambda a, b: jnp.where(bad, b, a), moved, kept)
    acceptance = jnp.where(bad, 0.0, jnp.exp(jnp.minimum(-jnp.where(bad, 0.0, shadow), 0.0)))
    return new, StepInfo(acceptance, new.energy, jnp.isnan(u), u == jnp.inf), jnp.where(bad, 0.0, shadow)


def baoab_step(target, keys, states: ChainState, params: KernelParams, builder=None):
    """One BAOAB step of every chain; returns ``(states, StepInfo, shadow work per chain)``."""
    x, p, heat = jax.vmap(lambda k, s: _baoab_first(k, s, params))(keys, states)
    lists = None if builder is None else builder.update_batch(x, states.neighbours)
    last = jax.vmap(lambda s, xi, pi, qi, nb: _baoab_last(target, s._replace(neighbours=None), xi, pi, qi, params, nb),
                    in_axes=(0, 0, 0, 0, 0 if lists is not None else None))
    new, info, shadow = last(states, x, p, heat, lists)
    return new._replace(neighbours=lists), info, shadow


def _verlet_proposal(key, state: ChainState, params: KernelParams):
    """O(h/2) then the B A part of a velocity-Verlet step, for one chain."""
    h, m = params.step_size, params.inverse_mass
    p = refresh(key, state.momentum, m, jnp.exp(-0.5 * params.friction * h))
    p_half = p - 0.5 * h * state.grad
    return state.position + h * m * p_half, p, p_half


def _verlet_accept(target, key_accept, key_refresh, state, p, x_new, p_half, params, neighbours):
    h, m = params.step_size, params.inverse_mass
    u, g = target.energy_and_grad(x_new, neighbours)
    p_new = p_half - 0.5 * h * g
    log_ratio = -((u + kinetic_energy(p_new, m)) - (state.energy + kinetic_energy(p, m)))
    log_ratio = jnp.where(jnp.isfinite(log_ratio) & jnp.all(jnp.isfinite(g)), log_ratio, -jnp.inf)
    acceptance = jnp.exp(jnp.minimum(log_ratio, 0.0))
    accept = jax.random.uniform(key_accept, (), x_new.dtype) < acceptance
    moved = ChainState(x_new, u, g, p_new, None)
    kept = ChainState(state.position, state.energy, state.grad, -p, None)   # rejection: momentum reversed
    new = jax.tree_util.tree_map(lambda a, b: jnp.where(accept, a, b), moved, kept)
    new = new._replace(momentum=refresh(key_refresh, new.momentum, m, jnp.exp(-0.5 * params.friction * h)))
    return new, StepInfo(acceptance, new.energy, jnp.isnan(u), u == jnp.inf)


def adjusted_step(target, keys, states: ChainState, params: KernelParams, builder=None):
    """One generalised-HMC step of every chain (exact for π); returns ``(states, StepInfo, zeros)``."""
    split = jax.vmap(lambda k: jax.random.split(k, 3))(keys)
    x, p, p_half = jax.vmap(lambda k, s: _verlet_proposal(k, s, params))(split[:, 0], states)
    lists = None if builder is None else builder.update_batch(x, states.neighbours)
    accept = jax.vmap(lambda ka, kr, s, pi, xi, ph, nb: _verlet_accept(target, ka, kr, s._replace(neighbours=None),
                                                                      pi, xi, ph, params, nb),
                      in_axes=(0, 0, 0, 0, 0, 0, 0 if lists is not None else None))
    new, info = accept(split[:, 1], split[:, 2], states, p, x, p_half, lists)
    return new._replace(neighbours=lists), info, jnp.zeros_like(info.energy)
