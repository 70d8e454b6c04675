"""Instrumentation budgets: plan every (count, grade) option and compare cost with quality.

The sweep is a set of independent *chains*, one per meter grade; a chain plans its counts in
increasing order, each plan starting from the previous (smaller) one, so that more meters of one
grade never score worse. Chains take only plain, picklable arguments (the config text, a grade
name, the counts) and return plain data, so any ``concurrent.futures.Executor`` runs them —
the default is a process pool on the local cores, and a Dask ``distributed.Client`` (which has
the same ``submit`` interface) can take its place without changing this module.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from concurrent.futures import FIRST_COMPLETED, Executor, ProcessPoolExecutor, wait
from dataclasses import dataclass
from multiprocessing.managers import SyncManager

import numpy as np

from .config import parse_config
from .errors import InputError, helper_context, helper_process_init
from .problem import build_problem
from .resulttypes import BudgetTable
from .search import plan


@dataclass(frozen=True)
class OptionPlan:
    """One planned option of the sweep (plain data: crosses process boundaries)."""

    count: int
    grade: str
    cost: float
    value: float
    positions_m: np.ndarray  # (count, 3)
    gain: np.ndarray  # (count,)
    complete: bool = True  # False when a stop request ended its search early
    reason: str = ""  # why the mounting rules cannot hold this count ("" when they can)


def plan_chain(
    config_text: str,
    config_path: str,
    grade_name: str,
    counts: tuple[int, ...],
    evaluations: int | None = None,
    stop_event=None,
    warm_start_m: np.ndarray | None = None,
) -> list[OptionPlan]:
    """Plan one grade at increasing counts, each starting from the previous plan.

    Parameters
    ----------
    config_text, config_path : str
        The config (re-parsed in the worker, so the call pickles cheaply).
    grade_name : str
    counts : tuple of int, increasing
    evaluations : int or None
        Refinement evaluations per plan (default: the config's).
    stop_event : Event-like with ``is_set()`` or None
        A stop request shared with the caller; the chain returns what it has when it is set.
    warm_start_m : (k, 3) float or None
        A smaller plan of this grade to start from (a resumed sweep).

    Returns
    -------
    list of OptionPlan, one per count planned.
    """
    config = parse_config(config_text, config_path)
    grade = next(g for g in config.grades if g.name == grade_name)
    stop = stop_event.is_set if stop_event is not None else None
    out: list[OptionPlan] = []
    warm = warm_start_m
    site = config.site()
    worst = -np.inf if config.design.criterion == "d" else np.inf
    for count in counts:
        if stop is not None and stop():
            break
        cost = float(count * grade.cost)
        try:
            site.check_feasible(count)
            problem = build_problem(config, count=count, grade=grade)
            outcome = plan(
                problem, warm_start_m=warm, evaluations=evaluations, random_layouts=0, stop=stop
            )
        except (ValueError, InputError) as exc:
            # The rules cannot hold this count (check_feasible's ValueError) or the candidate
            # grid cannot (the greedy step's InputError): a row marked so; the chain goes on.
            empty = np.zeros((0, 3))
            out.append(
                OptionPlan(count, grade_name, cost, worst, empty, np.zeros(0), True, str(exc))
            )
            continue
        if not outcome.has_layout:
            break  # stopped before this count had a layout: nothing to tabulate
        warm = outcome.positions_m
        out.append(
            OptionPlan(
                count=count,
                grade=grade_name,
                cost=cost,
                value=float(outcome.score.value),
                positions_m=outcome.positions_m,
                gain=outcome.gain,
                complete=outcome.complete,
            )
        )
    return out


def pareto_front(cost: np.ndarray, value: np.ndarray, maximise: bool) -> np.ndarray:
    """Options no other option dominates (cheaper or equal and better or equal, one strictly);
    options with a non-finite value (a singular layout) are never on the front.

    Parameters
    ----------
    cost, value : (n_options,) float
    maximise : bool
        Larger values are better (``d``).

    Returns
    -------
    (n_options,) bool
    """
    v = value if maximise else -value
    finite = np.isfinite(v)
    v = np.where(finite, v, -np.inf)
    no_worse = (cost[None, :] <= cost[:, None]) & (v[None, :] >= v[:, None])
    strictly = (cost[None, :] < cost[:, None]) | (v[None, :] > v[:, None])
    dominated = np.any(no_worse & strictly, axis=1)
    # A layout that cannot resolve the parameters (value ±inf) is no trade-off worth showing.
    return ~dominated & finite


def cheapest_meeting(cost: np.ndarray, value: np.ndarray, meets: np.ndarray, maximise: bool) -> int:
    """Row of the cheapest option meeting the target (the better value on a tie), −1 if none."""
    rows = np.nonzero(meets)[0]
    if rows.size == 0:
        return -1
    v = value[rows] if maximise else -value[rows]
    order = np.lexsort((-v, cost[rows]))
    return int(rows[order[0]])


def run_budget(
    config,
    *,
    executor: Executor | None = None,
    progress: Callable[[str, int, int], None] | None = None,
    evaluations: int | None = None,
    stop: Callable[[], bool] | None = None,
    done: tuple[OptionPlan, ...] = (),
    event=None,
) -> tuple[BudgetTable, bool]:
    """Plan every (count, grade) option of the config and tabulate cost against quality.

    Parameters
    ----------
    config : probeplan.config.Config
        Needs ``[budget]`` and at least one ``[[grade]]``.
    executor : concurrent.futures.Executor or None
        Runs the chains; default: a process pool with one worker per core (at most one per
        grade). Pass e.g. a Dask client to spread the sweep over a cluster.
    progress : callable(stage, done, total) or None
    evaluations : int or None
        Refinement evaluations per plan (default: ``[budget] evaluations``).
    stop : callable() -> bool or None
        Polled while the chains run; when it returns True the chains are asked to stop and the
        options finished so far are tabulated.
    done : tuple of OptionPlan
        Options already planned (a resumed sweep): kept as they are, and the largest of each
        grade starts the chain of its larger counts.
    event : Event-like with ``set()`` and ``is_set()``, picklable, or None
        The stop request the chains poll, shared with wherever ``executor`` runs them
        (default: a manager's event for the own process pool, a plain flag in this process);
        on another machine, e.g. a ``distributed.Event`` (:mod:`probeplan.cluster`).

    Returns
    -------
    table : BudgetTable
        Rows sorted by cost (then grade name, then count).
    complete : bool
        False when ``stop`` ended the sweep early (some options missing or cut short).
    """
    if config.budget is None or not config.grades:
        raise InputError(
            f"{config.path}: `budget` needs a [budget] table with `counts` and at least one "
            "[[grade]] (name, noise_v_per_m, cost)."
        )
    counts = tuple(sorted(config.budget.counts))
    evaluations = config.budget.evaluations if evaluations is None else evaluations
    grades = [g.name for g in config.grades]
    total = len(counts) * len(grades)
    if progress is not None:
        progress("budget options", len(done), total)
    own = executor is None
    workers = max(1, min(len(grades), os.cpu_count() or 1))
    if own and workers > 1:
        executor = ProcessPoolExecutor(
            max_workers=workers,
            mp_context=helper_context(),
            initializer=helper_process_init,
            initargs=(os.getpid(),),
        )
    manager = None
    if event is None:
        if own and executor is not None:
            manager = SyncManager(ctx=helper_context())
            manager.start(helper_process_init, (os.getpid(),))
        event = manager.Event() if manager is not None else _LocalEvent()
    results: list[OptionPlan] = [o for o in done if o.grade in grades and o.count in counts]
    args = []
    for g in grades:
        have = {o.count: o for o in results if o.grade == g}
        todo = tuple(c for c in counts if c not in have)
        if not todo:
            continue
        smaller = [c for c in have if c < todo[0]]
        warm = have[max(smaller)].positions_m if smaller else None
        args.append((config.text, str(config.path), g, todo, evaluations, event, warm))
    try:
        if executor is None:
            for a in args:
                if stop is not None and stop():
                    event.set()
                results += plan_chain(*a[:5], stop_event=_polling(event, stop), warm_start_m=a[6])
                if progress is not None:
                    progress("budget options", len(results), total)
        else:
            pending = {executor.submit(plan_chain, *a) for a in args}
            while pending:
                done, pending = wait(pending, timeout=0.2, return_when=FIRST_COMPLETED)
                for fut in done:
                    results += fut.result()
                    if progress is not None:
                        progress("budget options", len(results), total)
                if stop is not None and stop():
                    event.set()
    finally:
        if own and executor is not None:
            executor.shutdown(wait=True, cancel_futures=True)
        if manager is not None:
            manager.shutdown()
    # An option whose search was cut short is dropped: a resumed sweep plans it again.
    results = [o for o in results if o.complete]
    complete = len(results) == total
    return tabulate(results, config), complete


class _LocalEvent:
    """A stop flag for chains run in this process or in threads."""

    def __init__(self) -> None:
        self._set = False

    def set(self) -> None:
        self._set = True

    def is_set(self) -> bool:
        return self._set


class _polling:  # noqa: N801 - a tiny adapter, used like a function
    """An event whose ``is_set`` also polls the caller's stop callable (in-process chains)."""

    def __init__(self, event, stop) -> None:
        self.event, self.stop = event, stop

    def is_set(self) -> bool:
        if self.stop is not None and self.stop():
            self.event.set()
        return self.event.is_set()


def tabulate(options: list[OptionPlan], config) -> BudgetTable:
    """Sort options by cost and mark the target, the Pareto front and the cheapest winner."""
    options = sorted(options, key=lambda o: (o.cost, o.grade, o.count))
    maximise = config.design.criterion == "d"
    cost = np.array([o.cost for o in options], dtype=float)
    value = np.array([o.value for o in options], dtype=float)
    fits = np.array([not o.reason for o in options], dtype=bool)
    target = config.budget.target
    if target is None:
        meets = np.zeros(len(options), dtype=bool)
    else:
        meets = fits & (value >= target if maximise else value <= target)
    return BudgetTable(
        count=np.array([o.count for o in options], dtype=int),
        grade=np.array([o.grade for o in options], dtype=object),
        cost=cost,
        value=value,
        meets_target=meets,
        pareto=pareto_front(cost, value, maximise),
        cheapest=cheapest_meeting(cost, value, meets, maximise),
        target=target,
        layouts=tuple(o.positions_m for o in options),
        feasible=fits,
        reason=tuple(o.reason for o in options),
    )


def chosen_option(table: BudgetTable, maximise: bool) -> int:
    """Row whose layout the budget result scores in full: the cheapest meeting the target,
    else the best-valued option."""
    if table.cheapest >= 0:
        return table.cheapest
    v = np.where(np.isnan(table.value), -np.inf, table.value if maximise else -table.value)
    rows = np.flatnonzero(table.fits())  # a row that does not fit has no layout to score
    return int(rows[np.argmax(v[rows])]) if rows.size else int(np.argmax(v))
