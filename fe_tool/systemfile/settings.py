"""The tables both layouts share: ``[reference]``, ``[settings]``, ``name`` and ``description``.

``[settings]`` holds options of :func:`fe_tool.estimate` (see :class:`fe_tool.options.Options`);
each is checked here for its type, and the workflow checks ranges and combinations before any
computation. Files named in ``[settings]`` are resolved in the system file's folder.
"""
from __future__ import annotations

import inspect
import pathlib
from typing import Any

from ..filesafety import open_regular_file, resolve_inside
from .reader import (SystemFileError, check_keys, fail, finite, number, numeric_array, text, whole_number)

# the type each estimate() option takes in a file (whole numbers with their minimum)
WHOLE_NUMBER_SETTINGS = {"budget": 1, "switching_steps": 0, "trajectories": 2, "chains": 4, "seed": 0,
                         "exchange_every": 1, "samples_per_window": 16}
TEXT_SETTINGS = ("method", "spacing", "units", "window_starts", "sampler")
SWITCH_SETTINGS = ("exchange", "precondition", "progress")
NOT_IN_FILES = {"path": "a path object cannot be written in a file; describe the change in [change]",
                "reference": "give the known answer in a [reference] table"}


def reference(data: dict) -> dict | None:
    """The optional [reference]: ΔF in the file's energy unit, its source and a positive tolerance."""
    if "reference" not in data:
        return None
    ref = data["reference"]
    if not isinstance(ref, dict):
        fail("reference", "a table with delta_f, source and tolerance", ref)
    check_keys(ref, {"delta_f", "source", "tolerance"}, "reference")
    tolerance = float("nan")  # absent: the result is compared within its own error bar only
    if "tolerance" in ref:
        tolerance = number(ref, "tolerance", "reference", positive=True)
    return {"delta_f": number(ref, "delta_f", "reference"), "source": text(ref, "source", "reference", "not given"),
            "tolerance": tolerance}


def _file_setting(value: Any, key: str, folder: pathlib.Path, allow_outside_files: bool, must_exist: bool) -> str:
    """A file named in [settings], resolved in the system file's folder."""
    if not isinstance(value, str):
        fail(key, "a file name (text)", value)
    target = resolve_inside(folder, value, allow_outside=allow_outside_files, error=SystemFileError, what=key)
    if must_exist:
        open_regular_file(target, 2**62, error=SystemFileError, what=key).close()
    elif target.exists() and not target.is_file():
        raise SystemFileError(f"{key}: {target} exists and is not a regular file; name a new or ordinary file")
    return str(target)


def _network_table(value: Any, key: str) -> None:
    """[settings.control_settings.network]: a registered control kind and its constructor's keywords."""
    from ..control import CONTROL_KINDS

    if not isinstance(value, dict):
        fail(key, "a table such as {kind = \"mlp\", width = 32}", value)
    kind = value.get("kind", "mlp")
    if not isinstance(kind, str) or kind not in CONTROL_KINDS:
        fail(f"{key}.kind", f"one of {sorted(CONTROL_KINDS)}", kind)
    parameters = {n: p.default for n, p in inspect.signature(CONTROL_KINDS[kind].__init__).parameters.items()
                  if n not in ("self", "shape", "scales", "key", "path")}
    check_keys(value, set(parameters) | {"kind"}, key)
    for name, item in value.items():
        default = parameters.get(name)
        if name == "kind":
            continue
        if isinstance(default, int) and not isinstance(default, bool):
            whole_number(item, f"{key}.{name}", 1)
        elif isinstance(item, list):
            numeric_array(item, f"{key}.{name}", "a list of numbers")
        elif not finite(item):
            fail(f"{key}.{name}", "a number or a list of numbers", item)


