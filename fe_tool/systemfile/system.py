"""What a system file becomes (:class:`System`), and the bundled catalogue of system files."""
from __future__ import annotations

import dataclasses
import os
import pathlib
from typing import Any, Callable

import numpy as np

from .reader import SystemFileError


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
    units: str  # the file's units: "kJ/mol", "kcal/mol" or "reduced"
    reference: dict | None
    settings: dict[str, Any]
    source: str = ""
    path: Any = None  # a fe_tool.path.Path for particle systems (replaces linear mixing)
    unit_system: str = ""  # "kJ/mol-nm-K", "kcal/mol-nm-K" or "reduced" for particle systems; "" for field files
    particles: dict[str, Any] | None = None  # types, box and counts of a particle system (for reports)
    starts: np.ndarray | None = None  # (k, n, 3) start set of both end samplers ([particles] starts), or None

    def estimate(self, **overrides):
        """Run :func:`fe_tool.estimate` with the file's settings, updated by ``overrides``."""
        from ..workflow import estimate

        options = {**self.settings, **overrides}
        seed = options.pop("seed", 0)
        if self.path is not None:
            options.setdefault("path", self.path)
        if self.starts is not None:
            options.setdefault("starts_a", self.starts)
            options.setdefault("starts_b", self.starts)
        options.setdefault("units", self.unit_label())
        if self.reference is not None:
            options.setdefault("reference", self.reference)
        result = estimate(self.energy_a, self.energy_b, self.start_a, self.start_b, kT=self.kT, seed=seed, **options)
        result.settings["system"] = self.name
        return result

    def unit_label(self) -> str:
        """How results are labelled: the energy unit, "kT" (reduced, kT = 1) or the reduced unit's name."""
        if self.units != "reduced":
            return self.units
        if self.kT == 1.0:
            return "kT"
        return "ε (reduced LJ units)" if self.unit_system == "reduced" else "reduced energy units"


_ABBREVIATIONS = ("e.g.", "i.e.", "et al.", "cf.", "vs.", "approx.", "Eq.", "Eqs.", "Ref.", "Fig.", "No.")


def first_sentence(description: str) -> str:
    """The first sentence of a description, whole (line breaks joined).

    It ends at the first '.', '!' or '?' outside parentheses that is followed by a space (or ends
    the text) and does not end a common abbreviation such as "e.g."; citations inside parentheses
    ("(Müller & Brown 1979, Theor. Chim. Acta 53, 75)") never end a sentence.
    """
    words = " ".join(description.split())
    depth = 0
    for i, character in enumerate(words):
        depth += {"(": 1, "[": 1, ")": -1, "]": -1}.get(character, 0)
        if character not in ".!?" or depth > 0 or (i + 1 < len(words) and words[i + 1] != " "):
            continue
        if not any(words[:i + 1].endswith(" " + a) or words[:i + 1] == a for a in _ABBREVIATIONS):
            return words[:i + 1]
    return words


def bundled_systems_folder() -> pathlib.Path:
    """The ``systems/`` catalogue: ``$FE_TOOL_SYSTEMS`` or the folder beside the package."""
    env = os.environ.get("FE_TOOL_SYSTEMS")
    if env:
        return pathlib.Path(env)
    return pathlib.Path(__file__).resolve().parents[2] / "systems"


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
    """The bundled system files, sorted by name."""
    folder = bundled_systems_folder()
    return sorted(folder.glob("*.toml")) if folder.exists() else []
