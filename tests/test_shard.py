"""Large scenario sets of `plan` and `score` split over a real dask.distributed cluster on this
machine (``probeplan.shard``): the same arrays and files to the bit as a local run, a stop that
cancels the blocks, a worker lost mid-run costing only its blocks, nothing sent below the
threshold, and `--scheduler` on both commands with its messages. No mocks: every cluster here
is a ``distributed.LocalCluster``; tests lower the threshold so that a small site goes out."""

from __future__ import annotations

import sys
import time

import h5py
import numpy as np
import pytest
from clusters import process_client, run_killing_a_worker
from sites import box, make_config, point_source, rectangle, write_site

from probeplan import shard
from probeplan.cli import main
from probeplan.problem import build_problem
from probeplan.search import plan

distributed = pytest.importorskip("distributed")

# An invented site: two charges drawn from boxes, the background's z estimated, 3-axis and
# vertical meters alike; small enough for a shared 2-core machine.
SITE = dict(
    title="shard test site (invented)",
    probes={"count": 6, "min_spacing_m": 300.0},
    region=[rectangle(3000.0)],
    source=[
        point_source(center_m=(0.0, 0.0, 6000.0), center_range_m=box(1000.0, 5000.0, 7000.0)),
        point_source(
            charge_c=15.0,
            center_m=(1500.0, 0.0, 8000.0),
            estimate=("charge",),
            charge_range_c=[10.0, 20.0],
        ),
    ],
    background={"field_v_per_m": [0.0, 0.0, -100.0], "estimate": True},
    design={"scenarios": 12, "evaluations": 4, "random_layouts": 8},
)
LAYOUT_CSV = (
    "x_m,y_m,z_m\n-1500,-1500,0\n1500,-1500,0\n0,1500,0\n200,0,0\n-2500,900,0\n2400,2400,0\n"
)


@pytest.fixture()
def client(threads_cluster):
    with distributed.Client(threads_cluster, set_as_default=False) as c:
        yield c


def _sent(cluster, task) -> bool:
    """Whether the scheduler has run a task of this function (dask names a task's prefix
    after its function, leading underscores dropped)."""
    return task.__name__.strip("_") in cluster.scheduler.task_prefixes


def test_blocks_are_contiguous_and_cover_every_scenario_once(client):
    shards = shard.ScenarioShards(client, blocks=5)
    for n in (1, 4, 5, 12, 13):
        bounds = shards.blocks(n)
        assert bounds[0][0] == 0 and bounds[-1][1] == n
        assert all(a < b for a, b in bounds)
        assert all(b0[1] == b1[0] for b0, b1 in zip(bounds[:-1], bounds[1:], strict=False))
    # Default: two blocks per worker thread (two workers of one thread here).
    assert len(shard.ScenarioShards(client).blocks(12)) == 4


def test_a_plan_with_its_scenarios_on_a_cluster_is_the_local_plan_to_the_bit(client):
    problem = build_problem(make_config("shard.toml", SITE))
    here = plan(problem)
    sharded = shard.on_client(problem, client, min_scenario_points=0)
    there = plan(sharded)
    assert sharded.shards.tasks_sent > 0
    assert there.score.value == here.score.value
    assert there.positions_m.tobytes() == here.positions_m.tobytes()
    assert there.score.fisher.tobytes() == here.score.fisher.tobytes()
    assert np.array_equal(there.info.history, here.info.history)
    assert there.info.bound == here.info.bound


@pytest.mark.parametrize(
    "design", [{"criterion": "location", "aggregate": "worst"}, {"aggregate": "quantile:0.75"}]
)
def test_layout_values_and_a_score_from_blocks_are_the_local_ones(client, design):
    problem = build_problem(make_config("shard.toml", SITE, design=design))
    rng = np.random.default_rng(5)
    layouts = problem.site.random_layouts(6, problem.count, rng)
    sharded = shard.on_client(problem, client, min_scenario_points=0)
    assert sharded.layout_values(layouts).tobytes() == problem.layout_values(layouts).tobytes()
    here, there = problem.score(layouts[0]), sharded.score(layouts[0])
    for name in ("value", "fisher", "crb_std", "per_scenario", "failure_values", "saturated"):
        assert (
            np.asarray(getattr(there, name)).tobytes() == np.asarray(getattr(here, name)).tobytes()
        ), name


def test_below_the_threshold_nothing_is_sent(client):
    problem = build_problem(make_config("shard.toml", SITE))
    sharded = shard.on_client(problem, client)  # the default threshold: far above this site
    assert not sharded.shards.wants(problem.n_scenarios, 10_000)
    outcome = plan(sharded)
    assert sharded.shards.tasks_sent == 0
    assert outcome.positions_m.tobytes() == plan(problem).positions_m.tobytes()


def test_a_stop_during_the_grid_rows_cancels_the_blocks_and_leaves_no_layout(client):
    problem = shard.on_client(
        build_problem(make_config("shard.toml", SITE)), client, min_scenario_points=0, blocks=12
    )
    polls = []
    outcome = plan(problem, stop=lambda: polls.append(1) or len(polls) > 2)
    assert not outcome.has_layout
    assert problem.shards.tasks_sent == 12  # the grid's blocks only: no later stage ran
    for _ in range(200):  # the scheduler forgets cancelled blocks (bounded by a count)
        if not any(client.processing().values()):
            break
        time.sleep(0.05)
    assert not any(client.processing().values())


