"""The options of :func:`fe_tool.estimate` and their one validation, shared by every route.

Every check here runs before any sampling and raises ``ValueError`` naming the option, what
it expects and the fix. Values a user types (a budget of ``1e5``, a numpy integer) are
normalised; values of the wrong kind (``budget=True``, ``kT="1"``, a NaN seed) are refused.
"""
from __future__ import annotations

import dataclasses
import math
import numbers
import os
from typing import Any

import numpy as np

class InputError(ValueError):
    """Bad input found before any computation; the message names the problem and the fix."""


CONTROL_MODES = ("none", "learned", "auto")
SAMPLERS = ("auto", "mala", "kinetic", "kinetic_exact")
METHODS = ("switching", "windows")
SCHEDULE_NAMES = ("adaptive", "linear", "cosine", "power")
SPACINGS = ("gauss-legendre", "uniform", "linear", "cosine", "power")


@dataclasses.dataclass(frozen=True)
class Options:
    """Options of :func:`fe_tool.estimate` (all keyword-only there).

    Attributes:
        method: ``"switching"`` (nonequilibrium switching both ways, BAR headline) or
            ``"windows"`` (equilibrium λ-windows analysed with MBAR, BAR and TI).
        windows, spacing, exchange: the windows route's ladder (count or λ array), its
            spacing (``"gauss-legendre"``, ``"uniform"``, ...) and Hamiltonian replica exchange.
        exchange_every, samples_per_window, window_starts: the windows route's sampler steps
            between exchange attempts, kept samples per window (default from the budget) and
            where windows start (``"ends"`` or ``"chain"``, see :func:`fe_tool.routes.windows.estimate_windows`).
        budget: total energy evaluations the call may spend (end-state sampling, pilot,
            training and switching, or every window); ``None`` means the default budget when
            the protocol is chosen automatically, and no limit when both ``switching_steps``
            and ``trajectories`` are given. A whole-number float (``1e5``) is accepted.
        switching_steps: steps per trajectory K; ``None`` chooses K from pilot runs (down to 0
            where the decoupled end allows exact placements and insertion measures well);
            ``0`` asks for no switching: Bennett's ratio on the end states' energy differences
            (test-particle insertion with placements at a decoupled end).
        trajectories: trajectories per direction; ``None`` spends the rest of the budget.
        schedule: ``"adaptive"`` (λ spaced evenly in thermodynamic length measured by a pilot
            run), ``"linear"``, ``"cosine"``, ``"power"`` or an explicit λ array (K+1 values).
        step_scale: switching step relative to the end-state samplers' adapted step;
            ``None`` chooses it (with K) from pilot runs.
        chains: parallel sampling chains per end state (default: from the budget, 16 to 64).
        precondition: diagonal preconditioning (``None``: on for vector configurations).
        sampler: equilibrium sampling kernel: ``"mala"`` (Metropolis-adjusted Langevin, exact),
            ``"kinetic"`` (BAOAB kinetic Langevin, step held to a small shadow work),
            ``"kinetic_exact"`` (generalised HMC, exact), or ``"auto"`` (default: kinetic for
            particle coordinates, MALA for vectors and with ``exchange``).
        starts_a, starts_b: optional start sets for the end-state samplers: k configurations
            stacked on a first axis, each of ``start_a``'s shape; chain i of that end's sampler
            begins at ``starts[i mod k]``. Give starts in every slow basin.
        path: a :class:`~fe_tool.path.Path` replacing the linear mixing of the energies.
        control: ``"auto"`` (default: train a short pilot and keep the control only if the
            measured gain pays for its cost), ``"none"``, ``"learned"``, a saved control file,
            or a trained control object to reuse.
        control_settings: keyword arguments for :func:`fe_tool.control.prepare_control`.
        save_control: write the trained control and protocol to this file.
        units: name of the energy unit (shown in the summary and ``to_dict``).
        reference: optional known ΔF ``{"delta_f", "source", "tolerance"}`` in ``units``.
        progress: show progress bars (default: only in a terminal).
    """

    method: str = "switching"
    windows: Any = None
    spacing: str = "gauss-legendre"
    exchange: bool = False
    exchange_every: int = 10
    samples_per_window: int | None = None
    window_starts: str = "ends"
    budget: int | None = None
    switching_steps: int | None = None
    trajectories: int | None = None
    schedule: Any = "adaptive"
    step_scale: float | None = None
    chains: int | None = None
    precondition: bool | None = None
    sampler: str = "auto"
    starts_a: Any = None
    starts_b: Any = None
    path: Any = None
    control: Any = "auto"
    control_settings: dict | None = None
    save_control: str | None = None
    units: str = "energy units"
    reference: dict | None = None
    progress: bool | None = None


OPTION_NAMES = tuple(f.name for f in dataclasses.fields(Options))


# ------------------------------------------------------------------ single values

def _is_real(value: Any) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, (bool, np.bool_))


