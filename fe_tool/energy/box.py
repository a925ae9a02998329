"""Periodic orthorhombic box: minimum-image displacements, wrapping, safe distances.

A box is either ``None`` (open boundaries, no periodic images) or an array of the ``d``
edge lengths of an orthorhombic cell (a scalar is taken as a cube). Positions are never
required to be wrapped: the minimum-image convention is applied to every displacement,
so unwrapped trajectories give the same energies as wrapped ones.

Minimum image (Allen & Tildesley, *Computer Simulation of Liquids*, 1987, §1.5 [mem]):
``d = r_i - r_j - L * round((r_i - r_j) / L)`` component-wise. It is exact for pair
interactions only when the cutoff is at most half the shortest edge; :func:`check_cutoff`
raises otherwise.
"""
from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
from jaxtyping import Array, Float


def as_box(box, dimension: int = 3) -> Float[Array, " d"] | None:
    """Normalise a box argument: ``None`` stays ``None``; a scalar becomes a cube.

    Raises:
        ValueError: if the box has the wrong shape.
    """
    if box is None:
        return None
    box = jnp.asarray(box, dtype=jnp.result_type(float))
    if box.ndim == 0:
        box = jnp.full((dimension,), box)
    if box.shape != (dimension,):
        raise ValueError(
            f"box must be None (open boundaries), a scalar edge length or {dimension} edge "
            f"lengths of an orthorhombic cell; got shape {box.shape}."
        )
    return box


def box_volume(box) -> Float[Array, ""]:
    """Volume of an orthorhombic box (product of edge lengths)."""
    box = as_box(box)
    if box is None:
        raise ValueError("box_volume needs a periodic box; got None (open boundaries).")
    return jnp.prod(box)


def minimum_image(displacement: Float[Array, "... d"], box) -> Float[Array, "... d"]:
    """Apply the minimum-image convention to displacement vectors (``box=None``: unchanged)."""
    if box is None:
        return displacement
    box = jnp.asarray(box)
    # round() has zero derivative, so gradients flow only through `displacement`.
    return displacement - box * jnp.round(displacement / box)


def displacement(position_a: Float[Array, "... d"], position_b: Float[Array, "... d"], box):
    """Minimum-image displacement ``a - b``."""
    return minimum_image(position_a - position_b, box)


def pair_displacements(positions: Float[Array, "n d"], first, second, box) -> Float[Array, "... d"]:
    """Minimum-image ``positions[first] - positions[second]`` for index arrays of any shape.

    Gathers one coordinate axis at a time: on CPU, XLA gathers of scalars are several
    times faster than gathers of short rows (and so are the matching scatters in the gradient).
    """
    columns = []
    for axis in range(positions.shape[-1]):  # over the d spatial axes, not particles
        coordinate = positions[:, axis]
        delta = coordinate[first] - coordinate[second]
        if box is not None:
            length = jnp.asarray(box)[axis]
            delta = delta - length * jnp.round(delta / length)
        columns.append(delta)
    return jnp.stack(columns, axis=-1)


def wrap_positions(positions: Float[Array, "n d"], box) -> Float[Array, "n d"]:
    """Wrap positions into the primary cell ``[0, L)`` (``box=None``: unchanged)."""
    if box is None:
        return positions
    box = jnp.asarray(box)
    return positions - box * jnp.floor(positions / box)


def safe_norm(vectors: Float[Array, "... d"], axis: int = -1) -> Float[Array, "..."]:
    """Euclidean norm whose gradient is 0 (not NaN) at the zero vector."""
    squared = jnp.sum(vectors * vectors, axis=axis)
    nonzero = squared > 0.0
    return jnp.where(nonzero, jnp.sqrt(jnp.where(nonzero, squared, 1.0)), 0.0)


def check_cutoff(box, cutoff: float | None) -> None:
    """Raise ``ValueError`` if ``cutoff`` exceeds half the shortest box edge.

    Only checked when the box is a concrete (non-traced) array; a traced box is trusted.
    """
    if box is None or cutoff is None:
        return
    if isinstance(box, jax.core.Tracer):
        return
    shortest = float(np.min(np.asarray(box)))
    if cutoff > 0.5 * shortest * (1.0 + 1e-12):
        raise ValueError(
            f"cutoff={cutoff} is larger than half the shortest box edge ({0.5 * shortest}); "
            "the minimum-image convention would miss interactions. Use a smaller cutoff or a "
            "larger box."
        )


__all__ = [
    "as_box", "box_volume", "check_cutoff", "displacement", "minimum_image", "pair_displacements",
    "safe_norm", "wrap_positions",
]
