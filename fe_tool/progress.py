"""Progress bars that stay quiet when nobody is watching.

A bar is shown only when stderr is a terminal, ``FE_TOOL_PROGRESS`` is not ``"0"`` and the
caller did not pass ``enabled=False``.  ``enabled=True`` forces a bar (still silenced by
``FE_TOOL_PROGRESS=0``, so test logs and batch workers stay clean).
"""
from __future__ import annotations

import os
import sys
from typing import Any

__all__ = ["EvaluationMeter", "progress_enabled", "progress_bar"]


def progress_enabled(enabled: bool | None = None) -> bool:
    """Whether a bar should be drawn: env ``FE_TOOL_PROGRESS=0`` wins, then ``enabled``, then tty."""
    if os.environ.get("FE_TOOL_PROGRESS", "") == "0":
        return False
    if enabled is not None:
        return bool(enabled)
    try:
        return sys.stderr.isatty()
    except (AttributeError, ValueError):  # closed or replaced stderr
        return False


def progress_bar(total: int | None = None, description: str = "", *, enabled: bool | None = None,
                 unit: str = "it", **options: Any):
    """A ``tqdm`` bar, disabled (drawing nothing) unless :func:`progress_enabled` says so.

    Args:
        total: number of steps expected (``None``: unknown).
        description: short label shown before the bar.
        enabled: ``None`` follows the terminal; ``True``/``False`` force it on/off.
        unit, **options: passed to ``tqdm`` (e.g. ``leave=False``).

    Example:
        >>> with progress_bar(10, "pairs", unit="pair") as bar:
        ...     bar.update(1)
    """
    from tqdm import tqdm

    options.setdefault("dynamic_ncols", True)
    return tqdm(total=total, desc=description, unit=unit, disable=not progress_enabled(enabled),
                file=sys.stderr, **options)


class EvaluationMeter:
    """One bar over a whole run, counted in energy evaluations, moved by every stage as it spends.

    Stages call :meth:`add` after each block of sampler steps, pilot run, training check or
    switching batch, so the bar moves inside long stages and its time estimate means something;
    :meth:`stage` names what is running. Silent under the same rules as :func:`progress_bar`.
    """

    def __init__(self, total: int | None, description: str, *, enabled: bool | None = None):
        self._bar = progress_bar(total, description, enabled=enabled, unit="eval", unit_scale=True, leave=False)

    def stage(self, name: str) -> None:
        self._bar.set_postfix_str(name, refresh=False)

    def add(self, evaluations: int) -> None:
        self._bar.update(int(evaluations))

    def close(self) -> None:
        self._bar.close()
