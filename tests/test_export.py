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


# --- workshop-ready exports (issue 15 item 3) -------------------------------------------------


def _decimals(text: str) -> int:
    return len(text.split(".")[1]) if "." in text else 0


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(u=st.floats(0.0, 1.0), which=st.sampled_from(["bench", "site"]))
def test_positions_and_head_masses_sit_on_their_steps(u, which):
    """Positions on multiples of layout.position_step (default: the height step), head masses on
    multiples of resonator.head_mass_step, every cell still inside the spacing range and the row
    inside max_length, and the machining table's text carries no more decimals than the steps
    (no binary noise such as 154.00000000000003 mm: common trade practice is a table a
    machinist reads as written). Before, positions were the raw cumulative sum."""
    from optgrade.layout import _SCALE, _shortest
    from optgrade.study import load_study

    name = "bench_backward_shear.toml" if which == "bench" else "site_ground_barrier.toml"
    s = load_study(REPO / "studies" / name)
    lay = profiles.layout_from_params(s, _params(s, u))
    step = s.layout.position_step
    assert step == s.layout.height_step
    k = np.asarray(lay.x) / step
    np.testing.assert_allclose(k, np.round(k), atol=1e-6)
    s_lo, s_hi = profiles.spacing_range(s)
    assert np.all(np.diff(lay.x) >= s_lo * (1 - 1e-9))
    assert np.all(np.diff(lay.x) <= s_hi * (1 + 1e-9))
    assert lay.length <= s.layout.max_length * (1 + 1e-9)
    m_step = s.resonator.head_mass_step
    if s.resonator.head_mass[1] > 0:
        assert m_step > 0
        q = np.asarray(lay.head_mass) / m_step
        np.testing.assert_allclose(q, np.round(q), atol=1e-6)
    step_dec = _decimals(_shortest(step, _SCALE["x_mm"]))
    for v in lay.x:
        assert _decimals(_shortest(float(v), _SCALE["x_mm"])) <= step_dec, v
    for v in lay.height:
        assert _decimals(_shortest(float(v), _SCALE["height_mm"])) <= step_dec, v
    if m_step:
        m_dec = _decimals(_shortest(m_step, _SCALE["head_mass_kg"]))
        for v in lay.head_mass:
            assert _decimals(_shortest(float(v), _SCALE["head_mass_kg"])) <= m_dec, v


def test_position_step_refused_when_larger_than_the_smallest_spacing(tmp_path):
    """A position step above the smallest spacing would merge neighbours: refused by name."""
    from optgrade.study import StudyError, load_study

    text = (REPO / "studies" / "bench_backward_shear.toml").read_text()
    text = text.replace('height_step = "0.05 mm"',
                        'height_step = "0.05 mm"\nposition_step = "7 mm"')
    p = tmp_path / "s.toml"
    p.write_text(text)
    with pytest.raises(StudyError) as err:
        load_study(p)
    assert "layout.position_step" in str(err.value)


def _dxf_texts(doc):
    """Every text of the drawing with its bounding box (texts inside dimensions included)."""
    from ezdxf import bbox

    out = []
    for e in doc.modelspace():
        kids = [e] if e.dxftype() in ("TEXT", "MTEXT") else (
            [v for v in e.virtual_entities() if v.dxftype() in ("TEXT", "MTEXT")]
            if e.dxftype() == "DIMENSION" else [])
        for t in kids:
            body = t.dxf.text if t.dxftype() == "TEXT" else t.text
            out.append((body, t.dxf.layer, bbox.extents([t])))
    return out


def _overlaps(texts):
    bad = []
    for i, (t1, _, b1) in enumerate(texts):
        for t2, _, b2 in texts[i + 1:]:
            if b1.has_intersection(b2):
                ov = b1.intersection(b2)
                if ov.size.x > 1e-9 and ov.size.y > 1e-9:
                    bad.append((t1, t2))
    return bad


