"""Pair-force control vs. no control on the Lennard-Jones decoupling system, at equal switching steps.

System: ``systems/lj_fluid_decoupling.toml`` (108 LJ particles, T* = 2, ρ* = 0.3, r_c = 2.5σ,
particle 0 decoupled along the Beutler et al. 1994 soft-core path; neighbour-list energies).

For each seed, mirroring what ``fe_tool.estimate(..., control="learned")`` does on this file:

1. equilibrium samples of both ends with ``fe_tool.sampling.sample_state`` (16 chains, the
   workflow's sampling share of the file's budget; a cache in ``--cache`` avoids redrawing);
   the last ``--valid`` samples of each end are held out as *fresh validation starts*;
2. the workflow's pilot (adaptive λ schedule from 64 linear-schedule trajectories, then the
   dissipation model fitted at the four pilot step scales) and its plan for the fixed K,
   giving the λ schedule and the step sizes the workflow would switch with;
3. ``PairForceControl`` trained with ``prepare_control(mode="learned", network pair force,
   training_steps=K, budget=...)`` on the non-held-out samples only (objective, learning rate
   etc. as given on the command line; the defaults are the workflow's);
4. on the held-out starts, with the same Langevin noise (paired), forward (A→B, decoupling)
   and reverse (B→A, insertion) switching without and with the control, at the same K and
   on the same (λ, ε) protocol (``--protocol workflow``; with ``--protocol learned`` the
   controlled arm uses the protocol learned with the control, as the workflow does).

Printed per seed and K: mean and spread (std; for the reverse works, whose insertion tail has
overlaps of 10³–10⁹ kT, also the robust spread 1.4826·MAD) of the works each direction, the
controlled/uncontrolled spread ratio with a paired bootstrap 68% interval, BAR ΔF ± stderr
from the same T trajectories each way (equal steps), and the costs: training evaluations, and
the BAR stderr the uncontrolled arm is predicted to reach had it spent the training
evaluations on more trajectories (stderr ∝ 1/√T): equal total budget.

Usage::

    python benchmarks/bench_pair_control_lj.py [--seeds 0 1 2] [--steps 8 32] [--budget B]
        [--objective kl|jeffreys|logvar] [--learn-schedule 0|1] [--learn-steps none|global]
        [--validate forward|both] [--spread-measure std|robust] [--step-scale s] [--valid 256]
        [--history] [--json out.json]

Measured (2 Dec 2026, seeds 0 1 2, 8 minutes on two shared cores after sampling) with
``--learn-schedule 0 --learn-steps none --validate both --spread-measure robust`` (the control
alone on the workflow's protocol, path-KL objective, training checks scoring both directions):
the reverse (insertion) robust work spread fell to 0.59–0.63 of uncontrolled at K = 8 and
0.31–0.42 at K = 32 on every seed (median reverse work 8.6–11 → 2.0–3.5 kT at K = 32); the
forward (decoupling) spread did not move (ratio 0.95–1.05); BAR stderr at equal steps fell
7–22%. With the default forward-only checks, the same training kept a zero control on two
of three seeds at K = 32 (the forward spread never improved, so no check beat the start).

Cost: about 3–4 minutes of sampling per seed (cached in ``--cache``), 1–2 minutes of training
per K and seed on two shared CPU cores. Asserts nothing.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import pathlib
import time

os.environ.setdefault("FE_TOOL_PROGRESS", "0")

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402

from fe_tool.control import PairForceControl, bind_control, prepare_control  # noqa: E402
from fe_tool.estimators import bar  # noqa: E402
from fe_tool.routes.planning import PILOT_SCALES, plan_protocol, schedule_from_profile  # noqa: E402
from fe_tool.sampling import end_target, sample_state  # noqa: E402
from fe_tool.switching import run_in_batches, switching_evaluations  # noqa: E402
from fe_tool.systemfile import load_system  # noqa: E402
from fe_tool.estimators.spread import robust_spread  # noqa: E402
from fe_tool.routes.switching import (PILOT_STEPS, _schedule_pilot, _switching_step_sizes,  # noqa: E402
                                     step_scale_pilot)
from fe_tool.routes.budget import SAMPLING_SHARE  # noqa: E402

ROOT = pathlib.Path(__file__).resolve().parent.parent


class _Samples:
    """The fields of StateSamples the workflow's protocol helpers read."""

    def __init__(self, samples, step_size, preconditioner):
        self.samples, self.step_size, self.preconditioner = samples, float(step_size), preconditioner


