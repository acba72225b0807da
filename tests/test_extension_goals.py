"""Extension points: a new goal and a new propagation model are each one class plus its
registration, defined here in the test file, and the study file, the trace and the search accept
them without any change to the package. Also: no import cycle between optgrade's modules.

The toy propagation model is a uniform absorber with a closed-form answer: every cell j of
length a_j and rod height h_j keeps the power fraction exp(-2 KAPPA h_j a_j) (exponential
attenuation of power along a lossy path, Beer-Lambert form; common practice), so
T = exp(-2 KAPPA sum_j h_j a_j) reaches the far end and the lost power 1 - T is split in fixed
proportions, SHEAR_SHARE into backward shear and the rest absorbed. KAPPA is an invented
attenuation per unit rod area (1/m^2). The tests recompute T from the layout's own arrays and
check that the search scored exactly those numbers.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import numpy as np
import optuna
import pytest
from optuna.trial import TrialState
from search_helpers import fake_pipeline, fake_trace

import optgrade
from optgrade import objectives, profiles, search
from optgrade.channels import CHANNELS
from optgrade.errors import StudyError
from optgrade.fabrication import check_layout
from optgrade.objectives import Objective, ObjectiveValue
from optgrade.propagation import PROPAGATION_MODELS, PropagationModel, Trace
from optgrade.study import study_from_text

ROOT = Path(__file__).resolve().parent.parent
STUDY_TEXT = (ROOT / "studies" / "bench_backward_shear.toml").read_text()

KAPPA = 100.0  # 1/m^2, invented
SHEAR_SHARE = 0.25


def _study_text(weights: str, *, propagation: str | None = None, goal_extra: str = "") -> str:
    """The bench example with other [goal.weights] (and optionally another propagation model)."""
    text = re.sub(r"\[goal\.weights\]\n(.+\n)+", "[goal.weights]\n" + weights, STUDY_TEXT,
                  count=1)
    extra = goal_extra + (f'propagation = "{propagation}"\n' if propagation else "")
    return text.replace('model = "lattice"\n', 'model = "lattice"\n' + extra, 1)


# --------------------------------------------------------------------------- (c) a new goal


class SurfaceKept(Objective):
    """Toy goal: band-mean transmitted surface fraction (to be minimised)."""

    name = "surface_kept"
    direction = "minimize"

    def evaluate(self, trace, layout, study, context) -> ObjectiveValue:
        t = np.asarray(trace.fractions["transmitted_surface"], dtype=float)
        return ObjectiveValue(float(t.mean()), {"max": float(t.max())})


@pytest.fixture
def toy_goal():
    objectives.register(SurfaceKept)
    yield SurfaceKept
    objectives.GOALS.unregister(SurfaceKept.name)


def test_unregistered_goal_is_refused_by_the_study_file():
    with pytest.raises(StudyError, match="goal.weights.surface_kept: unknown goal"):
        study_from_text(_study_text("channel = 1.0\nsurface_kept = 0.5\n"))


def test_registered_goal_is_accepted_and_scored_by_the_search(toy_goal, tmp_path):
    """The toy goal registered from this file: accepted in [goal.weights] and [search]
    objectives, and every stored trial's score is channel - 0.5 * surface_kept recomputed by
    hand from the stand-in trace of that trial's layout."""
    study = study_from_text(_study_text("channel = 1.0\nsurface_kept = 0.5\n"))
    assert study.goal.weights == {"channel": 1.0, "surface_kept": 0.5}
    multi = study_from_text(_study_text("channel = 1.0\n").replace(
        'objectives = ["weighted"]', 'objectives = ["channel", "surface_kept"]'))
    assert multi.search.objectives == ["channel", "surface_kept"]
    assert search.directions(multi) == ["maximize", "minimize"]

    url = f"sqlite:///{tmp_path / 'goal.db'}"
    out = search.run_search(study, tmp_path / "goal", n_trials=8, n_jobs=0, storage=url,
                            pipeline=fake_pipeline, show_progress=False)
    assert out.n_finished == 8
    stored = optuna.load_study(study_name=study.meta.name, storage=search.open_storage(url))
    n_checked = 0
    for t in stored.get_trials(states=(TrialState.COMPLETE,)):
        layout = profiles.layout_from_params(study, t.params)
        if check_layout(study, layout):
            continue  # a penalised layout; the penalty is tested in test_search.py
        tr = fake_trace(study, layout)
        expect = (np.mean(tr.fractions["backward_shear"])
                  - 0.5 * np.mean(tr.fractions["transmitted_surface"]))
        assert t.user_attrs["score"] == pytest.approx(expect, abs=1e-12)
        n_checked += 1
    assert n_checked >= 4


