"""How the switching route moves its trajectories: the same dynamics the end states were sampled with.

* **Overdamped** (ends sampled by MALA): unadjusted overdamped Langevin with the path-probability
  work of :mod:`fe_tool.switching`; the step of each transition interpolates the two end
  samplers' steps (log-linearly), times the route's step scale. A learned control drift needs it.
* **Kinetic** (ends sampled by BAOAB or generalised HMC): kinetic Langevin with the protocol +
  shadow work of :mod:`fe_tool.kinetic_switching`. Its time step is the scale times the *smaller*
  of the two end samplers' steps at every λ: a nearly flat end (a decoupled particle in a dilute
  fluid) adapts a long step that would blow up where the coupling is on, so the stiffer end sets
  the step over the whole path, and the pilot runs (which cross every λ) shrink it further when
  they diverge (:func:`fe_tool.routes.planning.plan_protocol` keeps only scales without divergence).

Both expose ``step_sizes(lams, scale)``, ``run(...)`` returning ``(works, increments)`` and
``cost(path, trajectories, steps, batch)``; the route never asks which one it has.
"""
from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np

from ..sampling import DEFAULT_DAMPING, StateSamples
from ..switching import padded_trajectories, run_in_batches, switching_evaluations_padded


@dataclasses.dataclass
class OverdampedSwitching:
    """Overdamped Langevin switching with the interpolated diagonal preconditioner."""

    samples_a: StateSamples
    samples_b: StateSamples
    precision: tuple
    name: str = "overdamped Langevin"

    def step_sizes(self, lams: np.ndarray, scale: float) -> np.ndarray:
        mid = 0.5 * (lams[:-1] + lams[1:])
        log_eps = (1 - mid) * math.log(self.samples_a.overdamped_step) + mid * math.log(self.samples_b.overdamped_step)
        return scale * np.exp(log_eps)

    def run(self, path, control, key, starts, lams, step_sizes, direction, batch, on_spent=None):
        works, increments, _ = run_in_batches(path, control, key, starts, lams, step_sizes, *self.precision,
                                              direction, batch, on_spent)
        return works, increments

    def cost(self, path, trajectories: int, steps: int, batch: int) -> int:
        return switching_evaluations_padded(path, trajectories, steps, batch)

    def per_point(self, path) -> float:
        return path.evaluations_per_point(1)


@dataclasses.dataclass
class KineticSwitching:
    """Kinetic Langevin (BAOAB) switching with an exact work; unit masses unless the ends were preconditioned."""

    samples_a: StateSamples
    samples_b: StateSamples
    inverse_mass: Any
    builder: Any = None
    extra_evaluations: int = 0     # batches rerun after a neighbour-list overflow (booked by the route)
    lists_grown: int = 0
    name: str = "kinetic Langevin (BAOAB, protocol + shadow work)"

    def base_step(self) -> float:
        return float(min(self.samples_a.step_size, self.samples_b.step_size))

    def step_sizes(self, lams: np.ndarray, scale: float) -> np.ndarray:
        return np.full(len(lams) - 1, scale * self.base_step())

    def run(self, path, control, key, starts, lams, step_sizes, direction, batch, on_spent=None):
        from ..kinetic_switching import run_kinetic_in_batches

        # the friction γ of the end samplers (γh = DEFAULT_DAMPING at their step) at this step
        damping = DEFAULT_DAMPING * np.asarray(step_sizes) / self.base_step()
        out = run_kinetic_in_batches(path, control, key, starts, lams, step_sizes, self.inverse_mass, damping,
                                     direction, batch, on_spent, builder=self.builder)
        self.extra_evaluations += out.evaluations - self.cost(path, len(starts), len(lams) - 1, batch)
        self.lists_grown += out.lists_grown
        self.builder = out.builder
        return out.works, out.increments

    def cost(self, path, trajectories: int, steps: int, batch: int) -> int:
        from ..kinetic_switching import kinetic_switching_evaluations

        return kinetic_switching_evaluations(path, padded_trajectories(trajectories, batch)[1], steps)

    def per_point(self, path) -> float:
        from ..kinetic_switching import kinetic_point_cost

        return kinetic_point_cost(path)


def choose_dynamics(path, sampled: dict, precision: tuple, opts) -> OverdampedSwitching | KineticSwitching:
    """Kinetic switching when the ends were sampled by a kinetic kernel and no learned control is
    asked for (the control is trained for overdamped switching); overdamped otherwise."""
    kinetic = all(s.kernel in ("kinetic", "kinetic_exact") for s in sampled.values())
    if kinetic and opts.control in ("auto", "none"):
        # one mass for the whole path: the geometric mean of the ends' (ones for particles)
        inverse_mass = np.sqrt(np.asarray(sampled["a"].preconditioner) * np.asarray(sampled["b"].preconditioner))
        return KineticSwitching(sampled["a"], sampled["b"], inverse_mass, builder=path.dynamics_neighbour_builder())
    return OverdampedSwitching(sampled["a"], sampled["b"], precision)
