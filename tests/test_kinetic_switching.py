"""Kinetic (BAOAB) switching and its exact work, against independent references.

References, each named beside its check:
* harmonic wells: ΔF = ½ Σ ln(k_B/k_A) (Tuckerman 2010, "Statistical Mechanics: Theory and Molecular
  Simulation", OUP, from memory; /work/shared/REFERENCE_DATA.md §2, checked there by quadrature);
* Jarzynski 1997, Phys. Rev. Lett. 78, 2690 and Crooks 1998, J. Stat. Phys. 90, 1481 (identities);
* dragged trap: the exact mean work of the discrete process, from the Gaussian mean and covariance
  of (x, p) propagated through every substep in numpy here (an independent solve);
* hard wall: Z_B/Z_A = Φ(wall) for a unit Gaussian cut at the wall (scipy's normal cdf).
Statistical checks: |estimate − reference| < 4σ, σ the delta-method error of the sample in hand.
"""
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.special import logsumexp
from scipy.stats import norm

from fe_tool.alchemy import SoftCoreDecouplingPath
from fe_tool.energy import assemble, lennard_jones_parameters, nonbonded_term
from fe_tool.kinetic_switching import kinetic_switching_evaluations, run_kinetic_in_batches, switch_kinetic
from fe_tool.path import LinearPath, Path
from test_switching import DraggedTrap  # the same dragged trap as the overdamped checks

K_A, C_A = np.array([1.0, 1.0]), np.array([0.0, 0.0])
K_B, C_B = np.array([4.0, 2.0]), np.array([0.8, -0.5])
DELTA_F = 0.5 * float(np.sum(np.log(K_B / K_A)))  # ½ ln 8 = 1.0397 (Tuckerman 2010, from memory)
STEP, DAMPING, LEVELS = 0.7, 0.5, 5  # coarse: ω_max h = 2 × 0.7 = 1.4 (BAOAB is stable below 2)
TRAJECTORIES = 200_000


def _pair():
    return LinearPath(lambda x: 0.5 * jnp.sum(K_A * (x - C_A) ** 2), lambda x: 0.5 * jnp.sum(K_B * (x - C_B) ** 2))


def _exp_average(works):
    """−ln mean e^{−w} and its delta-method error."""
    works = np.asarray(works, dtype=np.float64)
    n = works.size
    weights = np.exp(-(works - works.min()))
    return -(logsumexp(-works) - np.log(n)), np.std(weights) / np.mean(weights) / np.sqrt(n)


def _gaussian_starts(seed, stiffness, centre, n=TRAJECTORIES):
    rng = np.random.default_rng(seed)
    return jnp.asarray(centre + rng.normal(size=(n, centre.size)) / np.sqrt(stiffness))


_PAIR = _pair()
_run = jax.jit(lambda key, starts, sign: switch_kinetic(
    _PAIR, None, key, starts, jnp.linspace(0.0, 1.0, LEVELS), STEP, 1.0, DAMPING, sign, record_shadow=True))


@pytest.fixture(scope="module")
def pair_works():
    """Forward and reverse works (with shadow and protocol parts) of the harmonic pair at the coarse step."""
    out = {}
    for name, (sign, k, c, seed) in {"forward": (1.0, K_A, C_A, 1), "reverse": (-1.0, K_B, C_B, 2)}.items():
        works, increments, _, overflow, shadow = _run(jax.random.key(10 + seed), _gaussian_starts(seed, k, c), sign)
        assert not bool(overflow)
        out[name] = (np.asarray(works), np.asarray(increments), np.asarray(shadow))
    return out


