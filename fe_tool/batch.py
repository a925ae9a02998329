"""Batches: many ΔF calculations from one TOML file, run in parallel, resumable.

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

A factory ``module:function`` is called with ``parameters`` as keywords and returns
``(energy_a, energy_b, start_a, start_b, kT)`` or the same with a sixth item, a dict of
``estimate`` options (overridden by the file's ``settings``).

Results go to ``results_dir/results.csv`` and ``results_dir/results.jsonl`` (one row per
pair, batch order) and the full result of each pair to ``results_dir/pairs/NAME.json``.
Both tables are rewritten atomically (temporary file + ``os.replace``) as soon as a pair
finishes, so an interrupted batch leaves complete tables behind.  A pair is identified by a
content hash of its definition, the bytes of its system file or factory module, its resolved
settings and the fe_tool version; re-running the batch skips pairs whose hash already has
an ``ok`` row (failed pairs are tried again).
"""
from __future__ import annotations

import argparse
import concurrent.futures
import csv
import dataclasses
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
import sys
import tempfile
import time
from typing import Any, Iterable

try:
    import tomllib
except ModuleNotFoundError:  # Python < 3.11
    import tomli as tomllib

__all__ = ["BatchError", "BatchSummary", "PairTask", "load_batch", "main_batch", "read_table", "run_batch",
           "COLUMNS"]

COLUMNS = ("name", "hash", "delta_f", "stderr", "units", "estimator", "flagged", "warnings", "evaluations",
           "seconds", "status", "error", "source")
TOP_KEYS = {"name", "python_path", "defaults", "pair", "scan"}
DEFAULT_KEYS = {"seed", "settings"}
PAIR_KEYS = {"name", "system", "factory", "parameters", "settings", "seed"}
SCAN_KEYS = {"name", "factory", "parameters", "settings", "seed", "seeds", "vary"}


class BatchError(ValueError):
    """A batch file or spec is malformed; the message names the entry and the fix."""


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


@dataclasses.dataclass
class BatchSummary:
    """What a batch run did.

    Attributes:
        name: batch label; ``results_dir``: folder of the tables.
        total: pairs in the batch; ``ran``: computed now; ``skipped``: already done before.
        succeeded, failed: counts over the whole table (this run and earlier ones).
        rows: the table, one dict per pair in batch order (see :data:`COLUMNS`).
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
    def all_ok(self) -> bool:
        return self.failed == 0 and self.succeeded == self.total

    @property
    def exit_code(self) -> int:
        """0 when every pair succeeded, 1 otherwise."""
        return 0 if self.all_ok else 1

    @property
    def csv_path(self) -> pathlib.Path:
        return self.results_dir / "results.csv"

    @property
    def jsonl_path(self) -> pathlib.Path:
        return self.results_dir / "results.jsonl"

    def __str__(self) -> str:
        return (f"batch {self.name}: {self.total} pairs, {self.succeeded} ok, {self.failed} failed "
                f"({self.ran} run now, {self.skipped} already done) in {self.seconds:.1f} s; "
                f"table {self.csv_path}")


# ------------------------------------------------------------------ reading the batch

def _check_keys(table: Any, allowed: set[str], where: str) -> None:
    if not isinstance(table, dict):
        raise BatchError(f"{where}: expected a table, got {table!r}")
    unknown = sorted(set(table) - allowed)
    if unknown:
        raise BatchError(f"{where}: unknown key(s) {unknown}; allowed keys are {sorted(allowed)}")


def _file_digest(path: pathlib.Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _factory_source_digest(target: str, python_path: Iterable[str]) -> str:
    """sha256 of the factory module's source file, found without importing the module."""
    module = target.split(":", 1)[0]
    added = [p for p in python_path if p not in sys.path]
    sys.path[:0] = added
    try:
        spec = importlib.util.find_spec(module)
    except (ImportError, ValueError) as err:
        raise BatchError(f"factory {target!r}: module {module!r} cannot be found ({err}); "
                         "add its folder to python_path") from err
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


