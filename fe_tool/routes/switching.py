"""The switching route: ΔF from nonequilibrium switching in both directions.

Stages, each a named function: plan the budget (:func:`plan_switching`, before any computation)
→ sample both end states → pilot switching to size the protocol → (train a control) → switch
both ways → estimators and diagnostics → :class:`~fe_tool.results.Result`. Every stochastic
stage gets its own named subkey of ``jax.random.key(seed)``.
"""
from __future__ import annotations

import dataclasses
import math
import time

import jax
import jax.numpy as jnp
import numpy as np

from .. import diagnostics as diag
from ..estimators import bar, crooks_gaussian, jarzynski, solve_bar, work_overlap
from ..estimators.grouped import with_grouped_error
from ..estimators.spread import robust_spread
from ..options import CONTROL_MODES, Options, sampling_kernel
from ..path import make_schedule
from ..progress import EvaluationMeter, progress_enabled
from ..results import Result
from ..sampling import StateSamples, end_target, nonfinite_warnings, sample_state
from ..switching import run_in_batches, switching_evaluations_padded
from . import insertion
from .dynamics import KineticSwitching, OverdampedSwitching, choose_dynamics
from .budget import MIN_TRAJECTORIES, PILOT_STEPS, SwitchingBudget, affordable_trajectories, plan_switching_budget
from .ledger import Ledger
from .planning import PilotPoint, Plan, length_profile, plan_protocol, schedule_from_profile

DEFAULT_BUDGET = 1_000_000
SWITCH_BATCH = 128
PAIR_AUTO_NOTE = ("not trained: for particle systems control=\"auto\" leaves the pair-force control off (on the "
                  "Lennard-Jones decoupling benchmark it cut the insertion work spread at equal steps, but its training "
                  "never paid for itself at equal budget); control=\"learned\" trains it")

KINETIC_AUTO_NOTE = ("not trained: switching runs kinetic Langevin dynamics (as the end states were sampled), for "
                     "which no control is trained; control=\"learned\" trains a drift for overdamped switching")


def mark_diverged(works: np.ndarray) -> np.ndarray:
    """True where a trajectory diverged: its work is NaN or −∞.

    A large or infinite *positive* work is not a divergence: an inserted particle that lands
    on a neighbour legitimately does 10²–10³⁰ kT of work. Such trajectories are kept; their
    weight e^{−w} in every estimator is (nearly) zero, and dropping them would bias ΔF.
    """
    works = np.asarray(works, dtype=np.float64)
    return np.isnan(works) | (works == -np.inf)


# ------------------------------------------------------------------ estimators and headline

def usable_works(works: np.ndarray) -> np.ndarray:
    """The works every estimator uses: all but the diverged ones (NaN, −∞); +∞ stays (zero weight)."""
    works = np.asarray(works, dtype=np.float64)
    return works[~mark_diverged(works)]


def run_estimators(work_forward: np.ndarray, work_reverse: np.ndarray, seed: int) -> tuple[dict, float]:
    """All switching estimators (reduced units) and the forward/reverse overlap.

    Diverged works (NaN, −∞) are left out (they are counted and flagged elsewhere); large and
    infinite positive works stay in every estimator with their (near) zero weight. The Crooks
    Gaussian fit cannot take +∞ works: it drops them and says so in its details.
    """
    rng = np.random.default_rng(seed)
    wf, wr = usable_works(work_forward), usable_works(work_reverse)
    estimates = {
        "jarzynski_forward": with_reach(jarzynski(wf, direction="forward", rng=rng), wf, wr, "forward"),
        "jarzynski_reverse": with_reach(jarzynski(wr, direction="reverse", rng=rng), wr, wf, "reverse"),
        "crooks_gaussian": crooks_gaussian(wf, wr, rng=rng, nonfinite="drop"),
        "bar": bar(wf, wr),
    }
    return estimates, float(work_overlap(wf, wr, estimates["bar"].delta_f))


