"""The layout search: greedy and exchange on a candidate grid, a certified bound, refinement.

Stages of :func:`plan`:

1. **Candidate grid** over the mounting regions, keep-outs removed (``Site.candidate_grid``),
   and the Fisher information each candidate adds in every scenario, A_sc, computed once.
2. **Greedy** selection: add the candidate that improves the criterion most, one probe at a
   time, with a tiny prior so that log det is finite from the first pick. For ``d`` log det is
   submodular and the greedy set reaches at least (1 − 1/e) of the best gain (Nemhauser, Wolsey
   & Fisher 1978; for sensor selection: Shamaiah, Banerjee & Vikalo 2010; Krause, Singh &
   Guestrin 2008).
3. **Fedorov exchange**: swap a chosen probe for a candidate while any swap helps (Fedorov,
   Theory of Optimal Experiments, 1972). Each probe's removal is a downdate of M; every
   candidate is tried at once through the matrix determinant lemma / Woodbury identity on its
   rank-a information (a = axes per meter), so no determinant is recomputed from scratch.
4. **Convex relaxation bound** for ``d`` with the ``mean`` aggregate (Joshi & Boyd, "Sensor
   Selection via Convex Optimization", IEEE TSP 57(2), 2009): weights w ∈ [0, 1]^C with
   Σ w = count, f(w) = mean_s log det(J0_s + Σ_c w_c A_sc) is concave. Projected gradient ascent
   finds a good w; the Frank–Wolfe duality gap max_v ∇f(w)·(v − w) certifies
   f* ≤ f(w) + gap, so the stored bound is valid however early the solver stops.
5. **Bayesian refinement** (scikit-optimize ``Optimizer``, ask/tell) moves one probe at a time
   in the continuous coordinates of its mounting region, the others fixed — a 1–2-dimensional
   problem, the size at which a Gaussian-process optimiser converges in tens of calls. It
   keeps a move only if it improves the criterion; the summary reports what it added.
6. **Baselines**: a regular hand-drawn layout and the best of N random layouts, scored alike.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from .errors import InputError
from .fisher import aggregate, d_ratio
from .problem import Problem
from .resulttypes import Baseline, Score, SearchInfo

#: Prior information, as a fraction of the mean diagonal of one candidate's information,
#: that keeps log det finite while the greedy set is still too small to resolve everything.
PRIOR_FRACTION = 1e-8

#: Stop the relaxation when its certified gap is below this (in log det units, per parameter).
BOUND_GAP_PER_PARAM = 2e-3

#: Half-width of each probe's refinement box, in candidate-grid spacings.
REFINE_RADIUS_CELLS = 1.5

#: Objective evaluations per Bayesian step: asked and told in small batches (constant liar).
BO_BATCH = 4


@dataclass(frozen=True, eq=False)
class PlanOutcome:
    """The outcome of :func:`plan`.

    Attributes
    ----------
    positions_m : (count, 3) float
        The new probes (installed ones are not repeated here).
    gain : (count,) float
    score : Score
        Score of the planned layout, installed probes first.
    info : SearchInfo
    complete : bool
        False when ``stop()`` ended the search early (the layout is the best found so far).
    """

    positions_m: np.ndarray
    gain: np.ndarray
    score: Score
    info: SearchInfo
    complete: bool


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
        self.info = np.einsum("scap,scaq->scpq", rows, rows)  # (S, C, p, p)
        # Information of probes that every layout has and that may fail: (S, k, p, p).
        if fixed_info is None:
            fixed_info = problem.probe_information(np.zeros((0, 3)))
        self.fixed_info = fixed_info
        base = fixed_info.sum(axis=1)
        if prior:
            diag = np.diagonal(self.info, axis1=-2, axis2=-1).mean(axis=1)  # (S, p)
            scale = np.where(diag > 0, diag, 1.0) * PRIOR_FRACTION
            base = base + scale[:, :, None] * np.eye(problem.n_params)
        self.base = base
        self.robust = robust

    def matrix(self, chosen: np.ndarray) -> np.ndarray:
        """M_s of a candidate set: ``(k,) int`` → ``(n_scenarios, p, p)``."""
        return self.base + self.info[:, chosen].sum(axis=1)

    def _losses(self, chosen: np.ndarray) -> list[np.ndarray]:
        """M_s of the set with each one probe (fixed or chosen) lost."""
        m = self.matrix(chosen)
        out = [m - self.fixed_info[:, k] for k in range(self.fixed_info.shape[1])]
        out += [m - self.info[:, c] for c in chosen]
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
        lemma). For the error criteria: the diagonal of (M + Rᵀ R)⁻¹ by Woodbury.
        """
        p = self.problem
        minv = np.linalg.inv(m)  # (S, p, p)
        u = np.einsum("spq,scaq->scpa", minv, self.rows)  # M⁻¹ Rᵀ
        small = np.eye(self.rows.shape[2]) + np.einsum("scap,scpb->scab", self.rows, u)
        if p.criterion.name == "d":
            sign, ld0 = np.linalg.slogdet(m)
            sign_c, ld = np.linalg.slogdet(small)
            per = np.where(sign_c > 0, ld0[:, None] + ld, -np.inf)  # (S, C)
        else:
            k = np.linalg.inv(small)  # (S, C, a, a)
            var = np.zeros(u.shape[:2])
            for i in p.criterion.error_indices:
                ui = u[:, :, i, :]  # (S, C, a)
                var += minv[:, i, i][:, None] - np.einsum("sca,scab,scb->sc", ui, k, ui)
            per = p.criterion.error_from_variance(var, p.theta_est)
        return aggregate(per.T, p.aggregate, p.criterion.maximise)


