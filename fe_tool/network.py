"""Many pairs → one consistent set of free energies: a network of measured differences.

Each measured pair is an *edge* between two named states (the *nodes*): ΔF = F_b − F_a with a
standard error.  A family of related states measured as a redundant set of pairs (with cycles)
over-determines the node values; this module combines them by generalised least squares,

    minimise (y − A F)ᵀ C⁻¹ (y − A F),

where y holds the measured differences, A has one row per edge (−1 at state a, +1 at state b),
and C is the covariance of the measurements (diagonal when the pairs were computed
independently, as fe_tool's pairs are: each pair samples its own end states).  Each connected
group of states (a *component*) needs one fixed value: a reference state set to 0, or one or
more *anchors*, states whose values are known (exactly, or with an error).  The node estimates
come with their full covariance (Aᵀ C⁻¹ A)⁻¹, so any difference between two nodes has an error.

Consistency checks: every independent cycle (one per edge outside a spanning tree) has a
closure, the signed sum of ΔF around it, which is 0 ± its spread for consistent data; every edge
on a cycle has a normalised residual z = r / sd(r) with the leverage-corrected residual variance
C − A Cov Aᵀ; and the whole network has χ² = Σ whitened residual² on dof = rows − free values.

What to run next: adding a pair (i, j) measured with n evaluations has variance s²/n, where s²
(variance × evaluations, roughly constant for one pair) is measured from earlier runs of that
pair; the rank-one (Sherman–Morrison) update of the node covariance gives the target's new
variance without refitting.  :func:`split_budget` spreads a budget over candidate pairs to
minimise a target's variance (or the mean node variance) with scipy's SLSQP.

References: weighted least squares on a graph of differences and its optimal measurement design
(A-, D- and E-optimal) — H. Xu 2019, "Optimal measurement network of pairwise differences",
arXiv:1906.08599 (J. Chem. Inf. Model. 59, 4720 [mem]); normalised residuals and testing the
largest one (data snooping) — W. Baarda 1968, "A testing procedure for use in geodetic networks",
Netherlands Geodetic Commission [mem]; Sherman & Morrison 1950, Ann. Math. Stat. 21, 124 [mem].

This module is pure numpy/scipy: it takes numbers (or objects with ``delta_f``/``stderr``) and
imports nothing else of fe_tool.
"""
from __future__ import annotations

import dataclasses
import math
from collections import deque
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

__all__ = ["CycleClosure", "Edge", "EdgeCheck", "Network", "NetworkError", "NetworkReport", "NextPair",
           "NodeValues", "BudgetSplit", "build_network", "solve_network", "suggest_next_pair", "split_budget",
           "DEFAULT_ALPHA"]

DEFAULT_ALPHA = 0.01        # family-wise false-alarm rate of the edge and cycle checks, and the χ² test level
TIE_TOLERANCE = 1e-6        # |z| values this close (relatively) cannot tell two edges apart


class NetworkError(ValueError):
    """A network, reference, anchor or target is refused; the message names it and the fix."""


@dataclasses.dataclass(frozen=True)
class Edge:
    """One measured pair: ``delta_f`` = F(state_b) − F(state_a) ± ``stderr`` (energy units).

    ``evaluations`` is what the pair cost (energy evaluations), used to turn its error into a
    per-evaluation variance for planning; ``flagged`` carries the pair's own warning flag.
    """

    state_a: str
    state_b: str
    delta_f: float
    stderr: float
    name: str = ""
    evaluations: float | None = None
    flagged: bool = False


@dataclasses.dataclass(frozen=True)
class Network:
    """States (nodes, in first-seen order), edges and the edges' covariance (``None``: independent)."""

    states: tuple[str, ...]
    edges: tuple[Edge, ...]
    covariance: np.ndarray | None = None

    @property
    def design(self) -> np.ndarray:
        """A[edge, state]: −1 at state_a, +1 at state_b."""
        index = {s: i for i, s in enumerate(self.states)}
        design = np.zeros((len(self.edges), len(self.states)))
        for row, edge in enumerate(self.edges):
            design[row, index[edge.state_a]] -= 1.0
            design[row, index[edge.state_b]] += 1.0
        return design

    @property
    def edge_covariance(self) -> np.ndarray:
        if self.covariance is not None:
            return np.asarray(self.covariance, float)
        return np.diag([e.stderr ** 2 for e in self.edges])

    def components(self) -> list[list[str]]:
        """Connected groups of states, each in first-seen order."""
        neighbours = _neighbours(self)
        seen, groups = set(), []
        for state in self.states:
            if state in seen:
                continue
            group, queue = [], deque([state])
            seen.add(state)
            while queue:
                s = queue.popleft()
                group.append(s)
                for t, _ in neighbours[s]:
                    if t not in seen:
                        seen.add(t)
                        queue.append(t)
            groups.append(sorted(group, key=self.states.index))
        return groups


