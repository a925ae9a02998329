"""PairForceControl: symmetries by construction, zero start, exact works with it, and a gain on an LJ decoupling.

References beside the checks:
* symmetry checks: a sum of pair terms f(|r_ij|) r̂_ij is invariant under translations and
  equivariant under rotations and permutations of identical particles (standard; e.g.
  Allen & Tildesley, *Computer Simulation of Liquids*, 1987, §1.5 for pair forces);
* exactness: ⟨e^{−w}⟩_F = e^{−Δf} for any drift with the kernel pair of fe_tool.switching
  (Jarzynski 1997; Crooks 1998; Vargas et al. 2024, ICLR), checked against a closed-form ΔF
  of a Gaussian system (Gaussian integral ∫e^{−½yᵀHy+bᵀy}dy = (2π)^{n/2} det(H)^{−½} e^{½bᵀH⁻¹b});
* LJ fluid: T* = 2, ρ* = 0.3, soft-core decoupling (Beutler et al. 1994, Chem. Phys. Lett. 222, 529).
"""
import equinox as eqx
import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from fe_tool.control import (CONTROL_KINDS, ControlScales, PairForceControl, bind_control, build_control, load_control,
                             prepare_control, save_control)
from fe_tool.estimators import bar
from fe_tool.path import LinearPath
from fe_tool.switching import run_in_batches


def _randomised(control, key, size=0.5):
    """The control with a random (non-zero) output layer: a fixed, non-trivial pair force."""
    last = control.mlp.layers[-1]
    kw, kb = jax.random.split(key)
    return eqx.tree_at(lambda c: (c.mlp.layers[-1].weight, c.mlp.layers[-1].bias), control,
                       (size * jax.random.normal(kw, last.weight.shape), size * jax.random.normal(kb, last.bias.shape)))


def _rotation(key):
    q, r = np.linalg.qr(np.asarray(jax.random.normal(key, (3, 3))))
    q = q * np.sign(np.diag(r))
    return q if np.linalg.det(q) > 0 else -q


# ---------------------------------------------------------------- (1) symmetries, (2) zero start


def test_zero_at_initialisation_and_built_by_kind(key):
    x = jax.random.normal(key, (8, 3)) * 1.5
    c = PairForceControl((8, 3), None, alchemical=[0], cutoff=3.0, key=key)
    assert np.all(np.asarray(c(x, 0.3)) == 0.0)  # exactly zero: zero output layer
    scales = ControlScales.neutral(24)
    d = build_control("pair_force", (8, 3), scales, key=key, alchemical=[0, 5], box=[6.0, 6.0, 7.0], cutoff=2.5)
    assert CONTROL_KINDS["pair_force"] is PairForceControl and isinstance(d, PairForceControl)
    assert np.all(np.asarray(d(x, 0.7)) == 0.0)
    assert d.drift_bound().shape == (8, 3)
    with pytest.raises(ValueError, match="cutoff"):
        PairForceControl((8, 3), None, alchemical=[0], box=4.0, cutoff=2.5, key=key)  # > L/2


def test_rotation_translation_permutation_equivariance(key):
    k1, k2, k3, k4 = jax.random.split(key, 4)
    x = jax.random.normal(k1, (8, 3)) * 1.2
    c = _randomised(PairForceControl((8, 3), None, alchemical=[0, 3], cutoff=3.5, key=k2), k3)
    v = np.asarray(c(x, 0.4))
    assert np.max(np.abs(v)) > 1e-3  # non-trivial
    assert np.allclose(v.sum(axis=0), 0.0, atol=1e-12)  # equal and opposite: no net drift
    rot = _rotation(k4)
    assert np.allclose(np.asarray(c(x @ rot.T, 0.4)), v @ rot.T, atol=1e-10)  # rotates with the positions
    assert np.allclose(np.asarray(c(x + jnp.array([0.3, -2.0, 5.0]), 0.4)), v, atol=1e-10)  # translation invariant
    perm = np.array([0, 6, 2, 3, 1, 7, 4, 5])  # permutes the non-alchemical particles (0 and 3 fixed)
    assert np.allclose(np.asarray(c(x[perm], 0.4)), v[perm], atol=1e-10)
    swap = np.array([3, 1, 2, 0, 4, 5, 6, 7])  # exchanging the two (identical) alchemical particles
    assert np.allclose(np.asarray(c(x[swap], 0.4)), v[swap], atol=1e-10)
    assert not np.allclose(np.asarray(c(x, 0.9)), v)  # depends on λ


