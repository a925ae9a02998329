"""Assembling terms into one energy model U(x) or, with alchemical coupling, U(x; λ_LJ, s_C).

A *term* is a small ``eqx.Module`` holding its parameters (index arrays, force constants)
and evaluating one pure energy function. An :class:`EnergyModel` is a tuple of terms plus
the periodic box and the unit-system name; it is a pytree, so it can be closed over or
passed through ``jit``.

What a λ path needs:

* ``model.energy(x)`` — the fully coupled energy (``model(x)`` is the same);
* ``model.energy(x, neighbours, lj_coupling=λ_LJ, coulomb_scale=s_C)`` — the energy with
  the alchemical particles of the :class:`Nonbonded` term coupled through soft-core LJ at
  λ_LJ and charges scaled by s_C (both 1 = coupled, 0 = decoupled);
* ``model.components(x, ...)`` — the same split by term name (for reports and TI checks);
* ``model.make_neighbour_list(x)`` — a builder and first list honouring the model's cutoff
  and exclusions (carry the list through ``lax.scan`` and call ``builder.update``).

Example:
    >>> lj = lennard_jones_parameters(jnp.ones(n), jnp.ones(n))
    >>> model = assemble([nonbonded_term(n, lennard_jones=lj, cutoff=2.5,
    ...                                  alchemical=[0])], box=box, units="reduced")
    >>> u = model.energy(x, lj_coupling=0.5)
"""
from __future__ import annotations

import abc
import math
from typing import Callable, Sequence

import equinox as eqx
import jax.numpy as jnp
import numpy as np
from jaxtyping import Array, Bool, Float, Int

from fe_tool import units as unit_module
from fe_tool.energy import bonded, nonbonded, restraints
from fe_tool.energy.box import as_box, box_volume, check_cutoff
from fe_tool.energy.neighbours import NeighbourList, all_pairs, make_neighbour_list

ALL_PAIRS_LIMIT = 5000
"""Above this many particles a Nonbonded term stores no all-pairs table and needs a neighbour list."""


class Term(eqx.Module):
    """One energy term. Subclasses hold parameters and implement ``__call__``."""

    @abc.abstractmethod
    def __call__(self, positions, *, box=None, neighbours=None, lj_coupling=1.0, coulomb_scale=1.0):
        """Energy of this term (scalar) for one configuration."""


class HarmonicBonds(Term):
    """½ k (r − r0)² over ``bonds`` (m, 2); see :func:`~fe_tool.energy.bonded.harmonic_bond_energy`."""

    bonds: Int[Array, "m 2"]
    lengths: Float[Array, " m"]
    force_constants: Float[Array, " m"]
    name: str = eqx.field(static=True, default="bonds")

    def __call__(self, positions, *, box=None, **_):
        return bonded.harmonic_bond_energy(positions, self.bonds, self.lengths, self.force_constants, box)


class HarmonicAngles(Term):
    """½ k (θ − θ0)² over ``angles`` (m, 3), radians."""

    angles: Int[Array, "m 3"]
    equilibrium_angles: Float[Array, " m"]
    force_constants: Float[Array, " m"]
    name: str = eqx.field(static=True, default="angles")

    def __call__(self, positions, *, box=None, **_):
        return bonded.harmonic_angle_energy(
            positions, self.angles, self.equilibrium_angles, self.force_constants, box
        )


class PeriodicTorsions(Term):
    """Σ k_n (1 + cos(nφ − δ_n)) over ``torsions`` (m, 4); parameters (m,) or (m, K)."""

    torsions: Int[Array, "m 4"]
    force_constants: Float[Array, "..."]
    multiplicities: Float[Array, "..."]
    phases: Float[Array, "..."]
    name: str = eqx.field(static=True, default="torsions")

    def __call__(self, positions, *, box=None, **_):
        return bonded.periodic_torsion_energy(
            positions, self.torsions, self.force_constants, self.multiplicities, self.phases, box
        )


class RyckaertBellemansTorsions(Term):
    """Σ C_n cos^n(φ − π) over ``torsions`` (m, 4); ``coefficients`` (m, C) or (C,)."""

    torsions: Int[Array, "m 4"]
    coefficients: Float[Array, "..."]
    name: str = eqx.field(static=True, default="rb_torsions")

    def __call__(self, positions, *, box=None, **_):
        return bonded.ryckaert_bellemans_energy(positions, self.torsions, self.coefficients, box)