def _spacing_mask(positions: np.ndarray, fixed: np.ndarray, min_spacing: float) -> np.ndarray:
    """(C,) bool: candidates at least ``min_spacing`` from every fixed point ``(k, 3)``."""
    if min_spacing <= 0 or fixed.shape[0] == 0:
        return np.ones(positions.shape[0], dtype=bool)
    d2 = np.sum((positions[:, None, :] - fixed[None, :, :]) ** 2, axis=-1)
    return np.all(d2 >= min_spacing**2 * (1 - 1e-12), axis=1)


def _best(values: np.ndarray, allowed: np.ndarray, maximise: bool) -> int:
    """Index of the best allowed value (first on ties: determinism), −1 if none is allowed."""
    idx = np.flatnonzero(allowed)
    if idx.size == 0:
        return -1
    v = values[idx] if maximise else -values[idx]
    return int(idx[np.argmax(np.where(np.isnan(v), -np.inf, v))])


def greedy(
    obj: GridObjective,
    count: int,
    positions: np.ndarray,
    min_spacing: float,
    installed_m: np.ndarray,
    start: np.ndarray | None = None,
) -> np.ndarray:
    """Greedy selection of ``count`` candidates (indices ``(count,) int``).

    ``start`` (k,) int: candidates already chosen (kept, counted in ``count``).
    """
    chosen = list(start) if start is not None else []
    maximise = obj.problem.criterion.maximise
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
    return np.array(chosen, dtype=int)


def exchange(
    obj: GridObjective,
    chosen: np.ndarray,
    positions: np.ndarray,
    min_spacing: float,
    installed_m: np.ndarray,
    stop: Callable[[], bool] | None = None,
    on_swap: Callable[[float], None] | None = None,
    rtol: float = 1e-10,
) -> np.ndarray:
    """Fedorov exchange: swap chosen candidates while a swap improves the criterion.

    Returns the improved ``(count,) int`` indices. Each pass tries every chosen probe; a pass
    without an improving swap ends the search.
    """
    chosen = chosen.copy()
    maximise = obj.problem.criterion.maximise
    current = obj.value(chosen)
    improved = True
    while improved:
        improved = False
        for i in range(chosen.size):
            if stop is not None and stop():
                return chosen
            rest = np.delete(chosen, i)
            fixed = np.concatenate([installed_m, positions[rest]])
            allowed = _spacing_mask(positions, fixed, min_spacing)
            allowed[rest] = False
            vals = obj.candidate_values(rest)
            c = _best(vals, allowed, maximise)
            if c < 0 or c == chosen[i]:
                continue
            gain = vals[c] - current if maximise else current - vals[c]
            if gain > rtol * max(1.0, abs(current)):
                chosen[i] = c
                current = float(vals[c])
                improved = True
                if on_swap is not None:
                    on_swap(current)
    return chosen


# --------------------------------------------------------------------------------------------
# Convex relaxation (d, mean aggregate): a certified upper bound over the candidate grid
# --------------------------------------------------------------------------------------------


