"""Energy terms against hand calculations, finite differences and published reference values.

References (sources and verification status in docs/references.md):
* constants: CODATA 2018 / SI 2019 (Tiesinga et al., Rev. Mod. Phys. 93, 025010 (2021));
* LJ tail corrections: Allen & Tildesley, Computer Simulation of Liquids (1987);
  Frenkel & Smit, Understanding Molecular Simulation (2002) [mem for equation numbers];
* n-butane torsion: Ryckaert & Bellemans 1978, Faraday Discuss. Chem. Soc. 66, 95;
* Müller–Brown surface: Müller & Brown 1979, Theor. Chim. Acta 53, 75;
* soft core: Beutler, Mark, van Schaik, Gerber & van Gunsteren 1994, Chem. Phys. Lett. 222, 529.
"""
from __future__ import annotations

import functools
import json
import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from fe_tool import units
from fe_tool import energy as E

BUTANE_RB_KJ = np.array([9.28, 12.16, -13.12, -3.06, 26.24, -31.5])  # C0..C5, kJ/mol


def finite_difference_gradient(function, x, step=1e-6):
    """Central differences of a scalar function, all coordinates at once (one vmapped jit)."""
    x = jnp.asarray(x, dtype=jnp.float64)
    flat = x.reshape(-1)
    shifts = step * jnp.eye(flat.size)
    batch = jnp.concatenate([flat + shifts, flat - shifts]).reshape((2 * flat.size,) + x.shape)
    values = jax.jit(jax.vmap(function))(batch)
    return ((values[: flat.size] - values[flat.size:]) / (2 * step)).reshape(x.shape)


def assert_gradient_matches(function, x, rtol=1e-6, atol=1e-6):
    analytic = jax.jit(jax.grad(function))(jnp.asarray(x, dtype=jnp.float64))
    numeric = finite_difference_gradient(function, x)
    assert bool(jnp.all(jnp.isfinite(analytic)))
    np.testing.assert_allclose(analytic, numeric, rtol=rtol, atol=atol)


def jittered_lattice(n_side, density, key_seed=0, jitter=0.08):
    """A simple-cubic lattice of n_side³ particles at `density`, randomly displaced (no overlaps)."""
    n = n_side**3
    length = (n / density) ** (1.0 / 3.0)
    spacing = length / n_side
    grid = np.stack(np.meshgrid(*[np.arange(n_side)] * 3, indexing="ij"), -1).reshape(-1, 3)
    rng = np.random.default_rng(key_seed)
    positions = (grid + 0.5) * spacing + rng.normal(scale=jitter * spacing, size=(n, 3))
    return jnp.asarray(rng.permutation(positions)), length


# ---------------------------------------------------------------------------
# units


def test_thermal_energy_and_constants_codata_2018():
    # CODATA 2018; docs/references.md §2: kT(298.15 K) = 2.478957029602389 kJ/mol = 0.5924849497137640 kcal/mol.
    assert units.thermal_energy(298.15) == pytest.approx(2.478957029602389, abs=1e-12)
    assert units.thermal_energy(298.15, "kcal/mol") == pytest.approx(0.5924849497137640, abs=1e-13)
    assert units.thermal_energy(300.0) == pytest.approx(2.494338785445972, abs=1e-12)
    assert units.GAS_CONSTANT_J_PER_MOL_K == pytest.approx(8.31446261815324, abs=1e-14)
    assert units.GAS_CONSTANT_KJ_PER_MOL_K == pytest.approx(0.00831446261815324, abs=1e-17)
    # f = N_A e² / (4π ε0) with CODATA 2018 ε0, in kJ mol⁻¹ nm e⁻².
    assert units.COULOMB_CONSTANT_KJ_NM_PER_MOL_E2 == pytest.approx(138.935458, abs=1e-6)
    assert units.kcal_to_kj(1.0) == 4.184
    assert units.convert_energy(4.184, "kJ/mol", "kcal/mol") == pytest.approx(1.0, abs=1e-15)
    system = units.unit_system("kJ/mol-nm-K")
    assert system.kT(298.15) == units.thermal_energy(298.15)
    assert units.unit_system("reduced").kT(1.5) == 1.5
    assert json.loads(json.dumps(system.to_dict()))["name"] == "kJ/mol-nm-K"
    with pytest.raises(ValueError, match="unit system"):
        units.unit_system("kcal/angstrom")
    with pytest.raises(ValueError, match="energy unit"):
        units.thermal_energy(300.0, "eV")


# ---------------------------------------------------------------------------
# box


