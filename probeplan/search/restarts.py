"""Restarts: more exchange searches from randomised greedy starts, when the bound is loose.

On a large grid the relaxation bound (:mod:`probeplan.search.bound`) can stay far above every
layout of whole meters, and the D-efficiency against it then says little about the plan. The
restarts give a second, empirical figure: ``[design] restarts`` further searches on the same
grid, each a greedy selection randomised in the manner of GRASP (Feo & Resende, "Greedy
randomized adaptive search procedures", J. Global Optimization 6, 1995: every pick drawn from
a restricted list of the best few candidates) and then the same Fedorov exchange
(:func:`probeplan.search.grid.exchange_steps`). If searches from different starts end at about
the same value, the search is consistent on this grid; that is evidence, not a proof that no
better layout exists. :func:`probeplan.search.stages.search_steps` runs them as the
``"restarts"`` stage and keeps the best layout of all.
"""

from __future__ import annotations

import functools
import itertools
from collections.abc import Iterator

import numpy as np

from ..errors import InputError
from .grid import GridObjective, greedy_steps

#: Candidates each randomised greedy pick is drawn from, uniformly: the best few by the
#: criterion the pick would reach (the "restricted candidate list" of GRASP).
RESTART_TOP = 5

#: D-efficiency against the bound at or above which the restarts are skipped: the bound
#: itself then certifies the plan, and small sites pay nothing for a second figure.
TIGHT_BOUND_EFFICIENCY = 0.95


def randomised_greedy_steps(
    obj: GridObjective,
    count: int,
    positions: np.ndarray,
    min_spacing: float,
    installed_m: np.ndarray,
    rng: np.random.Generator,
    top: int = RESTART_TOP,
) -> Iterator[np.ndarray]:
    """Greedy selection with each pick drawn among the ``top`` best allowed candidates, one
    pick a step: yields the chosen candidates ``(k,) int`` after each pick.

    Parameters
    ----------
    obj : GridObjective
    count : int
        Probes to place.
    positions : (n_candidates, 3) float
        The candidates, m.
    min_spacing : float
        Least distance between two probes, m.
    installed_m : (n_installed, 3) float
        Installed meters (the spacing applies to them too), m.
    rng : numpy Generator
        The draws (one integer a pick).
    top : int
        Size of the list each pick is drawn from.

    The stream ends early, with fewer than ``count`` picks, when the randomised picks leave
    no candidate the spacing allows (the caller drops that start). On a large grid the picks
    are made on its coarsest thinning, as the greedy's are (:func:`~.grid._levels`): the
    exchange that follows refines them level by level.
    """
    choose = functools.partial(_drawn_pick, rng=rng, top=top)
    picks = greedy_steps(obj, count, positions, min_spacing, installed_m, choose=choose)
    try:
        yield from itertools.islice(picks, 1, None)  # not the empty start
    except InputError:
        return  # the randomised picks left no candidate the spacing allows


def _drawn_pick(
    obj: GridObjective, chosen: np.ndarray, allowed: np.ndarray, rng: np.random.Generator, top
) -> int:
    """One pick drawn uniformly among the ``top`` best allowed candidates (−1 for none)."""
    idx = np.flatnonzero(allowed)
    if idx.size == 0:
        return -1
    maximise = obj.problem.criterion.maximise
    vals = obj.candidate_values(chosen)[idx]
    vals = np.where(np.isnan(vals), -np.inf if maximise else np.inf, vals)
    key = -vals if maximise else vals
    k = min(top, idx.size)
    # The best k, in a fixed order (ties by index), so that a seed fixes the pick.
    short = idx[np.argsort(key, kind="stable")[:k]]
    return int(short[rng.integers(k)])
