"""The particle layout: particles in open space or a periodic box; state B described as a change of A.

See docs/system-files.md, "Particle files". State A is the system as written; ``[change]`` says
how B differs, and :mod:`fe_tool.alchemy` builds the λ path between them.
"""
from __future__ import annotations

import pathlib

import numpy as np

from ..filesafety import resolve_inside
from . import particle_terms as terms
from .reader import (TYPE_NAME, SystemFileError, check_keys, choice, fail, integer_rows, number, numeric_array,
                     read_kT, read_units, read_xyz, table_of, vector)
from .settings import data_folder, name_and_description, reference_and_settings
from .system import System

TOP_KEYS = {"name", "description", "units", "kT", "temperature", "particles", "box", "types",
            "nonbonded", "topology", "restraints", "change", "reference", "settings"}
UNIT_SYSTEMS = {"kJ/mol": "kJ/mol-nm-K", "kcal/mol": "kcal/mol-nm-K", "reduced": "reduced"}
"""The file's ``units`` -> the unit system of :mod:`fe_tool.units` (lengths in nm, charges in e, T in K)."""


# ------------------------------------------------------------------ particles, starts, box

def _particles(data: dict, folder: pathlib.Path, allow_outside_files: bool) -> tuple[list[str], np.ndarray]:
    table = data["particles"]
    if not isinstance(table, dict):
        fail("particles", "a table with 'file' (XYZ) or 'types' and 'positions'", table)
    check_keys(table, {"file", "types", "positions", "starts"}, "particles")
    if "file" in table:
        if "positions" in table or "types" in table:
            fail("particles", "either 'file' or inline 'types' and 'positions', not both", sorted(table))
        if not isinstance(table["file"], str):
            fail("particles.file", "a file name (string)", table["file"])
        target = resolve_inside(folder, table["file"], allow_outside=allow_outside_files, error=SystemFileError,
                                what="particles.file")
        return read_xyz(target)
    for key in ("types", "positions"):
        if key not in table:
            fail(f"particles.{key}", "a list (this key is required without 'file')", None)
    types = table["types"]
    if not isinstance(types, list) or not types or not all(isinstance(t, str) and TYPE_NAME.fullmatch(t)
                                                           for t in types):
        fail("particles.types", "a list of type names (short plain words: letters, digits, _ + -)", types)
    positions = numeric_array(table["positions"], "particles.positions", "a list of [x, y, z] rows")
    if positions.shape != (len(types), 3) or not np.all(np.isfinite(positions)):
        fail("particles.positions", f"{len(types)} rows of [x, y, z] (one per entry of particles.types)",
             table["positions"])
    return list(types), positions


def _start_set(data: dict, n: int) -> np.ndarray | None:
    """``[particles] starts``: k ≥ 1 start configurations of n rows [x, y, z] each, or ``None``."""
    table = data["particles"]
    if "starts" not in table:
        return None
    value = table["starts"]
    expected = (f"a list of start configurations, each a list of {n} rows [x, y, z] (one per particle), "
                "e.g. starts = [[[x, y, z], ...], [[x, y, z], ...]]")
    if not isinstance(value, list) or not value:
        fail("particles.starts", expected, value)
    arr = numeric_array(value, "particles.starts", expected)
    if arr.ndim != 3 or arr.shape[1:] != (n, 3):
        fail("particles.starts", expected + f"; got an array of shape {arr.shape}", value)
    if not np.all(np.isfinite(arr)):
        fail("particles.starts", "finite coordinates", value)
    return arr


def _box(data: dict) -> np.ndarray | None:
    """The edges of the orthorhombic periodic box, or None for open space."""
    if "box" not in data:
        return None
    table = data["box"]
    if not isinstance(table, dict):
        fail("box", "a table with edges = [Lx, Ly, Lz] (orthorhombic, periodic)", table)
    check_keys(table, {"edges"}, "box")
    if isinstance(table.get("edges"), (int, float)):
        return np.full(3, number(table, "edges", "box", positive=True))
    return vector(table, "edges", "box", 3, positive=True)


# ------------------------------------------------------------------ groups and the change from A to B