def test_periodic_minimum_image_and_save_load(key, tmp_path):
    k1, k2, k3 = jax.random.split(key, 3)
    box = np.array([5.0, 5.5, 6.0])
    x = jax.random.uniform(k1, (10, 3)) * box
    c = _randomised(PairForceControl((10, 3), None, alchemical=[2], box=box, cutoff=2.5, key=k2), k3)
    v = np.asarray(c(x, 0.5))
    shift = np.zeros((10, 3))
    shift[[2, 7]] = [[5.0, 0.0, -6.0], [0.0, 11.0, 0.0]]  # whole box vectors: the same periodic configuration
    assert np.allclose(np.asarray(c(x + shift, 0.5)), v, atol=1e-10)
    assert np.allclose(np.asarray(c(x + jnp.array([1.7, -0.4, 2.9]), 0.5)), v, atol=1e-10)  # periodic translation
    file = tmp_path / "pair.ctl"
    save_control(file, c, fingerprint="test")
    loaded = load_control(file, expected_fingerprint="test").control
    assert isinstance(loaded, PairForceControl) and loaded.hyperparameters() == c.hyperparameters()
    assert np.allclose(np.asarray(loaded(x, 0.5)), v)


# ---------------------------------------------------------------- (3) exact works with a fixed non-zero control


def _gaussian_system(rng):
    """Particle 0 tethered at the origin (k0) and, in A only, tied by springs (ks) to 7 particles
    tethered (kt) to sites c: Gaussian in both states, so ΔF is known in closed form."""
    sites = rng.normal(size=(7, 3)) * 1.0
    k0, kt, ks = 1.0, 2.0, 1.5

    def u_b(x):
        return 0.5 * k0 * jnp.sum(x[0] ** 2) + 0.5 * kt * jnp.sum((x[1:] - sites) ** 2)

    def u_a(x):
        return u_b(x) + 0.5 * ks * jnp.sum((x[0] - x[1:]) ** 2)

    def quadratic(springs):  # per Cartesian axis: u = ½ yᵀHy − bᵀy + c_axis, y = the 8 coordinates on that axis
        h = np.diag([k0] + [kt] * 7).astype(float)
        if springs:
            h[0, 0] += 7 * ks
            h[1:, 1:] += ks * np.eye(7)
            h[0, 1:] = h[1:, 0] = -ks
        b = np.concatenate([[np.zeros(3)], kt * sites])  # (8, 3): one column per axis
        c = 0.5 * kt * np.sum(sites**2, axis=0)
        return h, b, c

    def log_z(springs):
        h, b, c = quadratic(springs)
        hinv = np.linalg.inv(h)
        per_axis = [4 * np.log(2 * np.pi) - 0.5 * np.linalg.slogdet(h)[1] + 0.5 * b[:, a] @ hinv @ b[:, a] - c[a]
                    for a in range(3)]
        return float(np.sum(per_axis))

    def exact_samples(springs, count):
        h, b, _ = quadratic(springs)
        cov = np.linalg.inv(h)
        mean = cov @ b  # (8, 3)
        chol = np.linalg.cholesky(cov)
        return mean[None] + np.einsum("ij,njk->nik", chol, rng.normal(size=(count, 8, 3)))

    return u_a, u_b, log_z(True) - log_z(False), exact_samples  # Δf = f_B − f_A = ln Z_A − ln Z_B


