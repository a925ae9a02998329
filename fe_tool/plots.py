"""Figures for one result or a batch (matplotlib, Agg backend: no display needed).

Every function takes a :class:`~fe_tool.results.Result` or plain arrays, and either an output
path (a PNG is written and its path returned) or a matplotlib ``Axes`` to draw into (the
``Axes`` is returned).  Figures carry a one-line reminder that simulated free energies
depend on the energy model and sampling and need experimental validation.
"""
from __future__ import annotations

import math
import os
import pathlib
from typing import Any, Iterable, Sequence

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
import numpy as np  # noqa: E402

__all__ = ["plot_batch_summary", "plot_convergence", "plot_dissipation", "plot_overlap_matrix", "plot_result",
           "plot_training", "plot_work_distributions", "FOOTNOTE"]

FOOTNOTE = ("Simulated free energies depend on the energy model and sampling; "
            "validate experimentally before design or safety decisions.")


def _target(target):
    """(figure or None, axes) for a path/None (new figure) or an existing Axes."""
    if target is not None and hasattr(target, "plot") and hasattr(target, "figure"):
        return None, target
    # a bare Figure with its own Agg canvas: no global backend switch, so notebooks keep
    # their inline backend and scripts need no display
    fig = Figure(figsize=(6.4, 4.4))
    FigureCanvasAgg(fig)
    return fig, fig.add_subplot()


def _finish(fig, ax, target):
    if fig is None:
        return ax
    fig.text(0.5, 0.005, FOOTNOTE, ha="center", va="bottom", fontsize=6.5, color="0.35", wrap=True)
    fig.tight_layout(rect=(0, 0.04, 1, 1))
    path = pathlib.Path(target if target is not None else "figure.png")
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    return path


def _works(result_or_forward, work_reverse=None):
    if work_reverse is None:
        r = result_or_forward
        return np.asarray(r.work_forward, float), np.asarray(r.work_reverse, float), r
    return np.asarray(result_or_forward, float), np.asarray(work_reverse, float), None


def plot_work_distributions(result_or_work_forward, target=None, *, work_reverse=None, delta_f: float | None = None,
                            bins: int | None = None):
    """Histograms of forward works w_F and negated reverse works −w_R (kT), with ΔF marked.

    By Crooks' theorem the two densities cross at w = ΔF; the Gaussian crossing of the two
    sets is drawn as a dashed line, the headline ΔF (in kT) as a solid one.

    Args:
        result_or_work_forward: a Result, or forward reduced works (then give ``work_reverse``).
        target: output PNG path, or an Axes.
        delta_f: ΔF in kT to mark (default: the Result's headline, or BAR of the works).
    """
    from .estimators import bar, gaussian_crossing

    wf, wr, result = _works(result_or_work_forward, work_reverse)
    wf, mr = wf[np.isfinite(wf)], -wr[np.isfinite(wr)]
    fig, ax = _target(target)
    both = np.concatenate([wf, mr]) if wf.size + mr.size else np.zeros(1)
    edges = np.histogram_bin_edges(both, bins=bins or int(np.clip(math.sqrt(both.size), 10, 60)))
    ax.hist(wf, bins=edges, density=True, alpha=0.55, color="tab:blue", label=r"forward $w_F$ (A→B)")
    ax.hist(mr, bins=edges, density=True, alpha=0.55, color="tab:orange", label=r"reverse $-w_R$ (B→A)")
    if delta_f is None:
        if result is not None:
            delta_f = result.delta_f / result.kT
        elif wf.size and mr.size:
            delta_f = bar(wf, -mr).delta_f
    if wf.size > 2 and mr.size > 2:
        crossing = float(gaussian_crossing(wf.mean(), wf.std(), -mr.mean(), mr.std()))
        if math.isfinite(crossing):
            ax.axvline(crossing, color="0.3", ls="--", lw=1.2, label=f"Gaussian crossing {crossing:.3f} kT")
    if delta_f is not None and math.isfinite(delta_f):
        ax.axvline(delta_f, color="k", lw=1.6, label=f"ΔF = {delta_f:.3f} kT")
    ax.set_xlabel("work (kT)")
    ax.set_ylabel("probability density")
    ax.set_title("Work distributions")
    ax.legend(fontsize=8)
    return _finish(fig, ax, target)


