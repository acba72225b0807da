"""Figures of a traced layout, each drawn into a given matplotlib Axes.

Used by ``optgrade trace`` and reusable by the search's figure sheet:

- :func:`plot_elevation`: the row seen from the side (rods, head masses);
- :func:`plot_local_dispersion`: local slowness K'/kR of each cell over frequency and position,
  local gaps shaded, local rod resonance and Rayleigh zone-edge lines;
- :func:`plot_channel_map`: where (position) each frequency's power leaves, coloured by channel,
  marker area by fraction;
- :func:`plot_fractions`: stacked channel fractions against frequency;
- :func:`plot_far_face`: where the converted waves reach a block's far face, per frequency.

Frequency and length units are picked for readability (Hz/kHz/MHz, mm/m); plots that share an
axis use the same picks.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import matplotlib
import numpy as np
from matplotlib import patheffects
from matplotlib.axes import Axes
from matplotlib.colors import ListedColormap
from matplotlib.patches import Patch, Rectangle

from optgrade.channels import CHANNELS

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.dispersion import LocalModes
    from optgrade.layout import Layout
    from optgrade.propagation import Trace

__all__ = [
    "CHANNEL_COLOURS",
    "CHANNEL_LABELS",
    "frequency_unit",
    "length_unit",
    "plot_channel_map",
    "plot_elevation",
    "plot_far_face",
    "plot_fractions",
    "plot_local_dispersion",
]

#: One colour per channel (colour-blind-friendly palette of eight, common practice).
CHANNEL_COLOURS: dict[str, str] = {
    "transmitted_surface": "#999999",
    "reflected_surface": "#000000",
    "forward_shear": "#56B4E9",
    "forward_compressional": "#009E73",
    "backward_shear": "#D55E00",
    "backward_compressional": "#E69F00",
    "absorbed": "#CC79A7",
}

CHANNEL_LABELS: dict[str, str] = {
    "transmitted_surface": "transmitted (surface)",
    "reflected_surface": "reflected (surface)",
    "forward_shear": "forward shear",
    "forward_compressional": "forward compressional",
    "backward_shear": "backward shear",
    "backward_compressional": "backward compressional",
    "absorbed": "absorbed",
}


def frequency_unit(freq_max: float) -> tuple[float, str]:
    """(scale, name) so that ``f / scale`` reads well for frequencies up to ``freq_max`` (Hz)."""
    for scale, name in ((1e6, "MHz"), (1e3, "kHz")):
        if freq_max >= 2 * scale:
            return scale, name
    return 1.0, "Hz"


def length_unit(length_max: float) -> tuple[float, str]:
    """(scale, name) so that ``x / scale`` reads well for lengths up to ``length_max`` (m)."""
    return (1.0, "m") if length_max >= 2.0 else (1e-3, "mm")


def plot_elevation(ax: Axes, layout: Layout, *, title: str | None = None) -> Axes:
    """Side view of the row: each rod as a bar of its diameter and height, head masses on top.

    Head masses are drawn as discs whose area is proportional to the mass (largest = 1.6 rod
    diameters wide). Horizontal and vertical scales differ when the row is long.
    """
    s, unit = length_unit(max(layout.length, float(layout.height.max())))
    x, h, d = layout.x / s, layout.height / s, layout.diameter / s
    for xi, hi, di in zip(x, h, d, strict=True):
        # a 0.8-point outline keeps rods much thinner than a pixel visible on long rows
        ax.add_patch(Rectangle((xi - di / 2, 0.0), di, hi, facecolor="#4d6a8a",
                               edgecolor="#4d6a8a", linewidth=0.8))
    if np.any(layout.head_mass > 0):
        m = layout.head_mass / layout.head_mass.max()
        ax.scatter(x, h, s=12 + 60 * m, c="#b3452c", zorder=3, label="head mass (area ~ kg)")
        ax.legend(loc="upper right", fontsize=8, frameon=False)
    span = layout.length / s
    ax.axhline(0.0, color="#6b5b45", lw=2)
    ax.fill_between([-0.05 * span, 1.05 * span], 0, -0.04 * h.max(), color="#d9cbb3", lw=0)
    ax.set_xlim(-0.05 * span, 1.05 * span)
    ax.set_ylim(-0.04 * h.max(), 1.18 * h.max())
    ax.set_xlabel(f"position along the row x ({unit}), wave enters at x = 0")
    ax.set_ylabel(f"height ({unit})")
    ax.set_title(title or f"layout: {layout.n_resonators} resonators, length {span:.4g} {unit}")
    return ax


def plot_local_dispersion(
    ax: Axes,
    layout: Layout,
    modes: LocalModes,
    freq: np.ndarray,
    *,
    cr: float,
    rod_resonance: np.ndarray | None = None,
    trace: Trace | None = None,
    vmax: float = 3.0,
) -> Axes:
    """Local dispersion along the row: slowness K'/kR per cell and frequency.

    Parameters
    ----------
    ax : Axes
    layout : Layout
    modes : LocalModes
        Local modes of the layout's cells at ``freq`` (``k`` of shape (2, n_cells, n_freq)).
    freq : ndarray
        Frequencies (Hz).
    cr : float
        Rayleigh speed of the bare substrate (m/s).
    rod_resonance : ndarray, optional
        First resonance of each cell's rod (Hz), drawn as a line.
    trace : Trace, optional
        If given, the turning points are marked.
    vmax : float
        Largest upper end of the colour scale of K'/kR (the scale follows the data below it).

    The lower branch is shown where it exists, the upper one elsewhere; cells where neither
    exists (local gap) are shaded grey; dotted hatching marks where the local mode loses more
    than K'' a = 1e-3 per cell to bulk radiation (material damping excluded). The zone-edge
    line is the frequency cR / (2 a) at which a wave at the Rayleigh speed reaches K = pi / a
    in that cell.
    """
    fs, funit = frequency_unit(float(np.max(freq)))
    s, unit = length_unit(layout.length)
    k = np.asarray(modes.k)
    kr = 2 * np.pi * np.asarray(freq) / cr
    k_show = np.where(np.isfinite(k[0]), k[0], k[1])
    slowness = k_show.real / kr[None, :]
    edges_x = np.append(layout.x, layout.length) / s
    f = np.asarray(freq) / fs
    edges_f = np.concatenate(([f[0] - (f[1] - f[0]) / 2 if f.size > 1 else f[0] * 0.99],
                              (f[1:] + f[:-1]) / 2,
                              [f[-1] + (f[-1] - f[-2]) / 2 if f.size > 1 else f[0] * 1.01]))
    finite = slowness[np.isfinite(slowness)]
    top = min(vmax, max(1.2, float(np.percentile(finite, 99)))) if finite.size else vmax
    bottom = max(0.0, min(0.9, float(np.percentile(finite, 1)))) if finite.size else 0.0
    mesh = ax.pcolormesh(edges_x, edges_f, np.ma.masked_invalid(slowness.T), cmap="viridis",
                         vmin=bottom, vmax=top, shading="flat", rasterized=True)
    # where the local mode radiates into the bulk: radiated decay over one cell > 1e-3
    shares = np.asarray(modes.shares)
    rad_share = np.where(np.isfinite(k[0]), shares[0, :4].sum(axis=0), shares[1, :4].sum(axis=0))
    rad_a = np.abs(k_show.imag) * rad_share * layout.spacing[:, None]
    is_leaky = np.isfinite(rad_a) & (rad_a > 1e-3)
    if is_leaky.any() and (~is_leaky).any():
        # outline plus a sparse hatch: the colours underneath stay readable
        xs = np.concatenate(([edges_x[0]], layout.cell_centre / s, [edges_x[-1]]))
        grid = np.concatenate((is_leaky[:1], is_leaky, is_leaky[-1:])).T.astype(float)
        with matplotlib.rc_context({"hatch.color": "#ffffff", "hatch.linewidth": 0.6}):
            ax.contourf(xs, f, grid, levels=[0.5, 1.5], colors="none", hatches=["/"])
        ax.contour(xs, f, grid, levels=[0.5], colors="#ffffff", linewidths=1.0)
    is_gap = ~np.isfinite(k[0]) & ~np.isfinite(k[1])
    ax.pcolormesh(edges_x, edges_f, np.ma.masked_where(~is_gap.T, np.ones(is_gap.T.shape)),
                  cmap=ListedColormap(["#c8c8c8"]), shading="flat", rasterized=True)
    cb = ax.figure.colorbar(mesh, ax=ax, pad=0.01)
    cb.set_label("local slowness K'/kR (1 = Rayleigh speed)")
    xc = layout.cell_centre / s
    handles = [Patch(color="#c8c8c8", label="local gap (no root)"),
               Patch(facecolor="#5a7d9a", edgecolor="#ffffff", hatch="/",
                     label="radiating: K'' a > 1e-3 per cell into bulk waves (outlined)")]
    if rod_resonance is not None:
        (line,) = ax.plot(xc, np.asarray(rod_resonance) / fs, color="#d62828", ls="--",
                          lw=1.6, label="rod resonance")
        handles.append(line)
    f_edge = cr / (2 * layout.spacing) / fs
    if np.any(f_edge <= edges_f[-1]):
        (edge,) = ax.plot(xc, f_edge, color="#ff9f1c", lw=1.6, ls="-.",
                          label="zone edge cR/(2a)")
        handles.append(edge)
    else:
        ax.text(0.01, 0.02, f"zone edge cR/(2a) above the band (>= {f_edge.min():.3g} {funit})",
                transform=ax.transAxes, fontsize=8, color="w")
    if trace is not None:
        tp = trace.turning_position
        ok = np.isfinite(tp) & (trace.branch >= 0)
        if ok.any():
            (pts,) = ax.plot(tp[ok] / s, trace.frequency[ok] / fs, "o", ms=2.5, color="#ffffff",
                             mec="#222222", mew=0.4,
                             label="turning point")
            handles.append(pts)
    ax.set_xlim(edges_x[0], edges_x[-1])
    ax.set_ylim(edges_f[0], edges_f[-1])
    ax.set_xlabel(f"position along the row x ({unit})")
    ax.set_ylabel(f"frequency ({funit})")
    ax.set_title("local dispersion along the row")
    # below the axes: a legend inside would hide the data it explains
    ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.11), ncol=3,
              fontsize=8, frameon=False)
    return ax


def plot_channel_map(ax: Axes, trace: Trace, layout: Layout | None = None, *,
                     shares: np.ndarray | None = None) -> Axes:
    """Frequency against the position where power leaves, coloured by channel, sized by fraction.

    Without ``shares``: radiating channels and ``absorbed`` sit at their power-weighted
    position, the reflected surface wave at its weighted position (turning point or entry),
    the transmitted one at the far end; marker area proportional to the fraction (90 pt^2 =
    100 %). With ``shares`` (shape (6, n_freq, n_resonators), each resonator's share of
    ``CHANNELS[1:]``, from `PropagationModel.trace_detail`): one marker per resonator and
    frequency for each bulk channel and ``absorbed``, at the resonator, area proportional to
    its share (the largest share drawn = 40 pt^2); surface channels as above.
    """
    if shares is not None and layout is None:
        raise ValueError("plot_channel_map: shares need the layout (resonator positions)")
    fs, funit = frequency_unit(float(np.max(trace.frequency)))
    far = layout.length if layout is not None else np.nanmax(
        [np.nanmax(np.append(p, 0.0)) for p in trace.position.values()])
    s, unit = length_unit(float(far))
    f = trace.frequency / fs
    per_resonator = CHANNELS[2:] if shares is not None else ()
    for c in CHANNELS:
        if c in per_resonator:
            continue
        frac = trace.fractions[c]
        pos = trace.position[c]
        show = (frac > 0.005) & np.isfinite(pos)
        if not show.any():
            continue
        ax.scatter(pos[show] / s, f[show], s=90 * frac[show], color=CHANNEL_COLOURS[c],
                   alpha=0.75, edgecolors="none", label=CHANNEL_LABELS[c])
    if shares is not None:
        _draw_resonator_shares(ax, np.asarray(shares, float), layout, f, s)
    if layout is not None:
        ax.axvspan(0, layout.length / s, color="#eef2f6", zorder=0, lw=0)
        ax.set_xlim(-0.05 * layout.length / s, 1.08 * layout.length / s)
    ax.set_ylim(f.min(), f.max())
    ax.set_xlabel(f"position where the power leaves x ({unit}); row shaded")
    ax.set_ylabel(f"frequency ({funit})")
    ax.set_title("channel map (marker area ~ fraction)" if shares is None else
                 "channel map: each resonator's share (marker area ~ share)")
    if not ax.collections:
        ax.text(0.5, 0.5, "no channel takes more than 0.5 % at a known position",
                transform=ax.transAxes, ha="center", va="center", fontsize=9, color="0.3")
        return ax
    leg = ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False,
                    markerscale=1.0)
    for h in leg.legend_handles:
        h.set_sizes([40])
    return ax


def _draw_resonator_shares(ax: Axes, shares: np.ndarray, layout: Layout, f: np.ndarray,
                           s: float) -> None:
    """One marker per resonator and frequency for the bulk channels and ``absorbed``."""
    bulk = shares[1:]  # CHANNELS[2:]: four bulk channels and absorbed
    top = float(np.max(bulk)) if bulk.size else 0.0
    if top <= 0:
        return
    xx, ff = np.meshgrid(np.asarray(layout.x, float) / s, f)
    for c, share in zip(CHANNELS[2:], bulk, strict=True):
        show = share > 2e-3 * top
        if not show.any():
            continue
        ax.scatter(xx[show], ff[show], s=40 * share[show] / top, color=CHANNEL_COLOURS[c],
                   alpha=0.6, edgecolors="none", label=CHANNEL_LABELS[c], rasterized=True)


#: How the figures name the propagation models (any other registered model: its name).
MODEL_LABELS = {"scattering": "exact row model", "wkb": "WKB march"}


def _model_label(name: str) -> str:
    return MODEL_LABELS.get(name, f"{name!r} model")


def plot_fractions(ax: Axes, trace: Trace, *, goal_channel: str | None = None,
                   compare: Trace | None = None, required: float | None = None,
                   spread: tuple | None = None, reachable: np.ndarray | None = None) -> Axes:
    """Stacked channel fractions against frequency.

    Frequencies where the WKB march is outside its validity (eps > 0.1) are hatched when the
    trace is the march's own. ``compare`` (another model's trace of the same layout, e.g. the
    WKB march beside the exact model) is overlaid as dashed lines at its stack boundaries, so
    each band between two dashed lines is that model's share of the same channel.
    ``required`` (the goal's required fraction) is drawn as a horizontal line. Above the stack,
    two strips mark the frequencies where the WKB picture is outside its validity (eps > 0.1)
    and, with ``compare``, where the two models differ by more than 0.1 on some channel.
    ``spread`` (low, high: the wanted fraction's 10 and 90 % quantiles over the robustness
    goal's machining-error draws) is drawn as a band about the goal line. ``reachable`` (bool
    per frequency, `optgrade.reach`) is a green strip under the axis where some admissible cell
    could deliver the required fraction at all.
    """
    fs, funit = frequency_unit(float(np.max(trace.frequency)))
    f = trace.frequency / fs
    ys = [trace.fractions[c] for c in CHANNELS]
    ax.stackplot(f, ys, colors=[CHANNEL_COLOURS[c] for c in CHANNELS],
                 labels=[CHANNEL_LABELS[c] for c in CHANNELS], alpha=0.9, lw=0)
    halo = [patheffects.withStroke(linewidth=3.2, foreground="#ffffff")]
    if reachable is not None and len(reachable) == f.size:
        width_r = float(np.median(np.diff(f))) if f.size > 1 else 0.01 * float(f[0])
        ok = np.asarray(reachable, bool)
        if ok.any():
            ax.bar(f[ok], 0.025, bottom=-0.04, width=width_r, color="#2a9d8f", lw=0,
                   label="reachable by some admissible cell (estimate)")
    if spread is not None and len(spread[0]) == f.size:
        widest = float(np.max(np.asarray(spread[1]) - np.asarray(spread[0])))
        ax.fill_between(f, spread[0], spread[1], facecolor="#ffffff", alpha=0.55,
                        edgecolor="k", lw=0.5, hatch="////", zorder=3,
                        label=f"height tolerance, 10-90 % of draws (widest {widest:.2f})")
    if goal_channel in trace.fractions:
        ax.plot(f, trace.fractions[goal_channel], color="k", lw=1.4, path_effects=halo,
                label=f"goal: {CHANNEL_LABELS[goal_channel]}", zorder=4)
    if required is not None:
        ax.axhline(required, color="#c1121f", lw=1.3, ls=(0, (6, 3)), path_effects=halo,
                   label=f"required fraction {required:.0%}")
    if compare is not None:
        edges = np.cumsum([compare.fractions[c] for c in CHANNELS], axis=0)[:-1]
        for i, edge in enumerate(edges):
            ax.plot(f, edge, color="k", lw=0.8, ls="--", alpha=0.7,
                    label=f"{_model_label(compare.propagation)}: same stack" if i == 0
                    else None)
    validity = trace if compare is None else compare
    bad = ~np.asarray(validity.is_adiabatic, bool)
    # one bar per flagged frequency (a fill with where= drops isolated points)
    width = float(np.median(np.diff(f))) if f.size > 1 else 0.01 * float(f[0])
    if bad.any():
        ax.bar(f[bad], 0.03, bottom=1.012, width=width, color="#7b2cbf", lw=0,
               label="eps > 0.1 (outside WKB validity)")
    if compare is not None:
        off = np.max([np.abs(np.asarray(trace.fractions[c]) - np.asarray(compare.fractions[c]))
                      for c in CHANNELS], axis=0) > 0.1
        if off.any():
            ax.bar(f[off], 0.03, bottom=1.05, width=width, color="#e85d04", lw=0,
                   label=f"{_model_label(compare.propagation)} off by > 0.1 on some channel")
    ax.set_xlim(f.min(), f.max())
    ax.set_ylim(-0.045 if reachable is not None else 0.0, 1.09)
    ax.set_yticks(np.linspace(0, 1, 6))
    ax.set_xlabel(f"frequency ({funit})")
    ax.set_ylabel("fraction of incident power")
    ax.set_title(f"where the power goes: {_model_label(trace.propagation)}")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)
    return ax


def plot_far_face(ax: Axes, trace: Trace, *, zone: tuple[float, float] | None = None,
                  mode: str | None = None, title: str | None = None) -> Axes:
    """Where the converted waves reach a block's far face: frequency against far-face position.

    Grey background: the flux of the whole bulk field per unit length of the face, scaled to its
    largest value at each frequency (a map from the exact model; absent for a ray estimate).
    Coloured per channel (channels carrying at least 1 % of the incident power in the band mean):
    the power-weighted arrival position with a band of +- one width, line width by fraction; dashed:
    the ray estimate position + H tan(angle). The zone of ``[goal.far_face]`` is shaded (green for a
    target, red for an avoided zone).
    """
    from optgrade.channels import RADIATING

    face = trace.far_face
    f = np.asarray(face.frequency, float)
    fs, funit = frequency_unit(float(f.max()))
    x_all = [face.x] if face.x is not None else []
    x_all += [np.asarray(face.arrival[c], float) for c in RADIATING]
    finite = np.concatenate([np.ravel(v)[np.isfinite(np.ravel(v))] for v in x_all] or [[0.0]])
    ls, lunit = length_unit(float(np.max(np.abs(finite))) if finite.size else 1.0)
    if face.flux_total is not None and face.x is not None:
        tot = face.flux_total
        peak = np.max(np.abs(tot), axis=1, keepdims=True)
        img = np.where(peak > 0, np.clip(tot, 0, None) / np.where(peak > 0, peak, 1.0), 0.0)
        ax.pcolormesh(face.x / ls, f / fs, img, cmap="Greys", vmin=0, vmax=1.6,
                      shading="nearest", rasterized=True)
    if zone is not None:
        colour = "#2ca02c" if mode == "target" else "#d62728"
        ax.axvspan(zone[0] / ls, zone[1] / ls, color=colour, alpha=0.15, lw=0,
                   label=f"zone ({mode})")
    for c in RADIATING:
        frac = np.asarray(trace.fractions[c], float)
        if float(np.mean(frac)) < 0.01:
            continue
        arr = np.asarray(face.arrival[c], float)
        col = CHANNEL_COLOURS[c]
        lw = 0.8 + 3.0 * min(1.0, float(np.mean(frac)) / 0.5)
        ax.plot(arr / ls, f / fs, color=col, lw=lw, label=CHANNEL_LABELS[c])
        wid = np.asarray(face.width[c], float)
        if np.isfinite(wid).any():
            ax.fill_betweenx(f / fs, (arr - wid) / ls, (arr + wid) / ls, color=col, alpha=0.15,
                             lw=0)
        if face.method == "map":
            ax.plot(np.asarray(face.ray_arrival[c], float) / ls, f / fs, color=col, lw=1.0,
                    ls="--")
    ax.plot([], [], color="k", ls="--", lw=1.0, label="ray estimate x + H tan(angle)")
    ax.set_xlabel(f"far-face position in the row's frame ({lunit})")
    ax.set_ylabel(f"frequency ({funit})")
    ax.set_title(title or f"converted waves at the far face, block {face.depth / ls:.4g} {lunit}"
                 " (first arrival)")
    ax.legend(loc="upper right", fontsize=7, framealpha=0.85)
    return ax
