"""Plots are written as valid PNG files (from arrays, a Result, and a batch table)."""
import numpy as np
import pytest

from fe_tool import plots

PNG = b"\x89PNG\r\n\x1a\n"


def _is_png(path):
    with open(path, "rb") as fh:
        data = fh.read()
    return data[:8] == PNG and len(data) > 1000


@pytest.fixture
def works():
    g = np.random.default_rng(3)
    return g.normal(2.5, 1.0, 300), g.normal(-1.5, 1.0, 300)   # Gaussian works, ΔF = 0.5 kT


def test_array_plots(tmp_path, works):
    wf, wr = works
    assert _is_png(plots.plot_work_distributions(wf, tmp_path / "w.png", work_reverse=wr))
    assert _is_png(plots.plot_convergence(wf, tmp_path / "c.png", work_reverse=wr, reference=0.5))
    lams = np.linspace(0, 1, 21)
    assert _is_png(plots.plot_dissipation(lams, tmp_path / "d.png", work_per_step=np.sin(np.pi * lams[1:]) / 10))
    history = [{"step": i, "loss": 1 / (i + 1), "validation_spread": 1.5 - i / 40} for i in range(30)]
    assert _is_png(plots.plot_training(history, tmp_path / "t.png"))
    k = 5
    overlap = np.exp(-np.abs(np.subtract.outer(np.arange(k), np.arange(k))))
    assert _is_png(plots.plot_overlap_matrix(overlap / overlap.sum(1, keepdims=True), tmp_path / "o.png"))
    rows = [{"name": f"p{i}", "delta_f": 0.3 * i, "stderr": 0.05, "units": "kT", "status": "ok", "flagged": i == 2}
            for i in range(6)] + [{"name": "bad", "status": "failed", "delta_f": None, "stderr": None}]
    assert _is_png(plots.plot_batch_summary(rows, tmp_path / "b.png", reference={"p1": 0.3}))


def test_draw_into_axes(works):
    import matplotlib.pyplot as plt

    fig, (a, b) = plt.subplots(1, 2)
    assert plots.plot_work_distributions(works[0], a, work_reverse=works[1]) is a
    assert plots.plot_convergence(works[0], b, work_reverse=works[1]) is b
    plt.close(fig)


def test_bad_input_names_the_problem(tmp_path):
    with pytest.raises(ValueError, match="square"):
        plots.plot_overlap_matrix(np.ones((2, 3)), tmp_path / "x.png")
    with pytest.raises(ValueError, match="K\\+1"):
        plots.plot_dissipation(np.linspace(0, 1, 5), tmp_path / "x.png", work_per_step=np.ones(5))


def test_plot_result(tmp_path):
    import jax.numpy as jnp

    import fe_tool

    r = fe_tool.estimate(lambda x: 0.5 * jnp.sum(x ** 2), lambda x: 1.5 * jnp.sum((x - 0.3) ** 2),
                         jnp.zeros(2), jnp.zeros(2) + 0.3, switching_steps=20, trajectories=64, step_scale=0.5,
                         chains=8, progress=False)
    written = plots.plot_result(r, tmp_path / "figs")
    assert len(written) == 3 and all(_is_png(p) for p in written)
