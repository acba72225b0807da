"""Exports: machining-table round trip, drawing contents, result and report, and the property
that every exported layout meets every fabrication limit."""

from __future__ import annotations

import json
from pathlib import Path

import ezdxf
import numpy as np
import optuna
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from search_helpers import CHANNELS, fake_pipeline, fake_study, fake_trace

from optgrade import export, fabrication, profiles
from optgrade.layout import read_header, read_table
from optgrade.search import _owner as search

REPO = Path(__file__).resolve().parent.parent


def _ctx(study):
    return search.make_context(study, fake_pipeline)


def _params(study, u):
    out = {}
    for name, dist in profiles.search_space(study).items():
        if isinstance(dist, optuna.distributions.IntDistribution):
            out[name] = int(round(dist.low + u * (dist.high - dist.low)))
        elif dist.log:
            out[name] = float(np.sqrt(dist.low * dist.high))
        else:
            out[name] = dist.low + u * (dist.high - dist.low)
    return out


def test_table_round_trip_same_fractions(tmp_path):
    """Written, read back, traced: the same layout bit for bit, so the same fractions."""
    s = fake_study(resonator__head_mass=(0.0, 0.005))
    lay = profiles.layout_from_params(s, _params(s, 0.37))
    paths = export.export_layout(s, lay, tmp_path, context=_ctx(s), trial_number=3)
    back = read_table(paths["table"])
    assert back == lay
    a, b = fake_trace(s, lay), fake_trace(s, back)
    for c in CHANNELS:
        np.testing.assert_array_equal(a.fractions[c], b.fractions[c])
    head = read_header(paths["table"])
    assert head["study"] == "fake" and head["material"] == "steel"


def test_dxf_plan_and_elevation_match_layout(tmp_path):
    s = fake_study(resonator__head_mass=(0.001, 0.005))
    lay = profiles.layout_from_params(s, _params(s, 0.6))
    export.export_layout(s, lay, tmp_path, context=_ctx(s))
    doc = ezdxf.readfile(tmp_path / "layout.dxf")
    assert {"PLAN", "ELEVATION", "HEAD_MASS", "DIMENSIONS", "TEXT"} <= {
        layer.dxf.name for layer in doc.layers}
    msp = doc.modelspace()
    circles = msp.query("CIRCLE[layer=='PLAN']")
    assert len(circles) == 3 * lay.n_resonators
    xs = sorted({round(c.dxf.center.x, 9) for c in circles})
    np.testing.assert_allclose(xs, lay.x * 1e3, atol=1e-9)
    ys = sorted({round(c.dxf.center.y, 9) for c in circles})
    np.testing.assert_allclose(np.diff(ys), s.resonator.row_pitch * 1e3)
    assert all(c.dxf.radius == pytest.approx(0.5) for c in circles)
    rods = msp.query("LWPOLYLINE[layer=='ELEVATION']")
    heights = sorted(np.ptp([p[1] for p in r.get_points()]) for r in rods)
    np.testing.assert_allclose(heights, np.sort(lay.height) * 1e3, rtol=1e-9)
    assert len(msp.query("LWPOLYLINE[layer=='HEAD_MASS']")) == lay.n_resonators
    dims = msp.query("DIMENSION")
    assert len(dims) >= 4
    measured = [d.get_measurement() for d in dims]
    assert any(m == pytest.approx(s.resonator.row_pitch * 1e3) for m in measured)
    assert any(m == pytest.approx((lay.x[1] - lay.x[0]) * 1e3) for m in measured)
    assert all(d.override().get("dimlfac") == 1.0 for d in dims)  # shown in mm as drawn