def _groups(data: dict, n: int, positions: np.ndarray) -> list[terms.Group]:
    """Every bonded group and restraint, each with its state-A term built."""
    topology = table_of(data, "topology", "a table with [[topology.bonds]], [[topology.angles]], [[topology.torsions]]")
    check_keys(topology, {"bonds", "angles", "torsions"}, "topology")
    groups: list[terms.Group] = []
    builders = {"bonds": terms.bonds_builder(n), "angles": terms.angles_builder(n),
                "torsions": terms.torsions_builder(n)}
    for kind in ("bonds", "angles", "torsions"):
        for i, spec in enumerate(terms.group_list(topology.get(kind, []), f"topology.{kind}")):
            groups.append(terms.Group(kind, spec, f"topology.{kind}[{i}]", builders[kind]))
    for i, spec in enumerate(terms.group_list(data.get("restraints", []), "restraints")):
        groups.append(terms.Group("restraints", spec, f"restraints[{i}]", terms.restraints_builder(n, positions)))
    names = [g.name for g in groups]
    clashes = [g.where for g in groups if names.count(g.name) > 1]
    if clashes:
        raise SystemFileError(f"{clashes[0]}.name: expected distinct group names; {', '.join(clashes)} share a name")
    for g in groups:  # the terms carry the group name (assemble needs distinct names)
        g.term_a = g.build({**g.spec, "name": g.name}, g.where)
    return groups


def _decouple(change: dict, data: dict, n: int) -> np.ndarray | None:
    if "decouple" not in change:
        return None
    particles = integer_rows(change["decouple"], "change.decouple", 1, n)[:, 0]
    if "nonbonded" not in data:
        fail("change.decouple", "a [nonbonded] table as well (only nonbonded interactions are decoupled)",
             change["decouple"])
    return particles


def _parameter_changes(change: dict, groups: list[terms.Group]) -> None:
    """``[[change.parameters]]``: build each changed group's state-B term (same shapes as in A)."""
    import jax

    by_name = {g.name: g for g in groups}
    for i, spec in enumerate(terms.group_list(change.get("parameters", []), "change.parameters")):
        where = f"change.parameters[{i}]"
        target = spec.get("group")
        if not isinstance(target, str) or target not in by_name:
            fail(f"{where}.group", f"the name of a bonded or restraint group, one of {sorted(by_name)}", target)
        group = by_name[target]
        if group.state != "both":
            fail(f"{where}.group", "a group present in both states (state = 'both')", target)
        if group.term_b is not None:
            fail(f"{where}.group", "each group changed at most once", target)
        bad = sorted(set(spec) & {"atoms", "form", "name", "state"})
        if bad:
            fail(f"{where}.{bad[0]}", "unchanged: only parameters can change along the path (not atoms or form)",
                 spec[bad[0]])
        new = {**group.spec, **{k: v for k, v in spec.items() if k != "group"}, "name": group.name}
        group.term_b = group.build(new, where)
        shapes_a = [np.shape(x) for x in jax.tree_util.tree_leaves(group.term_a)]
        shapes_b = [np.shape(x) for x in jax.tree_util.tree_leaves(group.term_b)]
        if shapes_a != shapes_b:
            fail(where, "parameters with the same number of values as in state A (they are interpolated)", spec)


def _change(data: dict, n: int, groups: list[terms.Group]) -> tuple[dict, np.ndarray | None]:
    """The [change] table and the decoupled particles; at least one difference between A and B."""
    change = table_of(data, "change", "a table describing how state B differs from A")
    check_keys(change, {"decouple", "electrostatics_share", "stage_shape", "parameters"}, "change")
    decouple = _decouple(change, data, n)
    _parameter_changes(change, groups)
    if not (decouple is not None or any(g.term_b is not None or g.state != "both" for g in groups)):
        fail("change", "some difference between the end states: decouple = [...], [[change.parameters]], "
             "or a group with state = 'a' or 'b'", change)
    return change, decouple


# ------------------------------------------------------------------ the path

