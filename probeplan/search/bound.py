"""A certified upper bound on the D-criterion over the candidate grid (convex relaxation).

For ``d`` with the ``mean`` aggregate (Joshi & Boyd, "Sensor Selection via Convex
Optimization", IEEE TSP 57(2), 2009): weights w ∈ [0, 1]^C with Σ w = count,
f(w) = mean_s log det(J0_s + Σ_c w_c A_sc) is concave. Projected gradient ascent finds a good w;
the Frank–Wolfe duality gap max_v ∇f(w)·(v − w) certifies f* ≤ f(w) + gap, so the bound of
every step of :func:`relaxation_steps` is valid, however early the solver stops.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np

from .forms import (
    cholesky_inverse,
    columns_gram,
    columns_traces,
    compiled,
    quadratic_sums,
    weighted_gram,
)
from .grid import candidate_chunks, drain

#: Stop the relaxation when its certified gap is below this (in log det units, per parameter).
BOUND_GAP_PER_PARAM = 2e-3


def _project_capped_simplex(y: np.ndarray, total: float, upper=1.0) -> np.ndarray:
    """Euclidean projection of ``y (C,)`` onto {0 ≤ w ≤ upper, Σ w = total} (bisection on τ);
    ``upper`` a number or ``(C,)``."""
    lo, hi = y.min() - 1.0, y.max()
    for _ in range(100):
        tau = 0.5 * (lo + hi)
        s = np.clip(y - tau, 0.0, upper).sum()
        if s > total:
            lo = tau
        else:
            hi = tau
    return np.clip(y - 0.5 * (lo + hi), 0.0, upper)


@dataclass(frozen=True)
class Relaxation:
    """Result of :func:`relaxation_bound` (and each step of :func:`relaxation_steps`).

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


def _relaxed(
    w: np.ndarray, rows: np.ndarray, base: np.ndarray, penalty: np.ndarray | None = None
) -> tuple[float, np.ndarray | None]:
    """f(w) and ∇f(w) ``(C,)``; (−inf, None) where a weighted information is singular.

    M_s = base_s + R_sᵀ diag(w) R_s and ∂f/∂w_c = mean_s tr(M_s⁻¹ A_sc) = mean_s Σ_a
    r_sca M_s⁻¹ r_scaᵀ (:func:`_gram`, :func:`_traces`), never the (S, C, p, p) information.
    ``rows``: ``(S, C, a, p)``, or a working set's :class:`Columns`. With ``penalty`` μ
    ``(C,)``: f(w) − μ·w and its gradient.
    """
    m = base + _gram(rows, w)
    sign, ld = np.linalg.slogdet(m)
    if np.any(sign <= 0):
        return -np.inf, None
    grad = _traces(rows, m) / rows.shape[0]
    if penalty is not None:  # the Lagrangian f(w) − μ·w of the spacing rule
        return float(ld.mean()) - float(penalty @ w), grad - penalty
    return float(ld.mean()), grad


def _gram(rows, w: np.ndarray) -> np.ndarray:
    """Σ_c w_c R_scᵀ R_sc, ``(S, p, p)``, of ``rows (S, C, a, p)`` or :class:`Columns`.

    The compiled loops pay on large grids (only the candidates with weight add to M: after a
    few steps, few); on small ones numpy's products are quicker (measured: 3.3 against 10 ms
    an evaluation at 892 candidates × 64 scenarios).
    """
    if isinstance(rows, Columns):
        return rows.gram(w)
    if compiled(rows):
        return weighted_gram(rows, w)
    n_s, _, _, n_p = rows.shape
    wr = rows * w[None, :, None, None]
    return np.matmul(np.swapaxes(wr.reshape(n_s, -1, n_p), -1, -2), rows.reshape(n_s, -1, n_p))


def _traces(rows, m: np.ndarray) -> np.ndarray:
    """Σ_s tr(M_s⁻¹ A_sc) of every candidate, ``(C,)``, of ``rows (S, C, a, p)`` or
    :class:`Columns`: |L⁻¹ R_cᵀ|² with M = L Lᵀ in one compiled pass, or (small grids, or M
    too ill-conditioned for Cholesky in floating point) products with M⁻¹ itself."""
    if isinstance(rows, Columns):
        return rows.traces(m)
    sums = quadratic_sums(rows, m) if compiled(rows) else None
    if sums is not None:
        return sums
    n_s, n_c, n_a, n_p = rows.shape
    minv = np.linalg.inv(m)
    sums = np.empty(n_c)
    for sl in candidate_chunks(rows):
        r = rows[:, sl].reshape(n_s, -1, n_p)
        q = np.einsum("sip,sip->i", np.matmul(r, minv), r)  # Σ_s, (c·a,)
        sums[sl] = q.reshape(-1, n_a).sum(axis=1)
    return sums


