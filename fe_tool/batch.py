"""Batches: many ΔF calculations from one TOML file, run in parallel, resumable.

A batch file is code: its factories (``module:function``) are imported and called, and
``python_path`` puts folders on the import path, so a batch file must be trusted like a
Python script.  Only run batch files you wrote or checked.

Batch file layout (TOML; every key is checked)::

    name = "probe-restraint-scan"          # label of the batch
    python_path = [".."]                   # folders (relative to this file) added to sys.path
                                           # so factory modules import, in workers too

    [defaults]                             # applied to every pair, overridden per pair
    seed = 0
    settings = { budget = 150000 }         # fe_tool.estimate options

    # pairs run and are tabulated in this order: every [[pair]], then every [[scan]] point
    [[pair]]                               # a system file
    name = "harmonic"
    system = "../systems/harmonic_3d.toml" # path relative to this file, or a bundled name
    settings = { seed = 4 }

    [[pair]]                               # a Python factory
    name = "probe-k2"
    factory = "examples.restraint_scan:probe_restraint"
    parameters = { stiffness = 2.0 }

    [[scan]]                               # a factory over a grid of parameters
    name = "probe-k{stiffness}"            # str.format template over the varied values
    factory = "examples.restraint_scan:probe_restraint"
    parameters = { dimensions = 2 }        # fixed keywords
    vary = { stiffness = [0.5, 1.0, 4.0] } # Cartesian product of the lists
    seeds = [0, 1]                         # optional: repeat every point with these seeds
                                           # (usable as {seed} in the name template)
    states = ["site", "k{stiffness}"]      # optional, also in [[pair]]: the two states the pair joins,
                                           # ΔF = F(second) − F(first); templates like the name.  When
                                           # pairs name states, the batch's pairs form a network
                                           # (fe_tool.network): see fe_tool.network_command

A factory ``module:function`` is called with ``parameters`` as keywords and returns
``(energy_a, energy_b, start_a, start_b, kT)`` or the same with a sixth item, a dict of
``estimate`` options (overridden by the file's ``settings``).  Pair names must stay distinct
after they are made file-safe and compared ignoring case (each pair has its own result file).

Results go to ``results_dir/results.csv`` and ``results_dir/results.jsonl`` (one row per
pair, batch order) and the full result of each pair to ``results_dir/pairs/NAME.json``.
Both tables are rewritten atomically (temporary file + ``os.replace``) as soon as a pair
finishes, so an interrupted batch leaves complete tables behind.  Each row's ``status`` is
its outcome: ``ok``, ``flagged`` (finished, but the result is flagged as untrustworthy),
``bad input`` (the pair's own input was refused: its system file, its factory, its
settings) or ``internal error`` (an unexpected failure while computing, or a worker that
died).  A pair is identified by a content hash of its definition, the bytes of its system
file or factory module, its resolved settings and the fe_tool version; re-running the batch
skips pairs whose hash already has an ``ok`` or ``flagged`` row (failed pairs are tried
again unless ``retry_failed=False``).

One runner at a time owns a results folder: it holds an OS lock (``flock``) on
``results_dir/.batch-runner.lock`` for the whole run; the kernel releases it when the runner
ends, even by a crash, so a lock file left on disk never blocks.  Worker processes end
themselves when the runner dies.
"""
from __future__ import annotations

import argparse
import concurrent.futures
import contextlib
import csv
import dataclasses
import functools
import hashlib
import importlib
import importlib.util
import io
import itertools
import json
import math
import multiprocessing
import os
import pathlib
import re
import signal
import stat
import sys
import textwrap
import threading
import time
from typing import Any, Iterable, Iterator

try:
    import tomllib
except ModuleNotFoundError:  # Python < 3.11
    import tomli as tomllib

try:
    import fcntl
except ImportError:  # not a POSIX system: the results folder is not locked
    fcntl = None

from .exitcodes import EXIT_BAD_INPUT, EXIT_FLAGGED, EXIT_INTERNAL, EXIT_INTERRUPTED, EXIT_MEANINGS, EXIT_OK

__all__ = ["BatchError", "BatchSummary", "PairTask", "load_batch", "main_batch", "read_table", "run_batch",
           "COLUMNS", "OUTCOMES"]

COLUMNS = ("name", "hash", "delta_f", "stderr", "units", "estimator", "flagged", "warnings", "evaluations",
           "seconds", "status", "error", "source", "state_a", "state_b")
OUTCOMES = {"ok": EXIT_OK, "flagged": EXIT_FLAGGED, "bad input": EXIT_BAD_INPUT, "internal error": EXIT_INTERNAL}
FINISHED = ("ok", "flagged")          # outcomes a rerun keeps; the others are tried again
TOP_KEYS = {"name", "python_path", "defaults", "pair", "scan"}
DEFAULT_KEYS = {"seed", "settings"}
PAIR_KEYS = {"name", "system", "factory", "parameters", "settings", "seed", "states"}
SCAN_KEYS = {"name", "factory", "parameters", "settings", "seed", "seeds", "vary", "states"}
LOCK_NAME = ".batch-runner.lock"
MAX_BATCH_BYTES = 4 * 2 ** 20         # a batch file is a short text; refuse anything bigger before reading it
MAX_NAME_LENGTH = 120                 # pair names become file names (pairs/NAME.json)
MAX_ERROR_LENGTH = 1000
FACTORY_PATTERN = re.compile(r"[A-Za-z_]\w*(\.[A-Za-z_]\w*)*:[A-Za-z_]\w*")
RETURN_SHAPE = ("(energy_a, energy_b, start_a, start_b, kT), or the same with a dict of estimate options "
                "as a sixth item")


