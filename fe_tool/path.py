"""The path u(x, λ) between the two end states, and λ schedules.

All energies here are *reduced*: u = U / kT, dimensionless.  The default path is
the tempered (linear) interpolation

    u_λ(x) = (1 − λ) u_A(x) + λ u_B(x),        λ ∈ [0, 1],

so that π_λ ∝ exp(−u_λ) is π_A at λ = 0 and π_B at λ = 1.  Any other smooth path
(soft-core decoupling, staged electrostatics/Lennard-Jones) is a subclass of
:class:`Path` that overrides :meth:`Path.energy`; the switching kernel and the
estimators only ever call ``energy`` / ``energy_and_grad``, so the work formula
holds for any path.

Cost accounting (used by every route so methods compare at equal cost): one
*evaluation* is one call of a user energy function (value and gradient) at one
configuration.  The linear path evaluates both end states at every point, so a
point costs 2 evaluations whatever λ is (and energies at any number of λ values
on the same point are free); a general path costs one evaluation per λ value.

Schedules are increasing arrays λ_0 = 0 < λ_1 < … < λ_K = 1.
"""
from __future__ import annotations

import hashlib
from typing import Callable

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np

from .types import Array, Configuration, EnergyFunction


class Path(eqx.Module):
    """Base class: a smooth family of reduced energies u(x, λ) joining u_A and u_B.

    Subclasses implement :meth:`energy`; they may override :meth:`energies_at`
    when energies at many λ on one configuration are cheaper than one call each.
    """

    kT: float = eqx.field(static=True)

    def energy(self, x: Configuration, lam: Array, neighbours=None) -> Array:  # pragma: no cover - abstract
        """Reduced energy u(x, λ); ``neighbours`` is a carried neighbour list for particle models
        that use one (see :meth:`dynamics_neighbour_builder`), ignored by the others."""
        raise NotImplementedError

    def energy_and_grad(self, x: Configuration, lam: Array, neighbours=None) -> tuple[Array, Array]:
        """Reduced energy u(x, λ) and its gradient with respect to x."""
        if neighbours is None:   # a user's Path may define energy(x, lam) only
            return jax.value_and_grad(lambda y: self.energy(y, lam))(x)
        return jax.value_and_grad(self.energy)(x, lam, neighbours)

    def dynamics_neighbour_builder(self):
        """A neighbour-list builder with a skin for dynamics that carry a list, or ``None``.

        Particle paths with a pair list return one; samplers and switching then carry the list in
        their state and rebuild it only when some particle has moved more than half the skin.
        """
        return None

    def energies_at(self, x: Configuration, lams: Array) -> Array:
        """u(x, λ_j) for every λ_j in ``lams`` (a vector), one configuration."""
        return jax.vmap(lambda lam: self.energy(x, lam))(lams)

    def lambda_derivative(self, x: Configuration, lam: Array) -> Array:
        """∂u/∂λ at (x, λ): the integrand of thermodynamic integration."""
        return jax.grad(self.energy, argnums=1)(x, jnp.asarray(lam, dtype=jnp.result_type(float)))

    def energy_change(self, x: Configuration, lam_from: Array, lam_to: Array) -> Array:
        """u(x, λ_to) − u(x, λ_from) at one configuration: the work of an instantaneous switch.

        This default makes two full energy calls; paths whose λ dependence sits in a few terms
        (:class:`~fe_tool.alchemy.SoftCoreDecouplingPath`) override it with a cheaper sum.
        """
        return self.energy(x, lam_to) - self.energy(x, lam_from)

    def energy_change_cost(self) -> float:
        """Cost of one :meth:`energy_change` call in full energy evaluations (2.0 here: two calls).

        Convention: a full evaluation is one call of :meth:`energy`; overrides count the work
        they do in the same unit and never report more than this default.
        """
        return 2.0

    def evaluations_per_point(self, lambda_count: int = 1) -> int:
        """Energy evaluations needed for energies+gradients at ``lambda_count`` λ values on one point."""
        return int(lambda_count)

    def end_energy(self, x: Configuration, end: str, neighbours=None) -> Array:
        """Reduced energy of end state ``"a"`` (λ = 0) or ``"b"`` (λ = 1)."""
        lam = jnp.asarray(0.0 if end == "a" else 1.0)
        return self.energy(x, lam) if neighbours is None else self.energy(x, lam, neighbours)

    def end_evaluations(self) -> int:
        """Evaluations per point for one end state's energy and gradient."""
        return 1

    def description(self) -> str:
        return type(self).__name__

    def fingerprint_probe(self, probe: np.ndarray) -> str:
        """A short hash of the path's energies at a few fixed configurations near ``probe``.

        Two paths with the same fingerprint give the same energies at those points;
        used to refuse a saved control trained on a different system.
        """
        rng = np.random.default_rng(12345)
        points = probe[None] + 0.05 * rng.standard_normal((4,) + probe.shape)
        lams = jnp.asarray([0.0, 0.37, 1.0])
        values = np.asarray(jax.vmap(lambda x: self.energies_at(x, lams))(jnp.asarray(points)))
        digest = hashlib.sha256(np.round(values, 6).astype(np.float64).tobytes())
        digest.update(str(probe.shape).encode())
        return digest.hexdigest()[:16]