# --------------------------------------------------------------------------- (d) a new model


class UniformAbsorber(PropagationModel):
    """Toy propagation model with a closed-form split (see the module docstring)."""

    name = "uniform_absorber"

    def trace(self, layout, freq=None) -> Trace:
        f = self.frequencies(freq)
        kept = float(np.exp(-2.0 * KAPPA * np.sum(layout.height * layout.spacing)))
        zeros = np.zeros_like(f)
        fractions = {c: zeros.copy() for c in CHANNELS}
        fractions["transmitted_surface"] = np.full_like(f, kept)
        fractions["backward_shear"] = np.full_like(f, SHEAR_SHARE * (1.0 - kept))
        fractions["absorbed"] = np.full_like(f, (1.0 - SHEAR_SHARE) * (1.0 - kept))
        nan = np.full_like(f, np.nan)
        return Trace(frequency=f, fractions=fractions,
                     position={c: nan.copy() for c in CHANNELS},
                     angle={c: nan.copy() for c in CHANNELS}, eps_max=zeros.copy(),
                     is_adiabatic=np.ones(f.size, bool), branch=np.zeros(f.size, np.int8),
                     turning_position=nan.copy(), entry_reflection=zeros.copy(), phase=nan.copy())


@pytest.fixture
def toy_model():
    PROPAGATION_MODELS.register(UniformAbsorber)
    yield UniformAbsorber
    PROPAGATION_MODELS.unregister(UniformAbsorber.name)


def _closed_form_t(layout) -> float:
    return float(np.exp(-2.0 * KAPPA * np.dot(layout.height, layout.spacing)))


def test_unregistered_model_is_refused_by_the_study_file():
    with pytest.raises(StudyError, match="goal.propagation: 'uniform_absorber' is not one of"):
        study_from_text(_study_text("channel = 1.0\n", propagation="uniform_absorber"))


def test_registered_model_traces_and_drives_the_search(toy_model, tmp_path):
    """``goal.propagation`` names the toy model: the study validates, the package-level trace
    goes through it (closed-form T, fractions summing to 1), and a real search (no stand-in
    pipeline) scores every trial with it: the stored score is SHEAR_SHARE (1 - T) of that
    trial's layout, and no dispersion table is built."""
    study = study_from_text(_study_text("channel = 1.0\n", propagation="uniform_absorber"))
    assert study.goal.propagation == "uniform_absorber"
    layout = optgrade.read_table(ROOT / "studies" / "layouts" / "bench_backward_shear.csv")
    tr = optgrade.trace_layout(study, layout)
    t = _closed_form_t(layout)
    assert 0.01 < t < 0.99  # a case where both parts are visible
    assert tr.frequency.size == study.goal.n_frequencies
    assert np.allclose(tr.fractions["transmitted_surface"], t, rtol=0, atol=1e-15)
    assert np.allclose(tr.total(), 1.0, rtol=0, atol=1e-12)

    ctx = search.make_context(study)
    assert isinstance(ctx.model, UniformAbsorber)
    url = f"sqlite:///{tmp_path / 'model.db'}"
    out = search.run_search(study, tmp_path / "model", n_trials=6, n_jobs=0, storage=url,
                            show_progress=False)
    stored = optuna.load_study(study_name=study.meta.name, storage=search.open_storage(url))
    assert stored.user_attrs["table_hashes"] == {}
    n_checked = 0
    for trial in stored.get_trials(states=(TrialState.COMPLETE,)):
        lay = profiles.layout_from_params(study, trial.params)
        if check_layout(study, lay):
            continue
        expect = SHEAR_SHARE * (1.0 - _closed_form_t(lay))
        assert trial.user_attrs["score"] == pytest.approx(expect, abs=1e-12)
        n_checked += 1
    assert n_checked >= 3
    assert out.best_score == max(t.user_attrs["score"] for t in stored.get_trials(
        states=(TrialState.COMPLETE,)))