def _control_settings(value: Any) -> dict:
    """[settings.control_settings]: keyword arguments of prepare_control, each of its default's type."""
    from ..control import prepare_control

    if not isinstance(value, dict):
        fail("settings.control_settings", "a table of control training settings", value)
    parameters = {n: p.default for n, p in inspect.signature(prepare_control).parameters.items()
                  if p.kind is inspect.Parameter.KEYWORD_ONLY and n not in ("mode", "budget", "progress", "warm_start")}
    check_keys(value, set(parameters), "settings.control_settings")
    typed = {"training_steps": 1, "check_every": 1}  # None by default, whole numbers when given
    for name, item in value.items():
        key, default = f"settings.control_settings.{name}", parameters[name]
        if name == "network":
            _network_table(item, key)
        elif isinstance(default, bool):
            if not isinstance(item, bool):
                fail(key, "true or false", item)
        elif isinstance(default, str):
            if not (isinstance(item, str) or (name == "learn_steps" and isinstance(item, bool))):
                fail(key, "text (a string in quotes)", item)
        elif isinstance(default, int) or name in typed:
            value[name] = whole_number(item, key, typed.get(name, 0))
        else:  # the float settings and learning_rate
            value[name] = number(value, name, "settings.control_settings", positive=True)
    return value


def _lambda_list(name: str, value: Any) -> Any:
    """``schedule`` or ``windows``: a name, a count of windows, or a flat list of λ values."""
    key = f"settings.{name}"
    if name == "schedule" and isinstance(value, str):
        return value
    if name == "windows" and not isinstance(value, list):
        return whole_number(value, key, 2)
    lams = numeric_array(value, key, "a name or a flat list of λ values") if isinstance(value, list) else None
    if lams is None or lams.ndim != 1:
        fail(key, "a name or a flat list of λ values", value)
    return lams.tolist()


def _simple_setting(name: str, value: Any) -> Any:
    """Settings checked by kind alone: whole numbers, true/false, text, step_scale, start sets."""
    from ..options import METHODS

    key = f"settings.{name}"
    if name in WHOLE_NUMBER_SETTINGS:
        return whole_number(value, key, WHOLE_NUMBER_SETTINGS[name])
    if name in SWITCH_SETTINGS:
        if not isinstance(value, bool):
            fail(key, "true or false", value)
        return value
    if name in TEXT_SETTINGS:
        if not isinstance(value, str) or (name == "method" and value not in METHODS):
            fail(key, f"one of {list(METHODS)}" if name == "method" else "text (a string in quotes)", value)
        return value
    if name == "step_scale":
        return number({name: value}, name, "settings", positive=True)
    if not isinstance(value, list) or not value:  # starts_a, starts_b
        fail(key, "a list of start configurations", value)
    return numeric_array(value, key, "a list of start configurations").tolist()


def _setting(name: str, value: Any, folder: pathlib.Path, allow_outside_files: bool) -> Any:
    """One [settings] value checked for its type (the workflow checks ranges and combinations)."""
    from ..options import CONTROL_MODES

    key = f"settings.{name}"
    if name in NOT_IN_FILES:
        raise SystemFileError(f"{key}: not allowed in a system file; {NOT_IN_FILES[name]}")
    if name in ("schedule", "windows"):
        return _lambda_list(name, value)
    if name == "control":
        if not isinstance(value, str):
            fail(key, f"one of {list(CONTROL_MODES)} or a saved control file name", value)
        return value if value in CONTROL_MODES else _file_setting(value, key, folder, allow_outside_files, True)
    if name == "save_control":
        return _file_setting(value, key, folder, allow_outside_files, False)
    if name == "control_settings":
        return _control_settings(dict(value) if isinstance(value, dict) else value)
    if name in (*WHOLE_NUMBER_SETTINGS, *SWITCH_SETTINGS, *TEXT_SETTINGS, "step_scale", "starts_a", "starts_b"):
        return _simple_setting(name, value)
    return value


def reference_and_settings(data: dict, folder: pathlib.Path, allow_outside_files: bool) -> tuple[dict | None, dict]:
    """The optional [reference] and [settings] (estimate options, each checked for its type)."""
    from ..options import OPTION_NAMES

    settings = data.get("settings", {})
    if not isinstance(settings, dict):
        fail("settings", "a table of estimate() options", settings)
    check_keys(settings, set(OPTION_NAMES) | {"seed"}, "settings")
    checked = {name: _setting(name, value, folder, allow_outside_files) for name, value in settings.items()}
    return reference(data), checked


def data_folder(source: str) -> pathlib.Path:
    """The folder a system file's relative paths start from (the current folder for a dict)."""
    return pathlib.Path(source).parent.resolve() if source != "<dict>" else pathlib.Path.cwd().resolve()


def name_and_description(data: dict, source: str) -> tuple[str, str]:
    """``name`` (default: the file's stem) and ``description`` (default empty)."""
    return text(data, "name", "", pathlib.Path(source).stem), text(data, "description", "", "")
