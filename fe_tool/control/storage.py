"""Saving and loading trained controls (no pickle).

File layout::

    FE_TOOL_CONTROL\\n                       magic line
    {"format_version": 1, ...}\\n            one line of JSON: the header
    <equinox.tree_serialise_leaves bytes>   the control's arrays (absent without a network)

The header holds the system fingerprint (:meth:`fe_tool.path.Path.fingerprint_probe`
of a probe configuration, stored too), the control kind and hyperparameters (to
rebuild the module skeleton), the protocol it was trained with, the caller's
settings and the versions of fe_tool, jax and equinox.  :func:`load_control`
refuses a file made for another system, and validates everything else: the header's keys
and types, a λ schedule rising strictly from 0 to 1 with positive step sizes, weights of
exactly the byte length the control's structure needs (truncated files and trailing bytes
are refused), all finite.  :func:`check_control_fits` reads only the header, so a workflow
can refuse a file meant for another system before it samples anything.
"""
from __future__ import annotations

import dataclasses
import datetime
import io
import json
import math
import os
from importlib import metadata

import equinox as eqx
import jax
import numpy as np

from ..filesafety import open_regular_file, size_text
from ..jsonable import to_jsonable
from ..path import Path
from .networks import CONTROL_KINDS, Control
from .protocol import bind_control, resample_schedule, resample_step_sizes

MAGIC = b"FE_TOOL_CONTROL\n"
FORMAT_VERSION = 1
MAX_CONTROL_FILE_BYTES = 256 * 2**20  # a larger file is refused unread
MAX_HEADER_BYTES = 16 * 2**20  # the JSON header line (λ schedule, settings, probe)


def _version(name: str) -> str:
    try:
        return metadata.version(name)
    except metadata.PackageNotFoundError:  # pragma: no cover - editable installs without metadata
        return "unknown"


@dataclasses.dataclass
class LoadedControl:
    """A control read back from a file.

    Attributes:
        control: the rebuilt velocity model (``None`` when only a protocol was saved).
        lams, step_sizes: the protocol saved with it (``None`` if none was saved).
        fingerprint: the system fingerprint it was trained for.
        settings: the settings saved with it.
        header: the whole JSON header.

    Use it as ``warm_start=`` of :func:`prepare_control`, or switch with it directly:
    ``lams, eps = loaded.protocol(K)`` and ``loaded.drift_for(lams, eps)``.
    """

    control: Control | None
    lams: np.ndarray | None
    step_sizes: np.ndarray | None
    fingerprint: str
    settings: dict
    header: dict

    def protocol(self, steps: int) -> tuple[np.ndarray, np.ndarray]:
        """The saved schedule and step sizes carried over to ``steps`` switching steps."""
        if self.lams is None:
            raise ValueError("this file holds no protocol; pass your own lams and step sizes to drift_for")
        lams = resample_schedule(self.lams, steps)
        return lams, resample_step_sizes(self.lams, self.step_sizes, lams)

    def drift_for(self, lams, step_sizes):
        """φ(x, λ) of the loaded control on the protocol (``lams``, ``step_sizes``)."""
        return bind_control(self.control, lams, step_sizes)

    @property
    def drift(self):
        """φ on the saved protocol."""
        return bind_control(self.control, self.lams, self.step_sizes)


def system_fingerprint(path: Path, probe) -> str:
    """The fingerprint :func:`save_control` and :func:`load_control` compare (a short hash)."""
    return path.fingerprint_probe(np.asarray(probe, dtype=np.float64))


