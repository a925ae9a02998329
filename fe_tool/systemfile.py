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

**Particle systems** (a file with a ``[particles]`` table). The unit system is required:
``units = "kJ/mol-nm-K"`` (energies kJ/mol, lengths nm, charges e, ``temperature`` in K) or
``units = "reduced"`` (Lennard-Jones units ε, σ, k_B = 1; give ``kT`` = T*). State A is the
system as written; ``[change]`` says how B differs, and :mod:`fe_tool.alchemy` builds the path::

    units = "kJ/mol-nm-K"
    temperature = 300.0

    [particles]                       # inline, or  file = "start.xyz"  (XYZ: count, comment, "type x y z")
    types = ["P", "S", "S"]
    positions = [[0.5, 0.5, 0.5], [0.9, 0.5, 0.5], [0.5, 0.9, 0.5]]
    starts = [[[...], [...], [...]],  # optional start set: k configurations (n rows each) where the
              [[...], [...], [...]]]  #   end-state samplers begin, round-robin over the chains (both
                                      #   ends); give one per slow basin. Default: every chain at positions

    [box]                             # optional: orthorhombic periodic cell; omit for open space
    edges = [1.6, 1.6, 1.6]

    [types.P]                         # per-type nonbonded parameters (needed with [nonbonded])
    sigma = 0.3                       #   length
    epsilon = 1.0                     #   energy (0: no LJ)
    charge = 0.5                      #   e (reduced charge in reduced units)

    [nonbonded]                       # optional; all keys but cutoff have defaults
    cutoff = 0.7                      # ≤ half the shortest box edge
    shift = false                     # truncated-and-shifted LJ
    tail_correction = true            # analytic LJ tail for the box (needs shift = false)
    reaction_field_dielectric = 78.0  # optional (inf = conducting); else plain cutoff Coulomb
    dielectric = 1.0
    mixing = "lorentz-berthelot"      # or "geometric"
    exclude_bonded = 3                # exclude pairs ≤ this many bonds apart (0..3)
    scale_14_lj = 0.5                 # scaled 1-4 pairs added back (needs exclude_bonded = 3)
    scale_14_coulomb = 0.8333
    exclusions = [[0, 2]]             # extra excluded pairs
    soft_core_alpha = 0.5             # Beutler et al. 1994 α for decoupling
    pair_search = "all_pairs"         # or "neighbour_list" (rebuilt in every energy call; large N)

    [[topology.bonds]]                # groups: name (unique), atoms (0-based rows), parameters,
    name = "bonds"                    #   state = "both" (default) | "a" | "b"
    atoms = [[0, 1], [1, 2]]
    length = 0.153                    # one value or one per row
    force_constant = 5000.0           # U = ½ k (r − r0)²
    [[topology.angles]]               # atoms [i, j, k]; angle in degrees; k per rad²
    [[topology.torsions]]             # form = "ryckaert_bellemans" (coefficients C0..) or
                                      #   "periodic" (force_constants, multiplicities, phases in degrees)
    [[restraints]]                    # form = "position" (atoms, force_constant, reference?, radius?)
    name = "anchor"                   #   or "distance" (atoms [[i, j]], target | lower + upper, force_constant)
    form = "position"
    atoms = [0]
    force_constant = 500.0
    state = "a"                       # present in A only: "this restraint is released" in B

    [change]                          # how B differs from A (at least one difference)
    decouple = [0]                    # these particles' nonbonded interactions are switched off
    electrostatics_share = 0.5        # λ ≤ 0.5 switches charges off, then soft-core LJ (default: 0.5 if charged)
    stage_shape = "smooth"            # or "linear"
    [[change.parameters]]             # "this group's parameters become …" (same shapes; interpolated)
    group = "backbone_torsion"
    coefficients = [4.64, 6.08, -6.56, -1.53, 13.12, -15.75]

**Files a system file names** (``[particles] file``, ``[settings] control`` and ``save_control``)
are resolved relative to the system file's folder (the current folder for :func:`parse_system`
on a dict), after resolving symlinks and ``..``, and refused if they lead outside it unless the
caller passes ``allow_outside_files=True``. Only regular files are read (not devices, pipes or
folders), each at most ``MAX_SYSTEM_FILE_BYTES`` / ``MAX_DATA_FILE_BYTES`` (64 MiB).

**Values** are checked for their type, whatever the key: a number in quotes (``kT = "1"``),
true/false where a number belongs, or text inside a list of numbers is refused naming the key.
The ``[settings]`` whole numbers (``budget``, ``seed``, ``switching_steps``, ``trajectories``,
``chains``) accept a float that is a whole number (``budget = 1e5`` is 100000), never a fraction.
``[reference] tolerance`` must be positive, ``delta_f`` finite. Error messages show a value only
when it is a number or true/false; text and lists are described by kind and size, so a message
never repeats file contents (TOML syntax errors give position and reason only).

Direction: ΔF = F_B − F_A, so for a decoupling file (A coupled, B decoupled) the excess
chemical potential (or solvation free energy) is μ_ex = −ΔF. Results are labelled with the
energy unit ("kJ/mol", or "ε (reduced LJ units)"); ``System.unit_system`` keeps the full name.
"""
from __future__ import annotations

import dataclasses
import math
import os
import pathlib
import re
from typing import Any, Callable

import jax.numpy as jnp
import numpy as np

try:
    import tomllib
except ModuleNotFoundError:  # Python < 3.11
    import tomli as tomllib

from .energy import fields
from .filesafety import open_regular_file, read_regular_file, resolve_inside

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
    path: Any = None  # a fe_tool.path.Path for particle systems (replaces linear mixing)
    unit_system: str = ""  # "kJ/mol-nm-K" or "reduced" for particle systems; "" for field files
    particles: dict[str, Any] | None = None  # types, box and counts of a particle system (for reports)
    starts: np.ndarray | None = None  # (k, n, 3) start set of both end samplers ([particles] starts), or None

    def estimate(self, **overrides):
        """Run :func:`fe_tool.estimate` with the file's settings, updated by ``overrides``."""
        from .workflow import estimate

        options = {**self.settings, **overrides}
        seed = options.pop("seed", 0)
        unit_label = "kT" if self.units == "reduced" and self.kT == 1.0 else self.units
        if self.units == "reduced" and self.kT != 1.0:
            unit_label = "ε (reduced LJ units)" if self.unit_system == "reduced" else "reduced energy units"
        if self.path is not None:
            options.setdefault("path", self.path)
        if self.starts is not None:
            options.setdefault("starts_a", self.starts)
            options.setdefault("starts_b", self.starts)
        options.setdefault("units", unit_label)
        if self.reference is not None:
            options.setdefault("reference", self.reference)
        return estimate(self.energy_a, self.energy_b, self.start_a, self.start_b, kT=self.kT, seed=seed, **options)


