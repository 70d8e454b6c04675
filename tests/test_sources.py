"""The five source kinds against closed forms and reference integrators, in free space.

Every check names the outside source it compares with. Book references are to standard
texts; where an equation or example number is given it is recalled from memory, and the
formula itself is written out in full beside the check so it can be verified independently.
"""

from __future__ import annotations

import itertools
import math

import numba
import numpy as np
import pytest
from scipy import constants, integrate, special

import probeplan as pp

# Coulomb constant built here from scipy.constants (CODATA), not taken from the package.
K_REF = 1.0 / (4.0 * math.pi * constants.epsilon_0)


def _unit_rows(v):
    return v / np.linalg.norm(v, axis=1, keepdims=True)


# ----------------------------------------------------------------------------------------------
# Coulomb's constant and the point charge
# ----------------------------------------------------------------------------------------------


def test_coulomb_constant_matches_codata():
    # Source: scipy.constants (CODATA) for eps0; k = 8.98755179e9 N m^2/C^2 is the CODATA value
    # recalled from memory (it agrees between the 2018 and 2022 adjustments to ~1e-9).
    assert pp.K_COULOMB == pytest.approx(K_REF, rel=1e-15)
    assert pp.K_COULOMB == pytest.approx(8.98755179e9, rel=1e-8)


def test_point_charge_is_coulombs_law():
    # Source: Coulomb's law, E = q (r - r0) / (4 pi eps0 |r - r0|^3).
    q, c = -3.2e-6, np.array([1.0, -2.0, 4.5])
    rng = np.random.default_rng(1)
    pts = c + rng.normal(scale=5.0, size=(20, 3))
    d = pts - c
    ref = q * d / (4.0 * math.pi * constants.epsilon_0 * np.linalg.norm(d, axis=1)[:, None] ** 3)
    np.testing.assert_allclose(pp.field(pp.PointCharge(q, c), pts), ref, rtol=1e-13)


def test_point_charge_one_coulomb_at_one_metre():
    # Source: Coulomb's law; 1 C at 1 m gives k = 8.98755e9 V/m (textbook value, from memory).
    e = pp.field(pp.PointCharge(1.0, (0.0, 0.0, 0.0)), [[0.0, 1.0, 0.0]])
    np.testing.assert_allclose(e, [[0.0, 8.98755179e9, 0.0]], rtol=1e-8)


# ----------------------------------------------------------------------------------------------
# Finite uniform line segment
# ----------------------------------------------------------------------------------------------


def _segment_quad(q, a, b, x):
    """Reference: scipy.integrate.quad of the Coulomb kernel along the segment, per component."""
    a, b, x = (np.asarray(v, dtype=float) for v in (a, b, x))
    length = np.linalg.norm(b - a)
    u = (b - a) / length
    lam = q / length
    foot = float(np.dot(x - a, u))  # the kernel peaks here when the point is close to the line
    brk = [foot] if 0.0 < foot < length else None
    out = np.empty(3)
    for i in range(3):

        def f(t, i=i):
            d = x - a - t * u
            return K_REF * lam * d[i] / np.dot(d, d) ** 1.5

        out[i] = integrate.quad(f, 0.0, length, points=brk, epsabs=0.0, epsrel=1e-12, limit=500)[0]
    return out


def test_line_segment_general_positions_match_quadrature():
    # Source: scipy.integrate.quad (adaptive Gauss-Kronrod) of kλ (x - r')/|x - r'|^3 along
    # the segment, at points in general position: off the bisector, near the segment, beyond
    # its ends, near an end.
    q, a, b = 2.5e-3, (0.3, -1.0, 2.0), (1.7, 0.8, 4.1)
    seg = pp.LineCharge(q, a, b)
    rng = np.random.default_rng(7)
    pts = [
        *(np.asarray(a) + rng.normal(scale=3.0, size=(6, 3))),
        (1.0, -0.1, 3.05 + 1e-3),  # about 1 mm from the middle of the segment
        (1.7 + 0.05, 0.8, 4.1 + 0.02),  # just past the end b
        (-5.0, 7.0, -3.0),
    ]
    got = pp.field(seg, np.array(pts))
    ref = np.array([_segment_quad(q, a, b, p) for p in pts])
    scale = np.linalg.norm(ref, axis=1, keepdims=True)
    np.testing.assert_allclose(got / scale, ref / scale, atol=1e-10)


