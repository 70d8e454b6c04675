"""One call for the whole search, and the one builder of its result.

:func:`plan` drains the stream of :func:`probeplan.search.stages.search_steps` (handing every
step's stage and progress to the caller's progress callable) and :func:`make_outcome` folds the
steps into the :class:`PlanOutcome`: however early a stop request ended the stream, the result
is built by the same code, so its fields cannot drift.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from ..fisher import d_ratio
from ..problem import Problem
from ..resulttypes import Score, SearchInfo
from .stages import Halt, Settings, Step, search_steps


@dataclass(frozen=True, eq=False)
class PlanOutcome:
    """The outcome of :func:`plan`.

    Attributes
    ----------
    positions_m : (count, 3) float or None
        The new probes (installed ones are not repeated here); None when the search was
        stopped before it had any layout (see :attr:`has_layout`).
    gain : (count,) float or None
    score : Score or None
        Score of the planned layout, installed probes first; None without a layout.
    info : SearchInfo
    complete : bool
        False when ``stop()`` ended the search early (the layout is the best found so far).
    """

    positions_m: np.ndarray | None
    gain: np.ndarray | None
    score: Score | None
    info: SearchInfo
    complete: bool

    @property
    def has_layout(self) -> bool:
        """False only when a stop request came before the greedy stage had placed every probe:
        there is then nothing to score or write (``complete`` is False too)."""
        return self.score is not None


def make_outcome(
    problem: Problem,
    steps: Sequence[Step],
    *,
    history: np.ndarray | None = None,
    complete: bool = True,
    started: float | None = None,
    asked: int | None = None,
) -> PlanOutcome:
    """Build the result of a search from its steps.

    Parameters
    ----------
    problem : Problem
    steps : sequence of Step
        The stream of :func:`~probeplan.search.stages.search_steps`, as far as it ran.
    history : (k,) float or None
        Stored history the search continues (``--resume``); the steps' values follow it.
    complete : bool
        Whether the stream ran to its end (no stop request).
    started : float or None
        ``time.perf_counter()`` when the search began (for ``SearchInfo.seconds``).
    asked : int or None
        The refinement evaluations asked for (``SearchInfo.evaluations_asked``).

    Returns
    -------
    PlanOutcome
    """
    stored = [] if history is None else [float(v) for v in history]
    best = _last(s.best for s in steps)
    grid = _last(s.grid for s in steps)
    relax = _last(s.bound for s in steps)
    runs = _last(s.runs or None for s in steps)
    score = None if best is None else problem.score(best.positions_m, best.gain)
    info = SearchInfo(
        history=np.asarray(stored + [v for s in steps for v in s.history], dtype=float),
        bound=None if relax is None else relax.bound,
        bound_gap=None if relax is None else relax.gap,
        grid_spacing_m=0.0 if grid is None else float(grid.spacing_m),
        n_candidates=0 if grid is None else int(grid.positions_m.shape[0]),
        baselines=tuple(b for s in steps for b in s.baselines),
        stages=tuple((s.stage, s.value) for s in steps if s.value is not None),
        seconds=0.0 if started is None else time.perf_counter() - started,
        objective="worst single loss" if problem.config.design.tolerate_failures else "criterion",
        evaluations_asked=asked,
        evaluations_spent=_spent(steps),
        restart_values=None if runs is None else np.asarray(runs, dtype=float),
    )
    if best is None:
        return PlanOutcome(None, None, None, info, complete=False)
    return PlanOutcome(best.positions_m, best.gain, score, info, complete)


#: How the evaluation account names a stage.
_STAGE_WORDS = {"refine": "refinement", "warm start": "stored start"}


def _spent(steps: Sequence[Step]) -> tuple[tuple[str, int], ...]:
    """Objective evaluations per stage, in order: the layouts each stage scored, and apart
    the refinement proposals that broke the mounting rules (evaluated, not recorded)."""
    scored: dict[str, int] = {}
    broke: dict[str, int] = {}
    for s in steps:
        n = len(s.history) if s.evaluated is None else s.evaluated
        if n or s.history:
            name = _STAGE_WORDS.get(s.stage, s.stage)
            kept = min(len(s.history), n) if s.stage != "baselines" else n
            scored[name] = scored.get(name, 0) + kept
            if n > kept:
                broke[name] = broke.get(name, 0) + n - kept
    out = list(scored.items())
    out += [(f"{name} proposals that broke the mounting rules", n) for name, n in broke.items()]
    return tuple(out)


def _last(values):
    """The last value that is not None (None if there is none)."""
    out = None
    for v in values:
        if v is not None:
            out = v
    return out


def plan(
    problem: Problem,
    *,
    progress: Callable[[str, int, int], None] | None = None,
    stop: Callable[[], bool] | None = None,
    warm_start_m: np.ndarray | None = None,
    history: np.ndarray | None = None,
    evaluations: int | None = None,
    random_layouts: int | None = None,
    candidate_target: int = 1500,
) -> PlanOutcome:
    """Find a layout of ``problem.count`` new probes (see :mod:`probeplan.search` for the
    stages).

    Parameters
    ----------
    problem : Problem
    progress : callable(stage: str, done: int, total: int) or None
        Called with every step of the search.
    stop : callable() -> bool or None
        Polled between any two steps (inside every stage's long loops too); once it returns
        True the search ends within one step with the best layout so far and ``complete =
        False`` — or, when it came before the greedy stage had placed every probe, with no
        layout at all (``outcome.has_layout`` False, ``positions_m``/``gain``/``score`` None).
    warm_start_m : (count, 3) float or None
        A stored layout to continue from (``--resume``): it is the incumbent from the start.
    history : (k,) float or None
        Stored history to continue.
    evaluations : int or None
        Bayesian-refinement evaluations (default ``config.design.evaluations``).
    random_layouts : int or None
        Random layouts for the baseline (default ``config.design.random_layouts``).
    candidate_target : int
        Approximate number of grid candidates when the config sets no spacing.

    Returns
    -------
    PlanOutcome
    """
    started = time.perf_counter()
    design = problem.config.design
    if problem.count == 0:
        # Nothing to place ([probes] count = 0): the plan is the installed meters as they are.
        empty = np.zeros((0, 3))
        hist = np.asarray([] if history is None else history, dtype=float)
        info = SearchInfo(hist, None, None, 0.0, 0)
        return PlanOutcome(empty, np.zeros(0), problem.score(empty, np.zeros(0)), info, True)
    settings = Settings(
        evaluations=design.evaluations if evaluations is None else evaluations,
        random_layouts=design.random_layouts if random_layouts is None else random_layouts,
        candidate_target=candidate_target,
        warm_start_m=warm_start_m,
    )
    halt = Halt(stop)
    steps = []
    for step in search_steps(problem, settings, np.random.default_rng(problem.config.seed), halt):
        if progress is not None:
            progress(step.stage, step.done, step.total)
        steps.append(step)
    return make_outcome(
        problem,
        steps,
        history=history,
        complete=not halt.stopped,
        started=started,
        asked=settings.evaluations,
    )


def d_efficiency(value: float, bound: float | None, n_params: int) -> float | None:
    """exp((value − bound)/n_params): the share of the best grid layout's D-value reached."""
    if bound is None or not np.isfinite(value):
        return None
    return d_ratio(value, bound, n_params)
