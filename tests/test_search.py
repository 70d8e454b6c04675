"""The layout search: greedy and exchange against brute force, the greedy guarantee, the
relaxation bound, mounting rules, a known-optimal geometry and determinism.

Every site, charge and number below is invented for the tests (a fictional site).
"""

from __future__ import annotations

import functools
import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sites import ALL, make_config, point_source, rectangle, small_site

from probeplan.fisher import d_ratio
from probeplan.problem import Problem, build_problem
from probeplan.search import GridObjective, exchange, greedy, plan, relaxation_bound


def search_config(
    path: str,
    *,
    seed: int = 0,
    count: int = 3,
    criterion: str = "d",
    aggregate: str = "mean",
    scenarios: int = 6,
    estimate: tuple[str, ...] = ("charge", "x", "z"),
    grid_spacing_m: float | None = None,
    probes: dict | None = None,
    extra_regions: tuple[dict, ...] = (),
    keepout: list[dict] | None = None,
    background: dict | None = None,
    evaluations: int = 0,
):
    """A 12 km square of ground meters under a charge near 6 km, drawn from a wide box."""
    charge = point_source(
        center_m=(400.0, -300.0, 6000.0),
        estimate=estimate,
        charge_range_c=[-30.0, -10.0],
        center_range_m=[[-3000.0, 3000.0], [-3000.0, 3000.0], [5000.0, 8000.0]],
    )
    return make_config(
        path,
        seed=seed,
        title=None,
        probes={"count": count, "relative_noise": 0.02, **(probes or {})},
        region=[rectangle(6000.0), *extra_regions],
        keepout=keepout,
        source=[charge],
        background=background,
        design={
            "criterion": criterion,
            "aggregate": aggregate,
            "scenarios": scenarios,
            "evaluations": evaluations,
            "random_layouts": 50,
            "grid_spacing_m": grid_spacing_m,
        },
    )


FAIR_WEATHER = {"field_v_per_m": [0.0, 0.0, -120.0]}


def grid_problem(seed: int, spacing_m: float = 2000.0, count: int = 3, **kw):
    """A problem, its candidate lattice (7 × 7 = 49 points at 2 km) and the one-probe rows."""
    cfg = search_config("grid.toml", seed=seed, count=count, grid_spacing_m=spacing_m, **kw)
    problem = build_problem(cfg)
    cand = problem.site.candidate_grid(spacing_m)
    rows, _ = problem.rows(cand.positions_m)
    return problem, cand, rows


def all_subset_values(obj: GridObjective, count: int, problem=None):
    """Every subset of ``count`` candidates and its value (Problem.values: the contract's
    criterion, or the objective's own when ``problem`` is None), batched."""
    combos = np.array(list(itertools.combinations(range(obj.info.shape[1]), count)))
    m = obj.base[None] + np.moveaxis(obj.info[:, combos].sum(axis=2), 1, 0)  # (n, S, p, p)
    vals = problem.values(m) if problem is not None else obj.values(m)
    return combos, vals


# --------------------------------------------------------------------------------------------
# Greedy + exchange against brute force
# --------------------------------------------------------------------------------------------

# Seeds whose scenario draws let greedy + exchange find the brute-force optimum (measured:
# seeds 1–9 do; on seed 0 the exchange stops in a local optimum 0.066 short in log det, a
# D-efficiency of 0.978 — single swaps cannot always reach the best set).
SEEDS = tuple(range(8))
FINDS_OPTIMUM = tuple(s for s in SEEDS if s != 0)


@pytest.mark.parametrize("seed", SEEDS)
def test_greedy_exchange_against_brute_force(seed):
    problem, cand, rows = grid_problem(seed)
    assert 40 <= cand.n_candidates <= 60
    obj = GridObjective(problem, rows, prior=True)
    chosen = greedy(obj, 3, cand.positions_m, 0.0, problem.installed_m)
    swapped = exchange(obj, chosen, cand.positions_m, 0.0, problem.installed_m)
    assert len(set(swapped.tolist())) == 3

    exact = GridObjective(problem, rows, prior=False)
    _, vals = all_subset_values(exact, 3, problem)
    best = vals.max()
    value_greedy = problem.layout_values(cand.positions_m[chosen][None])[0]
    value = problem.layout_values(cand.positions_m[swapped][None])[0]
    assert value >= value_greedy - 1e-9  # exchange never loses what greedy found
    assert value <= best + 1e-9
    # Always close: D-efficiency against the true grid optimum (per-parameter information).
    assert d_ratio(value, best, problem.n_params) >= 0.97
    if seed in FINDS_OPTIMUM:
        assert value == pytest.approx(best, abs=1e-9)


