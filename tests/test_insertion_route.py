"""Zero switching steps (test-particle insertion) and kinetic switching in the switching route.

Independent reference: two Lennard-Jones particles in a periodic cube of edge L with a cutoff
r_c < L/2 and no tail. With A coupled and B decoupled, Z_B = V² and
Z_A = V ∫ e^{−u(r)/kT} d³r over the minimum-image cell, so

    ΔF / kT = ln[ (V − 4π r_c³/3 + ∫_0^{r_c} 4π r² e^{−u(r)/kT} dr) / V ],

the textbook second-virial-type configuration integral (e.g. McQuarrie 2000, *Statistical
Mechanics*, ch. 12 — from memory), evaluated here by scipy quadrature.
"""
import math

import numpy as np
import pytest
from scipy.integrate import quad

from fe_tool.routes import insertion
from fe_tool.systemfile import parse_system

EDGE, CUTOFF, KT = 3.2, 1.5, 1.0


def _pair_system(**settings) -> dict:
    return {
        "name": "lj-pair", "units": "reduced", "kT": KT,
        "particles": {"types": ["LJ", "LJ"], "positions": [[0.5, 0.5, 0.5], [1.7, 0.6, 0.4]]},
        "box": {"edges": [EDGE] * 3},
        "types": {"LJ": {"sigma": 1.0, "epsilon": 1.0}},
        "nonbonded": {"cutoff": CUTOFF, "shift": False},
        "change": {"decouple": [0]},
        "settings": {"chains": 8, **settings},
    }


def _exact_delta_f() -> float:
    def boltzmann_shell(r):
        u = 4.0 * (r**-12 - r**-6)
        return 4.0 * math.pi * r * r * math.exp(-u / KT)

    inner, _ = quad(boltzmann_shell, 0.5, CUTOFF, limit=200)  # e^{−u/kT} < 1e-1700 below r = 0.5
    volume = EDGE**3
    return KT * math.log((volume - 4.0 * math.pi * CUTOFF**3 / 3.0 + inner) / volume)


def test_a_decoupled_single_particle_may_be_placed_anew():
    system = parse_system(_pair_system())
    assert insertion.can_redraw(system.path)
    assert insertion.redraw_count(system.path, evaluations_per_sample=10.0) >= insertion.REDRAWS[0]


def test_insertion_is_chosen_and_matches_the_configuration_integral():
    system = parse_system(_pair_system())
    exact = _exact_delta_f()
    result = system.estimate(seed=3, budget=40_000, progress=False)
    assert result.settings["switching_steps"] == 0, result.summary()
    assert result.settings["placements_per_sample"] >= 1  # here one placement costs two full evaluations (1 pair of 1)
    assert not result.flagged, result.summary()
    assert result.energy_evaluations <= 40_000
    # 4σ of the reported (chain-jackknife) error; a 1e-3 kT floor covers the quadrature
    assert abs(result.delta_f - exact) < 4 * result.stderr + 1e-3, (result.delta_f, result.stderr, exact)


def test_kinetic_switching_in_the_route_matches_the_configuration_integral():
    system = parse_system(_pair_system())
    exact = _exact_delta_f()
    result = system.estimate(seed=4, budget=60_000, switching_steps=6, progress=False)
    assert result.settings["switching_steps"] == 6
    assert result.diagnostics["switching_dynamics"].startswith("kinetic")
    assert result.energy_evaluations <= 60_000
    assert abs(result.delta_f - exact) < 4 * result.stderr + 1e-3, (result.delta_f, result.stderr, exact)


def test_zero_step_choice_needs_overlap_and_a_reliable_estimate():
    from fe_tool.estimators import bar, work_overlap

    rng = np.random.default_rng(0)
    good = {"bar": bar(rng.normal(1.0, 0.5, 500), rng.normal(-0.9, 0.5, 500))}
    assert insertion.zero_step_suffices(good, 0.8)[0]
    assert not insertion.zero_step_suffices(good, 0.01)[0]  # below the caution level: switching instead
    wf, wr = rng.normal(30.0, 0.5, 50), rng.normal(25.0, 0.5, 50)  # dense-fluid-like: no shared works
    far = {"bar": bar(wf, wr)}
    assert not insertion.zero_step_suffices(far, work_overlap(wf, wr, far["bar"].delta_f))[0]
