"""The search as one stream of steps: :func:`search_steps` yields every step of every stage.

Stages, in order (the package docstring says what each one does):

    candidate grid → greedy → exchange → [warm start] → bound → [restarts] → refine → baselines

(the restarts run only where the bound is loose: :mod:`probeplan.search.restarts`).

Every element of the stream is a :class:`Step`: where the search is (stage, done, total: what a
progress bar shows) and what that step found (a better layout, evaluated values for the
history, a stage's value, baselines, the bound, the grid). The caller's stop request is polled
between any two steps, also inside the long loops (a candidate-row chunk, a greedy pick, an
exchange try, a relaxation evaluation, a refinement batch, a batch of random layouts); once it
is set the stream ends after at most one cheap closing step (the exact value of a layout the
stage had already found). :func:`probeplan.search.outcome.make_outcome` builds the one
result from the stream, whatever its length.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..fisher import d_ratio
from ..problem import Problem
from ..resulttypes import Baseline
from ..shard import row_steps
from .bound import BOUND_GAP_PER_PARAM, Relaxation, relaxation_steps
from .grid import (
    GridObjective,
    _candidates,
    _feasible_subset,
    _region_of,
    _spacing_mask,
    exchange_steps,
    extension_steps,
    greedy_steps,
)
from .refine import REFINE_RADIUS_CELLS, refine_steps
from .restarts import TIGHT_BOUND_EFFICIENCY, randomised_greedy_steps

#: Bytes of forward-model Jacobian per chunk of candidate rows: the stop request is polled
#: between chunks (and the forward model's own blocks stay in cache either way).
ROW_CHUNK_BYTES = 1 << 23

#: Random baseline layouts scored per batch (the stop request is polled between batches).
RANDOM_BATCH = 64


@dataclass(frozen=True, eq=False)
class Layout:
    """A complete layout of the new probes.

    Attributes
    ----------
    positions_m : (count, 3) float
    gain : (count,) float
    value : float
        What the search optimises (the criterion, or its worst single loss).
    """

    positions_m: np.ndarray
    gain: np.ndarray
    value: float


@dataclass(frozen=True, eq=False)
class Step:
    """One element of the search stream.

    Attributes
    ----------
    stage : str
        "candidate grid", "greedy", "exchange", "warm start", "bound", "restarts", "refine",
        "baselines".
    done, total : int
        Progress within the stage.
    best : Layout or None
        The best layout so far, when this step changed it.
    history : tuple of float
        Criterion of the layouts this step evaluated, in order (``SearchInfo.history``).
    value : float or None
        The stage's final value, on its last step (``SearchInfo.stages``).
    baselines : tuple of Baseline
    bound : Relaxation or None
        The certified bound, on the last step of a finished bound stage.
    grid : Candidates or None
        The candidate grid, once its rows are computed.
    evaluated : int or None
        Objective evaluations this step spent, where they differ from ``len(history)``:
        refinement proposals that break the mounting rules are evaluated but not recorded,
        and baseline layouts are evaluated outside the history.
    runs : tuple of float
        On the last step of the restarts: the final value of every complete exchange search,
        the one from the greedy layout first (``SearchInfo.restart_values``).
    """

    stage: str
    done: int
    total: int
    best: Layout | None = None
    history: tuple[float, ...] = ()
    value: float | None = None
    baselines: tuple[Baseline, ...] = ()
    bound: Relaxation | None = None
    grid: object | None = None
    evaluated: int | None = None
    runs: tuple[float, ...] = ()


class Halt:
    """The caller's stop callable, latched: once it has said stop, the search stays stopped
    (and it is not polled again)."""

    def __init__(self, stop: Callable[[], bool] | None) -> None:
        self._stop = stop
        self.stopped = False

    def __call__(self) -> bool:
        if not self.stopped and self._stop is not None:
            self.stopped = bool(self._stop())
        return self.stopped


@dataclass(frozen=True, eq=False)
class Settings:
    """What :func:`search_steps` is asked to do (see :func:`probeplan.search.plan`)."""

    evaluations: int
    random_layouts: int
    candidate_target: int = 1500
    warm_start_m: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class _Grid:
    """The candidate grid with its rows' objective: what the grid stages work on."""

    problem: Problem
    candidates: object  # site Candidates
    gains: np.ndarray  # (n_candidates,)
    objective: GridObjective

    @property
    def positions_m(self) -> np.ndarray:
        return self.candidates.positions_m

    @property
    def min_spacing_m(self) -> float:
        return self.problem.config.probes.min_spacing_m

    def layout(self, chosen: np.ndarray) -> Layout:
        """The layout of candidates ``chosen (count,) int``, with its exact value."""
        pos, gain = self.positions_m[chosen].copy(), self.gains[chosen].copy()
        return Layout(pos, gain, exact(self.problem, pos, gain))