# ------------------------------------------------------------------ small validators

def _describe(value: Any) -> str:
    """What a value is, for error messages: numbers and true/false are shown, text and lists only
    by kind and size (an error message never repeats file contents)."""
    if value is None:
        return "nothing (the key is missing)"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return repr(value) if abs(value) < 10**15 else f"a whole number of {len(str(abs(value)))} digits"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, str):
        try:
            float(value)
            hint = " holding a number in quotes (remove the quotes)"
        except ValueError:
            hint = ""
        return f"text of {_count(len(value), 'character')}{hint}"
    if isinstance(value, list):
        leaves = _leaves(value)
        mixed = [name for kind, name in ((str, "text"), (bool, "true/false"), (dict, "tables")) if
                 any(isinstance(v, kind) for v in leaves)]
        return f"a list of {_count(len(value), 'value')}" + (f" including {' and '.join(mixed)}" if mixed else "")
    if isinstance(value, dict):
        return f"a table of {_count(len(value), 'key')}"
    return f"a value of type {type(value).__name__}"


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}" + ("" if n == 1 else "s")


def _leaves(value: Any) -> list:
    return [leaf for v in value for leaf in _leaves(v)] if isinstance(value, list) else [value]


def _fail(key: str, expected: str, got: Any) -> None:
    raise SystemFileError(f"{key}: expected {expected}, got {_describe(got)}")


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _finite(value: Any) -> bool:
    try:
        return _is_number(value) and math.isfinite(float(value))
    except OverflowError:  # a whole number too large for a float
        return False


def _numeric_array(value: Any, key: str, expected: str) -> np.ndarray:
    """A (nested) list of numbers as a float array; text, true/false and ragged lists are refused."""
    def numbers_only(v: Any) -> bool:
        return all(numbers_only(u) for u in v) if isinstance(v, list) else _finite(v)

    if not numbers_only(value):
        _fail(key, expected + " (finite numbers, not text or true/false)", value)
    try:
        return np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):  # ragged rows
        _fail(key, expected, value)


def _number(table: dict, key: str, where: str, default: Any = None, positive: bool = False) -> float:
    if key not in table:
        if default is None:
            _fail(f"{where}.{key}", "a number (this key is required)", None)
        return default
    value = table[key]
    if not _finite(value):
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
    if _is_number(value):
        value = [value] * (length or 1)
    if not isinstance(value, list):
        _fail(f"{where}.{key}", "a list of numbers", value)
    arr = _numeric_array(value, f"{where}.{key}", "a flat list of numbers")
    if arr.ndim != 1:
        _fail(f"{where}.{key}", "a flat list of finite numbers", value)
    if length is not None and arr.size != length:
        _fail(f"{where}.{key}", f"{length} numbers (one per coordinate)", value)
    if positive and np.any(arr <= 0):
        _fail(f"{where}.{key}", "positive numbers", value)
    return arr


def _text(table: dict, key: str, where: str, default: str) -> str:
    value = table.get(key, default)
    if not isinstance(value, str):
        _fail(f"{where}.{key}" if where else key, "text (a string in quotes)", value)
    return value


def _check_keys(table: dict, allowed: set[str], where: str) -> None:
    unknown = sorted(set(table) - allowed)
    if unknown:
        shown = [str(k)[:40] for k in unknown[:5]] + (["..."] if len(unknown) > 5 else [])
        raise SystemFileError(f"{where}: unknown key(s) {shown}; allowed keys are {sorted(allowed)}")


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
    if not isinstance(kind, str) or kind not in FIELDS:
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

MAX_SYSTEM_FILE_BYTES = 64 * 2**20  # a system file larger than this is refused unread
MAX_DATA_FILE_BYTES = 64 * 2**20  # likewise an XYZ (or other data) file a system file names
_TOML_POSITION = re.compile(r"\(at (line \d+, column \d+|end of document)\)\s*$")
# tomllib's reasons, in our words: some of its messages quote the offending key or character
_TOML_REASONS = (
    ("Cannot declare", "a key or table is declared twice"),
    ("Cannot overwrite a value", "a value is set twice"),
    ("Cannot mutate immutable namespace", "a table or array is extended after it was closed"),
    ("Cannot redefine namespace", "a table is defined twice"),
    ("Duplicate inline table key", "a key is repeated in an inline table"),
    ("Found invalid character", "an invalid character"),
    ("Illegal character", "an illegal character in a string"),
    ("Unclosed array", "an array is not closed with ']'"),
    ("Unclosed inline table", "an inline table is not closed with '}'"),
    ("Unterminated string", "a string is not closed"),
    ("Expected '\"'", "a string is not closed"),
    ("Expected \"'\"", "a string is not closed"),
    ("Invalid value", "a value that is not valid TOML (text needs quotes)"),
    ("Invalid statement", "a line that is neither 'key = value' nor a [table] header"),
    ("Expected '=' after a key", "a key without '= value'"),
    ("Expected newline or end of document", "more than one statement on a line"),
    ("Invalid initial character for a key part", "a key that starts with an invalid character"),
    ("Expected ']' at the end of a table declaration", "a [table] header not closed with ']'"),
    ("Expected ']]' at the end of an array declaration", "a [[table]] header not closed with ']]'"),
    ("Invalid date or datetime", "an invalid date or time"),
    ("Unescaped", "an unescaped backslash in a string"),
    ("Invalid hex value", "an invalid \\u escape in a string"),
    ("Escaped character is not a Unicode scalar value", "an invalid \\u escape in a string"),
)


def toml_error_text(err: Exception) -> str:
    """Position and reason of a TOML decode error, without the snippet of the file it may quote."""
    message = str(err)
    match = _TOML_POSITION.search(message)
    where = match.group(1) if match else "an unknown position"
    reason = next((ours for start, ours in _TOML_REASONS if message.startswith(start)), "invalid TOML syntax")
    return f"{reason} (at {where})"


