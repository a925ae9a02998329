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
    learn_steps = _check_arguments(mode, objective, learn_steps, budget, warm_start, validate, spread_measure,
                                   max_training_fraction)
    run = _set_up(key, path, samples_a, samples_b, lams, step_sizes, precision_a, precision_b, mode=mode,
                  objective=objective, budget=int(budget), learn_schedule=learn_schedule, learn_steps=learn_steps,
                  learn_network=learn_network, warm_start=warm_start, training_steps=training_steps,
                  trajectories_per_step=trajectories_per_step, validation_trajectories=validation_trajectories,
                  max_training_fraction=max_training_fraction, drift_bound_factor=drift_bound_factor,
                  validate=validate, spread_measure=spread_measure)
    least_steps = 0 if mode == "reuse" else \
        MIN_OPTIMISER_STEPS * 2 * trajectories_per_step * (run.k_train + 1) * run.per_point
    if run.allowance < 4 * run.run_cost + least_steps:
        return _no_budget_outcome(run, (
            f"No control: the budget of {run.budget:,} evaluations allows at most {run.allowance:,} for training, "
            f"too few for the before/after validation runs ({4 * run.run_cost:,}) and {MIN_OPTIMISER_STEPS} "
            f"optimiser steps ({least_steps:,}); switching runs uncontrolled on the given protocol."))
    baseline = _measure_baseline(run)
    model, spec, control = _build_model(run, baseline["grads"], network)
    report = None
    if mode != "reuse":
        model, report = _train(run, model, spec, baseline, learning_rate=learning_rate, check_every=check_every,
                               patience=patience, pilot_fraction=pilot_fraction,
                               max_optimiser_steps=max_optimiser_steps, progress=progress)
    after = _measure_after(run, model)
    return _decide(run, model, control, baseline, after, report)


@dataclasses.dataclass
class _Run:
    """Everything the stages of :func:`prepare_control` share (fixed once set up; ``spent`` grows)."""

    path: Path
    mode: str
    objective: str
    budget: int
    learn_schedule: bool
    learn_steps: str
    learn_network: bool
    warm_start: Any
    warm: tuple
    samples_a: Any
    samples_b: Any
    lams: np.ndarray
    step_sizes: np.ndarray
    precision_a: Any
    precision_b: Any
    shape: tuple
    per_point: int
    k_train: int
    lams_t: np.ndarray
    eps_t: np.ndarray
    start_lams: np.ndarray
    start_eps: np.ndarray
    n_valid: int
    valid_a: Any
    valid_b: Any
    train_a: Any
    train_b: Any
    run_cost: int
    allowance: int
    keys: dict
    both: bool
    spread_measure: str
    trajectories_per_step: int
    drift_bound_factor: float
    settings: dict
    spent: int = 0

    @property
    def spread_key(self) -> str:
        return "spread" if self.spread_measure == "std" else "robust_spread"

    @property
    def scored(self) -> tuple[str, ...]:
        return ("forward", "reverse") if self.both else ("forward",)

    @property
    def check_cost(self) -> int:
        return self.run_cost * (2 if self.both else 1)


def _check_arguments(mode, objective, learn_steps, budget, warm_start, validate, spread_measure,
                     max_training_fraction) -> str:
    """Refuse malformed arguments; returns ``learn_steps`` normalised."""
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
    if not isinstance(budget, (int, np.integer)) or isinstance(budget, bool) or budget < 0:
        raise ValueError(f"budget must be a non-negative integer number of evaluations, got {budget!r}")
    if mode == "reuse" and warm_start is None:
        raise ValueError("mode='reuse' needs warm_start= (a ControlOutcome or load_control(...) result)")
    if validate not in VALIDATE:
        raise ValueError(f"validate must be one of {VALIDATE}, got {validate!r}")
    if spread_measure not in SPREAD_MEASURES:
        raise ValueError(f"spread_measure must be one of {SPREAD_MEASURES}, got {spread_measure!r}")
    if not (0.0 < max_training_fraction <= 1.0):
        raise ValueError(f"max_training_fraction must be in (0, 1], got {max_training_fraction}")
    return learn_steps


