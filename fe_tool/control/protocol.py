r"""Learnable switching protocols (λ schedule, step sizes) and the drift a control gives on one.

A :class:`Protocol` holds free parameters that always map to a valid protocol:

    Δλ_k = δλ + (1 − K δλ) softmax(a)_k,   λ_k = Σ_{i<k} Δλ_i,
    so λ_0 = 0, λ_K = 1 and every step is at least δλ wide (λ strictly increasing even
    in floating point; δλ = min(10⁻³/K, half the narrowest starting step));
    ε_k = exp( ℓ(λ̄_k) + δ·tanh(o_k / δ) ),   λ̄_k = (λ_k + λ_{k+1}) / 2,

where ``a`` are the schedule logits, ℓ(λ) is the starting log step size
interpolated along λ (so a step keeps the size its λ calls for when the schedule
moves), ``o`` a learned log-offset (one global value or one per step) and
δ = ln 4 bounds it smoothly: steps stay within a factor 4 of the sampler-derived
ones (far larger steps make the unadjusted Langevin kernel unstable; an optimiser
step that still produces non-finite works is skipped).

:class:`ProtocolDrift` turns a control velocity v(x, λ) (dx/dλ) into the drift φ
of :func:`fe_tool.switching.switch` on a given protocol:

    φ(x, λ) = b ⊙ tanh( ρ(λ) v(x, λ) / b ),
    ρ at level j: the mean of Δλ/ε over the steps next to λ_j (linear in between),

so the control moves a trajectory by about ε φ ≈ Δλ v per step, independent of K.
"""
from __future__ import annotations

import math

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np

from ..types import Array
from .networks import Control

MAX_LOG_STEP_OFFSET = math.log(4.0)


def midpoints(lams):
    return 0.5 * (lams[:-1] + lams[1:])


def resample_schedule(lams, steps: int) -> np.ndarray:
    """The schedule λ(t), t = k/K, piecewise linear in t, resampled to ``steps`` steps (monotone, ends 0 and 1)."""
    lams = np.asarray(lams, dtype=np.float64)
    out = np.interp(np.linspace(0.0, 1.0, steps + 1), np.linspace(0.0, 1.0, lams.size), lams)
    out[0], out[-1] = 0.0, 1.0
    return out


def resample_step_sizes(lams_from, step_sizes_from, lams_to) -> np.ndarray:
    """Step sizes for schedule ``lams_to``: log ε interpolated along λ at the step midpoints."""
    mid_from = midpoints(np.asarray(lams_from, dtype=np.float64))
    mid_to = midpoints(np.asarray(lams_to, dtype=np.float64))
    return np.exp(np.interp(mid_to, mid_from, np.log(np.asarray(step_sizes_from, dtype=np.float64))))