def load_system(path: str | os.PathLike, *, allow_outside_files: bool = False) -> System:
    """Read and validate a system file; raise :class:`SystemFileError` naming any bad key.

    Args:
        path: the system file (a regular file of at most ``MAX_SYSTEM_FILE_BYTES``, UTF-8 TOML).
        allow_outside_files: let the file name data files (``[particles] file``, a saved
            ``[settings] control``, ``save_control``) outside its own folder. By default every
            such path is resolved (symlinks and ``..`` included) relative to the system file's
            folder and refused if it leads outside it, so a shared system file cannot make the
            tool read or write elsewhere.
    """
    path = pathlib.Path(path)
    if not path.exists() and not path.is_symlink():
        raise SystemFileError(f"system file {str(path)!r} does not exist; `fe-tool list` shows the bundled systems")
    raw = read_regular_file(path, MAX_SYSTEM_FILE_BYTES, error=SystemFileError, what="system file")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        raise SystemFileError(f"{path.name}: not UTF-8 text (undecodable byte at offset {err.start})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise SystemFileError(f"{path.name}: not valid TOML: {toml_error_text(err)}") from None
    except RecursionError:
        raise SystemFileError(f"{path.name}: not valid TOML: arrays or tables nested too deeply") from None
    return parse_system(data, source=str(path), allow_outside_files=allow_outside_files)


def _reference(data: dict) -> dict | None:
    """The optional [reference]: ΔF in the file's energy unit, its source and a positive tolerance."""
    if "reference" not in data:
        return None
    ref = data["reference"]
    if not isinstance(ref, dict):
        _fail("reference", "a table with delta_f, source and tolerance", ref)
    _check_keys(ref, {"delta_f", "source", "tolerance"}, "reference")
    tolerance = float("nan")  # absent: the result is compared within its own error bar only
    if "tolerance" in ref:
        tolerance = _number(ref, "tolerance", "reference", positive=True)
    return {"delta_f": _number(ref, "delta_f", "reference"), "source": _text(ref, "source", "reference", "not given"),
            "tolerance": tolerance}


# [settings]: the type each estimate() option takes in a file (whole numbers with their minimum)
WHOLE_NUMBER_SETTINGS = {"budget": 1, "switching_steps": 1, "trajectories": 2, "chains": 4, "seed": 0}
TEXT_SETTINGS = ("method", "spacing", "units")
SWITCH_SETTINGS = ("exchange", "precondition", "progress")
NOT_IN_FILES = {"path": "a path object cannot be written in a file; describe the change in [change]",
                "reference": "give the known answer in a [reference] table"}


def _whole_number(value: Any, key: str, minimum: int) -> int:
    """An integer ≥ ``minimum``; a float that is a whole number (1e5, 100000.0) is taken as that integer."""
    if isinstance(value, float) and math.isfinite(value) and value.is_integer() and abs(value) <= 2.0**53:
        value = int(value)
    if not isinstance(value, int) or isinstance(value, bool) or not minimum <= value < 2**63:
        _fail(key, f"a whole number ≥ {minimum} (e.g. 100000 or 1e5; no quotes, no fraction)", value)
    return value


def _file_setting(value: Any, key: str, folder: pathlib.Path, allow_outside_files: bool, must_exist: bool) -> str:
    """A file named in [settings], resolved in the system file's folder."""
    if not isinstance(value, str):
        _fail(key, "a file name (text)", value)
    target = resolve_inside(folder, value, allow_outside=allow_outside_files, error=SystemFileError, what=key)
    if must_exist:
        open_regular_file(target, 2**62, error=SystemFileError, what=key).close()
    elif target.exists() and not target.is_file():
        raise SystemFileError(f"{key}: {target} exists and is not a regular file; name a new or ordinary file")
    return str(target)


def _network_table(value: Any, key: str) -> None:
    """[settings.control_settings.network]: a registered control kind and its constructor's keywords."""
    import inspect

    from .control import CONTROL_KINDS

    if not isinstance(value, dict):
        _fail(key, "a table such as {kind = \"mlp\", width = 32}", value)
    kind = value.get("kind", "mlp")
    if not isinstance(kind, str) or kind not in CONTROL_KINDS:
        _fail(f"{key}.kind", f"one of {sorted(CONTROL_KINDS)}", kind)
    parameters = {n: p.default for n, p in inspect.signature(CONTROL_KINDS[kind].__init__).parameters.items()
                  if n not in ("self", "shape", "scales", "key", "path")}
    _check_keys(value, set(parameters) | {"kind"}, key)
    for name, item in value.items():
        default = parameters.get(name)
        if name == "kind":
            continue
        if isinstance(default, int) and not isinstance(default, bool):
            _whole_number(item, f"{key}.{name}", 1)
        elif isinstance(item, list):
            _numeric_array(item, f"{key}.{name}", "a list of numbers")
        elif not _finite(item):
            _fail(f"{key}.{name}", "a number or a list of numbers", item)


def _control_settings(value: Any) -> dict:
    """[settings.control_settings]: keyword arguments of prepare_control, each of its default's type."""
    import inspect

    from .control import prepare_control

    if not isinstance(value, dict):
        _fail("settings.control_settings", "a table of control training settings", value)
    parameters = {n: p.default for n, p in inspect.signature(prepare_control).parameters.items()
                  if p.kind is inspect.Parameter.KEYWORD_ONLY and n not in ("mode", "budget", "progress", "warm_start")}
    _check_keys(value, set(parameters), "settings.control_settings")
    typed = {"training_steps": 1, "check_every": 1}  # None by default, whole numbers when given
    for name, item in value.items():
        key, default = f"settings.control_settings.{name}", parameters[name]
        if name == "network":
            _network_table(item, key)
        elif isinstance(default, bool):
            if not isinstance(item, bool):
                _fail(key, "true or false", item)
        elif isinstance(default, str):
            if not (isinstance(item, str) or (name == "learn_steps" and isinstance(item, bool))):
                _fail(key, "text (a string in quotes)", item)
        elif isinstance(default, int) or name in typed:
            value[name] = _whole_number(item, key, typed.get(name, 0))
        else:  # the float settings and learning_rate
            value[name] = _number(value, name, "settings.control_settings", positive=True)
    return value


def _setting(name: str, value: Any, folder: pathlib.Path, allow_outside_files: bool) -> Any:
    """One [settings] value checked for its type (the workflow checks ranges and combinations)."""
    from .workflow import CONTROL_MODES, METHODS

    key = f"settings.{name}"
    if name in NOT_IN_FILES:
        raise SystemFileError(f"{key}: not allowed in a system file; {NOT_IN_FILES[name]}")
    if name in WHOLE_NUMBER_SETTINGS:
        return _whole_number(value, key, WHOLE_NUMBER_SETTINGS[name])
    if name in SWITCH_SETTINGS:
        if not isinstance(value, bool):
            _fail(key, "true or false", value)
        return value
    if name in TEXT_SETTINGS:
        if not isinstance(value, str) or (name == "method" and value not in METHODS):
            _fail(key, f"one of {list(METHODS)}" if name == "method" else "text (a string in quotes)", value)
        return value
    if name == "step_scale":
        return _number({name: value}, name, "settings", positive=True)
    if name == "schedule" and isinstance(value, str):
        return value
    if name == "windows" and not isinstance(value, list):
        return _whole_number(value, key, 2)
    if name in ("schedule", "windows"):
        lams = _numeric_array(value, key, "a name or a flat list of λ values") if isinstance(value, list) else None
        if lams is None or lams.ndim != 1:
            _fail(key, "a name or a flat list of λ values", value)
        return lams.tolist()
    if name in ("starts_a", "starts_b"):
        if not isinstance(value, list) or not value:
            _fail(key, "a list of start configurations", value)
        return _numeric_array(value, key, "a list of start configurations").tolist()
    if name == "control":
        if not isinstance(value, str):
            _fail(key, f"one of {list(CONTROL_MODES)} or a saved control file name", value)
        return value if value in CONTROL_MODES else _file_setting(value, key, folder, allow_outside_files, True)
    if name == "save_control":
        return _file_setting(value, key, folder, allow_outside_files, False)
    if name == "control_settings":
        return _control_settings(dict(value) if isinstance(value, dict) else value)
    return value


def _reference_and_settings(data: dict, folder: pathlib.Path, allow_outside_files: bool) -> tuple[dict | None, dict]:
    """The optional [reference] and [settings] (estimate options, each checked for its type)."""
    settings = data.get("settings", {})
    if not isinstance(settings, dict):
        _fail("settings", "a table of estimate() options", settings)
    from .workflow import OPTION_NAMES

    _check_keys(settings, set(OPTION_NAMES) | {"seed"}, "settings")
    checked = {name: _setting(name, value, folder, allow_outside_files) for name, value in settings.items()}
    return _reference(data), checked


def _data_folder(source: str) -> pathlib.Path:
    """The folder a system file's relative paths start from (the current folder for a dict)."""
    return pathlib.Path(source).parent.resolve() if source != "<dict>" else pathlib.Path.cwd().resolve()


def _name_and_description(data: dict, source: str) -> tuple[str, str]:
    return (_text(data, "name", "", pathlib.Path(source).stem), _text(data, "description", "", ""))


def parse_system(data: dict, source: str = "<dict>", *, allow_outside_files: bool = False) -> System:
    """Validate an already-parsed system description (see the module docstring).

    Args:
        data: the parsed TOML tables.
        source: the file it came from; relative data paths start in its folder (the
            current folder for ``"<dict>"``).
        allow_outside_files: accept data paths that lead outside that folder
            (see :func:`load_system`).
    """
    if not isinstance(data, dict):
        _fail("top level", "a table of keys (a parsed system file)", data)
    if "particles" in data:
        return _parse_particle_system(data, source, allow_outside_files)
    _check_keys(data, TOP_KEYS, "top level")
    units = data.get("units", "reduced")
    if not isinstance(units, str) or units not in UNIT_NAMES:
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
    reference, settings = _reference_and_settings(data, _data_folder(source), allow_outside_files)
    name, description = _name_and_description(data, source)
    return System(
        name=name, description=description,
        energy_a=energy_a, energy_b=energy_b, start_a=start_a, start_b=start_b,
        kT=kT, units=units, reference=reference, settings=settings, source=source,
    )


# ------------------------------------------------------------------ particle systems

PARTICLE_TOP_KEYS = {"name", "description", "units", "kT", "temperature", "particles", "box", "types",
                     "nonbonded", "topology", "restraints", "change", "reference", "settings"}
PARTICLE_UNIT_SYSTEMS = ("kJ/mol-nm-K", "reduced")
GROUP_STATES = ("both", "a", "b")
TORSION_FORMS = ("ryckaert_bellemans", "periodic")
RESTRAINT_FORMS = ("position", "distance")


def _integer_rows(value: Any, key: str, width: int, n: int) -> np.ndarray:
    """(m, width) particle indices in [0, n)."""
    def has_bool(v: Any) -> bool:
        return any(has_bool(u) for u in v) if isinstance(v, list) else isinstance(v, bool)

    try:
        arr = np.asarray([]) if has_bool(value) else np.asarray(value)
    except (TypeError, ValueError):
        arr = np.asarray([])
    if width == 1 and arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[1] != width or arr.size == 0 or arr.dtype.kind not in "iu":
        letters = ", ".join("ijkl"[:width])
        shape = "a list of particle indices" if width == 1 else f"a list of [{letters}] index rows"
        _fail(key, f"{shape} (integers, 0-based)", value)
    if arr.min() < 0 or arr.max() >= n:
        _fail(key, f"particle indices from 0 to {n - 1}", value)
    for row in arr:
        if len(set(row.tolist())) != width:
            _fail(key, "distinct particles within each row", row.tolist())
    return arr.astype(np.int32)


def _boolean(table: dict, key: str, where: str, default: bool) -> bool:
    value = table.get(key, default)
    if not isinstance(value, bool):
        _fail(f"{where}.{key}", "true or false", value)
    return value


def _string(table: dict, key: str, where: str, choices: tuple, default: str | None = None) -> str:
    value = table.get(key, default)
    if value not in choices:
        _fail(f"{where}.{key}", f"one of {list(choices)}" + ("" if default is None else f" (default {default!r})"), value)
    return value


def _per_row(table: dict, key: str, where: str, rows: int, positive: bool = False, default: Any = None) -> np.ndarray:
    """A number (shared by all rows) or one number per row."""
    if key not in table and default is None:
        _fail(f"{where}.{key}", "a number or one number per row (this key is required)", None)
    value = table.get(key, default)
    arr = _vector({key: value}, key, where)
    if arr.size == 1:
        arr = np.full(rows, arr[0])
    if arr.size != rows:
        _fail(f"{where}.{key}", f"one number or {rows} numbers (one per row of atoms)", value)
    if positive and np.any(arr <= 0):
        _fail(f"{where}.{key}", "positive numbers", value)
    return arr


TYPE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_+\-]{0,31}")  # particle type names: short plain words


