"""Exact model of a finite resonator row: multiple scattering (docs/physics.md s. 13).

Each resonator j presses on its footprint (strip of width d for ``"line"``, rows of discs at
pitch b for ``"lattice"``) with a force per unit length along y F_j = (Z_j / b) u_j, u_j the
footprint-averaged vertical surface displacement (N/m, positive into the solid, exp(-i w t)).
With the tabulated Green's function g (`optgrade.propagation._green`) and an incident Rayleigh
wave of unit vertical surface amplitude, u_inc(x) = exp(i kR x), every frequency solves

    (diag(b c_j) - g(x_j - x_k)) F = S(kR) exp(i kR x_j),   c_j = 1/Z_j (compliance, m/N),

the Foldy multiple-scattering system (compliance form: finite at the rod resonances, where
c_j = 0). From the forces (docs/physics.md s. 13; Res = residue of G at +kR, S = footprint factor):

- transmitted amplitude T = 1 + i Res S(kR) sum_j F_j exp(-i kR x_j), reflected
  R = i Res S(kR) sum_j F_j exp(+i kR x_j); fractions |T|^2, |R|^2 (incident Rayleigh power
  per unit width and unit squared amplitude w / (4 Res));
- bulk power per channel (w/2) sum_jk conj(F_j) F_k B_c(x_j - x_k), B_c the tabulated forward
  shear / compressional cone integrals of the free-surface potentials' power densities;
  backward = the same with B_c(x_k - x_j) (xi < 0); forward means positive wavenumber;
- absorbed (w/2) sum_j Im(Z_j / b) |u_j|^2 = -(w/2) b sum_j Im(c_j) |F_j|^2.

Energy balance. For a lossless substrate the seven fractions must sum to 1 whatever the rods
(lossless or lossy): the balance error 1 - sum is returned per frequency; it is the main
self-check, because the bulk tables are integrated over the cones independently of the Green's
function's own imaginary part. With a lossy substrate the substrate itself absorbs power along
the row, so the far-field fractions do not sum to 1. The trace then follows the project's
convention for lossy ground (the WKB march and the full-wave check use it too): fractions of
the power entering the row at x = 0; the transmitted fraction is measured at the row's far end
x = L = ``layout.length``, so it includes the bare ground's own decay there,
|T|^2 exp(-2 Im kR L) (T above is relative to the incident wave at the same point); the
remainder 1 - (transmitted + R + bulk + rods) is booked to ``absorbed`` (the substrate's loss
over the row, the bare ground's and the extra the row causes). The blocking goal divides the
bare ground's exp(-2 Im kR L) back out. ``balance_error`` is nan there: no independent balance
is checked for lossy substrates. Bulk fractions of a lossy substrate are the cone integrals of
Im G of the lossy substrate split in the lossless shear/compressional proportions (definitional).

Positions: bulk and absorbed channels are weighted by each resonator's share of the channel's
power (sum_k of its row of the quadratic form); reflected by each resonator's share of
|R|^2 (Re conj(R) r_j); transmitted leaves at ``layout.length``. Angles: bulk channels from the
angle-weighted cone integrals (deg from the normal, negative = backward); surface channels
+-90; absorbed nan.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numba import njit
from numpy.typing import ArrayLike

from optgrade.layout import Layout
from optgrade.propagation import (
    CHANNELS,
    PROPAGATION_MODELS,
    PropagationModel,
    Trace,
    study_frequencies,
)
from optgrade.propagation._green import GreenSpec, GreenTables, stencils

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.study import Study

__all__ = [
    "ScatteringModel",
    "ScatteringResult",
    "scattering_trace",
    "solve_row",
    "tables_for_study",
]


@dataclass(frozen=True)
class ScatteringResult:
    """Result of the exact row model.

    Attributes
    ----------
    trace : Trace
        The project's channel contract (fractions summing to 1, positions m, angles deg).
        ``eps_max`` is 0 and ``is_adiabatic`` True (no adiabatic assumption), ``branch`` -1,
        ``turning_position`` and ``entry_reflection`` nan; ``phase`` is the unwrapped phase of
        the transmitted wave across the row, arg T + Re kR L (rad).
    balance_error : ndarray, shape (n_freq,)
        1 - sum of the seven fractions for a lossless substrate; nan for a lossy substrate (see
        the module docstring).
    forces : ndarray, complex, shape (n_freq, n)
        Forces per unit length F_j (N/m) for a unit incident surface amplitude (m).
    transmission, reflection : ndarray, complex, shape (n_freq,)
        Amplitudes T and R (dimensionless).
    resonator_power : ndarray, shape (6, n_freq, n), or None
        Each resonator's share of the reflected, four bulk and absorbed (rods) fractions; None
        when not asked for.
    """

    trace: Trace
    balance_error: np.ndarray
    forces: np.ndarray
    transmission: np.ndarray
    reflection: np.ndarray
    resonator_power: np.ndarray | None


@njit(cache=True, fastmath=True)
def _gather(table, idx, wts, out):
    """out[p, :] = sum_s wts[p, s] table[idx[p, s], :] (Lagrange interpolation of a table for
    every pair, all frequencies at once; real views, so the inner loop vectorises)."""
    n2 = table.shape[1]
    for p in range(idx.shape[0]):
        for f in range(n2):
            out[p, f] = 0.0
        for s in range(idx.shape[1]):
            row = idx[p, s]
            w = wts[p, s]
            for f in range(n2):
                out[p, f] += w * table[row, f]


def _gathered(table, idx, wts) -> np.ndarray:
    """Interpolated table values (n_pairs, n_freq) complex; table (n_col, n_freq) complex."""
    t = np.ascontiguousarray(table).view(np.float64)
    out = np.empty((idx.shape[0], t.shape[1]))
    _gather(t, idx, wts, out)
    return out.view(np.complex128)


@njit(cache=True)
def _fill(gp, g0, jj, kk, bc, ph, iph, pole, m):
    """Foldy matrix m[f] = diag(b c_j) - g(x_j - x_k): interpolated rest gp[p, f] of pair p =
    (jj, kk) plus the pole term pole[f] exp(i kR (x_k - x_j)) = pole ph[k] iph[j]."""
    n_f, n = m.shape[0], m.shape[1]
    for f in range(n_f):
        for j in range(n):
            m[f, j, j] = bc[f, j] - (g0[f] + pole[f])
    for p in range(jj.size):
        j = jj[p]
        k = kk[p]
        for f in range(n_f):
            v = -(gp[p, f] + pole[f] * ph[k, f] * iph[j, f])
            m[f, j, k] = v
            m[f, k, j] = v


@njit(cache=True, fastmath=True)
def _bulk(gb, ga, b0, a0, jj, kk, ft, per, mom):
    """Quadratic forms of one channel's power table B and angle table A (forward, backward).

    gb, ga: interpolated B(s), A(s) of each pair (s = x_k - x_j > 0), b0, a0: their x = 0
    values; ft (n, n_f) forces. per[dir, j, f] += each resonator's share (sum over its row of
    the Hermitian form; the pair term is shared equally), mom[dir, f] the angle moment.
    B(x_j - x_k) = conj(B(s)) and B(x_k - x_j) = B(s): forward Re(conj(F_j) F_k conj(B)),
    backward Re(conj(F_j) F_k B)."""
    n, n_f = ft.shape
    for j in range(n):
        for f in range(n_f):
            q = ft[j, f].real ** 2 + ft[j, f].imag ** 2
            per[0, j, f] += b0[f].real * q
            per[1, j, f] += b0[f].real * q
            mom[0, f] += a0[f].real * q
            mom[1, f] += a0[f].real * q
    for p in range(jj.size):
        j = jj[p]
        k = kk[p]
        for f in range(n_f):
            c = np.conj(ft[j, f]) * ft[k, f]
            vb = gb[p, f]
            va = ga[p, f]
            fwd = c.real * vb.real + c.imag * vb.imag
            bwd = c.real * vb.real - c.imag * vb.imag
            per[0, j, f] += fwd
            per[0, k, f] += fwd
            per[1, j, f] += bwd
            per[1, k, f] += bwd
            mom[0, f] += 2.0 * (c.real * va.real + c.imag * va.imag)
            mom[1, f] += 2.0 * (c.real * va.real - c.imag * va.imag)


@njit(cache=True, fastmath=True)
def _scatter(idx, wts, jj, kk, ft, x, c0, c1):
    """Adjoint of the gather: c0[row, f] = sum over pairs and stencil points of w conj(F_j) F_k
    (c1 the same times x_j + x_k), so that every table's pair sum is one dot product."""
    n_f = ft.shape[1]
    cp = np.empty(n_f, dtype=np.complex128)
    for p in range(jj.size):
        j = jj[p]
        k = kk[p]
        xs = x[j] + x[k]
        for f in range(n_f):
            cp[f] = np.conj(ft[j, f]) * ft[k, f]
        for s in range(idx.shape[1]):
            row = idx[p, s]
            w = wts[p, s]
            for f in range(n_f):
                v = w * cp[f]
                c0[row, f] += v
                c1[row, f] += xs * v


