"""Particle system files, alchemical paths, and the Müller–Brown and torsion catalogue references.

Independent references, each named beside its check:
* end states of the soft-core path: the same energy terms evaluated directly, without a path
  (the decoupled state is the environment alone plus a free particle);
* Müller–Brown: Müller & Brown 1979, Theor. Chim. Acta 53, 75 (surface parameters), ΔF by
  scipy 2-D quadrature recomputed here;
* torsion change: Ryckaert & Bellemans 1978, Faraday Discuss. Chem. Soc. 66, 95 (coefficients),
  ΔF by scipy 1-D quadrature over the dihedral recomputed here (exact by separability, see the
  system file's description).
Statistical checks use |estimate − reference| ≤ max(0.1 kT, 4σ) with σ the reported error.
"""
import copy
import math
import pathlib

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.integrate import dblquad, quad

from fe_tool.alchemy import ParameterInterpolationPath, SoftCoreDecouplingPath, stage_couplings
from fe_tool.energy import (
    PositionRestraints,
    RyckaertBellemansTorsions,
    assemble,
    lennard_jones_parameters,
    nonbonded_term,
)
from fe_tool.energy.bonded import dihedral_angles
from fe_tool.systemfile import SystemFileError, load_system, parse_system
from nested_edit import edited

SYSTEMS = pathlib.Path(__file__).resolve().parent.parent / "systems"
GAS_CONSTANT_KJ = 0.00831446261815324  # CODATA 2018 R in kJ/(mol K) (docs/references.md §2)


def _fluid(n=12, edge=4.0, seed=3):
    rng = np.random.default_rng(seed)
    grid = np.stack(np.meshgrid(*[np.arange(3)] * 3, indexing="ij"), -1).reshape(-1, 3)[:n]
    return (grid + 0.5) * edge / 3 + 0.05 * rng.normal(size=(n, 3))


def _charged_model(x, alchemical, edge=4.0):
    n = len(x)
    sigma = np.where(np.arange(n) % 2 == 0, 1.0, 0.9)
    charges = np.where(np.arange(n) % 2 == 0, 0.4, -0.4)
    lj = lennard_jones_parameters(sigma, np.ones(n))
    term = nonbonded_term(n, lennard_jones=lj, charges=charges, cutoff=1.9, reaction_field_dielectric=20.0,
                          alchemical=alchemical, units="reduced", tail_correction_box=edge)
    return assemble([term], box=edge, units="reduced")


def test_soft_core_path_end_states_equal_the_plain_end_energies():
    x = jnp.asarray(_fluid())
    kT = 1.7
    path = SoftCoreDecouplingPath(_charged_model(x, alchemical=[0]), kT=kT)
    energy = jax.jit(lambda y, lam: path.energy(y, lam))
    # A: the fully coupled energy of the same terms without any alchemical machinery
    coupled = float(_charged_model(x, alchemical=None).energy(x))
    assert float(energy(x, jnp.asarray(0.0))) * kT == pytest.approx(coupled, rel=1e-12, abs=1e-12)
    # B: particle 0 free; the rest interact as a system of n − 1 particles in the same box
    # (its tail correction is that of the environment alone)
    n = len(x)
    rest = x[1:]
    sigma = np.where(np.arange(1, n) % 2 == 0, 1.0, 0.9)
    charges = np.where(np.arange(1, n) % 2 == 0, 0.4, -0.4)
    term = nonbonded_term(n - 1, lennard_jones=lennard_jones_parameters(sigma, np.ones(n - 1)), charges=charges,
                          cutoff=1.9, reaction_field_dielectric=20.0, units="reduced", tail_correction_box=4.0)
    environment = float(assemble([term], box=4.0, units="reduced").energy(rest))
    # the model's tail uses the textbook N² convention (Allen & Tildesley 1987; docs/references.md §9e), which
    # counts the particle's own self term (2π/V)∫u₀₀r²dr in both end states; it is a constant and cancels in ΔF
    rc, volume = 1.9, 64.0
    environment += 2 * math.pi / volume * 4.0 * (rc**-9 / 9.0 - rc**-3 / 3.0)
    assert float(energy(x, jnp.asarray(1.0))) * kT == pytest.approx(environment, rel=1e-12, abs=1e-12)
    # B does not depend on where the decoupled particle is, even on top of another one
    moved = x.at[0].set(x[1] + 1e-3)
    assert float(energy(moved, jnp.asarray(1.0))) * kT == pytest.approx(environment, rel=1e-12)


