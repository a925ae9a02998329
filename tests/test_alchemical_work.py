"""Cheap alchemical work (the switched pairs alone) and exact redraws of a decoupled group.

Independent references, each named beside its check:
* ``energy_change`` against the difference of two full path energies (every pair evaluated);
* ``lambda_derivative`` against automatic differentiation of the full path energy in λ;
* redraws: the decoupled-state energy of the full model before and after (a rigid motion of a
  group that interacts with nothing outside itself changes nothing); uniformity by
  Kolmogorov–Smirnov tests against the uniform law (scipy.stats.kstest), for positions in the
  box and for the cosine of a bond with a fixed axis (uniform on [−1, 1] for a uniformly random
  direction in 3-D, Archimedes' hat-box theorem);
* test-particle insertion: the Kolafa & Nezbeda 1994 equation of state (Fluid Phase Equilib. 100,
  1), implemented in tests/test_lj_fluid.py, βμ_ex = −0.48710 at T* = 2, ρ* = 0.3.

The KS tests use fixed keys (not chosen by outcome) and the threshold p > 1e-3 each: a correct
sampler fails one of the five such checks with probability below 0.5 %.
"""
import time

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import stats

from fe_tool.alchemy import SoftCoreDecouplingPath
from fe_tool.energy import (DistanceRestraints, HarmonicAngles, HarmonicBonds, PeriodicTorsions, PositionRestraints,
                            ScaledPairs, assemble, bonded_exclusions, lennard_jones_parameters, nonbonded_term,
                            scaled_pair_parameters)
from fe_tool.energy.box import minimum_image

LAMBDA_PAIRS = [(0.0, 1.0), (1.0, 0.0), (0.0, 0.5), (1.0, 0.5)]


def _random_lambda_pairs(seed):
    rng = np.random.default_rng(seed)
    return LAMBDA_PAIRS + [tuple(rng.uniform(0.0, 1.0, 2)) for _ in range(4)] + [(0.0, float(rng.uniform()))]


def _lattice(per_edge, edge, seed, jitter=0.05):
    rng = np.random.default_rng(seed)
    grid = np.stack(np.meshgrid(*[np.arange(per_edge)] * 3, indexing="ij"), -1).reshape(-1, 3)
    return (grid + 0.5) * edge / per_edge + jitter * rng.normal(size=(len(grid), 3))


def _check_energy_change(path, x, lambda_pairs):
    """1e-10 relative, above the rounding of the reference itself: a difference of two full energies
    carries an error of order ε·|u| (ε = 2.2e-16, summed over ~10³ pairs), so 1e-12·(|u_a| + |u_b|)
    is allowed on top; it matters only when the change is tiny (a pair of λ inside a flat stretch)."""
    energy = jax.jit(lambda y, lam: path.energy(y, lam))
    cheap = jax.jit(lambda y, a, b: path.energy_change(y, a, b))
    slope_full = jax.jit(jax.grad(lambda y, lam: path.energy(y, lam), argnums=1))
    slope = jax.jit(lambda y, lam: path.lambda_derivative(y, lam))
    for a, b in lambda_pairs:
        a, b = jnp.asarray(a), jnp.asarray(b)
        u_a, u_b = float(energy(x, a)), float(energy(x, b))
        rounding = 1e-12 * (abs(u_a) + abs(u_b))
        assert float(cheap(x, a, b)) == pytest.approx(u_b - u_a, rel=1e-10, abs=rounding), (float(a), float(b))
        assert float(slope(x, b)) == pytest.approx(float(slope_full(x, b)), rel=1e-10, abs=rounding)


# ------------------------------------------------------------------ models

def _lj_fluid(n_edge=4, density=0.5, decoupled=(5,)):
    n = n_edge**3
    edge = (n / density) ** (1.0 / 3.0)
    x = jnp.asarray(_lattice(n_edge, edge, seed=1, jitter=0.1))
    term = nonbonded_term(n, lennard_jones=lennard_jones_parameters(np.ones(n), np.ones(n)), cutoff=2.5,
                          alchemical=list(decoupled), units="reduced", tail_correction_box=edge)
    return assemble([term], box=edge, units="reduced"), x


