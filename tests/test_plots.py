"""Figures: written as PNG files, drawn in the result's units, titled, cautioned only on request,
honest about too few data and about non-finite works.

Results are built directly (no estimate() run) so this module stays fast.
"""
import math
import os
import pathlib
import subprocess
import sys

import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import PolyCollection
from matplotlib.figure import Figure
from scipy.optimize import brentq

from fe_tool import plots
from fe_tool.estimators.record import Estimate
from fe_tool.results import CAUTION, Result

PNG = b"\x89PNG\r\n\x1a\n"
KT_KJ = 2.494   # kT near 300 K in kJ/mol (R·T with R = 8.314 J/(mol K), from memory); only a scale here
DELTA_F = 0.5   # kT: the Gaussian works below are drawn for this ΔF
SIGMA = 1.0     # kT: spread of both work distributions


def _is_png(path):
    data = pathlib.Path(path).read_bytes()
    return data[:8] == PNG and len(data) > 1000


def _gaussian_works(n, seed=3):
    """Works consistent with Crooks' theorem for Gaussian work: w_F ~ N(ΔF + σ²/2, σ²),
    w_R ~ N(−ΔF + σ²/2, σ²) (Crooks 1999, Phys. Rev. E 60, 2721; Gaussian case e.g.
    Hummer 2001, J. Chem. Phys. 114, 7330)."""
    g = np.random.default_rng(seed)
    return (g.normal(DELTA_F + SIGMA ** 2 / 2, SIGMA, n), g.normal(-DELTA_F + SIGMA ** 2 / 2, SIGMA, n))


def _result(n=300, *, kT=KT_KJ, units="kJ/mol", settings=None, extras=None, works=None):
    wf, wr = _gaussian_works(n) if works is None else works
    steps = 20
    lams = np.linspace(0, 1, steps + 1)
    default_extras = {"lambdas": lams, "work_per_step_forward": np.full(steps, 1.5 / steps),
                      "work_per_step_forward_stderr": np.full(steps, 0.01)}
    return Result(
        delta_f=DELTA_F * kT, stderr=0.05 * kT, estimator="bar", choice_reason="test",
        estimates={"bar": Estimate(DELTA_F * kT, 0.05 * kT, "bar")},
        work_forward=np.asarray(wf, float), work_reverse=np.asarray(wr, float), energy_evaluations=1000,
        cost={"switching": 1000}, kT=kT, units=units, diagnostics={}, warnings=[], flagged=False,
        settings={"system": "probe in a well", "budget": 150_000, "seed": 7} if settings is None else settings,
        timings={}, reference={"delta_f": DELTA_F * kT, "source": "Gaussian works", "tolerance": 0.1 * kT},
        extras=default_extras if extras is None else extras)


def _axes():
    fig = Figure()
    FigureCanvasAgg(fig)
    return fig, fig.add_subplot()


def _texts(ax):
    return " ".join(t.get_text() for t in ax.texts)


def _legend(ax):
    legend = ax.get_legend()
    return " ".join(t.get_text() for t in legend.get_texts()) if legend is not None else ""


def _bennett(wf, wr):
    """ΔF (kT) solving Bennett's equation for equal numbers of forward and reverse works,
    Σ_i 1/(1 + exp(w_F,i − ΔF)) = Σ_j 1/(1 + exp(w_R,j + ΔF)) (Bennett 1976, J. Comput. Phys. 22, 245);
    +∞ works contribute exactly zero on their side."""
    def imbalance(df):
        with np.errstate(over="ignore"):
            return np.sum(1 / (1 + np.exp(wf - df))) - np.sum(1 / (1 + np.exp(wr + df)))
    return brentq(imbalance, -50, 50, xtol=1e-12)


# ------------------------------------------------------------------ units, titles, caution

