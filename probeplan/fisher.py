"""Fisher information, design criteria, Cramér–Rao bounds and unresolved directions.

For one scenario with readings m = h(θ) + noise, noise Gaussian with covariance Σ, the Fisher
information is J = Gᵀ Σ⁻¹ G with G = ∂h/∂θ (e.g. Kay, Fundamentals of Statistical Signal
Processing, vol. 1: Estimation Theory, §3.9). With whitened rows r = (∂m/∂θ)/σ this is
J = Σ r rᵀ. The Cramér–Rao bound says no unbiased estimator has covariance below J⁻¹.

Criteria (the contract's exact definitions), per scenario s:

* ``d``: log det J_s (natural log, SI units), maximised — D-optimal design;
* ``location``: sqrt(C_xx + C_yy) of source 0, C = J_s⁻¹, minimised (m);
* ``charge``: sqrt(C_qq)/|q| of source 0, minimised (fraction).

Aggregates over scenarios: ``mean``, ``worst`` (min of d, max of the others) and
``quantile:q``, the q-quantile of the *badness*: for the error criteria the q-quantile, for
``d`` that of −log det, negated, so that ``quantile:0.9`` reads "90 % of scenarios do at least
this well" for every criterion. A singular J_s scores −inf (d) or +inf (the others).

Inverses are taken on the correlation-scaled matrix D J D with D = diag(J)^(-1/2), so that
parameters in coulombs, metres and V/m do not ruin the conditioning.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .resulttypes import Direction
from .sources import _call_compiled, _jit

CRITERIA: tuple[str, ...] = ("d", "location", "charge")
AGGREGATE_NAMES: tuple[str, ...] = ("mean", "worst", "quantile:q")

#: Relative eigenvalue λ_min/λ_max of the scaled J = D J D below which J counts as singular
#: (the layout cannot resolve some combination of parameters); the same threshold marks a
#: direction as unresolved. Float64 round-off leaves a rank-deficient J near 1e-16.
SINGULAR_RTOL = 1e-12
#: Relative eigenvalue of the scaled J below which a direction is reported as poorly resolved
#: (1e-4: errors along it are 100 times larger than along the best-resolved direction).
WEAK_RTOL = 1e-4


def fisher_from_rows(rows: np.ndarray) -> np.ndarray:
    """Fisher information from whitened rows.

    Parameters
    ----------
    rows : (..., n_readings, n_params) float
        Reading gradients divided by their noise.

    Returns
    -------
    (..., n_params, n_params) float
        J = Σ rows rowsᵀ, in 1/(unit θ_i · unit θ_j).
    """
    # A stacked matrix product: about 3x faster than the equivalent einsum on the small
    # (n_readings, n_params) blocks of a batch of layouts; same sums, rounded in another order.
    return np.matmul(np.swapaxes(rows, -1, -2), rows)


def _scaled(fisher: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Correlation scaling: returns (D J D, d) with d = diag(J)^(-1/2) (0 where diag is 0)."""
    diag = np.diagonal(fisher, axis1=-2, axis2=-1)
    d = np.where(diag > 0, 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0)), 0.0)
    return fisher * d[..., :, None] * d[..., None, :], d


def _singular_from_scaled(scaled: np.ndarray, d: np.ndarray, sign, logdet) -> np.ndarray:
    """(...,) bool: the scaled information has a zero diagonal or λ_min/λ_max < SINGULAR_RTOL.

    λ_min/λ_max of D J D is the test (the same as :func:`unresolved_directions` uses). Since
    det(D J D) ≤ λ_min · λ_max^(p−1) and λ_max ≤ tr(D J D) = p, a determinant (already at hand
    from the LU of ``slogdet``) of at least SINGULAR_RTOL · p^p gives λ_min ≥ SINGULAR_RTOL · p
    ≥ SINGULAR_RTOL · λ_max and proves a matrix regular; only the others — few, in practice —
    pay for an eigendecomposition.
    """
    p = scaled.shape[-1]
    # An array even for one matrix (no batch axis), so the entries to check can be assigned.
    singular = np.asarray(np.any(d == 0.0, axis=-1) | (sign <= 0))
    if p == 0:
        return singular
    proven = ~singular & (logdet >= np.log(SINGULAR_RTOL) + p * np.log(p))
    check = ~singular & ~proven
    if np.any(check):
        eig = np.linalg.eigvalsh(scaled[check])
        singular[check] = ~(eig[..., 0] > SINGULAR_RTOL * eig[..., -1])
    return singular