class ScaledPairs(Term):
    """Explicit pairs (e.g. 1-4) with plain LJ + Coulomb, parameters already scaled."""

    pairs: Int[Array, "m 2"]
    sigma: Float[Array, " m"]
    epsilon: Float[Array, " m"]
    charge_products: Float[Array, " m"]
    coulomb_constant: float = eqx.field(static=True, default=unit_module.COULOMB_CONSTANT_KJ_NM_PER_MOL_E2)
    dielectric: float = eqx.field(static=True, default=1.0)
    name: str = eqx.field(static=True, default="pairs_14")

    def __call__(self, positions, *, box=None, **_):
        return nonbonded.scaled_pair_energy(
            positions, self.pairs, self.sigma, self.epsilon, self.charge_products, box=box,
            coulomb_constant=self.coulomb_constant, dielectric=self.dielectric,
        )


class PositionRestraints(Term):
    """Harmonic (``radius=None``) or flat-bottom position restraints on ``indices``."""

    indices: Int[Array, " m"]
    reference: Float[Array, "m d"]
    force_constants: Float[Array, "..."]
    radius: Float[Array, "..."] | None = None
    name: str = eqx.field(static=True, default="position_restraints")

    def __call__(self, positions, *, box=None, **_):
        if self.radius is None:
            return restraints.harmonic_position_restraint_energy(
                positions, self.indices, self.reference, self.force_constants, box
            )
        return restraints.flat_bottom_position_restraint_energy(
            positions, self.indices, self.reference, self.radius, self.force_constants, box
        )


class DistanceRestraints(Term):
    """Flat-bottom distance restraints (harmonic when ``lower == upper``)."""

    pairs: Int[Array, "m 2"]
    lower: Float[Array, " m"]
    upper: Float[Array, " m"]
    force_constants: Float[Array, " m"]
    name: str = eqx.field(static=True, default="distance_restraints")

    def __call__(self, positions, *, box=None, **_):
        return restraints.flat_bottom_distance_restraint_energy(
            positions, self.pairs, self.lower, self.upper, self.force_constants, box
        )


class ExternalField(Term):
    """Any pure function ``function(x) -> scalar`` (e.g. a field from :mod:`fe_tool.energy.fields`).

    Wrap parameters with ``functools.partial``; the function is a static field, so it
    must be hashable (plain functions and partials are).
    """

    function: Callable = eqx.field(static=True)
    name: str = eqx.field(static=True, default="field")

    def __call__(self, positions, **_):
        return self.function(positions)


