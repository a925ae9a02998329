"""System files: a TOML description of two end states, read and validated into energies.

Layout (every key is checked; an error names the key and what it expects)::

    name = "widened-harmonic-3d"          # short identifier
    description = "free text"
    units = "reduced"                     # "reduced" (give kT) or "kJ/mol" / "kcal/mol" (give temperature, K)
    kT = 1.0                              # reduced units only
    # temperature = 300.0                 # kelvin, with units = "kJ/mol" or "kcal/mol"

    [end_a]                               # state A, and likewise [end_b]
    field = "harmonic"                    # harmonic | double_well | mueller_brown
    stiffness = [1.0, 1.0, 1.0]           # per-field parameters, see FIELD_PARAMETERS
    centre = [0.0, 0.0, 0.0]
    start = [0.0, 0.0, 0.0]               # where sampling of this end begins

    [reference]                           # optional known answer, same units as the result
    delta_f = 1.0397
    source = "closed form ..."
    tolerance = 0.1

    [settings]                            # optional: options passed to fe_tool.estimate
    budget = 1000000

Energies in the file are in ``units``; ``kT`` follows from ``temperature`` via the
CODATA 2018 molar gas constant (see :mod:`fe_tool.units`).
"""
from __future__ import annotations

import dataclasses
import os
import pathlib
from typing import Any, Callable

import jax.numpy as jnp
import numpy as np

try:
    import tomllib
except ModuleNotFoundError:  # Python < 3.11
    import tomli as tomllib

from .energy import fields

TOP_KEYS = {"name", "description", "units", "kT", "temperature", "end_a", "end_b", "reference", "settings"}
UNIT_NAMES = ("reduced", "kJ/mol", "kcal/mol")


class SystemFileError(ValueError):
    """A system file is malformed; the message names the key and what is expected."""


@dataclasses.dataclass
class System:
    """Two end states ready for :func:`fe_tool.estimate`."""

    name: str
    description: str
    energy_a: Callable
    energy_b: Callable
    start_a: np.ndarray
    start_b: np.ndarray
    kT: float
    units: str
    reference: dict | None
    settings: dict[str, Any]
    source: str = ""

    def estimate(self, **overrides):
        """Run :func:`fe_tool.estimate` with the file's settings, updated by ``overrides``."""
        from .workflow import estimate

        options = {**self.settings, **overrides}
        seed = options.pop("seed", 0)
        unit_label = "kT" if self.units == "reduced" and self.kT == 1.0 else self.units
        if self.units == "reduced" and self.kT != 1.0:
            unit_label = "reduced energy units"
        options.setdefault("units", unit_label)
        if self.reference is not None:
            options.setdefault("reference", self.reference)
        return estimate(self.energy_a, self.energy_b, self.start_a, self.start_b, kT=self.kT, seed=seed, **options)


# ------------------------------------------------------------------ small validators

def _fail(key: str, expected: str, got: Any) -> None:
    raise SystemFileError(f"{key}: expected {expected}, got {got!r}")


def _number(table: dict, key: str, where: str, default: Any = None, positive: bool = False) -> float:
    if key not in table:
        if default is None:
            _fail(f"{where}.{key}", "a number (this key is required)", None)
        return default
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value):
        _fail(f"{where}.{key}", "a finite number", value)
    if positive and value <= 0:
        _fail(f"{where}.{key}", "a positive number", value)
    return float(value)


def _vector(table: dict, key: str, where: str, length: int | None = None, default: Any = None,
            positive: bool = False) -> np.ndarray:
    if key not in table:
        if default is None:
            _fail(f"{where}.{key}", "a list of numbers (this key is required)", None)
        return np.asarray(default, dtype=np.float64)
    value = table[key]
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        value = [value] * (length or 1)
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        _fail(f"{where}.{key}", "a list of numbers", value)
    if arr.ndim != 1 or not np.all(np.isfinite(arr)):
        _fail(f"{where}.{key}", "a flat list of finite numbers", value)
    if length is not None and arr.size != length:
        _fail(f"{where}.{key}", f"{length} numbers (one per coordinate)", value)
    if positive and np.any(arr <= 0):
        _fail(f"{where}.{key}", "positive numbers", value)
    return arr


def _check_keys(table: dict, allowed: set[str], where: str) -> None:
    unknown = sorted(set(table) - allowed)
    if unknown:
        raise SystemFileError(f"{where}: unknown key(s) {unknown}; allowed keys are {sorted(allowed)}")


# ------------------------------------------------------------------ fields

def _harmonic(table: dict, where: str, dim: int):
    stiffness = _vector(table, "stiffness", where, dim, positive=True)
    centre = _vector(table, "centre", where, dim, default=np.zeros(dim))
    k, c = jnp.asarray(stiffness), jnp.asarray(centre)
    return lambda x: fields.harmonic_well_energy(x, c, k)


def _double_well(table: dict, where: str, dim: int):
    height = _number(table, "height", where, positive=True)
    minimum_squared = _number(table, "minimum_squared", where, default=1.0, positive=True)
    tilt = _number(table, "tilt", where, default=0.0)
    transverse = _number(table, "transverse_stiffness", where, default=1.0, positive=True)
    return lambda x: fields.double_well_energy(x, height, minimum_squared, tilt, transverse)