def test_result_json_and_report(tmp_path):
    s = fake_study()
    s.meta.scale = "site"
    lay = profiles.layout_from_params(s, _params(s, 0.5))
    paths = export.export_layout(s, lay, tmp_path, context=_ctx(s), trial_number=11)
    res = json.loads(paths["result"].read_text())
    assert res["trial"] == 11 and res["study_hash"] == search.study_hash(s)
    frac = np.array([res["performance"]["fractions"][c] for c in CHANNELS], dtype=float)
    np.testing.assert_allclose(frac.sum(axis=0), 1.0, atol=1e-12)
    assert res["fabrication"]["is_ok"] is True
    assert "channel" in res["objectives"]
    report = paths["report"].read_text()
    assert "qualified engineer" in report and "local codes" in report
    assert "qualified engineer" in paths["table"].read_text()
    assert paths["sheet"].stat().st_size > 10_000
    assert not list(tmp_path.glob(".*"))  # no temporary files left


@settings(max_examples=4, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(u=st.floats(0.0, 1.0), which=st.sampled_from(["spline", "linear", "power"]))
def test_every_exported_layout_meets_every_limit(tmp_path_factory, u, which):
    """Property: an exported table, read back, passes every fabrication check."""
    s = fake_study(layout__profile=which, resonator__head_mass=(0.0, 0.01))
    out = tmp_path_factory.mktemp("exp")
    lay = profiles.layout_from_params(s, _params(s, u))
    paths = export.export_layout(s, lay, out, context=_ctx(s))
    assert fabrication.check_layout(s, read_table(paths["table"])) == []


def test_export_trial_from_storage(tmp_path):
    """A stored trial re-exported from its parameters gives the stored score."""
    s = fake_study()
    url = f"sqlite:///{tmp_path / 's.db'}"
    out = search.run_search(s, tmp_path / "run", n_trials=12, n_jobs=0, storage=url,
                            pipeline=fake_pipeline, show_progress=False)
    paths = export.export_trial(s, url, out.best_number, tmp_path / "again", context=_ctx(s))
    res = json.loads(paths["result"].read_text())
    assert res["weighted_score"] == pytest.approx(out.best_score, abs=1e-12)
    with pytest.raises(search.SearchError, match="--trial"):
        export.export_trial(s, url, 999, tmp_path / "x", context=_ctx(s))


@pytest.mark.slow
def test_real_search_export_cli_round_trip(tmp_path):
    """Command line on the bench example: a short search exports the best trial; `optgrade
    export` re-exports it; the table read back and traced gives the exported fractions."""
    from optgrade.cli import main
    from optgrade.propagation import trace_layout
    from optgrade.study import load_study

    study_path = REPO / "studies" / "bench_backward_shear.toml"
    out = tmp_path / "run"
    assert main(["search", str(study_path), "--out", str(out), "--trials", "6",
                 "--jobs", "0", "--quiet"]) == 0
    for name in ("table.csv", "layout.dxf", "sheet.png", "result.json", "report.txt"):
        assert (out / name).is_file()
    url = f"sqlite:///{out / 'study.db'}"
    assert main(["export", str(study_path), "--storage", url, "--trial", "best",
                 "--out", str(tmp_path / "again")]) == 0
    a = json.loads((out / "result.json").read_text())
    b = json.loads((tmp_path / "again" / "result.json").read_text())
    assert a["weighted_score"] == b["weighted_score"] and a["trial"] == b["trial"]
    s = load_study(study_path)
    tr = trace_layout(s, read_table(out / "table.csv"))  # the study's model (exact by default)
    assert a["performance"]["propagation"] == tr.propagation == "scattering"
    report = (out / "report.txt").read_text()
    assert "exact multiple-scattering" in report
    assert report.startswith("GOAL MET" if a["verdict"]["is_met"] else "GOAL NOT MET")
    assert a["verdict"]["n_frequencies"] == len(tr.frequency)
    for c in CHANNELS:
        np.testing.assert_allclose(np.array(a["performance"]["fractions"][c], dtype=float),
                                   tr.fractions[c], atol=1e-12)
    assert main(["export", str(study_path), "--storage", url, "--trial", "9999",
                 "--out", str(tmp_path / "x")]) == 2
