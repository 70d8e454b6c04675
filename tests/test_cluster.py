"""Budgets on a real dask.distributed cluster on this machine: the same result to the bit as a
local run, a stop request that reaches the workers, a lost worker costing only its task, and the
scheduler settings (option, environment variable, config key) with their messages."""

from __future__ import annotations

import sys

import h5py
import numpy as np
import pytest
from clusters import run_killing_a_worker
from sites import box, make_config, meter_grade, point_source, rectangle, write_site

from probeplan.budget import run_budget
from probeplan.cli import main
from probeplan.cluster import SCHEDULER_VARIABLE, connect, scheduler_address

distributed = pytest.importorskip("distributed")

# An invented site, small enough for a shared 2-core machine: two grades, two counts.
SITE = dict(
    title="cluster test site (invented)",
    probes={"min_spacing_m": 200.0},
    region=[rectangle(3000.0)],
    source=[point_source(center_m=(0.0, 0.0, 6000.0), center_range_m=box(1000.0, 5000.0, 7000.0))],
    design={"scenarios": 4},
    grade=[meter_grade("basic", 40.0, 1000.0), meter_grade("fine", 10.0, 3000.0)],
    budget={"counts": [4, 5], "target": -20.0},
)
BUDGET_DATASETS = ("count", "grade", "cost", "value", "meets_target")


@pytest.fixture(scope="module")
def local_table():
    return run_budget(make_config("cluster-test.toml", SITE))


def _same_table(a, b) -> None:
    for name in ("count", "cost", "value", "meets_target"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    assert list(a.grade) == list(b.grade)
    assert a.cheapest == b.cheapest
    for la, lb in zip(a.layouts, b.layouts, strict=True):
        assert np.array_equal(la, lb)


def test_budget_command_on_a_cluster_writes_what_a_local_run_writes(tmp_path, threads_cluster):
    site = write_site(tmp_path / "site.toml", SITE)
    assert main(["budget", str(site), "--quiet", "--out", str(tmp_path / "here.h5")]) == 0
    address = threads_cluster.scheduler_address
    args = ["budget", str(site), "--quiet", "--out", str(tmp_path / "there.h5")]
    assert main([*args, "--scheduler", address]) == 0
    with h5py.File(tmp_path / "here.h5") as here, h5py.File(tmp_path / "there.h5") as there:
        for name in BUDGET_DATASETS:
            assert np.array_equal(here["budget"][name][()], there["budget"][name][()]), name
        for row in here["budget/layouts"]:
            key = f"budget/layouts/{row}/positions_m"
            assert np.array_equal(here[key][()], there[key][()])
        for key in ("layout/positions_m", "score/fisher", "score/value"):
            assert np.array_equal(here[key][()], there[key][()]), key


def test_a_stop_request_reaches_the_workers(threads_cluster, local_table):
    config = make_config("cluster-test.toml", SITE)
    with connect(threads_cluster.scheduler_address, "test") as cluster:
        event = cluster.stop_event()
        table, complete = run_budget(
            config, executor=cluster.executor, event=event, stop=lambda: True
        )
    assert event.is_set()
    assert not complete
    # Whatever was finished before the chains saw the request is what a local run finds.
    for k in range(table.count.size):
        row = np.nonzero(
            (local_table[0].count == table.count[k]) & (local_table[0].grade == table.grade[k])
        )[0][0]
        assert table.value[k] == local_table[0].value[row]


def test_a_worker_lost_mid_run_costs_only_its_task(local_table):
    config = make_config("cluster-test.toml", SITE)
    with (
        distributed.LocalCluster(
            processes=True, n_workers=2, threads_per_worker=1, dashboard_address=":0"
        ) as lc,
        connect(lc.scheduler_address, "test") as cluster,
    ):
        run = run_killing_a_worker(
            cluster.client, lambda: run_budget(config, executor=cluster.executor), "chain"
        )
    table, complete = run
    assert complete
    _same_table(table, local_table[0])


def test_the_option_comes_before_the_variable_before_the_config(monkeypatch):
    config = make_config("c.toml", SITE, design={"scheduler": "tcp://from-config:8786"})
    monkeypatch.delenv(SCHEDULER_VARIABLE, raising=False)
    assert scheduler_address(None, make_config("c.toml", SITE)) is None
    assert scheduler_address(None, config)[0] == "tcp://from-config:8786"
    monkeypatch.setenv(SCHEDULER_VARIABLE, "tcp://from-env:8786")
    assert scheduler_address(None, config)[0] == "tcp://from-env:8786"
    assert scheduler_address("tcp://from-option:1", config)[0] == "tcp://from-option:1"


def test_an_unreachable_scheduler_is_exit_2_naming_it(tmp_path, capsys, monkeypatch):
    monkeypatch.delenv(SCHEDULER_VARIABLE, raising=False)
    # Port 9 (discard) on this machine: nothing listens there; the config bounds the wait.
    site = write_site(tmp_path / "site.toml", SITE, design={"scheduler_timeout_s": 1.0})
    monkeypatch.setenv(SCHEDULER_VARIABLE, "tcp://127.0.0.1:9")
    assert main(["budget", str(site), "--quiet", "--out", str(tmp_path / "x.h5")]) == 2
    err = capsys.readouterr().err
    assert "tcp://127.0.0.1:9" in err and SCHEDULER_VARIABLE in err and "1 s" in err
    assert not (tmp_path / "x.h5").exists()


def test_without_dask_the_option_says_how_to_install_it(tmp_path, capsys, monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # `import distributed` now fails
    site = write_site(tmp_path / "site.toml", SITE)
    args = ["budget", str(site), "--quiet", "--scheduler", "tcp://127.0.0.1:9"]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert 'pip install "probeplan[cluster]"' in err and "--scheduler" in err