def _project_capped_simplex(y: np.ndarray, total: float) -> np.ndarray:
    """Euclidean projection of ``y (C,)`` onto {0 ≤ w ≤ 1, Σ w = total} (bisection on τ)."""
    lo, hi = y.min() - 1.0, y.max()
    for _ in range(100):
        tau = 0.5 * (lo + hi)
        s = np.clip(y - tau, 0.0, 1.0).sum()
        if s > total:
            lo = tau
        else:
            hi = tau
    return np.clip(y - 0.5 * (lo + hi), 0.0, 1.0)


@dataclass(frozen=True)
class Relaxation:
    """Result of :func:`relaxation_bound`.

    Attributes
    ----------
    bound : float
        Certified upper bound on mean_s log det J_s over all grid layouts of ``count`` probes.
    value : float
        f(w) at the final weights.
    gap : float
        Frank–Wolfe duality gap at w (bound = value + gap).
    weights : (n_candidates,) float
    iterations : int
    """

    bound: float
    value: float
    gap: float
    weights: np.ndarray
    iterations: int


def relaxation_bound(
    info: np.ndarray,
    base: np.ndarray,
    count: int,
    max_iter: int = 400,
    gap_tol: float | None = None,
) -> Relaxation:
    """Upper bound on the D-criterion (mean log det) over candidate subsets.

    Parameters
    ----------
    info : (n_scenarios, n_candidates, n_params, n_params) float
        Information of one probe at each candidate.
    base : (n_scenarios, n_params, n_params) float
        Information that every layout has (installed probes).
    count : int
        Probes to place.
    max_iter : int
        Projected-gradient iterations at most.
    gap_tol : float or None
        Stop when the duality gap is below this (default n_params × BOUND_GAP_PER_PARAM).

    Returns
    -------
    Relaxation
    """
    n_s, n_c, p, _ = info.shape
    gap_tol = p * BOUND_GAP_PER_PARAM if gap_tol is None else gap_tol

    def f_and_grad(w):
        m = base + np.einsum("c,scpq->spq", w, info)
        sign, ld = np.linalg.slogdet(m)
        if np.any(sign <= 0):
            return -np.inf, None
        minv = np.linalg.inv(m)
        grad = np.einsum("spq,scqp->c", minv, info) / n_s
        return float(ld.mean()), grad

    def fw_gap(w, grad):
        top = np.argsort(-grad, kind="stable")[:count]
        v = np.zeros(n_c)
        v[top] = 1.0
        return float(grad @ (v - w))

    w = np.full(n_c, count / n_c)
    f, g = f_and_grad(w)
    if g is None:
        # Singular with every candidate at equal weight: then Σ_c A_c is singular and so is
        # every subset's information (it is dominated by a multiple of that sum); the best any
        # grid layout can do is −inf, which is a valid (and exact) bound.
        return Relaxation(bound=-np.inf, value=-np.inf, gap=0.0, weights=w, iterations=0)
    step = 1.0 / max(np.abs(g).max(), 1e-300)
    gap = fw_gap(w, g)
    it = 0
    while it < max_iter and gap > gap_tol:
        it += 1
        # Backtracking projected gradient ascent, with the step allowed to grow again.
        while True:
            w_new = _project_capped_simplex(w + step * g, count)
            f_new, g_new = f_and_grad(w_new)
            if f_new >= f + 1e-4 * g @ (w_new - w) and np.isfinite(f_new):
                break
            step *= 0.5
            if step < 1e-300:
                break
        if g_new is None:
            break
        w, f, g = w_new, f_new, g_new
        step *= 2.0
        gap = fw_gap(w, g)
    return Relaxation(bound=f + max(gap, 0.0), value=f, gap=max(gap, 0.0), weights=w, iterations=it)


# --------------------------------------------------------------------------------------------
# Bayesian refinement in continuous mounting coordinates
# --------------------------------------------------------------------------------------------


def _trust_box(region, position: np.ndarray, radius_m: float | None) -> list[tuple[float, float]]:
    """Unit-coordinate bounds of a box of half-width ``radius_m`` around ``position``."""
    dim = region.unit_dim
    if radius_m is None or region.kind == "points":
        return [(0.0, 1.0)] * dim
    u0 = np.asarray(region.to_unit(position), dtype=float).reshape(dim)
    # Metres per unit coordinate along each axis, from two nearby mapped points.
    box = []
    for k in range(dim):
        step = np.zeros(dim)
        step[k] = 1e-3
        a = region.from_unit(np.clip(u0 - step, 0, 1)[None])[0]
        b = region.from_unit(np.clip(u0 + step, 0, 1)[None])[0]
        du = abs(np.clip(u0 + step, 0, 1)[k] - np.clip(u0 - step, 0, 1)[k])
        metres_per_unit = np.linalg.norm(b - a) / du if du > 0 else 0.0
        half = radius_m / metres_per_unit if metres_per_unit > 0 else 1.0
        lo, hi = max(0.0, u0[k] - half), min(1.0, u0[k] + half)
        box.append((float(lo), float(hi)) if hi > lo else (0.0, 1.0))
    return box


