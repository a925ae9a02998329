"""End-state sampler: correct equilibrium moments and honest time-series analysis."""
import jax
import jax.numpy as jnp
import numpy as np

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
