"""Figures of a real run through the command line: --plot with the new drawing names, in the
reported units, titled with the system, and the switching route's standard error of the work
along λ (stored in the result, drawn as a band).

One small fixed protocol: this checks plumbing and an exact inequality, not accuracy.
"""
import json
import math

import numpy as np
import pytest
from matplotlib.collections import PolyCollection

from fe_tool import plots
from fe_tool.cli import main

STEPS, TRAJECTORIES = 10, 32


def _check_work_per_step(data):
    """The standard error of the mean work of each step, as stored in the result's JSON."""
    stderr = data["extras"]["work_per_step_forward_stderr"]
    assert isinstance(stderr, list) and len(stderr) == STEPS and all(type(v) is float for v in stderr)
    assert all(math.isfinite(v) and v > 0 for v in stderr)
    wf = np.asarray(data["work_forward"], float)
    assert np.isfinite(wf).all()   # every trajectory healthy, so the per-step means use all of them
    assert np.sum(data["extras"]["work_per_step_forward"]) == pytest.approx(wf.mean(), rel=1e-4, abs=1e-6)
    # the total work is the sum of the step works and a standard deviation is a norm of the centred
    # values, so sd(total) ≤ Σ sd(step) (Minkowski's inequality); the same √n divides both sides
    assert wf.std(ddof=1) / math.sqrt(wf.size) <= sum(stderr) * (1 + 1e-4) + 1e-9


def test_cli_plot_in_the_reported_units_titled_with_the_system_with_a_band_along_lambda(tmp_path, saved_figures, capsys):
    saved = saved_figures
    folder, saved_json = tmp_path / "figures", tmp_path / "result.json"
    # warnings are errors here: a FutureWarning from an old plot name would end the run with code 3
    code = main(["run", "restraint_release_kjmol", "--steps", str(STEPS), "--trajectories", str(TRAJECTORIES),
                 "--seed", "4", "--control", "none", "--kcal", "--quiet", "--plot", str(folder),
                 "--json", str(saved_json)])
    out = capsys.readouterr().out
    assert code in (0, 1), out
    assert sorted(p.name for p in folder.iterdir()) == ["convergence.png", "work_along_lambda.png",
                                                        "work_distributions.png"]
    assert "figures written" in out and len(saved) == 3
    for fig in saved:
        ax = fig.axes[0]
        assert "restraint-release-kjmol" in ax.get_title() and "seed 4" in ax.get_title()
        assert "kcal/mol" in ax.get_xlabel() + ax.get_ylabel() and "kJ/mol" not in ax.get_xlabel() + ax.get_ylabel()
        assert not any(t.get_gid() == plots.CAUTION_ID for t in fig.texts)   # caution off by default
    along = [fig.axes[0] for fig in saved if fig.axes[0].get_title().startswith("Work along λ")][0]
    assert [c for c in along.collections if isinstance(c, PolyCollection)], "no standard-error band"
    _check_work_per_step(json.loads(saved_json.read_text()))


def test_cli_help_names_the_work_along_lambda(capsys):
    with pytest.raises(SystemExit):
        main(["run", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "work along λ" in text and "dissipation" not in text
