"""The record every estimator returns: a reduced free-energy difference and its error."""
from __future__ import annotations

import dataclasses
import math
from typing import Any


@dataclasses.dataclass(frozen=True)
class Estimate:
    """A free-energy difference in units of kT (Δf = βΔF) with its uncertainty.

    Attributes:
        delta_f: reduced free-energy difference f_B - f_A (dimensionless, kT units).
        stderr: one standard error of ``delta_f`` (kT units); ``nan`` when unavailable.
        method: the estimator's name, e.g. ``"bar"``.
        error_kind: how ``stderr`` was obtained: ``"asymptotic"``, ``"bootstrap"`` or
            ``"bias-aware"`` (a bootstrap/asymptotic error widened by an estimated bias).
        samples: number of works/samples the estimate used (both directions summed).
        details: extra JSON-serialisable numbers (e.g. effective sample size, bias estimate).
    """

    delta_f: float
    stderr: float
    method: str
    error_kind: str = "asymptotic"
    samples: int = 0
    details: dict[str, Any] = dataclasses.field(default_factory=dict)

    @property
    def is_finite(self) -> bool:
        return math.isfinite(self.delta_f) and math.isfinite(self.stderr)

    def scaled(self, kT: float) -> "Estimate":
        """The same estimate with ``delta_f`` and ``stderr`` multiplied by ``kT``."""
        return dataclasses.replace(self, delta_f=self.delta_f * kT, stderr=self.stderr * kT)

    def to_dict(self) -> dict[str, Any]:
        return {
            "delta_f": float(self.delta_f),
            "stderr": float(self.stderr),
            "method": self.method,
            "error_kind": self.error_kind,
            "samples": int(self.samples),
            "details": {k: (float(v) if isinstance(v, (int, float)) else v) for k, v in self.details.items()},
        }