class Columns:
    """A working set's rows laid out for matrix products: ``(S, p, n·a)``, each candidate's
    axes side by side, so that M = R diag(w) Rᵀ and the traces |L⁻¹ R|² are contiguous
    compiled loops per scenario, not many small products.

    Parameters
    ----------
    rows : (S, n, a, p) float
    """

    def __init__(self, rows: np.ndarray) -> None:
        n_s, n, self.n_a, n_p = rows.shape
        self.t = np.ascontiguousarray(np.swapaxes(rows.reshape(n_s, n * self.n_a, n_p), 1, 2))
        self.shape = (n_s, n)

    def gram(self, w: np.ndarray) -> np.ndarray:
        """:func:`_gram` of these columns."""
        n_s, n_p, _ = self.t.shape
        out = np.empty((n_s, n_p, n_p))
        columns_gram(self.t, np.repeat(w, self.n_a), out)
        return out

    def traces(self, m: np.ndarray) -> np.ndarray:
        """:func:`_traces` of these columns."""
        low_inv = cholesky_inverse(m)
        if low_inv is None:
            q = np.einsum("spi,spi->i", np.matmul(np.linalg.inv(m), self.t), self.t)
        else:
            q = np.empty(self.t.shape[2])
            columns_traces(self.t, low_inv, q)
        return q.reshape(-1, self.n_a).sum(axis=1)


def _fw_gap(w: np.ndarray, grad: np.ndarray, count: int, upper=None) -> float:
    """Frank–Wolfe gap max_v ∇f·(v − w) over the vertices v of the capped simplex (only
    candidates with a cap of 1 when ``upper (C,)`` is given)."""
    g = grad if upper is None else np.where(upper > 0, grad, -np.inf)
    top = np.argsort(-g, kind="stable")[:count]
    v = np.zeros(w.size)
    v[top] = 1.0
    return float(grad @ (v - w))


def _certificate(f: float, gap: float, w: np.ndarray, iterations: int) -> Relaxation:
    return Relaxation(
        bound=f + max(gap, 0.0), value=f, gap=max(gap, 0.0), weights=w, iterations=iterations
    )