def _resolve_system(spec: str, base: pathlib.Path) -> pathlib.Path:
    from .systemfile import SystemFileError, find_system

    candidate = (base / spec)
    if candidate.exists():
        return candidate.resolve()
    try:
        return find_system(spec).resolve()
    except SystemFileError as err:
        raise BatchError(f"system {spec!r}: not found beside the batch file ({base}) nor in the bundled "
                         f"catalogue: {err}") from err


def _make_task(entry: dict, where: str, defaults: dict, base: pathlib.Path, python_path: tuple[str, ...]) -> PairTask:
    name = entry.get("name")
    if not isinstance(name, str) or not name:
        raise BatchError(f"{where}.name: expected a non-empty string, got {name!r}")
    has_system, has_factory = "system" in entry, "factory" in entry
    if has_system == has_factory:
        raise BatchError(f"{where} ({name}): give exactly one of 'system' (a system file) or "
                         "'factory' ('module:function')")
    settings = dict(defaults.get("settings", {}))
    pair_settings = entry.get("settings", {})
    if not isinstance(pair_settings, dict):
        raise BatchError(f"{where}.settings: expected a table of estimate() options, got {pair_settings!r}")
    settings.update(pair_settings)
    settings.setdefault("seed", entry.get("seed", defaults.get("seed", 0)))
    if "seed" in entry:
        settings["seed"] = entry["seed"]
    parameters = entry.get("parameters", {})
    if not isinstance(parameters, dict):
        raise BatchError(f"{where}.parameters: expected a table of keyword arguments, got {parameters!r}")
    if has_system:
        if parameters:
            raise BatchError(f"{where} ({name}): 'parameters' belong to factories; use 'settings' for a system file")
        path = _resolve_system(str(entry["system"]), base)
        definition = {"kind": "system", "name": name, "file": _file_digest(path), "settings": settings}
        return PairTask(name, "system", str(path), {}, settings, python_path, _content_hash(definition))
    target = entry["factory"]
    if not isinstance(target, str) or target.count(":") != 1:
        raise BatchError(f"{where}.factory: expected 'module:function', got {target!r}")
    definition = {"kind": "factory", "name": name, "factory": target, "parameters": parameters,
                  "source": _factory_source_digest(target, python_path), "settings": settings}
    return PairTask(name, "factory", target, dict(parameters), settings, python_path, _content_hash(definition))


def load_batch(batch_file_or_spec: Any) -> tuple[str, list[PairTask]]:
    """Read and validate a batch (a TOML path or an already-parsed dict) into pair tasks.

    Relative paths in a dict spec are taken from the current folder.
    """
    if isinstance(batch_file_or_spec, dict):
        data, base, default_name = batch_file_or_spec, pathlib.Path.cwd(), "batch"
    else:
        path = pathlib.Path(batch_file_or_spec)
        if not path.exists():
            raise BatchError(f"no batch file {str(path)!r}")
        try:
            data = tomllib.loads(path.read_text())
        except tomllib.TOMLDecodeError as err:
            raise BatchError(f"{path}: not valid TOML: {err}") from err
        base, default_name = path.resolve().parent, path.stem
    _check_keys(data, TOP_KEYS, "top level")
    python_path = data.get("python_path", [])
    if not isinstance(python_path, list) or not all(isinstance(p, str) for p in python_path):
        raise BatchError(f"python_path: expected a list of folder names, got {python_path!r}")
    python_path = tuple(str((base / p).resolve()) for p in python_path)
    defaults = data.get("defaults", {})
    _check_keys(defaults, DEFAULT_KEYS, "defaults")
    tasks: list[PairTask] = []
    for i, entry in enumerate(data.get("pair", [])):
        _check_keys(entry, PAIR_KEYS, f"pair[{i}]")
        tasks.append(_make_task(entry, f"pair[{i}]", defaults, base, python_path))
    for i, scan in enumerate(data.get("scan", [])):
        where = f"scan[{i}]"
        _check_keys(scan, SCAN_KEYS, where)
        vary = scan.get("vary")
        if not isinstance(vary, dict) or not vary or not all(isinstance(v, list) and v for v in vary.values()):
            raise BatchError(f"{where}.vary: expected a table of non-empty lists, e.g. vary = {{ stiffness = [1, 2] }}")
        seeds = scan.get("seeds", [None])
        if not isinstance(seeds, list) or not seeds or not all(s is None or isinstance(s, int) for s in seeds):
            raise BatchError(f"{where}.seeds: expected a non-empty list of integers, got {seeds!r}")
        template = scan.get("name", "")
        keys = list(vary)
        for values, seed in itertools.product(itertools.product(*(vary[k] for k in keys)), seeds):
            point = dict(zip(keys, values))
            fill = point if seed is None else {**point, "seed": seed}
            try:
                name = template.format(**fill)
            except (KeyError, IndexError, ValueError) as err:
                raise BatchError(f"{where}.name: template {template!r} cannot be filled from {fill}: {err}") from err
            entry = {k: v for k, v in scan.items() if k not in ("vary", "seeds")}
            entry["name"] = name
            entry["parameters"] = {**scan.get("parameters", {}), **point}
            if seed is not None:
                entry["seed"] = seed
            tasks.append(_make_task(entry, where, defaults, base, python_path))
    if not tasks:
        raise BatchError("the batch lists no pairs; add [[pair]] or [[scan]] entries")
    names = [t.name for t in tasks]
    duplicates = sorted({n for n in names if names.count(n) > 1})
    if duplicates:
        raise BatchError(f"pair names must be unique; repeated: {duplicates}")
    return str(data.get("name", default_name)), tasks