def test_soft_core_removes_the_overlap_singularity_before_the_decoupled_end():
    x = jnp.asarray(_fluid())
    path = SoftCoreDecouplingPath(_charged_model(x, alchemical=[0]), kT=1.0)
    overlapping = x.at[0].set(x[1] + 1e-4)
    energy_and_grad = jax.jit(lambda y, lam: path.energy_and_grad(y, lam))
    for lam in (0.6, 0.9, 0.99):  # LJ stage, charges already off (s = 0.5)
        u, g = energy_and_grad(overlapping, jnp.asarray(lam))
        assert np.isfinite(float(u)) and np.all(np.isfinite(np.asarray(g)))
    # the coupled end keeps the r⁻¹² wall
    assert float(energy_and_grad(overlapping, jnp.asarray(0.0))[0]) > 1e12


def test_staged_path_is_continuous_and_smooth_at_the_joint():
    x = jnp.asarray(_fluid())
    path = SoftCoreDecouplingPath(_charged_model(x, alchemical=[0]), kT=1.0)
    assert path.electrostatics_share == 0.5  # chosen because the particle and its environment are charged
    coulomb, lj = stage_couplings(jnp.asarray(0.5), 0.5)
    assert float(coulomb) == 0.0 and float(lj) == 1.0
    energy = jax.jit(lambda y, lam: path.energy(y, lam))
    lams = jnp.linspace(0.0, 1.0, 2001)
    u = np.asarray(jax.jit(jax.vmap(lambda lam: path.energy(x, lam)))(lams))
    assert np.all(np.isfinite(u))
    assert np.max(np.abs(np.diff(u))) < 0.05 * (np.max(u) - np.min(u))  # no jumps
    # C¹ at the joint: one-sided derivatives agree (both vanish for the smooth stage shape)
    h = 1e-6
    left = (energy(x, jnp.asarray(0.5)) - energy(x, jnp.asarray(0.5 - h))) / h
    right = (energy(x, jnp.asarray(0.5 + h)) - energy(x, jnp.asarray(0.5))) / h
    assert abs(float(left)) < 1e-3 and abs(float(right)) < 1e-3
    linear = SoftCoreDecouplingPath(_charged_model(x, alchemical=[0]), kT=1.0, stage_shape="linear")
    du = jax.jit(jax.vmap(lambda lam: linear.lambda_derivative(x, lam)))(jnp.asarray([0.25, 0.75]))
    assert np.all(np.isfinite(np.asarray(du)))


def test_neighbour_list_inside_the_energy_matches_all_pairs():
    x = jnp.asarray(_fluid(n=27, edge=6.0))
    n = len(x)
    term = nonbonded_term(n, lennard_jones=lennard_jones_parameters(np.ones(n), np.ones(n)), cutoff=2.5,
                          alchemical=[0], units="reduced", tail_correction_box=6.0)
    model = assemble([term], box=6.0, units="reduced")
    dense = SoftCoreDecouplingPath(model, kT=2.0)
    listed = SoftCoreDecouplingPath(model, kT=2.0, pair_search="neighbour_list", reference_positions=x)
    dense_fn = jax.jit(lambda y, lam: dense.energy_and_grad(y, lam))
    listed_fn = jax.jit(lambda y, lam: listed.energy_and_grad(y, lam))
    for lam in (0.0, 0.4, 1.0):
        a, ga = dense_fn(x, jnp.asarray(lam))
        b, gb = listed_fn(x, jnp.asarray(lam))
        assert float(a) == pytest.approx(float(b), rel=1e-12)
        np.testing.assert_allclose(np.asarray(ga), np.asarray(gb), rtol=1e-10, atol=1e-12)
    tiny = SoftCoreDecouplingPath(model, kT=2.0, pair_search="neighbour_list", neighbour_capacity=5)
    # overflow → NaN energy, which the workflow reports as a diverged trajectory
    assert np.isnan(float(jax.jit(lambda y, lam: tiny.energy(y, lam))(x, jnp.asarray(0.3))))


