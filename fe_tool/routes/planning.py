"""Choosing the switching protocol (steps K, step size, trajectories T) from pilot runs.

Two sources of dissipation compete in unadjusted Langevin switching:

* lag behind the moving interpolation, which falls as the total switching time
  t = K·ε grows: ≈ A / (K s), and
* discretisation: each step adds about the mean negative log Metropolis ratio the same
  move would have had (the work increments are exactly those log-ratios when λ does not
  move), which grows like ε³ per step (Roberts & Rosenthal 1998, J. R. Stat. Soc. B 60,
  255, for the ε³ scaling of MALA's log-acceptance): ≈ B K s³.

Here s is the step relative to the end-state sampler's adapted MALA step.  Pilot runs at
one K and a few s measure the hysteresis h = ⟨w_F⟩ + ⟨w_R⟩ (twice the mean dissipation,
known without knowing ΔF); A and B are fitted by non-negative least squares and the plan
minimises the predicted BAR variance at the remaining budget.  For Gaussian works of
spread σ (σ² ≈ h), Var(BAR) ≈ σ²/(2T)·g(σ) with g growing from 1 (σ → 0) to ≈1.8 at σ = 3,
which exp(σ²/15) follows within 10 % (quadrature of the BAR variance in Shirts et al. 2003,
PRL 91, 140601, tabulated in docs/references.md §7a).
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np
from scipy.optimize import nnls

from .budget import MIN_TRAJECTORIES, PILOT_SCALES, affordable_trajectories  # noqa: F401  (PILOT_SCALES re-exported)

PREFERRED_TRAJECTORIES = 64  # plans with fewer are taken only when no plan affords this many
MAX_STEPS = 20_000


@dataclasses.dataclass
class PilotPoint:
    steps: int
    scale: float
    hysteresis: float  # ⟨w_F⟩ + ⟨w_R⟩ over non-diverged trajectories, kT
    spread: float  # larger of the forward and reverse work standard deviations, kT
    diverged: int


@dataclasses.dataclass
class Plan:
    steps: int
    scale: float
    trajectories: int
    predicted_hysteresis: float
    predicted_stderr: float
    reason: str


def fit_dissipation(points: list[PilotPoint]) -> tuple[float, float] | None:
    """(A, B) ≥ 0 of h ≈ A/(K s) + B K s³ from pilot points without divergence (relative residuals)."""
    good = [p for p in points if p.diverged == 0 and math.isfinite(p.hysteresis) and p.hysteresis > 0]
    if len(good) < 2:
        return None
    design = np.array([[1.0 / (p.steps * p.scale), p.steps * p.scale**3] for p in good])
    h = np.array([p.hysteresis for p in good])
    coef, _ = nnls(design / h[:, None], np.ones_like(h))
    if not np.all(np.isfinite(coef)) or coef.sum() <= 0:
        return None
    return float(coef[0]), float(coef[1])


def predicted_hysteresis(model: tuple[float, float], steps: int, scale: float) -> float:
    a, b = model
    return a / (steps * scale) + b * steps * scale**3


def best_scale(model: tuple[float, float], steps: int, largest: float = 1.0, smallest: float = 1e-3) -> float:
    """The s minimising A/(K s) + B K s³: s⁴ = A / (3 B K²), clipped to [smallest, largest]."""
    a, b = model
    if b <= 0:
        return largest
    if a <= 0:
        return smallest
    return float(np.clip((a / (3.0 * b * steps**2)) ** 0.25, smallest, largest))


def bar_variance_model(hysteresis: float, trajectories: int) -> float:
    """Predicted Var(BAR) for Gaussian works with σ² = h: σ²/(2T)·exp(σ²/15)."""
    h = max(hysteresis, 1e-6)
    return h / (2.0 * trajectories) * math.exp(min(h / 15.0, 50.0))


def plan_protocol(points: list[PilotPoint], *, remaining: int, per_point: int, available: int,
                  steps: int | None = None, trajectories: int | None = None,
                  scale: float | None = None, batch: int = 128) -> Plan:
    """Choose K, s and T for the remaining budget (user-fixed values are kept).

    T is what ``remaining`` pays for in both directions, batch padding included (see
    :func:`fe_tool.routes.budget.affordable_trajectories`). Plans with at least
    :data:`PREFERRED_TRAJECTORIES` per direction are preferred; when none exists, plans with at
    least :data:`fe_tool.routes.budget.MIN_TRAJECTORIES` are considered.
    """
    model = fit_dissipation(points)
    stable = [p for p in points if p.diverged == 0]
    largest = max((p.scale for p in stable), default=min(p.scale for p in points) * 0.5) if points else 1.0

    def traj_for(k):
        if trajectories is not None:
            return trajectories
        return affordable_trajectories(remaining, k, per_point, batch, available)

    if model is None:
        # fall back: the pilot point with least hysteresis, steps for a ~1 kT spread
        best = min(stable, key=lambda p: p.hysteresis, default=None)
        s = scale if scale is not None else (best.scale if best else largest * 0.25)
        if steps is None:
            spread = best.spread if best else 10.0
            k0 = best.steps if best else 32
            steps = max(16, int(math.ceil(k0 * spread**2)))
            t = traj_for(steps)
            if t < MIN_TRAJECTORIES and trajectories is None:
                steps = max(1, remaining // (2 * per_point * MIN_TRAJECTORIES) - 1)
                while steps > 1 and traj_for(steps) < MIN_TRAJECTORIES:
                    steps -= 1
        t = traj_for(steps)
        return Plan(int(steps), float(s), int(t), float("nan"), float("nan"),
                    "pilot too noisy to fit a dissipation model; used the best pilot step size")

    candidates = [steps] if steps is not None else sorted(
        {int(k) for k in np.unique(np.geomspace(8, MAX_STEPS, 60).astype(int))})
    best_plan = None
    fixed = trajectories is not None or steps is not None
    for floor in ((2,) if fixed else (PREFERRED_TRAJECTORIES, MIN_TRAJECTORIES)):
        for k in candidates:
            t = traj_for(k)
            if t < floor:
                continue
            s = scale if scale is not None else best_scale(model, k, largest=largest)
            h = predicted_hysteresis(model, k, s)
            var = bar_variance_model(h, t)
            if best_plan is None or var < best_plan.predicted_stderr**2:
                best_plan = Plan(int(k), float(s), int(t), h, math.sqrt(var),
                                 f"dissipation model h ≈ {model[0]:.3g}/(K·s) + {model[1]:.3g}·K·s³ fitted to "
                                 f"{len(points)} pilot runs; predicted hysteresis {h:.2f} kT")
        if best_plan is not None:
            break
    if best_plan is None:
        k = steps if steps is not None else 8
        while steps is None and k > 1 and traj_for(k) < MIN_TRAJECTORIES:
            k -= 1
        t = max(2, traj_for(k))
        s = scale if scale is not None else best_scale(model, k, largest=largest)
        best_plan = Plan(int(k), float(s), int(t), predicted_hysteresis(model, k, s), float("nan"),
                         "budget too small for the preferred number of trajectories")
    return best_plan


def length_profile(lams: np.ndarray, increment_variance: np.ndarray, floor: float = 0.1) -> np.ndarray:
    """Normalised cumulative thermodynamic length L(λ_k) ∈ [0, 1] on the pilot grid ``lams``.

    For small steps the work variance of step k is ≈ Δλ_k² g(λ), with g the
    thermodynamic metric (the variance of ∂u/∂λ), so Σ_k √Var_k approximates the
    thermodynamic length ∫ √g dλ; schedules equally spaced in it keep the per-step
    dissipation constant, which minimises total dissipation for slow switching
    (Crooks 2007, PRL 99, 100602; Sivak & Crooks 2012, PRL 108, 190602).  A ``floor``
    share of uniform spacing keeps every region of λ visited.
    """
    steps = np.sqrt(np.clip(np.nan_to_num(increment_variance, nan=0.0, posinf=0.0), 0.0, None))
    total = steps.sum()
    if not np.isfinite(total) or total <= 0:
        return np.asarray(lams, dtype=np.float64)
    density = (1.0 - floor) * steps / total + floor * np.diff(lams)
    cumulative = np.concatenate([[0.0], np.cumsum(density)])
    return cumulative / cumulative[-1]


def schedule_from_profile(lams: np.ndarray, profile: np.ndarray, steps: int) -> np.ndarray:
    """λ_0 = 0 < … < λ_K = 1 equally spaced in the length ``profile`` (piecewise-linear in λ)."""
    targets = np.linspace(0.0, 1.0, steps + 1)
    out = np.interp(targets, profile, lams)
    out[0], out[-1] = 0.0, 1.0
    return np.maximum.accumulate(out)