def exact(problem: Problem, positions_m: np.ndarray, gain: np.ndarray) -> float:
    """What the search optimises, of one layout ``(count, 3)``: no prior, no grid."""
    return float(problem.objective(positions_m[None], gain[None])[0])


def search_steps(
    problem: Problem, settings: Settings, rng: np.random.Generator, halt: Halt
) -> Iterator[Step]:
    """Every step of the search of ``problem.count >= 1`` new probes, in order.

    The stream ends early when ``halt()`` returns True; a stream without a ``best`` layout
    was stopped before the greedy stage finished.
    """
    grid = yield from _grid_stage(problem, settings.candidate_target, halt)
    if grid is None:
        return
    picked = yield from _greedy_stage(grid, _snapped(grid, settings.warm_start_m), halt)
    if picked is None:
        return
    chosen, best = picked
    if not halt():  # else the greedy layout is the result
        best = yield from _exchange_stage(grid, chosen, halt)
    exchanged = best.value
    if settings.warm_start_m is not None:
        best = yield from _warm_stage(grid, settings.warm_start_m, best, halt)
    design = problem.config.design
    if problem.criterion.name == "d" and design.aggregate == "mean" and not halt():
        relax = yield from _bound_stage(grid, best, halt)
        if relax is not None and not halt():
            loose = d_ratio(best.value, relax.bound, problem.n_params) < TIGHT_BOUND_EFFICIENCY
            if loose and design.restarts > 0:
                restarts = (design.restarts, exchanged, rng.spawn(1)[0])
                best = yield from _restart_stage(grid, best, restarts, halt)
    if settings.evaluations > 0 and not halt():
        yield from _refine_stage(grid, best, settings.evaluations, rng, halt)
    if not halt():
        yield from _baseline_stage(problem, settings.random_layouts, rng, halt)


def _grid_stage(problem: Problem, target: int, halt: Halt) -> Iterator[Step]:
    """The candidate grid and every candidate's rows, computed chunk by chunk; returns the
    :class:`_Grid` (None when stopped)."""
    yield Step("candidate grid", 0, 1)
    cand = _candidates(problem, problem.config.design.grid_spacing_m, target)
    gains = problem.new_gain * cand.gain
    n = cand.n_candidates
    # In chunks of candidates here, or in scenario blocks on a cluster (``shard``).
    steps = row_steps(problem, cand.positions_m, gains, ROW_CHUNK_BYTES)
    rows = None
    while rows is None:
        if halt():
            steps.close()
            return None
        done, rows = next(steps)
        yield Step("candidate grid", done, n)
    if halt():
        return None
    robust = bool(problem.config.design.tolerate_failures)
    obj = GridObjective(problem, rows, prior=True, robust=robust)
    yield Step("candidate grid", n, n, grid=cand)
    return _Grid(problem, cand, gains, obj)


def _snapped(grid: _Grid, warm_start_m: np.ndarray | None) -> np.ndarray | None:
    """A stored layout's nearest candidates, in order, once each, and only while they
    respect the spacing: the greedy's start ``(k,) int`` (None without a warm start)."""
    if warm_start_m is None:
        return None
    from scipy.spatial import cKDTree

    p = grid.problem
    _, near = cKDTree(grid.positions_m).query(np.asarray(warm_start_m).reshape(-1, 3))
    start: list[int] = []
    for c in dict.fromkeys(int(i) for i in near):
        fixed = np.concatenate([p.installed_m, grid.positions_m[start]])
        ok = _spacing_mask(grid.positions_m[[c]], fixed, p.config.probes.min_spacing_m)[0]
        if len(start) < p.count and ok:
            start.append(c)
    return np.array(start, dtype=int)


def _greedy_stage(grid: _Grid, start: np.ndarray | None, halt: Halt) -> Iterator[Step]:
    """Greedy picks on the grid; returns the chosen candidates and their layout (None when
    stopped before the last pick).

    A start (a stored layout's candidates) whose probes leave no room for the rest under the
    spacing rule — a budget's smaller plan can, since the restarts may end it anywhere — is
    dropped and the greedy starts afresh; the stored layout still competes as the warm start.
    """
    p = grid.problem
    count = p.count
    args = (grid.objective, count, grid.positions_m, grid.min_spacing_m, p.installed_m)
    chosen = None
    try:
        for chosen in greedy_steps(*args, start):  # noqa: B007 - the last pick is the result
            yield Step("greedy", chosen.size, count)
            if chosen.size < count and halt():
                return None
    except InputError:
        if start is None or start.size == 0:
            raise
        for chosen in greedy_steps(*args):  # noqa: B007 - the last pick is the result
            yield Step("greedy", chosen.size, count)
            if chosen.size < count and halt():
                return None
    found = grid.layout(chosen)
    yield Step(
        "greedy",
        count,
        count,
        best=found,
        history=(found.value,),
        value=found.value,
        baselines=(Baseline("greedy", found.value, found.positions_m.copy()),),
    )
    return chosen, found


