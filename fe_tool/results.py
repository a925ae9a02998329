"""The result of a free-energy calculation: numbers, diagnostics, cost, and its summary text."""
from __future__ import annotations

import dataclasses
import json
from typing import Any

import numpy as np

from .estimators.record import Estimate
from .jsonable import to_jsonable

CAUTION = (
    "Caution: simulated free energies depend on the energy model and on sampling; "
    "they need experimental validation before they inform design or safety decisions."
)


ERROR_KINDS = {
    "asymptotic": "asymptotic formula",
    "bootstrap": "bootstrap",
    "bias-aware": "bias-aware model",
    "chain-jackknife": "jackknife over chains",
    "not applicable": "not applicable",
}
"""How each estimator's error bar was computed, in words for the summary table."""


@dataclasses.dataclass
class Result:
    """ΔF = F_B − F_A with its uncertainty and everything needed to judge it.

    Attributes:
        delta_f, stderr: headline estimate and one standard error, in ``units``.
        estimator: name of the estimator behind the headline; ``choice_reason`` says why.
        estimates: every estimator's :class:`Estimate`, in ``units``.
        work_forward, work_reverse: reduced works (kT units) of the A→B and B→A trajectories,
            non-finite values (diverged trajectories) kept in place.
        energy_evaluations: every energy-and-gradient evaluation spent (end-state sampling,
            pilot, training and switching).
        cost: the same broken down by stage.
        kT, units: thermal energy and the name of the energy unit of ``delta_f``.
        diagnostics: sampler and switching diagnostics (JSON-able).
        warnings: plain sentences; empty when nothing looked wrong.
        flagged: True when a diagnostic makes the headline number untrustworthy.
        settings: the resolved options of the run.
        timings: wall-clock seconds per stage.
        reference: optional known answer {delta_f, source, tolerance} in ``units``.
        extras: route-specific data (training history, dissipation along λ, windows ...).
    """

    delta_f: float
    stderr: float
    estimator: str
    choice_reason: str
    estimates: dict[str, Estimate]
    work_forward: np.ndarray
    work_reverse: np.ndarray
    energy_evaluations: int
    cost: dict[str, int]
    kT: float
    units: str
    diagnostics: dict[str, Any]
    warnings: list[str]
    flagged: bool
    settings: dict[str, Any]
    timings: dict[str, float]
    reference: dict[str, Any] | None = None
    extras: dict[str, Any] = dataclasses.field(default_factory=dict)

    # ------------------------------------------------------------------ conversions
    def in_kT(self) -> tuple[float, float]:
        """(ΔF, stderr) in units of kT."""
        return self.delta_f / self.kT, self.stderr / self.kT

    def converted(self, units: str, factor: float) -> "Result":
        """The same result with energies multiplied by ``factor`` and labelled ``units``."""
        ref = None
        if self.reference is not None:
            ref = {**self.reference, "delta_f": self.reference["delta_f"] * factor,
                   "tolerance": self.reference.get("tolerance", float("nan")) * factor}
        return dataclasses.replace(
            self, delta_f=self.delta_f * factor, stderr=self.stderr * factor, kT=self.kT * factor, units=units,
            estimates={k: v.scaled(factor) for k, v in self.estimates.items()}, reference=ref)

    def to_dict(self) -> dict[str, Any]:
        """A JSON-serialisable dictionary of the whole result (works included)."""
        out = {
            "delta_f": self.delta_f,
            "stderr": self.stderr,
            "units": self.units,
            "kT": self.kT,
            "estimator": self.estimator,
            "choice_reason": self.choice_reason,
            "estimates": {k: v.to_dict() for k, v in self.estimates.items()},
            "work_forward": self.work_forward,
            "work_reverse": self.work_reverse,
            "energy_evaluations": self.energy_evaluations,
            "cost": self.cost,
            "diagnostics": self.diagnostics,
            "warnings": list(self.warnings),
            "flagged": self.flagged,
            "settings": self.settings,
            "timings": self.timings,
            "extras": self.extras,
            "caution": CAUTION,
        }
        if self.reference is not None:
            out["reference"] = self.reference
        return to_jsonable(out)

    def to_json(self, path) -> None:
        """Write :meth:`to_dict` as JSON, atomically (a reader never sees half a file)."""
        from .atomic import write_text_atomically

        write_text_atomically(path, json.dumps(self.to_dict(), indent=1))

    # ------------------------------------------------------------------ text
    def summary(self) -> str:
        """The plain-text summary: headline, reference check, every estimator, diagnostics, cost, caution."""
        lines = [self._headline_line(), f"headline estimator: {self.estimator} — {self.choice_reason}"]
        if self.reference is not None:
            lines.append(self._reference_line())
        lines.append("")
        lines.extend(self._estimator_table())
        lines.append("")
        lines.extend(self._run_lines())
        lines.append("")
        if self.warnings:
            lines.append("warnings:" + ("  (result FLAGGED: do not trust the headline)" if self.flagged else
                                        "  (information; the result is not flagged)"))
            lines.extend(f"  - {w}" for w in self.warnings)
        else:
            lines.append("warnings: none")
        lines.append("")
        lines.append(CAUTION)
        return "\n".join(lines)

    def _headline_line(self) -> str:
        u = self.units
        headline = f"ΔF = F_B − F_A = {self.delta_f:.4f} ± {self.stderr:.4f} {u}"
        if u != "kT":
            headline += f"   ({self.delta_f / self.kT:.4f} ± {self.stderr / self.kT:.4f} kT, kT = {self.kT:.6g} {u})"
        return headline

    def _reference_line(self) -> str:
        u, ref = self.units, self.reference
        diff = self.delta_f - ref["delta_f"]
        tolerance = ref.get("tolerance", float("nan"))
        allowed = max(tolerance, 4.0 * self.stderr) if tolerance == tolerance else 4.0 * self.stderr
        verdict = "pass" if abs(diff) <= allowed else "FAIL"
        return (f"reference: {ref['delta_f']:.4f} {u} ({ref.get('source', 'no source given')}); difference "
                f"{diff:+.4f} {u}; allowed max(tolerance {tolerance:.4f} {u}, 4σ = {4 * self.stderr:.4f} {u}): {verdict}")

    def _estimator_table(self) -> list[str]:
        lines = [f"  {'estimator':<20s} {'ΔF':>12s} {'stderr':>10s}  {'error bar from':<22s} trusted"]
        for name, est in self.estimates.items():
            if name == "crooks_gaussian" and est.is_finite:
                lines.append(f"  {name:<20s} {est.delta_f:12.4f} {est.stderr:10.4f}  "
                             f"{ERROR_KINDS.get(est.error_kind, est.error_kind):<22s} if the works are Gaussian")
                continue
            trusted = "yes" if (est.is_finite and est.details.get("reliable", True)) else \
                ("no: " + est.details.get("unreliable_reason", "no finite error bar")[:60] + "…"
                 if est.details.get("unreliable_reason") else "no: no finite error bar")
            stderr = f"{est.stderr:10.4f}" if est.stderr == est.stderr and est.stderr != float("inf") else f"{'—':>10s}"
            lines.append(f"  {name:<20s} {est.delta_f:12.4f} {stderr}  {ERROR_KINDS.get(est.error_kind, est.error_kind):<22s} "
                         f"{trusted}")
        lines.append(f"  (ΔF and stderr in {self.units})")
        return lines

    def _run_lines(self) -> list[str]:
        lines = []
        for label, w in (("forward A→B", self.work_forward), ("reverse B→A", self.work_reverse)):
            finite = w[np.isfinite(w)]
            if w.size and finite.size:
                lines.append(f"  work {label}: {w.size} trajectories, mean {np.mean(finite):.3f} kT, "
                             f"spread {np.std(finite):.3f} kT, diverged {int(np.sum(np.isnan(w) | (w == -np.inf)))}, "
                             f"+inf (zero weight) {int(np.sum(w == np.inf))}")
        sw = self.settings
        if sw.get("switching_steps") == 0:
            lines.append(f"  switching: none — {self.diagnostics.get('plan', {}).get('reason', 'zero steps')}")
        elif "switching_steps" in sw:
            dynamics = self.diagnostics.get("switching_dynamics")
            lines.append(f"  switching: {sw.get('switching_steps')} steps, schedule {sw.get('schedule')}, "
                         f"control {self._control_words()}" + (f", {dynamics}" if dynamics else ""))
        check = self.diagnostics.get("insertion")
        if check and not check.get("used", True):
            lines.append(f"  insertion at the decoupled end: checked ({check['redraws']} placements per sample), "
                         f"not used: {check['reason']}")
        for end in ("a", "b"):
            d = self.diagnostics.get(f"sampling_{end}")
            if d:
                lines.append(f"  end state {end.upper()} sampler: acceptance {d['acceptance']:.2f}, "
                             f"autocorrelation {d['autocorrelation_time']:.1f} steps, "
                             f"effective samples {d['effective_sample_size']:.0f}, chains {d['chains']} "
                             f"({d['stuck_chains']} stuck)")
        if "control_decision" in self.extras:
            lines.append(f"  control: {self.extras['control_decision']}")
        cost = ", ".join(f"{k} {v:,}" for k, v in self.cost.items() if v)
        budget = sw.get("budget")
        share = f" of the budget {budget:,}" if isinstance(budget, int) and budget else ""
        lines.append(f"  cost: {self.energy_evaluations:,} energy evaluations{share} ({cost})")
        if self.timings:
            lines.append(f"  time: {self.timings.get('total', sum(self.timings.values())):.1f} s")
        return lines

    def _control_words(self) -> str:
        """What control the switching ran with, e.g. "none (auto: trained, then dropped)"."""
        asked = self.settings.get("control", "none")
        report = self.extras.get("control") or {}
        if asked == "none":
            return "none"
        kept = bool(report.get("kept")) and report.get("control") is not None
        used = "learned drift" if kept else ("learned protocol" if report.get("kept") else "none")
        if asked == "auto":
            trained = report.get("training_evaluations", 0) > 0
            what = ("trained and kept" if report.get("kept") else "trained, then dropped") if trained else "not trained"
            budget = self.settings.get("budget")
            cost = report.get("training_evaluations", 0)
            spent = f", training {cost:,} evaluations = {cost / budget:.1%} of the budget" if trained and budget else ""
            return f"{used} (auto: {what}{spent})"
        return f"{used} ({asked})"

    def __str__(self) -> str:
        return self.summary()
