"""The network of a batch's pairs on disk: read a results folder, write its tables and picture,
and the ``fe-tool network RESULTS_FOLDER`` command.

Pairs of a batch file that name their states (``states = ["first", "second"]``, ΔF = F(second) −
F(first)) form a network (:mod:`fe_tool.network`).  Finished pairs (``ok`` or ``flagged``) are its
edges; failed pairs are left out and listed.  Written into the results folder:

- ``network_states.csv`` and ``network.json``: state values ± errors (and in the JSON the full
  covariance, every pair's check, the cycles, the χ² test, warnings and the suggested next pairs);
- ``network_cycles.csv``: every independent cycle's closure and its expected spread;
- ``network.png``: the picture (:func:`fe_tool.network_plot.draw_network`).

Pairs computed by fe_tool are independent (each samples its own end states), so the network
treats them as uncorrelated.
"""
from __future__ import annotations

import argparse
import csv
import io
import json
import math
import pathlib
import sys
from typing import Any

from .exitcodes import EXIT_BAD_INPUT, EXIT_FLAGGED, EXIT_INTERNAL, EXIT_MEANINGS, EXIT_OK
from .network import NetworkError, NetworkReport, build_network, solve_network, suggest_next_pair

__all__ = ["main_network", "network_from_table", "report_batch_network", "write_network_outputs", "pair_entry"]

FINISHED = ("ok", "flagged")


def network_from_table(rows_or_folder: Any):
    """(Network, units, left-out pair names) from batch rows or a results folder.

    Raises NetworkError when no finished pair names its states or the pairs mix units.
    """
    if isinstance(rows_or_folder, (str, pathlib.Path)):
        from .batch import read_table

        folder = pathlib.Path(rows_or_folder)
        if not (folder / "results.jsonl").is_file():
            raise NetworkError(f"no results table in {str(folder)!r} (results.jsonl); give the results folder of a "
                               "batch run")
        rows = read_table(folder)
    else:
        rows = list(rows_or_folder)
    named = [r for r in rows if r.get("state_a") and r.get("state_b")]
    usable = [r for r in named if r.get("status") in FINISHED and _finite(r.get("delta_f")) and _finite(r.get("stderr"))
              and float(r["stderr"]) > 0]
    left_out = [str(r.get("name")) for r in named if r not in usable]
    if not usable:
        raise NetworkError("no finished pair names its states; add states = [\"first\", \"second\"] to the batch "
                           "file's pairs and run it")
    units = {r.get("units") or "" for r in usable}
    if len(units) > 1:
        raise NetworkError(f"the pairs are in different units ({sorted(units)}); a network needs one unit")
    edges = [{"state_a": r["state_a"], "state_b": r["state_b"], "delta_f": r["delta_f"], "stderr": r["stderr"],
              "name": r.get("name"), "evaluations": r.get("evaluations"), "flagged": r.get("status") == "flagged"}
             for r in usable]
    return build_network(edges), units.pop(), left_out


def _finite(value: Any) -> bool:
    try:
        return math.isfinite(float(value))
    except (TypeError, ValueError):
        return False


def pair_entry(report: NetworkReport, state_a: str, state_b: str, evaluations: float) -> str:
    """A ``[[pair]]`` entry to paste into the batch file for the suggested pair."""
    repeat = next((e.name for e in report.network.edges if {e.state_a, e.state_b} == {state_a, state_b}), None)
    how = (f"# the same system or factory and parameters as pair {repeat!r}, with another seed" if repeat else
           f"# fill in the system file or factory (and parameters) that make states {state_a!r} and {state_b!r}")
    return "\n".join(["[[pair]]", f'name = "{state_a}-{state_b}-next"', how,
                      f'states = ["{state_a}", "{state_b}"]', f"settings = {{ budget = {int(round(evaluations))} }}"])


def write_network_outputs(report: NetworkReport, folder: str | pathlib.Path, suggestions=(), *,
                          plot: bool = True) -> list[pathlib.Path]:
    """Write network_states.csv, network_cycles.csv, network.json (and network.png) into ``folder``."""
    from .atomic import write_text_atomically

    folder = pathlib.Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    states = _csv(report.node_rows(), ["state", "value", "stderr", "component", "reference"])
    cycles = _csv([{"cycle": " -> ".join(c.states), "closure": c.closure, "spread": c.spread, "z": c.z,
                    "flagged": c.flagged} for c in report.cycles], ["cycle", "closure", "spread", "z", "flagged"])
    data = {**report.to_dict(), "next_pairs": [
        {"state_a": p.state_a, "state_b": p.state_b, "evaluations": p.evaluations, "unit_variance": p.unit_variance,
         "unit_variance_assumed": p.assumed, "variance_before": p.variance_before, "variance_after": p.variance_after}
        for p in suggestions]}
    written = []
    for name, text in (("network_states.csv", states), ("network_cycles.csv", cycles),
                       ("network.json", json.dumps(data, indent=1))):
        write_text_atomically(folder / name, text)
        written.append(folder / name)
    if plot:
        from .network_plot import draw_network

        written.append(draw_network(report, folder / "network.png"))
    return written


