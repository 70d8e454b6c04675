"""Potentials of every source kind and their parameter Jacobians, in closed form.

The boundary-element solve (:mod:`probeplan.bem`) needs the sources' potential at the panels'
collocation points: the induced charge is linear in it. Every kernel here takes the parameters
of all sources of one kind in all scenarios, ``params (S, N, P)``, and points ``(M, 3)``, and
returns the summed potential ``(S, M)`` in volts and, if wanted, ``jac (S, M, N, P)``: ∂φ/∂θ per
source. Closed forms:

* point: φ = k q / r (Coulomb);
* ball: k q / r outside, k q (3a² − r²)/(2a³) inside (Gauss's law integrated inwards, e.g.
  Griffiths, Introduction to Electrodynamics, problem 2.21);
* Gaussian: φ = k q erf(r/(√2 σ))/r (Gauss's law with the enclosed fraction, integrated
  inwards; checked against scipy quadrature), ∂φ/∂σ = −k q √(2/π) e^{−r²/2σ²}/σ²;
* segment: φ = (k q / L) ln((r1 + r2 + L)/(r1 + r2 − L)) (Smythe, Static and Dynamic Electricity,
  §5.x), r1 + r2 − L formed without cancellation;
* grid: every cell a uniformly charged box, φ = k ρ Σ± F with
  F = xy ln(z + r) + yz ln(x + r) + zx ln(y + r) − x²/2 atan(yz/xr) − y²/2 atan(xz/yr)
  − z²/2 atan(xy/zr) (Nagy, Papp & Benedek 2000, J. Geodesy 74, eq. 6), summed by parts over
  the corners; Gauss–Legendre quadrature per cell far away, as for the field.

The centre columns need no formula of their own: moving a source by δc changes φ(x) as moving
the point by −δc does, so ∂φ/∂c = −∇_c φ(x − c) = E of that source alone; they come from the field
kernels. The charge column is the potential per unit charge (a neutral grid has none).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from ._common import _blocks, _call_compiled, _check_not_on_charge, _jit, _offsets
from .grid import (
    _atan_ratio,
    _box_distance,
    _corner_weights,
    _grid_kernel,
    _log_r_plus,
    far_quadrature,
)
from .kinds import K_COULOMB
from .line import _line_kernel
from .radial import _gaussian_kernel, _point_kernel, _sphere_kernel

_SQRT2 = math.sqrt(2.0)
_TWO_OVER_SQRT_PI = 2.0 / math.sqrt(math.pi)
# erf(u)/u = 2/√π (1 − u²/3 + u⁴/10 − …) below this u (Abramowitz & Stegun 7.1.5): next term
# u⁶/42 is below 1e-20 there, and erf(u)/r keeps full precision above it.
_ERF_SERIES_U = 1e-3


def _radial_unit(kind: str, r: np.ndarray, size: np.ndarray | None):
    """Unit-charge potential and its derivative by the size parameter, ``(S, m, N)`` each."""
    with np.errstate(divide="ignore"):
        inv_r = 1.0 / r
    if kind == "point":
        return K_COULOMB * inv_r, None
    if kind == "sphere":
        a = size
        inside = r < a
        p = np.where(inside, (3.0 * a * a - r * r) / (2.0 * a**3), inv_r)
        dp = np.where(inside, -1.5 / (a * a) + 1.5 * r * r / a**4, 0.0)
        return K_COULOMB * p, K_COULOMB * dp
    sigma = size
    u = r / (_SQRT2 * sigma)
    small = u < _ERF_SERIES_U
    with np.errstate(invalid="ignore"):
        direct = special.erf(u) * inv_r
    series = _TWO_OVER_SQRT_PI * (1.0 - u * u / 3.0 + u**4 / 10.0) / (_SQRT2 * sigma)
    p = np.where(small, series, direct)
    dp = -_TWO_OVER_SQRT_PI / _SQRT2 * np.exp(-u * u) / (sigma * sigma)
    return K_COULOMB * p, K_COULOMB * dp


def _radial_potential(kind: str):
    def kernel(params, pts, geom, want_jac):
        S, N, P = params.shape
        M = pts.shape[0]
        phi = np.zeros((S, M))
        jac = np.zeros((S, M, N, P)) if want_jac else None
        q = params[:, None, :, 0]
        for blk in _blocks(M, S * N * 8):
            d = _offsets(params, pts[blk])
            r = np.sqrt(d[0] ** 2 + d[1] ** 2 + d[2] ** 2)
            if kind == "point":
                _check_not_on_charge(r == 0.0, pts[blk], blk, "point charge")
            unit, d_size = _radial_unit(kind, r, params[:, None, :, 4] if P > 4 else None)
            phi[:, blk] = np.einsum("smn,smn->sm", unit, np.broadcast_to(q, unit.shape))
            if want_jac:
                jac[:, blk, :, 0] = unit
                if P > 4:
                    jac[:, blk, :, 4] = q * d_size
        return phi, jac

    return kernel


def _line_potential(params, pts, half_vectors, want_jac):
    """(k q / L) ln((S + L)/(S − L)), S = r1 + r2, with S − L from the distance to the line."""
    S_, N, _ = params.shape
    M = pts.shape[0]
    phi = np.zeros((S_, M))
    jac = np.zeros((S_, M, N, params.shape[2])) if want_jac else None
    hv = half_vectors
    length = 2.0 * np.sqrt(np.sum(hv * hv, axis=1))
    u = 2.0 * hv / length[:, None]
    q = params[:, None, :, 0]
    for blk in _blocks(M, S_ * N * 12):
        R = _offsets(params, pts[blk])
        d1 = [R[k] + hv[:, k] for k in range(3)]
        d2 = [R[k] - hv[:, k] for k in range(3)]
        r1 = np.sqrt(d1[0] ** 2 + d1[1] ** 2 + d1[2] ** 2)
        r2 = np.sqrt(d2[0] ** 2 + d2[1] ** 2 + d2[2] ** 2)
        t1 = d1[0] * u[:, 0] + d1[1] * u[:, 1] + d1[2] * u[:, 2]
        t2 = t1 - length
        rho2 = sum((d1[k] - t1 * u[:, k]) ** 2 for k in range(3))
        with np.errstate(divide="ignore", invalid="ignore"):
            e1 = np.where(t1 > 0, rho2 / (r1 + t1), r1 - t1)
            e2 = np.where(t2 < 0, rho2 / (r2 - t2), r2 + t2)
        s_minus_l = e1 + e2
        _check_not_on_charge(~(s_minus_l > 1e-12 * length), pts[blk], blk, "line charge")
        unit = K_COULOMB / length * np.log((r1 + r2 + length) / s_minus_l)
        phi[:, blk] = np.sum(unit * q, axis=-1)
        if want_jac:
            jac[:, blk, :, 0] = unit
    return phi, jac


def _box_antiderivative(x, y, z):
    """F(x, y, z) of the module docstring (Nagy et al. 2000), finite at every corner."""
    x2, y2, z2 = x * x, y * y, z * z
    r = np.sqrt(x2 + y2 + z2)
    ln_x = _log_r_plus(x, r, y2 + z2)
    ln_y = _log_r_plus(y, r, x2 + z2)
    ln_z = _log_r_plus(z, r, x2 + y2)
    with np.errstate(invalid="ignore"):
        f = x * y * ln_z + y * z * ln_x + z * x * ln_y
        f -= 0.5 * (
            x2 * _atan_ratio(y * z, x * r)
            + y2 * _atan_ratio(x * z, y * r)
            + z2 * _atan_ratio(x * y, z * r)
        )
    # Each term tends to 0 where its log is −inf (R|ln R|-like products): take the limit.
    return np.where(np.isfinite(f), f, 0.0)


@_jit(fastmath={"reassoc", "nsz"})
def _cell_potential_quadrature(k_coulomb, lower, pts, centres, charge, half, t, w, phi):
    """Potential of charged boxes by Gauss–Legendre quadrature, for pairs p of a grid position
    ``lower`` (P, 3) and a point ``pts`` (P, 3); arguments as ``grid._cell_quadrature``."""
    P = pts.shape[0]
    C = charge.shape[0]
    g = t.shape[0]
    cx, cy, cz = centres[0], centres[1], centres[2]
    for p in range(P):
        px = pts[p, 0] - lower[p, 0]
        py = pts[p, 1] - lower[p, 1]
        pz = pts[p, 2] - lower[p, 2]
        total = 0.0
        for a in range(g):
            for b in range(g):
                for c in range(g):
                    qx = px - t[a] * half[0]
                    qy = py - t[b] * half[1]
                    qz = pz - t[c] * half[2]
                    s = 0.0
                    for n in range(C):
                        dx = qx - cx[n]
                        dy = qy - cy[n]
                        dz = qz - cz[n]
                        s += charge[n] / math.sqrt(dx * dx + dy * dy + dz * dz)
                    total += 0.125 * w[a] * w[b] * w[c] * s
        phi[p] = k_coulomb * total


def _grid_potential(params, pts, grids, want_jac):
    """Density grids: corner sums near the grid, cell quadrature beyond ten cells."""
    S, N, P = params.shape
    M = pts.shape[0]
    phi = np.zeros((S, M))
    jac = np.zeros((S, M, N, P)) if want_jac else None
    for n, (grid, q0, neutral) in enumerate(grids):
        base = grid.density_c_per_m3 if neutral else grid.density_c_per_m3 / q0
        mult = np.ones(S) if neutral else params[:, n, 0]
        spacing = np.asarray(grid.spacing_m)
        lower = params[:, n, 1:4] - 0.5 * grid.size_m
        dist = _box_distance(pts, lower, grid.size_m)
        cell = float(spacing.max())
        # The potential's corner terms grow as r², one power faster than the field's, so
        # they are kept only within ten cells (~1e-13 lost there); quadrature beyond.
        far = dist >= 10.0 * cell
        unit = np.zeros((S, M))
        for s_i, m_i, args in far_quadrature(far, dist, cell, base, spacing, lower, pts):
            out = np.empty(s_i.size)
            _call_compiled(_cell_potential_quadrature, K_COULOMB, *args, out)
            unit[s_i, m_i] = out
        w = _corner_weights(base)
        idx = np.nonzero(w)
        wv = w[idx]
        near_pts = np.flatnonzero(~far.all(axis=0))
        corner = [lower[:, k : k + 1] + idx[k] * spacing[k] for k in range(3)]
        for blk in _blocks(near_pts.size, S * wv.size * 8):
            take = near_pts[blk]
            off = [corner[k][:, None, :] - pts[take][None, :, k, None] for k in range(3)]
            u = K_COULOMB * (_box_antiderivative(*off) @ wv)
            unit[:, take] = np.where(far[:, take], unit[:, take], u)
        phi += unit * mult[:, None]
        if want_jac and not neutral:
            jac[:, :, n, 0] = unit
    return phi, jac


#: kind name -> potential kernel(params (S, N, P), points (M, 3), geometry, want_jac)
POTENTIAL_KERNELS = {
    "point": _radial_potential("point"),
    "line": _line_potential,
    "sphere": _radial_potential("sphere"),
    "gaussian": _radial_potential("gaussian"),
    "grid": _grid_potential,
}

_FIELD_KERNELS = {
    "point": _point_kernel,
    "line": _line_kernel,
    "sphere": _sphere_kernel,
    "gaussian": _gaussian_kernel,
}


def potential_kernel(kind: str, params, pts, geometry, want_jac: bool):
    """Potential ``(S, M)`` V and ∂φ/∂θ ``(S, M, N, P)`` of the sources of one kind.

    The centre columns are each source's own field (see the module docstring), from the
    field kernels: for the radial kinds and the segment their charge column ∂E/∂q times q,
    for a grid its kernel run on that grid alone (a neutral grid has no charge column).
    """
    phi, jac = POTENTIAL_KERNELS[kind](params, pts, geometry, want_jac)
    if not want_jac:
        return phi, None
    if kind == "grid":
        for n, entry in enumerate(geometry):
            e, _ = _grid_kernel(params[:, n : n + 1], pts, (entry,), False)
            jac[:, :, n, 1:4] = e
    else:
        _, jac_e = _FIELD_KERNELS[kind](params, pts, geometry, True)
        jac[..., 1:4] = np.moveaxis(jac_e[..., 0], 2, -1) * params[:, None, :, None, 0]
    return phi, jac