@njit(cache=True, fastmath=True)
def _forms(table, c0, c1, out):
    """out[0] += sum_rows Re(c0 conj(T)) (forward pair sum), out[1] += Re(c0 T) (backward),
    out[2], out[3] the same with c1 (position moments); per frequency."""
    for r in range(c0.shape[0]):
        for f in range(c0.shape[1]):
            t = table[r, f]
            a = c0[r, f]
            b = c1[r, f]
            out[0, f] += a.real * t.real + a.imag * t.imag
            out[1, f] += a.real * t.real - a.imag * t.imag
            out[2, f] += b.real * t.real + b.imag * t.imag
            out[3, f] += b.real * t.real - b.imag * t.imag


def _bulk_fast(tab, idx, wts, jj, kk, ft, x):
    """Bulk powers (c, dir, f), angle moments and position moments without per-resonator
    shares: one scatter of the pair coefficients, then a dot product per table."""
    n, n_f = ft.shape
    c0 = np.zeros(tab.shape[1:], dtype=complex)
    c1 = np.zeros(tab.shape[1:], dtype=complex)
    c0[0] = 0.0
    _scatter(idx, wts, jj, kk, ft, x, c0, c1)
    q = np.abs(ft) ** 2
    sq, sxq = q.sum(axis=0), (x[:, None] * q).sum(axis=0)
    out_p, out_a, pos = (np.zeros((2, 2, n_f)) for _ in range(3))
    for ch in range(2):
        fb = np.zeros((4, n_f))
        fa = np.zeros((4, n_f))
        _forms(tab[1 + ch], c0, c1, fb)
        _forms(tab[3 + ch], c0, c1, fa)
        b0, a0 = tab[1 + ch, 0].real, tab[3 + ch, 0].real
        for dr in range(2):
            out_p[ch, dr] = b0 * sq + 2.0 * fb[dr]
            out_a[ch, dr] = a0 * sq + 2.0 * fa[dr]
            pos[ch, dr] = b0 * sxq + fb[2 + dr]
    return out_p, out_a, pos