def mix_ends(u_a: Array, u_b: Array, lam: Array) -> Array:
    """(1 − λ)·u_A + λ·u_B, exactly u_A at λ = 0 and u_B at λ = 1.

    An end state may forbid a region with u = +∞ (a hard wall). The plain formula would give
    0·∞ = NaN at the other end, turning the wall of B into a wall of A as well; selecting the end
    energies at λ = 0 and 1 keeps each end exactly what the user wrote, and every state in between
    forbids what either end forbids.
    """
    inner = (1.0 - lam) * u_a + lam * u_b
    return jnp.where(lam == 0.0, u_a, jnp.where(lam == 1.0, u_b, inner))


class LinearPath(Path):
    """u_λ = (1 − λ) u_A + λ u_B with u = U/kT (the tempered interpolation).

    Args:
        energy_a, energy_b: user energy functions U_A(x), U_B(x) in the user's units.
        kT: thermal energy in the same units (> 0).
    """

    energy_a: EnergyFunction = eqx.field(static=True)
    energy_b: EnergyFunction = eqx.field(static=True)

    def __init__(self, energy_a: EnergyFunction, energy_b: EnergyFunction, kT: float = 1.0):
        self.energy_a = energy_a
        self.energy_b = energy_b
        self.kT = float(kT)

    def end_energies(self, x: Configuration) -> tuple[Array, Array]:
        """(u_A(x), u_B(x)) reduced."""
        return self.energy_a(x) / self.kT, self.energy_b(x) / self.kT

    def energy(self, x, lam, neighbours=None):
        u_a, u_b = self.end_energies(x)
        return mix_ends(u_a, u_b, lam)

    def energies_at(self, x, lams):
        u_a, u_b = self.end_energies(x)
        return mix_ends(u_a, u_b, lams)

    def lambda_derivative(self, x, lam):
        u_a, u_b = self.end_energies(x)
        return u_b - u_a

    def evaluations_per_point(self, lambda_count: int = 1) -> int:
        return 2

    def end_energy(self, x, end, neighbours=None):
        return (self.energy_a(x) if end == "a" else self.energy_b(x)) / self.kT

    def description(self) -> str:
        return "linear mixing (1-λ)·u_A + λ·u_B"


# --------------------------------------------------------------------------- schedules

SCHEDULES: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    # equal λ increments
    "linear": lambda t: t,
    # small steps near both ends, where ∂u/∂λ often changes fastest (common practice)
    "cosine": lambda t: 0.5 - 0.5 * np.cos(np.pi * t),
    # small steps near λ = 0 (decoupled-end singularities are usually there after mapping)
    "power": lambda t: t**2,
}


def make_schedule(schedule: str | np.ndarray | list, steps: int) -> np.ndarray:
    """λ values λ_0 = 0 < … < λ_K = 1 for ``steps`` = K switching steps.

    Args:
        schedule: a name in :data:`SCHEDULES` (``"linear"``, ``"cosine"``, ``"power"``)
            or an explicit increasing sequence from 0 to 1 of length ``steps + 1``.
        steps: number of switching steps K ≥ 1.

    Returns:
        float64 array of shape (K + 1,).
    """
    if steps < 1:
        raise ValueError(f"switching_steps must be at least 1, got {steps}")
    if isinstance(schedule, str):
        if schedule not in SCHEDULES:
            raise ValueError(f"unknown schedule {schedule!r}; choose one of {sorted(SCHEDULES)} or pass an array of λ values")
        lams = SCHEDULES[schedule](np.linspace(0.0, 1.0, steps + 1))
    else:
        lams = np.asarray(schedule, dtype=np.float64)
        if lams.ndim != 1 or lams.size != steps + 1:
            raise ValueError(f"an explicit schedule must be a 1-D array of switching_steps + 1 = {steps + 1} λ values, got shape {lams.shape}")
    if not (abs(lams[0]) < 1e-12 and abs(lams[-1] - 1.0) < 1e-12 and np.all(np.diff(lams) > 0)):
        raise ValueError("a schedule must increase strictly from λ = 0 to λ = 1")
    lams = lams.copy()
    lams[0], lams[-1] = 0.0, 1.0
    return lams
