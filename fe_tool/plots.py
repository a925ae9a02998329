"""Figures for one result or a batch (matplotlib, Agg canvas: no display needed).

Every drawing function takes a :class:`~fe_tool.results.Result` or plain arrays, and either an
output path (a PNG is written and its path returned) or a matplotlib ``Axes`` to draw into (the
``Axes`` is returned).

* Energies are drawn in the result's own units (``result.units``; works, which a Result keeps in
  kT, are multiplied by ``result.kT``).  ``in_kT=True`` draws in kT instead.  From plain arrays,
  works are reduced (kT) and ``kT``/``units`` name the unit to draw in (default: kT).
* Titles name the system, the budget and the seed when the result's settings hold them.
* The caution about simulated free energies (:data:`fe_tool.results.CAUTION`) is added as a
  footnote only when asked (``caution=True``), so figures can be published as they are; it
  always stays in the text summary.
* A figure with too little data to show anything (fewer than :data:`MIN_WORKS` finite works per
  direction, a curve of fewer than :data:`MIN_POINTS` points) says so in words instead.
* Works of +∞ (a legitimate zero-weight trajectory) cannot be binned: histograms leave them out
  and say how many; the estimate against trajectories keeps them (their weight is exactly zero,
  as in the headline estimate) and leaves out only diverged works (NaN, −∞), saying how many.

This module draws; it reads no files (a batch table is read by :mod:`fe_tool.batch`).
"""
from __future__ import annotations

import dataclasses
import functools
import math
import os
import pathlib
import warnings
from typing import Any, Iterable, Sequence

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
import numpy as np

from .results import CAUTION

__all__ = ["MIN_POINTS", "MIN_WORKS", "draw_batch_summary", "draw_estimate_against_trajectories", "draw_result",
           "draw_training_curves", "draw_window_overlap", "draw_work_along_lambda", "draw_work_distributions"]

MIN_WORKS = 5    # finite works per direction below which a work figure shows a note instead
MIN_POINTS = 3   # points below which a curve shows a note instead
CAUTION_ID = "fe_tool-caution"
# history entries that count things (not drawn by default: their scale swamps the others)
COUNTER_KEYS = ("evaluations", "skipped_steps", "validation_nonfinite")
TRAINING_KEYS = ("loss", "validation_work_mean", "validation_work_spread", "predicted_variance_ratio")


# ------------------------------------------------------------------ shared pieces

@dataclasses.dataclass(frozen=True)
class _Energy:
    """How to draw energies: a value in kT times ``per_kT`` is in the drawn ``units``; a value
    given in the result's (or caller's) units is in kT after division by ``given_kT``."""

    per_kT: float
    units: str
    given_kT: float

    def from_given(self, value):
        """A value in the result's (or caller's) units, in the drawn units (None stays None)."""
        return None if value is None else float(value) / self.given_kT * self.per_kT


def _is_result(value) -> bool:
    return hasattr(value, "work_forward") and hasattr(value, "kT") and hasattr(value, "settings")


def _energy(result, in_kT: bool, kT: float = 1.0, units: str = "kT") -> _Energy:
    if result is not None:
        kT, units = float(result.kT), str(result.units)
    if not (math.isfinite(kT) and kT > 0):
        raise ValueError(f"kT must be a positive number (the thermal energy in {units!r}), got {kT}")
    return _Energy(1.0, "kT", kT) if in_kT else _Energy(kT, units, kT)


def _title(what: str, result=None) -> str:
    """``what`` and, on a second line, the system, budget and seed from the result's settings."""
    settings = getattr(result, "settings", None) or {}
    parts = []
    if settings.get("system"):
        parts.append(str(settings["system"]))
    if settings.get("budget") is not None:
        budget = settings["budget"]
        parts.append(f"budget {budget:,}" if isinstance(budget, (int, np.integer)) else f"budget {budget}")
    if settings.get("seed") is not None:
        parts.append(f"seed {settings['seed']}")
    return what + ("\n" + ", ".join(parts) if parts else "")


