"""Result objects of the commands: what ``store`` writes and ``report`` prints.

One :class:`Result` per command run, built by :func:`make_result` only, so its fields cannot
drift between the commands. Sections that a command does not produce are ``None``.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field

import numpy as np

from .problem import Score


@dataclass(frozen=True, eq=False)
class Baseline:
    """A reference layout scored beside the plan.

    Attributes
    ----------
    name : str
        e.g. "regular", "best of 1000 random", "greedy", "exchange".
    value : float
        Its criterion value.
    positions_m : (n_probes, 3) float
        New probes only.
    """

    name: str
    value: float
    positions_m: np.ndarray


@dataclass(frozen=True, eq=False)
class SearchInfo:
    """How the plan was found.

    Attributes
    ----------
    history : (n_evaluations,) float
        Criterion of each evaluated layout, in order.
    bound : float or None
        Upper bound on the ``d`` value over the candidate grid (convex relaxation), if computed.
    bound_gap : float or None
        Duality gap of the relaxation when it stopped (the bound is the relaxed value + gap).
    grid_spacing_m : float
        Spacing of the candidate grid.
    n_candidates : int
    baselines : tuple of Baseline
        Reference layouts (greedy, exchange, regular, best random ...).
    stages : tuple of (str, float)
        Criterion after each stage of the search ("greedy", "exchange", "refine"), in order.
    seconds : float
        Wall time of the search.
    """

    history: np.ndarray
    bound: float | None
    bound_gap: float | None
    grid_spacing_m: float
    n_candidates: int
    baselines: tuple[Baseline, ...] = ()
    stages: tuple[tuple[str, float], ...] = ()
    seconds: float = 0.0


@dataclass(frozen=True, eq=False)
class BudgetTable:
    """One row per (count, grade) option tried.

    Attributes
    ----------
    count : (n_options,) int
    grade : (n_options,) str
    cost : (n_options,) float
    value : (n_options,) float
    meets_target : (n_options,) bool
    pareto : (n_options,) bool
        No other option is both cheaper (or equal) and better.
    cheapest : int
        Row of the cheapest option meeting the target, −1 if none.
    target : float or None
    layouts : tuple of (n_i, 3) float arrays
    """

    count: np.ndarray
    grade: np.ndarray
    cost: np.ndarray
    value: np.ndarray
    meets_target: np.ndarray
    pareto: np.ndarray
    cheapest: int
    target: float | None
    layouts: tuple[np.ndarray, ...]


@dataclass(frozen=True, eq=False)
class Result:
    """Everything a command produced, with its provenance.

    Attributes
    ----------
    command : {"plan", "score", "budget"}
    config_text, config_path, title : str
    seed : int
    version, created_utc : str
    caution : {"lightning", "esd", "high-voltage", "none"}
    ground_z_m : float or None
    score : Score
        The layout's score (the plan, the given layout, or the budget's cheapest option).
    search : SearchInfo or None
    budget : BudgetTable or None
    complete : bool
        False when the run was interrupted and holds the best layout found so far.
    extra : dict
        Named figures worth keeping (e.g. the D-efficiency), str -> float.
    """

    command: str
    config_text: str
    config_path: str
    title: str
    seed: int
    version: str
    created_utc: str
    caution: str
    ground_z_m: float | None
    score: Score
    search: SearchInfo | None = None
    budget: BudgetTable | None = None
    complete: bool = True
    extra: dict = field(default_factory=dict)


def make_result(
    command: str,
    config,
    score: Score,
    *,
    search: SearchInfo | None = None,
    budget: BudgetTable | None = None,
    complete: bool = True,
    extra: dict | None = None,
) -> Result:
    """Build the one :class:`Result` of a command from its config and outputs."""
    from . import __version__

    return Result(
        command=command,
        config_text=config.text,
        config_path=str(config.path),
        title=config.title,
        seed=int(config.seed),
        version=__version__,
        created_utc=_dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        caution=getattr(config, "caution", "none"),
        ground_z_m=config.ground_z_m,
        score=score,
        search=search,
        budget=budget,
        complete=complete,
        extra=dict(extra or {}),
    )