def with_reach(estimate, own: np.ndarray, other: np.ndarray, direction: str):
    """Mark a one-sided average unreliable when its works have not reached where its weight lies.

    By Crooks' relation, p_F(w) e^{−w} = e^{−Δf} p_R(−w): the share of the forward exponential
    average contributed by works below some value m equals the share of reverse works above −m
    (Crooks 1998, J. Stat. Phys. 90, 1481; the argument of Jarzynski 2006, Phys. Rev. E 73,
    046105). So with m the smallest forward work seen, the share q of (finite) reverse works above
    −m is weight the forward average has never sampled: it is too high in its own direction by
    about −ln(1 − q), and its own error bar cannot know it (the sample looks well behaved; e.g.
    deleting a particle from a fluid, whose overlap configurations the coupled end almost never
    visits). The other direction's works are independent data, so this check does not share the
    blind spot of the tail-shape check. The average is marked unreliable when none of its works
    reaches the other's median (the old rule, q ≥ ½) or when the missed share's bias exceeds twice
    its error bar. Symmetrically for the reverse average.
    """
    import dataclasses

    finite_other = other[np.isfinite(other)]
    target = float(np.median(-other))
    reach = int(np.sum(own <= target))
    missed = float(np.mean(-finite_other < np.min(own))) if own.size and finite_other.size else 0.0
    bias = -math.log1p(-missed) if missed < 1.0 else math.inf
    details = {**estimate.details, "works_reaching_other_side": reach, "missed_weight_share": missed}
    other_name = "reverse" if direction == "forward" else "forward"
    reason = None
    if reach == 0:
        reason = (f"none of its {own.size} works reaches the typical negated {other_name} work ({target:.3g} kT), "
                  "where this exponential average gets its weight, so it has not converged")
    elif bias > 2.0 * estimate.stderr:
        reason = (f"{missed:.1%} of the {other_name} works lie where none of its works reached; by Crooks' relation "
                  f"that is weight this average never sampled (it is too high by about {bias:.2g} kT in its own "
                  "direction)")
    if reason is not None and estimate.details.get("reliable", True):
        details.update(reliable=False, stderr_if_converged=estimate.stderr, unreliable_reason=reason)
        return dataclasses.replace(estimate, stderr=math.inf, details=details)
    return dataclasses.replace(estimate, details=details)


def choose_one_sided(estimates: dict, work_forward: np.ndarray, work_reverse: np.ndarray) -> str:
    """Which one-sided average to report when the directions barely overlap, without looking at errors.

    A forward exponential average converges once forward trajectories reach the works typical of
    reverse ones, which takes about exp(dissipation of the *reverse* process) trajectories, and
    vice versa (Jarzynski 2006, Phys. Rev. E 73, 046105 — from memory). So the direction whose
    opposite process dissipates less is chosen, with dissipation measured by medians (robust
    to rare huge works) about the BAR value: d_F = median w_F − Δf, d_R = median w_R + Δf.
    The rule uses neither estimate's error bar, so choosing cannot favour a sample that
    happened to miss its tail.
    """
    wf, wr = usable_works(work_forward), usable_works(work_reverse)
    centre = estimates["bar"].delta_f if math.isfinite(estimates["bar"].delta_f) else \
        0.5 * (float(np.median(wf)) - float(np.median(wr)))
    dissipation_forward = float(np.median(wf)) - centre
    dissipation_reverse = float(np.median(wr)) + centre
    return "jarzynski_forward" if dissipation_reverse <= dissipation_forward else "jarzynski_reverse"


def choose_headline(estimates: dict, overlap: float, work_forward: np.ndarray,
                    work_reverse: np.ndarray) -> tuple[str, str]:
    """Pick the estimator to report and say why (BAR unless the directions barely overlap)."""
    b = estimates["bar"]
    if b.is_finite and overlap >= diag.OVERLAP_FLAG:
        return "bar", ("BAR uses both directions and is the minimum-variance estimator when the work "
                       f"distributions overlap (overlap {overlap:.2f})")
    name = choose_one_sided(estimates, work_forward, work_reverse)
    other = "reverse" if name == "jarzynski_forward" else "forward"
    return name, (f"forward and reverse works barely overlap (overlap {overlap:.3g}), so a one-sided average is "
                  f"reported: the one whose opposite ({other}) process dissipates less, which converges with fewer "
                  "trajectories")


# ------------------------------------------------------------------ pilot switching

def _switching_step_sizes(lams: np.ndarray, samples_a: StateSamples, samples_b: StateSamples, scale: float) -> np.ndarray:
    """Overdamped switching steps (kept for the benchmarks; the route asks its dynamics)."""
    return OverdampedSwitching(samples_a, samples_b, ()).step_sizes(lams, scale)


