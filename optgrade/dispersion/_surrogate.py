"""Fast local dispersion from tabulated lattice sums: the surrogate behind every search trial.

The rod enters the Bloch relation 1/Z(w) = Sigma(K, w) only through 1/Z, and Sigma splits into
two closed-form harmonics and a smooth rest (see `optgrade.dispersion._direct`):

    Sigma = T_0(K) + T_-1(K) + Rest(K, w; a)

So the surrogate tabulates Rest once per substrate, contact radius, row pitch and model, on

* spacing levels a_l across the spacing range (one level if the range is a single value),
  geometrically spaced with a ratio of at most 1 + `LEVEL_STEP`; Rest at another spacing is the
  4-point Lagrange (cubic) interpolation between neighbouring levels;
* kappa = K a / pi on [-3 dk, 1 + 3 dk] (Rest is symmetric about kappa = 1, the zone edge, so
  the extended zone 1 < kappa < 2 reads the mirror), cubic (Catmull-Rom) interpolation;
* angular frequency w uniform over the (padded) frequency range, linear interpolation;

and then solves any rod height, head mass and spacing with the compiled root kernel below (same
algorithm as `optgrade.dispersion._direct.solve_points`, exact closed-form T_0 and T_-1 at complex K, so the
tables only have to carry the smooth part). Accuracy against the direct solver is measured in
tests/test_surrogate.py (|dK'|/K' < 1e-3 on bound branches, K'' within 5 %).

Kernel speed (benchmarks/bench_dispersion.py, benchmarks/bench_propagation.py; method, checks
and figures in docs/surrogate-speed.md). Real axis: the pole-side sign of the pole-free Re D is
kept per cell and branch; the bracket is continued from the roots of the branch's last visits
(first a narrow one about their linear extrapolation, then the wide one about K w / w_prev,
sign-checked; where both fail but their failed ends enclose the root, those; else the full
scan); a branch that had no root stays without root while the scan point that came closest to a
sign change keeps GAP_KEEP of its margin (one evaluation instead of the scan; a full scan at
least every GAP_RESCAN frequencies, the interval doubling up to GAP_RESCAN_MAX while the rescans
find the gap no narrower, and always after a frequency step above GAP_STEP); Illinois stops at
ILLINOIS_TOL, or where inverse quadratic interpolation through the bracket ends and the newest
point confirms the root, and in a continued bracket takes that interpolation as its next point.
Complex Newton on D R_0: analytic slope (`_pole_free_d`), iteration count and acceptance of the
difference-slope Newton of `optgrade.dispersion._direct`, whose first step reuses D and its slope at the
real-axis root and whose last iteration is skipped where quadratic convergence predicts it below
the stop (never the final one, so acceptance is unchanged); the difference-slope Newton remains
the fallback where the analytic one missed the acceptance step by little (FD_RETRY); the disc
form-factor series stops as early as each argument allows. The rod's compliance is evaluated
only at the points solved, and `path_only` solves only the points the WKB march reads. Checked
against the earlier kernels of this file on 20 x 60 random cells x 256 frequencies of each
example study: no branch appears or vanishes, the same first-order points, K within 1e-8 at
Newton roots and 1.6e-7 at first-order ones (relative).

Disk cache: one memory-mappable ``<key>.npy`` (complex table) plus ``<key>.json`` (key, format
version, grids, SHA-256 of the table bytes) under ``cache_dir`` (default: environment variable
OPTGRADE_CACHE or ~/.cache/optgrade). The key hashes every input and `FORMAT_VERSION`. A file
whose stored key or checksum does not match, or that cannot be read, is rebuilt, never trusted.
Writes are atomic (temporary file then os.replace).
"""

from __future__ import annotations

import cmath
import hashlib
import json
import math
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numba import njit
from numpy.typing import ArrayLike

from optgrade.dispersion._lattice import (
    _DYNAMIC_KT,
    _DYNAMIC_XR,
    _STATIC_XR,
    MODELS,
    lattice_sum,
    main_orders,
)
from optgrade.ground import Substrate
from optgrade.resonators import Rod, rod_constants, rod_parts_at

__all__ = ["LocalModes", "Surrogate", "surrogate_for_study", "FORMAT_VERSION", "default_cache_dir"]

#: bump when the table layout or the lattice-sum numerics change
FORMAT_VERSION = 2
#: largest ratio between neighbouring spacing levels, minus one
LEVEL_STEP = 0.15
#: table resolution: points along kappa in [0, 1] and along w
N_KAPPA = 49
N_FREQ = 97
#: relative padding of the frequency range in `Surrogate.from_study`
FREQ_PAD = 0.05


@dataclass(frozen=True)
class LocalModes:
    """Local Bloch modes of cells j at frequencies f (contract in DEVELOPERS.md).

    k : complex (2, n_cells, n_freq) Bloch wavenumber K' + i K'' (1/m); branch 0 = lower
        (surface) branch, branch 1 = upper branch above the rod resonance; nan where absent.
    shares : float (2, 5, n_cells, n_freq) split of K'' over [forward_shear,
        forward_compressional, backward_shear, backward_compressional, absorbed]; sums to 1
        where K'' > 0.
    angle : float (2, 4, n_cells, n_freq) radiation angle from the surface normal (rad) of the
        four radiating channels, negative = pointing back to the source; nan where closed.
    """

    k: np.ndarray
    shares: np.ndarray
    angle: np.ndarray


def default_cache_dir() -> Path:
    """Cache directory: $OPTGRADE_CACHE or ~/.cache/optgrade."""
    env = os.environ.get("OPTGRADE_CACHE")
    return Path(env) if env else Path.home() / ".cache" / "optgrade"


def _spacing_levels(lo: float, hi: float) -> np.ndarray:
    if hi < lo:
        raise ValueError(f"spacing_range must be increasing, got ({lo}, {hi})")
    if hi <= lo * (1.0 + 1e-12):
        return np.array([lo])
    n = int(np.ceil(np.log(hi / lo) / np.log1p(LEVEL_STEP))) + 1
    n = max(n, 4)
    return np.geomspace(lo, hi, n)