def test_line_segment_textbook_closed_form_general_position():
    # Source: integrating Coulomb's law along a straight segment (standard textbook result, e.g.
    # Griffiths, Introduction to Electrodynamics, ch. 2 problems; from memory). With d the
    # distance from the point to the line and t1 < t2 the ends' coordinates along the line
    # measured from the foot of the perpendicular:
    #   E_perp = (kλ/d) [t2/√(d²+t2²) − t1/√(d²+t1²)],  E_par = kλ [1/√(d²+t2²) − 1/√(d²+t1²)].
    q, length = -4.0e-4, 3.0
    lam = q / length
    seg = pp.LineCharge(q, (0.0, 0.0, 10.0), (length, 0.0, 10.0))  # along +x
    d = 1.3
    for x0 in (-2.0, 0.4, 1.5, 2.9, 5.0):  # foot before, inside and after the segment
        t1, t2 = 0.0 - x0, length - x0
        e_perp = (K_REF * lam / d) * (t2 / math.hypot(d, t2) - t1 / math.hypot(d, t1))
        e_par = K_REF * lam * (1.0 / math.hypot(d, t2) - 1.0 / math.hypot(d, t1))
        got = pp.field(seg, [[x0, 0.0, 10.0 + d]])[0]
        # Point is above the line (+z), so E_perp is along +z; E_par is along +x.
        np.testing.assert_allclose(got, [e_par, 0.0, e_perp], rtol=1e-12, atol=1e-12 * abs(e_perp))


def test_line_segment_on_the_bisector():
    # Source: Griffiths, Introduction to Electrodynamics, Example 2.1 (number from memory): a
    # distance d from the midpoint of a segment of length L with line density λ = Q/L,
    # E = kλ L / (d √(d² + L²/4)), perpendicular to the segment.
    q, length = 7.0e-6, 4.0
    lam = q / length
    seg = pp.LineCharge(q, (-1.0, 2.0, 5.0), (-1.0, 2.0, 5.0 + length))  # vertical, centre z = 7
    for d in (0.01, 0.5, 2.0, 40.0):
        got = pp.field(seg, [[-1.0, 2.0 + d, 7.0]])[0]
        ref = K_REF * lam * length / (d * math.sqrt(d * d + 0.25 * length * length))
        np.testing.assert_allclose(got, [0.0, ref, 0.0], rtol=1e-12, atol=1e-12 * ref)


def test_line_segment_on_its_extension():
    # Source: Coulomb's law integrated along the axis of a uniform rod (standard textbook
    # exercise, from memory): at a distance s beyond one end, E = kQ / (s (s + L)), along
    # the rod. The kernel is regular there although the point lies on the rod's line.
    q, length = 1.0e-6, 2.0
    seg = pp.LineCharge(q, (0.0, 0.0, 3.0), (0.0, 0.0, 3.0 + length))
    for s in (1e-3, 0.1, 1.0, 100.0):
        got = pp.field(seg, [[0.0, 0.0, 3.0 + length + s], [0.0, 0.0, 3.0 - s]])
        ref = K_REF * q / (s * (s + length))
        np.testing.assert_allclose(got, [[0, 0, ref], [0, 0, -ref]], rtol=1e-12, atol=0.0)


def test_ring_on_axis_as_polygon_of_segments():
    # Source: on-axis field of a uniformly charged ring, E_z = kQz / (z² + R²)^(3/2)
    # (Griffiths, Introduction to Electrodynamics, Problem 2.5; number from memory).
    # The ring is approximated by m line segments (an inscribed regular polygon): the chords
    # stray from the circle by at most R (1 − cos(π/m)) ≈ R (π/m)²/2, so a relative error of a
    # few (π/m)² is the expected discretisation error.
    big_r, q, m = 1.5, 2.0e-6, 360
    phi = np.arange(m + 1) * 2.0 * math.pi / m
    v = np.c_[big_r * np.cos(phi), big_r * np.sin(phi), np.full(m + 1, 4.0)]
    ring = [pp.LineCharge(q / m, v[i], v[i + 1]) for i in range(m)]
    z = np.array([0.05, 0.5, 1.5, 4.0, 30.0])
    got = pp.field(ring, np.c_[np.zeros_like(z), np.zeros_like(z), 4.0 + z])
    ref = K_REF * q * z / (z * z + big_r * big_r) ** 1.5
    tol = 5.0 * (math.pi / m) ** 2
    np.testing.assert_allclose(got[:, 2], ref, rtol=tol)
    np.testing.assert_allclose(got[:, :2], 0.0, atol=1e-12 * ref.max())


# ----------------------------------------------------------------------------------------------
# Uniform ball and Gaussian cloud: Gauss's law with the enclosed charge
# ----------------------------------------------------------------------------------------------