def _make_gp(dim: int):
    from skopt.learning import GaussianProcessRegressor
    from skopt.learning.gaussian_process.kernels import ConstantKernel, Matern

    # No hyper-parameter restarts: the fit runs after every told batch, and on 1–2 unit
    # coordinates one start is enough (measured: 30 calls in ~2 s instead of ~10 s).
    kernel = ConstantKernel(1.0, (1e-3, 1e3)) * Matern(
        length_scale=[0.2] * dim, length_scale_bounds=(1e-3, 10.0), nu=2.5
    )
    return GaussianProcessRegressor(
        kernel=kernel, normalize_y=True, noise="gaussian", n_restarts_optimizer=0
    )


def refine(
    problem: Problem,
    layout: np.ndarray,
    gain: np.ndarray,
    regions: np.ndarray,
    budget: int,
    rng: np.random.Generator,
    stop: Callable[[], bool] | None = None,
    record: Callable[[float], None] | None = None,
    progress: Callable[[int], None] | None = None,
    radius_m: float | None = None,
) -> tuple[np.ndarray, float, int]:
    """Move one probe at a time in its region's continuous coordinates (scikit-optimize).

    Each probe is searched in a trust box of half-width ``radius_m`` around its position (in
    its region's unit coordinates): the grid stages have already found the right
    neighbourhood, and a dozen or two Gaussian-process calls can refine a small box but not
    rediscover a whole site.

    Parameters
    ----------
    problem : Problem
    layout : (count, 3) float
        Starting positions of the new probes.
    gain : (count,) float
    regions : (count,) int
        Mounting region index of each probe (its coordinates live there).
    budget : int
        Objective evaluations to spend.
    rng : numpy Generator
    radius_m : float or None
        Half-width of each probe's search box, m (None: the whole region).

    Returns
    -------
    layout : (count, 3) float
    value : float
    used : int
        Evaluations spent.
    """
    from skopt import Optimizer

    site = problem.site
    maximise = problem.criterion.maximise
    layout = layout.copy()
    current = float(problem.objective(layout[None], gain[None])[0])
    movable = [i for i in range(layout.shape[0]) if site.regions[regions[i]].kind != "points"]
    if not movable or budget <= 0:
        return layout, current, 0
    per_probe = max(BO_BATCH * 2, budget // len(movable))
    used = 0
    order = rng.permutation(movable)
    for i in order:
        if used >= budget or (stop is not None and stop()):
            break
        region = site.regions[regions[i]]
        dim = region.unit_dim
        box = _trust_box(region, layout[i], radius_m)
        opt = Optimizer(
            box,
            base_estimator=_make_gp(dim),
            n_initial_points=min(BO_BATCH, per_probe),
            acq_optimizer="sampling",
            acq_optimizer_kwargs={"n_points": 500},
            random_state=int(rng.integers(2**31 - 1)),
        )
        n_here = min(per_probe, budget - used)
        best_pos, best_val = layout[i].copy(), current
        spent = 0
        worst_y = -np.inf
        # The incumbent position is the first point the optimiser knows (a GP needs finite y).
        if np.isfinite(current):
            u0 = np.clip(region.to_unit(layout[i]), *np.array(box).T)
            opt.tell([list(map(float, u0))], [-current if maximise else current])
        while spent < n_here:
            if stop is not None and stop():
                break
            k = min(BO_BATCH, n_here - spent)
            us = np.array(opt.ask(n_points=k), dtype=float).reshape(k, dim)
            cand = region.from_unit(us)  # (k, 3)
            trial = np.repeat(layout[None], k, axis=0)
            trial[:, i] = cand
            vals = problem.objective(trial, np.broadcast_to(gain, trial.shape[:2]))
            ok = site.allowed(cand) & site.spacing_ok(trial)
            for v, good in zip(vals, ok, strict=True):
                if record is not None and good:
                    record(float(v))  # a proposal that breaks the rules is no layout
            # Infeasible or singular points get a finite penalty just worse than anything seen
            # (the GP needs finite values).
            y = -vals if maximise else vals
            bad = ~ok | ~np.isfinite(y)
            seen = np.concatenate([y[~bad], [-current if maximise else current]])
            seen = seen[np.isfinite(seen)]
            penalty = (seen.max() + 1.0) if seen.size else 1e6
            worst_y = max(worst_y, penalty)
            y = np.where(bad, worst_y, y)
            opt.tell([list(u) for u in us], [float(v) for v in y])
            for j in np.nonzero(~bad)[0]:
                if problem.better(vals[j], best_val):
                    best_val, best_pos = float(vals[j]), cand[j].copy()
            spent += k
            used += k
            if progress is not None:
                progress(used)
        if problem.better(best_val, current):
            layout[i] = best_pos
            current = best_val
    return layout, current, used


# --------------------------------------------------------------------------------------------
# The whole plan
# --------------------------------------------------------------------------------------------


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
    """Find a layout of ``problem.count`` new probes (see the module docstring for the stages).

    Parameters
    ----------
    problem : Problem
    progress : callable(stage: str, done: int, total: int) or None
    stop : callable() -> bool or None
        Polled between steps; when it returns True the search ends with the best layout so far
        and ``complete = False``.
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
    t0 = time.perf_counter()
    cfg = problem.config
    design = cfg.design
    rng = np.random.default_rng(cfg.seed)
    site = problem.site
    count = problem.count
    maximise = problem.criterion.maximise
    evaluations = design.evaluations if evaluations is None else evaluations
    n_random = design.random_layouts if random_layouts is None else random_layouts
    hist: list[float] = [] if history is None else [float(v) for v in history]
    stopped = False

    def halted() -> bool:
        nonlocal stopped
        stopped = stopped or bool(stop is not None and stop())
        return stopped

    def tick(stage: str, done: int, total: int) -> None:
        if progress is not None:
            progress(stage, done, total)

    if count == 0:
        # Nothing to place ([probes] count = 0): the plan is the installed meters as they are.
        empty = np.zeros((0, 3))
        info = SearchInfo(np.asarray(hist, dtype=float), None, None, 0.0, 0)
        return PlanOutcome(empty, np.zeros(0), problem.score(empty, np.zeros(0)), info, True)

    tick("candidate grid", 0, 1)
    cand = _candidates(problem, design.grid_spacing_m, candidate_target)
    gains_c = problem.new_gain * cand.gain
    rows, _ = problem.rows(cand.positions_m, gains_c)
    robust = bool(design.tolerate_failures)
    obj = GridObjective(problem, rows, prior=True, robust=robust)
    tick("candidate grid", 1, 1)

    min_sp = cfg.probes.min_spacing_m
    inst = problem.installed_m

    def exact(positions: np.ndarray, gains: np.ndarray) -> float:
        return float(problem.objective(positions[None], gains[None])[0])

    stages: list[tuple[str, float]] = []
    baselines: list[Baseline] = []

    # Greedy, then exchange, on the grid.
    start = None
    if warm_start_m is not None:
        from scipy.spatial import cKDTree

        _, near = cKDTree(cand.positions_m).query(np.asarray(warm_start_m).reshape(-1, 3))
        # Keep the snapped points in order, once each, and only while they respect spacing.
        start = []
        for c in dict.fromkeys(int(i) for i in near):
            fixed = np.concatenate([inst, cand.positions_m[start]])
            if len(start) < count and _spacing_mask(cand.positions_m[[c]], fixed, min_sp)[0]:
                start.append(c)
        start = np.array(start, dtype=int)
    tick("greedy", 0, count)
    chosen = greedy(obj, count, cand.positions_m, min_sp, inst, start=start)
    greedy_value = exact(cand.positions_m[chosen], gains_c[chosen])
    hist.append(greedy_value)
    stages.append(("greedy", greedy_value))
    baselines.append(Baseline("greedy", greedy_value, cand.positions_m[chosen].copy()))
    tick("greedy", count, count)

    tick("exchange", 0, 1)
    chosen = exchange(
        obj,
        chosen,
        cand.positions_m,
        min_sp,
        inst,
        stop=halted,
        on_swap=lambda v: tick("exchange", 0, 1),
    )
    exchange_value = exact(cand.positions_m[chosen], gains_c[chosen])
    hist.append(exchange_value)
    stages.append(("exchange", exchange_value))
    baselines.append(Baseline("exchange", exchange_value, cand.positions_m[chosen].copy()))
    tick("exchange", 1, 1)

    layout = cand.positions_m[chosen].copy()
    gain = gains_c[chosen].copy()
    value = exchange_value
    if warm_start_m is not None:
        # The stored layout (exact positions, perhaps off the grid) stays in the race; a
        # smaller one (a budget's previous count) is extended greedily from the grid.
        warm = np.asarray(warm_start_m, dtype=float).reshape(-1, 3)[:count]
        # Probes the current rules forbid (a new keep-out, a region given up) are dropped.
        warm = _feasible_subset(site, warm)
        warm_gain = problem.gain_at(warm)
        if warm.shape[0] < count:
            extra = _extend(problem, obj, cand, gains_c, warm, warm_gain, count, min_sp, robust)
            warm = np.concatenate([warm, cand.positions_m[extra]])
            warm_gain = np.concatenate([warm_gain, gains_c[extra]])
        warm_value = exact(warm, warm_gain)
        hist.append(warm_value)
        if problem.better(warm_value, value):
            layout, gain, value = warm, warm_gain, warm_value

    # Certified bound (d with mean aggregate only).
    bound = gap = None
    if problem.criterion.name == "d" and design.aggregate == "mean" and not halted():
        tick("bound", 0, 1)
        relax = relaxation_bound(obj.info, problem.fisher_installed, count)
        bound, gap = relax.bound, relax.gap
        tick("bound", 1, 1)

    # Bayesian refinement in continuous coordinates.
    if evaluations > 0 and not halted():
        regions = _region_of(problem, layout, cand)
        tick("refine", 0, evaluations)
        layout, value, _ = refine(
            problem,
            layout,
            gain,
            regions,
            evaluations,
            rng,
            radius_m=REFINE_RADIUS_CELLS * cand.spacing_m if cand.spacing_m > 0 else None,
            stop=halted,
            record=hist.append,
            progress=lambda k: tick("refine", k, evaluations),
        )
        stages.append(("refine", value))
        tick("refine", evaluations, evaluations)

    # Baselines: what an engineer would draw, and the best of many random layouts.
    if not halted():
        tick("baselines", 0, 2)
        try:
            regular = site.regular_layout(count)
            rv = exact(regular, problem.gain_at(regular))
            baselines.append(Baseline("regular", rv, regular))
        except ValueError:
            pass  # no regular layout fits the rules: nothing to compare
        tick("baselines", 1, 2)
        if n_random > 0:
            rand = site.random_layouts(n_random, count, rng)
            g = problem.gain_at(rand.reshape(-1, 3)).reshape(rand.shape[:2])
            rvals = problem.objective(rand, g)
            k = int(np.argmax(rvals) if maximise else np.argmin(rvals))
            baselines.append(Baseline(f"best of {n_random} random", float(rvals[k]), rand[k]))
        tick("baselines", 2, 2)

    score = problem.score(layout, gain)
    info = SearchInfo(
        history=np.asarray(hist, dtype=float),
        bound=bound,
        bound_gap=gap,
        grid_spacing_m=float(cand.spacing_m),
        n_candidates=int(cand.positions_m.shape[0]),
        baselines=tuple(baselines),
        stages=tuple(stages),
        seconds=time.perf_counter() - t0,
        objective="worst single loss" if robust else "criterion",
    )
    return PlanOutcome(layout, gain, score, info, complete=not stopped)


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


def _extend(problem, obj, cand, gains_c, fixed_m, fixed_gain, count, min_sp, robust):
    """Greedy grid additions to a fixed partial layout, ``(count − k,) int`` candidates."""
    fixed_info = np.concatenate(
        [
            obj.fixed_info,
            problem.probe_information(fixed_m, fixed_gain)[:, obj.fixed_info.shape[1] :],
        ],
        axis=1,
    )
    ext = GridObjective(problem, obj.rows, prior=True, robust=robust, fixed_info=fixed_info)
    fixed = np.concatenate([problem.installed_m, fixed_m])
    return greedy(ext, count - fixed_m.shape[0], cand.positions_m, min_sp, fixed)


def _region_of(problem: Problem, layout: np.ndarray, cand) -> np.ndarray:
    """Mounting region of each probe: that of its nearest grid candidate, ``(count,) int``."""
    from scipy.spatial import cKDTree

    _, idx = cKDTree(cand.positions_m).query(layout)
    return cand.region_index[idx]


def d_efficiency(value: float, bound: float | None, n_params: int) -> float | None:
    """exp((value − bound)/n_params): the share of the best grid layout's D-value reached."""
    if bound is None or not np.isfinite(value):
        return None
    return d_ratio(value, bound, n_params)