def _mueller_brown(table: dict, where: str, dim: int):
    if dim != 2:
        _fail(f"{where}.start", "2 coordinates for the Müller–Brown surface", dim)
    scale = _number(table, "scale", where, default=1.0, positive=True)
    return lambda x: fields.mueller_brown_energy(x, scale)


FIELDS: dict[str, tuple[Callable, set[str]]] = {
    "harmonic": (_harmonic, {"stiffness", "centre"}),
    "double_well": (_double_well, {"height", "minimum_squared", "tilt", "transverse_stiffness"}),
    "mueller_brown": (_mueller_brown, {"scale"}),
}


def _end_state(table: Any, where: str, energy_scale: float, dim: int | None = None) -> tuple[Callable, np.ndarray]:
    if not isinstance(table, dict):
        _fail(where, "a table such as [end_a] with a 'field' and its parameters", table)
    kind = table.get("field")
    if kind not in FIELDS:
        _fail(f"{where}.field", f"one of {sorted(FIELDS)}", kind)
    builder, allowed = FIELDS[kind]
    _check_keys(table, allowed | {"field", "start"}, where)
    start = _vector(table, "start", where, dim)
    fn = builder(table, where, start.size)
    if energy_scale != 1.0:
        inner = fn
        fn = lambda x: energy_scale * inner(x)  # noqa: E731
    return fn, start


# ------------------------------------------------------------------ the file

def load_system(path: str | os.PathLike) -> System:
    """Read and validate a system file; raise :class:`SystemFileError` naming any bad key."""
    path = pathlib.Path(path)
    if not path.exists():
        raise SystemFileError(f"system file {str(path)!r} does not exist; `fe-tool list` shows the bundled systems")
    try:
        data = tomllib.loads(path.read_text())
    except tomllib.TOMLDecodeError as err:
        raise SystemFileError(f"{path.name}: not valid TOML ({err})") from None
    return parse_system(data, source=str(path))


def parse_system(data: dict, source: str = "<dict>") -> System:
    """Validate an already-parsed system description (see the module docstring)."""
    _check_keys(data, TOP_KEYS, "top level")
    units = data.get("units", "reduced")
    if units not in UNIT_NAMES:
        _fail("units", f"one of {list(UNIT_NAMES)}", units)
    if units == "reduced":
        if "temperature" in data:
            _fail("temperature", "no temperature with units = 'reduced' (give kT instead)", data["temperature"])
        kT = _number(data, "kT", "top level", default=1.0, positive=True)
    else:
        from .units import thermal_energy

        if "kT" in data:
            _fail("kT", f"no kT with units = {units!r}: give temperature in kelvin", data["kT"])
        temperature = _number(data, "temperature", "top level", positive=True)
        kT = float(thermal_energy(temperature, unit=units))
    for end in ("end_a", "end_b"):
        if end not in data:
            raise SystemFileError(f"{end}: missing; a system file needs tables [end_a] and [end_b]")
    energy_a, start_a = _end_state(data["end_a"], "end_a", 1.0)
    energy_b, start_b = _end_state(data["end_b"], "end_b", 1.0, dim=start_a.size)
    reference = None
    if "reference" in data:
        ref = data["reference"]
        if not isinstance(ref, dict):
            _fail("reference", "a table with delta_f, source and tolerance", ref)
        _check_keys(ref, {"delta_f", "source", "tolerance"}, "reference")
        reference = {
            "delta_f": _number(ref, "delta_f", "reference"),
            "source": str(ref.get("source", "not given")),
            "tolerance": _number(ref, "tolerance", "reference", default=float("nan")),
        }
    settings = data.get("settings", {})
    if not isinstance(settings, dict):
        _fail("settings", "a table of estimate() options", settings)
    from .workflow import OPTION_NAMES

    _check_keys(settings, set(OPTION_NAMES) | {"seed"}, "settings")
    return System(
        name=str(data.get("name", pathlib.Path(source).stem)),
        description=str(data.get("description", "")),
        energy_a=energy_a, energy_b=energy_b, start_a=start_a, start_b=start_b,
        kT=kT, units=units, reference=reference, settings=dict(settings), source=source,
    )


def bundled_systems_folder() -> pathlib.Path:
    """The ``systems/`` catalogue: ``$FE_TOOL_SYSTEMS`` or the folder beside the package."""
    env = os.environ.get("FE_TOOL_SYSTEMS")
    if env:
        return pathlib.Path(env)
    return pathlib.Path(__file__).resolve().parent.parent / "systems"


def find_system(name_or_path: str) -> pathlib.Path:
    """A system file by path, or by name in the bundled catalogue (with or without ``.toml``)."""
    p = pathlib.Path(name_or_path)
    if p.exists():
        return p
    folder = bundled_systems_folder()
    for candidate in (folder / name_or_path, folder / f"{name_or_path}.toml"):
        if candidate.exists():
            return candidate
    raise SystemFileError(f"no system file {name_or_path!r} (looked in the current folder and {folder}); "
                          "`fe-tool list` shows the bundled systems")


def list_systems() -> list[pathlib.Path]:
    folder = bundled_systems_folder()
    return sorted(folder.glob("*.toml")) if folder.exists() else []