def _charged_fluid(**options):
    n, edge = 27, 4.2
    x = jnp.asarray(_lattice(3, edge, seed=4))
    sigma = np.where(np.arange(n) % 2 == 0, 1.0, 0.9)
    charges = np.where(np.arange(n) % 2 == 0, 0.5, -0.5)
    term = nonbonded_term(n, lennard_jones=lennard_jones_parameters(sigma, np.ones(n)), charges=charges, cutoff=2.0,
                          reaction_field_dielectric=30.0, alchemical=[0], units="reduced", **options)
    return assemble([term], box=edge, units="reduced"), x


# a folded 5-site chain on lattice sites (1,1,1) (1,1,2) (1,2,2) (2,2,2) (2,2,1) of a 4³ lattice
CHAIN = [21, 22, 26, 42, 41]


def _molecule_terms(n, extra_bond=None):
    bonds = np.array([[CHAIN[k], CHAIN[k + 1]] for k in range(4)] + ([extra_bond] if extra_bond else []))
    angles = np.array([[CHAIN[k], CHAIN[k + 1], CHAIN[k + 2]] for k in range(3)])
    torsions = np.array([[CHAIN[k], CHAIN[k + 1], CHAIN[k + 2], CHAIN[k + 3]] for k in range(2)])
    exclusions, pairs_14 = bonded_exclusions(bonds, n)
    return [
        HarmonicBonds(bonds=jnp.asarray(bonds), lengths=jnp.full(len(bonds), 1.2),
                      force_constants=jnp.full(len(bonds), 300.0)),
        HarmonicAngles(angles=jnp.asarray(angles), equilibrium_angles=jnp.full(3, np.pi / 2),
                       force_constants=jnp.full(3, 40.0)),
        PeriodicTorsions(torsions=jnp.asarray(torsions), force_constants=jnp.full(2, 1.5),
                         multiplicities=jnp.full(2, 3.0), phases=jnp.zeros(2)),
    ], exclusions, pairs_14


def _molecule_in_solvent(decouple_internal=True, extra_bond=None, box=True):
    """A charged 5-site chain (bonds, angles, torsions, exclusions to 1-4, scaled 1-4 pairs) in 59 LJ sites."""
    n, edge = 64, 5.0
    x = jnp.asarray(_lattice(4, edge, seed=2))
    charges = np.where(np.arange(n) % 2 == 0, 0.2, -0.2)   # a weakly charged solvent
    charges[CHAIN] = [0.4, -0.3, 0.2, -0.5, 0.2]
    lj = lennard_jones_parameters(np.where(np.isin(np.arange(n), CHAIN), 0.9, 1.0), np.ones(n))
    bonded_terms, exclusions, pairs_14 = _molecule_terms(n, extra_bond)
    sigma, epsilon, products = scaled_pair_parameters(pairs_14, lj, charges, 0.5, 0.8333)
    pairs = ScaledPairs(pairs=jnp.asarray(pairs_14), sigma=sigma, epsilon=epsilon, charge_products=products,
                        coulomb_constant=1.0)
    term = nonbonded_term(n, lennard_jones=lj, charges=charges, exclusions=exclusions, cutoff=2.2,
                          reaction_field_dielectric=78.0, units="reduced", alchemical=CHAIN,
                          decouple_internal=decouple_internal, tail_correction_box=edge if box else None)
    return assemble([term, pairs, *bonded_terms], box=edge if box else None, units="reduced"), x


# ------------------------------------------------------------------ energy_change

def test_energy_change_of_a_particle_in_a_periodic_lj_fluid_with_tail():
    model, x = _lj_fluid()
    path = SoftCoreDecouplingPath(model, kT=1.5)
    assert path.nonbonded.tail is not None and float(path.nonbonded.tail[1]) != 0.0
    _check_energy_change(path, x, _random_lambda_pairs(11))
    # a particle across the boundary: the minimum image must be used in the switched pairs too
    shifted = x.at[5].set(jnp.asarray([0.02, 0.01, 6.3]))
    _check_energy_change(path, shifted, [(0.0, 1.0), (0.2, 0.9)])
    # cost: 2 × 63 switched pairs against 64·63/2 pairs of a full evaluation
    assert path.energy_change_cost() == pytest.approx(2 * 63 / (64 * 63 / 2))


