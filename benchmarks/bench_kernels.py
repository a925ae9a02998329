"""End-state sampling kernels on a Lennard-Jones fluid: time per independent sample (a
measurement script, not a test).

For the coupled end of a bundled LJ decoupling file, each kernel (MALA; BAOAB kinetic
Langevin; generalised HMC) samples with the same chains and evaluation budget, with the
path's carried neighbour list. Printed per kernel: adapted step, acceptance, shadow work per
step, the potential energy's integrated autocorrelation time τ (steps; Sokal windowing, from
the burn-in trace), ⟨U⟩/N with its standard error, wall time per evaluation, and the time per
independent sample (wall per step × τ), with its ratio to MALA's. A bare jitted, vmapped
energy+force loop over the same chains gives the physical limit per evaluation.

``--pair`` instead measures each kernel's *bias* where an exact answer exists: ΔF of decoupling
one of two Lennard-Jones particles in a periodic box (the system and its quadrature reference of
``tests/test_insertion_route.py``), by the tool's default route with each kernel over several
seeds, printing the mean error in units of the reported error and in kT.

Usage: python benchmarks/bench_kernels.py [system.toml] [--budget 200000] [--chains 16]
       python benchmarks/bench_kernels.py --pair [--seeds 0 1 2 3 4 5]
"""
from __future__ import annotations

import argparse
import time

import jax
import jax.numpy as jnp
import numpy as np

import fe_tool  # noqa: F401  (float64)
from fe_tool.sampling import end_target, sample_state
from fe_tool.systemfile import load_system

KERNELS = ("mala", "kinetic", "kinetic_exact")


def bare_loop_cost(path, positions, steps=200):
    """Seconds per energy+force evaluation of a jitted, vmapped loop (list rebuilt per call)."""
    grad = jax.vmap(jax.value_and_grad(lambda x: path.end_energy(x, "a")))

    @jax.jit
    def loop(x):
        def body(x, _):
            u, g = grad(x)
            return x - 1e-6 * g, u
        return jax.lax.scan(body, x, None, length=steps)

    jax.block_until_ready(loop(positions))
    t0 = time.perf_counter()
    jax.block_until_ready(loop(positions))
    return (time.perf_counter() - t0) / (steps * positions.shape[0])


def run_kernel(kernel, target, start, chains, budget, n_particles, kT, damping=None):
    extra = {} if damping is None else {"damping": damping}
    run = lambda seed: sample_state(jax.random.key(seed), target, jnp.asarray(start), samples=4 * chains,  # noqa: E731
                                    chains=chains, evaluation_budget=budget, kernel=kernel, **extra)
    run(0)   # compiles; the timed run below reuses the compiled blocks
    t0 = time.perf_counter()
    s = run(1)
    wall = time.perf_counter() - t0
    tau = s.autocorrelation_times.get("energy", s.autocorrelation_time)
    energies = np.array([float(target.energy(jnp.asarray(x))) for x in s.samples[: 4 * chains]]) * kT / n_particles
    per_eval = wall / s.evaluations
    return dict(kernel=kernel, step=s.step_size, acceptance=s.acceptance, shadow=s.shadow_work_per_step, tau=tau,
                u=energies.mean(), u_se=energies.std(ddof=1) / np.sqrt(len(energies)), per_eval=per_eval,
                per_independent=per_eval * target.evaluations() * tau, grown=s.neighbour_list_grown,
                equilibrated=s.equilibrated)


def pair_bias(seeds, kernels) -> None:
    """Mean error of ΔF against the quadrature for each kernel (the ``--pair`` mode)."""
    import pathlib
    import sys

    sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent.parent / "tests"))
    from test_insertion_route import _exact_delta_f, _pair_system

    from fe_tool.systemfile import parse_system

    system, exact = parse_system(_pair_system()), _exact_delta_f()
    print(f"two LJ particles, decoupling one: exact ΔF = {exact:.5f} kT; budget 40,000 per run")
    print(f"{'kernel':14s} {'runs':>4s} {'mean error kT':>16s} {'mean z':>7s} {'z per seed'}")
    for kernel in kernels:
        errors, zs = [], []
        for seed in seeds:
            r = system.estimate(seed=seed, budget=40_000, sampler=kernel, progress=False)
            errors.append(r.delta_f - exact)
            zs.append((r.delta_f - exact) / r.stderr)
        e = np.asarray(errors)
        print(f"{kernel:14s} {len(e):4d} {e.mean():+8.4f} ± {e.std(ddof=1) / np.sqrt(len(e)):.4f} "
              f"{np.mean(zs):+7.2f} {' '.join(f'{z:+.1f}' for z in zs)}", flush=True)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pair", action="store_true", help="bias of each kernel against an exact ΔF")
    parser.add_argument("--seeds", nargs="+", type=int, default=[0, 1, 2, 3, 4, 5])
    parser.add_argument("system", nargs="?", default="systems/lj_fluid_decoupling.toml")
    parser.add_argument("--budget", type=int, default=200_000)
    parser.add_argument("--chains", type=int, default=16)
    parser.add_argument("--kernels", default=",".join(KERNELS), help="comma-separated kernels (first is the base)")
    parser.add_argument("--damping", type=float, default=None, help="γh of the kinetic kernels (default: the tool's)")
    args = parser.parse_args(argv)
    if args.pair:
        return pair_bias(args.seeds, args.kernels.split(","))
    system = load_system(args.system)
    path, start = system.path, np.asarray(system.start_a)
    n = start.shape[0]
    target = end_target(path, "a")
    print(f"{args.system}: {n} particles, chains {args.chains}, budget {args.budget:,} evaluations per kernel "
          "(timed on a second, compiled run)")
    print(f"carried neighbour list: {'yes' if path.dynamics_neighbour_builder() is not None else 'no'}")
    chains_start = jnp.stack([jnp.asarray(start)] * args.chains)
    bare = bare_loop_cost(path, chains_start)
    print(f"bare jitted energy+force loop: {bare * 1e3:.3f} ms per evaluation")
    rows = [run_kernel(k, target, start, args.chains, args.budget, n, system.kT, args.damping)
            for k in args.kernels.split(",")]
    base = rows[0]["per_independent"]
    print(f"{'kernel':14s} {'step':>8s} {'acc':>5s} {'shadow/step':>11s} {'tau_U':>7s} {'<U>/N':>16s} "
          f"{'ms/eval':>8s} {'x bare':>6s} {'ms/indep':>9s} {'vs MALA':>7s}")
    for r in rows:
        print(f"{r['kernel']:14s} {r['step']:8.2e} {r['acceptance']:5.3f} {r['shadow']:11.2e} {r['tau']:7.1f} "
              f"{r['u']:8.4f} ± {r['u_se']:.4f} {r['per_eval'] * 1e3:8.3f} {r['per_eval'] / bare:6.2f} "
              f"{r['per_independent'] * 1e3:9.2f} {base / r['per_independent']:7.2f}")


if __name__ == "__main__":
    main()