class Nonbonded(Term):
    """LJ + Coulomb over non-excluded pairs, with optional alchemical coupling and LJ tail.

    Build with :func:`nonbonded_term`. The tail correction, if present, is the constant
    U_tail(λ) = T_env + λ_LJ T_cross + c T_internal (c = 1 when decoupling, λ_LJ when
    annihilating), linear in λ_LJ and exact at both end states. With T_ab = (2π/V) Σ N_a N_b
    ∫_{r_c}^∞ u_ab r² dr, T_env = T(env, env), T_cross = 2 T(group, env) and
    T_internal = T(group, group), so the coupled state has the textbook N² form
    (Allen & Tildesley 1987; docs/references.md §9e). For one alchemical particle, coupled − decoupled tail =
    (4π/V) N_env ∫ u r² dr = μ_tail at the environment density.
    """

    lennard_jones: nonbonded.LennardJonesParameters | None
    charges: Float[Array, " n"] | None
    alchemical: Bool[Array, " n"] | None
    exclusions: Int[Array, "e 2"]
    pair_table: Int[Array, "m 2"] | None
    tail: Float[Array, " 3"] | None
    n_particles: int = eqx.field(static=True)
    cutoff: float | None = eqx.field(static=True, default=None)
    lj_shift: bool = eqx.field(static=True, default=False)
    reaction_field_dielectric: float | None = eqx.field(static=True, default=None)
    dielectric: float = eqx.field(static=True, default=1.0)
    coulomb_constant: float = eqx.field(static=True, default=unit_module.COULOMB_CONSTANT_KJ_NM_PER_MOL_E2)
    soft_core_alpha: float = eqx.field(static=True, default=nonbonded.DEFAULT_SOFT_CORE_ALPHA)
    coulomb_soft_core_alpha: float = eqx.field(static=True, default=0.0)
    decouple_internal: bool = eqx.field(static=True, default=True)
    tail_volume: float | None = eqx.field(static=True, default=None)
    name: str = eqx.field(static=True, default="nonbonded")

    def parts(self, positions, *, box=None, neighbours=None, lj_coupling=1.0, coulomb_scale=1.0):
        """``{"lennard_jones": ..., "coulomb": ..., "lj_tail": ...}`` for this term."""
        if neighbours is None:
            if self.pair_table is None:
                raise ValueError(
                    f"this Nonbonded term has {self.n_particles} particles (> {ALL_PAIRS_LIMIT}) "
                    "and keeps no all-pairs table; pass a neighbour list (model.make_neighbour_list)."
                )
            pairs = self.pair_table
        else:
            pairs = neighbours
        out = nonbonded.nonbonded_energy_parts(positions, pairs=pairs, box=box, lj_coupling=lj_coupling,
                                               coulomb_scale=coulomb_scale, **self.pair_settings())
        if self.tail is not None:
            out["lj_tail"] = self.tail_energy(lj_coupling)
        return out

    def pair_settings(self) -> dict:
        """The keyword arguments of :func:`~fe_tool.energy.nonbonded.nonbonded_energy_parts` this
        term fixes (all but positions, pairs, box and the two couplings)."""
        return dict(lennard_jones=self.lennard_jones, charges=self.charges, cutoff=self.cutoff,
                    lj_shift=self.lj_shift, reaction_field_dielectric=self.reaction_field_dielectric,
                    dielectric=self.dielectric, coulomb_constant=self.coulomb_constant,
                    alchemical=self.alchemical, soft_core_alpha=self.soft_core_alpha,
                    coulomb_soft_core_alpha=self.coulomb_soft_core_alpha,
                    decouple_internal=self.decouple_internal)

    def tail_energy(self, lj_coupling=1.0):
        """The LJ tail correction at ``lj_coupling`` (0 without one); see the class docstring."""
        if self.tail is None:
            return jnp.zeros(())
        internal = 1.0 if self.decouple_internal else lj_coupling
        return self.tail[0] + lj_coupling * self.tail[1] + internal * self.tail[2]

    def __call__(self, positions, **context):
        return sum(self.parts(positions, **context).values())


