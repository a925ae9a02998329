"""Saving and loading trained controls (no pickle).

File layout::

    FE_TOOL_CONTROL\\n                       magic line
    {"format_version": 1, ...}\\n            one line of JSON: the header
    <equinox.tree_serialise_leaves bytes>   the control's arrays (absent without a network)

The header holds the system fingerprint (:meth:`fe_tool.path.Path.fingerprint_probe`
of a probe configuration, stored too), the control kind and hyperparameters (to
rebuild the module skeleton), the protocol it was trained with, the caller's
settings and the versions of fe_tool, jax and equinox.  :func:`load_control`
refuses a file made for another system.
"""
from __future__ import annotations

import dataclasses
import datetime
import json
from importlib import metadata

import equinox as eqx
import numpy as np

from ..jsonable import to_jsonable
from ..path import Path
from .networks import CONTROL_KINDS, Control
from .protocol import bind_control, resample_schedule, resample_step_sizes

MAGIC = b"FE_TOOL_CONTROL\n"
FORMAT_VERSION = 1


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
    with open(file, "wb") as f:
        f.write(MAGIC)
        f.write(json.dumps(header).encode("utf-8") + b"\n")
        if control is not None:
            eqx.tree_serialise_leaves(f, control)


def load_control(file, expected_fingerprint: str | None = None, *, path: Path | None = None) -> LoadedControl:
    """Read a file written by :func:`save_control`.

    Args:
        file: the file.
        expected_fingerprint: the fingerprint of the system at hand; a different one
            in the file raises ``ValueError``.
        path: alternatively, the current path: the fingerprint is recomputed at the
            probe configuration stored in the file and compared.

    Raises:
        ValueError: not a control file, an unknown format or control kind, or a
            fingerprint mismatch (the message names both systems and what to do).
    """
    with open(file, "rb") as f:
        if f.readline() != MAGIC:
            raise ValueError(f"{file} is not an fe_tool control file (it does not start with {MAGIC!r})")
        try:
            header = json.loads(f.readline().decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as err:
            raise ValueError(f"{file}: the header of the control file is damaged ({err})") from None
        if header.get("format_version") != FORMAT_VERSION:
            raise ValueError(f"{file} has control-file format {header.get('format_version')!r}; this fe_tool reads "
                             f"format {FORMAT_VERSION}. Retrain the control with this version")
        saved = header["fingerprint"]
        wanted = expected_fingerprint
        if wanted is None and path is not None:
            if header.get("probe") is None:
                raise ValueError(f"{file} stores no probe configuration; pass expected_fingerprint= instead of path=")
            wanted = system_fingerprint(path, np.asarray(header["probe"]))
        if wanted is not None and wanted != saved:
            settings = header.get("settings", {})
            described = settings.get("system") or settings.get("path") or "an unnamed system"
            raise ValueError(
                f"{file} holds a control trained for system fingerprint {saved} ({described}, saved "
                f"{header.get('saved', '?')}), but the current system has fingerprint {wanted}: the energies differ, "
                "so the control would not fit. Train a new control for this system (mode='learned' without "
                "warm_start) or load the file saved for it.")
        control = None
        if header.get("kind") is not None:
            kind = header["kind"]
            if kind not in CONTROL_KINDS:
                raise ValueError(f"{file} holds a control of kind {kind!r}, unknown here (known: {sorted(CONTROL_KINDS)})")
            skeleton = CONTROL_KINDS[kind].skeleton(header["hyperparameters"])
            control = eqx.tree_deserialise_leaves(f, skeleton)
    as_array = lambda v: None if v is None else np.asarray(v, dtype=np.float64)  # noqa: E731
    return LoadedControl(control, as_array(header.get("lams")), as_array(header.get("step_sizes")), saved,
                         header.get("settings", {}), header)