@pytest.mark.parametrize("seed", [0, 2])
@pytest.mark.parametrize("prior_weight", [None, 1.0])
def test_greedy_reaches_the_submodular_guarantee(seed, prior_weight):
    # Nemhauser, Wolsey & Fisher (1978), Math. Programming 14: for a monotone submodular f
    # and a cardinality constraint k, the greedy set S_g satisfies
    #   f(S_g) − f(∅) ≥ (1 − 1/e) (f(S*) − f(∅)),
    # with S* the best set of size k. Here f(S) = mean_s log det(P_s + Σ_{c∈S} A_sc), P_s ≻ 0 a
    # prior: log det of a PSD sum is monotone and submodular (Shamaiah, Banerjee & Vikalo 2010),
    # and a mean of submodular functions is submodular. No spacing rule (a uniform matroid).
    # The search's own tiny prior (None) makes f(∅) very negative and the check easy; a prior
    # the size of one probe's information (1.0) makes it a real test of the greedy steps.
    problem, cand, rows = grid_problem(seed)
    obj = GridObjective(problem, rows, prior=True)
    if prior_weight is not None:
        diag = np.diagonal(obj.info, axis1=-2, axis2=-1).mean(axis=1)  # (S, p)
        obj.base = problem.fisher_installed + prior_weight * diag[:, :, None] * np.eye(
            problem.n_params
        )
    chosen = greedy(obj, 3, cand.positions_m, 0.0, problem.installed_m)
    _, vals = all_subset_values(obj, 3)
    f_empty = obj.value(np.zeros(0, dtype=int))
    f_greedy = obj.value(chosen)
    f_opt = vals.max()
    assert f_greedy <= f_opt + 1e-9
    assert f_greedy - f_empty >= (1.0 - 1.0 / math.e) * (f_opt - f_empty)


# --------------------------------------------------------------------------------------------
# The relaxation bound
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("seed", [0, 2])
def test_relaxation_bound_is_above_every_subset(seed):
    # Joshi & Boyd (2009): relaxing the 0/1 selection to w ∈ [0, 1], Σ w = k gives a concave
    # problem whose optimum bounds every subset's mean log det from above; the Frank–Wolfe gap
    # certifies the bound however early the solver stops.
    problem, cand, rows = grid_problem(seed)
    exact = GridObjective(problem, rows, prior=False)
    relax = relaxation_bound(exact.rows, problem.fisher_installed, 3)
    _, vals = all_subset_values(exact, 3, problem)
    assert relax.bound >= vals.max()
    assert relax.bound == pytest.approx(relax.value + relax.gap)
    assert np.all((relax.weights >= -1e-12) & (relax.weights <= 1 + 1e-12))
    assert relax.weights.sum() == pytest.approx(3.0)
    # And not absurdly loose on this small grid (D-efficiency of the best subset).
    assert d_ratio(vals.max(), relax.bound, problem.n_params) >= 0.9


@functools.cache
def big_problem():
    """A 16 × 16 lattice (256 candidates), 6 probes, 5 parameters, and its relaxation bound."""
    problem, cand, rows = grid_problem(5, spacing_m=800.0, count=6, background=FAIR_WEATHER)
    obj = GridObjective(problem, rows, prior=False)
    return problem, cand, rows, relaxation_bound(obj.rows, problem.fisher_installed, 6)


@settings(max_examples=30, deadline=None)
@given(st.data())
def test_relaxation_bound_is_above_random_subsets(data):
    problem, cand, _, relax = big_problem()
    n_c = cand.n_candidates
    assert n_c > 200
    chosen = np.array(
        data.draw(st.lists(st.integers(0, n_c - 1), min_size=6, max_size=6, unique=True))
    )
    value = problem.layout_values(cand.positions_m[chosen][None])[0]
    assert value <= relax.bound


