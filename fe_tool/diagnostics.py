"""Plain-language checks on works and estimates: what to distrust and why.

Each check returns a list of sentences (empty when all is well) and whether the
problem is serious enough to flag the headline number.
"""
from __future__ import annotations

import math

import numpy as np
from scipy.special import logsumexp

from .estimators.record import Estimate


def weight_effective_fraction(works: np.ndarray) -> float:
    """Kish effective sample size of the weights e^{−w}, divided by the number of works.

    (Σ e^{−w})² / Σ e^{−2w} / N; near 1 when all works are alike, near 1/N when one
    trajectory dominates the exponential average (Kish 1965, "Survey Sampling" [mem]).
    """
    w = np.asarray(works, dtype=np.float64)
    w = w[np.isfinite(w)]
    if w.size == 0:
        return 0.0
    return float(np.exp(2 * logsumexp(-w) - logsumexp(-2 * w)) / w.size)


def check_divergence(work_forward: np.ndarray, work_reverse: np.ndarray) -> tuple[list[str], bool]:
    msgs = []
    for label, w in (("forward", work_forward), ("reverse", work_reverse)):
        bad = int(np.sum(~np.isfinite(w)))
        if bad:
            msgs.append(f"{bad} of {w.size} {label} trajectories diverged (non-finite work); they are excluded "
                        "from the estimators, so the estimate is biased towards the surviving paths. "
                        "Use smaller steps (step_scale) or more switching steps.")
    return msgs, bool(msgs)


def check_weights(work_forward: np.ndarray, work_reverse: np.ndarray) -> tuple[list[str], dict]:
    msgs, info = [], {}
    for label, w in (("forward", work_forward), ("reverse", work_reverse)):
        if w.size == 0:
            continue
        frac = weight_effective_fraction(w)
        ess = frac * np.sum(np.isfinite(w))
        info[f"jarzynski_{label}_effective_samples"] = ess
        if ess < 20:
            msgs.append(f"the {label} Jarzynski average is dominated by {ess:.0f} of {w.size} trajectories: "
                        "dissipation is too large for this number of trajectories, so the one-sided "
                        f"{label} estimate is unreliable (use more switching steps or trust BAR).")
    return msgs, info


def check_overlap(overlap: float) -> tuple[list[str], bool]:
    if not math.isfinite(overlap):
        return ["the overlap of forward and reverse work distributions could not be computed."], True
    if overlap < 0.01:
        return [f"forward and reverse work distributions barely overlap (overlap {overlap:.3g}); BAR's "
                "error bar is unreliable. Use more switching steps or a larger budget."], True
    if overlap < 0.05:
        return [f"forward and reverse work distributions overlap poorly (overlap {overlap:.3g}); treat the "
                "error bar with caution."], False
    return [], False


def check_agreement(estimates: dict[str, Estimate], headline: str, threshold: float = 3.0) -> tuple[list[str], bool]:
    """Warn when an estimator disagrees with the headline by more than ``threshold`` combined errors."""
    msgs, serious = [], False
    ref = estimates[headline]
    for name, est in estimates.items():
        if name == headline or not est.is_finite:
            continue
        gap = abs(est.delta_f - ref.delta_f)
        scale = math.hypot(est.stderr, ref.stderr)
        if scale > 0 and gap > threshold * scale and name == "crooks_gaussian":
            msgs.append(f"the Crooks Gaussian estimate ({est.delta_f:.3f} kT) differs from {headline} "
                        f"({ref.delta_f:.3f} kT) by {gap / scale:.1f} combined errors: the work distributions are "
                        "not Gaussian, which that estimate assumes (BAR and Jarzynski do not).")
        elif scale > 0 and gap > threshold * scale:
            msgs.append(f"{name} ({est.delta_f:.3f} kT) disagrees with {headline} ({ref.delta_f:.3f} kT) by "
                        f"{gap / scale:.1f} combined standard errors: the switching is far from equilibrium "
                        "or an end state is poorly sampled.")
            serious = serious or name.startswith("jarzynski")
    if "jarzynski_forward" in estimates and "jarzynski_reverse" in estimates:
        f, r = estimates["jarzynski_forward"], estimates["jarzynski_reverse"]
        if f.is_finite and r.is_finite:
            gap = abs(f.delta_f - r.delta_f)
            scale = math.hypot(f.stderr, r.stderr)
            if scale > 0 and gap > threshold * scale:
                msgs.append(f"forward and reverse Jarzynski estimates disagree ({f.delta_f:.3f} vs "
                            f"{r.delta_f:.3f} kT, {gap / scale:.1f} combined errors).")
                serious = True
    return msgs, serious


def check_chain_correlation(estimate: Estimate) -> list[str]:
    """Warn when works from the same sampling chain are correlated beyond the jackknife's own noise.

    Reads ``stderr_chain_jackknife``, ``chain_error_ratio`` and ``jackknife_noise`` from the
    estimate's details (see :func:`fe_tool.estimators.grouped.with_grouped_error`); a ratio above
    1 + 2·noise is more than the grouped error's sampling spread explains.
    """
    ratio = estimate.details.get("chain_error_ratio", float("nan"))
    noise = estimate.details.get("jackknife_noise", float("nan"))
    if not (math.isfinite(ratio) and math.isfinite(noise)) or ratio <= 1.0 + 2.0 * noise:
        return []
    return [f"works started from the same sampling chain are correlated: grouping them by chain gives an error "
            f"{ratio:.2f}× the independent-work error, so the reported error is the chain-grouped jackknife one. "
            "An end state has a slow mode the sampler's thinning did not resolve; more chains (or starts in "
            "every basin) give more independent trajectories."]
