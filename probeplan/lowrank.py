"""Forms that make the structures' induced field cheap to evaluate at many points.

* :class:`Responses` — the induced σ of many right-hand sides (scenarios × θ columns), kept
  whole with what the far field makes of them, since a plan maps the same ones at many points.
* :class:`Skeleton` — for points far from a conductor, its panels' field is a smooth
  (harmonic) function of the point, and a few "skeleton" panels with an interpolation matrix
  reproduce all of them to ~1e-12 (far below the solve's own round-off, eps · cond(A), and the
  panels' discretisation error): an interpolative decomposition (column-pivoted QR of a random
  sketch) of the field operator sampled on a check hemisphere around the conductor and its
  image (Cheng, Gimbutas, Martinsson & Rokhlin 2005, SIAM J. Sci. Comput. 26, 1389: the
  proxy-surface form). Beyond the check sphere every panel is in the centroid (point-charge)
  zone of the panel integrals, so the sampled operator is a sum of point-charge fields,
  harmonic outside the sphere, and its error is largest on the sphere itself (maximum
  principle; with the ground plane the sources and their images are symmetric about it, so the
  upper hemisphere holds that maximum). Each skeleton is checked on fresh points before use.

Imports only numpy and scipy: the operator is passed in by the caller (``bem``).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy import linalg

#: Pivots kept in the low-rank form of many responses, relative to the first (columns scaled
#: to unit norm): each column to ~1e-12 of its norm, below the solve's own round-off.
RANK_TOL = 1e-12
#: Multiply-adds per stacked matrix product (see small_products).
PRODUCT_ELEMENTS = 1 << 16
#: Far radius of a conductor, in radii of its bounding sphere (measured interpolation ranks of a
#: 1,000-panel tank at 1e-12: 550 at 4 radii, 190 at 6, 92 at 8).
FAR_RADII = 6.0
#: Check points on the hemisphere (oversampling the ranks above several times).
CHECK_POINTS = 700
#: Rows of the random sketch the decomposition is computed on (a column-pivoted QR of all
#: 3 × CHECK_POINTS rows cost seconds per conductor on a busy 2-core machine); a conductor
#: whose rank comes near it is left unskeletonised.
SKETCH_ROWS = 400
#: Relative size of the smallest pivot kept in the interpolative decomposition.
SKELETON_TOL = 1e-12
#: Largest relative error of the skeleton's field on fresh far points for it to be used.
SKELETON_CHECK = 1e-10


@dataclass(frozen=True, eq=False)
class Responses:
    """Induced σ of many right-hand sides, and what the far field makes of them (kept).

    Attributes
    ----------
    sigma : (n_panels, n_scenarios) float
        C/m².
    d_sigma : (n_panels, n_scenarios * n_cols) float or None
        Per unit of each θ column, scenario-major.
    """

    sigma: np.ndarray
    d_sigma: np.ndarray | None
    _reduced: dict = field(default_factory=dict, repr=False)

    @property
    def n_scenarios(self) -> int:
        return int(self.sigma.shape[1])

    @property
    def columns(self) -> np.ndarray:
        """``(n_panels, width)``: σ and ∂σ/∂θ side by side, what a panel operator maps."""
        if self.d_sigma is None:
            return self.sigma
        return np.concatenate([self.sigma, self.d_sigma], axis=1)

    def reduced(self, skeleton: Skeleton) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """:attr:`columns` carried onto the skeleton panels, as two factors ``basis``
        ``(n_skeleton, rank)`` and ``coef`` ``(rank, width)`` (kept, as a plan maps the same
        responses at many point sets), and ``keep``: None, or for a :meth:`subset` the columns
        of ``basis @ coef`` that are its own (the product is formed whole, so that its numbers
        are the whole block's to the bit: a BLAS may round a narrower product otherwise).

        The responses of many scenarios and θ columns to smooth external potentials have a
        low numerical rank (plan10: about 40 of 384 columns), so a far point costs the rank,
        not the width: a column-pivoted QR of the columns, each scaled to unit norm, cut where
        the pivots fall below ``RANK_TOL`` of the first (each column kept to about that
        fraction of its norm).
        """
        got = self._reduced.get("far")  # (one skeleton per structures; kept when pickled)
        if got is None:
            got = (*_low_rank(skeleton.interpolation @ self.columns), None)
            self._reduced["far"] = got
        return got

    def subset(self, scenarios: np.ndarray) -> Responses:
        """The responses of some of the scenarios ``(k,) int``, with the far form's columns
        taken from this one (so a block of scenarios reads the same numbers as the whole)."""
        n_s = self.n_scenarios
        sigma = self.sigma[:, scenarios]
        d_sigma = None
        keep = scenarios
        if self.d_sigma is not None:
            n_cols = self.d_sigma.shape[1] // n_s
            d_cols = (scenarios[:, None] * n_cols + np.arange(n_cols)).ravel()
            d_sigma = self.d_sigma[:, d_cols]
            keep = np.concatenate([scenarios, n_s + d_cols])
        out = Responses(sigma, d_sigma)
        if "far" in self._reduced:
            basis, coef, own = self._reduced["far"]
            out._reduced["far"] = (basis, coef, keep if own is None else own[keep])
        return out

    def split(self, mapped: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
        """The field of σ and of ∂σ/∂θ from the field of :attr:`columns` ``(m, width)``:
        ``(m, n_scenarios)`` and ``(m, n_scenarios * n_cols)`` or None."""
        n_s = self.n_scenarios
        return mapped[:, :n_s], (None if self.d_sigma is None else mapped[:, n_s:])


@dataclass(frozen=True, eq=False)
class Skeleton:
    """Skeleton panels that stand for all panels of the conductors at far points.

    Attributes
    ----------
    centres_m : (n_conductors, 3) float
        Centre of each conductor's check sphere (on the plane below it, with a ground).
    far_m : (n_conductors,) float
        Radius beyond which a point is far from that conductor (inf: never).
    panels : (n_skeleton,) int
        Indices of the skeleton panels, conductor by conductor.
    interpolation : (n_skeleton, n_panels) float
        Panel charges → skeleton charges with the same far field (zero between conductors).
    """

    centres_m: np.ndarray
    far_m: np.ndarray
    panels: np.ndarray
    interpolation: np.ndarray

    def far(self, points_m: np.ndarray) -> np.ndarray:
        """``(n_points,) bool``: far from every conductor."""
        d = np.linalg.norm(points_m[:, None, :] - self.centres_m[None], axis=2)
        return np.all(d >= self.far_m[None], axis=1)

    @classmethod
    def build(
        cls,
        triangles_m: np.ndarray,
        owner: np.ndarray,
        sizes_m: np.ndarray,
        ground_z_m: float | None,
        operator: Callable[[np.ndarray, np.ndarray], np.ndarray],
        centroid_sizes: float,
    ) -> Skeleton:
        """Interpolative decomposition of each conductor's far field.

        Parameters
        ----------
        triangles_m : (n_panels, 3, 3) float
        owner : (n_panels,) int
        sizes_m : (n_panels,) float
            Longest edge of each panel.
        ground_z_m : float or None
        operator : callable
            ``operator(points_m (m, 3), panel_indices (k,))`` → ``(m, 3, k)`` field per unit σ
            of those panels, with the images.
        centroid_sizes : float
            Distance, in panel sizes, beyond which the operator takes a panel as a point
            charge at its centroid (the check sphere lies beyond it for every panel).
        """
        n_cond = int(owner.max()) + 1 if owner.size else 0
        centres = np.zeros((n_cond, 3))
        far = np.full(n_cond, np.inf)
        chosen, blocks = [], []
        n = triangles_m.shape[0]
        for k in range(n_cond):
            mine = np.flatnonzero(owner == k)
            verts = triangles_m[mine].reshape(-1, 3)
            c = 0.5 * (verts.min(axis=0) + verts.max(axis=0))
            if ground_z_m is not None:
                c[2] = ground_z_m
            radius = float(np.linalg.norm(verts - c, axis=1).max())
            # beyond it, every panel (and image) is in the point-charge zone of the integrals
            r_far = max(FAR_RADII * radius, radius + centroid_sizes * float(sizes_m[mine].max()))
            centres[k] = c
            checks = c + r_far * _hemisphere(CHECK_POINTS, ground_z_m is not None)
            op = operator(checks, mine).reshape(-1, mine.size)
            skel, interp = _interpolative(op)
            if not _holds(skel, interp, c, r_far, mine, operator, ground_z_m is not None):
                chosen.append(mine)
                blocks.append((mine, np.eye(mine.size)))
                continue
            far[k] = r_far
            chosen.append(mine[skel])
            blocks.append((mine, interp))
        panels = np.concatenate(chosen) if chosen else np.zeros(0, int)
        interpolation = np.zeros((panels.size, n))
        row = 0
        for mine, interp in blocks:
            interpolation[row : row + interp.shape[0], mine] = interp
            row += interp.shape[0]
        return cls(centres, far, panels, interpolation)


def small_products(a: np.ndarray, b: np.ndarray, out: np.ndarray) -> np.ndarray:
    """``out = a @ b`` for a tall ``a (n, k)`` and a small ``b (k, m)``, in stacked pieces.

    Each piece is small enough that the BLAS library runs it on the calling thread: one big
    product would be split over threads, and waking them costs more than the product itself
    on a busy machine (measured: 3x slower end to end on a loaded 2-core host), and a piece
    run on one thread rounds the same in a worker process as here (shards of a plan).
    """
    n = a.shape[0]
    rows = max(1, PRODUCT_ELEMENTS // max(a.shape[1] * b.shape[1], 1))
    main = n - n % rows
    if main:
        np.matmul(
            a[:main].reshape(-1, rows, a.shape[1]), b, out=out[:main].reshape(-1, rows, b.shape[1])
        )
    if main < n:
        np.matmul(a[main:], b, out=out[main:])
    return out


def _low_rank(matrix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``matrix ≈ basis @ coef`` (see :meth:`Responses.reduced`); the identity factors when
    the rank is not below half the width."""
    norms = np.linalg.norm(matrix, axis=0)
    norms = np.where(norms > 0.0, norms, 1.0)
    q, r, perm = linalg.qr(matrix / norms, mode="economic", pivoting=True, check_finite=False)
    diag = np.abs(np.diag(r))
    k = int(np.count_nonzero(diag > RANK_TOL * diag[0])) if diag.size and diag[0] else 0
    if 2 * k >= min(matrix.shape):
        return matrix, np.eye(matrix.shape[1])
    coef = np.empty((k, matrix.shape[1]))
    coef[:, perm] = r[:k]
    return np.ascontiguousarray(q[:, :k]), coef * norms


def _hemisphere(n: int, upper: bool) -> np.ndarray:
    """``(n, 3)`` near-uniform unit vectors (Fibonacci lattice), z ≥ 0 when ``upper``."""
    i = np.arange(n) + 0.5
    z = i / n if upper else 1.0 - 2.0 * i / n
    phi = np.pi * (1.0 + np.sqrt(5.0)) * i
    rho = np.sqrt(1.0 - z * z)
    return np.c_[rho * np.cos(phi), rho * np.sin(phi), z]


def _holds(skel, interp, centre, r_far, mine, operator, upper: bool) -> bool:
    """Whether a skeleton is worth having (at most half the panels, clear of the sketch's
    size) and reproduces the field of random charges at fresh points beyond the far radius
    to ``SKELETON_CHECK``."""
    if 2 * skel.size > mine.size or skel.size > 0.8 * SKETCH_ROWS:
        return False
    rng = np.random.default_rng(1)
    dirs = _hemisphere(97, upper)
    pts = centre + r_far * rng.uniform(1.0, 1.5, (dirs.shape[0], 1)) * dirs
    op = operator(pts, mine).reshape(-1, mine.size)
    charges = rng.normal(size=(mine.size, 4)) + 1.0
    exact = op @ charges
    err = np.abs(exact - op[:, skel] @ (interp @ charges)).max()
    return bool(err <= SKELETON_CHECK * np.abs(exact).max())


def _interpolative(op: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Column interpolative decomposition ``op ≈ op[:, skel] @ interp`` by column-pivoted QR
    of a random sketch of the rows (Gaussian, fixed seed: the same skeleton every run);
    ``skel`` ``(k,)`` int, ``interp`` ``(k, n_columns)``."""
    if op.shape[0] > SKETCH_ROWS:
        op = np.random.default_rng(0).normal(size=(SKETCH_ROWS, op.shape[0])) @ op
    _, r, perm = linalg.qr(op, mode="economic", pivoting=True, check_finite=False)
    diag = np.abs(np.diag(r))
    k = int(np.count_nonzero(diag > SKELETON_TOL * diag[0])) if diag.size and diag[0] else 0
    interp = np.zeros((k, op.shape[1]))
    interp[:, perm[:k]] = np.eye(k)
    if k:
        interp[:, perm[k:]] = linalg.solve_triangular(r[:k, :k], r[:k, k:], check_finite=False)
    return perm[:k], interp


__all__ = ["Responses", "Skeleton", "small_products"]
