"""Budget sweeps: the table's arithmetic, monotonicity, the cheapest row and the Pareto marks."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sites import box, make_config, meter_grade, point_source, rectangle

from probeplan.budget import cheapest_meeting, pareto_front, run_budget
from probeplan.errors import InputError

# An invented test site: one point charge over ground, ground meters on a square.
SITE = dict(
    title="budget test site (invented)",
    probes={"min_spacing_m": 200.0},
    region=[rectangle(3000.0)],
    source=[point_source(center_m=(0.0, 0.0, 6000.0), center_range_m=box(1000.0, 5000.0, 7000.0))],
    grade=[meter_grade("basic", 40.0, 1000.0), meter_grade("fine", 10.0, 3000.0)],
)


def _config(target: float = -20.0):
    return make_config("budget-test.toml", SITE, budget={"counts": [4, 5, 7], "target": target})


@pytest.fixture(scope="module")
def table():
    with ThreadPoolExecutor(max_workers=2) as pool:
        return run_budget(_config(), executor=pool)[0]


def test_cost_is_count_times_unit_cost(table):
    unit = {"basic": 1000.0, "fine": 3000.0}
    expected = np.array([c * unit[g] for c, g in zip(table.count, table.grade, strict=True)])
    np.testing.assert_array_equal(table.cost, expected)
    assert np.all(np.diff(table.cost) >= 0), "rows are sorted by cost"
    assert len(table.cost) == 6 and len(table.layouts) == 6
    for n, layout in zip(table.count, table.layouts, strict=True):
        assert layout.shape == (n, 3)


def test_more_probes_of_one_grade_never_worsen_d(table):
    for grade in ("basic", "fine"):
        rows = np.nonzero(table.grade == grade)[0]
        rows = rows[np.argsort(table.count[rows])]
        assert np.all(np.diff(table.value[rows]) >= -1e-9)


def test_better_meters_score_better_at_equal_count(table):
    # Four times less additive noise multiplies J by 16: log det grows by p ln 16 for the same
    # layout (Fisher information of Gaussian noise scales as 1/σ²), so the plan can only be
    # better.
    for n in (4, 5, 7):
        basic = table.value[(table.grade == "basic") & (table.count == n)][0]
        fine = table.value[(table.grade == "fine") & (table.count == n)][0]
        assert fine >= basic + 4 * np.log(16) - 1e-6


def test_target_and_cheapest(table):
    meets = table.value >= table.target
    np.testing.assert_array_equal(table.meets_target, meets)
    if meets.any():
        ok = np.nonzero(meets)[0]
        assert table.cheapest in ok
        assert table.cost[table.cheapest] == table.cost[ok].min()
    else:
        assert table.cheapest == -1


def test_no_option_meets_an_impossible_target():
    cfg = _config(target=1e6)
    with ThreadPoolExecutor(max_workers=2) as pool:
        tab, complete = run_budget(cfg, executor=pool)
    assert complete
    assert tab.cheapest == -1 and not tab.meets_target.any()


def test_budget_needs_grades_and_a_budget_table():
    cfg = make_config("nogrades.toml", SITE, grade=None)
    with pytest.raises(InputError, match=r"nogrades.toml: `budget` needs a \[budget\] table"):
        run_budget(cfg)


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(st.integers(1, 6), st.integers(-5, 5)),
        min_size=1,
        max_size=12,
    ),
    st.booleans(),
)
def test_pareto_marks_match_the_definition(rows, maximise):
    # Definition (common practice in multi-objective comparison): an option is on the front
    # when no other option is at most as costly and at least as good, and strictly one of them.
    cost = np.array([r[0] for r in rows], dtype=float)
    value = np.array([r[1] for r in rows], dtype=float)
    front = pareto_front(cost, value, maximise)
    for i in range(len(rows)):
        good = (lambda a, b: a >= b) if maximise else (lambda a, b: a <= b)
        strict = (lambda a, b: a > b) if maximise else (lambda a, b: a < b)
        dominated = any(
            cost[j] <= cost[i]
            and good(value[j], value[i])
            and (cost[j] < cost[i] or strict(value[j], value[i]))
            for j in range(len(rows))
        )
        assert front[i] == (not dominated)


def test_singular_options_are_not_on_the_front():
    cost = np.array([1.0, 2.0, 3.0])
    value = np.array([-np.inf, 5.0, 6.0])
    np.testing.assert_array_equal(pareto_front(cost, value, True), [False, True, True])


def test_cheapest_meeting_breaks_cost_ties_by_value():
    cost = np.array([5.0, 5.0, 9.0])
    value = np.array([1.0, 2.0, 3.0])
    assert cheapest_meeting(cost, value, np.array([True, True, True]), maximise=True) == 1
    assert cheapest_meeting(cost, value, np.array([True, True, True]), maximise=False) == 0
    assert cheapest_meeting(cost, value, np.array([False, False, False]), maximise=True) == -1
