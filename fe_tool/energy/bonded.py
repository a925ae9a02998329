"""Bonded terms: harmonic bonds and angles, cosine-series and Ryckaert–Bellemans torsions.

Every function is pure, takes ``positions`` of shape ``(n, 3)`` and integer index arrays
(one row per bond/angle/torsion), and returns a scalar energy summed over its rows. Angles
are in radians. Energies are in the unit of the force constants.

Geometry is computed so that gradients are finite wherever the energy is differentiable
and zero (not NaN) at degenerate points: angles use ``atan2(|u x v|, u . v)`` rather than
``arccos``, and the dihedral uses the two-argument form of Blondel & Karplus (J. Comput.
Chem. 17, 1132 (1996)) [mem].
"""
from __future__ import annotations

import jax.numpy as jnp
from jaxtyping import Array, Float, Int

from fe_tool.energy.box import minimum_image, safe_norm


def _safe_atan2(y, x):
    """atan2 with a zero (not NaN) gradient at ``x = y = 0``; returns 0 there."""
    degenerate = (x == 0.0) & (y == 0.0)
    return jnp.where(degenerate, 0.0, jnp.arctan2(jnp.where(degenerate, 0.0, y),
                                                   jnp.where(degenerate, 1.0, x)))


def bond_lengths(positions: Float[Array, "n 3"], bonds: Int[Array, "m 2"], box=None):
    """Distances ``|r_j - r_i|`` of each bonded pair (minimum image if ``box`` is given)."""
    bonds = jnp.asarray(bonds)
    d = minimum_image(positions[bonds[:, 1]] - positions[bonds[:, 0]], box)
    return safe_norm(d)


def bond_angles(positions: Float[Array, "n 3"], angles: Int[Array, "m 3"], box=None):
    """Angle θ (radians, in [0, π]) at the middle atom of each triple ``(i, j, k)``."""
    angles = jnp.asarray(angles)
    u = minimum_image(positions[angles[:, 0]] - positions[angles[:, 1]], box)
    v = minimum_image(positions[angles[:, 2]] - positions[angles[:, 1]], box)
    return _safe_atan2(safe_norm(jnp.cross(u, v)), jnp.sum(u * v, axis=-1))


def dihedral_angles(positions: Float[Array, "n 3"], torsions: Int[Array, "m 4"], box=None):
    """Dihedral angle φ (radians, in (-π, π]) of each quadruple ``(i, j, k, l)``.

    IUPAC/IUB convention: φ = 0 for the cis (eclipsed) arrangement, φ = ±π for trans; the
    sign is positive for a clockwise rotation of the far bond seen along j -> k.
    φ = atan2(|b2| b1 . (b2 x b3), (b1 x b2) . (b2 x b3)) with b1 = r_j - r_i,
    b2 = r_k - r_j, b3 = r_l - r_k. For collinear atoms φ is undefined; 0 is returned with
    a zero gradient.
    """
    torsions = jnp.asarray(torsions)
    p = [positions[torsions[:, a]] for a in range(4)]
    b1 = minimum_image(p[1] - p[0], box)
    b2 = minimum_image(p[2] - p[1], box)
    b3 = minimum_image(p[3] - p[2], box)
    n1 = jnp.cross(b1, b2)
    n2 = jnp.cross(b2, b3)
    y = safe_norm(b2) * jnp.sum(b1 * n2, axis=-1)
    x = jnp.sum(n1 * n2, axis=-1)
    return _safe_atan2(y, x)


def harmonic_bond_energy(
    positions: Float[Array, "n 3"],
    bonds: Int[Array, "m 2"],
    lengths: Float[Array, " m"],
    force_constants: Float[Array, " m"],
    box=None,
) -> Float[Array, ""]:
    """U = Σ_b ½ k_b (r_b − r0_b)².

    Args:
        positions: (n, 3) coordinates (length unit L).
        bonds: (m, 2) particle indices.
        lengths: (m,) equilibrium lengths r0 (L).
        force_constants: (m,) k in energy/L² (note the ½: U = ½ k Δr²).
        box: periodic box or ``None``.
    """
    r = bond_lengths(positions, bonds, box)
    return 0.5 * jnp.sum(force_constants * (r - lengths) ** 2)