def _set_up(key, path, samples_a, samples_b, lams, step_sizes, precision_a, precision_b, *, mode, objective, budget,
            learn_schedule, learn_steps, learn_network, warm_start, training_steps, trajectories_per_step,
            validation_trajectories, max_training_fraction, drift_bound_factor, validate, spread_measure) -> _Run:
    """Arrays, the training K and its protocols, the validation sets and the keys."""
    samples_a, samples_b = jnp.asarray(samples_a), jnp.asarray(samples_b)
    if samples_a.ndim < 2 or samples_a.shape[1:] != samples_b.shape[1:]:
        raise ValueError(f"samples_a and samples_b must be arrays (n, *configuration shape) of the same configuration "
                         f"shape, got {samples_a.shape} and {samples_b.shape}")
    if min(samples_a.shape[0], samples_b.shape[0]) < 4:
        raise ValueError("need at least 4 equilibrium samples of each end state")
    lams, step_sizes = np.asarray(lams, dtype=np.float64), np.asarray(step_sizes, dtype=np.float64)
    Protocol.from_schedule(lams, step_sizes)  # validates
    shape = tuple(samples_a.shape[1:])
    k_train = int(training_steps or min(lams.size - 1, 16))
    warm = _warm_parts(warm_start)
    if warm[0] is not None and tuple(getattr(warm[0], "shape", shape)) != shape:
        raise ValueError(f"warm_start control is for configurations of shape {warm[0].shape}, samples have {shape}")
    # before/after runs share their noise (a paired comparison); the checks that select the
    # parameters use other noise, so the reported "after" is not biased by the selection
    key_net, key_train, key_valid_f, key_valid_r, key_check = jax.random.split(key, 5)
    keys = {"net": key_net, "train": key_train, "valid_f": key_valid_f, "valid_r": key_valid_r, "check": key_check,
            "check_r": jax.random.fold_in(key_check, 1)}
    settings = {"mode": mode, "objective": objective, "learn_schedule": bool(learn_schedule),
                "learn_steps": learn_steps, "learn_network": bool(learn_network), "budget": int(budget),
                "training_switching_steps": k_train, "trajectories_per_step": int(trajectories_per_step),
                "warm_start": warm_start is not None, "drift_bound_factor": float(drift_bound_factor),
                "validate": validate, "spread_measure": spread_measure}
    lams_t = resample_schedule(lams, k_train)
    eps_t = resample_step_sizes(lams, step_sizes, lams_t)
    if warm[1] is not None:
        start_lams = resample_schedule(warm[1], k_train)
        start_eps = resample_step_sizes(warm[1], warm[2], start_lams)
    else:
        start_lams, start_eps = lams_t, eps_t
    n_valid = int(min(validation_trajectories, samples_a.shape[0], samples_b.shape[0]))
    per_point = path.evaluations_per_point(1)
    return _Run(
        path=path, mode=mode, objective=objective, budget=int(budget), learn_schedule=bool(learn_schedule),
        learn_steps=learn_steps, learn_network=bool(learn_network), warm_start=warm_start, warm=warm,
        samples_a=samples_a, samples_b=samples_b, lams=lams, step_sizes=step_sizes,
        precision_a=jnp.asarray(precision_a, dtype=samples_a.dtype), precision_b=jnp.asarray(precision_b, dtype=samples_a.dtype),
        shape=shape, per_point=per_point, k_train=k_train, lams_t=lams_t, eps_t=eps_t, start_lams=start_lams,
        start_eps=start_eps, n_valid=n_valid, valid_a=samples_a[-n_valid:], valid_b=samples_b[-n_valid:],
        train_a=samples_a[:-n_valid] if samples_a.shape[0] >= 2 * n_valid else samples_a,
        train_b=samples_b[:-n_valid] if samples_b.shape[0] >= 2 * n_valid else samples_b,
        run_cost=n_valid * (k_train + 1) * per_point, allowance=int(max_training_fraction * budget), keys=keys,
        both=validate == "both", spread_measure=spread_measure, trajectories_per_step=int(trajectories_per_step),
        drift_bound_factor=float(drift_bound_factor), settings=settings)


