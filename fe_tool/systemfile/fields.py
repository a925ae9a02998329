"""The field layout: one point (a vector) in an analytic energy field, ``[end_a]`` and ``[end_b]``.

See docs/system-files.md, "Field files", for the keys and the energy of each field.
"""
from __future__ import annotations

from typing import Any, Callable

import jax.numpy as jnp
import numpy as np

from ..energy import fields
from .reader import SystemFileError, check_keys, fail, number, read_kT, read_units, vector
from .settings import data_folder, name_and_description, reference_and_settings
from .system import System

TOP_KEYS = {"name", "description", "units", "kT", "temperature", "end_a", "end_b", "reference", "settings"}


def _harmonic(table: dict, where: str, dim: int):
    stiffness = vector(table, "stiffness", where, dim, positive=True)
    centre = vector(table, "centre", where, dim, default=np.zeros(dim))
    k, c = jnp.asarray(stiffness), jnp.asarray(centre)
    return lambda x: fields.harmonic_well_energy(x, c, k)


def _double_well(table: dict, where: str, dim: int):
    height = number(table, "height", where, positive=True)
    minimum_squared = number(table, "minimum_squared", where, default=1.0, positive=True)
    tilt = number(table, "tilt", where, default=0.0)
    transverse = number(table, "transverse_stiffness", where, default=1.0, positive=True)
    return lambda x: fields.double_well_energy(x, height, minimum_squared, tilt, transverse)


def _mueller_brown(table: dict, where: str, dim: int):
    if dim != 2:
        fail(f"{where}.start", "2 coordinates for the Müller–Brown surface", dim)
    scale = number(table, "scale", where, default=1.0, positive=True)
    return lambda x: fields.mueller_brown_energy(x, scale)


FIELDS: dict[str, tuple[Callable, set[str]]] = {
    "harmonic": (_harmonic, {"stiffness", "centre"}),
    "double_well": (_double_well, {"height", "minimum_squared", "tilt", "transverse_stiffness"}),
    "mueller_brown": (_mueller_brown, {"scale"}),
}


def _end_state(table: Any, where: str, dim: int | None = None) -> tuple[Callable, np.ndarray]:
    """The energy function and start of ``[end_a]`` or ``[end_b]``."""
    if not isinstance(table, dict):
        fail(where, "a table such as [end_a] with a 'field' and its parameters", table)
    kind = table.get("field")
    if not isinstance(kind, str) or kind not in FIELDS:
        fail(f"{where}.field", f"one of {sorted(FIELDS)}", kind)
    builder, allowed = FIELDS[kind]
    check_keys(table, allowed | {"field", "start"}, where)
    start = vector(table, "start", where, dim)
    return builder(table, where, start.size), start


def parse_fields(data: dict, source: str, allow_outside_files: bool = False) -> System:
    """A field file (no ``[particles]`` table) as a :class:`System`."""
    check_keys(data, TOP_KEYS, "top level")
    units = read_units(data, source, required=False)
    kT = read_kT(data, units, kT_default=1.0)
    for end in ("end_a", "end_b"):
        if end not in data:
            raise SystemFileError(f"{end}: missing; a system file needs tables [end_a] and [end_b]")
    energy_a, start_a = _end_state(data["end_a"], "end_a")
    energy_b, start_b = _end_state(data["end_b"], "end_b", dim=start_a.size)
    reference, settings = reference_and_settings(data, data_folder(source), allow_outside_files)
    name, description = name_and_description(data, source)
    return System(
        name=name, description=description,
        energy_a=energy_a, energy_b=energy_b, start_a=start_a, start_b=start_b,
        kT=kT, units=units, reference=reference, settings=settings, source=source,
    )
