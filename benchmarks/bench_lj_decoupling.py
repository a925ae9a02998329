"""Benchmark: excess chemical potential of the LJ fluid by soft-core decoupling, full catalogue size.

Runs ``systems/lj_fluid_decoupling_256.toml`` (256 particles, T* = 2.0, ρ* = 0.3, r_c = 2.5σ with the
analytic tail inside the model) and compares βμ_ex = −ΔF/kT with two equations of state for the
full LJ potential, implemented in ``tests/test_lj_fluid.py`` from docs/references.md §9:
Kolafa & Nezbeda 1994 (Fluid Phase Equilib. 100, 1) and Johnson, Zollweg & Gubbins 1993
(Mol. Phys. 78, 591). Prints the numbers; it asserts nothing.

Usage::

    python benchmarks/bench_lj_decoupling.py [--budget 2000000] [--seed 0] [--chains 16] [--json out.json]

Cost: neighbour-list energies, 0.42 ms per energy+gradient evaluation on an idle core (more when the
machine is shared), so about 15 minutes idle (37 measured on two loaded cores) at the file's budget of 2e6.
Measured (seed 0, 2e6): βμ_ex = −0.493 ± 0.085 vs Kolafa–Nezbeda −0.48710 (difference −0.006).
"""
from __future__ import annotations

import argparse
import json
import pathlib
import sys
import time

import jax

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402

ROOT = pathlib.Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from test_lj_fluid import (  # noqa: E402
    beta_excess_chemical_potential,
    jzg_residual_free_energy,
    kn_residual_free_energy,
)

from fe_tool.systemfile import load_system  # noqa: E402


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--system", default=str(ROOT / "systems" / "lj_fluid_decoupling_256.toml"))
    parser.add_argument("--budget", type=int, default=None, help="energy evaluations (default: the file's)")
    parser.add_argument("--chains", type=int, default=None)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--json", default=None)
    args = parser.parse_args(argv)

    system = load_system(args.system)
    overrides = {k: v for k, v in (("budget", args.budget), ("chains", args.chains)) if v is not None}
    n = system.particles["count"]
    volume = float(np.prod(system.particles["box"]))
    density, temperature = n / volume, system.kT

    # cost of one energy+gradient evaluation, batched as the samplers do
    chains = overrides.get("chains", system.settings.get("chains", 64))
    batch = jax.jit(jax.vmap(jax.value_and_grad(lambda x: system.path.energy(x, jnp.asarray(0.3)))))
    xs = jnp.asarray(np.repeat(system.start_a[None], chains, axis=0))
    batch(xs)[0].block_until_ready()
    t0 = time.perf_counter()
    for _ in range(5):
        batch(xs)[0].block_until_ready()
    per_evaluation = (time.perf_counter() - t0) / (5 * chains)

    result = system.estimate(seed=args.seed, **overrides)
    beta_mu = -result.delta_f / system.kT
    error = result.stderr / system.kT
    kn = beta_excess_chemical_potential(kn_residual_free_energy, temperature, density)
    jzg = beta_excess_chemical_potential(jzg_residual_free_energy, temperature, density)
    print(result.summary())
    print()
    print(f"N = {n}, ρ* = {density:.4f}, T* = {temperature:g}, path: {system.path.description()}")
    print(f"one energy+gradient evaluation: {per_evaluation * 1e3:.3f} ms (batch of {chains})")
    print(f"βμ_ex (this run)          = {beta_mu:+.4f} ± {error:.4f}")
    print(f"βμ_ex Kolafa–Nezbeda 1994 = {kn:+.5f}   difference {beta_mu - kn:+.4f} ({abs(beta_mu - kn) / error:.1f}σ)")
    print(f"βμ_ex JZG 1993            = {jzg:+.5f}   difference {beta_mu - jzg:+.4f} ({abs(beta_mu - jzg) / error:.1f}σ)")
    print(f"evaluations {result.energy_evaluations:,}, time {result.timings['total']:.0f} s")
    if args.json:
        pathlib.Path(args.json).write_text(json.dumps({
            "n": n, "density": density, "temperature": temperature, "beta_mu_ex": beta_mu, "stderr": error,
            "kolafa_nezbeda": kn, "jzg": jzg, "evaluations": result.energy_evaluations,
            "seconds": result.timings["total"], "seconds_per_evaluation": per_evaluation,
        }, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