def test_minimum_image_and_wrapping_by_hand():
    box = jnp.array([10.0, 10.0, 4.0])
    # (9.5 - 0.5) = 9 -> -1 in x; (0.2 - 3.9) = -3.7 -> 0.3 in z.
    d = E.displacement(jnp.array([9.5, 5.0, 0.2]), jnp.array([0.5, 1.0, 3.9]), box)
    np.testing.assert_allclose(d, [-1.0, 4.0, 0.3], atol=1e-12)
    np.testing.assert_allclose(E.wrap_positions(jnp.array([[-0.5, 12.0, 4.0]]), box), [[9.5, 2.0, 0.0]])
    assert E.minimum_image(jnp.array([7.0, 0, 0]), None)[0] == 7.0  # open boundaries
    with pytest.raises(ValueError, match="half the shortest box edge"):
        E.check_cutoff(box, 2.5)
    with pytest.raises(ValueError, match="edge lengths"):
        E.as_box(jnp.ones(2))


# ---------------------------------------------------------------------------
# bonded


def test_harmonic_bond_and_angle_by_hand_and_gradient():
    x = jnp.array([[0.0, 0.0, 0.0], [0.15, 0.0, 0.0], [0.15, 0.2, 0.0]])
    bonds = jnp.array([[0, 1], [1, 2]])
    # ½·1000·(0.15−0.1)² + ½·500·(0.2−0.1)² = 1.25 + 2.5 = 3.75
    energy = E.harmonic_bond_energy(x, bonds, jnp.array([0.1, 0.1]), jnp.array([1000.0, 500.0]))
    assert float(energy) == pytest.approx(3.75, abs=1e-12)
    # The angle at particle 1 is 90°; ½·200·(π/2 − 1.9106)² with θ0 = 1.9106 rad (109.47°).
    angle = E.harmonic_angle_energy(x, jnp.array([[0, 1, 2]]), jnp.array([1.9106]), jnp.array([200.0]))
    assert float(angle) == pytest.approx(0.5 * 200.0 * (math.pi / 2 - 1.9106) ** 2, abs=1e-12)
    y = x + jnp.array([[0.01, -0.02, 0.03], [0.0, 0.01, -0.02], [0.02, 0.0, 0.01]])
    assert_gradient_matches(
        lambda p: E.harmonic_bond_energy(p, bonds, jnp.array([0.1, 0.1]), jnp.array([1000.0, 500.0]))
        + E.harmonic_angle_energy(p, jnp.array([[0, 1, 2]]), jnp.array([1.9106]), jnp.array([200.0])),
        y,
    )


def _torsion_positions(phi_degrees):
    """Four atoms with unit bonds, 90° bond angles and dihedral φ (IUPAC: 0 = cis, 180 = trans)."""
    phi = math.radians(phi_degrees)
    return jnp.array([[0.0, 1.0, 0.0], [0.0, 0.0, 0.0], [1.0, 0.0, 0.0],
                      [1.0, math.cos(phi), math.sin(phi)]])


def test_dihedral_angle_convention_and_degenerate_gradient():
    quad = jnp.array([[0, 1, 2, 3]])
    for phi in (0.0, 60.0, 90.0, -120.0, 180.0):
        got = math.degrees(float(E.dihedral_angles(_torsion_positions(phi), quad)[0]))
        assert (got - phi + 180.0) % 360.0 - 180.0 == pytest.approx(0.0, abs=1e-9)
    collinear = jnp.array([[0.0, 0, 0], [1.0, 0, 0], [2.0, 0, 0], [3.0, 0, 0]])
    grad = jax.grad(lambda p: E.ryckaert_bellemans_energy(p, quad, BUTANE_RB_KJ[None]))(collinear)
    assert bool(jnp.all(jnp.isfinite(grad)))


def test_periodic_torsion_by_hand_and_gradient():
    quad = jnp.array([[0, 1, 2, 3]])
    k, n, delta = jnp.array([[2.0, 1.0]]), jnp.array([[1.0, 3.0]]), jnp.array([[0.0, math.pi]])
    # φ = 90°: 2(1 + cos 90°) + 1(1 + cos(270° − 180°)) = 2 + 1 = 3
    energy = E.periodic_torsion_energy(_torsion_positions(90.0), quad, k, n, delta)
    assert float(energy) == pytest.approx(3.0, abs=1e-12)
    x = _torsion_positions(47.0) + 0.05 * jnp.sin(jnp.arange(12.0).reshape(4, 3))
    assert_gradient_matches(lambda p: E.periodic_torsion_energy(p, quad, k, n, delta), x)