def test_relaxation_bound_is_above_the_search_result():
    problem, cand, rows, relax = big_problem()
    obj = GridObjective(problem, rows, prior=True)
    chosen = greedy(obj, 6, cand.positions_m, 0.0, problem.installed_m)
    chosen = exchange(obj, chosen, cand.positions_m, 0.0, problem.installed_m)
    value = problem.layout_values(cand.positions_m[chosen][None])[0]
    assert value <= relax.bound
    # Design target (design notes): the grid search lands within a few % of the bound.
    assert d_ratio(value, relax.bound, problem.n_params) >= 0.95


def test_relaxation_bound_is_tight_when_every_candidate_is_taken():
    # With count = n_candidates the only feasible set is all of them (w = 1): the relaxation
    # has a single point, so its bound must equal that layout's value (within the solver's
    # certified gap, n_params × 2e-3 by default).
    problem, cand, rows = grid_problem(1, spacing_m=4000.0)
    n_c = cand.n_candidates
    assert n_c == 16
    exact = GridObjective(problem, rows, prior=False)
    relax = relaxation_bound(exact.rows, problem.fisher_installed, n_c)
    everything = problem.layout_values(cand.positions_m[None])[0]
    assert relax.bound >= everything - 1e-9
    assert relax.bound - everything <= problem.n_params * 2e-3 + 1e-9
    np.testing.assert_allclose(relax.weights, 1.0, atol=1e-9)


# --------------------------------------------------------------------------------------------
# The whole plan
# --------------------------------------------------------------------------------------------

RULES = dict(
    count=4,
    estimate=ALL,
    probes={"min_spacing_m": 1500.0, "installed": [{"position_m": [-2000.0, -1500.0, 0.0]}]},
    extra_regions=(
        {
            "kind": "segment",
            "start_m": [-5000.0, 6500.0, 10.0],
            "end_m": [5000.0, 6500.0, 10.0],
            "gain": 1.8,
        },
    ),
    keepout=[
        {"kind": "rectangle", "min_m": [-1000.0, -1000.0], "max_m": [1500.0, 1000.0]},
        {
            "kind": "polygon",
            "vertices_m": [[2000.0, -6000.0], [6000.0, -6000.0], [6000.0, -2000.0]],
        },
    ],
    background=FAIR_WEATHER,
)


# Regressions of the search on a small invented site (each test names the failure).


def test_plan_survives_a_parameter_no_candidate_can_see():
    # Outside a uniform ball the field does not depend on its radius (shell theorem), so no
    # layout of outside probes resolves it: the relaxation used to crash on its singular start.
    ball = {
        "kind": "sphere",
        "charge_c": -20.0,
        "center_m": [0.0, 0.0, 4000.0],
        "radius_m": 500.0,
        "estimate": ["charge", "z", "radius"],
    }
    outcome = plan(build_problem(small_site(source=ball)), random_layouts=0)
    assert outcome.info.bound == -np.inf
    assert outcome.score.value == -np.inf
    assert any("radius" in d.text for d in outcome.score.unresolved)


def test_a_warm_start_that_breaks_spacing_is_thinned_first():
    cfg = small_site(count=4, spacing=1500.0)
    problem = build_problem(cfg)
    warm = np.array([[0, 0, 0], [500, 0, 0], [1000, 0, 0], [-2500, 2500, 0]], dtype=float)
    outcome = plan(problem, warm_start_m=warm, random_layouts=0)
    for b in outcome.info.baselines:
        assert problem.site.spacing_ok(b.positions_m[None])[0], b.name
    assert problem.site.spacing_ok(outcome.positions_m[None])[0]


