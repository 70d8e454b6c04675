"""The quadratic forms of the D-criterion's grid sweeps, their updates, and the pruned pick.

For a set of chosen candidates with information M_s (per scenario s), adding candidate c
gives log det(M_s + R_scᵀ R_sc) = log det M_s + log det(I + Q_sc), Q_sc = R_sc M_s⁻¹ R_scᵀ
(matrix determinant lemma), and removing probe i changes every Q by a rank-a term
(Sherman–Morrison–Woodbury). :class:`Forms` holds Q for one set; :func:`pick` finds the best
candidate of a sweep from upper bounds on every candidate's value and the exact value of the
few whose bound can still win; the compiled loops here do the sweeps of single-axis meters
(a = 1), the regional case, in one pass over the rows each.

Every choice is the one an exhaustive sweep makes (first index on ties): the bounds only
decide which candidates need their exact value.
"""

from __future__ import annotations

from collections.abc import Callable

import numba
import numpy as np

from ..fisher import aggregate

#: Candidates valued exactly in the first block of :func:`pick` (then doubling).
PICK_BLOCK = 64
#: Candidates per block of the compiled loops: a block's sums stay in cache across scenarios.
LOOP_BLOCK = 512
#: Relative and per-term absolute margin on float32 logs: far above their error (a few ULP,
#: ~1e-7) so that a bound made from them is still a bound.
LOG32_MARGIN = 1e-6
TINY32 = float(np.finfo(np.float32).tiny)
#: Floating-point liberties of the sums of the relaxation's loops: reassociation (and fused
#: multiply-adds) let them run on vector units; no assumption that values are finite.
_VECTOR_MATH = {"reassoc", "contract", "nsz", "arcp"}