def _neighbours(network: Network) -> dict[str, list[tuple[str, int]]]:
    neighbours: dict[str, list[tuple[str, int]]] = {s: [] for s in network.states}
    for k, e in enumerate(network.edges):
        neighbours[e.state_a].append((e.state_b, k))
        neighbours[e.state_b].append((e.state_a, k))
    return neighbours


def _edge_from(item: Any, position: int) -> Edge:
    """An Edge from an Edge, a dict, or ``(state_a, state_b, result)`` with a Result-like third item."""
    if isinstance(item, Edge):
        return item
    if isinstance(item, Mapping):
        missing = {"state_a", "state_b", "delta_f", "stderr"} - set(item)
        if missing:
            raise NetworkError(f"pair {position}: missing key(s) {sorted(missing)}; give state_a, state_b, "
                               "delta_f and stderr")
        return Edge(str(item["state_a"]), str(item["state_b"]), float(item["delta_f"]), float(item["stderr"]),
                    str(item.get("name") or ""), _optional_float(item.get("evaluations")),
                    bool(item.get("flagged") or False))
    if isinstance(item, (tuple, list)) and len(item) == 3:
        a, b, result = item
        return Edge(str(a), str(b), float(result.delta_f), float(result.stderr), "",
                    _optional_float(getattr(result, "energy_evaluations", None)),
                    bool(getattr(result, "flagged", False)))
    raise NetworkError(f"pair {position}: expected an Edge, a dict with state_a/state_b/delta_f/stderr, or "
                       "(state_a, state_b, result) with a result from fe_tool.estimate")


def _optional_float(value: Any) -> float | None:
    return None if value is None or value == "" else float(value)


def build_network(pairs: Iterable[Any], covariance: Any = None) -> Network:
    """A :class:`Network` from measured pairs.

    Args:
        pairs: each an :class:`Edge`, a dict with ``state_a``, ``state_b``, ``delta_f``, ``stderr``
            (optional ``name``, ``evaluations``, ``flagged``), or ``(state_a, state_b, result)``
            with a result of :func:`fe_tool.estimate` (ΔF = F(state_b) − F(state_a)).
        covariance: optional edges × edges covariance of the measured ΔF (energy units²) for pairs
            that share samples; by default the pairs are treated as independent (fe_tool samples
            each pair's end states afresh, so its pairs are).

    Raises:
        NetworkError: no pairs, a pair from a state to itself, a non-finite ΔF, a standard error
            that is not positive, or a covariance of the wrong shape or not positive definite.
    """
    edges = [_edge_from(item, k) for k, item in enumerate(pairs)]
    if not edges:
        raise NetworkError("the network has no pairs; give at least one measured pair")
    for k, e in enumerate(edges):
        label = f"pair {e.name or k}"
        if not e.state_a or not e.state_b:
            raise NetworkError(f"{label}: both state labels must be non-empty")
        if e.state_a == e.state_b:
            raise NetworkError(f"{label}: joins state {e.state_a!r} to itself; a pair must join two different states")
        if not math.isfinite(e.delta_f):
            raise NetworkError(f"{label}: ΔF is not finite; leave failed pairs out of the network")
        if covariance is None and not (math.isfinite(e.stderr) and e.stderr > 0):
            raise NetworkError(f"{label}: its standard error must be a positive finite number; a pair without an "
                               "error bar cannot be weighted")
    states = tuple(dict.fromkeys(s for e in edges for s in (e.state_a, e.state_b)))
    if covariance is not None:
        covariance = np.array(covariance, float)
        if covariance.shape != (len(edges), len(edges)) or not np.allclose(covariance, covariance.T):
            raise NetworkError(f"covariance must be a symmetric {len(edges)}×{len(edges)} matrix (one row per pair)")
        if np.linalg.eigvalsh(covariance).min() <= 0:
            raise NetworkError("covariance is not positive definite; check that each pair has a positive variance")
    return Network(states, tuple(edges), covariance)


# ------------------------------------------------------------------ results


@dataclasses.dataclass(frozen=True)
class NodeValues:
    """Node estimates: ``values[i]`` of ``states[i]`` with covariance ``covariance`` (energy units, units²).

    Values are relative to each component's reference state (0), or absolute where the
    component has anchors; ``component[i]`` numbers the connected group of state i.  Fixed states
    (reference, exact anchors) have zero variance.  A difference across components is refused
    unless both are anchored (their values are then absolute and independent).
    """

    states: tuple[str, ...]
    values: np.ndarray
    covariance: np.ndarray
    component: np.ndarray
    references: tuple[str, ...]        # per component: the state fixed at 0, or "" when anchored

    @property
    def stderr(self) -> np.ndarray:
        return np.sqrt(np.clip(np.diag(self.covariance), 0.0, None))

    def index(self, state: str) -> int:
        try:
            return self.states.index(state)
        except ValueError:
            raise NetworkError(f"unknown state {state!r}; the network's states are {list(self.states)}") from None

    def difference(self, state_a: str, state_b: str) -> tuple[float, float]:
        """F(state_b) − F(state_a) and its standard error (covariances included)."""
        i, j = self.index(state_a), self.index(state_b)
        anchored = not self.references[self.component[i]] and not self.references[self.component[j]]
        if self.component[i] != self.component[j] and not anchored:
            raise NetworkError(f"states {state_a!r} and {state_b!r} are in different groups (no chain of pairs "
                               "joins them); measure a pair that joins the two groups, or anchor both groups")
        c = np.zeros(len(self.states))
        c[i], c[j] = -1.0, 1.0
        return float(c @ self.values), float(math.sqrt(max(c @ self.covariance @ c, 0.0)))