def test_ryckaert_bellemans_butane_landmarks_and_gradient():
    # Ryckaert & Bellemans 1978; docs/references.md §10. Gauche by hand: cos ψ = −cos 60° = −0.5,
    # 9.28 − 12.16/2 − 13.12/4 + 3.06/8 + 26.24/16 + 31.5/32 = 2.926875 kJ/mol.
    quad = jnp.array([[0, 1, 2, 3]])
    coefficients = jnp.asarray(BUTANE_RB_KJ)[None]
    landmarks = {60.0: 2.926875, 180.0: 0.0, 0.0: 44.8, -60.0: 2.926875}
    for phi, value in landmarks.items():
        energy = E.ryckaert_bellemans_energy(_torsion_positions(phi), quad, coefficients)
        assert float(energy) == pytest.approx(value, abs=1e-9)
    barrier = E.ryckaert_bellemans_potential(jnp.radians(jnp.array([120.04])), coefficients)
    assert float(barrier[0]) == pytest.approx(12.353131, abs=2e-6)
    x = _torsion_positions(75.0) + 0.05 * jnp.cos(jnp.arange(12.0).reshape(4, 3))
    assert_gradient_matches(lambda p: E.ryckaert_bellemans_energy(p, quad, coefficients), x)


# ---------------------------------------------------------------------------
# nonbonded: hand values


def test_lennard_jones_pair_by_hand_mixing_and_shift():
    x = jnp.array([[0.0, 0.0, 0.0], [1.2, 0.0, 0.0]])
    unit = E.lennard_jones_parameters(jnp.ones(2), jnp.ones(2))
    # 4(1.2⁻¹² − 1.2⁻⁶) = −0.8909652875830762
    assert float(E.lennard_jones_energy(x, unit)) == pytest.approx(-0.8909652875830762, abs=1e-13)
    # shifted at r_c = 2.5: minus 4(2.5⁻¹² − 2.5⁻⁶) = −0.016316891136
    shifted = E.lennard_jones_energy(x, unit, cutoff=2.5, lj_shift=True)
    assert float(shifted) == pytest.approx(-0.8909652875830762 + 0.016316891136, abs=1e-12)
    assert float(E.lennard_jones_energy(x, unit, cutoff=1.1)) == 0.0  # beyond the cutoff
    # Lorentz–Berthelot: σ = (1 + 2)/2 = 1.5, ε = sqrt(1·4) = 2 at r = 2: 8(0.75¹² − 0.75⁶)
    y = jnp.array([[0.0, 0.0, 0.0], [2.0, 0.0, 0.0]])
    mixed = E.lennard_jones_parameters(jnp.array([1.0, 2.0]), jnp.array([1.0, 4.0]))
    assert float(E.lennard_jones_energy(y, mixed)) == pytest.approx(-1.170417308807373, abs=1e-13)
    table = E.lennard_jones_type_parameters(
        jnp.array([0, 1]), jnp.array([[1.0, 1.5], [1.5, 2.0]]), jnp.array([[1.0, 2.0], [2.0, 4.0]])
    )
    assert float(E.lennard_jones_energy(y, table)) == pytest.approx(-1.170417308807373, abs=1e-13)


def test_coulomb_and_reaction_field_by_hand():
    f = units.COULOMB_CONSTANT_KJ_NM_PER_MOL_E2
    x = jnp.array([[0.0, 0.0, 0.0], [0.5, 0.0, 0.0]])
    q = jnp.array([1.0, -1.0])
    assert float(E.coulomb_energy(x, q)) == pytest.approx(-f / 0.5, rel=1e-14)  # −277.87 kJ/mol
    # Conducting reaction field, r_c = 1: k_rf = 1/2, c_rf = 3/2 -> −f(1/0.5 + 0.125 − 1.5) = −0.625 f
    rf = E.coulomb_energy(x, q, cutoff=1.0, reaction_field_dielectric=math.inf)
    assert float(rf) == pytest.approx(-0.625 * f, rel=1e-14)
    # ε_rf = 78.5: k_rf = 77.5/158 = 0.490506..., c_rf = 1 + k_rf
    k_rf, c_rf = E.reaction_field_constants(1.0, 78.5)
    assert k_rf == pytest.approx(77.5 / 158.0) and c_rf == pytest.approx(1.0 + 77.5 / 158.0)
    # the reaction-field energy vanishes at the cutoff
    at_cutoff = jnp.array([[0.0, 0.0, 0.0], [1.0 - 1e-12, 0.0, 0.0]])
    assert abs(float(E.coulomb_energy(at_cutoff, q, cutoff=1.0, reaction_field_dielectric=78.5))) < 1e-8


