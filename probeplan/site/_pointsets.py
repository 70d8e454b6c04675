"""Greedy choices of well-spaced subsets of a finite set of positions.

Shared by the points kind (its hand-drawn arrangement), the feasibility check (how many listed
points keep the spacing) and the regular layout (its fallbacks). Positions are ``(n, 3)`` float
arrays in metres; spacing comparisons forgive round-off by :data:`SPACING_RTOL`.
"""

from __future__ import annotations

import numpy as np

from ._common import SPACING_RTOL


def greedy_spread(cands: np.ndarray, k: int, fixed: np.ndarray, sep: float) -> np.ndarray | None:
    """Greedy max-min-distance choice of ``k`` of ``cands : (n, 3)``, each ``sep`` from the
    others and from ``fixed : (m, 3)``. Returns ``(k,)`` indices, or None when it runs out."""
    if len(cands) < k:
        return None
    sep2 = (sep * (1.0 - SPACING_RTOL)) ** 2
    if len(fixed):
        dmin2 = np.min(np.sum((cands[:, None, :] - fixed[None]) ** 2, axis=-1), axis=1)
    else:
        dmin2 = np.full(len(cands), np.inf)
    chosen = np.empty(k, dtype=np.intp)
    for step in range(k):  # one pick per probe; each pick is vectorised over candidates
        if step == 0 and not len(fixed):
            j = int(np.argmax(np.sum((cands - cands.mean(axis=0)) ** 2, axis=1)))
        else:
            j = int(np.argmax(dmin2))
        if dmin2[j] < sep2:
            return None
        chosen[step] = j
        dmin2 = np.minimum(dmin2, np.sum((cands - cands[j]) ** 2, axis=1))
    return chosen


def first_fit(cands: np.ndarray, fixed: np.ndarray, sep: float) -> np.ndarray:
    """Indices of candidates kept by a first-fit sweep along their principal axis: each is kept
    when it is ``sep`` from every kept one and from ``fixed``. All kept pairs keep the spacing."""
    if len(cands) == 0:
        return np.zeros(0, dtype=np.intp)
    centred = cands - cands.mean(axis=0)
    _, _, vt = np.linalg.svd(centred, full_matrices=False)
    proj = centred @ vt.T
    order = np.lexsort(proj.T[::-1])
    sep2 = (sep * (1.0 - SPACING_RTOL)) ** 2
    kept_pos = np.empty((len(cands) + len(fixed), 3))
    kept_pos[: len(fixed)] = fixed
    n_kept = len(fixed)
    kept = []
    for j in order:  # a sweep over candidates; each test is vectorised over the kept ones
        if np.all(np.sum((kept_pos[:n_kept] - cands[j]) ** 2, axis=1) >= sep2):
            kept.append(j)
            kept_pos[n_kept] = cands[j]
            n_kept += 1
    return np.asarray(kept, dtype=np.intp)


def greedy_independent(pts: np.ndarray, sep: float) -> np.ndarray:
    """Indices of a large subset of ``pts : (n, 3)`` with all pairs at least ``sep`` apart.

    The minimum-degree greedy heuristic for a maximum independent set in the conflict graph:
    repeatedly keep the point with the fewest conflicts left and drop its conflicting neighbours.
    """
    if len(pts) == 0:
        return np.zeros(0, dtype=np.intp)
    sep2 = (sep * (1.0 - SPACING_RTOL)) ** 2
    d2 = np.sum((pts[:, None, :] - pts[None]) ** 2, axis=-1)
    conflict = d2 < sep2
    np.fill_diagonal(conflict, False)
    alive = np.ones(len(pts), dtype=bool)
    kept = []
    while alive.any():  # each round removes at least one point
        degree = np.where(alive, (conflict & alive).sum(axis=1), np.iinfo(np.int64).max)
        j = int(np.argmin(degree))
        kept.append(j)
        alive[j] = False
        alive &= ~conflict[j]
    return np.asarray(kept, dtype=np.intp)