@dataclasses.dataclass(frozen=True)
class CycleClosure:
    """One independent cycle: ``states`` in order (first repeated at the end), the signed sum of
    ΔF around it (``closure``, 0 for consistent data) and its expected spread from the edge errors."""

    states: tuple[str, ...]
    edges: tuple[str, ...]
    closure: float
    spread: float
    flagged: bool

    @property
    def z(self) -> float:
        return self.closure / self.spread if self.spread > 0 else 0.0


@dataclasses.dataclass(frozen=True)
class EdgeCheck:
    """One edge after the fit: measured and fitted ΔF, residual, normalised residual ``z``
    (None when the edge lies on no cycle, so nothing can check it) and whether it is flagged."""

    name: str
    state_a: str
    state_b: str
    measured: float
    stderr: float
    fitted: float
    fitted_stderr: float
    residual: float
    z: float | None
    flagged: bool


@dataclasses.dataclass(frozen=True)
class NetworkReport:
    """Everything :func:`solve_network` found; ``flagged`` means: do not trust the node values as they are."""

    network: Network
    nodes: NodeValues
    edges: tuple[EdgeCheck, ...]
    cycles: tuple[CycleClosure, ...]
    chi_square: float
    dof: int
    p_value: float | None
    components: tuple[tuple[str, ...], ...]
    suspects: tuple[str, ...]           # edges named as the likely cause, most likely first
    z_threshold: float
    alpha: float
    warnings: tuple[str, ...]
    units: str = ""
    fitted_states: np.ndarray = dataclasses.field(default=None, repr=False)   # indices of the non-fixed states
    information: np.ndarray = dataclasses.field(default=None, repr=False)     # their Fisher information Aᵀ C⁻¹ A

    @property
    def flagged(self) -> bool:
        return bool(self.suspects or any(c.flagged for c in self.cycles)
                    or (self.p_value is not None and self.p_value < self.alpha)
                    or any(e.flagged for e in self.network.edges))

    def difference(self, state_a: str, state_b: str) -> tuple[float, float]:
        """F(state_b) − F(state_a) ± standard error from the fitted network."""
        return self.nodes.difference(state_a, state_b)

    def node_rows(self) -> list[dict[str, Any]]:
        """One dict per state: state, value, stderr, component, reference."""
        n = self.nodes
        return [{"state": s, "value": float(n.values[i]), "stderr": float(n.stderr[i]),
                 "component": int(n.component[i]) + 1, "reference": n.references[int(n.component[i])] or "anchors"}
                for i, s in enumerate(n.states)]

    def to_dict(self) -> dict[str, Any]:
        """JSON-serialisable: nodes with covariance, edges, cycles, the χ² test and warnings."""
        return {"units": self.units, "nodes": self.node_rows(),
                "covariance": self.nodes.covariance.tolist(), "states": list(self.nodes.states),
                "edges": [dataclasses.asdict(e) for e in self.edges],
                "cycles": [{**dataclasses.asdict(c), "z": c.z} for c in self.cycles],
                "chi_square": self.chi_square, "dof": self.dof, "p_value": self.p_value,
                "components": [list(c) for c in self.components], "suspects": list(self.suspects),
                "z_threshold": self.z_threshold, "alpha": self.alpha, "flagged": self.flagged,
                "warnings": list(self.warnings)}

    def summary(self) -> str:
        from_text = _summary_lines(self)
        return "\n".join(from_text)


# ------------------------------------------------------------------ solving


def _parse_anchors(network: Network, anchors: Mapping[str, Any] | None) -> dict[str, tuple[float, float]]:
    """state -> (value, stderr); stderr 0 means known exactly."""
    parsed = {}
    for state, given in (anchors or {}).items():
        if state not in network.states:
            raise NetworkError(f"anchor {state!r} is not a state of the network; its states are {list(network.states)}")
        value, stderr = (given, 0.0) if np.isscalar(given) else tuple(given)
        value, stderr = float(value), float(stderr)
        if not (math.isfinite(value) and math.isfinite(stderr) and stderr >= 0):
            raise NetworkError(f"anchor {state!r}: give a finite value, or (value, stderr) with stderr ≥ 0")
        parsed[state] = (value, stderr)
    return parsed


