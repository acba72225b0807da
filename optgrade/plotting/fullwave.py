"""Figures of a full-wave verification (private): comparison, snapshots, animation.

Every function draws into matplotlib objects it is given (or writes one file) and returns
nothing; the caller chooses the backend and saves.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from optgrade.fullwave._solver import CHANNELS

LABELS = {
    "transmitted_surface": "transmitted (surface)",
    "reflected_surface": "reflected (surface)",
    "forward_shear": "forward shear",
    "forward_compressional": "forward compressional",
    "backward_shear": "backward shear",
    "backward_compressional": "backward compressional",
    "absorbed": "absorbed",
}


def _freq_unit(f_max: float) -> tuple[float, str]:
    return (1e3, "kHz") if f_max >= 2e3 else (1.0, "Hz")


def _len_unit(span: float) -> tuple[float, str]:
    return (1e3, "mm") if span < 3.0 else (1.0, "m")


def _time_label(t: float) -> str:
    return f"{1e6 * t:.1f} us" if t < 0.01 else f"{1e3 * t:.1f} ms"


def plot_comparison(fig: Any, ver: Any, lattice: Any = None) -> None:
    """Channel fractions against frequency: full-wave (solid), the exact row model of the same
    2-D line layout (dashed), the WKB trace of the surrogate's line model (dash-dot) and, when
    given, the exact model's 3-D lattice prediction (dotted); each panel's title carries the
    band-mean |full-wave - exact| and |full-wave - WKB|. Last panel: energy balance and
    direct-flux closure of the full-wave run."""
    axes = fig.subplots(2, 4, sharex=True)
    scale, unit = _freq_unit(float(np.max(ver.frequency)))
    f_khz = ver.frequency / scale
    models = ((getattr(ver, "exact", None), "--", "C1", "exact row model, line"),
              (ver.surrogate, "-.", "C3", "WKB trace, line"),
              (lattice, ":", "C2", "exact row model, 3-D lattice"))
    for ax, c in zip(axes.flat, CHANNELS, strict=False):
        ax.plot(f_khz, ver.fractions[c], "-", color="C0", lw=1.8, label="full-wave 2-D")
        for tr, style, colour, label in models:
            if tr is not None:
                ax.plot(tr.frequency / scale, tr.fractions[c], style, color=colour, lw=1.2,
                        label=label)
        title = LABELS[c]
        parts = []
        for name, agr in (("exact", ver.agreement), ("WKB", getattr(ver, "agreement_wkb", None))):
            if agr is not None and agr[c]["mean_abs_difference"] is not None:
                parts.append(f"{name} {agr[c]['mean_abs_difference']:.3f}")
        if parts:
            title += "\nmean |diff| " + ", ".join(parts)
        ax.set_title(title, fontsize=9)
        ax.set_ylim(-0.02, 1.02)
        ax.grid(alpha=0.3)
    ax = axes.flat[-1]
    ax.plot(f_khz, 100 * ver.balance_error, "-", color="k", label="box energy balance")
    ax.plot(f_khz, 100 * (ver.closure - 1.0), "-", color="0.6", label="direct-flux closure - 1")
    bound = 100 * float(ver.info.get("checks", {}).get("bounds", {}).get("balance", 0.02))
    ax.axhline(bound, color="r", lw=0.8, ls=":", label=f"balance bound +-{bound:g} %")
    ax.axhline(-bound, color="r", lw=0.8, ls=":")
    lim = 10 * bound  # a failed run's huge values would flatten the panel
    ax.set_ylim(max(-lim, ax.get_ylim()[0]), min(lim, ax.get_ylim()[1]))
    title = "energy check (% of incident)"
    if getattr(ver, "status", "ok") != "ok":
        title += "\nFAILED: outside its bounds"
    ax.set_title(title, fontsize=9)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="best")
    axes.flat[0].legend(fontsize=7, loc="best")
    for ax in axes[1]:
        ax.set_xlabel(f"frequency ({unit})")
    for ax in axes[:, 0]:
        ax.set_ylabel("fraction of incident power")


def _extent(grid: Any) -> list[float]:
    """Image extent in mm (m for site-scale grids), x from the first resonator, depth down."""
    u = _len_unit(grid.nx * grid.h)[0]
    x0 = -grid.x_array
    return [u * x0, u * (x0 + (grid.nx - 1) * grid.h), u * (grid.nz - 1) * grid.h, 0.0]


def _draw_frame(ax: Any, field: np.ndarray, grid: Any, rods: Any, vmax: float) -> Any:
    im = ax.imshow(field.T, extent=_extent(grid), cmap="RdBu_r", vmin=-vmax, vmax=vmax,
                   aspect="equal", interpolation="nearest")
    u = _len_unit(grid.nx * grid.h)[0]
    if rods is not None:
        xs = u * rods.x
        ax.vlines(xs, -u * rods.height, 0.0, color="k", lw=0.8)
    p = grid.n_pml * grid.h * u
    ext = _extent(grid)
    ax.axvspan(ext[0], ext[0] + p, color="0.85", alpha=0.6, lw=0)
    ax.axvspan(ext[1] - p, ext[1], color="0.85", alpha=0.6, lw=0)
    if getattr(grid, "free_bottom", False):  # a block: the far face is free (drawn as a line)
        ax.axhline(ext[2], color="k", lw=1.2)
    else:
        ax.axhspan(ext[2] - p, ext[2], color="0.85", alpha=0.6, lw=0)
    xl = u * (grid.i_left * grid.h - grid.x_array)
    xr = u * (grid.i_right * grid.h - grid.x_array)
    zb = u * grid.j_bottom * grid.h
    ax.plot([xl, xl, xr, xr], [0, zb, zb, 0], color="0.3", lw=0.7, ls="--")
    xs = u * (grid.i_source * grid.h - grid.x_array)
    ax.plot([xs], [0], marker="v", color="g", ms=6)
    top = -u * float(np.max(rods.height)) * 1.15 if rods is not None else -1.0
    ax.set_ylim(ext[2], top)
    return im


def plot_snapshots(fig: Any, snapshots: np.ndarray, times: np.ndarray, grid: Any,
                   rods: Any = None, n_panels: int = 4) -> None:
    """A few time snapshots of the vertical displacement uz (colour, common scale) with the
    rods drawn to scale above the surface, the receiver box (dashed), the source (green
    triangle) and the absorbing layers (grey)."""
    if len(snapshots) == 0:
        return
    picks = np.linspace(len(snapshots) * 0.12, len(snapshots) * 0.6, n_panels).astype(int)
    vmax = float(np.percentile(np.abs(snapshots[picks]), 99.7)) or 1.0
    axes = fig.subplots(n_panels, 1, sharex=True)
    for ax, k in zip(np.atleast_1d(axes), picks, strict=True):
        im = _draw_frame(ax, snapshots[k], grid, rods, vmax)
        ax.set_title(f"vertical displacement u_z, t = {_time_label(times[k])}", fontsize=9)
        ax.set_ylabel(f"depth ({_len_unit(grid.nx * grid.h)[1]})")
    np.atleast_1d(axes)[-1].set_xlabel(
        f"x from the first resonator ({_len_unit(grid.nx * grid.h)[1]})")
    fig.colorbar(im, ax=axes, shrink=0.6, label="u_z (arbitrary units)")


def plot_far_face_check(fig: Any, check: Any) -> None:
    """The block run's far face against the prediction: three panels of frequency against
    far-face position, each the flux of the whole bulk field scaled to its largest value per
    frequency (predicted by the exact row model; first arrival from the block run's own rod
    forces; measured downgoing flux just above the far face, with the later passes), the
    predicted arrival of each channel carrying at least 5 % drawn over all three."""
    from optgrade.channels import RADIATING
    from optgrade.plotting.trace import CHANNEL_COLOURS, CHANNEL_LABELS, frequency_unit

    f = np.asarray(check.frequency, float)
    fs, funit = frequency_unit(float(f.max()))
    u, lunit = _len_unit(float(np.ptp(check.x)))
    panels = (("predicted (exact row model, half-space, first arrival)",
               check.predicted.flux_total),
              ("first arrival from the block run's rod forces", check.first.flux_total),
              ("measured: all downgoing waves just above the far face", check.measured_total))
    axes = fig.subplots(1, 3, sharey=True)
    for ax, (title, flux) in zip(axes, panels, strict=True):
        peak = np.max(np.abs(flux), axis=1, keepdims=True)
        img = np.where(peak > 0, np.clip(flux, 0, None) / np.where(peak > 0, peak, 1.0), 0.0)
        ax.pcolormesh(u * check.x, f / fs, img, cmap="Greys", vmin=0, vmax=1.3,
                      shading="nearest", rasterized=True)
        for c in RADIATING:
            frac = np.asarray(check.predicted.reaching[c], float)
            if float(np.mean(frac)) < 0.05:
                continue
            ax.plot(u * np.asarray(check.predicted.arrival[c], float), f / fs,
                    color=CHANNEL_COLOURS[c], lw=1.2, label=CHANNEL_LABELS[c] + " (predicted)")
        ax.set_title(title, fontsize=9)
        ax.set_xlabel(f"far-face position in the row's frame ({lunit})")
    axes[0].set_ylabel(f"frequency ({funit})")
    axes[0].legend(loc="upper right", fontsize=7, framealpha=0.85)


def write_animation(path: Any, snapshots: np.ndarray, times: np.ndarray, grid: Any,
                    rods: Any = None, fps: int = 8) -> bool:
    """Write an animated GIF of the uz snapshots (matplotlib's Pillow writer). Returns False
    when no Pillow is available."""
    import matplotlib.pyplot as plt
    from matplotlib import animation

    if not animation.writers.is_available("pillow") or len(snapshots) == 0:
        return False
    vmax = float(np.percentile(np.abs(snapshots), 99.7)) or 1.0
    u = _len_unit(grid.nx * grid.h)[0]
    top = float(np.max(rods.height)) * 1.15 if rods is not None else 1.0 / u
    aspect = (grid.nz * grid.h + top) / (grid.nx * grid.h)
    # a frame as tall as the domain drawn to scale (plus title and axis labels), not a fixed
    # 3.4 in with the picture in a thin band across it
    fig, ax = plt.subplots(figsize=(9, min(8.0, 7.6 * aspect + 1.1)), layout="constrained")
    im = _draw_frame(ax, snapshots[0], grid, rods, vmax)
    fig.colorbar(im, ax=ax, shrink=0.9, label="u_z (arbitrary units)")
    title = ax.set_title("")
    ax.set_xlabel(f"x from the first resonator ({_len_unit(grid.nx * grid.h)[1]})")
    ax.set_ylabel(f"depth ({_len_unit(grid.nx * grid.h)[1]})")

    def update(k: int):
        im.set_data(snapshots[k].T)
        title.set_text(f"u_z, t = {_time_label(times[k])}")
        return im, title

    anim = animation.FuncAnimation(fig, update, frames=len(snapshots), blit=False)
    anim.save(str(path), writer=animation.PillowWriter(fps=fps), dpi=80)
    plt.close(fig)
    return True