def _bulk_detailed(tab, idx, wts, jj, kk, ft, x):
    """As `_bulk_fast`, plus each resonator's share per[c, dir, f, j] (pair values gathered)."""
    n, n_f = ft.shape
    out_p, out_a, pos = (np.zeros((2, 2, n_f)) for _ in range(3))
    per_b = np.zeros((2, 2, n_f, n))
    for ch in range(2):
        per_c = np.zeros((2, n, n_f))
        mom = np.zeros((2, n_f))
        _bulk(_gathered(tab[1 + ch], idx, wts), _gathered(tab[3 + ch], idx, wts),
              np.asarray(tab[1 + ch, 0]), np.asarray(tab[3 + ch, 0]), jj, kk, ft, per_c, mom)
        per_b[ch] = per_c.transpose(0, 2, 1)
        out_p[ch] = per_c.sum(axis=1)
        out_a[ch] = mom
        pos[ch] = per_c.transpose(0, 2, 1) @ x
    return out_p, out_a, pos, per_b


def solve_row(
    tables: GreenTables, x: ArrayLike, compliance: ArrayLike, row_pitch: float,
    *, per_resonator: bool = True,
) -> dict[str, np.ndarray]:
    """Forces and channel powers of a row at the tables' frequencies.

    Parameters
    ----------
    tables : GreenTables
    x : array_like, shape (n,)
        Resonator positions (m), increasing.
    compliance : array_like, complex, shape (n_freq, n)
        Base compliance 1/Z_j of every resonator (m/N; `optgrade.resonators.rod_compliance`).
    row_pitch : float
        Row pitch b (m): the force per unit length is Z u / b.
    per_resonator : bool
        Also return every resonator's share of each channel (``per``; the channel map). The
        fractions, positions and angles are the same without it (pair sums then run as one
        scatter and a dot product per table, faster).

    Returns
    -------
    dict with ``forces`` (n_freq, n), ``T``, ``R`` (n_freq,), ``fractions`` (7, n_freq) in the
    order of CHANNELS, ``per`` (6, n_freq, n) per-resonator shares (reflected, four bulk,
    absorbed; None without ``per_resonator``), ``moments`` (7, n_freq) sum_j x_j share_j
    (m, for the positions), ``angle`` (4, n_freq) bulk mean angles (rad).
    """
    row = _RowGeometry.of(tables, x)
    return row.solve(np.asarray(compliance, dtype=complex), row_pitch,
                     per_resonator=per_resonator)