def test_uniform_ball_inside_and_outside():
    # Source: Gauss's law for a uniformly charged ball of radius a (any introductory text, e.g.
    # Griffiths ch. 2): E = kQ r / a³ inside, kQ / r² outside, radial; zero at the centre.
    q, c, a = -5.0e-5, np.array([2.0, -1.0, 10.0]), 1.7
    ball = pp.SphereCharge(q, c, a)
    dirs = _unit_rows(
        np.array([[1, 0, 0], [0, -1, 0], [1, 2, -2], [-3, 1, 4], [0, 0, 1], [1, 1, 1]])
    )
    radii = np.array([0.0, 0.2, 1.0, 1.699, 1.7, 1.701, 3.0, 80.0])
    r = np.repeat(radii, len(dirs))
    u = np.tile(dirs, (len(radii), 1))
    got = pp.field(ball, c + r[:, None] * u)
    mag = np.where(r < a, K_REF * q * r / a**3, K_REF * q / np.maximum(r, a) ** 2)
    np.testing.assert_allclose(got, mag[:, None] * u, rtol=1e-12, atol=1e-13 * abs(K_REF * q))


def _gauss_enclosed_fraction(x):
    """Q_enc/Q of an isotropic 3-D normal law inside r = x σ: the chi distribution's CDF with 3
    degrees of freedom, P(3/2, x²/2), from scipy's regularised incomplete gamma function (an
    independent route: the code uses the erf form of the same function)."""
    return special.gammainc(1.5, 0.5 * x * x)


def test_gaussian_cloud_erf_form():
    # Source: Gauss's law with the enclosed charge of an isotropic Gaussian (the Maxwell
    # distribution's CDF), E = kQ/r² P(3/2, r²/2σ²) = kQ/r² [erf(r/(√2σ)) − √(2/π)(r/σ)
    # e^(−r²/2σ²)], radial. Radii straddle r/σ = √0.1, where the code switches from a series
    # to the direct form: both sides must be as exact as double precision allows.
    q, c, sigma = 3.0e-6, np.array([0.0, 5.0, 6.0]), 0.8
    cloud = pp.GaussianCharge(q, c, sigma)
    x = np.array([0.05, 0.2, 0.3, 0.3162, 0.3163, 0.33, 0.7, 1.0, 2.0, 3.5, 8.0, 40.0])
    u = _unit_rows(np.array([[1.0, -2.0, 0.5]]))
    r = x * sigma
    got = pp.field(cloud, c + r[:, None] * u)
    mag = K_REF * q * _gauss_enclosed_fraction(x) / r**2
    np.testing.assert_allclose(got, mag[:, None] * u, rtol=1e-13)


def test_gaussian_cloud_near_centre_series():
    # Source: the series of the same enclosed fraction, Q_enc/Q = √(2/π)(x³/3 − x⁵/10 + …),
    # x = r/σ (term by term integration of x² e^(−x²/2)); the erf form cancels badly here.
    # Centre at the origin: an offset c + r with |c| >> r would itself lose digits.
    q, c, sigma = 3.0e-6, np.array([0.0, 0.0, 0.0]), 0.8
    cloud = pp.GaussianCharge(q, c, sigma)
    x = np.array([1e-6, 1e-4, 1e-3, 1e-2])
    r = x * sigma
    got = pp.field(cloud, c + np.c_[np.zeros_like(r), np.zeros_like(r), r])
    frac = math.sqrt(2.0 / math.pi) * (x**3 / 3.0 - x**5 / 10.0 + x**7 / 56.0)
    np.testing.assert_allclose(got[:, 2], K_REF * q * frac / r**2, rtol=1e-12)
    np.testing.assert_array_equal(pp.field(cloud, [c]), [[0.0, 0.0, 0.0]])


# ----------------------------------------------------------------------------------------------
# Density grid
# ----------------------------------------------------------------------------------------------

# A small, deliberately lopsided grid: mixed signs, anisotropic cells.
_RHO = 1e-6 * np.array([[[1.0, -0.5], [2.0, 0.3]], [[0.7, 1.5], [-1.2, 0.4]]])
_ORIGIN = np.array([0.1, -0.2, 0.3])
_SPACING = np.array([0.5, 0.7, 0.3])


def _grid_cubature(x):
    """Reference: scipy.integrate.cubature of the Coulomb kernel over every cell.

    Gauss-Kronrod product rule, adaptive; where the point is inside a cell or on its boundary
    the cell is split at the point (``points=``), so the integrable 1/r² peak sits at a corner
    of the pieces, where the rule never evaluates.
    """
    total = np.zeros(3)
    for idx in np.ndindex(_RHO.shape):
        lo = _ORIGIN + np.array(idx) * _SPACING
        hi = lo + _SPACING

        def f(r, rho=_RHO[idx]):
            d = x - r
            r2 = np.sum(d * d, axis=1)
            return (K_REF * rho) * d / (r2 * np.sqrt(r2))[:, None]

        touches = bool(np.all((x >= lo) & (x <= hi)))
        res = integrate.cubature(
            f, lo, hi, rule="gk15", rtol=1e-6, atol=0.0, points=[x] if touches else None
        )
        assert res.status == "converged"
        total += res.estimate
    return total


