"""Command line: ``fe-tool run SYSTEM``, ``check``, ``list``, ``compare SYSTEM``, ``batch FILE``, ``network DIR``.

The CLI uses only the public API (:func:`fe_tool.estimate` through system files). Every
command exits with the codes of :mod:`fe_tool.exitcodes`: 0 ok, 1 flagged (or a failed
self-check), 2 bad input (refused before computing), 3 internal error, 130 interrupted.
Output paths are checked before any computation and written atomically.
"""
from __future__ import annotations

import argparse
import difflib
import json
import math
import os
import pathlib
import sys
import traceback

from .exitcodes import EXIT_BAD_INPUT, EXIT_FLAGGED, EXIT_INTERNAL, EXIT_INTERRUPTED, EXIT_MEANINGS, EXIT_OK
from .options import InputError, writable_file
from .systemfile import SystemFileError, bundled_systems_folder, find_system, list_systems, load_system


def budget_number(text: str) -> int:
    """A budget as typed: ``100000``, ``1e5`` or ``1_000_000`` (a whole number ≥ 1)."""
    try:
        value = float(text.replace("_", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number of evaluations such as 100000 or 1e5, got {text!r}")
    if not (math.isfinite(value) and value >= 1 and value == int(value)):
        raise argparse.ArgumentTypeError(f"expected a whole number ≥ 1 such as 100000 or 1e5, got {text!r}")
    return int(value)


def _exit_code_text() -> str:
    return "exit status: " + "; ".join(f"{code} {text.split(':')[0]}" for code, text in EXIT_MEANINGS.items())


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="fe-tool", description="Free-energy differences between two end states.",
                                epilog=_exit_code_text())
    sub = p.add_subparsers(dest="command", required=True)

    run = sub.add_parser("run", help="estimate ΔF for a system file and print the summary", epilog=_exit_code_text())
    run.add_argument("system", help="a system file, or the name of a bundled system (see `fe-tool list`)")
    run.add_argument("--json", metavar="PATH", help="also write the full result as JSON to PATH")
    run.add_argument("--seed", type=int, help="random seed (default: the file's, else 0)")
    run.add_argument("--budget", type=budget_number, help="total energy evaluations to spend (e.g. 1e6)")
    run.add_argument("--steps", type=int, dest="switching_steps",
                     help="switching steps per trajectory (0: insertion/deletion only, no switching)")
    run.add_argument("--trajectories", type=int, help="trajectories per direction")
    run.add_argument("--schedule", help="λ schedule: adaptive, linear, cosine or power")
    run.add_argument("--method", choices=["switching", "windows"], help="route: switching (default) or windows")
    run.add_argument("--sampler", choices=["auto", "mala", "kinetic", "kinetic_exact"],
                     help="equilibrium sampling kernel: mala (exact), kinetic (BAOAB Langevin), "
                          "kinetic_exact (generalised HMC); auto = mala")
    run.add_argument("--control", help="switching control: none, learned, auto, or a saved control file")
    run.add_argument("--save-control", dest="save_control", metavar="FILE", help="save a trained control to FILE")
    run.add_argument("--kcal", action="store_true", help="report kJ/mol systems in kcal/mol")
    run.add_argument("--quiet", action="store_true", help="no progress bars")
    run.add_argument("--plot", metavar="DIR",
                     help="write PNG figures (work distributions, ΔF against the number of trajectories, "
                          "work along λ) to DIR, in the result's units")
    run.add_argument("--plot-in-kT", dest="plot_in_kT", action="store_true",
                     help="draw the figures in kT instead of the result's units")
    run.add_argument("--plot-caution", dest="plot_caution", action="store_true",
                     help="add the caution about simulated free energies to each figure as a footnote")
    run.add_argument("--allow-outside-files", action="store_true",
                     help="let the system file read data files outside its own folder")

    check = sub.add_parser("check", help="self-check against closed-form and quadrature references",
                           epilog=_exit_code_text())
    check.add_argument("--all", action="store_true", help="include the slower cases")
    check.add_argument("--seed", type=int, default=0)
    check.add_argument("--budget", type=budget_number, help="budget per case (default: the tool's default)")

    sub.add_parser("list", help="list the bundled systems")
    sub.add_parser("batch", help="run a batch file of many pairs (see `fe-tool batch --help`)", add_help=False)
    sub.add_parser("network", help="state values from a batch's pairs that name their states "
                                   "(see `fe-tool network --help`)", add_help=False)

    compare = sub.add_parser("compare", help="compare routes at equal budget over repeated seeds",
                             epilog=_exit_code_text())
    compare.add_argument("system", help="a system file or bundled name (its reference ΔF is the truth if given)")
    compare.add_argument("--budget", type=budget_number, default=100_000, help="evaluations per run (default 1e5)")
    compare.add_argument("--seeds", type=int, default=3, help="number of seeds (default 3)")
    compare.add_argument("--routes", default="switching,windows-mbar,windows-ti",
                         help="comma-separated routes (switching, switching-learned, windows-mbar, windows-bar, windows-ti)")
    return p


def _find(name: str) -> pathlib.Path:
    """A system file by path or bundled name; a misspelled bundled name gets a suggestion."""
    try:
        return find_system(name)
    except SystemFileError as err:
        names = [p.stem for p in list_systems()]
        close = difflib.get_close_matches(pathlib.Path(name).stem, names, n=3, cutoff=0.5)
        if close:
            raise SystemFileError(f"{err}. Did you mean {' or '.join(repr(c) for c in close)}?") from None
        raise


def _check_outputs(args) -> None:
    """Refuse unwritable output paths before any computation (a finished run is never lost)."""
    if args.json:
        writable_file(args.json, "--json")
    if args.save_control:
        writable_file(args.save_control, "--save-control")
    if args.plot:
        folder = pathlib.Path(args.plot)
        parent = folder.resolve().parent
        if folder.exists() and not folder.is_dir():
            raise InputError(f"--plot {args.plot!r} is a file; give a folder for the figures")
        if not folder.exists() and not (parent.is_dir() and os.access(parent, os.W_OK)):
            raise InputError(f"--plot {args.plot!r}: its parent folder {str(parent)!r} does not exist or is not "
                             "writable; create it first")


def _run(args) -> int:
    system = load_system(_find(args.system), allow_outside_files=args.allow_outside_files)
    _check_outputs(args)
    overrides = {k: getattr(args, k) for k in ("seed", "budget", "switching_steps", "trajectories", "schedule",
                                                "method", "sampler", "control", "save_control")
                 if getattr(args, k) is not None}
    if args.quiet:
        overrides["progress"] = False
    print(f"system: {system.name} ({system.source})")
    if system.description:
        print("  " + system.description.strip().replace("\n", "\n  "))
    print()
    result = system.estimate(**overrides)
    result.settings.setdefault("system", system.name)   # figure titles name the system
    if args.kcal and system.units == "kJ/mol":
        from .units import convert_energy
        result = result.converted("kcal/mol", convert_energy(1.0, "kJ/mol", "kcal/mol"))
    if args.json:   # the result first: it must survive anything that follows
        from .atomic import write_text_atomically
        write_text_atomically(args.json, json.dumps(result.to_dict(), indent=1))
    print(result.summary())
    if args.json:
        print(f"\nfull result written to {args.json}")
    if args.plot:
        from .plots import draw_result

        written = draw_result(result, args.plot, in_kT=args.plot_in_kT, caution=args.plot_caution)
        print(f"\nfigures written: {', '.join(str(p) for p in written)}")
    return EXIT_FLAGGED if result.flagged else EXIT_OK


def _check(args) -> int:
    from .validation import format_table, run_selfcheck

    options = {"budget": args.budget} if args.budget else {}
    outcomes = run_selfcheck(include_slow=args.all, seed=args.seed, **options)
    print(format_table(outcomes))
    return EXIT_OK if all(o.passed for o in outcomes) else EXIT_FLAGGED


def _compare(args) -> int:
    from .routes.comparison import ROUTES, compare_routes

    system = load_system(_find(args.system))
    routes = tuple(r.strip() for r in args.routes.split(",") if r.strip())
    unknown = [r for r in routes if r not in ROUTES]
    if unknown or not routes:
        raise InputError(f"--routes: unknown route(s) {unknown}; available: {sorted(ROUTES)}")
    if args.seeds < 1:
        raise InputError(f"--seeds must be at least 1, got {args.seeds}")
    exact = system.reference["delta_f"] if system.reference else None
    rows, text = compare_routes(system.energy_a, system.energy_b, system.start_a, system.start_b, kT=system.kT,
                                exact=exact, budget=args.budget, seeds=tuple(range(args.seeds)), routes=routes,
                                units=system.units if system.units != "reduced" else "kT")
    print(f"system: {system.name}; budget {args.budget:,} evaluations per run; {args.seeds} seeds")
    print(text)
    failures = [(row["route"], message) for row in rows for message in row["failures"]]
    for route, message in failures:
        print(f"  failed: {route}: {message}", file=sys.stderr)
    if failures:
        return EXIT_BAD_INPUT if all("InputError" in m or "SystemFileError" in m for _, m in failures) \
            else EXIT_INTERNAL
    return EXIT_FLAGGED if any(row.get("flagged", 0) for row in rows) else EXIT_OK


def _list(args) -> int:
    from .systemfile import first_sentence

    systems = list_systems()
    if not systems:
        print(f"no bundled systems found in {bundled_systems_folder()} (set FE_TOOL_SYSTEMS to the catalogue folder)")
        return EXIT_BAD_INPUT
    for path in systems:
        try:
            s = load_system(path)
            ref = f"reference {s.reference['delta_f']:.4f} {s.units}" if s.reference else "no reference"
            print(f"{path.stem:<32s} {ref:<34s} {first_sentence(s.description)}")   # the whole first sentence
        except SystemFileError as err:
            print(f"{path.stem:<32s} INVALID: {err}")
    return EXIT_OK


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    if argv and argv[0] == "batch":  # the batch runner owns its options
        from .batch import main_batch

        return main_batch(argv[1:])
    if argv and argv[0] == "network":  # so does the network of a batch's pairs
        from .network_command import main_network

        return main_network(argv[1:])
    args = _parser().parse_args(argv)
    try:
        return {"run": _run, "check": _check, "list": _list, "compare": _compare}[args.command](args)
    except KeyboardInterrupt:
        print("fe-tool: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except (SystemFileError, InputError) as err:
        print(f"fe-tool: error: {err}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except Exception as err:  # noqa: BLE001 - anything else is our fault: say so, keep the details
        print(f"fe-tool: internal error: {type(err).__name__}: {err}\n"
              "This is a bug or a failure of the machine, not of your input; the details follow.", file=sys.stderr)
        traceback.print_exc(file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
