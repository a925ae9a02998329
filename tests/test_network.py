"""Networks of pairs: GLS node values against an independent solve, calibrated intervals, cycle
closures, a corrupted pair named, disconnected groups reported, next-pair planning against a refit,
and a network of harmonic states computed for real through fe_tool.estimate."""
import itertools
import math

import numpy as np
import pytest

from fe_tool.network import (Edge, NetworkError, build_network, solve_network, split_budget,
                             suggest_next_pair)

# six invented states with redundant pairs: 10 pairs, 5 independent cycles
TRUE_VALUES = {"a": 0.0, "b": 1.0, "c": 2.5, "d": -0.5, "e": 0.7, "f": 3.0}
PAIRS = [("a", "b"), ("b", "c"), ("c", "d"), ("d", "a"), ("a", "c"), ("b", "e"), ("e", "f"), ("f", "c"),
         ("d", "f"), ("a", "e")]
ERRORS = [0.10, 0.15, 0.20, 0.10, 0.25, 0.12, 0.18, 0.10, 0.22, 0.15]


def _synthetic(rng, offsets=None, evaluations=1e5):
    """Edges drawn from N(exact difference, σ²) with the σ they report."""
    edges = []
    for k, ((a, b), s) in enumerate(zip(PAIRS, ERRORS)):
        shift = (offsets or {}).get(k, 0.0)
        edges.append(Edge(a, b, TRUE_VALUES[b] - TRUE_VALUES[a] + s * rng.normal() + shift, s, f"p{k}",
                          evaluations))
    return edges


def _independent_gls(edges, covariance, reference):
    """Weighted least squares written out: whiten with C^(-1/2) from an eigendecomposition, lstsq."""
    states = sorted({s for e in edges for s in (e.state_a, e.state_b)})
    free = [s for s in states if s != reference]
    design = np.array([[(s == e.state_b) - (s == e.state_a) for s in free] for e in edges], float)
    y = np.array([e.delta_f for e in edges])
    w, v = np.linalg.eigh(covariance)
    inverse_root = v @ np.diag(w ** -0.5) @ v.T
    solution, *_ = np.linalg.lstsq(inverse_root @ design, inverse_root @ y, rcond=None)
    cov = np.linalg.inv(design.T @ np.linalg.inv(covariance) @ design)
    residual = inverse_root @ (y - design @ solution)
    return dict(zip(free, solution)), dict(zip(free, np.sqrt(np.diag(cov)))), float(residual @ residual)


def test_gls_matches_an_independent_weighted_least_squares_solve():
    # independent solve written in this test (numpy lstsq on the whitened equations), with
    # correlated pairs (a random positive-definite covariance) to exercise the full C
    rng = np.random.default_rng(7)
    edges = _synthetic(rng)
    m = len(edges)
    mixing = rng.normal(size=(m, m)) * 0.03
    covariance = np.diag(np.square(ERRORS)) + mixing @ mixing.T
    report = solve_network(build_network(edges, covariance=covariance), reference="c")
    values, errors, chi_square = _independent_gls(edges, covariance, "c")
    for state, value in values.items():
        i = report.nodes.index(state)
        assert report.nodes.values[i] == pytest.approx(value, abs=1e-10)
        assert report.nodes.stderr[i] == pytest.approx(errors[state], rel=1e-9)
    assert report.nodes.values[report.nodes.index("c")] == 0.0
    assert report.chi_square == pytest.approx(chi_square, rel=1e-9)
    assert report.dof == m - (6 - 1)


def test_exact_and_soft_anchors_equal_the_solve_with_the_anchor_as_an_extra_pair():
    # an exact anchor shifts every value by the anchor's value; a soft anchor (value ± s) is the same
    # GLS as an extra measured pair from a pinned auxiliary state (the independent construction here)
    rng = np.random.default_rng(3)
    edges = _synthetic(rng)
    relative = solve_network(build_network(edges), reference="a")
    exact = solve_network(build_network(edges), anchors={"a": 2.0})
    assert np.allclose(exact.nodes.values, relative.nodes.values + 2.0, atol=1e-12)
    assert np.allclose(exact.nodes.covariance, relative.nodes.covariance, atol=1e-12)
    soft = solve_network(build_network(edges), anchors={"b": (1.3, 0.05)})
    pinned = solve_network(build_network(edges + [Edge("pin", "b", 1.3, 0.05, "anchor")]), reference="pin")
    for state in TRUE_VALUES:
        i, j = soft.nodes.index(state), pinned.nodes.index(state)
        assert soft.nodes.values[i] == pytest.approx(pinned.nodes.values[j], abs=1e-10)
        assert soft.nodes.stderr[i] == pytest.approx(pinned.nodes.stderr[j], rel=1e-9)


