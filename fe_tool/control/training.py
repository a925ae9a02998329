"""The optax training loop: one compiled step, fixed-set validation, cost-aware early stopping.

The optimiser is Adam behind global-norm gradient clipping (1.0), with a linear
warm-up and cosine decay of the learning rate (Kingma & Ba 2015, "Adam: a method
for stochastic optimization", ICLR; Loshchilov & Hutter 2017, "SGDR", ICLR).

:func:`train_step` is a single ``equinox.filter_jit`` function at module level: every
step has the same shapes (new noise and new starts come from the key), so it is
compiled once per shape and settings.  A step whose loss or gradient is not finite
is skipped (parameters and optimiser state unchanged) and counted.

:func:`run_training` validates every few steps on a fixed set of fresh trajectories
(fixed starts and noise, never used for training: common random numbers make
successive checks comparable), keeps the parameters with the smallest validation
work spread, and stops when the *predicted production variance*

    r_j = (s_j / s_0)² · B / (B − spent_j)

(validation spread s_j after j checks against the uncontrolled s_0; B the budget
for training plus production switching) has not improved for ``patience`` checks,
or when the training allowance is used up.  ``r < 1`` means the control, counting
its training cost, is predicted to give a smaller BAR variance than spending the
whole budget on uncontrolled switching (BAR variance ∝ spread²/T near equilibrium).
"""
from __future__ import annotations

import dataclasses
import functools
import math

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np
import optax

from ..estimators.spread import robust_spread
from ..progress import progress_enabled
from ..switching import switch
from .objectives import Controller, TrainData, TrainSetup, record_paths

CONSECUTIVE_SKIPS_TO_STOP = 25


@functools.lru_cache(maxsize=64)
def make_optimiser(learning_rate: float, total_steps: int, clip: float = 1.0, warmup_steps: int = 10):
    """Adam(lr schedule) after ``clip_by_global_norm(clip)``; cached so equal settings reuse compilations."""
    total_steps = max(int(total_steps), warmup_steps + 1)
    schedule = optax.warmup_cosine_decay_schedule(
        init_value=0.1 * learning_rate, peak_value=learning_rate, warmup_steps=warmup_steps,
        decay_steps=total_steps, end_value=0.1 * learning_rate)
    return optax.chain(optax.clip_by_global_norm(clip), optax.adam(schedule))


@eqx.filter_jit
def train_step(trainable, frozen, opt_state, key, data: TrainData, path, setup: TrainSetup):
    """One optimiser step.  Returns (trainable, opt_state, loss, finite, aux).

    ``finite`` is False when the loss or a gradient was not finite; the step is then
    skipped (everything returned unchanged).
    """
    (loss, aux), grads = eqx.filter_value_and_grad(setup.loss, has_aux=True)(trainable, frozen, key, data, path, setup)
    updates, new_state = setup.optimiser.update(grads, opt_state, trainable)
    new_trainable = eqx.apply_updates(trainable, updates)
    finite = jnp.isfinite(loss)
    for g in jax.tree_util.tree_leaves(eqx.filter(grads, eqx.is_array)):
        finite = finite & jnp.all(jnp.isfinite(g))
    keep = lambda new, old: jax.tree_util.tree_map(lambda a, b: jnp.where(finite, a, b), new, old)  # noqa: E731
    return keep(new_trainable, trainable), keep(new_state, opt_state), loss, finite, aux


@eqx.filter_jit
def evaluate(model: Controller, key, starts, path, precision_a, precision_b, direction: str):
    """Works (T,) and increments (T, K) of ``model``'s drift and protocol (no gradients)."""
    lams, eps = model.protocol_arrays()
    works, increments, _ = switch(path, model.drift(lams, eps), key, starts, lams, eps, precision_a, precision_b, direction)
    return works, increments


@eqx.filter_jit
def evaluate_recorded(model: Controller, key, starts, path, precision_a, precision_b, direction: str):
    """Like :func:`evaluate`, plus the positions and gradients along the paths."""
    lams, eps = model.protocol_arrays()
    works, increments, positions, _, grads = record_paths(path, model.drift(lams, eps), key, starts, lams, eps,
                                                          precision_a, precision_b, direction)
    return works, increments, positions, grads