def harmonic_angle_energy(
    positions: Float[Array, "n 3"],
    angles: Int[Array, "m 3"],
    equilibrium_angles: Float[Array, " m"],
    force_constants: Float[Array, " m"],
    box=None,
) -> Float[Array, ""]:
    """U = Σ_a ½ k_a (θ_a − θ0_a)², θ in radians, k in energy/rad²."""
    theta = bond_angles(positions, angles, box)
    return 0.5 * jnp.sum(force_constants * (theta - equilibrium_angles) ** 2)


def periodic_torsion_potential(phi, force_constants, multiplicities, phases):
    """V(φ) = Σ_n k_n (1 + cos(n φ − δ_n)) for angles ``phi`` of shape (m,).

    ``force_constants``, ``multiplicities`` and ``phases`` are (m,) for one cosine per
    torsion or (m, K) for a K-term series; φ and δ in radians. Returns (m,) energies.
    """
    phi = jnp.asarray(phi)
    force_constants = jnp.asarray(force_constants)
    if force_constants.ndim == phi.ndim + 1:
        phi = phi[..., None]
        summed = True
    else:
        summed = False
    terms = force_constants * (1.0 + jnp.cos(multiplicities * phi - phases))
    return jnp.sum(terms, axis=-1) if summed else terms


def periodic_torsion_energy(
    positions: Float[Array, "n 3"],
    torsions: Int[Array, "m 4"],
    force_constants,
    multiplicities,
    phases,
    box=None,
) -> Float[Array, ""]:
    """U = Σ_torsions Σ_n k_n (1 + cos(n φ − δ_n)); see :func:`periodic_torsion_potential`."""
    phi = dihedral_angles(positions, torsions, box)
    return jnp.sum(periodic_torsion_potential(phi, force_constants, multiplicities, phases))


def ryckaert_bellemans_potential(phi, coefficients: Float[Array, "m c"]):
    """Ryckaert–Bellemans power series V(ψ) = Σ_{n=0}^{C-1} C_n cos^n ψ, with ψ = φ − π.

    ``phi`` is the IUPAC dihedral (trans = π), so cos ψ = −cos φ and V is zero at trans for
    the n-butane set C0..C5 = 9.28, 12.16, −13.12, −3.06, 26.24, −31.5 kJ/mol
    (Ryckaert & Bellemans 1978, Faraday Discuss. Chem. Soc. 66, 95). ``coefficients`` is
    (m, C) (or (C,) broadcast over all torsions). Returns (m,) energies.
    """
    coefficients = jnp.asarray(coefficients)
    cos_psi = -jnp.cos(jnp.asarray(phi))
    # Horner's rule from the highest power down.
    value = jnp.zeros(jnp.broadcast_shapes(cos_psi.shape, coefficients.shape[:-1]))
    for n in range(coefficients.shape[-1] - 1, -1, -1):  # over series terms, not particles
        value = value * cos_psi + coefficients[..., n]
    return value


def ryckaert_bellemans_energy(
    positions: Float[Array, "n 3"],
    torsions: Int[Array, "m 4"],
    coefficients: Float[Array, "m c"],
    box=None,
) -> Float[Array, ""]:
    """U = Σ_torsions Σ_n C_n cos^n(φ − π); see :func:`ryckaert_bellemans_potential`."""
    phi = dihedral_angles(positions, torsions, box)
    return jnp.sum(ryckaert_bellemans_potential(phi, coefficients))


__all__ = [
    "bond_angles", "bond_lengths", "dihedral_angles", "harmonic_angle_energy",
    "harmonic_bond_energy", "periodic_torsion_energy", "periodic_torsion_potential",
    "ryckaert_bellemans_energy", "ryckaert_bellemans_potential",
]