def plot_convergence(result_or_work_forward, target=None, *, work_reverse=None, points: int = 12,
                     reference: float | None = None):
    """BAR ΔF (kT) on growing prefixes of the trajectories, with a ±1 standard-error band.

    Args:
        points: number of prefix lengths (log-spaced from 4 trajectories to all).
        reference: known ΔF in kT to draw (default: the Result's reference, if any).
    """
    from .estimators import bar

    wf, wr, result = _works(result_or_work_forward, work_reverse)
    n = min(wf.size, wr.size)
    sizes = np.unique(np.geomspace(min(4, n), n, points).astype(int)) if n >= 2 else np.array([], int)
    values, errors = [], []
    for m in sizes:
        try:
            est = bar(wf[:m], wr[:m])
            values.append(est.delta_f)
            errors.append(est.stderr)
        except ValueError:
            values.append(np.nan)
            errors.append(np.nan)
    values, errors = np.asarray(values), np.asarray(errors)
    fig, ax = _target(target)
    ax.plot(sizes, values, "o-", color="tab:blue", ms=4, label="BAR on the first n trajectories")
    ax.fill_between(sizes, values - errors, values + errors, color="tab:blue", alpha=0.25, label="±1 standard error")
    if reference is None and result is not None and result.reference is not None:
        reference = result.reference["delta_f"] / result.kT
    if reference is not None:
        ax.axhline(reference, color="k", ls="--", lw=1, label=f"reference {reference:.3f} kT")
    ax.set_xscale("log")
    ax.set_xlabel("trajectories per direction")
    ax.set_ylabel("ΔF (kT)")
    ax.set_title("Convergence with the number of trajectories")
    ax.legend(fontsize=8)
    return _finish(fig, ax, target)


def plot_dissipation(result_or_lambdas, target=None, *, work_per_step=None):
    """Mean forward work per switching step (kT) against the λ midpoint of the step.

    Where this curve is large the protocol pushes hardest; the dissipated work is its sum
    minus ΔF.  Takes a Result (``extras["lambdas"]``, ``extras["work_per_step_forward"]``) or
    λ values (K+1) with ``work_per_step`` (K).
    """
    if work_per_step is None:
        extras = result_or_lambdas.extras
        lambdas, work_per_step = np.asarray(extras["lambdas"], float), np.asarray(extras["work_per_step_forward"], float)
    else:
        lambdas, work_per_step = np.asarray(result_or_lambdas, float), np.asarray(work_per_step, float)
    if lambdas.size != work_per_step.size + 1:
        raise ValueError(f"need K+1 λ values for K steps; got {lambdas.size} λ and {work_per_step.size} steps")
    mid = 0.5 * (lambdas[1:] + lambdas[:-1])
    width = np.diff(lambdas)
    fig, ax = _target(target)
    with np.errstate(divide="ignore", invalid="ignore"):
        ax.plot(mid, work_per_step / width, "-", color="tab:red", label="work rate dW/dλ (kT)")
    ax.set_xlabel("λ (step midpoint)")
    ax.set_ylabel("mean forward work per unit λ (kT)")
    ax.set_title(f"Work along λ (total {np.nansum(work_per_step):.3f} kT over {work_per_step.size} steps)")
    ax.axhline(0, color="0.6", lw=0.8)
    ax.legend(fontsize=8)
    return _finish(fig, ax, target)


def plot_training(history: Sequence[dict[str, Any]], target=None, *, step_key: str = "step",
                  keys: Iterable[str] | None = None):
    """Training curve of a learned control: every numeric entry of the history against step.

    Args:
        history: list of dicts such as ``{"step": 10, "loss": 1.2, "validation_spread": 0.9}``.
        keys: entries to draw (default: every numeric key except ``step_key``).
    """
    if not history:
        raise ValueError("history is empty: nothing to plot")
    steps = np.array([h.get(step_key, i) for i, h in enumerate(history)], float)
    if keys is None:
        keys = [k for k in history[0] if k != step_key and isinstance(history[0][k], (int, float, np.number))]
    fig, ax = _target(target)
    for k in keys:
        values = np.array([h.get(k, np.nan) for h in history], float)
        ax.plot(steps, values, "-o", ms=3, label=k.replace("_", " "))
    ax.set_xlabel(step_key.replace("_", " "))
    ax.set_ylabel("value")
    ax.set_title("Control training")
    ax.legend(fontsize=8)
    return _finish(fig, ax, target)


