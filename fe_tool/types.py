"""Shape-annotated array aliases shared by every module.

Configurations may have any shape (a vector ``(d,)`` or particle coordinates
``(n, 3)``); batched arrays put the replica axis first.
"""
from __future__ import annotations

from typing import Callable

import jax
import numpy as np
from jaxtyping import Array, Float, PRNGKeyArray

Configuration = Float[Array, "..."]
"""One configuration of the system, any shape."""

Configurations = Float[Array, "replicas ..."]
"""A batch of configurations, replica axis first."""

EnergyFunction = Callable[[Configuration], Float[Array, ""]]
"""A JAX-traceable function of one configuration returning a scalar energy (user units)."""

Key = PRNGKeyArray

Works = Float[np.ndarray, "trajectories"]
"""Reduced works w = W/kT of a set of switching trajectories (float64)."""

ReducedEnergies = Float[np.ndarray, "states samples"]
"""reduced_energies[state, sample] = u_state(x_sample) = U_state/kT (float64)."""

__all__ = [
    "Array", "Configuration", "Configurations", "EnergyFunction", "Float", "Key",
    "ReducedEnergies", "Works", "jax",
]
