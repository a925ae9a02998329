"""The windows route (λ ladder, MBAR / BAR / TI) and the route comparison, against analytic answers."""
import math

import jax.numpy as jnp
import numpy as np
import pytest

from fe_tool.routes.comparison import compare_routes
from fe_tool.routes.windows import estimate_windows, window_ladder


def harmonic_pair(dim, k_a, k_b, centre_b):
    centre = jnp.asarray(centre_b, dtype=jnp.float64)
    return (lambda x: 0.5 * k_a * jnp.sum(x**2)), (lambda x: 0.5 * k_b * jnp.sum((x - centre) ** 2)), \
        jnp.zeros(dim), centre


def test_ladder_gauss_legendre_includes_end_states():
    # GL nodes exclude 0 and 1; both ends are added for MBAR (Abramowitz & Stegun 1964, 25.4.29 for the nodes)
    lams, weights = window_ladder(3, "gauss-legendre")
    assert lams[0] == 0.0 and lams[-1] == 1.0 and lams.size == 5
    np.testing.assert_allclose(lams[1:-1], 0.5 + 0.5 * np.array([-math.sqrt(0.6), 0.0, math.sqrt(0.6)]), atol=1e-12)
    np.testing.assert_allclose(weights, [5 / 18, 4 / 9, 5 / 18], atol=1e-12)
    lams, weights = window_ladder(5, "uniform")
    np.testing.assert_allclose(lams, np.linspace(0, 1, 5))
    assert weights is None
    with pytest.raises(ValueError, match="from 0 to 1"):
        window_ladder([0.1, 0.5, 1.0])


@pytest.mark.parametrize("dim, k_b, centre_b", [(1, 4.0, [1.5]), (3, 10.0, [0.5, -0.3, 0.2])])
def test_windows_harmonic_closed_form(dim, k_b, centre_b):
    # ΔF = (kT/2) Σ ln(k_B/k_A), centres cancel (Tuckerman 2010, OUP; docs/references.md §3a)
    ea, eb, xa, xb = harmonic_pair(dim, 1.0, k_b, centre_b)
    exact = 0.5 * dim * math.log(k_b)
    r = estimate_windows(ea, eb, xa, xb, kT=1.0, seed=3, budget=100_000, windows=4)
    assert r.energy_evaluations <= 1.05 * 100_000
    assert r.estimator == "mbar"
    assert abs(r.delta_f - exact) < max(0.1, 4 * r.stderr), r.summary()
    assert abs(r.estimates["bar_ladder"].delta_f - exact) < max(0.1, 4 * r.estimates["bar_ladder"].stderr)
    assert r.energy_evaluations == sum(r.cost.values())
    # analysis: every sample at every window costs 2 evaluations on the linear path
    assert r.cost["analysis"] == 2 * sum(w["samples"] for w in r.diagnostics["windows"])
    assert "ti_gauss_legendre" in r.estimates and "ΔF" in r.summary()


def test_ti_derivative_matches_harmonic_formula():
    # ⟨∂u/∂λ⟩_λ = (d/2)(k_B − k_A)/k(λ) for equal centres (docs/references.md §3b)
    dim, k_a, k_b = 2, 1.0, 4.0
    ea, eb, xa, xb = harmonic_pair(dim, k_a, k_b, [0.0, 0.0])
    r = estimate_windows(ea, eb, xa, xb, seed=5, budget=150_000, windows=4, spacing="gauss-legendre")
    lams = r.extras["lambdas"]
    expected = 0.5 * dim * (k_b - k_a) / ((1 - lams) * k_a + lams * k_b)
    means, errors = r.extras["mean_derivative"], r.extras["stderr_derivative"]
    assert np.all(np.abs(means - expected) < np.maximum(0.1, 5 * errors)), (means, expected, errors)
    exact = 0.5 * dim * math.log(k_b / k_a)
    gl = r.estimates["ti_gauss_legendre"]
    assert abs(gl.delta_f - exact) < max(0.1, 4 * gl.stderr)


def test_overlap_warning_for_sparse_ladder():
    # two windows across a 400-fold stiffening in 3-D barely overlap (MBAR overlap matrix, Shirts & Chodera 2008)
    ea, eb, xa, xb = harmonic_pair(3, 1.0, 400.0, [0.0, 0.0, 0.0])
    r = estimate_windows(ea, eb, xa, xb, seed=1, budget=60_000, windows=2, spacing="uniform")
    assert r.diagnostics["smallest_neighbour_overlap"] < 0.03
    assert any("barely overlap" in w and "Insert windows" in w for w in r.warnings)
    assert r.flagged and r.extras["suggested_windows"]


def test_exchange_reports_acceptance():
    # Hamiltonian replica exchange keeps each window's distribution (Sugita, Kitao & Okamoto 2000); closed form as above
    ea, eb, xa, xb = harmonic_pair(1, 1.0, 4.0, [1.5])
    r = estimate_windows(ea, eb, xa, xb, seed=2, budget=60_000, windows=3, spacing="uniform", exchange=True)
    acceptance = r.extras["exchange_acceptance"]
    assert acceptance.shape == (2,) and np.all((acceptance > 0) & (acceptance <= 1))
    assert r.cost["exchange"] > 0 and r.energy_evaluations <= 1.05 * 60_000
    assert abs(r.delta_f - math.log(2.0)) < max(0.1, 4 * r.stderr), r.summary()


@pytest.mark.slow   # compare_routes also runs in benchmarks/bench_routes.py and the windows notebook
def test_compare_routes_small():
    ea, eb, xa, xb = harmonic_pair(1, 1.0, 4.0, [1.5])
    rows, text = compare_routes(ea, eb, xa, xb, exact=math.log(2.0), budget=80_000, seeds=(0, 1),
                                options={"switching": {"chains": 16}})
    assert [r["route"] for r in rows] == ["switching", "windows-mbar", "windows-ti"]
    for r in rows:
        assert r["failed"] == 0, r["failures"]
        for key in ("mean", "bias", "rmse", "mean_error", "coverage", "cost", "efficiency", "relative_efficiency"):
            assert math.isfinite(r[key]), (r["route"], key, r[key])
    assert "RMSE" in text
