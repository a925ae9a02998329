"""Pair lists of fixed size: all pairs for small systems, a Verlet neighbour list for large ones.

Both are a ``(capacity, 2)`` integer array of pairs ``(i, j)``, each unordered pair at most
once (``all_pairs`` has ``i < j``; a cell-built list need not); unused rows hold the
sentinel ``(n, n)`` and are ignored by the energy functions. Because the shapes
never change, energies and the list rebuild can live inside ``jit`` and ``lax.scan``.

A neighbour list holds every pair closer than ``cutoff + skin`` at the time it was built
(Verlet 1967, Phys. Rev. 159, 98). It stays valid until some particle has moved more than
``skin / 2``; :meth:`NeighbourListBuilder.update` checks this and rebuilds in place.

Overflow is never silent. A build that finds more pairs than ``capacity`` (or more
particles in a cell than ``cell_capacity``) sets ``overflow``, which stays set for the
rest of the run; energies computed with such a list are NaN, and
:func:`check_neighbour_list` raises on the host with the capacity that would have sufficed.

Example:
    >>> builder, neighbours = make_neighbour_list(positions, box, cutoff=2.5, skin=0.3)
    >>> def step(carry, _):
    ...     x, neighbours = carry
    ...     neighbours = builder.update(x, neighbours)
    ...     ...
    >>> check_neighbour_list(final_neighbours)   # on the host, after the scan
"""
from __future__ import annotations

import dataclasses
import itertools
import math

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np
from jaxtyping import Array, Bool, Float, Int

from fe_tool.energy.box import as_box, minimum_image, wrap_positions


class NeighbourListOverflowError(RuntimeError):
    """A neighbour list (or its cell grid) was too small for the configuration it was built from."""


# ---------------------------------------------------------------------------
# Host-side helpers (NumPy): all pairs and exclusions


def _exclusion_keys(exclusions, n_particles: int) -> np.ndarray:
    """Sorted unique keys ``i * n + j`` (i < j) of excluded pairs."""
    if exclusions is None:
        return np.zeros((0,), dtype=np.int64)
    exclusions = np.asarray(exclusions, dtype=np.int64).reshape(-1, 2)
    if exclusions.size and (exclusions.min() < 0 or exclusions.max() >= n_particles):
        raise ValueError(f"exclusions must index particles 0..{n_particles - 1}.")
    low = np.minimum(exclusions[:, 0], exclusions[:, 1])
    high = np.maximum(exclusions[:, 0], exclusions[:, 1])
    return np.unique(low[low != high] * n_particles + high[low != high])


def all_pairs(n_particles: int, exclusions=None) -> np.ndarray:
    """Every pair ``(i, j)``, ``i < j``, except the excluded ones, as an ``(m, 2)`` int array.

    Args:
        n_particles: number of particles n.
        exclusions: optional ``(e, 2)`` pairs to leave out (order within a pair ignored).
    """
    i, j = np.triu_indices(n_particles, k=1)
    keys = _exclusion_keys(exclusions, n_particles)
    if keys.size:
        keep = ~np.isin(i.astype(np.int64) * n_particles + j, keys)
        i, j = i[keep], j[keep]
    return np.stack([i, j], axis=1).astype(np.int32)


