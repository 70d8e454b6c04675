"""Density grids: every cell a uniformly charged rectangular box, field and field gradient in
closed form (Nagy, Papp & Benedek 2000, "The gravitational potential and its derivatives for the
prism", J. Geodesy 74), summed by parts over the shared cell corners; Gauss–Legendre quadrature
per cell far away, where the corner sums would cancel.
"""

from __future__ import annotations

import math

import numpy as np

from ._common import _blocks, _call_compiled, _jac_buffer, _jit, _raise_on_charge
from .kinds import K_COULOMB


def _log_r_plus(a, r, b2):
    """ln(a + r) with r = sqrt(a² + b2), stable for a < 0; b2 = 0 and a < 0 uses a tiny b2.

    Where a < 0, ln(a + r) = ln(b2) − ln(r − a). A term that is constant along the coordinate
    ``a`` cancels in the alternating corner sum, so replacing b2 = 0 by a tiny value only
    matters on a charged edge, where the true value is infinite.
    """
    tiny = np.finfo(float).tiny
    with np.errstate(divide="ignore", invalid="ignore"):
        neg = np.log(np.maximum(b2, tiny)) - np.log(r - a)
        pos = np.log(np.where(a >= 0, a + r, 1.0))
    return np.where(a >= 0, pos, neg)


def _atan_ratio(num, den):
    """arctan(num/den) with den = +0 read as the limit from den > 0 (0 when num = 0)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.arctan(num / den)
    edge = den == 0.0
    return np.where(edge, 0.5 * np.pi * np.sign(num), out)


def _grid_corner_terms(xi, eta, zeta, want_grad):
    """Box antiderivatives at corner offsets (source corner − point), all (S, m, cx, cy, cz).

    Field: E_x = k Σ w [η ln(ζ+R) + ζ ln(η+R) − ξ atan(ηζ/(ξR))], cyclic for y, z.
    Gradient: dE_x/dx = k Σ w atan(ηζ/(ξR)), dE_x/dy = −k Σ w ln(ζ+R), and so on.
    """
    xi2, eta2, zeta2 = xi * xi, eta * eta, zeta * zeta
    r = np.sqrt(xi2 + eta2 + zeta2)
    ln_x = _log_r_plus(xi, r, eta2 + zeta2)
    ln_y = _log_r_plus(eta, r, xi2 + zeta2)
    ln_z = _log_r_plus(zeta, r, xi2 + eta2)
    at_x = _atan_ratio(eta * zeta, xi * r)
    at_y = _atan_ratio(xi * zeta, eta * r)
    at_z = _atan_ratio(xi * eta, zeta * r)
    with np.errstate(invalid="ignore"):
        gx = eta * ln_z + zeta * ln_y - xi * at_x
        gy = zeta * ln_x + xi * ln_z - eta * at_y
        gz = xi * ln_y + eta * ln_x - zeta * at_z
    # At a cell vertex (R = 0) the logs are -inf and 0 * -inf gave NaN, but every term tends to
    # 0 there (|η ln(ζ + R)| <= R |ln R| -> 0): the field at a vertex is finite, so use the limit.
    vertex = r == 0.0
    if np.any(vertex):
        gx, gy, gz = (np.where(vertex, 0.0, g) for g in (gx, gy, gz))
    if not want_grad:
        return (gx, gy, gz), None
    grad = (at_x, at_y, at_z, -ln_z, -ln_y, -ln_x)  # xx, yy, zz, xy, xz, yz
    return (gx, gy, gz), grad


def _corner_weights(rho: np.ndarray) -> np.ndarray:
    """Triple difference of the zero-padded density: Σ_cells ρ Σ_corners ± f = Σ_corners w f."""
    p = np.pad(rho, 1)
    return -np.diff(np.diff(np.diff(p, axis=0), axis=1), axis=2)


# Far from the grid, Gauss–Legendre quadrature per cell replaces the corner sums: (distance from
# the grid's box in largest cell sides, nodes per axis), the first row that applies. Measured
# error bounds of field and gradient per row: 6e-13/4e-12, 1e-12/5e-12, 2e-12/6e-12.
_GRID_FAR_RULES = ((300.0, 2), (30.0, 3), (10.0, 4))
# The corner sums lose digits with the distance measured in their own length scale, the smallest
# gap between the corners that carry weight (one cell for a varying density, the whole box for a
# uniform one): they are used within this many such gaps (error ~1e-11 there), and within the
# second number when they are also ten times fewer than the quadrature nodes (error ~3e-10).
_GRID_CORNER_GAPS = (10.0, 30.0)


def _grid_cells(base: np.ndarray, spacing: np.ndarray):
    """Charged cells: centres as offsets from the grid's lower corner ``(3, C)``, by coordinate
    for the compiled sums, and each cell's charge ``(C,)`` for the unit-scaled density."""
    cells = np.argwhere(base != 0.0)  # (C, 3)
    centres = np.ascontiguousarray(((cells + 0.5) * spacing).T)
    return centres, np.ascontiguousarray(base[tuple(cells.T)] * np.prod(spacing))


