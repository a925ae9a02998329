r"""Zero switching steps at a decoupled end: test-particle insertion and deletion, combined by BAR.

With K = 0 switching steps a trajectory is one jump of λ at a fixed configuration: the forward
work is w_F = u_B(x) − u_A(x) on samples of A and the reverse work w_R = u_A(x) − u_B(x) on
samples of B, and BAR on them is Bennett's own estimator (Bennett 1976, J. Comput. Phys. 22, 245).
For a decoupling path both works involve only the changing particles' interactions
(:meth:`Path.energy_change`), a small fraction of a full evaluation.

At the decoupled end B the group interacts with nothing, so π_B is the rest's distribution times
a uniform placement of the group (a translation in the periodic box and, for a molecule, a
rotation). Every B sample therefore gives many exact, independent placements
(:meth:`SoftCoreDecouplingPath.redraw_decoupled`), and the reverse works at them are insertion
energies: the reverse exponential average is test-particle insertion (Widom 1963, J. Chem. Phys.
39, 2808), and BAR adds the deletion direction. Placements in one configuration are correlated
through it, so the error bar groups works by the sampling chain their configuration came from
(:func:`fe_tool.estimators.grouped.with_grouped_error`).

This is the limit K → 0 of switching, and the cheapest route where insertion works (dilute and
moderately dense fluids, small solutes); where it does not (dense fluids, large or charged
solutes) the two directions barely overlap, the check below says so, and the switching route
takes over.
"""
from __future__ import annotations

import math

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np

from .. import diagnostics as diag

REDRAW_SHARE = 0.5       # placements may cost at most this share of what sampling paid per B sample
REDRAWS = (16, 1024)     # fewest and most placements per B sample
BATCH = 32               # samples per compiled call (placements of a batch are computed together)
MAX_SAMPLES = 16384      # most samples kept per end when sampling is extended for insertion
SAMPLING_SHARE = 0.4     # of the budget, at most, for each end's first sampling when insertion may do


def can_redraw(path) -> bool:
    """Whether the path's B end lets the changing group be placed anew exactly (see module doc)."""
    method = getattr(path, "can_redraw_decoupled", None)
    return bool(method()) if callable(method) else False


def redraw_count(path, evaluations_per_sample: float, available: float | None = None, samples: int = 1) -> int:
    """Placements per B sample: at most :data:`REDRAW_SHARE` of the sampler's cost per sample (at
    least :data:`REDRAWS` [0], at most [1]), and never more than ``available`` evaluations pay for
    ``samples`` samples (down to 0: then fewer samples are used, :func:`affordable_samples`).
    1 when the path cannot redraw."""
    cost = float(path.energy_change_cost())
    if not can_redraw(path):
        count = 1
    else:
        count = int(np.clip(math.floor(REDRAW_SHARE * evaluations_per_sample / cost), REDRAWS[0], REDRAWS[1]))
    if available is not None:
        count = min(count, int(math.floor(available / (cost * max(samples, 1)))))
    return max(count, 0)


