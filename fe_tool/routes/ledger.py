"""What a run has spent and found so far, shared by the routes' stages."""
from __future__ import annotations

import dataclasses
from typing import Any


@dataclasses.dataclass
class Ledger:
    """Cost per stage (energy evaluations), warnings, the flag and wall-clock timings of one run."""

    cost: dict[str, int] = dataclasses.field(default_factory=dict)
    warnings: list[str] = dataclasses.field(default_factory=list)
    timings: dict[str, float] = dataclasses.field(default_factory=dict)
    flagged: bool = False
    meter: Any = None   # a fe_tool.progress.EvaluationMeter, or None
    notes: dict[str, Any] = dataclasses.field(default_factory=dict)  # stage findings for the diagnostics

    def spend(self, evaluations: int) -> None:
        """Move the progress meter (the cost itself is booked per stage in ``cost``)."""
        if self.meter is not None:
            self.meter.add(evaluations)

    @property
    def spent(self) -> int:
        return int(sum(self.cost.values()))