def save_control(file, outcome_or_control, lams=None, step_sizes=None, fingerprint: str | None = None,
                 settings: dict | None = None, *, probe=None) -> None:
    """Write a control (or a :class:`ControlOutcome`'s control and protocol) to ``file``.

    Args:
        file: path of the file to write.
        outcome_or_control: a :class:`ControlOutcome` or a :class:`Control`.
        lams, step_sizes: protocol to store (default: the outcome's production protocol).
        fingerprint: system fingerprint (:func:`system_fingerprint` / ``Path.fingerprint_probe``).
        settings: JSON-able settings to keep with it (e.g. the workflow options).
        probe: the probe configuration the fingerprint was computed at; stored so
            :func:`load_control` can recompute the fingerprint from a path.
    """
    if not fingerprint:
        raise ValueError("save_control needs fingerprint= (path.fingerprint_probe(probe)) so a load on another "
                         "system can be refused")
    if isinstance(outcome_or_control, Control) or outcome_or_control is None:
        control = outcome_or_control
    else:
        control = outcome_or_control.control
        lams = outcome_or_control.lams if lams is None else lams
        step_sizes = outcome_or_control.step_sizes if step_sizes is None else step_sizes
        settings = {**getattr(outcome_or_control, "settings", {}), **(settings or {})}
    if (lams is None) != (step_sizes is None):
        raise ValueError("give both lams and step_sizes, or neither")
    if control is not None and control.kind not in CONTROL_KINDS:
        raise ValueError(f"control kind {control.kind!r} is not registered; decorate its class with @register_control")
    header = {
        "format_version": FORMAT_VERSION,
        "kind": None if control is None else control.kind,
        "hyperparameters": None if control is None else control.hyperparameters(),
        "fingerprint": str(fingerprint),
        "probe": None if probe is None else np.asarray(probe, dtype=np.float64).tolist(),
        "lams": None if lams is None else np.asarray(lams, dtype=np.float64).tolist(),
        "step_sizes": None if step_sizes is None else np.asarray(step_sizes, dtype=np.float64).tolist(),
        "settings": to_jsonable(settings or {}),
        "versions": {"fe_tool": _version("fe_tool"), "jax": _version("jax"), "equinox": _version("equinox")},
        "saved": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
    }
    if os.path.lexists(file) and not os.path.isfile(file):
        raise ControlFileError(f"{file} exists and is not a regular file; save the control to an ordinary file")
    partial = f"{os.fspath(file)}.partial"
    with open(partial, "wb") as f:  # written aside, then renamed: an interrupted save leaves no truncated file
        f.write(MAGIC)
        f.write(json.dumps(header).encode("utf-8") + b"\n")
        if control is not None:
            eqx.tree_serialise_leaves(f, control)
    os.replace(partial, file)


class ControlFileError(ValueError):
    """A saved control file is unreadable, damaged, or made for another system; the message names
    the file and the problem (never the file's contents)."""


def _plain(value, limit: int = 80) -> str | None:
    """``value`` if it is short printable text (safe to show in a message), else ``None``."""
    if isinstance(value, str) and 0 < len(value) <= limit and value.isprintable():
        return value
    return None


def _finite_array(value, file, what: str, ndim: int | None = None) -> np.ndarray:
    def numbers_only(v) -> bool:
        if isinstance(v, list):
            return all(numbers_only(u) for u in v)
        return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)

    try:
        ok = numbers_only(value)
        arr = np.asarray(value, dtype=np.float64) if ok else None
    except (OverflowError, ValueError, RecursionError):
        ok, arr = False, None
    if not ok or (ndim is not None and arr.ndim != ndim):
        raise ControlFileError(f"{file}: the header's {what} is not a {'flat ' if ndim == 1 else ''}list of finite "
                               "numbers; the file is damaged: retrain or restore it")
    return arr


def _check_protocol(lams, step_sizes, file) -> tuple[np.ndarray | None, np.ndarray | None]:
    """The saved λ schedule (0 → 1, strictly increasing) and its positive step sizes, or (None, None)."""
    if lams is None and step_sizes is None:
        return None, None
    if lams is None or step_sizes is None:
        raise ControlFileError(f"{file}: the header has {'lams' if step_sizes is None else 'step_sizes'} without "
                               f"{'step_sizes' if step_sizes is None else 'lams'}; the file is damaged")
    lams = _finite_array(lams, file, "λ schedule (lams)", ndim=1)
    step_sizes = _finite_array(step_sizes, file, "step sizes", ndim=1)
    if lams.size < 2 or lams[0] != 0.0 or lams[-1] != 1.0 or not np.all(np.diff(lams) > 0):
        raise ControlFileError(f"{file}: the saved λ schedule must rise strictly from 0 to 1 ({lams.size} values "
                               "read); the file is damaged: retrain or restore it")
    if step_sizes.size != lams.size - 1:
        raise ControlFileError(f"{file}: the saved protocol needs {lams.size - 1} step sizes (one per λ step), the "
                               f"header has {step_sizes.size}; the file is damaged")
    if not np.all(step_sizes > 0):
        raise ControlFileError(f"{file}: the saved step sizes must all be positive; the file is damaged")
    return lams, step_sizes


def _configuration_shape(header: dict, probe, file) -> tuple[int, ...] | None:
    """The configuration shape the control was made for (its hyperparameters' shape, else the probe's)."""
    hyper = header.get("hyperparameters")
    shape = hyper.get("shape") if isinstance(hyper, dict) else None
    if shape is not None:
        if not (isinstance(shape, list) and shape and all(isinstance(n, int) and not isinstance(n, bool) and n > 0
                                                          for n in shape)):
            raise ControlFileError(f"{file}: the header's configuration shape is not a list of positive whole "
                                   "numbers; the file is damaged")
        shape = tuple(shape)
    if probe is not None and shape is not None and probe.shape != shape:
        raise ControlFileError(f"{file}: the stored probe configuration has shape {probe.shape}, the control "
                               f"{shape}; the file is damaged")
    return shape if shape is not None else (None if probe is None else probe.shape)


