"""Potentials of every source kind (for the conductor solve), checked against the world:
closed forms with their sources named, scipy quadrature, and finite differences."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, special

import probeplan as pp
from probeplan.forward import Scene

K = pp.K_COULOMB


def _phi(sources, points, ground=None):
    scene = Scene(tuple(sources), ground)
    phi, _ = scene.potential(scene.nominal()[None], np.atleast_2d(points), jacobian=False)
    return phi[0]


def test_point_charge_is_coulomb_potential():
    # Coulomb: φ = k q / r (scipy.constants for k).
    phi = _phi([pp.PointCharge(2e-9, (1.0, 2.0, 3.0))], [[1.0, 2.0, 5.0], [4.0, 6.0, 3.0]])
    np.testing.assert_allclose(phi, K * 2e-9 / np.array([2.0, 5.0]), rtol=1e-14)


def test_uniform_ball_inside_and_outside():
    # Gauss's law integrated inwards (Griffiths, Introduction to Electrodynamics, problem 2.21):
    # φ = k q (3a² − r²)/(2a³) inside, k q / r outside; 3kq/(2a) at the centre.
    q, a = 1e-9, 0.5
    r = np.array([0.0, 0.2, 0.5, 0.9])
    phi = _phi([pp.SphereCharge(q, (0.0, 0.0, 0.0), a)], np.c_[r, 0 * r, 0 * r])
    want = np.where(r < a, K * q * (3 * a * a - r * r) / (2 * a**3), K * q / np.maximum(r, a))
    np.testing.assert_allclose(phi, want, rtol=1e-14)


@pytest.mark.parametrize("r", [0.0, 1e-6, 0.05, 0.4, 1.3, 6.0])
def test_gaussian_cloud_matches_radial_quadrature(r):
    # Shell theorem + scipy quad: φ(r) = k [Q(<r)/r + ∫_r^∞ 4π s ρ(s) ds].
    q, sigma = 1e-9, 0.4
    rho = lambda s: q * (2 * np.pi * sigma**2) ** -1.5 * np.exp(-(s**2) / (2 * sigma**2))  # noqa: E731
    outer = integrate.quad(lambda s: 4 * np.pi * s * rho(s), r, np.inf, epsabs=0, epsrel=1e-13)[0]
    inner = 0.0
    if r > 0:
        enclosed = integrate.quad(lambda s: 4 * np.pi * s * s * rho(s), 0, r, epsrel=1e-13)[0]
        inner = enclosed / r
    phi = _phi([pp.GaussianCharge(q, (0.0, 0.0, 0.0), sigma)], [[r, 0.0, 0.0]])
    np.testing.assert_allclose(phi, K * (inner + outer), rtol=1e-11)


@pytest.mark.parametrize("x", [[0.3, 0.4, 0.2], [0.0, 0.0, 2.0], [0.5, 0.5, 0.5], [0.0, 1e-4, 0.4]])
def test_segment_matches_quadrature(x):
    # scipy quad of k λ / |x − s| along the segment (no closed form used on this side).
    q, a, b = 3e-9, np.array([0.0, 0.0, -0.5]), np.array([0.0, 0.0, 0.7])
    x = np.asarray(x)
    f = lambda t: 1.0 / np.linalg.norm(x - (a + t * (b - a)))  # noqa: E731
    ref = K * q * integrate.quad(f, 0, 1, epsabs=0, epsrel=1e-13, limit=200)[0]
    np.testing.assert_allclose(_phi([pp.LineCharge(q, a, b)], x), ref, rtol=1e-11)


@pytest.mark.parametrize(
    "point",
    [[0.3, 0.25, 0.4], [0.7, 1.1, 0.2], [2.0, -0.5, 1.5], [0.0, 0.0, 0.0], [13.0, 4.0, 2.0]],
)
def test_density_grid_matches_adaptive_cubature(point):
    # scipy's adaptive cubature (nquad) of ρ/|x − r′| over every cell: inside, on a corner,
    # near, and beyond ten cells (where the kernel switches to cell quadrature).
    rho = np.array([[[1.0, -0.5]], [[0.25, 2.0]]])  # (2, 1, 2)
    spacing = (0.5, 0.8, 0.6)
    grid = pp.DensityGrid(rho, (0.0, 0.0, 0.0), spacing)
    x = np.asarray(point, dtype=float)
    ref = 0.0
    for (i, j, k), value in np.ndenumerate(rho):
        lo = np.array([i, j, k]) * spacing
        box = [[lo[n], lo[n] + spacing[n]] for n in range(3)][::-1]
        f = lambda z, y, xx: 1.0 / np.sqrt((xx - x[0]) ** 2 + (y - x[1]) ** 2 + (z - x[2]) ** 2)  # noqa: E731
        ref += value * integrate.nquad(f, box, opts={"epsabs": 0, "epsrel": 1e-10})[0]
    np.testing.assert_allclose(_phi([grid], x), K * ref, rtol=1e-8)


def _sources():
    rho = np.random.default_rng(0).normal(size=(2, 3, 2))
    return [
        pp.PointCharge(1e-9, (0.0, 0.0, 2.0)),
        pp.LineCharge(2e-9, (1.0, 0.0, 1.0), (1.0, 1.0, 3.0)),
        pp.SphereCharge(1e-9, (0.0, 1.0, 2.0), 0.5),
        pp.GaussianCharge(-1e-9, (1.0, 1.0, 2.0), 0.4),
        pp.DensityGrid(rho * 1e-9, (-1.0, -1.0, 1.0), (0.3, 0.4, 0.5)),
    ]


_POINTS = np.array(
    [[0.3, 0.2, 1.7], [0.0, 1.05, 2.1], [1.1, 1.2, 2.3], [-0.8, -0.7, 1.3], [3, 4, 5], [40, 0, 3]]
)


@pytest.mark.parametrize("ground", [None, 0.0])
@pytest.mark.parametrize("kind", range(5))
def test_minus_gradient_of_potential_is_the_field(kind, ground):
    # E = −∇φ, by central differences of the potential against the field kernels.
    scene = Scene((_sources()[kind],), ground, background=True)
    theta = scene.nominal((3.0, -2.0, -100.0))[None]
    e, _ = scene.evaluate(theta, _POINTS, jacobian=False)
    h = 1e-5
    grad = np.stack(
        [
            (
                scene.potential(theta, _POINTS + h * np.eye(3)[k], jacobian=False)[0]
                - scene.potential(theta, _POINTS - h * np.eye(3)[k], jacobian=False)[0]
            )
            / (2 * h)
            for k in range(3)
        ],
        axis=-1,
    )
    np.testing.assert_allclose(-grad, e, atol=1e-7 * np.abs(e).max())


@pytest.mark.parametrize("ground", [None, 0.5])
def test_potential_jacobian_matches_finite_differences(ground):
    scene = Scene(tuple(_sources()), ground, background=True)
    theta = scene.nominal((3.0, -2.0, -100.0))[None]
    _, jac = scene.potential(theta, _POINTS)
    step = np.where([n.endswith("charge_c") for n in scene.param_names], 1e-9, 1.0) * 1e-5
    for j in range(scene.n_params):
        d = np.zeros_like(theta)
        d[0, j] = step[j]
        fd = (
            scene.potential(theta + d, _POINTS, jacobian=False)[0]
            - scene.potential(theta - d, _POINTS, jacobian=False)[0]
        ) / (2 * step[j])
        scale = np.abs(jac[..., j]).max() + 1e-30
        np.testing.assert_allclose(jac[..., j], fd, atol=1e-6 * scale, err_msg=scene.param_names[j])


def test_images_make_the_plane_an_equipotential():
    # Method of images (Jackson, Classical Electrodynamics, §2.1): every source with its image
    # has zero potential on the grounded plane.
    g = 0.5
    plane = np.c_[np.linspace(-3, 3, 7), np.linspace(2, -2, 7), np.full(7, g)]
    phi = _phi(_sources(), plane, ground=g)
    scale = np.abs(_phi(_sources(), plane + [0, 0, 1.0], ground=g)).max()
    assert np.abs(phi).max() < 1e-12 * scale


def test_point_on_a_point_charge_is_named():
    with pytest.raises(ValueError, match="point 1 .* point charge"):
        _phi([pp.PointCharge(1e-9, (0.0, 0.0, 1.0))], [[0, 0, 2.0], [0, 0, 1.0]])


def test_erf_series_meets_the_closed_form():
    # scipy.special.erf at the switch point of the near-centre series.
    sigma, u = 0.4, 1e-3
    r = u * np.sqrt(2) * sigma
    phi = _phi([pp.GaussianCharge(1.0, (0, 0, 0), sigma)], [[r * 0.999, 0, 0], [r * 1.001, 0, 0]])
    want = K * special.erf(np.array([0.999, 1.001]) * u) / (np.array([0.999, 1.001]) * r)
    np.testing.assert_allclose(phi, want, rtol=1e-14)
