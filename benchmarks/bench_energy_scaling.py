"""Cost of one jitted energy + gradient of a Lennard-Jones fluid versus particle number.

LJ fluid in reduced units at ρ = 0.8, truncated at r_c = 2.5σ, pairs from a Verlet
neighbour list (skin 0.3σ). Particles sit on random sites of an fcc lattice (no overlaps).
Compile time is excluded: each function is called once before timing, then timed over
repeated calls (median). For comparison the all-pairs energy + gradient is timed up to
N = 1000, and the (cell-list) neighbour-list build is timed separately.

"pairs" counts pairs within r_c + skin; "per pair" divides the E+grad time by it (the
lattice start makes pairs per particle vary a little with N).

Where the box is too small for r_c + skin ≤ L/2 (N = 64: L = 4.31σ), the skin is reduced
and, if needed, the cutoff is capped at L/2; such rows are marked.

Usage:  python benchmarks/bench_energy_scaling.py [--sizes 64 128 ...] [--seconds 0.5]
"""
from __future__ import annotations

import argparse
import math
import statistics
import time

import jax

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402

from fe_tool import energy as E  # noqa: E402

DENSITY = 0.8
CUTOFF = 2.5
SKIN = 0.3


def fcc_fluid(n: int, density: float, seed: int = 0):
    """n particles on random sites of an fcc lattice filling a cube of volume n/density."""
    length = (n / density) ** (1.0 / 3.0)
    cells = math.ceil((n / 4) ** (1.0 / 3.0))
    basis = np.array([[0, 0, 0], [0.5, 0.5, 0], [0.5, 0, 0.5], [0, 0.5, 0.5]])
    grid = np.stack(np.meshgrid(*[np.arange(cells)] * 3, indexing="ij"), -1).reshape(-1, 1, 3)
    sites = ((grid + basis).reshape(-1, 3) + 0.25) * (length / cells)
    rng = np.random.default_rng(seed)
    return jnp.asarray(sites[rng.choice(len(sites), n, replace=False)]), length


def median_time(function, *args, seconds: float, minimum_repeats: int = 5) -> float:
    jax.block_until_ready(function(*args))  # compile + warm up
    times = []
    start = time.perf_counter()
    while len(times) < minimum_repeats or time.perf_counter() - start < seconds:
        t0 = time.perf_counter()
        jax.block_until_ready(function(*args))
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[64, 128, 256, 500, 1000, 2000])
    parser.add_argument("--seconds", type=float, default=0.5, help="timing budget per measurement")
    parser.add_argument("--all-pairs-up-to", type=int, default=1000)
    args = parser.parse_args()

    print(f"LJ fluid, rho={DENSITY}, r_c={CUTOFF}, skin={SKIN}, float64, "
          f"jax {jax.__version__} on {jax.devices()[0].platform}")
    header = (f"{'N':>6} {'pairs':>8} {'list':>9} {'E+grad [ms]':>12} {'per particle [us]':>18} "
              f"{'per pair [ns]':>14} "
              f"{'all-pairs E+grad [ms]':>22} {'list build [ms]':>16}  note")
    print(header)
    print("-" * len(header))
    for n in args.sizes:
        positions, length = fcc_fluid(n, DENSITY)
        box = jnp.full(3, length)
        cutoff, skin, note = CUTOFF, SKIN, ""
        if cutoff + skin > 0.5 * length:
            skin = max(0.0, 0.5 * length - cutoff)
            cutoff = min(cutoff, 0.5 * length)
            note = f"box L={length:.2f}: r_c={cutoff:.2f}, skin={skin:.2f}"
        lj = E.lennard_jones_parameters(jnp.ones(n), jnp.ones(n))
        builder, neighbours = E.make_neighbour_list(positions, box, cutoff, skin)
        method = "cells" if builder.cell_grid is not None else "all_pairs"

        def energy(x, pairs, cutoff=cutoff):
            return E.lennard_jones_energy(x, lj, pairs=pairs, box=box, cutoff=cutoff)

        energy_and_force = jax.jit(jax.value_and_grad(energy))
        listed = median_time(energy_and_force, positions, neighbours, seconds=args.seconds)
        if n <= args.all_pairs_up_to:
            every_pair = jnp.asarray(E.all_pairs(n))
            reference_value, _ = energy_and_force(positions, every_pair)
            listed_value, _ = energy_and_force(positions, neighbours)
            assert abs(float(listed_value - reference_value)) <= 1e-9 * abs(float(reference_value))
            brute = f"{1e3 * median_time(energy_and_force, positions, every_pair, seconds=args.seconds):22.3f}"
        else:
            brute = f"{'-':>22}"
        build = jax.jit(lambda x: builder.build(x))
        build_time = median_time(build, positions, seconds=args.seconds)
        print(f"{n:>6} {int(neighbours.pair_count):>8} {method:>9} {1e3 * listed:12.3f} "
              f"{1e6 * listed / n:18.3f} {1e9 * listed / int(neighbours.pair_count):14.1f} "
              f"{brute} {1e3 * build_time:16.3f}  {note}")


if __name__ == "__main__":
    main()