class Protocol(eqx.Module):
    """A λ schedule and step sizes parameterised so that they always stay valid.

    Attributes:
        schedule_logits: (K,) free logits a.
        reference_midpoints, reference_log_steps: (K,) the starting protocol's step
            midpoints and log step sizes; ℓ(λ) interpolates between them (not trained).
        step_log_offset: learned log step offset o, shape () (global) or (K,) (per step).
        min_increment: δλ, the narrowest allowed step (not trained).
    """

    schedule_logits: Array
    reference_midpoints: Array
    reference_log_steps: Array
    step_log_offset: Array
    min_increment: Array

    @classmethod
    def from_schedule(cls, lams, step_sizes, per_step_offsets: bool = False) -> "Protocol":
        """The protocol that reproduces ``lams`` (K+1,) and ``step_sizes`` (K,) exactly."""
        lams = np.asarray(lams, dtype=np.float64)
        step_sizes = np.asarray(step_sizes, dtype=np.float64)
        if lams.ndim != 1 or step_sizes.shape != (lams.size - 1,):
            raise ValueError(f"step_sizes must have one entry per step (shape ({lams.size - 1},)), got {step_sizes.shape}")
        if not (np.all(np.diff(lams) > 0) and abs(lams[0]) < 1e-12 and abs(lams[-1] - 1) < 1e-12):
            raise ValueError("lams must increase strictly from 0 to 1")
        if not np.all(step_sizes > 0):
            raise ValueError("step_sizes must be positive")
        k = lams.size - 1
        increments = np.diff(lams)
        floor = float(min(1e-3 / k, 0.5 * increments.min()))
        logits = np.log((increments - floor) / (1.0 - k * floor))
        offset = jnp.zeros((k,) if per_step_offsets else ())
        return cls(jnp.asarray(logits), jnp.asarray(midpoints(lams)), jnp.asarray(np.log(step_sizes)), offset, jnp.asarray(floor))

    @property
    def steps(self) -> int:
        return self.schedule_logits.shape[0]

    def lams(self) -> Array:
        k = self.schedule_logits.shape[0]
        floor = jax.lax.stop_gradient(self.min_increment)
        increments = floor + (1.0 - k * floor) * jax.nn.softmax(self.schedule_logits)
        inner = jnp.cumsum(increments)[:-1]
        return jnp.concatenate([jnp.zeros((1,), inner.dtype), inner, jnp.ones((1,), inner.dtype)])

    def step_sizes(self, lams: Array | None = None) -> Array:
        lams = self.lams() if lams is None else lams
        ref_mid = jax.lax.stop_gradient(self.reference_midpoints)
        ref_log = jax.lax.stop_gradient(self.reference_log_steps)
        base = jnp.interp(midpoints(lams), ref_mid, ref_log)
        offset = MAX_LOG_STEP_OFFSET * jnp.tanh(self.step_log_offset / MAX_LOG_STEP_OFFSET)
        return jnp.exp(base + offset)

    def trainable(self, schedule: bool, steps: bool):
        """Filter tree for :func:`equinox.partition`."""
        return Protocol(bool(schedule), False, False, bool(steps), False)

    def resampled(self, steps: int) -> tuple[np.ndarray, np.ndarray]:
        """This protocol's schedule and step sizes carried over to ``steps`` steps (numpy)."""
        lams = np.asarray(self.lams(), dtype=np.float64)
        eps = np.asarray(self.step_sizes(), dtype=np.float64)
        if steps == lams.size - 1:
            return lams, eps
        new = resample_schedule(lams, steps)
        return new, resample_step_sizes(lams, eps, new)


def level_rates(lams: Array, step_sizes: Array) -> Array:
    """ρ_j (j = 0…K): Δλ/ε averaged over the steps adjacent to level j."""
    rates = (lams[1:] - lams[:-1]) / step_sizes
    inner = 0.5 * (rates[:-1] + rates[1:])
    return jnp.concatenate([rates[:1], inner, rates[-1:]])


class ProtocolDrift(eqx.Module):
    """The drift φ(x, λ) = b ⊙ tanh(ρ(λ) v(x, λ) / b) of a control on one protocol.

    Pass it as ``control`` to :func:`fe_tool.switching.switch` together with the same
    ``lams`` (both directions: the reverse run uses −φ by itself).

    Attributes:
        control: the velocity model v(x, λ).
        lams: (K+1,) schedule the rates belong to.
        rates: (K+1,) ρ at each level.
    """

    control: Control
    lams: Array
    rates: Array

    def __call__(self, x, lam):
        rho = jnp.interp(lam, self.lams, self.rates)
        bound = self.control.drift_bound()
        return bound * jnp.tanh(rho * self.control(x, lam) / bound)


def bind_control(control: Control | None, lams, step_sizes) -> ProtocolDrift | None:
    """φ for ``control`` on the protocol (``lams``, ``step_sizes``); ``None`` stays ``None``."""
    if control is None:
        return None
    lams = jnp.asarray(lams)
    return ProtocolDrift(control, lams, level_rates(lams, jnp.asarray(step_sizes)))
