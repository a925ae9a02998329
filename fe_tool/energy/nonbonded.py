"""Pair interactions: Lennard-Jones (plain, shifted, soft-core), Coulomb (cutoff, reaction
field, soft-core), scaled 1-4 pairs, exclusions from bonds, and LJ long-range tail corrections.

Pairs come from one of three places, all giving the same energy:

* ``pairs=None``: all pairs ``i < j`` (built on the host at trace time, minus ``exclusions``);
* an ``(m, 2)`` integer array (e.g. :func:`~fe_tool.energy.neighbours.all_pairs`), rows
  ``(n, n)`` are padding;
* a :class:`~fe_tool.energy.neighbours.NeighbourList` (exclusions were applied when it was
  built; if it overflowed, the energy is NaN).

Alchemical coupling. ``alchemical`` is a boolean mask (n,) of the particles being decoupled.
A pair with exactly one alchemical particle ("alchemical–environment") interacts through
soft-core LJ at ``lj_coupling`` and Coulomb scaled by ``coulomb_scale``; every other pair is
unchanged. With ``decouple_internal=False`` pairs inside the alchemical group are switched
too (annihilation rather than decoupling). ``lj_coupling = coulomb_scale = 1`` is the fully
coupled state and reproduces the plain energy; both at 0 remove the group's interaction
with its environment. The usual protocol switches electrostatics off first (linearly, with
LJ fully on) and then decouples LJ through the soft core; both knobs are separate
arguments so a λ path can schedule them independently.

Soft-core LJ (Beutler, Mark, van Schaik, Gerber & van Gunsteren 1994, Chem. Phys. Lett.
222, 529), with coupling λ ∈ [0, 1] and a dimensionless α (default 0.5):

    U_sc(r, λ) = 4 ε λ [ 1 / (α(1−λ) + (r/σ)⁶)² − 1 / (α(1−λ) + (r/σ)⁶) ]

At λ = 1 this is 4ε[(σ/r)¹² − (σ/r)⁶]; at λ = 0 it is 0; for 0 < λ < 1 it is finite at r = 0.

Soft-core Coulomb (optional): U = s f q_i q_j / (ε_r r_s), r_s = sqrt(r² + α_C (1 − s)),
α_C in length² (default 0: plain linear scaling by s).

Reaction field (Barker & Watts 1973, Mol. Phys. 26, 789; Tironi, Sperb, Smith & van
Gunsteren 1995, J. Chem. Phys. 102, 5451 [mem]) for r < r_c:

    U_RF(r) = f q_i q_j / ε_r [ 1/r + k_rf r² − c_rf ],
    k_rf = (ε_rf − ε_r) / ((2 ε_rf + ε_r) r_c³),  c_rf = 1/r_c + k_rf r_c²

so U_RF(r_c) = 0. ε_rf = ∞ (conducting) gives k_rf = 1/(2 r_c³); ε_rf = ε_r gives a plain
shifted Coulomb. f = N_A e²/(4π ε0) = 138.935458 kJ mol⁻¹ nm e⁻² in kJ/mol-nm units
(computed in :mod:`fe_tool.units`). Excluded pairs get no interaction at all (no RF
self/exclusion correction).
"""
from __future__ import annotations

import math

import equinox as eqx
import jax.numpy as jnp
import numpy as np
from jaxtyping import Array, Bool, Float, Int

from fe_tool import units
from fe_tool.energy.box import as_box, check_cutoff, pair_displacements
from fe_tool.energy.neighbours import NeighbourList, all_pairs

DEFAULT_SOFT_CORE_ALPHA = 0.5
MIXING_RULES = ("lorentz-berthelot", "geometric")


# ---------------------------------------------------------------------------
# Parameters