# ------------------------------------------------------------------ one pair (runs in a worker)

def _call_factory(task: PairTask):
    for p in task.python_path:
        if p not in sys.path:
            sys.path.insert(0, p)
    module_name, function_name = task.target.split(":")
    function = getattr(importlib.import_module(module_name), function_name, None)
    if function is None:
        raise BatchError(f"factory {task.target!r}: module {module_name!r} has no {function_name!r}")
    made = function(**task.parameters)
    if not isinstance(made, tuple) or len(made) not in (5, 6):
        raise BatchError(f"factory {task.target!r} must return (energy_a, energy_b, start_a, start_b, kT"
                         f"[, options]), got {type(made).__name__} of length {len(made) if isinstance(made, tuple) else '?'}")
    options = dict(made[5]) if len(made) == 6 else {}
    return made[:5], options


def run_pair(task: PairTask, full_result_dir: str | None = None) -> dict[str, Any]:
    """Compute one pair and return its table row; errors become a ``failed`` row, never raise."""
    os.environ["FE_TOOL_PROGRESS"] = "0"   # workers never draw bars
    t0 = time.perf_counter()
    row: dict[str, Any] = {c: None for c in COLUMNS}
    row.update(name=task.name, hash=task.content_hash, source=task.target)
    try:
        if task.kind == "system":
            from .systemfile import load_system

            result = load_system(task.target).estimate(**task.settings)
        else:
            from .workflow import estimate

            (energy_a, energy_b, start_a, start_b, kT), options = _call_factory(task)
            options.update(task.settings)
            seed = options.pop("seed", 0)
            options.setdefault("units", "kT" if float(kT) == 1.0 else "energy units")
            result = estimate(energy_a, energy_b, start_a, start_b, kT=kT, seed=seed, **options)
        row.update(delta_f=float(result.delta_f), stderr=float(result.stderr), units=result.units,
                   estimator=result.estimator, flagged=bool(result.flagged), warnings=len(result.warnings),
                   evaluations=int(result.energy_evaluations), status="ok", error="")
        if full_result_dir is not None:
            _atomic_write(pathlib.Path(full_result_dir) / f"{_safe(task.name)}.json",
                          json.dumps(result.to_dict(), indent=1))
    except Exception as err:  # one bad pair must not stop the batch: record it and go on
        message = f"{type(err).__name__}: {err}".strip()
        row.update(status="failed", error=" ".join(message.split())[:2000])
    row["seconds"] = round(time.perf_counter() - t0, 3)
    return row