def test_cycle_closure_of_a_triangle_by_hand():
    edges = [Edge("a", "b", 1.0, 0.1, "ab"), Edge("b", "c", 2.0, 0.2, "bc"), Edge("a", "c", 2.6, 0.2, "ac")]
    report = solve_network(build_network(edges))
    (cycle,) = report.cycles
    # a -> c (+2.6), then back c -> b -> a along the tree (−2.0, −1.0); closure 2.6 − 3.0 = −0.4
    assert abs(cycle.closure) == pytest.approx(0.4, abs=1e-12)
    assert cycle.spread == pytest.approx(math.sqrt(0.01 + 0.04 + 0.04), rel=1e-12)
    assert cycle.states[0] == cycle.states[-1] and len(cycle.states) == 4
    assert report.dof == 1
    # in a single cycle the three normalised residuals are equal in size: the network cannot tell
    # which pair is off, and says so when they are over the limit
    z = [abs(e.z) for e in report.edges]
    assert max(z) - min(z) < 1e-9
    bad = solve_network(build_network([*edges[:2], Edge("a", "c", 5.0, 0.2, "ac")]))
    assert set(bad.suspects) == {"ab", "bc", "ac"} and any("equally suspect" in w for w in bad.warnings)


def test_node_intervals_cover_the_truth_and_false_alarms_are_rare():
    # synthetic Gaussian pairs with known errors: the 95% interval of each state's value must cover
    # its exact value in 95% of repeats.  2000 repeats, 6·5 node checks pooled per state: for one state
    # the binomial sd is sqrt(0.95·0.05/2000) = 0.0049, so [0.926, 0.974] is ±4.9 sd (margin written out).
    # The flag rate at α = 0.01 (χ² + Bonferroni edges + Bonferroni cycles) is at most ≈ 0.03 by the
    # union bound; with sd sqrt(0.03·0.97/2000) = 0.0038 the limit 0.05 is 5 sd above it.
    rng = np.random.default_rng(20261202)
    repeats, covered, flagged, small_p = 2000, np.zeros(len(TRUE_VALUES)), 0, 0
    exact = np.array([TRUE_VALUES[s] for s in TRUE_VALUES])
    for _ in range(repeats):
        report = solve_network(build_network(_synthetic(rng)), reference="a")
        order = [report.nodes.index(s) for s in TRUE_VALUES]
        values, errors = report.nodes.values[order], report.nodes.stderr[order]
        covered += np.abs(values - exact) <= 1.959964 * np.where(errors > 0, errors, np.inf)
        flagged += report.flagged
        small_p += report.p_value < 0.05
    coverage = covered[1:] / repeats        # state a is the reference (exact by construction)
    assert np.all((coverage > 0.926) & (coverage < 0.974)), coverage
    assert flagged / repeats < 0.05
    # χ² p-values are uniform for a correct model: P(p < 0.05) = 0.05, sd 0.0049; ±5 sd
    assert 0.025 < small_p / repeats < 0.075


@pytest.mark.parametrize("corrupted", [3, 7])
def test_a_corrupted_pair_is_detected_and_named(corrupted):
    # an offset of 15 reported errors on one pair that lies on several cycles; data snooping
    # (Baarda 1968 [mem]) names it as the first suspect for every seed tried
    for seed in range(20):
        rng = np.random.default_rng(seed)
        report = solve_network(build_network(_synthetic(rng, {corrupted: 15 * ERRORS[corrupted]})))
        assert report.flagged
        assert report.suspects[0] == f"p{corrupted}", (seed, report.suspects)
        assert any(f"pair p{corrupted}" in w and "larger budget" in w for w in report.warnings)
        cleaned = solve_network(build_network(_synthetic(np.random.default_rng(seed),
                                                         {corrupted: 15 * ERRORS[corrupted]})),
                                exclude=[f"p{corrupted}"])
        assert not cleaned.suspects


def test_disconnected_groups_are_reported_not_joined():
    edges = [Edge("a", "b", 1.0, 0.1), Edge("b", "c", 1.0, 0.1), Edge("a", "c", 2.0, 0.1),
             Edge("x", "y", 0.5, 0.1)]
    report = solve_network(build_network(edges), reference="b")
    assert report.components == (("a", "b", "c"), ("x", "y"))
    assert report.nodes.values[report.nodes.index("b")] == 0.0
    assert report.nodes.values[report.nodes.index("x")] == 0.0      # the second group's own reference
    assert any("2 groups" in w for w in report.warnings)
    with pytest.raises(NetworkError, match="different groups"):
        report.difference("a", "y")
    assert report.dof == 4 - (5 - 2)
    anchored = solve_network(build_network(edges), anchors={"a": 0.0, "x": (3.0, 0.2)})
    value, error = anchored.difference("a", "y")
    assert value == pytest.approx(3.5) and error == pytest.approx(math.sqrt(0.04 + 0.01))


