"""Picture of a network of pairs (matplotlib, imported inside the function: importing fe_tool stays fast).

States sit on a circle per group (groups side by side), ordered clockwise by their value from the
top; each state shows its value ± error.  Each pair is an arrow from its first state to its second,
labelled with the measured ΔF ± error.  Pairs the network names as suspects are red and dashed,
other pairs over the residual limit orange, and pairs on no cycle (nothing checks them) grey and dotted.
"""
from __future__ import annotations

import math
import pathlib

import numpy as np

from .network import NetworkReport

__all__ = ["draw_network"]

LABEL_POSITIONS = (0.5, 0.36, 0.64, 0.26, 0.74)   # fractions along an arrow tried for its label, in order


def _layout(report: NetworkReport) -> dict[str, np.ndarray]:
    """Positions: one circle per group, radius growing with its size, groups left to right."""
    positions, x_offset = {}, 0.0
    for group in report.components:
        values = {s: report.nodes.values[report.nodes.index(s)] for s in group}
        order = sorted(group, key=lambda s: values[s])
        radius = 0.0 if len(order) == 1 else max(1.0, len(order) / 4.0)
        for k, state in enumerate(order):
            angle = math.pi / 2 - 2 * math.pi * k / len(order)
            positions[state] = np.array([x_offset + radius + radius * math.cos(angle), radius * math.sin(angle)])
        x_offset += 2 * radius + 1.6
    return positions


def _label_point(start: np.ndarray, end: np.ndarray, placed: list[np.ndarray], spacing: float) -> np.ndarray:
    """The first point along the arrow not crowding a label already placed."""
    for t in LABEL_POSITIONS:
        point = start + t * (end - start)
        if all(np.linalg.norm(point - other) > spacing for other in placed):
            return point
    return start + 0.5 * (end - start)


def _style(report: NetworkReport, check) -> dict:
    if check.name in report.suspects:
        return dict(color="tab:red", linestyle="--", linewidth=2.4)
    if check.flagged:
        return dict(color="tab:orange", linestyle="-", linewidth=2.0)
    if check.z is None:
        return dict(color="0.55", linestyle=":", linewidth=1.3)
    return dict(color="0.25", linestyle="-", linewidth=1.3)


def draw_network(report: NetworkReport, target=None, *, title: str | None = None, caution: bool = False):
    """Draw the network; ``target`` is a PNG path (written, path returned) or an Axes (returned).
    ``caution=True`` prints the caution about simulated free energies under the figure (it is
    always in the text report)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D

    from .results import CAUTION

    positions = _layout(report)
    own = target is None or not hasattr(target, "annotate")
    if own:
        width = max(6.0, 2.2 + 1.6 * sum(max(1.0, len(g) / 4.0) * 2 for g in report.components))
        fig = Figure(figsize=(min(width, 14.0), 6.0))
        FigureCanvasAgg(fig)
        ax = fig.add_subplot()
    else:
        fig, ax = None, target
    placed: list[np.ndarray] = []
    for check in report.edges:
        start, end = positions[check.state_a], positions[check.state_b]
        style = _style(report, check)
        ax.annotate("", xy=end, xytext=start, arrowprops=dict(arrowstyle="-|>", shrinkA=22, shrinkB=22,
                                                              mutation_scale=14, **style))
        point = _label_point(start, end, placed, spacing=0.38)
        placed.append(point)
        ax.text(point[0], point[1], f"{check.measured:+.2f} ± {check.stderr:.2f}", ha="center", va="center",
                fontsize=7.5, color=style["color"], bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="none",
                                                               alpha=0.85))
    units = f" ({report.units})" if report.units else ""
    for state, (x, y) in positions.items():
        i = report.nodes.index(state)
        ax.scatter([x], [y], s=900, color="tab:blue", alpha=0.18, edgecolor="tab:blue", zorder=3)
        ax.text(x, y, f"{state}\n{report.nodes.values[i]:+.2f} ± {report.nodes.stderr[i]:.2f}", ha="center",
                va="center", fontsize=8, zorder=4)
    legend = [Line2D([], [], color="0.25", label="pair ΔF ± error (arrow: first → second state)"),
              Line2D([], [], color="tab:red", linestyle="--", linewidth=2.4, label="suspect: disagrees with the rest"),
              Line2D([], [], color="tab:orange", linewidth=2.0, label="residual over the limit"),
              Line2D([], [], color="0.55", linestyle=":", label="on no cycle (unchecked)")]
    ax.legend(handles=legend, loc="upper center", bbox_to_anchor=(0.5, -0.02), ncol=2, fontsize=7, frameon=False)
    verdict = "FLAGGED" if report.flagged else "consistent"
    p_text = f", χ²/dof = {report.chi_square:.1f}/{report.dof} (p = {report.p_value:.2g})" if report.p_value is not None else ""
    ax.set_title(title or f"state values{units} — {verdict}{p_text}", fontsize=9.5)
    ax.set_aspect("equal")
    ax.margins(0.18)
    ax.axis("off")
    if not own:
        return ax
    if caution:
        fig.text(0.5, 0.005, CAUTION, ha="center", va="bottom", fontsize=6.5, color="0.35", wrap=True)
    fig.tight_layout(rect=(0, 0.04 if caution else 0.0, 1, 1))
    path = pathlib.Path(target if target is not None else "network.png")
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    return path
