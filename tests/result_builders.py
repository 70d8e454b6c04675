"""Hand-built results for the store and report tests (no physics: arbitrary numbers with the
awkward cases a file must keep: ±inf, empty arrays, non-ASCII names)."""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from probeplan.fisher import Direction
from probeplan.problem import Score
from probeplan.result import Baseline, BudgetTable, Changes, Result, SearchInfo

NAMES = ("s0.charge_c", "s0.x_m", "s0.y_m", "s0.z_m", "bg.z_v_per_m")
CONFIG_TEXT = """title = "Round-trip site (fictional)"
seed = 11
[probes]
count = 2
noise_v_per_m = 20.0
[[probes.installed]]
name = "mast-A"
position_m = [0.0, 0.0, 0.0]
"""


def make_score(rng: np.random.Generator, n_scenarios: int = 3, singular: bool = True) -> Score:
    """A hand-built Score with awkward values: +inf bounds, −inf criterion, a 0-size-safe mix."""
    p = len(NAMES)
    a = rng.normal(size=(n_scenarios, p, p))
    fisher = a @ np.swapaxes(a, 1, 2)
    crb = rng.uniform(0.1, 10.0, size=(n_scenarios, p))
    per = rng.normal(size=n_scenarios)
    sing = np.zeros(n_scenarios, dtype=bool)
    unresolved = []
    if singular:
        crb[1] = np.inf
        per[1] = -np.inf
        sing[1] = True
        w = np.zeros(p)
        w[[0, 3]] = [0.8, -0.6]
        unresolved = [
            Direction(w, 0.0, True, "charge and height of s0 trade off: only their product"),
            Direction(np.eye(p)[2], 3.5e-8, False, "s0.y_m is not pinned down by this layout"),
        ]
    return Score(
        positions_m=rng.normal(scale=500.0, size=(3, 3)),
        installed=np.array([True, False, False]),
        gain=np.array([1.0, 1.25, 0.9]),
        names=NAMES,
        theta=rng.normal(size=(n_scenarios, p)),
        fisher=fisher,
        crb_std=crb,
        per_scenario=per,
        value=float(np.mean(per)),
        criterion="d",
        aggregate="quantile:0.9",
        singular=sing,
        saturated=np.array([0.0, 1.0 / 3.0, 0.5]),
        unresolved=unresolved,
        unresolved_scenario=1,
        failure_values=np.array([-np.inf, 0.25, 0.5]) if singular else None,
    )


def make_result(rng: np.random.Generator, *, search=True, budget=True, **kw) -> Result:
    score = make_score(rng, **kw)
    info = None
    if search:
        info = SearchInfo(
            history=rng.normal(size=17),
            bound=12.345678901234567,
            bound_gap=1.5e-3,
            grid_spacing_m=250.0,
            n_candidates=321,
            baselines=(
                Baseline("greedy", 1.0, rng.normal(size=(2, 3))),
                Baseline("best of 100 random", -0.5, rng.normal(size=(2, 3))),
            ),
            stages=(("greedy", 1.0), ("exchange", 1.1), ("refine", 1.2)),
            seconds=3.25,
            objective="worst single loss",
        )
    table = None
    if budget:
        table = BudgetTable(
            count=np.array([2, 2, 4]),
            grade=np.array(["standard", "précis", "standard"], dtype=object),
            cost=np.array([9000.0, 15000.0, 18000.0]),
            value=np.array([1.0, 2.0, np.inf]),
            meets_target=np.array([False, True, True]),
            pareto=np.array([True, True, False]),
            cheapest=1,
            target=1.5,
            layouts=tuple(rng.normal(size=(n, 3)) for n in (2, 2, 4)),
        )
    return Result(
        command="plan",
        config_text=CONFIG_TEXT,
        config_path="sites/round.toml",
        title="Round-trip site (fictional)",
        seed=11,
        version="0.1.0",
        created_utc="2024-05-01T12:00:00Z",
        caution="esd",
        ground_z_m=0.0,
        score=score,
        search=info,
        budget=table,
        complete=False,
        extra={"d_efficiency": 0.987654321, "n": 3.0},
        changes=Changes(
            old_path="old.h5",
            mode="installed",
            old_value=0.75,
            old_rescored=0.625,
            kept_m=rng.normal(size=(1, 3)),
            moved_from_m=rng.normal(size=(1, 3)),
            moved_to_m=rng.normal(size=(1, 3)),
            added_m=np.zeros((0, 3)),
            removed_m=rng.normal(size=(2, 3)),
        ),
    )


