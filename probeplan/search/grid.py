"""Layouts on the candidate grid: the grid objective with rank-a updates, greedy, exchange.

The two grid stages of the search are generators of their steps (:func:`greedy_steps`,
:func:`exchange_steps`), so that the search polls its stop request between any two steps;
:func:`greedy` and :func:`exchange` run them to the end.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Iterator

import numpy as np

from ..errors import InputError
from ..fisher import aggregate
from ..problem import Problem
from .forms import Forms, addition_terms, pick, quadratic, removal_terms

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
        # The quadratic forms Q_c = R_c M⁻¹ R_cᵀ of the last set swept, kept so that the
        # exchange's tries and swaps are rank-a updates of them (see forms.Forms).
        self._forms: Forms | None = None

    def subset(self, idx: np.ndarray) -> GridObjective:
        """The same objective (prior, fixed probes, rule) on the candidates ``idx (n,) int``
        only: a thinned grid of :func:`_levels`."""
        sub = GridObjective(
            self.problem,
            # (np.take: C-ordered; `rows[:, idx]` lays the copy out candidate-major behind a
            # transposed view, which every compiled sweep then copied again: 92 MB a sweep on
            # the regional site's 10,000-candidate level, 17 s of its 70 s plan)
            np.take(self.rows, idx, axis=1),
            prior=False,
            robust=self.robust,
            fixed_info=self.fixed_info,
        )
        sub.base = self.base
        return sub

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
        n_s, _, _, n_p = self.rows.shape
        r = self.rows[:, chosen].reshape(n_s, -1, n_p)  # (S, k·a, p)
        return self.base + np.matmul(np.swapaxes(r, -1, -2), r)

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
        u, small = quadratic(rows, minv_t)
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

    @property
    def _fast_d(self) -> bool:
        """The D-criterion without the robust rule: sweeps by the quadratic forms of
        :mod:`~probeplan.search.forms`, their rank-a updates and pruned picks."""
        return not self.robust and self.problem.criterion.name == "d"

    def _forms_of(self, chosen: np.ndarray) -> Forms:
        """The forms of ``chosen``: the cached ones (the exchange's :meth:`accept` keeps
        them one swap ahead) or a sweep of the rows from M⁻¹.

        The greedy sweeps from M⁻¹ at every pick: early on M is the tiny prior in most
        directions, and updates of forms as large as 1/prior lose every digit.
        """
        f = self._forms
        if f is None or f.key != chosen.tobytes():
            f = self._forms = Forms.of(self.rows, chosen, self.matrix(chosen), candidate_chunks)
        return f

    def best_addition(self, chosen: np.ndarray, allowed: np.ndarray) -> tuple[int, float]:
        """The allowed candidate whose addition to ``chosen (k,) int`` is best, and the
        value then: ``(c, value)``, ``c = -1`` when none is allowed. The greedy's step: the
        same choice as :meth:`candidate_values` followed by :func:`_best` (first on ties)."""
        if not self._fast_d:
            return self._best_of(self.candidate_values(chosen), allowed)
        f = self._forms_of(chosen)
        return pick(*addition_terms(f), allowed, self.problem.aggregate)

    def _best_of(self, vals: np.ndarray, allowed: np.ndarray) -> tuple[int, float]:
        c = _best(vals, allowed, self.problem.criterion.maximise)
        return c, float(vals[c]) if c >= 0 else float("nan")

    def removal_values(self, chosen: np.ndarray, i: int) -> np.ndarray:
        """:meth:`candidate_values` of ``chosen`` without its i-th probe, ``(C,)``: the
        exchange's sweep made whole (see :meth:`best_removal`)."""
        got = self._removal(chosen, i)
        if got is None:
            return self.candidate_values(np.delete(chosen, i))
        ld, _, terms = got
        out = np.empty(self.rows.shape[1])
        for sl in candidate_chunks(self.rows):
            per = ld[:, None] + terms(np.arange(sl.start, sl.stop))
            out[sl] = aggregate(per.T, self.problem.aggregate, True)
        return out

    def best_removal(self, chosen: np.ndarray, i: int, allowed: np.ndarray) -> tuple[int, float]:
        """The best allowed replacement of the i-th probe of ``chosen``: ``(c, value)`` of
        ``chosen`` without it plus c (``c = -1`` when none is allowed). The exchange's try;
        the same choice as :meth:`removal_values` followed by :func:`_best`."""
        got = self._removal(chosen, i)
        if got is None:
            return self._best_of(self.candidate_values(np.delete(chosen, i)), allowed)
        c, value = pick(*got, allowed, self.problem.aggregate)
        if c < 0 or self._forms.updates == 0:
            return c, value
        # Forms carried through swaps: the winner's value is checked against its matrix,
        # and on a mismatch (round-off grown too far) the try is made again afresh.
        new = chosen.copy()
        new[i] = c
        exact = self.value(new)
        if abs(exact - value) <= FORMS_RTOL * max(1.0, abs(exact)):
            return c, exact
        self._forms = Forms.of(self.rows, chosen, self.matrix(chosen), candidate_chunks)
        return self.best_removal(chosen, i, allowed)

    def best_near(self, chosen: np.ndarray, i: int, idx: np.ndarray) -> tuple[int, float]:
        """The best of candidates ``idx (n,) int`` (sorted) in place of the i-th probe of
        ``chosen``, valued from the matrix without it: ``(c, value)``, first on ties,
        ``(-1, nan)`` for none. The exchange's local try (not robust)."""
        if idx.size == 0:
            return -1, float("nan")
        m = self.matrix(np.delete(chosen, i))
        minv_t = np.swapaxes(np.linalg.inv(m), -1, -2)
        ld0 = np.linalg.slogdet(m)[1][:, None] if self.problem.criterion.name == "d" else None
        k, value = self._best_of(self._add_chunk(self.rows[:, idx], minv_t, ld0), idx >= 0)
        return int(idx[k]), value

    def _removal(self, chosen: np.ndarray, i: int):
        """:func:`~probeplan.search.forms.removal_terms` of the i-th probe of ``chosen``
        (Sherman–Morrison–Woodbury downdate of the set's forms: one matrix–vector product
        per scenario and candidate, p/a times fewer flops than a sweep from M⁻¹). None when
        not ``d`` (or robust), or where I − Q_i is ill-conditioned (probe i carries almost
        all of some direction): then the sweep is made from the matrix without it."""
        if not self._fast_d:
            return None
        full = self._forms_of(chosen)
        keep = np.eye(full.q.shape[-1]) - full.q[:, chosen[i]]
        if np.min(np.linalg.eigvalsh(keep)) < DOWNDATE_MIN:
            return None
        return removal_terms(full, self.rows, int(chosen[i]), self.matrix(np.delete(chosen, i)))

    def accept(self, chosen: np.ndarray, i: int, c: int) -> None:
        """Tell the objective that the exchange puts candidate ``c`` in place of the i-th
        probe of ``chosen``: the set's forms are then updated by the swap (one pass over the
        rows) instead of swept again from M⁻¹, up to :data:`FORMS_REFRESH` times."""
        f = self._forms
        if not self._fast_d or f is None or f.key != chosen.tobytes():
            return
        new = chosen.copy()
        new[i] = c
        keep = np.eye(f.q.shape[-1]) - f.q[:, chosen[i]]
        if f.updates >= FORMS_REFRESH or np.min(np.linalg.eigvalsh(keep)) < SWAP_MIN:
            # Round-off grown, or a probe that carried almost all of some direction: the
            # update would amplify it by 1/(1 − Q_i); the next sweep starts afresh.
            self._forms = None
            return
        m_rest = self.matrix(np.delete(chosen, i))
        self._forms = f.swapped(
            self.rows, new, m_rest, self.matrix(new), int(chosen[i]), c, candidate_chunks
        )


