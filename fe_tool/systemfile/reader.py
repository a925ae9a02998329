"""The shared reader of system files: value checks, units, old key names, TOML and XYZ files.

Every check raises :class:`SystemFileError` naming the key and what it expects. A message shows
a value only when it is a number or true/false; text and lists are described by kind and size, so
an error never repeats file contents. The format itself is described in docs/system-files.md.
"""
from __future__ import annotations

import math
import pathlib
import re
import warnings
from typing import Any

import numpy as np

try:
    import tomllib
except ModuleNotFoundError:  # Python < 3.11
    import tomli as tomllib

from ..filesafety import read_regular_file


class SystemFileError(ValueError):
    """A system file is malformed; the message names the key and what is expected."""


# ------------------------------------------------------------------ describing values without repeating them

def describe(value: Any) -> str:
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


def fail(key: str, expected: str, got: Any) -> None:
    """Raise a :class:`SystemFileError`: ``key: expected …, got …``."""
    raise SystemFileError(f"{key}: expected {expected}, got {describe(got)}")


# ------------------------------------------------------------------ single values

def is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def finite(value: Any) -> bool:
    try:
        return is_number(value) and math.isfinite(float(value))
    except OverflowError:  # a whole number too large for a float
        return False


def numeric_array(value: Any, key: str, expected: str) -> np.ndarray:
    """A (nested) list of numbers as a float array; text, true/false and ragged lists are refused."""
    def numbers_only(v: Any) -> bool:
        return all(numbers_only(u) for u in v) if isinstance(v, list) else finite(v)

    if not numbers_only(value):
        fail(key, expected + " (finite numbers, not text or true/false)", value)
    try:
        return np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):  # ragged rows
        fail(key, expected, value)


def number(table: dict, key: str, where: str, default: Any = None, positive: bool = False) -> float:
    """A finite number (required when ``default`` is None)."""
    if key not in table:
        if default is None:
            fail(f"{where}.{key}", "a number (this key is required)", None)
        return default
    value = table[key]
    if not finite(value):
        fail(f"{where}.{key}", "a finite number", value)
    if positive and value <= 0:
        fail(f"{where}.{key}", "a positive number", value)
    return float(value)


def vector(table: dict, key: str, where: str, length: int | None = None, default: Any = None,
           positive: bool = False) -> np.ndarray:
    """A flat list of finite numbers (one number stands for ``length`` equal ones)."""
    if key not in table:
        if default is None:
            fail(f"{where}.{key}", "a list of numbers (this key is required)", None)
        return np.asarray(default, dtype=np.float64)
    value = table[key]
    if is_number(value):
        value = [value] * (length or 1)
    if not isinstance(value, list):
        fail(f"{where}.{key}", "a list of numbers", value)
    arr = numeric_array(value, f"{where}.{key}", "a flat list of numbers")
    if arr.ndim != 1:
        fail(f"{where}.{key}", "a flat list of finite numbers", value)
    if length is not None and arr.size != length:
        fail(f"{where}.{key}", f"{length} numbers (one per coordinate)", value)
    if positive and np.any(arr <= 0):
        fail(f"{where}.{key}", "positive numbers", value)
    return arr


def per_row(table: dict, key: str, where: str, rows: int, positive: bool = False, default: Any = None) -> np.ndarray:
    """A number (shared by all rows) or one number per row."""
    if key not in table and default is None:
        fail(f"{where}.{key}", "a number or one number per row (this key is required)", None)
    value = table.get(key, default)
    arr = vector({key: value}, key, where)
    if arr.size == 1:
        arr = np.full(rows, arr[0])
    if arr.size != rows:
        fail(f"{where}.{key}", f"one number or {rows} numbers (one per row of atoms)", value)
    if positive and np.any(arr <= 0):
        fail(f"{where}.{key}", "positive numbers", value)
    return arr


def text(table: dict, key: str, where: str, default: str) -> str:
    value = table.get(key, default)
    if not isinstance(value, str):
        fail(f"{where}.{key}" if where else key, "text (a string in quotes)", value)
    return value


def boolean(table: dict, key: str, where: str, default: bool) -> bool:
    value = table.get(key, default)
    if not isinstance(value, bool):
        fail(f"{where}.{key}", "true or false", value)
    return value


def choice(table: dict, key: str, where: str, choices: tuple, default: str | None = None) -> str:
    """One of ``choices`` (required when ``default`` is None)."""
    value = table.get(key, default)
    if value not in choices:
        fail(f"{where}.{key}", f"one of {list(choices)}" + ("" if default is None else f" (default {default!r})"),
             value)
    return value


def whole_number(value: Any, key: str, minimum: int) -> int:
    """An integer ≥ ``minimum``; a float that is a whole number (1e5, 100000.0) is taken as that integer."""
    if isinstance(value, float) and math.isfinite(value) and value.is_integer() and abs(value) <= 2.0**53:
        value = int(value)
    if not isinstance(value, int) or isinstance(value, bool) or not minimum <= value < 2**63:
        fail(key, f"a whole number ≥ {minimum} (e.g. 100000 or 1e5; no quotes, no fraction)", value)
    return value


def integer_rows(value: Any, key: str, width: int, n: int) -> np.ndarray:
    """(m, width) particle indices in [0, n), distinct within each row."""
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
        fail(key, f"{shape} (integers, 0-based)", value)
    if arr.min() < 0 or arr.max() >= n:
        fail(key, f"particle indices from 0 to {n - 1}", value)
    for row in arr:
        if len(set(row.tolist())) != width:
            fail(key, "distinct particles within each row", row.tolist())
    return arr.astype(np.int32)