def test_soft_core_by_hand_and_end_states():
    # U_sc(r=1, λ=0.5, σ=ε=1, α=0.5): d = 0.5·0.5 + 1 = 1.25 -> 4·0.5(1/1.5625 − 1/1.25) = −0.32
    value = E.soft_core_lennard_jones_pair_energy(1.0, 1.0, 1.0, 0.5, 0.5)
    assert float(value) == pytest.approx(-0.32, abs=1e-14)
    # finite at r = 0 for λ = 0.5: d = 0.25 -> 2(16 − 4) = 24
    assert float(E.soft_core_lennard_jones_pair_energy(0.0, 1.0, 1.0, 0.5, 0.5)) == pytest.approx(24.0)

    x, length = jittered_lattice(4, 0.5, key_seed=3)
    box = jnp.full(3, length)
    n = x.shape[0]
    alchemical = jnp.zeros(n, bool).at[0].set(True)
    charges = jnp.where(jnp.arange(n) % 2 == 0, 0.5, -0.5)
    settings = dict(box=box, cutoff=2.5, reaction_field_dielectric=math.inf)

    @jax.jit
    def energies(p):
        full = E.lennard_jones_parameters(jnp.ones(n), jnp.ones(n))
        rest = E.lennard_jones_parameters(jnp.ones(n - 1), jnp.ones(n - 1))
        return dict(
            plain=E.lennard_jones_energy(p, full, **settings),
            coupled=E.lennard_jones_energy(p, full, alchemical=alchemical, lj_coupling=1.0, **settings),
            decoupled=E.lennard_jones_energy(p, full, alchemical=alchemical, lj_coupling=0.0, **settings),
            rest=E.lennard_jones_energy(p[1:], rest, **settings),
            coulomb_off=E.coulomb_energy(p, charges, alchemical=alchemical, coulomb_scale=0.0, **settings),
            coulomb_rest=E.coulomb_energy(p[1:], charges[1:], **settings),
        )

    u = {k: float(v) for k, v in energies(x).items()}
    assert u["coupled"] == pytest.approx(u["plain"], rel=1e-13)
    # λ = 0: particle 0 no longer interacts with the rest; same as the system without it.
    assert u["decoupled"] == pytest.approx(u["rest"], rel=1e-13)
    # Coulomb scale 0 removes alchemical–environment electrostatics.
    coulomb_off, coulomb_rest = u["coulomb_off"], u["coulomb_rest"]
    assert coulomb_off == pytest.approx(coulomb_rest, rel=1e-12)


# ---------------------------------------------------------------------------
# nonbonded: gradients (positions and λ)


def test_nonbonded_gradients_match_finite_differences():
    x, length = jittered_lattice(3, 0.5, key_seed=1)
    box = jnp.full(3, length)
    n = x.shape[0]
    rng = np.random.default_rng(2)
    lj = E.lennard_jones_parameters(jnp.asarray(rng.uniform(0.9, 1.1, n)), jnp.asarray(rng.uniform(0.5, 1.5, n)))
    charges = jnp.asarray(rng.uniform(-0.5, 0.5, n))
    alchemical = jnp.zeros(n, bool).at[:2].set(True)
    exclusions = jnp.array([[0, 1], [2, 3]])
    settings = dict(lennard_jones=lj, charges=charges, box=box, cutoff=0.45 * length,
                    reaction_field_dielectric=78.5, coulomb_constant=1.0, alchemical=alchemical,
                    exclusions=exclusions, coulomb_soft_core_alpha=0.3)

    def energy(p, lam=0.6, scale=0.7):
        return E.nonbonded_energy(p, lj_coupling=lam, coulomb_scale=scale, **settings)

    assert_gradient_matches(energy, x, rtol=1e-6, atol=1e-6)
    # ∂U/∂λ_LJ (for thermodynamic integration) against a central difference.
    d_lambda = jax.jit(jax.grad(energy, argnums=1))(x, 0.6)
    compiled = jax.jit(energy)
    numeric = (compiled(x, 0.6 + 1e-6) - compiled(x, 0.6 - 1e-6)) / 2e-6
    assert float(d_lambda) == pytest.approx(float(numeric), rel=1e-6)


# ---------------------------------------------------------------------------
# neighbour lists