def _safe(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_.+" else "_" for c in name)


# ------------------------------------------------------------------ the table on disk

def _atomic_write(path: pathlib.Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", newline="") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o644)   # mkstemp makes 0600; tables are meant to be shared
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


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
        for key in ("delta_f", "stderr"):
            if isinstance(row.get(key), str):
                row[key] = float(row[key])
        rows.append(row)
    return rows


# ------------------------------------------------------------------ executors

def _quiet_worker() -> None:
    """Worker start-up: no progress bars.  (XLA thread flags are left alone on purpose: they are
    part of the compilation-cache key, and changing them made every worker compile afresh.)"""
    os.environ["FE_TOOL_PROGRESS"] = "0"


def _local_results(tasks: list[PairTask], workers: int, full_dir: str):
    if workers == 1:
        for task in tasks:
            yield task, run_pair(task, full_dir)
        return
    context = multiprocessing.get_context("spawn")   # never fork a process that has started JAX
    with concurrent.futures.ProcessPoolExecutor(max_workers=workers, mp_context=context,
                                                initializer=_quiet_worker) as pool:
        futures = {pool.submit(run_pair, task, full_dir): task for task in tasks}
        for future in concurrent.futures.as_completed(futures):
            task = futures[future]
            try:
                row = future.result()
            except Exception as err:  # the worker process itself died (e.g. out of memory)
                row = _crash_row(task, err)
            yield task, row


def _dask_results(tasks: list[PairTask], scheduler: Any, full_dir: str):
    try:
        import distributed
    except ImportError as err:
        raise RuntimeError("running on a Dask cluster needs the optional dependency: "
                           "pip install 'fe_tool[dask]' (dask[distributed])") from err
    own_client = not isinstance(scheduler, distributed.Client)
    client = distributed.Client(scheduler) if own_client else scheduler
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
                row = _crash_row(task, err)
            yield task, row
    finally:
        if own_client:
            client.close()


def _crash_row(task: PairTask, err: BaseException) -> dict[str, Any]:
    row = {c: None for c in COLUMNS}
    row.update(name=task.name, hash=task.content_hash, source=task.target, status="failed",
               error=f"worker failed: {type(err).__name__}: {err}"[:2000], seconds=0.0)
    return row


# ------------------------------------------------------------------ the runner

def run_batch(batch_file_or_spec: Any, results_dir: str | os.PathLike, *, workers: int | None = None,
              scheduler: Any = None, progress: bool | None = None, retry_failed: bool = True) -> BatchSummary:
    """Run every pair of a batch not already done, writing the results table as pairs finish.

    Args:
        batch_file_or_spec: path of a batch TOML file, or the same structure as a dict.
        results_dir: folder for ``results.csv``, ``results.jsonl`` and ``pairs/NAME.json``.
        workers: local worker processes (default: CPU cores; 1 runs in this process).
        scheduler: a Dask scheduler address (``"tcp://host:8786"``) or a ``distributed.Client``;
            when given the pairs run on that cluster instead of local processes.
        progress: progress bar (default: only in a terminal; ``FE_TOOL_PROGRESS=0`` silences).
        retry_failed: run pairs whose earlier row says ``failed`` again (default).

    Returns:
        :class:`BatchSummary`; ``summary.exit_code`` is 0 only when every pair succeeded.

    Local workers are started with ``spawn`` (forking a process that has started JAX is
    unsafe), so a script calling this with ``workers > 1`` needs the usual
    ``if __name__ == "__main__":`` guard.  Do not run the same batch into the same
    ``results_dir`` from two processes at once (the tables are not locked).

    Example:
        >>> summary = run_batch("batches/probe_restraint_scan.toml", "scan-results", workers=2)
        >>> summary.all_ok, summary.rows[0]["delta_f"]
    """
    from .progress import progress_bar

    t0 = time.perf_counter()
    name, tasks = load_batch(batch_file_or_spec)
    results_dir = pathlib.Path(results_dir)
    full_dir = results_dir / "pairs"
    full_dir.mkdir(parents=True, exist_ok=True)
    if workers is None:
        workers = os.cpu_count() or 1
    if workers < 1:
        raise ValueError(f"workers must be a positive integer, got {workers}")

    previous = {r.get("hash"): r for r in read_table(results_dir)}
    current = {t.content_hash for t in tasks}
    stale = [r for h, r in previous.items() if h not in current]
    if stale:   # rows of pairs no longer in the batch (or whose inputs changed): kept aside, not lost
        with open(results_dir / "superseded.jsonl", "a") as fh:
            fh.write("".join(json.dumps(_jsonable_row(r)) + "\n" for r in stale))
            fh.flush()
            os.fsync(fh.fileno())
    rows: dict[str, dict] = {}
    todo: list[PairTask] = []
    for task in tasks:
        old = previous.get(task.content_hash)
        if old is not None and (old.get("status") == "ok" or not retry_failed):
            rows[task.content_hash] = old
        else:
            todo.append(task)
    skipped = len(tasks) - len(todo)

    def table() -> list[dict]:
        return [rows[t.content_hash] for t in tasks if t.content_hash in rows]

    _write_tables(results_dir, table())
    failed_now = 0
    with progress_bar(len(tasks), f"batch {name}", enabled=progress, unit="pair", initial=skipped) as bar:
        bar.set_postfix(done=skipped, failed=0, remaining=len(todo))
        if todo:
            source = (_dask_results(todo, scheduler, str(full_dir)) if scheduler is not None
                      else _local_results(todo, min(workers, len(todo)), str(full_dir)))
            for count, (task, row) in enumerate(source, start=1):
                rows[task.content_hash] = row
                _write_tables(results_dir, table())
                failed_now += row["status"] != "ok"
                bar.update(1)
                bar.set_postfix(done=skipped + count - failed_now, failed=failed_now, remaining=len(todo) - count)
    final = table()
    succeeded = sum(r.get("status") == "ok" for r in final)
    return BatchSummary(name=name, results_dir=results_dir, total=len(tasks), ran=len(todo), skipped=skipped,
                        succeeded=succeeded, failed=len(final) - succeeded, rows=final,
                        seconds=time.perf_counter() - t0)


# ------------------------------------------------------------------ command line

def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="fe-tool batch", description="Run a batch file of ΔF calculations.")
    p.add_argument("batch", help="the batch TOML file")
    p.add_argument("--results", metavar="DIR", help="results folder (default: BATCHNAME-results beside the batch file)")
    p.add_argument("--workers", type=int, help="local worker processes (default: CPU cores)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler address, e.g. tcp://127.0.0.1:8786")
    p.add_argument("--no-retry", action="store_true", help="keep failed pairs failed instead of running them again")
    p.add_argument("--plot", action="store_true", help="also write batch_summary.png into the results folder")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    return p


def main_batch(argv: list[str] | None = None) -> int:
    """``fe-tool batch`` entry: 0 when every pair succeeded, 1 when any failed, 2 on bad input."""
    args = _parser().parse_args(argv)
    results = args.results or str(pathlib.Path(args.batch).with_name(pathlib.Path(args.batch).stem + "-results"))
    try:
        summary = run_batch(args.batch, results, workers=args.workers, scheduler=args.scheduler,
                            progress=False if args.quiet else None, retry_failed=not args.no_retry)
    except (BatchError, ValueError, RuntimeError) as err:
        print(f"fe-tool batch: error: {err}", file=sys.stderr)
        return 2
    print(summary)
    for row in summary.rows:
        if row.get("status") != "ok":
            print(f"  failed: {row['name']}: {row.get('error')}")
    if args.plot:
        from .plots import plot_batch_summary

        path = plot_batch_summary(summary.rows, summary.results_dir / "batch_summary.png")
        print(f"plot written to {path}")
    return summary.exit_code


if __name__ == "__main__":
    sys.exit(main_batch())
