"""Factories for batch files: invented probe-atom scenarios with closed-form answers.

Each factory returns ``(energy_a, energy_b, start_a, start_b, kT, options)`` as the batch
runner (:mod:`fe_tool.batch`) expects.  The scenarios are toy models for trying the tool,
not descriptions of any real molecule; simulated free energies depend on the energy model
and sampling and need experimental validation before they inform design or safety decisions.
"""
from __future__ import annotations

import math

import jax.numpy as jnp
import numpy as np


def probe_restraint(stiffness: float = 1.0, site_stiffness: float = 1.0, anchor: float = 0.5,
                    dimensions: int = 3, kT: float = 1.0):
    """A probe atom in a harmonic site (A), then pulled by an extra restraint to an anchor (B).

    U_A(x) = ½ k_s |x|²,  U_B(x) = U_A(x) + ½ k_r |x − a|² with a = (anchor, 0, ...).

    Both states are Gaussian, so ΔF = F_B − F_A is known exactly (:func:`probe_restraint_exact`).
    Energies are in kT units times ``kT``.
    """
    site = float(site_stiffness) * kT
    restraint = float(stiffness) * kT
    anchor_point = jnp.zeros(dimensions).at[0].set(anchor)

    def energy_a(x):
        return 0.5 * site * jnp.sum(x ** 2)

    def energy_b(x):
        return 0.5 * site * jnp.sum(x ** 2) + 0.5 * restraint * jnp.sum((x - anchor_point) ** 2)

    start_b = np.zeros(dimensions)
    start_b[0] = restraint * anchor / (site + restraint)
    return energy_a, energy_b, np.zeros(dimensions), start_b, kT, {"units": "kT" if kT == 1.0 else "energy units"}


def probe_restraint_exact(stiffness: float = 1.0, site_stiffness: float = 1.0, anchor: float = 0.5,
                          dimensions: int = 3, kT: float = 1.0) -> float:
    """Closed-form ΔF of :func:`probe_restraint`, in the same energy units.

    Completing the square: U_B = ½(k_s + k_r)|x − c|² + ½ k_s k_r/(k_s + k_r) a², so
    ΔF = (d kT/2) ln((k_s + k_r)/k_s) + ½ k_s k_r a²/(k_s + k_r)  (energies in kT units × kT).
    """
    ks, kr = float(site_stiffness), float(stiffness)
    return kT * (0.5 * dimensions * math.log((ks + kr) / ks) + 0.5 * ks * kr * anchor ** 2 / (ks + kr))


def double_well_variant(height: float = 1.0, tilt: float = 0.0, reference_height: float = 1.0):
    """An invented "mutation": a 1-D double well whose barrier and tilt change (A → B).

    U(x) = h (x² − 1)² + t x; state A has ``reference_height`` and no tilt.
    """
    def energy_a(x):
        return reference_height * jnp.sum((x ** 2 - 1.0) ** 2)

    def energy_b(x):
        return height * jnp.sum((x ** 2 - 1.0) ** 2) + tilt * jnp.sum(x)

    return energy_a, energy_b, np.array([-1.0]), np.array([-1.0]), 1.0


def broken_probe(dimensions: int = 2):
    """A deliberately broken pair: state B's energy is NaN everywhere (for testing failures)."""
    def energy_a(x):
        return 0.5 * jnp.sum(x ** 2)

    def energy_b(x):
        return jnp.nan * jnp.sum(x ** 2)

    return energy_a, energy_b, np.zeros(dimensions), np.zeros(dimensions), 1.0
