"""Full-wave check of a block's far face (docs/physics.md section 14, docs/fullwave.md).

With ``substrate.thickness`` H the layout is simulated a second time on a block: the same 2-D
plane-strain solver (`optgrade.fullwave._solver`), with the last grid row a free far face at
depth H (no absorbing layer below; layers only on the far sides, which are moved out by
H tan(72 deg) so that the converted beams reach the far face inside the model). A run with the
rods and one on the bare block give the scattered field (run minus bare), whose far-face part
is analysed three ways:

- **measured, downgoing**: just above the far face (3 cells) the scattered field is
  transformed along x and split, per wavenumber, into downgoing and upgoing compressional and
  shear plane waves (the 4 x 4 system of displacements and tractions on a horizontal plane);
  the downgoing propagating parts, transformed back, give the flux per position and channel
  (forward / backward by the sign of the wavenumber). This is everything that comes down onto
  the far face: the first arrival and the later passes (reflected by the far face to the top,
  and from the top down again), which the half-space prediction leaves out;
- **first arrival from the run's own forces**: the rods' base forces of the block run,
  normalised by the incident surface-wave amplitude of the bare run, carried to the far face
  by the half-space propagation of `optgrade.propagation._farface` (its directivity and
  Parseval checks are in tests/test_farface.py). These forces include the effect of the waves
  that come back up to the row;
- **predicted**: the exact row model's map of the same 2-D line layout (what trace and the
  report state).

Agreement (``far_face`` in verify.json): per channel the power-weighted arrival position
(difference in shear wavelengths) and the fraction of the incident power reaching the face,
band means over the frequencies where the predicted channel carries at least 5 %.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from optgrade.channels import RADIATING

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.fullwave._solver import Grid, Medium, RunRecord
    from optgrade.layout import Layout
    from optgrade.study import Study

__all__ = ["BlockCheck", "block_check", "downgoing_flux", "plane_wave_amplitudes"]

#: Channels a far-face comparison is made for: at least this fraction of the incident power.
MIN_FRACTION = 0.05
#: The decomposition line lies this many cells above the far face.
LINE_CELLS = 3


@dataclass
class BlockCheck:
    """The block run's far face against the prediction (see the module docstring)."""

    frequency: np.ndarray
    x: np.ndarray                    # far-face positions, row frame (m)
    measured: dict[str, np.ndarray]  # downgoing flux per channel (n_f, n_x), 1/m
    measured_total: np.ndarray       # whole downgoing field (n_f, n_x), 1/m
    first: Any                       # FarFaceMap from the run's own forces
    predicted: Any                   # FarFaceMap of the exact model (line variant)
    face_uz: np.ndarray              # |u_z| of the scattered field on the far face (n_f, n_x), m
    agreement: dict[str, Any]
    grid: Grid
    run: RunRecord
    reference: RunRecord

    def to_dict(self) -> dict[str, Any]:
        return self.agreement


