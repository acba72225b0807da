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
                chosen: np.ndarray | None = None, numbers: np.ndarray | None = None,
                n_labels: int = 12) -> Axes:
    """First two objectives of every complete trial, Pareto-front trials highlighted and
    labelled with their trial numbers (at most ``n_labels``, spread along the front), so that
    a member can be exported with ``optgrade export --trial N``."""
    values = np.asarray(values, dtype=float)
    is_front = np.asarray(is_front, dtype=bool)
    ax.plot(values[~is_front, 0], values[~is_front, 1], ".", color="#999999", ms=3,
            label="trial")
    order = np.argsort(values[is_front][:, 0])
    front = values[is_front][order]
    ax.plot(front[:, 0], front[:, 1], "o-", color="#0072B2", ms=4, label="Pareto front")
    if numbers is not None and front.size:
        nums = np.asarray(numbers)[is_front][order]
        pick = np.unique(np.linspace(0, nums.size - 1, min(n_labels, nums.size)).round()
                         .astype(int))
        for i in pick:
            ax.annotate(f"#{nums[i]}", front[i], textcoords="offset points", xytext=(4, 4),
                        fontsize=6.5, color="#0072B2")
    if chosen is not None:
        ax.plot([chosen[0]], [chosen[1]], "o", mfc="none", mec="k", ms=9, label="exported")
    ax.set_xlabel(names[0])
    ax.set_ylabel(names[1])
    ax.set_title("Pareto front")
    ax.legend(fontsize=7)
    return ax


def plot_plan(ax: Axes, x: np.ndarray, diameter: np.ndarray, row_pitch: float, *,
              n_rows: int = 3, scale: float = 1e3, unit: str = "mm") -> Axes:
    """Plan view of the whole row: the footprints of every resonator in ``n_rows`` rows (pitch
    ``row_pitch`` across the row). Drawn to scale when the rows fill the panel that way;
    otherwise the across-row direction is stretched to fill it (said in the title) and the
    footprints are markers."""
    x = np.asarray(x, dtype=float) * scale
    n_all = x.size
    d = np.broadcast_to(np.asarray(diameter, dtype=float), (n_all,)) * scale
    pitch = row_pitch * scale
    span = float(x[-1] - x[0] + d.max())
    across = float((n_rows - 1) * pitch + d.max())
    # the panel is about 3 : 2; to scale the rows would fill across / span of its height
    stretch = (0.5 * span) / max(across, 1e-30)
    ys = np.arange(n_rows) * pitch
    if stretch <= 1.5:
        for y in ys:
            for xi, di in zip(x, d, strict=True):
                ax.add_patch(Circle((xi, y), di / 2, fc="#56B4E9", ec="k", lw=0.3))
        ax.set_aspect("equal", adjustable="datalim")
        ax.autoscale_view()
        note = "to scale"
    else:
        xx, yy = np.meshgrid(x, ys)
        ax.scatter(xx.ravel(), yy.ravel(), s=max(2.0, min(30.0, 3000.0 / n_all)),
                   fc="#56B4E9", ec="k", lw=0.3)
        pad = 0.6 * pitch
        ax.set_ylim(ys[0] - pad, ys[-1] + pad)
        ax.set_xlim(x[0] - 0.03 * span, x[-1] + 0.03 * span)
        note = f"y stretched {stretch:.0f}x"
    ax.set_xlabel(f"x along the row ({unit}), wave enters at x = 0")
    ax.set_ylabel(f"y ({unit})")
    ax.set_title(f"plan: all {n_all} resonators, {n_rows} rows at pitch {pitch:.3g} {unit} "
                 f"({note})", fontsize=9)
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