def test_next_pair_prediction_equals_a_refit_with_that_pair_added():
    # the rank-one update must give exactly the variance of a full refit with the new pair
    rng = np.random.default_rng(11)
    edges = _synthetic(rng)
    report = solve_network(build_network(edges), reference="a")
    ranked = suggest_next_pair(report, ("a", "f"), evaluations=2e5)
    assert ranked == sorted(ranked, key=lambda p: p.variance_after)
    for pick in ranked[:3] + ranked[-2:]:
        added = Edge(pick.state_a, pick.state_b, 0.0, math.sqrt(pick.unit_variance / 2e5), "new")
        refit = solve_network(build_network(edges + [added]), reference="a")
        assert refit.difference("a", "f")[1] ** 2 == pytest.approx(pick.variance_after, rel=1e-9)
    measured = next(p for p in ranked if {p.state_a, p.state_b} == {"a", "b"})
    assert not measured.assumed and measured.unit_variance == pytest.approx(0.1 ** 2 * 1e5)
    # a budget split can do no worse than the best single pair given the whole budget
    split = split_budget(report, 2e5, target=("a", "f"))
    assert split.variance_after <= ranked[0].variance_after * (1 + 1e-6)
    assert split.evaluations.sum() == pytest.approx(2e5)
    kept = [(p, n) for p, n in zip(split.pairs, split.evaluations) if n > 1.0]
    extra = [Edge(a, b, 0.0, math.sqrt(suggest_next_pair(report, ("a", "f"), candidates=[(a, b)],
                                                         evaluations=n)[0].unit_variance / n)) for (a, b), n in kept]
    refit = solve_network(build_network(edges + extra), reference="a")
    assert refit.difference("a", "f")[1] ** 2 == pytest.approx(split.variance_after, rel=1e-6)


@pytest.mark.parametrize("bad, message", [
    ([Edge("a", "a", 1.0, 0.1)], "to itself"),
    ([Edge("a", "b", 1.0, 0.0)], "standard error"),
    ([Edge("a", "b", float("nan"), 0.1)], "not finite"),
    ([], "no pairs"),
])
def test_bad_networks_are_refused(bad, message):
    with pytest.raises(NetworkError, match=message):
        build_network(bad)


def test_bad_references_anchors_and_targets_are_refused():
    network = build_network([Edge("a", "b", 1.0, 0.1), Edge("b", "c", 1.0, 0.1)])
    with pytest.raises(NetworkError, match="not a state"):
        solve_network(network, reference="z")
    with pytest.raises(NetworkError, match="either a reference or anchors"):
        solve_network(network, reference="a", anchors={"b": 1.0})
    with pytest.raises(NetworkError, match="unknown state"):
        suggest_next_pair(solve_network(network), "z", unit_variance={("a", "c"): 1.0}, evaluations=10)
    with pytest.raises(NetworkError, match="known cost"):
        suggest_next_pair(solve_network(network), "c", evaluations=10)


# ------------------------------------------------------------------ computed for real


def _grid_states():
    """States (i, j) of a 2-D harmonic well with stiffness k = (2^i, 2^j), i in 0..2, j in 0..1."""
    return {f"k{i}{j}": (i, j) for i, j in itertools.product(range(3), range(2))}


def test_harmonic_network_computed_through_estimate():
    # ΔF between harmonic wells: (kT/2) Σ_a ln(k_B,a / k_A,a) (Chandler 1987, Introduction to Modern
    # Statistical Mechanics; docs/references.md §3a).  Each pair doubles one axis's stiffness, so ΔF = ½ ln 2.
    # Rescaling the coordinates maps every pair onto the same reduced problem (one axis from k = 1 to 2),
    # which keeps this test to one compilation; each pair still runs with its own seed.
    import jax.numpy as jnp

    import fe_tool

    states = _grid_states()
    pairs = [(a, b) for a, b in itertools.combinations(states, 2)
             if sum(abs(p - q) for p, q in zip(states[a], states[b])) == 1]     # 7 pairs, 2 cycles
    energy_a = lambda x: 0.5 * jnp.sum(x ** 2)                                    # noqa: E731
    energy_b = lambda x: 0.5 * (2.0 * x[0] ** 2 + x[1] ** 2)                      # noqa: E731
    results = []
    for seed, (a, b) in enumerate(pairs):
        result = fe_tool.estimate(energy_a, energy_b, np.zeros(2), np.zeros(2), kT=1.0, seed=seed, budget=30_000,
                                  chains=8, switching_steps=16, step_scale=0.5, control="none", progress=False)
        results.append((a, b, result))
    report = solve_network(build_network(results), reference="k00")
    assert len(report.cycles) == 2 and report.dof == 2
    for state, (i, j) in states.items():
        value = report.nodes.values[report.nodes.index(state)]
        error = report.nodes.stderr[report.nodes.index(state)]
        exact = 0.5 * math.log(2.0) * (i + j)
        assert abs(value - exact) <= 4 * error + 1e-12, (state, value, exact, error)
    for cycle in report.cycles:
        assert abs(cycle.z) < 4, cycle