def relaxation_steps(
    rows: np.ndarray,
    base: np.ndarray,
    count: int,
    max_iter: int = 400,
    gap_tol: float | None = None,
    *,
    positions_m: np.ndarray | None = None,
    min_spacing_m: float = 0.0,
    installed_m: np.ndarray | None = None,
    start: np.ndarray | None = None,
    plan_value: float | None = None,
) -> Iterator[Relaxation]:
    """Upper bound on the D-criterion (mean log det) over candidate subsets, by projected
    gradient ascent on the relaxation, one objective evaluation a step.

    Parameters
    ----------
    rows : (n_scenarios, n_candidates, n_axes, n_params) float
        Whitened rows of one probe at each candidate (its information is A = Rᵀ R).
    base : (n_scenarios, n_params, n_params) float
        Information that every layout has (installed probes).
    count : int
        Probes to place.
    max_iter : int
        Projected-gradient iterations at most.
    gap_tol : float or None
        Stop when the duality gap is below this (default n_params × BOUND_GAP_PER_PARAM).
    positions_m : (n_candidates, 3) float or None
        The candidates, for the spacing rule (see :func:`spacing_steps`).
    min_spacing_m : float
        No two probes closer than this (m); 0: no rule.
    installed_m : (n_installed, 3) float or None
        Installed probes: a candidate closer than the spacing to one has a cap of 0.
    start : (count,) int or None
        Candidates of a good layout (the search's), where the ascent starts: on a large grid
        far fewer steps than from equal weights everywhere. Any start gives a valid bound.
    plan_value : float or None
        The value of the search's layout: the gap need then only be small against the
        distance from it to the bound (:func:`_needed_gap`), which is what the certificate
        is read against.

    Yields
    ------
    Relaxation
        The certificate of the best weights so far, after every evaluation: each is a valid
        bound; the last one is the tightest.
    """
    n_c, p = rows.shape[1], rows.shape[3]
    gap_tol = p * BOUND_GAP_PER_PARAM if gap_tol is None else gap_tol
    upper = _caps(positions_m, min_spacing_m, installed_m)
    if upper is not None and upper.sum() < count:
        upper = None  # the rules leave no room for count probes: the plain relaxation
    w = np.full(n_c, count / n_c)
    if upper is not None:
        w = _project_capped_simplex(w, count, upper)
    f, g = _relaxed(w, rows, base)
    if start is not None and g is not None and start.size == count:
        # The layout's weights, moved a little towards equal ones so that the first full
        # gradient sees every candidate; kept only when at least as good.
        w_s = np.zeros(n_c)
        w_s[start] = 1.0
        w_s = _project_capped_simplex(0.9 * w_s + 0.1 * w, count, 1.0 if upper is None else upper)
        f_s, g_s = _relaxed(w_s, rows, base)
        if g_s is not None and f_s >= f:
            w, f, g = w_s, f_s, g_s
    if g is None:
        # Singular with every candidate at equal weight: then Σ_c A_c is singular and so is
        # every subset's information (it is dominated by a multiple of that sum); the best any
        # grid layout can do is −inf, which is a valid (and exact) bound.
        yield Relaxation(bound=-np.inf, value=-np.inf, gap=0.0, weights=w, iterations=0)
        return
    best = None
    needed = gap_tol
    if plan_value is not None:
        needed = functools.partial(_needed_gap, plan_value=plan_value, gap_tol=gap_tol)
    for f_k, gap, w_k, it in _ascent(rows, base, count, w, f, g, max_iter, needed, upper):
        best = _certificate(f_k, gap, w_k, it)
        yield best
    if plan_value is not None:
        gap_tol = _needed_gap(best.bound, plan_value, gap_tol)
    if positions_m is not None and min_spacing_m > 0:
        yield from spacing_steps(
            rows, base, count, best, positions_m, min_spacing_m, upper, gap_tol
        )


#: The gap a bound is computed to, as a fraction of its distance to the plan's value: the
#: D-efficiency read from it is then known to a few per cent of its own distance from 1.
BOUND_GAP_FRACTION = 0.02


def _needed_gap(bound: float, plan_value: float, gap_tol: float) -> float:
    """The gap at which the relaxation may stop: ``gap_tol``, or a fraction
    (:data:`BOUND_GAP_FRACTION`) of the bound's distance to the plan when that is more."""
    if not (np.isfinite(bound) and np.isfinite(plan_value)):
        return gap_tol
    return max(gap_tol, BOUND_GAP_FRACTION * (bound - plan_value))


def _caps(positions_m, min_spacing_m, installed_m) -> np.ndarray | None:
    """Per-candidate caps ``(C,)``: 0 for a candidate closer than the spacing to an
    installed probe (no allowed layout uses it), else 1; None when there is no such one."""
    if positions_m is None or installed_m is None or installed_m.shape[0] == 0:
        return None
    from .grid import _spacing_mask

    ok = _spacing_mask(positions_m, installed_m, min_spacing_m)
    return None if ok.all() else ok.astype(float)


#: Rounds of the Lagrange multipliers of the spacing rule (each one ascent).
SPACING_ROUNDS = 6
#: Subgradient step of the multipliers, as a fraction of the median gradient on the support
#: over the round number (measured on small lattices: 0.03–0.3 tighten alike, 1 oscillates).
SPACING_STEP = 0.1
#: Ascent iterations per round of the multipliers at most.
SPACING_ITER = 60


def _conflicts(positions_m: np.ndarray, min_spacing_m: float):
    """Groups of candidates of which an allowed layout holds at most one, as a sparse
    ``(n_groups, n_candidates)`` 0/1 matrix: the open disc of radius spacing/2 around each
    candidate, and every pair closer than the spacing."""
    from scipy.sparse import coo_matrix, vstack
    from scipy.spatial import cKDTree

    n_c = positions_m.shape[0]
    tree = cKDTree(positions_m)
    # Strictly inside, with a margin far above round-off and far below any grid spacing.
    near = tree.query_pairs(0.5 * min_spacing_m * (1 - 1e-9), output_type="ndarray")
    i = np.concatenate([np.arange(n_c), near[:, 0], near[:, 1]])
    j = np.concatenate([np.arange(n_c), near[:, 1], near[:, 0]])
    discs = coo_matrix((np.ones(i.size), (i, j)), shape=(n_c, n_c))
    pairs = tree.query_pairs(min_spacing_m * (1 - 1e-9), output_type="ndarray")
    k = np.repeat(np.arange(pairs.shape[0]), 2)
    edges = coo_matrix((np.ones(k.size), (k, pairs.ravel())), shape=(pairs.shape[0], n_c))
    return vstack([discs, edges]).tocsr()