def test_jarzynski_is_exact_at_a_coarse_step_in_both_directions(pair_works):
    for name, sign in (("forward", 1.0), ("reverse", -1.0)):
        works, increments, shadow = pair_works[name]
        assert np.all(np.isfinite(works))
        # increments (protocol + shadow per transition) add up to the work
        np.testing.assert_allclose(increments.sum(axis=1), works, atol=1e-10)
        assert np.mean(shadow.sum(axis=1)) > 0.05  # the step is coarse: measured ≈ 0.13 (F) and 0.22 (R) kT
        estimate, error = _exp_average(works)
        # measured (seeds here): F 1.0415 ± 0.0031 (+0.6σ), R −1.046 ± 0.013 (−0.5σ)
        assert abs(estimate - sign * DELTA_F) < 4 * error, (name, estimate, error)


def test_the_check_fails_without_the_shadow_work(pair_works):
    """Protocol work alone (shadow work dropped) is biased at this step: the check above can fail."""
    _, increments, shadow = pair_works["forward"]
    estimate, error = _exp_average((increments - shadow).sum(axis=1))
    # measured: +19σ forward (reverse: −8.7σ with these seeds, but only −2.5σ with others: its error
    # has heavy tails, so only the forward direction is asserted)
    assert abs(estimate - DELTA_F) > 4 * error, (estimate, error)


def test_crooks_ratio_has_unit_slope_and_offset_minus_delta_f(pair_works):
    """ln[P_F(w)/P_R(−w)] = w − ΔF (Crooks 1998), on a histogram.

    Each bin's abscissa is ln⟨e^{w}⟩ over the reverse samples in it: the bin-integrated ratio is
    exactly e^{−ΔF}⟨e^{w}⟩_bin, so the fit has no binning bias. Per-bin error √(1/n_F + 1/n_R).
    """
    forward, reverse = pair_works["forward"][0], -pair_works["reverse"][0]
    edges = np.linspace(np.percentile(reverse, 5), np.percentile(forward, 95), 13)
    n_f, _ = np.histogram(forward, edges)
    n_r, _ = np.histogram(reverse, edges)
    ok = (n_f > 100) & (n_r > 100)
    assert ok.sum() >= 5
    which = np.digitize(reverse, edges) - 1
    abscissa = np.array([logsumexp(reverse[which == b]) - np.log(np.sum(which == b)) for b in np.flatnonzero(ok)])
    ratio = np.log(n_f[ok] / forward.size) - np.log(n_r[ok] / reverse.size)
    sigma = np.sqrt(1.0 / n_f[ok] + 1.0 / n_r[ok])
    design = np.stack([abscissa, np.ones_like(abscissa)], axis=1) / sigma[:, None]
    (slope, offset), *_ = np.linalg.lstsq(design, ratio / sigma, rcond=None)
    errors = np.sqrt(np.diag(np.linalg.inv(design.T @ design)))
    assert abs(slope - 1.0) < 4 * errors[0], (slope, errors[0])
    assert abs(offset + DELTA_F) < 4 * errors[1], (offset, errors[1])