@pytest.mark.parametrize(
    "where, offset",
    [
        ("inside a cell", (0.31, 0.23, 0.11)),
        ("on the face plane between two cells", (0.31, 0.7, 0.17)),
        ("next to an inner edge (1-2 mm off)", (0.501, 0.702, 0.601)),
        ("on an outer edge of the grid", (0.31, 0.0, 0.0)),
        ("on a cell vertex on the grid's outer edge", (0.5, 0.0, 0.0)),
        ("far away", (5.0, -3.0, 8.0)),
    ],
)
def test_density_grid_matches_adaptive_cubature(where, offset):
    # Source: scipy.integrate.cubature (adaptive Gauss-Kronrod) of ρ(r')(x − r')k/|x − r'|³
    # over the boxes. A plain cell-centre sum would be off by tens of per cent near the charge.
    grid = pp.DensityGrid(_RHO, _ORIGIN, _SPACING)
    x = _ORIGIN + np.array(offset)
    got = pp.field(grid, [x])[0]
    ref = _grid_cubature(x)
    assert np.all(np.isfinite(got)), where
    np.testing.assert_allclose(got, ref, rtol=0.0, atol=2e-6 * np.linalg.norm(ref), err_msg=where)


def _grid_cubature_with_gradient(x):
    """Reference field and gradient ∂E_i/∂x_j of the _RHO grid at a point outside it.

    scipy.integrate.cubature (Gauss-Kronrod, adaptive) of the Coulomb kernel and of its gradient
    k ρ [I/r³ − 3 d dᵀ/r⁵], d = x − r'; smooth here, so a tight tolerance is cheap.
    """
    e, grad = np.zeros(3), np.zeros((3, 3))
    for idx in np.ndindex(_RHO.shape):
        lo = _ORIGIN + np.array(idx) * _SPACING

        def f(r, rho=_RHO[idx]):
            d = x - r
            r2 = np.sum(d * d, axis=1)
            r3 = r2 * np.sqrt(r2)
            g = (
                np.eye(3)[None] / r3[:, None, None]
                - 3.0 * d[:, :, None] * d[:, None, :] / (r3 * r2)[:, None, None]
            )
            return (K_REF * rho) * np.concatenate([d / r3[:, None], g.reshape(-1, 9)], axis=1)

        res = integrate.cubature(f, lo, lo + _SPACING, rule="gk21", rtol=1e-10, atol=0.0)
        assert res.status == "converged"
        e += res.estimate[:3]
        grad += res.estimate[3:].reshape(3, 3)
    return e, grad


def test_density_grid_jacobian_matches_cubature_of_the_gradient():
    # Source: scipy.integrate.cubature of the gradient of the Coulomb kernel, at points outside
    # the grid (0.2-0.3 m off a face, and far). A rigid shift of the grid by δ changes the
    # field by −∇E·δ, so the centre columns of the Jacobian are −∂E_i/∂x_j; the charge column
    # is E/Q (the density scales with the total charge).
    grid = pp.DensityGrid(_RHO, _ORIGIN, _SPACING)
    pts = _ORIGIN + np.array([[1.3, 0.3, 0.2], [0.4, -0.25, 0.3], [0.2, 1.1, 0.9], [5.0, -3, 8]])
    e, jac = pp.field_jacobian(grid, pts)
    for i, x in enumerate(pts):
        ref_e, ref_grad = _grid_cubature_with_gradient(x)
        np.testing.assert_allclose(e[i], ref_e, rtol=0, atol=1e-10 * np.linalg.norm(ref_e))
        np.testing.assert_allclose(jac[i, :, 0], ref_e / grid.charge_c, rtol=1e-9)
        np.testing.assert_allclose(
            jac[i, :, 1:4], -ref_grad, rtol=0, atol=1e-10 * np.abs(ref_grad).max()
        )