#: Rank-one updates of the forms before they are swept from the rows again (round-off).
FORMS_REFRESH = 32
#: Smallest eigenvalue of I − Q_i for which a swap updates the forms instead of a fresh
#: sweep (measured: at 2.4e-6 an update lost four digits of the forms).
SWAP_MIN = 1e-3
#: Largest relative difference between a winner's value from updated forms and from its
#: matrix before the forms are swept afresh.
FORMS_RTOL = 1e-9


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
    (:func:`_too_close`) is then applied to those only.
    """
    out = np.ones(positions.shape[0], dtype=bool)
    if min_spacing <= 0 or fixed.shape[0] == 0:
        return out
    from scipy.spatial import cKDTree

    near = cKDTree(fixed).query_ball_point(positions, min_spacing, return_length=True) > 0
    idx = np.flatnonzero(near)
    d2 = np.sum((positions[idx, None, :] - fixed[None, :, :]) ** 2, axis=-1)
    out[idx] = ~np.any(_too_close(d2, min_spacing), axis=1)
    return out


def _too_close(d2: np.ndarray, min_spacing: float) -> np.ndarray:
    """The spacing rule's exact test of squared distances ``d2`` (m²): below spacing² with a
    margin far above round-off and far below any grid spacing."""
    return d2 < min_spacing**2 * (1 - 1e-12)


def _best(values: np.ndarray, allowed: np.ndarray, maximise: bool) -> int:
    """Index of the best allowed value (first on ties: determinism), −1 if none is allowed."""
    idx = np.flatnonzero(allowed)
    if idx.size == 0:
        return -1
    v = values[idx] if maximise else -values[idx]
    return int(idx[np.argmax(np.where(np.isnan(v), -np.inf, v))])


class SpacingCounts:
    """How many fixed points (installed or chosen probes) are closer than the spacing to each
    candidate, kept up to date as points come and go: the allowed candidates of a greedy pick
    or an exchange try without a search of the whole grid each time.

    Parameters
    ----------
    positions_m : (n_candidates, 3) float
    min_spacing_m : float
        0: no rule (every candidate allowed).
    fixed_m : (k, 3) float
        Points present from the start.
    """

    def __init__(self, positions_m: np.ndarray, min_spacing_m: float, fixed_m: np.ndarray):
        self.positions_m = positions_m
        self.min_spacing_m = min_spacing_m
        self.count = np.zeros(positions_m.shape[0], dtype=np.int64)
        self._tree = None
        if min_spacing_m > 0:
            from scipy.spatial import cKDTree

            self._tree = cKDTree(positions_m)
            for point in np.asarray(fixed_m, dtype=float).reshape(-1, 3):
                self.add(point)

    def near(self, point_m: np.ndarray) -> np.ndarray:
        """Candidates closer than the spacing to ``point_m (3,)``, ``(n,) int``
        (:func:`_too_close`)."""
        if self._tree is None:
            return np.zeros(0, dtype=np.int64)
        idx = np.asarray(self._tree.query_ball_point(point_m, self.min_spacing_m), dtype=np.int64)
        d2 = np.sum((self.positions_m[idx] - point_m) ** 2, axis=-1)
        return idx[_too_close(d2, self.min_spacing_m)]

    def add(self, point_m: np.ndarray, sign: int = 1) -> None:
        """Count (``sign`` 1) or uncount (−1) a fixed point ``(3,)``."""
        self.count[self.near(point_m)] += sign

    def allowed(self, without_m: np.ndarray | None = None) -> np.ndarray:
        """``(C,) bool``: candidates spaced from every counted point, less ``without_m (3,)``
        (one of them, which the caller is about to move)."""
        if without_m is None:
            return self.count == 0
        count = self.count.copy()
        count[self.near(without_m)] -= 1
        return count == 0


#: Candidates above which the greedy and the exchange start on thinned grids (:func:`_levels`).
MULTILEVEL_MIN = 6_000
#: Candidates at most on the coarsest thinned grid.
COARSE_MAX = 3_000


def _levels(positions: np.ndarray) -> list[np.ndarray]:
    """Nested thinnings of the candidates, coarsest first, the last one all of them:
    ``[(n_0,) int, …, (C,) int]``, each sorted.

    Each level keeps the first candidate of every cell of a cubic lattice twice as coarse as
    the one before (the first: twice the median distance between neighbours), until at most
    :data:`COARSE_MAX` are left; a grid of at most :data:`MULTILEVEL_MIN` is not thinned. A
    search that starts coarse and is refined level by level lands where a search of the whole
    grid would, at a fraction of the sweeps: the many passes of an exchange from a greedy
    start are made on the small grids, and the whole grid only polishes.
    """
    n = positions.shape[0]
    levels = [np.arange(n)]
    if n <= MULTILEVEL_MIN:
        return levels
    key = (positions.tobytes(), MULTILEVEL_MIN, COARSE_MAX)
    if _LEVELS[0] == key:  # the greedy, the exchange and every restart ask for the same grid
        return _LEVELS[1]
    from scipy.spatial import cKDTree

    step = float(np.median(cKDTree(positions).query(positions, k=2)[0][:, 1]))
    idx, cell = levels[0], 2.0 * step
    while step > 0 and idx.size > COARSE_MAX:
        keys = np.floor(positions[idx] / cell).astype(np.int64)
        sub = idx[np.sort(np.unique(keys, axis=0, return_index=True)[1])]
        if sub.size > 0.9 * idx.size:  # scattered candidates: no lattice to thin
            break
        levels.insert(0, sub)
        idx, cell = sub, 2.0 * cell
    _LEVELS[:] = [key, levels]
    return levels


#: The last grid :func:`_levels` thinned (its positions' bytes and the two limits) and its
#: levels.
_LEVELS: list = [None, None]


def greedy_steps(
    obj: GridObjective,
    count: int,
    positions: np.ndarray,
    min_spacing: float,
    installed_m: np.ndarray,
    start: np.ndarray | None = None,
    choose: Callable[[GridObjective, np.ndarray, np.ndarray], int] | None = None,
) -> Iterator[np.ndarray]:
    """Greedy selection, one pick a step: yields the chosen candidates ``(k,) int`` (first
    ``start``, then after each pick), until ``k = count``. On a large grid without a
    ``start`` the picks are made on its coarsest thinning (:func:`_levels`); the exchange
    refines them on every finer one.

    ``start`` (k,) int: candidates already chosen (kept, counted in ``count``).
    ``choose(obj, chosen, allowed)``: the pick among the ``allowed (C,) bool`` candidates of
    ``obj`` (−1 for none); default the best one (:meth:`GridObjective.best_addition`).

    Raises
    ------
    InputError
        When the grid cannot hold ``count`` probes ``min_spacing`` apart.
    """
    choose = _best_addition if choose is None else choose
    sub = _levels(positions)[0]
    if start is not None or sub.size == positions.shape[0]:
        yield from _greedy_on(obj, count, positions, min_spacing, installed_m, start, choose)
        return
    coarse = obj.subset(sub)
    picks = _greedy_on(coarse, count, positions[sub], min_spacing, installed_m, None, choose)
    for chosen in picks:
        yield sub[chosen]


def _best_addition(obj: GridObjective, chosen: np.ndarray, allowed: np.ndarray) -> int:
    return obj.best_addition(chosen, allowed)[0]


def _greedy_on(obj, count, positions, min_spacing, installed_m, start, choose):
    """:func:`greedy_steps` on the candidates of ``obj`` as they are."""
    chosen = list(start) if start is not None else []
    spaced = SpacingCounts(positions, min_spacing, np.concatenate([installed_m, positions[chosen]]))
    yield np.array(chosen, dtype=int)
    while len(chosen) < count:
        allowed = spaced.allowed()
        allowed[chosen] = False
        c = choose(obj, np.array(chosen, dtype=int), allowed)
        if c < 0:
            raise InputError(
                f"`probes.min_spacing_m` = {min_spacing:g}: the candidate grid cannot hold "
                f"{count} probes that far apart (it placed {len(chosen)}); lower "
                "`probes.min_spacing_m`, enlarge the regions, or set a finer "
                "`design.grid_spacing_m`."
            )
        chosen.append(c)
        spaced.add(positions[c])
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

    Each pass tries every chosen probe; a pass without an improving swap ends the search. On
    a large grid the exchange runs on each of its thinnings (:func:`_levels`) that holds the
    layout, coarsest first, and ends on the whole grid: the result is a layout no single
    swap on the whole grid improves.
    """
    yield chosen.copy()
    levels = _levels(positions)
    near = NEAR_CANDIDATES if len(levels) > 1 else 0
    for sub in levels:
        if sub.size == positions.shape[0]:
            tries = _exchange_on(obj, chosen, positions, min_spacing, installed_m, rtol, near)
            yield from itertools.islice(tries, 1, None)
            return
        local = np.searchsorted(sub, chosen)
        if np.any(local >= sub.size) or np.any(sub[np.minimum(local, sub.size - 1)] != chosen):
            continue  # the layout is not on this thinning
        part = obj.subset(sub)
        for got in itertools.islice(
            _exchange_on(part, local, positions[sub], min_spacing, installed_m, rtol, near),
            1,
            None,
        ):
            chosen = sub[got]
            yield chosen