def _pilot_both_ways(path, dyn, key, lams, scale, n, cost, on_spent):
    """``n`` uncontrolled trajectories each way on ``lams`` at one step scale, booked to ``cost["pilot"]``.

    Returns ``(next key, (forward works, increments), (reverse works, increments))``.
    """
    eps = dyn.step_sizes(lams, scale)
    kf, kr, key = jax.random.split(key, 3)
    forward = dyn.run(path, None, kf, dyn.samples_a.samples[:n], lams, eps, "forward", n, on_spent)
    reverse = dyn.run(path, None, kr, dyn.samples_b.samples[:n], lams, eps, "reverse", n, on_spent)
    cost["pilot"] += 2 * dyn.cost(path, n, len(lams) - 1, n)
    return key, forward, reverse


def _schedule_pilot(path, dyn, key, cost, scales, trajectories=64, tries: int = 2, on_spent=None):
    """Pilot on the linear schedule; return (λ grid, normalised length profile) for an adaptive schedule."""
    lams0 = make_schedule("linear", PILOT_STEPS)
    n = min(trajectories, len(dyn.samples_a.samples), len(dyn.samples_b.samples))
    variance = np.full(PILOT_STEPS, np.nan)
    # a moderate step first (the largest pilot step is the one most likely to blow up), then smaller
    for scale in ([s for s in scales if s <= 0.5] or list(scales))[:tries]:
        key, (_, inc_f), (_, inc_r) = _pilot_both_ways(path, dyn, key, lams0, scale, n, cost, on_spent)
        # trajectories whose every step is finite (one that crosses a forbidden region has ∞ − ∞ steps)
        ok_f, ok_r = np.isfinite(inc_f).all(axis=1), np.isfinite(inc_r).all(axis=1)
        if ok_f.sum() > 8 and ok_r.sum() > 8:
            # reverse increments run from λ = 1 to 0: flip them onto the forward grid
            variance = 0.5 * (inc_f[ok_f].var(axis=0) + inc_r[ok_r][:, ::-1].var(axis=0))
            break
    if not np.all(np.isfinite(variance)):
        return lams0, lams0.copy()
    return lams0, length_profile(lams0, variance)


def step_scale_pilot(path, dyn, key, lams, scales, cost, trajectories: int = 64, on_spent=None) -> list[PilotPoint]:
    """Uncontrolled pilot switching on ``lams`` at each step scale; the points the protocol planner fits.

    Adds the pilot's evaluations to ``cost["pilot"]``.
    """
    n = min(trajectories, len(dyn.samples_a.samples), len(dyn.samples_b.samples))
    steps = len(lams) - 1
    points = []
    for scale in scales:
        key, (wf, _), (wr, _) = _pilot_both_ways(path, dyn, key, lams, scale, n, cost, on_spent)
        bad_f, bad_r = mark_diverged(wf), mark_diverged(wr)
        ok_f, ok_r = wf[~bad_f], wr[~bad_r]
        # medians, not means: insertion-type switching has rare overlap works of 1e3–1e30 kT that sit far
        # outside the overlap region BAR uses but would decide a mean (for Gaussian works they agree)
        enough = ok_f.size > 2 and ok_r.size > 2
        hysteresis = float(np.median(ok_f) + np.median(ok_r)) if enough else float("inf")
        spread = float(max(robust_spread(ok_f), robust_spread(ok_r))) if enough else float("inf")
        points.append(PilotPoint(steps, scale, hysteresis, spread, int(bad_f.sum() + bad_r.sum())))
    return points


# ------------------------------------------------------------------ stages of the switching route

def _sample_ends(keys, path, x_a, x_b, starts, opts: Options, plan: SwitchingBudget, samples_wanted: int,
                 ledger: Ledger) -> dict[str, StateSamples]:
    t0 = time.perf_counter()
    sampled = {}
    for end, k_end, x0 in (("a", keys[0], x_a), ("b", keys[1], x_b)):
        s = sample_state(k_end, end_target(path, end), x0, samples=samples_wanted, chains=plan.chains,
                         evaluation_budget=int(plan.sampling_cap), precondition=opts.precondition,
                         name=f"end state {end.upper()}", starts=starts[end], on_spent=ledger.spend,
                         kernel=sampling_kernel(opts, x0))
        sampled[end] = s
        ledger.cost[f"sampling_{end}"] = s.evaluations
        ledger.warnings.extend(s.warnings)
    if not all(s.equilibrated for s in sampled.values()) or any(s.nan_proposals for s in sampled.values()):
        ledger.flagged = True
    forbidden = sum(s.forbidden_proposals for s in sampled.values())
    if forbidden:
        ledger.warnings.extend(nonfinite_warnings("end-state sampling", 0, forbidden))
    ledger.timings["sampling"] = time.perf_counter() - t0
    return sampled


