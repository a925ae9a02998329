"""Equilibrium sampling kernels, one file each, all with the same batch-level step.

``step(target, keys, states, params, builder) -> (states, StepInfo, shadow_work)`` advances
every chain one step (keys and states stacked on a first axis); ``builder`` is a neighbour-list
builder for particle models that carry a list, else ``None``. :data:`KERNELS` names them:

* ``"mala"`` — Metropolis-adjusted Langevin, exact (:mod:`.mala`);
* ``"kinetic"`` — BAOAB kinetic Langevin, unadjusted, step size held to a small shadow work
  (:mod:`.kinetic`);
* ``"kinetic_exact"`` — generalised HMC, BAOAB's exact relative (:mod:`.kinetic`).
"""
from __future__ import annotations

from typing import Callable, NamedTuple

import jax.numpy as jnp

from . import kinetic, mala
from .state import ChainState, KernelParams, StepInfo
from .target import Target, end_target, window_target


def _mala_step(target, keys, states, params, builder=None):
    new, info = mala.mala_step(target, keys, states, params, builder)
    return new, info, jnp.zeros_like(info.energy)


class Kernel(NamedTuple):
    """A sampling kernel: its batch step, the acceptance its step size is adapted to, whether
    it carries momenta, and how its step scales with the preconditioner (ε ∝ M for MALA,
    h ∝ √M for the kinetic kernels)."""

    step: Callable
    target_acceptance: float
    kinetic: bool
    step_scale_power: float


KERNELS: dict[str, Kernel] = {
    "mala": Kernel(_mala_step, mala.TARGET_ACCEPTANCE, False, 1.0),
    "kinetic": Kernel(kinetic.baoab_step, kinetic.TARGET_ACCEPTANCE, True, 0.5),
    "kinetic_exact": Kernel(kinetic.adjusted_step, kinetic.TARGET_ACCEPTANCE_ADJUSTED, True, 0.5),
}

__all__ = ["KERNELS", "ChainState", "Kernel", "KernelParams", "StepInfo", "Target", "end_target", "window_target"]