def test_every_figure_of_a_kJ_per_mol_result_is_written_and_labelled_in_kJ_per_mol(tmp_path, saved_figures):
    history = [{"optimiser_step": 10 * i, "evaluations": 1000 * i, "loss": 1 / (i + 1),
                "validation_work_mean": 2 - i / 10, "validation_work_spread": 1.5 - i / 20,
                "predicted_variance_ratio": 1 - i / 20} for i in range(6)]
    result = _result()
    result.extras["control"] = {"history": history}
    written = plots.draw_result(result, tmp_path / "figs")
    names = [p.name for p in written]
    assert names == ["work_distributions.png", "convergence.png", "work_along_lambda.png", "training.png"]
    assert all(_is_png(p) for p in written) and len(saved_figures) == 4
    for fig in saved_figures:
        ax = fig.axes[0]
        assert "kJ/mol" in ax.get_xlabel() + ax.get_ylabel() + _legend(ax), fig
        assert "kT" not in ax.get_xlabel() + ax.get_ylabel()
        assert all(part in ax.get_title() for part in ("probe in a well", "budget 150,000", "seed 7"))
        assert CAUTION not in " ".join(t.get_text() for t in fig.texts)   # off by default
    training = saved_figures[3].axes[0]
    assert "validation work spread (kJ/mol)" in _legend(training) and "evaluations" not in _legend(training)


def test_windows_result_gets_its_overlap_with_lambda_labels(tmp_path, saved_figures):
    k = 4
    overlap = np.exp(-np.abs(np.subtract.outer(np.arange(k), np.arange(k))))
    result = _result(works=(np.zeros(0), np.zeros(0)),
                     extras={"lambdas": np.linspace(0, 1, k), "overlap": overlap / overlap.sum(1, keepdims=True)})
    written = plots.draw_result(result, tmp_path)
    assert [p.name for p in written] == ["overlap_matrix.png"] and _is_png(written[0])
    ax = saved_figures[0].axes[0]
    assert ax.get_xlabel() == "λ" and [t.get_text() for t in ax.get_xticklabels()] == ["0.00", "0.33", "0.67", "1.00"]
    assert "probe in a well" in ax.get_title()


def test_values_are_drawn_in_the_results_units_or_in_kT():
    result = _result()
    wf, wr = result.work_forward, result.work_reverse
    # Crooks: for Gaussian works the two densities cross at ΔF; the sample crossing has a standard
    # error of about σ·sqrt(2/n)/2 = 0.041 kT for n = 300, so 0.2 kT is a margin of ~5 standard errors
    for in_kT, scale, unit in ((False, KT_KJ, "kJ/mol"), (True, 1.0, "kT")):
        fig, ax = _axes()
        plots.draw_work_distributions(result, ax, in_kT=in_kT)
        crossing, headline = (line.get_xdata()[0] for line in ax.lines[:2])
        assert abs(crossing - DELTA_F * scale) < 0.2 * scale
        assert headline == pytest.approx(DELTA_F * scale, rel=1e-12)
        assert ax.get_xlabel() == f"work ({unit})"
        fig, ax = _axes()
        plots.draw_estimate_against_trajectories(result, ax, in_kT=in_kT)
        sizes, values = ax.lines[0].get_data()
        assert sizes[-1] == 300
        assert values[-1] == pytest.approx(_bennett(wf, wr) * scale, abs=1e-8 * scale)
        assert ax.get_ylabel() == f"ΔF ({unit})"
        assert ax.lines[1].get_ydata()[0] == pytest.approx(DELTA_F * scale)   # the reference


def test_arrays_are_drawn_in_kT_unless_a_unit_is_given():
    wf, wr = _gaussian_works(200)
    fig, ax = _axes()
    assert plots.draw_work_distributions(wf, ax, work_reverse=wr) is ax
    assert ax.get_xlabel() == "work (kT)" and ax.get_title() == "Work distributions"   # no settings: no second line
    fig, ax = _axes()
    plots.draw_estimate_against_trajectories(wf, ax, work_reverse=wr, kT=4.184, units="kcal-ish", reference=2.0)
    assert ax.get_ylabel() == "ΔF (kcal-ish)" and ax.lines[1].get_ydata()[0] == pytest.approx(2.0)
    assert ax.lines[0].get_ydata()[-1] == pytest.approx(_bennett(wf, wr) * 4.184, abs=1e-8)


def test_title_falls_back_to_what_is_known():
    fig, ax = _axes()
    plots.draw_work_distributions(_result(settings={"budget": None, "seed": 0}), ax)
    assert ax.get_title() == "Work distributions\nseed 0"
    fig, ax = _axes()
    plots.draw_work_distributions(_result(settings={}), ax)
    assert ax.get_title() == "Work distributions"