def test_a_worker_lost_mid_run_costs_only_its_blocks():
    problem = build_problem(make_config("shard.toml", SITE, design={"scenarios": 48}))
    # Enough points that a block takes a while, so the kill finds one running.
    points = problem.site.candidate_grid(target=20_000).positions_m
    want = problem.rows(points)
    with process_client() as client:
        sharded = shard.on_client(problem, client, min_scenario_points=0, blocks=8)
        rows, saturated = run_killing_a_worker(client, lambda: sharded.rows(points), "block")
    assert rows.tobytes() == want[0].tobytes()
    assert np.array_equal(saturated, want[1])


def test_with_a_structure_blocks_solved_on_worker_processes_are_the_local_rows():
    # A grounded tank (invented) beside the mounting area: its response to each scenario is a
    # linear solve, which a multithreaded BLAS rounds differently for a block of scenarios than
    # for all of them (``Scene.prime`` solves all here first); the workers run single-threaded.
    tank = {"kind": "cylinder", "base_m": [0.0, 0.0, 0.0], "radius_m": 200.0, "height_m": 400.0}
    region = {"kind": "rectangle", "min_m": [500.0, 500.0], "max_m": [3000.0, 3000.0], "z_m": 0.0}
    config = make_config(
        "shard.toml",
        SITE,
        structure=[{**tank, "mesh_size_m": 60.0}],
        region=[region],
        design={"scenarios": 40},
    )
    problem = build_problem(config)
    points = problem.site.candidate_grid(target=500).positions_m
    with process_client() as client:
        sharded = shard.on_client(problem, client, min_scenario_points=0, blocks=3)
        there = sharded.rows(points)
        value_there = sharded.score(points[:6]).value
    here = build_problem(config)  # a fresh local run: nothing solved before
    want = here.rows(points)
    assert there[0].tobytes() == want[0].tobytes()
    assert value_there == here.score(points[:6]).value


@pytest.mark.parametrize("command", ["plan", "score"])
def test_plan_and_score_commands_on_a_cluster_write_what_a_local_run_writes(
    tmp_path, monkeypatch, command
):
    monkeypatch.setattr(shard, "SHARD_MIN_SCENARIO_POINTS", 0)  # this small site goes out
    site = write_site(tmp_path / "site.toml", SITE)
    layout = tmp_path / "layout.csv"
    layout.write_text(LAYOUT_CSV)
    args = [command, str(site), "--quiet"]
    if command == "score":
        args += ["--layout", str(layout)]
    with distributed.LocalCluster(
        processes=False, n_workers=2, threads_per_worker=1, dashboard_address=":0"
    ) as cluster:
        for name, extra in (("here", []), ("there", ["--scheduler", cluster.scheduler_address])):
            assert main([*args, "--out", str(tmp_path / f"{name}.h5"), *extra]) == 0
        assert _sent(cluster, shard._block_rows)
    with h5py.File(tmp_path / "here.h5") as here, h5py.File(tmp_path / "there.h5") as there:
        for key in ("score/value", "layout/positions_m", "score/fisher", "score/crb_std"):
            assert here[key][()].tobytes() == there[key][()].tobytes(), key


@pytest.mark.parametrize("command", ["plan", "score"])
def test_without_dask_the_option_says_how_to_install_it(tmp_path, capsys, monkeypatch, command):
    monkeypatch.setitem(sys.modules, "distributed", None)  # `import distributed` now fails
    site = write_site(tmp_path / "site.toml", SITE)
    layout = tmp_path / "layout.csv"
    layout.write_text(LAYOUT_CSV)
    args = [command, str(site), "--quiet", "--scheduler", "tcp://127.0.0.1:9"]
    if command == "score":
        args += ["--layout", str(layout)]
    assert main([*args, "--out", str(tmp_path / "x.h5")]) == 2
    err = capsys.readouterr().err
    assert 'pip install "probeplan[cluster]"' in err and "--scheduler" in err
    assert not (tmp_path / "x.h5").exists()


@pytest.mark.parametrize("command", ["plan", "score"])
def test_an_unreachable_scheduler_from_the_variable_is_exit_2_naming_it(
    tmp_path, capsys, monkeypatch, command
):
    # Port 9 (discard) on this machine: nothing listens there; the config bounds the wait.
    site = write_site(tmp_path / "site.toml", SITE, design={"scheduler_timeout_s": 1.0})
    layout = tmp_path / "layout.csv"
    layout.write_text(LAYOUT_CSV)
    monkeypatch.setenv("PROBEPLAN_SCHEDULER", "tcp://127.0.0.1:9")
    args = [command, str(site), "--quiet", "--out", str(tmp_path / "x.h5")]
    if command == "score":
        args += ["--layout", str(layout)]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "tcp://127.0.0.1:9" in err and "PROBEPLAN_SCHEDULER" in err
    assert not (tmp_path / "x.h5").exists()
