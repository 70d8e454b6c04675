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
        Criterion of each evaluated layout that keeps the mounting rules, in order: the greedy
        and exchange layouts, a warm start, then every refinement proposal (proposals that
        break the rules are not recorded). ±inf for a layout that cannot resolve everything.
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
    objective : str
        What the search optimised: "criterion", or "worst single loss" when the config asks
        to tolerate one failed probe (the stage and baseline values are then of that).
    """

    history: np.ndarray
    bound: float | None
    bound_gap: float | None
    grid_spacing_m: float
    n_candidates: int
    baselines: tuple[Baseline, ...] = ()
    stages: tuple[tuple[str, float], ...] = ()
    seconds: float = 0.0
    objective: str = "criterion"


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
class Changes:
    """What changed against an earlier result (``--from OLD.h5``).

    Attributes
    ----------
    old_path : str
    mode : {"installed", "start", "rescore"}
        The old probes were kept fixed as installed, used as the search's starting layout, or
        rescored as they are (``score --from``).
    old_value : float
        The criterion stored in the old file (under the old config, named ``old_criterion``).
    old_rescored : float
        The old layout scored under the current config (equal to ``old_value`` when nothing
        changed).
    kept_m : (n_kept, 3) float
    moved_from_m, moved_to_m : (n_moved, 3) float
    added_m : (n_added, 3) float
    removed_m : (n_removed, 3) float
    old_criterion : str
    rescore_note : str
        Why ``old_rescored`` is NaN when the old layout cannot be scored comparably under the
        current config ("" otherwise).
    """

    old_path: str
    mode: str
    old_value: float
    old_rescored: float
    kept_m: np.ndarray
    moved_from_m: np.ndarray
    moved_to_m: np.ndarray
    added_m: np.ndarray
    removed_m: np.ndarray
    old_criterion: str = ""
    rescore_note: str = ""


def compare_layouts(
    old_m: np.ndarray, new_m: np.ndarray, move_radius_m: float, tol_m: float = 1e-6
) -> dict[str, np.ndarray]:
    """Match an old and a new layout probe by probe.

    Probes are paired by the assignment that minimises the total distance (Hungarian method,
    scipy.optimize.linear_sum_assignment). A pair closer than ``tol_m`` is kept, one closer
    than ``move_radius_m`` moved; the other old probes are removed, the other new ones added.

    Parameters
    ----------
    old_m : (n_old, 3) float
    new_m : (n_new, 3) float
    move_radius_m : float
    tol_m : float

    Returns
    -------
    dict with ``kept_m``, ``moved_from_m``, ``moved_to_m``, ``added_m``, ``removed_m``
    (each (k, 3) float).
    """
    from scipy.optimize import linear_sum_assignment

    old_m = np.asarray(old_m, dtype=float).reshape(-1, 3)
    new_m = np.asarray(new_m, dtype=float).reshape(-1, 3)
    dist = np.linalg.norm(old_m[:, None, :] - new_m[None, :, :], axis=-1)
    r, c = linear_sum_assignment(dist) if dist.size else (np.zeros(0, int), np.zeros(0, int))
    d = dist[r, c]
    kept = d <= tol_m
    moved = (d > tol_m) & (d <= move_radius_m)
    paired_old = set(r[kept | moved].tolist())
    paired_new = set(c[kept | moved].tolist())
    empty = np.zeros((0, 3))
    return {
        "kept_m": new_m[c[kept]] if kept.any() else empty,
        "moved_from_m": old_m[r[moved]] if moved.any() else empty,
        "moved_to_m": new_m[c[moved]] if moved.any() else empty,
        "added_m": new_m[[j for j in range(len(new_m)) if j not in paired_new]].reshape(-1, 3),
        "removed_m": old_m[[i for i in range(len(old_m)) if i not in paired_old]].reshape(-1, 3),
    }


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
    changes : Changes or None
        What changed against an earlier result (``--from``).
    simulation : probeplan.simulate.Simulation or None
        Achieved errors of simulated fits beside the bounds (``simulate``).
    probe_names : tuple of n_probes str or None
        Names of all probes, installed first (None: the installed names of the config, then
        ``new-k``).
    notes : tuple of str
        Things the user must know about this result (rule violations of a scored layout, which
        budget option the layout is), printed with the summary.
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
    changes: Changes | None = None
    simulation: object | None = None
    probe_names: tuple[str, ...] | None = None
    notes: tuple[str, ...] = ()


def make_result(
    command: str,
    config,
    score: Score,
    *,
    search: SearchInfo | None = None,
    budget: BudgetTable | None = None,
    complete: bool = True,
    extra: dict | None = None,
    changes: Changes | None = None,
    simulation: object | None = None,
    probe_names: tuple[str, ...] | None = None,
    notes: tuple[str, ...] = (),
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
        changes=changes,
        simulation=simulation,
        probe_names=None if probe_names is None else tuple(probe_names),
        notes=tuple(notes),
    )
