r"""Training objectives for a control and a protocol, and scoring of stored paths.

With the kernel pair of :mod:`fe_tool.switching`, the reduced work of a forward path
is the log Radon–Nikodym derivative up to Δf:  ln dP_F/dP_B = w − Δf.  Hence

* **path KL** (:func:`path_kl_loss`):  KL(P_F ‖ P_B) = E_F[w] − Δf.  Δf does not
  depend on the parameters θ, so minimising the mean forward work minimises the KL.
  The gradient goes through the simulated trajectories (reparameterised Gaussian
  noise, the starts are fixed equilibrium samples), with gradient checkpointing so
  memory does not grow with K.
* **Jeffreys** (:func:`jeffreys_loss`):  KL(P_F‖P_B) + KL(P_B‖P_F) = E_F[w_F] + E_R[w_R]
  (Δf cancels); half the batch runs A→B, half B→A, which also trains the control
  on the reverse paths BAR will use.
* **log-variance** (:func:`log_variance_loss`):  Var_R[ln dP_F^θ/dP_B^θ] = Var_R[w_θ]
  for a reference path measure R.  The reference paths are simulated with the
  current parameters under ``stop_gradient``; their work is then re-scored as a
  function of θ with :func:`score_path`, without differentiating through the
  dynamics (Nüsken & Richter 2021, "Solving high-dimensional Hamilton–Jacobi–Bellman
  PDEs using neural networks: perspectives from the theory of controlled diffusions
  and measures on path space", Partial Differ. Equ. Appl. 2, 48; Richter et al. 2020,
  "VarGrad: a low-variance gradient estimator for variational inference", NeurIPS).

Scoring a stored path x_0 … x_K (one trajectory, in its own time order) under a
protocol (λ, ε) and drift φ uses the same formula as the switching kernel, written
with positions instead of noise (sign s = +1 forward, −1 reverse):

    m^F_k = x_k + ε_k[−M_k ∇u_k(x_k) + s φ(x_k, λ_k)]
    m^B_k = x_{k+1} + ε_k[−M_k ∇u_{k+1}(x_{k+1}) − s φ(x_{k+1}, λ_{k+1})]
    w = u_K(x_K) − u_0(x_0) + Σ_k [ |x_k − m^B_k|²_{M_k⁻¹} − |x_{k+1} − m^F_k|²_{M_k⁻¹} ] / (4 ε_k)

(the second square is |ξ_k|²·2ε_k of the simulation, so w equals the simulated work
when θ is the simulating one — tested).
"""
from __future__ import annotations

from typing import Any, Callable

import equinox as eqx
import jax
import jax.numpy as jnp

from ..path import Path
from ..switching import interpolated_preconditioner, switch
from ..types import Array
from .networks import Control
from .protocol import Protocol, bind_control


class Controller(eqx.Module):
    """What training optimises: an optional control and the protocol it runs on."""

    control: Control | None
    protocol: Protocol

    def protocol_arrays(self) -> tuple[Array, Array]:
        lams = self.protocol.lams()
        return lams, self.protocol.step_sizes(lams)

    def drift(self, lams, step_sizes):
        return bind_control(self.control, lams, step_sizes)


class TrainData(eqx.Module):
    """Arrays a training step reads (same shapes every step).

    Attributes:
        train_a, train_b: (n, *shape) equilibrium samples of A and B to draw starts from.
        precision_a, precision_b: end-state inverse preconditioners (as for ``switch``).
    """

    train_a: Array
    train_b: Array
    precision_a: Array
    precision_b: Array


class TrainSetup(eqx.Module):
    """Static settings of a training step (hashable: changing one recompiles).

    Attributes:
        loss: ``loss(trainable, frozen, key, data, path, setup) -> (value, aux)``.
        optimiser: an optax ``GradientTransformation``.
        trajectories: trajectories per optimiser step.
        recompute_energies: log-variance only: re-evaluate energies/gradients of the
            stored paths at the current schedule (needed when the schedule is learned).
    """

    loss: Callable = eqx.field(static=True)
    optimiser: Any = eqx.field(static=True)
    trajectories: int = eqx.field(static=True)
    recompute_energies: bool = eqx.field(static=True, default=False)


def _zero_drift(x, lam):
    return jnp.zeros_like(x)


def _draw(key, samples, count):
    index = jax.random.randint(key, (count,), 0, samples.shape[0])
    return samples[index]


def _stop(tree):
    return jax.tree_util.tree_map(lambda v: jax.lax.stop_gradient(v) if eqx.is_array(v) else v, tree)


# ----------------------------------------------------------------------------- paths

def record_paths(path: Path, control, key, starts, lams, step_sizes, precision_a, precision_b,
                 direction: str = "forward"):
    """:func:`fe_tool.switching.switch` that also returns every visited point.

    Same noise as ``switch`` for the same key (so the same works).

    Returns:
        works (T,), increments (T, K), positions (T, K+1, *shape), energies (T, K+1),
        gradients (T, K+1, *shape) — all in the run's own time order (reverse runs B→A).
    """
    return switch(path, control, key, starts, lams, step_sizes, precision_a, precision_b, direction, record=True)


