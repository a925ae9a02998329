"""Metropolis-adjusted Langevin (MALA) with a constant diagonal preconditioner.

Roberts & Tweedie 1996, Bernoulli 2, 341. With preconditioner M and step ε on the reduced
energy u::

    proposal  y = x − ε M ∇u(x) + √(2ε M) ξ,          ξ ~ N(0, I)
    accept with probability  min(1, exp(−u(y) + u(x) + log q(x|y) − log q(y|x))),
    log q(y|x) = −|y − x + ε M ∇u(x)|²_{M⁻¹} / (4ε).

The optimal acceptance is about 0.574 (Roberts & Rosenthal 1998, J. R. Stat. Soc. B 60, 255).
One energy-and-gradient evaluation per step.
"""
from __future__ import annotations

import jax
import jax.numpy as jnp

from .state import ChainState, KernelParams, StepInfo

TARGET_ACCEPTANCE = 0.574


def mala_chain_step(target, key, state: ChainState, params: KernelParams, neighbours=None):
    """One MALA step of one chain; ``neighbours`` is the list valid at the proposal (or None)."""
    key_noise, key_accept = jax.random.split(key)
    x, u_x, g_x = state.position, state.energy, state.grad
    step, m = params.step_size, params.inverse_mass
    noise = jax.random.normal(key_noise, x.shape, x.dtype)
    y = x - step * m * g_x + jnp.sqrt(2.0 * step * m) * noise
    u_y, g_y = target.energy_and_grad(y, neighbours)
    back_residual = x - y + step * m * g_y
    log_ratio = -(u_y - u_x) - jnp.sum(back_residual**2 / m) / (4.0 * step) + jnp.sum(noise**2) / 2.0
    log_ratio = jnp.where(jnp.isfinite(log_ratio), log_ratio, -jnp.inf)
    acceptance = jnp.exp(jnp.minimum(log_ratio, 0.0))
    accept = jax.random.uniform(key_accept, (), x.dtype) < acceptance
    moved = ChainState(y, u_y, g_y, state.momentum, None)
    kept = ChainState(x, u_x, g_x, state.momentum, None)
    new = jax.tree_util.tree_map(lambda a, b: jnp.where(accept, a, b), moved, kept)
    return new, StepInfo(acceptance, new.energy, jnp.isnan(u_y), u_y == jnp.inf)


def mala_step(target, keys, states: ChainState, params: KernelParams, builder=None):
    """One MALA step of every chain (keys and states stacked on a first axis).

    With a neighbour ``builder`` the carried lists are brought up to date for the proposals
    (all chains rebuilt at once when any needs it, outside the per-chain map).
    """
    if builder is None:
        step = jax.vmap(lambda k, s: mala_chain_step(target, k, s._replace(neighbours=None), params))
        new, info = step(keys, states)
        return new._replace(neighbours=None), info
    # proposals first (same noise as in mala_chain_step), then the lists, then the energies
    key_noise = jax.vmap(lambda k: jax.random.split(k)[0])(keys)
    m, eps = params.inverse_mass, params.step_size
    noise = jax.vmap(lambda k, x: jax.random.normal(k, x.shape, x.dtype))(key_noise, states.position)
    proposals = states.position - eps * m * states.grad + jnp.sqrt(2.0 * eps * m) * noise
    lists = builder.update_batch(proposals, states.neighbours)
    step = jax.vmap(lambda k, s, nb: mala_chain_step(target, k, s._replace(neighbours=None), params, nb))
    new, info = step(keys, states, lists)
    return new._replace(neighbours=lists), info
