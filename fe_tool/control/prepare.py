r"""``prepare_control``: train (or reuse) a control and a protocol within an evaluation budget.

Cost convention (every energy+gradient evaluation counts, in the units of
:meth:`fe_tool.path.Path.evaluations_per_point`, "epp" per trajectory point):

* validation / before-and-after runs: T·(K+1)·epp per direction (plain simulation);
* path-KL and Jeffreys steps: 2·T·(K+1)·epp — one for the simulation and one more
  for the reverse-mode pass through the trajectory, which differentiates the energy
  gradient again (a second-order cost at least as large as the first);
* log-variance steps: T·(K+1)·epp for the reference simulation; scoring the stored
  paths is free when the schedule is fixed (energies and gradients are reused) and
  costs 2·T·(K+1)·epp more when the schedule is learned (re-evaluation at the new λ
  plus its reverse-mode pass).

Network evaluations are not energy evaluations and are not counted.

``budget`` is the number of evaluations left for training *and* production switching
(both directions); training may use at most ``max_training_fraction`` of it.  The
production run then has ``budget − outcome.evaluations`` left.
"""
from __future__ import annotations

import dataclasses
import math
from typing import Any

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np

from ..jsonable import to_jsonable
from ..path import Path
from .networks import Control, ControlScales, build_control
from .pair_force import pair_force_settings
from .objectives import OBJECTIVES, Controller, TrainData, TrainSetup
from .protocol import Protocol, bind_control, midpoints, resample_schedule, resample_step_sizes
from .training import SPREAD_MEASURES, evaluate, evaluate_recorded, make_optimiser, run_training, validation_spread, work_summary

MODES = ("learned", "auto", "reuse")
VALIDATE = ("forward", "both")
STEP_LEARNING = ("none", "global", "per_step")
MIN_OPTIMISER_STEPS = 50
"""Training that cannot afford this many optimiser steps after its validation runs is not started."""
KEEP_THRESHOLD = 0.8
"""``"auto"`` keeps a control when the predicted variance ratio is below this (a margin
for the noise of a 128-trajectory spread comparison, about ±10% in the ratio)."""
DEFAULT_LEARNING_RATES = {"kl": 1e-2, "jeffreys": 1e-2, "logvar": 3e-3}
WARM_START_LEARNING_RATE_FACTOR = 0.3
"""A warm-started control is already near an optimum: smaller steps keep it there."""