def nonbonded_term(
    n_particles: int,
    *,
    lennard_jones: nonbonded.LennardJonesParameters | None = None,
    charges=None,
    exclusions=None,
    cutoff: float | None = None,
    lj_shift: bool = False,
    reaction_field_dielectric: float | None = None,
    dielectric: float = 1.0,
    coulomb_constant: float | None = None,
    units: str = "kJ/mol-nm-K",
    alchemical=None,
    soft_core_alpha: float = nonbonded.DEFAULT_SOFT_CORE_ALPHA,
    coulomb_soft_core_alpha: float = 0.0,
    decouple_internal: bool = True,
    tail_correction_box=None,
    name: str = "nonbonded",
) -> Nonbonded:
    """Make a :class:`Nonbonded` term (host side; validates and precomputes pair tables).

    Args:
        n_particles: n.
        lennard_jones: LJ parameters or ``None``.
        charges: (n,) charges or ``None``.
        exclusions: (e, 2) excluded pairs (e.g. from :func:`~fe_tool.energy.nonbonded.bonded_exclusions`).
        cutoff, lj_shift, reaction_field_dielectric, dielectric: see
            :func:`~fe_tool.energy.nonbonded.nonbonded_energy_parts`.
        coulomb_constant: f; default from the unit system ``units``.
        alchemical: indices (k,) or a boolean mask (n,) of the particles to decouple.
        soft_core_alpha, coulomb_soft_core_alpha, decouple_internal: alchemical settings.
        tail_correction_box: the periodic box; if given, add the analytic LJ tail
            correction for that volume (requires a cutoff and no shift).
    """
    if lennard_jones is None and charges is None:
        raise ValueError("a Nonbonded term needs lennard_jones parameters, charges, or both.")
    if lennard_jones is not None and lennard_jones.types is None and lennard_jones.sigma.shape != (n_particles,):
        raise ValueError(
            f"lennard_jones has {lennard_jones.sigma.shape[0]} particles; expected {n_particles}."
        )
    if coulomb_constant is None:
        coulomb_constant = unit_module.unit_system(units).coulomb_constant
    if charges is not None:
        charges = jnp.asarray(charges, dtype=jnp.result_type(float))
        if charges.shape != (n_particles,):
            raise ValueError(f"charges must have shape ({n_particles},); got {charges.shape}.")
    mask = None
    if alchemical is not None:
        alchemical_np = np.asarray(alchemical)
        if alchemical_np.dtype == bool:
            if alchemical_np.shape != (n_particles,):
                raise ValueError(f"an alchemical mask must have shape ({n_particles},).")
            mask_np = alchemical_np
        else:
            mask_np = np.zeros(n_particles, dtype=bool)
            mask_np[alchemical_np.astype(int).reshape(-1)] = True
        mask = jnp.asarray(mask_np)
    exclusions_np = np.zeros((0, 2), np.int32) if exclusions is None else np.asarray(exclusions, np.int32).reshape(-1, 2)
    pair_table = None
    if n_particles <= ALL_PAIRS_LIMIT:
        pair_table = jnp.asarray(all_pairs(n_particles, exclusions_np))

    tail, tail_volume = None, None
    if tail_correction_box is not None:
        if lennard_jones is None or cutoff is None:
            raise ValueError("the LJ tail correction needs lennard_jones parameters and a cutoff.")
        if lj_shift:
            raise ValueError(
                "the analytic tail correction is for a truncated (unshifted) LJ potential; "
                "set lj_shift=False or drop tail_correction_box."
            )
        box = as_box(tail_correction_box)
        check_cutoff(box, cutoff)
        tail_volume = float(box_volume(box))
        types, sigma_table, epsilon_table = lennard_jones.type_tables()
        n_types = sigma_table.shape[0]
        is_alchemical = np.zeros(n_particles, bool) if mask is None else np.asarray(mask)
        environment = np.bincount(types[~is_alchemical], minlength=n_types)
        group = np.bincount(types[is_alchemical], minlength=n_types)

        integral = np.asarray(nonbonded.lennard_jones_tail_integral(sigma_table, epsilon_table, cutoff))

        def tail_energy(a, b):
            # (2π/V) Σ_ab N_a N_b ∫ u_ab r² dr, evaluated on the host once.
            return float(2.0 * math.pi / tail_volume * a @ integral @ b)

        tail = jnp.asarray([
            tail_energy(environment, environment),
            2.0 * tail_energy(group, environment),
            tail_energy(group, group),
        ])
    return Nonbonded(
        lennard_jones=lennard_jones, charges=charges, alchemical=mask,
        exclusions=jnp.asarray(exclusions_np), pair_table=pair_table, tail=tail,
        n_particles=int(n_particles), cutoff=None if cutoff is None else float(cutoff),
        lj_shift=bool(lj_shift),
        reaction_field_dielectric=(None if reaction_field_dielectric is None
                                   else float(reaction_field_dielectric)),
        dielectric=float(dielectric), coulomb_constant=float(coulomb_constant),
        soft_core_alpha=float(soft_core_alpha),
        coulomb_soft_core_alpha=float(coulomb_soft_core_alpha),
        decouple_internal=bool(decouple_internal), tail_volume=tail_volume, name=name,
    )