@dataclass(frozen=True)
class _RowGeometry:
    """Everything of the Foldy system that depends on the positions only (pairs, table
    stencils, phases, the off-diagonal coupling g(x_j - x_k) with the pole term): shared by
    every set of compliances on the same positions (the robustness draws)."""

    tables: GreenTables
    x: np.ndarray
    jj: np.ndarray
    kk: np.ndarray
    idx: np.ndarray
    wts: np.ndarray
    ph: np.ndarray
    iph: np.ndarray
    g_pairs: np.ndarray

    @classmethod
    def of(cls, tables: GreenTables, x: ArrayLike) -> _RowGeometry:
        x = np.ascontiguousarray(np.asarray(x, dtype=float))
        n = x.size
        if n < 1 or np.any(np.diff(x) <= 0):
            raise ValueError("layout.x: positions must be strictly increasing")
        jj, kk = np.triu_indices(n, 1)
        idx, wts = stencils(tables, x[kk] - x[jj])
        kr = tables.pole.kr
        ph = np.exp(1j * x[:, None] * kr[None, :])  # (n, n_f)
        iph = np.exp(-1j * x[:, None] * kr[None, :])
        return cls(tables, x, jj, kk, idx, wts, ph, iph, _gathered(tables.table[0], idx, wts))

    def solve(self, compliance: np.ndarray, row_pitch: float, *,
              per_resonator: bool) -> dict[str, np.ndarray]:
        """`solve_row` for one set of base compliances (n_freq, n) on these positions."""
        tables = self.tables
        c = np.ascontiguousarray(compliance)
        n = self.x.size
        n_f = tables.omega.size
        if c.shape != (n_f, n):
            raise ValueError(f"compliance: shape {c.shape}, expected {(n_f, n)}")
        m = self._matrix(c, row_pitch)
        rhs = tables.pole.s_kr[:, None] * self.ph.T
        forces = np.linalg.solve(m, rhs[..., None])[..., 0]
        return self._channels(forces, c, row_pitch, per_resonator)

    def _matrix(self, c: np.ndarray, row_pitch: float) -> np.ndarray:
        """Foldy matrices (n_freq, n, n) for base compliances c (n_freq, n) on these
        positions: diag(b c) minus the couplings (`_fill`)."""
        tables, n = self.tables, self.x.size
        pc = tables.pole
        m = np.empty((tables.omega.size, n, n), dtype=complex)
        _fill(self.g_pairs, np.asarray(tables.table[0, 0]), self.jj, self.kk, row_pitch * c,
              self.ph, self.iph, 1j * pc.res * pc.s_kr * pc.s_kr, m)
        return m

    def solve_near(self, compliances: list[np.ndarray], nominal: np.ndarray,
                   row_pitch: float, *, tol: float = 1e-12,
                   max_iter: int = 30) -> tuple[list[dict[str, np.ndarray]], dict[str, int]]:
        """`solve` for several sets of compliances close to ``nominal`` (robustness draws):
        the nominal Foldy matrix M0 is inverted once per frequency and each draw's system
        (M0 + D) F = u_inc, D = diag(b (c - c0)), is solved by the fixed-point iteration
        F <- F0 - M0^-1 (D F) (a Neumann series; converges when the spectral radius of
        M0^-1 D is below 1, i.e. for small height errors). A frequency whose iteration has not
        settled to ``tol`` (relative change of the forces) after ``max_iter`` steps is solved
        directly, so every result is as good as `solve`'s. Returns the solutions and the count
        of directly solved frequencies (``"direct"``) over all draws (``"total"``)."""
        tables = self.tables
        c0 = np.ascontiguousarray(nominal)
        n = self.x.size
        n_f = tables.omega.size
        pc = tables.pole
        m = self._matrix(c0, row_pitch)
        m_inv = np.linalg.inv(m)
        rhs = (pc.s_kr[:, None] * self.ph.T)[..., None]
        f0 = (m_inv @ rhs)[..., 0]
        out, n_direct = [], 0
        for c in compliances:
            c = np.ascontiguousarray(c)
            d = row_pitch * (c - c0)
            forces = f0
            todo = np.ones(n_f, dtype=bool)
            for _ in range(max_iter):
                # every frequency each step (one batched product; no fancy-index copies of
                # the inverse), the converged ones simply stay where they are
                new = f0 - np.matmul(m_inv, (d * forces)[..., None])[..., 0]
                change = np.max(np.abs(new - forces), axis=1)
                todo = ~(change <= tol * np.max(np.abs(new), axis=1))
                forces = new
                if not todo.any():
                    break
            forces = forces.copy()
            left = np.flatnonzero(todo)
            if left.size:
                n_direct += left.size
                mm = m[left].copy()
                mm[:, np.arange(n), np.arange(n)] += d[left]
                forces[left] = np.linalg.solve(mm, rhs[left])[..., 0]
            out.append(self._channels(forces, c, row_pitch, False))
        return out, {"direct": n_direct, "total": n_f * len(compliances)}

    def _channels(self, forces: np.ndarray, c: np.ndarray, row_pitch: float,
                  per_resonator: bool) -> dict[str, np.ndarray]:
        """Amplitudes, channel powers, per-resonator shares, moments and angles from the
        forces (docs/physics.md section 13)."""
        tables, x, jj, kk, idx, wts = self.tables, self.x, self.jj, self.kk, self.idx, self.wts
        w = tables.omega
        n_f = w.size
        res, skr = tables.pole.res, tables.pole.s_kr
        tab = tables.table
        ph, iph = self.ph, self.iph
        ft = np.ascontiguousarray(forces.T)
        a_plus = np.sum(ft * iph, axis=0)
        r_j = 1j * (res * skr)[:, None] * forces * ph.T
        t_amp = 1.0 + 1j * res * skr * a_plus
        r_amp = np.sum(r_j, axis=1)
        p_inc = w / (4.0 * res.real)
        scale = 0.5 * w / p_inc
        absorbed_j = (-0.5 * w[:, None] * row_pitch * c.imag * np.abs(forces) ** 2
                      / p_inc[:, None])
        refl_j = (np.conj(r_amp)[:, None] * r_j).real
        per = None
        if per_resonator:
            out_p, out_a, pos_b, per_b = _bulk_detailed(tab, idx, wts, jj, kk, ft, x)
            # order of CHANNELS: forward_shear, forward_compressional, backward_shear, backward_c.
            sc = scale[:, None]
            per = np.stack([refl_j, per_b[0, 0] * sc, per_b[1, 0] * sc, per_b[0, 1] * sc,
                            per_b[1, 1] * sc, absorbed_j])
        else:
            out_p, out_a, pos_b = _bulk_fast(tab, idx, wts, jj, kk, ft, x)
        fractions = np.empty((7, n_f))
        fractions[0] = np.abs(t_amp) ** 2
        fractions[1] = np.abs(r_amp) ** 2
        fractions[2], fractions[3] = out_p[0, 0] * scale, out_p[1, 0] * scale
        fractions[4], fractions[5] = out_p[0, 1] * scale, out_p[1, 1] * scale
        fractions[6] = absorbed_j.sum(axis=1)
        moments = np.array([fractions[0] * 0.0, refl_j @ x, pos_b[0, 0] * scale,
                            pos_b[1, 0] * scale, pos_b[0, 1] * scale, pos_b[1, 1] * scale,
                            absorbed_j @ x])
        with np.errstate(invalid="ignore", divide="ignore"):
            angle = np.array([
                out_a[0, 0] / out_p[0, 0], out_a[1, 0] / out_p[1, 0],
                -out_a[0, 1] / out_p[0, 1], -out_a[1, 1] / out_p[1, 1],
            ])
        return {"forces": forces, "T": t_amp, "R": r_amp, "fractions": fractions, "per": per,
                "moments": moments, "angle": angle}