def _references(network: Network, components: list[list[str]], reference: str | None,
                anchors: dict[str, tuple[float, float]]) -> list[str]:
    """Per component: the state fixed at 0 ("" for a component that has anchors)."""
    if reference is not None and reference not in network.states:
        raise NetworkError(f"reference {reference!r} is not a state of the network; its states are "
                           f"{list(network.states)}")
    chosen = []
    for group in components:
        anchored = [s for s in group if s in anchors]
        if anchored and reference in group:
            raise NetworkError(f"reference {reference!r} and anchor(s) {anchored} are in the same group of states; "
                               "give either a reference or anchors for it, not both")
        chosen.append("" if anchored else (reference if reference in group else group[0]))
    return chosen


@dataclasses.dataclass(frozen=True)
class _Fit:
    values: np.ndarray          # all states
    covariance: np.ndarray      # all states (zeros at fixed ones)
    free: np.ndarray            # indices of the states that were fitted
    information: np.ndarray     # free × free
    residuals: np.ndarray       # edge rows
    z: np.ndarray               # edge rows; nan where the edge is on no cycle
    chi_square: float
    dof: int


def _fit(network: Network, fixed: dict[int, float], soft: dict[int, tuple[float, float]],
         keep: np.ndarray) -> _Fit:
    """GLS on the kept edges plus soft anchors, with ``fixed`` states held at their values."""
    n = len(network.states)
    design = network.design[keep]
    covariance = network.edge_covariance[np.ix_(keep, keep)]
    y = np.array([e.delta_f for e in network.edges])[keep]
    for i, (value, stderr) in soft.items():
        row = np.zeros(n)
        row[i] = 1.0
        design, y = np.vstack([design, row]), np.append(y, value)
        covariance = np.pad(covariance, ((0, 1), (0, 1)))
        covariance[-1, -1] = stderr ** 2
    free = np.array([i for i in range(n) if i not in fixed], int)
    known = np.zeros(n)
    for i, value in fixed.items():
        known[i] = value
    lower = np.linalg.cholesky(covariance)
    whitened_design = np.linalg.solve(lower, design[:, free])
    whitened_y = np.linalg.solve(lower, y - design @ known)
    solution, *_ = np.linalg.lstsq(whitened_design, whitened_y, rcond=None)
    information = whitened_design.T @ whitened_design
    free_covariance = np.linalg.inv(information)
    values, full_covariance = known.copy(), np.zeros((n, n))
    values[free] = solution
    full_covariance[np.ix_(free, free)] = free_covariance
    residuals = y - design @ values
    residual_covariance = covariance - design[:, free] @ free_covariance @ design[:, free].T
    spread = np.diag(residual_covariance)
    checkable = spread > 1e-9 * np.diag(covariance)
    z = np.where(checkable, residuals / np.sqrt(np.where(checkable, spread, 1.0)), np.nan)
    whitened_residuals = np.linalg.solve(lower, residuals)
    edges = int(keep.sum())
    return _Fit(values, full_covariance, free, information, residuals[:edges], z[:edges],
                float(whitened_residuals @ whitened_residuals), len(y) - len(free))


def _z_threshold(alpha: float, tests: int) -> float:
    """Two-sided normal quantile with a Bonferroni split of ``alpha`` over ``tests`` checks."""
    from scipy.stats import norm

    return float(norm.isf(alpha / (2 * max(tests, 1))))


def _snoop(network: Network, fixed: dict[int, float], soft: dict[int, tuple[float, float]], keep: np.ndarray,
           threshold: float) -> tuple[list[str], list[str]]:
    """Repeatedly set aside the edge with the largest |z| above ``threshold`` (Baarda 1968 [mem]).

    Returns the suspects (most likely first) and warnings for edges the network cannot tell apart.
    """
    keep, suspects, notes = keep.copy(), [], []
    while True:
        z = np.abs(_fit(network, fixed, soft, keep).z)
        if not np.any(z > threshold):
            return suspects, notes
        rows = np.flatnonzero(keep)
        top = int(np.nanargmax(z))
        tied = [rows[k] for k in np.flatnonzero(np.abs(z - z[top]) <= TIE_TOLERANCE * z[top])]
        names = [_edge_label(network, k) for k in tied]
        suspects.extend(n for n in names if n not in suspects)
        if len(tied) > 1:
            notes.append(f"pairs {', '.join(names)} are equally suspect: they lie on the same cycles only, so the "
                         "network cannot tell which one is off; measure a pair that closes another cycle through "
                         "one of them")
        keep[rows[top]] = False


def _edge_label(network: Network, k: int) -> str:
    edge = network.edges[k]
    return edge.name or f"{edge.state_a}->{edge.state_b}"