def score_path(path: Path, control, positions, lams, step_sizes, precision_a, precision_b,
               direction: str = "forward", energies=None, grads=None):
    """Work of one stored path under a (possibly different) drift and protocol.

    Args:
        path: the path u(x, λ).
        control: drift φ(x, λ) (e.g. a :class:`ProtocolDrift`) or ``None``.
        positions: (K+1, *shape) the path's points in its own time order.
        lams, step_sizes: protocol in forward order (as for ``switch``).
        precision_a, precision_b: end-state inverse preconditioners.
        direction: ``"forward"`` or ``"reverse"`` (how the path was run).
        energies, grads: (K+1,), (K+1, *shape) u and ∇u at each point's own level,
            when known (the schedule is unchanged); otherwise they are evaluated
            (K+1 energy-and-gradient evaluations).

    Returns:
        (work, increments (K,)); the increments follow the formula in the module
        docstring term by term, so they match ``switch``'s increments.
    """
    sign = 1.0 if direction == "forward" else -1.0
    if direction == "reverse":
        lams, step_sizes = lams[::-1], step_sizes[::-1]
    shape = positions.shape[1:]
    if energies is None or grads is None:
        energies, grads = jax.vmap(path.energy_and_grad)(positions, lams)
    phi = _zero_drift if control is None else control
    drifts = jax.vmap(phi)(positions, lams)
    lam_mid = 0.5 * (lams[:-1] + lams[1:])
    m = jax.vmap(lambda lm: jnp.broadcast_to(interpolated_preconditioner(lm, precision_a, precision_b), shape))(lam_mid)
    eps = step_sizes.reshape((-1,) + (1,) * len(shape))
    x0, x1 = positions[:-1], positions[1:]
    forward_mean = x0 + eps * (-m * grads[:-1] + sign * drifts[:-1])
    back_mean = x1 + eps * (-m * grads[1:] - sign * drifts[1:])
    axes = tuple(range(1, positions.ndim))
    back = jnp.sum((x0 - back_mean) ** 2 / m, axis=axes) / (4.0 * step_sizes)
    fwd = jnp.sum((x1 - forward_mean) ** 2 / m, axis=axes) / (4.0 * step_sizes)
    increments = energies[1:] - energies[:-1] + back - fwd
    return jnp.sum(increments), increments


# ----------------------------------------------------------------------------- losses

def _batch_summary(works):
    finite = jnp.isfinite(works)
    count = jnp.maximum(jnp.sum(finite), 1)
    safe = jnp.where(finite, works, 0.0)
    mean = jnp.sum(safe) / count
    spread = jnp.sqrt(jnp.sum(jnp.where(finite, (works - mean) ** 2, 0.0)) / jnp.maximum(count - 1, 1))
    return {"work_mean": mean, "work_spread": spread, "nonfinite": jnp.sum(~finite)}


def path_kl_loss(trainable, frozen, key, data: TrainData, path: Path, setup: TrainSetup):
    """Mean forward work E_F[w] = KL(P_F‖P_B) + Δf (differentiated through the trajectories)."""
    model = eqx.combine(trainable, frozen)
    lams, eps = model.protocol_arrays()
    key_start, key_noise = jax.random.split(key)
    starts = _draw(key_start, data.train_a, setup.trajectories)
    works, _, _ = _switch(path, model.drift(lams, eps), key_noise, starts, lams, eps, data, "forward")
    return jnp.mean(works), _batch_summary(jax.lax.stop_gradient(works))


def jeffreys_loss(trainable, frozen, key, data: TrainData, path: Path, setup: TrainSetup):
    """E_F[w_F] + E_R[w_R] = KL(P_F‖P_B) + KL(P_B‖P_F), half the trajectories each way."""
    model = eqx.combine(trainable, frozen)
    lams, eps = model.protocol_arrays()
    drift = model.drift(lams, eps)
    k1, k2, k3, k4 = jax.random.split(key, 4)
    half = max(setup.trajectories // 2, 1)
    w_f, _, _ = _switch(path, drift, k2, _draw(k1, data.train_a, half), lams, eps, data, "forward")
    w_r, _, _ = _switch(path, drift, k4, _draw(k3, data.train_b, half), lams, eps, data, "reverse")
    return jnp.mean(w_f) + jnp.mean(w_r), _batch_summary(jax.lax.stop_gradient(w_f))


def log_variance_loss(trainable, frozen, key, data: TrainData, path: Path, setup: TrainSetup):
    """Var[w_θ] over forward paths simulated with the current θ held fixed (no backprop through dynamics)."""
    model = eqx.combine(trainable, frozen)
    reference = _stop(model)
    lams_ref, eps_ref = reference.protocol_arrays()
    key_start, key_noise = jax.random.split(key)
    starts = _draw(key_start, data.train_a, setup.trajectories)
    works_ref, _, positions, energies, grads = record_paths(
        path, reference.drift(lams_ref, eps_ref), key_noise, starts, lams_ref, eps_ref,
        data.precision_a, data.precision_b, "forward")
    positions, energies, grads = _stop((positions, energies, grads))
    lams, eps = model.protocol_arrays()
    drift = model.drift(lams, eps)
    if setup.recompute_energies:
        score = lambda p: score_path(path, drift, p, lams, eps, data.precision_a, data.precision_b)[0]  # noqa: E731
        works = jax.vmap(score)(positions)
    else:
        score = lambda p, e, g: score_path(path, drift, p, lams, eps, data.precision_a, data.precision_b,  # noqa: E731
                                           energies=e, grads=g)[0]
        works = jax.vmap(score)(positions, energies, grads)
    return jnp.var(works, ddof=1), _batch_summary(jax.lax.stop_gradient(works_ref))


def _switch(path, drift, key, starts, lams, eps, data, direction):
    return switch(path, drift, key, starts, lams, eps, data.precision_a, data.precision_b, direction, checkpoint=True)


OBJECTIVES: dict[str, Callable] = {"kl": path_kl_loss, "jeffreys": jeffreys_loss, "logvar": log_variance_loss}
"""Loss functions by name."""