@pytest.fixture(scope="module")
def lj_fluid():
    """A random LJ fluid at ρ = 0.5: 343 particles on a jittered lattice, box edge 8.82σ."""
    x, length = jittered_lattice(7, 0.5, key_seed=5, jitter=0.15)
    n = x.shape[0]
    return x, jnp.full(3, length), E.lennard_jones_parameters(jnp.ones(n), jnp.ones(n))


@pytest.mark.parametrize("method", ["all_pairs", "cells"])
def test_neighbour_list_equals_all_pairs(lj_fluid, method):
    x, box, lj = lj_fluid
    n = x.shape[0]
    charges = jnp.where(jnp.arange(n) % 2 == 0, 0.3, -0.3)
    exclusions = jnp.stack([jnp.arange(0, n - 1, 2), jnp.arange(1, n, 2)], axis=1)  # "dimers"
    settings = dict(lennard_jones=lj, charges=charges, box=box, cutoff=2.5,
                    reaction_field_dielectric=math.inf, coulomb_constant=1.0)
    builder, neighbours = E.make_neighbour_list(x, box, 2.5, 0.3, exclusions=exclusions, method=method)
    assert (builder.cell_grid is not None) == (method == "cells")
    energy_and_force = jax.jit(jax.value_and_grad(
        lambda p, pairs: E.nonbonded_energy(p, pairs=pairs, **settings)))
    reference, grad_reference = energy_and_force(x, E.all_pairs(n, exclusions))
    listed, grad_listed = energy_and_force(x, neighbours)
    assert float(listed) == pytest.approx(float(reference), rel=1e-12)
    np.testing.assert_allclose(grad_listed, grad_reference, rtol=1e-10, atol=1e-10)
    # Unwrapped positions (shifted by box vectors) give the same energy: minimum image.
    shifted = x + box * jnp.asarray(np.random.default_rng(0).integers(-2, 3, x.shape))
    shifted_energy, _ = energy_and_force(shifted, jax.jit(lambda p: builder.build(p))(shifted))
    assert float(shifted_energy) == pytest.approx(float(reference), rel=1e-12)


def test_neighbour_list_overflow_is_detected(lj_fluid):
    x, box, lj = lj_fluid
    n = x.shape[0]
    too_small = E.neighbour_list_builder(n, box, 2.5, 0.3, capacity=500, method="cells")
    neighbours = jax.jit(lambda p: too_small.build(p))(x)
    assert bool(neighbours.overflow) and int(neighbours.pair_count) > 500
    energy = jax.jit(lambda p, pairs: E.lennard_jones_energy(p, lj, pairs=pairs, box=box, cutoff=2.5))
    assert math.isnan(float(energy(x, neighbours)))
    with pytest.raises(E.NeighbourListOverflowError, match="capacity is 500"):
        E.check_neighbour_list(neighbours)
    # A cell grid too small to hold the particles of one cell is also reported.
    crowded = E.neighbour_list_builder(n, box, 2.5, 0.3, capacity=20000, method="cells", cell_capacity=3)
    with pytest.raises(E.NeighbourListOverflowError, match="cell capacity is 3"):
        E.check_neighbour_list(jax.jit(lambda p: crowded.build(p))(x))
    # The cutoff may not exceed the one the list was built for.
    builder, ok = E.make_neighbour_list(x, box, 2.0, 0.3)
    with pytest.raises(ValueError, match="built for cutoff"):
        E.lennard_jones_energy(x, lj, pairs=ok, box=box, cutoff=2.5)


def test_neighbour_list_updates_inside_scan(lj_fluid):
    """Drift the fluid in a lax.scan, rebuilding when needed; energies equal all-pairs throughout."""
    x, box, lj = lj_fluid
    builder, neighbours = E.make_neighbour_list(x, box, 2.5, 0.3, capacity_factor=1.5, method="cells")
    velocities = jnp.asarray(np.random.default_rng(7).normal(size=x.shape))

    def step(carry, _):
        positions, neighbours = carry
        positions = positions + 0.02 * velocities
        neighbours = builder.update(positions, neighbours)
        energy = E.lennard_jones_energy(positions, lj, pairs=neighbours, box=box, cutoff=2.5)
        return (positions, neighbours), (positions, energy)

    (_, final), (trajectory, energies) = jax.jit(
        lambda c: jax.lax.scan(step, c, None, length=12))((x, neighbours))
    E.check_neighbour_list(final)
    assert int(final.rebuilds) >= 2  # 12 steps of up to ~0.07σ each exceed skin/2 = 0.15 repeatedly
    reference = jax.vmap(lambda p: E.lennard_jones_energy(p, lj, box=box, cutoff=2.5))(trajectory[::4])
    np.testing.assert_allclose(energies[::4], reference, rtol=1e-12)