def _layouts_for_drawing():
    """The two examples' bundled layouts, a dense 150-pin row at the smallest spacing (three
    hole-table blocks) and a row with head masses (invented scenarios)."""
    from optgrade.layout import layout_from_cells
    from optgrade.study import load_study

    bench = load_study(REPO / "studies" / "bench_backward_shear.toml")
    site = load_study(REPO / "studies" / "site_ground_barrier.toml")
    dense = layout_from_cells(np.round(np.linspace(4e-3, 12e-3, 150), 5), 6e-3, 1e-3, 0.0, 2e-5)
    heads = layout_from_cells(np.linspace(2.0, 6.0, 12), 2.5, 0.25,
                              np.round(np.linspace(500, 3000, 12)), 0.05)
    return [(bench, read_table(REPO / "studies" / "layouts" / "bench_backward_shear.csv")),
            (site, read_table(REPO / "studies" / "layouts" / "site_ground_barrier.csv")),
            (bench, dense), (site, heads)]


@pytest.mark.parametrize("case", range(4))
def test_dxf_is_workshop_ready(case, tmp_path):
    """The drawing (issue 15 item 3): datum A and B, a hole table row for every resonator with
    the same position, height, head mass and tolerance text as the machining table, the
    diameter, rows across and row pitch, a title block (study, materials, tolerance, units,
    scale, date, revision, trial), the first-to-last-axis dimension equal to the report's row
    length, and no text overlapping another (bounding boxes from ezdxf.bbox, texts inside the
    dimensions included)."""
    from optgrade.layout import _SCALE, _shortest

    study, lay = _layouts_for_drawing()[case]
    path = export.write_dxf(study, lay, tmp_path / "l.dxf", trial_number=12, date="2026-12-03")
    doc = ezdxf.readfile(path)
    texts = _dxf_texts(doc)
    assert len(texts) > lay.n_resonators * 3
    assert _overlaps(texts) == []
    bodies = [t for t, _, _ in texts]
    joined = "\n".join(bodies)
    for word in ("DATUM A", "DATUM B", "HOLE TABLE", "ROWS ACROSS", "STUDY", "TRIAL", "REVISION",
                 "SCALE", "UNITS", "HEIGHT TOLERANCE", "ROD MATERIAL", "SPECIMEN", "DATE"):
        assert word in joined, word
    assert study.meta.name in bodies and "12" in bodies and "2026-12-03" in bodies
    assert f"ALL RODS DIA {_shortest(float(lay.diameter[0]), _SCALE['x_mm'])} MM" in bodies
    pitch = _shortest(study.resonator.row_pitch, _SCALE["x_mm"])
    assert f"{pitch} MM" in bodies
    # the hole table: rows of (index, x, height, [head], tol) texts at one y each
    table = [(t, b) for t, layer, b in texts if layer == "TABLE"]
    rows: dict[float, list] = {}
    for t, b in table:
        rows.setdefault(round(b.extmin.y, 6), []).append((b.extmin.x, t))
    has_heads = bool(np.any(lay.head_mass > 0))
    got = {}
    for cells in rows.values():
        cells = [t for _, t in sorted(cells)]
        # side-by-side blocks share a y: split them into rows of the right width
        width = 5 if has_heads else 4
        for i in range(0, len(cells) - width + 1, width):
            chunk = cells[i:i + width]
            if chunk[0].isdigit():
                got[int(chunk[0])] = chunk[1:]
    assert sorted(got) == list(range(lay.n_resonators))
    for j in range(lay.n_resonators):
        want = [_shortest(float(lay.x[j]), _SCALE["x_mm"]),
                _shortest(float(lay.height[j]), _SCALE["height_mm"])]
        if has_heads:
            want.append(_shortest(float(lay.head_mass[j]), _SCALE["head_mass_kg"]))
        want.append(_shortest(float(lay.height_tol[j]), _SCALE["height_tol_mm"]))
        assert got[j] == want, j
    measured = [d.get_measurement() for d in doc.modelspace().query("DIMENSION")]
    assert any(m == pytest.approx(lay.x[-1] * 1e3) for m in measured)