class LennardJonesParameters(eqx.Module):
    """LJ parameters, per particle (with a mixing rule) or per type pair (explicit table).

    Attributes:
        sigma: ``(n,)`` per-particle σ, or ``(t, t)`` table σ_ab (length).
        epsilon: ``(n,)`` per-particle ε, or ``(t, t)`` table ε_ab (energy).
        types: ``None`` for per-particle parameters, else ``(n,)`` type index of each particle.
        mixing: ``"lorentz-berthelot"`` (σ_ij = (σ_i+σ_j)/2, ε_ij = sqrt(ε_i ε_j)) or
            ``"geometric"`` (σ_ij = sqrt(σ_i σ_j)); ignored for tables.
    """

    sigma: Float[Array, "..."]
    epsilon: Float[Array, "..."]
    types: Int[Array, " n"] | None = None
    mixing: str = eqx.field(static=True, default="lorentz-berthelot")

    def pair(self, i, j):
        """(σ_ij, ε_ij) for index arrays ``i``, ``j``."""
        if self.types is not None:
            ti, tj = self.types[i], self.types[j]
            return self.sigma[ti, tj], self.epsilon[ti, tj]
        if self.mixing == "geometric":
            sigma = jnp.sqrt(self.sigma[i] * self.sigma[j])
        else:
            sigma = 0.5 * (self.sigma[i] + self.sigma[j])
        return sigma, jnp.sqrt(self.epsilon[i] * self.epsilon[j])

    def type_tables(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Host-side ``(types (n,), sigma_table (t,t), epsilon_table (t,t))`` view.

        Per-particle parameters are grouped into types of identical (σ, ε).
        """
        if self.types is not None:
            return np.asarray(self.types), np.asarray(self.sigma), np.asarray(self.epsilon)
        rows = np.stack([np.asarray(self.sigma), np.asarray(self.epsilon)], axis=1)
        unique, types = np.unique(rows, axis=0, return_inverse=True)
        s, e = unique[:, 0], unique[:, 1]
        if self.mixing == "geometric":
            sigma_table = np.sqrt(np.outer(s, s))
        else:
            sigma_table = 0.5 * (s[:, None] + s[None, :])
        return types.reshape(-1), sigma_table, np.sqrt(np.outer(e, e))


def lennard_jones_parameters(sigma, epsilon, mixing: str = "lorentz-berthelot") -> LennardJonesParameters:
    """Per-particle LJ parameters σ_i (length), ε_i (energy) combined by ``mixing``."""
    if mixing not in MIXING_RULES:
        raise ValueError(f"mixing={mixing!r} is not known; use one of {MIXING_RULES}.")
    sigma = jnp.asarray(sigma, dtype=jnp.result_type(float))
    epsilon = jnp.asarray(epsilon, dtype=jnp.result_type(float))
    if sigma.ndim != 1 or sigma.shape != epsilon.shape:
        raise ValueError(
            f"sigma and epsilon must be 1-D arrays of equal length; got {sigma.shape}, {epsilon.shape}."
        )
    return LennardJonesParameters(sigma=sigma, epsilon=epsilon, types=None, mixing=mixing)


def lennard_jones_type_parameters(types, sigma_table, epsilon_table) -> LennardJonesParameters:
    """Explicit pair parameters: particle ``i`` has type ``types[i]``; σ_ab, ε_ab from symmetric tables."""
    types = jnp.asarray(types, dtype=jnp.int32)
    sigma_table = jnp.asarray(sigma_table, dtype=jnp.result_type(float))
    epsilon_table = jnp.asarray(epsilon_table, dtype=jnp.result_type(float))
    t = sigma_table.shape[0]
    if sigma_table.shape != (t, t) or epsilon_table.shape != (t, t):
        raise ValueError(
            f"sigma_table and epsilon_table must be square (t, t); got {sigma_table.shape}, "
            f"{epsilon_table.shape}."
        )
    if not (np.allclose(sigma_table, sigma_table.T) and np.allclose(epsilon_table, epsilon_table.T)):
        raise ValueError("sigma_table and epsilon_table must be symmetric.")
    return LennardJonesParameters(sigma=sigma_table, epsilon=epsilon_table, types=types)


# ---------------------------------------------------------------------------
# Pair functions of r² (pure, elementwise)


def lennard_jones_pair_energy(r_squared, sigma, epsilon):
    """4ε[(σ/r)¹² − (σ/r)⁶] elementwise."""
    inv6 = (sigma * sigma / r_squared) ** 3
    return 4.0 * epsilon * (inv6 * inv6 - inv6)


def soft_core_lennard_jones_pair_energy(r_squared, sigma, epsilon, coupling, alpha=DEFAULT_SOFT_CORE_ALPHA):
    """U_sc = 4ελ[1/(α(1−λ) + (r/σ)⁶)² − 1/(α(1−λ) + (r/σ)⁶)] elementwise (λ = ``coupling``)."""
    denominator = alpha * (1.0 - coupling) + (r_squared / (sigma * sigma)) ** 3
    inverse = 1.0 / denominator
    return 4.0 * epsilon * coupling * (inverse * inverse - inverse)


def reaction_field_constants(cutoff: float, reaction_field_dielectric: float, dielectric: float = 1.0):
    """(k_rf, c_rf) of the reaction field; ``reaction_field_dielectric=math.inf`` is conducting."""
    if math.isinf(reaction_field_dielectric):
        k_rf = 1.0 / (2.0 * cutoff**3)
    else:
        k_rf = (reaction_field_dielectric - dielectric) / (
            (2.0 * reaction_field_dielectric + dielectric) * cutoff**3
        )
    return k_rf, 1.0 / cutoff + k_rf * cutoff**2


# ---------------------------------------------------------------------------
# Energies over pairs


def _resolve_pairs(pairs, n: int, cutoff, exclusions):
    overflow = None
    if pairs is None:
        table = jnp.asarray(all_pairs(n, exclusions))
    else:
        if exclusions is not None:
            raise ValueError(
                "exclusions are applied when a pair list is built; pass them to all_pairs() or "
                "the neighbour-list builder, not together with `pairs`."
            )
        if isinstance(pairs, NeighbourList):
            if cutoff is None or cutoff > pairs.cutoff * (1.0 + 1e-12):
                raise ValueError(
                    f"the neighbour list was built for cutoff {pairs.cutoff}; the energy needs "
                    f"cutoff <= that (got {cutoff})."
                )
            overflow = pairs.overflow
            table = pairs.pairs
        else:
            table = jnp.asarray(pairs)
            if table.ndim != 2 or table.shape[1] != 2:
                raise ValueError(f"pairs must have shape (m, 2); got {table.shape}.")
    i, j = table[:, 0], table[:, 1]
    valid = i < n
    return jnp.minimum(i, n - 1), jnp.minimum(j, n - 1), valid, overflow


def nonbonded_energy_parts(
    positions: Float[Array, "n d"],
    *,
    lennard_jones: LennardJonesParameters | None = None,
    charges: Float[Array, " n"] | None = None,
    pairs=None,
    exclusions=None,
    box=None,
    cutoff: float | None = None,
    lj_shift: bool = False,
    reaction_field_dielectric: float | None = None,
    dielectric: float = 1.0,
    coulomb_constant: float = units.COULOMB_CONSTANT_KJ_NM_PER_MOL_E2,
    alchemical: Bool[Array, " n"] | None = None,
    lj_coupling=1.0,
    coulomb_scale=1.0,
    soft_core_alpha: float = DEFAULT_SOFT_CORE_ALPHA,
    coulomb_soft_core_alpha: float = 0.0,
    decouple_internal: bool = True,
) -> dict[str, Float[Array, ""]]:
    """LJ and Coulomb energies over a pair set: ``{"lennard_jones": U_LJ, "coulomb": U_C}``.

    Args:
        positions: (n, d) coordinates.
        lennard_jones: LJ parameters, or ``None`` for no LJ.
        charges: (n,) charges (e, or reduced), or ``None`` for no electrostatics.
        pairs: ``None`` (all pairs), an (m, 2) pair array, or a ``NeighbourList``.
        exclusions: (e, 2) pairs to leave out; only with ``pairs=None``.
        box: periodic box edges, or ``None`` for open boundaries.
        cutoff: interaction cutoff (length); required with a box or a neighbour list;
            ``None`` means no cutoff (open boundaries only).
        lj_shift: subtract U_LJ(r_c) from every pair inside the cutoff (truncated and shifted).
        reaction_field_dielectric: ε_rf for a reaction field; ``None`` for a plain truncated
            Coulomb (or no cutoff at all when ``cutoff`` is ``None``).
        dielectric: ε_r of the medium inside the cutoff.
        coulomb_constant: f in energy·length/charge² (default kJ mol⁻¹ nm e⁻²).
        alchemical: (n,) boolean mask of the decoupled particles, or ``None`` (then
            ``lj_coupling`` and ``coulomb_scale`` have no effect).
        lj_coupling: soft-core λ_LJ for alchemical–environment pairs (1 = coupled); a scalar,
            or a 1-D array of c values (then ``coulomb_scale`` is a scalar or of the same
            shape) to get the energies at c couplings with the pair geometry computed once.
        coulomb_scale: charge-product scale for alchemical–environment pairs (1 = coupled).
        soft_core_alpha: α of the Beutler soft core (dimensionless).
        coulomb_soft_core_alpha: α_C (length²) of the Coulomb soft core; 0 = linear scaling.
        decouple_internal: if True, pairs inside the alchemical group stay fully coupled.

    Returns:
        dict with ``"lennard_jones"`` and ``"coulomb"`` energies (0 when absent): scalars, or
        arrays of shape (c,) for c couplings given as arrays (with ``alchemical`` set).
    """
    positions = jnp.asarray(positions)
    n, dimension = positions.shape
    box = as_box(box, dimension)
    if box is not None and cutoff is None:
        raise ValueError("a periodic box needs a cutoff (at most half the shortest box edge).")
    check_cutoff(box, cutoff)
    if reaction_field_dielectric is not None and cutoff is None:
        raise ValueError("a reaction field needs a cutoff.")
    i, j, valid, overflow = _resolve_pairs(pairs, n, cutoff, exclusions)
    d = pair_displacements(positions, i, j, box)
    r2 = jnp.sum(d * d, axis=-1)
    inside = valid if cutoff is None else valid & (r2 < cutoff * cutoff)
    # Padding and out-of-range pairs get a harmless r² so no inf/NaN reaches the gradient.
    r2 = jnp.where(inside, r2, 1.0 if cutoff is None else cutoff * cutoff)

    if alchemical is not None:
        mask = jnp.asarray(alchemical, dtype=bool)
        if mask.shape != (n,):
            raise ValueError(f"alchemical must be a boolean mask of shape ({n},); got {mask.shape}.")
        switched = (mask[i] != mask[j]) if decouple_internal else (mask[i] | mask[j])
        # a trailing pair axis: couplings of shape (c,) give energies of shape (c,), scalars stay scalars
        lj_coupling = jnp.expand_dims(jnp.asarray(lj_coupling, dtype=positions.dtype), -1)
        coulomb_scale = jnp.expand_dims(jnp.asarray(coulomb_scale, dtype=positions.dtype), -1)
    zero = jnp.zeros((), dtype=positions.dtype)

    lj_energy = zero
    if lennard_jones is not None:
        sigma, epsilon = lennard_jones.pair(i, j)
        absent = (sigma <= 0.0) | (epsilon == 0.0)
        sigma = jnp.where(absent, 1.0, sigma)
        epsilon = jnp.where(absent, 0.0, epsilon)
        if alchemical is None:
            def pair_energy(s2):
                return lennard_jones_pair_energy(s2, sigma, epsilon)
        else:
            coupling = jnp.where(switched, lj_coupling, 1.0)

            def pair_energy(s2):
                return soft_core_lennard_jones_pair_energy(s2, sigma, epsilon, coupling, soft_core_alpha)
        u = pair_energy(r2)
        if lj_shift:
            if cutoff is None:
                raise ValueError("lj_shift=True needs a cutoff.")
            u = u - pair_energy(jnp.full_like(r2, cutoff * cutoff))
        lj_energy = jnp.sum(jnp.where(inside, u, 0.0), axis=-1)

    coulomb = zero
    if charges is not None:
        charges = jnp.asarray(charges)
        if charges.shape != (n,):
            raise ValueError(f"charges must have shape ({n},); got {charges.shape}.")
        product = charges[i] * charges[j]
        r2_eff = r2
        if alchemical is not None:
            scale = jnp.where(switched, coulomb_scale, 1.0)
            product = product * scale
            if coulomb_soft_core_alpha:
                r2_eff = r2 + coulomb_soft_core_alpha * (1.0 - scale)
        radial = 1.0 / jnp.sqrt(r2_eff)
        if reaction_field_dielectric is not None:
            k_rf, c_rf = reaction_field_constants(cutoff, reaction_field_dielectric, dielectric)
            radial = radial + k_rf * r2_eff - c_rf
        u = (coulomb_constant / dielectric) * product * radial
        coulomb = jnp.sum(jnp.where(inside, u, 0.0), axis=-1)

    if overflow is not None:
        # An overflowed list misses pairs: make that impossible to overlook downstream.
        lj_energy = jnp.where(overflow, jnp.nan, lj_energy)
        coulomb = jnp.where(overflow, jnp.nan, coulomb)
    return {"lennard_jones": lj_energy, "coulomb": coulomb}


def nonbonded_energy(positions, **settings) -> Float[Array, ""]:
    """U_LJ + U_Coulomb; keyword arguments as in :func:`nonbonded_energy_parts`."""
    parts = nonbonded_energy_parts(positions, **settings)
    return parts["lennard_jones"] + parts["coulomb"]


def lennard_jones_energy(positions, lennard_jones: LennardJonesParameters, **settings) -> Float[Array, ""]:
    """Lennard-Jones energy only (plain, shifted or soft-core); see :func:`nonbonded_energy_parts`."""
    return nonbonded_energy_parts(positions, lennard_jones=lennard_jones, **settings)["lennard_jones"]


def coulomb_energy(positions, charges, **settings) -> Float[Array, ""]:
    """Coulomb energy only (open, truncated or reaction field); see :func:`nonbonded_energy_parts`."""
    return nonbonded_energy_parts(positions, charges=charges, **settings)["coulomb"]


# ---------------------------------------------------------------------------
# The interactions of a subset of particles with everything


def subset_pairs(subset, n_particles: int, exclusions=None, include_internal: bool = False) -> np.ndarray:
    """The pairs ``(i, j)``, ``i < j``, with at least one particle in ``subset`` (host side, NumPy).

    Args:
        subset: (n,) boolean mask or (k,) indices of the subset.
        n_particles: n.
        exclusions: (e, 2) pairs to leave out.
        include_internal: also the pairs with both particles in the subset; ``False`` keeps
            only subset–rest pairs (the pairs a decoupling switches when ``decouple_internal``).

    Returns:
        (m, 2) int32 array, m = k(n − k) [+ k(k − 1)/2] minus exclusions: O(k n) rows.
    """
    mask = np.zeros(n_particles, dtype=bool)
    given = np.asarray(subset)
    if given.dtype == bool:
        if given.shape != (n_particles,):
            raise ValueError(f"a subset mask must have shape ({n_particles},); got {given.shape}.")
        mask = given.copy()
    else:
        mask[given.astype(int).reshape(-1)] = True
    members = np.flatnonzero(mask)
    partners = np.arange(n_particles) if include_internal else np.flatnonzero(~mask)
    first = np.repeat(members, partners.size)
    second = np.tile(partners, members.size)
    keep = first != second
    if include_internal:  # an internal pair appears twice, (a, b) and (b, a): keep one
        keep &= ~(mask[second] & (second < first))
    low, high = np.minimum(first[keep], second[keep]), np.maximum(first[keep], second[keep])
    pairs = np.stack([low, high], axis=1).astype(np.int32)
    if exclusions is not None and np.asarray(exclusions).size:
        excluded = np.sort(np.asarray(exclusions, np.int64).reshape(-1, 2), axis=1)
        keys = excluded[:, 0] * n_particles + excluded[:, 1]
        pairs = pairs[~np.isin(pairs[:, 0].astype(np.int64) * n_particles + pairs[:, 1], keys)]
    return pairs


def subset_energy_parts(positions, subset, *, exclusions=None, decouple_internal: bool = True,
                        **settings) -> dict[str, Float[Array, "..."]]:
    """LJ and Coulomb energies of the subset's interactions with every particle, O(k n) pairs.

    The pairs of :func:`subset_pairs` (subset–rest pairs, plus subset-internal pairs when
    ``decouple_internal=False``, as the coupling switches them) evaluated by
    :func:`nonbonded_energy_parts` itself, so cutoff, shift, reaction field, minimum image and
    soft core are exactly those of the full energy. With ``alchemical`` equal to the subset,
    the difference of this energy between two couplings equals that of the full energy.
    ``subset`` and ``exclusions`` must be concrete (host) arrays; for repeated calls build the
    pairs once with :func:`subset_pairs` and pass them as ``pairs``.
    """
    n = jnp.shape(positions)[0]
    pairs = subset_pairs(subset, n, exclusions, include_internal=not decouple_internal)
    return nonbonded_energy_parts(positions, pairs=pairs, decouple_internal=decouple_internal, **settings)


# ---------------------------------------------------------------------------
# Scaled 1-4 (or any explicit) pairs and exclusions from bonds


def scaled_pair_parameters(pairs, lennard_jones: LennardJonesParameters | None, charges,
                           lj_scale: float, coulomb_scale: float):
    """Per-pair (σ, ε·lj_scale, q_i q_j·coulomb_scale) for explicit pairs such as 1-4 pairs."""
    pairs = jnp.asarray(pairs)
    i, j = pairs[:, 0], pairs[:, 1]
    if lennard_jones is None:
        sigma = jnp.ones(i.shape)
        epsilon = jnp.zeros(i.shape)
    else:
        sigma, epsilon = lennard_jones.pair(i, j)
    products = jnp.zeros(i.shape) if charges is None else jnp.asarray(charges)[i] * jnp.asarray(charges)[j]
    return sigma, lj_scale * epsilon, coulomb_scale * products


def scaled_pair_energy(
    positions: Float[Array, "n d"],
    pairs: Int[Array, "m 2"],
    sigma: Float[Array, " m"],
    epsilon: Float[Array, " m"],
    charge_products: Float[Array, " m"],
    *,
    box=None,
    coulomb_constant: float = units.COULOMB_CONSTANT_KJ_NM_PER_MOL_E2,
    dielectric: float = 1.0,
) -> Float[Array, ""]:
    """Σ_pairs 4ε[(σ/r)¹² − (σ/r)⁶] + f q_i q_j / (ε_r r): plain LJ + Coulomb, no cutoff.

    Used for scaled 1-4 pairs: pass ε and q_i q_j already multiplied by their scale factors
    (:func:`scaled_pair_parameters`). These pairs must also be in the exclusions of the
    main nonbonded term so they are not counted twice.
    """
    pairs = jnp.asarray(pairs)
    box = as_box(box, positions.shape[-1])
    d = pair_displacements(positions, pairs[:, 0], pairs[:, 1], box)
    r2 = jnp.sum(d * d, axis=-1)
    absent = (sigma <= 0.0) | (epsilon == 0.0)
    lj = lennard_jones_pair_energy(r2, jnp.where(absent, 1.0, sigma), jnp.where(absent, 0.0, epsilon))
    return jnp.sum(lj) + (coulomb_constant / dielectric) * jnp.sum(charge_products / jnp.sqrt(r2))


def bonded_exclusions(bonds, n_particles: int, max_separation: int = 3):
    """Pairs within ``max_separation`` bonds, and the pairs exactly 3 bonds apart (1-4 pairs).

    Args:
        bonds: (b, 2) bonded particle indices.
        n_particles: n.
        max_separation: exclude pairs separated by at most this many bonds (3: 1-2, 1-3, 1-4).

    Returns:
        ``(exclusions (e, 2), pairs_14 (p, 2))`` NumPy int arrays with i < j. A pair reachable
        by both 2 and 3 bonds (in a ring) counts by its shortest path, so it is not a 1-4 pair.
    """
    import scipy.sparse as sparse

    bonds = np.asarray(bonds, dtype=np.int64).reshape(-1, 2)
    adjacency = sparse.coo_matrix(
        (np.ones(len(bonds), dtype=np.int64), (bonds[:, 0], bonds[:, 1])), shape=(n_particles,) * 2
    ).tocsr()
    adjacency = ((adjacency + adjacency.T) > 0).astype(np.int64)
    reached = sparse.identity(n_particles, dtype=np.int64, format="csr")
    frontier = reached
    by_separation = {}
    for separation in range(1, max(max_separation, 3) + 1):  # loop over bond counts, not particles
        frontier = ((frontier @ adjacency) > 0).astype(np.int64)
        new = ((frontier - frontier.multiply(reached)) > 0).astype(np.int64)
        by_separation[separation] = sparse.triu(new, k=1).tocoo()
        reached = ((reached + new) > 0).astype(np.int64)
        frontier = new

    def as_pairs(matrix):
        return np.stack([matrix.row, matrix.col], axis=1).astype(np.int32).reshape(-1, 2)

    excluded = [as_pairs(by_separation[s]) for s in range(1, max_separation + 1)]
    exclusions = np.concatenate(excluded, axis=0) if excluded else np.zeros((0, 2), np.int32)
    order = np.lexsort((exclusions[:, 1], exclusions[:, 0]))
    pairs_14 = as_pairs(by_separation[3])
    order14 = np.lexsort((pairs_14[:, 1], pairs_14[:, 0]))
    return exclusions[order], pairs_14[order14]


# ---------------------------------------------------------------------------
# Long-range tail corrections (homogeneous fluid, g(r) = 1 beyond the cutoff)


def lennard_jones_tail_integral(sigma, epsilon, cutoff):
    """∫_{r_c}^∞ u(r) r² dr = 4εσ³[(σ/r_c)⁹/9 − (σ/r_c)³/3] for plain LJ."""
    x3 = (sigma / cutoff) ** 3
    return 4.0 * epsilon * sigma**3 * (x3**3 / 9.0 - x3 / 3.0)


def lennard_jones_tail_virial_integral(sigma, epsilon, cutoff):
    """∫_{r_c}^∞ r u'(r) r² dr = 4εσ³[−(4/3)(σ/r_c)⁹ + 2(σ/r_c)³] for plain LJ."""
    x3 = (sigma / cutoff) ** 3
    return 4.0 * epsilon * sigma**3 * (-4.0 / 3.0 * x3**3 + 2.0 * x3)


def lennard_jones_tail_energy_per_particle(density, cutoff, sigma=1.0, epsilon=1.0):
    """u_tail/N = 2πρ ∫_{r_c}^∞ u r² dr = (8/3)πρεσ³[(1/3)(σ/r_c)⁹ − (σ/r_c)³].

    Allen & Tildesley, *Computer Simulation of Liquids* (1987); Frenkel & Smit,
    *Understanding Molecular Simulation* (2002) [mem for equation numbers]. Reduced
    units: r_c = 2.5, ρ = 0.5 gives −0.26771655.
    """
    return 2.0 * math.pi * density * lennard_jones_tail_integral(sigma, epsilon, cutoff)


def lennard_jones_tail_pressure(density, cutoff, sigma=1.0, epsilon=1.0):
    """P_tail = −(2π/3)ρ² ∫ r u' r² dr = (16/3)πρ²εσ³[(2/3)(σ/r_c)⁹ − (σ/r_c)³]."""
    return -2.0 * math.pi / 3.0 * density**2 * lennard_jones_tail_virial_integral(sigma, epsilon, cutoff)


def lennard_jones_tail_chemical_potential(density, cutoff, sigma=1.0, epsilon=1.0):
    """μ_tail = 2 u_tail/N = (16/3)πρεσ³[(1/3)(σ/r_c)⁹ − (σ/r_c)³] (add to a truncated-LJ μ_ex)."""
    return 2.0 * lennard_jones_tail_energy_per_particle(density, cutoff, sigma, epsilon)


def lennard_jones_mixture_tail_energy(type_counts, sigma_table, epsilon_table, volume, cutoff):
    """Total U_tail = (2π/V) Σ_a Σ_b N_a N_b ∫_{r_c}^∞ u_ab r² dr for a mixture of LJ types.

    ``type_counts`` (t,) may be fractional (e.g. weighted by a coupling parameter).
    """
    counts = jnp.asarray(type_counts, dtype=jnp.result_type(float))
    integral = lennard_jones_tail_integral(jnp.asarray(sigma_table), jnp.asarray(epsilon_table), cutoff)
    return 2.0 * math.pi / volume * counts @ integral @ counts


def lennard_jones_mixture_tail_chemical_potential(type_counts, sigma_table, epsilon_table, volume, cutoff):
    """μ_tail,a = ∂U_tail/∂N_a = (4π/V) Σ_b N_b ∫ u_ab r² dr, one value per type (t,)."""
    counts = jnp.asarray(type_counts, dtype=jnp.result_type(float))
    integral = lennard_jones_tail_integral(jnp.asarray(sigma_table), jnp.asarray(epsilon_table), cutoff)
    return 4.0 * math.pi / volume * integral @ counts


__all__ = [
    "DEFAULT_SOFT_CORE_ALPHA", "LennardJonesParameters", "bonded_exclusions", "coulomb_energy",
    "lennard_jones_energy", "lennard_jones_mixture_tail_chemical_potential",
    "lennard_jones_mixture_tail_energy", "lennard_jones_pair_energy", "lennard_jones_parameters",
    "lennard_jones_tail_chemical_potential", "lennard_jones_tail_energy_per_particle",
    "lennard_jones_tail_integral", "lennard_jones_tail_pressure",
    "lennard_jones_tail_virial_integral", "lennard_jones_type_parameters", "nonbonded_energy",
    "nonbonded_energy_parts", "reaction_field_constants", "scaled_pair_energy",
    "scaled_pair_parameters", "soft_core_lennard_jones_pair_energy", "subset_energy_parts", "subset_pairs",
]