@dataclasses.dataclass
class ControlOutcome:
    """The result of :func:`prepare_control`.

    Attributes:
        control: the trained velocity model, or ``None`` (``"auto"`` decided against it,
            or only the protocol was learned).
        lams, step_sizes: (K+1,), (K,) protocol to use for production switching (the
            learned one carried over to the production K, or the one given).
        evaluations: energy evaluations spent here (training, checks, before/after runs).
        history: one dict per validation check (see :class:`TrainingReport`).
        work_before, work_after: ``{"forward": {...}, "reverse": {...}}`` with the mean,
            spread (std), non-finite count of validation works (kT) at the training K,
            uncontrolled on the given protocol vs. with the chosen control and protocol.
        dissipation_before, dissipation_after: (K_train,) mean forward work per step (kT).
        midpoints_before, midpoints_after: (K_train,) λ at the middle of each step.
        decision: a plain-language sentence with the numbers behind it.
        kept: whether a control or learned protocol is returned for production.
        predicted_variance_ratio: (s_after/s_before)² · budget/(budget − evaluations).
        mode, objective, training_steps (K_train), optimiser_steps, skipped_steps,
        stop_reason, settings: what was run.
        warnings: plain sentences about problems (non-finite works, skipped steps, a control
            that does not pay for itself); empty when nothing looked wrong.
    """

    control: Control | None
    lams: np.ndarray
    step_sizes: np.ndarray
    evaluations: int
    history: list
    work_before: dict
    work_after: dict
    dissipation_before: np.ndarray
    dissipation_after: np.ndarray
    midpoints_before: np.ndarray
    midpoints_after: np.ndarray
    decision: str
    kept: bool
    predicted_variance_ratio: float
    mode: str
    objective: str
    training_steps: int
    optimiser_steps: int
    skipped_steps: int
    stop_reason: str
    training_lams: np.ndarray
    training_step_sizes: np.ndarray
    settings: dict = dataclasses.field(default_factory=dict)
    warnings: list = dataclasses.field(default_factory=list)

    @property
    def drift(self):
        """φ(x, λ) for :func:`fe_tool.switching.switch` on (``lams``, ``step_sizes``), or ``None``."""
        return bind_control(self.control, self.lams, self.step_sizes)

    @property
    def work_mean_before(self) -> float:
        return self.work_before["forward"]["mean"]

    @property
    def work_spread_before(self) -> float:
        return self.work_before["forward"]["spread"]

    @property
    def work_mean_after(self) -> float:
        return self.work_after["forward"]["mean"]

    @property
    def work_spread_after(self) -> float:
        return self.work_after["forward"]["spread"]

    def to_dict(self) -> dict[str, Any]:
        """JSON-able summary (no network weights; use :func:`save_control` for those)."""
        return to_jsonable({
            "mode": self.mode, "objective": self.objective, "kept": self.kept, "decision": self.decision,
            "control": None if self.control is None else {"kind": self.control.kind, **self.control.hyperparameters()},
            "training_evaluations": self.evaluations, "optimiser_steps": self.optimiser_steps,
            "skipped_steps": self.skipped_steps, "stop_reason": self.stop_reason,
            "training_switching_steps": self.training_steps,
            "predicted_variance_ratio": self.predicted_variance_ratio,
            "work_before": self.work_before, "work_after": self.work_after,
            "dissipation_before": {"lambda": self.midpoints_before, "work_per_step": self.dissipation_before},
            "dissipation_after": {"lambda": self.midpoints_after, "work_per_step": self.dissipation_after},
            "lams": self.lams, "step_sizes": self.step_sizes, "history": self.history, "settings": self.settings,
            "warnings": list(self.warnings),
        })


def _warm_parts(warm_start):
    """(control, lams or None, step_sizes or None) from a ControlOutcome / LoadedControl / Control."""
    if warm_start is None:
        return None, None, None
    if isinstance(warm_start, Control):
        return warm_start, None, None
    control = getattr(warm_start, "control", None)
    lams = getattr(warm_start, "lams", None)
    eps = getattr(warm_start, "step_sizes", None)
    if control is None and lams is None:
        raise ValueError("warm_start holds neither a control nor a protocol; pass a ControlOutcome, a loaded "
                         "control (load_control) or a Control module")
    return control, lams, eps


def _mean_per_step(increments) -> np.ndarray:
    """Mean work increment per step over the finite trajectories (NaN where none is finite)."""
    increments = np.asarray(increments, dtype=np.float64)
    finite = np.isfinite(increments)
    count = finite.sum(axis=0)
    total = np.where(finite, increments, 0.0).sum(axis=0)
    return np.where(count > 0, total / np.maximum(count, 1), np.nan)


def _combined_spread(summary: dict, measure: str = "std") -> float:
    key = "spread" if measure == "std" else "robust_spread"
    parts = [summary[d][key] for d in ("forward", "reverse") if d in summary]
    parts = [p for p in parts if math.isfinite(p)]
    return math.sqrt(sum(p * p for p in parts) / len(parts)) if parts else math.inf


