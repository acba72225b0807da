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

and then solves any rod height, head mass and spacing with the compiled root kernel
(`optgrade.dispersion._kernel`: the algorithm of `optgrade.dispersion._direct.solve_points`,
exact closed-form T_0 and T_-1 at complex K, so the
tables only have to carry the smooth part). Accuracy against the direct solver is measured in
tests/test_surrogate.py (|dK'|/K' < 1e-3 on bound branches, K'' within 5 %).

The kernel's steps and speed-ups are described in `optgrade.dispersion._kernel` (measurements
in docs/surrogate-speed.md).

Disk cache: one memory-mappable ``<key>.npy`` (complex table) plus ``<key>.json`` (key, format
version, grids, SHA-256 of the table bytes) under ``cache_dir`` (default: environment variable
OPTGRADE_CACHE or ~/.cache/optgrade). The key hashes every input and `FORMAT_VERSION`. A file
whose stored key or checksum does not match, or that cannot be read, is rebuilt, never trusted.
Writes are atomic (temporary file then os.replace).
"""

from __future__ import annotations

import hashlib
import json
import os
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

from optgrade._table_cache import default_cache_dir, read_cached, write_cached
from optgrade.dispersion._kernel import (
    KernelCells,
    KernelGround,
    KernelLattice,
    KernelOut,
    KernelTables,
    solve_grid,
)
from optgrade.dispersion._kernel_sums import _n_taylor_terms, _series_table
from optgrade.dispersion._lattice import (
    _DYNAMIC_KT,
    _DYNAMIC_XR,
    _STATIC_XR,
    MODELS,
    lattice_sum,
    main_orders,
)
from optgrade.dispersion._modes import NOT_SOLVED, LocalModes, RowPath
from optgrade.ground import Substrate
from optgrade.resonators import Rod, rod_constants

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.study import Study

__all__ = ["Surrogate", "surrogate_for_study", "FORMAT_VERSION", "default_cache_dir"]

#: bump when the table layout or the lattice-sum numerics change
FORMAT_VERSION = 2
#: largest ratio between neighbouring spacing levels, minus one
LEVEL_STEP = 0.15
#: table resolution: points along kappa in [0, 1] and along w
N_KAPPA = 49
N_FREQ = 97
#: relative padding of the frequency range in `Surrogate.from_study`
FREQ_PAD = 0.05


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
    def from_study(cls, study: Study, model: str | None = None, cache_dir=None) -> Surrogate:
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
        table = read_cached(path, meta_path, key, self._shape(), FORMAT_VERSION)
        if table is not None:
            self.was_loaded = True
            return table
        table = self.build_table()
        try:
            root.mkdir(parents=True, exist_ok=True)
            write_cached(path, meta_path, key, table, FORMAT_VERSION)
            loaded = read_cached(path, meta_path, key, self._shape(), FORMAT_VERSION)
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
        path: RowPath | None = None,
    ) -> LocalModes:
        """Local Bloch modes of cells (arrays broadcast together) at frequencies freq (Hz).

        Spacing must lie in ``spacing_range`` (2 % tolerance) and freq in ``freq_range``
        (frequencies outside are clipped to the table edge for Rest only).

        With a row request ``path`` (`RowPath`) the cells are a row in order from the entry
        and only the points of the request are solved (per frequency, the branch chosen at the
        entry cell, the other one from a cell where it has no root but the other has, up to and
        including the first cell where neither has one); every other point
        has status NOT_SOLVED (k nan). Without, every point is solved.
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
        idx, wts = _lagrange_weights(self.levels, a)
        n_c, n_f = a.size, freq.size
        out = KernelOut(
            k=np.full((2, n_c, n_f), np.nan + 0j),
            shares=np.zeros((2, 5, n_c, n_f)),
            angle=np.full((2, 4, n_c, n_f), np.nan),
            status=np.full((2, n_c, n_f), NOT_SOLVED, dtype=np.int8),
        )
        order = np.array(path.entry_order if path is not None else (), dtype=np.int64)
        ground, lattice, (table, k0, dk, w0, dw), rod = self._kernel_constants
        tables = KernelTables(table, idx, wts, k0, dk, w0, dw)
        cells = KernelCells(h, m, a, *rod)
        solve_grid(2 * np.pi * freq, cells, ground, lattice, tables, out, order)
        return LocalModes(k=out.k, shares=out.shares, angle=out.angle, status=out.status)

    @cached_property
    def _kernel_constants(self) -> tuple:
        """The kernel's per-surrogate constants: ground, lattice, table grids, rod."""
        s = self.substrate
        clc, ctc = s.complex_speeds
        ground = KernelGround(
            float(s.cl),
            float(s.ct),
            float(s.cr),
            complex(clc),
            complex(ctc),
            complex(s.mu),
            complex(s.complex_mu),
            float(s.loss_factor),
        )
        model = {"lattice": 0, "line": 1, "homogenised": 2}[self.model]
        lattice = KernelLattice(self.row_pitch, self.rod.radius, model, self._coef, self.n_main)
        grids = (
            np.asarray(self.table),
            float(self.kappa[0]),
            float(self.dk),
            float(self.omega[0]),
            float(self.omega[1] - self.omega[0]),
        )
        return ground, lattice, grids, rod_constants(self.rod)


def surrogate_for_study(study: Study, model: str | None = None, cache_dir=None) -> Surrogate:
    """Shorthand for `Surrogate.from_study` (used by the propagation stage)."""
    return Surrogate.from_study(study, model=model, cache_dir=cache_dir)