def test_parameter_path_for_linear_parameters_is_linear_mixing_and_releases_restraints():
    x = jnp.asarray(_fluid(n=4, edge=3.0))
    torsion = jnp.asarray([[0, 1, 2, 3]])
    c = jnp.asarray([9.28, 12.16, -13.12, -3.06, 26.24, -31.5])
    term_a = RyckaertBellemansTorsions(torsions=torsion, coefficients=c, name="t")
    term_b = RyckaertBellemansTorsions(torsions=torsion, coefficients=0.5 * c, name="t")
    restraint = PositionRestraints(indices=jnp.asarray([0]), reference=x[:1] + 0.1, force_constants=jnp.asarray([50.0]),
                                   name="anchor")
    path = ParameterInterpolationPath(changed_a=[term_a], changed_b=[term_b], only_a=[restraint], kT=2.0)
    u_a = (term_a(x) + restraint(x)) / 2.0
    u_b = term_b(x) / 2.0
    for lam in (0.0, 0.3, 1.0):
        assert float(path.energy(x, jnp.asarray(lam))) == pytest.approx(float((1 - lam) * u_a + lam * u_b), rel=1e-12)


# ------------------------------------------------------------------ the file format

PROBE = {
    "units": "kJ/mol", "temperature": 300.0,
    "particles": {"types": ["P", "S", "S", "S"],
                  "positions": [[0.5, 0.5, 0.5], [0.9, 0.5, 0.5], [0.5, 0.9, 0.5], [0.5, 0.5, 0.9]]},
    "box": {"edges": [1.6, 1.6, 1.6]},
    "types": {"P": {"sigma": 0.3, "epsilon": 1.0, "charge": 0.5}, "S": {"sigma": 0.3, "epsilon": 0.8, "charge": -0.1}},
    "nonbonded": {"cutoff": 0.7, "tail_correction": True, "reaction_field": {"outer_permittivity": 78.0}},
    "topology": {"torsions": [{"name": "t", "atoms": [[0, 1, 2, 3]], "form": "periodic",
                               "force_constants": [2.0], "multiplicities": [3], "phases": [0.0]}]},
    "restraints": [{"name": "anchor", "form": "position", "atoms": [0], "force_constant": 500.0, "state": "a"}],
    "change": {"decouple": [0], "parameters": [{"group": "t", "force_constants": [1.0]}]},
}


def _edit(keys, value):
    return edited(PROBE, keys, value)


def test_probe_file_builds_the_staged_path_with_explicit_units():
    system = parse_system(copy.deepcopy(PROBE))
    assert system.unit_system == "kJ/mol-nm-K" and system.units == "kJ/mol"
    assert system.kT == pytest.approx(GAS_CONSTANT_KJ * 300.0, rel=1e-14)
    assert system.path.electrostatics_share == 0.5
    assert system.particles["released"] == ["anchor"] and system.particles["changed"] == ["t"]
    x = jnp.asarray(system.start_a)
    assert np.isfinite(float(jax.jit(system.energy_a)(x))) and np.isfinite(float(jax.jit(system.energy_b)(x)))


