"""Excess chemical potential of the Lennard-Jones fluid by soft-core decoupling vs published EOS.

Independent references (implemented here from docs/references.md §9, autodiff in float64):
* Kolafa & Nezbeda 1994, Fluid Phase Equilib. 100, 1 (primary): βμ_ex = βA_res + Z − 1;
* Johnson, Zollweg & Gubbins 1993, Mol. Phys. 78, 591 (secondary, printed only).
Both describe the full, untruncated LJ potential; the tool's model truncates at r_c = 2.5σ and
adds the analytic tail inside the energy (docs/references.md §9e), so its μ_ex is for the full
potential too.

Finite size: the test runs N = 108 particles (NVT, ρ* = 0.3, T* = 2), where μ_ex differs from
the thermodynamic limit by O(1/N). We have no source for the size of that term at this state
point, so no allowance is added: the check is |βμ_ex − βμ_KN| ≤ max(0.1, 4σ) as the issue
specifies (0.1 kT), with σ the reported error, which must itself be below 0.1 kT so that the
check has some power. The file's own settings (1.5e5 evaluations, 16 chains) now reach the
route's zero-step limit (test-particle insertion with placements at the decoupled end, BAR with
deletion); the issue's target is σ ≤ 0.02 kT there, which the test also asserts. Measured on
2 shared cores: see ``benchmarks/bench_lj_decoupling.py`` and the README's LJ table.
"""
import math
import pathlib

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from fe_tool.systemfile import load_system

SYSTEMS = pathlib.Path(__file__).resolve().parent.parent / "systems"

# ---------------------------------------------------------------- Kolafa & Nezbeda 1994 (docs/references.md §9b)
KN_GAMMA = 1.92907278
KN_C = {  # C_ij: i = 2 × temperature exponent, j = density exponent
    0: {2: 2.01546797, 3: -28.17881636, 4: 28.28313847, 5: -10.42402873},
    -1: {2: -19.58371655, 3: 75.62340289, 4: -120.70586598, 5: 93.92740328, 6: -27.37737354},
    -2: {2: 29.34470520, 3: -112.35356937, 4: 170.64908980, 5: -123.06669187, 6: 34.42288969},
    -4: {2: -13.37031968, 3: 65.38059570, 4: -115.09233113, 5: 88.91973082, 6: -25.62099890},
}


def kn_residual_free_energy(temperature, density):
    """A_res/N (units of ε) of the full LJ fluid, Kolafa & Nezbeda 1994."""
    t, rho = temperature, density
    d = (-0.063920968 * jnp.log(t) + 0.011117524 / t - 0.076383859 / jnp.sqrt(t) + 1.080142248
         + 0.000693129 * jnp.sqrt(t))
    delta_b2 = (0.02459877 - 7.02181962 / t + 2.90616279 * t**-1.5 - 4.13749995 * t**-2 + 0.87361369 * t**-2.5
                + 0.43102052 * t**-3 - 0.58544978 * t**-3.5)
    eta = math.pi * rho * d**3 / 6.0
    beta_a_hs = (5.0 / 3.0) * jnp.log(1.0 - eta) + eta * (34.0 - 33.0 * eta + 4.0 * eta**2) / (6.0 * (1.0 - eta) ** 2)
    total = t * (beta_a_hs + rho * delta_b2 * jnp.exp(-KN_GAMMA * rho**2))
    for i, row in KN_C.items():
        for j, c in row.items():
            total = total + c * t ** (i / 2.0) * rho**j
    return total


# ---------------------------------------------------------------- JZG 1993 (docs/references.md §9c)
JZG_X = [None, 0.8623085097507421, 2.976218765822098, -8.402230115796038, 0.1054136629203555,
         -0.8564583828174598, 1.582759470107601, 0.7639421948305453, 1.753173414312048, 2.798291772190376e3,
         -4.8394220260857657e-2, 0.9963265197721935, -3.698000291272493e1, 2.084012299434647e1,
         8.305402124717285e1, -9.574799715203068e2, -1.477746229234994e2, 6.398607852471505e1,
         1.603993673294834e1, 6.805916615864377e1, -2.791293578795945e3, -6.245128304568454,
         -8.116836104958410e3, 1.488735559561229e1, -1.059346754655084e4, -1.131607632802822e2,
         -8.867771540418822e3, -3.986982844450543e1, -4.689270299917261e3, 2.593535277438717e2,
         -2.694523589434903e3, -7.218487631550215e2, 1.721802063863269e2]


