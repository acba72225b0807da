"""Search figures drawn into given matplotlib Axes: optimisation history, Pareto front, plan view.

Used by the export's figure sheet next to the trace figures of :mod:`optgrade.plotting.trace`.
"""

from __future__ import annotations

import numpy as np
from matplotlib.axes import Axes
from matplotlib.patches import Circle

__all__ = ["plot_history", "plot_pareto", "plot_plan"]


def plot_history(ax: Axes, numbers: np.ndarray, scores: np.ndarray, *,
                 chosen: int | None = None) -> Axes:
    """Weighted score of every finished trial and the best so far, against trial number."""
    numbers = np.asarray(numbers, dtype=float)
    scores = np.asarray(scores, dtype=float)
    order = np.argsort(numbers)
    numbers, scores = numbers[order], scores[order]
    ok = np.isfinite(scores)
    ax.plot(numbers[ok], scores[ok], ".", ms=3, color="#999999", label="trial")
    if ok.any():
        best = np.maximum.accumulate(np.where(ok, scores, -np.inf))
        ax.step(numbers, np.where(np.isfinite(best), best, np.nan), where="post",
                color="#D55E00", label="best so far")
    if chosen is not None and np.any(numbers == chosen):
        ax.plot([chosen], scores[numbers == chosen], "o", mfc="none", mec="k", ms=8,
                label=f"exported #{chosen}")
    ax.set_xlabel("trial")
    ax.set_ylabel("weighted score (larger is better)")
    ax.set_title("optimisation history")
    ax.legend(fontsize=7, loc="lower right")
    return ax


def plot_pareto(ax: Axes, values: np.ndarray, is_front: np.ndarray, names: list[str], *,
                chosen: np.ndarray | None = None) -> Axes:
    """First two objectives of every complete trial, Pareto-front trials highlighted."""
    values = np.asarray(values, dtype=float)
    is_front = np.asarray(is_front, dtype=bool)
    ax.plot(values[~is_front, 0], values[~is_front, 1], ".", color="#999999", ms=3,
            label="trial")
    front = values[is_front]
    front = front[np.argsort(front[:, 0])]
    ax.plot(front[:, 0], front[:, 1], "o-", color="#0072B2", ms=4, label="Pareto front")
    if chosen is not None:
        ax.plot([chosen[0]], [chosen[1]], "o", mfc="none", mec="k", ms=9, label="exported")
    ax.set_xlabel(names[0])
    ax.set_ylabel(names[1])
    ax.set_title("Pareto front")
    ax.legend(fontsize=7)
    return ax


def plot_plan(ax: Axes, x: np.ndarray, diameter: np.ndarray, row_pitch: float, *,
              n_rows: int = 3, n_show: int = 12, scale: float = 1e3, unit: str = "mm") -> Axes:
    """Plan view: rod footprints of the first ``n_show`` resonators of a few rows (pitch
    ``row_pitch`` across the row), drawn to scale."""
    n_all = np.asarray(x).size
    x = np.asarray(x, dtype=float)[:n_show] * scale
    d = np.broadcast_to(np.asarray(diameter, dtype=float), (n_all,))[:n_show] * scale
    for r in range(n_rows):
        y = r * row_pitch * scale
        for xi, di in zip(x, d, strict=True):
            ax.add_patch(Circle((xi, y), di / 2, fc="#56B4E9", ec="k", lw=0.3))
    ax.set_aspect("equal", adjustable="datalim")
    ax.autoscale_view()
    ax.set_xlabel(f"x along the row ({unit}), wave enters at x = 0")
    ax.set_ylabel(f"y ({unit})")
    shown = f"first {x.size} of {n_all} resonators" if x.size < n_all else f"{n_all} resonators"
    ax.set_title(f"plan: {shown}, {n_rows} rows at pitch {row_pitch * scale:.3g} {unit}",
                 fontsize=9)
    return ax


def figure_size(n_panels: int) -> tuple[float, float]:
    """Sheet size (inches) for a 2-column grid of ``n_panels`` panels."""
    rows = int(np.ceil(n_panels / 2))
    return 13.0, 3.6 * rows


def describe(ax: Axes, lines: list[str]) -> None:
    """A text panel (no axes)."""
    ax.axis("off")
    ax.text(0.0, 1.0, "\n".join(lines), va="top", ha="left", family="monospace", fontsize=7.5,
            transform=ax.transAxes)