class Forms:
    """The quadratic forms Q_sc = R_sc M_s⁻¹ R_scᵀ of every candidate for one set.

    Attributes
    ----------
    key : bytes
        The chosen candidates' bytes.
    minv : (S, p, p) float
        M⁻¹ (symmetric).
    ld : (S,) float
        log det M.
    q : (S, C, a, a) float
    updates : int
        Rank-a updates since the forms were last swept from the rows.
    """

    __slots__ = ("key", "minv", "ld", "q", "updates", "_log_bound")

    def __init__(self, chosen, m, q, updates) -> None:
        self.key = chosen.tobytes()
        self.minv, self.ld = np.linalg.inv(m), np.linalg.slogdet(m)[1]
        self.q, self.updates = q, updates
        self._log_bound = None

    @classmethod
    def of(cls, rows: np.ndarray, chosen: np.ndarray, m: np.ndarray, chunks) -> Forms:
        """Forms of ``chosen`` (information ``m (S, p, p)``) swept from ``rows (S, C, a, p)``:
        one (c·a, p) × (p, p) product per scenario and chunk of candidates."""
        n_s, n_c, n_a, _ = rows.shape
        q = np.empty((n_s, n_c, n_a, n_a))
        if n_a == 1 and compiled(rows):  # one compiled pass, from Cholesky when M allows it
            low_inv = cholesky_inverse(m)
            if low_inv is not None:
                _triangular_loop(_plain3(rows[:, :, 0, :]), low_inv, q[:, :, 0, 0], np.empty(0))
                return cls(chosen, m, q, 0)
        minv_t = np.swapaxes(np.linalg.inv(m), -1, -2)
        for sl in chunks(rows):
            q[:, sl] = quadratic(rows[:, sl], minv_t)[1]
        return cls(chosen, m, q, 0)

    def log_bound(self) -> np.ndarray:
        """Upper bound on Σ_s log det(I + Q_sc) of every candidate, ``(C,)`` (single-axis
        meters): the logs in float32 (vectorised, several times faster) with a margin far
        above their error."""
        if self._log_bound is None:
            n_s, n_c = self.q.shape[:2]
            out = np.empty(n_c)
            for start in range(0, n_c, 4 * LOOP_BLOCK):
                q = self.q[:, start : start + 4 * LOOP_BLOCK, 0, 0]
                # Clipped at float32's smallest normal: still a bound where 1 + Q is smaller
                # (or not positive, where the exact term is −inf).
                with np.errstate(over="ignore"):
                    y = np.maximum(1.0 + q, TINY32).astype(np.float32)
                logs = np.log(y)
                out[start : start + q.shape[1]] = logs.sum(axis=0, dtype=np.float64)
            self._log_bound = out * (1 + LOG32_MARGIN) + LOG32_MARGIN * n_s
        return self._log_bound

    def updated(self, rows, chosen, m, c: int, sign: float, chunks) -> Forms:
        """Forms of ``chosen`` (information ``m``), which is this set with candidate ``c``
        added (``sign`` +1) or removed (−1): Q'_j = Q_j − sign B_j (I + sign Q_c)⁻¹ B_jᵀ,
        B_j = R_j M⁻¹ R_cᵀ."""
        n_s, n_c, n_a, n_p = rows.shape
        h = np.matmul(self.minv, np.swapaxes(rows[:, c], -1, -2))  # M⁻¹ R_cᵀ, (S, p, a)
        k = np.linalg.inv(np.eye(n_a) + sign * self.q[:, c])  # (S, a, a)
        q = np.empty_like(self.q)
        for sl in chunks(rows):
            b = np.matmul(rows[:, sl].reshape(n_s, -1, n_p), h).reshape(n_s, -1, n_a, n_a)
            q[:, sl] = self.q[:, sl] - sign * np.matmul(
                np.matmul(b, k[:, None]), np.swapaxes(b, -1, -2)
            )
        return Forms(chosen, m, q, self.updates + 1)

    def swapped(self, rows, chosen, m_rest, m, i_cand: int, c: int, chunks) -> Forms:
        """Forms of ``chosen`` (information ``m``): this set with candidate ``i_cand``
        replaced by ``c``; ``m_rest`` the information without either."""
        n_a = rows.shape[2]
        if n_a > 1 or not compiled(rows):
            rest = self.updated(rows, chosen, m_rest, i_cand, -1.0, chunks)
            return rest.updated(rows, chosen, m, c, 1.0, chunks)
        # Single axis: both rank-one terms in one compiled pass,
        # Q'' = Q + k_i b_i² − k_c b_c², b_i = R M⁻¹ r_iᵀ, b_c = R M'⁻¹ r_cᵀ.
        r = rows[:, :, 0, :]
        h_i = np.matmul(self.minv, rows[:, i_cand, 0, :, None])[..., 0]  # (S, p)
        k_i = 1.0 / (1.0 - self.q[:, i_cand, 0, 0])
        minv_rest = np.linalg.inv(m_rest)
        h_c = np.matmul(minv_rest, rows[:, c, 0, :, None])[..., 0]
        q_c = self.q[:, c, 0, 0] + k_i * np.einsum("sp,sp->s", r[:, c], h_i) ** 2
        k_c = 1.0 / (1.0 + q_c)
        q = np.empty_like(self.q)
        _swap_loop(_plain3(r), self.q[:, :, 0, 0], h_i, k_i, h_c, k_c, q[:, :, 0, 0])
        return Forms(chosen, m, q, self.updates + 2)


