"""The restarts beside a loose relaxation bound: the search, the stored figure, the words.

The outside reference for the search is exhaustive enumeration: on a site of twelve mounting
points, every layout of four meters (itertools.combinations, 495 of them) is scored and the
best one is the true optimum over the grid. The mounting points and charges are invented.
"""

from __future__ import annotations

import dataclasses
import io
import itertools
import math

import h5py
import numpy as np
import pytest
from config_cases import BASE, EST, assert_bad_case
from result_builders import assert_results_equal, make_result
from rich.console import Console
from sites import box, make_config, point_source

from probeplan import report
from probeplan.config import parse_config
from probeplan.fisher import d_ratio
from probeplan.problem import build_problem
from probeplan.search import d_efficiency, plan
from probeplan.search.restarts import TIGHT_BOUND_EFFICIENCY
from probeplan.store import read_result, write_result

#: Twelve mounting points over a 16 km square (invented), drawn once from a fixed seed.
POINTS = np.random.default_rng(0).uniform(-8000.0, 8000.0, size=(12, 2)).round()


def _tiny(restarts: int = 6, seed: int = 3, **probes):
    """Four meters on twelve points under a charge that wanders 6 km: sixteen scenarios, no
    refinement. The relaxation lets weights spread over every point, so the bound is loose."""
    pts = [[float(x), float(y), 0.0] for x, y in POINTS]
    return build_problem(
        make_config(
            "tiny.toml",
            seed=seed,
            probes={"count": 4, **probes},
            region=[{"kind": "points", "positions_m": pts}],
            source=[point_source(center_range_m=box(6000.0, 2500.0, 3500.0))],
            design={"scenarios": 16, "random_layouts": 10, "restarts": restarts},
        )
    )


def test_restarts_never_beat_the_exhaustive_optimum_and_reach_it():
    problem = _tiny()
    out = plan(problem)
    eff = d_efficiency(out.score.value, out.info.bound, problem.n_params)
    assert eff < TIGHT_BOUND_EFFICIENCY  # the bound is loose here: the restarts ran
    runs = out.info.restart_values
    assert runs is not None and runs.shape == (7,)  # the greedy start's and six restarts
    # Outside reference: every 4-subset of the 12 points, scored alike.
    pos = np.array([[x, y, 0.0] for x, y in POINTS])
    subsets = np.array(list(itertools.combinations(range(12), 4)))
    layouts = pos[subsets]
    gains = problem.gain_at(layouts.reshape(-1, 3)).reshape(subsets.shape)
    optimum = float(np.max(problem.objective(layouts, gains)))
    slack = 1e-9 * max(1.0, abs(optimum))  # rounding of two ways to the same determinant
    assert np.all(runs <= optimum + slack)
    assert out.score.value <= optimum + slack
    # And they reach it on this site: the best search is within 1 % D-efficiency of it.
    assert d_ratio(float(runs.max()), optimum, problem.n_params) >= 0.99
    # The plan is the best layout of all the searches.
    assert out.score.value >= runs.max() - slack


def test_restarts_are_deterministic_for_a_seed():
    a, b = plan(_tiny(seed=5)), plan(_tiny(seed=5))
    assert a.info.restart_values.tobytes() == b.info.restart_values.tobytes()
    assert a.positions_m.tobytes() == b.positions_m.tobytes()
    # The restarts draw from a generator of their own: the baselines are those of a plan
    # without restarts.
    c = plan(_tiny(restarts=0, seed=5))
    assert c.info.restart_values is None
    names = [(x.name, x.value) for x in a.info.baselines if x.name.startswith("best of")]
    assert names == [(x.name, x.value) for x in c.info.baselines if x.name.startswith("best of")]


def test_restarts_keep_the_spacing_rule():
    problem = _tiny(min_spacing_m=5000.0)
    out = plan(problem)
    assert out.info.restart_values is not None
    assert problem.site.spacing_ok(out.positions_m[None])[0]


def test_a_stop_during_the_restarts_keeps_the_best_so_far():
    problem = _tiny()
    seen: list[str] = []
    polls = {"n": 0}

    def stop() -> bool:
        if "restarts" in seen:
            polls["n"] += 1
        return polls["n"] > 6  # a few steps into the first restart

    out = plan(problem, progress=lambda stage, done, total: seen.append(stage), stop=stop)
    assert not out.complete and out.has_layout
    assert "refine" not in seen and "baselines" not in seen  # nothing ran after the stop
    exchange = dict(out.info.stages)["exchange"]
    assert out.score.value >= exchange - 1e-9 * abs(exchange)
    # The search the stop cut short is no run of the figure.
    assert out.info.restart_values is None