def test_caution_only_when_asked(tmp_path, saved_figures):
    result = _result()
    plots.draw_work_distributions(result, tmp_path / "plain.png")
    plots.draw_work_distributions(result, tmp_path / "cautioned.png", caution=True)
    plain, cautioned = ([t.get_text() for t in f.texts] for f in saved_figures)
    assert CAUTION not in plain and cautioned.count(CAUTION) == 1
    fig = Figure()
    left, right = fig.subplots(1, 2)
    plots.draw_work_distributions(result, left, caution=True)
    plots.draw_estimate_against_trajectories(result, right, caution=True)
    assert [t.get_text() for t in fig.texts].count(CAUTION) == 1   # once per figure


# ------------------------------------------------------------------ too few data, non-finite works

def test_three_trajectories_say_so_instead_of_drawing(tmp_path, saved_figures):
    result = _result(works=_gaussian_works(3))
    written = plots.draw_result(result, tmp_path)
    assert len(written) == 3 and all(_is_png(p) for p in written)
    for fig in saved_figures:
        ax = fig.axes[0]
        assert "too few trajectories (3) for this figure" in _texts(ax), fig
        assert not ax.patches and not ax.collections and not [l for l in ax.lines if len(l.get_xdata())]
    fig, ax = _axes()
    wf, wr = _gaussian_works(5)
    plots.draw_estimate_against_trajectories(wf, ax, work_reverse=wr)   # enough works, but a 2-point curve
    assert "too few trajectories (5) for this figure" in _texts(ax) and "2 points" in _texts(ax)
    fig, ax = _axes()
    plots.draw_training_curves([{"step": 0, "loss": 1.0}], ax)
    assert "too few validation checks (1)" in _texts(ax)


def test_nonfinite_works_are_left_out_and_counted():
    wf, wr = _gaussian_works(200)
    wf[[3, 50]] = np.inf        # zero-weight trajectories (e.g. a particle inserted onto a neighbour)
    wf[7] = np.nan              # a diverged trajectory
    wr[11] = np.inf
    fig, ax = _axes()
    plots.draw_work_distributions(_result(works=(wf, wr)), ax)
    legend = _legend(ax)
    assert "3 left out (2 +∞, 1 diverged)" in legend and "1 left out (1 +∞)" in legend
    assert sum(p.get_height() * p.get_width() for p in ax.patches) == pytest.approx(2.0)   # two normalised histograms
    fig, ax = _axes()
    plots.draw_estimate_against_trajectories(_result(works=(wf, wr)), ax, in_kT=True)
    assert "1 diverged work (NaN, −∞) left out" in _legend(ax)
    assert "3 works of +∞ kept with zero weight" in _legend(ax)
    # the last point is BAR with the diverged work left out and the +∞ works kept (their Fermi factor is 0);
    # Bennett's equation for unequal numbers adds M = ln(n_F/n_R) (Shirts et al. 2003, Phys. Rev. Lett. 91, 140601)
    keep = ~np.isnan(wf)
    shift = math.log(keep.sum() / wr.size)
    expected = _bennett(wf[keep] + shift, wr - shift)
    assert ax.lines[0].get_ydata()[-1] == pytest.approx(expected, abs=1e-8)


# ------------------------------------------------------------------ work along λ

def test_work_along_lambda_band_from_the_standard_error_when_given():
    result = _result()
    fig, ax = _axes()
    plots.draw_work_along_lambda(result, ax)
    band = [c for c in ax.collections if isinstance(c, PolyCollection)]
    assert len(band) == 1
    vertices = band[0].get_paths()[0].vertices
    # mean 0.075 kT per step of width 0.05: rate 1.5 kT per unit λ; stderr 0.01/0.05 = 0.2 kT per unit λ
    assert vertices[:, 1].min() == pytest.approx((1.5 - 0.2) * KT_KJ)
    assert vertices[:, 1].max() == pytest.approx((1.5 + 0.2) * KT_KJ)
    assert ax.get_ylabel() == "mean forward work per unit λ (kJ/mol)"
    assert "total 3.741 kJ/mol over 20 steps" in _legend(ax)   # 1.5 kT × 2.494
    del result.extras["work_per_step_forward_stderr"]
    fig, ax = _axes()
    plots.draw_work_along_lambda(result, ax)
    assert not ax.collections and len(ax.lines[0].get_xdata()) == 20