def _positions(length, fr, moments) -> dict[str, np.ndarray]:
    """Power-weighted position (m) per channel, moment / fraction; nan where the channel gets
    nothing; the transmitted wave leaves at the row's end."""
    pos = {}
    for i, name in enumerate(CHANNELS):
        with np.errstate(invalid="ignore", divide="ignore"):
            val = np.full(fr.shape[1], length) if i == 0 else moments[i] / fr[i]
        pos[name] = np.where(np.abs(fr[i]) > 1e-300, val, np.nan)
    return pos


def _make_trace(freq, layout, sol, kr, lossy) -> tuple[Trace, np.ndarray]:
    fr = sol["fractions"].copy()
    if lossy:  # transmitted power at x = L of the power entering at 0 (module docstring)
        fr[0] *= np.exp(-2.0 * np.abs(kr.imag) * float(layout.length))
    total = fr.sum(axis=0)
    balance = 1.0 - total
    if lossy:
        fr[6] += balance  # the substrate's extra loss caused by the row (module docstring)
        balance = np.full(freq.size, np.nan)
    moments = sol["moments"]
    if lossy:
        # the substrate's extra loss is placed where the forces excite the ground: the
        # |F_j|^2-weighted mean position of the row
        q = np.abs(sol["forces"]) ** 2
        x_f = q @ np.asarray(layout.x, float) / q.sum(axis=1)
        moments = moments.copy()
        moments[6] = moments[6] + (fr[6] - sol["fractions"][6]) * x_f
    pos = _positions(float(layout.length), fr, moments)
    ang = {c: np.full(freq.size, np.nan) for c in CHANNELS}
    ang["transmitted_surface"] = np.where(fr[0] > 0, 90.0, np.nan)
    ang["reflected_surface"] = np.where(fr[1] > 0, -90.0, np.nan)
    for i, name in enumerate(CHANNELS[2:6]):
        ang[name] = np.where(fr[2 + i] > 0, np.degrees(sol["angle"][i]), np.nan)
    phase = np.unwrap(np.angle(sol["T"])) + kr.real * float(layout.length)
    trace = Trace(
        frequency=np.asarray(freq, float),
        fractions={c: fr[i] for i, c in enumerate(CHANNELS)},
        position=pos,
        angle=ang,
        eps_max=np.zeros(freq.size),
        is_adiabatic=np.ones(freq.size, dtype=bool),
        branch=np.full(freq.size, -1, dtype=np.int8),
        turning_position=np.full(freq.size, np.nan),
        entry_reflection=np.full(freq.size, np.nan),
        phase=phase,
        propagation="scattering",
        balance_error=None if lossy else balance,
    )
    return trace, balance