def count_pairs_within(positions, box, radius: float, exclusions=None) -> int:
    """Number of non-excluded pairs closer than ``radius`` (host-side, NumPy, chunked)."""
    positions = np.asarray(positions, dtype=np.float64)
    n = positions.shape[0]
    box_np = None if box is None else np.asarray(as_box(box, positions.shape[1]))
    keys = _exclusion_keys(exclusions, n)
    count = 0
    chunk = max(1, 2_000_000 // max(n, 1))
    for start in range(0, n, chunk):  # chunks of rows keep memory bounded; not a per-particle loop
        rows = np.arange(start, min(n, start + chunk))
        d = positions[rows, None, :] - positions[None, :, :]
        if box_np is not None:
            d -= box_np * np.round(d / box_np)
        close = (np.sum(d * d, axis=-1) < radius * radius) & (np.arange(n)[None, :] > rows[:, None])
        if keys.size:
            ii, jj = np.nonzero(close)
            close[ii, jj] = ~np.isin((rows[ii].astype(np.int64)) * n + jj, keys)
        count += int(close.sum())
    return count


# ---------------------------------------------------------------------------
# The list and its builder


class NeighbourList(eqx.Module):
    """A fixed-capacity Verlet list and its bookkeeping (a pytree; carry it through scans).

    Attributes:
        pairs: ``(capacity, 2)`` pairs within ``cutoff + skin`` at the last build, each
            unordered pair once; unused rows are ``(n, n)``.
        reference_positions: ``(n, d)`` positions at the last build.
        pair_count: pairs found at the last build (may exceed ``capacity`` on overflow).
        max_pair_count: the largest ``pair_count`` of any build so far.
        max_cell_occupancy: the fullest cell seen in any build (0 without a cell grid).
        overflow: True once any build has exceeded a capacity; sticky.
        rebuilds: number of builds since the first one.
        cutoff, skin: interaction cutoff and skin the list was built for (static).
        cell_capacity: particles per cell the grid can hold (static; 0 without a grid).
    """

    pairs: Int[Array, "capacity 2"]
    reference_positions: Float[Array, "n d"]
    pair_count: Int[Array, ""]
    max_pair_count: Int[Array, ""]
    max_cell_occupancy: Int[Array, ""]
    overflow: Bool[Array, ""]
    rebuilds: Int[Array, ""]
    cutoff: float = eqx.field(static=True)
    skin: float = eqx.field(static=True)
    cell_capacity: int = eqx.field(static=True)

    @property
    def capacity(self) -> int:
        return self.pairs.shape[-2]

    @property
    def valid(self) -> Bool[Array, " capacity"]:
        """Which rows of ``pairs`` are real pairs."""
        return self.pairs[..., 0] < self.reference_positions.shape[-2]


def _neighbour_cell_table(grid: tuple[int, ...]) -> np.ndarray:
    """For each cell (flattened C order): itself, then its 13 (in 3-D) "forward" neighbours.

    Half of the 3^d - 1 neighbour offsets (those whose first non-zero component is +1) is
    enough to visit every pair of adjacent cells once; with at least 3 cells per edge no
    two offsets reach the same cell.
    """
    grid_arr = np.array(grid)
    coords = np.stack(np.unravel_index(np.arange(int(np.prod(grid))), grid), axis=1)
    forward = [o for o in itertools.product((-1, 0, 1), repeat=len(grid))
               if any(o) and o[next(k for k, v in enumerate(o) if v)] == 1]
    offsets = np.array([(0,) * len(grid)] + forward)
    neighbour_coords = (coords[:, None, :] + offsets[None, :, :]) % grid_arr
    return np.ravel_multi_index(tuple(neighbour_coords.transpose(2, 0, 1)), grid).astype(np.int32)


class NeighbourListBuilder(eqx.Module):
    """Builds and updates a :class:`NeighbourList` with fixed shapes (static settings).

    Create it with :func:`neighbour_list_builder` or :func:`make_neighbour_list`.
    ``build`` and ``update`` are pure and jit/scan friendly; under ``vmap`` the rebuild
    branch of ``update`` is evaluated every call (``lax.cond`` becomes a select).
    """

    box: Float[Array, " d"] | None
    excluded_keys: Int[Array, " e"]
    cell_neighbours: Int[Array, "cells stencil"] | None
    n_particles: int = eqx.field(static=True)
    cutoff: float = eqx.field(static=True)
    skin: float = eqx.field(static=True)
    capacity: int = eqx.field(static=True)
    cell_grid: tuple[int, ...] | None = eqx.field(static=True)
    cell_capacity: int = eqx.field(static=True)

    def _candidates(self, positions):
        """Candidate partners ``(n, m)`` (sentinel ``n``), the number of leading columns that
        hold the particle's own cell (there only j > i is kept), and the fullest cell's occupancy."""
        n = self.n_particles
        if self.cell_grid is None:
            return jnp.broadcast_to(jnp.arange(n), (n, n)), n, jnp.zeros((), dtype=jnp.int32)
        grid = jnp.array(self.cell_grid)
        wrapped = wrap_positions(positions, self.box)
        coords = jnp.clip(jnp.floor(wrapped / self.box * grid).astype(jnp.int32), 0, grid - 1)
        strides = np.cumprod((1,) + self.cell_grid[::-1])[:-1][::-1].astype(np.int32)
        cell = jnp.sum(coords * jnp.asarray(strides), axis=-1)
        n_cells = int(np.prod(self.cell_grid))
        order = jnp.argsort(cell)
        sorted_cells = cell[order]
        rank = jnp.arange(n) - jnp.searchsorted(sorted_cells, sorted_cells, side="left")
        table = jnp.full((n_cells, self.cell_capacity), n, dtype=jnp.int32)
        table = table.at[sorted_cells, rank].set(order.astype(jnp.int32), mode="drop")
        occupancy = jnp.max(jnp.bincount(cell, length=n_cells)).astype(jnp.int32)
        candidates = table[self.cell_neighbours[cell]].reshape(n, -1)
        return candidates, self.cell_capacity, occupancy

    def build(self, positions: Float[Array, "n d"], previous: NeighbourList | None = None) -> NeighbourList:
        """Build the list from scratch (carrying the sticky counters of ``previous``)."""
        n = self.n_particles
        if positions.shape[0] != n:
            raise ValueError(
                f"positions has {positions.shape[0]} particles but the builder was made for {n}."
            )
        candidates, ordered_columns, occupancy = self._candidates(positions)
        i = jnp.arange(n)[:, None]
        partner = jnp.minimum(candidates, n - 1)
        # One coordinate axis at a time (scalar gathers are much faster than row gathers on CPU).
        r2 = jnp.zeros(candidates.shape, dtype=positions.dtype)
        for axis in range(positions.shape[1]):  # over spatial axes, not particles
            coordinate = positions[:, axis]
            delta = coordinate[:, None] - coordinate[partner]
            if self.box is not None:
                delta = delta - self.box[axis] * jnp.round(delta / self.box[axis])
            r2 = r2 + delta * delta
        radius = self.cutoff + self.skin
        own_cell = jnp.arange(candidates.shape[1])[None, :] < ordered_columns
        close = ((candidates < n) & (candidates != i) & (~own_cell | (candidates > i))
                 & (r2 < radius * radius))
        if self.excluded_keys.shape[0] > 0:
            key_dtype = self.excluded_keys.dtype
            low = jnp.minimum(i, candidates).astype(key_dtype)
            high = jnp.maximum(i, candidates).astype(key_dtype)
            keys = low * n + high
            where = jnp.clip(jnp.searchsorted(self.excluded_keys, keys), 0,
                             self.excluded_keys.shape[0] - 1)
            close = close & (self.excluded_keys[where] != keys)
        # Compact the candidate mask into the first `count` rows. A gather driven by a binary
        # search of the running count is faster on CPU than a scatter of every candidate.
        running = jnp.cumsum(close.reshape(-1), dtype=jnp.int32)
        count = running[-1]
        slots = jnp.arange(self.capacity, dtype=jnp.int32)
        source = jnp.minimum(jnp.searchsorted(running, slots + 1, side="left"), running.shape[0] - 1)
        filled = slots < count
        first = jnp.where(filled, source // candidates.shape[1], n)
        second = jnp.where(filled, candidates.reshape(-1)[source], n)
        pairs = jnp.stack([first, second], axis=1).astype(jnp.int32)
        overflow = (count > self.capacity) | (occupancy > self.cell_capacity)
        zero = jnp.zeros((), dtype=jnp.int32)
        if previous is None:
            max_count, max_occupancy, rebuilds = count, occupancy, zero
        else:
            overflow = overflow | previous.overflow
            max_count = jnp.maximum(count, previous.max_pair_count)
            max_occupancy = jnp.maximum(occupancy, previous.max_cell_occupancy)
            rebuilds = previous.rebuilds + 1
        return NeighbourList(
            pairs=pairs, reference_positions=positions, pair_count=count,
            max_pair_count=max_count, max_cell_occupancy=max_occupancy, overflow=overflow,
            rebuilds=rebuilds, cutoff=self.cutoff, skin=self.skin,
            cell_capacity=self.cell_capacity,
        )

    def needs_rebuild(self, positions: Float[Array, "n d"], neighbours: NeighbourList) -> Bool[Array, ""]:
        """True if some particle moved more than ``skin / 2`` since the last build."""
        moved = minimum_image(positions - neighbours.reference_positions, self.box)
        return jnp.max(jnp.sum(moved * moved, axis=-1)) > (0.5 * self.skin) ** 2

    def update(self, positions: Float[Array, "n d"], neighbours: NeighbourList) -> NeighbourList:
        """Rebuild if needed (same capacity), else return ``neighbours`` unchanged."""
        return jax.lax.cond(
            self.needs_rebuild(positions, neighbours),
            lambda: self.build(positions, previous=neighbours),
            lambda: neighbours,
        )

    def build_batch(self, positions: Float[Array, "c n d"]) -> NeighbourList:
        """Lists for a batch of configurations (stacked on a first axis)."""
        return jax.vmap(self.build)(positions)

    def update_batch(self, positions: Float[Array, "c n d"], neighbours: NeighbourList) -> NeighbourList:
        """Bring a batch of lists up to date under one ``lax.cond``: if any configuration has a
        particle that moved more than ``skin / 2``, rebuild every list, else keep them all.

        Deciding outside the ``vmap`` matters: under ``vmap`` the per-list ``cond`` of
        :meth:`update` turns into a select, and the rebuild would run on every call.
        """
        stale = jnp.any(jax.vmap(self.needs_rebuild)(positions, neighbours))
        return jax.lax.cond(
            stale,
            lambda: jax.vmap(lambda x, old: self.build(x, previous=old))(positions, neighbours),
            lambda: neighbours,
        )

    def with_capacity(self, capacity: int, cell_capacity: int | None = None) -> "NeighbourListBuilder":
        """The same builder with a larger pair capacity (and cell capacity, when cells are used)."""
        cells = self.cell_capacity if cell_capacity is None or self.cell_grid is None else int(cell_capacity)
        return dataclasses.replace(self, capacity=int(capacity), cell_capacity=cells)


def neighbour_list_builder(
    n_particles: int,
    box,
    cutoff: float,
    skin: float,
    capacity: int,
    *,
    exclusions=None,
    method: str = "auto",
    cell_capacity: int | None = None,
    dimension: int = 3,
) -> NeighbourListBuilder:
    """Make a :class:`NeighbourListBuilder` with static sizes.

    Args:
        n_particles: number of particles n.
        box: periodic box edge lengths (fixed for the builder's life) or ``None``.
        cutoff: interaction cutoff (length); must be at most half the shortest box edge.
        skin: extra shell (length); the list is rebuilt after a displacement of skin/2.
        capacity: maximum number of pairs stored.
        exclusions: ``(e, 2)`` pairs never listed (e.g. bonded 1-2, 1-3, 1-4 pairs).
        method: ``"cells"`` (cell grid, O(n) build; needs a box at least 3 cells of size
            cutoff + skin wide), ``"all_pairs"`` (O(n²) build, any box), or ``"auto"``
            (cells when possible and n >= 512).
        cell_capacity: particles one cell can hold; default 2x the mean occupancy + 8.
        dimension: spatial dimension d.
    """
    if skin < 0 or cutoff <= 0:
        raise ValueError(f"cutoff must be > 0 and skin >= 0; got cutoff={cutoff}, skin={skin}.")
    if capacity < 1:
        raise ValueError(f"capacity must be a positive number of pairs; got {capacity}.")
    box = as_box(box, dimension)
    if box is not None:
        box_np = np.asarray(box)
        if cutoff + skin > 0.5 * box_np.min():
            raise ValueError(
                f"cutoff + skin = {cutoff + skin} exceeds half the shortest box edge "
                f"({0.5 * box_np.min()}); use a smaller skin or a larger box."
            )
    if method not in ("auto", "cells", "all_pairs"):
        raise ValueError(f"method must be 'auto', 'cells' or 'all_pairs'; got {method!r}.")
    grid = None
    if box is not None:
        grid = tuple(int(g) for g in np.floor(np.asarray(box) / (cutoff + skin)))
    cells_possible = grid is not None and min(grid) >= 3
    if method == "cells" and not cells_possible:
        raise ValueError(
            "method='cells' needs a periodic box at least 3 cells of size cutoff + skin along "
            f"every edge (grid would be {grid}); use method='all_pairs'."
        )
    use_cells = method == "cells" or (method == "auto" and cells_possible and n_particles >= 512)
    keys = _exclusion_keys(exclusions, n_particles)
    key_dtype = jnp.int64 if jax.config.read("jax_enable_x64") else jnp.int32
    if keys.size and n_particles * n_particles >= np.iinfo(np.dtype(key_dtype)).max:
        raise ValueError("too many particles for exclusion keys without jax_enable_x64.")
    if use_cells:
        n_cells = int(np.prod(grid))
        if cell_capacity is None:
            cell_capacity = int(math.ceil(2.0 * n_particles / n_cells)) + 8
        cell_table = jnp.asarray(_neighbour_cell_table(grid))
    else:
        grid, cell_capacity, cell_table = None, 0, None
    return NeighbourListBuilder(
        box=box, excluded_keys=jnp.asarray(keys, dtype=key_dtype), cell_neighbours=cell_table,
        n_particles=int(n_particles), cutoff=float(cutoff), skin=float(skin),
        capacity=int(capacity), cell_grid=grid, cell_capacity=int(cell_capacity),
    )


def check_neighbour_list(neighbours: NeighbourList) -> None:
    """Raise :class:`NeighbourListOverflowError` (host side) if any build overflowed.

    Works on a single list or a batch (vmapped) of lists.
    """
    if not bool(np.any(np.asarray(neighbours.overflow))):
        return
    needed_pairs = int(np.max(np.asarray(neighbours.max_pair_count)))
    fullest_cell = int(np.max(np.asarray(neighbours.max_cell_occupancy)))
    problems = []
    if needed_pairs > neighbours.capacity:
        problems.append(
            f"{needed_pairs} pairs were within cutoff + skin but the capacity is "
            f"{neighbours.capacity}"
        )
    if fullest_cell > neighbours.cell_capacity and neighbours.cell_capacity > 0:
        problems.append(
            f"a cell held {fullest_cell} particles but the cell capacity is "
            f"{neighbours.cell_capacity} (pairs may also have been missed)"
        )
    raise NeighbourListOverflowError(
        "neighbour list overflow: " + "; ".join(problems or ["capacity exceeded"])
        + ". Energies computed with this list are invalid (NaN). Make a new builder with a "
        "larger capacity / cell_capacity, e.g. make_neighbour_list(..., capacity_factor=2.0)."
    )


def grown_capacity(neighbours: NeighbourList, factor: float = 1.3) -> tuple[int, int]:
    """Pair and cell capacities that would have held what an overflowed list (or batch) met,
    with room to spare: ``factor`` × the largest counts seen, plus a small margin."""
    pairs = int(np.max(np.asarray(neighbours.max_pair_count)))
    cells = int(np.max(np.asarray(neighbours.max_cell_occupancy)))
    return int(math.ceil(factor * pairs)) + 16, int(math.ceil(factor * cells)) + 4


def make_neighbour_list(
    positions,
    box,
    cutoff: float,
    skin: float = 0.3,
    *,
    capacity_factor: float = 1.3,
    exclusions=None,
    method: str = "auto",
) -> tuple[NeighbourListBuilder, NeighbourList]:
    """Size a builder from a configuration (host side), build the first list and check it.

    The pair capacity is ``capacity_factor`` times the pairs found now (at least 16 more),
    and the cell capacity is sized the same way from the fullest cell.
    """
    positions_np = np.asarray(positions)
    n, dimension = positions_np.shape
    found = count_pairs_within(positions_np, box, cutoff + skin, exclusions)
    capacity = int(math.ceil(capacity_factor * found)) + 16
    builder = neighbour_list_builder(
        n, box, cutoff, skin, capacity, exclusions=exclusions, method=method, dimension=dimension
    )
    if builder.cell_grid is not None:
        grid = np.array(builder.cell_grid)
        box_np = np.asarray(builder.box)
        wrapped = positions_np - box_np * np.floor(positions_np / box_np)
        coords = np.clip(np.floor(wrapped / box_np * grid).astype(int), 0, grid - 1)
        fullest = int(np.bincount(np.ravel_multi_index(tuple(coords.T), builder.cell_grid)).max())
        builder = neighbour_list_builder(
            n, box, cutoff, skin, capacity, exclusions=exclusions, method="cells",
            dimension=dimension,
            cell_capacity=int(math.ceil(capacity_factor * fullest)) + 4,
        )
    # One compiled build (host-side setup; eager dispatch of the many small ops is slower).
    neighbours = jax.jit(lambda p: builder.build(p))(jnp.asarray(positions))
    check_neighbour_list(neighbours)
    return builder, neighbours


__all__ = [
    "NeighbourList", "NeighbourListBuilder", "NeighbourListOverflowError", "all_pairs",
    "check_neighbour_list", "count_pairs_within", "grown_capacity", "make_neighbour_list",
    "neighbour_list_builder",
]
