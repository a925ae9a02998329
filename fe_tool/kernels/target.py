"""The reduced energy one sampler targets: one state of a path (an end, or a λ between).

Every kernel calls :meth:`Target.energy_and_grad` and nothing else of the path. A particle
model may pass a carried neighbour list (``neighbours``); a plain energy function ignores it.
"""
from __future__ import annotations

import equinox as eqx
import jax
import jax.numpy as jnp

from ..path import LinearPath, Path
from ..types import Array, Configuration


class Target(eqx.Module):
    """The reduced energy of one state of a path: an end (``end="a"|"b"``) or λ (``end=None``)."""

    path: Path
    lam: Array
    end: str | None = eqx.field(static=True)

    def energy(self, x: Configuration, neighbours=None) -> Array:
        # without a carried list call the path as a user may have written it: energy(x, lam)
        extra = () if neighbours is None else (neighbours,)
        if self.end is not None:
            return self.path.end_energy(x, self.end, *extra)
        return self.path.energy(x, self.lam, *extra)

    def energy_and_grad(self, x: Configuration, neighbours=None) -> tuple[Array, Array]:
        if neighbours is None:
            return jax.value_and_grad(self.energy)(x)
        return jax.value_and_grad(self.energy)(x, neighbours)

    def evaluations(self) -> int:
        """Energy evaluations per energy-and-gradient call."""
        return self.path.end_evaluations() if self.end is not None else self.path.evaluations_per_point(1)

    def _linear_end(self) -> bool:
        return self.end is not None and isinstance(self.path, LinearPath)

    def lambda_derivative(self, x: Configuration, u_x: Array) -> Array:
        """∂u/∂λ of the path at this target's λ, at ``x`` whose reduced energy here is ``u_x``.

        The integrand of thermodynamic integration, and the observable that ΔF depends on.
        At an end of the linear path it is u_B − u_A, which needs only the other end's
        energy; otherwise one forward-mode derivative of ``path.energy`` in λ.
        """
        if self._linear_end():
            other = self.path.end_energy(x, "b" if self.end == "a" else "a")
            return other - u_x if self.end == "a" else u_x - other
        lam = jnp.asarray(self.lam, dtype=jnp.result_type(float))
        return jax.jvp(lambda l: self.path.energy(x, l), (lam,), (jnp.ones_like(lam),))[1]

    def derivative_evaluations(self) -> int:
        """Energy evaluations counted per :meth:`lambda_derivative` call."""
        return self.path.end_evaluations() if self._linear_end() else self.path.evaluations_per_point(1)


def end_target(path: Path, end: str) -> Target:
    return Target(path, jnp.asarray(0.0 if end == "a" else 1.0), end)


def window_target(path: Path, lam: float) -> Target:
    return Target(path, jnp.asarray(lam, dtype=jnp.float64), None)