def test_a_tight_bound_or_restarts_0_skips_the_stage():
    seen: list[str] = []
    # The shared test site: one charge near its nominal place, the bound close to the plan.
    problem = build_problem(make_config(design={"random_layouts": 10}))
    out = plan(problem, progress=lambda stage, done, total: seen.append(stage))
    assert d_efficiency(out.score.value, out.info.bound, problem.n_params) >= 0.95
    assert "restarts" not in seen and out.info.restart_values is None
    seen.clear()
    out = plan(_tiny(restarts=0), progress=lambda stage, done, total: seen.append(stage))
    assert "restarts" not in seen and out.info.restart_values is None


# --------------------------------------------------------------------------------------------
# The config key
# --------------------------------------------------------------------------------------------


def test_restarts_key_default_and_value():
    assert parse_config(BASE).design.restarts == 4
    assert parse_config(BASE + "\n[design]\nrestarts = 0\n").design.restarts == 0


@pytest.mark.parametrize(
    ("line", "needles"),
    [
        ("restarts = -1", ["`design.restarts` must be a whole number >= 0; got -1."]),
        ("restarts = 2.5", ["`design.restarts` must be a whole number >= 0; got"]),
        ("restarts = true", ["`design.restarts` must be a whole number >= 0; got"]),
        (
            "restarts = 101",
            ["`design.restarts` must be a whole number from 0 to 100; got 101.", "a few"],
        ),
    ],
)
def test_restarts_key_messages(tmp_path, line, needles):
    assert_bad_case(tmp_path, (EST, EST + f"\n\n[design]\n{line}"), needles)


# --------------------------------------------------------------------------------------------
# The result file
# --------------------------------------------------------------------------------------------


def _with_runs(runs):
    r = make_result(np.random.default_rng(8), budget=False)
    return dataclasses.replace(r, search=dataclasses.replace(r.search, restart_values=runs))


def test_restart_values_round_trip(tmp_path):
    r = _with_runs(np.array([-63.85, -64.01, -63.83, -np.inf]))
    path = write_result(r, tmp_path / "r.h5")
    with h5py.File(path) as f:
        ds = f["search/restart_values"]
        assert ds.shape == (4,) and ds.attrs["units"] == f["search/history"].attrs["units"]
        assert "greedy" in ds.attrs["starts"]
    assert_results_equal(r, read_result(path))


def test_a_file_without_restart_values_still_reads(tmp_path):
    path = write_result(_with_runs(np.array([1.0, 2.0])), tmp_path / "r.h5")
    with h5py.File(path, "r+") as f:
        del f["search/restart_values"]  # as a file written before the restarts
    assert read_result(path).search.restart_values is None


def test_restart_values_are_checked_when_read(tmp_path):
    path = write_result(_with_runs(np.array([1.0, 2.0])), tmp_path / "r.h5")
    with h5py.File(path, "r+") as f:
        f["search/restart_values"][0] = np.nan
    with pytest.raises(Exception, match="/search/restart_values holds NaN"):
        read_result(path)


# --------------------------------------------------------------------------------------------
# The words
# --------------------------------------------------------------------------------------------


def _summary(value: float, bound: float, runs, width: int = 80) -> str:
    r = _with_runs(runs)
    r = dataclasses.replace(
        r,
        score=dataclasses.replace(r.score, criterion="d", value=value),
        search=dataclasses.replace(r.search, bound=bound),
        changes=None,
    )
    out = io.StringIO()
    report.print_result(r, Console(file=out, width=width, highlight=False))
    return out.getvalue()


def test_a_loose_bound_with_restarts_is_explained_in_words_at_80_columns():
    n = len(make_result(np.random.default_rng(8), budget=False).score.names)
    # D-ratios to the best run exp(Δ/n): 1, 0.995, 0.98.
    runs = -10.0 + n * np.log([1.0, 0.995, 0.98])
    text = _summary(-10.0, -10.0 + n * math.log(2.0), runs)
    flat = " ".join(text.split())
    assert "50.0 % of the bound" in flat
    assert "loose bound, not a poor plan" in flat
    assert "3 searches from different starts" in flat
    assert "between 98.0 % and 100 % of the best one's D-value" in flat
    assert "2 of 3 within 1 % of the best" in flat
    assert "not a proof that no better layout exists" in flat
    assert "They disagree" not in flat
    assert max(len(line) for line in text.splitlines()) <= 80


def test_restarts_that_disagree_are_said_to():
    n = len(make_result(np.random.default_rng(8), budget=False).score.names)
    runs = -10.0 + n * np.log([1.0, 0.9, 0.8, 0.95])
    flat = " ".join(_summary(-10.0, -10.0 + n * math.log(2.0), runs).split())
    assert "1 of 4 within 1 %" in flat and "They disagree" in flat


def test_a_loose_bound_without_restarts_says_how_to_get_them():
    n = len(make_result(np.random.default_rng(8), budget=False).score.names)
    flat = " ".join(_summary(-10.0, -10.0 + n * math.log(2.0), None).split())
    assert "No repeated searches to compare" in flat and "`[design] restarts`" in flat