def _exact_mean_work(k, distance, inverse_mass, h, damping, levels):
    """E[w] of forward BAOAB switching of the dragged trap from the moments of (x, p), substep by substep.

    Every substep is affine in (x, p) plus Gaussian noise, so mean m and covariance S propagate exactly;
    E[w] = E[H_end] − E[H_start] − Σ E[Q] with E[½ a y²] = ½ a (S_yy + m_y²).
    """
    a = np.exp(-damping)
    mean, cov = np.zeros(2), np.diag([1.0 / k, 1.0 / inverse_mass])
    kinetic = lambda m, s: 0.5 * inverse_mass * (s[1, 1] + m[1] ** 2)  # noqa: E731
    potential = lambda m, s, c: 0.5 * k * (s[0, 0] + (m[0] - c) ** 2)  # noqa: E731
    h_start, heat = potential(mean, cov, 0.0) + kinetic(mean, cov), 0.0

    def affine(m, s, matrix, shift, noise=0.0):
        return matrix @ m + shift, matrix @ s @ matrix.T + np.diag([0.0, noise])

    kick = lambda c, size: (np.array([[1.0, 0.0], [-size * k, 1.0]]), np.array([0.0, size * k * c]))  # noqa: E731
    drift = (np.array([[1.0, 0.5 * h * inverse_mass], [0.0, 1.0]]), np.zeros(2))
    # the module's forward scheme: at point i the level moves on to l_{i+1} (l_K at the end) and the
    # kick there acts at that level, half a step at the first and last points, a whole one between
    count = len(levels) - 1
    kick_level = [levels[min(i + 1, count)] for i in range(count + 1)]
    sizes = [0.5 * h] + [h] * (count - 1) + [0.5 * h]
    mean, cov = affine(mean, cov, *kick(kick_level[0] * distance, sizes[0]))
    for i in range(1, count + 1):
        mean, cov = affine(mean, cov, *drift)
        before = kinetic(mean, cov)
        mean, cov = affine(mean, cov, np.diag([1.0, a]), np.zeros(2), (1.0 - a * a) / inverse_mass)
        heat += kinetic(mean, cov) - before
        mean, cov = affine(mean, cov, *drift)
        mean, cov = affine(mean, cov, *kick(kick_level[i] * distance, sizes[i]))
    return potential(mean, cov, levels[-1] * distance) + kinetic(mean, cov) - h_start - heat


def test_dragged_trap_mean_work_equals_the_exact_moment_propagation():
    k, distance, inverse_mass, h, damping = 2.0, 1.5, 0.5, 0.6, 0.3
    levels = np.linspace(0.0, 1.0, 6)
    exact = _exact_mean_work(k, distance, inverse_mass, h, damping, levels)
    rng = np.random.default_rng(5)
    starts = jnp.asarray(rng.normal(size=(100_000, 1)) / np.sqrt(k))
    path = DraggedTrap(k, distance)
    works, *_ = jax.jit(lambda key, x: switch_kinetic(path, None, key, x, jnp.asarray(levels), h,
                                                      jnp.full(1, inverse_mass), damping))(jax.random.key(6), starts)
    works = np.asarray(works)
    error = np.std(works) / np.sqrt(works.size)
    # measured: exact 1.2270 kT, sample 1.2287 ± 0.0050 (+0.3σ); ⟨e^{−w}⟩ = 1.0006 ± 0.011
    assert abs(np.mean(works) - exact) < 4 * error, (np.mean(works), exact, error)
    weights = np.exp(-works)
    assert abs(np.mean(weights) - 1.0) < 4 * np.std(weights) / np.sqrt(works.size)  # Jarzynski, ΔF = 0


def test_an_extra_force_keeps_jarzynski_exact_in_both_directions(pair_works):
    force = lambda x, lam: 0.7 * jnp.sin(x) * lam  # noqa: E731  an arbitrary extra force
    run = jax.jit(lambda key, x, sign: switch_kinetic(_PAIR, force, key, x, jnp.linspace(0.0, 1.0, LEVELS), STEP,
                                                      1.0, DAMPING, sign)[0])
    n = 100_000
    for name, sign, k, c, seed in (("forward", 1.0, K_A, C_A, 21), ("reverse", -1.0, K_B, C_B, 22)):
        works = np.asarray(run(jax.random.key(seed), _gaussian_starts(seed, k, c, n), sign))
        plain = pair_works[name][0]
        # the force does change the work distribution (mean differs from the plain run's by > 4 errors)
        assert abs(np.mean(works) - np.mean(plain)) > 4 * np.hypot(np.std(works) / np.sqrt(n),
                                                                   np.std(plain) / np.sqrt(plain.size))
        estimate, error = _exp_average(works)
        assert abs(estimate - sign * DELTA_F) < 4 * error, (sign, estimate, error)


def _walled_path(wall_energy):
    return LinearPath(lambda x: 0.5 * jnp.sum(x**2), lambda x: 0.5 * jnp.sum(x**2) + wall_energy(x))


