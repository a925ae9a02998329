r"""Nonequilibrium switching along the path, both ways, with the exact discrete path work.

Levels λ_0 = 0 < … < λ_K = 1 with step sizes ε_k (k = 0…K−1) and a diagonal
preconditioner M_k.  One *forward* transition from level k to k+1 is an overdamped
Langevin (unadjusted) move with an optional control drift φ:

    x_{k+1} = x_k + ε_k [ −M_k ∇u_k(x_k) + φ(x_k, λ_k) ] + √(2 ε_k M_k) ξ_k,
    F_k(x_k → x_{k+1}) = N(x_{k+1}; x_k + ε_k[−M_k∇u_k(x_k) + φ(x_k, λ_k)], 2ε_k M_k),

and the matching *backward* kernel, with the control's sign flipped, is

    B_k(x_{k+1} → x_k) = N(x_k; x_{k+1} + ε_k[−M_k∇u_{k+1}(x_{k+1}) − φ(x_{k+1}, λ_{k+1})], 2ε_k M_k).

The forward path measure is P_F = π_0(x_0) Π_k F_k and the backward one is
P_B = π_K(x_K) Π_k B_k.  Their log-ratio (the discrete Radon–Nikodym derivative) is

    ln dP_B/dP_F = Δf − w,   with the reduced work
    w = u_K(x_K) − u_0(x_0) − Σ_k ln[ B_k(x_{k+1} → x_k) / F_k(x_k → x_{k+1}) ]
      = Σ_k { u_{k+1}(x_{k+1}) − u_k(x_k) + |x_k − m^B_k|²_{M_k⁻¹}/(4ε_k) − |ξ_k|²/2 },

where m^B_k is the backward kernel's mean.  The energies of the intermediate levels cancel
in the sum, so the work is accumulated as u_K(x_K) − u_0(x_0) plus the kernel terms: a
trajectory that crosses a region some intermediate level forbids (u = +∞, e.g. a hard wall)
and leaves it again keeps a finite work, and one that ends in a forbidden region gets w = +∞
(weight zero), never ∞ − ∞.  Hence ⟨e^{−w}⟩_F = Z_K/Z_0 = e^{−Δf}
(Jarzynski's equality) holds exactly for any K, ε and φ when x_0 ~ π_A exactly.
The *reverse* process starts from x_K ~ π_B and runs the backward kernels in the
exactly time-reversed order (B_{K−1}, …, B_0); its work is w_R = −w evaluated on its
own path, so P_F(w)/P_R(−w) = e^{w − Δf} (Crooks) holds exactly for the discrete
chains and BAR on (w_F, w_R) is unbiased.  With φ = 0 and ε → 0 the work tends to
the familiar Σ_k [u_{k+1} − u_k](x) of annealed switching.  (Crooks 1998, J. Stat.
Phys. 90, 1481; Jarzynski 1997, Phys. Rev. Lett. 78, 2690; for the kernel pair with
a control: Vargas, Padhy, Blessing & Nüsken 2024, "Transport meets variational
inference: controlled Monte Carlo diffusions", ICLR.)

One step function serves both directions: ``sign = +1`` moves with +φ and scores the
move against the kernel with −φ; ``sign = −1`` swaps them.  The estimators only see
the works, so a control changes nothing downstream.
"""
from __future__ import annotations

from typing import Callable, NamedTuple

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np

from .path import Path
from .types import Array

ControlFunction = Callable[[Array, Array], Array]
"""φ(x, λ) -> drift with the shape of x (reduced units: per unit of step size)."""


class SwitchState(NamedTuple):
    position: Array
    energy: Array  # u at the current level
    grad: Array  # ∇u at the current level
    drift: Array  # φ at (position, current λ), zero without control
    work: Array  # kernel terms so far: Σ [|x_k − m^B_k|²/(4ε) − |ξ_k|²/2] (energies are added at the end)


def _zero_drift(x, lam):
    return jnp.zeros_like(x)