def check_keys(table: dict, allowed: set[str], where: str) -> None:
    unknown = sorted(set(table) - allowed)
    if unknown:
        shown = [str(k)[:40] for k in unknown[:5]] + (["..."] if len(unknown) > 5 else [])
        raise SystemFileError(f"{where}: unknown key(s) {shown}; allowed keys are {sorted(allowed)}")


def table_of(data: dict, key: str, expected: str) -> dict:
    """``data[key]`` if it is a table ({} when absent)."""
    value = data.get(key, {})
    if not isinstance(value, dict):
        fail(key, expected, value)
    return value


# ------------------------------------------------------------------ old key names

def renamed(source: str, old: str, new: str) -> None:
    """Say (FutureWarning) that ``old`` is read for now but ``new`` is its name."""
    warnings.warn(f"{source}: {old} is an old name, read for now but not in a later release; write {new} instead "
                  "(docs/system-files.md)", FutureWarning, stacklevel=2)


def move_old_key(table: dict, old: str, new: tuple[str, ...], where: str, source: str) -> None:
    """Move ``table[old]`` to ``table[new[0]][new[1]]…`` (in place) with a FutureWarning naming the new key.

    Both spellings at once are refused: the file must say one thing."""
    if old not in table:
        return
    new_key = ".".join((where, *new))
    renamed(source, f"{where}.{old}", new_key)
    inner = table
    for part in new[:-1]:
        nested = inner.setdefault(part, {})
        if not isinstance(nested, dict):
            fail(f"{where}.{part}", "a table", nested)
        inner = nested
    if new[-1] in inner:
        raise SystemFileError(f"{where}.{old}: the old name of {new_key}, which is given too; keep only {new_key}")
    inner[new[-1]] = table.pop(old)


# ------------------------------------------------------------------ units and kT

UNIT_NAMES = ("kJ/mol", "kcal/mol", "reduced")
"""What ``units`` may say in either layout."""
OLD_UNIT_NAMES = {"kJ/mol-nm-K": "kJ/mol"}
"""Old spellings still read (particle files) with a FutureWarning."""


def read_units(data: dict, source: str, *, required: bool) -> str:
    """The file's ``units``: "kJ/mol", "kcal/mol" or "reduced" (default "reduced" unless ``required``)."""
    if "units" not in data:
        if required:
            fail("units", f"one of {list(UNIT_NAMES)} (required for particle systems)", None)
        return "reduced"
    value = data["units"]
    if required and isinstance(value, str) and value in OLD_UNIT_NAMES:
        renamed(source, f'units = "{value}"', f'units = "{OLD_UNIT_NAMES[value]}"')
        return OLD_UNIT_NAMES[value]
    if not isinstance(value, str) or value not in UNIT_NAMES:
        fail("units", f"one of {list(UNIT_NAMES)} (energies in kJ/mol or kcal/mol with a temperature in K, "
             "or reduced units with kT)", value)
    return value


def read_kT(data: dict, units: str, kT_default: float | None) -> float:
    """kT from ``kT`` (reduced units) or from ``temperature`` in K (kT = R·T, CODATA 2018)."""
    from ..units import thermal_energy

    if units == "reduced":
        if "temperature" in data:
            fail("temperature", "no temperature with units = 'reduced' (give kT instead)", data["temperature"])
        return number(data, "kT", "top level", default=kT_default, positive=True)
    if "kT" in data:
        fail("kT", f"no kT with units = {units!r}: give temperature in kelvin", data["kT"])
    return float(thermal_energy(number(data, "temperature", "top level", positive=True), unit=units))


# ------------------------------------------------------------------ TOML files

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


def read_toml(path: pathlib.Path) -> dict:
    """The tables of a system file: a regular UTF-8 TOML file of at most ``MAX_SYSTEM_FILE_BYTES``."""
    if not path.exists() and not path.is_symlink():
        raise SystemFileError(f"system file {str(path)!r} does not exist; `fe-tool list` shows the bundled systems")
    raw = read_regular_file(path, MAX_SYSTEM_FILE_BYTES, error=SystemFileError, what="system file")
    try:
        content = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        raise SystemFileError(f"{path.name}: not UTF-8 text (undecodable byte at offset {err.start})") from None
    try:
        return tomllib.loads(content)
    except tomllib.TOMLDecodeError as err:
        raise SystemFileError(f"{path.name}: not valid TOML: {toml_error_text(err)}") from None
    except RecursionError:
        raise SystemFileError(f"{path.name}: not valid TOML: arrays or tables nested too deeply") from None


# ------------------------------------------------------------------ XYZ files

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
        problem = _xyz_line_problem(words, positions, row)
        if problem:
            raise SystemFileError(f"{key}: {path} line {row + 3}: {problem}")
        types.append(words[0])
    return types, positions


def _xyz_line_problem(words: list[str], positions: np.ndarray, row: int) -> str | None:
    """Fill ``positions[row]`` from one ``type x y z`` line; what is wrong with it, or None."""
    if len(words) != 4:
        return f"{len(words)} fields where 'type x y z' has 4"
    if not TYPE_NAME.fullmatch(words[0]):
        return "the type name is not a short plain word (letters, digits, _ + -; at most 32 characters)"
    try:
        positions[row] = [float(v) for v in words[1:]]
    except ValueError:
        return "x, y, z are not all numbers"
    if not np.all(np.isfinite(positions[row])):
        return "a coordinate is NaN or infinite"
    return None