def _target(target):
    """(figure or None, axes) for a path/None (new figure) or an existing Axes."""
    if target is not None and hasattr(target, "plot") and hasattr(target, "figure"):
        return None, target
    # a bare Figure with its own Agg canvas: no global backend switch, so notebooks keep
    # their inline backend and scripts need no display
    fig = Figure(figsize=(6.4, 4.6))
    FigureCanvasAgg(fig)
    return fig, fig.add_subplot()


def _add_caution(figure) -> None:
    """The caution as a small footnote at the bottom edge of the figure (once per figure)."""
    if any(t.get_gid() == CAUTION_ID for t in figure.texts):
        return
    figure.text(0.5, 0.005, CAUTION, ha="center", va="bottom", fontsize=6.5, color="0.35", wrap=True,
                gid=CAUTION_ID)


def _finish(fig, ax, target, caution: bool):
    if caution:
        _add_caution(ax.figure)
    if fig is None:
        return ax
    fig.tight_layout(rect=(0, 0.045 if caution else 0, 1, 1))
    path = pathlib.Path(target if target is not None else "figure.png")
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    return path


def _note_too_few(ax, message: str, detail: str = "") -> None:
    """Replace the drawing by a sentence saying why there is nothing to show."""
    ax.text(0.5, 0.54, message, transform=ax.transAxes, ha="center", va="center", fontsize=11)
    if detail:
        ax.text(0.5, 0.44, detail, transform=ax.transAxes, ha="center", va="center", fontsize=8, color="0.3",
                wrap=True)
    ax.set_xticks([])
    ax.set_yticks([])


def _count(n: int, thing: str) -> str:
    return f"{n} {thing}" + ("" if n == 1 else "s")


def _works(result_or_forward, work_reverse):
    if work_reverse is None:
        if not _is_result(result_or_forward):
            raise TypeError("give a Result, or forward works together with work_reverse=... (reduced, kT units)")
        r = result_or_forward
        return np.asarray(r.work_forward, float), np.asarray(r.work_reverse, float), r
    return np.asarray(result_or_forward, float).ravel(), np.asarray(work_reverse, float).ravel(), None


def _left_out(works: np.ndarray) -> str:
    """'' or ', 2 left out (+∞)' for the works a histogram cannot show."""
    plus_inf = int(np.sum(works == np.inf))
    diverged = int(np.sum(np.isnan(works) | (works == -np.inf)))
    parts = ([f"{plus_inf} +∞"] if plus_inf else []) + ([f"{diverged} diverged"] if diverged else [])
    return f", {plus_inf + diverged} left out ({', '.join(parts)})" if parts else ""


def _too_few_trajectories(n_forward: int, n_reverse: int) -> tuple[str, str]:
    return (f"too few trajectories ({min(n_forward, n_reverse)}) for this figure",
            f"{n_forward} forward and {n_reverse} reverse works are finite; "
            f"at least {MIN_WORKS} per direction are needed")


# ------------------------------------------------------------------ work distributions