def interpolated_preconditioner(lam_mid, precision_a, precision_b):
    """M(λ) = 1 / ((1 − λ) P_A + λ P_B): interpolated inverse-variance preconditioner."""
    return 1.0 / ((1.0 - lam_mid) * precision_a + lam_mid * precision_b)


def make_transition(path: Path, control: ControlFunction | None):
    """Build ``transition(noise, state, lam_from, lam_to, step, precision_a, precision_b, sign)``.

    Returns ``(new_state, work_increment)`` for one trajectory.  ``lam_from`` is the
    current level (of ``state``), ``lam_to`` the next one, ``step`` the pair's ε.
    """
    phi = _zero_drift if control is None else control

    def transition(noise, state: SwitchState, lam_from, lam_to, step, precision_a, precision_b, sign):
        lam_mid = 0.5 * (lam_from + lam_to)
        m = interpolated_preconditioner(lam_mid, precision_a, precision_b)
        x = state.position
        z = x + step * (-m * state.grad + sign * state.drift) + jnp.sqrt(2.0 * step * m) * noise
        u_z, g_z = path.energy_and_grad(z, lam_to)
        d_z = phi(z, lam_to)
        back_mean = z + step * (-m * g_z - sign * d_z)
        back = jnp.sum((x - back_mean) ** 2 / m) / (4.0 * step)
        kernel = back - jnp.sum(noise**2) / 2.0
        increment = u_z - state.energy + kernel  # this step's share of the work (NaN across a forbidden region)
        return SwitchState(z, u_z, g_z, d_z, state.work + kernel), increment

    return transition


def switch(path: Path, control: ControlFunction | None, key, starts: Array, lams: Array,
           step_sizes: Array, precision_a: Array, precision_b: Array, direction="forward",
           checkpoint: bool = False, record: bool = False):
    """Run switching trajectories; a pure, differentiable function (no jit inside).

    Args:
        path: the path u(x, λ).
        control: φ(x, λ) or ``None`` for plain annealed switching.
        key: PRNG key for the Langevin noise.
        starts: (T, *shape) equilibrium samples of the starting end (A forward, B reverse).
        lams: (K+1,) schedule λ_0 = 0 … λ_K = 1 (always given in forward order).
        step_sizes: (K,) ε_k of each transition (forward order).
        precision_a, precision_b: inverse preconditioner at the ends (shape of a
            configuration, or scalars); ones give plain Langevin.
        direction: ``"forward"`` (A→B), ``"reverse"`` (B→A), or the sign +1.0 / −1.0
            as a (possibly traced) number, so one compilation serves both directions.
        checkpoint: recompute each step in the backward pass (memory independent of K).
        record: also return every visited point with its energy and gradient.

    Returns:
        (works (T,), increments (T, K) in the direction's own step order, final positions);
        with ``record``: (works, increments, positions (T, K+1, *shape), energies (T, K+1),
        gradients (T, K+1, *shape)), all in the run's own time order.
    """
    if isinstance(direction, str):
        if direction not in ("forward", "reverse"):
            raise ValueError(f"direction must be 'forward' or 'reverse', got {direction!r}")
        direction = 1.0 if direction == "forward" else -1.0
    sign = jnp.asarray(direction, dtype=starts.dtype)
    phi = _zero_drift if control is None else control
    transition = make_transition(path, control)
    lams = jnp.where(sign > 0, lams, lams[::-1])
    step_sizes = jnp.where(sign > 0, step_sizes, step_sizes[::-1])

    def start(x):
        u, g = path.energy_and_grad(x, lams[0])
        return SwitchState(x, u, g, phi(x, lams[0]), jnp.zeros((), u.dtype))

    states = jax.vmap(start)(starts)
    step_fn = jax.vmap(transition, in_axes=(0, 0, None, None, None, None, None, None))

    def body(states, inputs):
        key_k, lam_from, lam_to, step = inputs
        noise = jax.random.normal(key_k, states.position.shape, states.position.dtype)
        states, increment = step_fn(noise, states, lam_from, lam_to, step, precision_a, precision_b, sign)
        visited = (states.position, states.energy, states.grad) if record else None
        return states, (increment, visited)

    if checkpoint:
        body = jax.checkpoint(body)
    first = states
    keys = jax.random.split(key, lams.shape[0] - 1)
    states, (increments, visited) = jax.lax.scan(body, states, (keys, lams[:-1], lams[1:], step_sizes))
    works = states.energy - first.energy + states.work
    if not record:
        return works, increments.T, states.position
    positions, energies, grads = visited
    positions = jnp.concatenate([first.position[None], positions]).swapaxes(0, 1)
    energies = jnp.concatenate([first.energy[None], energies]).T
    grads = jnp.concatenate([first.grad[None], grads]).swapaxes(0, 1)
    return works, increments.T, positions, energies, grads