def _check_header(header, file) -> dict:
    """Validate a parsed header; the checked summary :func:`read_control_header` returns."""
    if not isinstance(header, dict):
        raise ControlFileError(f"{file}: the header is not a JSON object; the file is damaged")
    version = header.get("format_version")
    if type(version) is not int or version != FORMAT_VERSION:
        shown = f"format {version}" if type(version) is int else "an unreadable format number"
        raise ControlFileError(f"{file} has control-file {shown}; this fe_tool reads format "
                               f"{FORMAT_VERSION}. Retrain the control with this version")
    fingerprint = header.get("fingerprint")
    if _plain(fingerprint, 256) is None:
        raise ControlFileError(f"{file}: the header has no readable system fingerprint; the file is damaged")
    kind = header.get("kind")
    if kind is not None and (not isinstance(kind, str) or kind not in CONTROL_KINDS):
        readable = isinstance(kind, str) and kind.isidentifier() and len(kind) <= 40
        shown = f"a control of kind {kind!r}" if readable else "a control of an unreadable kind"
        raise ControlFileError(f"{file} holds {shown}, unknown here (known: {sorted(CONTROL_KINDS)})")
    if kind is not None and not isinstance(header.get("hyperparameters"), dict):
        raise ControlFileError(f"{file}: the header's hyperparameters are not a JSON object; the file is damaged")
    settings = header.get("settings", {})
    if not isinstance(settings, dict):
        raise ControlFileError(f"{file}: the header's settings are not a JSON object; the file is damaged")
    probe = None if header.get("probe") is None else _finite_array(header["probe"], file, "probe configuration")
    lams, step_sizes = _check_protocol(header.get("lams"), header.get("step_sizes"), file)
    return {"file": str(file), "kind": kind, "fingerprint": fingerprint,
            "shape": _configuration_shape(header, probe, file), "probe": probe, "lams": lams,
            "step_sizes": step_sizes, "settings": settings, "header": header}


def _read_header(handle, file) -> dict:
    """Magic line and JSON header from an open control file, validated (see :func:`_check_header`)."""
    magic = handle.read(len(MAGIC))
    if magic != MAGIC:
        problem = "is empty" if not magic else f"does not start with the line {MAGIC.decode().strip()}"
        raise ControlFileError(f"{file} is not an fe_tool control file: it {problem}")
    line = handle.readline(MAX_HEADER_BYTES + 1)
    if not line.endswith(b"\n"):
        problem = ("ends inside the header line (truncated)" if len(line) <= MAX_HEADER_BYTES else
                   f"has a header line longer than {size_text(MAX_HEADER_BYTES)}")
        raise ControlFileError(f"{file}: the control file {problem}; the file is damaged: retrain or restore it")
    try:
        header = json.loads(line.decode("utf-8"))
    except UnicodeDecodeError as err:
        raise ControlFileError(f"{file}: the header is not UTF-8 text (byte {err.start}); "
                               "the file is damaged") from None
    except json.JSONDecodeError as err:  # err.msg is a fixed phrase; the position is a number
        raise ControlFileError(f"{file}: the header is not valid JSON ({err.msg} at character {err.pos}); "
                               "the file is damaged") from None
    except RecursionError:
        raise ControlFileError(f"{file}: the header is nested too deeply; the file is damaged") from None
    return _check_header(header, file)


def read_control_header(file) -> dict:
    """Read and validate only the header of a control file (cheap: no weights are read).

    Returns:
        dict with ``kind`` (``None`` for a protocol-only file), ``fingerprint``, ``shape``
        (configuration shape the control was made for, or ``None``), ``probe``, ``lams``,
        ``step_sizes``, ``settings``, ``file`` and the raw ``header``.

    Raises:
        ControlFileError: not a regular file, larger than ``MAX_CONTROL_FILE_BYTES``, not a control
            file, or a damaged header (bad JSON, missing keys, a λ schedule that does not rise
            strictly from 0 to 1, non-positive step sizes, NaN numbers).
    """
    with open_regular_file(file, MAX_CONTROL_FILE_BYTES, error=ControlFileError, what="control file") as handle:
        return _read_header(handle, file)


def _refuse_other_system(info: dict, wanted: str, file) -> None:
    if wanted == info["fingerprint"]:
        return
    settings = info["settings"]
    described = _plain(settings.get("system")) or _plain(settings.get("path")) or "an unnamed system"
    saved = _plain(info["header"].get("saved"), 40) or "at an unknown time"
    raise ControlFileError(
        f"{file} holds a control trained for system fingerprint {info['fingerprint']} ({described}, saved {saved}), "
        f"but the current system has fingerprint {wanted}: the energies differ, so the control would not fit. "
        "Train a new control for this system (mode='learned' without warm_start) or load the file saved for it.")