class BatchError(ValueError):
    """A batch file, results folder or runner option is refused; the message names it and the fix."""


class _PairFailure(Exception):
    """One pair cannot be computed; ``outcome`` is ``"bad input"`` or ``"internal error"``."""

    def __init__(self, outcome: str, message: str):
        super().__init__(message)
        self.outcome, self.message = outcome, message


@dataclasses.dataclass(frozen=True)
class PairTask:
    """One resolved pair: everything a worker needs (plain data, picklable)."""

    name: str
    kind: str                      # "system" or "factory"
    target: str                    # resolved system file path, or "module:function"
    parameters: dict[str, Any]
    settings: dict[str, Any]       # estimate options including "seed"
    python_path: tuple[str, ...]
    content_hash: str
    states: tuple[str, str] | None = None   # the two states the pair joins (network of pairs), if named


def _outcome(row: dict[str, Any]) -> str:
    """The outcome of a table row (rows of older tables said ``ok``/``failed`` only)."""
    status = row.get("status")
    if status == "ok" and row.get("flagged") in (True, "True", "true"):
        return "flagged"
    if status in OUTCOMES:
        return status
    return "internal error"   # an older "failed" row or a damaged one: it runs again


@dataclasses.dataclass
class BatchSummary:
    """What a batch run did.

    Attributes:
        name: batch label; ``results_dir``: folder of the tables.
        total: pairs in the batch; ``ran``: computed now; ``skipped``: already finished before.
        succeeded: pairs finished (outcome ``ok`` or ``flagged``) over the whole table (this run
            and earlier ones); ``failed``: pairs with outcome ``bad input`` or ``internal error``.
        rows: the table, one dict per pair in batch order (see :data:`COLUMNS`); ``status``
            holds the outcome.
        seconds: wall-clock time of this run.
    """

    name: str
    results_dir: pathlib.Path
    total: int
    ran: int
    skipped: int
    succeeded: int
    failed: int
    rows: list[dict[str, Any]]
    seconds: float

    @property
    def counts(self) -> dict[str, int]:
        """Pairs per outcome."""
        outcomes = [_outcome(r) for r in self.rows]
        return {o: outcomes.count(o) for o in OUTCOMES}

    @property
    def all_ok(self) -> bool:
        return len(self.rows) == self.total and all(_outcome(r) == "ok" for r in self.rows)

    @property
    def exit_code(self) -> int:
        """The most severe outcome: internal error 3 > bad input 2 > flagged 1 > ok 0."""
        return max((OUTCOMES[_outcome(r)] for r in self.rows), default=EXIT_OK)

    @property
    def csv_path(self) -> pathlib.Path:
        return self.results_dir / "results.csv"

    @property
    def jsonl_path(self) -> pathlib.Path:
        return self.results_dir / "results.jsonl"

    def __str__(self) -> str:
        counts = ", ".join(f"{n} {o}" for o, n in self.counts.items())
        return (f"batch {self.name}: {self.total} pairs: {counts} ({self.ran} run now, {self.skipped} already "
                f"done) in {self.seconds:.1f} s; table {self.csv_path}")


# ------------------------------------------------------------------ reading the batch

def _kind(value: Any) -> str:
    """A value's type in words, for messages (values read from a file are never echoed)."""
    words = {bool: "a boolean", str: "a string", int: "an integer", float: "a number", list: "a list",
             dict: "a table", tuple: "a tuple"}
    return words.get(type(value), f"a {type(value).__name__}")


def _describe(err: BaseException) -> str:
    """``Type: message`` on one line, shortened."""
    try:
        text = str(err)
    except Exception:  # an exception whose message itself fails
        text = ""
    text = " ".join(f"{type(err).__name__}: {text}".split()).rstrip(":")
    return text if len(text) <= MAX_ERROR_LENGTH else text[:MAX_ERROR_LENGTH - 1] + "…"


def _check_keys(table: Any, allowed: set[str], where: str) -> None:
    if not isinstance(table, dict):
        raise BatchError(f"{where}: expected a table, got {_kind(table)}")
    unknown = sorted(set(table) - allowed)
    if unknown:
        raise BatchError(f"{where}: unknown key(s) {unknown}; allowed keys are {sorted(allowed)}")


def _read_batch_file(path: pathlib.Path) -> dict[str, Any]:
    """The parsed TOML of a batch file; only a regular UTF-8 file of modest size is read."""
    try:
        info = path.stat()
    except FileNotFoundError:
        raise BatchError(f"no batch file {str(path)!r}; check the path") from None
    except OSError as err:
        raise BatchError(f"batch file {str(path)!r} cannot be read ({err.strerror})") from None
    if not stat.S_ISREG(info.st_mode):
        raise BatchError(f"batch file {str(path)!r} is not a regular file; give the path of a TOML batch file")
    try:
        with open(path, "rb") as fh:
            raw = fh.read(MAX_BATCH_BYTES + 1)
    except OSError as err:
        raise BatchError(f"batch file {str(path)!r} cannot be read ({err.strerror})") from None
    if len(raw) > MAX_BATCH_BYTES:
        raise BatchError(f"batch file {str(path)!r} is larger than {MAX_BATCH_BYTES // 2 ** 20} MiB; "
                         "a batch file is a short TOML text: check that this is the right file")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise BatchError(f"batch file {str(path)!r} is not UTF-8 text; save it as a UTF-8 TOML file") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise BatchError(f"batch file {str(path)!r} is not valid TOML ({err})") from None