@pytest.mark.parametrize("options", [{}, {"lj_shift": True, "coulomb_soft_core_alpha": 0.3}])
def test_energy_change_with_reaction_field_across_the_stage_joint(options):
    model, x = _charged_fluid(**options)
    path = SoftCoreDecouplingPath(model, kT=1.0, electrostatics_share=0.5)
    pairs = [(0.2, 0.8), (0.8, 0.2), (0.45, 0.55), (0.5, 0.0), (0.5, 1.0), (0.3, 0.4)] + _random_lambda_pairs(12)
    _check_energy_change(path, x, pairs)


@pytest.mark.parametrize("decouple_internal", [True, False])
def test_energy_change_of_a_molecule_with_bonds_exclusions_and_scaled_pairs(decouple_internal):
    model, x = _molecule_in_solvent(decouple_internal)
    path = SoftCoreDecouplingPath(model, kT=0.9)
    assert path.electrostatics_share == 0.5
    internal_pairs = 1 if not decouple_internal else 0   # (21, 41) is the chain's only pair beyond 1-4
    assert path.changing_pairs.shape[0] == 5 * 59 + internal_pairs
    _check_energy_change(path, x, _random_lambda_pairs(13))


def test_energy_change_with_interpolated_and_one_ended_terms():
    model, x = _molecule_in_solvent()
    torsions = model.terms[-1]
    changed = PeriodicTorsions(torsions=torsions.torsions, force_constants=jnp.asarray([0.5, 2.5]),
                               multiplicities=torsions.multiplicities, phases=jnp.asarray([0.3, -1.0]),
                               name=torsions.name)
    released = DistanceRestraints(pairs=jnp.asarray([[21, 5]]), lower=jnp.asarray([1.0]), upper=jnp.asarray([1.1]),
                                  force_constants=jnp.asarray([10.0]))
    added = PositionRestraints(indices=jnp.asarray([3, 42]), reference=x[jnp.asarray([3, 42])] + 0.2,
                               force_constants=jnp.asarray(5.0))
    path = SoftCoreDecouplingPath(model, kT=0.9, changed_a=[torsions], changed_b=[changed], only_a=[released],
                                  only_b=[added])
    _check_energy_change(path, x, _random_lambda_pairs(14))
    assert not path.can_redraw_decoupled()


def test_energy_change_cost_and_the_default_of_a_plain_path():
    from fe_tool.path import LinearPath
    linear = LinearPath(lambda y: jnp.sum(y**2), lambda y: jnp.sum((y - 1.0) ** 2), kT=2.0)
    y = jnp.asarray([0.3, -0.2])
    assert float(linear.energy_change(y, 0.25, 1.0)) == pytest.approx(0.75 * (1.93 - 0.13) / 2.0, rel=1e-12)
    assert linear.energy_change_cost() == 2.0
    # 32 of 64 particles decoupled: 32 × 32 switched pairs, two λ values, against 64·63/2 pairs
    assert SoftCoreDecouplingPath(_lj_fluid(decoupled=range(32))[0]).energy_change_cost() == pytest.approx(
        2 * 32 * 32 / 2016)


# ------------------------------------------------------------------ redraws

def _bond_vectors(path, y):
    group = y[path.group]
    return np.asarray(minimum_image(group[1:] - group[:-1], path.box))


