"""What the switching route does with its works: nothing is dropped that is not a divergence,
headlines are chosen without looking at error bars, and flags follow reliable diagnostics only.

Synthetic works obey the Crooks relation P_F(w) = P_R(−w)·e^{w − Δf} exactly (Crooks 1999, Phys.
Rev. E 60, 2721; docs/references.md §5a), so the exact Δf is known in each test.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from fe_tool.routes import switching as route
from fe_tool.routes.ledger import Ledger
from fe_tool.diagnostics import check_agreement, check_headline
from fe_tool.estimators import Estimate, jarzynski
from fe_tool.sampling import StateSamples


def crooks_pair_with_blocked_reverse(generator, count, mean=2.5, spread=1.0, blocked=0.05):
    """Forward works N(μ, s²); reverse works: a share ``blocked`` at +∞-like values, the rest the
    Crooks partner N(−μ + s², s²) of the forward Gaussian.

    The partner carries ∫ P_F(w)e^{−(w − Δf)} dw = e^{Δf − μ + s²/2} of the reverse probability; it
    must be 1 − blocked, so Δf = μ − s²/2 + ln(1 − blocked).  (The matching forward works, at
    w → −∞ with vanishing probability, are never drawn: only BAR, which sees the reverse side, can
    get this Δf right.)
    """
    forward = generator.normal(mean, spread, count)
    reverse = generator.normal(-mean + spread**2, spread, count)
    stuck = generator.random(count) < blocked
    # half of the blocked reverse trajectories end with a huge finite work, half with +inf
    reverse[stuck] = np.where(generator.random(stuck.sum()) < 0.5, 1e8, np.inf)
    return forward, reverse, mean - 0.5 * spread**2 + math.log(1.0 - blocked)


def test_large_positive_works_are_kept_not_dropped():
    generator = np.random.default_rng(20261206)
    forward, reverse, exact = crooks_pair_with_blocked_reverse(generator, 50_000)
    assert not route.mark_diverged(np.array([1e8, 1e30, np.inf])).any()
    assert route.mark_diverged(np.array([np.nan, -np.inf])).all()
    # as the route processes them: divergences become NaN in place, then the estimators run
    processed = np.where(route.mark_diverged(reverse), np.nan, reverse)
    estimates, overlap = route.run_estimators(forward, processed, seed=0)
    b = estimates["bar"]
    print(f"BAR {b.delta_f:.4f} ± {b.stderr:.4f}, exact {exact:.4f}, overlap {overlap:.3f}")
    assert abs(b.delta_f - exact) < 4.0 * b.stderr
    assert b.samples == forward.size + reverse.size   # the blocked ones count
    # dropping them instead (what used to happen) misses by ln(1 − 0.05) ≈ −0.05, far beyond 4σ
    dropped = route.run_estimators(forward, reverse[reverse < 1e6], seed=0)[0]["bar"]
    assert abs(dropped.delta_f - exact) > 4.0 * dropped.stderr


def test_large_works_are_described_not_flagged():
    generator = np.random.default_rng(7)
    forward, reverse, _ = crooks_pair_with_blocked_reverse(generator, 2000)
    ledger = Ledger()
    samples = StateSamples(np.zeros((2000, 1)), 0.1, np.ones(1), 0.6, 1.0, 2000.0, 0, 64, 0, 0, True, 1.0, [])
    route._estimate_stage(forward, reverse, {"a": samples, "b": samples}, 0, ledger)
    text = " ".join(ledger.warnings)
    assert "legitimate samples" in text and "diverged" not in text
    assert not ledger.flagged


def test_one_sided_choice_ignores_error_bars():
    generator = np.random.default_rng(11)
    # forward dissipates 6 kT (spread √12), reverse 0.5 kT (spread 1): no overlap.  The forward
    # average needs ~e^{0.5} trajectories, the reverse one ~e^{6}: choose forward.
    delta = 1.0
    forward = generator.normal(delta + 6.0, math.sqrt(12.0), 400)
    reverse = generator.normal(-delta + 0.5, 1.0, 400)
    estimates, _ = route.run_estimators(forward, reverse, seed=0)
    choice = route.choose_one_sided(estimates, forward, reverse)
    assert choice == "jarzynski_forward"
    # shrinking either estimate's error bar must not change the choice
    for name in ("jarzynski_forward", "jarzynski_reverse"):
        tweaked = dict(estimates)
        tweaked[name] = Estimate(estimates[name].delta_f, 1e-6, "jarzynski", "bias-aware", 400, {})
        assert route.choose_one_sided(tweaked, forward, reverse) == choice


def test_poor_overlap_flags_whatever_the_headline():
    generator = np.random.default_rng(12)
    forward = generator.normal(30.0, 2.0, 300)
    reverse = generator.normal(30.0, 2.0, 300)     # hysteresis 60 kT: no overlap at all
    ledger = Ledger()
    samples = StateSamples(np.zeros((300, 1)), 0.1, np.ones(1), 0.6, 1.0, 300.0, 0, 64, 0, 0, True, 1.0, [])
    _, headline, _, overlap, _ = route._estimate_stage(forward, reverse, {"a": samples, "b": samples}, 0, ledger)
    assert overlap < 0.01 and headline != "bar"
    assert ledger.flagged


def test_disagreement_flags_only_reliable_estimators():
    head = Estimate(1.0, 0.05, "bar")
    heavy = Estimate(2.0, math.inf, "jarzynski", "bias-aware", 100,
                     {"reliable": False, "unreliable_reason": "heavy tail"})
    light = Estimate(2.0, 0.05, "jarzynski", "bias-aware", 100, {"reliable": True})
    msgs, serious = check_agreement({"bar": head, "jarzynski_forward": heavy}, "bar")
    assert not serious and "information only" in " ".join(msgs)
    msgs, serious = check_agreement({"bar": head, "jarzynski_forward": light}, "bar")
    assert serious
    assert check_headline(heavy, "jarzynski_forward")[1] and not check_headline(light, "jarzynski_forward")[1]


def test_heavy_weight_tail_is_unreliable_with_no_error_bar():
    # Exponential low-work tail of scale 0.9 (weights with Pareto shape 0.9 ≥ ½, infinite variance):
    # w = 2 − E, E ~ Exp(0.9).
    generator = np.random.default_rng(13)
    works = 2.0 - generator.exponential(0.9, 2000)
    result = jarzynski(works)
    assert result.details["reliable"] is False and math.isinf(result.stderr)
    assert result.details["tail_shape"] >= 0.5
    light = jarzynski(generator.normal(2.0, 0.5, 2000))
    assert light.details["reliable"] is True and math.isfinite(light.stderr)


@pytest.mark.parametrize("shape", [0.0, 0.3, 0.7])
def test_pareto_shape_estimate_against_known_generalised_pareto(shape):
    # Samples of scipy's generalised Pareto with known shape (an independent generator); the
    # Zhang & Stephens 2009 estimate with 400 exceedances has sd ≈ (1 + k)/√400 ≤ 0.09, the prior
    # towards ½ moves it by (½ − k)·10/410 ≤ 0.013: within 0.3 of the truth in all but ~1e-3 of seeds.
    from scipy import stats

    from fe_tool.estimators.tail import generalised_pareto_fit

    sample = stats.genpareto.rvs(shape, size=400, random_state=np.random.default_rng(int(shape * 10) + 3))
    estimate, _ = generalised_pareto_fit(sample)
    assert abs(estimate - shape) < 0.3


def test_chain_correlation_widens_the_one_sided_comparison():
    """Works from one sampling chain are correlated; BAR's chain-grouped error measures by how
    much (ratio 1.5 here), and the one-sided averages' independent-work errors are widened by
    the same factor before they are compared. A gap of 4.0 independent-work errors is then
    2.7 grouped errors (not flagged at 3); a gap of 6.0 is 4.0 (flagged)."""
    bar = Estimate(0.0, 0.15, "bar", "jackknife", 1000, {"stderr_chain_jackknife": 0.15, "chain_error_ratio": 1.5})
    for gap, flagged in ((4.0, False), (6.0, True)):
        se = 0.1 / math.sqrt(2.0)
        forward = Estimate(+gap * 0.05, se, "jarzynski", "bias-aware", 500, {})
        reverse = Estimate(-gap * 0.05, se, "jarzynski", "bias-aware", 500, {})
        msgs, serious = check_agreement({"bar": bar, "jarzynski_forward": forward, "jarzynski_reverse": reverse},
                                        "bar")
        assert serious is flagged, (gap, msgs)