def solve_network(network: Network, *, reference: str | None = None, anchors: Mapping[str, Any] | None = None,
                  alpha: float = DEFAULT_ALPHA, exclude: Sequence[str] = (), units: str = "") -> NetworkReport:
    """Consistent node values with covariance, cycle closures and flagged pairs.

    Args:
        network: from :func:`build_network`.
        reference: the state set to 0 in its component (default: each component's first state).
        anchors: ``{state: value}`` (known exactly) or ``{state: (value, stderr)}``; a component with
            anchors takes absolute values from them and needs no reference.
        alpha: family-wise false-alarm rate.  An edge on a cycle is flagged when its two-sided
            normal p-value is below ``alpha / m`` (Bonferroni over the m edges that lie on a cycle),
            a cycle when its closure's p-value is below ``alpha / cycles``, and the network when the
            χ² p-value is below ``alpha``.
        exclude: names (or ``a->b`` labels) of pairs to leave out, e.g. a suspect after checking it.
        units: a label carried into the report.

    Returns:
        :class:`NetworkReport`.  Components are reported separately, never joined: each has its
        own reference (or anchors), and differences across components are refused.
    """
    if not 0 < alpha < 1:
        raise NetworkError(f"alpha must lie between 0 and 1, got {alpha!r}")
    labels = [_edge_label(network, k) for k in range(len(network.edges))]
    unknown = sorted(set(exclude) - set(labels))
    if unknown:
        raise NetworkError(f"exclude: no pair(s) named {unknown}; pair names are {labels}")
    if len(set(exclude)) >= len(labels):
        raise NetworkError("exclude leaves no pairs in the network")
    if exclude:
        kept = [e for e, label in zip(network.edges, labels) if label not in exclude]
        cov = network.covariance
        if cov is not None:
            rows = [k for k, label in enumerate(labels) if label not in exclude]
            cov = np.asarray(cov)[np.ix_(rows, rows)]
        network = Network(tuple(dict.fromkeys(s for e in kept for s in (e.state_a, e.state_b))), tuple(kept), cov)
    components = network.components()
    anchor_values = _parse_anchors(network, anchors)
    references = _references(network, components, reference, anchor_values)
    index = {s: i for i, s in enumerate(network.states)}
    fixed = {index[r]: 0.0 for r in references if r}
    fixed.update({index[s]: v for s, (v, sd) in anchor_values.items() if sd == 0})
    soft = {index[s]: (v, sd) for s, (v, sd) in anchor_values.items() if sd > 0}
    keep = np.ones(len(network.edges), bool)
    fit = _fit(network, fixed, soft, keep)
    checkable = int(np.isfinite(fit.z).sum())
    threshold = _z_threshold(alpha, checkable)
    suspects, notes = _snoop(network, fixed, soft, keep, threshold)
    cycles = _cycle_closures(network, components, alpha)
    component_of = np.zeros(len(network.states), int)
    for c, group in enumerate(components):
        component_of[[index[s] for s in group]] = c
    nodes = NodeValues(network.states, fit.values, fit.covariance, component_of, tuple(references))
    checks = _edge_checks(network, fit, threshold)
    p_value = None
    if fit.dof > 0:
        from scipy.stats import chi2

        p_value = float(chi2.sf(fit.chi_square, fit.dof))
    report = NetworkReport(network, nodes, checks, cycles, fit.chi_square, fit.dof, p_value,
                           tuple(tuple(g) for g in components), tuple(suspects), threshold, alpha, (), units,
                           fit.free, fit.information)
    return dataclasses.replace(report, warnings=tuple(notes) + _warnings(report))


def _spanning_tree(network: Network, components: list[list[str]]) -> tuple[dict[str, tuple[str, int] | None], set[int]]:
    """Breadth-first tree per component: parent (state, edge) of each state, and the tree's edges."""
    neighbours = _neighbours(network)
    parent: dict[str, tuple[str, int] | None] = {}
    tree: set[int] = set()
    for group in components:
        parent[group[0]] = None
        queue = deque([group[0]])
        while queue:
            s = queue.popleft()
            for t, k in neighbours[s]:
                if t not in parent:
                    parent[t] = (s, k)
                    tree.add(k)
                    queue.append(t)
    return parent, tree


def _path_to_root(parent: dict, state: str) -> list[tuple[str, int | None]]:
    path = [(state, None)]
    while parent[path[-1][0]] is not None:
        up, k = parent[path[-1][0]]
        path[-1] = (path[-1][0], k)
        path.append((up, None))
    return path


def _tree_path(parent: dict, start: str, end: str) -> list[tuple[str, int]]:
    """Steps (next state, edge) along the tree from ``start`` to ``end``."""
    up_start, up_end = _path_to_root(parent, start), _path_to_root(parent, end)
    on_end = {s: n for n, (s, _) in enumerate(up_end)}
    meet = next(n for n, (s, _) in enumerate(up_start) if s in on_end)
    steps = [(up_start[n + 1][0], up_start[n][1]) for n in range(meet)]
    down = up_end[:on_end[up_start[meet][0]]]
    steps += [(s, k) for s, k in reversed(down)]
    return steps


