"""Large scenario sets split over a dask cluster: the scenario-separable work, block by block.

A scenario's reading gradients (:meth:`Problem.rows`) and its criterion value depend on its own
θ_s alone, and every kernel on the way (forward model, whitening, J = Σ r rᵀ, log det or the
inverse) works scenario by scenario. So the scenarios are cut into contiguous blocks, each block
is computed on a worker as a problem of its own scenarios (:func:`scenario_block`), and the
blocks are joined in scenario order: the arrays are the same, to the bit, as one call on this
machine (``tests/test_shard.py`` checks it on a real cluster). Aggregation over scenarios (mean,
worst, quantile) stays here, on the joined values, so its order of sums is the local one.

What goes out: the candidate grid's rows (:func:`row_steps`, the search's first stage), any
other :meth:`Problem.rows` call and any batch of :meth:`Problem.layout_values` whose
``n_scenarios × n_points`` reaches :data:`SHARD_MIN_SCENARIO_POINTS`. Smaller calls stay here:
on the 2-core development machine one scenario-point of rows costs about 0.3–0.5 µs and brings
back 8 bytes per parameter per axis, so a call below the threshold (under a second of work)
costs more to send, wait for and bring back than it saves. The greedy, exchange, bound and
refinement stages need every scenario at every step and stay on this machine.

With conducting structures, the responses of the structures to every scenario are solved here
first, all at once as a local run solves them (:meth:`Scene.prime`), and travel with the problem:
a multithreaded BLAS splits a solve by its columns, so a block solved alone may round otherwise.

The problem is sent once (``scatter``, to every worker, so a worker lost mid-run loses no
input) and each call's positions once; a task is one block's arguments: a worker lost mid-run
costs only its tasks, which the scheduler runs again on another worker from the same inputs.
This module does not import dask: it drives the ``distributed.Client`` it is given.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from dataclasses import replace

import numpy as np

from .fisher import aggregate
from .problem import Problem

#: Work (scenarios × points) from which a rows or values call is split over the cluster.
SHARD_MIN_SCENARIO_POINTS = 2_000_000

#: Scenario blocks per worker thread: a lost worker costs a smaller share of the work, and a
#: slow worker holds up the join by less.
BLOCKS_PER_THREAD = 2

#: Jacobian bytes a worker holds at once while it computes a block's rows (points in chunks).
WORKER_CHUNK_BYTES = 1 << 23

#: How often a wait for the workers yields (the caller polls its stop request then), s.
POLL_S = 0.1


def scenario_block(problem: Problem, start: int, stop: int) -> Problem:
    """The same problem restricted to scenarios ``start:stop`` (θ and the installed
    meters' information), with nothing of the cluster (a worker's own copy)."""
    return replace(
        problem,
        theta=problem.theta[start:stop],
        fisher_installed=problem.fisher_installed[start:stop],
        shards=None,
    )


def local_row_steps(
    problem: Problem,
    positions_m: np.ndarray,
    gain: np.ndarray | None,
    axes: np.ndarray | None,
    noise,
    chunk_bytes: int,
) -> Iterator[tuple[int, tuple | None]]:
    """:meth:`Problem.rows` of many points on this process, in chunks of points.

    Yields ``(points done, None)`` after each chunk, then ``(n_points, (rows, saturated))``
    with the arrays of :meth:`Problem.rows`. Chunks keep the forward model's Jacobian near
    ``chunk_bytes``; a caller that stops consuming stops the work between two chunks.
    """
    n = positions_m.shape[0]
    per_point = problem.n_scenarios * 3 * max(problem.scene.n_params, 1) * 8
    chunk = max(1, chunk_bytes // per_point)
    rows = sat = None
    for start in range(0, max(n, 1), chunk):
        sl = slice(start, min(start + chunk, n))
        part, part_sat = problem.rows(
            positions_m[sl],
            None if gain is None else gain[sl],
            None if axes is None else axes[sl],
            noise,
        )
        if rows is None:
            rows = np.empty((part.shape[0], n, *part.shape[2:]))
            sat = np.empty((part.shape[0], n, *part_sat.shape[2:]), dtype=bool)
        rows[:, sl], sat[:, sl] = part, part_sat
        if sl.stop < n:
            yield sl.stop, None
    yield n, (rows, sat)


def row_steps(
    problem: Problem, positions_m: np.ndarray, gain: np.ndarray, chunk_bytes: int
) -> Iterator[tuple[int, np.ndarray | None]]:
    """The rows of many candidate points, with progress: on the cluster when it is large.

    Parameters
    ----------
    problem : Problem
    positions_m : (n_points, 3) float
    gain : (n_points,) float
    chunk_bytes : int
        Forward-model Jacobian per chunk of points, here or on a worker.

    Yields
    ------
    (done, rows)
        ``done`` of ``n_points`` so far and None; last ``(n_points, rows)``, rows
        ``(n_scenarios, n_points, n_axes, n_params)`` float. Closing the generator early (a
        stop request) cancels the cluster's tasks.
    """
    shards = problem.shards
    if shards is not None and shards.wants(problem.n_scenarios, positions_m.shape[0]):
        steps = shards.row_steps(problem, positions_m, gain, None, None, chunk_bytes)
    else:
        steps = local_row_steps(problem, positions_m, gain, None, None, chunk_bytes)
    for done, out in steps:
        yield done, None if out is None else out[0]


def _block_rows(problem: Problem, bounds: tuple[int, int], inputs: tuple, chunk_bytes: int):
    """Task: the rows and saturation flags of one scenario block (see :func:`row_steps`)."""
    steps = local_row_steps(scenario_block(problem, *bounds), *inputs, chunk_bytes)
    return _last(steps)[1]


def _block_values(problem: Problem, bounds: tuple[int, int], inputs: tuple) -> np.ndarray:
    """Task: ``(n_layouts, block size)`` criterion values of layouts in one scenario block."""
    sub = scenario_block(problem, *bounds)
    layouts_m, gains = inputs
    per = np.empty((layouts_m.shape[0], sub.n_scenarios))
    for sl, info in sub._fisher_chunks(layouts_m, gains):
        per[sl] = sub.criterion.per_scenario(info, sub.theta_est)
    return per


def _last(steps: Iterator):
    for item in steps:  # noqa: B007 - the last item is the result
        pass
    return item


class ScenarioShards:
    """Where a problem's large scenario-separable calls run: blocks on a dask cluster.

    Attach it with :func:`on_client`; :meth:`Problem.rows` and :meth:`Problem.layout_values`
    hand it the calls it :meth:`wants`.

    Parameters
    ----------
    client : distributed.Client
        Connected (see :func:`probeplan.cluster.connect`).
    min_scenario_points : int or None
        Calls with fewer ``n_scenarios × n_points`` stay on this machine (default:
        :data:`SHARD_MIN_SCENARIO_POINTS`).
    blocks : int or None
        Scenario blocks per call (default: :data:`BLOCKS_PER_THREAD` per worker thread).
    """

    def __init__(
        self,
        client,
        min_scenario_points: int | None = None,
        blocks: int | None = None,
    ) -> None:
        self.client = client
        if min_scenario_points is None:
            min_scenario_points = SHARD_MIN_SCENARIO_POINTS
        self.min_scenario_points = int(min_scenario_points)
        self._blocks = blocks
        self._held: Problem | None = None  # the problem on the workers, and its future
        self._remote = None
        self.tasks_sent = 0

    def __getstate__(self):
        # A problem goes to the workers without its cluster (``scenario_block``); a pickled
        # connection would be a bug.
        raise TypeError("ScenarioShards holds a live cluster connection and is not sent")

    def wants(self, n_scenarios: int, n_points: int) -> bool:
        """Whether a call over ``n_scenarios × n_points`` is large enough to send out."""
        return n_scenarios * n_points >= self.min_scenario_points

    def blocks(self, n_scenarios: int) -> list[tuple[int, int]]:
        """Contiguous ``(start, stop)`` scenario blocks, in order, covering every scenario."""
        k = self._blocks
        if k is None:
            k = BLOCKS_PER_THREAD * max(1, sum(self.client.nthreads().values()))
        edges = np.linspace(0, n_scenarios, min(k, n_scenarios) + 1).round().astype(int)
        return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True)]

    def _submit(self, problem: Problem, task, inputs: tuple, *extra) -> list:
        if self._held is not problem:
            problem.scene.prime(problem.theta, problem.est_cols)
            plain = replace(problem, shards=None)
            self._remote = self.client.scatter(plain, broadcast=True, hash=False)
            self._held = problem
        [shared] = self.client.scatter([inputs], broadcast=True, hash=False)
        bounds = self.blocks(problem.n_scenarios)
        self.tasks_sent += len(bounds)
        return [
            self.client.submit(task, self._remote, b, shared, *extra, pure=False) for b in bounds
        ]

    def _gathered(self, futures: list, n_points: int) -> Iterator[tuple[int, list | None]]:
        """Yield ``(n_points × share of blocks done, None)`` while waiting, then
        ``(n_points, results in block order)``; closing early cancels what is left."""
        try:
            while True:
                n_done = sum(f.done() for f in futures)
                if n_done == len(futures):
                    break
                yield n_points * n_done // len(futures), None
                time.sleep(POLL_S)
            parts = self.client.gather(futures)
        finally:
            for f in futures:
                f.cancel()
        yield n_points, parts

    def row_steps(
        self, problem: Problem, positions_m, gain, axes, noise, chunk_bytes: int
    ) -> Iterator[tuple[int, tuple | None]]:
        """:func:`local_row_steps` with the scenario blocks on the workers: progress by
        blocks done, then the rows and saturation flags joined in scenario order."""
        inputs = (positions_m, gain, axes, noise)
        futures = self._submit(problem, _block_rows, inputs, chunk_bytes)
        for done, parts in self._gathered(futures, positions_m.shape[0]):
            if parts is None:
                yield done, None
            else:
                yield done, tuple(np.concatenate(p, axis=0) for p in zip(*parts, strict=True))

    def rows(self, problem: Problem, positions_m, gain, axes, noise) -> tuple:
        """:meth:`Problem.rows` with the scenario blocks on the workers (same arrays)."""
        return _last(self.row_steps(problem, positions_m, gain, axes, noise, WORKER_CHUNK_BYTES))[1]

    def layout_values(self, problem: Problem, layouts_m: np.ndarray, gains) -> np.ndarray:
        """:meth:`Problem.layout_values` with the per-scenario values computed on the workers
        and aggregated here: ``(n_layouts, n_probes, 3)`` → ``(n_layouts,)`` float."""
        futures = self._submit(problem, _block_values, (layouts_m, gains))
        parts = _last(self._gathered(futures, 0))[1]
        per = np.concatenate(parts, axis=-1)
        return aggregate(per, problem.aggregate, problem.criterion.maximise)


def on_client(problem: Problem, client, **options) -> Problem:
    """The problem with its large scenario-separable calls sent to the cluster of ``client``
    (``options``: those of :class:`ScenarioShards`)."""
    return replace(problem, shards=ScenarioShards(client, **options))