def jzg_residual_free_energy(temperature, density):
    """A_res/N (units of ε) of the full LJ fluid, Johnson, Zollweg & Gubbins 1993 (MBWR, γ = 3)."""
    t, rho, x = temperature, density, JZG_X
    a = [None,
         x[1] * t + x[2] * jnp.sqrt(t) + x[3] + x[4] / t + x[5] / t**2,
         x[6] * t + x[7] + x[8] / t + x[9] / t**2,
         x[10] * t + x[11] + x[12] / t,
         x[13],
         x[14] / t + x[15] / t**2,
         x[16] / t,
         x[17] / t + x[18] / t**2,
         x[19] / t**2]
    b = [None,
         x[20] / t**2 + x[21] / t**3,
         x[22] / t**2 + x[23] / t**4,
         x[24] / t**2 + x[25] / t**3,
         x[26] / t**2 + x[27] / t**4,
         x[28] / t**2 + x[29] / t**3,
         x[30] / t**2 + x[31] / t**3 + x[32] / t**4]
    gamma = 3.0
    f = jnp.exp(-gamma * rho**2)
    g = [None, (1.0 - f) / (2.0 * gamma)]
    for i in range(2, 7):
        g.append(-(f * rho ** (2 * (i - 1)) - 2.0 * (i - 1) * g[i - 1]) / (2.0 * gamma))
    return sum(a[i] * rho**i / i for i in range(1, 9)) + sum(b[i] * g[i] for i in range(1, 7))


def beta_excess_chemical_potential(residual_free_energy, temperature, density):
    """βμ_ex = βA_res/N + Z − 1, with Z − 1 = ρ ∂(βA_res/N)/∂ρ (docs/references.md §9a)."""
    beta_a = lambda rho: residual_free_energy(temperature, rho) / temperature  # noqa: E731
    return float(beta_a(density) + density * jax.grad(beta_a)(density))


def test_equations_of_state_reproduce_the_published_check_values():
    # KN check values quoted in docs/references.md §9b (reproduced to 1e-7 relative there)
    u = lambda t, rho: kn_residual_free_energy(t, rho) - t * jax.grad(kn_residual_free_energy, 0)(t, rho)  # noqa: E731
    p = lambda t, rho: rho * t + rho**2 * jax.grad(kn_residual_free_energy, 1)(t, rho)  # noqa: E731
    assert float(u(1.3, 0.2)) == pytest.approx(-1.53715, abs=2e-5)
    assert float(u(1.3, 0.4)) == pytest.approx(-2.80602, abs=2e-5)
    assert float(p(1.3, 0.2)) == pytest.approx(0.121479, abs=2e-6)
    assert float(p(1.3, 0.4)) == pytest.approx(0.112533, abs=2e-6)
    # βμ_ex table of docs/references.md §9d (KN and JZG columns, 5 decimals)
    assert beta_excess_chemical_potential(kn_residual_free_energy, 2.0, 0.3) == pytest.approx(-0.48710, abs=1e-5)
    assert beta_excess_chemical_potential(kn_residual_free_energy, 2.0, 0.5) == pytest.approx(-0.28006, abs=1e-5)
    assert beta_excess_chemical_potential(jzg_residual_free_energy, 2.0, 0.3) == pytest.approx(-0.47184, abs=1e-5)


@pytest.mark.slow
def test_decoupling_gives_the_kolafa_nezbeda_excess_chemical_potential():
    system = load_system(SYSTEMS / "lj_fluid_decoupling.toml")  # 108 particles, r_c = 2.5σ, tail in the model
    temperature = system.kT
    density = system.particles["count"] / float(np.prod(system.particles["box"]))
    assert (temperature, system.particles["cutoff"]) == (2.0, 2.5) and density == pytest.approx(0.3, rel=1e-12)
    assert system.settings == {"chains": 8, "budget": 150_000}  # the test runs the file's own settings
    # the file's reference is ΔF = −μ_ex from the Kolafa–Nezbeda EOS
    reference_kn = beta_excess_chemical_potential(kn_residual_free_energy, temperature, density)
    assert system.reference["delta_f"] == pytest.approx(-reference_kn * temperature, abs=1e-4)
    result = system.estimate(seed=2, progress=False)
    beta_mu = -result.delta_f / system.kT  # μ_ex = −ΔF (A coupled, B decoupled)
    error = result.stderr / system.kT
    reference = beta_excess_chemical_potential(kn_residual_free_energy, temperature, density)
    second = beta_excess_chemical_potential(jzg_residual_free_energy, temperature, density)
    print(f"βμ_ex = {beta_mu:.4f} ± {error:.4f}; Kolafa–Nezbeda {reference:.5f}; JZG {second:.5f}; "
          f"{result.energy_evaluations:,} evaluations, {result.timings['total']:.0f} s")
    assert not result.flagged, result.summary()
    assert result.settings["switching_steps"] == 0   # insertion is the cheapest route at this dilute state
    assert error <= 0.02   # the measured target of the file's settings (issue: ±0.02 kT)
    assert abs(beta_mu - reference) <= max(0.1, 4 * error)