def _exchange_stage(grid: _Grid, chosen: np.ndarray, halt: Halt) -> Iterator[Step]:
    """Fedorov exchange from the greedy layout; returns the best layout (the exchange's, also
    when stopped part-way)."""
    p = grid.problem
    tries = exchange_steps(
        grid.objective, chosen, grid.positions_m, grid.min_spacing_m, p.installed_m
    )
    count = max(chosen.size, 1)
    for k, chosen in enumerate(tries):  # noqa: B007, B020 - the last try is the result
        # Progress within the current pass over the probes (passes: until one changes nothing).
        yield Step("exchange", k % count, count)
        if halt():
            break
    found = grid.layout(chosen)
    yield Step(
        "exchange",
        1,
        1,
        best=found,
        history=(found.value,),
        value=found.value,
        baselines=(Baseline("exchange", found.value, found.positions_m.copy()),),
    )
    return found


def _warm_stage(grid: _Grid, warm_start_m: np.ndarray, best: Layout, halt: Halt) -> Iterator[Step]:
    """The stored layout (exact positions, perhaps off the grid) stays in the race; a smaller
    one (a budget's previous count) is extended greedily from the grid. Returns the best."""
    p = grid.problem
    warm = np.asarray(warm_start_m, dtype=float).reshape(-1, 3)[: p.count]
    # Probes the current rules forbid (a new keep-out, a region given up) are dropped.
    warm = _feasible_subset(p.site, warm)
    gain = p.gain_at(warm)
    if warm.shape[0] < p.count:
        if halt():
            return best
        n_extra = p.count - warm.shape[0]
        picks = extension_steps(
            p, grid.objective, grid.positions_m, warm, gain, p.count, grid.min_spacing_m
        )
        try:
            for extra in picks:  # noqa: B007 - the last pick is the result
                yield Step("warm start", extra.size, n_extra)
                if extra.size < n_extra and halt():
                    return best
        except InputError:
            return best  # the stored probes leave no room for the rest: it drops out
        warm = np.concatenate([warm, grid.positions_m[extra]])
        gain = np.concatenate([gain, grid.gains[extra]])
    value = exact(p, warm, gain)
    better = p.better(value, best.value)
    found = Layout(warm, gain, value) if better else None
    yield Step("warm start", 1, 1, best=found, history=(value,))
    return found if better else best


def _on_grid(grid: _Grid, layout_m: np.ndarray) -> np.ndarray | None:
    """Candidates of a layout ``(k, 3)`` that lies on the grid, ``(k,) int`` (None when a
    probe is off it, as a warm start's may be)."""
    from scipy.spatial import cKDTree

    dist, idx = cKDTree(grid.positions_m).query(layout_m)
    return idx if np.all(dist <= 1e-6) else None


def _bound_stage(grid: _Grid, best: Layout, halt: Halt) -> Iterator[Step]:
    """The relaxation bound, one evaluation a step. Every step's bound is certified, but one
    cut short can be far from the best layout: only a finished bound is kept (and returned;
    None when stopped)."""
    p = grid.problem
    yield Step("bound", 0, 1)
    relax = None
    steps = relaxation_steps(
        grid.objective.rows,
        p.fisher_installed,
        p.count,
        positions_m=grid.positions_m,
        min_spacing_m=grid.min_spacing_m,
        installed_m=p.installed_m,
        start=_on_grid(grid, best.positions_m),
        plan_value=best.value,
    )
    first = None
    tol = p.n_params * BOUND_GAP_PER_PARAM
    for relax in steps:  # noqa: B007
        first = relax.gap if first is None else first
        yield Step("bound", _converged_percent(first, relax.gap, tol), 100)
        if halt():
            return None
    yield Step("bound", 1, 1, bound=relax)
    return relax