def _corner_gap_m(idx: tuple, spacing: np.ndarray) -> float:
    """Smallest gap between distinct coordinates of the weighted corners along any axis, m."""
    gaps = [np.diff(np.unique(i)).min() * h for i, h in zip(idx, spacing, strict=True) if i.size]
    gaps = [g for g in gaps if g > 0]
    return float(min(gaps)) if gaps else float(np.max(spacing))


# reassoc (with nsz): lets the compiler split each sum over cells into vector lanes, ~3x faster;
# the sums then round in another order (~1e-14 relative over 10⁴ cells), the same on every
# call. No approximate division or square root (no arcp, afn).
@_jit(fastmath={"reassoc", "nsz"})
def _cell_quadrature(k_coulomb, lower, pts, centres, charge, half, t, w, E, G):
    """Field and gradient of charged boxes by Gauss–Legendre quadrature, for pairs p of a grid
    position and a point: ``lower`` (P, 3) the grid's lower corner, ``pts`` (P, 3) the point;
    ``centres`` (3, C) cell centres from the lower corner, ``charge`` (C,), ``half`` (3,) half
    cell sides, ``t``, ``w`` (g,) nodes and weights on [−1, 1]. Writes E (P, 3) and G (P, 6:
    xx, yy, zz, xy, xz, yz). Nodes are formed on the fly: memory stays ~C numbers.
    """
    P = pts.shape[0]
    C = charge.shape[0]
    g = t.shape[0]
    cx, cy, cz = centres[0], centres[1], centres[2]
    for p in range(P):
        px = pts[p, 0] - lower[p, 0]
        py = pts[p, 1] - lower[p, 1]
        pz = pts[p, 2] - lower[p, 2]
        ex = ey = ez = 0.0
        gxx = gyy = gzz = gxy = gxz = gyz = 0.0
        for a in range(g):
            for b in range(g):
                for c in range(g):
                    qx = px - t[a] * half[0]
                    qy = py - t[b] * half[1]
                    qz = pz - t[c] * half[2]
                    sx = sy = sz = 0.0
                    sxx = syy = szz = sxy = sxz = syz = 0.0
                    for n in range(C):  # over cells: the loop the compiler vectorises
                        dx = qx - cx[n]
                        dy = qy - cy[n]
                        dz = qz - cz[n]
                        inv_r2 = 1.0 / (dx * dx + dy * dy + dz * dz)
                        wa = charge[n] * math.sqrt(inv_r2) * inv_r2
                        wb = -3.0 * wa * inv_r2
                        sx += wa * dx
                        sy += wa * dy
                        sz += wa * dz
                        sxx += wa + wb * dx * dx
                        syy += wa + wb * dy * dy
                        szz += wa + wb * dz * dz
                        sxy += wb * dx * dy
                        sxz += wb * dx * dz
                        syz += wb * dy * dz
                    wabc = 0.125 * w[a] * w[b] * w[c]
                    ex += wabc * sx
                    ey += wabc * sy
                    ez += wabc * sz
                    gxx += wabc * sxx
                    gyy += wabc * syy
                    gzz += wabc * szz
                    gxy += wabc * sxy
                    gxz += wabc * sxz
                    gyz += wabc * syz
        E[p, 0] = k_coulomb * ex
        E[p, 1] = k_coulomb * ey
        E[p, 2] = k_coulomb * ez
        G[p, 0] = k_coulomb * gxx
        G[p, 1] = k_coulomb * gyy
        G[p, 2] = k_coulomb * gzz
        G[p, 3] = k_coulomb * gxy
        G[p, 4] = k_coulomb * gxz
        G[p, 5] = k_coulomb * gyz


def far_quadrature(far, dist, cell, base, spacing, lower, pts):
    """The (scenario, point) pairs where cell quadrature replaces the corner sums, by rule:
    yields their indices ``s_i, m_i`` and the compiled quadrature's leading arguments
    (grid corner, point, cell centres and charges, half cell sides, nodes and weights)."""
    if not far.any():
        return
    centres, charge = _grid_cells(base, spacing)
    todo = far.copy()
    for cells_away, order in _GRID_FAR_RULES:
        s_i, m_i = np.nonzero(todo & (dist >= cells_away * cell))
        if s_i.size == 0:
            continue
        todo[s_i, m_i] = False
        t, wq = np.polynomial.legendre.leggauss(order)
        pair_pts = np.ascontiguousarray(pts[m_i])
        yield s_i, m_i, (lower[s_i], pair_pts, centres, charge, 0.5 * spacing, t, wq)