@eqx.filter_jit
def switch_jit(path, control, key, starts, lams, step_sizes, precision_a, precision_b, sign):
    """Jitted :func:`switch`; ``sign`` = +1.0 forward, −1.0 reverse (one compilation per shape)."""
    return switch(path, control, key, starts, lams, step_sizes, precision_a, precision_b, sign)


def switching_evaluations(path: Path, trajectories: int, steps: int) -> int:
    """Energy evaluations spent by ``trajectories`` trajectories of ``steps`` steps."""
    return int(trajectories) * (int(steps) + 1) * path.evaluations_per_point(1)


def padded_trajectories(trajectories: int, batch: int) -> tuple[int, int]:
    """``(batch size, trajectories computed)`` for running ``trajectories`` in equal batches of at most ``batch``.

    Batches are made as equal as possible so the padding of the last one (computed, counted,
    then dropped) is below the number of batches.
    """
    trajectories = int(trajectories)
    batches = -(-trajectories // max(1, int(batch)))
    size = -(-trajectories // batches)
    return size, size * batches


def switching_evaluations_padded(path: Path, trajectories: int, steps: int, batch: int) -> int:
    """Evaluations :func:`run_in_batches` really spends (batch padding included), one direction."""

    return switching_evaluations(path, padded_trajectories(trajectories, batch)[1], steps)


def run_in_batches(path, control, key, starts, lams, step_sizes, precision_a, precision_b, direction,
                   batch: int = 256, on_spent=None):
    """:func:`switch_jit` over ``starts`` in fixed-size batches (bounded memory, one compilation).

    Batches are as equal as possible (:func:`padded_trajectories`); the last one
    is padded with copies of its first start and the padding dropped, so fewer trajectories than
    batches are wasted (:func:`switching_evaluations_padded` counts them). ``on_spent(evaluations)``
    is called after each batch (progress meters).
    Returns numpy float64 works (T,), increments (T, K) and final positions.
    """

    if direction not in ("forward", "reverse"):
        raise ValueError(f"direction must be 'forward' or 'reverse', got {direction!r}")
    sign = jnp.asarray(1.0 if direction == "forward" else -1.0)
    starts = jnp.asarray(starts)
    total = starts.shape[0]
    batch, _ = padded_trajectories(total, batch)
    works, incs, finals = [], [], []
    keys = jax.random.split(key, -(-total // batch))
    for i, k in enumerate(keys):
        chunk = starts[i * batch:(i + 1) * batch]
        n = chunk.shape[0]
        if n < batch:
            chunk = jnp.concatenate([chunk, jnp.repeat(chunk[:1], batch - n, axis=0)])
        w, inc, fin = switch_jit(path, control, k, chunk, jnp.asarray(lams), jnp.asarray(step_sizes),
                                 precision_a, precision_b, sign)
        works.append(np.asarray(w[:n], dtype=np.float64))
        if on_spent is not None:
            on_spent(switching_evaluations(path, batch, len(lams) - 1))
        incs.append(np.asarray(inc[:n], dtype=np.float64))
        finals.append(np.asarray(fin[:n]))
    return np.concatenate(works), np.concatenate(incs), np.concatenate(finals)