def _cycle_closures(network: Network, components: list[list[str]], alpha: float) -> tuple[CycleClosure, ...]:
    """One cycle per edge outside a spanning tree: that edge, then the tree path back."""
    parent, tree = _spanning_tree(network, components)
    covariance = network.edge_covariance
    non_tree = [k for k in range(len(network.edges)) if k not in tree]
    threshold = _z_threshold(alpha, len(non_tree))
    cycles = []
    for k in non_tree:
        edge = network.edges[k]
        signs = np.zeros(len(network.edges))
        signs[k] = 1.0
        states, names, here = [edge.state_a, edge.state_b], [_edge_label(network, k)], edge.state_b
        for step_to, j in _tree_path(parent, edge.state_b, edge.state_a):
            signs[j] += 1.0 if network.edges[j].state_a == here else -1.0
            states.append(step_to)
            names.append(_edge_label(network, j))
            here = step_to
        closure = float(signs @ np.array([e.delta_f for e in network.edges]))
        spread = float(math.sqrt(signs @ covariance @ signs))
        cycles.append(CycleClosure(tuple(states), tuple(names), closure, spread, abs(closure) > threshold * spread))
    return tuple(cycles)


def _edge_checks(network: Network, fit: _Fit, threshold: float) -> tuple[EdgeCheck, ...]:
    design = network.design
    checks = []
    for k, edge in enumerate(network.edges):
        fitted = float(design[k] @ fit.values)
        fitted_sd = float(math.sqrt(max(design[k] @ fit.covariance @ design[k], 0.0)))
        z = None if not np.isfinite(fit.z[k]) else float(fit.z[k])
        checks.append(EdgeCheck(_edge_label(network, k), edge.state_a, edge.state_b, edge.delta_f, edge.stderr,
                                fitted, fitted_sd, float(fit.residuals[k]), z, z is not None and abs(z) > threshold))
    return tuple(checks)


RERUN_ADVICE = ("rerun it with a larger budget, by the windows route (method='windows'), or with more starts "
                "(starts_a/starts_b: one configuration per basin) — a slow mode one run never crossed is the usual "
                "cause of an error bar that is too small")


def _warnings(report: NetworkReport) -> tuple[str, ...]:
    notes = []
    if len(report.components) > 1:
        groups = "; ".join(", ".join(g) for g in report.components)
        notes.append(f"the states fall into {len(report.components)} groups that no chain of pairs joins ({groups}); "
                     "each has its own reference and differences across groups are undefined: measure a pair "
                     "joining them")
    for name in report.suspects:
        check = next(e for e in report.edges if e.name == name)
        notes.append(f"pair {name} ({check.state_a} -> {check.state_b}) disagrees with the rest of the network: "
                     f"measured {check.measured:.4g} ± {check.stderr:.2g}, the network says {check.fitted:.4g} "
                     f"(normalised residual {check.z:+.1f}, limit ±{report.z_threshold:.2f}); {RERUN_ADVICE}")
    for cycle in report.cycles:
        if cycle.flagged:
            notes.append(f"cycle {' -> '.join(cycle.states)} does not close: sum {cycle.closure:+.4g} ± "
                         f"{cycle.spread:.2g} ({cycle.z:+.1f} σ)")
    if report.p_value is not None and report.p_value < report.alpha:
        notes.append(f"χ² = {report.chi_square:.1f} on {report.dof} degrees of freedom (p = {report.p_value:.2g}): "
                     "the pairs' error bars are too small for their disagreement")
    own = [e.name or f"{e.state_a}->{e.state_b}" for e in report.network.edges if e.flagged]
    if own:
        notes.append(f"pair(s) {', '.join(own)} were flagged by their own run; read their warnings")
    unchecked = [e.name for e in report.edges if e.z is None]
    if unchecked:
        notes.append(f"{len(unchecked)} pair(s) lie on no cycle, so nothing checks them ({', '.join(unchecked)}); "
                     "a pair that closes a cycle through them would")
    return tuple(notes)