def plot_overlap_matrix(overlap, target=None, *, labels: Sequence[str] | None = None):
    """A K×K window overlap matrix as an image with its entries written in the cells."""
    m = np.asarray(overlap, float)
    if m.ndim != 2 or m.shape[0] != m.shape[1]:
        raise ValueError(f"overlap must be a square K×K array, got shape {m.shape}")
    fig, ax = _target(target)
    image = ax.imshow(m, cmap="Blues", vmin=0, vmax=max(1e-12, float(np.nanmax(m))))
    k = m.shape[0]
    if k <= 20:
        for i in range(k):
            for j in range(k):
                ax.text(j, i, f"{m[i, j]:.2f}", ha="center", va="center", fontsize=7,
                        color="white" if m[i, j] > 0.5 * np.nanmax(m) else "black")
    ticks = np.arange(k)
    ax.set_xticks(ticks, labels=labels if labels is not None else [str(t) for t in ticks])
    ax.set_yticks(ticks, labels=labels if labels is not None else [str(t) for t in ticks])
    ax.set_xlabel("window")
    ax.set_ylabel("window")
    ax.set_title("Window overlap")
    ax.figure.colorbar(image, ax=ax, fraction=0.046)
    return _finish(fig, ax, target)


def plot_batch_summary(rows_or_results_dir, target=None, *, reference: dict[str, float] | None = None):
    """ΔF ± stderr for every successful pair of a batch table; failed pairs listed as such.

    Args:
        rows_or_results_dir: rows (dicts from :func:`fe_tool.batch.read_table`) or a results folder.
        reference: optional {pair name: known ΔF} drawn as crosses.
    """
    if isinstance(rows_or_results_dir, (str, os.PathLike)):
        from .batch import read_table

        rows = read_table(rows_or_results_dir)
    else:
        rows = list(rows_or_results_dir)
    ok = [r for r in rows if r.get("status") in ("ok", "flagged")]   # finished results
    failed = [r for r in rows if r.get("status") not in ("ok", "flagged")]
    fig, ax = _target(target)
    if fig is not None:
        fig.set_size_inches(max(6.4, 0.45 * len(rows) + 2), 4.6)
    names = [r["name"] for r in ok]
    y = np.array([float(r["delta_f"]) for r in ok])
    e = np.array([float(r["stderr"]) for r in ok])
    x = np.arange(len(ok))
    colours = ["tab:red" if r.get("flagged") in (True, "True") else "tab:blue" for r in ok]
    for xi, yi, ei, c in zip(x, y, e, colours):
        ax.errorbar(xi, yi, yerr=ei, fmt="o", color=c, capsize=3)
    if reference:
        for xi, n in zip(x, names):
            if n in reference:
                ax.plot(xi, reference[n], "kx", ms=7)
    ax.set_xticks(x, labels=names, rotation=60, ha="right", fontsize=8)
    units = {r.get("units") for r in ok}
    ax.set_ylabel("ΔF" + (f" ({units.pop()})" if len(units) == 1 else " (units differ per pair)"))
    title = f"Batch: {len(ok)} pairs ok"
    if failed:
        title += f", {len(failed)} failed ({', '.join(r['name'] for r in failed[:4])}{'…' if len(failed) > 4 else ''})"
    ax.set_title(title, fontsize=10)
    if any(c == "tab:red" for c in colours):
        ax.plot([], [], "o", color="tab:red", label="flagged by diagnostics")
        ax.legend(fontsize=8)
    return _finish(fig, ax, target)


def plot_result(result, folder) -> list[pathlib.Path]:
    """Every figure that applies to one result, written into ``folder``; returns the PNG paths."""
    folder = pathlib.Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    written = []
    wf, wr = np.asarray(result.work_forward), np.asarray(result.work_reverse)
    if np.isfinite(wf).sum() >= 2 and np.isfinite(wr).sum() >= 2:
        written.append(plot_work_distributions(result, folder / "work_distributions.png"))
        written.append(plot_convergence(result, folder / "convergence.png"))
    extras = result.extras or {}
    if "lambdas" in extras and "work_per_step_forward" in extras:
        written.append(plot_dissipation(result, folder / "work_along_lambda.png"))
    history = extras.get("training_history") or extras.get("history")
    if history:
        written.append(plot_training(history, folder / "training.png"))
    overlap = extras.get("overlap_matrix", extras.get("overlap"))
    if overlap is not None:
        written.append(plot_overlap_matrix(overlap, folder / "overlap_matrix.png"))
    return written