def work_summary(works: np.ndarray) -> dict:
    """Mean, spread (std), robust spread (1.4826 × median absolute deviation) and count of non-finite works (kT).

    The robust spread equals the std for Gaussian works and ignores a rare far tail (an
    insertion whose particle lands on a neighbour: works of 10³–10⁹ kT in a fluid).
    """
    works = np.asarray(works, dtype=np.float64)
    finite = works[np.isfinite(works)]
    return {
        "mean": float(np.mean(finite)) if finite.size else float("nan"),
        "spread": float(np.std(finite, ddof=1)) if finite.size > 1 else float("nan"),
        "robust_spread": robust_spread(finite),
        "nonfinite": int(works.size - finite.size),
        "trajectories": int(works.size),
    }


SPREAD_MEASURES = ("std", "robust")


def validation_spread(summaries: list, measure: str = "std") -> float:
    """√(mean of squared spreads) over the directions' :func:`work_summary` dicts; ``inf`` if any work is non-finite."""
    if measure not in SPREAD_MEASURES:
        raise ValueError(f"spread measure must be one of {SPREAD_MEASURES}, got {measure!r}")
    key = "spread" if measure == "std" else "robust_spread"
    if any(s["nonfinite"] for s in summaries):
        return math.inf
    values = [s[key] for s in summaries]
    if not all(math.isfinite(v) for v in values):
        return math.inf
    return math.sqrt(sum(v * v for v in values) / len(values))


@dataclasses.dataclass
class TrainingReport:
    """What :func:`run_training` did.

    Attributes:
        trainable: the best parameters found (smallest finite validation spread).
        history: one dict per check (step, evaluations, loss, validation mean/spread, ratio).
        evaluations: energy evaluations spent by the training steps and checks.
        optimiser_steps, skipped_steps: steps taken and steps skipped as non-finite.
        stop_reason: plain words.
        best_ratio: best predicted variance ratio r seen.
    """

    trainable: object
    history: list
    evaluations: int
    optimiser_steps: int
    skipped_steps: int
    stop_reason: str
    best_ratio: float