def test_works_stay_exact_with_a_fixed_pair_control(key):
    rng = np.random.default_rng(11)
    u_a, u_b, exact, exact_samples = _gaussian_system(rng)
    path = LinearPath(u_a, u_b, kT=1.0)
    k1, k2, k3, k4 = jax.random.split(key, 4)
    scales = ControlScales(*(jnp.zeros(24),) * 2, jnp.ones(24), jnp.ones(24), jnp.full(24, 5.0))
    control = _randomised(PairForceControl((8, 3), scales, alchemical=[0], cutoff=4.0, key=k1), k2, size=1.0)
    steps, n = 10, 1000
    lams = np.linspace(0.0, 1.0, steps + 1)
    eps = np.full(steps, 0.02)
    drift = bind_control(control, lams, eps)
    starts_a, starts_b = jnp.asarray(exact_samples(True, n)), jnp.asarray(exact_samples(False, n))
    wf, _, _ = run_in_batches(path, drift, k3, starts_a, lams, eps, 1.0, 1.0, "forward")
    wr, _, _ = run_in_batches(path, drift, k4, starts_b, lams, eps, 1.0, 1.0, "reverse")
    wf0, _, _ = run_in_batches(path, None, k3, starts_a, lams, eps, 1.0, 1.0, "forward")
    est = bar(wf, wr)
    # Crooks/Jarzynski exactness for any drift: BAR matches the closed-form Δf
    assert abs(est.delta_f - exact) < 4 * est.stderr, (est.delta_f, est.stderr, exact)
    print(f"Gaussian 1+7: BAR {est.delta_f:.4f} ± {est.stderr:.4f} vs exact {exact:.4f}; forward work mean "
          f"{np.mean(wf):.3f} (controlled) vs {np.mean(wf0):.3f} (same noise, no control)")
    # the control really acted (not a disguised zero): same starts and noise, clearly different works
    assert np.sqrt(np.mean((wf - wf0) ** 2)) > 0.5


# ---------------------------------------------------------------- (4) training helps on a small LJ decoupling


@pytest.mark.slow
def test_training_reduces_forward_work_spread_on_lj_decoupling(key):
    from fe_tool.sampling import end_target, sample_state
    from fe_tool.systemfile import parse_system

    n, density = 32, 0.3
    edge = (n / density) ** (1 / 3)  # 4.74 σ
    cells = [[i, j, k] for i in range(4) for j in range(4) for k in range(2)]
    grid = np.array(cells, float) * [edge / 4, edge / 4, edge / 2]
    system = parse_system({
        "name": "lj32", "units": "reduced", "kT": 2.0,
        "particles": {"types": ["LJ"] * n, "positions": grid.tolist()}, "box": {"edges": [edge] * 3},
        "types": {"LJ": {"sigma": 1.0, "epsilon": 1.0}},
        "nonbonded": {"cutoff": 2.3, "shift": False, "tail_correction": False}, "change": {"decouple": [0]}})
    path = system.path
    ka, kb, kc, kn = jax.random.split(jax.random.key(0), 4)
    sa = sample_state(ka, end_target(path, "a"), system.start_a, samples=256, chains=32, evaluation_budget=200_000)
    sb = sample_state(kb, end_target(path, "b"), system.start_b, samples=256, chains=32, evaluation_budget=200_000)
    steps = 8
    lams = np.linspace(0.0, 1.0, steps + 1)
    eps = np.full(steps, 0.2 * min(sa.step_size, sb.step_size))  # small steps: unadjusted Langevin stays stable
    control = PairForceControl.from_path(path, sa.samples[:64], key=kn)
    assert control.alchemical == (0,) and control.box is not None and control.cutoff == pytest.approx(2.3)
    out = prepare_control(kc, path, sa.samples, sb.samples, lams, eps, 1.0, 1.0, mode="learned", budget=2_000_000,
                          warm_start=control, learning_rate=1e-2, objective="logvar", learn_schedule=False,
                          learn_steps="none", patience=8, max_optimiser_steps=1200, progress=False)
    before, after = out.work_before["forward"], out.work_after["forward"]
    print(f"LJ 1+31, K={steps}: forward work mean {before['mean']:.3f} -> {after['mean']:.3f}, spread "
          f"{before['spread']:.3f} -> {after['spread']:.3f} (ratio {after['spread'] / before['spread']:.3f}), "
          f"{out.optimiser_steps} steps, {out.evaluations} evaluations")
    assert isinstance(out.control, PairForceControl) and after["nonfinite"] == 0
    # The mean forward work (= dissipation + Δf) is the robust signal: over 128 validation trajectories
    # its standard error is at most √(s_before² + s_after²)/√128 (less when paired). The control must
    # cut it by more than 3 of those, i.e. significantly.
    standard_error = math.hypot(before["spread"], after["spread"]) / math.sqrt(128)
    assert after["mean"] < before["mean"] - 3.0 * standard_error
    # and it must not widen the work distribution beyond the spread's own sampling error
    # (relative ≈ 1/√(2·127) ≈ 6 % each, 3 combined errors ≈ 27 %)
    assert after["spread"] < before["spread"] * (1.0 + 3.0 * math.sqrt(2.0) / math.sqrt(2 * 127))