def _drift_bound(grads, lams, precision_a, precision_b, factor, shape):
    """factor × RMS of the preconditioned force M∇u per coordinate along uncontrolled paths."""
    lam = np.asarray(lams)[None, :, None]
    size = int(np.prod(shape))
    pa = np.broadcast_to(np.asarray(precision_a, dtype=np.float64), shape).reshape(-1)
    pb = np.broadcast_to(np.asarray(precision_b, dtype=np.float64), shape).reshape(-1)
    m = 1.0 / ((1.0 - lam) * pa + lam * pb)
    g = np.asarray(grads, dtype=np.float64).reshape(grads.shape[0], grads.shape[1], size)
    force = ((m * g) ** 2).reshape(-1, size)
    finite = np.isfinite(force)
    count = finite.sum(axis=0)
    rms = np.where(count > 0, np.sqrt(np.where(finite, force, 0.0).sum(axis=0) / np.maximum(count, 1)), np.nan)
    typical = float(np.median(rms[np.isfinite(rms)])) if np.any(np.isfinite(rms)) else 1.0
    rms = np.where(np.isfinite(rms) & (rms > 0), rms, typical if typical > 0 else 1.0)
    rms = np.maximum(rms, 1e-3 * max(typical, 1e-12))
    return factor * rms


def prepare_control(key, path: Path, samples_a, samples_b, lams, step_sizes, precision_a, precision_b, *,
                    mode: str = "learned", budget: int, objective: str = "kl", learn_schedule: bool = True,
                    learn_steps: str | bool = "global", learn_network: bool = True, warm_start=None,
                    progress: bool | None = None, training_steps: int | None = None,
                    trajectories_per_step: int = 16, validation_trajectories: int = 128,
                    learning_rate: float | None = None, max_training_fraction: float = 0.5,
                    pilot_fraction: float = 0.1, max_optimiser_steps: int = 3000, check_every: int | None = None,
                    patience: int = 4, network: dict | None = None, drift_bound_factor: float = 5.0,
                    validate: str = "forward", spread_measure: str = "std") -> ControlOutcome:
    """Train a control (and/or the λ schedule and step sizes) for switching along ``path``.

    Args:
        key: PRNG key (split into network init, training, validation keys).
        path: the path u(x, λ).
        samples_a, samples_b: (n, *shape) equilibrium samples of A and B.
        lams, step_sizes: (K+1,), (K,) production protocol the workflow planned.
        precision_a, precision_b: end-state inverse preconditioners (as for ``switch``).
        mode: ``"learned"`` train and keep; ``"auto"`` train a pilot (``pilot_fraction``
            of the budget), keep and continue only when the predicted variance ratio
            (s_after/s_before)²·B/(B − spent) is below 0.8; ``"reuse"`` use ``warm_start``
            as it is (only the before/after validation runs are spent).
        budget: evaluations left for training plus production switching (B).
        objective: ``"kl"`` (mean forward work), ``"jeffreys"`` (both directions) or
            ``"logvar"`` (variance of re-scored stored paths).
        learn_schedule: learn the λ schedule (softmax increments, ends fixed).
        learn_steps: ``"none"``, ``"global"`` (one log scale) or ``"per_step"`` step-size learning.
        learn_network: learn a control network (False: protocol only).
        warm_start: a :class:`ControlOutcome`, a loaded control (:func:`load_control`) or a
            :class:`Control`; its network and protocol are the starting point.
        progress: progress bar (``None``: only in a terminal; never with FE_TOOL_PROGRESS=0).
        training_steps: K used during training (default min(K, 16)); the learned
            protocol is carried over to the production K along λ.
        trajectories_per_step: trajectories per optimiser step (small: many cheap steps).
        validation_trajectories: size V of the fixed validation sets (each direction).
        learning_rate: peak Adam learning rate (default 1e-2; 3e-3 for ``"logvar"``; 0.3× these
            for a warm start).
        max_training_fraction: most of ``budget`` training may spend.
        pilot_fraction: ``"auto"``: the share of ``budget`` spent before deciding.
        max_optimiser_steps: hard limit on steps.
        check_every: optimiser steps between validation checks (default: validation ≈ 10% of cost).
        patience: checks without improvement of the predicted variance before stopping.
        network: control kind and hyperparameters: ``{"kind": "mlp"|"pair_force", ...}`` (MLP:
            ``width``, ``depth``, ``frequencies``; pair force: see :class:`PairForceControl`).
        drift_bound_factor: the drift is bounded smoothly at this multiple of the RMS
            preconditioned force M∇u along uncontrolled paths.
        validate: what the training checks score to keep the best parameters and to stop:
            ``"forward"`` (the forward validation spread; default) or ``"both"`` (√((s_F² + s_R²)/2)
            over fixed forward and reverse validation sets; each check costs twice as much).
            The objective can improve one direction only (path KL trains on forward paths),
            and BAR needs both.
        spread_measure: ``"std"`` (default) or ``"robust"`` (1.4826 × median absolute deviation:
            the std for Gaussian works, blind to a rare far tail such as the overlaps of an
            inserted particle, which make the std of reverse works of a decoupling 10³–10¹⁰ kT);
            used by the checks and by the keep/drop decision.

    Returns:
        :class:`ControlOutcome`; pass ``outcome.drift``, ``outcome.lams``,
        ``outcome.step_sizes`` to :func:`fe_tool.switching.switch` in both directions.

    Example:
        >>> out = prepare_control(key, path, xa, xb, lams, eps, 1.0, 1.0, budget=10**6)
        >>> w, _, _ = switch(path, out.drift, k2, xa, out.lams, out.step_sizes, 1.0, 1.0)
    """
    # ---------------------------------------------------------------- checks
    if mode not in MODES:
        raise ValueError(f"mode must be one of {MODES}, got {mode!r}")
    if objective not in OBJECTIVES:
        raise ValueError(f"objective must be one of {sorted(OBJECTIVES)}, got {objective!r}")
    if learn_steps is True:
        learn_steps = "global"
    if learn_steps in (False, None):
        learn_steps = "none"
    if learn_steps not in STEP_LEARNING:
        raise ValueError(f"learn_steps must be one of {STEP_LEARNING}, got {learn_steps!r}")
    if not isinstance(budget, (int, np.integer)) or budget < 0:
        raise ValueError(f"budget must be a non-negative integer number of evaluations, got {budget!r}")
    if mode == "reuse" and warm_start is None:
        raise ValueError("mode='reuse' needs warm_start= (a ControlOutcome or load_control(...) result)")
    if validate not in VALIDATE:
        raise ValueError(f"validate must be one of {VALIDATE}, got {validate!r}")
    if spread_measure not in SPREAD_MEASURES:
        raise ValueError(f"spread_measure must be one of {SPREAD_MEASURES}, got {spread_measure!r}")
    if not (0.0 < max_training_fraction <= 1.0):
        raise ValueError(f"max_training_fraction must be in (0, 1], got {max_training_fraction}")
    samples_a = jnp.asarray(samples_a)
    samples_b = jnp.asarray(samples_b)
    if samples_a.ndim < 2 or samples_a.shape[1:] != samples_b.shape[1:]:
        raise ValueError(f"samples_a and samples_b must be arrays (n, *configuration shape) of the same configuration "
                         f"shape, got {samples_a.shape} and {samples_b.shape}")
    if min(samples_a.shape[0], samples_b.shape[0]) < 4:
        raise ValueError("need at least 4 equilibrium samples of each end state")
    lams = np.asarray(lams, dtype=np.float64)
    step_sizes = np.asarray(step_sizes, dtype=np.float64)
    Protocol.from_schedule(lams, step_sizes)  # validates
    shape = tuple(samples_a.shape[1:])
    precision_a = jnp.asarray(precision_a, dtype=samples_a.dtype)
    precision_b = jnp.asarray(precision_b, dtype=samples_a.dtype)
    per_point = path.evaluations_per_point(1)
    production_steps = lams.size - 1
    k_train = int(training_steps or min(production_steps, 16))
    warm_control, warm_lams, warm_eps = _warm_parts(warm_start)
    if warm_control is not None and tuple(getattr(warm_control, "shape", shape)) != shape:
        raise ValueError(f"warm_start control is for configurations of shape {warm_control.shape}, samples have {shape}")

    # before/after runs share their noise (a paired comparison); the checks that select the
    # parameters use other noise, so the reported "after" is not biased by the selection
    key_net, key_train, key_valid_f, key_valid_r, key_check = jax.random.split(key, 5)
    settings = {"mode": mode, "objective": objective, "learn_schedule": bool(learn_schedule),
                "learn_steps": learn_steps, "learn_network": bool(learn_network), "budget": int(budget),
                "training_switching_steps": k_train, "trajectories_per_step": int(trajectories_per_step),
                "warm_start": warm_start is not None, "drift_bound_factor": float(drift_bound_factor),
                "validate": validate, "spread_measure": spread_measure}

    # ---------------------------------------------------------------- protocols at the training K
    lams_t = resample_schedule(lams, k_train)
    eps_t = resample_step_sizes(lams, step_sizes, lams_t)
    if warm_lams is not None:
        start_lams = resample_schedule(warm_lams, k_train)
        start_eps = resample_step_sizes(warm_lams, warm_eps, start_lams)
    else:
        start_lams, start_eps = lams_t, eps_t

    # ---------------------------------------------------------------- validation sets
    n_valid = int(min(validation_trajectories, samples_a.shape[0], samples_b.shape[0]))
    valid_a, valid_b = samples_a[-n_valid:], samples_b[-n_valid:]
    train_a = samples_a[:-n_valid] if samples_a.shape[0] >= 2 * n_valid else samples_a
    train_b = samples_b[:-n_valid] if samples_b.shape[0] >= 2 * n_valid else samples_b
    run_cost = n_valid * (k_train + 1) * per_point
    allowance = int(max_training_fraction * budget)

    def no_budget_outcome(reason: str) -> ControlOutcome:
        empty = np.zeros(0)
        nothing = {"forward": work_summary(empty), "reverse": work_summary(empty)}
        return ControlOutcome(None, lams, step_sizes, 0, [], nothing, nothing, empty, empty, empty, empty,
                              reason, False, 1.0, mode, objective, k_train, 0, 0, "not started", lams_t, eps_t, settings)

    least_steps = 0 if mode == "reuse" else MIN_OPTIMISER_STEPS * 2 * trajectories_per_step * (k_train + 1) * per_point
    if allowance < 4 * run_cost + least_steps:
        return no_budget_outcome(
            f"No control: the budget of {budget:,} evaluations allows at most {allowance:,} for training, too few "
            f"for the before/after validation runs ({4 * run_cost:,}) and {MIN_OPTIMISER_STEPS} optimiser steps "
            f"({least_steps:,}); switching runs uncontrolled on the given protocol.")

    # ---------------------------------------------------------------- before: uncontrolled on the given protocol
    baseline = Controller(None, Protocol.from_schedule(lams_t, eps_t))
    w_f0, inc_f0, _, grads0 = evaluate_recorded(baseline, key_valid_f, valid_a, path, precision_a, precision_b, "forward")
    w_r0, _ = evaluate(baseline, key_valid_r, valid_b, path, precision_a, precision_b, "reverse")
    spent = 2 * run_cost
    before = {"forward": work_summary(w_f0), "reverse": work_summary(w_r0)}
    dissipation_before = _mean_per_step(inc_f0)
    both = validate == "both"
    key_check_r = jax.random.fold_in(key_check, 1)
    spread_key = "spread" if spread_measure == "std" else "robust_spread"
    scored = ("forward", "reverse") if both else ("forward",)
    s0 = math.sqrt(sum(before[d][spread_key] ** 2 for d in scored) / len(scored))  # over the finite works
    check_cost = run_cost * (2 if both else 1)

    # ---------------------------------------------------------------- the model to train
    if warm_control is not None:
        control = warm_control
    elif learn_network:
        bound = _drift_bound(np.asarray(grads0), lams_t, precision_a, precision_b, drift_bound_factor, shape)
        scales = ControlScales.from_samples(np.asarray(samples_a), np.asarray(samples_b), bound)
        hyper = dict(network or {})
        kind = hyper.pop("kind", "mlp")
        if kind == "pair_force":  # alchemical particles, box and cutoff come from the path
            hyper = {**pair_force_settings(path), **hyper}
        control = build_control(kind, shape, scales, key=key_net, **hyper)
    else:
        control = None
    protocol = Protocol.from_schedule(start_lams, start_eps, per_step_offsets=(learn_steps == "per_step"))
    model = Controller(control, protocol)
    spec = Controller(
        control.trainable() if (control is not None and learn_network) else
        (jax.tree_util.tree_map(lambda _: False, control) if control is not None else None),
        protocol.trainable(learn_schedule, learn_steps != "none"))
    anything = any(jax.tree_util.tree_leaves(spec))
    if mode != "reuse" and not anything:
        raise ValueError("nothing to learn: set learn_network=True, learn_schedule=True or learn_steps='global'")

    # ---------------------------------------------------------------- training
    report = None
    if mode != "reuse":
        if objective == "logvar":
            step_cost = trajectories_per_step * (k_train + 1) * per_point * (3 if learn_schedule else 1)
        else:
            step_cost = 2 * trajectories_per_step * (k_train + 1) * per_point
        if check_every is None:
            check_every = int(max(5, math.ceil(10 * check_cost / step_cost)))
        lr = float(learning_rate if learning_rate is not None else
                   DEFAULT_LEARNING_RATES[objective] * (WARM_START_LEARNING_RATE_FACTOR if warm_start is not None else 1.0))
        after_cost = 2 * run_cost
        horizon = int(min(max_optimiser_steps, max(1, (allowance - spent - after_cost) // step_cost)))
        setup = TrainSetup(OBJECTIVES[objective], make_optimiser(lr, horizon), int(trajectories_per_step),
                           recompute_energies=bool(learn_schedule))
        data = TrainData(train_a, train_b, precision_a, precision_b)
        if warm_start is None:
            initial_spread = s0  # the zero-initialised control is uncontrolled switching
        else:  # a warm start is only replaced by parameters that validate better
            w_init, _ = evaluate(model, key_check, valid_a, path, precision_a, precision_b, "forward")
            parts = [work_summary(w_init)]
            if both:
                w_init_r, _ = evaluate(model, key_check_r, valid_b, path, precision_a, precision_b, "reverse")
                parts.append(work_summary(w_init_r))
            spent += check_cost
            initial_spread = validation_spread(parts, spread_measure)
        report = run_training(
            key_train, path, model, spec, data, setup, validation_starts=valid_a, validation_key=key_check,
            step_cost=step_cost, check_cost=check_cost, allowance=allowance - after_cost, baseline_spread=s0,
            total_budget=int(budget), spent_before=spent, check_every=check_every, patience=patience,
            pilot_allowance=int(pilot_fraction * budget) if mode == "auto" else None, keep_threshold=KEEP_THRESHOLD,
            max_steps=max_optimiser_steps, initial_spread=initial_spread, progress=progress,
            reverse_starts=valid_b if both else None, reverse_key=key_check_r, spread_measure=spread_measure)
        spent += report.evaluations
        _, frozen = eqx.partition(model, spec)
        model = eqx.combine(report.trainable, frozen)
        settings.update(learning_rate=lr, check_every=check_every, optimiser_step_cost=step_cost)

    # ---------------------------------------------------------------- after: same validation sets and noise
    w_f1, inc_f1 = evaluate(model, key_valid_f, valid_a, path, precision_a, precision_b, "forward")
    w_r1, _ = evaluate(model, key_valid_r, valid_b, path, precision_a, precision_b, "reverse")
    spent += 2 * run_cost
    after = {"forward": work_summary(w_f1), "reverse": work_summary(w_r1)}
    dissipation_after = _mean_per_step(inc_f1)
    lams_after = np.asarray(model.protocol.lams(), dtype=np.float64)

    # ---------------------------------------------------------------- decision
    s_before, s_after = _combined_spread(before, spread_measure), _combined_spread(after, spread_measure)
    left = budget - spent
    ratio = (s_after / s_before) ** 2 * budget / left if (left > 0 and s_before > 0) else math.inf
    nonfinite_before = before["forward"]["nonfinite"] + before["reverse"]["nonfinite"]
    nonfinite_after = after["forward"]["nonfinite"] + after["reverse"]["nonfinite"]
    more_blowups = nonfinite_after > nonfinite_before + max(1, 0.01 * 2 * n_valid)
    what = "control" if control is not None else "learned protocol"
    measure = "work spread" if spread_measure == "std" else "robust work spread (1.4826·MAD)"
    numbers = (f"the validation {measure} (forward and reverse, K={k_train}) went from {s_before:.3g} to "
               f"{s_after:.3g} kT for {spent:,} evaluations ({spent / budget:.1%} of the {budget:,} budget)")
    if report is not None:
        numbers += f" in {report.optimiser_steps} optimiser steps ({report.stop_reason})"
    prediction = (f"predicted BAR variance with the {what} at the remaining budget is {ratio:.2g}× that of "
                  f"uncontrolled switching with the whole budget")
    if mode == "auto":
        kept = bool(ratio < KEEP_THRESHOLD and not more_blowups)
        if kept:
            decision = f"Kept the {what}: {numbers}; {prediction}, below the {KEEP_THRESHOLD} needed to keep it."
        elif more_blowups:
            decision = (f"Dropped the {what}: it produced {nonfinite_after} non-finite validation works against "
                        f"{nonfinite_before} without it; {numbers}.")
        else:
            decision = (f"Dropped the {what}: {numbers}; {prediction}, not below {KEEP_THRESHOLD}, so the training "
                        "does not pay for itself and switching runs uncontrolled on the given protocol.")
    else:
        kept = True
        verb = "Reused" if mode == "reuse" else "Trained"
        decision = f"{verb} the {what} as asked: {numbers}; {prediction}."
        if ratio >= 1.0:
            decision += " It is not predicted to pay for its cost at this budget."
        if more_blowups:
            decision += (f" Warning: {nonfinite_after} validation works were non-finite with it "
                         f"(against {nonfinite_before} without).")
    if report is not None and report.skipped_steps:
        decision += f" {report.skipped_steps} optimiser steps had non-finite loss or gradient and were skipped."
    warnings = []
    if kept and control is not None:
        for direction in ("forward", "reverse"):
            bad = after[direction]["nonfinite"]
            if bad:
                warnings.append(f"control: {bad} of {n_valid} {direction} validation works were non-finite with the "
                                f"learned control (without it: {before[direction]['nonfinite']}); they are counted as "
                                "diverged trajectories")
    if report is not None and report.skipped_steps:
        warnings.append(f"control: {report.skipped_steps} of {report.optimiser_steps} optimiser steps had a non-finite "
                        "loss or gradient and were skipped")
    if mode == "learned" and ratio >= 1.0:
        warnings.append(f"control: the {what} is predicted to give {ratio:.2g}× the BAR variance of uncontrolled "
                        "switching with the whole budget (its training does not pay for itself here); "
                        "control='auto' would have dropped it")

    if kept:
        protocol_changed = learn_schedule or learn_steps != "none" or warm_lams is not None
        if protocol_changed:
            out_lams, out_eps = model.protocol.resampled(production_steps)
        else:
            out_lams, out_eps = lams, step_sizes
        out_control = model.control
    else:
        out_lams, out_eps, out_control = lams, step_sizes, None

    return ControlOutcome(
        control=out_control, lams=np.asarray(out_lams), step_sizes=np.asarray(out_eps), evaluations=int(spent),
        history=report.history if report is not None else [], work_before=before, work_after=after,
        dissipation_before=dissipation_before, dissipation_after=dissipation_after,
        midpoints_before=midpoints(lams_t), midpoints_after=midpoints(lams_after), decision=decision, kept=kept,
        predicted_variance_ratio=float(ratio), mode=mode, objective=objective, training_steps=k_train,
        optimiser_steps=report.optimiser_steps if report is not None else 0,
        skipped_steps=report.skipped_steps if report is not None else 0,
        stop_reason=report.stop_reason if report is not None else "reused without training",
        training_lams=lams_after, training_step_sizes=np.asarray(model.protocol.step_sizes(), dtype=np.float64),
        settings=settings, warnings=warnings)