def run_training(key, path, model: Controller, spec, data: TrainData, setup: TrainSetup, *,
                 validation_starts, validation_key, step_cost: int, check_cost: int, allowance: int,
                 baseline_spread: float, total_budget: int, spent_before: int, check_every: int, patience: int,
                 pilot_allowance: int | None = None, keep_threshold: float = 1.0, max_steps: int = 10_000,
                 initial_spread: float = math.inf, progress: bool | None = None, reverse_starts=None,
                 reverse_key=None, spread_measure: str = "std") -> TrainingReport:
    """Optimise ``model``'s trainable part (``spec``) until a stopping rule fires.

    Args:
        key: PRNG key for the training steps.
        path, model, spec, data, setup: see :mod:`fe_tool.control.objectives`.
        validation_starts, validation_key: fixed forward validation set (A samples, noise key).
        step_cost, check_cost: evaluations charged per optimiser step and per check.
        allowance: most evaluations training may spend (including ``spent_before``).
        baseline_spread: uncontrolled validation work spread s_0 (kT).
        total_budget: B, evaluations for training plus production switching.
        spent_before: evaluations already spent (before-validation).
        check_every, patience: validation period (steps) and checks without improvement.
        pilot_allowance: ``"auto"`` mode: at the first check past this spend, stop unless
            the best predicted ratio is below ``keep_threshold``.
        max_steps: hard limit on optimiser steps.
        initial_spread: validation spread of the starting parameters (they are returned
            when no check does better).
        progress: show a tqdm bar (``None``: only in a terminal, never with FE_TOOL_PROGRESS=0).
        reverse_starts, reverse_key: optional fixed reverse validation set (B samples, noise key);
            then a check scores √((s_F² + s_R²)/2) (``check_cost`` must cover both runs) and
            ``baseline_spread`` / ``initial_spread`` must be measured the same way.
        spread_measure: ``"std"`` or ``"robust"`` (1.4826 × MAD, see :func:`work_summary`).
    """
    from tqdm.auto import tqdm

    if spread_measure not in SPREAD_MEASURES:
        raise ValueError(f"spread_measure must be one of {SPREAD_MEASURES}, got {spread_measure!r}")

    # without a finite uncontrolled spread the "ratio" is spread² · B/(B − spent) in kT²: same stopping rule
    reference = baseline_spread if (math.isfinite(baseline_spread) and baseline_spread > 0) else 1.0
    trainable, frozen = eqx.partition(model, spec)
    opt_state = setup.optimiser.init(trainable)
    spent = int(spent_before)
    history: list[dict] = []
    best = (initial_spread if math.isfinite(initial_spread) else math.inf, trainable)
    best_ratio, checks_since_best = math.inf, 0
    steps = skipped = consecutive_skips = 0
    losses: list[float] = []
    stop_reason = "training allowance used up"
    keys = jax.random.split(key, max_steps)
    bar = tqdm(total=max(allowance - spent, 0), desc="training control", unit="eval", leave=False,
               disable=not progress_enabled(progress))
    try:
        while True:
            if steps >= max_steps:
                stop_reason = f"reached the limit of {max_steps} optimiser steps"
                break
            if spent + step_cost + check_cost > allowance:
                break
            chunk = 0
            while chunk < check_every and steps < max_steps and spent + step_cost + check_cost <= allowance:
                trainable, opt_state, loss, finite, _ = train_step(trainable, frozen, opt_state, keys[steps], data, path, setup)
                steps += 1
                chunk += 1
                spent += step_cost
                bar.update(step_cost)
                if bool(finite):
                    losses.append(float(loss))
                    consecutive_skips = 0
                else:
                    skipped += 1
                    consecutive_skips += 1
                    if consecutive_skips >= CONSECUTIVE_SKIPS_TO_STOP:
                        break
            current = eqx.combine(trainable, frozen)
            works, _ = evaluate(current, validation_key, validation_starts, path, data.precision_a, data.precision_b, "forward")
            spent += check_cost
            bar.update(check_cost)
            summary = work_summary(works)
            summaries = [summary]
            if reverse_starts is not None:
                works_r, _ = evaluate(current, reverse_key, reverse_starts, path, data.precision_a, data.precision_b,
                                      "reverse")
                summaries.append(work_summary(works_r))
            spread = validation_spread(summaries, spread_measure)
            left = total_budget - spent
            ratio = (spread / reference) ** 2 * total_budget / left if left > 0 else math.inf
            history.append({
                "optimiser_step": steps, "evaluations": spent,
                "loss": float(np.mean(losses)) if losses else float("nan"),
                "validation_work_mean": summary["mean"], "validation_work_spread": summary["spread"],
                "validation_nonfinite": summary["nonfinite"], "predicted_variance_ratio": ratio,
                **({"validation_score": spread, "validation_reverse_work_spread": summaries[1]["spread"],
                    "validation_reverse_robust_spread": summaries[1]["robust_spread"]} if len(summaries) > 1 else {}),
                "skipped_steps": skipped,
            })
            losses = []
            bar.set_postfix(spread=f"{spread:.3g}", ratio=f"{ratio:.3g}")
            if spread < best[0]:
                best = (spread, trainable)
            if ratio < best_ratio * 0.99:
                best_ratio, checks_since_best = ratio, 0
            else:
                checks_since_best += 1
            if consecutive_skips >= CONSECUTIVE_SKIPS_TO_STOP:
                stop_reason = f"{CONSECUTIVE_SKIPS_TO_STOP} optimiser steps in a row had non-finite loss or gradient"
                break
            if checks_since_best >= patience:
                stop_reason = (f"the predicted variance (validation spread² / remaining budget) stopped improving "
                               f"for {patience} checks")
                break
            if pilot_allowance is not None and spent >= pilot_allowance:
                if not best_ratio < keep_threshold:
                    stop_reason = "the pilot did not reduce the predicted variance enough to pay for training"
                    break
                pilot_allowance = None  # the pilot paid: go on under the usual rules
    finally:
        bar.close()
    return TrainingReport(best[1], history, spent - int(spent_before), steps, skipped, stop_reason, best_ratio)