def test_redraw_keeps_the_decoupled_energy_and_the_molecule_shape(key):
    model, x = _molecule_in_solvent()
    path = SoftCoreDecouplingPath(model, kT=0.9)
    assert path.can_redraw_decoupled()
    u_b = jax.jit(lambda y: path.energy(y, jnp.asarray(1.0)))
    redraw = jax.jit(jax.vmap(path.redraw_decoupled, in_axes=(0, None)))
    moved = redraw(jax.random.split(key, 8), x)
    before = float(u_b(x))
    lengths = np.linalg.norm(_bond_vectors(path, x), axis=-1)
    for y in moved:
        assert float(u_b(y)) == pytest.approx(before, rel=1e-10, abs=1e-10)
        np.testing.assert_allclose(np.linalg.norm(_bond_vectors(path, y), axis=-1), lengths, rtol=1e-12)
        others = np.setdiff1d(np.arange(64), CHAIN)
        np.testing.assert_array_equal(np.asarray(y)[others], np.asarray(x)[others])
        assert np.all(np.abs(np.asarray(y - x)[CHAIN]).sum(axis=1) > 1e-6)   # the chain did move
        assert np.all((np.asarray(y) >= 0.0) & (np.asarray(y) < 5.0))        # wrapped into the box
    # the coupled energy does change: the chain now sits elsewhere among the solvent
    u_a = jax.jit(lambda y: path.energy(y, jnp.asarray(0.0)))
    assert float(u_a(moved[0])) != pytest.approx(float(u_a(x)), rel=1e-6)


def test_redrawn_particle_is_uniform_in_the_box():
    model, x = _lj_fluid()
    path = SoftCoreDecouplingPath(model)
    edge = float(path.box[0])
    redraw = jax.jit(jax.vmap(path.redraw_decoupled, in_axes=(0, None)))
    positions = np.asarray(redraw(jax.random.split(jax.random.key(31), 4000), x))[:, 5]
    for axis in range(3):
        assert stats.kstest(positions[:, axis] / edge, "uniform").pvalue > 1e-3


def test_redrawn_molecule_orientation_is_uniform():
    model, x = _molecule_in_solvent()
    path = SoftCoreDecouplingPath(model)
    redraw = jax.jit(jax.vmap(path.redraw_decoupled, in_axes=(0, None)))
    moved = redraw(jax.random.split(jax.random.key(32), 4000), x)
    bonds = jax.vmap(lambda y: minimum_image(y[22] - y[21], path.box))(moved)
    cosines = np.asarray(bonds[:, 2] / jnp.linalg.norm(bonds, axis=-1))
    assert stats.kstest(cosines, "uniform", args=(-1.0, 2.0)).pvalue > 1e-3
    # the azimuth of the same bond is uniform on (−π, π]
    azimuth = np.arctan2(np.asarray(bonds[:, 1]), np.asarray(bonds[:, 0]))
    assert stats.kstest(azimuth, "uniform", args=(-np.pi, 2 * np.pi)).pvalue > 1e-3


def test_redrawn_pair_in_two_dimensions_turns_uniformly():
    n, edge = 16, 6.0
    grid = np.stack(np.meshgrid(np.arange(4), np.arange(4), indexing="ij"), -1).reshape(-1, 2)
    x = jnp.asarray((grid + 0.5) * edge / 4)
    term = nonbonded_term(n, lennard_jones=lennard_jones_parameters(np.ones(n), np.ones(n)), cutoff=2.5,
                          alchemical=[0, 1], units="reduced")
    path = SoftCoreDecouplingPath(assemble([term], box=edge, units="reduced", dimension=2))
    moved = jax.jit(jax.vmap(path.redraw_decoupled, in_axes=(0, None)))(jax.random.split(jax.random.key(33), 3000), x)
    bond = np.asarray(jax.vmap(lambda y: minimum_image(y[1] - y[0], path.box))(moved))
    np.testing.assert_allclose(np.linalg.norm(bond, axis=-1), 1.5, rtol=1e-12)
    assert stats.kstest(np.arctan2(bond[:, 1], bond[:, 0]), "uniform", args=(-np.pi, 2 * np.pi)).pvalue > 1e-3