def quadratic(rows: np.ndarray, minv_t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
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


#: Scenarios × candidates × axes from which the sweeps run compiled loops: below it numpy's
#: products are quicker (the loops' threads cost about a millisecond a call).
COMPILED_MIN = 500_000


def compiled(rows: np.ndarray) -> bool:
    """Whether the sweeps of ``rows (S, C, a, p)`` run the compiled loops."""
    return rows.shape[0] * rows.shape[1] * rows.shape[2] >= COMPILED_MIN


def cholesky_inverse(m: np.ndarray) -> np.ndarray | None:
    """L⁻¹ of M = L Lᵀ for ``m (S, p, p)``, ``(S, p, p)`` lower triangular (exact zeros above
    the diagonal); None when M is too ill-conditioned for Cholesky in floating point."""
    try:
        return np.tril(np.linalg.inv(np.linalg.cholesky(m)))
    except np.linalg.LinAlgError:
        return None


def _plain3(r: np.ndarray) -> np.ndarray:
    """``r (S, C, p)`` as the compiled loops take it (C-ordered float64), copied only if
    need be."""
    return np.ascontiguousarray(r, dtype=np.float64)


def removal_terms(forms: Forms, rows: np.ndarray, i_cand: int, m_rest: np.ndarray):
    """The removal of ``i_cand`` from the set of ``forms`` (``m_rest (S, p, p)`` the
    information without it), for :func:`pick`: (ld of the set without it ``(S,)``, upper
    bounds ``(C,)`` on Σ_s log det(I + Q'_sc) or None, and the function that gives the exact
    terms log det(I + Q'_sc) ``(S, n)`` of candidates ``idx``).

    Q' = Q + B (I − Q_i)⁻¹ Bᵀ with B = R M⁻¹ R_iᵀ. For single-axis meters the bound is the
    tangent of the concave log at Q: log(1 + Q + t) ≤ log(1 + Q) + t/(1 + Q), summed over the
    scenarios with :meth:`Forms.log_bound` — one compiled pass, no logs; it leaves one
    candidate in tens to hundreds to value exactly (measured on regional grids).
    """
    n_s, n_c, n_a, n_p = rows.shape
    h = np.matmul(forms.minv, np.swapaxes(rows[:, i_cand], -1, -2))  # (S, p, a)
    k = np.linalg.inv(np.eye(n_a) - forms.q[:, i_cand])  # (S, a, a)
    ld = np.linalg.slogdet(m_rest)[1]

    def terms(idx: np.ndarray) -> np.ndarray:
        r = rows[:, idx].reshape(n_s, -1, n_p)
        b = np.matmul(r, h).reshape(n_s, idx.size, n_a, n_a)
        small = forms.q[:, idx] + np.matmul(np.matmul(b, k[:, None]), np.swapaxes(b, -1, -2))
        return _logdet_terms(small)

    if n_a > 1:
        return ld, None, terms
    if compiled(rows):
        upper = np.empty(n_c)
        _removal_bound_loop(
            _plain3(rows[:, :, 0, :]), forms.q[:, :, 0, 0], h[..., 0], k[:, 0, 0], upper
        )
    else:
        b = np.matmul(rows[:, :, 0, :], h)[..., 0]  # (S, C)
        upper = (k[:, 0] * b * b / (1.0 + forms.q[:, :, 0, 0])).sum(axis=0)
    return ld, upper + forms.log_bound(), terms


def addition_terms(forms: Forms):
    """The addition of one candidate to the set of ``forms``, for :func:`pick`: (ld ``(S,)``,
    upper bounds on Σ_s log det(I + Q_sc) — float32 logs for single-axis meters, Jensen's
    n_s log det(I + mean_s Q_sc) otherwise — and the exact terms of candidates ``idx``)."""
    n_s = forms.q.shape[0]
    if forms.q.shape[-1] == 1:
        upper = forms.log_bound()
    else:
        sign, ld = np.linalg.slogdet(np.eye(forms.q.shape[-1]) + forms.q.mean(axis=0))
        upper = np.where(sign > 0, n_s * ld, np.inf)
    return forms.ld, upper, lambda idx: _logdet_terms(forms.q[:, idx])


def _logdet_terms(q: np.ndarray) -> np.ndarray:
    """log det(I + Q) of ``q (S, n, a, a)``, ``(S, n)``; −inf where not positive."""
    n_a = q.shape[-1]
    if n_a == 1:
        val = 1.0 + q[..., 0, 0]
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(val > 0, np.log(np.where(val > 0, val, 1.0)), -np.inf)
    sign, ld = np.linalg.slogdet(np.eye(n_a) + q)
    return np.where(sign > 0, ld, -np.inf)


def pick(
    ld: np.ndarray,
    upper: np.ndarray | None,
    terms: Callable[[np.ndarray], np.ndarray],
    allowed: np.ndarray,
    how: str,
) -> tuple[int, float]:
    """Best allowed candidate of the ``d`` values agg_s(ld_s + terms_sc): ``(c, value)``,
    first index on ties, ``(-1, nan)`` when none is allowed.

    With the ``mean`` aggregate and ``upper (C,)`` bounds on Σ_s terms_sc, candidates are
    valued in blocks in order of their bound, and the sweep stops at the first block whose
    best bound is below the best value found (less a round-off margin): no candidate after
    it can win or tie. Otherwise every allowed candidate is valued.
    """
    idx = np.flatnonzero(allowed)
    if idx.size == 0:
        return -1, float("nan")

    def values(sub: np.ndarray) -> np.ndarray:
        per = (ld[:, None] + terms(sub)).T  # (n, S)
        v = aggregate(per, how, True)
        return np.where(np.isnan(v), -np.inf, v)

    if how != "mean" or upper is None:
        vals = values(idx)
        k = int(np.argmax(vals))
        return int(idx[k]), float(vals[k])
    n_s = ld.size
    bound = upper[idx] / n_s + ld.mean()
    bound = np.where(np.isnan(bound), np.inf, bound)  # no bound: valued first
    # Most sweeps stop within the first few hundred bounds: a partial sort of the top ones.
    top_n = min(bound.size, 16 * PICK_BLOCK)
    head = np.argpartition(-bound, top_n - 1)[:top_n] if top_n < bound.size else None
    order = np.argsort(-bound) if head is None else head[np.argsort(-bound[head])]
    best_c, best_v = -1, -np.inf
    start, block = 0, PICK_BLOCK
    while start < order.size:
        ahead = order[start : start + block]
        margin = 1e-12 * max(1.0, abs(best_v)) if np.isfinite(best_v) else 0.0
        if best_c >= 0 and bound[ahead[0]] < best_v - margin:
            break
        vals = values(idx[ahead])
        top = vals.max()
        if top > best_v or best_c < 0:
            best_v, best_c = float(top), int(idx[ahead[vals == top]].min())
        elif top == best_v:
            best_c = min(best_c, int(idx[ahead[vals == top]].min()))
        start += block
        block *= 2
        if head is not None and start >= order.size:  # past the sorted head: all of it
            rest = np.setdiff1d(np.arange(bound.size), head, assume_unique=True)
            order = np.concatenate([order, rest[np.argsort(-bound[rest])]])
            head = None
    return best_c, best_v


@numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy")
def _removal_bound_loop(r, q, h, k, out):  # pragma: no cover - compiled
    """out_c = Σ_s k_s (r_sc · h_s)² / (1 + q_sc): ``r (S, C, p)``, ``q (S, C)``,
    ``h (S, p)``, ``k (S,)``, ``out (C,)``. Candidates in blocks (one thread each), scenarios
    in order inside: the sums do not depend on the number of threads."""
    n_s, n_c, n_p = r.shape
    n_blocks = (n_c + LOOP_BLOCK - 1) // LOOP_BLOCK
    for blk in numba.prange(n_blocks):
        c0 = blk * LOOP_BLOCK
        c1 = min(n_c, c0 + LOOP_BLOCK)
        for c in range(c0, c1):
            out[c] = 0.0
        for s in range(n_s):
            ks = k[s]
            for c in range(c0, c1):
                t = 0.0
                for j in range(n_p):
                    t += r[s, c, j] * h[s, j]
                out[c] += ks * t * t / (1.0 + q[s, c])


@numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy")
def _swap_loop(r, q, h_i, k_i, h_c, k_c, out):  # pragma: no cover - compiled
    """out_sc = q_sc + k_i,s (r_sc · h_i,s)² − k_c,s (r_sc · h_c,s)²: the forms after a swap,
    ``r (S, C, p)``, ``q``/``out (S, C)``, ``h_* (S, p)``, ``k_* (S,)``."""
    n_s, n_c, n_p = r.shape
    n_blocks = (n_c + LOOP_BLOCK - 1) // LOOP_BLOCK
    for blk in numba.prange(n_blocks):
        c0 = blk * LOOP_BLOCK
        c1 = min(n_c, c0 + LOOP_BLOCK)
        for s in range(n_s):
            for c in range(c0, c1):
                t_i = 0.0
                t_c = 0.0
                for j in range(n_p):
                    t_i += r[s, c, j] * h_i[s, j]
                    t_c += r[s, c, j] * h_c[s, j]
                out[s, c] = q[s, c] + k_i[s] * t_i * t_i - k_c[s] * t_c * t_c


@numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy", fastmath=_VECTOR_MATH)
def _triangular_loop(r, low_inv, q, sums):  # pragma: no cover - compiled
    """|L_s⁻¹ r_scᵀ|² = r_sc M_s⁻¹ r_scᵀ (M_s = L_s L_sᵀ) of every row: into ``q (S, C)``
    when it has C columns, and summed over the scenarios into ``sums (C,)`` when it has C
    entries. ``r (S, C, p)``, ``low_inv (S, p, p)`` lower triangular. Candidates in blocks
    (one thread each), scenarios in order: sums that do not depend on the threads."""
    n_s, n_c, n_p = r.shape
    keep_q = q.shape[1] == n_c
    keep_sums = sums.shape[0] == n_c
    n_blocks = (n_c + LOOP_BLOCK - 1) // LOOP_BLOCK
    for blk in numba.prange(n_blocks):
        c0 = blk * LOOP_BLOCK
        c1 = min(n_c, c0 + LOOP_BLOCK)
        if keep_sums:
            for c in range(c0, c1):
                sums[c] = 0.0
        for s in range(n_s):
            for c in range(c0, c1):
                acc = 0.0
                for a in range(n_p):
                    t = 0.0
                    for b in range(a + 1):
                        t += low_inv[s, a, b] * r[s, c, b]
                    acc += t * t
                if keep_q:
                    q[s, c] = acc
                if keep_sums:
                    sums[c] += acc


def quadratic_sums(rows: np.ndarray, m: np.ndarray) -> np.ndarray | None:
    """Σ_s tr(M_s⁻¹ R_scᵀ R_sc) of every candidate of ``rows (S, C, a, p)``, ``(C,)``, in one
    compiled pass (Cholesky of ``m (S, p, p)``); None when M is too ill-conditioned for
    Cholesky in floating point (the caller then works from M⁻¹)."""
    low_inv = cholesky_inverse(m)
    if low_inv is None:
        return None
    n_s, n_c, n_a, n_p = rows.shape
    sums = np.empty(n_c * n_a)
    _triangular_loop(_plain3(rows.reshape(n_s, n_c * n_a, n_p)), low_inv, np.empty((0, 0)), sums)
    return sums.reshape(n_c, n_a).sum(axis=1)


def weighted_gram(rows: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Σ_c w_c R_scᵀ R_sc of ``rows (S, C, a, p)`` and weights ``w (C,)`` (the candidates
    with weight only), ``(S, p, p)``: one compiled pass, scenarios in parallel."""
    n_s, n_c, n_a, n_p = rows.shape
    nz = np.flatnonzero(w)
    out = np.zeros((n_s, n_p, n_p))
    _gram_loop(
        _plain3(rows.reshape(n_s, n_c * n_a, n_p)),
        np.repeat(w, n_a),
        (nz[:, None] * n_a + np.arange(n_a)).ravel(),
        out,
    )
    return out


@numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy", fastmath=_VECTOR_MATH)
def _gram_loop(r, w, nz, out):  # pragma: no cover - compiled
    """out_s = Σ_{i ∈ nz} w_i r_siᵀ r_si (lower triangle summed, then mirrored):
    ``r (S, N, p)``, ``w (N,)``, ``nz (k,) int``, ``out (S, p, p)`` zeroed. One scenario a
    thread, rows in order: sums that do not depend on the threads."""
    n_s, _, n_p = r.shape
    for s in numba.prange(n_s):
        for i in nz:
            wi = w[i]
            for a in range(n_p):
                ra = wi * r[s, i, a]
                for b in range(a + 1):
                    out[s, a, b] += ra * r[s, i, b]
        for a in range(n_p):
            for b in range(a):
                out[s, b, a] = out[s, a, b]


@numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy", fastmath=_VECTOR_MATH)
def columns_gram(t, w, out):  # pragma: no cover - compiled
    """out_s = T_s diag(w) T_sᵀ of columns ``t (S, p, N)``, ``w (N,)``, ``out (S, p, p)``:
    contiguous dot products (vector units), one scenario a thread."""
    n_s, n_p, n = t.shape
    for s in numba.prange(n_s):
        for a in range(n_p):
            for b in range(a + 1):
                acc = 0.0
                for i in range(n):
                    acc += w[i] * t[s, a, i] * t[s, b, i]
                out[s, a, b] = acc
                out[s, b, a] = acc


@numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy", fastmath=_VECTOR_MATH)
def columns_traces(t, low_inv, out):  # pragma: no cover - compiled
    """out_i = Σ_s |L_s⁻¹ t_s,:,i|² of columns ``t (S, p, N)``, ``low_inv (S, p, p)`` lower
    triangular, ``out (N,)``: candidates in blocks (one thread each), scenarios in order."""
    n_s, n_p, n = t.shape
    n_blocks = (n + LOOP_BLOCK - 1) // LOOP_BLOCK
    for blk in numba.prange(n_blocks):
        i0 = blk * LOOP_BLOCK
        i1 = min(n, i0 + LOOP_BLOCK)
        acc = np.zeros(i1 - i0)
        u = np.empty(i1 - i0)
        for s in range(n_s):
            for a in range(n_p):
                u[:] = 0.0
                for b in range(a + 1):
                    lab = low_inv[s, a, b]
                    for i in range(i0, i1):
                        u[i - i0] += lab * t[s, b, i]
                for k in range(i1 - i0):
                    acc[k] += u[k] * u[k]
        out[i0:i1] = acc