def whole_number(value: Any, name: str, minimum: int, *, allow_none: bool = True) -> int | None:
    """``value`` as a Python int ≥ ``minimum``; whole-number floats (1e5) are accepted."""
    if value is None and allow_none:
        return None
    if _is_real(value) and math.isfinite(float(value)) and float(value) == int(value):
        number = int(value)
        if number >= minimum:
            return number
    raise InputError(f"{name} must be a whole number ≥ {minimum} (e.g. {max(minimum, 1) * 100} or 1e5), "
                     f"got {value!r}")


def positive_number(value: Any, name: str, *, allow_none: bool = True) -> float | None:
    if value is None and allow_none:
        return None
    if _is_real(value) and math.isfinite(float(value)) and float(value) > 0:
        return float(value)
    raise InputError(f"{name} must be a positive finite number, got {value!r}")


def check_kT(kT: Any) -> float:
    """kT as a float: a positive finite real number (not text, not a bool)."""
    if not (_is_real(kT) and math.isfinite(float(kT)) and float(kT) > 0):
        raise InputError(f"kT must be a positive finite number in the energy functions' units (e.g. kT=1.0, or "
                         f"fe_tool.units.thermal_energy(300, 'kJ/mol')), got {kT!r}")
    return float(kT)


def check_seed(seed: Any) -> int:
    """A seed: a whole number ≥ 0 below 2**63 (not text, a bool or NaN)."""
    if _is_real(seed) and math.isfinite(float(seed)) and float(seed) == int(seed) and 0 <= int(seed) < 2**63:
        return int(seed)
    raise InputError(f"seed must be a whole number ≥ 0 (e.g. seed=0), got {seed!r}")


def _flag(value: Any, name: str) -> bool | None:
    if value is None or isinstance(value, (bool, np.bool_)):
        return None if value is None else bool(value)
    raise InputError(f"{name} must be True, False or None, got {value!r}")


def _text(value: Any, name: str, choices: tuple | None = None) -> str:
    if not isinstance(value, str) or (choices is not None and value not in choices):
        expected = f"one of {list(choices)}" if choices else "text"
        raise InputError(f"{name} must be {expected}, got {value!r}")
    return value


def writable_file(target: Any, name: str) -> str:
    """Refuse an output file whose folder does not exist or cannot be written, before any compute."""
    if not isinstance(target, (str, os.PathLike)) or not str(target):
        raise InputError(f"{name} must be a file name, got {target!r}")
    target = os.fspath(target)
    folder = os.path.dirname(os.path.abspath(target))
    if not os.path.isdir(folder):
        raise InputError(f"{name}={target!r}: the folder {folder!r} does not exist; create it first or choose "
                         "another file")
    if os.path.isdir(target):
        raise InputError(f"{name}={target!r} is a folder; give a file name")
    if not os.access(folder, os.W_OK):
        raise InputError(f"{name}={target!r}: the folder {folder!r} is not writable; choose another file")
    return target


# ------------------------------------------------------------------ the option set

def _check_schedule(schedule: Any, switching_steps: int | None) -> Any:
    if isinstance(schedule, str):
        return _text(schedule, "schedule", SCHEDULE_NAMES)
    try:
        lams = np.asarray(schedule, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"schedule must be one of {list(SCHEDULE_NAMES)} or an increasing array of λ values from "
                         f"0 to 1, got {type(schedule).__name__}") from None
    if lams.ndim != 1 or lams.size < 2 or not np.all(np.isfinite(lams)) or not np.all(np.diff(lams) > 0) \
            or abs(lams[0]) > 1e-12 or abs(lams[-1] - 1.0) > 1e-12:
        raise InputError("an explicit schedule must be a 1-D array of λ values rising strictly from 0 to 1")
    if switching_steps is None:
        raise InputError("an explicit λ array as schedule needs switching_steps = len(schedule) − 1")
    if lams.size != switching_steps + 1:
        raise InputError(f"the explicit schedule has {lams.size} λ values; switching_steps={switching_steps} "
                         f"needs {switching_steps + 1}")
    return lams


def _check_reference(reference: Any) -> dict | None:
    if reference is None:
        return None
    if not isinstance(reference, dict) or "delta_f" not in reference:
        raise InputError("reference must be a mapping with at least 'delta_f' (and ideally 'source', 'tolerance')")
    out = dict(reference)
    if not (_is_real(out["delta_f"]) and math.isfinite(float(out["delta_f"]))):
        raise InputError(f"reference['delta_f'] must be a finite number, got {out['delta_f']!r}")
    out["delta_f"] = float(out["delta_f"])
    if "tolerance" in out and not (isinstance(out["tolerance"], float) and math.isnan(out["tolerance"])):
        out["tolerance"] = positive_number(out["tolerance"], "reference['tolerance']", allow_none=False)
    return out