def test_the_automatic_grid_is_not_finer_than_the_field_changes():
    # An 18 m rail 3-7 m from a charge: the count target alone gave 1.2 cm spacing.
    from probeplan.search.grid import GRID_FRACTION_OF_DISTANCE, _candidates

    rail = {"kind": "segment", "start_m": [-9.0, 5.0, 2.5], "end_m": [9.0, 5.0, 2.5]}
    site = dict(
        seed=1,
        title=None,
        probes={"count": 3, "component": "vector", "noise_v_per_m": 50.0},
        region=[rail],
        source=[point_source(2e-6, (0.0, 0.0, 3.0))],
        design={"scenarios": 2, "evaluations": None},
    )
    problem = build_problem(make_config("rail.toml", **site))
    cand = _candidates(problem, None, 1500)
    dist = np.linalg.norm(cand.positions_m - [0.0, 0.0, 3.0], axis=1)
    # A segment is split into equal steps, so the spacing may come out a little under the
    # floor asked for (here 18 m / 134 steps against 0.136 m).
    assert cand.spacing_m >= 0.95 * GRID_FRACTION_OF_DISTANCE * np.median(dist)
    assert cand.positions_m.shape[0] < 1500
    # A spacing the config sets is kept as it is.
    assert _candidates(problem, 0.05, 1500).spacing_m == 0.05


def assert_follows_the_rules(problem, layout):
    site = problem.site
    assert layout.shape == (problem.count, 3)
    assert site.allowed(layout).all(), site.violations(layout)
    assert site.spacing_ok(layout[None])[0], site.violations(layout)
    assert site.violations(layout) == []


@pytest.mark.parametrize(
    ("criterion", "aggregate"),
    [
        ("d", "mean"),
        ("location", "mean"),
        ("charge", "mean"),
        ("d", "worst"),
        ("location", "quantile:0.8"),
        ("charge", "worst"),
    ],
)
def test_plan_keeps_mounting_rules_for_every_criterion(criterion, aggregate):
    cfg = search_config(
        "rules.toml", criterion=criterion, aggregate=aggregate, scenarios=5, **RULES
    )
    problem = build_problem(cfg)
    out = plan(problem, evaluations=0, random_layouts=50, candidate_target=400)
    assert out.complete
    assert_follows_the_rules(problem, out.positions_m)
    for baseline in out.info.baselines:
        assert_follows_the_rules(problem, baseline.positions_m)
    # The bound exists for d with the mean aggregate only (contract: "where computed").
    if (criterion, aggregate) == ("d", "mean"):
        assert out.info.bound is not None and out.score.value <= out.info.bound
    else:
        assert out.info.bound is None
    # The plan's score is the criterion of the returned layout, and no stage made it worse.
    assert np.isfinite(out.score.value)
    again = problem.layout_values(out.positions_m[None], out.gain[None])[0]
    assert out.score.value == pytest.approx(again, rel=1e-9)
    stages = dict(out.info.stages)
    worse = (lambda a, b: a < b - 1e-9) if criterion == "d" else (lambda a, b: a > b + 1e-9)
    assert not worse(stages["exchange"], stages["greedy"])
    assert not worse(out.score.value, stages["exchange"])
    # Gains follow the mounting region (a meter on the 10 m rail reads 1.8 × the field).
    on_rail = np.isclose(out.positions_m[:, 1], 6500.0)
    np.testing.assert_allclose(out.gain, np.where(on_rail, 1.8, 1.0))


def test_one_charge_over_a_disc_gives_a_symmetric_layout():
    # One charge straight above the centre of a disc-shaped region: the problem is invariant
    # under rotations about the vertical axis, and a D-optimal layout for charge and position
    # spreads the meters evenly around the centre (a ring, possibly with one under the charge).
    radius = 5000.0
    ang = np.arange(32) * 2 * np.pi / 32
    # Rounded to the millimetre, as a surveyor would give them.
    mm = [float(f"{v:.3f}") for v in radius * np.concatenate([np.cos(ang), np.sin(ang)])]
    vertices = [list(xy) for xy in zip(mm[:32], mm[32:], strict=True)]
    disc = make_config(
        "disc.toml",
        seed=2,
        title=None,
        region=[{"kind": "polygon", "vertices_m": vertices, "z_m": 0.0}],
        probes={"count": 6},
        source=[point_source(center_m=(0.0, 0.0, 6000.0))],
        design={"scenarios": 1, "evaluations": 0, "random_layouts": 50},
    )
    problem = build_problem(disc)
    out = plan(problem, candidate_target=600)
    pos = out.positions_m
    assert_follows_the_rules(problem, pos)
    assert np.linalg.norm(pos[:, :2].mean(axis=0)) < 0.1 * radius
    r = np.hypot(pos[:, 0], pos[:, 1])
    ring = np.sort(np.arctan2(pos[r > 0.25 * radius, 1], pos[r > 0.25 * radius, 0]))
    assert ring.size >= 4
    assert np.std(r[r > 0.25 * radius]) < 0.1 * np.mean(r[r > 0.25 * radius])
    gaps = np.diff(np.concatenate([ring, [ring[0] + 2 * np.pi]]))
    assert gaps.max() < 1.5 * 2 * np.pi / ring.size  # evenly around, no empty sector
    assert d_ratio(out.score.value, out.info.bound, problem.n_params) >= 0.95