def _box_distance(pts: np.ndarray, lower: np.ndarray, size: np.ndarray) -> np.ndarray:
    """``(S, M)`` distance of each point from the grid's box in each scenario, m; ``lower``
    (S, 3) is the box's lower corner."""
    below = lower[:, None, :] - pts[None, :, :]
    above = pts[None, :, :] - (lower + size)[:, None, :]
    gap = np.maximum(np.maximum(below, above), 0.0)
    return np.sqrt(np.sum(gap * gap, axis=-1))


def grid_entries(grids) -> tuple:
    """The kernel's geometry for density grids: ``(grid, total charge, neutral)`` each, with the
    charge and the neutrality decided once (see :attr:`DensityGrid.neutral`)."""
    return tuple((g, g.charge_c, g.neutral) for g in grids)


def _grid_kernel(params, pts, grids, want_jac, out=None):
    """Density grids (a Python loop over grids only: each has its own shape).

    params (S, N, 4) = (total charge, centre); grids: N entries (DensityGrid, its total charge,
    neutral) from :func:`grid_entries`. The density is the grid's own shape scaled to the
    scenario's charge; a neutral grid keeps its density and has no charge column.

    Each (scenario, point) pair takes the box closed form summed over the weighted corners when
    the point is near the grid, and Gauss–Legendre quadrature per cell when it is far, where the
    corner sums would cancel (see ``_GRID_FAR_RULES`` and ``_GRID_CORNER_GAPS``).
    """
    S, N, P = params.shape
    M = pts.shape[0]
    E = np.zeros((S, M, 3))
    jac = _jac_buffer((S, M, 3, N, P), want_jac, out, zero=True)
    tensor = ((0, 3, 4), (3, 1, 5), (4, 5, 2))  # index into (xx, yy, zz, xy, xz, yz)
    for n, (grid, q0, neutral) in enumerate(grids):
        base = grid.density_c_per_m3 if neutral else grid.density_c_per_m3 / q0
        mult = np.ones(S) if neutral else params[:, n, 0]  # (S,)
        spacing = np.asarray(grid.spacing_m)
        lower = params[:, n, 1:4] - 0.5 * grid.size_m  # (S, 3)
        w = _corner_weights(base)
        idx = np.nonzero(w)
        wv = w[idx]
        dist = _box_distance(pts, lower, grid.size_m)  # (S, M)
        cell = float(spacing.max())
        # corners far cheaper than quadrature nodes (27 a cell at the 3-node rule)
        sparse = 10 * wv.size < 27 * np.count_nonzero(base)
        gaps = _GRID_CORNER_GAPS[1] if sparse else _GRID_CORNER_GAPS[0]
        far = (dist >= gaps * _corner_gap_m(idx, spacing)) & (dist >= 10.0 * cell)
        unit = np.zeros((S, M, 3))
        grad6 = np.zeros((S, M, 6))
        for s_i, m_i, args in far_quadrature(far, dist, cell, base, spacing, lower, pts):
            e_p, g_p = np.empty((s_i.size, 3)), np.empty((s_i.size, 6))
            _call_compiled(_cell_quadrature, K_COULOMB, *args, e_p, g_p)
            unit[s_i, m_i], grad6[s_i, m_i] = e_p, g_p
        near_pts = np.flatnonzero(~far.all(axis=0))
        corner = [lower[:, k : k + 1] + idx[k] * spacing[k] for k in range(3)]  # (S, K) each
        for blk in _blocks(near_pts.size, S * wv.size * 8):
            take = near_pts[blk]
            p = pts[take]
            off = [corner[k][:, None, :] - p[None, :, k, None] for k in range(3)]
            gfield, grad = _grid_corner_terms(*off, want_jac)
            keep = ~far[:, take, None]  # (S, m, 1): the pairs the quadrature did not take
            u = K_COULOMB * np.stack([g @ wv for g in gfield], axis=-1)  # (S, m, 3)
            unit[:, take] = np.where(keep, u, unit[:, take])
            if grad is not None:
                gr = K_COULOMB * np.stack([g @ wv for g in grad], axis=-1)  # (S, m, 6)
                if not np.isfinite(gr).all():  # one cheap pass; the rest on the error path
                    m = int(np.flatnonzero(~np.isfinite(gr).all(axis=(0, 2)))[0])
                    why = (
                        "the field is finite but its gradient (the Jacobian's centre columns) is "
                        "infinite; move the point off the corner."
                    )
                    _raise_on_charge(int(take[m]), p[m], "corner of a charged grid cell", why)
                grad6[:, take] = np.where(keep, gr, grad6[:, take])
        E += unit * mult[:, None, None]
        if jac is None:
            continue
        if not neutral:
            jac[:, :, :, n, 0] = unit
        gv = grad6 * mult[:, None, None]
        for i in range(3):
            for j in range(3):
                jac[:, :, i, n, 1 + j] = -gv[..., tensor[i][j]]
    return E, jac