#: Grounds whose surface Green's function the tables hold (`optgrade.propagation._green`).
GREEN_GROUNDS = ("halfspace",)


def _check_ground(study: Study) -> None:
    """Refuse a ground the Green's tables do not describe (it would be traced as a half-space)."""
    from optgrade.errors import StudyError

    kind = study.substrate.kind
    if kind not in GREEN_GROUNDS:
        raise StudyError([
            f"goal.propagation: the exact row model ('scattering') has the surface Green's "
            f"function of {', '.join(GREEN_GROUNDS)} only, not of substrate.kind = {kind!r}; "
            "use goal.propagation = \"wkb\" (the WKB march uses any registered ground)"
        ])


_MEMO: dict[str, GreenTables] = {}


def tables_for_study(
    study: Study, layout: Layout | None = None, freq: ArrayLike | None = None,
    *, model: str | None = None, cache_dir=None,
) -> GreenTables:
    """Green's-function tables for a study (kept in memory and on disk per key).

    Separation range: from 0.98 x the study's smallest spacing to 1.02 x its longest row
    (``layout.max_length``), widened to the layout's own separations when it lies outside.
    """
    sub, res = study.substrate, study.resonator
    f = study_frequencies(study) if freq is None else np.atleast_1d(np.asarray(freq, float))
    x_lo = 0.98 * float(study.layout.spacing[0])
    x_hi = 1.02 * float(study.layout.max_length)
    if layout is not None and layout.n_resonators > 1:
        sp = np.diff(np.asarray(layout.x, float))
        x_lo = min(x_lo, 0.98 * float(sp.min()))
        x_hi = max(x_hi, 1.02 * float(layout.x[-1] - layout.x[0]))
    spec = GreenSpec(
        float(sub.density), float(sub.cl), float(sub.ct), float(sub.loss_factor or 0.0),
        model or study.goal.model, float(res.diameter), float(res.row_pitch),
        tuple(float(v) for v in f), x_lo, x_hi,
    )
    key = spec.key()
    if key not in _MEMO:
        if len(_MEMO) > 8:
            _MEMO.pop(next(iter(_MEMO)))
        _MEMO[key] = GreenTables(spec, cache_dir=cache_dir)
    return _MEMO[key]