@pytest.mark.parametrize("keys, value, message", [
    (("units",), KeyError, "units"),
    (("units",), "kJ/mol-nm", "units"),
    (("particles", "positions"), [[0.0, 0.0]], "particles.positions"),
    (("particles", "bogus"), 1, "particles: unknown key"),
    (("types", "S"), KeyError, "types.S"),
    (("types", "P", "sigma"), -0.3, "types.P.sigma"),
    (("box", "edges"), [1.6, -1.0, 1.6], "box.edges"),
    (("nonbonded", "cutoff"), 0.9, "nonbonded.cutoff"),
    (("nonbonded", "pair_search"), "cells", "nonbonded.pair_search"),
    (("change", "decouple"), [7], "change.decouple"),
    (("change", "electrostatics_share"), 1.5, "change.electrostatics_share"),
    (("change", "parameters"), [{"group": "nope", "force_constants": [1.0]}], "change.parameters[0].group"),
    (("change", "parameters"), [{"group": "t", "force_constants": [1.0, 2.0]}], "change.parameters[0]"),
    (("change", "parameters"), [{"group": "t", "atoms": [[0, 1, 2, 3]]}], "change.parameters[0].atoms"),
    (("change", "swap"), [1], "change: unknown key"),
    (("topology", "torsions"), [{"atoms": [[0, 1, 2, 3]], "form": "fourier"}], "topology.torsions[0].form"),
    (("topology", "torsions"), [{"atoms": [[0, 1, 2, 2]], "form": "ryckaert_bellemans",
                                 "coefficients": [1.0]}], "topology.torsions[0].atoms"),
    (("restraints",), [{"form": "position", "atoms": [0], "force_constant": -1.0}], "restraints[0].force_constant"),
    (("restraints",), [{"form": "position", "atoms": [0], "force_constant": 1.0, "state": "c"}], "restraints[0].state"),
    (("temperature",), KeyError, "top level.temperature"),
])
def test_malformed_particle_files_name_the_key(keys, value, message):
    with pytest.raises(SystemFileError, match=message.replace(".", r"\.").replace("[", r"\[").replace("]", r"\]")):
        parse_system(_edit(keys, value))


def test_tail_correction_with_shift_and_missing_xyz_are_refused(tmp_path):
    data = _edit(("nonbonded", "shift"), True)
    with pytest.raises(SystemFileError, match=r"nonbonded\.tail_correction"):
        parse_system(data)
    data = copy.deepcopy(PROBE)
    data["particles"] = {"file": "missing.xyz"}
    with pytest.raises(SystemFileError, match=r"particles\.file"):
        parse_system(data, source=str(tmp_path / "x.toml"))


def test_xyz_positions_and_catalogue_files_parse():
    for name in ("lj_fluid_decoupling", "lj_fluid_decoupling_256", "demo_charged_probe", "butane_torsion",
                 "mueller_brown"):
        system = load_system(SYSTEMS / f"{name}.toml")
        assert system.start_a.shape == system.start_b.shape
    for name, count in (("lj_fluid_decoupling", 108), ("lj_fluid_decoupling_256", 256)):
        lj = load_system(SYSTEMS / f"{name}.toml")
        assert lj.unit_system == "reduced" and lj.particles["tail_correction"] and lj.start_a.shape == (count, 3)
        # ρ* = 0.3, the state point of the reference (Kolafa & Nezbeda 1994; docs/references.md §9d)
        assert count / np.prod(lj.particles["box"]) == pytest.approx(0.3, rel=1e-12)


# ------------------------------------------------------------------ catalogue references reproduced

def _mueller_brown_reference(scale, stiffness):
    # Müller & Brown 1979, Theor. Chim. Acta 53, 75, footnote 7 (docs/references.md §8)
    A = [-200.0, -100.0, -170.0, 15.0]
    a = [-1.0, -1.0, -6.5, 0.7]
    b = [0.0, 0.0, 11.0, 0.6]
    c = [-10.0, -10.0, -6.5, 0.7]
    x0 = [1.0, 0.0, -0.5, -1.0]
    y0 = [0.0, 0.5, 1.5, 1.0]

    def v(x, y):
        return scale * sum(A[k] * math.exp(min(a[k] * (x - x0[k]) ** 2 + b[k] * (x - x0[k]) * (y - y0[k])
                                               + c[k] * (y - y0[k]) ** 2, 700.0)) for k in range(4))

    z, _ = dblquad(lambda y, x: math.exp(-v(x, y)), -5.0, 4.0, -4.0, 6.0, epsabs=1e-12, epsrel=1e-11)
    return -math.log(z / (2.0 * math.pi / stiffness))