def _no_budget_outcome(run: _Run, reason: str) -> ControlOutcome:
    empty = np.zeros(0)
    nothing = {"forward": work_summary(empty), "reverse": work_summary(empty)}
    return ControlOutcome(None, run.lams, run.step_sizes, 0, [], nothing, nothing, empty, empty, empty, empty,
                          reason, False, 1.0, run.mode, run.objective, run.k_train, 0, 0, "not started", run.lams_t,
                          run.eps_t, run.settings)


def _measure_baseline(run: _Run) -> dict:
    """Uncontrolled switching on the given protocol over the validation sets."""
    baseline = Controller(None, Protocol.from_schedule(run.lams_t, run.eps_t))
    w_f0, inc_f0, _, grads0 = evaluate_recorded(baseline, run.keys["valid_f"], run.valid_a, run.path, run.precision_a,
                                                run.precision_b, "forward")
    w_r0, _ = evaluate(baseline, run.keys["valid_r"], run.valid_b, run.path, run.precision_a, run.precision_b, "reverse")
    run.spent = 2 * run.run_cost
    before = {"forward": work_summary(w_f0), "reverse": work_summary(w_r0)}
    s0 = math.sqrt(sum(before[d][run.spread_key] ** 2 for d in run.scored) / len(run.scored))  # over the finite works
    return {"works": before, "dissipation": _mean_per_step(inc_f0), "grads": grads0, "spread": s0}


def _build_model(run: _Run, grads0, network):
    """The controller to train (warm start, fresh network or protocol only) and what of it is trainable."""
    warm_control = run.warm[0]
    if warm_control is not None:
        control = warm_control
    elif run.learn_network:
        bound = _drift_bound(np.asarray(grads0), run.lams_t, run.precision_a, run.precision_b, run.drift_bound_factor,
                             run.shape)
        scales = ControlScales.from_samples(np.asarray(run.samples_a), np.asarray(run.samples_b), bound)
        hyper = dict(network or {})
        kind = hyper.pop("kind", "mlp")
        if kind == "pair_force":  # alchemical particles, box and cutoff come from the path
            hyper = {**pair_force_settings(run.path), **hyper}
        control = build_control(kind, run.shape, scales, key=run.keys["net"], **hyper)
    else:
        control = None
    protocol = Protocol.from_schedule(run.start_lams, run.start_eps, per_step_offsets=(run.learn_steps == "per_step"))
    model = Controller(control, protocol)
    spec = Controller(
        control.trainable() if (control is not None and run.learn_network) else
        (jax.tree_util.tree_map(lambda _: False, control) if control is not None else None),
        protocol.trainable(run.learn_schedule, run.learn_steps != "none"))
    if run.mode != "reuse" and not any(jax.tree_util.tree_leaves(spec)):
        raise ValueError("nothing to learn: set learn_network=True, learn_schedule=True or learn_steps='global'")
    return model, spec, control


def _initial_spread(run: _Run, model, baseline) -> float:
    """The validation spread training must beat: the baseline's, or a warm start's own."""
    if run.warm_start is None:
        return baseline["spread"]  # the zero-initialised control is uncontrolled switching
    w_init, _ = evaluate(model, run.keys["check"], run.valid_a, run.path, run.precision_a, run.precision_b, "forward")
    parts = [work_summary(w_init)]
    if run.both:
        w_init_r, _ = evaluate(model, run.keys["check_r"], run.valid_b, run.path, run.precision_a, run.precision_b,
                               "reverse")
        parts.append(work_summary(w_init_r))
    run.spent += run.check_cost
    return validation_spread(parts, run.spread_measure)