def read_xyz(path: pathlib.Path, key: str = "particles.file") -> tuple[list[str], np.ndarray]:
    """Types and (n, 3) positions from an XYZ file: a count line, a comment line, then
    ``type x y z`` per particle (lengths in the system file's length unit).

    The file must be a regular UTF-8 file of at most ``MAX_DATA_FILE_BYTES``; errors give the
    line number and what is wrong, never the line itself."""
    raw = read_regular_file(path, MAX_DATA_FILE_BYTES, error=SystemFileError, what=key)
    try:
        lines = raw.decode("utf-8").splitlines()
    except UnicodeDecodeError as err:
        raise SystemFileError(f"{key}: {path} is not UTF-8 text (undecodable byte at offset {err.start})") from None
    first = lines[0].split() if lines else []
    if not first or not re.fullmatch(r"[0-9]{1,12}", first[0]) or int(first[0]) < 1:
        raise SystemFileError(f"{key}: {path} line 1: expected the particle count (a positive whole number) "
                              "as in the XYZ format")
    count = int(first[0])
    if len(lines) < count + 2:
        raise SystemFileError(f"{key}: {path}: the count line says {count} particles, but {max(len(lines) - 2, 0)} "
                              "lines follow the comment line")
    if any(line.strip() for line in lines[count + 2:]):
        raise SystemFileError(f"{key}: {path}: non-blank lines after the {count} particle lines (one configuration "
                              "per file; the count line must match the particle lines)")
    types, positions = [], np.empty((count, 3))
    for row, line in enumerate(lines[2:count + 2]):
        words = line.split()
        problem = None
        if len(words) != 4:
            problem = f"{len(words)} fields where 'type x y z' has 4"
        elif not TYPE_NAME.fullmatch(words[0]):
            problem = "the type name is not a short plain word (letters, digits, _ + -; at most 32 characters)"
        else:
            try:
                positions[row] = [float(v) for v in words[1:]]
            except ValueError:
                problem = "x, y, z are not all numbers"
            if problem is None and not np.all(np.isfinite(positions[row])):
                problem = "a coordinate is NaN or infinite"
        if problem:
            raise SystemFileError(f"{key}: {path} line {row + 3}: {problem}")
        types.append(words[0])
    return types, positions