def _pilot_and_plan(key, path, dyn, opts: Options, budget: int | None, plan: SwitchingBudget, ledger: Ledger):
    """Pilot runs, then K, step scale and trajectories; returns ``(plan, lams, step_sizes, points)``."""
    t0 = time.perf_counter()
    samples_a, samples_b = dyn.samples_a, dyn.samples_b
    ledger.cost["pilot"] = 0
    points: list[PilotPoint] = []
    schedule_for = (lambda k: make_schedule(opts.schedule, k))
    k_shape, k_pilot = jax.random.split(key)
    if isinstance(opts.schedule, str) and opts.schedule == "adaptive":
        profile_lams, profile = _schedule_pilot(path, dyn, k_shape, ledger.cost,
                                                plan.pilot_scales or (opts.step_scale or 0.4,),
                                                plan.pilot_trajectories or 64, on_spent=ledger.spend)
        schedule_for = (lambda k: schedule_from_profile(profile_lams, profile, k))
    if plan.pilot_scales:
        points.extend(step_scale_pilot(path, dyn, k_pilot, schedule_for(PILOT_STEPS), plan.pilot_scales, ledger.cost,
                                       plan.pilot_trajectories, on_spent=ledger.spend))
    remaining = (budget - ledger.spent) if budget is not None else 10**15
    available = min(len(samples_a.samples), len(samples_b.samples))
    per_point = dyn.per_point(path)
    protocol = plan_protocol(points, remaining=remaining, per_point=per_point, available=available,
                             steps=opts.switching_steps, trajectories=opts.trajectories, scale=opts.step_scale,
                             batch=SWITCH_BATCH)
    if points and all(p.diverged for p in points):
        ledger.warnings.append("every pilot switching run had diverging trajectories, even at 1/16 of the sampler's "
                               "step; the energy may be too steep for Langevin switching.")
    lams = schedule_for(protocol.steps) if not isinstance(opts.schedule, np.ndarray) else np.asarray(opts.schedule)
    step_sizes = dyn.step_sizes(lams, protocol.scale)
    ledger.timings["pilot"] = time.perf_counter() - t0
    return protocol, lams, step_sizes, points


def _prepare_control(opts, key, path, samples_a, samples_b, lams, step_sizes, precision_a, precision_b, remaining,
                     probe):
    """Train, decide on or reuse a control; returns (drift, lams, step_sizes, report, outcome)."""
    from ..control import ControlOutcome, LoadedControl, load_control, prepare_control

    settings = dict(opts.control_settings or {})
    if getattr(path, "nonbonded", None) is not None and "network" not in settings and "warm_start" not in settings:
        # particle systems with a nonbonded model: the permutation- and rotation-equivariant pair-force control
        settings["network"] = {"kind": "pair_force"}
        # insertion (B→A) works carry rare overlap outliers of 1e3–1e30 kT: score both directions
        # with the robust spread (1.4826·MAD), or the checks and the keep/drop decision follow noise
        settings.setdefault("validate", "both")
        settings.setdefault("spread_measure", "robust")
    reuse = opts.control
    if isinstance(reuse, str) and reuse not in CONTROL_MODES:
        reuse = load_control(reuse, expected_fingerprint=path.fingerprint_probe(np.asarray(probe)), path=path)
    if isinstance(reuse, (ControlOutcome, LoadedControl)):
        settings.setdefault("warm_start", reuse)
        mode = "reuse"
    else:
        mode = opts.control
    outcome = prepare_control(key, path, jnp.asarray(samples_a.samples), jnp.asarray(samples_b.samples),
                              jnp.asarray(lams), jnp.asarray(step_sizes), precision_a, precision_b, mode=mode,
                              budget=int(remaining), progress=progress_enabled(opts.progress), **settings)
    report = outcome.to_dict()
    return outcome.drift, np.asarray(outcome.lams), np.asarray(outcome.step_sizes), report, outcome