def test_redraw_is_refused_when_the_decoupled_state_still_sees_the_group():
    # a bond from the chain to a solvent site
    model, x = _molecule_in_solvent(extra_bond=[41, 45])
    path = SoftCoreDecouplingPath(model)
    assert not path.can_redraw_decoupled() and "joins group particles" in path.redraw_obstacle
    with pytest.raises(ValueError, match="cannot be redrawn exactly"):
        path.redraw_decoupled(jax.random.key(0), x)
    # no periodic box
    open_model, _ = _molecule_in_solvent(box=False)
    assert not SoftCoreDecouplingPath(open_model).can_redraw_decoupled()
    # annihilation: the internal pairs change too
    assert not SoftCoreDecouplingPath(_molecule_in_solvent(decouple_internal=False)[0]).can_redraw_decoupled()
    # a position restraint on a group particle; one on a solvent particle is harmless
    model, x = _molecule_in_solvent()
    pinned = PositionRestraints(indices=jnp.asarray([22]), reference=x[jnp.asarray([22])],
                                force_constants=jnp.asarray(1.0))
    solvent = PositionRestraints(indices=jnp.asarray([3]), reference=x[jnp.asarray([3])],
                                 force_constants=jnp.asarray(1.0), name="solvent_restraint")
    assert not SoftCoreDecouplingPath(assemble([*model.terms, pinned], box=5.0, units="reduced")
                                      ).can_redraw_decoupled()
    assert SoftCoreDecouplingPath(assemble([*model.terms, solvent], box=5.0, units="reduced")).can_redraw_decoupled()


# ------------------------------------------------------------------ test-particle insertion

@pytest.mark.slow
def test_insertion_into_the_decoupled_end_gives_the_kolafa_nezbeda_chemical_potential():
    """Zero-step switching from B (decoupled) to A (coupled) with exact redraws: Widom's insertion.

    Z_A / Z_B = ⟨e^{−(u_A − u_B)}⟩_B, and μ_ex = F_A − F_B = −ln(Z_A/Z_B)/β (alchemy module doc), so
    βμ_ex = −ln⟨e^{−Δu}⟩_B with Δu = u_A − u_B = energy_change(x, 1, 0) on B samples whose decoupled
    particle is redrawn uniformly in the box. u includes the tail, so this is the full potential.
    Error: R insertions into one configuration are correlated, and so are the configurations of one
    chain, so the error is taken over the 16 chains' means (chains are independent), by the delta
    method for the logarithm. Allowance: max(4σ, 0.05 kT) — the O(1/N) finite-size difference between
    N = 108 and the equation of state has no source at this state point (see tests/test_lj_fluid.py);
    measured −0.495 ± 0.015 (seed 1, 320 configurations × 100 insertions, 95 s on 2 shared cores).
    """
    from fe_tool.kernels.target import end_target
    from fe_tool.sampling import sample_state
    from fe_tool.systemfile import load_system
    from test_lj_fluid import SYSTEMS, beta_excess_chemical_potential, kn_residual_free_energy

    started = time.perf_counter()
    system = load_system(SYSTEMS / "lj_fluid_decoupling.toml")   # 108 particles, r_c = 2.5σ + tail, T* = 2
    path = system.path
    density = system.particles["count"] / float(np.prod(system.particles["box"]))
    assert (path.kT, density) == (2.0, pytest.approx(0.3, rel=1e-12)) and path.can_redraw_decoupled()
    samples = sample_state(jax.random.key(1), end_target(path, "b"), jnp.asarray(system.start_b), samples=320,
                           chains=16, evaluation_budget=200_000, kernel="kinetic")
    assert samples.equilibrated and not samples.warnings
    insertions = 100

    @jax.jit
    def work(x, keys):
        return jax.vmap(lambda k: path.energy_change(path.redraw_decoupled(k, x), 1.0, 0.0))(keys)

    keys = jax.random.split(jax.random.key(2), (len(samples.samples), insertions))
    du = np.stack([np.asarray(work(jnp.asarray(x), k)) for x, k in zip(samples.samples, keys)])
    weights = np.exp(-du)
    healthy = samples.chains - samples.stuck_chains   # samples are interleaved by chain
    chain_means = np.array([weights[c::healthy].mean() for c in range(healthy)])
    mean = weights.mean()
    beta_mu = -np.log(mean)
    error = chain_means.std(ddof=1) / np.sqrt(healthy) / mean
    reference = beta_excess_chemical_potential(kn_residual_free_energy, 2.0, density)
    print(f"insertion βμ_ex = {beta_mu:.4f} ± {error:.4f} ({len(weights)} configurations × {insertions}); "
          f"Kolafa–Nezbeda {reference:.5f}; {time.perf_counter() - started:.0f} s")
    assert error < 0.05   # enough insertions for the check to have power
    assert abs(beta_mu - reference) <= max(4 * error, 0.05)