def _restart_stage(
    grid: _Grid, best: Layout, restarts: tuple[int, float, np.random.Generator], halt: Halt
) -> Iterator[Step]:
    """``n`` further searches, each a randomised greedy start and the Fedorov exchange, with
    ``restarts = (n, value of the exchange from the greedy layout, rng)``; returns the best
    layout of all. A stop keeps the better of the best so far and the layout the search it
    cut short had reached (that search's value is not among the runs)."""
    n, exchanged, rng = restarts
    p = grid.problem
    runs = [exchanged]
    args = (grid.positions_m, grid.min_spacing_m, p.installed_m)
    yield Step("restarts", 0, n)
    for r in range(n):
        chosen = None
        for chosen in randomised_greedy_steps(grid.objective, p.count, *args, rng):  # noqa: B007
            yield Step("restarts", r, n)
            if halt():
                break
        if chosen is None or chosen.size < p.count:
            if halt():
                break
            continue  # the randomised picks blocked the spacing: no layout from this start
        for chosen in exchange_steps(grid.objective, chosen, *args):  # noqa: B007, B020
            yield Step("restarts", r, n)
            if halt():
                break
        found = grid.layout(chosen)
        # A restart that ends at the incumbent's value (the same set in another order, up to
        # rounding) does not replace it: the plan changes only for a real improvement.
        better = p.better(
            found.value, best.value + _RESTART_RTOL * _sign(p) * max(1.0, abs(best.value))
        )
        best = found if better else best
        yield Step("restarts", r + 1, n, best=found if better else None, history=(found.value,))
        if halt():
            break
        runs.append(found.value)
    yield Step("restarts", n, n, value=best.value, runs=tuple(runs) if len(runs) > 1 else ())
    return best


#: Relative improvement over the incumbent a restart's layout must bring to replace it.
_RESTART_RTOL = 1e-10


def _sign(problem: Problem) -> float:
    """+1 where the criterion is maximised, −1 where it is minimised."""
    return 1.0 if problem.criterion.maximise else -1.0


def _converged_percent(first: float, gap: float, tol: float) -> int:
    """How far the bound's gap has come from its first value to the tolerance, on a log
    scale (the ascent's gap shrinks about geometrically), in percent: the progress bar's
    measure, from which it estimates the time left."""
    if not (first > tol and gap > 0 and np.isfinite(first)):
        return 100 if gap <= tol else 0
    share = np.log(first / max(gap, tol)) / np.log(first / tol)
    return int(100 * min(max(share, 0.0), 1.0))


def _refine_stage(
    grid: _Grid, best: Layout, evaluations: int, rng: np.random.Generator, halt: Halt
) -> Iterator[Step]:
    """Bayesian refinement of the best layout, one batch a step."""
    p = grid.problem
    cand = grid.candidates
    regions = _region_of(p, best.positions_m, cand)
    radius = REFINE_RADIUS_CELLS * cand.spacing_m if cand.spacing_m > 0 else None
    yield Step("refine", 0, evaluations)
    last = None
    used = 0
    steps = refine_steps(p, best.positions_m, best.gain, regions, evaluations, rng, radius)
    for last in steps:  # noqa: B007
        batch, used = last.used - used, last.used
        yield Step("refine", used, evaluations, history=last.recorded, evaluated=batch)
        if halt():
            break
    found = Layout(last.layout, best.gain, last.value)
    yield Step("refine", evaluations, evaluations, best=found, value=found.value)


def _baseline_stage(
    problem: Problem, n_random: int, rng: np.random.Generator, halt: Halt
) -> Iterator[Step]:
    """What an engineer would draw, and the best of many random layouts, scored alike."""
    site, count = problem.site, problem.count
    yield Step("baselines", 0, 2)
    try:
        regular = site.regular_layout(count)
    except ValueError:
        regular = None  # no regular layout fits the rules: nothing to compare
    if regular is not None:
        rv = exact(problem, regular, problem.gain_at(regular))
        regular_baseline = (Baseline("regular", rv, regular),)
        yield Step("baselines", 1, 2, baselines=regular_baseline, evaluated=1)
    if n_random <= 0 or halt():
        return
    # On a crowded site a few random layouts may not fit every probe: the plan is compared
    # with those that do, and the baseline's name says how many that was.
    rand = site.random_layouts(n_random, count, rng, keep_placed=True)
    n_placed = len(rand)
    if n_placed == 0:
        return  # no random layout fits the rules: nothing to compare
    g = problem.gain_at(rand.reshape(-1, 3)).reshape(rand.shape[:2])
    rvals = np.empty(n_placed)
    for start in range(0, n_placed, RANDOM_BATCH):
        if halt():
            return  # a best of fewer layouts than announced is no baseline
        sl = slice(start, min(start + RANDOM_BATCH, n_placed))
        rvals[sl] = problem.objective(rand[sl], g[sl])
        yield Step("baselines", 1, 2, evaluated=sl.stop - sl.start)
    k = int(np.argmax(rvals) if problem.criterion.maximise else np.argmin(rvals))
    name = f"best of {n_placed} random"
    if n_placed < n_random:
        name += f" ({n_random - n_placed} of {n_random} could not place every probe)"
    best = Baseline(name, float(rvals[k]), rand[k])
    yield Step("baselines", 2, 2, baselines=(best,))
