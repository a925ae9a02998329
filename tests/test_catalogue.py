"""The bundled catalogue (systems/): descriptions, and the angle-opening file against its own quadrature.

Independent references, each named beside its check:
- the volume element of two bond vectors u, v from a central site, d³u d³v = u² du dΩ_u · v² dv sinθ dθ dψ
  with θ the angle between them (spherical coordinates of v about the axis u; Frenkel & Smit 2002,
  Understanding Molecular Simulation, 2nd ed., Academic Press, where bond angles of a chain are drawn with
  the weight sinθ) (from memory);
- the molar gas constant R = N_A k_B = 8.314462618… J mol⁻¹ K⁻¹, exact since the 2019 SI
  (Tiesinga, Mohr, Newell & Taylor 2021, Rev. Mod. Phys. 93, 025010).
"""
import math

import numpy as np
import pytest
from scipy.integrate import quad

from fe_tool.systemfile import first_sentence, list_systems, load_system

R_KJ_PER_MOL_K = 6.02214076e23 * 1.380649e-23 / 1000.0   # SI 2019 exact N_A and k_B


def test_every_catalogue_description_is_two_to_four_lines_and_names_its_cost():
    systems = list_systems()
    assert len(systems) >= 10
    for path in systems:
        description = load_system(path).description.strip()
        lines = description.splitlines()
        assert 2 <= len(lines) <= 4, (path.name, len(lines))
        assert "Cost" in description or "cost" in description, path.name
        assert len(first_sentence(description)) >= 20, path.name


def test_first_sentence_never_cuts_a_citation_or_an_abbreviation():
    # the catalogue's descriptions cite journals with abbreviations inside parentheses
    text = ("A well (Müller & Brown 1979, Theor. Chim. Acta 53, 75) scaled by 0.03.\nReference: quadrature.")
    assert first_sentence(text) == "A well (Müller & Brown 1979, Theor. Chim. Acta 53, 75) scaled by 0.03."
    assert first_sentence("Scaled as in e.g. Beutler et al. 1994. Next.") == "Scaled as in e.g. Beutler et al. 1994."


def _angle_opening_delta_f(kT: float, angle_a: float, k_a: float, angle_b: float, k_b: float) -> float:
    """ΔF = −kT ln[∫ sinθ e^(−V_B/kT) dθ / ∫ sinθ e^(−V_A/kT) dθ], V = ½ k (θ − θ₀)², θ in [0, π].

    For three sites with bonds (0, 1), (1, 2) and one angle at site 1, the configuration integral
    factorises (volume element in the module docstring) into translation × orientation × bond integrals
    × ∫ sinθ e^(−V(θ)/kT) dθ; only the last differs between A and B.
    """
    def z(angle_degrees, k):
        centre = math.radians(angle_degrees)
        value, error = quad(lambda t: math.sin(t) * math.exp(-0.5 * k * (t - centre) ** 2 / kT), 0.0, math.pi,
                            points=[centre], epsabs=0.0, epsrel=1e-12, limit=200)
        assert error < 1e-10 * value
        return value

    return -kT * math.log(z(angle_b, k_b) / z(angle_a, k_a))


def test_angle_opening_reference_is_the_quadrature():
    system = load_system(next(p for p in list_systems() if p.stem == "angle_opening"))
    kT = R_KJ_PER_MOL_K * 300.0
    assert system.kT == pytest.approx(kT, rel=1e-13)
    exact = _angle_opening_delta_f(kT, 109.5, 400.0, 120.0, 100.0)
    assert system.reference["delta_f"] == pytest.approx(exact, abs=1e-9)
    # the file's start has the bond lengths and the A angle it claims (so the energy is near its minimum)
    x = system.start_a
    u, v = x[0] - x[1], x[2] - x[1]
    assert np.linalg.norm(u) == pytest.approx(0.15, abs=1e-6) and np.linalg.norm(v) == pytest.approx(0.15, abs=1e-6)
    assert math.degrees(math.acos(u @ v / np.linalg.norm(u) / np.linalg.norm(v))) == pytest.approx(109.5, abs=1e-4)
    assert float(system.energy_a(x)) == pytest.approx(0.0, abs=1e-6)


def test_angle_opening_runs_through_the_tool_to_its_quadrature():
    system = load_system(next(p for p in list_systems() if p.stem == "angle_opening"))
    exact = _angle_opening_delta_f(system.kT, 109.5, 400.0, 120.0, 100.0)
    result = system.estimate(seed=3, progress=False)   # the file's own settings: budget 1e5, no learned control
    assert result.settings["system"] == "angle-opening"
    # 4σ of the reported error plus the quadrature's own error (< 1e-9 kJ/mol); a miss is a 1-in-15,000 event
    # for a Gaussian estimate with a correct error bar
    assert abs(result.delta_f - exact) <= 4.0 * result.stderr + 1e-9, (result.delta_f, result.stderr, exact)
    assert 0.0 < result.stderr < 0.3   # the budget buys an error bar well below the effect (|ΔF| ≈ 1.5 kJ/mol)
