"""The full-wave block (free far face) and its far-face analysis (optgrade/fullwave/_block.py).

Checks and their sources:
- Plane-wave decomposition on a line: a compressional plane wave built from its potential with
  Hooke's law (isotropic, plane strain; any elasticity text, e.g. Achenbach 1973, from memory)
  carries rho w^3 nu |A|^2 of vertical power per unit length (the solver's convention without
  the factor 1/2), all of it in its own channel.
- A free face reflects a compressional wave at normal incidence with the potential's sign
  reversed (s_zz = 0: A_up = -A_down at the face; a rigid face would keep the sign), Achenbach
  1973, section 5.6 (from memory): measured on the bare block just above the far face.
- The bare block stays stable (side sponges; a CPML there grew without bound).
- `optgrade verify` on a block writes the far-face block and figures.
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import numpy as np
import pytest

from optgrade.fullwave import _solver as fw
from optgrade.fullwave._block import LINE_CELLS, downgoing_flux, plane_wave_amplitudes

ROOT = Path(__file__).parents[1]
# handbook-like aluminium alloy (values from memory)
MEDIUM = fw.Medium(2700.0, 6320.0, 3130.0)


def _plane_p_wave(kx: float, f: float, x: np.ndarray, amp: complex, down: bool = True):
    """Fields of phi = amp exp(i (kx x +- nu z)) at z = 0 from u = grad phi and Hooke's law."""
    w = 2 * math.pi * f
    kl = w / MEDIUM.cl
    nu = math.sqrt(kl * kl - kx * kx) * (1 if down else -1)
    phi = amp * np.exp(1j * kx * x)
    ux, uz = 1j * kx * phi, 1j * nu * phi
    exx, ezz, exz2 = 1j * kx * ux, 1j * nu * uz, 1j * nu * ux + 1j * kx * uz
    sxz = MEDIUM.mu * exz2
    szz = MEDIUM.lam * (exx + ezz) + 2 * MEDIUM.mu * ezz
    return ux[None], uz[None], sxz[None], szz[None], nu


def test_a_plane_compressional_wave_is_found_with_its_power():
    f, h = 150e3, 0.5e-3
    x = np.arange(2000) * h
    kx = 0.4 * 2 * math.pi * f / MEDIUM.cl  # 23.6 deg from the normal, forward
    ux, uz, sxz, szz, nu = _plane_p_wave(kx, f, x, 1e-9 + 0.5e-9j)
    per, whole = downgoing_flux(ux, uz, sxz, szz, np.array([f]), MEDIUM, h)
    w = 2 * math.pi * f
    expected = MEDIUM.rho * w**3 * nu * abs(1e-9 + 0.5e-9j) ** 2
    mid = slice(400, 1600)
    # on average over the middle 1 %, pointwise 5 % (ripple of the finite line's spectrum cut
    # at k_x = 0 and at the cone: +-2.7 % measured)
    for got in (per["forward_compressional"][0, mid], whole[0, mid]):
        assert np.mean(got) == pytest.approx(expected, rel=1e-2)
        np.testing.assert_allclose(got, expected, rtol=5e-2)
    for c in ("backward_compressional", "forward_shear", "backward_shear"):
        assert np.max(np.abs(per[c][0, mid])) < 1e-2 * expected
    # an upgoing wave carries nothing down
    ux, uz, sxz, szz, _ = _plane_p_wave(kx, f, x, 1e-9, down=False)
    per, whole = downgoing_flux(ux, uz, sxz, szz, np.array([f]), MEDIUM, h)
    assert np.max(np.abs(whole[0, mid])) < 1e-2 * expected


@pytest.fixture(scope="module")
def bare_block():
    band = (100e3, 200e3)
    grid = fw.plan_grid(MEDIUM, band, 0.1, 1e-3, quality="fast", block_depth=0.06)
    freq = np.array([130e3, 150e3, 170e3])
    rec = fw.simulate(MEDIUM, grid, band, freq, None)  # raises UnstableRun if it grows
    return grid, freq, rec


def test_the_bare_block_is_stable_and_its_far_face_is_free(bare_block):
    grid, freq, rec = bare_block
    assert grid.free_bottom and rec.energy_left < 1.0
    nodes = fw.node_fields(rec, "far", MEDIUM, grid.h)
    row = 4 - LINE_CELLS
    w = 2 * math.pi * freq[:, None]
    ux, uz = nodes["vx"][:, :, row] / (-1j * w), nodes["vz"][:, :, row] / (-1j * w)
    kx, amps, _ = plane_wave_amplitudes(ux, uz, nodes["sxz"][:, :, row],
                                        nodes["szz"][:, :, row], freq, MEDIUM, grid.h)
    d = LINE_CELLS * grid.h  # the line lies d above the face
    kl = 2 * math.pi * freq / MEDIUM.cl
    # near normal incidence (|kx| < 0.15 kL), power-weighted ratio up / down at the face
    for i in range(freq.size):
        near = np.abs(kx) < 0.15 * kl[i]
        down, up = amps[i, near, 0], amps[i, near, 2]
        ratio = np.sum(up * np.conj(down)) / np.sum(np.abs(down) ** 2)
        at_face = ratio * np.exp(-2j * kl[i] * d)  # both referred to the face
        assert abs(abs(at_face) - 1.0) < 0.1, abs(at_face)
        assert abs(np.angle(-at_face)) < 0.3, np.angle(at_face)  # sign reversed: free


def test_verify_of_a_block_writes_the_far_face_check(tmp_path, capsys):
    from optgrade.cli import main
    from optgrade.layout import layout_from_cells, write_table

    text = (ROOT / "studies" / "bench_backward_shear.toml").read_text()
    study = tmp_path / "block.toml"
    study.write_text(text.replace('loss_factor = 0.0\n', 'loss_factor = 0.0\nthickness = "60 mm"\n',
                                  1).replace("n_frequencies = 128", "n_frequencies = 24"))
    lay = layout_from_cells(np.linspace(9e-3, 6e-3, 10), np.full(10, 10e-3), 1e-3)
    table = tmp_path / "t.csv"
    write_table(lay, table, study_name="bench_backward_shear", material="aluminium_6061")
    out = tmp_path / "v"
    code = main(["verify", str(study), "--layout", str(table), "--out", str(out), "--fast",
                 "--no-animation", "--no-lattice"])
    said = capsys.readouterr().out
    assert code == 0, said
    data = json.loads((out / "verify.json").read_text())
    face = data["far_face"]
    assert face["status"] == "ok" and face["block"]["depth_m"] == pytest.approx(0.06)
    assert set(face["channels"]) == {"forward_shear", "forward_compressional", "backward_shear",
                                     "backward_compressional"}
    assert "later passes" in said and "far face (block 60 mm)" in said
    assert (out / "far_face_check.png").stat().st_size > 10_000
    assert (out / "block_snapshots.png").stat().st_size > 10_000
    print(json.dumps(face, indent=1)[:2000], file=sys.stderr)