# ---------------------------------------------------------------------------
# tail corrections


@pytest.mark.parametrize(
    "cutoff, density, u_tail, p_tail, mu_tail",
    [
        (2.5, 0.5, -0.26771655, -0.26735053, -0.53543310),
        (3.0, 0.8, -0.24811110, -0.39679617, -0.49622221),
    ],
)
def test_lj_tail_correction_reference_values(cutoff, density, u_tail, p_tail, mu_tail):
    # docs/references.md §9e, u_tail/N = (8/3)πρ[(1/3)r_c⁻⁹ − r_c⁻³]: Allen & Tildesley 1987;
    # Frenkel & Smit 2002 [mem for the equation numbers].
    assert E.lennard_jones_tail_energy_per_particle(density, cutoff) == pytest.approx(u_tail, abs=1e-8)
    assert E.lennard_jones_tail_pressure(density, cutoff) == pytest.approx(p_tail, abs=1e-8)
    assert E.lennard_jones_tail_chemical_potential(density, cutoff) == pytest.approx(mu_tail, abs=1e-8)
    # The mixture form with one type (N = 500 in V = N/ρ) agrees.
    n, volume = 500, 500 / density
    total = E.lennard_jones_mixture_tail_energy([n], [[1.0]], [[1.0]], volume, cutoff)
    assert float(total) / n == pytest.approx(u_tail, abs=1e-8)
    mu = E.lennard_jones_mixture_tail_chemical_potential([n], [[1.0]], [[1.0]], volume, cutoff)
    assert float(mu[0]) == pytest.approx(mu_tail, abs=1e-8)


def test_model_tail_correction_scales_with_coupling(lj_fluid):
    x, box, lj = lj_fluid
    n = x.shape[0]
    volume = float(jnp.prod(box))
    term = E.nonbonded_term(n, lennard_jones=lj, cutoff=2.5, alchemical=[0], tail_correction_box=box)
    model = E.assemble([term], box=box, units="reduced")
    u_tail = E.lennard_jones_tail_energy_per_particle(n / volume, 2.5)
    components = jax.jit(lambda p, lam: model.components(p, lj_coupling=lam))
    parts = components(x, 1.0)
    assert float(parts["nonbonded.lj_tail"]) == pytest.approx(n * u_tail, rel=1e-12)
    # Coupled − decoupled tail = μ_tail = 2 u_tail/N at the density of the N−1 environment particles.
    parts0 = components(x, 0.0)
    mu_tail = E.lennard_jones_tail_chemical_potential((n - 1) / volume, 2.5)
    difference = parts["nonbonded.lj_tail"] - parts0["nonbonded.lj_tail"]
    assert float(difference) == pytest.approx(mu_tail, rel=1e-12)
    halfway = components(x, 0.5)["nonbonded.lj_tail"]
    assert float(halfway - parts0["nonbonded.lj_tail"]) == pytest.approx(0.5 * mu_tail, rel=1e-12)


# ---------------------------------------------------------------------------
# restraints and fields


def test_restraints_by_hand_and_gradient():
    x = jnp.array([[1.0, 0.0, 0.0], [0.0, 2.0, 0.0], [0.0, 0.0, 0.5]])
    # harmonic: ½·10·(0.5² + 0.2²) for particle 0 at (1,0,0) vs reference (0.5,0,0.2) → 1.45
    harmonic = E.harmonic_position_restraint_energy(x, jnp.array([0]), jnp.array([[0.5, 0.0, 0.2]]), 10.0)
    assert float(harmonic) == pytest.approx(0.5 * 10 * (0.25 + 0.04), abs=1e-13)
    # flat bottom radius 1 around the origin: particle 1 at distance 2 → ½·4·(2 − 1)² = 2; particle 2 inside
    flat = E.flat_bottom_position_restraint_energy(x, jnp.array([1, 2]), jnp.zeros((2, 3)), 1.0, 4.0)
    assert float(flat) == pytest.approx(2.0, abs=1e-13)
    # distance |r0 − r1| = sqrt(5): harmonic to 2 with k = 3 → 1.5(√5 − 2)²; flat bottom [1, 3] → 0
    pairs = jnp.array([[0, 1]])
    harmonic_distance = E.distance_restraint_energy(x, pairs, jnp.array([2.0]), jnp.array([3.0]))
    assert float(harmonic_distance) == pytest.approx(1.5 * (math.sqrt(5) - 2) ** 2, abs=1e-13)
    assert float(E.flat_bottom_distance_restraint_energy(x, pairs, 1.0, 3.0, 3.0)) == 0.0
    # below the lower bound 2.5: ½·3·(2.5 − √5)²
    low = E.flat_bottom_distance_restraint_energy(x, pairs, 2.5, 3.0, 3.0)
    assert float(low) == pytest.approx(1.5 * (2.5 - math.sqrt(5)) ** 2, abs=1e-13)

    def total(p):
        return (E.harmonic_position_restraint_energy(p, jnp.array([0, 2]), jnp.zeros((2, 3)),
                                                     jnp.array([[1.0, 2.0, 3.0], [2.0, 2.0, 2.0]]))
                + E.flat_bottom_position_restraint_energy(p, jnp.array([1]), jnp.zeros((1, 3)), 1.0, 4.0)
                + E.flat_bottom_distance_restraint_energy(p, pairs, 2.5, 3.0, 3.0))

    assert_gradient_matches(total, x + 0.01)