def assert_same(a, b) -> None:
    """Exact equality of arrays, ±inf and NaN included."""
    a = np.asarray(a)
    b = np.asarray(b)
    assert a.shape == b.shape
    assert a.dtype.kind == b.dtype.kind or {a.dtype.kind, b.dtype.kind} <= {"i", "u"}
    if a.dtype.kind == "f":
        assert np.array_equal(a, b, equal_nan=True)
    else:
        assert np.array_equal(a, b)


def assert_results_equal(r: Result, q: Result) -> None:
    for field in (
        "command",
        "config_text",
        "config_path",
        "title",
        "seed",
        "version",
        "created_utc",
        "caution",
        "ground_z_m",
        "complete",
        "extra",
    ):
        assert getattr(q, field) == getattr(r, field), field
    s, t = r.score, q.score
    for field in (
        "positions_m",
        "installed",
        "gain",
        "theta",
        "fisher",
        "crb_std",
        "per_scenario",
        "singular",
        "saturated",
    ):
        assert_same(getattr(s, field), getattr(t, field))
    assert t.names == s.names
    assert t.value == s.value or (math.isnan(s.value) and math.isnan(t.value))
    assert (t.criterion, t.aggregate, t.unresolved_scenario) == (
        s.criterion,
        s.aggregate,
        s.unresolved_scenario,
    )
    assert len(t.unresolved) == len(s.unresolved)
    for d, e in zip(s.unresolved, t.unresolved, strict=True):
        assert_same(d.weights, e.weights)
        assert (e.relative_eigenvalue, e.singular, e.text) == (
            d.relative_eigenvalue,
            d.singular,
            d.text,
        )
    assert (r.search is None) == (q.search is None)
    if r.search is not None:
        a, b = r.search, q.search
        assert_same(a.history, b.history)
        assert (b.bound, b.bound_gap, b.grid_spacing_m, b.n_candidates, b.seconds) == (
            a.bound,
            a.bound_gap,
            a.grid_spacing_m,
            a.n_candidates,
            a.seconds,
        )
        assert b.stages == a.stages
        assert b.objective == a.objective
        assert (a.restart_values is None) == (b.restart_values is None)
        if a.restart_values is not None:
            assert_same(a.restart_values, b.restart_values)
        assert [(x.name, x.value) for x in b.baselines] == [(x.name, x.value) for x in a.baselines]
        for x, y in zip(a.baselines, b.baselines, strict=True):
            assert_same(x.positions_m, y.positions_m)
    if s.failure_values is None:
        assert t.failure_values is None
    else:
        assert_same(s.failure_values, t.failure_values)
    for section in ("changes", "simulation"):
        a, b = getattr(r, section), getattr(q, section)
        assert (a is None) == (b is None), section
        if a is not None:
            assert type(a) is type(b)
            for fld in dataclasses.fields(a):
                x, y = getattr(a, fld.name), getattr(b, fld.name)
                if isinstance(x, np.ndarray):
                    assert_same(x, y)
                else:
                    assert (type(x), x) == (type(y), y), fld.name
    assert (r.budget is None) == (q.budget is None)
    if r.budget is not None:
        a, b = r.budget, q.budget
        for field in ("count", "cost", "value", "meets_target", "pareto"):
            assert_same(getattr(a, field), getattr(b, field))
        assert list(b.grade) == list(a.grade)
        assert (b.cheapest, b.target) == (a.cheapest, a.target)
        for x, y in zip(a.layouts, b.layouts, strict=True):
            assert_same(x, y)


def make_simulation(rng: np.random.Generator):
    """A hand-built simulate.Simulation over the NAMES parameters."""
    from probeplan.simulate import Simulation

    n_sim, trials, p = 2, 5, len(NAMES)
    return Simulation(
        trials=trials,
        scenarios=np.array([0, 3]),
        names=NAMES,
        truth=rng.normal(size=(n_sim, p)),
        fitted=rng.normal(size=(n_sim, trials, p)),
        converged=rng.random((n_sim, trials)) > 0.2,
        rms_error=np.array([[1.0, 2.0, np.inf, 4.0, 5.0]] * n_sim),
        crb_std=rng.uniform(size=(n_sim, p)),
        has_location=True,
        location_rms_m=np.array([10.0, 12.0]),
        location_crb_m=np.array([9.5, 11.0]),
        has_charge=False,
        charge_rms_rel=np.array([-1.0, -1.0]),
        charge_crb_rel=np.array([-1.0, -1.0]),
        saturated=np.zeros((n_sim, 3)),
    )