def test_report_row_length_equals_the_drawing_overall_dimension(tmp_path):
    """The report states the first-to-last-axis length the drawing dimensions (before: the
    report said 600 mm, the path with the last cell, and the drawing 590.013 mm)."""
    from optgrade.layout import _SCALE, _shortest

    s = fake_study(resonator__head_mass=(0.0, 0.005))
    lay = profiles.layout_from_params(s, _params(s, 0.55))
    paths = export.export_layout(s, lay, tmp_path, context=_ctx(s), trial_number=3)
    report = paths["report"].read_text()
    overall = _shortest(float(lay.x[-1]), _SCALE["x_mm"])
    assert f"{overall} mm from the first to the last axis" in report, report
    doc = ezdxf.readfile(paths["dxf"])
    measured = [d.get_measurement() for d in doc.modelspace().query("DIMENSION")]
    assert max(measured) == pytest.approx(float(overall))


def _stored(study, scores):
    """An in-memory optuna study with one COMPLETE trial per score, parameters spread over the
    search space (so the layouts differ) and the score as the search stores it."""
    space = profiles.search_space(study)
    ost = optuna.create_study(direction="maximize")
    for i, sc in enumerate(scores):
        u = (i + 0.5) / len(scores)
        ost.add_trial(optuna.trial.create_trial(
            params=_params(study, u), distributions=space, value=sc, user_attrs={"score": sc}))
    return ost


def test_candidates_are_the_best_distinct_layouts_in_score_order(tmp_path):
    """Issue 15 item 6: the best N distinct layouts, best first, each table the layout its
    trial's parameters give; a repeated layout (here the same parameters twice) counts once."""
    s = fake_study()
    scores = [0.3, 0.9, 0.5, 0.9 - 1e-3, 0.7, 0.1]
    ost = _stored(s, scores)
    dup = ost.trials[1]
    ost.add_trial(optuna.trial.create_trial(params=dup.params, distributions=dup.distributions,
                                            value=0.95, user_attrs={"score": 0.95}))
    res = export.export_candidates(s, ost, tmp_path, n_best=4)
    names = [p.name for p in res["paths"]]
    assert names == ["rank1_trial6.csv", "rank2_trial3.csv", "rank3_trial4.csv",
                     "rank4_trial2.csv"]
    for p in res["paths"]:
        number = int(p.stem.split("trial")[1])
        assert read_table(p) == profiles.layout_from_params(s, ost.trials[number].params)
    assert res["advice"] is None
    summary = (tmp_path / "candidates" / "candidates.csv").read_text().splitlines()
    assert summary[0].startswith("rank,trial,score") and len(summary) == 5


def test_most_trials_tied_at_the_best_score_is_said(tmp_path):
    """Issue 15 item 2: a search where most finished trials tie at the best score says so and
    suggests a secondary goal."""
    s = fake_study()
    res = export.export_candidates(s, _stored(s, [0.6] * 7 + [0.2, 0.1]), tmp_path, n_best=0)
    assert res["n_tied"] == 7 and "tie at the best score" in res["advice"]
    assert "[goal.weights]" in res["advice"]
    assert export.export_candidates(s, _stored(s, [0.6, 0.5, 0.4, 0.3]), tmp_path,
                                    n_best=0)["advice"] is None


