"""Self-check: run the tool on cases whose ΔF is known independently and tabulate pass/fail.

References are computed here, at run time, from closed forms or scipy quadrature —
never taken from the tool's own output.

* Harmonic wells: ΔF = (kT/2) Σ_a ln(k_B,a/k_A,a), independent of the centres
  (Tuckerman 2010, *Statistical Mechanics: Theory and Molecular Simulation*, OUP;
  McQuarrie 1976, *Statistical Mechanics* [mem for chapter]).
* Double wells: ΔF = −kT ln(Z_B/Z_A) with Z = ∫ exp(−U/kT) dx by ``scipy.integrate.quad``.
* Catalogue systems (``systems/*.toml``) with a ``[reference]``: the file's ΔF and source
  (Müller–Brown by 2-D quadrature, the butane-like torsion change by 1-D quadrature over the
  dihedral, the Lennard-Jones decoupling from the Kolafa–Nezbeda 1994 equation of state).
  The quick default runs :data:`QUICK_CATALOGUE`; ``include_slow=True`` runs every file with a
  reference (the particle systems take minutes each).

A case passes when |estimate − reference| ≤ max(0.1 kT, 4·stderr) and the reported
stderr is at most 0.15 kT — the tool's accuracy promise for its default settings.
"""
from __future__ import annotations

import dataclasses
import math
from typing import Callable

import jax.numpy as jnp
import numpy as np
from scipy.integrate import quad

from .energy import fields
from .results import CAUTION
from .workflow import estimate


@dataclasses.dataclass
class Case:
    name: str
    energy_a: Callable
    energy_b: Callable
    start_a: np.ndarray
    start_b: np.ndarray
    reference: float  # ΔF in kT
    source: str
    kT: float = 1.0
    system: object = None  # a fe_tool.systemfile.System: run through System.estimate (its path and settings)


@dataclasses.dataclass
class CaseOutcome:
    name: str
    reference: float
    delta_f: float
    stderr: float
    passed: bool
    evaluations: int
    seconds: float
    warnings: list[str]
    source: str


def harmonic_reference(stiffness_a, stiffness_b, kT: float = 1.0) -> float:
    """(kT/2) Σ ln(k_B/k_A) (Tuckerman 2010, OUP)."""
    return 0.5 * kT * float(np.sum(np.log(np.asarray(stiffness_b) / np.asarray(stiffness_a))))


def harmonic_case(name, k_a, k_b, c_a, c_b, kT=1.0) -> Case:
    k_a, k_b, c_a, c_b = (np.asarray(v, dtype=np.float64) for v in (k_a, k_b, c_a, c_b))
    return Case(name,
                lambda x: fields.harmonic_well_energy(x, jnp.asarray(c_a), jnp.asarray(k_a)),
                lambda x: fields.harmonic_well_energy(x, jnp.asarray(c_b), jnp.asarray(k_b)),
                c_a, c_b, harmonic_reference(k_a, k_b, kT) / kT,
                "closed form (kT/2)Σln(k_B/k_A), Tuckerman 2010", kT)


def double_well_reference(params_a: dict, params_b: dict) -> float:
    """−ln(Z_B/Z_A) of 1-D double wells (transverse parts equal, they cancel), by quadrature."""
    def z(p):
        u = lambda x: p["height"] * (x * x - p["minimum_squared"]) ** 2 + p["tilt"] * x  # noqa: E731
        return quad(lambda x: math.exp(-u(x)), -np.inf, np.inf, epsabs=1e-13, epsrel=1e-12)[0]
    return -math.log(z(params_b) / z(params_a))


def double_well_case(name, params_a, params_b, dim=1) -> Case:
    start = np.zeros(dim)
    start[0] = -1.0
    return Case(name,
                lambda x: fields.double_well_energy(x, **params_a),
                lambda x: fields.double_well_energy(x, **params_b),
                start, start.copy(), double_well_reference(params_a, params_b),
                "scipy.integrate.quad of exp(−U/kT)")