@pytest.mark.parametrize("cells_away", [10.0, 30.0, 100.0])
def test_density_grid_cell_far_away_within_its_multipole_error(cells_away):
    # Source: multipole expansion. A uniform cube has no dipole and, by cubic symmetry, no
    # quadrupole (or octupole), so its field differs from the point charge's by the l = 4 term,
    # relative size c (h/r)⁴ with c ≈ 0.05 along this direction (the (h/r)⁴ law is checked by
    # the 10 → 30 pair: 81×); 1e-8 allows for the corner sums' rounding.
    cell = pp.DensityGrid(np.ones((1, 1, 1)), (-0.5, -0.5, -0.5), 1.0)
    x = cells_away * np.array([[0.6, 0.48, 0.64]])
    got = pp.field(cell, x)[0]
    ref = pp.field(pp.PointCharge(1.0, (0.0, 0.0, 0.0)), x)[0]
    dev = np.linalg.norm(got - ref) / np.linalg.norm(ref)
    assert dev <= 0.1 / cells_away**4 + 1e-8


@pytest.mark.parametrize("cells_away", [9.99, 10.01, 29.99, 30.01, 299.9, 300.1])
def test_density_grid_quadrature_far_away_matches_adaptive_cubature(cells_away):
    # Source: scipy.integrate.cubature of the field and its gradient, as above. From 10, 30 and
    # 300 cell sides off the grid's box the code switches from the box closed form to Gauss-
    # Legendre quadrature of decreasing order: both sides of each switch must agree with the
    # reference (mixed-sign, anisotropic cells).
    grid = pp.DensityGrid(_RHO, _ORIGIN, _SPACING)
    top = _ORIGIN + grid.size_m
    x = np.array([top[0] + cells_away * _SPACING.max(), _ORIGIN[1] + 0.4, _ORIGIN[2] + 0.1])
    e, jac = pp.field_jacobian(grid, x[None])
    ref_e, ref_grad = _grid_cubature_with_gradient(x)
    np.testing.assert_allclose(e[0], ref_e, rtol=0, atol=1e-10 * np.linalg.norm(ref_e))
    np.testing.assert_allclose(
        jac[0, :, 1:4], -ref_grad, rtol=0, atol=1e-10 * np.abs(ref_grad).max()
    )


@pytest.mark.parametrize("boxes_away", [9.0, 12.0, 29.0, 31.0])
def test_uniform_block_far_away_matches_cubature_of_the_box(boxes_away):
    # Source: scipy.integrate.cubature of the Coulomb kernel over one uniformly charged box.
    # A uniform 4x2x2 block of cells is that box: its corner sums reduce to the box's own eight
    # corners, kept out to 30 box widths (cheaper than quadrature), and quadrature beyond.
    h = np.array([0.5, 0.5, 0.25])
    shape = (4, 2, 2)
    origin = np.array([1.0, -2.0, 3.0])
    grid = pp.DensityGrid(np.full(shape, 3e-6), origin, h)
    size = np.array(shape) * h
    x = origin + size * np.array([0.5, 1.0, 0.3]) + np.array([0.0, boxes_away * 0.5, 0.0])

    def f(r):
        d = x - r
        r2 = np.sum(d * d, axis=1)
        return (K_REF * 3e-6) * d / (r2 * np.sqrt(r2))[:, None]

    scale = K_REF * 3e-6 * np.prod(size) / (boxes_away * 0.5) ** 2  # |E| within ~10 %
    ref = integrate.cubature(f, origin, origin + size, rule="gk21", rtol=1e-12, atol=1e-13 * scale)
    assert ref.status == "converged"
    got = pp.field(grid, x[None])[0]
    np.testing.assert_allclose(got, ref.estimate, rtol=0, atol=1e-10 * np.linalg.norm(ref.estimate))


@pytest.mark.parametrize("cells_away", [1_000.0, 10_000.0, 1e6])
def test_density_grid_cell_very_far_away_keeps_precision(cells_away):
    # Source: multipole expansion as above: a uniform cube has no dipole or quadrupole, so at
    # 1,000 cells and beyond its l = 4 term is below 1e-12 of the field and 1e-11 of the
    # gradient; any larger deviation from the point charge is rounding, not physics. (The box
    # closed form lost 5e-6 at 1,000 cells and 6e-3 at 10,000 by cancellation.) Checked for
    # the field and for the whole Jacobian (charge and centre columns).
    cell = pp.DensityGrid(np.ones((1, 1, 1)), (-0.5, -0.5, -0.5), 1.0)
    x = cells_away * np.array([[0.6, 0.48, 0.64]])
    got = pp.field(cell, x)[0]
    ref = pp.field(pp.PointCharge(1.0, (0.0, 0.0, 0.0)), x)[0]
    assert np.linalg.norm(got - ref) / np.linalg.norm(ref) <= 1e-11
    jac = pp.field_jacobian(cell, x)[1]
    jac_ref = pp.field_jacobian(pp.PointCharge(1.0, (0.0, 0.0, 0.0)), x)[1]
    assert np.abs(jac - jac_ref).max() / np.abs(jac_ref).max() <= 1e-10


