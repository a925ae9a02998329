"""estimate(): accuracy against closed forms and quadrature, reproducibility, bad input."""
import json
import math

import jax.numpy as jnp
import numpy as np
import pytest
from scipy.integrate import quad

import fe_tool
from fe_tool.energy import fields


def _harmonic(k, c):
    k, c = jnp.asarray(k, dtype=jnp.float64), jnp.asarray(c, dtype=jnp.float64)
    return lambda x: 0.5 * jnp.sum(k * (x - c) ** 2)


def _assert_close(result, exact_kT):
    """The promise of the defaults: within max(0.1 kT, 4σ) of the exact ΔF, with σ ≤ 0.15 kT."""
    df, se = result.in_kT()
    assert se <= 0.15, result.summary()
    assert abs(df - exact_kT) <= max(0.1, 4 * se), result.summary()


def test_harmonic_10d_vector_default_call():
    """Anisotropic 10-D pair with moving centre; ΔF = ½ Σ ln(k_B/k_A) (Tuckerman 2010, OUP)."""
    rng = np.random.default_rng(11)
    ka, kb = rng.uniform(0.5, 8, 10), rng.uniform(0.5, 8, 10)
    cb = rng.normal(0, 0.7, 10)
    result = fe_tool.estimate(_harmonic(ka, 0.0), _harmonic(kb, cb), np.zeros(10), cb, seed=1, budget=300_000)
    _assert_close(result, 0.5 * np.sum(np.log(kb / ka)))
    assert result.energy_evaluations <= 300_000 * 1.03
    assert set(result.estimates) >= {"jarzynski_forward", "jarzynski_reverse", "crooks_gaussian", "bar"}
    json.dumps(result.to_dict())
    assert str(result).rstrip().endswith(fe_tool.CAUTION)


def test_particle_shaped_configurations_in_kj_per_mol():
    """4 particles × 3 in kJ/mol at 310 K, restraint loosened: ΔF = (3N kT/2) ln(k_B/k_A).

    kT = R T with R = 8.31446261815324 J/(mol K) (CODATA 2018, exact SI 2019 product N_A k_B).
    """
    from fe_tool.units import thermal_energy

    kT = thermal_energy(310.0, "kJ/mol")
    assert math.isclose(kT, 0.00831446261815324 * 310.0, rel_tol=1e-12)
    sites = jnp.asarray(np.random.default_rng(2).uniform(0, 2, (4, 3)))
    ua = lambda x: 0.5 * 800.0 * jnp.sum((x - sites) ** 2)  # noqa: E731
    ub = lambda x: 0.5 * 200.0 * jnp.sum((x - sites) ** 2)  # noqa: E731
    result = fe_tool.estimate(ua, ub, sites, sites, kT=kT, seed=3, budget=300_000, units="kJ/mol")
    exact = 1.5 * 4 * kT * math.log(200.0 / 800.0)
    _assert_close(result, exact / kT)
    assert result.units == "kJ/mol"


def test_double_well_against_quadrature():
    """Tilted quartic double well; reference −ln(Z_B/Z_A) by scipy.integrate.quad."""
    pa = dict(height=1.0, minimum_squared=1.0, tilt=0.0)
    pb = dict(height=2.5, minimum_squared=1.0, tilt=0.8)
    z = lambda p: quad(lambda x: math.exp(-(p["height"] * (x * x - 1) ** 2 + p["tilt"] * x)), -np.inf, np.inf)[0]  # noqa: E731
    exact = -math.log(z(pb) / z(pa))
    result = fe_tool.estimate(lambda x: fields.double_well_energy(x, **pa), lambda x: fields.double_well_energy(x, **pb),
                              np.array([-1.0]), np.array([-1.0]), seed=4)
    _assert_close(result, exact)


@pytest.mark.slow   # same-seed reproducibility is also pinned in test_pinned_results.py
def test_same_seed_same_number_and_fixed_protocol():
    ua, ub = _harmonic([1.0, 2.0], [0, 0]), _harmonic([3.0, 0.5], [0.7, -0.4])
    kwargs = dict(seed=5, switching_steps=40, trajectories=128, schedule="cosine")
    r1 = fe_tool.estimate(ua, ub, np.zeros(2), np.array([0.7, -0.4]), **kwargs)
    r2 = fe_tool.estimate(ua, ub, np.zeros(2), np.array([0.7, -0.4]), **kwargs)
    assert r1.delta_f == r2.delta_f and r1.stderr == r2.stderr
    np.testing.assert_array_equal(r1.work_forward, r2.work_forward)
    assert r1.settings["switching_steps"] == 40 and r1.work_forward.size == 128
    # −0.1438410362258904 = ½ ln(3·0.5/2) (Tuckerman 2010, OUP; docs/references.md §3a,
    # re-verified there by dblquad)
    _assert_close(r1, -0.1438410362258904)
    r3 = fe_tool.estimate(ua, ub, np.zeros(2), np.array([0.7, -0.4]), **{**kwargs, "seed": 6})
    assert r3.delta_f != r1.delta_f


# ------------------------------------------------------------------ bad input, caught before any sampling

GOOD = dict(energy_a=lambda x: jnp.sum(x**2), energy_b=lambda x: 2 * jnp.sum(x**2),
            start_a=np.zeros(3), start_b=np.zeros(3))


@pytest.mark.parametrize("change, message", [
    (dict(energy_a=lambda x: x**2), "scalar"),
    (dict(energy_b=lambda x: jnp.sum(jnp.log(x))), "not finite"),
    (dict(energy_a=lambda x: jnp.sum(jnp.sqrt(x))), "gradient"),
    (dict(start_b=np.zeros(4)), "shape"),
    (dict(start_a=np.array([0.0, np.nan, 0.0])), "NaN"),
    (dict(energy_a="not a function"), "callable"),
    (dict(kT=0.0), "kT"),
    (dict(kT=-2.0), "kT"),
    (dict(switching_step=10), "unknown option"),
    (dict(trajectories=0), "trajectories"),
    (dict(budget=1000), "budget"),
    (dict(schedule="zigzag"), "schedule"),
    (dict(switching_steps=10_000, trajectories=10_000, budget=100_000), "budget"),
])
def test_bad_input_is_refused_with_a_clear_message(change, message):
    args = {**GOOD, **change}
    kwargs = {k: v for k, v in args.items() if k not in GOOD}
    with pytest.raises(ValueError, match=message):
        fe_tool.estimate(args["energy_a"], args["energy_b"], args["start_a"], args["start_b"], **kwargs)
