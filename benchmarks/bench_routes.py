"""Routes to ΔF at equal cost: switching vs windows (MBAR, neighbour BAR, TI) on bundled systems.

For each system and budget, every route runs once per seed at the same energy-evaluation
budget; the table gives bias, RMSE, mean reported error, 95 % coverage, cost and the
efficiency 1/(RMSE²·cost) against the system file's reference ΔF.

    python benchmarks/bench_routes.py                       # budgets 1e5 and 1e6, 3 seeds
    python benchmarks/bench_routes.py --budgets 100000 --seeds 0 1 2 3 --exchange
"""
from __future__ import annotations

import argparse
import pathlib
import time

import fe_tool  # noqa: F401  (float64, compilation cache)
from fe_tool.routes.comparison import compare_routes
from fe_tool.systemfile import load_system

ROOT = pathlib.Path(__file__).resolve().parent.parent
SYSTEMS = ("harmonic_3d", "double_well_1d", "harmonic_anisotropic_50d")


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--systems", nargs="+", default=list(SYSTEMS))
    parser.add_argument("--budgets", nargs="+", type=int, default=[100_000, 1_000_000])
    parser.add_argument("--seeds", nargs="+", type=int, default=[0, 1, 2])
    parser.add_argument("--routes", nargs="+", default=["switching", "windows-mbar", "windows-bar", "windows-ti"])
    parser.add_argument("--exchange", action="store_true", help="replica exchange in the windows route")
    args = parser.parse_args(argv)
    for name in args.systems:
        system = load_system(ROOT / "systems" / f"{name}.toml")
        exact = system.reference["delta_f"] if system.reference else None
        for budget in args.budgets:
            t0 = time.perf_counter()
            rows, text = compare_routes(
                system.energy_a, system.energy_b, system.start_a, system.start_b, kT=system.kT, exact=exact,
                budget=budget, seeds=args.seeds, routes=args.routes,
                options={"windows": {"exchange": args.exchange}}, units=system.units)
            print(f"\n== {name}, budget {budget:.0e}, seeds {args.seeds} ({time.perf_counter() - t0:.0f} s)")
            print(text)
            for r in rows:
                for failure in r["failures"]:
                    print(f"   {r['route']} failed: {failure}")


if __name__ == "__main__":
    main()
