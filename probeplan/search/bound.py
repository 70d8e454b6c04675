"""A certified upper bound on the D-criterion over the candidate grid (convex relaxation).

For ``d`` with the ``mean`` aggregate (Joshi & Boyd, "Sensor Selection via Convex
Optimization", IEEE TSP 57(2), 2009): weights w ∈ [0, 1]^C with Σ w = count,
f(w) = mean_s log det(J0_s + Σ_c w_c A_sc) is concave. Projected gradient ascent finds a good w;
the Frank–Wolfe duality gap max_v ∇f(w)·(v − w) certifies f* ≤ f(w) + gap, so the bound of
every step of :func:`relaxation_steps` is valid, however early the solver stops.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np

from .grid import candidate_chunks, drain

#: Stop the relaxation when its certified gap is below this (in log det units, per parameter).
BOUND_GAP_PER_PARAM = 2e-3


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


def _relaxed(w: np.ndarray, rows: np.ndarray, base: np.ndarray) -> tuple[float, np.ndarray | None]:
    """f(w) and ∇f(w) ``(C,)``; (−inf, None) where a weighted information is singular.

    M_s = base_s + R_sᵀ diag(w) R_s and ∂f/∂w_c = mean_s tr(M_s⁻¹ A_sc) = mean_s Σ_a
    r_sca M_s⁻¹ r_scaᵀ: stacked matrix products over the scenarios, chunk by chunk of
    candidates (:func:`~probeplan.search.grid.candidate_chunks`), never the (S, C, p, p)
    information.
    """
    n_s, n_c, n_a, n_p = rows.shape
    m = base.copy()
    for sl in candidate_chunks(rows):
        r = rows[:, sl].reshape(n_s, -1, n_p)  # (S, c·a, p)
        wr = r * np.repeat(w[sl], n_a)[None, :, None]
        m += np.matmul(np.swapaxes(wr, -1, -2), r)
    sign, ld = np.linalg.slogdet(m)
    if np.any(sign <= 0):
        return -np.inf, None
    minv = np.linalg.inv(m)
    grad = np.empty(n_c)
    for sl in candidate_chunks(rows):
        r = rows[:, sl].reshape(n_s, -1, n_p)
        q = np.einsum("sip,sip->i", np.matmul(r, minv), r)  # Σ_s, (c·a,)
        grad[sl] = q.reshape(-1, n_a).sum(axis=1) / n_s
    return float(ld.mean()), grad


def _fw_gap(w: np.ndarray, grad: np.ndarray, count: int) -> float:
    """Frank–Wolfe gap max_v ∇f·(v − w) over the vertices v of the capped simplex."""
    top = np.argsort(-grad, kind="stable")[:count]
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

    Yields
    ------
    Relaxation
        The certificate of the best weights so far, after every evaluation: each is a valid
        bound; the last one is the tightest.
    """
    n_c, p = rows.shape[1], rows.shape[3]
    gap_tol = p * BOUND_GAP_PER_PARAM if gap_tol is None else gap_tol
    w = np.full(n_c, count / n_c)
    f, g = _relaxed(w, rows, base)
    if g is None:
        # Singular with every candidate at equal weight: then Σ_c A_c is singular and so is
        # every subset's information (it is dominated by a multiple of that sum); the best any
        # grid layout can do is −inf, which is a valid (and exact) bound.
        yield Relaxation(bound=-np.inf, value=-np.inf, gap=0.0, weights=w, iterations=0)
        return
    step = 1.0 / max(np.abs(g).max(), 1e-300)
    gap = _fw_gap(w, g, count)
    it = 0
    yield _certificate(f, gap, w, it)
    while it < max_iter and gap > gap_tol:
        it += 1
        # Backtracking projected gradient ascent, with the step allowed to grow again.
        while True:
            w_new = _project_capped_simplex(w + step * g, count)
            f_new, g_new = _relaxed(w_new, rows, base)
            if f_new >= f + 1e-4 * g @ (w_new - w) and np.isfinite(f_new):
                break
            step *= 0.5
            if step < 1e-300:
                break
            yield _certificate(f, gap, w, it - 1)  # a rejected trial: w is still the best
        if g_new is None:
            yield _certificate(f, gap, w, it)
            return
        w, f, g = w_new, f_new, g_new
        step *= 2.0
        gap = _fw_gap(w, g, count)
        yield _certificate(f, gap, w, it)


def relaxation_bound(*args, stop: Callable[[], bool] | None = None, **kwargs) -> Relaxation:
    """The bound of :func:`relaxation_steps` (same parameters) run to the end; or, when
    ``stop()`` (polled after every evaluation) returns True, the bound so far (valid, looser)."""
    return drain(relaxation_steps(*args, **kwargs), stop)