def _lagrange_weights(levels: np.ndarray, a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Indices (n, k) and weights (n, k) of cubic (4-point) Lagrange interpolation in log a."""
    n_lev = levels.size
    if n_lev == 1:
        return np.zeros((a.size, 1), dtype=int), np.ones((a.size, 1))
    x = np.log(levels)
    xa = np.log(a)
    k = min(4, n_lev)
    j = np.clip(np.searchsorted(x, xa) - k // 2, 0, n_lev - k)
    idx = j[:, None] + np.arange(k)[None, :]
    xs = x[idx]
    wts = np.ones((a.size, k))
    for i in range(k):
        for m in range(k):
            if m != i:
                wts[:, i] *= (xa - xs[:, m]) / (xs[:, i] - xs[:, m])
    return idx, wts


class Surrogate:
    """Tabulated dispersion of one substrate / rod material / row pitch / model.

    Parameters
    ----------
    substrate : Substrate
    rod : Rod
        Rod material and diameter (height and head mass are free per call).
    row_pitch : float
        Row pitch b (m).
    spacing_range : tuple of float
        Smallest and largest spacing a (m) the tables must cover.
    freq_range : tuple of float
        Frequency range (Hz) the tables must cover.
    model : {"lattice", "line", "homogenised"}
    cache_dir : path, optional
        Table cache directory (default `default_cache_dir()`); ``False`` disables the cache.
    """

    def __init__(
        self,
        substrate: Substrate,
        rod: Rod,
        row_pitch: float,
        spacing_range: tuple[float, float],
        freq_range: tuple[float, float],
        model: str = "lattice",
        cache_dir: str | os.PathLike | None | bool = None,
    ) -> None:
        if model not in MODELS:
            raise ValueError(f"model must be one of {MODELS}, got {model!r}")
        f_lo, f_hi = (float(v) for v in freq_range)
        if not (0 < f_lo < f_hi):
            raise ValueError(f"freq_range must be increasing and positive, got {freq_range}")
        self.substrate = substrate
        self.rod = rod
        self.row_pitch = float(row_pitch)
        self.model = model
        self.spacing_range = (float(spacing_range[0]), float(spacing_range[1]))
        self.freq_range = (f_lo, f_hi)
        self.levels = _spacing_levels(*self.spacing_range)
        self.dk = 1.0 / (N_KAPPA - 1)
        self.kappa = -3 * self.dk + self.dk * np.arange(N_KAPPA + 6)
        self.omega = np.linspace(2 * np.pi * f_lo, 2 * np.pi * f_hi, N_FREQ)
        kr_max = 2 * np.pi * f_hi / substrate.cr
        self.n_main = main_orders(self.spacing_range[1], kr_max, model)
        # Taylor terms of the disc form factor that the kernel's arguments can need
        x_max = 1.5 * (self.n_main + 1) * 2 * np.pi / (0.98 * self.spacing_range[0]) * rod.radius
        self._coef = _series_table(_n_taylor_terms(x_max))
        from optgrade.dispersion._direct import validity_warnings

        #: model-validity notes for the whole table range (plain sentences)
        self.warnings = tuple(
            validity_warnings(substrate, rod, self.spacing_range[1], self.row_pitch, f_hi, model)
        )
        self.was_loaded = False
        self.cache_path: Path | None = None
        self.table = self._load_or_build(cache_dir)

    # -- construction -------------------------------------------------------------------
    @classmethod
    def from_study(cls, study: Any, model: str | None = None, cache_dir=None) -> Surrogate:
        """Surrogate for a validated study: its substrate, resonator, spacing range and goal
        band (padded by `FREQ_PAD`); model defaults to ``study.goal.model``."""
        sub = study.substrate
        res = study.resonator
        substrate = Substrate(
            float(sub.density), float(sub.cl), float(sub.ct), float(sub.loss_factor or 0.0)
        )
        rod = Rod(
            float(res.youngs_modulus),
            float(res.density),
            float(res.diameter),
            float(res.loss_factor or 0.0),
        )
        f_lo, f_hi = (float(v) for v in study.goal.band)
        span = f_hi - f_lo
        band = (max(f_lo - FREQ_PAD * span, 0.5 * f_lo), f_hi + FREQ_PAD * span)
        return cls(
            substrate,
            rod,
            float(res.row_pitch),
            tuple(float(v) for v in study.layout.spacing),
            band,
            model=model or getattr(study.goal, "model", "lattice"),
            cache_dir=cache_dir,
        )

    def key(self) -> str:
        """Hash of every input of the tables and the format version (hex)."""
        s = self.substrate
        payload = {
            "format": FORMAT_VERSION,
            "substrate": [s.density, s.cl, s.ct, s.loss_factor],
            "radius": self.rod.radius,
            "row_pitch": self.row_pitch,
            "model": self.model,
            "levels": [float(v) for v in self.levels],
            "kappa": [N_KAPPA, float(self.kappa[0]), float(self.dk)],
            "omega": [float(self.omega[0]), float(self.omega[-1]), N_FREQ],
            "sums": [_STATIC_XR, _DYNAMIC_XR, _DYNAMIC_KT, self.n_main],
        }
        text = json.dumps(payload, sort_keys=True)
        return hashlib.sha256(text.encode()).hexdigest()[:32]

    def build_table(self) -> np.ndarray:
        """Compute Rest on (levels, kappa, omega) by direct lattice sums (complex, m/N)."""
        out = np.empty((self.levels.size, self.kappa.size, self.omega.size), dtype=complex)
        for i, a in enumerate(self.levels):
            K = self.kappa[:, None] * np.pi / a
            out[i] = lattice_sum(
                K,
                self.omega[None, :],
                self.substrate,
                float(a),
                self.row_pitch,
                self.rod.radius,
                self.model,
                exclude_main=self.n_main,
            )
        return out

    def _load_or_build(self, cache_dir) -> np.ndarray:
        if cache_dir is False:
            return self.build_table()
        root = Path(cache_dir) if cache_dir is not None else default_cache_dir()
        key = self.key()
        path = root / f"tables-{key}.npy"
        meta_path = root / f"tables-{key}.json"
        self.cache_path = path
        table = _read_cached(path, meta_path, key, self._shape())
        if table is not None:
            self.was_loaded = True
            return table
        table = self.build_table()
        try:
            root.mkdir(parents=True, exist_ok=True)
            _write_cached(path, meta_path, key, table)
            loaded = _read_cached(path, meta_path, key, self._shape())
            if loaded is not None:
                return loaded
        except OSError:
            pass
        return table

    def _shape(self) -> tuple[int, int, int]:
        return (self.levels.size, self.kappa.size, self.omega.size)

    # -- queries ------------------------------------------------------------------------
    @property
    def cr(self) -> float:
        """Rayleigh speed of the substrate (m/s)."""
        return self.substrate.cr

    def local_modes(
        self,
        height: ArrayLike,
        spacing: ArrayLike,
        head_mass: ArrayLike,
        freq: ArrayLike,
        *,
        path_only: bool = False,
    ) -> LocalModes:
        """Local Bloch modes of cells (arrays broadcast together) at frequencies freq (Hz).

        Spacing must lie in ``spacing_range`` (2 % tolerance) and freq in ``freq_range``
        (frequencies outside are clipped to the table edge for Rest only).

        With ``path_only`` the cells are a row in order from the entry, and only the points
        the WKB march (`optgrade.propagation._wkb.march`) reads are solved: the branch it follows at
        each frequency, up to and including the first cell where that branch has no root.
        Every other point is left as if absent (nan). The march's result is the same as from
        the full modes (tests/test_propagation.py); 2-5 times fewer roots on graded rows.
        """
        h, a, m = np.broadcast_arrays(
            np.atleast_1d(np.asarray(height, float)),
            np.atleast_1d(np.asarray(spacing, float)),
            np.atleast_1d(np.asarray(head_mass, float)),
        )
        h, a, m = h.ravel(), a.ravel(), m.ravel()
        freq = np.atleast_1d(np.asarray(freq, dtype=float))
        lo, hi = self.spacing_range
        if np.any(a < lo * 0.98) or np.any(a > hi * 1.02):
            raise ValueError(
                f"spacing outside the surrogate's range [{lo:.6g}, {hi:.6g}] m: "
                f"got [{a.min():.6g}, {a.max():.6g}]"
            )
        w = 2 * np.pi * freq
        idx, wts = _lagrange_weights(self.levels, a)
        n_c, n_f = a.size, freq.size
        out_k = np.full((2, n_c, n_f), np.nan + 0j)
        out_sh = np.zeros((2, 5, n_c, n_f))
        out_an = np.full((2, 4, n_c, n_f), np.nan)
        out_fo = np.zeros((2, n_c, n_f), dtype=np.bool_)
        s = self.substrate
        clc, ctc = s.complex_speeds
        solve_grid(
            w,
            h,
            m,
            *rod_constants(self.rod),
            a,
            np.asarray(self.table),
            idx,
            wts,
            float(self.kappa[0]),
            float(self.dk),
            float(self.omega[0]),
            float(self.omega[1] - self.omega[0]),
            float(s.cl),
            float(s.ct),
            float(s.cr),
            complex(clc),
            complex(ctc),
            complex(s.mu),
            complex(s.complex_mu),
            float(s.loss_factor),
            self.row_pitch,
            self.rod.radius,
            {"lattice": 0, "line": 1, "homogenised": 2}[self.model],
            self._coef,
            self.n_main,
            out_k,
            out_sh,
            out_an,
            out_fo,
            bool(path_only),
        )
        self.last_first_order = out_fo
        return LocalModes(k=out_k, shares=out_sh, angle=out_an)


def surrogate_for_study(study: Any, model: str | None = None, cache_dir=None) -> Surrogate:
    """Shorthand for `Surrogate.from_study` (used by the propagation stage)."""
    return Surrogate.from_study(study, model=model, cache_dir=cache_dir)


def _sha256(arr: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(arr).view(np.uint8)).hexdigest()


def _read_cached(path: Path, meta_path: Path, key: str, shape) -> np.ndarray | None:
    try:
        meta = json.loads(meta_path.read_text())
        if meta.get("key") != key or meta.get("format") != FORMAT_VERSION:
            return None
        table = np.load(path, mmap_mode="r", allow_pickle=False)
        if table.shape != tuple(shape) or table.dtype != np.complex128:
            return None
        if _sha256(table) != meta.get("sha256"):
            return None
        return table
    except (OSError, ValueError, json.JSONDecodeError, TypeError, AttributeError):
        return None


def _atomic_write(path: Path, write) -> None:
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=path.name, suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def _write_cached(path: Path, meta_path: Path, key: str, table: np.ndarray) -> None:
    _atomic_write(path, lambda fh: np.save(fh, table, allow_pickle=False))
    meta = {"key": key, "format": FORMAT_VERSION, "sha256": _sha256(table), "shape": table.shape}
    _atomic_write(meta_path, lambda fh: fh.write(json.dumps(meta).encode()))


# ---------------------------------------------------------------------------------------
# Compiled root kernel: the algorithm of optgrade.dispersion._direct.solve_points, one point at a time.
# ---------------------------------------------------------------------------------------
N_SCAN = 16
#: Newton stops at |step| <= NEWTON_TOL |K| (quadratic convergence with a forward-difference
#: slope of relative error ~1e-6: the iterate's error is then ~1e-6 of the last step)
NEWTON_TOL = 1e-8
#: a Newton root is accepted when its last step is at most this fraction of |K|
NEWTON_ACCEPT = 1e-7
#: iterations of the analytic-slope Newton (the difference-slope one keeps N_NEWTON)
N_NEWTON_D = 4
MAX_ILLINOIS = 60
#: the difference-slope Newton runs when the analytic-slope one is not accepted and its last step
#: was between NEWTON_ACCEPT and this fraction of |K|: on 4 x 60 random cells x 256
#: frequencies of the site example it rescued 14 of 4793 retries, all at 1.00-1.01e-7 (see
#: solve_grid); elsewhere both Newtons follow the same path
FD_RETRY = 2e-7
#: Illinois stops when the bracket or the last move is below this fraction of K (the complex
#: Newton that follows a lossy or leaky root refines K' as well)
ILLINOIS_TOL = 1e-9
#: gap continuation: a branch without root stays without root while the closest scan point
#: keeps this fraction of the margin of the last full scan ...
GAP_KEEP = 0.5
#: ... for at most this many frequencies in a row, and only across frequency steps of at most
#: this fraction of the frequency
GAP_RESCAN = 8
GAP_RESCAN_MAX = 32
GAP_STEP = 0.01
N_NEWTON = 4
N_LOSS_STAGES = 1

# Taylor coefficients of 2 J1(x)/x in x^2 (|x| <= 4 is all the two main terms need)
_COEF = np.array(
    [(-1.0) ** k / (4.0**k * math.factorial(k) * math.factorial(k + 1)) for k in range(22)]
)


def _n_taylor_terms(x_max: float, tol: float = 1e-16) -> int:
    """Number of Taylor terms of 2 J1(x)/x in x^2 (series of `_COEF`) after which every
    further term is below ``tol`` for |x| <= ``x_max`` (the terms fall faster than
    geometrically once they fall, so the tail is of the order of the first dropped term).
    Abramowitz & Stegun 9.1.10 (ascending series of J1)."""
    x2 = x_max * x_max
    for n in range(4, _COEF.size + 1):
        if abs(_COEF[n - 1]) * x2 ** (n - 1) < tol and x2 / (4.0 * n * (n + 1)) < 0.5:
            return n
    return int(_COEF.size)


def _series_table(n_max: int, tol: float = 1e-16) -> np.ndarray:
    """Coefficients of 2 J1(x)/x in x^2 (first n_max of `_COEF`) followed by, for n = 1 ..
    n_max terms, the largest |x^2| for which n terms meet the criterion of `_n_taylor_terms`
    (the kernel's series then stop as early as each argument allows; the last is inf)."""
    thr = np.empty(n_max)
    for n in range(1, n_max + 1):
        c = abs(_COEF[n - 1])
        lim = (tol / c) ** (1.0 / (n - 1)) if n > 1 else 0.0
        thr[n - 1] = min(lim, 2.0 * n * (n + 1))
    thr[-1] = np.inf
    return np.concatenate([_COEF[:n_max], thr])


@njit(cache=True, inline="always")
def _n_used(coef, ax2):
    """Number of series terms needed at |x^2| = ax2 (see `_series_table`)."""
    n_max = coef.size // 2
    n = 4 if n_max > 4 else n_max
    while n < n_max and coef[n_max + n - 1] < ax2:
        n += 1
    return n


@njit(cache=True)
def _blend_column(table, idx, wts, c, out, j):
    """Column j (one table frequency) of cell c's table slice into out:
    sum_k wts[c, k] table[idx[c, k], :, j] (spacing interpolation)."""
    out[:, j] = 0.0
    for k in range(idx.shape[1]):
        wk = wts[c, k]
        for i in range(table.shape[1]):
            out[i, j] += wk * table[idx[c, k], i, j]


@njit(cache=True)
def _same_blend(idx, wts, c):
    """Whether cell c interpolates between the same levels with the same weights as cell c - 1."""
    if c == 0:
        return False
    for k in range(idx.shape[1]):
        if idx[c, k] != idx[c - 1, k] or wts[c, k] != wts[c - 1, k]:
            return False
    return True


@njit(cache=True, inline="always")
def _sqrt_right(z):
    """Principal square root of z with Re z >= 0 (the only half-plane `_vert` needs): two
    real roots and a division, half the time of cmath.sqrt in the compiled kernel."""
    x = z.real
    y = z.imag
    t = math.sqrt(0.5 * (math.sqrt(x * x + y * y) + x))
    if t == 0.0:
        return 0j
    return complex(t, 0.5 * y / t)


@njit(cache=True, inline="always")
def _mag(z):
    """|z| of a complex number without hypot's overflow guard (the kernel's magnitudes are far
    from the float range's ends): several times faster than abs(z) in the compiled kernel."""
    return math.sqrt(z.real * z.real + z.imag * z.imag)


@njit(cache=True, inline="always")
def _vert(q, k2):
    d = q - k2
    if d.real < 0.0:
        return -1j * _sqrt_right(-d)
    return _sqrt_right(d)


@njit(cache=True)
def _compliance(q, kl2, kt2, mu):
    alpha = _vert(q, kl2)
    beta = _vert(q, kt2)
    a = (2.0 * q - kt2) * (2.0 * q - kt2)
    b = 4.0 * q * alpha * beta
    den = a + b
    if abs(den) >= abs(a):
        num = (
            16.0 * q * q * q * (kl2 - kt2)
            + 8.0 * q * q * kt2 * (3.0 * kt2 - 2.0 * kl2)
            - 8.0 * q * kt2 * kt2 * kt2
            + kt2 * kt2 * kt2 * kt2
        )
        r = num / den
    else:
        r = a - b
    return -alpha * kt2 / (mu * r)


@njit(cache=True)
def _ff2(q, radius, model, coef):
    # model: 0 lattice (disc), 1 line (strip), 2 homogenised
    if model == 2:
        return 1.0 + 0j
    x2 = q * radius * radius
    if model == 0:
        n = _n_used(coef, abs(x2))
        s = coef[n - 1] * x2 + coef[n - 2]
        for i in range(n - 3, -1, -1):
            s = s * x2 + coef[i]
    else:
        if abs(x2) < 1e-12:
            s = 1.0 - x2 / 6.0
        else:
            x = cmath.sqrt(x2 + 0j)
            s = cmath.sin(x) / x
    return s * s + 0j


@njit(cache=True)
def _main(K, a, b, radius, model, kl2, kt2, mu, coef, n_main):
    g = 2.0 * math.pi / a
    if model == 2:
        q0 = K * K
        return _compliance(q0, kl2, kt2, mu) * _ff2(q0, radius, model, coef) / (a * b)
    t = 0j
    for m in range(-n_main, n_main):
        x = K + m * g
        q = x * x
        t += _compliance(q, kl2, kt2, mu) * _ff2(q, radius, model, coef)
    return t / (a * b)


@njit(cache=True, inline="always")
def _kappa_cell(K, a, n, k0, dk):
    """Catmull-Rom stencil start j, offset u and mirror sign of real K on the kappa grid (Rest is
    symmetric about the zone edge kappa = 1)."""
    kap = K * a / math.pi
    sgn = 1.0
    if kap > 1.0:
        kap = 2.0 - kap
        sgn = -1.0
    t = (kap - k0) / dk
    j = int(math.floor(t))
    if j < 1:
        j = 1
    if j > n - 3:
        j = n - 3
    return j, t - j, sgn


@njit(cache=True, inline="always")
def _cr_weights(u):
    """Catmull-Rom weights of the four stencil points at offset u."""
    u2 = u * u
    u3 = u2 * u
    return (
        -0.5 * u3 + u2 - 0.5 * u,
        1.5 * u3 - 2.5 * u2 + 1.0,
        -1.5 * u3 + 2.0 * u2 + 0.5 * u,
        0.5 * u3 - 0.5 * u2,
    )


@njit(cache=True)
def _rest(K, a, table, k0, dk, wi, wt):
    """Rest and dRest/dK at real K from one cell's table slice (n_kappa, n_w)."""
    j, u, sgn = _kappa_cell(K, a, table.shape[0], k0, dk)
    c0, c1, c2, c3 = _cr_weights(u)
    u2 = u * u
    d0 = -1.5 * u2 + 2.0 * u - 0.5
    d1 = 4.5 * u2 - 5.0 * u
    d2 = -4.5 * u2 + 4.0 * u + 0.5
    d3 = 1.5 * u2 - u
    v0 = (1.0 - wt) * table[j - 1, wi] + wt * table[j - 1, wi + 1]
    v1 = (1.0 - wt) * table[j, wi] + wt * table[j, wi + 1]
    v2 = (1.0 - wt) * table[j + 1, wi] + wt * table[j + 1, wi + 1]
    v3 = (1.0 - wt) * table[j + 2, wi] + wt * table[j + 2, wi + 1]
    val = c0 * v0 + c1 * v1 + c2 * v2 + c3 * v3
    der = d0 * v0 + d1 * v1 + d2 * v2 + d3 * v3
    return val, sgn * der / dk * a / math.pi


@njit(cache=True, inline="always")
def _rest_re(K, a, table, k0, dk, wi, wt):
    """Re Rest at real K (the value of `_rest` only, real part: the real-axis scan's path)."""
    j, u, _ = _kappa_cell(K, a, table.shape[0], k0, dk)
    c0, c1, c2, c3 = _cr_weights(u)
    w0 = 1.0 - wt
    return (
        c0 * (w0 * table[j - 1, wi].real + wt * table[j - 1, wi + 1].real)
        + c1 * (w0 * table[j, wi].real + wt * table[j, wi + 1].real)
        + c2 * (w0 * table[j + 1, wi].real + wt * table[j + 1, wi + 1].real)
        + c3 * (w0 * table[j + 2, wi].real + wt * table[j + 2, wi + 1].real)
    )


@njit(cache=True)
def _split_shear(xi2, kl2, kt2):
    p = math.sqrt(max(kl2 - xi2, 0.0))
    q = math.sqrt(max(kt2 - xi2, 0.0))
    if q <= 0.0:
        return 0.0
    if p <= 0.0:
        return 1.0
    ratio = 4.0 * xi2 * p * q / (2.0 * xi2 - kt2) ** 2
    return ratio / (1.0 + ratio)


@njit(cache=True, inline="always")
def _re_compliance(q, kl2, kt2, mu):
    """Re G at real xi^2 = q for a lossless solid (real arithmetic, same branches as _vert)."""
    c = (2.0 * q - kt2) ** 2
    if q >= kt2:
        al = math.sqrt(q - kl2)
        be = math.sqrt(q - kt2)
        r = c - 4.0 * q * al * be
        if abs(c + 4.0 * q * al * be) >= abs(c):
            num = (
                16.0 * q**3 * (kl2 - kt2)
                + 8.0 * q**2 * kt2 * (3.0 * kt2 - 2.0 * kl2)
                - 8.0 * q * kt2**3
                + kt2**4
            )
            r = num / (c + 4.0 * q * al * be)
        return -al * kt2 / (mu * r)
    if q > kl2:
        al = math.sqrt(q - kl2)
        bb = 4.0 * q * al * math.sqrt(kt2 - q)  # R = c + i bb
        return -al * kt2 * c / (mu * (c * c + bb * bb))
    return 0.0


@njit(cache=True)
def _im_compliance(q, kl2, kt2, mu):
    """Im G at real xi^2 = q below kT^2 for a lossless solid, in real arithmetic (the radiating
    harmonics of the channel split): with p = sqrt(kL^2 - q), s = sqrt(kT^2 - q), c = 2q - kT^2,
    Im G = p kT^2 / (mu (c^2 + 4 q p s)) below kL^2, and with p = sqrt(q - kL^2) above it
    Im G = 4 q p^2 s kT^2 / (mu (c^4 + 16 q^2 p^2 s^2)) (same branches as `_vert`)."""
    c = 2.0 * q - kt2
    s = math.sqrt(max(kt2 - q, 0.0))
    if q < kl2:
        p = math.sqrt(kl2 - q)
        return p * kt2 / (mu * (c * c + 4.0 * q * p * s))
    p2 = q - kl2
    return 4.0 * q * p2 * s * kt2 / (mu * (c * c * c * c + 16.0 * q * q * p2 * s * s))


@njit(cache=True, inline="always")
def _ff2_re(q, radius, model, coef):
    if model == 2:
        return 1.0
    x2 = q * radius * radius
    if model == 0:
        n = _n_used(coef, abs(x2))
        s = coef[n - 1] * x2 + coef[n - 2]
        for i in range(n - 3, -1, -1):
            s = s * x2 + coef[i]
    else:
        if x2 < 1e-12:
            s = 1.0 - x2 / 6.0
        else:
            x = math.sqrt(x2)
            s = math.sin(x) / x
    return s * s


@njit(cache=True, inline="always")
def _main_re(K, a, b, radius, model, kl2, kt2, mu, coef, n_main):
    """Re of the main harmonics at real K, lossless (fast path of the real-axis scan)."""
    g = 2.0 * math.pi / a
    if model == 2:
        q0 = K * K
        return _re_compliance(q0, kl2, kt2, mu) * _ff2_re(q0, radius, model, coef) / (a * b)
    t = 0.0
    for m in range(-n_main, n_main):
        x = K + m * g
        q = x * x
        t += _re_compliance(q, kl2, kt2, mu) * _ff2_re(q, radius, model, coef)
    return t / (a * b)


@njit(cache=True)
def _scan_k(js, lo, hi, br):
    """Scan point js of N_SCAN on (lo, hi), clustered quadratically at the Rayleigh pole (lo
    for branch 0, hi for branch 1); the ends are kept 1e-9 of the interval inside."""
    if js == 0:
        u = 1e-9
    elif js == N_SCAN:
        u = 1.0 - 1e-9
    else:
        u = (js / N_SCAN) ** 2
    if br == 0:
        return lo + (hi - lo) * u
    return hi - (hi - lo) * u


@njit(cache=True)
def _rayleigh(q, kl2, kt2):
    alpha = _vert(q, kl2)
    beta = _vert(q, kt2)
    a = (2.0 * q - kt2) * (2.0 * q - kt2)
    b = 4.0 * q * alpha * beta
    return a - b


@njit(cache=True, inline="always")
def _rayleigh_d(q, kl2, kt2):
    """Rayleigh function R(q) of `_rayleigh`, dR/dq and alpha (the m = 0 vertical wavenumber):
    R' = 4 (2q - kT^2) - 4 alpha beta - 2 q (2q - kL^2 - kT^2)/(alpha beta)."""
    alpha = _vert(q, kl2)
    beta = _vert(q, kt2)
    c = 2.0 * q - kt2
    ab = alpha * beta
    rr = c * c - 4.0 * q * ab
    drr = 4.0 * c - 4.0 * ab - 2.0 * q * (2.0 * q - kl2 - kt2) / ab
    return rr, drr, alpha


@njit(cache=True)
def _pole_free(K, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0):
    d = iz - _main(K, a, b, radius, model, kl2, kt2, mu, coef, n_main) - (r0 + (K - k_re) * dr0)
    return d * _rayleigh(K * K, kl2, kt2)


@njit(cache=True, inline="always")
def _ff2_d(q, radius, model, coef):
    """Form factor F(q) and dF/dq at complex q = xi^2 (see `_ff2`)."""
    if model == 2:
        return 1.0 + 0j, 0j
    r2 = radius * radius
    x2 = q * r2
    if model == 0:
        # the real-coefficient series and its derivative at complex x2 by the second-order
        # Horner scheme (Knuth, TAOCP vol. 2, 4.6.4): x2^2 = r x2 - t with r = 2 Re x2,
        # t = |x2|^2, so each term costs two real multiply-adds instead of a complex product
        xr = x2.real
        xi = x2.imag
        rr = 2.0 * xr
        tt = xr * xr + xi * xi
        n = _n_used(coef, math.sqrt(tt))
        a = coef[n - 1]
        b = coef[n - 2]
        da = (n - 1) * coef[n - 1]
        db = (n - 2) * coef[n - 2]
        for k in range(n - 3, -1, -1):
            a, b = b + rr * a, coef[k] - tt * a
            if k > 0:
                da, db = db + rr * da, k * coef[k] - tt * da
        s = complex(a * xr + b, a * xi)
        ds = complex(da * xr + db, da * xi)
    else:
        if abs(x2) < 1e-6:
            s = 1.0 - x2 / 6.0 + x2 * x2 / 120.0
            ds = -1.0 / 6.0 + x2 / 60.0
        else:
            x = cmath.sqrt(x2 + 0j)
            sn = cmath.sin(x)
            s = sn / x
            ds = (x * cmath.cos(x) - sn) / (2.0 * x * x2)
    return s * s, 2.0 * s * ds * r2


@njit(cache=True, inline="always")
def _compliance_d(q, kl2, kt2, mu):
    """G(q) of `_compliance` and dG/dq: G'/G = 1/(2 alpha^2) - R'/R with
    R' = 4 (2q - kT^2) - 4 alpha beta - 2 q (beta/alpha + alpha/beta) (alpha' = 1/(2 alpha)),
    where beta/alpha + alpha/beta = (2q - kL^2 - kT^2)/(alpha beta) (alpha^2 = q - kL^2,
    beta^2 = q - kT^2). With R = N / M (the rationalised form N = num, M = den where it is
    the better conditioned one, else N = R, M = 1), G = -alpha kT^2 M / (mu N) and
    G'/G = (N ab - 2 dR_ab al2 M) / (2 al2 N ab): one complex division in all."""
    alpha = _vert(q, kl2)
    beta = _vert(q, kt2)
    c = 2.0 * q - kt2
    a = c * c
    ab = alpha * beta
    b = 4.0 * q * ab
    den = a + b
    # |den| >= |a|, compared squared (no hypot)
    if den.real * den.real + den.imag * den.imag >= a.real * a.real + a.imag * a.imag:
        rn = (
            16.0 * q * q * q * (kl2 - kt2)
            + 8.0 * q * q * kt2 * (3.0 * kt2 - 2.0 * kl2)
            - 8.0 * q * kt2 * kt2 * kt2
            + kt2 * kt2 * kt2 * kt2
        )
        rm = den
    else:
        rn = a - b
        rm = 1.0 + 0j
    al2 = q - kl2
    # dR times alpha beta
    dr_ab = (4.0 * c - 4.0 * ab) * ab - 2.0 * q * (2.0 * q - kl2 - kt2)
    nab = rn * ab
    two_al2_nab = 2.0 * al2 * nab
    scale = -alpha * kt2 * rm / (mu * rn * two_al2_nab)
    return scale * two_al2_nab, scale * (nab - 2.0 * dr_ab * al2 * rm)


@njit(cache=True)
def _main_d(K, a, b, radius, model, kl2, kt2, mu, coef, n_main, skip0):
    """Main harmonics (of `_main`) and their K-derivative at complex K, analytic; the m = 0
    harmonic is left out when skip0."""
    g = 2.0 * math.pi / a
    t = 0j
    dt = 0j
    lo = 0 if model == 2 else -n_main
    hi = 1 if model == 2 else n_main
    for m in range(lo, hi):
        if m == 0 and skip0:
            continue
        x = K + m * g
        q = x * x
        gq, dg = _compliance_d(q, kl2, kt2, mu)
        f, df = _ff2_d(q, radius, model, coef)
        t += gq * f
        dt += (dg * f + gq * df) * 2.0 * x
    return t / (a * b), dt / (a * b)


@njit(cache=True)
def _pole_free_d(K, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0):
    """D(K) R_0(K) of `_pole_free` and its K-derivative, analytic. The m = 0 harmonic times R_0
    is -alpha_0 kT^2 F_0 / (mu a b) (R_0 cancels), the rest of D is multiplied out."""
    q0 = K * K
    rr, drr, al0 = _rayleigh_d(q0, kl2, kt2)
    f0, df0 = _ff2_d(q0, radius, model, coef)
    sc = -kt2 / (mu * a * b)
    p0 = sc * al0 * f0
    dp0 = sc * (0.5 * f0 / al0 + al0 * df0)
    mo, dmo = _main_d(K, a, b, radius, model, kl2, kt2, mu, coef, n_main, True)
    dr_ = iz - mo - (r0 + (K - k_re) * dr0)
    val = dr_ * rr - p0
    der = (-dmo - dr0) * rr + (dr_ * drr - dp0) * 2.0 * K
    return val, der


@njit(cache=True)
def _newton_d(
    kk, n_iter, tol, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0, f0, df0
):
    """Newton on D(K) R_0(K) with the analytic derivative (`_pole_free_d`) from kk; the first
    iteration uses f0, df0 (the function and slope at kk, known to the caller) when df0 != 0.
    Stops when |step| <= tol |K|, or when the step after the last one, predicted from
    quadratic convergence (|s_n|^3 / |s_(n-1)|^2), is below tol |K| and the loop would have
    made that iteration (one evaluation fewer, same acceptance). Returns
    (K, last step or predicted next step)."""
    step = 0j
    prev = 0.0
    for it in range(n_iter):
        if it == 0 and df0 != 0.0:
            f, df = f0, df0
        else:
            f, df = _pole_free_d(
                kk, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0
            )
        step = f / df
        kk = kk - step
        s = _mag(step)
        mk = _mag(kk)
        if s <= tol * mk:
            break
        # the prediction only stands in for an iteration the loop would still have made,
        # and only close to the root (|s_n| <= 1e-4 |K|), where convergence is quadratic
        if it > 0 and it + 1 < n_iter and s < prev and s <= 1e-4 * mk:
            pred = s * s * s / (prev * prev)
            if pred <= tol * mk:
                return kk, pred + 0j
        prev = s
    return kk, step


@njit(cache=True)
def _newton_ok(kk, step, k_re, m_lo, m_hi, kt_s, kl_s, g):
    """Acceptance of a Newton root: finite, converged (last step <= NEWTON_ACCEPT |K|), on the
    same side of every branch point of the main harmonics as the real-axis root, not growing."""
    mk = _mag(kk)
    ok = math.isfinite(kk.real) and math.isfinite(kk.imag) and _mag(step) <= NEWTON_ACCEPT * mk
    for m in range(m_lo, m_hi):
        for e0 in (kt_s, kl_s, -kt_s, -kl_s):
            e = e0 - m * g
            if (kk.real > e) != (k_re > e):
                ok = False
    if kk.imag < -1e-9 * mk:
        ok = False
    return ok


@njit(cache=True)
def _newton(
    kk, n_iter, tol, hstep, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0
):
    """Newton on the pole-free D(K) R_0(K) (see optgrade.dispersion._direct) from kk, forward-difference
    derivative (step hstep); stops when |step| <= tol |K|. Returns (K, last step)."""
    step = 0j
    for _ in range(n_iter):
        f0 = _pole_free(kk, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0)
        f1 = _pole_free(
            kk + hstep, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0
        )
        step = f0 / ((f1 - f0) / hstep)
        kk = kk - step
        if abs(step) <= tol * abs(kk):
            break
    return kk, step


@njit(cache=True)
def _inverse_quadratic(ka, ha, kb, hb, kc, hc):
    """Root estimate of inverse quadratic interpolation through three points (K, h) with distinct
    h (kc when two h coincide)."""
    dab = ha - hb
    dac = ha - hc
    dbc = hb - hc
    if dab == 0.0 or dac == 0.0 or dbc == 0.0:
        return kc
    return ka * hb * hc / (dab * dac) - kb * ha * hc / (dab * dbc) + kc * ha * hb / (dac * dbc)


@njit(cache=True, inline="always")
def _pole_factor(K, lo, hi, pole_lo, pole_hi):
    """(K - lo)(hi - K), each factor only where that end of the bracket is a pole: multiplied
    into Re D it removes the poles (positive inside the bracket)."""
    f = (K - lo) if pole_lo else 1.0
    if pole_hi:
        f *= hi - K
    return f


@njit(cache=True)
def _h(K, hx):
    """Pole-free -Re D at real K on the real-axis bracket: (Re Sigma - Re 1/Z) times
    `_pole_factor`, lossless main terms; hx packs the fixed arguments (built in `solve_grid`)."""
    a, b, radius, model, kl2_0, kt2_0, mu, coef, n_main, iz, table, k0, dk, wi, wt = hx[:15]
    lo, hi, pole_lo, pole_hi = hx[15:]
    f = _main_re(K, a, b, radius, model, kl2_0.real, kt2_0.real, mu.real, coef, n_main)
    f += _rest_re(K, a, table, k0, dk, wi, wt) - iz.real
    return f * _pole_factor(K, lo, hi, pole_lo, pole_hi)


@njit(cache=True)
def solve_grid(
    w_arr,
    h_arr,
    m_arr,
    rod_root,
    rod_slowness,
    a_arr,
    levels_table,
    idx,
    wts,
    k0,
    dk,
    w0,
    dw,
    cl,
    ct,
    cr,
    clc,
    ctc,
    mu,
    muc,
    eta_sub,
    b,
    radius,
    model,
    coef,
    n_main,
    out_k,
    out_sh,
    out_an,
    out_fo,
    path_only,
):
    """Fill out_k (2, nc, nf), out_sh (2, 5, nc, nf), out_an (2, 4, nc, nf), out_fo (2, nc, nf).

    With path_only, solve only the points the WKB march of `optgrade.propagation._wkb` reads, cell
    by cell from cell 0: at cell 0 branch 0 at every frequency and branch 1 where branch 0 has
    no root; at later cells the branch so chosen, for the frequencies whose branch had a root
    at every earlier cell (up to and including the first cell without one). The rest stays
    as initialised (nan)."""
    nc = a_arr.size
    nf = w_arr.size
    nw = levels_table.shape[2]
    table = np.empty((levels_table.shape[1], nw), dtype=np.complex128)  # this cell's Rest
    is_blended = np.zeros(nw, dtype=np.bool_)  # which of its columns are filled
    pi = math.pi
    m_lo = 0 if model == 2 else -n_main
    m_hi = 1 if model == 2 else n_main
    parts = np.zeros(4)  # channel parts and their best harmonic, reset per root
    best = np.zeros(4)
    # the lossy substrate's squared wavenumbers at each frequency (complex: a product, not the
    # general power)
    kl2_arr = np.empty(nf, dtype=np.complex128)
    kt2_arr = np.empty(nf, dtype=np.complex128)
    for jf in range(nf):
        kl2_arr[jf] = (w_arr[jf] / clc) * (w_arr[jf] / clc)
        kt2_arr[jf] = (w_arr[jf] / ctc) * (w_arr[jf] / ctc)
    # path_only: branch followed per frequency (-1 none) and whether the wave still travels
    path_br = np.zeros(nf, dtype=np.int64)
    path_on = np.ones(nf, dtype=np.bool_)
    for ic in range(nc):
        a = a_arr[ic]
        g = 2.0 * pi / a
        # the Rest slice is blended column by column as frequencies need it, and kept for the
        # next cell when that cell has the same spacing
        if not _same_blend(idx, wts, ic):
            is_blended[:] = False
        prev_k = np.zeros(2)
        prev2_k = np.zeros(2)
        prev3_k = np.zeros(2)
        pole_sign = np.zeros(2)
        gap_j = np.full(2, -1, dtype=np.int64)
        gap_m = np.zeros(2)
        gap_n = np.zeros(2, dtype=np.int64)
        gap_int = np.full(2, GAP_RESCAN, dtype=np.int64)
        # angular frequencies of the last three visits of each branch (newest first)
        hist_w = np.zeros((2, 3))
        n_vis = np.zeros(2, dtype=np.int64)
        for jf in range(nf):
            if path_only and ic > 0 and not path_on[jf]:
                continue
            w = w_arr[jf]
            # the rod's compliance 1/Z (optgrade.resonators._rod), only where the kernel solves
            z_num, z_den = rod_parts_at(w, h_arr[ic], m_arr[ic], rod_root, rod_slowness)
            iz = z_den / z_num if z_num != 0.0 else complex(math.inf, 0.0)
            t = (w - w0) / dw
            wi = int(math.floor(t))
            if wi < 0:
                wi = 0
            if wi > nw - 2:
                wi = nw - 2
            wt = min(max(t - wi, 0.0), 1.0)
            for jw in (wi, wi + 1):
                if not is_blended[jw]:
                    _blend_column(levels_table, idx, wts, ic, table, jw)
                    is_blended[jw] = True
            kl2_0 = (w / cl) ** 2 + 0j
            kt2_0 = (w / ct) ** 2 + 0j
            kl2 = kl2_arr[jf]
            kt2 = kt2_arr[jf]
            kr = w / cr
            kt_s = w / ct
            kl_s = w / cl
            # nearest poles of the main harmonics below / above kR in (0, 2 pi / a)
            p_lo = -1.0
            p_hi = -1.0
            if model != 2:
                for m in range(-n_main, n_main):
                    for sgn in (1.0, -1.0):
                        if m == 0 and sgn == 1.0:
                            continue
                        p = sgn * kr - m * g
                        if p > 0.0 and p < g:
                            if p > kr and (p_hi < 0.0 or p < p_hi):
                                p_hi = p
                            if p < kr and (p_lo < 0.0 or p > p_lo):
                                p_lo = p
            zone = 0.5 * g if model == 2 else g
            if kr >= zone:
                path_on[jf] = False  # no root on either branch: the path ends here
                continue
            for br in range(2):
                if path_only:
                    if ic == 0 and br == 1 and not math.isnan(out_k[0, 0, jf].real):
                        continue
                    if ic > 0 and br != path_br[jf]:
                        continue
                # the previous visits of this branch (every frequency unless path_only)
                n_prev = n_vis[br]
                w1 = hist_w[br, 0]
                w2 = hist_w[br, 1] if n_prev > 1 else w1
                w3 = hist_w[br, 2] if n_prev > 2 else w2
                hist_w[br, 2] = hist_w[br, 1]
                hist_w[br, 1] = w1
                hist_w[br, 0] = w
                n_vis[br] = n_prev + 1
                # the gap continuation below trusts only fine frequency steps
                is_fine_step = n_prev > 0 and abs(w - w1) <= GAP_STEP * w
                root_real = prev_k[br]
                root_prev2 = prev2_k[br]
                root_prev3 = prev3_k[br]
                prev3_k[br] = root_prev2
                prev2_k[br] = root_real
                prev_k[br] = 0.0
                if br == 0:
                    lo = kr
                    hi = p_hi if p_hi > 0.0 else zone
                    pole_lo = True
                    pole_hi = p_hi > 0.0
                else:
                    hi = kr
                    lo = p_lo if p_lo > 0.0 else 1e-3 * kr
                    pole_lo = p_lo > 0.0
                    pole_hi = True
                if not hi > lo * (1.0 + 1e-9):
                    gap_j[br] = -1
                    continue
                # everything the real-axis function needs besides K, for `_h`
                hx = (
                    a,
                    b,
                    radius,
                    model,
                    kl2_0,
                    kt2_0,
                    mu,
                    coef,
                    n_main,
                    iz,
                    table,
                    k0,
                    dk,
                    wi,
                    wt,
                    lo,
                    hi,
                    pole_lo,
                    pole_hi,
                )
                # the pole-free Re D just off the Rayleigh pole keeps its sign (the sign of the
                # pole's residue): evaluated once per cell and branch, then reused
                if pole_sign[br] == 0.0:
                    u0 = _scan_k(0, lo, hi, br)
                    h0 = _h(u0, hx)
                    pole_sign[br] = 1.0 if h0 > 0.0 else -1.0
                s0 = pole_sign[br]
                found = False
                is_continued = False  # the bracket comes from continuation, not from a scan
                ka = 0.0
                kb = 0.0
                ha = 0.0
                hb = 0.0
                # continuation: bracket around the previous frequency's root (sign-checked).
                # First a narrow bracket about the linear extrapolation of the last two roots,
                # half-width three times the error the same extrapolation made one step back
                # (needs three previous roots), then the wide bracket about the proportional
                # guess K w / w_prev
                if n_prev > 0 and root_real > 0.0:
                    kg = root_real * w / w1
                    dlt = 0.5 * abs(w - w1) / w + 1e-3
                    n_try = 1
                    kg_n = kg
                    dlt_n = dlt
                    # (any frequency order is allowed: repeated frequencies skip this guess)
                    if root_prev2 > 0.0 and root_prev3 > 0.0 and w1 != w2 and w2 != w3:
                        kl = root_real + (root_real - root_prev2) * (w - w1) / (w1 - w2)
                        e1 = root_real - (
                            root_prev2 + (root_prev2 - root_prev3) * (w1 - w2) / (w2 - w3)
                        )
                        if kl > 0.0:
                            dlt_n = (3.0 * abs(e1) * ((w - w1) / (w1 - w2)) ** 2) / kl + 1e-8
                            if dlt_n < 0.25 * dlt:
                                kg_n = kl
                                n_try = 2
                    # points that failed as bracket ends still tell where the root is: k_in
                    # (farthest from the pole with the pole-side sign: the root lies beyond) and
                    # k_out (nearest to the pole with the other sign: the root lies before)
                    dirn = 1.0 if br == 0 else -1.0
                    k_in = 0.0
                    h_in = 0.0
                    k_out = 0.0
                    h_out = 0.0
                    for attempt in range(n_try):
                        kc_ = kg_n if attempt + 1 < n_try else kg
                        dl_ = dlt_n if attempt + 1 < n_try else dlt
                        k1 = kc_ * (1.0 - dirn * dl_)  # the end on the pole's side
                        k2 = kc_ * (1.0 + dirn * dl_)
                        inside = (min(k1, k2) > lo + 1e-9 * lo) and (max(k1, k2) < hi - 1e-9 * hi)
                        if not inside:
                            continue
                        h1 = _h(k1, hx)
                        if (h1 > 0.0) != (s0 > 0.0):
                            if k_out == 0.0 or dirn * k1 < dirn * k_out:
                                k_out, h_out = k1, h1
                            continue
                        if k_in == 0.0 or dirn * k1 > dirn * k_in:
                            k_in, h_in = k1, h1
                        h2 = _h(k2, hx)
                        if (h2 > 0.0) != (s0 > 0.0):
                            ka, ha, kb, hb = k1, h1, k2, h2
                            found = True
                            is_continued = True
                            break
                        if dirn * k2 > dirn * k_in:
                            k_in, h_in = k2, h2
                    # neither bracket held the root: the failed ends bracket it where they enclose
                    # it (steps beyond them, to look further, found other roots than the scan
                    # does: 26 existence changes in 8 x 60 x 256 bench points, so there is none)
                    if not found and k_in > 0.0 and k_out > 0.0 and dirn * k_in < dirn * k_out:
                        ka, ha, kb, hb = k_in, h_in, k_out, h_out
                        found = True
                # gap continuation: the branch had no root at the previous frequency, and the
                # scan point that came closest to a sign change (gap_j) still keeps more than
                # GAP_KEEP of the margin the last full scan measured there: still no root.
                # A full scan is forced every gap_int[br] frequencies (see below).
                if not found and root_real == 0.0 and gap_j[br] > 0 and is_fine_step:
                    if gap_n[br] < gap_int[br]:
                        kq = _scan_k(gap_j[br], lo, hi, br)
                        hq = _h(kq, hx)
                        if s0 * hq / _pole_factor(kq, lo, hi, pole_lo, pole_hi) > (
                            GAP_KEEP * gap_m[br]
                        ):
                            gap_n[br] += 1
                            continue
                # full scan outwards from the Rayleigh pole (points clustered at the pole):
                # the first sign change brackets the root; with none the branch is absent,
                # and the point closest to a sign change is kept for the gap continuation
                if not found:
                    kprev = _scan_k(0, lo, hi, br)
                    hprev = s0
                    jbest = -1
                    mbest = 0.0
                    for jp in range(1, N_SCAN + 1):
                        K = _scan_k(jp, lo, hi, br)
                        h = _h(K, hx)
                        if (h > 0.0) != (s0 > 0.0):
                            ka, ha, kb, hb = kprev, hprev, K, h
                            found = True
                            break
                        marg = s0 * h / _pole_factor(K, lo, hi, pole_lo, pole_hi)
                        if jbest < 0 or marg < mbest:
                            jbest = jp
                            mbest = marg
                        kprev, hprev = K, h
                    if not found:
                        gap_j[br] = jbest
                        # a rescan that finds the closest approach no closer than the last full
                        # scan did doubles the interval to the next (up to GAP_RESCAN_MAX);
                        # any closer approach, or a fresh gap, resets it to GAP_RESCAN
                        if gap_n[br] >= gap_int[br] and mbest >= gap_m[br]:
                            gap_int[br] = min(2 * gap_int[br], GAP_RESCAN_MAX)
                        else:
                            gap_int[br] = GAP_RESCAN
                        gap_m[br] = mbest
                        gap_n[br] = 0
                if not found:
                    continue
                gap_j[br] = -1
                # Illinois (regula falsi) sped up by inverse quadratic interpolation: after each
                # evaluation, the inverse quadratic through the bracket ends and the new point
                # (true values, ha_t: ha is halved by the Illinois rule) is the root if it moves
                # less than ILLINOIS_TOL; in a continued bracket it is also the next point where
                # it lies inside (the Illinois secant where not). A scan bracket is wide and may
                # hold more roots: there the Illinois steps alone pick one, as in the direct
                # solver. The first bracket end may carry only the pole sign
                if ka == _scan_k(0, lo, hi, br):
                    ha = _h(ka, hx)
                ha_t = ha
                kq = 0.0
                for it in range(MAX_ILLINOIS):
                    if it > 0 and is_continued and min(ka, kb) < kq < max(ka, kb):
                        kc = kq
                    else:
                        den = hb - ha
                        if den != 0.0:
                            kc = (ka * hb - kb * ha) / den
                        else:
                            kc = 0.5 * (ka + kb)
                    hc = _h(kc, hx)
                    if hc != 0.0:
                        kq = _inverse_quadratic(ka, ha_t, kb, hb, kc, hc)
                        if abs(kq - kc) <= ILLINOIS_TOL * abs(kc) and min(ka, kb) < kq < max(
                            ka, kb
                        ):
                            kb = kq
                            break
                    if (hc > 0.0) != (hb > 0.0):
                        ka, ha, ha_t = kb, hb, hb
                    else:
                        ha = 0.5 * ha
                    moved = abs(kc - kb)
                    kb, hb = kc, hc
                    if (
                        abs(kb - ka) <= ILLINOIS_TOL * abs(kc)
                        or hc == 0.0
                        or moved <= ILLINOIS_TOL * abs(kc)
                    ):
                        break
                k_re = kb
                prev_k[br] = k_re
                hstep = 1e-6 * pi / a
                r0, dr0 = _rest(k_re, a, table, k0, dk, wi, wt)
                m0, dm0 = _main_d(
                    k_re + 0j, a, b, radius, model, kl2, kt2, muc, coef, n_main, False
                )
                d0 = iz - m0 - r0
                dd0 = -(dm0 + dr0)
                k_first = k_re + 1j * (-d0.imag / dd0.real)
                kk = k_re + 0j
                step = 0j
                n_newton = N_NEWTON
                if abs(d0.imag) <= 1e-14 * _mag(iz):
                    n_newton = 0  # lossless bound root: already exact on the real axis
                ok = False
                skip_fd = False
                if n_newton > 0 and N_LOSS_STAGES == 1:
                    # Newton with the analytic slope (quadratic convergence) from the real-axis
                    # root, as the direct solver; if it is not accepted, the difference-slope
                    # Newton below decides as before
                    # the first step's D R_0 and slope at k_re from d0, dd0 (computed above)
                    rr0, drr0, _ = _rayleigh_d(k_re * k_re + 0j, kl2, kt2)
                    kk, step = _newton_d(
                        kk,
                        N_NEWTON_D,
                        NEWTON_TOL,
                        k_re,
                        a,
                        b,
                        radius,
                        model,
                        kl2,
                        kt2,
                        muc,
                        coef,
                        n_main,
                        iz,
                        r0,
                        dr0,
                        d0 * rr0,
                        dd0 * rr0 + d0 * drr0 * 2.0 * k_re,
                    )
                    ok = _newton_ok(kk, step, k_re, m_lo, m_hi, kt_s, kl_s, g)
                    if not ok:
                        # the difference-slope Newton below decides only where the analytic one
                        # missed the acceptance step by little (NEWTON_ACCEPT < |step|/|K| <=
                        # FD_RETRY):
                        # elsewhere both follow the same path and fail alike (a converged root on
                        # the wrong side of a branch point, or too few iterations)
                        s_rel = _mag(step) / _mag(kk)
                        skip_fd = not (NEWTON_ACCEPT < s_rel <= FD_RETRY)
                        kk = k_re + 0j
                        step = 0j
                if not ok and not skip_fd:
                    n_stages = N_LOSS_STAGES if eta_sub > 0.0 else 1
                    for stage in range(1, n_stages + 1):
                        eta_s = eta_sub * stage / n_stages
                        fac = cmath.sqrt(1.0 - 1j * eta_s)
                        kl2_s = (w / (cl * fac)) * (w / (cl * fac))
                        kt2_s = (w / (ct * fac)) * (w / (ct * fac))
                        mu_s = mu * (1.0 - 1j * eta_s)
                        if n_newton > 0:
                            kk, step = _newton(
                                kk,
                                n_newton,
                                NEWTON_TOL,
                                hstep,
                                k_re,
                                a,
                                b,
                                radius,
                                model,
                                kl2_s,
                                kt2_s,
                                mu_s,
                                coef,
                                n_main,
                                iz,
                                r0,
                                dr0,
                            )
                    ok = _newton_ok(kk, step, k_re, m_lo, m_hi, kt_s, kl_s, g)
                fo = False
                if not ok:
                    kk = k_first
                    fo = True
                    if kk.imag < 0.0:
                        continue
                if not (math.isfinite(kk.real) and math.isfinite(kk.imag)):
                    continue
                if abs(kk.imag) > kk.real:
                    continue
                out_k[br, ic, jf] = kk
                out_fo[br, ic, jf] = fo
                # channel parts and angles at K'
                kp = kk.real
                kl2r = (w / cl) ** 2
                kt2r = (w / ct) ** 2
                for ch in range(4):
                    parts[ch] = 0.0
                    best[ch] = 0.0
                for m in range(m_lo, m_hi):
                    kx = kp + m * g
                    xi2 = kx * kx
                    if xi2 >= kt2r:
                        continue
                    im = _im_compliance(xi2, kl2r, kt2r, mu.real)
                    im = max(im * _ff2_re(xi2, radius, model, coef) / (a * b), 0.0)
                    sh = _split_shear(xi2, kl2r, kt2r)
                    base = 0 if kx > 0.0 else 2
                    for typ in range(2):
                        pm = im * sh if typ == 0 else im * (1.0 - sh)
                        k2 = kt2r if typ == 0 else kl2r
                        ch = base + typ
                        parts[ch] += pm
                        if xi2 < k2 and (pm > best[ch] or math.isnan(out_an[br, ch, ic, jf])):
                            best[ch] = pm
                            out_an[br, ch, ic, jf] = math.asin(
                                max(min(kx / math.sqrt(k2), 1.0), -1.0)
                            )
                total = (m0 + r0 - iz).imag
                if not math.isfinite(total):
                    total = 0.0
                psum = parts[0] + parts[1] + parts[2] + parts[3]
                absorbed = max(total - psum, 0.0)
                ssum = psum + absorbed
                if kk.imag > 0.0 and ssum > 0.0:
                    for ch in range(4):
                        out_sh[br, ch, ic, jf] = parts[ch] / ssum
                    out_sh[br, 4, ic, jf] = absorbed / ssum
            if path_only:
                # the march's branch choice at the entry cell, and the end of its path
                if ic == 0:
                    if not math.isnan(out_k[0, 0, jf].real):
                        path_br[jf] = 0
                    elif not math.isnan(out_k[1, 0, jf].real):
                        path_br[jf] = 1
                    else:
                        path_on[jf] = False
                elif math.isnan(out_k[path_br[jf], ic, jf].real):
                    path_on[jf] = False
