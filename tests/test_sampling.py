"""End-state sampler: correct equilibrium moments and honest time-series analysis."""
import jax
import jax.numpy as jnp
import numpy as np
import pytest

from fe_tool.path import LinearPath
from fe_tool.sampling import autocorrelation_time, end_target, sample_state, split_mixing_statistic


def test_autocorrelation_time_of_ar1_process():
    """AR(1) x_t = ρ x_{t−1} + e_t has τ_int = (1 + ρ)/(1 − ρ) (common practice; e.g. Sokal 1997 [mem])."""
    rng = np.random.default_rng(0)
    rho, n, chains = 0.8, 20_000, 8
    x = np.zeros((n, chains))
    noise = rng.standard_normal((n, chains))
    for t in range(1, n):
        x[t] = rho * x[t - 1] + noise[t]
    tau = autocorrelation_time(x)
    assert abs(tau - 9.0) < 0.8  # statistical error of τ with this window is ~ τ·sqrt(2(2M+1)/N) ≈ 0.4


def test_mixing_statistic_detects_disagreeing_chains():
    rng = np.random.default_rng(1)
    agree = rng.standard_normal((1000, 8))
    disagree = agree + np.arange(8)[None, :]
    assert split_mixing_statistic(agree) < 1.02
    assert split_mixing_statistic(disagree) > 1.5


def test_anisotropic_gaussian_moments_and_diagnostics():
    """Samples of u = ½ Σ k_i (x_i − c_i)² have mean c and variance 1/k (exact Gaussian)."""
    k = jnp.asarray([0.5, 2.0, 10.0, 40.0])
    c = jnp.asarray([1.0, -1.0, 0.5, 0.0])
    path = LinearPath(lambda x: 0.5 * jnp.sum(k * (x - c) ** 2), lambda x: jnp.sum(x**2), 1.0)
    s = sample_state(jax.random.key(0), end_target(path, "a"), jnp.zeros(4), samples=2000, chains=32,
                     evaluation_budget=400_000)
    assert s.equilibrated and s.stuck_chains == 0
    assert 0.4 < s.acceptance < 0.75
    x = s.samples
    n_eff = s.effective_sample_size
    err_mean = np.sqrt(1.0 / np.asarray(k) / n_eff)
    assert np.all(np.abs(x.mean(0) - np.asarray(c)) < 4 * err_mean)
    var_ratio = x.var(0) * np.asarray(k)
    assert np.all(np.abs(var_ratio - 1.0) < 4 * np.sqrt(2.0 / n_eff))
    assert s.evaluations <= 400_000 * 1.25
    # the preconditioner learned the anisotropy (inverse stiffness ratios within a factor 2)
    ratio = s.preconditioner * np.asarray(k)
    assert ratio.max() / ratio.min() < 2.0


def _two_well_path(tilt):
    """A "particle" in 2-D (shape (1, 2): no coordinate tracing) in a symmetric double well.

    u_A = h (q² − 1)² + 25 y² with h = 15 kT, so no chain crosses the barrier in the budget;
    the energy has the same distribution in both wells, so it cannot see which well a chain
    is in. u_B = u_A + tilt·q, so ∂u/∂λ = u_B − u_A = tilt·q depends only on the slow coordinate.
    """
    def energy_a(x):
        q, y = x[0, 0], x[0, 1]
        return 15.0 * (q**2 - 1.0) ** 2 + 25.0 * y**2

    return LinearPath(energy_a, lambda x: energy_a(x) + tilt * x[0, 0], 1.0)


def test_lambda_derivative_catches_a_slow_mode_the_energy_misses():
    """Chains started in both wells (round-robin) never cross: watching the energy alone passes,
    watching ∂u/∂λ as well reports the chains' disagreement. Deterministic: a 15 kT barrier."""
    starts = jnp.asarray([[[1.0, 0.0]], [[-1.0, 0.0]]])
    settings = dict(samples=256, chains=16, evaluation_budget=150_000, starts=starts)
    # B = A: ∂u/∂λ is exactly 0, the sampler drops it after one block and judges the energy alone
    blind = sample_state(jax.random.key(3), end_target(_two_well_path(0.0), "a"), starts[0], **settings)
    assert blind.equilibrated
    assert set(blind.autocorrelation_times) == {"energy"} and blind.autocorrelation_time < 20.0
    assert blind.mixing_statistic < 1.1
    q = blind.samples[:, 0, 0]
    assert np.all(np.abs(np.abs(q) - 1.0) < 0.5)  # no chain left its well
    # ∂u/∂λ = q: the chains from the two wells disagree completely
    seeing = sample_state(jax.random.key(3), end_target(_two_well_path(1.0), "a"), starts[0], **settings)
    assert not seeing.equilibrated
    assert seeing.mixing_statistic > 2.0
    assert seeing.autocorrelation_times["du_dlambda"] > 10 * blind.autocorrelation_time
    assert any("did not pass the equilibration checks" in w for w in seeing.warnings)
    # the derivative costs one other-end evaluation per chain every DERIVATIVE_EVERY steps of burn-in, counted
    assert 0 < seeing.derivative_evaluations < 0.15 * seeing.evaluations


def test_start_set_is_spread_round_robin_and_checked():
    path = _two_well_path(1.0)
    starts = jnp.asarray([[[1.0, 0.0]], [[-1.0, 0.0]], [[1.0, 0.5]]])
    s = sample_state(jax.random.key(0), end_target(path, "a"), starts[0], samples=48, chains=6,
                     evaluation_budget=20_000, starts=starts)
    # chains 0, 2, 3, 5 start at q = +1 and chains 1, 4 at q = −1; samples interleave the chains
    q = s.samples[:6, 0, 0]
    np.testing.assert_array_equal(np.sign(q), [1, -1, 1, 1, -1, 1])
    with pytest.raises(ValueError, match="starts must stack configurations of shape"):
        sample_state(jax.random.key(0), end_target(path, "a"), starts[0], samples=8, chains=4,
                     evaluation_budget=20_000, starts=starts[:, 0])


def test_estimate_refuses_a_malformed_start_set_before_sampling():
    import fe_tool

    energy = lambda x: 0.5 * jnp.sum(x**2)  # noqa: E731
    with pytest.raises(ValueError, match=r"starts_a must stack k ≥ 1 configurations"):
        fe_tool.estimate(energy, energy, np.zeros(3), np.zeros(3), starts_a=np.zeros((2, 4)))
    with pytest.raises(ValueError, match=r"starts_b\[1\]: .*not finite"):
        fe_tool.estimate(energy, lambda x: jnp.log(x[0]), np.ones(3), np.ones(3), starts_b=[np.ones(3), -np.ones(3)])