def affordable_samples(path, available: float, samples: int, chains: int) -> int:
    """Most B samples (whole chains, at least one per chain when any) that one placement each
    and ``available`` evaluations pay for."""
    cost = float(path.energy_change_cost())
    count = min(samples, int(math.floor(max(available, 0.0) / cost)))
    return (count // chains) * chains if count >= chains else count


@eqx.filter_jit
def _deletion_works(path, xs):
    return jax.vmap(lambda x: path.energy_change(x, 0.0, 1.0))(xs)


@eqx.filter_jit
def _insertion_works(path, key, indices, xs, redraws: int):
    """(n, redraws) reverse works; sample i's placements use keys from ``fold_in(key, indices[i])``."""
    def placements(index, x):
        keys = jax.random.split(jax.random.fold_in(key, index), redraws)
        return jax.vmap(lambda k: path.energy_change(path.redraw_decoupled(k, x), 1.0, 0.0))(keys)
    return jax.vmap(placements)(indices, xs)


def _batched(function, xs: np.ndarray, *extra) -> np.ndarray:
    """``function(batch, *extra_batch)`` over ``xs`` in padded batches of :data:`BATCH` (one compilation)."""
    out = []
    for i in range(0, len(xs), BATCH):
        chunk = [np.asarray(a[i:i + BATCH]) for a in (xs, *extra)]
        n = len(chunk[0])
        if n < BATCH:
            chunk = [np.concatenate([c, np.repeat(c[:1], BATCH - n, axis=0)]) for c in chunk]
        out.append(np.asarray(function(*[jnp.asarray(c) for c in chunk]), dtype=np.float64)[:n])
    return np.concatenate(out)


def zero_step_works(path, key, samples_a: np.ndarray, samples_b: np.ndarray, redraws: int):
    """Forward works on every A sample, reverse works at ``redraws`` placements of every B sample.

    Reverse works are ordered placement-major (work i belongs to B sample i mod n_B), so that
    when n_B is a multiple of the B chains, work i comes from chain i mod chains like every
    other trajectory's. Returns ``(w_F, w_R, evaluations)`` with evaluations counted as
    fractions of a full one (:meth:`Path.energy_change_cost`), rounded up.
    """
    forward = _batched(lambda xs: _deletion_works(path, xs), samples_a)
    n_b = len(samples_b)
    if redraws > 1 or can_redraw(path):
        indices = np.arange(n_b)
        reverse = _batched(lambda xs, ix: _insertion_works(path, key, ix, xs, int(redraws)), samples_b, indices)
        reverse = reverse.T.reshape(-1)
    else:
        reverse = -_batched(lambda xs: _deletion_works(path, xs), samples_b)
    evaluations = int(math.ceil(float(path.energy_change_cost()) * (len(samples_a) + n_b * redraws)))
    return forward, reverse, evaluations


def whole_chains(samples: np.ndarray, chains: int) -> np.ndarray:
    """The longest prefix of interleaved samples that holds the same number from every chain."""
    return samples[: (len(samples) // chains) * chains] if len(samples) >= chains else samples


def zero_step_suffices(estimates: dict, overlap: float) -> tuple[bool, str]:
    """Whether the zero-step estimate can be reported instead of switching, and why.

    It must overlap well (no caution from :func:`fe_tool.diagnostics.check_overlap`) and its BAR
    estimate must be finite and judged reliable; otherwise insertion is missing the configurations
    that matter (dense fluid, large solute) and switching is needed.
    """
    b = estimates["bar"]
    if not (b.is_finite and diag.is_reliable(b)):
        return False, "its BAR estimate is not reliable"
    if not overlap >= diag.OVERLAP_CAUTION:
        return False, f"insertion and deletion works overlap too little (overlap {overlap:.3g} < {diag.OVERLAP_CAUTION})"
    return True, f"insertion and deletion works overlap well (overlap {overlap:.2f})"


__all__ = ["can_redraw", "redraw_count", "zero_step_works", "zero_step_suffices", "whole_chains"]


# ------------------------------------------------------------------ stages used by the switching route

def _last_of_each_chain(samples: np.ndarray, chains: int) -> np.ndarray:
    """The last sample of every chain, in chain order (samples interleaved round-robin, whole chains)."""
    return samples[len(samples) - chains:]


def extend_ends(keys, path, sampled: dict, evaluations: int, ledger) -> dict:
    """Continue both ends' chains from where they stopped with ``evaluations`` (split evenly;
    :func:`fe_tool.sampling.continue_sampling`: no second burn-in) and return the samples of both
    phases together, chain order kept (so chain-grouped errors stay right)."""
    import dataclasses

    from ..sampling import continue_sampling, end_target

    out = {}
    for end, key in zip(("a", "b"), keys):
        s = sampled[end]
        healthy = s.chains - s.stuck_chains
        first = whole_chains(s.samples, healthy)
        room = MAX_SAMPLES - len(first)
        if room < healthy or evaluations // 2 < 4 * healthy * path.end_evaluations():
            out[end] = dataclasses.replace(s, samples=first)
            continue
        more = continue_sampling(key, end_target(path, end), s, _last_of_each_chain(first, healthy), samples=room,
                                 evaluation_budget=int(evaluations // 2), on_spent=ledger.spend,
                                 name=f"end state {end.upper()} (continued)")
        ledger.cost[f"sampling_{end}"] += more.evaluations
        ledger.warnings.extend(more.warnings)
        combined = np.concatenate([first, whole_chains(more.samples, healthy)])
        out[end] = dataclasses.replace(s, samples=combined, evaluations=s.evaluations + more.evaluations,
                                       effective_sample_size=s.effective_sample_size + more.effective_sample_size)
    return out


def per_sample_cost(samples) -> float:
    """Sampler evaluations behind one B sample (one autocorrelation time of one chain)."""
    tau = samples.autocorrelation_time
    return max(1.0, tau if math.isfinite(tau) else 1.0)