def _summary_lines(report: NetworkReport) -> list[str]:
    units = f" ({report.units})" if report.units else ""
    lines = [f"network: {len(report.nodes.states)} states, {len(report.edges)} pairs, {len(report.cycles)} "
             f"independent cycle(s), {len(report.components)} group(s)", f"state values{units}:"]
    for row in report.node_rows():
        lines.append(f"  {row['state']:<16s} {row['value']:+11.4f} ± {row['stderr']:.4f}   "
                     f"(group {row['component']}, relative to {row['reference']})")
    if report.cycles:
        lines.append("cycle closures (sum of ΔF around the cycle; 0 if consistent):")
        for c in report.cycles:
            mark = "  DOES NOT CLOSE" if c.flagged else ""
            lines.append(f"  {' -> '.join(c.states):<40s} {c.closure:+.4f} ± {c.spread:.4f} ({c.z:+.1f} σ){mark}")
    lines.append("pairs (measured vs network):")
    for e in report.edges:
        z = "on no cycle" if e.z is None else f"z {e.z:+.1f}"
        mark = "  SUSPECT" if e.name in report.suspects else ("  over limit" if e.flagged else "")
        lines.append(f"  {e.name:<22s} {e.measured:+.4f} ± {e.stderr:.4f} -> {e.fitted:+.4f} ± {e.fitted_stderr:.4f}"
                     f" ({z}){mark}")
    if report.p_value is not None:
        lines.append(f"χ² = {report.chi_square:.2f} on {report.dof} degrees of freedom, p = {report.p_value:.3g} "
                     f"(edge limit |z| > {report.z_threshold:.2f}: Bonferroni over the pairs on cycles at "
                     f"α = {report.alpha})")
    else:
        lines.append("no redundancy (no cycles): the pairs cannot be checked against each other")
    lines += [f"warning: {w}" for w in report.warnings]
    lines.append("verdict: " + ("FLAGGED — see the warnings" if report.flagged else "consistent"))
    return lines


# ------------------------------------------------------------------ what to run next


@dataclasses.dataclass(frozen=True)
class NextPair:
    """A candidate pair and what measuring it with ``evaluations`` would do to the target's variance.

    ``unit_variance`` is variance × evaluations (energy units² · evaluations); ``assumed`` says it
    was not measured on this pair but taken as the median over the measured pairs.
    """

    state_a: str
    state_b: str
    evaluations: float
    unit_variance: float
    assumed: bool
    variance_before: float
    variance_after: float

    @property
    def reduction(self) -> float:
        """Fraction of the target's variance removed."""
        return 1.0 - self.variance_after / self.variance_before if self.variance_before > 0 else 0.0


def _target_vector(report: NetworkReport, target: Any) -> np.ndarray | None:
    """c with target = cᵀ F: a state (its value), a pair (a, b) (F_b − F_a), or None (all states)."""
    nodes = report.nodes
    if target is None:
        return None
    c = np.zeros(len(nodes.states))
    if isinstance(target, str):
        c[nodes.index(target)] = 1.0
        return c
    if isinstance(target, (tuple, list)) and len(target) == 2:
        a, b = nodes.index(str(target[0])), nodes.index(str(target[1]))
        if nodes.component[a] != nodes.component[b]:
            raise NetworkError(f"target {tuple(target)}: the two states are in different groups; the first pair to "
                               "measure is one that joins the groups")
        c[a], c[b] = -1.0, 1.0
        return c
    raise NetworkError("target: give a state name, a pair (state_a, state_b), or None for all states")


def _unit_variances(report: NetworkReport, given: Mapping[tuple[str, str], float] | None) -> tuple[dict, float]:
    """Measured variance × evaluations per unordered pair of states, and the median over pairs."""
    measured: dict[frozenset, list[float]] = {}
    for e in report.network.edges:
        if e.evaluations:
            measured.setdefault(frozenset((e.state_a, e.state_b)), []).append(e.stderr ** 2 * e.evaluations)
    table = {k: float(np.mean(v)) for k, v in measured.items()}
    for (a, b), value in (given or {}).items():
        if not (math.isfinite(float(value)) and float(value) > 0):
            raise NetworkError(f"unit_variance for ({a}, {b}) must be a positive number (variance × evaluations)")
        table[frozenset((a, b))] = float(value)
    if not table:
        raise NetworkError("no pair has a known cost: give the pairs' evaluations, or unit_variance "
                           "{(state_a, state_b): variance × evaluations}")
    return table, float(np.median(list(table.values())))


def _candidates(report: NetworkReport, candidates: Iterable[tuple[str, str]] | None, c: np.ndarray | None):
    nodes = report.nodes
    if candidates is None:
        groups = set(range(len(report.components))) if c is None else {int(nodes.component[np.flatnonzero(c)[0]])}
        states = [s for i, s in enumerate(nodes.states) if nodes.component[i] in groups]
        return [(a, b) for n, a in enumerate(states) for b in states[n + 1:]
                if nodes.component[nodes.index(a)] == nodes.component[nodes.index(b)]]
    chosen = []
    for a, b in candidates:
        i, j = nodes.index(a), nodes.index(b)
        if i == j or nodes.component[i] != nodes.component[j]:
            raise NetworkError(f"candidate ({a}, {b}): a candidate must join two different states of one group")
        chosen.append((a, b))
    return chosen


