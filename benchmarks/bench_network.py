"""A network of pairs measured for real: batches/probe_network.toml (six states of an invented
probe family, nine pairs, four cycles) through the batch runner, combined by fe_tool.network and
compared with the exact state free energies; then the same table with one pair shifted by 1 kT,
to show that the network names it.  Prints the tables used in the README ("Networks of pairs").

    python benchmarks/bench_network.py                       # 2 workers, results in a temporary folder
    python benchmarks/bench_network.py --results probe-network-results --workers 2
"""
from __future__ import annotations

import argparse
import pathlib
import sys
import tempfile
import time

ROOT = pathlib.Path(__file__).resolve().parent.parent
STIFFNESS = {"free": 0.0, "k0.5": 0.5, "k1": 1.0, "k2": 2.0, "k4": 4.0, "k8": 8.0}


def _table(report, exact) -> str:
    lines = ["| state | network value ± error (kT) | exact (kT) | (value − exact)/error |", "|---|---|---|---|"]
    for row in report.node_rows():
        truth = exact[row["state"]]
        z = "reference" if row["stderr"] == 0 else f"{(row['value'] - truth) / row['stderr']:+.2f}"
        lines.append(f"| {row['state']} | {row['value']:+.4f} ± {row['stderr']:.4f} | {truth:+.4f} | {z} |")
    return "\n".join(lines)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--results", help="results folder (default: a temporary folder)")
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args(argv)
    sys.path.insert(0, str(ROOT))
    from examples.network_family import state_free_energy
    from fe_tool.batch import run_batch
    from fe_tool.network import solve_network, suggest_next_pair
    from fe_tool.network_command import network_from_table

    results = pathlib.Path(args.results or tempfile.mkdtemp(prefix="probe-network-"))
    t0 = time.perf_counter()
    summary = run_batch(ROOT / "batches" / "probe_network.toml", results, workers=args.workers, progress=False)
    print(summary)
    print(f"wall time {time.perf_counter() - t0:.0f} s on {args.workers} worker(s)\n")
    exact = {s: state_free_energy(k) for s, k in STIFFNESS.items()}
    network, units, _ = network_from_table(results)
    report = solve_network(network, reference="free", units=units)
    print(report.summary())
    print("\n" + _table(report, exact) + "\n")
    best = suggest_next_pair(report, ("free", "k8"))[0]
    print(f"next pair for F(k8) − F(free): {best.state_a} -> {best.state_b}, variance {best.variance_before:.3g} -> "
          f"{best.variance_after:.3g} kT² with {best.evaluations:,.0f} evaluations\n")
    rows = network_from_table(results)[0].edges
    shifted = [dict(state_a=e.state_a, state_b=e.state_b, delta_f=e.delta_f + (1.0 if e.name == "k1-k2" else 0.0),
                    stderr=e.stderr, name=e.name, evaluations=e.evaluations) for e in rows]
    from fe_tool.network import build_network

    corrupted = solve_network(build_network(shifted), reference="free", units=units)
    print("same pairs, k1-k2 shifted by +1 kT:")
    print(f"  suspects: {list(corrupted.suspects)}; χ² = {corrupted.chi_square:.1f} on {corrupted.dof} dof "
          f"(p = {corrupted.p_value:.2g}); flagged: {corrupted.flagged}")


if __name__ == "__main__":
    main()
