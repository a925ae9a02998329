"""Restraints: harmonic and flat-bottom position restraints, harmonic and flat-bottom distance restraints.

All are pure functions of ``positions`` (n, d) returning a scalar; displacements use the
minimum image when a box is given. Force constants carry the ½: U = ½ k Δ².
"""
from __future__ import annotations

import jax.numpy as jnp
from jaxtyping import Array, Float, Int

from fe_tool.energy.box import minimum_image, safe_norm


def _offsets(positions, indices, reference, box):
    indices = jnp.asarray(indices)
    return minimum_image(positions[indices] - jnp.asarray(reference), box)


def harmonic_position_restraint_energy(
    positions: Float[Array, "n d"],
    indices: Int[Array, " m"],
    reference: Float[Array, "m d"],
    force_constants,
    box=None,
) -> Float[Array, ""]:
    """U = Σ_i ½ k_i |r_i − r_i⁰|² over the restrained particles ``indices``.

    ``force_constants`` is a scalar, (m,) or (m, d) (per-axis stiffness, energy/length²).
    """
    offset = _offsets(positions, indices, reference, box)
    k = jnp.asarray(force_constants)
    if k.ndim == 1:
        k = k[:, None]
    return 0.5 * jnp.sum(k * offset * offset)


def flat_bottom_position_restraint_energy(
    positions: Float[Array, "n d"],
    indices: Int[Array, " m"],
    reference: Float[Array, "m d"],
    radius,
    force_constants,
    box=None,
) -> Float[Array, ""]:
    """U = Σ_i ½ k_i max(0, |r_i − r_i⁰| − R_i)²: free inside a sphere of radius R_i."""
    distance = safe_norm(_offsets(positions, indices, reference, box))
    excess = jnp.maximum(distance - radius, 0.0)
    return 0.5 * jnp.sum(force_constants * excess * excess)


def flat_bottom_distance_restraint_energy(
    positions: Float[Array, "n d"],
    pairs: Int[Array, "m 2"],
    lower,
    upper,
    force_constants,
    box=None,
) -> Float[Array, ""]:
    """U = Σ_p ½ k_p [max(0, l_p − r_p)² + max(0, r_p − u_p)²]: zero for l_p ≤ r_p ≤ u_p."""
    pairs = jnp.asarray(pairs)
    r = safe_norm(minimum_image(positions[pairs[:, 0]] - positions[pairs[:, 1]], box))
    below = jnp.maximum(lower - r, 0.0)
    above = jnp.maximum(r - upper, 0.0)
    return 0.5 * jnp.sum(force_constants * (below * below + above * above))


def distance_restraint_energy(
    positions: Float[Array, "n d"],
    pairs: Int[Array, "m 2"],
    target,
    force_constants,
    box=None,
) -> Float[Array, ""]:
    """U = Σ_p ½ k_p (r_p − r⁰_p)²: harmonic restraint on pair distances."""
    return flat_bottom_distance_restraint_energy(positions, pairs, target, target, force_constants, box)


__all__ = [
    "distance_restraint_energy", "flat_bottom_distance_restraint_energy",
    "flat_bottom_position_restraint_energy", "harmonic_position_restraint_energy",
]
