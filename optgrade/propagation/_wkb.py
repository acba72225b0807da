"""Adiabatic (WKB) propagation of a Rayleigh wave along a graded row (docs/physics.md s. 6).

For every frequency the march starts at the entry resonator (x = 0) with unit incident surface
power and follows one local Bloch branch cell by cell:

1. **Branch choice.** The branch that exists at the entry cell; the lower (surface) branch
   first, the upper branch (above the rod resonance) only where the lower one has no root. If
   neither exists the entry cell is in a local gap and the wave is reflected at x = 0.
2. **Entry step.** The change from the bare surface (Rayleigh wavenumber kR) to the array's
   first cell reflects ``R0 = ((K1' - kR) / (K1' + kR))^2`` of the power (normal-incidence
   impedance-step estimate with the real parts of the wavenumbers, wave impedance taken
   proportional to the wavenumber; common practice for a first estimate of a mismatch, not a
   published result for this geometry). It is applied once, on entry; repeated reflections
   between the entry step and a turning point are neglected, and the far end is taken as
   reflection-free.
3. **Forward march.** Cell j (length a_j) keeps ``P_j = P_{j-1} exp(-2 K''_j a_j)``. The lost
   power ``P_{j-1} - P_j`` is booked to the four radiation channels and ``absorbed`` in the
   proportions ``LocalModes.shares`` give for that cell (shares are renormalised to sum to 1;
   a cell that reports decay without any split books it to ``absorbed``). Its position is the
   cell centre ``x_j + a_j / 2``; its angle is the cell's radiation angle. A root reported
   with K'' < 0 is a backward-wave solution (phase and energy travel in opposite directions,
   e.g. near a Bragg gap edge): by the symmetry K -> 2 pi/a - K of the Bloch relation its
   partner carrying power towards +x decays at |K''|, so the decay used is |K''|.
4a. **Steps between branches.** Where the followed branch has no root at a cell but the other
   branch has one, the wave continues on that branch. With K' within ``SWITCH_TOL`` (2 %) of
   the last cell's it is the same physical branch under its other label (a branch crossing
   the Rayleigh line at a rod anti-resonance). Otherwise the cell is an abrupt step between
   two different modes (rods changing across their resonance, e.g. a height step): the power
   arriving there passes onto the new branch with the impedance-step transmission
   ``t = 4 K'_a K'_b / (K'_a + K'_b)^2`` (the same normal-incidence estimate as the entry step,
   wave impedance proportional to the wavenumber; common practice for a first estimate of a
   mismatch, not a published result for this geometry), and ``1 - t`` is reflected there as a
   surface wave that returns towards x = 0, leaking on the way. A returning wave passes a step
   whole (repeated reflections between steps and turning points are neglected, so the
   fractions still sum to 1). Measured against the exact row model (docs/physics.md 11.4):
   worst channel's band-mean error on a row with a height step halfway 0.521 -> 0.100, on a
   6-pin row 0.694 -> 0.240.
4. **Turning point.** The first cell where neither branch has a root (``nan``: local gap)
   turns the remaining power back as a surface wave at ``x`` of that cell. The returning wave
   crosses the same cells again in reverse order with the same decay, still leaking. Channels
   are named in the frame of the *incident* wave (+x): radiation that travels towards -x is
   "backward" whoever produced it. A back-travelling wave's own forward (m = 0) harmonic
   therefore counts as ``backward_*`` and its folded (m = -1) harmonic as ``forward_*``, with
   the angle negated, so the angle's sign always matches the channel name (negative = pointing
   back to the source).
5. **Exit.** Power that reaches the far end is ``transmitted_surface``; power that comes back
   out at x = 0 (entry step plus return path) is ``reflected_surface``.

The fractions of the seven channels sum to 1 for every frequency by construction (telescoping
products; checked to 1e-9 in the tests). Adiabaticity along the forward path:
``eps_j = |K_{j+1} - K_j| / (a_j |K_j|^2)`` (docs/physics.md s. 6.6); ``eps_max`` is its largest
value between cells that both carry the wave (0 when fewer than two do), and
``is_adiabatic = eps_max <= 0.1``. Turning points themselves are not counted: total reflection
there is the standard WKB turning-point result.

Known limitation (discrete sampling): each cell is represented by its own Bloch mode, and the
turning point is placed at cell resolution. Near a gap edge K'' of the leaky mode can grow
steeply, so the leakage booked just before a turning point depends on how close the last
passing cell sits to its own band edge at that frequency. Fractions against frequency therefore
show a comb with one tooth per cell where a row stops a band of frequencies; a finer grading
(more, smaller steps) shrinks the teeth. Treat single-frequency peaks with that in mind.

The march (:func:`march`) only needs the arrays of a ``LocalModes`` (contract in DEVELOPERS.md),
however they were produced: the fast surrogate, direct root solves, or hand-built toy dispersion
in tests. It runs as one compiled loop over frequencies and, per frequency, over the cells of
its path only (cells past the turning point are never read).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Protocol

import numpy as np
from numba import njit
from numpy.typing import ArrayLike

from optgrade.channels import CHANNELS
from optgrade.dispersion._modes import SWITCH_TOL, Dispersion, RowPath
from optgrade.layout import Layout
from optgrade.propagation._base import PROPAGATION_MODELS, PropagationModel, study_frequencies
from optgrade.propagation._trace import Trace

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.study import Study

__all__ = [
    "ADIABATIC_LIMIT",
    "Trace",
    "WKB_PATH",
    "march",
    "trace",
    "WKBMarch",
    "trace_study",
]

#: eps above this marks a result outside the adiabatic model's validity (docs/physics.md s. 6.6).
ADIABATIC_LIMIT = 0.1


class _Modes(Protocol):
    k: np.ndarray
    shares: np.ndarray
    angle: np.ndarray


def march(
    modes: _Modes,
    x: ArrayLike,
    spacing: ArrayLike,
    freq: ArrayLike,
    cr: float,
) -> Trace:
    """WKB march of a unit-power Rayleigh wave through cells with known local modes.

    Parameters
    ----------
    modes : LocalModes
        Object with ``k`` (complex, (2, n_cells, n_freq), Bloch wavenumber in 1/m, nan in a
        local gap), ``shares`` ((2, 5, n_cells, n_freq), split of K'' among forward shear,
        forward compressional, backward shear, backward compressional, absorbed) and ``angle``
        ((2, 4, n_cells, n_freq), radiation angle from the normal in rad) as in DEVELOPERS.md.
    x : array_like, shape (n_cells,)
        Resonator positions (m), entry at 0.
    spacing : array_like, shape (n_cells,)
        Cell lengths a_j (m).
    freq : array_like, shape (n_freq,)
        Frequencies (Hz).
    cr : float
        Rayleigh speed of the bare substrate (m/s), for the entry impedance step.

    Returns
    -------
    Trace
    """
    freq = np.atleast_1d(np.asarray(freq, dtype=float))
    x = np.asarray(x, dtype=float)
    a = np.asarray(spacing, dtype=float)
    k = np.asarray(modes.k)
    n_cells, n_freq = x.size, freq.size
    if k.shape != (2, n_cells, n_freq):
        raise ValueError(f"modes.k has shape {k.shape}, expected {(2, n_cells, n_freq)}")
    shares = np.asarray(modes.shares, dtype=float)
    angle = np.asarray(modes.angle, dtype=float)
    if shares.shape != (2, 5, n_cells, n_freq) or angle.shape != (2, 4, n_cells, n_freq):
        raise ValueError(
            f"modes.shares/angle have shapes {shares.shape}/{angle.shape}, expected "
            f"{(2, 5, n_cells, n_freq)}/{(2, 4, n_cells, n_freq)}"
        )

    k, shares, angle, t_step = _follow_by_continuity(k, shares, angle)
    out = _march_kernel(k, shares, angle, t_step, x, a, freq, float(cr))
    fr, pos, ang, eps_max, branch, x_turn, entry, phase = out
    fractions = {c: fr[i] for i, c in enumerate(CHANNELS)}
    position = {c: pos[i] for i, c in enumerate(CHANNELS)}
    angles = {c: ang[i] for i, c in enumerate(CHANNELS)}
    return Trace(
        frequency=freq,
        fractions=fractions,
        position=position,
        angle=angles,
        eps_max=eps_max,
        is_adiabatic=eps_max <= ADIABATIC_LIMIT,
        branch=branch.astype(np.int8),
        turning_position=np.where(branch < 0, 0.0, x_turn),
        entry_reflection=entry,
        phase=phase,
    )


@njit(cache=True)
def _path_of(k, f):
    """Branch the march follows at frequency index f (0 lower where the entry cell has it, else
    1 upper, -1 none) and the number of cells it crosses before the first without a root."""
    k00 = k[0, 0, f]
    k10 = k[1, 0, f]
    if math.isfinite(k00.real) and math.isfinite(k00.imag):
        br = 0
    elif math.isfinite(k10.real) and math.isfinite(k10.imag):
        br = 1
    else:
        return -1, 0
    n_path = 0
    while n_path < k.shape[1]:
        kj = k[br, n_path, f]
        if not (math.isfinite(kj.real) and math.isfinite(kj.imag)):
            break
        n_path += 1
    return br, n_path


@njit(cache=True)
def _follow_by_continuity(k, shares, angle):
    """Branches followed by continuity in K, not by label, and across steps between branches.

    The labels ``lower`` / ``upper`` mean "slower / faster than Rayleigh"; one physical branch
    changes label where it crosses the Rayleigh line (at a rod anti-resonance, where Z = 0 and
    K = kR). Where the followed branch has no root at a cell but the other one has, the wave
    continues on it: its data are moved into the followed slot from there on (the two slots
    swap), so the march reads one path. With K' within ``SWITCH_TOL`` of the previous cell's
    it is the same physical branch (step transmission 1); otherwise the cell is a step between
    two branches (an abrupt change of the rods across their resonance), which transmits
    ``t = 4 K'_a K'_b / (K'_a + K'_b)^2`` of the power onto the new branch and reflects the
    rest (module docstring, step 4a). Returns copies of k, shares, angle and the step
    transmission of every cell (n_cells, n_freq; 1 where there is no step)."""
    k = k.copy()
    shares = shares.copy()
    angle = angle.copy()
    n_cells, n_freq = k.shape[1], k.shape[2]
    t_step = np.ones((n_cells, n_freq))
    for f in range(n_freq):
        br, n_path = _path_of(k, f)
        while br >= 0 and 0 < n_path < n_cells:
            j = n_path
            prev = k[br, j - 1, f].real
            other = k[1 - br, j, f]
            if not (math.isfinite(other.real) and math.isfinite(other.imag)):
                break
            if abs(other.real - prev) > SWITCH_TOL * abs(prev):
                t_step[j, f] = 4.0 * prev * other.real / (prev + other.real) ** 2
            for jj in range(j, n_cells):
                t = k[br, jj, f]
                k[br, jj, f] = k[1 - br, jj, f]
                k[1 - br, jj, f] = t
                for c in range(shares.shape[1]):
                    v = shares[br, c, jj, f]
                    shares[br, c, jj, f] = shares[1 - br, c, jj, f]
                    shares[1 - br, c, jj, f] = v
                for c in range(angle.shape[1]):
                    v = angle[br, c, jj, f]
                    angle[br, c, jj, f] = angle[1 - br, c, jj, f]
                    angle[1 - br, c, jj, f] = v
            br, n_path = _path_of(k, f)
    return k, shares, angle, t_step


@njit(cache=True)
def _book_channels(f, br, n_path, sh, w_f, w_r, angle, x, a, fr, pos, ang):
    """The five decay channels' fractions, positions and angles at frequency index f from the
    cells' normalised shares sh and the power w_f, w_r each cell of the path loses on the
    forward and the return pass."""
    # a wave travelling towards -x radiates mirror-imaged: its own forward harmonic points to -x
    swap = (2, 3, 0, 1, 4)
    for c in range(5):
        cs = swap[c]
        leak = 0.0
        xs = 0.0
        for j in range(n_path):
            part = sh[c, j] * w_f[j] + sh[cs, j] * w_r[j]
            leak += part
            xs += part * (x[j] + 0.5 * a[j])
        fr[2 + c, f] = leak
        if leak > 0.0:
            pos[2 + c, f] = xs / leak
        if c < 4:
            # a return-path part of channel c has the mirrored angle of channel swap[c]
            num = 0.0
            den = 0.0
            for j in range(n_path):
                af = angle[br, c, j, f]
                ar = angle[br, cs, j, f]
                if math.isfinite(af):
                    num += sh[c, j] * af * w_f[j]
                    den += sh[c, j] * w_f[j]
                if math.isfinite(ar):
                    num -= sh[cs, j] * ar * w_r[j]
                    den += sh[cs, j] * w_r[j]
            if den > 0.0:
                ang[2 + c, f] = math.degrees(num / den)


@njit(cache=True)
def _march_kernel(k, shares, angle, t_step, x, a, freq, cr):
    """The march of `march`, one frequency at a time over the cells of its path (steps between
    branches transmit t_step of the power arriving there). Returns fractions, positions and
    angles (7, n_freq) in the order of CHANNELS, eps_max, branch, turning position (nan where
    not turned), entry reflection and phase (n_freq each)."""
    n_cells = x.size
    n_freq = freq.size
    fr = np.zeros((7, n_freq))
    pos = np.full((7, n_freq), np.nan)
    ang = np.full((7, n_freq), np.nan)
    eps_max = np.zeros(n_freq)
    branch = np.full(n_freq, -1, dtype=np.int8)
    x_turn = np.full(n_freq, np.nan)
    entry = np.ones(n_freq)
    phase = np.full(n_freq, np.nan)
    x_end = x[n_cells - 1] + a[n_cells - 1]
    tau = np.zeros(n_cells)
    step_back = np.zeros(n_cells)  # power reflected at each cell's step
    sh = np.zeros((5, n_cells))
    w_f = np.zeros(n_cells)
    w_r = np.zeros(n_cells)
    for f in range(n_freq):
        # 1. branch chosen at the entry cell, then followed up to the first cell without root
        br, n_path = _path_of(k, f)
        if br >= 0:
            branch[f] = br
        is_turning = n_path < n_cells
        # 2. entry step
        kr = 2.0 * math.pi * freq[f] / cr
        if br >= 0:
            k1 = k[br, 0, f].real
            entry[f] = ((k1 - kr) / (k1 + kr)) ** 2
        p_in = 1.0 - entry[f]
        # 3. forward march (4a. steps between branches pass t_step of the power arriving)
        power = p_in  # forward power arriving at the cell, before its step
        for j in range(n_path):
            tau[j] = abs(k[br, j, f].imag) * (2.0 * a[j])
            # shares renormalised per cell (nan, inf and negatives -> 0; none: absorbed)
            s_sum = 0.0
            for c in range(5):
                v = shares[br, c, j, f]
                v = v if (v > 0.0 and not math.isinf(v)) else 0.0
                sh[c, j] = v
                s_sum += v
            if s_sum <= 0.0:
                sh[4, j] += 1.0
                s_sum += 1.0
            for c in range(5):
                sh[c, j] /= s_sum
            step_back[j] = power * (1.0 - t_step[j, f])  # reflected at this cell's step
            power *= t_step[j, f]
            gone = power * -math.expm1(-tau[j])
            w_f[j] = gone
            power -= gone
        # 4. return path: the power turned at the end of the path and the parts reflected at
        # the steps travel back towards x = 0, still leaking (a step passes the returning wave
        # whole: repeated reflections between steps are neglected)
        back = power if is_turning else 0.0
        through = 0.0 if is_turning else power
        for j in range(n_path - 1, -1, -1):
            gone = back * -math.expm1(-tau[j])
            w_r[j] = gone
            back -= gone
            back += step_back[j]  # reflected at the cell's entry: it does not cross the cell
        _book_channels(f, br, n_path, sh, w_f, w_r, angle, x, a, fr, pos, ang)
        # 5. exit
        reflected = entry[f] + back
        transmitted = through
        fr[0, f] = transmitted
        fr[1, f] = reflected
        if transmitted > 0.0:
            pos[0, f] = x_end
            ang[0, f] = 90.0
        if is_turning:
            x_turn[f] = x[n_path]
        if reflected > 0.0:
            # where the reflected wave turned back (0 for the entry step), weighted by the part
            # of each source's power that comes back out at x = 0
            xs = 0.0
            depth = 0.0  # optical depth from x = 0 to the cell
            for j in range(n_path):
                xs += step_back[j] * math.exp(-depth) * x[j]
                depth += tau[j]
            if is_turning:
                xs += power * math.exp(-depth) * x_turn[f]
            pos[1, f] = xs / reflected
            ang[1, f] = -90.0
        # adiabaticity between cells that both carry the wave; phase of the transmitted wave
        for j in range(n_path - 1):
            kj = k[br, j, f]
            e = abs(k[br, j + 1, f] - kj) / (a[j] * abs(kj) ** 2)
            if math.isfinite(e) and e > eps_max[f]:
                eps_max[f] = e
        if not is_turning:
            ph = 0.0
            for j in range(n_path):
                ph += k[br, j, f].real * a[j]
            phase[f] = ph
    return fr, pos, ang, eps_max, branch, x_turn, entry, phase


#: the points the march reads (what it asks the dispersion stage for): per frequency the
#: branch chosen at the entry cell, the lower (surface) branch first, followed (onto the other
#: branch where it has no root and the other has) up to and including the first cell where
#: neither has a root (steps 1, 4a and 4 of the module docstring)
WKB_PATH = RowPath(entry_order=(0, 1))


def trace(
    layout: Layout,
    dispersion: Dispersion,
    freq: ArrayLike,
    *,
    cr: float | None = None,
    path_only: bool = True,
) -> Trace:
    """Channel fractions of a layout over frequency (the propagation stage's main entry).

    Parameters
    ----------
    layout : Layout
        The graded row (SI).
    dispersion : Dispersion
        The dispersion stage (`optgrade.dispersion.Dispersion`: ``cr`` and
        ``local_modes(height, spacing, head_mass, freq, *, path=None) -> LocalModes``), e.g. the
        fast surrogate or the direct solver.
    freq : array_like
        Frequencies (Hz).
    cr : float, optional
        Rayleigh speed of the substrate (m/s); ``dispersion.cr`` when omitted.
    path_only : bool
        Ask for the points the march reads only (the row request `WKB_PATH`); the trace is the
        same as from every point.

    Returns
    -------
    Trace
    """
    freq = np.atleast_1d(np.asarray(freq, dtype=float))
    modes = dispersion.local_modes(
        layout.height,
        layout.spacing,
        layout.head_mass,
        freq,
        path=WKB_PATH if path_only else None,
    )
    speed = float(dispersion.cr) if cr is None else float(cr)
    return march(modes, layout.x, layout.spacing, freq, speed)


def trace_study(
    study: Study, layout: Layout, dispersion: Dispersion | None = None, *, path_only: bool = True
) -> Trace:
    """WKB-march trace of a layout over the study's goal band, building the study's surrogate
    if needed (the study's own ``goal.propagation`` model: `trace_layout`)."""
    if dispersion is None:
        from optgrade.dispersion import surrogate_for_study

        dispersion = surrogate_for_study(study)
    return trace(
        layout,
        dispersion,
        study_frequencies(study),
        cr=float(study.substrate.cr),
        path_only=path_only,
    )


@PROPAGATION_MODELS.register
class WKBMarch(PropagationModel):
    """Adiabatic march through the local Bloch modes of each cell (registered as ``wkb``).

    Parameters
    ----------
    study : Study
    dispersion : Dispersion, optional
        The dispersion stage (`optgrade.dispersion.Dispersion`; the study's own when omitted,
        for ``model`` or the study's ``goal.model``). The march asks it for `WKB_PATH` only.
    model : str, optional
        Lattice-sum variant of the dispersion ("lattice", "line", "homogenised").
    """

    name = "wkb"

    def __init__(
        self, study: Study, dispersion: Dispersion | None = None, model: str | None = None
    ) -> None:
        super().__init__(study)
        if dispersion is None:
            from optgrade.dispersion import dispersion_for_study

            dispersion = dispersion_for_study(study, model=model)
        self.dispersion = dispersion

    def trace(self, layout: Layout, freq: ArrayLike | None = None) -> Trace:
        """WKB trace of ``layout`` over ``freq`` (Hz; the study's grid when omitted)."""
        tr = trace(
            layout, self.dispersion, self.frequencies(freq), cr=float(self.study.substrate.cr)
        )
        from optgrade.propagation._farface import with_ray_estimate

        return with_ray_estimate(tr, self.study)
