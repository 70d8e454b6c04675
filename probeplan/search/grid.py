"""Layouts on the candidate grid: the grid objective with rank-a updates, greedy, exchange.

The two grid stages of the search are generators of their steps (:func:`greedy_steps`,
:func:`exchange_steps`), so that the search polls its stop request between any two steps;
:func:`greedy` and :func:`exchange` run them to the end.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import numpy as np

from ..errors import InputError
from ..fisher import aggregate
from ..problem import Problem

#: Prior information, as a fraction of the mean diagonal of one candidate's information,
#: that keeps log det finite while the greedy set is still too small to resolve everything.
PRIOR_FRACTION = 1e-8

# --------------------------------------------------------------------------------------------
# The grid objective: criterion of M_s = prior + J0_s + Σ A_sc, with fast single-candidate moves
# --------------------------------------------------------------------------------------------


class GridObjective:
    """Criterion values of candidate-grid layouts, with rank-a updates.

    Parameters
    ----------
    problem : Problem
    rows : (n_scenarios, n_candidates, n_axes, n_params) float
        Whitened rows of a probe at each candidate.
    prior : bool
        Add the tiny prior (greedy/exchange) or not (final values).
    """

    def __init__(
        self,
        problem: Problem,
        rows: np.ndarray,
        prior: bool = True,
        robust: bool = False,
        fixed_info: np.ndarray | None = None,
    ) -> None:
        self.problem = problem
        self.rows = rows
        # Information of probes that every layout has and that may fail: (S, k, p, p).
        if fixed_info is None:
            fixed_info = problem.probe_information(np.zeros((0, 3)))
        self.fixed_info = fixed_info
        base = fixed_info.sum(axis=1)
        if prior:
            # The diagonal of every candidate's information, Σ_a r², without forming the
            # (S, C, p, p) information itself (9 × the rows at 9 parameters).
            diag = np.einsum("scap,scap->scp", rows, rows).mean(axis=1)  # (S, p)
            scale = np.where(diag > 0, diag, 1.0) * PRIOR_FRACTION
            base = base + scale[:, :, None] * np.eye(problem.n_params)
        self.base = base
        self.robust = robust
        self._full = None  # (chosen bytes, M⁻¹ᵀ, Q): the exchange's sweep of a full set

    @property
    def info(self) -> np.ndarray:
        """Information of one probe at every candidate, ``(S, C, p, p)``: formed on request
        only (it is p/a times the rows; the search itself never needs all of it)."""
        return self.info_of(np.arange(self.rows.shape[1]))

    def info_of(self, chosen: np.ndarray) -> np.ndarray:
        """Information of one probe at each candidate of ``chosen (k,) int``, ``(S, k, p, p)``."""
        r = self.rows[:, chosen]
        return np.einsum("scap,scaq->scpq", r, r)

    def matrix(self, chosen: np.ndarray) -> np.ndarray:
        """M_s of a candidate set: ``(k,) int`` → ``(n_scenarios, p, p)``."""
        return self.base + self.info_of(chosen).sum(axis=1)

    def _losses(self, chosen: np.ndarray) -> list[np.ndarray]:
        """M_s of the set with each one probe (fixed or chosen) lost."""
        m = self.matrix(chosen)
        out = [m - self.fixed_info[:, k] for k in range(self.fixed_info.shape[1])]
        info = self.info_of(chosen)
        out += [m - info[:, i] for i in range(chosen.size)]
        return out

    def values(self, m: np.ndarray) -> np.ndarray:
        """Aggregated criterion of matrices M ``(..., S, p, p)`` → ``(...)``.

        Unlike :meth:`Problem.values` this applies no singularity threshold: with the prior
        M is positive definite, and the greedy's first picks must be told apart by how much
        they add although the layout cannot resolve everything yet.
        """
        p = self.problem
        per = p.criterion.per_scenario(m, p.theta_est, threshold=False)
        return aggregate(per, p.aggregate, p.criterion.maximise)

    def value(self, chosen: np.ndarray) -> float:
        """Criterion of a candidate set (its worst single loss when robust)."""
        losses = self._losses(chosen) if self.robust else []
        if not losses:
            return float(self.values(self.matrix(chosen)))
        vals = self.values(np.stack(losses))
        return float(vals.min() if self.problem.criterion.maximise else vals.max())

    def candidate_values(self, chosen: np.ndarray) -> np.ndarray:
        """Value of ``chosen`` plus each candidate c, ``(C,)``; worst single loss when robust.

        Losing the added candidate leaves ``chosen``; losing any other probe j is
        M − A_j + A_c, tried for every c at once by :meth:`add_values`.
        """
        if not self.robust:
            return self.add_values(self.matrix(chosen))
        worse = np.minimum if self.problem.criterion.maximise else np.maximum
        out = np.full(self.info.shape[1], float(self.values(self.matrix(chosen))))
        for m in self._losses(chosen):
            out = worse(out, self.add_values(m))
        return out

    def add_values(self, m: np.ndarray) -> np.ndarray:
        """Criterion of M_s + A_sc for every candidate c: ``(S, p, p)`` → ``(C,)``.

        For ``d``: log det(M + Rᵀ R) = log det M + log det(I + R M⁻¹ Rᵀ) (matrix determinant
        lemma). For the error criteria: the diagonal of (M + Rᵀ R)⁻¹ by Woodbury. The
        candidates are swept in chunks of :func:`candidate_chunks`: one stacked matrix product
        over the scenarios per chunk, and working memory bounded by :data:`WORK_BYTES`.
        """
        p = self.problem
        minv_t = np.swapaxes(np.linalg.inv(m), -1, -2)  # (S, p, p)
        ld0 = np.linalg.slogdet(m)[1][:, None] if p.criterion.name == "d" else None
        out = np.empty(self.rows.shape[1])
        for sl in candidate_chunks(self.rows):
            out[sl] = self._add_chunk(self.rows[:, sl], minv_t, ld0)
        return out

    def _add_chunk(self, rows: np.ndarray, minv_t: np.ndarray, ld0) -> np.ndarray:
        """:meth:`add_values` of the candidates of ``rows (S, c, a, p)``, ``(c,)``."""
        p = self.problem
        u, small = _quadratic(rows, minv_t)
        small += np.eye(rows.shape[2])
        if ld0 is not None:
            return self._d_values(ld0, small)
        n_s, n_c = rows.shape[:2]
        minv = np.swapaxes(minv_t, -1, -2)
        k = np.linalg.inv(small)  # (S, c, a, a)
        var = np.zeros((n_s, n_c))
        for i in p.criterion.error_indices:
            ui = u[:, :, :, i]  # (S, c, a)
            var += minv[:, i, i][:, None] - np.einsum("sca,scab,scb->sc", ui, k, ui)
        per = p.criterion.error_from_variance(var, p.theta_est)
        return aggregate(per.T, p.aggregate, p.criterion.maximise)

    def _d_values(self, ld0: np.ndarray, small: np.ndarray) -> np.ndarray:
        """Aggregated ld0_s + log det(small_sc): ``(S, 1)``, ``(S, c, a, a)`` → ``(c,)``."""
        p = self.problem
        if small.shape[-1] == 1:  # the 1 × 1 determinant is the number itself
            val = small[:, :, 0, 0]
            with np.errstate(divide="ignore", invalid="ignore"):
                per = np.where(val > 0, ld0 + np.log(np.where(val > 0, val, 1.0)), -np.inf)
        else:
            sign_c, ld = np.linalg.slogdet(small)
            per = np.where(sign_c > 0, ld0 + ld, -np.inf)  # (S, c)
        return aggregate(per.T, p.aggregate, p.criterion.maximise)

    def removal_values(self, chosen: np.ndarray, i: int) -> np.ndarray:
        """:meth:`candidate_values` of ``chosen`` without its i-th probe, ``(C,)``: the
        exchange's sweep.

        For ``d`` (not robust) by a rank-a downdate of the full set's quadratic forms
        Q_c = R_c M⁻¹ R_cᵀ, kept while ``chosen`` is unchanged (Sherman–Morrison–Woodbury):
        with M' = M − R_iᵀ R_i, R_c M'⁻¹ R_cᵀ = Q_c + B_c (I − P_i)⁻¹ B_cᵀ, B_c = R_c M⁻¹
        R_iᵀ, P_i = R_i M⁻¹ R_iᵀ: one matrix–vector product per scenario instead of a
        matrix product, p/a times fewer flops. Where I − P_i is ill-conditioned (probe i
        carries almost all of some direction) the sweep is recomputed from M' directly.
        """
        rest = np.delete(chosen, i)
        if self.robust or self.problem.criterion.name != "d":
            return self.candidate_values(rest)
        key = chosen.tobytes()
        if self._full is None or self._full[0] != key:
            m = self.matrix(chosen)
            minv_t = np.swapaxes(np.linalg.inv(m), -1, -2)
            q = np.empty((*self.rows.shape[:2], self.rows.shape[2], self.rows.shape[2]))
            for sl in candidate_chunks(self.rows):
                q[:, sl] = _quadratic(self.rows[:, sl], minv_t)[1]
            self._full = (key, minv_t, q)
        _, minv_t, q = self._full
        r_i = self.rows[:, chosen[i]]  # (S, a, p)
        h = np.matmul(minv_t, np.swapaxes(r_i, -1, -2))  # M⁻¹ R_iᵀ (M⁻¹ symmetric), (S, p, a)
        keep = np.eye(r_i.shape[1]) - np.matmul(r_i, h)  # I − P_i, (S, a, a)
        if np.min(np.linalg.eigvalsh(keep)) < DOWNDATE_MIN:
            return self.candidate_values(rest)
        k = np.linalg.inv(keep)
        m_rest = self.matrix(rest)
        ld0 = np.linalg.slogdet(m_rest)[1][:, None]
        n_s, n_c, n_a, n_p = self.rows.shape
        out = np.empty(n_c)
        for sl in candidate_chunks(self.rows):
            b = np.matmul(self.rows[:, sl].reshape(n_s, -1, n_p), h).reshape(n_s, -1, n_a, n_a)
            small = q[:, sl] + np.matmul(np.matmul(b, k[:, None]), np.swapaxes(b, -1, -2))
            small += np.eye(n_a)
            out[sl] = self._d_values(ld0, small)
        return out


def _quadratic(rows: np.ndarray, minv_t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """u = R M⁻¹ ``(S, c, a, p)`` and R M⁻¹ Rᵀ ``(S, c, a, a)`` of the candidates' rows
    ``(S, c, a, p)``, with ``minv_t (S, p, p)`` the transposed M⁻¹: one (c·a, p) × (p, p)
    product per scenario."""
    n_s, n_c, n_a, n_p = rows.shape
    u = np.matmul(rows.reshape(n_s, n_c * n_a, n_p), minv_t).reshape(rows.shape)
    if n_a == 1:  # a row-wise dot product, far cheaper than the general contraction
        small = np.einsum("sip,sip->si", u[:, :, 0], rows[:, :, 0])[:, :, None, None]
    else:
        small = np.einsum("scap,scbp->scab", rows, u)
    return u, small


#: Smallest eigenvalue of I − R_i M⁻¹ R_iᵀ for which the exchange downdates a sweep; below it
#: the downdate would lose too many digits and the sweep is recomputed from its matrix.
DOWNDATE_MIN = 1e-6


#: Bytes of working arrays per chunk of candidates in the grid sweeps and the relaxation: the
#: memory a search needs beyond the candidates' rows themselves (the data, S·C·a·p·8 bytes) is
#: bounded by a few times this, whatever the grid (a chunk of a few MB also stays in cache
#: between the two products of a sweep).
WORK_BYTES = 1 << 22


def candidate_chunks(rows: np.ndarray) -> Iterator[slice]:
    """Slices of the candidate axis of ``rows (S, C, a, p)``, each about :data:`WORK_BYTES`."""
    n_s, n_c, n_a, n_p = rows.shape
    step = max(1, WORK_BYTES // max(n_s * n_a * max(n_p, 1) * 8, 1))
    for start in range(0, n_c, step):
        yield slice(start, min(start + step, n_c))


def _spacing_mask(positions: np.ndarray, fixed: np.ndarray, min_spacing: float) -> np.ndarray:
    """(C,) bool: candidates at least ``min_spacing`` from every fixed point ``(k, 3)``.

    A k-d tree of the fixed points finds the few candidates near any of them; the exact test
    (squared distance ≥ spacing² (1 − 1e-12)) is then applied to those only.
    """
    out = np.ones(positions.shape[0], dtype=bool)
    if min_spacing <= 0 or fixed.shape[0] == 0:
        return out
    from scipy.spatial import cKDTree

    near = cKDTree(fixed).query_ball_point(positions, min_spacing, return_length=True) > 0
    idx = np.flatnonzero(near)
    d2 = np.sum((positions[idx, None, :] - fixed[None, :, :]) ** 2, axis=-1)
    out[idx] = np.all(d2 >= min_spacing**2 * (1 - 1e-12), axis=1)
    return out


def _best(values: np.ndarray, allowed: np.ndarray, maximise: bool) -> int:
    """Index of the best allowed value (first on ties: determinism), −1 if none is allowed."""
    idx = np.flatnonzero(allowed)
    if idx.size == 0:
        return -1
    v = values[idx] if maximise else -values[idx]
    return int(idx[np.argmax(np.where(np.isnan(v), -np.inf, v))])


def greedy_steps(
    obj: GridObjective,
    count: int,
    positions: np.ndarray,
    min_spacing: float,
    installed_m: np.ndarray,
    start: np.ndarray | None = None,
) -> Iterator[np.ndarray]:
    """Greedy selection, one pick a step: yields the chosen candidates ``(k,) int`` (first
    ``start``, then after each pick), until ``k = count``.

    ``start`` (k,) int: candidates already chosen (kept, counted in ``count``).

    Raises
    ------
    InputError
        When the grid cannot hold ``count`` probes ``min_spacing`` apart.
    """
    chosen = list(start) if start is not None else []
    maximise = obj.problem.criterion.maximise
    yield np.array(chosen, dtype=int)
    while len(chosen) < count:
        fixed = np.concatenate([installed_m, positions[chosen]])
        allowed = _spacing_mask(positions, fixed, min_spacing)
        allowed[chosen] = False
        vals = obj.candidate_values(np.array(chosen, dtype=int))
        c = _best(vals, allowed, maximise)
        if c < 0:
            raise InputError(
                f"`probes.min_spacing_m` = {min_spacing:g}: the candidate grid cannot hold "
                f"{count} probes that far apart (it placed {len(chosen)}); lower "
                "`probes.min_spacing_m`, enlarge the regions, or set a finer "
                "`design.grid_spacing_m`."
            )
        chosen.append(c)
        yield np.array(chosen, dtype=int)


def greedy(*args, stop: Callable[[], bool] | None = None, **kwargs) -> np.ndarray:
    """Greedy selection of ``count`` candidates: :func:`greedy_steps` (same parameters) run
    to the end, ``(count,) int``; or, when ``stop()`` (polled after every pick) returns True,
    the picks so far."""
    return drain(greedy_steps(*args, **kwargs), stop)


def exchange_steps(
    obj: GridObjective,
    chosen: np.ndarray,
    positions: np.ndarray,
    min_spacing: float,
    installed_m: np.ndarray,
    rtol: float = 1e-10,
) -> Iterator[np.ndarray]:
    """Fedorov exchange, one chosen probe tried a step: yields the chosen candidates
    ``(count,) int`` (first as given, then after each try, improved or not).

    Each pass tries every chosen probe; a pass without an improving swap ends the search.
    """
    chosen = chosen.copy()
    yield chosen.copy()
    maximise = obj.problem.criterion.maximise
    current = obj.value(chosen)
    improved = True
    while improved:
        improved = False
        for i in range(chosen.size):
            rest = np.delete(chosen, i)
            fixed = np.concatenate([installed_m, positions[rest]])
            allowed = _spacing_mask(positions, fixed, min_spacing)
            allowed[rest] = False
            vals = obj.removal_values(chosen, i)
            c = _best(vals, allowed, maximise)
            if c >= 0 and c != chosen[i]:
                gain = vals[c] - current if maximise else current - vals[c]
                if gain > rtol * max(1.0, abs(current)):
                    chosen[i] = c
                    current = float(vals[c])
                    improved = True
            yield chosen.copy()


def exchange(*args, stop: Callable[[], bool] | None = None, **kwargs) -> np.ndarray:
    """Fedorov exchange: :func:`exchange_steps` (same parameters) run to the end, the improved
    ``(count,) int`` indices; or, when ``stop()`` (polled after every try) returns True, the
    layout so far."""
    return drain(exchange_steps(*args, **kwargs), stop)


def drain(steps: Iterator, stop: Callable[[], bool] | None):
    """Run a generator of steps to its end, or until ``stop()`` (polled after every step)
    returns True; the last step."""
    last = None
    for last in steps:  # noqa: B007 - the loop variable is the result
        if stop is not None and stop():
            break
    return last


#: The automatic grid is never finer than this fraction of the typical distance from a
#: candidate to the nominal charges: the field changes on that scale, and a finer grid only
#: costs time (an 18 m rail 3–7 m from an electrode got 1.2 cm spacing from the count target).
GRID_FRACTION_OF_DISTANCE = 0.02


def _candidates(problem: Problem, spacing_m: float | None, target: int):
    """The candidate grid: the config's spacing, or about ``target`` points but no finer than
    :data:`GRID_FRACTION_OF_DISTANCE` of the median candidate–charge distance."""
    site = problem.site
    cand = site.candidate_grid(spacing_m, target=target)
    if spacing_m is not None or cand.spacing_m <= 0:
        return cand
    centres = np.array([s.center_m for s in problem.scene.sources])
    dist = np.linalg.norm(cand.positions_m[:, None, :] - centres[None, :, :], axis=-1).min(axis=1)
    floor = GRID_FRACTION_OF_DISTANCE * float(np.median(dist))
    if cand.spacing_m < floor:
        cand = site.candidate_grid(floor, target=target)
    return cand


def _feasible_subset(site, layout: np.ndarray) -> np.ndarray:
    """The probes of ``layout (k, 3)`` that the mounting rules allow, kept in order, each
    also spaced from those kept before it: ``(k', 3)``."""
    keep: list[int] = []
    allowed = site.allowed(layout)
    for i in np.nonzero(allowed)[0]:
        trial = layout[keep + [int(i)]][None]
        if site.spacing_ok(trial)[0]:
            keep.append(int(i))
    return layout[keep]


def extension_steps(
    problem: Problem,
    obj: GridObjective,
    positions: np.ndarray,
    fixed_m: np.ndarray,
    fixed_gain: np.ndarray,
    count: int,
    min_spacing: float,
) -> Iterator[np.ndarray]:
    """Greedy grid additions to a fixed partial layout ``(k, 3)``: :func:`greedy_steps` of
    the ``count − k`` candidates added."""
    fixed_info = np.concatenate(
        [
            obj.fixed_info,
            problem.probe_information(fixed_m, fixed_gain)[:, obj.fixed_info.shape[1] :],
        ],
        axis=1,
    )
    ext = GridObjective(problem, obj.rows, prior=True, robust=obj.robust, fixed_info=fixed_info)
    fixed = np.concatenate([problem.installed_m, fixed_m])
    return greedy_steps(ext, count - fixed_m.shape[0], positions, min_spacing, fixed)


def _region_of(problem: Problem, layout: np.ndarray, cand) -> np.ndarray:
    """Mounting region of each probe: that of its nearest grid candidate, ``(count,) int``."""
    from scipy.spatial import cKDTree

    _, idx = cKDTree(cand.positions_m).query(layout)
    return cand.region_index[idx]