def _compliance(resonator, tables: GreenTables, layout: Layout) -> np.ndarray:
    """Base compliance 1/Z of every resonator at the tables' frequencies, (n_freq, n) m/N."""
    return resonator.compliance(tables.omega[:, None], np.asarray(layout.height, float)[None, :],
                                np.asarray(layout.head_mass, float)[None, :])


def scattering_trace(
    study: Study,
    layout: Layout,
    freq: ArrayLike | None = None,
    *,
    model: str | None = None,
    cache_dir=None,
    tables: GreenTables | None = None,
    per_resonator: bool = True,
    far_face_detail: bool = True,
) -> ScatteringResult:
    """Exact multiple-scattering trace of a layout over the study's band (or ``freq``, Hz).

    Parameters
    ----------
    study : Study
        Validated study (substrate, resonator material / diameter / row pitch, goal band and
        model, layout limits).
    layout : Layout
        The row (positions, heights, head masses; diameter must be the study's).
    freq : array_like, optional
        Frequencies (Hz); default the study's grid (`study_frequencies`).
    model : {"lattice", "line"}, optional
        Default ``study.goal.model``.
    tables : GreenTables, optional
        Prebuilt tables (their frequencies are used).
    per_resonator : bool
        Keep each resonator's share of every channel (``resonator_power``; the channel map);
        False is faster and gives the same trace.
    far_face_detail : bool
        With ``substrate.thickness``: the whole far-face map (True) or only the zone integral
        of ``[goal.far_face]`` (False, much faster; the same zone number).

    Returns
    -------
    ScatteringResult
    """
    from optgrade.resonators import resonator_of

    _check_ground(study)
    res = study.resonator
    d = float(res.diameter)
    diam = np.asarray(layout.diameter, float)
    if np.any(np.abs(diam - d) > 1e-9 * d):
        raise ValueError(
            f"layout.diameter: every resonator must have the study's diameter {d:g} m for the "
            "tabulated footprint"
        )
    if tables is None:
        tables = tables_for_study(study, layout, freq, model=model, cache_dir=cache_dir)
    comp = _compliance(resonator_of(study), tables, layout)
    sol = solve_row(tables, layout.x, comp, float(res.row_pitch), per_resonator=per_resonator)
    lossy = float(study.substrate.loss_factor or 0.0) > 0.0
    trace, balance = _make_trace(tables.freq, layout, sol, tables.pole.kr, lossy)
    if getattr(study.substrate, "thickness", None) is not None:
        trace = _with_far_face(study, layout, trace, sol["forces"], model or study.goal.model,
                               far_face_detail)
    return ScatteringResult(trace, balance, sol["forces"], sol["T"], sol["R"], sol["per"])