def _moments(flux: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Fraction crossing and power-weighted mean position per frequency (trapezoid weights,
    as `FarFaceMap.reaching` and ``arrival``)."""
    from optgrade.propagation._farface import _trapezoid_weights

    w = _trapezoid_weights(x)
    tot = flux @ w
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(tot > 1e-12, (flux * x[None, :]) @ w / np.where(tot > 0, tot, 1), np.nan)
    return tot, mean


def plane_wave_amplitudes(ux, uz, sxz, szz, freq, medium: Medium, h: float,
                          taper: float = 0.1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Amplitudes of the four plane waves that make up a field on a horizontal line.

    ``ux, uz`` displacements (m), ``sxz, szz`` stresses (Pa), phasors (n_f, n_x) on nodes h
    apart, transformed along x (zero-padded, flat-top Tukey taper: 5 % at each end). Per
    wavenumber k_x the state (u_x, u_z, s_xz, s_zz) is the sum of phi = A exp(i (k_x x +- nu_L
    z)) and psi = B exp(i (k_x x +- nu_T z)) with u = grad phi + curl(psi y) (the amplitudes of
    docs/physics.md section 14; + downgoing), nu = sqrt(k^2 - k_x^2) (principal: evanescent
    waves decay in their direction). Returns ``kx`` (n_pad,), the amplitudes (n_f, n_pad, 4) in
    the order P down, S down, P up, S up (zero at the cone edges, where the system is
    singular), and the column vectors (n_f, n_pad, 4, 4) of each wave's state per amplitude.
    """
    from optgrade.fullwave._solver import tukey_window
    from optgrade.propagation._farface import plane_wave_state

    n_f, n = ux.shape
    n_pad = 1 << int(math.ceil(math.log2(4 * n)))
    win = tukey_window(n, taper)
    kx = 2 * math.pi * np.fft.fftfreq(n_pad, h)
    state = np.stack([np.fft.fft(a * win, n_pad, axis=-1) for a in (ux, uz, sxz, szz)], axis=-1)
    lam, mu = medium.lam, medium.mu
    amps = np.zeros((n_f, n_pad, 4), dtype=complex)
    mats = np.zeros((n_f, n_pad, 4, 4), dtype=complex)
    for i, f in enumerate(np.asarray(freq, float)):
        w = 2 * math.pi * f
        kl, kt = w / medium.cl, w / medium.ct
        nl = np.sqrt(kl * kl - kx * kx + 0j)
        nt = np.sqrt(kt * kt - kx * kx + 0j)
        # columns P down, S down, P up, S up: (n_pad, 4 components, 4 waves)
        mat = np.stack([plane_wave_state(wave, kx, sign * nu, lam, mu, kl).T
                        for sign in (1, -1) for wave, nu in (("L", nl), ("T", nt))], axis=-1)
        ok = (np.abs(np.abs(kx) - kl) > 1e-6 * kl) & (np.abs(np.abs(kx) - kt) > 1e-6 * kt)
        amps[i, ok] = np.linalg.solve(mat[ok], state[i][ok][..., None])[..., 0]
        mats[i] = mat
    return kx, amps, mats


def downgoing_flux(ux, uz, sxz, szz, freq, medium: Medium, h: float,
                   taper: float = 0.1) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """Downgoing power flux per channel and of the whole downgoing field on a horizontal line
    (`plane_wave_amplitudes`; the downgoing propagating waves transformed back, forward /
    backward by the sign of k_x). Flux convention of the solver's receiver lines:
    -Re(s_xz conj(v_x) + s_zz conj(v_z)) (positive downwards), so it divides by the same
    incident power. Returns (per channel (n_f, n_x), whole downgoing field (n_f, n_x)); the
    taper is divided back out where it is above 0.2."""
    from optgrade.fullwave._solver import tukey_window

    n_f, n = ux.shape
    kx, amps, mats = plane_wave_amplitudes(ux, uz, sxz, szz, freq, medium, h, taper)
    win = tukey_window(n, taper)
    inv_win = np.where(win > 0.2, 1.0 / np.where(win > 0.2, win, 1.0), 0.0)
    out = {c: np.zeros((n_f, n)) for c in RADIATING}
    whole = np.zeros((n_f, n))
    for i, f in enumerate(np.asarray(freq, float)):
        w = 2 * math.pi * f
        total_state = np.zeros((4, kx.size), dtype=complex)
        for wave, c_speed in ((0, medium.cl), (1, medium.ct)):
            k_c = w / c_speed
            vec = mats[i, :, :, wave]
            for sign, c in ((1, "forward"), (-1, "backward")):
                name = f"{c}_{'compressional' if wave == 0 else 'shear'}"
                keep = (sign * kx > 0) & (np.abs(kx) < k_c)
                spec = np.where(keep[:, None], amps[i, :, wave:wave + 1] * vec, 0.0).T
                total_state += spec
                out[name][i] = _line_flux(spec, w, n) * inv_win**2
        whole[i] = _line_flux(total_state, w, n) * inv_win**2
    return out, whole


def _line_flux(spec: np.ndarray, w: float, n: int) -> np.ndarray:
    """-Re(s_xz conj(v_x) + s_zz conj(v_z)) of a field given by its spectra (4, n_pad)."""
    ux, uz, sxz, szz = (np.fft.ifft(s)[:n] for s in spec)
    vx, vz = -1j * w * ux, -1j * w * uz
    return -np.real(sxz * np.conj(vx) + szz * np.conj(vz))


def block_check(study: Study, layout: Layout, *, quality: str = "normal",
                progress: Any = None, n_snapshots: int = 40) -> BlockCheck:
    """Run the layout on the block (with rods and bare) and compare its far face with the
    exact row model's map (see the module docstring)."""
    from optgrade.fullwave import _solver as fw
    from optgrade.ground import rayleigh_speed
    from optgrade.propagation._farface import far_face_map
    from optgrade.propagation._scattering import scattering_trace

    depth = float(study.substrate.thickness)
    medium = fw.medium_of(study)
    rods = fw.rods_of(study, layout)
    band = (float(study.goal.band[0]), float(study.goal.band[1]))
    freq = np.linspace(band[0], band[1], int(study.goal.n_frequencies))
    grid = fw.plan_grid(medium, band, float(layout.length), float(np.min(rods.diameter)),
                        quality=quality, rods=rods, block_depth=depth)

    def cb(label: str):
        if progress is None:
            return None
        return lambda i, n: progress(label, i, n)

    run = fw.simulate(medium, grid, band, freq, rods, n_snapshots=n_snapshots,
                      progress=cb("block with resonators"))
    ref = fw.simulate(medium, grid, band, freq, None, progress=cb("bare block"))
    h = grid.h
    fields = fw._receiver_fields(run, ref, medium, h)
    sw = fw._surface_waves(fields, medium, grid, freq)
    p_inc = sw["p_inc"]
    # far-face strip: rows j = nz-5 .. nz-2 on the nodes; the line LINE_CELLS above the face
    t_far = fw.node_fields(run, "far", medium, h)
    r_far = fw.node_fields(ref, "far", medium, h)
    scat = fw._diff(t_far, r_far)
    row = 4 - LINE_CELLS  # node rows are j = nz - 5 + row
    wcol = 2 * math.pi * freq[:, None]
    line = {k: v[:, :, row] for k, v in scat.items()}
    ux, uz = line["vx"] / (-1j * wcol), line["vz"] / (-1j * wcol)
    meas, whole = downgoing_flux(ux, uz, line["sxz"], line["szz"], freq, medium, h)
    x = (grid.i_far0 + np.arange(ux.shape[1])) * h - grid.x_array
    measured = {c: meas[c] / p_inc[:, None] for c in RADIATING}
    measured_total = whole / p_inc[:, None]
    # far-face motion: the node rows nz-3 and nz-2 extrapolated to the face
    uz_face = (2 * scat["vz"][:, :, 3] - scat["vz"][:, :, 2]) / (-1j * wcol)
    # incident vertical surface amplitude at the row's origin (bare block, left line)
    cr = rayleigh_speed(medium.cl, medium.ct)
    mode = fw.rayleigh_mode(np.zeros(1), 2 * math.pi * freq, medium.cl, medium.ct, medium.rho, cr)
    z = np.arange(grid.j_bottom + 1) * h
    plus = fw._mode_line(medium, freq, z, cr, +1)
    minus = fw._mode_line(medium, freq, z, cr, -1)
    ap, _ = fw.mode_amplitudes(fw._vline(fields, "left", 1, grid), plus, minus, freq, h)
    kr = 2 * math.pi * freq / cr
    u0 = ap * mode["uz"][:, 0] * np.exp(1j * kr * (grid.x_array - grid.i_left * h))
    forces = run.rod_c / u0[:, None]
    first = far_face_map(study.substrate, freq, rods.x, forces, float(study.resonator.diameter),
                         "line", depth, x)
    # one exact solve (its own far-face record is not needed: the map is made on this grid)
    exact = scattering_trace(study, layout, freq, model="line", per_resonator=False,
                             far_face_detail=False)
    predicted = far_face_map(study.substrate, freq, np.asarray(layout.x, float), exact.forces,
                             float(study.resonator.diameter), "line", depth, x, trace=exact.trace)
    agreement = _agreement(freq, x, measured, measured_total, first, predicted, medium, grid,
                           run, ref)
    return BlockCheck(freq, x, measured, measured_total, first, predicted, np.abs(uz_face),
                      agreement, grid, run, ref)


def _agreement(freq, x, measured, measured_total, first, predicted, medium, grid, run,
               ref) -> dict[str, Any]:
    """verify.json ``far_face``: per channel band means of the arrival difference (shear
    wavelengths) and of the reaching-fraction difference, first arrival and measured."""
    lam_t = medium.ct / np.asarray(freq, float)
    chans: dict[str, Any] = {}
    worst_pos, worst_frac = 0.0, 0.0
    for c in RADIATING:
        pred_tot, pred_x = predicted.reaching[c], predicted.arrival[c]
        first_tot, first_x = first.reaching[c], first.arrival[c]
        meas_tot, meas_x = _moments(measured[c], x)
        use = pred_tot >= MIN_FRACTION
        if not use.any():
            chans[c] = {"compared_at": 0}
            continue
        d_first = np.abs(first_x - pred_x)[use] / lam_t[use]
        d_meas = np.abs(meas_x - pred_x)[use] / lam_t[use]
        f_first = np.abs(first_tot - pred_tot)[use]
        chans[c] = {
            "compared_at": int(use.sum()),
            "arrival_difference_shear_wavelengths": {
                "first_arrival": float(np.nanmean(d_first)),
                "measured_downgoing": float(np.nanmean(d_meas))},
            "fraction": {"predicted": float(np.mean(pred_tot[use])),
                         "first_arrival": float(np.mean(first_tot[use])),
                         "measured_downgoing": float(np.mean(meas_tot[use]))},
            "fraction_difference_first_arrival": float(np.mean(f_first)),
        }
        worst_pos = max(worst_pos, float(np.nanmean(d_first)))
        worst_frac = max(worst_frac, float(np.mean(f_first)))
    from optgrade.propagation._farface import _trapezoid_weights

    wts = _trapezoid_weights(x)
    tot_meas = float(np.mean(measured_total @ wts))
    tot_first = float(np.mean(first.flux_total @ wts))
    return {
        "channels": chans,
        "worst_arrival_difference_shear_wavelengths": worst_pos,
        "worst_fraction_difference": worst_frac,
        "is_within": bool(worst_pos <= 1.0 and worst_frac <= 0.1),
        "limits": {"arrival_shear_wavelengths": 1.0, "fraction": 0.1},
        "band_mean_downgoing_measured": tot_meas,
        "band_mean_first_arrival": tot_first,
        "block": {"depth_m": float((grid.nz - 1) * grid.h), "nx": grid.nx, "nz": grid.nz,
                  "h_m": grid.h, "seconds": float(run.seconds + ref.seconds),
                  "steps": int(run.n_steps)},
        "leaves_out": ("the prediction is the first arrival on a half-space; the block's far "
                       "face also receives the waves that the far face reflects to the top and "
                       "the top sends down again (in 'measured_downgoing', not in "
                       "'first_arrival' or 'predicted')"),
    }