def test_bad_input_names_the_problem(tmp_path):
    with pytest.raises(ValueError, match="square"):
        plots.draw_window_overlap(np.ones((2, 3)), tmp_path / "x.png")
    with pytest.raises(ValueError, match="K\\+1"):
        plots.draw_work_along_lambda(np.linspace(0, 1, 5), tmp_path / "x.png", work_per_step=np.ones(5))
    with pytest.raises(ValueError, match="shape of work_per_step"):
        plots.draw_work_along_lambda(np.linspace(0, 1, 5), tmp_path / "x.png", work_per_step=np.ones(4),
                                     work_per_step_stderr=np.ones(3))
    with pytest.raises(ValueError, match="windows route"):
        plots.draw_work_along_lambda(_result(extras={}), tmp_path / "x.png")
    with pytest.raises(TypeError, match="read_table"):
        plots.draw_batch_summary(str(tmp_path), tmp_path / "x.png")
    with pytest.raises(TypeError, match="work_reverse"):
        plots.draw_work_distributions(np.ones(10), tmp_path / "x.png")
    assert not (tmp_path / "x.png").exists()


# ------------------------------------------------------------------ batch, training, arrays

def test_batch_summary_and_array_figures(tmp_path, saved_figures):
    rows = [{"name": f"p{i}", "delta_f": 0.3 * i, "stderr": 0.05, "units": "kJ/mol",
             "status": "flagged" if i == 2 else "ok", "flagged": i == 2} for i in range(6)]
    rows.append({"name": "bad", "status": "bad input", "delta_f": None, "stderr": None})
    assert _is_png(plots.draw_batch_summary(rows, tmp_path / "b.png", reference={"p1": 0.3}, title="scan"))
    ax = saved_figures[-1].axes[0]
    assert ax.get_title() == "scan: 6 pairs finished, 1 failed (bad)" and ax.get_ylabel() == "ΔF (kJ/mol)"
    history = [{"step": i, "loss": 1 / (i + 1), "validation_spread": 1.5 - i / 40} for i in range(30)]
    assert _is_png(plots.draw_training_curves(history, tmp_path / "t.png"))
    lams = np.linspace(0, 1, 21)
    assert _is_png(plots.draw_work_along_lambda(lams, tmp_path / "d.png", work_per_step=np.sin(np.pi * lams[1:]) / 10))


# ------------------------------------------------------------------ old names, import direction

@pytest.mark.parametrize("old, new", [("plot_work_distributions", "draw_work_distributions"),
                                      ("plot_convergence", "draw_estimate_against_trajectories"),
                                      ("plot_dissipation", "draw_work_along_lambda"),
                                      ("plot_training", "draw_training_curves"),
                                      ("plot_overlap_matrix", "draw_window_overlap"),
                                      ("plot_batch_summary", "draw_batch_summary"),
                                      ("plot_result", "draw_result")])
def test_old_names_warn_and_still_draw(tmp_path, old, new):
    result = _result()
    k = 3
    arguments = {"plot_work_distributions": (result, tmp_path / "x.png"),
                 "plot_convergence": (result, tmp_path / "x.png"),
                 "plot_dissipation": (result, tmp_path / "x.png"),
                 "plot_training": ([{"step": i, "loss": 1.0 / (i + 1)} for i in range(3)], tmp_path / "x.png"),
                 "plot_overlap_matrix": (np.eye(k), tmp_path / "x.png"),
                 "plot_batch_summary": ([{"name": "a", "delta_f": 1.0, "stderr": 0.1, "status": "ok"}],
                                        tmp_path / "x.png"),
                 "plot_result": (result, tmp_path / "figs")}[old]
    with pytest.warns(FutureWarning, match=f"{old} is renamed fe_tool.plots.{new}"):
        out = getattr(plots, old)(*arguments)
    assert out  # a path or a list of paths
    assert old not in plots.__all__ and new in plots.__all__


def test_old_footnote_name_warns():
    with pytest.warns(FutureWarning, match="fe_tool.results.CAUTION"):
        assert plots.FOOTNOTE == CAUTION


def test_plots_does_not_import_the_batch_runner():
    """Dependencies point one way (batch and CLI → plots → results): importing plots must not
    import fe_tool.batch, directly or through another module."""
    code = "import sys, fe_tool.plots; print('fe_tool.batch' in sys.modules)"
    root = str(pathlib.Path(__file__).resolve().parent.parent)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True,
                         cwd=root, env={**os.environ, "PYTHONPATH": root, "FE_TOOL_COMPILATION_CACHE": "0"})
    assert out.stdout.strip() == "False", out.stderr
    assert "batch" not in "".join(line for line in pathlib.Path(plots.__file__).read_text().splitlines()
                                  if line.lstrip().startswith(("import ", "from ")))
