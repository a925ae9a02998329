"""What every sampling kernel carries per chain, and what one step reports."""
from __future__ import annotations

from typing import Any, NamedTuple

from ..types import Array


class ChainState(NamedTuple):
    """One chain (or, stacked, a batch of chains): position, its reduced energy and gradient.

    ``momentum`` is used by the kinetic kernels (zeros for MALA); ``neighbours`` is a carried
    neighbour list for particle models that use one, else ``None``.
    """

    position: Array
    energy: Array
    grad: Array
    momentum: Array
    neighbours: Any = None


class StepInfo(NamedTuple):
    """Per chain: the step's acceptance probability (for unadjusted kinetic steps the one a
    Metropolis test would have had, exp(−shadow work) capped at 1), the energy after the step,
    and whether the proposed point's energy was NaN (an error) or +inf (a forbidden region)."""

    acceptance: Array
    energy: Array
    proposal_nan: Array
    proposal_forbidden: Array


class KernelParams(NamedTuple):
    """Settings that change during a run: the step size, the inverse mass (MALA: the diagonal
    preconditioner) with the configuration's shape, and the friction (kinetic kernels; per unit time)."""

    step_size: Array
    inverse_mass: Array
    friction: Array
