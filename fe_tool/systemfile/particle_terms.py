"""Energy terms of the particle layout: bonded groups, restraints and the ``[nonbonded]`` table.

See docs/system-files.md, "Particle files", for the keys and the functional form of every term.
"""
from __future__ import annotations

from typing import Any, Callable

import jax.numpy as jnp
import numpy as np

from .reader import (SystemFileError, boolean, check_keys, choice, fail, integer_rows, move_old_key, number,
                     numeric_array, per_row, vector)

GROUP_STATES = ("both", "a", "b")
TORSION_FORMS = ("ryckaert_bellemans", "periodic")
RESTRAINT_FORMS = ("position", "distance")


# ------------------------------------------------------------------ bonded groups and restraints

class Group:
    """One named bonded/restraint group: its spec, the builder and its end-state membership."""

    def __init__(self, kind: str, spec: dict, where: str, build: Callable[[dict, str], Any]):
        self.kind, self.spec, self.where, self.build = kind, spec, where, build
        self.name = spec.get("name", where.replace("[", "_").replace("]", "").replace(".", "_"))
        if not isinstance(self.name, str):
            fail(f"{where}.name", "a string", self.name)
        self.state = choice(spec, "state", where, GROUP_STATES, "both")
        self.term_a = build(spec, where)
        self.term_b = None


def group_list(table: Any, key: str) -> list[dict]:
    if not isinstance(table, list) or not all(isinstance(t, dict) for t in table):
        fail(key, f"an array of tables ([[{key}]] entries)", table)
    return table


def bonds_builder(n: int):
    from ..energy import HarmonicBonds

    def build(spec, where):
        check_keys(spec, {"atoms", "length", "force_constant", "name", "state"}, where)
        atoms = integer_rows(spec.get("atoms"), f"{where}.atoms", 2, n)
        lengths = per_row(spec, "length", where, len(atoms), True)
        return HarmonicBonds(bonds=jnp.asarray(atoms), lengths=jnp.asarray(lengths),
                             force_constants=jnp.asarray(per_row(spec, "force_constant", where, len(atoms))),
                             name=spec.get("name", where))
    return build


def angles_builder(n: int):
    from ..energy import HarmonicAngles

    def build(spec, where):
        check_keys(spec, {"atoms", "angle", "force_constant", "name", "state"}, where)
        atoms = integer_rows(spec.get("atoms"), f"{where}.atoms", 3, n)
        angle = per_row(spec, "angle", where, len(atoms))
        if np.any((angle <= 0) | (angle > 180)):
            fail(f"{where}.angle", "equilibrium angles in degrees, in (0, 180]", spec.get("angle"))
        return HarmonicAngles(angles=jnp.asarray(atoms), equilibrium_angles=jnp.asarray(np.radians(angle)),
                              force_constants=jnp.asarray(per_row(spec, "force_constant", where, len(atoms))),
                              name=spec.get("name", where))
    return build


def torsions_builder(n: int):
    from ..energy import PeriodicTorsions, RyckaertBellemansTorsions

    def build(spec, where):
        form = choice(spec, "form", where, TORSION_FORMS)
        atoms = integer_rows(spec.get("atoms"), f"{where}.atoms", 4, n)
        name = spec.get("name", where)
        if form == "ryckaert_bellemans":
            check_keys(spec, {"atoms", "form", "coefficients", "name", "state"}, where)
            coefficients = vector(spec, "coefficients", where)
            if not 1 <= coefficients.size <= 8:
                fail(f"{where}.coefficients", "1 to 8 coefficients C0, C1, … (energy units)",
                     spec.get("coefficients"))
            return RyckaertBellemansTorsions(torsions=jnp.asarray(atoms), coefficients=jnp.asarray(coefficients),
                                             name=name)
        check_keys(spec, {"atoms", "form", "force_constants", "multiplicities", "phases", "name", "state"}, where)
        k = vector(spec, "force_constants", where)
        m = vector(spec, "multiplicities", where, k.size)
        if np.any(m != np.round(m)) or np.any(m < 1):
            fail(f"{where}.multiplicities", "positive whole numbers", spec.get("multiplicities"))
        phases = vector(spec, "phases", where, k.size, default=np.zeros(k.size))
        rows = len(atoms)
        return PeriodicTorsions(torsions=jnp.asarray(atoms), force_constants=jnp.asarray(np.tile(k, (rows, 1))),
                                multiplicities=jnp.asarray(np.tile(m, (rows, 1))),
                                phases=jnp.asarray(np.tile(np.radians(phases), (rows, 1))), name=name)
    return build