def spacing_steps(
    rows, base, count, start: Relaxation, positions_m, min_spacing_m, upper, gap_tol
) -> Iterator[Relaxation]:
    """Tighten a bound with the spacing rule, by Lagrangian relaxation.

    Any two candidates within an open disc of radius spacing/2 are closer than the spacing,
    so in any layout the rules allow the weights inside every such disc sum to at most 1, and
    so do those of any two candidates closer than the spacing (:func:`_conflicts`). For
    multipliers λ ≥ 0 on these groups, every allowed layout w
    has f(w) ≤ f(w) − Σ_j λ_j (Σ_{c∈D_j} w_c − 1), so the certified maximum of the
    right-hand side over the capped simplex (the same ascent, with the gradient less
    μ = Dᵀλ) plus nothing else bounds f over those layouts too. λ follows the discs' excess
    by projected subgradient steps; the smallest bound is kept, so the result is never above
    ``start`` (λ = 0). When the relaxed weights already respect every disc nothing is done:
    their optimum is then also that of the rule-aware relaxation.
    """

    discs = _conflicts(positions_m, min_spacing_m)
    best, w = start, start.weights
    lam = np.zeros(discs.shape[0])
    _, g = _relaxed(w, rows, base)
    if g is None:
        return
    scale = float(np.median(g[w > 0])) if np.any(w > 0) else 1.0
    for k in range(SPACING_ROUNDS):
        excess = discs @ w - 1.0
        if k == 0 and excess.max() <= 1e-9:
            return
        lam = np.maximum(lam + SPACING_STEP * scale / (k + 1) * excess, 0.0)
        mu = discs.T @ lam
        f, g = _relaxed(w, rows, base, mu)
        if g is None:
            return
        # A short warm-started ascent: any weights give a valid bound, and a round whose
        # bound is not the smallest costs only its time.
        steps = _ascent(rows, base, count, w, f, g, SPACING_ITER, gap_tol, upper, mu)
        for f, gap, w, it in steps:  # noqa: B007 - the last step is the result
            yield best
        cert = _certificate(f + lam.sum(), gap, w, start.iterations + it)
        if cert.bound < best.bound:
            best = cert
        yield best


#: Candidates at most for which the ascent runs on the whole grid; above it, on a working set.
WORKING_SET_MIN = 4096
#: A working set's ascent stops at this fraction of the whole grid's last gap.
WORKING_SET_TOL = 0.05