def test_a_hard_wall_gives_infinite_works_never_nan_and_stays_exact():
    """u_B = u_A + (+∞ beyond x = 0.5): Z_B/Z_A = Φ(0.5), so ΔF = −ln Φ(0.5) (normal cdf, scipy)."""
    path = _walled_path(lambda x: jnp.sum(jnp.where(x > 0.5, jnp.inf, 0.0)))
    delta_f = -np.log(norm.cdf(0.5))
    run = jax.jit(lambda key, x, sign: switch_kinetic(path, None, key, x, jnp.linspace(0.0, 1.0, 5), 0.8, 1.0, 0.5,
                                                      sign)[0])
    rng = np.random.default_rng(7)
    forward = np.asarray(run(jax.random.key(7), jnp.asarray(rng.normal(size=(100_000, 1))), 1.0))
    cut = rng.normal(size=300_000)
    reverse = np.asarray(run(jax.random.key(8), jnp.asarray(cut[cut < 0.5][:100_000, None]), -1.0))
    assert not np.any(np.isnan(forward)) and not np.any(np.isnan(reverse))
    finite = np.isfinite(forward)
    assert 0.1 < 1.0 - np.mean(finite)  # trajectories ending beyond the wall weigh nothing (measured ≈ 0.3)
    estimate, error = _exp_average(forward)
    assert abs(estimate - delta_f) < 4 * error, (estimate, delta_f, error)
    # from the walled side, e^{−w_R} averages to e^{Δf} P_F(w_F < ∞), not e^{Δf}: the reverse paths
    # reach only the forward paths that end inside (Crooks 1998 integrated over the finite-work paths)
    share = np.mean(finite)
    estimate, error = _exp_average(reverse)
    error = np.hypot(error, np.sqrt(share * (1.0 - share) / finite.size) / share)  # binomial error of ln share
    assert abs(estimate - (-delta_f - np.log(share))) < 4 * error, (estimate, -delta_f - np.log(share), error)


def test_an_undefined_force_in_a_forbidden_region_stops_with_infinite_work_and_nan_energy_gives_nan():
    # beyond x = 0.5 a singular wall: u = +∞ and its gradient is 0·∞ = NaN (cannot be integrated);
    # below x = −1 the energy is NaN (an error in the energy function)
    path = _walled_path(lambda x: 0.01 * jnp.sum(jnp.maximum(0.5 - x, 0.0) ** -2)
                        + jnp.sum(jnp.where(x < -1.0, jnp.nan, 0.0)))
    starts = jnp.asarray(np.random.default_rng(9).normal(size=(20_000, 1)) * 0.3)
    works, increments, finals, _ = jax.jit(lambda x: switch_kinetic(
        path, None, jax.random.key(9), x, jnp.linspace(0, 1, 5), 0.8, 1.0, 0.5))(starts)
    works, increments = np.asarray(works), np.asarray(increments)
    stopped, undefined = works == np.inf, np.isnan(works)
    assert stopped.any() and undefined.any() and np.isfinite(works).any()
    assert np.all(np.isfinite(np.asarray(finals)))  # stopped trajectories stay where they were, not NaN
    assert np.all(increments.sum(axis=1)[stopped] == np.inf)


def _lj_box(n_side=3, edge=4.2, seed=11):
    n = n_side**3
    grid = np.stack(np.meshgrid(*[np.arange(n_side)] * 3, indexing="ij"), -1).reshape(-1, 3)
    rng = np.random.default_rng(seed)
    x = (grid + 0.5) * edge / n_side + 0.05 * rng.normal(size=(n, 3))
    term = nonbonded_term(n, lennard_jones=lennard_jones_parameters(np.ones(n), np.ones(n)), cutoff=1.8,
                          alchemical=[0], units="reduced", tail_correction_box=edge)
    return assemble([term], box=edge, units="reduced"), x, rng


