"""Every bundled system with a reference, run through the command line, against its stated tolerance.

For each ``systems/*.toml`` that has a ``[reference]`` table, runs ``fe-tool run <file> --json``
in a subprocess (exactly what a user types, with the file's own settings) and tabulates the
estimate, its reported standard error, the reference, the error in units of the tolerance and of
the standard error, the evaluations spent and the wall time. Prints the table; asserts nothing.

    python benchmarks/bench_catalogue.py                        # every file with a reference, seed 0
    python benchmarks/bench_catalogue.py --skip lj_fluid_decoupling_256 --seeds 0 1
"""
from __future__ import annotations

import argparse
import json
import pathlib
import subprocess
import sys
import tempfile
import time

ROOT = pathlib.Path(__file__).resolve().parent.parent


def run_one(file: pathlib.Path, seed: int, folder: pathlib.Path) -> dict:
    out = folder / f"{file.stem}_{seed}.json"
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "fe_tool.cli", "run", str(file), "--seed", str(seed),
                           "--quiet", "--json", str(out)], capture_output=True, text=True)
    seconds = time.perf_counter() - t0
    if not out.exists():
        return {"system": file.stem, "seed": seed, "failed": (proc.stderr or proc.stdout).strip()[-300:]}
    data = json.loads(out.read_text())
    ref = data["reference"]
    error = data["delta_f"] - ref["delta_f"]
    return {"system": file.stem, "seed": seed, "delta_f": data["delta_f"], "stderr": data["stderr"],
            "reference": ref["delta_f"], "tolerance": ref["tolerance"], "error": error,
            "within": abs(error) <= ref["tolerance"], "z": error / data["stderr"] if data["stderr"] else float("nan"),
            "flagged": data.get("flagged"), "units": data.get("units"),
            "evaluations": data.get("energy_evaluations"), "seconds": seconds, "exit": proc.returncode}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", nargs="+", type=int, default=[0])
    parser.add_argument("--skip", nargs="*", default=[], help="system names to leave out")
    parser.add_argument("--only", nargs="*", default=None, help="run only these system names")
    parser.add_argument("--json", default=None, help="also write the rows to this file")
    args = parser.parse_args(argv)
    sys.path.insert(0, str(ROOT))
    import tomllib

    files = [f for f in sorted((ROOT / "systems").glob("*.toml"))
             if "reference" in tomllib.loads(f.read_text()) and f.stem not in args.skip
             and (args.only is None or f.stem in args.only)]
    rows = []
    header = (f"{'system':28s} {'seed':>4s} {'ΔF':>10s} {'± σ':>8s} {'reference':>10s} {'error':>8s} "
              f"{'tolerance':>9s} {'z':>6s} {'within':>6s} {'flag':>5s} {'evaluations':>12s} {'time':>7s}")
    print(header, flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        for file in files:
            for seed in args.seeds:
                row = run_one(file, seed, pathlib.Path(tmp))
                rows.append(row)
                if "failed" in row:
                    print(f"{row['system']:28s} {seed:4d} FAILED: {row['failed']}", flush=True)
                    continue
                print(f"{row['system']:28s} {seed:4d} {row['delta_f']:+10.4f} {row['stderr']:8.4f} "
                      f"{row['reference']:+10.4f} {row['error']:+8.4f} {row['tolerance']:9.4f} {row['z']:+6.2f} "
                      f"{'yes' if row['within'] else 'NO':>6s} {'yes' if row['flagged'] else 'no':>5s} "
                      f"{row['evaluations']:12,d} {row['seconds']:6.0f}s", flush=True)
    done = [r for r in rows if "failed" not in r]
    print(f"\n{sum(r['within'] for r in done)} of {len(rows)} runs within their file's tolerance; "
          f"{sum(r['flagged'] for r in done)} flagged; {len(rows) - len(done)} failed.")
    if args.json:
        pathlib.Path(args.json).write_text(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
