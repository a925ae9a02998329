"""Time the multistate estimator on 7.5e5 pooled samples over 12 harmonic states.

States u_k(x) = k_k (x − c_k)²/2 in one dimension, 62 500 exact samples per state; the exact
answer is f_k − f_0 = ½ ln(k_k/k_0).  Run:  python benchmarks/bench_mbar.py
"""
import time

import numpy as np

from fe_tool.estimators import mbar


def main(states: int = 12, total: int = 750_000, seed: int = 5) -> None:
    generator = np.random.default_rng(seed)
    stiffness = np.geomspace(1.0, 8.0, states)
    centres = np.linspace(0.0, 1.5, states)
    per_state = np.full(states, total // states)
    samples = np.concatenate([generator.normal(c, 1.0 / np.sqrt(k), n)
                              for k, c, n in zip(stiffness, centres, per_state)])
    reduced_energies = 0.5 * stiffness[:, None] * (samples[None, :] - centres[:, None]) ** 2
    start = time.perf_counter()
    result = mbar(reduced_energies, per_state)
    seconds = time.perf_counter() - start
    exact = 0.5 * np.log(stiffness / stiffness[0])
    error = np.max(np.abs(result.free_energies - exact) / np.maximum(np.sqrt(np.diag(result.covariance)), 1e-300))
    print(f"mbar: {states} states x {per_state.sum()} samples: {seconds:.2f} s "
          f"({result.iterations} iterations, converged={result.converged}, "
          f"solver={result.endpoint.details['solver']}); "
          f"endpoint {result.endpoint.delta_f:.5f} +- {result.endpoint.stderr:.5f} (exact {exact[-1]:.5f}); "
          f"largest |error|/stderr {error:.2f}")


if __name__ == "__main__":
    main()