def _is_singular(fisher: np.ndarray) -> np.ndarray:
    """(...,) bool: J cannot be inverted meaningfully (see :func:`_singular_from_scaled`);
    the matrices the compiled Cholesky proves regular (:func:`_proven_log_dets`) are not
    factored again."""
    fisher = np.asarray(fisher, dtype=float)
    flat, _, proven = _proven_log_dets(fisher)
    singular = np.zeros(flat.shape[0], dtype=bool)
    if not proven.all():
        singular[~proven] = _lu_test(flat[~proven])[0]
    return singular.reshape(fisher.shape[:-2])


def _lu_test(fisher: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The LU and eigenvalue test of :func:`_singular_from_scaled` on ``fisher (..., p, p)``:
    (singular ``(...,)`` bool, log det of the scaled matrix ``(...,)``, d ``(..., p)``)."""
    scaled, d = _scaled(fisher)
    sign, logdet = np.linalg.slogdet(scaled)
    return _singular_from_scaled(scaled, d, sign, logdet), logdet, d


def covariance(fisher: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cramér–Rao covariance J⁻¹, computed on the scaled matrix.

    Parameters
    ----------
    fisher : (..., n_params, n_params) float

    Returns
    -------
    cov : (..., n_params, n_params) float
        J⁻¹; rows of a singular J are filled with +inf on the diagonal and 0 elsewhere.
    singular : (...,) bool
    """
    singular = _is_singular(fisher)
    scaled, d = _scaled(fisher)
    eye = np.eye(fisher.shape[-1])
    safe = np.where(singular[..., None, None], eye, scaled)
    cov = np.linalg.inv(safe) * d[..., :, None] * d[..., None, :]
    inf_diag = np.where(eye > 0, np.inf, 0.0)
    return np.where(singular[..., None, None], inf_diag, cov), singular


def crb_std(fisher: np.ndarray) -> np.ndarray:
    """1-sigma Cramér–Rao bounds sqrt(diag(J⁻¹)).

    Parameters
    ----------
    fisher : (..., n_params, n_params) float

    Returns
    -------
    (..., n_params) float
        In the unit of each parameter; +inf where J is singular.
    """
    cov, _ = covariance(fisher)
    return np.sqrt(np.diagonal(cov, axis1=-2, axis2=-1))


def log_det(fisher: np.ndarray) -> np.ndarray:
    """log det J (natural log, SI units); −inf where J is singular. Shape (...,).

    A compiled loop scales each matrix, factors it by Cholesky and keeps the matrices it proves
    regular with room to spare (see :func:`_log_det_loop`); the rest — a failed factorisation,
    a non-finite entry or a matrix too near the threshold to prove anything, few in practice —
    go through :func:`_log_det_checked`, the LU and eigenvalue test, so that every matrix is
    classified as that test classifies it.
    """
    fisher = np.asarray(fisher, dtype=float)
    flat, out, proven = _proven_log_dets(fisher)
    if not proven.all():
        rest = ~proven
        out[rest] = _log_det_checked(flat[rest])
    return out.reshape(fisher.shape[:-2])


def _proven_log_dets(fisher: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The matrices of ``fisher (..., p, p)`` as ``flat (n, p, p)``, with the log det of each
    that :func:`_log_det_loop` proves regular, ``(n,)``, and which those are, ``(n,) bool``."""
    p = fisher.shape[-1]
    n = math.prod(fisher.shape[:-2])
    flat = np.ascontiguousarray(fisher).reshape(n, p, p)
    out = np.empty(n)
    proven = np.zeros(n, dtype=np.bool_)
    if p and n:
        det_proof = math.log(SINGULAR_RTOL) + p * math.log(p) + math.log(_PROOF_MARGIN)
        lam_floor = _PROOF_MARGIN * SINGULAR_RTOL * p
        _call_compiled(_log_det_loop, flat, det_proof, lam_floor, out, proven)
    return flat, out, proven


def _log_det_checked(fisher: np.ndarray) -> np.ndarray:
    """:func:`log_det` by LU (``slogdet``) and, where the determinant proves nothing, the
    eigenvalues of the scaled matrix."""
    singular, logdet, d = _lu_test(fisher)
    # log det J = log det(D J D) − 2 Σ log d_i, without a second factorisation.
    with np.errstate(divide="ignore"):
        full = logdet - 2.0 * np.sum(np.log(np.where(d > 0, d, 1.0)), axis=-1)
    return np.where(singular, -np.inf, full)


#: How far beyond the singularity rule's threshold a Cholesky proof must be: LU and Cholesky
#: round a nearly singular matrix's determinant differently (measured: 2.8e-5 apart in log at
#: the threshold), and a matrix that straddles the threshold must be classified as the LU and
#: eigenvalue test does. A factor 1000 leaves only matrices with κ ≲ 1e10, whose determinants
#: and eigenvalues every factorisation gets to ~1e-6.
_PROOF_MARGIN = 1e3
#: Below this a running product of pivots is folded into a sum of logs (no underflow).
_TINY_PRODUCT = 1e-280
_LN2 = math.log(2.0)


@_jit
def _log_det_loop(fisher, det_proof, lam_floor, out, proven):
    """log det of each ``fisher[i] (p, p)`` by Cholesky A = L Lᵀ of its correlation-scaled
    form A, into ``out[i]``, and ``proven[i]`` when A is shown regular by the rule of
    :func:`_singular_from_scaled` (λ_min/λ_max ≥ SINGULAR_RTOL), with room to spare:

    * its log det is at least ``det_proof`` (see :func:`_singular_from_scaled`), or
    * 1/‖L⁻¹‖_F² ≥ ``lam_floor``: since λ_min(A) = 1/‖A⁻¹‖₂ ≥ 1/‖A⁻¹‖_F ≥ 1/‖L⁻¹‖_F²
      (‖A⁻¹‖_F = ‖L⁻ᵀL⁻¹‖_F ≤ ‖L⁻¹‖_F²) and λ_max(A) ≤ tr A = p, this proves well-conditioned
      matrices of any size, where the determinant proves nothing from 12 parameters on (a
      scaled determinant is at most 1) and little for correlated parameters.

    Matrices with a non-positive diagonal entry, a non-finite entry or a failed factorisation
    are left unproven.

    Logs are taken of products, two a matrix: the scaled pivots lie in (0, 1] up to rounding
    (a pivot is a conditional variance of a unit-diagonal matrix), and the diagonal's product
    is kept as mantissa × 2^exponent, so neither can overflow; a product of pivots near
    underflow is folded into the sum early."""
    n, p, _ = fisher.shape
    d = np.empty(p)
    low = np.empty((p, p))
    inv_col = np.empty(p)
    for i in range(n):
        proven[i] = False
        out[i] = 0.0
        ok = True
        # (the factorisation reads the lower triangle: a NaN or inf above it must not pass)
        for j in range(p):
            for k in range(j + 1, p):
                if not math.isfinite(fisher[i, j, k]):
                    ok = False
        diag_mant, diag_exp = 1.0, 0  # Π J_jj
        for j in range(p):
            if not ok:
                break
            ajj = fisher[i, j, j]
            if not ajj > 0.0:
                ok = False
                break
            d[j] = 1.0 / math.sqrt(ajj)
            mant, ex = math.frexp(ajj)
            diag_mant, diag_exp = diag_mant * mant, diag_exp + ex
            if diag_mant < _TINY_PRODUCT:
                mant, ex = math.frexp(diag_mant)
                diag_mant, diag_exp = mant, diag_exp + ex
        if not ok:
            continue
        pivots, logdet = 1.0, 0.0
        for j in range(p):
            acc = fisher[i, j, j] * d[j] * d[j]
            for k in range(j):
                acc -= low[j, k] * low[j, k]
            if not acc > 0.0:
                ok = False
                break
            ljj = math.sqrt(acc)
            low[j, j] = ljj
            pivots *= acc
            if pivots < _TINY_PRODUCT:
                logdet += math.log(pivots)
                pivots = 1.0
            for r in range(j + 1, p):
                acc_r = fisher[i, r, j] * d[r] * d[j]
                for k in range(j):
                    acc_r -= low[r, k] * low[j, k]
                low[r, j] = acc_r / ljj
        if not ok:
            continue
        logdet += math.log(pivots)
        if not logdet >= det_proof:
            # ‖L⁻¹‖_F², column by column of L⁻¹ (forward substitution of e_c)
            frob = 0.0
            for c in range(p):
                for r in range(c, p):
                    acc = 1.0 if r == c else 0.0
                    for k in range(c, r):
                        acc -= low[r, k] * inv_col[k]
                    inv_col[r] = acc / low[r, r]
                    frob += inv_col[r] * inv_col[r]
            if not frob * lam_floor <= 1.0:
                continue
        # log det J = log det(D J D) + Σ log J_jj
        out[i] = logdet + math.log(diag_mant) + diag_exp * _LN2
        proven[i] = True


def layout_information(
    jacobian: np.ndarray,
    axes: np.ndarray,
    weights: np.ndarray,
    base: np.ndarray,
    n_layouts: int,
) -> np.ndarray:
    """Fisher information of consecutive groups of probes (layouts), in one compiled pass.

    The same as ``base + fisher_from_rows(rows)`` summed over each layout's probes, with
    ``rows = weights × (axes · jacobian)`` (:func:`probeplan.probes.whitened_rows`), without
    the rows ever being stored.

    Parameters
    ----------
    jacobian : (n_scenarios, n_layouts * n_probes, 3, n_params) float
        ∂E/∂θ at each probe, layouts one after the other.
    axes : (n_layouts * n_probes, n_axes, 3) float
    weights : (n_scenarios, n_layouts * n_probes, n_axes) float
        gain / σ of each reading, 0 where saturated (:func:`probeplan.probes.reading_weights`).
    base : (n_scenarios, n_params, n_params) float
        Information every layout has already (the installed meters').
    n_layouts : int
        How many layouts the probes make, each of n_probes = n_points / n_layouts (0 probes:
        each layout's information is ``base``).

    Returns
    -------
    (n_layouts, n_scenarios, n_params, n_params) float
    """
    n_s, n_pts, _, p = jacobian.shape
    n_probes = n_pts // n_layouts if n_layouts else 0
    if n_probes * n_layouts != n_pts:
        raise ValueError(f"{n_pts} probes do not split into {n_layouts} layouts of equal size.")
    out = np.empty((n_layouts, n_s, p, p))
    if out.size:
        _call_compiled(
            _layout_information_loop,
            np.require(jacobian, float, "C"),
            np.require(axes, float, "C"),
            np.require(weights, float, "C"),
            np.require(base, float, "C"),
            int(n_probes),
            out,
        )
    return out


#: Scenarios summed side by side in :func:`_layout_information_loop` (the vector lanes).
_SCENARIO_BLOCK = 64


@_jit
def _layout_information_loop(jac, axes, weights, base, n_probes, out):
    """``out[l, s] = base[s] + Σ_{m in layout l} Σ_a r rᵀ``, r = w[s, m, a] axes[m, a] · jac[s, m].

    Blocks of scenarios run side by side in the innermost loops (each scenario's sum still
    runs over the readings in order), so that the compiler vectorises them: about 3x faster
    than one scenario at a time on 5 parameters. A saturated reading (w = 0) adds zeros.
    """
    n_l, n_s, p, _ = out.shape
    n_a = axes.shape[1]
    acc = np.empty((p, p, _SCENARIO_BLOCK))
    row = np.empty((p, _SCENARIO_BLOCK))
    for lay in range(n_l):
        for s0 in range(0, n_s, _SCENARIO_BLOCK):
            nb = min(_SCENARIO_BLOCK, n_s - s0)
            for i in range(p):
                for j in range(i + 1):
                    for b in range(nb):
                        acc[i, j, b] = base[s0 + b, i, j]
            for m in range(lay * n_probes, (lay + 1) * n_probes):
                for a in range(n_a):
                    a0, a1, a2 = axes[m, a, 0], axes[m, a, 1], axes[m, a, 2]
                    for i in range(p):
                        for b in range(nb):
                            s = s0 + b
                            row[i, b] = weights[s, m, a] * (
                                a0 * jac[s, m, 0, i] + a1 * jac[s, m, 1, i] + a2 * jac[s, m, 2, i]
                            )
                    for i in range(p):
                        for j in range(i + 1):
                            for b in range(nb):
                                acc[i, j, b] += row[i, b] * row[j, b]
            for i in range(p):
                for j in range(i + 1):
                    for b in range(nb):
                        out[lay, s0 + b, i, j] = acc[i, j, b]
                        out[lay, s0 + b, j, i] = acc[i, j, b]


@dataclass(frozen=True)
class Criterion:
    """A design criterion bound to the parameter indices it reads.

    Parameters
    ----------
    name : {"d", "location", "charge"}
    x_index, y_index : int or None
        Columns of source 0's x and y (``location``).
    charge_index : int or None
        Column of source 0's charge (``charge``).
    """

    name: str
    x_index: int | None = None
    y_index: int | None = None
    charge_index: int | None = None

    def __post_init__(self) -> None:
        if self.name not in CRITERIA:
            raise ValueError(f"criterion must be one of {', '.join(CRITERIA)}; got {self.name!r}.")

    @property
    def maximise(self) -> bool:
        return self.name == "d"

    @property
    def unit(self) -> str:
        return {"d": "log det, SI", "location": "m", "charge": "fraction"}[self.name]

    @property
    def error_indices(self) -> tuple[int, ...]:
        """Columns whose variances an error criterion adds: (x, y) or (charge,); () for d."""
        if self.name == "location":
            return (self.x_index, self.y_index)
        if self.name == "charge":
            return (self.charge_index,)
        return ()

    def error_from_variance(self, var: np.ndarray, theta_est: np.ndarray) -> np.ndarray:
        """An error criterion from the summed variance of :attr:`error_indices`.

        Parameters
        ----------
        var : (n_scenarios, ...) float
            Σ C_ii over the error indices, per scenario (leading axis).
        theta_est : (n_scenarios, n_params) float

        Returns
        -------
        same shape as ``var``: sqrt(var) in m (location) or sqrt(var)/|q| (charge).
        """
        err = np.sqrt(np.maximum(var, 0.0))
        if self.name == "charge":
            q = np.abs(theta_est[:, self.charge_index])
            err = err / q.reshape(q.shape + (1,) * (err.ndim - 1))
        return err

    def per_scenario(
        self, fisher: np.ndarray, theta_est: np.ndarray, *, threshold: bool = True
    ) -> np.ndarray:
        """Criterion value of each scenario.

        Parameters
        ----------
        fisher : (..., n_scenarios, n_params, n_params) float
        theta_est : (n_scenarios, n_params) float
            Estimated parameters of each scenario (the charge for ``charge``).
        threshold : bool
            Apply the singularity rule (the contract's −inf / +inf). The search turns it off for
            matrices made positive definite by its tiny prior, whose first picks must still be
            told apart by how much they add.

        Returns
        -------
        (..., n_scenarios) float
        """
        if self.name == "d":
            if threshold:
                return log_det(fisher)
            sign, ld = np.linalg.slogdet(fisher)
            return np.where(sign > 0, ld, -np.inf)
        cov = covariance(fisher)[0] if threshold else np.linalg.inv(fisher)
        var = sum(cov[..., i, i] for i in self.error_indices)
        # Scenarios last in `var`; error_from_variance wants them first.
        return np.moveaxis(self.error_from_variance(np.moveaxis(var, -1, 0), theta_est), 0, -1)


def parse_aggregate(text: str) -> tuple[str, float]:
    """``"mean" | "worst" | "quantile:q"`` → (kind, q); raises ValueError listing the choices."""
    if text in ("mean", "worst"):
        return text, 0.0
    if text.startswith("quantile:"):
        try:
            q = float(text.split(":", 1)[1])
        except ValueError:
            q = float("nan")
        if 0.0 < q < 1.0:
            return "quantile", q
        raise ValueError(f"aggregate `{text}`: q must be a number between 0 and 1 (exclusive).")
    raise ValueError(f"aggregate must be one of mean, worst, quantile:q (0 < q < 1); got {text!r}.")


def aggregate(values: np.ndarray, how: str, maximise: bool) -> np.ndarray:
    """Aggregate per-scenario criterion values.

    Parameters
    ----------
    values : (..., n_scenarios) float
    how : "mean" | "worst" | "quantile:q"
    maximise : bool
        True for ``d`` (larger is better).

    Returns
    -------
    (...,) float
    """
    kind, q = parse_aggregate(how)
    # numpy sums a contiguous last axis pairwise and a strided one in sequence: one layout, so
    # the same values give the same bits however they were computed (slogdet's output is
    # strided; scenario blocks joined from a cluster are not).
    values = np.ascontiguousarray(values)
    if kind == "mean":
        with np.errstate(invalid="ignore"):
            out = np.mean(values, axis=-1)
        # A mix of +inf and −inf cannot occur (one criterion has one direction of failure).
        return out
    if kind == "worst":
        return np.min(values, axis=-1) if maximise else np.max(values, axis=-1)
    # 'inverted_cdf' keeps ±inf from poisoning a quantile through interpolation. For d the
    # badness is −log det: negate, not the (1 − q)-quantile, which is one order statistic
    # lower whenever n_scenarios·(1 − q) is a whole number.
    if maximise:
        return -np.quantile(-values, q, axis=-1, method="inverted_cdf")
    return np.quantile(values, q, axis=-1, method="inverted_cdf")


def d_ratio(value_a: float, value_b: float, n_params: int) -> float:
    """D-ratio exp((a − b)/n_params): how much more information per parameter a has than b."""
    if not np.isfinite(value_b):
        return float("inf") if np.isfinite(value_a) else float("nan")
    return float(np.exp((value_a - value_b) / n_params))


def unresolved_directions(
    fisher: np.ndarray, names: tuple[str, ...], ground: bool = False, max_terms: int = 3
) -> list[Direction]:
    """Parameter combinations that a layout cannot resolve or resolves poorly.

    Parameters
    ----------
    fisher : (n_params, n_params) float
        J of one scenario.
    names : tuple of n_params str
    ground : bool
        Whether the scene has a grounded plane (adds the dipole explanation for charge–height).
    max_terms : int
        Most parameters named per direction.

    Returns
    -------
    list of Direction, worst first. Empty when every direction is resolved.
    """
    p = len(names)
    out: list[Direction] = []
    diag = np.diagonal(fisher)
    for i in np.nonzero(~(diag > 0))[0]:
        w = np.zeros(p)
        w[i] = 1.0
        text = f"{names[i]} is not seen by any reading (no probe senses it, or all saturate)"
        out.append(Direction(w, 0.0, True, text))
    seen = np.nonzero(diag > 0)[0]
    if seen.size == 0:
        return out
    scaled, _ = _scaled(fisher[np.ix_(seen, seen)])
    eigval, eigvec = np.linalg.eigh(scaled)
    top = max(eigval[-1], np.finfo(float).tiny)
    for k in range(seen.size):
        rel = eigval[k] / top
        if rel >= WEAK_RTOL:
            break
        w = np.zeros(p)
        w[seen] = eigvec[:, k]
        w *= np.sign(w[np.argmax(np.abs(w))])
        singular = bool(rel < SINGULAR_RTOL)
        text = _describe(w, names, ground, max_terms, singular)
        out.append(Direction(w, float(max(rel, 0.0)), singular, text))
    return out


def _describe(
    w: np.ndarray, names: tuple[str, ...], ground: bool, max_terms: int, singular: bool = True
) -> str:
    """A direction in words: the parameters it moves and how, with the physics where known."""
    order = np.argsort(-np.abs(w))
    main = [int(i) for i in order[:max_terms] if abs(w[i]) >= 0.25 * abs(w[order[0]])]
    if len(main) == 1:
        return f"{names[main[0]]} is not pinned down by this layout"
    parts = ", ".join(names[i] for i in main[:-1]) + f" and {names[main[-1]]}"
    # Signed moves that leave the readings (nearly) unchanged, e.g. "s0.charge_c up with
    # s0.z_m down"; signs refer to the parameters' own values (a negative charge going "up"
    # becomes smaller in magnitude).
    lead = main[0]
    moves = ", ".join(
        f"{names[i]} {'up' if np.sign(w[i]) == np.sign(w[lead]) else 'down'}" for i in main[1:]
    )
    change = f"{names[lead]} up with {moves}"
    if singular:
        text = f"{parts}: only a combination is seen ({change} leaves every reading unchanged)"
    else:
        text = f"{parts} are hard to tell apart: strongly correlated errors ({change})"
    src = {n.split(".")[0] for n in (names[i] for i in main)}
    kinds = {n.split(".", 1)[1] for n in (names[i] for i in main)}
    if ground and len(src) == 1 and {"charge_c", "z_m"} <= kinds:
        s = src.pop()
        extra = sorted(kinds - {"charge_c", "z_m"})
        also = f" (with {', '.join(s + '.' + k for k in extra)})" if extra else ""
        if singular:
            text = f"charge and height of {s}{also} trade off: only their product is seen"
        else:
            text = (
                f"charge and height of {s}{also} are hard to tell apart: mainly their product "
                "is seen"
            )
        text += " (seen from the probes, a charge and its ground image act as a dipole, 2qh)"
    return text
