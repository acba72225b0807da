"""Band-diagram figure of one cell (used by `optgrade bands`)."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from optgrade._atomic import save_figure
from optgrade.dispersion import Bands

__all__ = ["draw_attenuation", "draw_band_diagram", "plot_bands"]

_COLORS = ("#1f4e9c", "#c0392b")


def _freq_unit(fmax: float) -> tuple[float, str]:
    if fmax >= 1e6:
        return 1e-6, "MHz"
    if fmax >= 1e3:
        return 1e-3, "kHz"
    return 1.0, "Hz"


def plot_bands(bands: Bands, path: str | os.PathLike, title: str | None = None) -> Path:
    """Draw the band diagram and the attenuation of each branch; write a PNG atomically.

    Left (`draw_band_diagram`): frequency against Bloch wavenumber K' (extended zone
    0..2 pi/a), with the shear, compressional and Rayleigh lines, their folded images
    2 pi/a - k, the zone edge pi/a, the rod resonances; bound parts drawn solid, leaky parts as
    dots coloured by K''/K'. Right (`draw_attenuation`): attenuation K'' a (nepers per cell,
    log scale) of the leaky or lossy parts.
    """
    # a bare Figure (no pyplot): the caller's plotting backend is left alone
    from matplotlib.figure import Figure

    fig = Figure(figsize=(11, 7), layout="constrained")
    ax, ax2 = fig.subplots(1, 2, gridspec_kw={"width_ratios": [2.2, 1]})
    sc = draw_band_diagram(ax, bands)
    if sc is not None:
        # at the right of both panels, not over the data
        cb = fig.colorbar(sc, ax=[ax, ax2], location="right", fraction=0.03, pad=0.01,
                          shrink=0.6)
        cb.set_label("leaky: log10(K''/K')")
    draw_attenuation(ax2, bands)
    ax2.set_yticklabels([])
    ax2.set_ylabel("")
    fig.suptitle(title or _default_title(bands), fontsize=11)
    return save_figure(fig, path)


def _default_title(bands: Bands) -> str:
    cell = bands.cell
    from optgrade.units import format_eng as e

    head = f", head mass {cell.head_mass:.4g} kg" if cell.head_mass else ""
    return (
        f"{bands.model} model: rod L = {e(cell.height, 'm')}, d = {e(cell.rod.diameter, 'm')}"
        f"{head}, spacing a = {e(cell.spacing, 'm')}, row pitch b = {e(cell.row_pitch, 'm')}"
    )


def draw_band_diagram(ax, bands: Bands):
    """Draw the band diagram of `plot_bands` (left panel) into ``ax``. Returns the scatter of
    the leaky points (for a colour bar), or None where there are none."""
    cell = bands.cell
    f = bands.freq
    scale, unit = _freq_unit(float(f.max()))
    fs = f * scale
    g = 2 * np.pi / cell.spacing
    _draw_light_lines(ax, bands, fs, unit)
    for lo, hi in bands.gaps:
        ax.axhspan(lo * scale, hi * scale, color="#eeeeee", alpha=0.6, lw=0)
    sc = None
    for br, col in zip(bands.branches, _COLORS, strict=False):
        k = br.k
        # grating-regime roots are stored unfolded (K next to kR); drawn in the extended zone
        kp = np.mod(k.real, g)
        finite = np.isfinite(k)
        ax.plot(np.where(finite & ~br.is_leaky, kp, np.nan), fs, color=col, lw=2.2)
        leaky = finite & br.is_leaky
        if leaky.any():
            ratio = np.clip(k.imag[leaky] / k.real[leaky], 1e-6, 1.0)
            sc = ax.scatter(
                kp[leaky], fs[leaky], c=np.log10(ratio), cmap="viridis_r", vmin=-6, vmax=0,
                s=14, edgecolors=col, linewidths=0.6, zorder=3,
            )
            fo = leaky & br.is_first_order
            if fo.any():
                ax.scatter(kp[fo], fs[fo], marker="x", color="k", s=18, lw=0.8, zorder=4)
    ax.set_xlim(0, g)
    ax.set_ylim(fs.min(), fs.max())
    ax.set_xlabel("Bloch wavenumber K' (rad/m), extended zone")
    ax.set_ylabel(f"frequency ({unit})")
    _band_legend(ax)
    return sc


def _draw_light_lines(ax, bands: Bands, fs, unit) -> None:
    """Shear, compressional and Rayleigh lines with their folded images, the radiating regions
    shaded, the zone edge and the rod resonances in the band."""
    cell = bands.cell
    sub = cell.substrate
    a = cell.spacing
    f = bands.freq
    w = 2 * np.pi * f
    g = 2 * np.pi / a
    scale, _ = _freq_unit(float(f.max()))
    styles = [
        (sub.ct, "shear  $k_T$", "#555555", "-"),
        (sub.cl, "compressional  $k_L$", "#999999", "-"),
        (sub.cr, "Rayleigh  $k_R$", "#2e8b57", "--"),
    ]
    for c, label, col, ls in styles:
        k = w / c
        ax.plot(k, fs, color=col, ls=ls, lw=1.0, label=label)
        ax.plot(g - k, fs, color=col, ls=":", lw=0.8 if c == sub.cr else 1.0)
    # radiating regions: forward (K' < kT) and backward (2 pi/a - K' < kT) shaded
    kt = w / sub.ct
    ax.fill_betweenx(fs, 0, np.minimum(kt, g), color="#f2d7a6", alpha=0.35, lw=0)
    ax.fill_betweenx(fs, np.maximum(g - kt, 0), g, color="#cfe0f3", alpha=0.45, lw=0)
    ax.axvline(np.pi / a, color="k", lw=0.8, ls="-.")
    ax.text(np.pi / a, fs.min(), r" $\pi/a$ (zone edge)", va="bottom", ha="left", fontsize=9)
    for i, fr in enumerate(bands.resonances):
        if f.min() <= fr <= f.max():
            ax.axhline(fr * scale, color="#7b3fa0", lw=0.9, ls="--")
            ax.text(g * 0.01, fr * scale, f"rod resonance {i + 1} ({fr * scale:.4g} {unit})",
                    color="#7b3fa0", ha="left", va="bottom", fontsize=8)


def _band_legend(ax) -> None:
    from matplotlib.lines import Line2D

    handles, _ = ax.get_legend_handles_labels()
    handles += [
        Line2D([], [], color=_COLORS[0], lw=2.2, label="lower branch, bound"),
        Line2D([], [], color=_COLORS[1], lw=2.2, label="upper branch, bound"),
        Line2D([], [], color="w", marker="o", markeredgecolor="k", markerfacecolor="#55a",
               label="leaky (colour: K''/K')"),
        Line2D([], [], color="k", ls=":", lw=1, label=r"folded lines $2\pi/a - k$"),
        Line2D([], [], color="k", marker="x", ls="", label="first-order K'' (branch point)"),
    ]
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(0.0, -0.09), ncol=4,
              fontsize=8, frameon=False)
    ax.text(
        0.01, 0.99,
        "shaded: forward radiation $K'<k_T$ (orange), backward radiation\n"
        r"$2\pi/a-K'<k_T$ (blue), both (overlap); grey bands: no branch (gap)",
        transform=ax.transAxes, va="top", fontsize=8,
        bbox=dict(facecolor="white", alpha=0.8, lw=0),
    )


def draw_attenuation(ax, bands: Bands) -> None:
    """Draw the attenuation panel of `plot_bands` (K'' a in Np per cell against frequency, log
    scale; gaps shaded) into ``ax``."""
    from matplotlib.ticker import LogLocator, NullFormatter

    f = bands.freq
    scale, unit = _freq_unit(float(f.max()))
    fs = f * scale
    a = bands.cell.spacing
    for lo, hi in bands.gaps:
        ax.axhspan(lo * scale, hi * scale, color="#eeeeee", lw=0)
    for br, col in zip(bands.branches, _COLORS, strict=False):
        k = br.k
        att = np.where(np.isfinite(k) & (k.imag > 0), k.imag * a, np.nan)
        ax.plot(att, fs, color=col, lw=1.6, marker=".", ms=3)
    ax.set_xscale("log")
    ax.xaxis.set_major_locator(LogLocator(base=10))
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xlabel("attenuation K'' a (Np per cell)")
    ax.set_ylim(fs.min(), fs.max())
    ax.set_ylabel(f"frequency ({unit})")
    ax.grid(True, which="both", alpha=0.3)