def _csv(rows: list[dict], columns: list[str]) -> str:
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=columns, lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows)
    return buffer.getvalue()


def _suggestions(report: NetworkReport, target: Any, budget: float | None) -> list:
    try:
        return suggest_next_pair(report, target, evaluations=budget)
    except NetworkError as err:   # e.g. no pair recorded its cost: the rest of the report still stands
        print(f"next pair: not suggested ({err})")
        return []


def report_batch_network(results_dir: str | pathlib.Path, *, reference: str | None = None, anchors=None,
                         target: Any = None, budget: float | None = None, output: str | pathlib.Path | None = None,
                         plot: bool = True) -> int:
    """Solve, print and write the network of a results folder; returns the exit status
    (1 when the network is flagged)."""
    network, units, left_out = network_from_table(results_dir)
    report = solve_network(network, reference=reference, anchors=anchors, units=units)
    print()
    print(report.summary())
    if left_out:
        print(f"left out (not finished): {', '.join(left_out)}")
    suggestions = _suggestions(report, target, budget)
    if suggestions:
        what = "the sum of all state variances" if target is None else (
            f"the variance of {target}" if isinstance(target, str) else f"the variance of F({target[1]}) − F({target[0]})")
        print(f"next pair to measure (most reduces {what}):")
        for p in suggestions[:3]:
            assumed = " (cost per evaluation assumed: median of the measured pairs)" if p.assumed else ""
            print(f"  {p.state_a} -> {p.state_b}: {p.variance_before:.3g} -> {p.variance_after:.3g} "
                  f"({100 * p.reduction:.0f}% less) with {p.evaluations:,.0f} evaluations{assumed}")
        best = suggestions[0]
        print("to run it, add to the batch file and run the batch again (finished pairs are kept):")
        print("  " + pair_entry(report, best.state_a, best.state_b, best.evaluations).replace("\n", "\n  "))
    written = write_network_outputs(report, output or results_dir, suggestions, plot=plot)
    print(f"network written: {', '.join(str(p) for p in written)}")
    return EXIT_FLAGGED if report.flagged else EXIT_OK


def _anchor(text: str) -> tuple[str, tuple[float, float]]:
    """``STATE=VALUE`` or ``STATE=VALUE+-ERROR``."""
    state, _, value = text.partition("=")
    number, _, error = value.replace("±", "+-").partition("+-")
    try:
        return state.strip(), (float(number), float(error) if error else 0.0)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected STATE=VALUE or STATE=VALUE+-ERROR, got {text!r}") from None


def _parser() -> argparse.ArgumentParser:
    codes = "\n".join(f"  {code:>3}  {meaning}" for code, meaning in EXIT_MEANINGS.items())
    p = argparse.ArgumentParser(
        prog="fe-tool network", formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Combine a batch's pairs that name their states into consistent state values with errors, "
                    "check every cycle, name pairs that disagree, and suggest the next pair to measure.",
        epilog="exit status (1: the network is flagged):\n" + codes)
    p.add_argument("results", help="results folder of a batch run (its results.jsonl)")
    p.add_argument("--reference", metavar="STATE", help="state set to 0 (default: each group's first state)")
    p.add_argument("--anchor", metavar="STATE=VALUE[+-ERROR]", type=_anchor, action="append", default=[],
                   help="a state with a known value (repeatable); replaces the reference in its group")
    p.add_argument("--target", metavar="STATE|A,B", help="what to measure better next: a state, or A,B for F(B) − F(A)")
    p.add_argument("--budget", type=float, help="evaluations for the next pair (default: median of the measured)")
    p.add_argument("--output", metavar="DIR", help="folder for the tables and picture (default: the results folder)")
    p.add_argument("--no-plot", action="store_true", help="do not draw network.png")
    return p


def main_network(argv: list[str] | None = None) -> int:
    """``fe-tool network`` entry; returns the exit status."""
    args = _parser().parse_args(argv)
    target = None if not args.target else (tuple(args.target.split(",", 1)) if "," in args.target else args.target)
    try:
        return report_batch_network(args.results, reference=args.reference, anchors=dict(args.anchor) or None,
                                    target=target, budget=args.budget, output=args.output, plot=not args.no_plot)
    except NetworkError as err:
        print(f"fe-tool network: error: {err}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except Exception as err:  # noqa: BLE001 - our fault: one line, no traceback
        print(f"fe-tool network: internal error: {type(err).__name__}: {err}", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main_network())
