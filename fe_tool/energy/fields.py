"""External fields for low-dimensional test problems: harmonic well, double well, Müller–Brown.

Each takes one configuration ``x`` (a vector of shape (d,); Müller–Brown also accepts a
batch (..., 2)) and returns a scalar energy. They are used as end states with analytic or
quadrature free energies.
"""
from __future__ import annotations

import jax.numpy as jnp
import numpy as np
from jaxtyping import Array, Float

MUELLER_BROWN_PARAMETERS = {
    # Müller & Brown 1979, Theor. Chim. Acta 53, 75 (footnote 7); k = 1..4.
    "A": np.array([-200.0, -100.0, -170.0, 15.0]),
    "a": np.array([-1.0, -1.0, -6.5, 0.7]),
    "b": np.array([0.0, 0.0, 11.0, 0.6]),
    "c": np.array([-10.0, -10.0, -6.5, 0.7]),
    "x0": np.array([1.0, 0.0, -0.5, -1.0]),
    "y0": np.array([0.0, 0.5, 1.5, 1.0]),
}
"""Müller–Brown parameters A_k, a_k, b_k, c_k, x0_k, y0_k."""


def harmonic_well_energy(x: Float[Array, "..."], centre=0.0, stiffness=1.0) -> Float[Array, ""]:
    """U = ½ Σ_a k_a (x_a − c_a)² (anisotropic when ``stiffness`` is an array like ``x``).

    Exact configurational free energy: Z = Π_a (2π kT / k_a)^{1/2}, independent of the centre.
    """
    offset = jnp.asarray(x) - centre
    return 0.5 * jnp.sum(stiffness * offset * offset)


def double_well_energy(
    x: Float[Array, " d"],
    height: float = 1.0,
    minimum_squared: float = 1.0,
    tilt: float = 0.0,
    transverse_stiffness: float = 1.0,
) -> Float[Array, ""]:
    """U = a (x₀² − b)² + t x₀ + ½ k⊥ Σ_{a≥1} x_a²  (quartic double well along the first axis).

    Args:
        x: (d,) configuration (a scalar is treated as d = 1).
        height: a; the barrier at x₀ = 0 is a b² above the (untilted) minima.
        minimum_squared: b; the untilted minima are at x₀ = ±sqrt(b).
        tilt: t; a linear bias making one well deeper (t > 0 favours x₀ < 0).
        transverse_stiffness: k⊥ of the harmonic confinement of the other coordinates.
    """
    x = jnp.atleast_1d(jnp.asarray(x))
    first = x[0]
    rest = x[1:]
    return (height * (first * first - minimum_squared) ** 2 + tilt * first
            + 0.5 * transverse_stiffness * jnp.sum(rest * rest))


def mueller_brown_energy(x: Float[Array, "... 2"], scale: float = 1.0) -> Float[Array, "..."]:
    """Müller–Brown surface V(x, y) = s Σ_k A_k exp[a_k(x−x0_k)² + b_k(x−x0_k)(y−y0_k) + c_k(y−y0_k)²].

    Müller & Brown 1979, Theor. Chim. Acta 53, 75. Deepest minimum V = −146.69951721 at
    (−0.5582236346, 1.4417258418) for ``scale=1``. ``scale`` multiplies the whole surface
    (e.g. to lower barriers for sampling tests).
    """
    x = jnp.asarray(x)
    p = MUELLER_BROWN_PARAMETERS
    dx = x[..., 0, None] - p["x0"]
    dy = x[..., 1, None] - p["y0"]
    exponent = p["a"] * dx * dx + p["b"] * dx * dy + p["c"] * dy * dy
    return scale * jnp.sum(p["A"] * jnp.exp(exponent), axis=-1)


__all__ = [
    "MUELLER_BROWN_PARAMETERS", "double_well_energy", "harmonic_well_energy",
    "mueller_brown_energy",
]
