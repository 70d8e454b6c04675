"""Probe failures: single-loss scores against brute force, and planning that tolerates one."""

from __future__ import annotations

import numpy as np
import pytest
from sites import box, make_config, point_source, rectangle

from probeplan.problem import build_problem
from probeplan.search import plan


# An invented site: ground meters under a charge at 3 km, one installed meter on a mast.
def _site(criterion="d", aggregate="mean", tolerate=0, evaluations=0, mast="z") -> dict:
    mast_meter = {"name": "mast", "position_m": [-1500.0, -1200.0, 10.0], "component": mast}
    return dict(
        title="failure test site (invented)",
        seed=11,
        probes={
            "count": 6,
            "relative_noise": 0.02,
            "min_spacing_m": 200.0,
            "installed": [{**mast_meter, "gain": 2.0}],
        },
        region=[rectangle(3000.0)],
        source=[
            point_source(-15.0, (200.0, -100.0, 3000.0), center_range_m=box(800.0, 2500.0, 3500.0))
        ],
        background={"field_v_per_m": [0.0, 0.0, -120.0]},
        design={
            "criterion": criterion,
            "aggregate": aggregate,
            "scenarios": 6,
            "evaluations": evaluations,
            "random_layouts": 20,
            "tolerate_failures": tolerate,
            "grid_spacing_m": 400.0,
        },
    )


def _problem(criterion="d", aggregate="mean", tolerate=0, evaluations=0, mast="z"):
    site = _site(criterion, aggregate, tolerate, evaluations, mast)
    return build_problem(make_config("failures.toml", **site))


LAYOUT = np.array(
    [
        [2000.0, 2000.0, 0.0],
        [-2000.0, 2000.0, 0.0],
        [0.0, -2500.0, 0.0],
        [500.0, 400.0, 0.0],
        [-900.0, -300.0, 0.0],
        [2500.0, -1500.0, 0.0],
    ]
)


@pytest.mark.parametrize(
    ("criterion", "aggregate"), [("d", "mean"), ("location", "worst"), ("charge", "quantile:0.75")]
)
def test_single_failure_scores_match_brute_force(criterion, aggregate):
    problem = _problem(criterion, aggregate)
    losses = problem.failure_values(LAYOUT)
    assert losses.shape == (1 + len(LAYOUT),)
    # Brute force: rebuild the layout without probe i and score it from scratch. Losing the
    # installed mast is a config without it; losing a new probe is a layout without that row.
    site = _site(criterion, aggregate)
    del site["probes"]["installed"]
    bare = build_problem(make_config("no-mast.toml", **site))
    expected = [bare.score(LAYOUT).value]
    for i in range(len(LAYOUT)):
        expected.append(problem.score(np.delete(LAYOUT, i, axis=0)).value)
    np.testing.assert_allclose(losses, expected, rtol=1e-9)
    score = problem.score(LAYOUT)
    np.testing.assert_allclose(score.failure_values, expected, rtol=1e-9)


def test_losing_the_only_meter_that_sees_a_parameter_is_singular():
    # A 3-axis mast meter is the only one reading the horizontal background: bg.x and bg.y
    # are estimated because of it, and without it they cannot be (J singular: d = -inf).
    problem = _problem(mast="vector")
    assert "bg.x_v_per_m" in problem.names and "bg.y_v_per_m" in problem.names
    losses = problem.failure_values(LAYOUT)
    assert losses[0] == -np.inf
    assert np.all(np.isfinite(losses[1:]))


def test_losing_a_probe_never_helps():
    # Fisher information is a sum over readings, so removing one lowers J in the Loewner order
    # and log det with it (Kay vol. 1, §3.7: information of independent readings adds).
    problem = _problem()
    assert np.all(problem.failure_values(LAYOUT) <= problem.score(LAYOUT).value + 1e-12)


def test_robust_values_are_the_worst_single_loss():
    problem = _problem()
    layouts = np.stack([LAYOUT, LAYOUT[::-1] * 0.8])
    robust = problem.robust_layout_values(layouts)
    for k, lay in enumerate(layouts):
        assert robust[k] == pytest.approx(problem.failure_values(lay).min(), rel=1e-12)


def test_planning_for_a_failure_improves_the_worst_case():
    plain = plan(_problem(tolerate=0), random_layouts=0)
    robust = plan(_problem(tolerate=1), random_layouts=0)
    p = _problem()
    worst_plain = p.failure_values(plain.positions_m).min()
    worst_robust = p.failure_values(robust.positions_m).min()
    # The robust plan maximises the worst single loss; the plain plan the intact value.
    assert worst_robust >= worst_plain - 1e-9
    assert plain.score.value >= robust.score.value - 1e-9
    assert robust.info.objective == "worst single loss"
    assert plain.info.objective == "criterion"