def _check_control(control: Any) -> Any:
    if isinstance(control, (str, os.PathLike)):
        control = os.fspath(control)
        if control in CONTROL_MODES:
            return control
        if not os.path.isfile(control):
            raise InputError(f"control={control!r}: use one of {list(CONTROL_MODES)}, a saved control file that "
                             "exists, or a trained control object")
        return control
    if control is None:
        return "none"
    from .control import ControlOutcome, LoadedControl
    if isinstance(control, (ControlOutcome, LoadedControl)):
        return control
    raise InputError(f"control must be one of {list(CONTROL_MODES)}, a saved control file or a trained control, "
                     f"got {type(control).__name__}")


def _check_route_fit(opts: Options) -> None:
    """Options that belong to one route only are refused on the other."""
    if opts.method != "windows":
        windows_only = [n for n in ("windows", "samples_per_window") if getattr(opts, n) is not None]
        windows_only += [n for n, default in (("exchange", False), ("exchange_every", 10), ("window_starts", "ends"))
                         if getattr(opts, n) != default]
        if windows_only:
            raise InputError(f"option(s) {windows_only} belong to the windows route; drop them or use "
                             "method='windows'")
        return
    switching_only = [n for n in ("switching_steps", "trajectories", "step_scale", "save_control")
                      if getattr(opts, n) is not None]
    if opts.control not in ("none", "auto"):
        switching_only.append("control")
    if not (isinstance(opts.schedule, str) and opts.schedule == "adaptive"):
        switching_only.append("schedule")
    if switching_only:
        raise InputError(f"option(s) {switching_only} belong to the switching route; drop them or use "
                         "method='switching'")


def check_options(options: dict) -> Options:
    """Validate and normalise ``estimate``'s keyword options; raise ``ValueError`` naming the fix."""
    unknown = sorted(set(options) - set(OPTION_NAMES))
    if unknown:
        raise InputError(f"unknown option(s) {unknown}; valid options are {list(OPTION_NAMES)}")
    o = Options(**options)
    steps = whole_number(o.switching_steps, "switching_steps", 0)
    fixed = dict(
        method=_text(o.method, "method", METHODS),
        spacing=_text(o.spacing, "spacing", SPACINGS),
        exchange=bool(_flag(o.exchange, "exchange")),
        exchange_every=whole_number(o.exchange_every, "exchange_every", 1, allow_none=False),
        samples_per_window=whole_number(o.samples_per_window, "samples_per_window", 16),
        window_starts=_text(o.window_starts, "window_starts", ("ends", "chain")),
        sampler=_text(o.sampler, "sampler", SAMPLERS),
        budget=whole_number(o.budget, "budget", 1),
        switching_steps=steps,
        trajectories=whole_number(o.trajectories, "trajectories", 2),
        schedule=_check_schedule(o.schedule, steps),
        step_scale=positive_number(o.step_scale, "step_scale"),
        chains=whole_number(o.chains, "chains", 4),
        precondition=_flag(o.precondition, "precondition"),
        control=_check_control(o.control),
        save_control=None if o.save_control is None else writable_file(o.save_control, "save_control"),
        units=_text(o.units, "units"),
        reference=_check_reference(o.reference),
        progress=_flag(o.progress, "progress"),
    )
    if o.windows is not None and isinstance(o.windows, (bool, np.bool_, str)):
        raise InputError(f"windows must be a number of windows or an array of λ values, got {o.windows!r}")
    if o.control_settings is not None and not isinstance(o.control_settings, dict):
        raise InputError(f"control_settings must be a dict of prepare_control options, got {o.control_settings!r}")
    if o.path is not None:
        from .path import Path
        if not isinstance(o.path, Path):
            raise InputError(f"path must be a fe_tool.Path (e.g. a SoftCoreDecouplingPath), got {type(o.path).__name__}")
    opts = dataclasses.replace(o, **fixed)
    _check_route_fit(opts)
    return opts


def sampling_kernel(opts: "Options", start) -> str:
    """The kernel the end-state and window samplers use: ``opts.sampler``; ``"auto"`` chooses by
    measurement: generalised HMC (``"kinetic_exact"``) for particle coordinates (shape (n, d)) and
    MALA for vector configurations (exchange between windows needs MALA).

    Particles get a kinetic kernel because on the 108-particle LJ fluid it needed 12–60× fewer steps
    per independent energy sample than MALA (``benchmarks/bench_kernels.py``), and the exact one
    because the unadjusted BAOAB kernel, though 2–3× faster still, biases the end states: on two LJ
    particles in a box (``tests/test_insertion_route.py``) its ΔF was 0.017 ± 0.005 kT low at its
    adapted step, three seeds, while generalised HMC and MALA agreed with the quadrature
    (``benchmarks/bench_kernels.py --pair``). Switching itself stays exact with either (its work
    carries the shadow work)."""
    if opts.sampler != "auto":
        return opts.sampler
    return "kinetic_exact" if getattr(start, "ndim", 1) == 2 and not opts.exchange else "mala"
