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


OVERLAP_FLAG = 0.01   # below this forward/reverse overlap no estimate from these works is trusted
OVERLAP_CAUTION = 0.05
LARGE_WORK = 1e6      # kT; works above this are reported (never dropped)


def check_divergence(work_forward: np.ndarray, work_reverse: np.ndarray) -> tuple[list[str], bool]:
    """Diverged trajectories: work NaN (the integration blew up) or −∞. They are left out and flagged."""
    msgs = []
    for label, w in (("forward", work_forward), ("reverse", work_reverse)):
        w = np.asarray(w, dtype=np.float64)
        bad = int(np.sum(np.isnan(w) | (w == -np.inf)))
        if bad:
            msgs.append(f"{bad} of {w.size} {label} trajectories diverged (work NaN or −∞); they are excluded "
                        "from the estimators, so the estimate is biased towards the surviving paths. "
                        "Use smaller steps (step_scale) or more switching steps.")
    return msgs, bool(msgs)


def describe_large_works(work_forward: np.ndarray, work_reverse: np.ndarray) -> list[str]:
    """Say how many very large (or infinite) positive works were kept, and why that is right."""
    msgs = []
    for label, w in (("forward", work_forward), ("reverse", work_reverse)):
        w = np.asarray(w, dtype=np.float64)
        large = int(np.sum(w > LARGE_WORK))
        if large:
            msgs.append(f"{large} of {w.size} {label} works exceed {LARGE_WORK:.0e} kT (e.g. a particle switched on "
                        "inside a neighbour); they are legitimate samples with (nearly) zero weight and stay in every "
                        "estimator and in the counts (information, not a problem).")
        low = int(np.sum(np.isfinite(w) & (w < -LARGE_WORK)))
        if low:
            msgs.append(f"{low} of {w.size} {label} works are below −{LARGE_WORK:.0e} kT: such works dominate any "
                        "exponential average; check the energy for a collapse (e.g. opposite charges without a "
                        "repulsive core).")
    return msgs


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
    if overlap < OVERLAP_FLAG:
        return [f"forward and reverse work distributions barely overlap (overlap {overlap:.3g} < {OVERLAP_FLAG}): "
                "neither BAR's nor a one-sided error bar can be trusted. Use more switching steps or a larger "
                "budget."], True
    if overlap < OVERLAP_CAUTION:
        return [f"forward and reverse work distributions overlap poorly (overlap {overlap:.3g}); treat the "
                "error bar with caution."], False
    return [], False


def is_reliable(estimate: Estimate) -> bool:
    """An estimate its own diagnostics trust: finite, and (for exponential averages) a light weight tail."""
    return estimate.is_finite and bool(estimate.details.get("reliable", True))


def check_headline(estimate: Estimate, headline: str) -> tuple[list[str], bool]:
    """A headline estimate its own diagnostics call unreliable flags the result."""
    if is_reliable(estimate):
        return [], False
    reason = estimate.details.get("unreliable_reason", "its error bar is not finite")
    return [f"the headline {headline} estimate is unreliable: {reason}."], True


def _chain_inflation(estimates: dict[str, Estimate]) -> float:
    """How much larger than the independent-work error BAR's chain-grouped error came out (≥ 1).

    Works started from one sampling chain are correlated; that correlation inflates every
    estimator's error, not only BAR's, so the one-sided averages' independent-work errors are
    scaled by the same factor before they are compared (``chain_error_ratio`` from
    :func:`fe_tool.estimators.grouped.with_grouped_error`)."""
    bar = estimates.get("bar")
    ratio = bar.details.get("chain_error_ratio", 1.0) if bar is not None else 1.0
    return float(ratio) if ratio is not None and math.isfinite(ratio) and ratio > 1.0 else 1.0


def check_agreement(estimates: dict[str, Estimate], headline: str, threshold: float = 3.0) -> tuple[list[str], bool]:
    """Compare every estimator with the headline.

    Errors of estimators computed as if the works were independent are scaled by the chain
    correlation BAR's grouped error measured (:func:`_chain_inflation`). A disagreement flags
    the result only when the disagreeing estimator is itself judged
    reliable by its own diagnostics (:func:`is_reliable`; the Crooks Gaussian fit never, as it
    assumes Gaussian works); otherwise it is shown as information. A one-sided exponential
    average is known to be biased in its own direction when its weights have a heavy tail, so
    its disagreement then says nothing about the headline.
    """
    msgs, serious = [], False
    ref = estimates[headline]
    grouped = _chain_inflation(estimates)
    own = lambda e: e.stderr * (1.0 if "stderr_chain_jackknife" in e.details else grouped)  # noqa: E731
    for name, est in estimates.items():
        if name == headline or not (math.isfinite(est.delta_f) and math.isfinite(ref.delta_f)):
            continue
        scale = math.hypot(own(est), own(ref)) if est.is_finite else math.nan
        if not (scale > 0) or abs(est.delta_f - ref.delta_f) <= threshold * scale:
            if not is_reliable(est) and name.startswith("jarzynski"):
                msgs.append(f"{name} ({est.delta_f:.3f} kT) is shown for information only: "
                            f"{est.details.get('unreliable_reason', 'its error bar is not finite')}.")
            continue
        gap = abs(est.delta_f - ref.delta_f) / scale
        if name == "crooks_gaussian":
            msgs.append(f"the Crooks Gaussian estimate ({est.delta_f:.3f} kT) differs from {headline} "
                        f"({ref.delta_f:.3f} kT) by {gap:.1f} combined errors: the work distributions are "
                        "not Gaussian, which that estimate assumes (BAR and Jarzynski do not).")
        elif is_reliable(est):
            msgs.append(f"{name} ({est.delta_f:.3f} kT) disagrees with {headline} ({ref.delta_f:.3f} kT) by "
                        f"{gap:.1f} combined standard errors: the switching is far from equilibrium "
                        "or an end state is poorly sampled.")
            serious = True
    f, r = estimates.get("jarzynski_forward"), estimates.get("jarzynski_reverse")
    if f is not None and r is not None and is_reliable(f) and is_reliable(r):
        scale = math.hypot(own(f), own(r))
        if scale > 0 and abs(f.delta_f - r.delta_f) > threshold * scale:
            msgs.append(f"forward and reverse Jarzynski estimates disagree ({f.delta_f:.3f} vs "
                        f"{r.delta_f:.3f} kT, {abs(f.delta_f - r.delta_f) / scale:.1f} combined errors).")
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