def _control_stage(key, path, sampled, precision, opts: Options, lams, step_sizes, budget, plan: SwitchingBudget,
                   kT: float, x_a, ledger: Ledger, dyn=None):
    """Train or reuse a control within what the budget leaves after a minimal production run.

    Returns ``(drift, lams, step_sizes, report)``; ``drift`` is ``None`` without a control.
    """
    ledger.cost["training"] = 0
    if opts.control == "none":
        return None, lams, step_sizes, None
    pair_system = getattr(path, "nonbonded", None) is not None and not opts.control_settings
    if opts.control == "auto" and pair_system:
        # measured (benchmarks/bench_pair_control_lj.py): on LJ decoupling the pair-force control cuts the
        # insertion work spread at equal steps but never repaid its training at equal budget
        return None, lams, step_sizes, {"decision": PAIR_AUTO_NOTE, "training_evaluations": 0, "kept": False}
    if isinstance(dyn, KineticSwitching):
        return None, lams, step_sizes, {"decision": KINETIC_AUTO_NOTE, "training_evaluations": 0, "kept": False}
    t0 = time.perf_counter()
    remaining = (budget - ledger.spent) if budget is not None else 10**12
    # training may use at most half of what it is given: keep a minimal production run out of its reach
    spendable = max(0, remaining - plan.minimum_switching) if budget is not None else remaining
    drift, lams, step_sizes, report, trained = _prepare_control(
        opts, key, path, sampled["a"], sampled["b"], lams, step_sizes, *precision, int(spendable), x_a)
    ledger.cost["training"] = int(report["training_evaluations"])
    ledger.spend(ledger.cost["training"])
    if report["training_evaluations"] == 0 and not report.get("decision", "").startswith("No control"):
        report["decision"] = ("No control trained: " + report.get("decision", "")).strip()
    if opts.save_control and trained is not None:
        from ..control import save_control
        save_control(opts.save_control, trained, fingerprint=path.fingerprint_probe(np.asarray(x_a)),
                     settings={"switching_steps": len(lams) - 1, "kT": kT})
    ledger.warnings.extend(report.get("warnings", []))
    ledger.timings["training"] = time.perf_counter() - t0
    return drift, lams, step_sizes, report


def _production_size(protocol_trajectories: int, opts: Options, budget, steps: int, per_point: int,
                     available: int, ledger: Ledger) -> int:
    """Trajectories per direction that the budget still pays for (batch padding included)."""
    if opts.trajectories is not None:
        return int(min(opts.trajectories, available))
    if budget is None:
        return int(min(protocol_trajectories, available))
    count = affordable_trajectories(budget - ledger.spent, steps, per_point, SWITCH_BATCH, available)
    return int(min(count, available))


def _switch_stage(keys, path, dyn, drift, lams, step_sizes, trajectories: int, ledger: Ledger):
    t0 = time.perf_counter()
    steps = len(lams) - 1
    forward, inc_forward = dyn.run(path, drift, keys[0], dyn.samples_a.samples[:trajectories], lams, step_sizes,
                                   "forward", SWITCH_BATCH, ledger.spend)
    reverse, _ = dyn.run(path, drift, keys[1], dyn.samples_b.samples[:trajectories], lams, step_sizes,
                         "reverse", SWITCH_BATCH, ledger.spend)
    ledger.cost["switching"] = 2 * dyn.cost(path, trajectories, steps, SWITCH_BATCH)
    ledger.timings["switching"] = time.perf_counter() - t0
    return forward, reverse, inc_forward


def _estimate_stage(work_forward, work_reverse, sampled, seed: int, ledger: Ledger):
    """Estimators, headline choice and every diagnostic; returns ``(estimates, headline, reason, overlap, info)``."""
    t0 = time.perf_counter()
    msgs, serious = diag.check_divergence(work_forward, work_reverse)
    ledger.warnings.extend(msgs)
    ledger.flagged |= serious
    ledger.warnings.extend(diag.describe_large_works(work_forward, work_reverse))
    estimates, overlap = run_estimators(work_forward, work_reverse, seed)
    if estimates["bar"].is_finite:
        # trajectories i start from sample i, drawn from healthy chain i mod (healthy chains)
        keep_f, keep_r = ~mark_diverged(work_forward), ~mark_diverged(work_reverse)
        estimates["bar"] = with_grouped_error(
            estimates["bar"], solve_bar, work_forward, work_reverse,
            sampled["a"].chains - sampled["a"].stuck_chains, sampled["b"].chains - sampled["b"].stuck_chains,
            keep_forward=keep_f, keep_reverse=keep_r)
    headline, reason = choose_headline(estimates, overlap, work_forward, work_reverse)
    if headline == "bar":
        ledger.warnings.extend(diag.check_chain_correlation(estimates["bar"]))
    msgs, weight_info = diag.check_weights(work_forward, work_reverse)
    ledger.warnings.extend(msgs)
    for check in (diag.check_overlap(overlap), diag.check_headline(estimates[headline], headline),
                  diag.check_agreement(estimates, headline)):
        ledger.warnings.extend(check[0])
        ledger.flagged |= check[1]
    ledger.timings["estimators"] = time.perf_counter() - t0
    return estimates, headline, reason, overlap, weight_info