def test_carried_neighbour_lists_give_the_all_pairs_works_and_an_overflow_is_grown():
    """27 LJ particles: works with a carried list equal the all-pairs works (the same key) to 1e-8.

    The list starts too small: the overflow is caught, the list grown and the batch rerun with its key.
    """
    model, x, rng = _lj_box()
    listed = SoftCoreDecouplingPath(model, pair_search="neighbour_list", reference_positions=x)
    builder = listed.dynamics_neighbour_builder()
    assert builder is not None and builder.skin > 0
    starts = jnp.asarray(x[None] + 0.03 * rng.normal(size=(6,) + x.shape))
    lams, h, steps = jnp.linspace(0.0, 1.0, 31), 0.02, 30
    reference = run_kinetic_in_batches(SoftCoreDecouplingPath(model), None, jax.random.key(12), starts, lams, h, 1.0,
                                       0.1, "forward", batch=3)
    carried = run_kinetic_in_batches(listed, None, jax.random.key(12), starts, lams, h, 1.0, 0.1, "forward", batch=3,
                                     builder=builder.with_capacity(40))
    assert np.all(np.isfinite(reference.works))
    assert carried.lists_grown == 1 and carried.builder.capacity > 40  # grown once, in the first batch
    np.testing.assert_allclose(carried.works, reference.works, rtol=0, atol=1e-8)
    np.testing.assert_allclose(carried.increments, reference.increments, rtol=0, atol=1e-8)
    # the particles moved past half the skin, so the lists were rebuilt on the way
    assert np.max(np.abs(carried.finals - np.asarray(starts))) > 0.5 * builder.skin
    # two batches of 3, plus the first batch's overflowed run
    assert carried.evaluations == 3 * kinetic_switching_evaluations(listed, 3, steps)
    assert reference.evaluations == 2 * kinetic_switching_evaluations(listed, 3, steps)


class CountingPath(Path):
    """u = ½(1 + λ)|x|², reporting every energy evaluation to a host counter."""

    def __init__(self):
        self.kT = 1.0

    def energy(self, x, lam):
        jax.debug.callback(_count, x, lam)  # x is batched over trajectories, lam over levels: one call each
        return 0.5 * (1.0 + lam) * jnp.sum(x**2)


_CALLS = []


def _count(x, lam):
    _CALLS.append(1)


def test_reported_evaluations_count_what_is_spent():
    path = CountingPath()
    spent = []
    _CALLS.clear()
    starts = np.random.default_rng(4).normal(size=(10, 2))
    run = run_kinetic_in_batches(path, None, jax.random.key(4), starts, np.linspace(0, 1, 4), 0.3, 1.0, 0.5, "reverse",
                                 batch=4, on_spent=spent.append)
    jax.effects_barrier()
    # 10 trajectories in 3 equal batches of 4 (2 padding); 4 points × 2 levels each
    assert run.evaluations == kinetic_switching_evaluations(path, 12, 3) == 12 * 4 * 2 == len(_CALLS)
    assert sum(spent) == run.evaluations and run.works.shape == (10,) and run.increments.shape == (10, 3)
    assert run.shadow_per_transition.shape == (3,)


def test_bad_input_is_refused_before_computing():
    path = CountingPath()
    starts = np.zeros((3, 2))
    with pytest.raises(ValueError, match="direction"):
        run_kinetic_in_batches(path, None, jax.random.key(0), starts, np.linspace(0, 1, 4), 0.3, 1.0, 0.5, "back")
    with pytest.raises(ValueError, match="step_size"):
        run_kinetic_in_batches(path, None, jax.random.key(0), starts, np.linspace(0, 1, 4), [0.3, 0.2], 1.0, 0.5,
                               "forward")
    with pytest.raises(ValueError, match="damping"):
        run_kinetic_in_batches(path, None, jax.random.key(0), starts, np.linspace(0, 1, 4), 0.3, 1.0, -1.0, "forward")