def draw_work_distributions(result_or_work_forward, target=None, *, work_reverse=None, delta_f: float | None = None,
                            bins: int | None = None, in_kT: bool = False, kT: float = 1.0, units: str = "kT",
                            caution: bool = False):
    """Histograms of forward works w_F and negated reverse works −w_R, with ΔF marked.

    By Crooks' theorem the two densities cross at w = ΔF; the Gaussian crossing of the two
    sets is drawn as a dashed line, the headline ΔF as a solid one.  Non-finite works are left
    out of the histograms and counted in the legend.

    Args:
        result_or_work_forward: a Result, or forward reduced works (then give ``work_reverse``).
        target: output PNG path, or an Axes.
        delta_f: ΔF to mark, in the result's units (arrays: in ``units``); default the Result's
            headline, or BAR of the works.
        in_kT: draw in kT instead of the result's units.
        kT, units: for plain arrays only: the thermal energy in ``units`` and its name.
        caution: add the caution about simulated free energies as a footnote.
    """
    from .estimators import bar, gaussian_crossing

    wf_all, wr_all, result = _works(result_or_work_forward, work_reverse)
    energy = _energy(result, in_kT, kT, units)
    wf, mr = wf_all[np.isfinite(wf_all)], -wr_all[np.isfinite(wr_all)]
    fig, ax = _target(target)
    ax.set_title(_title("Work distributions", result), fontsize=10)
    if wf.size < MIN_WORKS or mr.size < MIN_WORKS:
        _note_too_few(ax, *_too_few_trajectories(wf.size, mr.size))
        return _finish(fig, ax, target, caution)
    u, scale = energy.units, energy.per_kT
    edges = np.histogram_bin_edges(np.concatenate([wf, mr]) * scale,
                                   bins=bins or int(np.clip(math.sqrt(wf.size + mr.size), 10, 60)))
    ax.hist(wf * scale, bins=edges, density=True, alpha=0.55, color="tab:blue",
            label=r"forward $w_F$ (A→B)" + _left_out(wf_all))
    ax.hist(mr * scale, bins=edges, density=True, alpha=0.55, color="tab:orange",
            label=r"reverse $-w_R$ (B→A)" + _left_out(wr_all))
    if delta_f is not None:
        delta_f = energy.from_given(delta_f)
    elif result is not None:
        delta_f = energy.from_given(result.delta_f)
    else:
        delta_f = bar(wf, -mr).delta_f * scale
    crossing = float(gaussian_crossing(wf.mean(), wf.std(), -mr.mean(), mr.std())) * scale
    if math.isfinite(crossing):
        ax.axvline(crossing, color="0.3", ls="--", lw=1.2, label=f"Gaussian crossing {crossing:.3f} {u}")
    if delta_f is not None and math.isfinite(delta_f):
        ax.axvline(delta_f, color="k", lw=1.6, label=f"ΔF = {delta_f:.3f} {u}")
    ax.set_xlabel(f"work ({u})")
    ax.set_ylabel(f"probability density (per {u})")
    ax.legend(fontsize=8)
    return _finish(fig, ax, target, caution)


# ------------------------------------------------------------------ estimate against trajectories