def _start_set(data: dict, n: int) -> np.ndarray | None:
    """``[particles] starts``: k ≥ 1 start configurations of n rows [x, y, z] each, or ``None``."""
    table = data["particles"]
    if "starts" not in table:
        return None
    value = table["starts"]
    expected = (f"a list of start configurations, each a list of {n} rows [x, y, z] (one per particle), "
                "e.g. starts = [[[x, y, z], ...], [[x, y, z], ...]]")
    if not isinstance(value, list) or not value:
        _fail("particles.starts", expected, value)
    arr = _numeric_array(value, "particles.starts", expected)
    if arr.ndim != 3 or arr.shape[1:] != (n, 3):
        _fail("particles.starts", expected + f"; got an array of shape {arr.shape}", value)
    if not np.all(np.isfinite(arr)):
        _fail("particles.starts", "finite coordinates", value)
    return arr


def _particles(data: dict, folder: pathlib.Path, allow_outside_files: bool) -> tuple[list[str], np.ndarray]:
    table = data["particles"]
    if not isinstance(table, dict):
        _fail("particles", "a table with 'file' (XYZ) or 'types' and 'positions'", table)
    _check_keys(table, {"file", "types", "positions", "starts"}, "particles")
    if "file" in table:
        if "positions" in table or "types" in table:
            _fail("particles", "either 'file' or inline 'types' and 'positions', not both", sorted(table))
        if not isinstance(table["file"], str):
            _fail("particles.file", "a file name (string)", table["file"])
        target = resolve_inside(folder, table["file"], allow_outside=allow_outside_files, error=SystemFileError,
                                what="particles.file")
        return read_xyz(target)
    for key in ("types", "positions"):
        if key not in table:
            _fail(f"particles.{key}", "a list (this key is required without 'file')", None)
    types = table["types"]
    if not isinstance(types, list) or not types or not all(isinstance(t, str) and TYPE_NAME.fullmatch(t)
                                                           for t in types):
        _fail("particles.types", "a list of type names (short plain words: letters, digits, _ + -)", types)
    positions = _numeric_array(table["positions"], "particles.positions", "a list of [x, y, z] rows")
    if positions.shape != (len(types), 3) or not np.all(np.isfinite(positions)):
        _fail("particles.positions", f"{len(types)} rows of [x, y, z] (one per entry of particles.types)",
              table["positions"])
    return list(types), positions


class _Group:
    """One named bonded/restraint group: its spec, the builder and its end-state membership."""

    def __init__(self, kind: str, spec: dict, where: str, build: Callable[[dict, str], Any]):
        self.kind, self.spec, self.where, self.build = kind, spec, where, build
        self.name = spec.get("name", where.replace("[", "_").replace("]", "").replace(".", "_"))
        if not isinstance(self.name, str):
            _fail(f"{where}.name", "a string", self.name)
        self.state = _string(spec, "state", where, GROUP_STATES, "both")
        self.term_a = build(spec, where)
        self.term_b = None


def _bonds_builder(n: int):
    from .energy import HarmonicBonds

    def build(spec, where):
        _check_keys(spec, {"atoms", "length", "force_constant", "name", "state"}, where)
        atoms = _integer_rows(spec.get("atoms"), f"{where}.atoms", 2, n)
        return HarmonicBonds(bonds=jnp.asarray(atoms), lengths=jnp.asarray(_per_row(spec, "length", where, len(atoms), True)),
                             force_constants=jnp.asarray(_per_row(spec, "force_constant", where, len(atoms))),
                             name=spec.get("name", where))
    return build


def _angles_builder(n: int):
    from .energy import HarmonicAngles

    def build(spec, where):
        _check_keys(spec, {"atoms", "angle", "force_constant", "name", "state"}, where)
        atoms = _integer_rows(spec.get("atoms"), f"{where}.atoms", 3, n)
        angle = _per_row(spec, "angle", where, len(atoms))
        if np.any((angle <= 0) | (angle > 180)):
            _fail(f"{where}.angle", "equilibrium angles in degrees, in (0, 180]", spec.get("angle"))
        return HarmonicAngles(angles=jnp.asarray(atoms), equilibrium_angles=jnp.asarray(np.radians(angle)),
                              force_constants=jnp.asarray(_per_row(spec, "force_constant", where, len(atoms))),
                              name=spec.get("name", where))
    return build


