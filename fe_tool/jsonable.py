"""Conversion of results, reports and file headers to plain JSON values."""
from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np


def to_jsonable(value: Any) -> Any:
    """``value`` with numpy arrays/scalars, tuples and dataclasses turned into JSON types.

    Non-finite floats become the strings ``"nan"``, ``"inf"`` or ``"-inf"`` (strict JSON has
    no such numbers); objects with a ``to_dict`` method use it; anything else unknown
    becomes its ``str``.
    """
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return to_jsonable(value.tolist())
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return v if math.isfinite(v) else str(v)
    if value is None or isinstance(value, str):
        return value
    if hasattr(value, "to_dict"):
        return to_jsonable(value.to_dict())
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return to_jsonable(dataclasses.asdict(value))
    return str(value)