def test_same_seed_same_layout_to_the_bit():
    cfg = search_config("again.toml", scenarios=4, evaluations=4, **RULES)
    first = plan(build_problem(cfg), candidate_target=300)
    second = plan(build_problem(cfg), candidate_target=300)
    assert first.positions_m.tobytes() == second.positions_m.tobytes()
    assert first.info.history.tobytes() == second.info.history.tobytes()
    assert first.score.value == second.score.value
    assert [b.positions_m.tobytes() for b in first.info.baselines] == [
        b.positions_m.tobytes() for b in second.info.baselines
    ]


# --------------------------------------------------------------------------------------------
# Stopping: within one step, wherever the search is
# --------------------------------------------------------------------------------------------

STAGES = ("candidate grid", "greedy", "exchange", "bound", "refine", "baselines")


class CountingStop:
    """A stop request that turns true at poll ``k`` (never when None); it notes the stage the
    search reported last at every poll, and counts the heavy work done after the stop."""

    def __init__(self, k: int | None) -> None:
        self.k = k
        self.stage = None
        self.stages: list[str] = []  # the stage at each poll
        self.stopped = False
        self.work = {"sweeps": 0, "relaxed": 0, "rows": 0}  # after the stop only

    def __call__(self) -> bool:
        self.stages.append(self.stage)
        self.stopped = self.k is not None and len(self.stages) > self.k
        return self.stopped

    def progress(self, stage: str, done: int, total: int) -> None:
        self.stage = stage

    def count(self, kind: str, fn):
        def counted(*args, **kwargs):
            self.work[kind] += self.stopped
            return fn(*args, **kwargs)

        return counted


def _stop_at(problem, k: int | None, monkeypatch) -> tuple[object, CountingStop]:
    import probeplan.search.bound as bound
    import probeplan.search.grid as grid

    stop = CountingStop(k)
    with monkeypatch.context() as m:
        m.setattr(
            grid.GridObjective,
            "best_addition",
            stop.count("sweeps", grid.GridObjective.best_addition),
        )
        m.setattr(bound, "_relaxed", stop.count("relaxed", bound._relaxed))
        m.setattr(Problem, "rows", stop.count("rows", Problem.rows))
        out = plan(problem, stop=stop, progress=stop.progress, candidate_target=300)
    return out, stop


