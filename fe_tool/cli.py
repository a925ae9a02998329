"""Command line: ``fe-tool run SYSTEM``, ``check``, ``list``, ``compare SYSTEM``, ``batch FILE``.

The CLI uses only the public API (:func:`fe_tool.estimate` through system files).
Exit status: 0 on success, 1 when a result is flagged or a check fails, 2 on bad input.
"""
from __future__ import annotations

import argparse
import json
import sys

from .systemfile import SystemFileError, find_system, list_systems, load_system


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="fe-tool", description="Free-energy differences between two end states.")
    sub = p.add_subparsers(dest="command", required=True)

    run = sub.add_parser("run", help="estimate ΔF for a system file and print the summary")
    run.add_argument("system", help="a system file, or the name of a bundled system (see `fe-tool list`)")
    run.add_argument("--json", metavar="PATH", help="also write the full result as JSON to PATH")
    run.add_argument("--seed", type=int, help="random seed (default: the file's, else 0)")
    run.add_argument("--budget", type=int, help="total energy evaluations to spend")
    run.add_argument("--steps", type=int, dest="switching_steps", help="switching steps per trajectory")
    run.add_argument("--trajectories", type=int, help="trajectories per direction")
    run.add_argument("--schedule", help="λ schedule: linear, cosine or power")
    run.add_argument("--method", choices=["switching", "windows"], help="route: switching (default) or windows")
    run.add_argument("--control", help="switching control: none, learned, auto, or a saved control file")
    run.add_argument("--save-control", dest="save_control", metavar="FILE", help="save a trained control to FILE")
    run.add_argument("--kcal", action="store_true", help="report kJ/mol systems in kcal/mol")
    run.add_argument("--quiet", action="store_true", help="no progress bars")
    run.add_argument("--plot", metavar="DIR", help="write PNG plots (work distributions, convergence, dissipation) to DIR")

    check = sub.add_parser("check", help="self-check against closed-form and quadrature references")
    check.add_argument("--all", action="store_true", help="include the slower cases")
    check.add_argument("--seed", type=int, default=0)
    check.add_argument("--budget", type=int, help="budget per case (default: the tool's default)")

    sub.add_parser("list", help="list the bundled systems")
    sub.add_parser("batch", help="run a batch file of many pairs (see `fe-tool batch --help`)", add_help=False)

    compare = sub.add_parser("compare", help="compare routes at equal budget over repeated seeds")
    compare.add_argument("system", help="a system file or bundled name (its reference ΔF is the truth if given)")
    compare.add_argument("--budget", type=int, default=100_000, help="evaluations per run (default 100000)")
    compare.add_argument("--seeds", type=int, default=3, help="number of seeds (default 3)")
    compare.add_argument("--routes", default="switching,windows-mbar,windows-ti",
                         help="comma-separated routes (switching, switching-learned, windows-mbar, windows-bar, windows-ti)")
    return p


def _run(args) -> int:
    system = load_system(find_system(args.system))
    overrides = {k: getattr(args, k) for k in ("seed", "budget", "switching_steps", "trajectories", "schedule",
                                                "method", "control", "save_control")
                 if getattr(args, k) is not None}
    if args.quiet:
        overrides["progress"] = False
    print(f"system: {system.name} ({system.source})")
    if system.description:
        print("  " + system.description.strip().replace("\n", "\n  "))
    print()
    result = system.estimate(**overrides)
    if args.kcal and system.units == "kJ/mol":
        from .units import convert_energy
        result = result.converted("kcal/mol", convert_energy(1.0, "kJ/mol", "kcal/mol"))
    print(result.summary())
    if args.plot:
        from .plots import plot_result

        written = plot_result(result, args.plot)
        print(f"\nplots written: {', '.join(str(p) for p in written)}")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(result.to_dict(), fh, indent=1)
        print(f"\nfull result written to {args.json}")
    return 1 if result.flagged else 0


def _check(args) -> int:
    from .validation import format_table, run_selfcheck

    options = {"budget": args.budget} if args.budget else {}
    outcomes = run_selfcheck(include_slow=args.all, seed=args.seed, **options)
    print(format_table(outcomes))
    return 0 if all(o.passed for o in outcomes) else 1


def _compare(args) -> int:
    from .comparison import compare_routes

    system = load_system(find_system(args.system))
    exact = system.reference["delta_f"] if system.reference else None
    rows, text = compare_routes(system.energy_a, system.energy_b, system.start_a, system.start_b, kT=system.kT,
                                exact=exact, budget=args.budget, seeds=tuple(range(args.seeds)),
                                routes=tuple(r.strip() for r in args.routes.split(",") if r.strip()),
                                units=system.units if system.units != "reduced" else "kT")
    print(f"system: {system.name}; budget {args.budget:,} evaluations per run; {args.seeds} seeds")
    print(text)
    return 0


def _list(args) -> int:
    systems = list_systems()
    if not systems:
        print("no bundled systems found (set FE_TOOL_SYSTEMS to the catalogue folder)")
        return 1
    for path in systems:
        try:
            s = load_system(path)
            ref = f"reference {s.reference['delta_f']:.4f} {s.units}" if s.reference else "no reference"
            first = s.description.strip().splitlines()[0] if s.description else ""
            print(f"{path.stem:<32s} {ref:<34s} {first}")
        except SystemFileError as err:
            print(f"{path.stem:<32s} INVALID: {err}")
    return 0


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    if argv and argv[0] == "batch":  # the batch runner owns its options
        from .batch import main_batch

        return main_batch(argv[1:])
    args = _parser().parse_args(argv)
    try:
        return {"run": _run, "check": _check, "list": _list, "compare": _compare}[args.command](args)
    except (SystemFileError, ValueError) as err:
        print(f"fe-tool: error: {err}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