def _voxel_ball(n, a=1.0, q=1.0, centre=(0.0, 0.0, 50.0)):
    """A ball of radius a voxelised on n³ cells by cell centre, density q / (4/3 π a³)."""
    h = 2.0 * a / n
    c = (np.arange(n) + 0.5) * h - a
    xx, yy, zz = np.meshgrid(c, c, c, indexing="ij")
    rho = np.where(xx**2 + yy**2 + zz**2 <= a * a, q / (4.0 / 3.0 * math.pi * a**3), 0.0)
    return pp.DensityGrid(rho, np.asarray(centre) - a, h), h


def test_voxelised_ball_far_field_is_monopole_plus_hexadecapole():
    # Source: Gauss's law / the multipole expansion. The voxel set is symmetric under the
    # cube's group (reflections, axis swaps), so its dipole, quadrupole and octupole vanish
    # and the far field is kQ_grid/r² up to the l = 4 term: relative deviation ∝ (a/r)⁴,
    # bounded by ~ (l + 1)(r_max/r)^4 with r_max = a + √3 h/2 the farthest charged point.
    # Q_grid (the voxel sum) is computed here with numpy, independently of the field code.
    a, centre = 1.0, np.array([0.0, 0.0, 50.0])
    grid, h = _voxel_ball(16, a=a, centre=centre)
    q_grid = float(grid.density_c_per_m3.sum() * h**3)
    dirs = _unit_rows(np.array([[1.0, 0, 0], [0, 0, 1.0], [1.0, 1.0, 1.0]]))
    dev = {}
    for r in (5.0, 10.0, 20.0):
        e = pp.field(grid, centre + r * dirs)
        mag = np.linalg.norm(e, axis=1)
        np.testing.assert_allclose(e / mag[:, None], dirs, atol=1e-9)  # radial on symmetry axes
        dev[r] = np.abs(mag * r * r / (K_REF * q_grid) - 1.0).max()
        r_max = a + math.sqrt(3.0) * h / 2.0
        assert dev[r] <= 5.0 * (r_max / r) ** 4
    # The (a/r)^4 law: doubling the distance cuts the deviation by ~16.
    assert 12.0 < dev[10.0] / dev[20.0] < 20.0


def test_voxelised_ball_approaches_gauss_law_under_refinement():
    # Source: Gauss's law for the exact ball, E = kQ/r² outside. A cell-centre voxelisation
    # misses or adds charge only in the cells cut by the sphere, so far away the relative
    # error is the voxel volume error Q_grid/Q − 1 (plus the tiny l = 4 term above), and it
    # shrinks as the cells shrink (measured: ~4 %, 1.5 %, 0.6 % for 8, 16, 32 cells across).
    q, r = 1.0e-3, 10.0
    centre = np.array([0.0, 0.0, 50.0])
    errs = []
    for n in (8, 16, 32):
        grid, h = _voxel_ball(n, q=q, centre=centre)
        q_grid = float(grid.density_c_per_m3.sum() * h**3)
        e = pp.field(grid, [centre + [r, 0.0, 0.0]])[0]
        err = e[0] * r * r / (K_REF * q) - 1.0
        assert err == pytest.approx(q_grid / q - 1.0, abs=1e-5)
        errs.append(abs(err))
    assert errs[0] > errs[1] > errs[2]
    assert errs[2] < 0.01


def test_thin_voxelised_disk_on_axis():
    # Source: on-axis field of a uniformly charged disk, E_z = 2πkσ (1 − z/√(z² + R²))
    # (Griffiths, Introduction to Electrodynamics, Problem 2.6; number from memory). The disk is
    # a one-cell-thick grid layer whose cells carry their area fraction inside the circle
    # (16×16 sub-samples per cell); the expected error is ~1e-4 from that rim approximation.
    big_r, q, n, t = 1.0, 1.0e-6, 80, 0.005
    h = 2.0 * big_r / n
    s = (np.arange(n * 16) + 0.5) * (h / 16) - big_r
    xx, yy = np.meshgrid(s, s, indexing="ij")
    frac = (xx**2 + yy**2 <= big_r**2).reshape(n, 16, n, 16).mean(axis=(1, 3))
    sig = q / (math.pi * big_r**2)
    grid = pp.DensityGrid((sig / t) * frac[:, :, None], (-big_r, -big_r, 2.0 - t / 2), (h, h, t))
    z = np.array([0.1, 0.5, 1.0, 2.0, 5.0])
    got = pp.field(grid, np.c_[np.zeros_like(z), np.zeros_like(z), 2.0 + z])
    ref = 2.0 * math.pi * K_REF * sig * (1.0 - z / np.sqrt(z * z + big_r**2))
    np.testing.assert_allclose(got[:, 2], ref, rtol=5e-4)
    np.testing.assert_allclose(got[:, :2], 0.0, atol=1e-10 * ref.max())