# ---------------------------------------------------------------- (5) checks that score both directions, robust spread


def test_robust_spread_and_checks_scoring_both_directions(key):
    """The robust spread (1.4826·MAD) is the std for Gaussian works and ignores a rare far tail (the
    overlaps of an inserted particle); ``validate="both"`` scores forward and reverse checks, charges both.

    Gaussian: the MAD estimate of σ has a relative standard error of ≈1.17/√n ≈ 1.9% at n = 4000, so
    0.06 is > 3σ.  Moving harmonic well u_λ = (x − 3λ)²/2 (ΔF = 0): a constant velocity
    v = 3 transports it exactly, so training must cut the spread in both directions; uncontrolled
    K = 8, ε = 0.1 gives a robust spread of 2.3–3.3 kT each way, trained 0.10–0.17 kT (three training
    seeds: ratios 0.04–0.07), so asking for a quarter leaves a wide margin.
    """
    from fe_tool.control.training import validation_spread, work_summary

    rng = np.random.default_rng(3)
    gauss = rng.normal(2.0, 1.5, 4000)
    assert work_summary(gauss)["robust_spread"] == pytest.approx(1.5, rel=0.06)
    tail = gauss.copy()
    tail[:40] = 1e9  # 1% catastrophic overlaps: the std explodes, the robust spread hardly moves
    s = work_summary(tail)
    assert s["spread"] > 1e7 and s["robust_spread"] == pytest.approx(1.5, rel=0.08)
    assert validation_spread([s, work_summary(gauss)], "robust") == pytest.approx(1.5, rel=0.08)
    assert validation_spread([s, {**s, "nonfinite": 1}], "robust") == np.inf

    path = LinearPath(lambda x: 0.5 * jnp.sum(x**2), lambda x: 0.5 * jnp.sum((x - 3.0) ** 2), kT=1.0)
    k, n = 8, 512
    xa, xb = rng.normal(size=(n, 1)), 3.0 + rng.normal(size=(n, 1))
    lams, eps = np.linspace(0.0, 1.0, k + 1), np.full(k, 0.1)
    out = prepare_control(key, path, xa, xb, lams, eps, 1.0, 1.0, mode="learned", budget=200_000,
                          learn_schedule=False, learn_steps="none", validate="both", spread_measure="robust",
                          network={"width": 16, "depth": 1}, progress=False)
    before, after = out.work_before, out.work_after
    for direction in ("forward", "reverse"):
        assert before[direction]["robust_spread"] > 1.0
        assert after[direction]["robust_spread"] < 0.25 * before[direction]["robust_spread"], (direction, after)
    # cost: every check ran both directions (2 validation runs), and before/after runs are charged
    run_cost = 128 * (k + 1) * path.evaluations_per_point(1)
    h = out.history
    assert h and all("validation_reverse_robust_spread" in c for c in h)
    assert out.evaluations == h[-1]["evaluations"] + 2 * run_cost
    steps = [h[0]["optimiser_step"]] + [b["optimiser_step"] - a["optimiser_step"] for a, b in zip(h, h[1:])]
    step_cost = out.settings["optimiser_step_cost"]
    assert h[0]["evaluations"] == 2 * run_cost + steps[0] * step_cost + 2 * run_cost
    for a, b, m in zip(h, h[1:], steps[1:]):
        assert b["evaluations"] - a["evaluations"] == m * step_cost + 2 * run_cost
    with pytest.raises(ValueError, match="validate"):
        prepare_control(key, path, xa, xb, lams, eps, 1.0, 1.0, budget=200_000, validate="reverse")