def _train(run: _Run, model, spec, baseline, *, learning_rate, check_every, patience, pilot_fraction,
           max_optimiser_steps, progress):
    """The optax loop within the training allowance; returns the trained model and the report."""
    per_run = run.trajectories_per_step * (run.k_train + 1) * run.per_point
    if run.objective == "logvar":
        step_cost = per_run * (3 if run.learn_schedule else 1)
    else:
        step_cost = 2 * per_run
    if check_every is None:
        check_every = int(max(5, math.ceil(10 * run.check_cost / step_cost)))
    factor = WARM_START_LEARNING_RATE_FACTOR if run.warm_start is not None else 1.0
    lr = float(learning_rate if learning_rate is not None else DEFAULT_LEARNING_RATES[run.objective] * factor)
    after_cost = 2 * run.run_cost
    horizon = int(min(max_optimiser_steps, max(1, (run.allowance - run.spent - after_cost) // step_cost)))
    setup = TrainSetup(OBJECTIVES[run.objective], make_optimiser(lr, horizon), run.trajectories_per_step,
                       recompute_energies=run.learn_schedule)
    data = TrainData(run.train_a, run.train_b, run.precision_a, run.precision_b)
    initial_spread = _initial_spread(run, model, baseline)
    report = run_training(
        run.keys["train"], run.path, model, spec, data, setup, validation_starts=run.valid_a,
        validation_key=run.keys["check"], step_cost=step_cost, check_cost=run.check_cost,
        allowance=run.allowance - after_cost, baseline_spread=baseline["spread"], total_budget=run.budget,
        spent_before=run.spent, check_every=check_every, patience=patience,
        pilot_allowance=int(pilot_fraction * run.budget) if run.mode == "auto" else None, keep_threshold=KEEP_THRESHOLD,
        max_steps=max_optimiser_steps, initial_spread=initial_spread, progress=progress,
        reverse_starts=run.valid_b if run.both else None, reverse_key=run.keys["check_r"],
        spread_measure=run.spread_measure)
    run.spent += report.evaluations
    _, frozen = eqx.partition(model, spec)
    run.settings.update(learning_rate=lr, check_every=check_every, optimiser_step_cost=step_cost)
    return eqx.combine(report.trainable, frozen), report


def _measure_after(run: _Run, model) -> dict:
    """The chosen model on the same validation sets and noise as the baseline (a paired comparison)."""
    w_f1, inc_f1 = evaluate(model, run.keys["valid_f"], run.valid_a, run.path, run.precision_a, run.precision_b, "forward")
    w_r1, _ = evaluate(model, run.keys["valid_r"], run.valid_b, run.path, run.precision_a, run.precision_b, "reverse")
    run.spent += 2 * run.run_cost
    return {"works": {"forward": work_summary(w_f1), "reverse": work_summary(w_r1)},
            "dissipation": _mean_per_step(inc_f1), "lams": np.asarray(model.protocol.lams(), dtype=np.float64)}


def _decision_text(run: _Run, control, before, after, report, ratio) -> tuple[bool, str]:
    """Keep or drop, and the sentence saying why with the numbers behind it."""
    spent, budget = run.spent, run.budget
    s_before = _combined_spread(before, run.spread_measure)
    s_after = _combined_spread(after, run.spread_measure)
    nonfinite_before = before["forward"]["nonfinite"] + before["reverse"]["nonfinite"]
    nonfinite_after = after["forward"]["nonfinite"] + after["reverse"]["nonfinite"]
    more_blowups = nonfinite_after > nonfinite_before + max(1, 0.01 * 2 * run.n_valid)
    what = "control" if control is not None else "learned protocol"
    measure = "work spread" if run.spread_measure == "std" else "robust work spread (1.4826·MAD)"
    numbers = (f"the validation {measure} (forward and reverse, K={run.k_train}) went from {s_before:.3g} to "
               f"{s_after:.3g} kT for {spent:,} evaluations ({spent / budget:.1%} of the {budget:,} evaluations "
               "left for training and switching)")
    if report is not None:
        numbers += f" in {report.optimiser_steps} optimiser steps ({report.stop_reason})"
    prediction = (f"predicted BAR variance with the {what} at the remaining budget is {ratio:.2g}× that of "
                  f"uncontrolled switching with the whole budget")
    if run.mode == "auto":
        kept = bool(ratio < KEEP_THRESHOLD and not more_blowups)
        if kept:
            return kept, f"Kept the {what}: {numbers}; {prediction}, below the {KEEP_THRESHOLD} needed to keep it."
        if more_blowups:
            return kept, (f"Dropped the {what}: it produced {nonfinite_after} non-finite validation works against "
                          f"{nonfinite_before} without it; {numbers}.")
        return kept, (f"Dropped the {what}: {numbers}; {prediction}, not below {KEEP_THRESHOLD}, so the training "
                      "does not pay for itself and switching runs uncontrolled on the given protocol.")
    verb = "Reused" if run.mode == "reuse" else "Trained"
    decision = f"{verb} the {what} as asked: {numbers}; {prediction}."
    if ratio >= 1.0:
        decision += " It is not predicted to pay for its cost at this budget."
    if more_blowups:
        decision += (f" Warning: {nonfinite_after} validation works were non-finite with it "
                     f"(against {nonfinite_before} without).")
    return True, decision


def _decision_warnings(run: _Run, control, kept, before, after, report, ratio) -> list[str]:
    warnings = []
    if kept and control is not None:
        for direction in ("forward", "reverse"):
            bad = after[direction]["nonfinite"]
            if bad:
                warnings.append(f"control: {bad} of {run.n_valid} {direction} validation works were non-finite with "
                                f"the learned control (without it: {before[direction]['nonfinite']}); they are "
                                "counted as diverged trajectories")
    if report is not None and report.skipped_steps:
        warnings.append(f"control: {report.skipped_steps} of {report.optimiser_steps} optimiser steps had a non-finite "
                        "loss or gradient and were skipped")
    if run.mode == "learned" and ratio >= 1.0:
        what = "control" if control is not None else "learned protocol"
        warnings.append(f"control: the {what} is predicted to give {ratio:.2g}× the BAR variance of uncontrolled "
                        "switching with the whole budget (its training does not pay for itself here); "
                        "control='auto' would have dropped it")
    return warnings


def _decide(run: _Run, model, control, baseline, after_run, report) -> ControlOutcome:
    """Keep or drop the control by its predicted variance at equal budget; assemble the outcome."""
    before, after = baseline["works"], after_run["works"]
    s_before = _combined_spread(before, run.spread_measure)
    s_after = _combined_spread(after, run.spread_measure)
    left = run.budget - run.spent
    ratio = (s_after / s_before) ** 2 * run.budget / left if (left > 0 and s_before > 0) else math.inf
    kept, decision = _decision_text(run, control, before, after, report, ratio)
    if report is not None and report.skipped_steps:
        decision += f" {report.skipped_steps} optimiser steps had non-finite loss or gradient and were skipped."
    warnings = _decision_warnings(run, control, kept, before, after, report, ratio)
    if kept:
        protocol_changed = run.learn_schedule or run.learn_steps != "none" or run.warm[1] is not None
        out_lams, out_eps = (model.protocol.resampled(run.lams.size - 1) if protocol_changed
                             else (run.lams, run.step_sizes))
        out_control = model.control
    else:
        out_lams, out_eps, out_control = run.lams, run.step_sizes, None
    return ControlOutcome(
        control=out_control, lams=np.asarray(out_lams), step_sizes=np.asarray(out_eps), evaluations=int(run.spent),
        history=report.history if report is not None else [], work_before=before, work_after=after,
        dissipation_before=baseline["dissipation"], dissipation_after=after_run["dissipation"],
        midpoints_before=midpoints(run.lams_t), midpoints_after=midpoints(after_run["lams"]), decision=decision,
        kept=kept, predicted_variance_ratio=float(ratio), mode=run.mode, objective=run.objective,
        training_steps=run.k_train, optimiser_steps=report.optimiser_steps if report is not None else 0,
        skipped_steps=report.skipped_steps if report is not None else 0,
        stop_reason=report.stop_reason if report is not None else "reused without training",
        training_lams=after_run["lams"],
        training_step_sizes=np.asarray(model.protocol.step_sizes(), dtype=np.float64),
        settings=run.settings, warnings=warnings)