def end_samples(system, seed, file_budget, chains, cache):
    """Both end states' samples (cached per seed) and the sampling cost."""
    file = None if cache is None else pathlib.Path(cache) / f"lj108_seed{seed}_b{file_budget}_c{chains}.npz"
    if file is not None and file.exists():
        d = np.load(file)
        return (_Samples(d["a"], d["ea"], d["pa"]), _Samples(d["b"], d["eb"], d["pb"]), int(d["evaluations"]), True)
    ka, kb = jax.random.split(jax.random.key(10_000 + seed))
    share = int(SAMPLING_SHARE * file_budget)
    samples_wanted = int(np.clip(file_budget // 400, 64, 2048))
    out = [sample_state(k, end_target(system.path, end), x0, samples=samples_wanted, chains=chains,
                        evaluation_budget=share, name=f"end state {end.upper()}")
           for k, end, x0 in ((ka, "a", system.start_a), (kb, "b", system.start_b))]
    evaluations = out[0].evaluations + out[1].evaluations
    if file is not None:
        file.parent.mkdir(parents=True, exist_ok=True)
        np.savez(file, a=out[0].samples, b=out[1].samples, ea=out[0].step_size, eb=out[1].step_size,
                 pa=out[0].preconditioner, pb=out[1].preconditioner, evaluations=evaluations)
    return (_Samples(out[0].samples, out[0].step_size, out[0].preconditioner),
            _Samples(out[1].samples, out[1].step_size, out[1].preconditioner), evaluations, False)


def workflow_pilot(path, key, sa, sb, precision_a, precision_b):
    """The workflow's adaptive-schedule pilot and step-scale pilot points (uncontrolled)."""
    cost = {"pilot": 0}
    k_shape, k_pilot = jax.random.split(key)
    profile_lams, profile = _schedule_pilot(path, k_shape, sa, sb, precision_a, precision_b, cost, PILOT_SCALES)
    schedule_for = lambda k: schedule_from_profile(profile_lams, profile, k)  # noqa: E731
    points = step_scale_pilot(path, k_pilot, sa, sb, precision_a, precision_b, schedule_for(PILOT_STEPS),
                              PILOT_SCALES, cost)
    return schedule_for, points, cost["pilot"]


def summary(w):
    w = np.asarray(w, dtype=np.float64)
    f = w[np.isfinite(w)]
    return {"mean": float(np.mean(f)), "spread": float(np.std(f, ddof=1)), "robust_spread": robust_spread(f),
            "median": float(np.median(f)), "nonfinite": int(w.size - f.size)}


def paired_ratio_interval(w0, w1, fn, rng, n=1000):
    """Bootstrap (16%, 84%) of fn(w1)/fn(w0) resampling trajectories jointly (paired starts and noise)."""
    w0, w1 = np.asarray(w0), np.asarray(w1)
    ok = np.isfinite(w0) & np.isfinite(w1)
    w0, w1 = w0[ok], w1[ok]
    idx = rng.integers(0, w0.size, size=(n, w0.size))
    r = np.array([fn(w1[i]) / fn(w0[i]) for i in idx])
    return float(np.percentile(r, 16)), float(np.percentile(r, 84))


def std(w):
    return float(np.std(w, ddof=1))


def run_seed(system, seed, steps_list, args):
    path = system.path
    per_point = path.evaluations_per_point(1)
    t_seed = time.perf_counter()
    sa, sb, sampling_evals, cached = end_samples(system, seed, args.file_budget, args.chains, args.cache)
    precision_a = jnp.asarray(1.0 / sa.preconditioner)
    precision_b = jnp.asarray(1.0 / sb.preconditioner)
    n_valid = int(min(args.valid, len(sa.samples) // 2, len(sb.samples) // 2))
    train_a, valid_a = sa.samples[:-n_valid], sa.samples[-n_valid:]
    train_b, valid_b = sb.samples[:-n_valid], sb.samples[-n_valid:]
    sa_t, sb_t = _Samples(train_a, sa.step_size, sa.preconditioner), _Samples(train_b, sb.step_size, sb.preconditioner)
    key = jax.random.key(seed)
    k_pilot, k_control, k_valid = jax.random.split(key, 3)
    t0 = time.perf_counter()
    schedule_for, points, pilot_evals = workflow_pilot(path, k_pilot, sa_t, sb_t, precision_a, precision_b)
    print(f"seed {seed}: samples A {len(sa.samples)}, B {len(sb.samples)} ({sampling_evals:,} evaluations"
          f"{', cached' if cached else ''}); held out {n_valid} each; pilot {pilot_evals:,} evaluations, "
          f"{time.perf_counter() - t0:.0f} s; pilot (s, hysteresis, spread, diverged): "
          + ", ".join(f"({p.scale:g}, {p.hysteresis:.2f}, {p.spread:.2f}, {p.diverged})" for p in points), flush=True)
    remaining = args.file_budget - sampling_evals - pilot_evals
    budget = int(args.budget if args.budget is not None else max(remaining, 0))
    rows = []
    for k, k_key in zip(steps_list, jax.random.split(k_valid, len(steps_list))):
        plan = plan_protocol(points, remaining=max(remaining, 10**6), per_point=per_point,
                             available=len(train_a), steps=k)
        lams = schedule_for(k)
        scale = plan.scale if args.step_scale is None else args.step_scale
        eps = _switching_step_sizes(lams, sa, sb, scale)
        settings = dict(objective=args.objective, training_steps=k, learning_rate=args.learning_rate,
                        learn_schedule=args.learn_schedule, learn_steps=args.learn_steps,
                        network={"kind": "pair_force", **args.network},
                        max_training_fraction=args.max_training_fraction, drift_bound_factor=args.drift_bound_factor,
                        validate=args.validate, spread_measure=args.spread_measure)
        if args.max_optimiser_steps is not None:
            settings["max_optimiser_steps"] = args.max_optimiser_steps
        if args.patience is not None:
            settings["patience"] = args.patience
        t0 = time.perf_counter()
        out = prepare_control(jax.random.fold_in(k_control, k), path, jnp.asarray(train_a), jnp.asarray(train_b),
                              jnp.asarray(lams), jnp.asarray(eps), precision_a, precision_b, mode="learned",
                              budget=budget, progress=False, **{s: v for s, v in settings.items() if v is not None})
        t_train = time.perf_counter() - t0
        assert isinstance(out.control, PairForceControl), type(out.control)
        if args.protocol == "learned":
            lams_c, eps_c = np.asarray(out.lams), np.asarray(out.step_sizes)
        else:
            lams_c, eps_c = lams, eps
        drift = bind_control(out.control, jnp.asarray(lams_c), jnp.asarray(eps_c))
        kf, kr = jax.random.split(k_key)
        t0 = time.perf_counter()
        works = {}
        for arm, d, ll, ee in (("none", None, lams, eps), ("control", drift, lams_c, eps_c)):
            wf, _, _ = run_in_batches(path, d, kf, valid_a, ll, ee, precision_a, precision_b, "forward", 128)
            wr, _, _ = run_in_batches(path, d, kr, valid_b, ll, ee, precision_a, precision_b, "reverse", 128)
            works[arm] = (wf, wr)
        t_eval = time.perf_counter() - t0
        rng = np.random.default_rng(seed)
        row = {"seed": seed, "K": k, "step_scale": scale, "trajectories": n_valid,
               "training_evaluations": int(out.evaluations), "optimiser_steps": int(out.optimiser_steps),
               "stop_reason": out.stop_reason, "training_seconds": t_train, "validation_seconds": t_eval,
               "validation_evaluations_per_arm": 2 * switching_evaluations(path, n_valid, k),
               "prepare_control_validation": {"before": out.work_before, "after": out.work_after},
               "sampling_evaluations": sampling_evals, "pilot_evaluations": pilot_evals, "training_budget": budget}
        for i, direction in enumerate(("forward", "reverse")):
            w0, w1 = works["none"][i], works["control"][i]
            s0, s1 = summary(w0), summary(w1)
            lo, hi = paired_ratio_interval(w0, w1, std, rng)
            rlo, rhi = paired_ratio_interval(w0, w1, robust_spread, rng)
            row[direction] = {"none": s0, "control": s1, "spread_ratio": s1["spread"] / s0["spread"],
                              "spread_ratio_68": [lo, hi],
                              "robust_spread_ratio": s1["robust_spread"] / s0["robust_spread"],
                              "robust_spread_ratio_68": [rlo, rhi]}
        for arm in ("none", "control"):
            est = bar(works[arm][0], works[arm][1])
            row[f"bar_{arm}"] = {"delta_f": float(est.delta_f), "stderr": float(est.stderr)}
        # equal total budget: the uncontrolled arm spends the training evaluations on more trajectories
        extra = out.evaluations / (2 * per_point * (k + 1))
        row["bar_none_equal_budget_stderr"] = row["bar_none"]["stderr"] * math.sqrt(n_valid / (n_valid + extra))
        rows.append(row)
        f, r = row["forward"], row["reverse"]
        print(f"  K={k:3d} s={scale:.3g}: train {out.evaluations:,} evals, {out.optimiser_steps} steps "
              f"({out.stop_reason}), {t_train:.0f} s; validation {t_eval:.0f} s\n"
              f"    forward  mean {f['none']['mean']:.3f} -> {f['control']['mean']:.3f}  spread {f['none']['spread']:.3f} -> "
              f"{f['control']['spread']:.3f}  ratio {f['spread_ratio']:.3f} [{f['spread_ratio_68'][0]:.3f}, "
              f"{f['spread_ratio_68'][1]:.3f}]\n"
              f"    reverse  median {r['none']['median']:.3f} -> {r['control']['median']:.3f}  spread {r['none']['spread']:.3g} -> "
              f"{r['control']['spread']:.3g}  robust {r['none']['robust_spread']:.3f} -> {r['control']['robust_spread']:.3f} "
              f"ratio {r['robust_spread_ratio']:.3f} [{r['robust_spread_ratio_68'][0]:.3f}, {r['robust_spread_ratio_68'][1]:.3f}]\n"
              f"    BAR none {row['bar_none']['delta_f']:.3f} ± {row['bar_none']['stderr']:.3f} (equal budget ± "
              f"{row['bar_none_equal_budget_stderr']:.3f}); control {row['bar_control']['delta_f']:.3f} ± "
              f"{row['bar_control']['stderr']:.3f}  [reference {system.reference['delta_f'] / system.kT:.3f} kT]",
              flush=True)
        if args.history:
            print("    checks (step: validation spread): " + ", ".join(
                f"{h['optimiser_step']}: {h['validation_work_spread']:.3f}" for h in out.history)
                + f"; skipped {out.skipped_steps}", flush=True)
    print(f"seed {seed}: {time.perf_counter() - t_seed:.0f} s", flush=True)
    return rows


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--system", default=str(ROOT / "systems" / "lj_fluid_decoupling.toml"))
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2], help="seed values (default 0 1 2)")
    parser.add_argument("--steps", type=int, nargs="+", default=[8, 32], help="switching steps K")
    parser.add_argument("--budget", type=int, default=None,
                        help="budget passed to prepare_control (default: the file's budget minus sampling and pilot, "
                             "as in the workflow); training uses at most --max-training-fraction of it")
    parser.add_argument("--file-budget", type=int, default=None, help="total budget (default: the file's)")
    parser.add_argument("--chains", type=int, default=None)
    parser.add_argument("--valid", type=int, default=256, help="held-out validation starts per direction (at most)")
    parser.add_argument("--objective", default="kl", choices=["kl", "jeffreys", "logvar"])
    parser.add_argument("--learning-rate", type=float, default=None)
    parser.add_argument("--learn-schedule", type=int, default=1)
    parser.add_argument("--learn-steps", default="global")
    parser.add_argument("--max-training-fraction", type=float, default=0.5)
    parser.add_argument("--max-optimiser-steps", type=int, default=None)
    parser.add_argument("--patience", type=int, default=None)
    parser.add_argument("--network", default="{}", help="JSON of PairForceControl hyperparameters")
    parser.add_argument("--protocol", default="workflow", choices=["workflow", "learned"])
    parser.add_argument("--cache", default="/tmp/fe_tool_bench_cache")
    parser.add_argument("--drift-bound-factor", type=float, default=None,
                        help="prepare_control's drift bound, in RMS forces along uncontrolled paths (default: its own)")
    parser.add_argument("--validate", default="forward", choices=["forward", "both"],
                        help="prepare_control's training checks score the forward spread (its default) or both directions")
    parser.add_argument("--spread-measure", default="std", choices=["std", "robust"],
                        help="prepare_control's spread measure in the checks: std (its default) or 1.4826·MAD")
    parser.add_argument("--step-scale", type=float, default=None,
                        help="fix the step scale s (ε = s × the samplers' interpolated step) instead of the workflow's plan")
    parser.add_argument("--history", action="store_true", help="print the validation spread at every training check")
    parser.add_argument("--json", default=None)
    args = parser.parse_args(argv)
    args.network = json.loads(args.network)
    args.learn_schedule = bool(args.learn_schedule)
    system = load_system(args.system)
    args.file_budget = int(args.file_budget or system.settings.get("budget", 800_000))
    args.chains = int(args.chains or system.settings.get("chains", 16))
    t0 = time.perf_counter()
    rows = []
    for seed in args.seeds:
        rows += run_seed(system, seed, args.steps, args)
    wall = time.perf_counter() - t0
    print(f"\n{system.name}: {len(args.seeds)} seeds, objective {args.objective}, {wall:.0f} s wall. Spread = std of the "
          "works (kT); reverse also robust spread 1.4826·MAD; ratio = control/none on the same held-out starts and noise "
          "(68% paired bootstrap); BAR ± stderr from the same T each way.")
    print(f"{'seed':>4} {'K':>3} {'dir':>4} {'spread none→ctrl':>18} {'ratio [68%]':>22} {'mean none→ctrl':>17} "
          f"{'BAR se none/ctrl (eq. budget)':>30} {'train evals':>11}")
    for row in rows:
        for direction in ("forward", "reverse"):
            d = row[direction]
            key = "spread" if direction == "forward" else "robust_spread"
            ratio = d["spread_ratio"] if direction == "forward" else d["robust_spread_ratio"]
            ci = d["spread_ratio_68"] if direction == "forward" else d["robust_spread_ratio_68"]
            bar_cell = (f"{row['bar_none']['stderr']:.3f}/{row['bar_control']['stderr']:.3f} "
                        f"({row['bar_none_equal_budget_stderr']:.3f})") if direction == "forward" else ""
            print(f"{row['seed']:>4} {row['K']:>3} {direction[:3]:>4} {d['none'][key]:8.3f}→{d['control'][key]:7.3f}"
                  f"{'*' if direction == 'reverse' else ' '} {ratio:6.3f} [{ci[0]:.3f}, {ci[1]:.3f}]   "
                  f"{d['none']['mean']:7.3f}→{d['control']['mean']:7.3f}"
                  if direction == "forward" else
                  f"{row['seed']:>4} {row['K']:>3} {direction[:3]:>4} {d['none'][key]:8.3f}→{d['control'][key]:7.3f}*"
                  f" {ratio:6.3f} [{ci[0]:.3f}, {ci[1]:.3f}]   {d['none']['median']:7.3f}→{d['control']['median']:7.3f}m",
                  end="")
            print(f"  {bar_cell:>30} {row['training_evaluations'] if direction == 'forward' else '':>11}")
    print("* reverse: robust spread and median (m) — the insertion tail has rare overlaps worth 10³–10⁹ kT")
    for k in args.steps:
        sel = [r for r in rows if r["K"] == k]
        for direction in ("forward", "reverse"):
            name = "spread_ratio" if direction == "forward" else "robust_spread_ratio"
            ratios = np.array([r[direction][name] for r in sel])
            print(f"K={k} {direction}: {name} mean {ratios.mean():.3f} over {len(ratios)} seeds "
                  f"(range {ratios.min():.3f}–{ratios.max():.3f})")
    if args.json:
        with open(args.json, "w") as f:
            json.dump({"args": {k: v for k, v in vars(args).items()}, "wall_seconds": wall, "rows": rows}, f, indent=1,
                      default=float)
    return rows


if __name__ == "__main__":
    main()
