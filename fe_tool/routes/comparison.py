"""Compare routes to ΔF at the same energy-evaluation budget over repeated seeds.

A *route* is a callable ``route(call: RouteCall) -> (delta_f, stderr, evaluations)`` with
ΔF and its error in the energies' units; :data:`ROUTES` maps names to routes and is the place
to add one (``ROUTES["my-route"] = fn`` or ``compare_routes(..., routes={"name": fn})``).
Routes that share one run (the windows route gives MBAR and TI) share it through
``call.cache``, so each run is paid for once.

Per route the table reports, over seeds: mean ΔF, bias and RMSE against the exact ΔF,
the mean reported error, the coverage of the 95 % interval ΔF ± 1.96 σ, the mean cost
and the efficiency 1 / (RMSE² · cost) (also relative to the best route).  Without an exact
ΔF the spread (standard deviation over seeds) replaces the RMSE, and each route's mean is
compared with the error-weighted consensus of all routes.
"""
from __future__ import annotations

import dataclasses
import math
from typing import Any, Callable, Mapping, Sequence

import numpy as np


@dataclasses.dataclass
class RouteCall:
    """Everything a route needs for one run; ``cache`` is shared by all routes of one seed."""

    energy_a: Callable
    energy_b: Callable
    start_a: Any
    start_b: Any
    kT: float
    seed: int
    budget: int
    options: dict
    cache: dict


def _switching_with(control: str, option_key: str) -> Callable[[RouteCall], tuple[float, float, int]]:
    def route(call: RouteCall) -> tuple[float, float, int]:
        from ..workflow import estimate

        options = {"control": control, **call.options.get(option_key, {})}
        r = estimate(call.energy_a, call.energy_b, call.start_a, call.start_b, kT=call.kT, seed=call.seed,
                     budget=call.budget, **options)
        return r.delta_f, r.stderr, r.energy_evaluations
    return route


def _windows_result(call: RouteCall):
    from .windows import estimate_windows

    if "windows" not in call.cache:
        call.cache["windows"] = estimate_windows(call.energy_a, call.energy_b, call.start_a, call.start_b,
                                                 kT=call.kT, seed=call.seed, budget=call.budget,
                                                 **call.options.get("windows", {}))
    return call.cache["windows"]


def _windows_estimate(name: str) -> Callable[[RouteCall], tuple[float, float, int]]:
    def route(call: RouteCall) -> tuple[float, float, int]:
        r = _windows_result(call)
        est = r.estimates[name]
        return est.delta_f, est.stderr, r.energy_evaluations
    return route


def _windows_ti(call: RouteCall) -> tuple[float, float, int]:
    r = _windows_result(call)
    est = r.estimates.get("ti_gauss_legendre", r.estimates["ti_trapezoid"])
    return est.delta_f, est.stderr, r.energy_evaluations


ROUTES: dict[str, Callable[[RouteCall], tuple[float, float, int]]] = {
    "switching": _switching_with("none", "switching"),
    "switching-learned": _switching_with("learned", "switching-learned"),
    "switching-auto": _switching_with("auto", "switching-auto"),
    "windows-mbar": _windows_estimate("mbar"),
    "windows-bar": _windows_estimate("bar_ladder"),
    "windows-ti": _windows_ti,
}


def _summarise(name: str, values: np.ndarray, errors: np.ndarray, costs: np.ndarray, exact: float | None,
               failures: list[str]) -> dict:
    ok = np.isfinite(values)
    v, e, c = values[ok], errors[ok], costs[ok]
    row: dict[str, Any] = {"route": name, "runs": int(values.size), "failed": int((~ok).sum()),
                           "mean": float(v.mean()) if v.size else math.nan,
                           "spread": float(v.std(ddof=1)) if v.size > 1 else math.nan,
                           "mean_error": float(np.nanmean(e)) if e.size else math.nan,
                           "cost": float(c.mean()) if c.size else math.nan,
                           "values": values.tolist(), "errors": errors.tolist(), "failures": failures}
    if exact is not None and v.size:
        row["bias"] = float(v.mean() - exact)
        row["rmse"] = float(np.sqrt(np.mean((v - exact) ** 2)))
        row["coverage"] = float(np.mean(np.abs(v - exact) <= 1.96 * e))
        scale = row["rmse"]
    else:
        scale = row["spread"]
    row["efficiency"] = float(1.0 / (scale**2 * row["cost"])) if v.size and scale > 0 else math.nan
    return row