def _position_restraint(spec: dict, where: str, n: int, positions: np.ndarray):
    from ..energy import PositionRestraints

    check_keys(spec, {"form", "atoms", "reference", "force_constant", "radius", "name", "state"}, where)
    atoms = integer_rows(spec.get("atoms"), f"{where}.atoms", 1, n)[:, 0]
    if "reference" in spec:
        reference = numeric_array(spec["reference"], f"{where}.reference", f"{len(atoms)} rows of [x, y, z]")
        if reference.size != 3 * len(atoms):
            fail(f"{where}.reference", f"{len(atoms)} rows of [x, y, z]", spec["reference"])
        reference = reference.reshape(len(atoms), 3)
    else:
        reference = positions[atoms]
    k = per_row(spec, "force_constant", where, len(atoms), positive=True)
    radius = None if "radius" not in spec else jnp.asarray(per_row(spec, "radius", where, len(atoms)))
    return PositionRestraints(indices=jnp.asarray(atoms), reference=jnp.asarray(reference),
                              force_constants=jnp.asarray(k), radius=radius, name=spec.get("name", where))


def _distance_restraint(spec: dict, where: str, n: int):
    from ..energy import DistanceRestraints

    check_keys(spec, {"form", "atoms", "target", "lower", "upper", "force_constant", "name", "state"}, where)
    atoms = integer_rows(spec.get("atoms"), f"{where}.atoms", 2, n)
    if "target" in spec:
        both = sorted({"lower", "upper"} & set(spec))
        if both:
            fail(f"{where}.{both[0]}", "no lower/upper together with target (target = r0 is a harmonic restraint; "
                 "lower and upper give a flat bottom)", spec[both[0]])
        lower = upper = per_row(spec, "target", where, len(atoms))
    else:
        lower = per_row(spec, "lower", where, len(atoms))
        upper = per_row(spec, "upper", where, len(atoms))
        if np.any(lower > upper):
            fail(f"{where}.upper", "upper ≥ lower in every row", spec["upper"])
    return DistanceRestraints(pairs=jnp.asarray(atoms), lower=jnp.asarray(lower), upper=jnp.asarray(upper),
                              force_constants=jnp.asarray(per_row(spec, "force_constant", where, len(atoms), True)),
                              name=spec.get("name", where))


def restraints_builder(n: int, positions: np.ndarray):
    def build(spec, where):
        form = choice(spec, "form", where, RESTRAINT_FORMS)
        if form == "position":
            return _position_restraint(spec, where, n, positions)
        return _distance_restraint(spec, where, n)
    return build


# ------------------------------------------------------------------ [nonbonded] and [types]

NONBONDED_KEYS = {"cutoff", "shift", "tail_correction", "reaction_field", "relative_permittivity", "mixing",
                  "exclude_bonded", "three_bonds_apart", "exclusions", "soft_core_alpha", "pair_search",
                  "neighbour_capacity"}
OLD_NONBONDED_KEYS = {  # old name -> where it lives now (read with a FutureWarning)
    "reaction_field_dielectric": ("reaction_field", "outer_permittivity"),
    "dielectric": ("relative_permittivity",),
    "scale_14_lj": ("three_bonds_apart", "lj_weight"),
    "scale_14_coulomb": ("three_bonds_apart", "coulomb_weight"),
}


def _nonbonded_table(data: dict, source: str) -> dict:
    """The [nonbonded] table with old key names moved to their new places (a copy)."""
    table = data["nonbonded"]
    if not isinstance(table, dict):
        fail("nonbonded", "a table of nonbonded settings", table)
    table = {k: (dict(v) if isinstance(v, dict) else v) for k, v in table.items()}
    for old, new in OLD_NONBONDED_KEYS.items():
        move_old_key(table, old, new, "nonbonded", source)
    check_keys(table, NONBONDED_KEYS, "nonbonded")
    return table