def standard_cases(include_slow: bool = False) -> list[Case]:
    rng = np.random.default_rng(7)
    cases = [
        harmonic_case("harmonic 1-D, k 1→4, centre 0→1.5", [1.0], [4.0], [0.0], [1.5]),
        harmonic_case("harmonic 2-D, anisotropic, shifted", [1.0, 2.0], [3.0, 0.5], [0.0, 0.0], [0.7, -0.4]),
        harmonic_case("harmonic 3-D, stiffness ×10", [1.0] * 3, [10.0] * 3, [0.0] * 3, [0.5, -0.3, 0.2]),
        harmonic_case("harmonic 10-D, random stiffness", rng.uniform(0.5, 5, 10), rng.uniform(0.5, 5, 10),
                      np.zeros(10), rng.normal(0, 0.5, 10)),
        double_well_case("double well 1-D, barrier 1→2.5 kT, tilted",
                         dict(height=1.0, minimum_squared=1.0, tilt=0.0),
                         dict(height=2.5, minimum_squared=1.0, tilt=0.8)),
        double_well_case("double well 3-D, tilt reversed",
                         dict(height=1.5, minimum_squared=1.0, tilt=0.5, transverse_stiffness=2.0),
                         dict(height=1.5, minimum_squared=1.0, tilt=-0.5, transverse_stiffness=2.0), dim=3),
    ]
    if include_slow:
        cases.append(harmonic_case("harmonic 50-D, stiffness 0.5–20", np.exp(rng.uniform(np.log(0.5), np.log(20), 50)),
                                   np.exp(rng.uniform(np.log(0.5), np.log(20), 50)), np.zeros(50),
                                   rng.normal(0, 0.5, 50)))
        cases.append(harmonic_case("harmonic 3-D in kJ/mol at 300 K, restraint loosened", [1000.0] * 3, [250.0] * 3,
                                   [1.2, 0.8, 2.0], [1.2, 0.8, 2.0], kT=0.00831446261815324 * 300.0))
    return cases


QUICK_CATALOGUE = ("mueller_brown",)
"""Catalogue files (stems) in the quick self-check; the rest need ``include_slow=True``."""
BENCHMARK_ONLY = ("lj_fluid_decoupling_256",)
"""Catalogue files too slow for any self-check (run them with ``benchmarks/``)."""


def catalogue_cases(include_slow: bool = False) -> list[Case]:
    """One case per catalogue file with a ``[reference]`` (quick subset unless ``include_slow``).

    The reference is the file's own ``delta_f`` (computed independently when the file was
    written and recomputed by the tests), converted to kT.
    """
    from .systemfile import list_systems, load_system

    field_duplicates = {"harmonic_3d", "double_well_1d", "harmonic_anisotropic_50d", "restraint_release_kjmol"}
    cases = []
    for file in list_systems():
        if file.stem in field_duplicates or file.stem in BENCHMARK_ONLY:  # duplicates / benchmark size
            continue
        if not include_slow and file.stem not in QUICK_CATALOGUE:
            continue
        system = load_system(file)
        if system.reference is None:
            continue
        cases.append(Case(f"catalogue: {file.stem}", system.energy_a, system.energy_b, system.start_a,
                          system.start_b, system.reference["delta_f"] / system.kT, system.reference["source"],
                          system.kT, system=system))
    return cases


def run_case(case: Case, seed: int = 0, **options) -> CaseOutcome:
    if case.system is not None:
        result = case.system.estimate(seed=seed, **options)
    else:
        result = estimate(case.energy_a, case.energy_b, case.start_a, case.start_b, kT=case.kT, seed=seed, **options)
    df, se = result.in_kT()
    passed = abs(df - case.reference) <= max(0.1, 4 * se) and se <= 0.15
    return CaseOutcome(case.name, case.reference, df, se, bool(passed), result.energy_evaluations,
                       result.timings.get("total", float("nan")), result.warnings, case.source)


def run_selfcheck(include_slow: bool = False, seed: int = 0, extra_cases: list[Case] | None = None,
                  **options) -> list[CaseOutcome]:
    cases = standard_cases(include_slow) + catalogue_cases(include_slow) + list(extra_cases or [])
    return [run_case(c, seed=seed, **options) for c in cases]


def format_table(outcomes: list[CaseOutcome]) -> str:
    lines = [f"{'case':<48s} {'reference':>10s} {'estimate':>10s} {'± stderr':>9s} {'error':>8s} "
             f"{'evaluations':>12s} {'time/s':>7s}  result", "-" * 120]
    for o in outcomes:
        lines.append(f"{o.name:<48s} {o.reference:10.4f} {o.delta_f:10.4f} {o.stderr:9.4f} "
                     f"{o.delta_f - o.reference:+8.4f} {o.evaluations:12,d} {o.seconds:7.1f}  "
                     f"{'pass' if o.passed else 'FAIL'}")
    lines.append("-" * 120)
    passed = sum(o.passed for o in outcomes)
    lines.append(f"{passed} of {len(outcomes)} cases within max(0.1 kT, 4·stderr) of the reference (all values in kT).")
    lines.append("References: closed forms (Tuckerman 2010, OUP), scipy.integrate.quad/dblquad, and for catalogue "
                 "files their [reference] source (e.g. the Kolafa & Nezbeda 1994 LJ equation of state).")
    lines.append("")
    lines.append(CAUTION)
    return "\n".join(lines)