def test_registered_model_traces_perturbed_layouts_for_robustness(toy_model):
    """The robustness goal traces its perturbed layouts through the context with the toy model
    (the base class's full trace of each draw): its nominal score is the closed form."""
    study = study_from_text(_study_text("channel = 1.0\nrobustness = 0.2\n",
                                        propagation="uniform_absorber"))
    ctx = search.make_context(study)
    layout = optgrade.read_table(ROOT / "studies" / "layouts" / "bench_backward_shear.csv")
    tr = ctx.trace_fn(layout)
    value = objectives.get("robustness").evaluate(tr, layout, study, ctx)
    assert value.details["nominal"] == pytest.approx(
        SHEAR_SHARE * (1.0 - _closed_form_t(layout)), abs=1e-12)
    errors = np.full((2, layout.n_resonators), 1e-4)
    traces = ctx.trace_height_errors(layout, errors)
    taller = optgrade.layout_from_cells(layout.height + 1e-4, layout.spacing, layout.diameter)
    assert traces[0].fractions["transmitted_surface"][0] == pytest.approx(
        _closed_form_t(taller), abs=1e-15)


# --------------------------------------------------------------------------- import cycles


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _is_type_checking(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _module_level_imports(tree: ast.Module):
    """Import nodes executed when the module is imported (not in functions, classes or
    ``if TYPE_CHECKING`` blocks)."""
    stack = list(tree.body)
    while stack:
        node = stack.pop()
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            yield node
        elif isinstance(node, ast.If) and not _is_type_checking(node):
            stack.extend(node.body + node.orelse)
        elif isinstance(node, ast.Try):
            stack.extend(node.body + node.orelse + node.finalbody)
            for handler in node.handlers:
                stack.extend(handler.body)


def _import_graph() -> dict[str, set[str]]:
    files = {_module_name(p): p for p in (ROOT / "optgrade").rglob("*.py")}
    graph: dict[str, set[str]] = {name: set() for name in files}
    for name, path in files.items():
        is_package = path.name == "__init__.py"
        for node in _module_level_imports(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            else:
                base = node.module or ""
                if node.level:
                    anchor = name.split(".")
                    anchor = anchor[: len(anchor) - node.level + (1 if is_package else 0)]
                    base = ".".join(anchor + ([base] if base else []))
                targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in files else base
                           for a in node.names]
            for target in targets:
                if target in files and target != name:
                    graph[name].add(target)
    return graph


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan 1972)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    out: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def test_cycle_finder_sees_a_planted_cycle():
    """The checker itself: a two-module cycle and a three-module cycle are found, a chain not."""
    graph = {"a": {"b"}, "b": {"a"}, "c": {"d"}, "d": {"e"}, "e": {"c"}, "f": {"a"}}
    assert sorted(_cycles(graph)) == [["a", "b"], ["c", "d", "e"]]
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": set()}) == []


def test_no_import_cycle_between_optgrade_modules():
    """Module-level imports of every optgrade module (from each file's syntax tree) form no
    cycle: each stage imports only earlier stages, and the search never imports the exports."""
    graph = _import_graph()
    assert "optgrade.search._owner" in graph and "optgrade.export" in graph
    assert "optgrade.search" in graph["optgrade.export"]  # the graph does see real edges
    assert _cycles(graph) == []
    reach, todo = set(), ["optgrade.search._owner"]
    while todo:
        for w in graph[todo.pop()] - reach:
            reach.add(w)
            todo.append(w)
    assert "optgrade.export" not in reach
    assert not any(m.startswith("optgrade.objectives") for m in graph["optgrade.study"])
