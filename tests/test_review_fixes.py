"""Regressions found in review: each test names the failure it guards against."""

from __future__ import annotations

import numpy as np

from probeplan.config import parse_config
from probeplan.problem import build_problem
from probeplan.search import plan

# An invented test site; placeholders are filled per test.
BASE = """
seed = 4
[ground]
z_m = 0.0
[probes]
count = {count}
component = {component}
noise_v_per_m = 20.0
min_spacing_m = {spacing}
{installed}
[[region]]
kind = "rectangle"
min_m = [-3000.0, -3000.0]
max_m = [3000.0, 3000.0]
z_m = 0.0
[[source]]
{source}
{background}
[design]
scenarios = 3
evaluations = 0
random_layouts = 10
grid_spacing_m = 500.0
{grades}
"""

POINT = """kind = "point"
charge_c = -20.0
center_m = [0.0, 0.0, 4000.0]
estimate = ["charge", "x", "y", "z"]"""


def _config(
    count=4, component='"z"', spacing=0.0, installed="", source=POINT, background="", grades=""
):
    text = BASE.format(
        count=count,
        component=component,
        spacing=spacing,
        installed=installed,
        source=source,
        background=background,
        grades=grades,
    )
    return parse_config(text, "review.toml")


def test_plan_survives_a_parameter_no_candidate_can_see():
    # Outside a uniform ball the field does not depend on its radius (shell theorem), so no
    # layout of outside probes resolves it: the relaxation used to crash on its singular start.
    ball = """kind = "sphere"
charge_c = -20.0
center_m = [0.0, 0.0, 4000.0]
radius_m = 500.0
estimate = ["charge", "z", "radius"]"""
    outcome = plan(build_problem(_config(source=ball)), random_layouts=0)
    assert outcome.info.bound == -np.inf
    assert outcome.score.value == -np.inf
    assert any("radius" in d.text for d in outcome.score.unresolved)


def test_tilted_meters_estimate_only_the_background_they_can_separate():
    # Every reading sees 0.6 B_y + 0.8 B_z: one number, so one background component.
    bg = "[background]\nfield_v_per_m = [0.0, 0.0, -120.0]\nestimate = true"
    problem = build_problem(_config(count=6, component="[0.0, 0.6, 0.8]", background=bg))
    assert [n for n in problem.names if n.startswith("bg.")] == ["bg.z_v_per_m"]
    layout = np.array(
        [
            [-2500, -2500, 0],
            [2500, -2500, 0],
            [0, 0, 0],
            [-2500, 2500, 0],
            [2500, 2500, 0],
            [0, 2500, 0],
        ],
        dtype=float,
    )
    assert np.isfinite(problem.score(layout).value)
    # Axis-aligned meters: exactly the components they read.
    both = build_problem(
        _config(
            count=6,
            background=bg,
            installed='[[probes.installed]]\nposition_m = [100.0, 0.0, 0.0]\ncomponent = "x"',
        )
    )
    assert [n for n in both.names if n.startswith("bg.")] == ["bg.x_v_per_m", "bg.z_v_per_m"]


def test_a_budget_grade_does_not_change_the_installed_meters():
    grades = """[[grade]]
name = "coarse"
noise_v_per_m = 200.0
cost = 1.0"""
    inst = "[[probes.installed]]\nposition_m = [500.0, 500.0, 0.0]"
    cfg = _config(installed=inst, grades=grades)
    plain = build_problem(cfg)
    coarse = build_problem(cfg, grade=cfg.grades[0])
    np.testing.assert_array_equal(plain.fisher_installed, coarse.fisher_installed)
    assert coarse.noise.noise_v_per_m == 200.0
    assert coarse.grades[coarse.installed_grade[0]].noise_v_per_m == 20.0


def test_a_warm_start_that_breaks_spacing_is_thinned_first():
    cfg = _config(count=4, spacing=1500.0)
    problem = build_problem(cfg)
    warm = np.array([[0, 0, 0], [500, 0, 0], [1000, 0, 0], [-2500, 2500, 0]], dtype=float)
    outcome = plan(problem, warm_start_m=warm, random_layouts=0)
    for b in outcome.info.baselines:
        assert problem.site.spacing_ok(b.positions_m[None])[0], b.name
    assert problem.site.spacing_ok(outcome.positions_m[None])[0]


def test_the_automatic_grid_is_not_finer_than_the_field_changes():
    # An 18 m rail 3-7 m from a charge: the count target alone gave 1.2 cm spacing.
    from probeplan.search import GRID_FRACTION_OF_DISTANCE, _candidates

    text = """
seed = 1
[ground]
z_m = 0.0
[probes]
count = 3
component = "vector"
noise_v_per_m = 50.0
[[region]]
kind = "segment"
start_m = [-9.0, 5.0, 2.5]
end_m = [9.0, 5.0, 2.5]
[[source]]
kind = "point"
charge_c = 2e-6
center_m = [0.0, 0.0, 3.0]
estimate = ["charge", "x", "y", "z"]
[design]
scenarios = 2
"""
    problem = build_problem(parse_config(text, "rail.toml"))
    cand = _candidates(problem, None, 1500)
    dist = np.linalg.norm(cand.positions_m - [0.0, 0.0, 3.0], axis=1)
    # A segment is split into equal steps, so the spacing may come out a little under the
    # floor asked for (here 18 m / 134 steps against 0.136 m).
    assert cand.spacing_m >= 0.95 * GRID_FRACTION_OF_DISTANCE * np.median(dist)
    assert cand.positions_m.shape[0] < 1500
    # A spacing the config sets is kept as it is.
    assert _candidates(problem, 0.05, 1500).spacing_m == 0.05