def test_harmonic_and_double_well_fields():
    # ½[1·(1 − 0)² + 4·(−1 − 0.5)²] = ½(1 + 9) = 5
    assert float(E.harmonic_well_energy(jnp.array([1.0, -1.0]), jnp.array([0.0, 0.5]), jnp.array([1.0, 4.0]))) == 5.0
    # a(x₀² − b)² + t x₀ + ½k⊥x₁² = 2(0.25 − 1)² + 0.3·0.5 + ½·4·1 = 1.125 + 0.15 + 2 = 3.275
    value = E.double_well_energy(jnp.array([0.5, 1.0]), height=2.0, minimum_squared=1.0, tilt=0.3,
                                 transverse_stiffness=4.0)
    assert float(value) == pytest.approx(3.275, abs=1e-14)
    assert_gradient_matches(functools.partial(E.double_well_energy, height=2.0, tilt=0.3), jnp.array([0.3, -0.7]))


def test_mueller_brown_minimum():
    # Müller & Brown 1979; minimum MA from docs/references.md §8 (Newton's method, 10 digits).
    minimum = jnp.array([-0.5582236346, 1.4417258418])
    assert float(E.mueller_brown_energy(minimum)) == pytest.approx(-146.69951721, abs=1e-8)
    assert float(jnp.max(jnp.abs(jax.grad(E.mueller_brown_energy)(minimum)))) < 1e-6
    saddle = jnp.array([0.2124865820, 0.2929883251])
    assert float(E.mueller_brown_energy(saddle)) == pytest.approx(-72.24894011, abs=1e-7)
    batch = jnp.stack([minimum, saddle])
    np.testing.assert_allclose(E.mueller_brown_energy(batch), [-146.69951721, -72.24894011], atol=1e-7)
    assert_gradient_matches(E.mueller_brown_energy, jnp.array([-0.3, 0.9]), rtol=1e-6, atol=1e-5)


# ---------------------------------------------------------------------------
# model assembly


def test_bonded_exclusions_from_a_chain_and_a_ring():
    exclusions, pairs_14 = E.bonded_exclusions(np.array([[0, 1], [1, 2], [2, 3], [3, 4]]), 6)
    expected = {(0, 1), (1, 2), (2, 3), (3, 4), (0, 2), (1, 3), (2, 4), (0, 3), (1, 4)}
    assert {tuple(p) for p in exclusions.tolist()} == expected
    assert pairs_14.tolist() == [[0, 3], [1, 4]]
    # a 5-ring: every pair is within 2 bonds, so there are no 1-4 pairs
    ring = np.array([[0, 1], [1, 2], [2, 3], [3, 4], [4, 0]])
    ring_exclusions, ring_14 = E.bonded_exclusions(ring, 5)
    assert len(ring_exclusions) == 10 and len(ring_14) == 0