def test_report_explains_the_weighted_score(tmp_path):
    """Issue 15 item 2: each goal's direction, weight and share of the score, and the largest
    possible value (maximised goals at 1, minimised penalties at 0: with weights channel 1 and
    compactness 0.5 that is 1)."""
    s = fake_study(goal__weights={"channel": 1.0, "compactness": 0.5})
    lay = profiles.layout_from_params(s, _params(s, 0.4))
    paths = export.export_layout(s, lay, tmp_path, context=_ctx(s), trial_number=1)
    report = paths["report"].read_text()
    assert "of at most 1\n" in report
    assert "channel:" in report and "(maximised, weight 1, adds +" in report
    assert "(minimised, weight 0.5, adds -" in report
    res = json.loads(paths["result"].read_text())
    goals = res["objectives"]
    parts = [goals["channel"]["score"], -0.5 * goals["compactness"]["score"]]
    assert res["weighted_score"] == pytest.approx(sum(parts))


def test_sheet_plan_shows_every_resonator_and_pareto_members_carry_trial_numbers():
    """Issue 15 item 5: the plan panel showed the first 12 resonators in a mostly empty panel;
    the Pareto front had no trial numbers to export a member by."""
    from matplotlib.figure import Figure

    from optgrade.plotting import search as plot_search

    fig = Figure()
    ax = fig.subplots()
    x = np.arange(54) * 10e-3
    plot_search.plot_plan(ax, x, 1e-3, 4e-3)
    drawn = sum(len(c.get_offsets()) for c in ax.collections) + len(ax.patches)
    assert drawn == 3 * 54
    assert "all 54 resonators" in ax.get_title() and "stretched" in ax.get_title()
    lo, hi = ax.get_ylim()
    assert hi - lo < 4 * 4.0  # the rows fill the panel (mm)
    fig = Figure()
    ax = fig.subplots()
    vals = np.array([[0.1, 0.9], [0.5, 0.5], [0.9, 0.1], [0.2, 0.2]])
    plot_search.plot_pareto(ax, vals, np.array([True, True, True, False]), ["a", "b"],
                            numbers=np.array([3, 8, 11, 20]))
    labels = {t.get_text() for t in ax.texts}
    assert labels == {"#3", "#8", "#11"}


def test_fractions_plot_draws_the_tolerance_band():
    """Issue 15 item 5: the spread of the wanted fraction over the robustness goal's
    machining-error draws is drawn as a band, its widest value in the legend."""
    from matplotlib.figure import Figure

    from optgrade.plotting.trace import plot_fractions

    s = fake_study()
    lay = profiles.layout_from_params(s, _params(s, 0.5))
    tr = fake_trace(s, lay)
    lo = np.asarray(tr.fractions["backward_shear"]) - 0.05
    hi = lo + 0.1
    ax = Figure().subplots()
    plot_fractions(ax, tr, goal_channel="backward_shear", spread=(lo, hi))
    labels = ax.get_legend_handles_labels()[1]
    assert "height tolerance, 10-90 % of draws (widest 0.10)" in labels


def test_report_and_fractions_plot_show_the_reachable_band(tmp_path):
    """Issue 15 item 1: the report and the sheet show the reachability estimate next to the
    result (a Reach built here by hand: reachable above 200 kHz only)."""
    from matplotlib.figure import Figure

    from optgrade.plotting.trace import plot_fractions
    from optgrade.reach import Reach

    s = fake_study()
    lay = profiles.layout_from_params(s, _params(s, 0.5))
    tr = fake_trace(s, lay)
    f = np.asarray(tr.frequency)
    ok = f > 200e3
    reach = Reach(channel="backward_shear", required=0.5, frequency_hz=f,
                  best_share=np.where(ok, 0.7, 0.2), reachable=ok, limiting=[None] * f.size,
                  best_cell=np.zeros((f.size, 3)), shear_speed=3130.0)
    text = export._report(s, lay, tr, ["x"], [], False, 1, reach)
    assert "REACHABLE" in text and "backward_shear reachable" in text
    assert "no admissible cell reaches it" in text
    ax = Figure().subplots()
    plot_fractions(ax, tr, goal_channel="backward_shear", reachable=ok)
    assert "reachable by some admissible cell (estimate)" in ax.get_legend_handles_labels()[1]
    assert ax.get_ylim()[0] < 0
