"""An invented family for a network of pairs: a probe in a harmonic site, held by an extra
restraint of varying stiffness towards an anchor point.

State "k{s}" is the probe with restraint stiffness s (state "free": no restraint).  Any two
states form a pair (:func:`restraint_pair`), and every state's free energy is known in closed form
(:func:`state_free_energy`), so a network of such pairs can be checked exactly.  A toy model
for trying the tool, not a description of any real molecule; simulated free energies depend on
the energy model and sampling and need experimental validation before they inform design or
safety decisions.
"""
from __future__ import annotations

import jax.numpy as jnp
import numpy as np

from examples.restraint_scan import probe_restraint_exact


def restraint_pair(stiffness_a: float, stiffness_b: float, site_stiffness: float = 1.0, anchor: float = 0.5,
                   dimensions: int = 2):
    """Pair from restraint stiffness ``stiffness_a`` (A) to ``stiffness_b`` (B), kT = 1.

    U_s(x) = ½ k_site |x|² + ½ s |x − a|² with a = (anchor, 0, ...).
    """
    anchor_point = jnp.zeros(dimensions).at[0].set(anchor)

    def energy(stiffness):
        def u(x):
            return 0.5 * site_stiffness * jnp.sum(x ** 2) + 0.5 * stiffness * jnp.sum((x - anchor_point) ** 2)
        return u

    def minimum(stiffness):
        start = np.zeros(dimensions)
        start[0] = stiffness * anchor / (site_stiffness + stiffness)
        return start

    return (energy(float(stiffness_a)), energy(float(stiffness_b)), minimum(stiffness_a), minimum(stiffness_b), 1.0,
            {"units": "kT"})


def state_free_energy(stiffness: float, site_stiffness: float = 1.0, anchor: float = 0.5,
                      dimensions: int = 2) -> float:
    """F(k{s}) − F(free) in kT, exact (Gaussian integrals; see examples.restraint_scan.probe_restraint_exact)."""
    if stiffness == 0:
        return 0.0
    return probe_restraint_exact(stiffness, site_stiffness, anchor, dimensions)
