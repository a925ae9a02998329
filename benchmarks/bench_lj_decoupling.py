"""Benchmark: excess chemical potential of the LJ fluid by decoupling, the bundled files at their own settings.

Runs the Lennard-Jones decoupling files of the catalogue (108 particles at T* = 2, ρ* = 0.3;
256 at the same state; 108 at the dense state T* = 1.5, ρ* = 0.7), each at the file's own
settings, and compares βμ_ex = −ΔF/kT with two equations of state for the full LJ potential,
implemented in ``tests/test_lj_fluid.py`` from docs/references.md §9: Kolafa & Nezbeda 1994
(Fluid Phase Equilib. 100, 1) and Johnson, Zollweg & Gubbins 1993 (Mol. Phys. 78, 591).
``--zero-steps`` also runs every file with ``switching_steps=0`` (plain test-particle insertion
and deletion, no switching) at the same budget, the classic route the tool's own choice is
measured against. Wall times include compilation; prints a table, asserts nothing.

Usage::

    python benchmarks/bench_lj_decoupling.py [--files lj_fluid_decoupling ...] [--seeds 0 1] [--zero-steps]
"""
from __future__ import annotations

import argparse
import pathlib
import sys
import time

import fe_tool  # noqa: F401  (float64)

ROOT = pathlib.Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from test_lj_fluid import (  # noqa: E402
    beta_excess_chemical_potential,
    jzg_residual_free_energy,
    kn_residual_free_energy,
)

from fe_tool.systemfile import load_system  # noqa: E402

FILES = ("lj_fluid_decoupling", "lj_fluid_decoupling_256", "lj_fluid_dense_decoupling")


def _row(name: str, system, seed: int, options: dict) -> str:
    import numpy as np

    t0 = time.perf_counter()
    result = system.estimate(seed=seed, progress=False, **options)
    wall = time.perf_counter() - t0
    density = system.particles["count"] / float(np.prod(system.particles["box"]))
    kn = beta_excess_chemical_potential(kn_residual_free_energy, system.kT, density)
    jzg = beta_excess_chemical_potential(jzg_residual_free_energy, system.kT, density)
    beta_mu, error = -result.delta_f / system.kT, result.stderr / system.kT
    steps = result.settings.get("switching_steps")
    route = "insertion" if steps == 0 else f"switching K={steps}"
    return (f"{name:<26s} {seed:>4d} {route:<20s} {beta_mu:9.4f} ± {error:6.4f} {kn:9.4f} {jzg:9.4f} "
            f"{beta_mu - kn:+8.4f} {result.energy_evaluations:>10,d} {wall:7.1f} {'yes' if result.flagged else 'no':>7s}")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", nargs="+", default=list(FILES))
    parser.add_argument("--seeds", nargs="+", type=int, default=[0])
    parser.add_argument("--budget", type=int, default=None, help="energy evaluations (default: each file's)")
    parser.add_argument("--zero-steps", action="store_true", help="also run with switching_steps=0 (insertion only)")
    args = parser.parse_args(argv)
    print(f"{'file':<26s} {'seed':>4s} {'route':<20s} {'βμ_ex':>9s}   {'σ':>6s} {'KN 1994':>9s} {'JZG 1993':>9s} "
          f"{'− KN':>8s} {'evaluations':>10s} {'wall s':>7s} {'flagged':>7s}")
    for name in args.files:
        system = load_system(ROOT / "systems" / f"{name}.toml")
        options = {} if args.budget is None else {"budget": args.budget}
        variants = [("", options)] + ([(" (zero steps)", {**options, "switching_steps": 0})] if args.zero_steps else [])
        for label, opts in variants:
            for seed in args.seeds:
                print(_row(name + label, system, seed, opts), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