def _work_per_step(inc_forward, steps: int) -> tuple[np.ndarray, list[float]]:
    """Mean forward work of each switching step (kT) over the trajectories with every step's work
    finite, and the standard error of that mean (sample standard deviation / √n; NaN below 2
    trajectories) as a list of floats for the result's extras."""
    inc_forward = np.asarray(inc_forward)
    healthy = inc_forward[np.isfinite(inc_forward).all(axis=1)]
    if healthy.shape[0] == 0:
        return np.full(steps, np.nan), [math.nan] * steps
    mean = healthy.mean(axis=0)
    if healthy.shape[0] < 2:
        return mean, [math.nan] * steps
    stderr = healthy.std(axis=0, ddof=1) / math.sqrt(healthy.shape[0])
    return mean, [float(v) for v in stderr]


def _report(path, opts: Options, kT, seed, budget, plan: SwitchingBudget, sampled, protocol, points, lams,
            step_sizes, works, inc_forward, control_report, estimates, headline, reason, overlap, weight_info,
            ledger: Ledger) -> Result:
    work_forward, work_reverse = works
    steps = len(lams) - 1
    work_per_step, work_per_step_stderr = _work_per_step(inc_forward, steps)
    samples_a, samples_b = sampled["a"], sampled["b"]
    settings = {
        "switching_steps": steps, "trajectories": int(work_forward.size),
        "schedule": opts.schedule if isinstance(opts.schedule, str) else "explicit",
        "budget": budget, "chains": plan.chains, "step_scale": protocol.scale,
        "control": opts.control if isinstance(opts.control, str) else type(opts.control).__name__, "seed": seed,
        "path": path.description(),
        "precondition": bool(samples_a.preconditioner.std() > 0 or samples_b.preconditioner.std() > 0),
    }
    diagnostics = {
        "sampling_a": samples_a.diagnostics(), "sampling_b": samples_b.diagnostics(),
        "overlap": overlap, "pilot": [dataclasses.asdict(p) for p in points], "plan": dataclasses.asdict(protocol),
        "budget_plan": dataclasses.asdict(plan),
        "diverged_forward": int(mark_diverged(work_forward).sum()),
        "diverged_reverse": int(mark_diverged(work_reverse).sum()),
        "switching_step_size_a": float(step_sizes[0]), "switching_step_size_b": float(step_sizes[-1]),
        **weight_info, **ledger.notes,
    }
    head = estimates[headline]
    extras = {"lambdas": lams, "work_per_step_forward": work_per_step,
              "work_per_step_forward_stderr": work_per_step_stderr}
    if control_report:
        extras.update(control=control_report, control_decision=control_report.get("decision", ""))
    return Result(
        delta_f=head.delta_f * kT, stderr=head.stderr * kT, estimator=headline, choice_reason=reason,
        estimates={k: v.scaled(kT) for k, v in estimates.items()},
        work_forward=work_forward, work_reverse=work_reverse,
        energy_evaluations=ledger.spent, cost=dict(ledger.cost), kT=kT, units=opts.units,
        diagnostics=diagnostics, warnings=ledger.warnings, flagged=bool(ledger.flagged), settings=settings,
        timings=ledger.timings, reference=opts.reference, extras=extras)


def plan_switching(path, opts: Options) -> tuple[int | None, SwitchingBudget]:
    """The budget (``None``: a fixed protocol without limit) and its split into stages."""
    fixed = opts.switching_steps is not None and opts.trajectories is not None
    budget = opts.budget if opts.budget is not None else (None if fixed else DEFAULT_BUDGET)
    plan = plan_switching_budget(budget, per_point=path.evaluations_per_point(1),
                                 end_evaluations=path.end_evaluations(), chains=opts.chains,
                                 switching_steps=opts.switching_steps, trajectories=opts.trajectories,
                                 step_scale=opts.step_scale,
                                 adaptive_schedule=isinstance(opts.schedule, str) and opts.schedule == "adaptive")
    return budget, plan