def _path(change: dict, groups, nonbonded, pair_terms, info, *, decouple, box, unit_system, kT, positions):
    """The λ path: soft-core decoupling (with any parameter changes) or parameter interpolation."""
    from ..alchemy import STAGE_SHAPES, ParameterInterpolationPath, SoftCoreDecouplingPath
    from ..energy import assemble

    shared = [g.term_a for g in groups if g.state == "both" and g.term_b is None] + pair_terms
    changed = [g for g in groups if g.term_b is not None]
    only_a = [g.term_a for g in groups if g.state == "a"]
    only_b = [g.term_a for g in groups if g.state == "b"]
    every = shared + [g.term_a for g in changed] + only_a + only_b + ([nonbonded] if nonbonded is not None else [])
    try:
        model = assemble(every or [], box=box, units=unit_system)
    except ValueError as err:
        raise SystemFileError(f"the terms do not fit together: {err}") from None
    if decouple is None:
        for key in ("electrostatics_share", "stage_shape"):
            if key in change:
                fail(f"change.{key}", "no value without change.decouple", change[key])
        return ParameterInterpolationPath(
            shared + ([nonbonded] if nonbonded is not None else []), [g.term_a for g in changed],
            [g.term_b for g in changed], only_a, only_b, box=model.box, kT=kT)
    share = change.get("electrostatics_share")
    if share is not None:
        share = number(change, "electrostatics_share", "change")
        if not 0.0 <= share < 1.0:
            fail("change.electrostatics_share", "a number in [0, 1)", share)
    shape = choice(change, "stage_shape", "change", STAGE_SHAPES, "smooth")
    return SoftCoreDecouplingPath(
        assemble(shared + [nonbonded], box=box, units=unit_system), kT, electrostatics_share=share,
        stage_shape=shape, changed_a=[g.term_a for g in changed], changed_b=[g.term_b for g in changed],
        only_a=only_a, only_b=only_b, pair_search=info.get("pair_search", "all_pairs"),
        neighbour_capacity=info.get("neighbour_capacity"), reference_positions=positions)


# ------------------------------------------------------------------ the whole file

def parse_particles(data: dict, source: str, allow_outside_files: bool = False) -> System:
    """A particle file (one with a ``[particles]`` table) as a :class:`System`."""
    check_keys(data, TOP_KEYS, "top level (particle system)")
    units = read_units(data, source, required=True)
    unit_system = UNIT_SYSTEMS[units]
    kT = read_kT(data, units, kT_default=None)
    folder = data_folder(source)
    types, positions = _particles(data, folder, allow_outside_files)
    n = len(types)
    starts = _start_set(data, n)
    box = _box(data)
    groups = _groups(data, n, positions)
    bonds = np.concatenate([np.asarray(g.term_a.bonds) for g in groups if g.kind == "bonds"]
                           or [np.zeros((0, 2), np.int32)])
    change, decouple = _change(data, n, groups)
    nonbonded, pair_terms, info = None, [], {}
    if "nonbonded" in data:
        nonbonded, pair_terms, info = terms.nonbonded(data, types, n, unit_system, box, bonds, decouple, source)
    else:
        terms.check_no_types_without_nonbonded(data)
    path = _path(change, groups, nonbonded, pair_terms, info, decouple=decouple, box=box, unit_system=unit_system,
                 kT=kT, positions=positions)
    reference, settings = reference_and_settings(data, folder, allow_outside_files)
    name, description = name_and_description(data, source)
    particles = {"count": n, "types": sorted(set(types)), "box": None if box is None else box.tolist(),
                 "unit_system": unit_system, "decoupled": [] if decouple is None else decouple.tolist(),
                 "changed": [g.name for g in groups if g.term_b is not None],
                 "released": [g.name for g in groups if g.state == "a"],
                 "added": [g.name for g in groups if g.state == "b"], **info}
    return System(
        name=name, description=description, energy_a=path.end_function("a"), energy_b=path.end_function("b"),
        start_a=positions, start_b=positions.copy(), kT=kT, units=units, reference=reference, settings=settings,
        source=source, path=path, unit_system=unit_system, particles=particles, starts=starts)
