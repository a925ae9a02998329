"""Write a melted start configuration (XYZ) for a one-component Lennard-Jones fluid.

Particles start on an fcc lattice of 4·m³ sites filling a cube at the reduced density ρ*; the
lattice is melted with fe_tool's own kinetic Langevin sampler at T* (truncated LJ, r_c = 2.5σ,
no tail — the tail does not change forces), and the last configuration of the first chain is
written. The catalogue's sampler re-equilibrates from it anyway; a melted start only saves it
the melting.

    python benchmarks/make_lj_start.py --cells 3 --density 0.7 --temperature 1.5 --out systems/lj_fluid_108_dense.xyz
"""
from __future__ import annotations

import argparse

import fe_tool  # noqa: F401  (float64)
import jax
import jax.numpy as jnp
import numpy as np

from fe_tool import energy as E
from fe_tool.path import LinearPath
from fe_tool.sampling import end_target, sample_state


def fcc(cells: int, density: float) -> tuple[np.ndarray, float]:
    n = 4 * cells**3
    edge = (n / density) ** (1.0 / 3.0)
    a = edge / cells
    basis = np.array([[0, 0, 0], [0.5, 0.5, 0], [0.5, 0, 0.5], [0, 0.5, 0.5]])
    sites = [(np.array([i, j, k]) + b) * a for i in range(cells) for j in range(cells) for k in range(cells)
             for b in basis]
    return np.asarray(sites), edge


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cells", type=int, default=3)
    parser.add_argument("--density", type=float, required=True)
    parser.add_argument("--temperature", type=float, required=True)
    parser.add_argument("--evaluations", type=int, default=400_000)
    parser.add_argument("--seed", type=int, default=5)
    parser.add_argument("--out", required=True)
    args = parser.parse_args(argv)
    sites, edge = fcc(args.cells, args.density)
    n = len(sites)
    box = jnp.full(3, edge)
    params = E.lennard_jones_parameters(np.ones(n), np.ones(n))
    cutoff = min(2.5, 0.5 * edge)

    def energy(x):
        return E.lennard_jones_energy(x, params, box=box, cutoff=cutoff) / args.temperature

    path = LinearPath(energy, energy)
    samples = sample_state(jax.random.key(args.seed), end_target(path, "a"), jnp.asarray(sites), samples=400,
                           chains=4, evaluation_budget=args.evaluations, kernel="kinetic", name="melting")
    x = np.mod(np.asarray(samples.samples[-1]), edge)
    comment = (f"LJ fluid rho*={args.density} T*={args.temperature}: fcc lattice ({args.cells}^3 cells) melted by "
               f"fe_tool's kinetic Langevin sampler ({samples.evaluations} evaluations, seed {args.seed}, "
               f"benchmarks/make_lj_start.py); box edge {edge:.10f} sigma")
    with open(args.out, "w", encoding="utf-8") as f:
        f.write(f"{n}\n{comment}\n")
        for p in x:
            f.write(f"LJ {p[0]:.8f} {p[1]:.8f} {p[2]:.8f}\n")
    print(comment)
    print(f"acceptance {samples.acceptance:.2f}, autocorrelation {samples.autocorrelation_time:.1f} steps, "
          f"equilibrated {samples.equilibrated}")


if __name__ == "__main__":
    main()