#: Nearest candidates of a probe tried by the exchange's local sweeps on thinned grids.
NEAR_CANDIDATES = 48


class _Swaps:
    """The exchange's layout with its value and spacing counts, and the rule that takes a
    swap: it must gain more than ``rtol`` (relative) on the current value."""

    def __init__(self, obj, chosen, positions, min_spacing, installed_m, rtol) -> None:
        self.obj, self.chosen, self.positions, self.rtol = obj, chosen.copy(), positions, rtol
        self.current = obj.value(self.chosen)
        fixed = np.concatenate([installed_m, positions[self.chosen]])
        self.spaced = SpacingCounts(positions, min_spacing, fixed)

    def allowed(self, i: int) -> np.ndarray:
        """``(C,) bool``: where the i-th probe may go (itself included)."""
        allowed = self.spaced.allowed(without_m=self.positions[self.chosen[i]])
        allowed[np.delete(self.chosen, i)] = False
        return allowed

    def offer(self, i: int, c: int, value: float, tell: bool) -> bool:
        """Take candidate ``c`` (of value ``value``) in place of the i-th probe if it gains
        enough; ``tell``: let the objective update its forms by the swap."""
        if c < 0 or c == self.chosen[i]:
            return False
        maximise = self.obj.problem.criterion.maximise
        gain = value - self.current if maximise else self.current - value
        if not gain > self.rtol * max(1.0, abs(self.current)):
            return False
        if tell:
            self.obj.accept(self.chosen, i, c)
        self.spaced.add(self.positions[self.chosen[i]], -1)
        self.spaced.add(self.positions[c])
        self.chosen[i] = c
        self.current = value
        return True