class EnergyModel(eqx.Module):
    """A sum of terms in a (possibly periodic) box, in a named unit system.

    Attributes:
        terms: the terms, each with a distinct ``name``.
        box: periodic box edge lengths, or ``None``.
        units: unit-system name (``"kJ/mol-nm-K"``, ``"kcal/mol-nm-K"`` or ``"reduced"``), see :mod:`fe_tool.units`.
    """

    terms: tuple[Term, ...]
    box: Float[Array, " d"] | None
    units: str = eqx.field(static=True, default="kJ/mol-nm-K")

    def components(
        self, positions, neighbours: NeighbourList | None = None, *, lj_coupling=1.0, coulomb_scale=1.0
    ) -> dict[str, Float[Array, ""]]:
        """Energy of every term, by name (a Nonbonded term is split into its parts)."""
        context = dict(box=self.box, neighbours=neighbours, lj_coupling=lj_coupling,
                       coulomb_scale=coulomb_scale)
        out = {}
        for term in self.terms:  # a handful of terms, unrolled at trace time
            if isinstance(term, Nonbonded):
                for part, value in term.parts(positions, **context).items():
                    out[f"{term.name}.{part}"] = value
            else:
                out[term.name] = term(positions, **context)
        return out

    def energy(
        self, positions, neighbours: NeighbourList | None = None, *, lj_coupling=1.0, coulomb_scale=1.0
    ) -> Float[Array, ""]:
        """Total energy U(x; λ_LJ, s_C) in the model's energy unit."""
        values = self.components(positions, neighbours, lj_coupling=lj_coupling,
                                 coulomb_scale=coulomb_scale).values()
        return sum(values, jnp.zeros((), dtype=jnp.result_type(float)))

    def __call__(self, positions, neighbours: NeighbourList | None = None) -> Float[Array, ""]:
        return self.energy(positions, neighbours)

    @property
    def nonbonded(self) -> Nonbonded | None:
        """The model's Nonbonded term, if it has one."""
        found = [term for term in self.terms if isinstance(term, Nonbonded)]
        return found[0] if found else None

    @property
    def is_alchemical(self) -> bool:
        term = self.nonbonded
        return term is not None and term.alchemical is not None

    def make_neighbour_list(self, positions, skin: float = 0.3, *, capacity_factor: float = 1.3,
                            method: str = "auto"):
        """``(builder, neighbours)`` for the Nonbonded term's cutoff and exclusions (host side)."""
        term = self.nonbonded
        if term is None or term.cutoff is None:
            raise ValueError("a neighbour list needs a Nonbonded term with a cutoff.")
        return make_neighbour_list(
            positions, self.box, term.cutoff, skin, capacity_factor=capacity_factor,
            exclusions=np.asarray(term.exclusions), method=method,
        )


def assemble(terms: Sequence[Term], *, box=None, units: str = "kJ/mol-nm-K", dimension: int = 3) -> EnergyModel:
    """Combine terms into an :class:`EnergyModel` (host side; checks names, box and cutoffs)."""
    terms = tuple(terms)
    if not terms:
        raise ValueError("assemble needs at least one term.")
    for term in terms:
        if not isinstance(term, Term):
            raise ValueError(
                f"{term!r} is not a Term; wrap plain functions as ExternalField(function)."
            )
    names = [term.name for term in terms]
    if len(set(names)) != len(names):
        raise ValueError(f"term names must be distinct; got {names}. Pass name=... to repeat a kind.")
    if sum(isinstance(term, Nonbonded) for term in terms) > 1:
        raise ValueError("use one Nonbonded term per model (its pairs and exclusions are shared).")
    unit_module.unit_system(units)  # validates the name
    box = as_box(box, dimension)
    for term in terms:
        if isinstance(term, Nonbonded):
            if box is not None and term.cutoff is None:
                raise ValueError("a periodic model needs a cutoff on its Nonbonded term.")
            check_cutoff(box, term.cutoff)
            if term.tail_volume is not None:
                if box is None or not math.isclose(float(box_volume(box)), term.tail_volume, rel_tol=1e-12):
                    raise ValueError("the Nonbonded tail correction was computed for a different box.")
    return EnergyModel(terms=terms, box=box, units=units)


def energy_function(model: EnergyModel, neighbours: NeighbourList | None = None) -> Callable:
    """``energy(x) -> scalar``: the fully coupled model as a plain closure."""

    def energy(positions):
        return model.energy(positions, neighbours)

    return energy


def alchemical_energy_function(model: EnergyModel) -> Callable:
    """``energy(x, lj_coupling, coulomb_scale, neighbours=None) -> scalar`` for λ paths."""
    if not model.is_alchemical:
        raise ValueError("the model has no alchemical particles (nonbonded_term(..., alchemical=...)).")

    def energy(positions, lj_coupling, coulomb_scale, neighbours=None):
        return model.energy(positions, neighbours, lj_coupling=lj_coupling, coulomb_scale=coulomb_scale)

    return energy


__all__ = [
    "ALL_PAIRS_LIMIT", "DistanceRestraints", "EnergyModel", "ExternalField", "HarmonicAngles",
    "HarmonicBonds", "Nonbonded", "PeriodicTorsions", "PositionRestraints",
    "RyckaertBellemansTorsions", "ScaledPairs", "Term", "alchemical_energy_function", "assemble",
    "energy_function", "nonbonded_term",
]