def _bar_on_prefixes(wf: np.ndarray, wr: np.ndarray, sizes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """BAR (kT) and its asymptotic standard error on the first m trajectories of each direction,
    diverged works (NaN, −∞) left out and +∞ kept with zero weight, as in the headline."""
    from .estimators import bar

    keep_f = ~(np.isnan(wf) | (wf == -np.inf))
    keep_r = ~(np.isnan(wr) | (wr == -np.inf))
    values, errors = np.full(sizes.size, np.nan), np.full(sizes.size, np.nan)
    for i, m in enumerate(sizes):
        try:
            est = bar(wf[:m][keep_f[:m]], wr[:m][keep_r[:m]])
        except ValueError:   # a prefix with no finite work in one direction
            continue
        values[i], errors[i] = est.delta_f, est.stderr
    return values, errors


def _prefix_note(wf: np.ndarray, wr: np.ndarray) -> str:
    both = np.concatenate([wf, wr])
    diverged = int(np.sum(np.isnan(both) | (both == -np.inf)))
    plus_inf = int(np.sum(both == np.inf))
    notes = ([f"{_count(diverged, 'diverged work')} (NaN, −∞) left out"] if diverged else []) + \
            ([f"{_count(plus_inf, 'work')} of +∞ kept with zero weight"] if plus_inf else [])
    return "; ".join(notes)


def draw_estimate_against_trajectories(result_or_work_forward, target=None, *, work_reverse=None, points: int = 12,
                                       reference: float | None = None, in_kT: bool = False, kT: float = 1.0,
                                       units: str = "kT", caution: bool = False):
    """BAR ΔF on the first m trajectories of each direction against m, with a ±1 standard-error band.

    The last point uses every trajectory (as the headline BAR estimate does).  Diverged works
    (NaN, −∞) are left out and +∞ works kept with zero weight; a note counts both.

    Args:
        result_or_work_forward: a Result, or forward reduced works (then give ``work_reverse``).
        target: output PNG path, or an Axes.
        points: number of prefix lengths (log-spaced from 4 trajectories to all).
        reference: known ΔF in the result's units (arrays: in ``units``) to draw (default: the
            Result's reference, if any).
        in_kT, kT, units, caution: as in :func:`draw_work_distributions`.
    """
    wf, wr, result = _works(result_or_work_forward, work_reverse)
    energy = _energy(result, in_kT, kT, units)
    n = min(wf.size, wr.size)
    finite_f, finite_r = int(np.isfinite(wf).sum()), int(np.isfinite(wr).sum())
    sizes = np.unique(np.geomspace(min(4, n), n, points).astype(int)) if n >= 2 else np.array([], int)
    fig, ax = _target(target)
    ax.set_title(_title("ΔF against the number of trajectories", result), fontsize=10)
    if finite_f < MIN_WORKS or finite_r < MIN_WORKS or sizes.size < MIN_POINTS:
        if finite_f < MIN_WORKS or finite_r < MIN_WORKS:
            _note_too_few(ax, *_too_few_trajectories(finite_f, finite_r))
        else:
            _note_too_few(ax, f"too few trajectories ({n}) for this figure",
                          f"the curve would have {sizes.size} points; at least {MIN_POINTS} are needed")
        return _finish(fig, ax, target, caution)
    values, errors = _bar_on_prefixes(wf, wr, sizes)
    values, errors, u = values * energy.per_kT, errors * energy.per_kT, energy.units
    ax.plot(sizes, values, "o-", color="tab:blue", ms=4, label="BAR on the first m trajectories")
    ax.fill_between(sizes, values - errors, values + errors, color="tab:blue", alpha=0.25, label="±1 standard error")
    if reference is None and result is not None and result.reference is not None:
        reference = result.reference["delta_f"]
    reference = energy.from_given(reference)
    if reference is not None:
        ax.axhline(reference, color="k", ls="--", lw=1, label=f"reference {reference:.3f} {u}")
    note = _prefix_note(wf[:n], wr[:n])
    if note:
        ax.plot([], [], " ", label=note)
    ax.set_xscale("log")
    ax.set_xlabel("trajectories per direction, m")
    ax.set_ylabel(f"ΔF ({u})")
    ax.legend(fontsize=8)
    return _finish(fig, ax, target, caution)


# ------------------------------------------------------------------ work along λ

def _along_lambda_inputs(result_or_lambdas, work_per_step, work_per_step_stderr):
    """(λ, mean work per step, its stderr or None, the Result or None); works in kT."""
    if work_per_step is None:
        if not _is_result(result_or_lambdas):
            raise TypeError("give a Result, or λ values together with work_per_step=... (reduced, kT units)")
        extras = result_or_lambdas.extras or {}
        missing = [k for k in ("lambdas", "work_per_step_forward") if k not in extras]
        if missing:
            raise ValueError(f"this result has no {' and no '.join(missing)} in its extras (the windows route "
                             "does not switch): there is no work along λ to draw")
        stderr = extras.get("work_per_step_forward_stderr")
        return (np.asarray(extras["lambdas"], float), np.asarray(extras["work_per_step_forward"], float),
                None if stderr is None else np.asarray(stderr, float), result_or_lambdas)
    return (np.asarray(result_or_lambdas, float), np.asarray(work_per_step, float),
            None if work_per_step_stderr is None else np.asarray(work_per_step_stderr, float), None)


def draw_work_along_lambda(result_or_lambdas, target=None, *, work_per_step=None, work_per_step_stderr=None,
                           in_kT: bool = False, kT: float = 1.0, units: str = "kT", caution: bool = False):
    """Mean forward work per unit λ against the λ midpoint of each switching step, ±1 standard error.

    Where this curve is large the protocol pushes hardest; the dissipated work is its integral
    minus ΔF.  Takes a Result (``extras["lambdas"]``, ``extras["work_per_step_forward"]`` and,
    when present, ``extras["work_per_step_forward_stderr"]`` for the band) or λ values (K+1)
    with ``work_per_step`` (K, reduced) and optionally ``work_per_step_stderr`` (K, reduced).
    Without a standard error no band is drawn.

    Args:
        in_kT, kT, units, caution: as in :func:`draw_work_distributions`.
    """
    lambdas, per_step, stderr, result = _along_lambda_inputs(result_or_lambdas, work_per_step, work_per_step_stderr)
    if lambdas.size != per_step.size + 1:
        raise ValueError(f"need K+1 λ values for K steps; got {lambdas.size} λ and {per_step.size} steps")
    if stderr is not None and stderr.shape != per_step.shape:
        raise ValueError(f"work_per_step_stderr must have the shape of work_per_step {per_step.shape}, "
                         f"got {stderr.shape}")
    energy = _energy(result, in_kT, kT, units)
    fig, ax = _target(target)
    ax.set_title(_title("Work along λ", result), fontsize=10)
    if result is not None:
        finite = int(np.isfinite(np.asarray(result.work_forward, float)).sum())
        if finite < MIN_WORKS:
            _note_too_few(ax, f"too few trajectories ({finite}) for this figure",
                          f"{finite} forward works are finite; at least {MIN_WORKS} are needed")
            return _finish(fig, ax, target, caution)
    if np.isfinite(per_step).sum() < MIN_POINTS:
        _note_too_few(ax, f"too few switching steps with a finite mean work ({int(np.isfinite(per_step).sum())}) "
                      "for this figure", f"at least {MIN_POINTS} are needed")
        return _finish(fig, ax, target, caution)
    mid, width, u = 0.5 * (lambdas[1:] + lambdas[:-1]), np.diff(lambdas), energy.units
    with np.errstate(divide="ignore", invalid="ignore"):
        rate = per_step * energy.per_kT / width
        total = np.nansum(per_step) * energy.per_kT
        ax.plot(mid, rate, "-", color="tab:red",
                label=f"mean work rate (total {total:.3f} {u} over {per_step.size} steps)")
        if stderr is not None:
            band = stderr * energy.per_kT / width
            ax.fill_between(mid, rate - band, rate + band, color="tab:red", alpha=0.25, label="±1 standard error")
    ax.set_xlabel("λ (step midpoint)")
    ax.set_ylabel(f"mean forward work per unit λ ({u})")
    ax.axhline(0, color="0.6", lw=0.8)
    ax.legend(fontsize=8)
    return _finish(fig, ax, target, caution)


# ------------------------------------------------------------------ training curves

def _is_energy_key(key: str) -> bool:
    """History entries that are works or spreads of works (kT in the history)."""
    return "work" in key or key.endswith("spread") or key == "validation_score"


def _history(result_or_history, step_key, keys):
    if _is_result(result_or_history):
        extras = result_or_history.extras or {}
        history = (extras.get("control") or {}).get("history") or extras.get("training_history") or []
        return list(history), result_or_history, "optimiser_step" if step_key is None else step_key, \
            TRAINING_KEYS if keys is None else keys
    return list(result_or_history), None, "step" if step_key is None else step_key, keys


def draw_training_curves(result_or_history, target=None, *, step_key: str | None = None,
                         keys: Iterable[str] | None = None, in_kT: bool = False, kT: float = 1.0,
                         units: str = "kT", caution: bool = False):
    """Training curves of a learned control: chosen entries of its validation history against step.

    Args:
        result_or_history: a Result of a learned control (its ``extras["control"]["history"]``), or a
            list of dicts such as ``{"step": 10, "loss": 1.2, "validation_work_spread": 0.9}``.
        step_key: the entry on the x axis (default ``"optimiser_step"`` for a Result, else ``"step"``).
        keys: entries to draw (default for a Result: loss, validation work mean and spread and the
            predicted variance ratio; for a history: every numeric entry except the step and counters).
            Entries naming works or spreads are energies (kT in the history) and are drawn in the
            result's units (or ``units``); their legend names the unit.
        in_kT, kT, units, caution: as in :func:`draw_work_distributions`.
    """
    history, result, step_key, keys = _history(result_or_history, step_key, keys)
    energy = _energy(result, in_kT, kT, units)
    fig, ax = _target(target)
    ax.set_title(_title("Control training", result), fontsize=10)
    if len(history) < MIN_POINTS - 1:
        _note_too_few(ax, f"too few validation checks ({len(history)}) for this figure",
                      "at least 2 are needed for a curve")
        return _finish(fig, ax, target, caution)
    steps = np.array([h.get(step_key, i) for i, h in enumerate(history)], float)
    if keys is None:
        keys = [k for k in history[0] if k != step_key and k not in COUNTER_KEYS
                and isinstance(history[0][k], (int, float, np.number)) and not isinstance(history[0][k], bool)]
    for k in keys:
        values = np.array([h.get(k, np.nan) for h in history], float)
        label = k.replace("_", " ")
        if _is_energy_key(k):
            values, label = values * energy.per_kT, f"{label} ({energy.units})"
        ax.plot(steps, values, "-o", ms=3, label=label)
    ax.set_xlabel(step_key.replace("_", " "))
    ax.set_ylabel("value")
    ax.legend(fontsize=8)
    return _finish(fig, ax, target, caution)


# ------------------------------------------------------------------ window overlap

def draw_window_overlap(result_or_overlap, target=None, *, labels: Sequence[str] | None = None,
                        caution: bool = False):
    """A K×K window overlap matrix as an image with its entries written in the cells.

    Args:
        result_or_overlap: a Result of the windows route (``extras["overlap"]``, labelled by its
            ``extras["lambdas"]``), or a square array.
        labels: tick labels (default: the λ values of a Result, else window numbers).
    """
    result = result_or_overlap if _is_result(result_or_overlap) else None
    if result is not None:
        extras = result.extras or {}
        if extras.get("overlap") is None:
            raise ValueError("this result has no window overlap matrix (extras['overlap']): only the windows "
                             "route has one")
        m = np.asarray(extras["overlap"], float)
        if labels is None and extras.get("lambdas") is not None and len(extras["lambdas"]) == m.shape[0]:
            labels = [f"{v:.2f}" for v in np.asarray(extras["lambdas"], float)]
    else:
        m = np.asarray(result_or_overlap, float)
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
    axis = "λ" if result is not None and labels is not None else "window"
    ax.set_xlabel(axis)
    ax.set_ylabel(axis)
    ax.set_title(_title("Overlap between windows", result), fontsize=10)
    ax.figure.colorbar(image, ax=ax, fraction=0.046)
    return _finish(fig, ax, target, caution)


# ------------------------------------------------------------------ batch summary

def _finished(row) -> bool:
    return row.get("status") in ("ok", "flagged")


def draw_batch_summary(rows: Iterable[dict[str, Any]], target=None, *, reference: dict[str, float] | None = None,
                       title: str | None = None, caution: bool = False):
    """ΔF ± standard error for every finished pair of a batch table; failed pairs named in the title.

    Args:
        rows: the rows of a batch table (``BatchSummary.rows``, or ``fe_tool.batch.read_table(folder)``
            for a results folder on disk): dicts with ``name``, ``status``, ``delta_f``, ``stderr``,
            ``units`` and ``flagged``.
        reference: optional {pair name: known ΔF} (in the pair's units) drawn as crosses.
        title: a name for the batch, put before the counts in the title.
    """
    if isinstance(rows, (str, bytes, os.PathLike)):
        raise TypeError("draw_batch_summary takes the rows of a batch table, not a folder; read them first "
                        "with fe_tool.batch.read_table(folder)")
    rows = list(rows)
    ok = [r for r in rows if _finished(r)]
    failed = [r for r in rows if not _finished(r)]
    fig, ax = _target(target)
    if fig is not None:
        fig.set_size_inches(max(6.4, 0.45 * len(rows) + 2), 4.8)
    heading = (f"{title}: " if title else "Batch: ") + f"{len(ok)} pairs finished"
    if failed:
        heading += (f", {len(failed)} failed ({', '.join(str(r.get('name')) for r in failed[:4])}"
                    f"{'…' if len(failed) > 4 else ''})")
    ax.set_title(heading, fontsize=10)
    if not ok:
        _note_too_few(ax, "no finished pair to draw")
        return _finish(fig, ax, target, caution)
    x = np.arange(len(ok))
    flagged = [r.get("flagged") in (True, "True", "true") for r in ok]
    for xi, r, bad in zip(x, ok, flagged):
        ax.errorbar(xi, float(r["delta_f"]), yerr=float(r["stderr"]), fmt="o",
                    color="tab:red" if bad else "tab:blue", capsize=3)
    for xi, r in zip(x, ok):
        if reference and r["name"] in reference:
            ax.plot(xi, reference[r["name"]], "kx", ms=7)
    ax.set_xticks(x, labels=[r["name"] for r in ok], rotation=60, ha="right", fontsize=8)
    units = {r.get("units") for r in ok} - {None, ""}
    ax.set_ylabel("ΔF" + (f" ({units.pop()})" if len(units) == 1 else " (units differ per pair)" if units else ""))
    if any(flagged):
        ax.plot([], [], "o", color="tab:red", label="flagged by diagnostics")
    if reference:
        ax.plot([], [], "kx", label="reference")
    if any(flagged) or reference:
        ax.legend(fontsize=8)
    return _finish(fig, ax, target, caution)


# ------------------------------------------------------------------ every figure of one result

def draw_result(result, folder, *, in_kT: bool = False, caution: bool = False) -> list[pathlib.Path]:
    """Every figure that applies to one result, written into ``folder``; returns the PNG paths.

    A switching result gets its work distributions, ΔF against the number of trajectories and the
    work along λ (each says so in words when there are too few trajectories); a learned control
    adds its training curves; the windows route gets its overlap matrix.
    """
    folder = pathlib.Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    options = {"in_kT": in_kT, "caution": caution}
    written = []
    if np.asarray(result.work_forward).size and np.asarray(result.work_reverse).size:
        written.append(draw_work_distributions(result, folder / "work_distributions.png", **options))
        written.append(draw_estimate_against_trajectories(result, folder / "convergence.png", **options))
    extras = result.extras or {}
    if "lambdas" in extras and "work_per_step_forward" in extras:
        written.append(draw_work_along_lambda(result, folder / "work_along_lambda.png", **options))
    if (extras.get("control") or {}).get("history") or extras.get("training_history"):
        written.append(draw_training_curves(result, folder / "training.png", **options))
    if extras.get("overlap") is not None:
        written.append(draw_window_overlap(result, folder / "overlap_matrix.png", caution=caution))
    return written


# ------------------------------------------------------------------ old names (one release)

def _renamed(new):
    old = {draw_work_distributions: "plot_work_distributions", draw_estimate_against_trajectories: "plot_convergence",
           draw_work_along_lambda: "plot_dissipation", draw_training_curves: "plot_training",
           draw_window_overlap: "plot_overlap_matrix", draw_batch_summary: "plot_batch_summary",
           draw_result: "plot_result"}[new]

    @functools.wraps(new)
    def alias(*args, **kwargs):
        warnings.warn(f"fe_tool.plots.{old} is renamed fe_tool.plots.{new.__name__}; the old name will be "
                      "removed in the next release", FutureWarning, stacklevel=2)
        return new(*args, **kwargs)

    alias.__name__ = alias.__qualname__ = old
    alias.__doc__ = f"Old name of :func:`{new.__name__}` (kept for one release; warns)."
    return alias


plot_work_distributions = _renamed(draw_work_distributions)
plot_convergence = _renamed(draw_estimate_against_trajectories)
plot_dissipation = _renamed(draw_work_along_lambda)
plot_training = _renamed(draw_training_curves)
plot_overlap_matrix = _renamed(draw_window_overlap)
plot_batch_summary = _renamed(draw_batch_summary)
plot_result = _renamed(draw_result)


def __getattr__(name: str):
    if name == "FOOTNOTE":
        warnings.warn("fe_tool.plots.FOOTNOTE is replaced by fe_tool.results.CAUTION (figures show it only with "
                      "caution=True); the old name will be removed in the next release", FutureWarning, stacklevel=2)
        return CAUTION
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