def _torsions_builder(n: int):
    from .energy import PeriodicTorsions, RyckaertBellemansTorsions

    def build(spec, where):
        form = _string(spec, "form", where, TORSION_FORMS)
        atoms = _integer_rows(spec.get("atoms"), f"{where}.atoms", 4, n)
        name = spec.get("name", where)
        if form == "ryckaert_bellemans":
            _check_keys(spec, {"atoms", "form", "coefficients", "name", "state"}, where)
            coefficients = _vector(spec, "coefficients", where)
            if not 1 <= coefficients.size <= 8:
                _fail(f"{where}.coefficients", "1 to 8 coefficients C0, C1, … (energy units)", spec.get("coefficients"))
            return RyckaertBellemansTorsions(torsions=jnp.asarray(atoms), coefficients=jnp.asarray(coefficients),
                                             name=name)
        _check_keys(spec, {"atoms", "form", "force_constants", "multiplicities", "phases", "name", "state"}, where)
        k = _vector(spec, "force_constants", where)
        m = _vector(spec, "multiplicities", where, k.size)
        if np.any(m != np.round(m)) or np.any(m < 1):
            _fail(f"{where}.multiplicities", "positive whole numbers", spec.get("multiplicities"))
        phases = _vector(spec, "phases", where, k.size, default=np.zeros(k.size))
        rows = len(atoms)
        return PeriodicTorsions(torsions=jnp.asarray(atoms), force_constants=jnp.asarray(np.tile(k, (rows, 1))),
                                multiplicities=jnp.asarray(np.tile(m, (rows, 1))),
                                phases=jnp.asarray(np.tile(np.radians(phases), (rows, 1))), name=name)
    return build


def _restraints_builder(n: int, positions: np.ndarray):
    from .energy import DistanceRestraints, PositionRestraints

    def build(spec, where):
        form = _string(spec, "form", where, RESTRAINT_FORMS)
        name = spec.get("name", where)
        if form == "position":
            _check_keys(spec, {"form", "atoms", "reference", "force_constant", "radius", "name", "state"}, where)
            atoms = _integer_rows(spec.get("atoms"), f"{where}.atoms", 1, n)[:, 0]
            if "reference" in spec:
                reference = _numeric_array(spec["reference"], f"{where}.reference", f"{len(atoms)} rows of [x, y, z]")
                if reference.size != 3 * len(atoms):
                    _fail(f"{where}.reference", f"{len(atoms)} rows of [x, y, z]", spec["reference"])
                reference = reference.reshape(len(atoms), 3)
            else:
                reference = positions[atoms]
            k = _per_row(spec, "force_constant", where, len(atoms), positive=True)
            radius = None if "radius" not in spec else jnp.asarray(_per_row(spec, "radius", where, len(atoms)))
            return PositionRestraints(indices=jnp.asarray(atoms), reference=jnp.asarray(reference),
                                      force_constants=jnp.asarray(k), radius=radius, name=name)
        _check_keys(spec, {"form", "atoms", "target", "lower", "upper", "force_constant", "name", "state"}, where)
        atoms = _integer_rows(spec.get("atoms"), f"{where}.atoms", 2, n)
        if "target" in spec:
            lower = upper = _per_row(spec, "target", where, len(atoms))
        else:
            lower = _per_row(spec, "lower", where, len(atoms))
            upper = _per_row(spec, "upper", where, len(atoms))
        return DistanceRestraints(pairs=jnp.asarray(atoms), lower=jnp.asarray(lower), upper=jnp.asarray(upper),
                                  force_constants=jnp.asarray(_per_row(spec, "force_constant", where, len(atoms), True)),
                                  name=name)
    return build


def _group_list(table: Any, key: str) -> list[dict]:
    if not isinstance(table, list) or not all(isinstance(t, dict) for t in table):
        _fail(key, f"an array of tables ([[{key}]] entries)", table)
    return table