def test_mueller_brown_reference_is_reproduced():
    system = load_system(SYSTEMS / "mueller_brown.toml")
    reference = _mueller_brown_reference(0.03, 8.0)  # scipy dblquad, recomputed here
    assert system.reference["delta_f"] == pytest.approx(reference, abs=1e-8)
    result = system.estimate(seed=3, progress=False)  # the file's settings: basin starts, 3e6 evaluations
    assert not result.flagged, result.warnings
    assert result.stderr < 0.1
    assert abs(result.delta_f - reference) <= max(0.1, 4 * result.stderr)


def _torsion_free_energy(coefficients, kT):
    # Ryckaert & Bellemans 1978 form, V(φ) = Σ C_n (−cos φ)^n, uniform measure in φ (docs/references.md §10)
    def v(phi):
        return sum(cn * (-math.cos(phi)) ** n for n, cn in enumerate(coefficients))

    z, _ = quad(lambda phi: math.exp(-v(phi) / kT), -math.pi, math.pi, epsabs=1e-14, epsrel=1e-13, limit=200)
    return -kT * math.log(z)


def test_butane_torsion_reference_is_reproduced():
    """Full Ryckaert–Bellemans barrier (≈ 5 kT) in A, ½ of it in B, at the file's settings."""
    system = load_system(SYSTEMS / "butane_torsion.toml")
    kT = GAS_CONSTANT_KJ * 300.0
    full = [9.28, 12.16, -13.12, -3.06, 26.24, -31.5]  # Ryckaert & Bellemans 1978, Faraday Discuss. 66, 95 (kJ/mol)
    # reference: scipy.integrate.quad over the dihedral, recomputed here (exact by separability)
    reference = _torsion_free_energy([0.5 * c for c in full], kT) - _torsion_free_energy(full, kT)
    assert system.reference["delta_f"] == pytest.approx(reference, abs=1e-9)
    assert system.starts is not None and system.starts.shape == (3, 4, 3)  # trans, gauche−, gauche+
    phi = np.degrees(np.asarray(jax.vmap(lambda x: dihedral_angles(x, jnp.asarray([[0, 1, 2, 3]]))[0])(
        jnp.asarray(system.starts))))
    np.testing.assert_allclose(np.abs(phi), [180.0, 60.0, 60.0], atol=1e-3)  # coordinates given to 1e-6 nm
    assert np.sign(phi[1]) != np.sign(phi[2])
    result = system.estimate(seed=5, progress=False)
    assert result.units == "kJ/mol"
    assert not result.flagged
    sampling_a = result.diagnostics["sampling_a"]
    assert sampling_a["equilibrated"]
    # the trans/gauche hops are the slow mode: ∂u/∂λ sees them, the energy does not
    assert sampling_a["autocorrelation_times"]["du_dlambda"] > 2 * sampling_a["autocorrelation_times"]["energy"]
    assert result.stderr < 0.1 * kT
    assert abs(result.delta_f - reference) <= max(0.1 * kT, 4 * result.stderr)


def test_start_sets_in_particle_files_are_checked():
    good = [[[0.5, 0.5, 0.5], [0.9, 0.5, 0.5], [0.5, 0.9, 0.5], [0.5, 0.5, 0.9]]] * 2
    system = parse_system(_edit(("particles", "starts"), good))
    assert system.starts.shape == (2, 4, 3)
    assert parse_system(copy.deepcopy(PROBE)).starts is None
    for bad in ([], good[0], [[[0.5, 0.5, 0.5]] * 3] * 2, [[["x", 0.5, 0.5]] * 4]):
        with pytest.raises(SystemFileError, match=r"particles\.starts: expected a list of start configurations"):
            parse_system(_edit(("particles", "starts"), bad))


def test_selfcheck_includes_the_quick_catalogue_case():
    from fe_tool.validation import catalogue_cases

    quick = catalogue_cases()
    assert [c.name for c in quick] == ["catalogue: mueller_brown"]
    names = {c.name for c in catalogue_cases(include_slow=True)}
    assert {"catalogue: butane_torsion", "catalogue: lj_fluid_decoupling"} <= names
    assert "catalogue: lj_fluid_decoupling_256" not in names  # benchmark size, not part of the self-check