def suggest_next_pair(report: NetworkReport, target: Any = None, *, candidates: Iterable[tuple[str, str]] | None = None,
                      unit_variance: Mapping[tuple[str, str], float] | None = None,
                      evaluations: float | None = None) -> list[NextPair]:
    """Candidate pairs ranked by how much one more measurement of each shrinks the target's variance.

    Adding a pair with row a (−1, +1) and variance v = s²/n changes the node covariance Σ to
    Σ − Σa aᵀΣ / (v + aᵀΣa) (Sherman–Morrison), so the target cᵀF loses (cᵀΣa)² / (v + aᵀΣa).
    At equal ``evaluations`` for every candidate this also ranks the reduction per evaluation.

    Args:
        report: from :func:`solve_network`.
        target: a state (its value against its group's reference or anchors), a pair
            ``(state_a, state_b)`` (their difference), or None: the sum of all node variances.
        candidates: pairs ``(state_a, state_b)`` to consider (default: every pair of states within
            the target's group, measured or not).
        unit_variance: ``{(state_a, state_b): variance × evaluations}`` for candidates not yet
            measured; measured pairs use stderr² × evaluations of their runs, and the rest the
            median over the measured pairs (``assumed`` is then True).
        evaluations: the budget of the new pair (default: the median over the measured pairs).
    """
    c = _target_vector(report, target)
    table, median = _unit_variances(report, unit_variance)
    spent = [e.evaluations for e in report.network.edges if e.evaluations]
    n = float(evaluations if evaluations is not None else np.median(spent) if spent else 0.0)
    if not n > 0:
        raise NetworkError("evaluations: give the budget of the next pair (a positive number of evaluations)")
    sigma = report.nodes.covariance
    before = float(np.trace(sigma) if c is None else c @ sigma @ c)
    ranked = []
    for a, b in _candidates(report, candidates, c):
        key = frozenset((a, b))
        s2 = table.get(key, median)
        row = np.zeros(len(report.nodes.states))
        row[report.nodes.index(a)], row[report.nodes.index(b)] = -1.0, 1.0
        sa = sigma @ row
        gain = float(sa @ sa if c is None else (c @ sa) ** 2) / (s2 / n + float(row @ sa))
        ranked.append(NextPair(a, b, n, s2, key not in table, before, before - gain))
    return sorted(ranked, key=lambda p: p.variance_after)


@dataclasses.dataclass(frozen=True)
class BudgetSplit:
    """Evaluations per candidate pair that minimise the target's variance, and that variance."""

    pairs: tuple[tuple[str, str], ...]
    evaluations: np.ndarray
    variance_before: float
    variance_after: float


def split_budget(report: NetworkReport, budget: float, *, target: Any = None,
                 candidates: Iterable[tuple[str, str]] | None = None,
                 unit_variance: Mapping[tuple[str, str], float] | None = None) -> BudgetSplit:
    """Spread ``budget`` evaluations over candidate pairs to minimise the target's variance.

    With n_e evaluations on pair e the information over the fitted states grows from I₀ to
    I₀ + Σ n_e/s_e² a_e a_eᵀ; the objective cᵀ(I)⁻¹c (or its trace for ``target=None``:
    A-optimal in Xu 2019's terms) is convex in the fractions n_e/budget, minimised here by SLSQP
    on the simplex.  Arguments as in :func:`suggest_next_pair`.
    """
    from scipy.optimize import minimize

    if not (isinstance(budget, (int, float)) and math.isfinite(budget) and budget > 0):
        raise NetworkError(f"budget must be a positive number of evaluations, got {budget!r}")
    c = _target_vector(report, target)
    pairs = _candidates(report, candidates, c)
    table, median = _unit_variances(report, unit_variance)
    free = report.fitted_states
    rows = np.zeros((len(pairs), len(free)))
    position = {int(i): n for n, i in enumerate(free)}
    for k, (a, b) in enumerate(pairs):
        for state, sign in ((a, -1.0), (b, 1.0)):
            i = report.nodes.index(state)
            if i in position:
                rows[k, position[i]] = sign
    weights = np.array([budget / table.get(frozenset(p), median) for p in pairs])
    c_free = None if c is None else c[free]

    def variance(fractions: np.ndarray) -> float:
        inverse = np.linalg.inv(report.information + (rows.T * (weights * fractions)) @ rows)
        return float(np.trace(inverse) if c_free is None else c_free @ inverse @ c_free)

    start = np.full(len(pairs), 1.0 / len(pairs))
    best = minimize(variance, start, method="SLSQP", bounds=[(0.0, 1.0)] * len(pairs),
                    constraints=[{"type": "eq", "fun": lambda f: f.sum() - 1.0}])
    fractions = np.clip(best.x, 0.0, None)
    fractions /= fractions.sum()
    before = float(np.trace(report.nodes.covariance) if c is None else c @ report.nodes.covariance @ c)
    return BudgetSplit(tuple(pairs), fractions * budget, before, variance(fractions))