def test_a_stop_at_any_poll_ends_the_search_within_one_step(monkeypatch):
    import probeplan.search.stages as stages

    cfg = search_config("stop.toml", scenarios=4, evaluations=8, **RULES)
    problem = build_problem(cfg)
    # Several candidate-row chunks and random-baseline batches on this small site.
    per_point = problem.n_scenarios * 3 * problem.scene.n_params * 8
    monkeypatch.setattr(stages, "ROW_CHUNK_BYTES", 80 * per_point)
    monkeypatch.setattr(stages, "RANDOM_BATCH", 16)

    full, never = _stop_at(problem, None, monkeypatch)
    # Polling changes nothing: the same plan as without a stop request, to the bit.
    plain = plan(problem, candidate_target=300)
    assert full.complete and full.positions_m.tobytes() == plain.positions_m.tobytes()
    assert full.info.history.tobytes() == plain.info.history.tobytes()
    assert full.info.bound == plain.info.bound
    # Every stage polls, and the long ones poll inside their loops.
    polls = {s: [i for i, at in enumerate(never.stages) if at == s] for s in STAGES}
    for stage in STAGES:
        assert len(polls[stage]) >= 2, (stage, never.stages)

    # The work a stopped search may still do: the exact value of the layout it has, and
    # the score of the result (rows of the forward model; no sweep, no relaxation step).
    closing = CountingStop(None)
    closing.stopped = True
    with monkeypatch.context() as m:
        m.setattr(Problem, "rows", closing.count("rows", Problem.rows))
        problem.score(full.positions_m, full.gain)
        stages.exact(problem, full.positions_m, full.gain)
    # The first, middle and last poll of every stage.
    ks = sorted(
        {i for s in STAGES for i in (polls[s][0], polls[s][len(polls[s]) // 2], polls[s][-1])}
    )
    no_layout = 0
    for k in ks:
        out, stop = _stop_at(problem, k, monkeypatch)
        stage = never.stages[k]
        assert len(stop.stages) == k + 1, stage  # polled up to the stop, never again after it
        assert not out.complete
        assert stop.work["sweeps"] == 0 and stop.work["relaxed"] == 0, (stage, stop.work)
        if out.has_layout:
            assert stage != "candidate grid"
            assert_follows_the_rules(problem, out.positions_m)
            assert np.isfinite(out.score.value)
            assert out.info.history.size >= 1
        else:
            no_layout += 1
            assert stage in ("candidate grid", "greedy"), stage
            assert out.positions_m is None and out.gain is None and out.score is None
        assert stop.work["rows"] <= closing.work["rows"], (stage, stop.work)
    assert 0 < no_layout < len(ks)


@pytest.mark.parametrize("seed, spacing_m", [(0, 5000.0), (3, 7000.0)])
def test_spacing_aware_bound_is_above_every_allowed_subset(seed, spacing_m):
    # The weights inside any open disc of radius spacing/2 sum to at most 1 in every layout
    # the spacing rule allows (two points in such a disc are closer than the spacing), so the
    # Lagrangian relaxation of those constraints still bounds every allowed subset; checked
    # by brute force over all allowed 3-subsets of a 7 × 7 lattice.
    problem, cand, rows = grid_problem(seed)
    exact = GridObjective(problem, rows, prior=False)
    plain = relaxation_bound(exact.rows, problem.fisher_installed, 3)
    rule = relaxation_bound(
        exact.rows,
        problem.fisher_installed,
        3,
        positions_m=cand.positions_m,
        min_spacing_m=spacing_m,
        installed_m=problem.installed_m,
    )
    combos, vals = all_subset_values(exact, 3, problem)
    pos = cand.positions_m[combos]  # (n, 3, 3)
    d = np.linalg.norm(pos[:, :, None] - pos[:, None, :], axis=-1)
    allowed = np.all((d >= spacing_m) | np.eye(3, dtype=bool), axis=(1, 2))
    assert allowed.any() and not allowed.all()
    assert rule.bound >= vals[allowed].max()
    assert rule.bound <= plain.bound
    if seed == 3:  # here the plain relaxation puts weight on probes 6 km apart (measured)
        assert rule.bound < plain.bound - 0.01


def test_bound_progress_runs_from_its_first_gap_to_the_tolerance():
    from probeplan.search.stages import _converged_percent

    # A geometric shrinking of the gap reads as even progress (log scale).
    assert _converged_percent(1.0, 1.0, 1e-4) == 0
    assert _converged_percent(1.0, 1e-2, 1e-4) == 50
    assert _converged_percent(1.0, 1e-5, 1e-4) == 100
    assert _converged_percent(1e-5, 1e-5, 1e-4) == 100  # converged from the start


def test_a_stored_start_that_blocks_the_spacing_falls_back_to_a_fresh_greedy():
    # A 4 km fence, meters 1.8 km apart: three fit (both ends and the middle), but a stored
    # pair at ±1 km leaves no room for a third (every other point is within 1.8 km of one).
    fence = {"kind": "segment", "start_m": [-2000.0, 0.0, 0.0], "end_m": [2000.0, 0.0, 0.0]}
    problem = build_problem(
        make_config(
            region=[fence],
            probes={"count": 3, "min_spacing_m": 1800.0},
            design={"random_layouts": 10, "grid_spacing_m": 100.0, "restarts": 0},
        )
    )
    stored = np.array([[-1000.0, 0.0, 0.0], [1000.0, 0.0, 0.0]])
    out = plan(problem, warm_start_m=stored)
    assert out.positions_m.shape == (3, 3)
    assert problem.site.spacing_ok(out.positions_m[None])[0]
