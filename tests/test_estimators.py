"""Checks of fe_tool.estimators against analytic answers and docs/references.md §§3, 5, 6, 7.

Every reference is named beside the check.  Tags (defined in docs/references.md §1): [src] confirmed in a
public source, [num] checked numerically, [mem] from memory.  Tolerances come from reported
errors (|error| < 4σ, σ the combined standard error) or from the number of printed digits.
Coverage checks run ≥ 200 seeded repeats and require the ±1.96·stderr interval to contain
the truth in between 90 % and 98 % of them.

Gaussian work (Crooks 1999, Phys. Rev. E 60, 2721; docs/references.md §5b): reduced forward works
w_F ~ N(Δf + s²/2, s²) and reverse works w_R ~ N(−Δf + s²/2, s²), so Δf = ⟨w⟩ − s²/2.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy.stats import norm

from calibration import coverage_floor, describe, interval_coverage
from fe_tool.estimators import (
    Estimate,
    bar,
    crooks_gaussian,
    exponential_average,
    exponential_average_asymptotics,
    gauss_legendre_windows,
    gaussian_crossing,
    jarzynski,
    mbar,
    mbar_expectations,
    mbar_weights,
    neighbour_bar,
    thermodynamic_integration,
    trapezoid_weights,
    work_overlap,
)

LN2 = math.log(2.0)


def gaussian_works(generator, delta_f, spread, size):
    """Forward and reverse reduced works of a Gaussian-work process with the given Δf."""
    shape = size if isinstance(size, tuple) else (size,)
    forward = generator.normal(delta_f + 0.5 * spread**2, spread, shape)
    reverse = generator.normal(-delta_f + 0.5 * spread**2, spread, shape)
    return forward, reverse


ASYMPTOTIC_WIDTH = 1.25   # median reported stderr / observed rms error (tests/calibration.py)


def check_calibrated(name, estimates, errors, truth, width_limit=ASYMPTOTIC_WIDTH):
    """Coverage ≥ the 4σ binomial floor and a width ratio ≤ ``width_limit`` (tests/calibration.py)."""
    report = interval_coverage(estimates, errors, truth)
    print(describe(name, report))
    assert report["coverage"] >= coverage_floor(report["repeats"])
    assert report["width_ratio"] <= width_limit
    return report


def harmonic_samples(generator, stiffness, centres, per_state):
    """Exact samples of u_k = k_k (x − c_k)²/2 and the pooled reduced-energy matrix."""
    samples = np.concatenate([generator.normal(c, 1.0 / math.sqrt(k), per_state)
                              for k, c in zip(stiffness, centres)])
    energies = 0.5 * np.asarray(stiffness)[:, None] * (samples[None, :] - np.asarray(centres)[:, None]) ** 2
    return samples, energies


# --------------------------------------------------------------------------------------------
# Jarzynski
# --------------------------------------------------------------------------------------------

def test_jarzynski_gaussian_work_both_directions():
    # Gaussian work: Δf = ⟨w⟩ − s²/2 (Crooks 1999, Phys. Rev. E 60, 2721; docs/references.md §5b).
    generator = np.random.default_rng(11)
    forward, reverse = gaussian_works(generator, 2.0, 1.0, 20_000)
    for works, direction in ((forward, "forward"), (reverse, "reverse")):
        result = jarzynski(works, direction=direction, n_bootstrap=200, rng=generator)
        assert result.method == "jarzynski" and result.error_kind == "bias-aware"
        assert abs(result.delta_f - 2.0) < 4.0 * result.stderr
        assert result.stderr < 0.05
        assert 0.0 < result.details["effective_sample_size"] <= works.size
        json.dumps(result.to_dict())
    # The reverse estimate is biased downward in the A→B frame: the signed bias says so.
    assert result.details["bias"] <= 0.0


def test_jarzynski_is_reproducible_with_the_default_seed():
    works = np.random.default_rng(3).normal(1.0, 0.6, 40)
    assert jarzynski(works) == jarzynski(works)
    # Three works: a finite, deliberately wide error (the model width has one degree of freedom).
    few = jarzynski(works[:3])
    assert math.isfinite(few.stderr) and few.stderr > jarzynski(works).stderr
    assert math.isnan(jarzynski(works[:1]).stderr)


def test_jarzynski_nonfinite_policy():
    # +inf work carries zero weight and still counts: −ln((e⁰ + 0)/2) = ln 2 exactly.
    result = jarzynski([0.0, np.inf], n_bootstrap=10)
    assert result.delta_f == pytest.approx(LN2, abs=1e-15)
    assert result.details["infinite_works"] == 1
    with pytest.raises(ValueError, match="1 NaN"):
        jarzynski([0.0, 1.0, np.nan])
    with pytest.raises(ValueError, match="1 NaN, 0 \\+inf and 1 -inf"):
        jarzynski([0.0, -np.inf, np.nan])
    with pytest.raises(ValueError, match="0 NaN, 2 \\+inf"):
        jarzynski([0.0, np.inf, np.inf], nonfinite="raise")
    dropped = jarzynski([0.0, 1.0, np.nan, np.inf], nonfinite="drop", n_bootstrap=10)
    assert dropped.details["dropped_works"] == 2 and dropped.samples == 2
    assert dropped.delta_f == pytest.approx(exponential_average(np.array([0.0, 1.0])), abs=1e-15)
    with pytest.raises(ValueError, match="all 2 works are \\+inf"):
        jarzynski([np.inf, np.inf])


def test_asymptotic_bias_and_variance_formula_against_table():
    # docs/references.md §6 [src for the papers, formula derived there]: Zuckerman & Woolf 2002,
    # Phys. Rev. Lett. 89, 180602; Gore, Ritort & Bustamante 2003, PNAS 100, 12564.
    # B = (e^{s²} − 1)/2N, Var = (e^{s²} − 1)/N; table values printed to 3–4 digits.
    table = [  # (s, N, asymptotic bias, asymptotic variance) as printed
        (0.5, 10, "0.01420", "0.0284"), (0.5, 100, "0.00142", "0.00284"), (1.0, 10, "0.0859", "0.172"),
        (1.0, 1000, "0.00086", "0.00172"), (2.0, 100, "0.268", "0.536"), (2.0, 10_000, "0.0027", "0.0054"),
    ]

    def half_unit(printed):   # rounding tolerance: half a unit in the last printed decimal
        return 0.5 * 10.0 ** -len(printed.split(".")[1])

    for spread, count, bias, variance in table:
        got_bias, got_variance = exponential_average_asymptotics(spread**2, count)
        assert abs(got_bias - float(bias)) <= half_unit(bias)
        assert abs(got_variance - float(variance)) <= half_unit(variance)


def test_finite_sample_bias_against_monte_carlo_table():
    # docs/references.md §6 Monte Carlo column [num]: s = 1, N = 10: bias 0.0730(9);
    # s = 0.5, N = 10: 0.01340(37); exact anchor N = 1: bias = s²/2.
    generator = np.random.default_rng(5)
    for spread, count, reference, reference_error in ((1.0, 10, 0.0730, 0.0009), (0.5, 10, 0.01340, 0.00037)):
        works = generator.normal(0.5 * spread**2, spread, (40_000, count))   # Δf = 0
        estimates = exponential_average(works, axis=1)
        error = math.hypot(estimates.std(ddof=1) / math.sqrt(estimates.size), reference_error)
        assert abs(estimates.mean() - reference) < 4.0 * error
    single = exponential_average(generator.normal(0.5, 1.0, (40_000, 1)), axis=1)
    assert abs(single.mean() - 0.5) < 4.0 * single.std(ddof=1) / math.sqrt(single.size)


def test_reported_gaussian_model_bias_tracks_the_true_bias():
    # The bias the estimator reports (Gaussian-work model, finite N simulated) should on average
    # match the Monte Carlo bias 0.0730(9) of docs/references.md §6 for s = 1, N = 10.
    generator = np.random.default_rng(8)
    works = generator.normal(0.5, 1.0, (300, 10))
    reported = np.array([jarzynski(w, n_bootstrap=200, rng=generator).details["bias_gaussian_model"]
                         for w in works])
    error = math.hypot(reported.std(ddof=1) / math.sqrt(reported.size), 0.0009)
    assert abs(reported.mean() - 0.0730) < 4.0 * error


def test_jarzynski_coverage_non_gaussian_work():
    # Gamma-distributed works (shape 2, scale 1): ⟨e^{−w}⟩ = (1 + 1)^{−2} from the gamma
    # moment-generating function, so Δf = 2 ln 2 exactly.  Light low-work tail: the interval
    # must not be needlessly wide either.  Its coverage is close to the upper limit (0.963(4)
    # in a 2000-repeat development run), so 1000 repeats are used to resolve it.
    generator = np.random.default_rng(28)
    works = generator.gamma(2.0, 1.0, (1000, 50))
    results = [jarzynski(w, n_bootstrap=200, rng=generator) for w in works]
    report = interval_coverage([r.delta_f for r in results], [r.stderr for r in results], 2.0 * LN2)
    print(describe("jarzynski gamma works N=50", report))
    assert report["coverage"] >= coverage_floor(report["repeats"])
    assert report["width_ratio"] <= 4.0   # design limit of the bias-aware error (tests/test_coverage.py)


@pytest.mark.parametrize("spread, count", [(1.5, 50), (1.0, 200)])
def test_jarzynski_coverage(spread, count):
    # Gaussian work, Δf = 0.  (1.5, 50) is far below N ≈ 10·e^{2s²} ≈ 900 where the asymptotic
    # theory holds (docs/references.md §6); there the plain delta-method interval is too narrow
    # (Zuckerman & Woolf 2002) and the bias-aware one must repair it.
    generator = np.random.default_rng(21)
    works = generator.normal(0.5 * spread**2, spread, (400, count))
    results = [jarzynski(w, n_bootstrap=200, rng=generator) for w in works]
    estimates = [r.delta_f for r in results]
    honest = interval_coverage(estimates, [r.stderr for r in results], 0.0)
    plain = interval_coverage(estimates, [r.details["stderr_delta_method"] for r in results], 0.0)
    print(describe(f"jarzynski s={spread} N={count} bias-aware", honest))
    print(describe(f"jarzynski s={spread} N={count} delta method", plain))
    assert honest["coverage"] >= coverage_floor(honest["repeats"])
    assert honest["width_ratio"] <= 4.0   # design limit of the bias-aware error (tests/test_coverage.py)
    if spread == 1.5:
        # 400 repeats: a calibrated interval would cover ≥ 0.90 in all but ~1e-5 of seeds
        assert plain["coverage"] < 0.90


# --------------------------------------------------------------------------------------------
# Crooks
# --------------------------------------------------------------------------------------------

def test_crooks_worked_example():
    # Goette & Grubmüller 2009, J. Comput. Chem. 30, 447 [mem for the reference]; the worked
    # example W* = 1.85134071 with both densities 0.0721972233 is [num] in docs/references.md §5c.
    crossing = gaussian_crossing(5.0, 2.5, 1.0, 2.0)
    assert crossing == pytest.approx(1.85134071, abs=5e-9)
    assert norm.pdf(crossing, 5.0, 2.5) == pytest.approx(0.0721972233, abs=5e-11)
    assert norm.pdf(-crossing, 1.0, 2.0) == pytest.approx(0.0721972233, abs=5e-11)
    # Equal variances: the equation is linear, W* = (μ_F − μ_R)/2 (docs/references.md §5c).
    assert gaussian_crossing(3.0, 2.0, 1.0, 2.0) == 1.0
    assert gaussian_crossing(3.0, 2.0, 1.0, 2.0 * (1 + 1e-15)) == pytest.approx(1.0, abs=1e-12)
    vector = gaussian_crossing(np.array([5.0, 3.0]), np.array([2.5, 2.0]), 1.0, 2.0)
    np.testing.assert_allclose(vector, [1.85134071, 1.0], atol=5e-9)


def test_crooks_gaussian_work():
    # Gaussian work Δf = 2, s = 2 (docs/references.md §5b [num] used 10⁵ + 10⁵ works).
    generator = np.random.default_rng(12)
    forward, reverse = gaussian_works(generator, 2.0, 2.0, 50_000)
    result = crooks_gaussian(forward, reverse, n_bootstrap=100, rng=generator)
    assert result.method == "crooks-gaussian" and result.samples == 100_000
    assert abs(result.delta_f - 2.0) < 4.0 * result.stderr
    for name in ("mean_difference", "fluctuation_dissipation", "one_sided_forward", "one_sided_reverse"):
        assert abs(result.details[name] - 2.0) < 4.0 * result.details[name + "_stderr"]
    json.dumps(result.to_dict())
    with pytest.raises(ValueError, match="1 \\+inf"):
        crooks_gaussian(np.append(forward[:10], np.inf), reverse[:10])


def test_crooks_coverage():
    generator = np.random.default_rng(22)
    forward, reverse = gaussian_works(generator, 2.0, 2.0, (300, 100))
    results = [crooks_gaussian(f, r, n_bootstrap=200, rng=generator) for f, r in zip(forward, reverse)]
    check_calibrated("crooks", [r.delta_f for r in results], [r.stderr for r in results], 2.0)


# --------------------------------------------------------------------------------------------
# BAR
# --------------------------------------------------------------------------------------------

def test_bar_gaussian_work_and_bootstrap():
    # Bennett 1976, J. Comput. Phys. 22, 245; ML form of Shirts et al. 2003, Phys. Rev. Lett.
    # 91, 140601 [src for the papers; equation form [mem], verified in docs/references.md §7a].
    generator = np.random.default_rng(13)
    forward, reverse = gaussian_works(generator, 2.0, 2.0, 1000)
    result = bar(forward, reverse)
    assert result.method == "bar" and result.error_kind == "asymptotic"
    assert abs(result.delta_f - 2.0) < 4.0 * result.stderr
    assert 0.0 < result.details["overlap"] < 1.0
    # The bootstrap spread estimates the same standard error; with B = 200 resamples its own
    # relative error is ≈ 1/√(2B) = 5 %.
    boot = bar(forward, reverse, n_bootstrap=200, rng=generator)
    assert boot.delta_f == result.delta_f and boot.error_kind == "bootstrap"
    assert abs(boot.stderr / result.stderr - 1.0) < 4.0 / math.sqrt(2 * 200)
    json.dumps(boot.to_dict())


def bar_variance_by_quadrature(n_forward, n_reverse, mean_forward=4.0, mean_reverse=0.0, spread=2.0, delta=2.0):
    """Shirts et al. 2003 (Phys. Rev. Lett. 91, 140601) asymptotic BAR variance for Gaussian works, by
    scipy.integrate.quad over the pooled density of w_F and −w_R (docs/references.md §7a):
    Var = (1/N)[⟨1/(2 + 2cosh(M + w − Δf))⟩⁻¹ − N/n_F − N/n_R], M = ln(n_F/n_R), N = n_F + n_R."""
    from scipy.integrate import quad

    total = n_forward + n_reverse
    shift = math.log(n_forward / n_reverse)

    def integrand(w):
        pooled = (n_forward * norm.pdf(w, mean_forward, spread) + n_reverse * norm.pdf(w, -mean_reverse, spread)) / total
        return pooled / (2.0 + 2.0 * math.cosh(shift + w - delta))

    average, _ = quad(integrand, -40.0, 40.0, epsabs=1e-14, epsrel=1e-12, limit=200)
    return (1.0 / average - total / n_forward - total / n_reverse) / total


@pytest.mark.parametrize("n_forward, n_reverse, tabulated", [(200, 200, 0.012242), (400, 100, 0.012014)])
def test_bar_variance_against_quadrature(n_forward, n_reverse, tabulated):
    # The reference is computed here by quadrature (above); the tabulated value of docs/references.md
    # §7a is checked against it too.  Works placed at the normal quantiles (i − ½)/n turn the sample
    # averages in the formula into a midpoint-rule quadrature; the variance scales as 1/N.
    reference = bar_variance_by_quadrature(n_forward, n_reverse)
    assert reference == pytest.approx(tabulated, abs=5e-7)
    scale = 500
    big_f, big_r = n_forward * scale, n_reverse * scale
    forward = 4.0 + 2.0 * norm.ppf((np.arange(big_f) + 0.5) / big_f)
    reverse = 0.0 + 2.0 * norm.ppf((np.arange(big_r) + 0.5) / big_r)
    result = bar(forward, reverse)
    assert result.delta_f == pytest.approx(2.0, abs=1e-6)
    variance = result.stderr**2 * (big_f + big_r) / (n_forward + n_reverse)
    assert variance == pytest.approx(reference, rel=1e-4)   # midpoint rule with 10⁵ nodes: error ≪ 1e-4


def test_bar_overlap_extremes_and_infinite_works():
    # Identical end states: all works zero, overlap exactly 1, Δf = 0.
    assert work_overlap(np.zeros(50), np.zeros(50)) == pytest.approx(1.0, abs=1e-12)
    assert bar(np.zeros(50), np.zeros(50)).delta_f == pytest.approx(0.0, abs=1e-12)
    # No overlap at all, works 10⁴ apart: an estimate with a warning, no float warnings.
    far = bar(np.linspace(1e4, 1e4 + 1, 20), np.linspace(1e4, 1e4 + 1, 20))
    assert "no overlap" in far.details["warning"]
    assert far.details["overlap"] < 1e-300 and math.isfinite(far.delta_f)
    assert -1e4 - 1 <= far.delta_f <= 1e4 + 1
    # +inf works have zero Fermi weight but count in n_F.
    generator = np.random.default_rng(14)
    forward, reverse = gaussian_works(generator, 1.0, 1.0, 100)
    with_inf = bar(np.append(forward, np.inf), reverse)
    assert with_inf.details["infinite_works"] == 1 and with_inf.samples == 201
    assert math.isfinite(with_inf.delta_f)
    with pytest.raises(ValueError, match="NaN"):
        bar(np.append(forward, np.nan), reverse)


def test_bar_coverage():
    generator = np.random.default_rng(23)
    forward, reverse = gaussian_works(generator, 2.0, 2.0, (400, 200))
    results = [bar(f, r) for f, r in zip(forward, reverse)]
    estimates = np.array([r.delta_f for r in results])
    errors = np.array([r.stderr for r in results])
    check_calibrated("bar", estimates, errors, 2.0)
    print(f"bar replicate var {estimates.var(ddof=1):.5f}, mean asymptotic {np.mean(errors**2):.5f}")
    # Replicate variance vs the quadrature value (above); the sample variance of 400 replicates has
    # relative error √(2/399).
    assert abs(estimates.var(ddof=1) / bar_variance_by_quadrature(200, 200) - 1.0) < 4.0 * math.sqrt(2.0 / 399)


# --------------------------------------------------------------------------------------------
# MBAR
# --------------------------------------------------------------------------------------------

STIFFNESS = (1.0, 2.0, 4.0)
CENTRES = (0.0, 0.5, 1.0)
EXACT = np.array([0.0, 0.5 * LN2, LN2])   # f_k − f_0 = ½ ln(k_k/k_0), Tuckerman 2010, OUP; docs/references.md §3a


def test_mbar_harmonic_states():
    # Shirts & Chodera 2008, J. Chem. Phys. 129, 124105 [src for the paper]; three harmonic
    # states of docs/references.md §7b with exact Δf = (½ ln 2, ln 2).
    generator = np.random.default_rng(15)
    samples, energies = harmonic_samples(generator, STIFFNESS, CENTRES, 2000)
    result = mbar(energies, [2000] * 3)
    assert result.converged and result.endpoint.method == "mbar"
    errors = np.sqrt(np.diag(result.covariance))
    assert result.free_energies[0] == 0.0
    assert np.all(np.abs(result.free_energies[1:] - EXACT[1:]) < 4.0 * errors[1:])
    np.testing.assert_allclose(result.overlap.sum(axis=1), 1.0, atol=1e-12)
    assert result.endpoint.stderr == pytest.approx(result.difference_stderr[0, 2])
    json.dumps(result.endpoint.to_dict())
    # A constant added to one state's energies shifts its f by exactly that constant.
    shifted = energies.copy()
    shifted[2] += 1e4
    assert mbar(shifted, [2000] * 3).free_energies[2] == pytest.approx(result.free_energies[2] + 1e4, abs=1e-8)
    # An unsampled state (k = 3, c = 0.7) is evaluated from the pooled samples.
    extra = np.vstack([energies, 1.5 * (samples - 0.7) ** 2])
    with_unsampled = mbar(extra, [2000, 2000, 2000, 0])
    np.testing.assert_allclose(with_unsampled.free_energies[:3], result.free_energies, atol=1e-9)
    assert abs(with_unsampled.free_energies[3] - 0.5 * math.log(3.0)) < 4.0 * math.sqrt(with_unsampled.covariance[3, 3])


def test_mbar_covariance_matches_the_sample_space_form():
    # docs/references.md §7b [num]: Θ = Wᵀ(I_N − W diag(N_k) Wᵀ)⁺W equals the K×K SVD form.
    generator = np.random.default_rng(16)
    _, energies = harmonic_samples(generator, STIFFNESS, CENTRES, 60)
    counts = np.array([60, 60, 60])
    result = mbar(energies, counts)
    weights = mbar_weights(energies, counts, result.free_energies).T          # (N, K)
    inner = np.eye(weights.shape[0]) - (weights * counts) @ weights.T
    theta = weights.T @ np.linalg.pinv(inner, rcond=1e-10, hermitian=True) @ weights
    reference = theta - theta[0][None, :] - theta[:, 0][:, None] + theta[0, 0]
    np.testing.assert_allclose(result.covariance, reference, rtol=1e-8, atol=1e-14)


def test_mbar_two_states_equals_bar():
    # docs/references.md §7b [num]: MBAR with K = 2 reproduces BAR exactly, estimate and variance.
    generator = np.random.default_rng(17)
    _, energies = harmonic_samples(generator, STIFFNESS[:2], CENTRES[:2], 300)
    result = mbar(energies, [300, 300])
    pair = bar(energies[1, :300] - energies[0, :300], energies[0, 300:] - energies[1, 300:])
    assert result.free_energies[1] == pytest.approx(pair.delta_f, abs=1e-10)
    assert result.endpoint.stderr**2 == pytest.approx(pair.stderr**2, rel=1e-8)


def test_mbar_expectations():
    generator = np.random.default_rng(18)
    samples, energies = harmonic_samples(generator, STIFFNESS, CENTRES, 2000)
    averages, errors = mbar_expectations(energies, [2000] * 3, samples)
    assert np.all(np.abs(averages - np.array(CENTRES)) < 4.0 * errors)
    # One state: MBAR weights are 1/N, so ⟨A⟩ is the sample mean with error std/√N (ddof 0).
    values = generator.normal(size=50)
    single, single_error = mbar_expectations(np.zeros((1, 50)), [50], values)
    assert single[0] == pytest.approx(values.mean(), abs=1e-14)
    assert single_error[0] == pytest.approx(values.std() / math.sqrt(50), rel=1e-10)


def test_mbar_many_states_with_large_offsets():
    # Eight harmonic states, stiffness 1…64, centres 0…2, each shifted by a constant up to
    # ±10³ kT: exact f_k − f_0 = ½ ln(k_k/k_0) + (shift_k − shift_0) (docs/references.md §3a).
    generator = np.random.default_rng(26)
    stiffness = np.geomspace(1.0, 64.0, 8)
    centres = np.linspace(0.0, 2.0, 8)
    shifts = generator.uniform(-1e3, 1e3, 8)
    _, energies = harmonic_samples(generator, stiffness, centres, 300)
    result = mbar(energies + shifts[:, None], [300] * 8)
    exact = 0.5 * np.log(stiffness / stiffness[0]) + shifts - shifts[0]
    errors = np.sqrt(np.diag(result.covariance))
    assert result.converged and result.endpoint.details["overlap_groups"] == 1
    assert np.all(np.abs(result.free_energies[1:] - exact[1:]) < 4.0 * errors[1:])


def test_mbar_disconnected_states_report_infinite_error():
    # Two traps 100 apart with width 0.1: no sample has any weight in the other state, so the
    # difference is undetermined and must not come with a finite error.
    generator = np.random.default_rng(27)
    samples = np.concatenate([generator.normal(0.0, 0.1, 200), generator.normal(100.0, 0.1, 200)])
    energies = np.vstack([50.0 * samples**2, 50.0 * (samples - 100.0) ** 2])
    result = mbar(energies, [200, 200])
    assert result.endpoint.stderr == math.inf
    assert "no overlap" in result.endpoint.details["warning"]
    assert result.covariance[1, 1] == math.inf


def test_mbar_rejects_bad_input():
    with pytest.raises(ValueError, match="sums to"):
        mbar(np.zeros((2, 10)), [5, 4])
    with pytest.raises(ValueError, match="1 NaN"):
        mbar(np.array([[0.0, np.nan], [0.0, 1.0]]), [1, 1])


def test_mbar_coverage():
    # Shirts & Chodera 2008; docs/references.md §7b [num], N_k = 200: replicate var (0.001256, 0.003722),
    # asymptotic (0.001236, 0.003705).
    generator = np.random.default_rng(24)
    found, errors, mean_x, mean_x_errors = [], [], [], []
    for _ in range(300):
        samples, energies = harmonic_samples(generator, STIFFNESS, CENTRES, 200)
        result = mbar(energies, [200] * 3)
        found.append(result.free_energies)
        errors.append(np.sqrt(np.diag(result.covariance)))
        averages, average_errors = mbar_expectations(energies, [200] * 3, samples, result.free_energies)
        mean_x.append(averages[1])
        mean_x_errors.append(average_errors[1])
    found, errors = np.array(found), np.array(errors)
    for k in (1, 2):
        check_calibrated(f"mbar f_{k}", found[:, k], errors[:, k], EXACT[k])
    check_calibrated("mbar <x>_1", mean_x, mean_x_errors, CENTRES[1])
    # The mean asymptotic variance against the variance of the 300 replicate estimates themselves
    # (an independent measurement of the same quantity; the sample variance of 300 values has
    # relative error √(2/299) ≈ 8 %, so 4 of those bound the difference).
    for k in (1, 2):
        replicate = found[:, k].var(ddof=1)
        assert abs(np.mean(errors[:, k] ** 2) / replicate - 1.0) < 4.0 * math.sqrt(2.0 / 299)


# --------------------------------------------------------------------------------------------
# Thermodynamic integration
# --------------------------------------------------------------------------------------------

def harmonic_derivative(lambdas, dimensions, k_a, k_b):
    """⟨∂u/∂λ⟩ = (d/2)(k_B − k_A)/k(λ) on u(λ) = (1−λ)u_A + λu_B, equal centres.

    docs/references.md §3b.
    """
    return 0.5 * dimensions * (k_b - k_a) / ((1.0 - lambdas) * k_a + lambdas * k_b)


def test_ti_quadrature_on_the_harmonic_path():
    # docs/references.md §3a [num]: 3-D, k_A = 1 → k_B = 2: Δf = 1.5 ln 2 = 1.0397207708399179.
    exact = 1.5 * LN2
    nodes, weights = gauss_legendre_windows(8)
    assert weights.sum() == pytest.approx(1.0, abs=1e-15)
    result = thermodynamic_integration(nodes, harmonic_derivative(nodes, 3, 1.0, 2.0), np.full(8, 0.01),
                                       rule="gauss-legendre")
    assert result.delta_f == pytest.approx(exact, abs=1e-8)
    assert result.stderr == pytest.approx(0.01 * math.sqrt(np.sum(weights**2)), rel=1e-12)
    # Trapezoid on a non-uniform grid: the error bound of the trapezoid rule
    # Σ h_i³/12 · max|g''| (g'' = 2·1.5·1/k³ ≤ 3 here) must hold.
    grid = np.sort(np.concatenate([[0.0, 1.0], np.random.default_rng(19).uniform(0, 1, 19)]))
    trapezoid = thermodynamic_integration(grid, harmonic_derivative(grid, 3, 1.0, 2.0), np.full(21, 0.01))
    bound = np.sum(np.diff(grid) ** 3) / 12.0 * 3.0
    assert abs(trapezoid.delta_f - exact) <= bound
    assert trapezoid.stderr == pytest.approx(0.01 * math.sqrt(np.sum(trapezoid_weights(grid) ** 2)), rel=1e-12)
    assert abs(trapezoid.details["spline_minus_trapezoid"]) <= 2 * bound
    # Gauss–Legendre with n nodes integrates λ^(2n−1) exactly.
    nodes, weights = gauss_legendre_windows(5)
    assert weights @ nodes**9 == pytest.approx(0.1, abs=1e-15)
    with pytest.raises(ValueError, match="gauss_legendre_windows"):
        thermodynamic_integration(np.linspace(0, 1, 5), np.zeros(5), rule="gauss-legendre")
    with pytest.raises(ValueError, match="λ = 0 and λ = 1"):
        thermodynamic_integration(np.linspace(0.1, 1, 5), np.zeros(5))


def test_ti_coverage():
    # 1-D harmonic path k_A = 1 → k_B = 4, exact Δf = ½ ln 4 = ln 2 (docs/references.md §3a).  Each
    # window draws x ~ N(0, 1/k(λ)) exactly; ∂u/∂λ = ½(k_B − k_A)x².
    generator = np.random.default_rng(25)
    nodes, _ = gauss_legendre_windows(6)
    stiffness = 1.0 + 3.0 * nodes
    draws = generator.standard_normal((300, 6, 200)) / np.sqrt(stiffness)[None, :, None]
    derivative = 1.5 * draws**2
    means = derivative.mean(axis=2)
    errors = derivative.std(axis=2, ddof=1) / math.sqrt(200)
    results = [thermodynamic_integration(nodes, m, e, rule="gauss-legendre") for m, e in zip(means, errors)]
    check_calibrated("ti", [r.delta_f for r in results], [r.stderr for r in results], LN2)


# --------------------------------------------------------------------------------------------
# BAR along neighbouring windows
# --------------------------------------------------------------------------------------------

def test_neighbour_bar_ladder():
    # Five harmonic windows k = 1..16 (geometric), exact f_4 − f_0 = ½ ln 16 (docs/references.md §3a).
    generator = np.random.default_rng(20)
    stiffness = np.geomspace(1.0, 16.0, 5)
    centres = np.zeros(5)
    _, energies = harmonic_samples(generator, stiffness, centres, 1000)
    result = neighbour_bar(energies, [1000] * 5)
    assert result.method == "bar-ladder" and len(result.details["step_delta_f"]) == 4
    assert abs(result.delta_f - 0.5 * math.log(16.0)) < 4.0 * result.stderr
    step = bar(energies[1, :1000] - energies[0, :1000], energies[0, 1000:2000] - energies[1, 1000:2000])
    assert result.details["step_delta_f"][0] == step.delta_f
    assert result.stderr == pytest.approx(math.sqrt(sum(e**2 for e in result.details["step_stderr"])))
    multistate = mbar(energies, [1000] * 5)
    assert abs(result.delta_f - multistate.endpoint.delta_f) < 4.0 * math.hypot(result.stderr, multistate.endpoint.stderr)
    json.dumps(result.to_dict())
    assert isinstance(result, Estimate)


# --------------------------------------------------------------------------------------------
# Chain-grouped jackknife error (works started from correlated samples)
# --------------------------------------------------------------------------------------------


def _chain_correlated_works(generator, delta_f, spread, chains, per_chain, share):
    """Gaussian works (Crooks-consistent marginals) whose trajectories from one chain share a part.

    Work i of chain c is Δf ± σ²/2 + σ(√share·z_c + √(1 − share)·e_i), interleaved i ↦ chain i mod chains
    as the sampler orders its samples; the marginal stays N(Δf ± σ²/2, σ²), so BAR stays consistent.
    """
    def side(mean):
        z = generator.standard_normal(chains)
        e = generator.standard_normal((per_chain, chains))
        w = mean + spread * (math.sqrt(share) * z[None, :] + math.sqrt(1.0 - share) * e)
        return w.reshape(-1)  # row t holds sample t of every chain: index t·chains + c
    return side(delta_f + spread**2 / 2), side(-delta_f + spread**2 / 2)


@pytest.mark.parametrize("share", [pytest.param(0.0, marks=pytest.mark.slow), 0.15])
def test_chain_grouped_jackknife_error_covers_correlated_works(share):
    """Coverage against the brute-force spread of 300 independent replicates (the reference).

    Independent works (share 0): the grouped error must agree with the asymptotic one (mean ratio
    within 10 %, its noise at 16 groups is ≈ 18 % per replicate). Works sharing 15 % of their variance
    within a chain of 8 (design effect 1 + 7·0.15 ≈ 2): the asymptotic error under-covers and the
    grouped one must restore ±1.96σ coverage (at least the 4σ binomial floor, 0.90 at 300
    replicates) without being needlessly wide (median reported error / observed rms error ≤ 1.25,
    tests/calibration.py).
    """
    from fe_tool.estimators import solve_bar
    from fe_tool.estimators.grouped import with_grouped_error

    generator = np.random.default_rng(41 + int(share * 100))
    chains, per_chain, truth = 16, 8, 1.5
    rows = []
    for _ in range(300):
        wf, wr = _chain_correlated_works(generator, truth, 1.5, chains, per_chain, share)
        plain = bar(wf, wr)
        grouped = with_grouped_error(plain, solve_bar, wf, wr, chains, chains)
        rows.append((plain.delta_f, plain.stderr, grouped.details["stderr_chain_jackknife"], grouped.stderr))
    est, asym, jack, reported = np.array(rows).T
    covered = lambda err: float(np.mean(np.abs(est - truth) <= 1.96 * err))  # noqa: E731
    print(f"share {share}: coverage asymptotic {covered(asym):.3f}, jackknife {covered(jack):.3f}, reported "
          f"{covered(reported):.3f}; mean jackknife/asymptotic {np.mean(jack / asym):.3f}")
    assert np.all(reported >= asym) and np.all(reported >= jack)
    if share == 0.0:
        assert abs(np.mean(jack / asym) - 1.0) < 0.10
        check_calibrated("grouped, independent works", est, reported, truth)
    else:
        # the failure the grouping exists for: the asymptotic error is short by √2.05, so it covers
        # ±1.96/1.43 = ±1.37σ, i.e. 0.83 expected (0.88 is 3.5 binomial sd above that)
        assert covered(asym) < 0.88
        check_calibrated("jackknife, correlated works", est, jack, truth)
        check_calibrated("grouped, correlated works", est, reported, truth)
