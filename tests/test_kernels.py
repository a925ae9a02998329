"""Sampling kernels (MALA, BAOAB kinetic Langevin, generalised HMC) and carried neighbour lists.

Every check is against a closed form or an independent computation:
* harmonic wells: the configurational distribution N(c, 1/k) (exact Gaussian);
* BAOAB on a harmonic well samples the exact configurational variance at any stable step
  (Leimkuhler & Matthews 2013, Appl. Math. Res. Express 2013, 34; from memory), so no
  step-size bias is allowed for there;
* carried neighbour lists: energies equal the all-pairs energy of the same configuration.
Error bars come from independent replicates (different seeds), not from the sampler's own
autocorrelation estimate, so the check does not trust what it tests.
"""
from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from fe_tool.energy.neighbours import all_pairs, grown_capacity, make_neighbour_list
from fe_tool.energy.nonbonded import lennard_jones_energy, lennard_jones_parameters
from fe_tool.kernels import KERNELS
from fe_tool.path import LinearPath
from fe_tool.sampling import end_target, sample_state

STIFFNESS = np.array([0.5, 2.0, 10.0, 40.0])
CENTRE = np.array([1.0, -1.0, 0.5, 0.0])


def _harmonic_path():
    k, c = jnp.asarray(STIFFNESS), jnp.asarray(CENTRE)
    return LinearPath(lambda x: 0.5 * jnp.sum(k * (x - c) ** 2), lambda x: jnp.sum(x ** 2), 1.0)


@pytest.mark.parametrize("kernel", ["kinetic", "kinetic_exact"])
def test_kinetic_kernels_sample_an_anisotropic_gaussian(kernel):
    """Mean c and variance 1/k per coordinate, over 6 independent runs.

    For each run r and coordinate i, z = k_i (x_i − c_i)² averages to 1 exactly. The spread
    of the per-run averages over the 6 runs gives the standard error; the check allows
    4 standard errors of the mean of 6 (t-distribution with 5 degrees of freedom puts
    P(|t| > 4) ≈ 1%, per coordinate; margin written out: 4·s/√6).
    """
    path = _harmonic_path()
    target = end_target(path, "a")
    means, variances = [], []
    for seed in range(6):
        s = sample_state(jax.random.key(seed), target, jnp.zeros(4), samples=800, chains=16,
                         evaluation_budget=50_000, kernel=kernel)
        assert s.kernel == kernel and s.stuck_chains == 0
        assert s.evaluations <= 50_000 * 1.05
        means.append(s.samples.mean(0))
        variances.append((STIFFNESS * (s.samples - CENTRE) ** 2).mean(0))
    means, variances = np.array(means), np.array(variances)
    se_mean = means.std(0, ddof=1) / np.sqrt(6)
    se_var = variances.std(0, ddof=1) / np.sqrt(6)
    assert np.all(np.abs(means.mean(0) - CENTRE) < 4 * se_mean + 1e-3), (means.mean(0), se_mean)
    assert np.all(np.abs(variances.mean(0) - 1.0) < 4 * se_var + 1e-3), (variances.mean(0), se_var)


def test_kernel_registry_names_and_targets():
    assert set(KERNELS) == {"mala", "kinetic", "kinetic_exact"}
    assert KERNELS["kinetic"].kinetic and not KERNELS["mala"].kinetic
    with pytest.raises(ValueError, match="kernel must be one of"):
        sample_state(jax.random.key(0), end_target(_harmonic_path(), "a"), jnp.zeros(4), samples=10,
                     evaluation_budget=1000, kernel="leapfrog")


def _lj_fluid(n_side=4, density=0.5, seed=0):
    """A simple-cubic LJ lattice at reduced density ρ*, jittered (positions, box)."""
    box = (n_side ** 3 / density) ** (1 / 3)
    grid = np.stack(np.meshgrid(*[np.arange(n_side)] * 3, indexing="ij"), -1).reshape(-1, 3)
    rng = np.random.default_rng(seed)
    return (grid + 0.5) * box / n_side + 0.05 * rng.standard_normal(grid.shape), box


def test_update_batch_rebuilds_all_lists_exactly_when_one_is_stale():
    """One list moved past half the skin ⇒ every list rebuilt; none moved ⇒ all kept."""
    x, box = _lj_fluid()
    builder, single = make_neighbour_list(x, box, cutoff=2.0, skin=0.4, method="all_pairs")
    batch = jnp.stack([jnp.asarray(x)] * 3)
    lists = jax.jit(lambda b: builder.build_batch(b))(batch)
    update = jax.jit(lambda b, old: builder.update_batch(b, old))
    kept = update(batch + 0.01, lists)
    assert np.all(np.asarray(kept.rebuilds) == 0)
    moved = batch.at[1, 0, 0].add(0.3)   # one particle of chain 1 moves more than skin/2 = 0.2
    rebuilt = update(moved, lists)
    assert np.all(np.asarray(rebuilt.rebuilds) == 1)
    own = jax.jit(jax.vmap(lambda b: builder.build(b)))(moved)
    np.testing.assert_array_equal(np.asarray(rebuilt.pairs), np.asarray(own.pairs))


def test_carried_list_energy_equals_all_pairs_energy_after_moves():
    """Within half the skin of the reference positions a carried list gives the all-pairs energy."""
    x, box = _lj_fluid()
    builder, nb = make_neighbour_list(x, box, cutoff=2.0, skin=0.4, method="all_pairs")
    rng = np.random.default_rng(3)
    moved = x + rng.uniform(-0.1, 0.1, x.shape)   # |Δr| ≤ 0.1·√3 < skin/2
    nb = builder.update(jnp.asarray(moved), nb)
    pairs = jnp.asarray(all_pairs(len(x)))
    lj = lennard_jones_parameters(jnp.ones(len(x)), jnp.ones(len(x)))
    kwargs = dict(box=box, cutoff=2.0)
    listed = lennard_jones_energy(jnp.asarray(moved), lj, pairs=nb, **kwargs)
    full = lennard_jones_energy(jnp.asarray(moved), lj, pairs=pairs, **kwargs)
    np.testing.assert_allclose(float(listed), float(full), rtol=1e-12)


def test_grown_capacity_covers_what_an_overflowed_list_met():
    x, box = _lj_fluid()
    builder, nb = make_neighbour_list(x, box, cutoff=2.0, skin=0.4, method="all_pairs")
    small = builder.with_capacity(10)
    overflowed = small.build(jnp.asarray(x))
    assert bool(overflowed.overflow)
    pairs, _ = grown_capacity(overflowed)
    assert pairs >= int(nb.pair_count)
    regrown = small.with_capacity(pairs).build(jnp.asarray(x))
    assert not bool(regrown.overflow) and int(regrown.pair_count) == int(nb.pair_count)