def test_assembled_butane_like_model_equals_sum_of_terms():
    """Four united atoms (bonds, angles, RB torsion, 1-4 pair) plus a charged probe particle."""
    n = 5
    x = jnp.array([[0.0, 0.15, 0.02], [0.0, 0.0, 0.0], [0.153, 0.0, 0.0], [0.16, 0.14, 0.05],
                   [0.5, 0.4, 0.3]])
    bonds = np.array([[0, 1], [1, 2], [2, 3]])
    exclusions, pairs_14 = E.bonded_exclusions(bonds, n)
    lj = E.lennard_jones_parameters(jnp.full(n, 0.39), jnp.full(n, 0.6))
    charges = jnp.array([0.1, -0.1, 0.1, -0.1, 0.4])
    sigma14, epsilon14, qq14 = E.scaled_pair_parameters(pairs_14, lj, charges, 0.5, 0.8333)
    terms = [
        E.HarmonicBonds(jnp.asarray(bonds), jnp.full(3, 0.153), jnp.full(3, 2e5)),
        E.HarmonicAngles(jnp.array([[0, 1, 2], [1, 2, 3]]), jnp.full(2, 1.95), jnp.full(2, 500.0)),
        E.RyckaertBellemansTorsions(jnp.array([[0, 1, 2, 3]]), jnp.asarray(BUTANE_RB_KJ)[None]),
        E.ScaledPairs(jnp.asarray(pairs_14), sigma14, epsilon14, qq14),
        E.nonbonded_term(n, lennard_jones=lj, charges=charges, exclusions=exclusions, alchemical=[4]),
        E.PositionRestraints(jnp.array([4]), jnp.array([[0.5, 0.4, 0.3]]), jnp.array([100.0])),
    ]
    model = E.assemble(terms)
    # (jit a closure: jax.jit hashes bound methods, and Modules holding arrays are unhashable)
    components = jax.jit(lambda p, lam, scale: model.components(p, lj_coupling=lam, coulomb_scale=scale))
    parts = components(x, 1.0, 1.0)
    assert set(parts) == {"bonds", "angles", "rb_torsions", "pairs_14", "nonbonded.lennard_jones",
                          "nonbonded.coulomb", "position_restraints"}
    # The probe (4) interacts with everything; within the chain only the 1-4 pair (0, 3) is non-excluded
    # and it is handled by ScaledPairs: hand-assemble the nonbonded part from pair functions.
    f = units.COULOMB_CONSTANT_KJ_NM_PER_MOL_E2
    r = jnp.linalg.norm(x[:4] - x[4], axis=1)
    lj_probe = jnp.sum(E.lennard_jones_pair_energy(r**2, 0.39, 0.6))
    coulomb_probe = jnp.sum(f * charges[:4] * 0.4 / r)
    assert float(parts["nonbonded.lennard_jones"]) == pytest.approx(float(lj_probe), rel=1e-12)
    assert float(parts["nonbonded.coulomb"]) == pytest.approx(float(coulomb_probe), rel=1e-12)
    r03 = float(jnp.linalg.norm(x[0] - x[3]))
    pair_14 = 4 * 0.3 * ((0.39 / r03) ** 12 - (0.39 / r03) ** 6) + 0.8333 * f * (0.1 * -0.1) / r03
    assert float(parts["pairs_14"]) == pytest.approx(pair_14, rel=1e-12)
    # Decoupling the probe leaves only intramolecular terms.
    off = components(x, 0.0, 0.0)
    assert float(off["nonbonded.lennard_jones"]) == 0.0 and float(off["nonbonded.coulomb"]) == 0.0
    alchemical = E.alchemical_energy_function(model)
    assert_gradient_matches(lambda p: alchemical(p, 0.4, 0.9), x, rtol=1e-5, atol=1e-4)
    # Compiled once, reused with new data (no retrace).
    traces = []

    def counted(p, lam):
        traces.append(1)
        return alchemical(p, lam, 1.0)

    compiled = jax.jit(counted)
    assert float(compiled(x, 1.0)) == pytest.approx(float(sum(parts.values())), rel=1e-14)
    compiled(x + 0.01, 0.7)
    assert len(traces) == 1


def test_assemble_rejects_structural_mistakes():
    n = 8
    lj = E.lennard_jones_parameters(jnp.ones(n), jnp.ones(n))
    with pytest.raises(ValueError, match="cutoff"):
        E.assemble([E.nonbonded_term(n, lennard_jones=lj)], box=jnp.full(3, 10.0))
    with pytest.raises(ValueError, match="distinct"):
        E.assemble([E.ExternalField(E.harmonic_well_energy), E.ExternalField(E.mueller_brown_energy)])
    with pytest.raises(ValueError, match="unshifted"):
        E.nonbonded_term(n, lennard_jones=lj, cutoff=2.5, lj_shift=True, tail_correction_box=10.0)
    model = E.assemble([E.ExternalField(E.mueller_brown_energy, name="mueller_brown")], dimension=2)
    assert float(model(jnp.array([-0.5582236346, 1.4417258418]))) == pytest.approx(-146.69951721, abs=1e-8)