def _ascent(rows, base, count, w, f, g, max_iter, gap_tol, upper=None, penalty=None):
    """Projected gradient ascent on the relaxation from ``w`` (with f(w), ∇f(w) given): yields
    (f, gap, w, iterations) of the best certified weights after every evaluation.

    On a large grid the weights of the optimum sit on few candidates, so the ascent runs on a
    working set (column generation): the candidates with weight and those whose gradient is
    largest. Weights off the set are 0, so f on the set is f on the grid; one pass over the
    whole grid then gives the full gradient and the Frank–Wolfe gap that certifies the bound,
    and the set grows by the candidates that gap points to until it closes. Every yield is a
    certificate of the whole grid (the last full pass's).
    """
    n_c = rows.shape[1]
    if not callable(gap_tol):
        gap_tol = functools.partial(_fixed, gap_tol)
    if n_c <= WORKING_SET_MIN:
        yield from _plain_ascent(rows, base, count, w, f, g, max_iter, gap_tol, upper, penalty)
        return
    gap = _fw_gap(w, g, count, upper)
    best = (f, gap, w)  # the smallest certified bound f + gap so far
    yield f, gap, w, 0
    it, size = 0, max(WORKING_SET_MIN // 4, 8 * count)
    while it < max_iter and gap > gap_tol(best[0] + best[1]):
        g_eff = g if upper is None else np.where(upper > 0, g, -np.inf)
        ws = np.zeros(n_c, dtype=bool)
        ws[np.argsort(-g_eff, kind="stable")[:size]] = True
        if np.count_nonzero(w) <= n_c // 2:  # not the first round's weights, spread over all
            ws[w > 0] = True
        idx = np.flatnonzero(ws)
        sub = Columns(rows[:, idx])
        cap = 1.0 if upper is None else upper[idx]
        pen = None if penalty is None else penalty[idx]
        start = w[idx] * (count / max(w[idx].sum(), 1e-300))
        start = _project_capped_simplex(start, count, cap)
        f_s, g_s = _relaxed(start, sub, base, pen)
        if g_s is None:  # the set cannot resolve every direction yet: a larger one
            size *= 2
            if size >= n_c:
                break
            continue
        # Solved on the set only as far as the whole grid's gap warrants: the next full pass
        # may well change the set again.
        tol = max(0.5 * gap_tol(best[0] + best[1]), WORKING_SET_TOL * gap)
        inner = _plain_ascent(sub, base, count, start, f_s, g_s, max_iter - it, tol, cap, pen)
        w_s, k = start, 0
        for _, _, w_s, k in inner:  # noqa: B007 - the last step is the result
            yield *best, it
        w = np.zeros(n_c)
        w[idx] = w_s
        f, g = _relaxed(w, rows, base, penalty)
        it += max(k, 1)
        if g is None:
            return
        gap = _fw_gap(w, g, count, upper)
        if f + gap <= best[0] + best[1]:
            best = (f, gap, w)
        yield *best, it
    if gap > gap_tol(f + gap) and it < max_iter:  # the sets did not close it: the whole grid
        yield from _plain_ascent(rows, base, count, w, f, g, max_iter - it, gap_tol, upper, penalty)


def _fixed(tol: float, bound: float) -> float:
    """A gap tolerance that does not depend on the bound."""
    return tol


def _plain_ascent(rows, base, count, w, f, g, max_iter, gap_tol, upper=None, penalty=None):
    """Spectral projected gradient ascent on the relaxation of ``rows`` from ``w`` (with
    f(w), ∇f(w) given): yields (f, gap, w, iterations) of the weights with the smallest
    certified bound so far after every evaluation. ``gap_tol``: a number, or a function of
    the bound.

    The trial step is the Barzilai–Borwein step (s·s)/(−s·y) of the last move (spectral
    projected gradient, Birgin, Martínez & Raydan, SIAM J. Optim. 10(4), 2000), which follows
    the curvature along the way; doubled when the move shows no curvature, halved along the
    projection arc until the Armijo condition holds.
    """
    step = 1.0 / max(np.abs(g).max(), 1e-300)
    gap = _fw_gap(w, g, count, upper)
    best = (f, gap, w)
    cap = 1.0 if upper is None else upper
    if not callable(gap_tol):
        gap_tol = functools.partial(_fixed, gap_tol)
    it = 0
    yield f, gap, w, it
    while it < max_iter and gap > gap_tol(best[0] + best[1]):
        it += 1
        # Backtracking along the projection arc, with the step allowed to grow again.
        while True:
            w_new = _project_capped_simplex(w + step * g, count, cap)
            f_new, g_new = _relaxed(w_new, rows, base, penalty)
            if np.isfinite(f_new) and f_new >= f + 1e-4 * g @ (w_new - w):
                break
            step *= 0.5
            if step < 1e-300:
                break
            yield *best, it - 1  # a rejected trial
        if g_new is None:
            yield *best, it
            return
        s_w, y_g = w_new - w, g_new - g
        curv = -float(s_w @ y_g)
        step = float(s_w @ s_w) / curv if curv > 0 else 2.0 * step
        w, f, g = w_new, f_new, g_new
        gap = _fw_gap(w, g, count, upper)
        if f + gap < best[0] + best[1]:
            best = (f, gap, w)
        yield *best, it


def relaxation_bound(*args, stop: Callable[[], bool] | None = None, **kwargs) -> Relaxation:
    """The bound of :func:`relaxation_steps` (same parameters) run to the end; or, when
    ``stop()`` (polled after every evaluation) returns True, the bound so far (valid, looser)."""
    return drain(relaxation_steps(*args, **kwargs), stop)