def _nonbonded(data: dict, types: list[str], n: int, unit_system: str, box, bonds: np.ndarray, decouple):
    from .energy import ScaledPairs, bonded_exclusions, lennard_jones_type_parameters, nonbonded_term
    from .energy.nonbonded import MIXING_RULES, scaled_pair_parameters

    table = data["nonbonded"]
    where = "nonbonded"
    if not isinstance(table, dict):
        _fail(where, "a table of nonbonded settings", table)
    _check_keys(table, {"cutoff", "shift", "tail_correction", "reaction_field_dielectric", "dielectric", "mixing",
                        "exclude_bonded", "scale_14_lj", "scale_14_coulomb", "exclusions", "soft_core_alpha",
                        "pair_search", "neighbour_capacity"}, where)
    type_table = data.get("types")
    if not isinstance(type_table, dict) or not type_table:
        _fail("types", "a table of per-type parameters, e.g. [types.Ar] sigma = …, epsilon = …, charge = …", type_table)
    names = sorted(type_table)
    for t in sorted(set(types)):
        if t not in type_table:
            _fail(f"types.{t}", f"parameters for particle type {t!r} (sigma, epsilon, charge)", None)
    sigma, epsilon, charge = [], [], []
    for t in names:
        spec = type_table[t]
        if not isinstance(spec, dict):
            _fail(f"types.{t}", "a table with sigma, epsilon and charge", spec)
        _check_keys(spec, {"sigma", "epsilon", "charge"}, f"types.{t}")
        sigma.append(_number(spec, "sigma", f"types.{t}", positive=True))
        eps = _number(spec, "epsilon", f"types.{t}")
        if eps < 0:
            _fail(f"types.{t}.epsilon", "a number ≥ 0", eps)
        epsilon.append(eps)
        charge.append(_number(spec, "charge", f"types.{t}", default=0.0))
    index = {t: i for i, t in enumerate(names)}
    type_of = np.asarray([index[t] for t in types], dtype=np.int32)
    mixing = _string(table, "mixing", where, MIXING_RULES, "lorentz-berthelot")
    s, e = np.asarray(sigma), np.asarray(epsilon)
    sigma_table = np.sqrt(np.outer(s, s)) if mixing == "geometric" else 0.5 * (s[:, None] + s[None, :])
    lj = lennard_jones_type_parameters(type_of, sigma_table, np.sqrt(np.outer(e, e)))
    charges = np.asarray(charge)[type_of]
    cutoff = _number(table, "cutoff", where, default=float("nan"))
    cutoff = None if np.isnan(cutoff) else cutoff
    if cutoff is not None and cutoff <= 0:
        _fail(f"{where}.cutoff", "a positive length", cutoff)
    if box is not None and cutoff is None:
        _fail(f"{where}.cutoff", "a cutoff (length) at most half the shortest box edge: the box is periodic", None)
    if box is not None and cutoff > 0.5 * float(np.min(box)) * (1 + 1e-12):
        _fail(f"{where}.cutoff", f"at most half the shortest box edge ({0.5 * float(np.min(box)):g})", cutoff)
    shift = _boolean(table, "shift", where, False)
    tail = _boolean(table, "tail_correction", where, False)
    if tail and (box is None or shift):
        _fail(f"{where}.tail_correction", "false unless the box is periodic and shift = false "
              "(the analytic tail is for a truncated, unshifted LJ fluid)", True)
    rf = table.get("reaction_field_dielectric")
    if rf is not None:
        conducting = isinstance(rf, float) and np.isinf(rf) and rf > 0  # TOML `inf`: a conducting boundary
        rf = float("inf") if conducting else _number(table, "reaction_field_dielectric", where, positive=True)
        if cutoff is None:
            _fail(f"{where}.reaction_field_dielectric", "a cutoff as well (a reaction field acts beyond the cutoff)", rf)
    dielectric = _number(table, "dielectric", where, default=1.0, positive=True)
    separation = table.get("exclude_bonded", 3)
    if not isinstance(separation, int) or isinstance(separation, bool) or separation not in (0, 1, 2, 3):
        _fail(f"{where}.exclude_bonded", "0, 1, 2 or 3 (exclude pairs up to this many bonds apart)", separation)
    excluded = [np.zeros((0, 2), np.int32)]
    pairs_14 = np.zeros((0, 2), np.int32)
    if separation and len(bonds):
        ex, pairs_14 = bonded_exclusions(bonds, n, separation)
        excluded.append(ex)
    if "exclusions" in table:
        excluded.append(np.sort(_integer_rows(table["exclusions"], f"{where}.exclusions", 2, n), axis=1))
    exclusions = np.unique(np.concatenate(excluded), axis=0) if sum(len(x) for x in excluded) else None
    scale_lj = _number(table, "scale_14_lj", where, default=0.0)
    scale_c = _number(table, "scale_14_coulomb", where, default=0.0)
    if (scale_lj or scale_c) and separation != 3:
        _fail(f"{where}.scale_14_lj", "0 unless exclude_bonded = 3 (scaled 1-4 pairs replace excluded ones)", scale_lj)
    alpha = _number(table, "soft_core_alpha", where, default=0.5, positive=True)
    pair_search = _string(table, "pair_search", where, ("all_pairs", "neighbour_list"), "all_pairs")
    capacity = table.get("neighbour_capacity")
    if capacity is not None and (not isinstance(capacity, int) or isinstance(capacity, bool) or capacity < 1):
        _fail(f"{where}.neighbour_capacity", "a positive whole number of pairs", capacity)
    has_lj = bool(np.any(e > 0))
    has_charge = bool(np.any(charges != 0))
    if not (has_lj or has_charge):
        _fail("types", "at least one type with epsilon > 0 or a charge (else drop [nonbonded])", type_table)
    term = nonbonded_term(
        n, lennard_jones=lj if has_lj else None, charges=charges if has_charge else None, exclusions=exclusions,
        cutoff=cutoff, lj_shift=shift, reaction_field_dielectric=rf, dielectric=dielectric, units=unit_system,
        alchemical=decouple, soft_core_alpha=alpha, tail_correction_box=box if tail else None)
    extra = []
    if (scale_lj or scale_c) and len(pairs_14):
        from .units import unit_system as get_unit_system
        ps, pe, pq = scaled_pair_parameters(pairs_14, lj, charges, scale_lj, scale_c)
        extra.append(ScaledPairs(pairs=jnp.asarray(pairs_14), sigma=ps, epsilon=pe, charge_products=pq,
                                 coulomb_constant=get_unit_system(unit_system).coulomb_constant,
                                 dielectric=dielectric, name="pairs_14"))
    info = {"types": names, "cutoff": cutoff, "shift": shift, "tail_correction": tail, "reaction_field_dielectric": rf,
            "pair_search": pair_search, "neighbour_capacity": capacity, "charged": has_charge}
    return term, extra, info