def _with_far_face(study: Study, layout: Layout, trace: Trace, forces: np.ndarray,
                   model: str, detail: bool = True) -> Trace:
    """``trace`` with the far-face map of a block (docs/physics.md section 14); without
    ``detail`` only the zone integral the far_face goal scores (the search's fast path)."""
    from dataclasses import replace

    from optgrade.propagation._farface import face_grid, far_face_map

    h = float(study.substrate.thickness)
    zone = None if study.goal.far_face is None else study.goal.far_face.x_range
    x = np.asarray(layout.x, float)
    grid = face_grid(float(x[0]), float(x[-1]), h, float(study.substrate.ct),
                     float(np.max(trace.frequency)), zone)
    face = far_face_map(study.substrate, trace.frequency, x, forces,
                        float(study.resonator.diameter), model, h, grid if detail else None,
                        zone=zone, trace=trace)
    return replace(trace, far_face=face)


@PROPAGATION_MODELS.register
class ScatteringModel(PropagationModel):
    """The exact multiple-scattering row model behind the propagation interface (registered as
    ``scattering``; the registry loads it once ``optgrade.propagation._scattering`` is listed
    among its built-in modules or imported).

    Parameters
    ----------
    study : Study
    model : {"lattice", "line"}, optional
        Footprint variant; default ``study.goal.model``.
    cache_dir : path or False, optional
        Green's-table cache (default $OPTGRADE_CACHE or ~/.cache/optgrade).
    """

    name = "scattering"

    def __init__(self, study: Study, model: str | None = None, cache_dir=None) -> None:
        super().__init__(study)
        _check_ground(study)
        self.model = model or study.goal.model
        self.cache_dir = cache_dir

    def result(self, layout: Layout, freq: ArrayLike | None = None, *,
               per_resonator: bool = False) -> ScatteringResult:
        """Result (trace, balance error, forces, amplitudes; the per-resonator shares with
        ``per_resonator``) over ``freq`` (Hz)."""
        f = self.frequencies(freq)
        return scattering_trace(self.study, layout, f, model=self.model, cache_dir=self.cache_dir,
                                per_resonator=per_resonator,
                                far_face_detail=self.far_face_detail)

    def trace_height_errors(self, layout: Layout, errors: np.ndarray) -> list[Trace]:
        """Exact traces of ``layout`` with each row of ``errors`` (m) added to the rod heights,
        over the study's grid: the positions do not change, so the pairs, table stencils,
        phases and off-diagonal couplings are built once (`_RowGeometry`) and each draw only
        solves near the nominal system (`_RowGeometry.solve_near`: one inverse, a few
        matrix-vector products per draw) and evaluates its channels. Equal to tracing each
        perturbed layout to about 1e-12 (tests/test_scattering.py)."""
        from optgrade.layout import with_height_errors
        from optgrade.resonators import resonator_of

        study = self.study
        tables = tables_for_study(study, layout, self.frequencies(None), model=self.model,
                                  cache_dir=self.cache_dir)
        row = _RowGeometry.of(tables, layout.x)
        resonator = resonator_of(study)
        lossy = float(study.substrate.loss_factor or 0.0) > 0.0
        lays = [with_height_errors(layout, e) for e in np.atleast_2d(errors)]
        sols, _ = row.solve_near([_compliance(resonator, tables, lay) for lay in lays],
                                 _compliance(resonator, tables, layout),
                                 float(study.resonator.row_pitch))
        return [_make_trace(tables.freq, lay, sol, tables.pole.kr, lossy)[0]
                for lay, sol in zip(lays, sols, strict=True)]

    def trace_detail(
        self, layout: Layout, freq: ArrayLike | None = None
    ) -> tuple[Trace, np.ndarray | None]:
        """Trace and each resonator's share of reflected, bulk and absorbed power (see
        `PropagationModel.trace_detail`)."""
        res = self.result(layout, freq, per_resonator=True)
        return res.trace, res.resonator_power

    def trace(self, layout: Layout, freq: ArrayLike | None = None) -> Trace:
        """Exact trace of ``layout`` over ``freq`` (Hz; the study's grid when omitted); its
        ``balance_error`` is the energy-balance residual (None on a lossy substrate)."""
        return self.result(layout, freq).trace
