"""The evaluation budget is planned before any stage runs, and never exceeded.

Exact answers: anisotropic harmonic pairs, ΔF = ½ Σ ln(k_B/k_A) kT whatever the centres
(Tuckerman 2010, *Statistical Mechanics: Theory and Molecular Simulation*, OUP;
docs/references.md §3a).
"""
from __future__ import annotations

import time

import jax.numpy as jnp
import numpy as np
import pytest

import fe_tool
from fe_tool.routes.budget import MIN_TRAJECTORIES, plan_switching_budget


def harmonic_pair(dimensions, seed=5):
    rng = np.random.default_rng(seed)
    ka, kb = rng.uniform(0.5, 4.0, dimensions), rng.uniform(0.5, 4.0, dimensions)
    cb = rng.normal(0.0, 0.5, dimensions)
    ua = lambda x: 0.5 * jnp.sum(jnp.asarray(ka) * x**2)              # noqa: E731
    ub = lambda x: 0.5 * jnp.sum(jnp.asarray(kb) * (x - jnp.asarray(cb)) ** 2)  # noqa: E731
    return ua, ub, np.zeros(dimensions), cb, 0.5 * float(np.sum(np.log(kb / ka)))


@pytest.mark.parametrize("dimensions, control", [(1, "auto"), (10, "auto"), (50, "auto"), (10, "learned")])
def test_small_budget_is_respected_with_enough_trajectories(dimensions, control):
    ua, ub, xa, xb, exact = harmonic_pair(dimensions)
    budget = 100_000
    r = fe_tool.estimate(ua, ub, xa, xb, budget=budget, control=control, seed=2, progress=False)
    print(dimensions, control, r.delta_f, r.stderr, exact, r.energy_evaluations, r.cost, r.work_forward.size)
    assert r.energy_evaluations <= budget            # never more than the budget
    assert r.work_forward.size >= MIN_TRAJECTORIES and r.work_reverse.size >= MIN_TRAJECTORIES
    assert sum(r.cost.values()) == r.energy_evaluations
    if control == "auto":
        assert "control_decision" in r.extras        # says what it did with the control


def test_windows_route_respects_a_small_budget():
    ua, ub, xa, xb, _ = harmonic_pair(3)
    r = fe_tool.estimate(ua, ub, xa, xb, budget=100_000, method="windows", seed=2, progress=False)
    assert r.energy_evaluations <= 100_000


def test_too_small_a_budget_is_refused_up_front_naming_the_options():
    ua, ub, xa, xb, _ = harmonic_pair(3)
    t0 = time.perf_counter()
    with pytest.raises(ValueError) as err:
        fe_tool.estimate(ua, ub, xa, xb, budget=5_000, progress=False)
    message = str(err.value)
    assert "--budget" in message and "budget=" in message and "chains=" in message and "method='windows'" in message
    assert time.perf_counter() - t0 < 10.0            # refused before any sampling


def test_budget_plan_fits_every_minimal_stage():
    for budget in (25_000, 60_000, 100_000, 1_000_000, 10_000_000):
        for per_point, end in ((2, 1), (1, 1)):
            try:
                plan = plan_switching_budget(budget, per_point=per_point, end_evaluations=end)
            except ValueError:
                continue
            minimal_sampling = 2 * plan.chains * 400 * end
            assert minimal_sampling + plan.pilot_cap + plan.minimum_switching <= budget
            assert plan.sampling_cap * 2 + plan.pilot_cap <= budget