def test_single_cell_far_away_is_a_point_charge():
    # Source: multipole expansion; a uniform cube has no dipole and (by cubic symmetry) no
    # quadrupole, so at r = 50 cells the relative deviation is O((h/r)⁴) ≈ 1e-7 or less.
    cell = pp.DensityGrid(np.full((1, 1, 1), 2.0e-6), (0.0, 0.0, 0.0), 1.0)
    c = np.array([0.5, 0.5, 0.5])
    pts = c + 50.0 * _unit_rows(np.array([[1.0, 0.3, -0.2], [0.0, 0.0, 1.0], [-1.0, 2.0, 2.0]]))
    got = pp.field(cell, pts)
    ref = pp.field(pp.PointCharge(2.0e-6, c), pts)
    # atol: a component that is zero by symmetry comes out at rounding level, not exactly 0.
    np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-14 * np.abs(ref).max())


# ----------------------------------------------------------------------------------------------
# Inside finite distributions: fine and finite
# ----------------------------------------------------------------------------------------------


def test_points_inside_finite_distributions_are_fine():
    # Source: Gauss's law; a bounded density gives a finite field everywhere, also at the
    # centre (zero by symmetry) and on the boundary of a grid cell.
    ball = pp.SphereCharge(1e-6, (0.0, 0.0, 5.0), 1.0)
    cloud = pp.GaussianCharge(1e-6, (0.0, 0.0, 5.0), 1.0)
    grid = pp.DensityGrid(np.ones((2, 2, 2)) * 1e-6, (-1.0, -1.0, 4.0), 1.0)
    inner = np.array([[0.0, 0.0, 5.0], [0.2, -0.1, 5.3], [1.0, 1.0, 6.0], [0.0, 0.0, 4.0]])
    for src in (ball, cloud, grid):
        e = pp.field(src, inner)
        assert np.all(np.isfinite(e)), src.kind
        np.testing.assert_allclose(e[0], 0.0, atol=1e-9 * np.abs(e).max())  # centre: symmetric
        if src.kind != "grid":
            assert np.all(np.isfinite(pp.field_jacobian(src, inner)[1])), src.kind
            continue
        # The gradient of a grid field diverges at the corners of the charged box (and, log-
        # slowly, along its edges): there the Jacobian is refused, naming the point; at the
        # inner points it is finite.
        with pytest.raises(ValueError, match=r"point 2 at \(1, 1, 6\) m lies on a corner"):
            pp.field_jacobian(src, inner)
        assert np.all(np.isfinite(pp.field_jacobian(src, inner[:2])[1]))


# ----------------------------------------------------------------------------------------------
# Bad input to the source constructors: one clear ValueError naming the argument
# ----------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "make, match",
    [
        (lambda: pp.PointCharge(1.0, (0.0, 1.0)), r"`center_m` must be 3 numbers .* got 2"),
        (lambda: pp.PointCharge(1.0, [[0, 0, 1]]), r"`center_m` must be 3 .* shape \(1, 3\)"),
        (lambda: pp.PointCharge(1.0, (0.0, np.nan, 1.0)), r"`center_m` must be finite; got \["),
        (lambda: pp.PointCharge(np.inf, (0, 0, 1)), r"`charge_c` must be finite; got inf"),
        (lambda: pp.PointCharge(np.nan, (0, 0, 1)), r"`charge_c` must be finite; got nan"),
        (lambda: pp.PointCharge("a lot", (0, 0, 1)), r"`charge_c` must be a number; got 'a lot'"),
        (lambda: pp.SphereCharge(1.0, (0, 0, 5), -1.0), r"`radius_m` must be > 0; got -1\.0"),
        (lambda: pp.SphereCharge(1.0, (0, 0, 5), 0.0), r"`radius_m` must be > 0; got 0\.0"),
        (lambda: pp.SphereCharge(1.0, (0, 0, 5), np.inf), r"`radius_m` must be finite"),
        (lambda: pp.GaussianCharge(1.0, (0, 0, 5), -0.3), r"`sigma_m` must be > 0; got -0\.3"),
        (lambda: pp.GaussianCharge(1.0, (0, 0, 5), np.nan), r"`sigma_m` must be finite"),
        (
            lambda: pp.LineCharge(1.0, (1, 2, 3), (1, 2, 3)),
            r"`start_m` and `end_m` of a line charge must differ; both are \[1\.0, 2\.0, 3\.0\]",
        ),
        (lambda: pp.LineCharge(1.0, (1, 2, 3), (1, 2)), r"`end_m` must be 3 numbers .* got 2"),
        (lambda: pp.LineCharge(1.0, (1, np.inf, 3), (1, 2, 4)), r"`start_m` must be finite"),
        (
            lambda: pp.DensityGrid(np.ones((2, 2)), (0, 0, 0), 1.0),
            r"`density_c_per_m3` must be a 3-D array \(nx, ny, nz\); got shape \(2, 2\)",
        ),
        (
            lambda: pp.DensityGrid(np.full((2, 2, 2), np.nan), (0, 0, 0), 1.0),
            r"`density_c_per_m3` must be finite",
        ),
        (
            lambda: pp.DensityGrid(np.ones((2, 2, 2)), (0, 0, 0), (1.0, -1.0, 1.0)),
            r"`spacing_m` must be > 0 and finite; got \[1\.0, -1\.0, 1\.0\]",
        ),
        (
            lambda: pp.DensityGrid(np.ones((2, 2, 2)), (0, 0, 0), (1.0, 2.0)),
            r"`spacing_m` must be one number or 3 numbers .* got 2",
        ),
        (lambda: pp.DensityGrid(np.ones((2, 2, 2)), (0, 0), 1.0), r"`origin_m` must be 3 numbers"),
    ],
)
def test_bad_source_arguments(make, match):
    # Source: the project's contract (one ValueError naming the argument, what it got and what
    # is allowed) - a convention, so this checks wording, not physics.
    with pytest.raises(ValueError, match=match):
        make()