def _parse_particle_system(data: dict, source: str, allow_outside_files: bool = False) -> System:
    from .alchemy import STAGE_SHAPES, ParameterInterpolationPath, SoftCoreDecouplingPath
    from .energy import assemble
    from .units import unit_system as get_unit_system

    _check_keys(data, PARTICLE_TOP_KEYS, "top level (particle system)")
    if "units" not in data:
        _fail("units", f"one of {list(PARTICLE_UNIT_SYSTEMS)} (required for particle systems)", None)
    unit_system = data["units"]
    if not isinstance(unit_system, str) or unit_system not in PARTICLE_UNIT_SYSTEMS:
        _fail("units", f"one of {list(PARTICLE_UNIT_SYSTEMS)} for a particle system (energies kJ/mol, lengths nm, "
              "temperature K; or Lennard-Jones reduced units)", unit_system)
    if unit_system == "reduced":
        if "temperature" in data:
            _fail("temperature", "no temperature with units = 'reduced' (give kT = T* instead)", data["temperature"])
        kT = _number(data, "kT", "top level", positive=True)
        energy_unit = "reduced"
    else:
        if "kT" in data:
            _fail("kT", "no kT with units = 'kJ/mol-nm-K': give temperature in kelvin", data["kT"])
        kT = float(get_unit_system(unit_system).kT(_number(data, "temperature", "top level", positive=True)))
        energy_unit = "kJ/mol"
    folder = _data_folder(source)
    types, positions = _particles(data, folder, allow_outside_files)
    n = len(types)
    starts = _start_set(data, n)

    box = None
    if "box" in data:
        table = data["box"]
        if not isinstance(table, dict):
            _fail("box", "a table with edges = [Lx, Ly, Lz] (orthorhombic, periodic)", table)
        _check_keys(table, {"edges"}, "box")
        box = _vector(table, "edges", "box", 3, positive=True) if not isinstance(table.get("edges"), (int, float)) \
            else np.full(3, _number(table, "edges", "box", positive=True))

    # ---- bonded groups and restraints
    topology = data.get("topology", {})
    if not isinstance(topology, dict):
        _fail("topology", "a table with [[topology.bonds]], [[topology.angles]], [[topology.torsions]]", topology)
    _check_keys(topology, {"bonds", "angles", "torsions"}, "topology")
    groups: list[_Group] = []
    builders = {"bonds": _bonds_builder(n), "angles": _angles_builder(n), "torsions": _torsions_builder(n)}
    for kind in ("bonds", "angles", "torsions"):
        for i, spec in enumerate(_group_list(topology.get(kind, []), f"topology.{kind}")):
            groups.append(_Group(kind, spec, f"topology.{kind}[{i}]", builders[kind]))
    for i, spec in enumerate(_group_list(data.get("restraints", []), "restraints")):
        groups.append(_Group("restraints", spec, f"restraints[{i}]", _restraints_builder(n, positions)))
    names = [g.name for g in groups]
    clashes = [g.where for g in groups if names.count(g.name) > 1]
    if clashes:
        raise SystemFileError(f"{clashes[0]}.name: expected distinct group names; {', '.join(clashes)} share a name")
    for g in groups:  # the terms carry the group name (assemble needs distinct names)
        g.term_a = g.build({**g.spec, "name": g.name}, g.where)
    bonds = np.concatenate([np.asarray(g.term_a.bonds) for g in groups if g.kind == "bonds"] or [np.zeros((0, 2), np.int32)])

    # ---- the change from A to B
    change = data.get("change", {})
    if not isinstance(change, dict):
        _fail("change", "a table describing how state B differs from A", change)
    _check_keys(change, {"decouple", "electrostatics_share", "stage_shape", "parameters"}, "change")
    decouple = None
    if "decouple" in change:
        decouple = _integer_rows(change["decouple"], "change.decouple", 1, n)[:, 0]
        if "nonbonded" not in data:
            _fail("change.decouple", "a [nonbonded] table as well (only nonbonded interactions are decoupled)",
                  change["decouple"])
    by_name = {g.name: g for g in groups}
    for i, spec in enumerate(_group_list(change.get("parameters", []), "change.parameters")):
        where = f"change.parameters[{i}]"
        target = spec.get("group")
        if not isinstance(target, str) or target not in by_name:
            _fail(f"{where}.group", f"the name of a bonded or restraint group, one of {sorted(by_name)}", target)
        group = by_name[target]
        if group.state != "both":
            _fail(f"{where}.group", "a group present in both states (state = 'both')", target)
        if group.term_b is not None:
            _fail(f"{where}.group", "each group changed at most once", target)
        fixed = {"atoms", "form", "name", "state"}
        bad = sorted(set(spec) & fixed)
        if bad:
            _fail(f"{where}.{bad[0]}", "unchanged: only parameters can change along the path (not atoms or form)", spec[bad[0]])
        new = {**group.spec, **{k: v for k, v in spec.items() if k != "group"}, "name": group.name}
        group.term_b = group.build(new, where)
        import jax
        shapes_a = [np.shape(x) for x in jax.tree_util.tree_leaves(group.term_a)]
        shapes_b = [np.shape(x) for x in jax.tree_util.tree_leaves(group.term_b)]
        if shapes_a != shapes_b:
            _fail(where, "parameters with the same number of values as in state A (they are interpolated)", spec)
    if not (decouple is not None or any(g.term_b is not None or g.state != "both" for g in groups)):
        _fail("change", "some difference between the end states: decouple = [...], [[change.parameters]], "
              "or a group with state = 'a' or 'b'", change)

    nonbonded, pair_terms, info = None, [], {}
    if "nonbonded" in data:
        nonbonded, pair_terms, info = _nonbonded(data, types, n, unit_system, box, bonds, decouple)
    elif "types" in data:
        _fail("types", "no [types] without a [nonbonded] table (types only carry nonbonded parameters)", data["types"])
    shared = [g.term_a for g in groups if g.state == "both" and g.term_b is None] + pair_terms
    changed = [g for g in groups if g.term_b is not None]
    only_a = [g.term_a for g in groups if g.state == "a"]
    only_b = [g.term_a for g in groups if g.state == "b"]
    every = shared + [g.term_a for g in changed] + only_a + only_b + ([nonbonded] if nonbonded is not None else [])
    try:
        model = assemble(every or [], box=box, units=unit_system)
    except ValueError as err:
        raise SystemFileError(f"the terms do not fit together: {err}") from None
    if decouple is not None:
        share = change.get("electrostatics_share")
        if share is not None:
            share = _number(change, "electrostatics_share", "change")
            if not 0.0 <= share < 1.0:
                _fail("change.electrostatics_share", "a number in [0, 1)", share)
        shape = _string(change, "stage_shape", "change", STAGE_SHAPES, "smooth")
        model_ab = assemble(shared + [nonbonded], box=box, units=unit_system)
        path = SoftCoreDecouplingPath(
            model_ab, kT, electrostatics_share=share, stage_shape=shape,
            changed_a=[g.term_a for g in changed], changed_b=[g.term_b for g in changed], only_a=only_a, only_b=only_b,
            pair_search=info.get("pair_search", "all_pairs"), neighbour_capacity=info.get("neighbour_capacity"),
            reference_positions=positions)
    else:
        for key in ("electrostatics_share", "stage_shape"):
            if key in change:
                _fail(f"change.{key}", "no value without change.decouple", change[key])
        path = ParameterInterpolationPath(
            shared + ([nonbonded] if nonbonded is not None else []), [g.term_a for g in changed],
            [g.term_b for g in changed], only_a, only_b, box=model.box, kT=kT)
    reference, settings = _reference_and_settings(data, folder, allow_outside_files)
    name, description = _name_and_description(data, source)
    particles = {"count": n, "types": sorted(set(types)), "box": None if box is None else box.tolist(),
                 "unit_system": unit_system, "decoupled": [] if decouple is None else decouple.tolist(),
                 "changed": [g.name for g in changed], "released": [t.name for t in only_a],
                 "added": [t.name for t in only_b], **info}
    return System(
        name=name, description=description, energy_a=path.end_function("a"), energy_b=path.end_function("b"),
        start_a=positions, start_b=positions.copy(),
        kT=kT, units=energy_unit, reference=reference, settings=settings, source=source, path=path,
        unit_system=unit_system, particles=particles, starts=starts,
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