def run_switching(path, x_a, x_b, kT: float, seed: int, starts, opts: Options, budget: int | None,
                     plan: SwitchingBudget, t_start: float) -> Result:
    samples_wanted = opts.trajectories or int(np.clip((budget or DEFAULT_BUDGET) // 400, 64, 2048))
    k_sample_a, k_sample_b, k_pilot, k_forward, k_reverse, k_control = jax.random.split(jax.random.key(seed), 6)
    ledger = Ledger()
    meter = EvaluationMeter(budget, "ΔF by switching", enabled=opts.progress)
    ledger.meter = meter
    meter.stage("sampling the end states")
    if budget is not None and _zero_step_allowed(path, opts):
        # insertion needs burn-in most (a fluid from its start file); if it does not suffice, the pilot and
        # switching still get what the other stages leave (the budget plan's minimum is kept)
        plan = dataclasses.replace(plan, sampling_cap=max(plan.sampling_cap, int(
            min(insertion.SAMPLING_SHARE * budget, (budget - plan.pilot_cap - plan.minimum_switching) / 2))))
    sampled = _sample_ends((k_sample_a, k_sample_b), path, x_a, x_b, starts, opts, plan, samples_wanted, ledger)
    precision = (jnp.asarray(1.0 / sampled["a"].preconditioner), jnp.asarray(1.0 / sampled["b"].preconditioner))
    if _zero_step_allowed(path, opts):
        meter.stage("insertion at the decoupled end")
        zero = _zero_step_stage(jax.random.fold_in(k_pilot, 1), path, sampled, opts, budget, seed, ledger)
        if zero is not None:
            meter.close()
            ledger.timings["total"] = time.perf_counter() - t_start
            return _zero_step_report(path, opts, kT, seed, budget, plan, zero, ledger)
    meter.stage("pilot switching")
    dyn = choose_dynamics(path, sampled, precision, opts)
    ledger.notes["switching_dynamics"] = dyn.name
    protocol, lams, step_sizes, points = _pilot_and_plan(k_pilot, path, dyn, opts, budget, plan, ledger)
    meter.stage("control")
    drift, lams, step_sizes, control_report = _control_stage(k_control, path, sampled, precision, opts, lams,
                                                             step_sizes, budget, plan, kT, x_a, ledger, dyn)
    available = min(len(sampled["a"].samples), len(sampled["b"].samples))
    trajectories = _production_size(protocol.trajectories, opts, budget, len(lams) - 1, dyn.per_point(path),
                                    available, ledger)
    _check_enough(trajectories, opts, ledger)
    meter.stage(f"switching {trajectories} trajectories × {len(lams) - 1} steps, both ways")
    forward, reverse, inc_forward = _switch_stage((k_forward, k_reverse), path, dyn, drift, lams, step_sizes,
                                                  trajectories, ledger)
    if getattr(dyn, "extra_evaluations", 0):
        ledger.cost["list_regrowth"] = int(dyn.extra_evaluations)
    meter.stage("estimators")
    found = _estimate_stage(forward, reverse, sampled, seed, ledger)
    meter.close()
    ledger.timings["total"] = time.perf_counter() - t_start
    return _report(path, opts, kT, seed, budget, plan, sampled, protocol, points, lams, step_sizes,
                   (forward, reverse), inc_forward, control_report, *found, ledger)


def _check_enough(trajectories: int, opts: Options, ledger: Ledger) -> None:
    """Fewer production trajectories than asked for or than :data:`MIN_TRAJECTORIES`: say so and flag."""
    if opts.trajectories is not None:
        if trajectories < opts.trajectories:
            ledger.warnings.append(f"only {trajectories} equilibrium samples were available as starts, fewer than the "
                                   f"{opts.trajectories} trajectories asked for; raise the budget or the chains.")
        return
    if trajectories < MIN_TRAJECTORIES:
        ledger.flagged = True
        ledger.warnings.append(f"the budget left only {trajectories} trajectories per direction (fewer than "
                               f"{MIN_TRAJECTORIES}): the error bar is unreliable. Raise the budget.")




# ------------------------------------------------------------------ zero switching steps (insertion)

def _zero_step_allowed(path, opts: Options) -> bool:
    """K = 0 is tried when asked for (``switching_steps=0``) or, with the protocol left to the tool,
    when the decoupled end lets the group be placed anew (:func:`insertion.can_redraw`)."""
    if opts.switching_steps == 0:
        return True
    free = (opts.switching_steps is None and opts.trajectories is None and opts.step_scale is None
            and opts.control in ("auto", "none") and isinstance(opts.schedule, str))
    return free and insertion.can_redraw(path)


def _zero_step_stage(key, path, sampled, opts: Options, budget, seed: int, ledger: Ledger):
    """Check insertion on the first samples; when it suffices, spend the rest on more samples and
    placements. Returns ``(samples, w_F, w_R, placements per B sample, reason, check)`` or ``None``
    (switching then takes over; the check's cost stays booked)."""
    t0 = time.perf_counter()
    k_check, k_more_a, k_more_b, k_final = jax.random.split(key, 4)
    forced = opts.switching_steps == 0
    first = {end: dataclasses.replace(s, samples=insertion.whole_chains(s.samples, s.chains - s.stuck_chains))
             for end, s in sampled.items()}
    ledger.cost["insertion"] = 0
    if not forced:
        wf, wr, spent = insertion.zero_step_works(path, k_check, first["a"].samples, first["b"].samples,
                                                  insertion.REDRAWS[0])
        ledger.cost["insertion"] += spent
        ledger.spend(spent)
        estimates, overlap = run_estimators(wf, wr, seed)
        ok, why = insertion.zero_step_suffices(estimates, overlap)
        check = {"redraws": insertion.REDRAWS[0], "overlap": overlap, "used": ok, "reason": why,
                 "evaluations": spent}
        if not ok:
            ledger.timings["insertion_check"] = time.perf_counter() - t0
            ledger.notes["insertion"] = check
            return None
    else:
        check = {"used": True, "reason": "switching_steps=0 was asked for"}
    extend = _sampling_extension(budget, ledger)
    if extend > 0:
        first = insertion.extend_ends((k_more_a, k_more_b), path, first, extend, ledger)
    first, redraws = _final_placements(path, first, budget, ledger)
    wf, wr, spent = insertion.zero_step_works(path, k_final, first["a"].samples, first["b"].samples, redraws)
    ledger.cost["insertion"] += spent
    ledger.spend(spent)
    ledger.timings["insertion"] = time.perf_counter() - t0
    return first, wf, wr, redraws, check


def _sampling_extension(budget, ledger: Ledger) -> int:
    """How much of what is left goes to more sampling (the rest pays for the placements)."""
    if budget is None:
        return 0
    return int(max(0, budget - ledger.spent) / (1.0 + insertion.REDRAW_SHARE))


def _final_placements(path, sampled, budget, ledger: Ledger) -> tuple[dict, int]:
    """The samples the budget pays placements for (whole chains) and the placements per B sample."""
    s_a, s_b = sampled["a"], sampled["b"]
    per_sample = insertion.per_sample_cost(s_b) * path.end_evaluations()
    if budget is None:
        return sampled, insertion.redraw_count(path, per_sample)
    cost = float(path.energy_change_cost())
    left = budget - ledger.spent - 1
    n_a = insertion.affordable_samples(path, 0.5 * left, len(s_a.samples), s_a.chains - s_a.stuck_chains)
    left -= math.ceil(cost * n_a)
    redraws = insertion.redraw_count(path, per_sample, available=left, samples=len(s_b.samples))
    n_b = len(s_b.samples)
    if redraws < 1:
        redraws, n_b = 1, insertion.affordable_samples(path, left, n_b, s_b.chains - s_b.stuck_chains)
    if n_a < 1 or n_b < 1:
        # nothing left to pay placements with (sampling overran its share, e.g. neighbour lists regrown):
        # one deletion and one placement per chain still give an estimate, at a cost below a few evaluations
        n_a, n_b, redraws = max(n_a, min(len(s_a.samples), s_a.chains)), max(n_b, min(len(s_b.samples), s_b.chains)), 1
        ledger.warnings.append("the budget was spent before the placements: only one deletion and one placement "
                               "per sampling chain were scored. Raise the budget.")
    trimmed = {"a": dataclasses.replace(s_a, samples=s_a.samples[:n_a]),
               "b": dataclasses.replace(s_b, samples=s_b.samples[:n_b])}
    return trimmed, redraws


def _zero_step_report(path, opts: Options, kT, seed, budget, plan: SwitchingBudget, zero, ledger: Ledger) -> Result:
    sampled, wf, wr, redraws, check = zero
    found = _estimate_stage(wf, wr, sampled, seed, ledger)
    what = ("test-particle insertion" if insertion.can_redraw(path) else "zero-step exchange between the end states")
    protocol = Plan(0, 0.0, int(wf.size), math.nan, math.nan,
                    f"zero switching steps ({what}, {redraws} placements per B sample): {check['reason']}")
    result = _report(path, opts, kT, seed, budget, plan, sampled, protocol, [], np.array([0.0, 1.0]),
                     np.array([0.0]), (wf, wr), wf[:, None], None, *found, ledger)
    result.settings.update(switching_steps=0, placements_per_sample=int(redraws), trajectories=int(wf.size),
                           reverse_works=int(wr.size))
    result.diagnostics["insertion"] = {**check, "placements_per_sample": int(redraws)}
    return result