def test_every_corner_of_a_cell_is_finite():
    # Source: a bounded density has a finite (continuous) field everywhere (potential theory);
    # the corners are where the closed form's logs and arctans meet their limits.
    grid = pp.DensityGrid(np.full((1, 1, 1), 1e-6), (0.0, 0.0, 1.0), (1.0, 2.0, 0.5))
    corners = np.array(list(itertools.product((0.0, 1.0), (0.0, 2.0), (1.0, 1.5))))
    e = pp.field(grid, corners)
    assert np.all(np.isfinite(e))
    # By the box's symmetry the corner fields are mirror images of each other.
    np.testing.assert_allclose(np.abs(e), np.abs(e[:1]).repeat(8, axis=0), rtol=1e-12)


def test_compiled_kernels_work_without_a_writable_cache(monkeypatch):
    # numba (its caching module): with no folder to cache in, decorating with cache=True raises
    # RuntimeError at once; the kernels must then compile per process instead of failing the import.
    from numba.core import caching

    from probeplan import sources

    if not hasattr(caching.CacheImpl, "_locator_classes"):
        pytest.skip("numba's cache internals changed; this test needs updating to them")
    monkeypatch.setattr(caching.CacheImpl, "_locator_classes", [])
    with pytest.raises(RuntimeError, match="no locator"):
        numba.njit(cache=True)(lambda x: x)
    twice = sources._jit(lambda x: 2.0 * x)
    assert twice(1.5) == 3.0


def test_ctrl_c_during_a_first_compiled_call_is_held_until_it_returns():
    # Python's signal module: a handler runs between bytecodes, also inside the callbacks numba
    # makes while it compiles or loads machine code, where a KeyboardInterrupt is printed and
    # lost. The first call of a compiled loop therefore holds SIGINT and hands it on after.
    import signal

    from probeplan import sources

    done = []

    def first_call(x):  # stands in for a compiled loop not yet loaded in this process
        signal.raise_signal(signal.SIGINT)
        done.append(x)
        return 2 * x

    first_call.overloads = {}  # (a numba dispatcher with nothing compiled yet)
    before = signal.getsignal(signal.SIGINT)
    with pytest.raises(KeyboardInterrupt):
        sources._call_compiled(first_call, 21)
    assert done == [21]  # the call ran to its end first
    assert signal.getsignal(signal.SIGINT) is before
    # Every press reaches the handler in place (the CLI's: the first asks the search to stop,
    # a second ends the run), in order, after the call.
    presses = []
    try:
        signal.signal(signal.SIGINT, lambda *a: presses.append(len(done)))

        def pressed_twice(x):
            signal.raise_signal(signal.SIGINT)
            signal.raise_signal(signal.SIGINT)
            done.append(x)

        pressed_twice.overloads = {}
        sources._call_compiled(pressed_twice, 5)
        assert presses == [2, 2]
    finally:
        signal.signal(signal.SIGINT, before)
    done[:] = [21]
    first_call.overloads = {"(int64,)": None}  # loaded: no handler is installed around later calls
    with pytest.raises(KeyboardInterrupt):
        sources._call_compiled(first_call, 1)
    assert done == [21]