def _type_parameters(data: dict, types: list[str]) -> tuple[list[str], np.ndarray, np.ndarray, np.ndarray]:
    """Type names (sorted) and their σ, ε, charge from the [types.NAME] tables."""
    type_table = data.get("types")
    if not isinstance(type_table, dict) or not type_table:
        fail("types", "a table of per-type parameters, e.g. [types.Ar] sigma = …, epsilon = …, charge = …",
             type_table)
    names = sorted(type_table)
    for t in sorted(set(types)):
        if t not in type_table:
            fail(f"types.{t}", f"parameters for particle type {t!r} (sigma, epsilon, charge)", None)
    sigma, epsilon, charge = [], [], []
    for t in names:
        spec = type_table[t]
        if not isinstance(spec, dict):
            fail(f"types.{t}", "a table with sigma, epsilon and charge", spec)
        check_keys(spec, {"sigma", "epsilon", "charge"}, f"types.{t}")
        sigma.append(number(spec, "sigma", f"types.{t}", positive=True))
        eps = number(spec, "epsilon", f"types.{t}")
        if eps < 0:
            fail(f"types.{t}.epsilon", "a number ≥ 0", eps)
        epsilon.append(eps)
        charge.append(number(spec, "charge", f"types.{t}", default=0.0))
    return names, np.asarray(sigma), np.asarray(epsilon), np.asarray(charge)


def _lennard_jones(table: dict, types: list[str], names: list[str], s: np.ndarray, e: np.ndarray):
    """Per-type-pair LJ parameters combined by the mixing rule, and each particle's type index."""
    from ..energy import lennard_jones_type_parameters
    from ..energy.nonbonded import MIXING_RULES

    index = {t: i for i, t in enumerate(names)}
    type_of = np.asarray([index[t] for t in types], dtype=np.int32)
    mixing = choice(table, "mixing", "nonbonded", MIXING_RULES, "lorentz-berthelot")
    sigma_table = np.sqrt(np.outer(s, s)) if mixing == "geometric" else 0.5 * (s[:, None] + s[None, :])
    return lennard_jones_type_parameters(type_of, sigma_table, np.sqrt(np.outer(e, e))), type_of


def _cutoff_shift_tail(table: dict, box) -> tuple[float | None, bool, bool]:
    where = "nonbonded"
    cutoff = number(table, "cutoff", where, default=float("nan"))
    cutoff = None if np.isnan(cutoff) else cutoff
    if cutoff is not None and cutoff <= 0:
        fail(f"{where}.cutoff", "a positive length", cutoff)
    if box is not None and cutoff is None:
        fail(f"{where}.cutoff", "a cutoff (length) at most half the shortest box edge: the box is periodic", None)
    if box is not None and cutoff > 0.5 * float(np.min(box)) * (1 + 1e-12):
        fail(f"{where}.cutoff", f"at most half the shortest box edge ({0.5 * float(np.min(box)):g})", cutoff)
    shift = boolean(table, "shift", where, False)
    tail = boolean(table, "tail_correction", where, False)
    if tail and (box is None or shift):
        fail(f"{where}.tail_correction", "false unless the box is periodic and shift = false "
             "(the analytic tail is for a truncated, unshifted LJ fluid)", True)
    return cutoff, shift, tail


def _reaction_field(table: dict, cutoff: float | None) -> float | None:
    """The outer medium's relative permittivity of a reaction field (inf: conducting), or None."""
    if "reaction_field" not in table:
        return None
    where = "nonbonded.reaction_field"
    field = table["reaction_field"]
    if not isinstance(field, dict):
        fail(where, "a table such as reaction_field = { outer_permittivity = 78.0 }", field)
    check_keys(field, {"outer_permittivity"}, where)
    outer = field.get("outer_permittivity")
    conducting = isinstance(outer, float) and np.isinf(outer) and outer > 0  # TOML `inf`: a conducting boundary
    outer = float("inf") if conducting else number(field, "outer_permittivity", where, positive=True)
    if cutoff is None:
        fail(f"{where}", "a cutoff as well (a reaction field acts beyond the cutoff)", field)
    return outer


def _exclusions(table: dict, bonds: np.ndarray, n: int) -> tuple[np.ndarray | None, np.ndarray, int]:
    """Excluded pairs (from bonds and ``exclusions``), the pairs three bonds apart, the separation."""
    from ..energy import bonded_exclusions

    separation = table.get("exclude_bonded", 3)
    if not isinstance(separation, int) or isinstance(separation, bool) or separation not in (0, 1, 2, 3):
        fail("nonbonded.exclude_bonded", "0, 1, 2 or 3 (exclude pairs up to this many bonds apart)", separation)
    excluded = [np.zeros((0, 2), np.int32)]
    pairs_14 = np.zeros((0, 2), np.int32)
    if separation and len(bonds):
        ex, pairs_14 = bonded_exclusions(bonds, n, separation)
        excluded.append(ex)
    if "exclusions" in table:
        excluded.append(np.sort(integer_rows(table["exclusions"], "nonbonded.exclusions", 2, n), axis=1))
    exclusions = np.unique(np.concatenate(excluded), axis=0) if sum(len(x) for x in excluded) else None
    return exclusions, pairs_14, separation


