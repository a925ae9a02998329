"""Switching-kernel overhead and time to a 0.1 kT error bar (a measurement script, not a test).

1. Cost per energy-gradient evaluation inside the switching kernel divided by that of a
   bare jitted, vmapped loop computing the same energies and gradients on the same system
   and batch (the loop keeps every energy so the compiler cannot drop the work).
   Systems: a 64-particle Lennard-Jones cluster (gradient dearer than the noise) and a
   cheap 3-D harmonic pair (noise and bookkeeping dominate), with a time breakdown.
2. Wall time of the default ``fe-tool run`` on bundled systems with a cold and a warm
   compilation cache (separate processes).

Usage: python benchmarks/bench_switching_kernel.py [--skip-systems]
"""
from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time

import jax
import jax.numpy as jnp
import numpy as np

import fe_tool  # noqa: F401  (float64)
from fe_tool.path import LinearPath, make_schedule
from fe_tool.switching import switch_jit


def lj_cluster_energy(epsilon):
    def energy(x):
        d = x[:, None, :] - x[None, :, :]
        r2 = jnp.sum(d * d, axis=-1) + jnp.eye(x.shape[0])
        inv6 = 1.0 / r2**3
        pair = 4.0 * epsilon * (inv6 * inv6 - inv6)
        pair = jnp.where(jnp.eye(x.shape[0], dtype=bool), 0.0, pair)
        confine = 0.5 * jnp.sum(jnp.maximum(jnp.sqrt(jnp.sum(x * x, axis=1)) - 3.0, 0.0) ** 2)
        return 0.5 * jnp.sum(pair) + confine
    return energy


def bare_loop(path, starts, lams, step):
    """The honest baseline: same energies+gradients, deterministic descent, energies kept."""
    @jax.jit
    def run(starts, lams):
        def one(x):
            def body(x, lam):
                e, g = path.energy_and_grad(x, lam)
                return x - step * g, e
            _, energies = jax.lax.scan(body, x, lams)
            return energies
        return jax.vmap(one)(starts)
    return run


def time_call(fn, *args, repeats=3):
    jax.block_until_ready(fn(*args))  # compile
    best = float("inf")
    for _ in range(repeats):
        t = time.perf_counter()
        jax.block_until_ready(fn(*args))
        best = min(best, time.perf_counter() - t)
    return best


def kernel_ratio(name, path, starts, steps, step_size):
    lams = jnp.asarray(make_schedule("linear", steps))
    eps = jnp.full((steps,), step_size)
    one = jnp.ones(starts.shape[1:])
    sign = jnp.asarray(1.0)
    key = jax.random.key(0)
    t_switch = time_call(lambda s: switch_jit(path, None, key, s, lams, eps, one, one, sign), starts)
    t_bare = time_call(bare_loop(path, starts, lams[1:], step_size), starts, lams[1:])

    @jax.jit
    def noise_only(key):
        def body(c, k):
            n = jax.random.normal(k, starts.shape)
            return c + jnp.sum(n * n), None
        return jax.lax.scan(body, 0.0, jax.random.split(key, steps))[0]
    t_noise = time_call(noise_only, key)
    evals = starts.shape[0] * steps
    print(f"{name:<34s} switching {1e6 * t_switch / evals:8.3f} µs/eval   bare loop {1e6 * t_bare / evals:8.3f} µs/eval"
          f"   ratio {t_switch / t_bare:5.2f}   (noise alone {1e6 * t_noise / evals:6.3f} µs/eval = "
          f"{t_noise / t_switch:4.0%} of switching)")


def main():
    print("== switching kernel vs bare jitted vmapped loop (same energies and gradients, same batch) ==")
    rng = np.random.default_rng(0)
    grid = np.stack(np.meshgrid(*[np.arange(4)] * 3, indexing="ij"), -1).reshape(-1, 3) * 1.12 - 1.7
    starts = jnp.asarray(grid[None] + 0.01 * rng.standard_normal((32, 64, 3)))
    lj = LinearPath(lj_cluster_energy(1.0), lj_cluster_energy(0.8), 1.0)
    kernel_ratio("LJ cluster, 64 particles, 32 traj", lj, starts, 200, 1e-4)
    cheap = LinearPath(lambda x: 0.5 * jnp.sum(x**2), lambda x: 2.0 * jnp.sum((x - 1.0) ** 2), 1.0)
    kernel_ratio("harmonic 3-D, 512 traj", cheap, jnp.asarray(rng.standard_normal((512, 3))), 1000, 0.05)
    kernel_ratio("harmonic 50-D, 512 traj", cheap, jnp.asarray(rng.standard_normal((512, 50))), 500, 0.05)

    if "--skip-systems" in sys.argv:
        return
    print("\n== default run on bundled systems: wall time, cold vs warm compilation cache ==")
    cache = tempfile.mkdtemp(prefix="fe_tool_bench_cache_")
    env = {**os.environ, "FE_TOOL_COMPILATION_CACHE": cache, "FE_TOOL_PROGRESS": "0"}
    here = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    for system in ("harmonic_3d", "double_well_1d", "harmonic_anisotropic_50d", "restraint_release_kjmol"):
        for label in ("cold", "warm"):
            t = time.perf_counter()
            out = subprocess.run([sys.executable, "-m", "fe_tool.cli", "run", system, "--quiet"], env=env,
                                 cwd=here, capture_output=True, text=True)
            wall = time.perf_counter() - t
            line = next((l for l in out.stdout.splitlines() if l.startswith("ΔF")), out.stderr.strip()[-200:])
            print(f"{system:<28s} {label}: {wall:6.1f} s   {line}")


if __name__ == "__main__":
    main()