def check_control_fits(file, path: Path, probe) -> dict:
    """Refuse, before any sampling, a control file that is damaged or made for another system.

    Reads only the header (:func:`read_control_header`), compares the configuration shape with
    ``probe`` and the saved fingerprint with ``path.fingerprint_probe(probe)`` (a few energy
    evaluations). The workflow saves controls with the A start as probe, so pass ``start_a``.
    Returns the header summary; raises :class:`ControlFileError` naming the file and the problem.
    """
    info = read_control_header(file)
    probe = np.asarray(probe, dtype=np.float64)
    if info["shape"] is not None and info["shape"] != probe.shape:
        raise ControlFileError(f"{file} holds a control for configurations of shape {info['shape']}, but this system's "
                               f"configurations have shape {probe.shape}; train a control for this system")
    _refuse_other_system(info, system_fingerprint(path, probe), file)
    return info


def _read_weights(handle, info: dict, file) -> Control | None:
    """The control's arrays after the header: exactly the byte count its structure needs, all finite."""
    rest = handle.read(MAX_CONTROL_FILE_BYTES + 1)
    if info["kind"] is None:
        if rest:
            raise ControlFileError(f"{file}: {len(rest)} unexpected bytes after the header of a protocol-only "
                                   "file; the file is damaged")
        return None
    try:
        skeleton = CONTROL_KINDS[info["kind"]].skeleton(info["header"]["hyperparameters"])
    except Exception as err:  # noqa: BLE001 - any failure means the header does not describe a control
        raise ControlFileError(f"{file}: the header's hyperparameters do not describe a {info['kind']} control "
                               f"({type(err).__name__}); the file is damaged") from None
    expected = io.BytesIO()
    eqx.tree_serialise_leaves(expected, skeleton)
    needed = expected.tell()
    if len(rest) != needed:
        problem = "is truncated" if len(rest) < needed else "has trailing bytes"
        raise ControlFileError(f"{file}: {len(rest)} bytes of weights follow the header where this control's "
                               f"structure needs {needed}: the file {problem} (or its header does not describe its "
                               "weights); retrain or restore it")
    try:
        control = eqx.tree_deserialise_leaves(io.BytesIO(rest), skeleton)
    except Exception as err:  # noqa: BLE001 - damaged array headers, shapes or dtypes that differ
        raise ControlFileError(f"{file}: the weights do not match the control's structure ({type(err).__name__}); "
                               "the file is damaged") from None
    leaves = [np.asarray(x) for x in jax.tree_util.tree_leaves(control) if eqx.is_inexact_array(x)]
    bad = sum(int(np.size(x) - np.count_nonzero(np.isfinite(x))) for x in leaves)
    if bad:
        raise ControlFileError(f"{file}: {bad} weight(s) are NaN or infinite (a diverged training run?); "
                               "retrain the control")
    return control


def load_control(file, expected_fingerprint: str | None = None, *, path: Path | None = None) -> LoadedControl:
    """Read a file written by :func:`save_control`, validating all of it.

    Args:
        file: the file (a regular file of at most ``MAX_CONTROL_FILE_BYTES``).
        expected_fingerprint: the fingerprint of the system at hand; a different one
            in the file raises :class:`ControlFileError`.
        path: alternatively, the current path: the fingerprint is recomputed at the
            probe configuration stored in the file and compared.

    Raises:
        ControlFileError (a ``ValueError``): not a control file, an unknown format or control
            kind, a damaged header (see :func:`read_control_header`), weights that are truncated,
            followed by trailing bytes or not finite, or a fingerprint mismatch (the message
            names both systems and what to do).
    """
    with open_regular_file(file, MAX_CONTROL_FILE_BYTES, error=ControlFileError, what="control file") as handle:
        info = _read_header(handle, file)
        wanted = expected_fingerprint
        if wanted is None and path is not None:
            if info["probe"] is None:
                raise ControlFileError(f"{file} stores no probe configuration; pass expected_fingerprint= instead "
                                       "of path=")
            try:
                wanted = system_fingerprint(path, info["probe"])
            except Exception as err:  # noqa: BLE001 - a probe that does not fit the path's energies
                raise ControlFileError(f"{file}: its probe configuration (shape {info['probe'].shape}) does not fit "
                                       f"the current system ({type(err).__name__}); the control was made for "
                                       "another system") from None
        if wanted is not None:
            _refuse_other_system(info, wanted, file)
        control = _read_weights(handle, info, file)
    return LoadedControl(control, info["lams"], info["step_sizes"], info["fingerprint"], info["settings"],
                         info["header"])