def _three_bonds_apart(table: dict, separation: int) -> tuple[float, float]:
    """(LJ weight, Coulomb weight) of the pairs three bonds apart (0, 0: they stay excluded)."""
    where = "nonbonded.three_bonds_apart"
    weights = table.get("three_bonds_apart", {})
    if not isinstance(weights, dict):
        fail(where, "a table such as three_bonds_apart = { lj_weight = 0.5, coulomb_weight = 0.8 }", weights)
    check_keys(weights, {"lj_weight", "coulomb_weight"}, where)
    lj = number(weights, "lj_weight", where, default=0.0)
    coulomb = number(weights, "coulomb_weight", where, default=0.0)
    if (lj or coulomb) and separation != 3:
        fail(where, "no nonzero weight unless exclude_bonded = 3 (these pairs are added back after being "
             "excluded)", separation)
    return lj, coulomb


def _pair_search(table: dict) -> tuple[str, int | None]:
    pair_search = choice(table, "pair_search", "nonbonded", ("all_pairs", "neighbour_list"), "all_pairs")
    capacity = table.get("neighbour_capacity")
    if capacity is not None and (not isinstance(capacity, int) or isinstance(capacity, bool) or capacity < 1):
        fail("nonbonded.neighbour_capacity", "a positive whole number of pairs", capacity)
    return pair_search, capacity


def _three_bonds_apart_term(pairs_14, lj, charges, weights, unit_system: str, permittivity: float) -> list:
    """The pairs three bonds apart, added back with their weights (an empty list when there are none)."""
    from ..energy import ScaledPairs
    from ..energy.nonbonded import scaled_pair_parameters
    from ..units import unit_system as get_unit_system

    if not (weights[0] or weights[1]) or not len(pairs_14):
        return []
    ps, pe, pq = scaled_pair_parameters(pairs_14, lj, charges, weights[0], weights[1])
    return [ScaledPairs(pairs=jnp.asarray(pairs_14), sigma=ps, epsilon=pe, charge_products=pq,
                        coulomb_constant=get_unit_system(unit_system).coulomb_constant,
                        dielectric=permittivity, name="pairs_14")]


def nonbonded(data: dict, types: list[str], n: int, unit_system: str, box, bonds: np.ndarray, decouple,
              source: str = "<dict>"):
    """The Nonbonded term, the three-bonds-apart pair term (if any) and a summary for reports."""
    from ..energy import nonbonded_term

    table = _nonbonded_table(data, source)
    names, s, e, charge = _type_parameters(data, types)
    lj, type_of = _lennard_jones(table, types, names, s, e)
    charges = charge[type_of]
    cutoff, shift, tail = _cutoff_shift_tail(table, box)
    outer = _reaction_field(table, cutoff)
    permittivity = number(table, "relative_permittivity", "nonbonded", default=1.0, positive=True)
    exclusions, pairs_14, separation = _exclusions(table, bonds, n)
    weights = _three_bonds_apart(table, separation)
    alpha = number(table, "soft_core_alpha", "nonbonded", default=0.5, positive=True)
    pair_search, capacity = _pair_search(table)
    has_lj, has_charge = bool(np.any(e > 0)), bool(np.any(charges != 0))
    if not (has_lj or has_charge):
        fail("types", "at least one type with epsilon > 0 or a charge (else drop [nonbonded])", data["types"])
    term = nonbonded_term(
        n, lennard_jones=lj if has_lj else None, charges=charges if has_charge else None, exclusions=exclusions,
        cutoff=cutoff, lj_shift=shift, reaction_field_dielectric=outer, dielectric=permittivity, units=unit_system,
        alchemical=decouple, soft_core_alpha=alpha, tail_correction_box=box if tail else None)
    extra = _three_bonds_apart_term(pairs_14, lj, charges, weights, unit_system, permittivity)
    info = {"types": names, "cutoff": cutoff, "shift": shift, "tail_correction": tail, "outer_permittivity": outer,
            "pair_search": pair_search, "neighbour_capacity": capacity, "charged": has_charge}
    return term, extra, info


def check_no_types_without_nonbonded(data: dict) -> None:
    if "types" in data:
        fail("types", "no [types] without a [nonbonded] table (types only carry nonbonded parameters)", data["types"])


__all__ = ["Group", "SystemFileError", "angles_builder", "bonds_builder", "check_no_types_without_nonbonded",
           "group_list", "nonbonded", "restraints_builder", "torsions_builder"]