def _exchange_on(obj, chosen, positions, min_spacing, installed_m, rtol, near=0):
    """:func:`exchange_steps` on the candidates of ``obj`` as they are.

    ``near`` > 0: before each pass over the whole grid, local sweeps try only the ``near``
    candidates nearest each probe (valued from the matrix without it: no sweep of the grid)
    until none improves. On a fine grid most swaps move a probe a cell or two; made locally
    they cost nothing, and the passes over the whole grid, which still decide when the
    search ends, are few.
    """
    swaps = _Swaps(obj, chosen, positions, min_spacing, installed_m, rtol)
    yield swaps.chosen.copy()
    tree = None
    if near > 0 and not obj.robust:
        from scipy.spatial import cKDTree

        tree = cKDTree(positions)
    improved = True
    while improved:
        improved = False
        moved = tree is not None
        while moved:
            moved = False
            for i in range(swaps.chosen.size):
                allowed = swaps.allowed(i)
                _, nb = tree.query(positions[swaps.chosen[i]], k=min(near, positions.shape[0]))
                nb = np.sort(nb[allowed[nb]])
                c, value = obj.best_near(swaps.chosen, i, nb)
                moved |= swaps.offer(i, c, value, tell=False)
                yield swaps.chosen.copy()
        for i in range(swaps.chosen.size):
            c, value = obj.best_removal(swaps.chosen, i, swaps.allowed(i))
            improved |= swaps.offer(i, c, value, tell=True)
            yield swaps.chosen.copy()


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