def _file_digest(path: pathlib.Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _factory_source_digest(target: str, python_path: Iterable[str]) -> str:
    """sha256 of the factory module's source file, found without importing the module itself.

    Finding ``package.module`` imports ``package``, so a failing package import is refused here.
    """
    module = target.split(":", 1)[0]
    added = [p for p in python_path if p not in sys.path]
    sys.path[:0] = added
    try:
        spec = importlib.util.find_spec(module)
    except (Exception, SystemExit) as err:
        raise BatchError(f"factory {target!r}: module {module!r} cannot be found, or a package above it fails to "
                         f"import ({_describe(err)}); check the name and add its folder to python_path in the "
                         "batch file") from None
    finally:
        for p in added:
            sys.path.remove(p)
    if spec is None:
        raise BatchError(f"factory {target!r}: module {module!r} cannot be found; add its folder to python_path "
                         "in the batch file")
    if spec.origin and os.path.isfile(spec.origin):
        return _file_digest(pathlib.Path(spec.origin))
    return "no-source"


def _content_hash(definition: dict[str, Any]) -> str:
    from . import __version__

    text = json.dumps({**definition, "fe_tool": __version__}, sort_keys=True, default=repr)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _resolve_system(spec: str, base: pathlib.Path, where: str) -> pathlib.Path:
    from .systemfile import SystemFileError, find_system

    candidate = (base / spec)
    if candidate.is_file():
        return candidate.resolve()
    try:
        found = find_system(spec)
    except SystemFileError:
        found = None
    if found is None or not found.is_file():
        raise BatchError(f"{where}.system: {spec!r} is neither a file beside the batch file ({base}) nor a bundled "
                         "system; fix the path (`fe-tool list` shows the bundled systems)")
    return found.resolve()


def _check_name(name: Any, where: str) -> str:
    if not isinstance(name, str) or not name.strip():
        raise BatchError(f"{where}.name: expected a non-empty string, got {_kind(name)}")
    if len(name) > MAX_NAME_LENGTH:
        raise BatchError(f"{where}.name: a pair name is at most {MAX_NAME_LENGTH} characters (it names a file); "
                         f"this one has {len(name)}")
    return name


def _pair_settings(entry: dict, where: str, defaults: dict) -> dict[str, Any]:
    pair_settings = entry.get("settings", {})
    if not isinstance(pair_settings, dict):
        raise BatchError(f"{where}.settings: expected a table of estimate() options, got {_kind(pair_settings)}")
    settings = {**defaults.get("settings", {}), **pair_settings}
    settings.setdefault("seed", defaults.get("seed", 0))
    if "seed" in entry:
        settings["seed"] = entry["seed"]
    if not isinstance(settings["seed"], int) or isinstance(settings["seed"], bool):
        raise BatchError(f"{where}: seed must be an integer, got {_kind(settings['seed'])}")
    return settings


def _make_task(entry: dict, where: str, defaults: dict, base: pathlib.Path, python_path: tuple[str, ...]) -> PairTask:
    name = _check_name(entry.get("name"), where)
    has_system, has_factory = "system" in entry, "factory" in entry
    if has_system == has_factory:
        raise BatchError(f"{where} ({name!r}): give exactly one of 'system' (a system file) or "
                         "'factory' ('module:function')")
    settings = _pair_settings(entry, where, defaults)
    states = _pair_states(entry, where)
    labels = {"states": list(states)} if states else {}
    parameters = entry.get("parameters", {})
    if not isinstance(parameters, dict):
        raise BatchError(f"{where}.parameters: expected a table of keyword arguments, got {_kind(parameters)}")
    if has_system:
        if parameters:
            raise BatchError(f"{where} ({name!r}): 'parameters' belong to factories; use 'settings' for a system file")
        if not isinstance(entry["system"], str):
            raise BatchError(f"{where}.system: expected a file path or bundled name, got {_kind(entry['system'])}")
        path = _resolve_system(entry["system"], base, where)
        definition = {"kind": "system", "name": name, "file": _file_digest(path), "settings": settings, **labels}
        return PairTask(name, "system", str(path), {}, settings, python_path, _content_hash(definition), states)
    target = entry["factory"]
    if not isinstance(target, str) or not FACTORY_PATTERN.fullmatch(target):
        got = "a string not of that form" if isinstance(target, str) else _kind(target)
        raise BatchError(f"{where}.factory: expected 'module:function' (e.g. 'examples.restraint_scan:"
                         f"probe_restraint'), got {got}")
    definition = {"kind": "factory", "name": name, "factory": target, "parameters": parameters,
                  "source": _factory_source_digest(target, python_path), "settings": settings, **labels}
    return PairTask(name, "factory", target, dict(parameters), settings, python_path, _content_hash(definition),
                    states)


def _pair_states(entry: dict, where: str) -> tuple[str, str] | None:
    """The optional ``states = ["first", "second"]`` of a pair: two different non-empty labels."""
    states = entry.get("states")
    if states is None:
        return None
    if (not isinstance(states, list) or len(states) != 2 or not all(isinstance(s, str) and s.strip() for s in states)
            or states[0] == states[1]):
        raise BatchError(f"{where}.states: expected two different state labels, e.g. states = [\"apo\", \"bound\"] "
                         "(ΔF = F(second) − F(first))")
    return states[0], states[1]


def _fill_template(template: str, fill: dict[str, Any], where: str) -> str:
    if not isinstance(template, str):
        raise BatchError(f"{where}.name: expected a name template string such as 'probe-k{{stiffness}}', "
                         f"got {_kind(template)}")
    try:
        return template.format(**fill)
    except (KeyError, IndexError, ValueError, AttributeError, TypeError) as err:
        raise BatchError(f"{where}.name: the name template cannot be filled from the keys {sorted(fill)} "
                         f"({type(err).__name__}); use only {{key}} fields of vary (and {{seed}} with seeds), "
                         "and write literal braces as {{ and }}") from None


def _scan_tasks(scan: Any, where: str, defaults: dict, base: pathlib.Path,
                python_path: tuple[str, ...]) -> list[PairTask]:
    _check_keys(scan, SCAN_KEYS, where)
    vary = scan.get("vary")
    if not isinstance(vary, dict) or not vary or not all(isinstance(v, list) and v for v in vary.values()):
        raise BatchError(f"{where}.vary: expected a table of non-empty lists, e.g. vary = {{ stiffness = [1, 2] }}")
    seeds = scan.get("seeds", [None])
    if (not isinstance(seeds, list) or not seeds
            or not all(s is None or (isinstance(s, int) and not isinstance(s, bool)) for s in seeds)):
        raise BatchError(f"{where}.seeds: expected a non-empty list of integers, e.g. seeds = [0, 1, 2]")
    fixed = scan.get("parameters", {})
    if not isinstance(fixed, dict):
        raise BatchError(f"{where}.parameters: expected a table of keyword arguments, got {_kind(fixed)}")
    keys, tasks = list(vary), []
    for values, seed in itertools.product(itertools.product(*(vary[k] for k in keys)), seeds):
        point = dict(zip(keys, values))
        entry = {k: v for k, v in scan.items() if k not in ("vary", "seeds")}
        entry["name"] = _fill_template(scan.get("name", ""), point if seed is None else {**point, "seed": seed}, where)
        entry["parameters"] = {**fixed, **point}
        if isinstance(scan.get("states"), list):
            filled = point if seed is None else {**point, "seed": seed}
            entry["states"] = [_fill_template(t, filled, f"{where}.states") for t in scan["states"]]
        if seed is not None:
            entry["seed"] = seed
        tasks.append(_make_task(entry, where, defaults, base, python_path))
    return tasks


def _python_path(data: dict, base: pathlib.Path) -> tuple[str, ...]:
    entries = data.get("python_path", [])
    if not isinstance(entries, list) or not all(isinstance(p, str) for p in entries):
        raise BatchError(f"python_path: expected a list of folder names, got {_kind(entries)}")
    folders = tuple(str((base / p).resolve()) for p in entries)
    for entry, folder in zip(entries, folders):
        if not os.path.isdir(folder):
            raise BatchError(f"python_path: {entry!r} is not a folder (resolved to {folder}); paths are relative "
                             "to the batch file")
    return folders


def _check_names(tasks: list[PairTask]) -> None:
    """Refuse names that are equal, or equal as file names (made file-safe, compared ignoring case)."""
    seen: dict[str, str] = {}
    for task in tasks:
        key = _safe(task.name).casefold()
        if key not in seen:
            seen[key] = task.name
            continue
        other = seen[key]
        if other == task.name:
            raise BatchError(f"pair names must be unique; {task.name!r} appears more than once; rename the others")
        raise BatchError(f"pairs {other!r} and {task.name!r} would share one result file (pairs/"
                         f"{_safe(other)}.json: names are made file-safe and compared ignoring case); "
                         "rename one of them")


def _entries(data: dict, key: str) -> list:
    value = data.get(key, [])
    if not isinstance(value, list):
        raise BatchError(f"{key}: expected a list of tables, written [[{key}]], got {_kind(value)}")
    return value


def load_batch(batch_file_or_spec: Any) -> tuple[str, list[PairTask]]:
    """Read and validate a batch (a TOML path or an already-parsed dict) into pair tasks.

    Relative paths in a dict spec are taken from the current folder.  Raises
    :class:`BatchError` naming the entry and the fix.
    """
    if isinstance(batch_file_or_spec, dict):
        data, base, default_name = batch_file_or_spec, pathlib.Path.cwd(), "batch"
    else:
        path = pathlib.Path(batch_file_or_spec)
        data, base, default_name = _read_batch_file(path), path.resolve().parent, path.stem
    _check_keys(data, TOP_KEYS, "top level")
    python_path = _python_path(data, base)
    defaults = data.get("defaults", {})
    _check_keys(defaults, DEFAULT_KEYS, "defaults")
    if "settings" in defaults and not isinstance(defaults["settings"], dict):
        raise BatchError("defaults.settings: expected a table of estimate() options, got "
                         f"{_kind(defaults['settings'])}")
    tasks: list[PairTask] = []
    for i, entry in enumerate(_entries(data, "pair")):
        _check_keys(entry, PAIR_KEYS, f"pair[{i}]")
        tasks.append(_make_task(entry, f"pair[{i}]", defaults, base, python_path))
    for i, scan in enumerate(_entries(data, "scan")):
        tasks.extend(_scan_tasks(scan, f"scan[{i}]", defaults, base, python_path))
    if not tasks:
        raise BatchError("the batch lists no pairs; add [[pair]] or [[scan]] entries")
    _check_names(tasks)
    name = data.get("name", default_name)
    if not isinstance(name, str):
        raise BatchError(f"name: expected a string label for the batch, got {_kind(name)}")
    return name, tasks


# ------------------------------------------------------------------ one pair (runs in a worker)

_IN_WORKER = False   # True in pool workers: there even KeyboardInterrupt becomes the pair's row


def _unknown_settings(task: PairTask) -> str | None:
    """A message when the pair's settings name options ``estimate`` does not have, else None."""
    from .workflow import OPTION_NAMES

    unknown = sorted(set(task.settings) - set(OPTION_NAMES) - {"seed"})
    if not unknown:
        return None
    return (f"unknown setting(s) {unknown} for estimate(); valid settings are {sorted(OPTION_NAMES) + ['seed']}; "
            "fix the pair's or the defaults' settings")


def _check_made(made: Any, where: str) -> tuple[tuple, dict[str, Any]]:
    """What a factory returned, checked: ``((energy_a, energy_b, start_a, start_b, kT), options)``."""
    if not isinstance(made, tuple) or len(made) not in (5, 6):
        got = f"a tuple of {len(made)} items" if isinstance(made, tuple) else _kind(made)
        raise _PairFailure("bad input", f"{where} must return {RETURN_SHAPE}; it returned {got}")
    for label, function in (("energy_a", made[0]), ("energy_b", made[1])):
        if not callable(function):
            raise _PairFailure("bad input", f"{where} must return {RETURN_SHAPE}; its {label} is "
                                            f"{_kind(function)}, not a function")
    options = made[5] if len(made) == 6 else {}
    if not isinstance(options, dict):
        raise _PairFailure("bad input", f"{where}: the sixth item it returned must be a dict of estimate options, "
                                        f"got {_kind(options)}")
    try:
        float(made[4])
    except (TypeError, ValueError):
        raise _PairFailure("bad input", f"{where}: the kT it returned (fifth item) must be a number, "
                                        f"got {_kind(made[4])}") from None
    return tuple(made[:5]), dict(options)


def _call_factory(task: PairTask) -> tuple[tuple, dict[str, Any]]:
    for p in task.python_path:
        if p not in sys.path:
            sys.path.insert(0, p)
    module_name, function_name = task.target.split(":")
    where = f"factory {task.target!r}"
    try:
        module = importlib.import_module(module_name)
    except (Exception, SystemExit) as err:
        raise _PairFailure("bad input", f"{where}: importing {module_name!r} failed: {_describe(err)}") from None
    function = getattr(module, function_name, None)
    if not callable(function):
        raise _PairFailure("bad input", f"{where}: module {module_name!r} has no function {function_name!r}")
    try:
        made = function(**task.parameters)
    except SystemExit:
        raise _PairFailure("bad input", f"{where} called sys.exit instead of returning its pair") from None
    except Exception as err:
        raise _PairFailure("bad input", f"{where} raised {_describe(err)}") from None
    return _check_made(made, where)


def _compute(task: PairTask):
    """The pair's Result.  Refused input raises ``_PairFailure("bad input", ...)``; any other
    exception is an internal error."""
    from .options import InputError
    from .systemfile import load_system
    from .workflow import estimate

    message = _unknown_settings(task)
    if message:
        raise _PairFailure("bad input", message)
    if task.kind == "system":
        try:
            system = load_system(task.target)
        except (ValueError, OSError) as err:
            raise _PairFailure("bad input", f"system file {task.target}: {_describe(err)}") from None
        run = functools.partial(system.estimate, **task.settings)
    else:
        (energy_a, energy_b, start_a, start_b, kT), options = _call_factory(task)
        options.update(task.settings)
        seed = options.pop("seed", 0)
        options.setdefault("units", "kT" if float(kT) == 1.0 else "energy units")
        run = functools.partial(estimate, energy_a, energy_b, start_a, start_b, kT=kT, seed=seed, **options)
    try:
        return run()
    except InputError as err:   # fe_tool refuses inputs (energies, starts, options) before computing
        raise _PairFailure("bad input", _describe(err)) from None


def _failure_row(task: PairTask, outcome: str, message: str) -> dict[str, Any]:
    row: dict[str, Any] = {c: None for c in COLUMNS}
    row.update(name=task.name, hash=task.content_hash, source=task.target, status=outcome,
               error=" ".join(message.split())[:MAX_ERROR_LENGTH], seconds=0.0)
    if task.states:
        row.update(state_a=task.states[0], state_b=task.states[1])
    return row


def run_pair(task: PairTask, full_result_dir: str | None = None) -> dict[str, Any]:
    """Compute one pair and return its table row; a failure becomes the row's outcome, never raises
    (except KeyboardInterrupt in the runner's own process, which stops the batch)."""
    os.environ["FE_TOOL_PROGRESS"] = "0"   # workers never draw bars
    t0 = time.perf_counter()
    row = _failure_row(task, "internal error", "")
    try:
        result = _compute(task)
        row.update(delta_f=float(result.delta_f), stderr=float(result.stderr), units=result.units,
                   estimator=result.estimator, flagged=bool(result.flagged), warnings=len(result.warnings),
                   evaluations=int(result.energy_evaluations), status="flagged" if result.flagged else "ok")
        if full_result_dir is not None:
            _atomic_write(pathlib.Path(full_result_dir) / f"{_safe(task.name)}.json",
                          json.dumps(result.to_dict(), indent=1))
    except _PairFailure as failure:   # one bad pair must not stop the batch: record it and go on
        row.update(_failure_row(task, failure.outcome, failure.message))
    except (Exception, SystemExit) as err:
        row.update(_failure_row(task, "internal error", _describe(err)))
    except KeyboardInterrupt as err:
        if not _IN_WORKER:
            raise
        row.update(_failure_row(task, "internal error", _describe(err)))
    row["seconds"] = round(time.perf_counter() - t0, 3)
    return row


def _safe(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_.+" else "_" for c in name)


# ------------------------------------------------------------------ the table on disk

def _atomic_write(path: pathlib.Path, text: str) -> None:
    from .atomic import write_text_atomically

    write_text_atomically(path, text)


def _jsonable_row(row: dict) -> dict:
    out = {}
    for c in COLUMNS:
        v = row.get(c)
        if isinstance(v, float) and not math.isfinite(v):
            v = str(v)
        out[c] = v
    return out


def _write_tables(results_dir: pathlib.Path, rows: list[dict]) -> None:
    lines = "".join(json.dumps(_jsonable_row(r)) + "\n" for r in rows)
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=COLUMNS, lineterminator="\n")
    writer.writeheader()
    for r in rows:
        writer.writerow({c: ("" if r.get(c) is None else r.get(c)) for c in COLUMNS})
    _atomic_write(results_dir / "results.jsonl", lines)
    _atomic_write(results_dir / "results.csv", buffer.getvalue())


def read_table(results_dir: str | os.PathLike) -> list[dict[str, Any]]:
    """Rows of ``results.jsonl`` (an incomplete last line, if any, is ignored)."""
    path = pathlib.Path(results_dir) / "results.jsonl"
    if not path.exists():
        return []
    rows = []
    for line in path.read_text().splitlines():
        if not line.strip():
            continue
        try:
            row = json.loads(line)
        except json.JSONDecodeError:
            continue  # torn line from a crash of an older writer: that pair simply runs again
        if not isinstance(row, dict):
            continue
        for key in ("delta_f", "stderr"):
            if isinstance(row.get(key), str):
                row[key] = float(row[key])
        rows.append(row)
    return rows


# ------------------------------------------------------------------ executors

def _die_with_parent(parent_pid: int) -> None:
    """End this worker when the runner that started it dies (even by SIGKILL).

    On Linux the kernel sends SIGKILL to us when our parent exits (``PR_SET_PDEATHSIG``; strictly,
    when the parent's thread that started us exits: the pool starts workers from the thread that
    runs the batch); everywhere a daemon thread also checks once a second that the parent is still ours.
    """
    if sys.platform.startswith("linux"):
        try:
            import ctypes

            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(ctypes.c_int(1), ctypes.c_ulong(int(signal.SIGKILL)),   # 1 = PR_SET_PDEATHSIG
                       ctypes.c_ulong(0), ctypes.c_ulong(0), ctypes.c_ulong(0))
        except (OSError, AttributeError):   # no usable libc: the watchdog thread still works
            pass
    if os.getppid() != parent_pid:   # the runner died before the signal was armed
        os._exit(EXIT_INTERNAL)

    def watch() -> None:
        while os.getppid() == parent_pid:
            time.sleep(1.0)
        os._exit(EXIT_INTERNAL)

    threading.Thread(target=watch, name="fe-tool-parent-watch", daemon=True).start()


def _worker_start(parent_pid: int) -> None:
    """Worker start-up: no progress bars, Ctrl-C left to the runner, and die with the runner.
    (XLA thread flags are left alone on purpose: they are part of the compilation-cache key,
    and changing them made every worker compile afresh.)"""
    global _IN_WORKER
    _IN_WORKER = True
    os.environ["FE_TOOL_PROGRESS"] = "0"
    signal.signal(signal.SIGINT, signal.SIG_IGN)   # Ctrl-C reaches the whole process group; the runner stops us
    _die_with_parent(parent_pid)


def _stop_pool(pool: concurrent.futures.ProcessPoolExecutor, finished: bool) -> None:
    """Shut the pool down; when the batch stops early, end the running workers instead of waiting."""
    if not finished:
        processes = getattr(pool, "_processes", None) or {}   # no public way to stop a running worker
        for process in list(processes.values()):
            if process.is_alive():
                process.terminate()
    pool.shutdown(wait=True, cancel_futures=True)


def _local_results(tasks: list[PairTask], workers: int, full_dir: str) -> Iterator[tuple[PairTask, dict]]:
    if workers == 1:
        for task in tasks:
            yield task, run_pair(task, full_dir)
        return
    context = multiprocessing.get_context("spawn")   # never fork a process that has started JAX
    pool = concurrent.futures.ProcessPoolExecutor(max_workers=workers, mp_context=context,
                                                  initializer=_worker_start, initargs=(os.getpid(),))
    finished = False
    try:
        futures = {pool.submit(run_pair, task, full_dir): task for task in tasks}
        for future in concurrent.futures.as_completed(futures):
            task = futures[future]
            try:
                row = future.result()
            except Exception as err:  # the worker process itself died (e.g. out of memory)
                row = _failure_row(task, "internal error", f"worker process died: {_describe(err)}")
            yield task, row
        finished = True
    finally:
        _stop_pool(pool, finished)


def _dask_client(scheduler: Any):
    try:
        import distributed
    except ImportError:
        raise BatchError("running on a Dask cluster needs the optional dependency: "
                         "pip install 'fe_tool[dask]' (dask[distributed])") from None
    if isinstance(scheduler, distributed.Client):
        return distributed, scheduler, False
    try:
        return distributed, distributed.Client(scheduler), True
    except (OSError, TimeoutError, ValueError) as err:
        raise BatchError(f"cannot reach the Dask scheduler {scheduler!r} ({_describe(err)}); check the address "
                         "and that the scheduler is running") from None


def _dask_results(tasks: list[PairTask], scheduler: Any, full_dir: str) -> Iterator[tuple[PairTask, dict]]:
    distributed, client, own_client = _dask_client(scheduler)
    try:
        futures = {}
        for task in tasks:
            future = client.submit(run_pair, task, full_dir, key=f"fe-tool-pair-{task.content_hash}", pure=False)
            futures[future] = task
        for future in distributed.as_completed(list(futures)):
            task = futures[future]
            try:
                row = future.result()
            except Exception as err:  # worker lost, cancelled ...
                row = _failure_row(task, "internal error", f"worker failed: {_describe(err)}")
            yield task, row
    finally:
        if own_client:
            client.close()


# ------------------------------------------------------------------ the results folder

def _prepare_results_dir(results_dir: str | os.PathLike) -> pathlib.Path:
    folder = pathlib.Path(results_dir)
    if folder.exists() and not folder.is_dir():
        raise BatchError(f"results path {str(folder)!r} is a file, not a folder; give another results folder "
                         "(--results DIR)")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise BatchError(f"cannot create the results folder {str(folder)!r} ({err.strerror}); give another "
                         "results folder (--results DIR)") from None
    return folder


def _lock_holder(fd: int) -> str:
    try:
        text = os.pread(fd, 32, 0).decode("ascii", "replace").strip()
    except OSError:
        return ""
    return f" (process {text})" if text.isdigit() else ""


@contextlib.contextmanager
def _hold_folder(folder: pathlib.Path) -> Iterator[None]:
    """Own ``folder`` for the duration: an exclusive ``flock`` on its lock file, refused at once when held.

    The kernel drops the lock when this process ends in any way, so a lock file left by a
    dead runner never blocks.
    """
    try:
        fd = os.open(folder / LOCK_NAME, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as err:
        raise BatchError(f"results folder {str(folder)!r} is not writable ({err.strerror}); give a folder you can "
                         "write to (--results DIR)") from None
    try:
        if fcntl is not None:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                raise BatchError(f"results folder {str(folder)!r} is in use by another batch runner"
                                 f"{_lock_holder(fd)}; wait for it to finish, or give this run another results "
                                 "folder (--results DIR)") from None
            except OSError as err:   # a file system without locks (some network mounts)
                raise BatchError(f"results folder {str(folder)!r} cannot be locked ({err.strerror}); give a "
                                 "results folder on a local disk (--results DIR)") from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        yield
    finally:
        os.close(fd)   # closing the last descriptor releases the lock


def _previous_rows(results_dir: pathlib.Path, tasks: list[PairTask]) -> dict[str, dict]:
    """Rows of earlier runs by content hash; rows of pairs no longer in the batch (or whose inputs
    changed) are appended to ``superseded.jsonl``, kept aside, not lost."""
    previous = {}
    for row in read_table(results_dir):
        row["status"] = _outcome(row)
        previous[row.get("hash")] = row
    current = {t.content_hash for t in tasks}
    stale = [r for h, r in previous.items() if h not in current]
    if stale:
        with open(results_dir / "superseded.jsonl", "a") as fh:
            fh.write("".join(json.dumps(_jsonable_row(r)) + "\n" for r in stale))
            fh.flush()
            os.fsync(fh.fileno())
    return {h: r for h, r in previous.items() if h in current}


# ------------------------------------------------------------------ the runner

def _check_workers(workers: int | None) -> int:
    if workers is None:
        return os.cpu_count() or 1
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise BatchError(f"workers must be a positive whole number, got {workers!r}")
    return workers


def run_batch(batch_file_or_spec: Any, results_dir: str | os.PathLike, *, workers: int | None = None,
              scheduler: Any = None, progress: bool | None = None, retry_failed: bool = True) -> BatchSummary:
    """Run every pair of a batch not already finished, writing the results table as pairs finish.

    Args:
        batch_file_or_spec: path of a batch TOML file, or the same structure as a dict.  A batch
            is code (its factories are imported and called): run only batches you trust.
        results_dir: folder for ``results.csv``, ``results.jsonl`` and ``pairs/NAME.json``.
        workers: local worker processes (default: CPU cores; 1 runs in this process).
        scheduler: a Dask scheduler address (``"tcp://host:8786"``) or a ``distributed.Client``;
            when given the pairs run on that cluster instead of local processes.
        progress: progress bar (default: only in a terminal; ``FE_TOOL_PROGRESS=0`` silences).
        retry_failed: run pairs whose earlier row says ``bad input`` or ``internal error`` again
            (default); ``ok`` and ``flagged`` rows are always kept.

    Returns:
        :class:`BatchSummary`; ``summary.exit_code`` is the most severe outcome over the pairs.

    Raises:
        BatchError: the batch, the results folder or an option is refused before computing,
            including a results folder in use by another runner.
        KeyboardInterrupt: passed on after the workers are stopped; finished rows stay in the table.

    Local workers are started with ``spawn`` (forking a process that has started JAX is
    unsafe), so a script calling this with ``workers > 1`` needs the usual
    ``if __name__ == "__main__":`` guard.

    Example:
        >>> summary = run_batch("batches/probe_restraint_scan.toml", "scan-results", workers=2)
        >>> summary.exit_code, summary.rows[0]["delta_f"]
    """
    t0 = time.perf_counter()
    name, tasks = load_batch(batch_file_or_spec)
    workers = _check_workers(workers)
    results_dir = _prepare_results_dir(results_dir)
    with _hold_folder(results_dir):
        rows = _previous_rows(results_dir, tasks)
        todo = [t for t in tasks if t.content_hash not in rows
                or (retry_failed and rows[t.content_hash]["status"] not in FINISHED)]
        _run_pairs(name, tasks, todo, rows, results_dir, workers, scheduler, progress)
    final = [rows[t.content_hash] for t in tasks if t.content_hash in rows]
    succeeded = sum(r["status"] in FINISHED for r in final)
    return BatchSummary(name=name, results_dir=results_dir, total=len(tasks), ran=len(todo),
                        skipped=len(tasks) - len(todo), succeeded=succeeded, failed=len(final) - succeeded,
                        rows=final, seconds=time.perf_counter() - t0)


def _run_pairs(name: str, tasks: list[PairTask], todo: list[PairTask], rows: dict[str, dict],
               results_dir: pathlib.Path, workers: int, scheduler: Any, progress: bool | None) -> None:
    """Compute ``todo``, putting each row into ``rows`` and the table on disk as it finishes.

    A failed row of an earlier run stays in the table until its pair's new row replaces it.
    """
    from .progress import progress_bar

    full_dir = results_dir / "pairs"
    try:
        full_dir.mkdir(exist_ok=True)
    except OSError as err:
        raise BatchError(f"cannot create {str(full_dir)!r} ({err.strerror}); give another results folder "
                         "(--results DIR)") from None
    _write_tables(results_dir, [rows[t.content_hash] for t in tasks if t.content_hash in rows])
    skipped, done, failed, written = len(tasks) - len(todo), 0, 0, True

    def record(task: PairTask, row: dict, bar) -> None:
        nonlocal done, failed, written
        rows[task.content_hash], written = row, False
        _write_tables(results_dir, [rows[t.content_hash] for t in tasks if t.content_hash in rows])
        written = True
        done, failed = done + 1, failed + (row["status"] not in FINISHED)
        bar.update(1)
        bar.set_postfix(finished=skipped + done - failed, failed=failed, remaining=len(todo) - done)

    with progress_bar(len(tasks), f"batch {name}", enabled=progress, unit="pair", initial=skipped) as bar:
        source = None
        try:
            refused = {t.content_hash: _unknown_settings(t) for t in todo}
            for task in todo:   # refused before any computation, without waiting for a worker
                if refused[task.content_hash]:
                    record(task, _failure_row(task, "bad input", refused[task.content_hash]), bar)
            remaining = [t for t in todo if not refused[t.content_hash]]
            if remaining:
                source = (_dask_results(remaining, scheduler, str(full_dir)) if scheduler is not None
                          else _local_results(remaining, min(workers, len(remaining)), str(full_dir)))
                for task, row in source:
                    record(task, row, bar)
        finally:
            if source is not None:
                source.close()   # stops the workers when the batch ends early (Ctrl-C, a failed write)
            if not written:      # Ctrl-C landed while a finished row was being written: write it again
                _write_tables(results_dir, [rows[t.content_hash] for t in tasks if t.content_hash in rows])


# ------------------------------------------------------------------ command line

TRUST_NOTE = ("A batch file is code: its factories ('module:function') are imported and called, and its "
              "python_path adds folders to the import path, so trust a batch file as you would a Python "
              "script and run only batch files you wrote or checked.")


def _parser() -> argparse.ArgumentParser:
    codes = "\n".join(f"  {code:>3}  {meaning}" for code, meaning in EXIT_MEANINGS.items())
    p = argparse.ArgumentParser(
        prog="fe-tool batch", formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Run a batch file of ΔF calculations in parallel; rerunning it skips finished pairs.\n\n"
                    + textwrap.fill(TRUST_NOTE, 78),
        epilog="One runner at a time may use a results folder.\n\nexit status (after a run: the most severe pair "
               "outcome):\n"
               + codes)
    p.add_argument("batch", help="the batch TOML file")
    p.add_argument("--results", metavar="DIR", help="results folder (default: BATCHNAME-results beside the batch file)")
    p.add_argument("--workers", type=int, help="local worker processes (default: CPU cores)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler address, e.g. tcp://127.0.0.1:8786")
    p.add_argument("--no-retry", action="store_true",
                   help="keep pairs that ended in bad input or internal error instead of running them again")
    p.add_argument("--plot", action="store_true", help="also write batch_summary.png into the results folder")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--reference", metavar="STATE",
                   help="state set to 0 in the network of pairs (pairs with states = [...]; default: the first)")
    return p


def _say(message: str) -> None:
    print(f"fe-tool batch: {message}", file=sys.stderr)


def _report(summary: BatchSummary) -> None:
    print(summary)
    for row in summary.rows:
        status = row.get("status")
        if status == "flagged":
            count = row.get("warnings")
            print(f"  flagged: {row['name']}: {str(count) + ' warning(s); ' if isinstance(count, int) else ''}"
                  f"see {summary.results_dir / 'pairs' / (_safe(row['name']) + '.json')}")
        elif status != "ok":
            print(f"  {status}: {row['name']}: {row.get('error')}")


def main_batch(argv: list[str] | None = None) -> int:
    """``fe-tool batch`` entry; returns the exit status (see :mod:`fe_tool.exitcodes`): the most
    severe pair outcome, 2 for a refused batch file, option or busy results folder, 130 on Ctrl-C."""
    args = _parser().parse_args(argv)
    batch = pathlib.Path(args.batch)
    results = args.results or str(batch.parent / f"{batch.stem or 'batch'}-results")
    try:
        summary = run_batch(args.batch, results, workers=args.workers, scheduler=args.scheduler,
                            progress=False if args.quiet else None, retry_failed=not args.no_retry)
    except BatchError as err:
        _say(f"error: {err}")
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        _say(f"interrupted; the pairs that finished are kept in {results}; run the same command again to go on")
        return EXIT_INTERRUPTED
    except Exception as err:  # a failure of the runner itself (a bug, a full disk): one line, no traceback
        _say(f"internal error: {_describe(err)}; the pairs that finished are kept in {results}")
        return EXIT_INTERNAL
    _report(summary)
    if args.plot:
        from .plots import draw_batch_summary

        try:
            path = draw_batch_summary(summary.rows, summary.results_dir / "batch_summary.png", title=summary.name)
        except Exception as err:  # the table is written; only the picture failed
            _say(f"internal error: the summary plot failed: {_describe(err)}")
            return EXIT_INTERNAL
        print(f"plot written to {path}")
    if any(row.get("state_a") for row in summary.rows):   # pairs name states: they form a network
        from .network import NetworkError
        from .network_command import report_batch_network

        try:
            return max(summary.exit_code, report_batch_network(summary.results_dir, reference=args.reference))
        except NetworkError as err:   # the pairs are written; only the network is refused
            _say(f"error: network of pairs: {err}")
            return max(summary.exit_code, EXIT_BAD_INPUT)
    return summary.exit_code


if __name__ == "__main__":
    sys.exit(main_batch())