def format_table(rows: Sequence[dict], exact: float | None, units: str = "energy units") -> str:
    """The comparison table as text (one line per route)."""
    if exact is not None:
        head = (f"{'route':<18s} {'runs':>4s} {'mean':>9s} {'bias':>8s} {'RMSE':>8s} {'⟨σ⟩':>8s} "
                f"{'cover95':>7s} {'cost':>10s} {'1/(RMSE²·cost)':>15s} {'relative':>8s}")
    else:
        head = (f"{'route':<18s} {'runs':>4s} {'mean':>9s} {'spread':>8s} {'⟨σ⟩':>8s} {'vs consensus':>12s} "
                f"{'cost':>10s} {'1/(spread²·cost)':>17s} {'relative':>8s}")
    lines = [f"ΔF comparison ({units}); exact ΔF = {exact:.4f}" if exact is not None
             else f"ΔF comparison ({units}); no exact ΔF: spread over seeds and agreement between routes", head]
    for r in rows:
        fail = f"  ({r['failed']} failed)" if r["failed"] else ""
        if exact is not None:
            lines.append(f"{r['route']:<18s} {r['runs']:>4d} {r['mean']:9.4f} {r.get('bias', math.nan):8.4f} "
                         f"{r.get('rmse', math.nan):8.4f} {r['mean_error']:8.4f} {r.get('coverage', math.nan):7.2f} "
                         f"{r['cost']:10.3g} {r['efficiency']:15.4g} {r['relative_efficiency']:8.2f}{fail}")
        else:
            lines.append(f"{r['route']:<18s} {r['runs']:>4d} {r['mean']:9.4f} {r['spread']:8.4f} {r['mean_error']:8.4f} "
                         f"{r.get('consensus_z', math.nan):12.2f} {r['cost']:10.3g} {r['efficiency']:17.4g} "
                         f"{r['relative_efficiency']:8.2f}{fail}")
    return "\n".join(lines)


def compare_routes(
    energy_a,
    energy_b,
    start_a,
    start_b,
    *,
    kT: float = 1.0,
    exact: float | None = None,
    budget: int,
    seeds: Sequence[int] = (0, 1, 2),
    routes: Sequence[str] | Mapping[str, Callable] = ("switching", "windows-mbar", "windows-ti"),
    options: dict | None = None,
    units: str = "energy units",
) -> tuple[list[dict], str]:
    """Run each route at the same budget for every seed; tabulate accuracy, error bars and cost.

    Args:
        energy_a, energy_b, start_a, start_b, kT: the two end states, as for :func:`fe_tool.estimate`.
        exact: known ΔF in the energies' units, or ``None``.
        budget: energy evaluations per run, the same for every route.
        seeds: one run per route and seed; the windows routes share one run per seed.
        routes: names in :data:`ROUTES`, or a mapping name -> route callable.
        options: per-route-family keyword options, e.g. ``{"windows": {"exchange": True},
            "switching": {"chains": 32}}``.

    Returns:
        ``(rows, text)``: one dict per route (``mean``, ``spread``, ``mean_error``, ``cost``,
        ``efficiency``, ``relative_efficiency``, and with ``exact``: ``bias``, ``rmse``,
        ``coverage``; without: ``consensus_z``), and the formatted table.  A run that raises
        is recorded as NaN with its message in ``failures``; it never aborts the comparison.

    Example:
        >>> rows, text = compare_routes(ea, eb, xa, xb, exact=1.04, budget=100_000, seeds=(0, 1))
    """
    table = dict(routes) if isinstance(routes, Mapping) else {}
    if not isinstance(routes, Mapping):
        unknown = [r for r in routes if r not in ROUTES]
        if unknown:
            raise ValueError(f"unknown route(s) {unknown}; available: {sorted(ROUTES)} (or pass a mapping name -> callable)")
        table = {r: ROUTES[r] for r in routes}
    if not seeds:
        raise ValueError("seeds must hold at least one seed")
    results = {name: ([], [], [], []) for name in table}
    for seed in seeds:
        cache: dict = {}
        for name, route in table.items():
            call = RouteCall(energy_a, energy_b, start_a, start_b, float(kT), int(seed), int(budget), options or {}, cache)
            try:
                value, error, cost = route(call)
                value, error, cost = float(value), float(error), float(cost)
            except Exception as err:  # a failed run is reported, never hidden, and never aborts the table
                value, error, cost = math.nan, math.nan, math.nan
                results[name][3].append(f"seed {seed}: {type(err).__name__}: {err}")
            results[name][0].append(value)
            results[name][1].append(error)
            results[name][2].append(cost)
    rows = [_summarise(name, np.array(v), np.array(e), np.array(c), exact, f) for name, (v, e, c, f) in results.items()]
    finite_eff = [r["efficiency"] for r in rows if math.isfinite(r["efficiency"])]
    best = max(finite_eff) if finite_eff else math.nan
    for r in rows:
        r["relative_efficiency"] = r["efficiency"] / best if finite_eff else math.nan
    if exact is None:
        # consensus: inverse-variance weighted mean of route means (variance of a mean = spread²/runs)
        usable = [r for r in rows if math.isfinite(r["mean"]) and math.isfinite(r["spread"]) and r["spread"] > 0]
        if usable:
            w = np.array([(r["runs"] - r["failed"]) / r["spread"] ** 2 for r in usable])
            consensus = float(np.sum(w * np.array([r["mean"] for r in usable])) / w.sum())
            for r in rows:
                n = r["runs"] - r["failed"]
                ok = math.isfinite(r["spread"]) and r["spread"] > 0 and n > 0
                r["consensus"] = consensus
                r["consensus_z"] = (r["mean"] - consensus) / (r["spread"] / math.sqrt(n)) if ok else math.nan
    return rows, format_table(rows, exact, units)
