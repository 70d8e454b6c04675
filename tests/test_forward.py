"""The forward model: ground plane, derivatives, scenario batching, laws, singular and bad input.

Every check names the outside source it compares with. Book references are to standard texts;
equation and example numbers are recalled from memory, so each formula is also written out.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import constants
from scipy.spatial.transform import Rotation

import probeplan as pp

# Coulomb constant built here from scipy.constants (CODATA), not taken from the package.
K_REF = 1.0 / (4.0 * math.pi * constants.epsilon_0)
KINDS = ("point", "line", "sphere", "gaussian", "grid")
PROPERTY = settings(max_examples=30, deadline=None)


# ----------------------------------------------------------------------------------------------
# Helpers: sources built from a seed, transformed copies, row-wise comparison
# ----------------------------------------------------------------------------------------------


def _random_source(kind: str, rng: np.random.Generator, z_min: float = 0.0):
    """A source of ``kind`` whose lowest point is at least 0.2 m above ``z_min``."""
    q = rng.choice([-1.0, 1.0]) * rng.uniform(0.2, 5.0) * 1e-6
    size = rng.uniform(0.1, 1.5)
    c = np.array([rng.uniform(-4, 4), rng.uniform(-4, 4), z_min + 0.2 + size + rng.uniform(0, 4)])
    if kind == "point":
        return pp.PointCharge(q, c)
    if kind == "line":
        u = rng.normal(size=3)
        u *= 0.5 * size / np.linalg.norm(u)
        return pp.LineCharge(q, c - u, c + u)
    if kind == "sphere":
        return pp.SphereCharge(q, c, size)
    if kind == "gaussian":
        return pp.GaussianCharge(q, c, size)
    # Cells of 0.4-1 m: the points lie within ~15 m, at most ~40 cells away, where the grid's
    # corner sums still hold ~1e-10 relative precision (see test_sources.py, far-field tests).
    shape = tuple(rng.integers(1, 4, size=3))
    rho = rng.uniform(-1.0, 1.0, size=shape) * 1e-6
    spacing = rng.uniform(0.4, 1.0, size=3)
    c[2] = z_min + 0.2 + 0.5 * shape[2] * spacing[2] + rng.uniform(0, 4)
    return pp.DensityGrid(rho, c - 0.5 * np.asarray(shape) * spacing, spacing)


def _distance_to_singular(src, pts: np.ndarray) -> np.ndarray:
    """Distance from each point to a point or line charge; inf for the finite kinds."""
    if src.kind == "point":
        return np.linalg.norm(pts - np.asarray(src.center_m), axis=1)
    if src.kind == "line":
        a, b = np.asarray(src.start_m), np.asarray(src.end_m)
        t = np.clip((pts - a) @ (b - a) / np.dot(b - a, b - a), 0.0, 1.0)
        return np.linalg.norm(pts - (a + t[:, None] * (b - a)), axis=1)
    return np.full(len(pts), np.inf)


def _points(rng: np.random.Generator, n: int, z_min: float = 0.0) -> np.ndarray:
    return np.c_[rng.uniform(-8, 8, size=(n, 2)), z_min + rng.uniform(0.0, 10.0, size=n)]


def _clear_of(sources, pts: np.ndarray, gap: float = 1e-2) -> bool:
    return all(np.all(_distance_to_singular(s, pts) > gap) for s in sources)


def _with_charge_scaled(src, alpha: float):
    if src.kind == "grid":
        return dataclasses.replace(src, density_c_per_m3=alpha * src.density_c_per_m3)
    return dataclasses.replace(src, charge_c=alpha * src.charge_c)


def _map_lengths(src, f, scale: float = 1.0):
    """Copy with every position mapped by ``f`` and every size multiplied by ``scale``."""
    if src.kind == "point":
        return pp.PointCharge(src.charge_c, f(src.center_m))
    if src.kind == "line":
        return pp.LineCharge(src.charge_c, f(src.start_m), f(src.end_m))
    if src.kind == "sphere":
        return pp.SphereCharge(src.charge_c, f(src.center_m), scale * src.radius_m)
    if src.kind == "gaussian":
        return pp.GaussianCharge(src.charge_c, f(src.center_m), scale * src.sigma_m)
    # A grid only translates or scales here (its cells stay axis-aligned); the total charge
    # is kept, so the density goes with 1/scale³.
    return pp.DensityGrid(
        src.density_c_per_m3 / scale**3, f(src.origin_m), np.asarray(src.spacing_m) * scale
    )


def _assert_rows_close(got, ref, scale=None, rel=1e-9):
    """|got − ref| per point ≤ rel × scale per point (default: |ref| per point)."""
    got, ref = np.asarray(got), np.asarray(ref)
    s = np.linalg.norm(ref, axis=-1) if scale is None else np.asarray(scale)
    err = np.linalg.norm(got - ref, axis=-1)
    assert np.all(err <= rel * s + 1e-300), (err / np.maximum(s, 1e-300)).max()


def _rel(kind: str, exact: float) -> float:
    """Tolerance of a law: ``exact`` for closed forms, looser for a grid's corner sums, which
    lose ~(r/h)³ ulps to cancellation some tens of cells away (quantified in test_sources.py)."""
    return max(exact, 1e-8) if kind == "grid" else exact


seeds = st.integers(min_value=0, max_value=2**32 - 1)
kinds = st.sampled_from(KINDS)


# ----------------------------------------------------------------------------------------------
# Grounded plane: the method of images
# ----------------------------------------------------------------------------------------------


def test_ground_field_under_a_charge_is_normal_and_twice_free_space():
    # Source: method of images (Griffiths, Introduction to Electrodynamics, §3.2; Jackson,
    # Classical Electrodynamics, §2.1): directly under a charge q at height h the plane sees
    # E = −2kq/h² ẑ (pointing away from a positive charge, i.e. down), twice the free field.
    q, h = 3.0e-3, 250.0
    for g in (0.0, -12.5, 40.0):  # the plane need not be at z = 0
        src = pp.PointCharge(q, (10.0, -20.0, g + h))
        e = pp.field(src, [[10.0, -20.0, g]], ground_z_m=g)[0]
        np.testing.assert_allclose(e, [0.0, 0.0, -2.0 * K_REF * q / h**2], rtol=1e-12)
        free = pp.field(src, [[10.0, -20.0, g]])[0]
        np.testing.assert_allclose(e, 2.0 * free, rtol=1e-12)


def test_ground_field_off_axis_is_the_induced_surface_charge():
    # Source: Griffiths, §3.2.1, eq. 3.10 (number from memory): the plane's induced charge is
    # σ = −q h / (2π (ρ² + h²)^(3/2)) and just above a conductor E = σ/ε₀ n̂, so at the plane
    # E_z = −2kqh / (ρ² + h²)^(3/2) and E_x = E_y = 0.
    q, h = -1.5e-3, 80.0
    rho = np.array([0.0, 10.0, 80.0, 300.0, 5000.0])
    pts = np.c_[rho * 0.6, rho * 0.8, np.zeros_like(rho)]
    e = pp.field(pp.PointCharge(q, (0.0, 0.0, h)), pts, ground_z_m=0.0)
    sigma = -q * h / (2.0 * math.pi * (rho**2 + h**2) ** 1.5)
    np.testing.assert_allclose(e[:, 2], sigma / constants.epsilon_0, rtol=1e-12)
    np.testing.assert_allclose(e[:, :2], 0.0, atol=1e-14 * np.abs(e[:, 2]).max())


def test_storm_charge_worked_value():
    # Source: worked value from the project's issue 2 (−20 C at 7 km over ground gives
    # 7.34 kV/m at the ground below), by the image formula |E| = 2k|q|/h² = 7337 V/m.
    # Sign (physics convention): the field points from + to −; the real −20 C is above and its
    # +20 C image below ground, so both push/pull the field upwards: E_z > 0 at the ground.
    e = pp.field(pp.PointCharge(-20.0, (0.0, 0.0, 7000.0)), [[0.0, 0.0, 0.0]], ground_z_m=0.0)
    assert e[0, 2] > 0.0
    assert e[0, 2] == pytest.approx(7.34e3, rel=1e-3)
    np.testing.assert_allclose(e[0, :2], 0.0, atol=1e-12)


def test_ground_above_the_plane_is_charge_plus_mirror_image():
    # Source: method of images (Jackson §2.1): above the plane z = g the field is that of the
    # charge and of −q at the mirror point (x, y, 2g − z), both in free space.
    g = 1.5
    src = pp.PointCharge(2e-6, (0.3, -0.2, 4.0))
    image = pp.PointCharge(-2e-6, (0.3, -0.2, 2 * g - 4.0))
    pts = _points(np.random.default_rng(3), 30, z_min=g)
    _assert_rows_close(pp.field(src, pts, g), pp.field([src, image], pts), rel=1e-12)


def test_neutral_grid_over_ground_has_no_tangential_field():
    # Source: method of images (Jackson §2.1); a grounded conductor's surface is an
    # equipotential, so the field there is normal to it, whatever the net charge. A grid with
    # zero net charge (a vertical dipole of two layers) is the case where the image's sign
    # cannot be taken from the total charge.
    rho = np.zeros((2, 1, 2))
    rho[:, :, 0], rho[:, :, 1] = 1e-6, -1e-6
    grid = pp.DensityGrid(rho, (0.0, 0.0, 1.0), 0.5)
    assert grid.charge_c == 0.0
    pts = np.array([[0.3, 0.2, 0.0], [-2.0, 1.0, 0.0], [5.0, -4.0, 0.0]])
    e = pp.field(grid, pts, ground_z_m=0.0)
    free = pp.field(grid, pts)
    np.testing.assert_allclose(e[:, :2], 0.0, atol=1e-12 * np.abs(free).max())
    # Image method, by hand: the mirror grid with the opposite density, in free space.
    image = pp.DensityGrid(-rho[:, :, ::-1], (0.0, 0.0, -2.0), 0.5)
    _assert_rows_close(e, free + pp.field(image, pts), rel=1e-12)


@pytest.mark.parametrize("seed", range(12))
def test_nearly_neutral_grid_over_ground_has_no_tangential_field(seed):
    # Source: method of images (Jackson §2.1), as above, for a density with its mean taken
    # out: its net charge is rounding noise whose sign and size depend on the order of the sum
    # (the image sums the flipped array), so the image must take the real grid's neutrality
    # and charge rather than its own. (It once vanished, or came out with the wrong sign.)
    rng = np.random.default_rng(seed)
    rho = rng.uniform(-1e-6, 1e-6, (3, 2, 4))
    rho -= rho.mean()
    grid = pp.DensityGrid(rho, (0.0, 0.0, 1.0), 0.5)
    assert grid.neutral
    pts = np.array([[0.3, 0.2, 0.0], [-2.0, 1.0, 0.0], [5.0, -4.0, 0.0], [40.0, 3.0, 0.0]])
    e = pp.field(grid, pts, ground_z_m=0.0)
    free = pp.field(grid, pts)
    np.testing.assert_allclose(e[:, :2], 0.0, atol=1e-10 * np.abs(free).max())
    np.testing.assert_allclose(e[:, 2], 2.0 * free[:, 2], rtol=1e-9)  # E_z doubles at the plane


def test_grid_far_in_one_scenario_near_in_another():
    # Each (scenario, point) pair takes its own method: a scenario that moves the grid 3,000 and
    # 30,000 cells away gets the far-field precision there (the point-charge limit of a uniform
    # cube, exact to ~(h/r)⁴ by the multipole expansion), while scenario 0, next to the point,
    # keeps the closed form; each row equals that scenario evaluated alone.
    cell = pp.DensityGrid(np.full((1, 1, 1), 1e-6), (-0.5, -0.5, 9.5), 1.0)
    scene = pp.Scene((cell,))
    theta = np.tile(scene.nominal(), (3, 1))
    theta[1, 1] += 3_000.0
    theta[2, 1] += 30_000.0
    pts = np.array([[2.0, 0.5, 10.0], [-1.0, 1.0, 8.0]])
    e, jac = scene.evaluate(theta, pts)
    for s in range(3):
        e_s, jac_s = scene.evaluate(theta[s : s + 1], pts)
        np.testing.assert_allclose(e[s], e_s[0], rtol=1e-13)
        np.testing.assert_allclose(jac[s], jac_s[0], rtol=1e-13, atol=1e-13 * np.abs(jac_s).max())
    for s in (1, 2):
        point = pp.Scene((pp.PointCharge(1e-6, tuple(theta[s, 1:4])),))
        e_p, jac_p = point.evaluate(point.nominal()[None], pts)
        np.testing.assert_allclose(e[s], e_p[0], rtol=1e-11)
        np.testing.assert_allclose(jac[s], jac_p[0], rtol=1e-10, atol=1e-10 * np.abs(jac_p).max())


# ----------------------------------------------------------------------------------------------
# Derivatives against central finite differences, batched over scenarios
# ----------------------------------------------------------------------------------------------


def _fd_scene(kind: str, ground: float | None, background: bool):
    rng = np.random.default_rng(KINDS.index(kind) if kind in KINDS else 99)
    z_min = 1.0 + (ground if ground is not None else 0.0)
    if kind == "mixed":  # kinds out of order: the Jacobian columns of a group are scattered
        order = ("sphere", "point", "grid", "line", "gaussian", "point")
    elif kind == "neutral grid":
        order = ("grid",)
    else:
        order = (kind, kind)
    sources = [_random_source(k, rng, z_min=z_min) for k in order]
    if kind == "neutral grid":  # zero net charge: a layer of + over a layer of −
        rho = np.zeros((2, 2, 2))
        rho[:, :, 0], rho[:, :, 1] = 1e-6, -1e-6
        sources.append(pp.DensityGrid(rho, (0.5, -1.0, z_min + 0.4), (0.8, 0.6, 0.5)))
    return pp.Scene(sources, ground_z_m=ground, background=background), rng


def _fd_thetas(scene, rng, n_scenarios=3):
    """Scenarios near the nominal: charges ±30 %, centres ±0.2 m, sizes ±20 %."""
    base = scene.nominal(background_v_per_m=(3.0, -4.0, -120.0))
    thetas = np.repeat(base[None, :], n_scenarios, axis=0)
    for j, name in enumerate(scene.param_names):
        tail = name.split(".")[-1]
        if tail == "charge_c":
            thetas[:, j] *= rng.uniform(0.7, 1.3, n_scenarios)
        elif tail in ("x_m", "y_m", "z_m"):
            thetas[:, j] += rng.uniform(-0.2, 0.2, n_scenarios)
        elif tail in ("radius_m", "sigma_m"):
            thetas[:, j] *= rng.uniform(0.8, 1.2, n_scenarios)
        else:  # background components
            thetas[:, j] += rng.uniform(-10.0, 10.0, n_scenarios)
    return thetas


def _points_for(scene, rng, n=16):
    g = scene.ground_z_m
    pts = _points(rng, n, z_min=0.0 if g is None else g)
    if g is not None:
        pts[:4, 2] = g  # meters flush with the ground
    # Points inside the finite bodies too (off-centre, away from the sphere's surface).
    inner = [
        np.asarray(s.center_m) + 0.3 * s.radius_m * np.array([0.3, -0.5, 0.4])
        if s.kind == "sphere"
        else np.asarray(s.center_m) + 0.4 * s.sigma_m * np.array([0.6, 0.2, -0.3])
        for s in scene.sources
        if s.kind in ("sphere", "gaussian")
    ]
    return np.vstack([pts, *inner]) if inner else pts


@pytest.mark.parametrize("background", [False, True], ids=["no-bg", "bg"])
@pytest.mark.parametrize("ground", [None, -0.4], ids=["free", "ground"])
@pytest.mark.parametrize("kind", [*KINDS, "neutral grid", "mixed"])
def test_jacobian_matches_central_differences(kind, ground, background):
    # Source: central finite differences, 5-point stencil
    # f'(θ) ≈ [8 (f(θ+h) − f(θ−h)) − (f(θ+2h) − f(θ−2h))] / 12h, error O(h⁴) (e.g. Abramowitz &
    # Stegun 25.3.6, from memory), for every parameter of every kind, over several scenarios
    # evaluated in one batch. The step is 1 mm for positions: a grid's field is summed over
    # alternating cell corners and carries ~1e-10 relative rounding far away, which a tiny step
    # would magnify; the points keep ≥ 0.2 m from point and line charges, so the O(h⁴) error
    # stays below ~1e-8.
    scene, rng = _fd_scene(kind, ground, background)
    thetas = _fd_thetas(scene, rng)
    pts = _points_for(scene, rng)
    assert _clear_of(scene.sources, pts, gap=0.2)
    e, jac = scene.evaluate(thetas, pts)
    assert e.shape == (3, len(pts), 3) and jac.shape == (3, len(pts), 3, scene.n_params)
    fd = np.empty_like(jac)
    steps = np.empty(thetas.shape)
    for j, name in enumerate(scene.param_names):
        tail = name.split(".")[-1]
        if tail in ("x_m", "y_m", "z_m"):
            step = np.full(len(thetas), 1e-3)
        else:  # charge and background (linear: any step is exact), radius and sigma
            # (a neutral grid's charge is 0 and has no effect: any nonzero step will do)
            step = 1e-3 * np.maximum(np.abs(thetas[:, j]), 1e-12)
        steps[:, j] = step

        def shifted(k, j=j, step=step):
            th = thetas.copy()
            th[:, j] += k * step
            return scene.evaluate(th, pts, jacobian=False)[0]

        diff = 8.0 * (shifted(1) - shifted(-1)) - (shifted(2) - shifted(-2))
        fd[..., j] = diff / (12.0 * step[:, None, None])
    scale = np.abs(fd).max(axis=(1, 2), keepdims=True)  # per scenario and parameter
    # Rounding floor of a difference quotient: ~1e-13 of the largest field, over the step
    # (a small column next to a strong nearby source is otherwise all rounding).
    floor = 1e-13 * np.abs(e).max(axis=(1, 2))[:, None, None, None] / steps[:, None, None, :]
    # A grid's field carries ~1e-10 relative rounding from its alternating corner sums (its
    # Jacobian is checked to ~1e-9 against cubature in test_sources.py); the step magnifies it.
    rel = 1e-5 if any(s.kind == "grid" for s in scene.sources) else 1e-6
    bad = np.abs(jac - fd) > rel * np.abs(fd) + 0.1 * rel * scale + floor
    if np.any(bad):
        worst = tuple(np.argwhere(bad)[0])
        raise AssertionError(
            f"{bad.sum()} entries off; first at (scenario, point, component, param) {worst}: "
            f"{scene.param_names[worst[3]]} analytic {jac[worst]:.9g} vs {fd[worst]:.9g}"
        )


def test_background_enters_as_identity():
    # Source: a uniform background field adds E_bg at every point: ∂E_i/∂bg_j = δ_ij.
    scene = pp.Scene([pp.PointCharge(1e-6, (0.0, 0.0, 3.0))], ground_z_m=0.0, background=True)
    theta = scene.nominal(background_v_per_m=(1.0, 2.0, -130.0))[None, :]
    pts = np.array([[1.0, 1.0, 0.0], [4.0, -2.0, 1.0]])
    e, jac = scene.evaluate(theta, pts)
    e0, _ = pp.Scene(scene.sources, 0.0).evaluate(theta[:, :-3], pts, jacobian=False)
    np.testing.assert_allclose(e - e0, np.broadcast_to([1.0, 2.0, -130.0], e.shape), rtol=1e-14)
    np.testing.assert_array_equal(jac[0, :, :, -3:], np.broadcast_to(np.eye(3), (2, 3, 3)))


def test_scenario_batch_equals_one_at_a_time():
    # Source: definition of batching (each row of θ is an independent evaluation).
    scene, rng = _fd_scene("mixed", -0.4, True)
    thetas = _fd_thetas(scene, rng, n_scenarios=6)
    pts = _points_for(scene, rng, n=40)
    e, jac = scene.evaluate(thetas, pts)
    # The grid's corner sums are ill-conditioned (~1e-10 relative here) and the batch size
    # changes how they are blocked and summed, so its columns (and the field) get 1e-8; the
    # closed-form kinds must agree to rounding.
    grid_src = [f"s{i}." for i, src in enumerate(scene.sources) if src.kind == "grid"]
    is_grid = np.array([n.startswith(tuple(grid_src)) for n in scene.param_names])
    rel = np.where(is_grid, 1e-8, 1e-13)
    for s in range(len(thetas)):
        e1, jac1 = scene.evaluate(thetas[s : s + 1], pts)
        np.testing.assert_allclose(e[s], e1[0], rtol=1e-8, atol=1e-8 * np.abs(e1).max())
        err = np.abs(jac[s] - jac1[0])
        assert np.all(err <= rel * (np.abs(jac1[0]) + np.abs(jac1[0]).max(axis=(0, 1)))), s
    # Selected columns are the same numbers as the full Jacobian's.
    cols = np.array([0, 5, 2])
    _, jac_cols = scene.evaluate(thetas, pts, columns=cols)
    np.testing.assert_array_equal(jac_cols, jac[..., cols])


def test_public_functions_agree_with_scene():
    # Source: the contract (pp.field and pp.field_jacobian are the one-shot forms of Scene).
    rng = np.random.default_rng(11)
    sources = [_random_source(k, rng) for k in KINDS]
    pts = _points(rng, 12)
    scene = pp.Scene(sources, ground_z_m=0.0)
    e, jac = scene.evaluate(scene.nominal()[None, :], pts)
    e1, jac1 = pp.field_jacobian(sources, pts, ground_z_m=0.0)
    np.testing.assert_array_equal(e1, e[0])
    np.testing.assert_array_equal(jac1, jac[0])
    np.testing.assert_array_equal(pp.field(sources, pts, ground_z_m=0.0), e[0])
    # Fixed rank: one point still gives (1, 3); no points gives (0, 3).
    assert pp.field(sources, pts[:1]).shape == (1, 3)
    assert pp.field(sources, np.zeros((0, 3))).shape == (0, 3)


# ----------------------------------------------------------------------------------------------
# Laws (hypothesis)
# ----------------------------------------------------------------------------------------------


@PROPERTY
@given(kind=kinds, seed=seeds, alpha=st.floats(-50.0, 50.0), grounded=st.booleans())
def test_linear_in_charge(kind, seed, alpha, grounded):
    # Source: linearity of Coulomb's law (and of the image construction) in the charge.
    rng = np.random.default_rng(seed)
    src = _random_source(kind, rng)
    pts = _points(rng, 10)
    assume(_clear_of([src], pts))
    g = 0.0 if grounded else None
    base = pp.field(src, pts, g)
    got = pp.field(_with_charge_scaled(src, alpha), pts, g)
    _assert_rows_close(got, alpha * base, rel=_rel(kind, 1e-12))


@PROPERTY
@given(seed=seeds, n=st.integers(2, 5), grounded=st.booleans())
def test_superposition(seed, n, grounded):
    # Source: the superposition principle of electrostatics (linearity of Maxwell's equations).
    rng = np.random.default_rng(seed)
    srcs = [_random_source(KINDS[i], rng) for i in rng.integers(0, len(KINDS), size=n)]
    pts = _points(rng, 10)
    assume(_clear_of(srcs, pts))
    g = 0.0 if grounded else None
    parts = [pp.field(s, pts, g) for s in srcs]
    scale = sum(np.linalg.norm(p, axis=1) for p in parts)
    rel = max(_rel(s.kind, 1e-12) for s in srcs)
    _assert_rows_close(pp.field(srcs, pts, g), sum(parts), scale=scale, rel=rel)


@PROPERTY
@given(
    kind=kinds,
    seed=seeds,
    shift=st.tuples(*[st.floats(-10.0, 10.0)] * 3),
    grounded=st.booleans(),
)
def test_translation_invariance(kind, seed, shift, grounded):
    # Source: homogeneity of space; with a ground plane the plane moves with everything.
    rng = np.random.default_rng(seed)
    src = _random_source(kind, rng)
    pts = _points(rng, 10)
    assume(_clear_of([src], pts))
    d = np.asarray(shift)
    moved = _map_lengths(src, lambda p: tuple(np.asarray(p) + d))
    g, g2 = (0.0, d[2]) if grounded else (None, None)
    _assert_rows_close(pp.field(moved, pts + d, g2), pp.field(src, pts, g), rel=_rel(kind, 1e-9))


@PROPERTY
@given(
    kind=st.sampled_from(("point", "line", "sphere", "gaussian")),
    seed=seeds,
    rotvec=st.tuples(*[st.floats(-math.pi, math.pi)] * 3),
)
def test_rotation_invariance(kind, seed, rotvec):
    # Source: isotropy of space, E(R x; R sources) = R E(x; sources), free space; the rotation
    # from scipy.spatial.transform. (A grid's cells stay axis-aligned, so it is left out.)
    rng = np.random.default_rng(seed)
    src = _random_source(kind, rng)
    pts = _points(rng, 10)
    assume(_clear_of([src], pts))
    rot = Rotation.from_rotvec(rotvec)
    turned = _map_lengths(src, lambda p: tuple(rot.apply(np.asarray(p, dtype=float))))
    _assert_rows_close(pp.field(turned, rot.apply(pts)), rot.apply(pp.field(src, pts)), rel=1e-9)


@PROPERTY
@given(kind=kinds, seed=seeds, a=st.floats(0.05, 20.0), grounded=st.booleans())
def test_inverse_square_scaling(kind, seed, a, grounded):
    # Source: dimensional analysis of Coulomb's law: every length × a, charges fixed, gives
    # the field × 1/a² (the grid keeps its total charge: density × 1/a³).
    rng = np.random.default_rng(seed)
    src = _random_source(kind, rng)
    pts = _points(rng, 10)
    assume(_clear_of([src], pts))
    big = _map_lengths(src, lambda p: tuple(a * np.asarray(p)), scale=a)
    g = 0.0 if grounded else None
    ref = pp.field(src, pts, g) / a**2
    # Rounding is relative to the sum of the magnitudes of what is added up: for a grid of
    # mixed signs that is the field of |ρ|, which can be ~100× the net field.
    scale = None
    if kind == "grid":
        gross = pp.DensityGrid(np.abs(src.density_c_per_m3), src.origin_m, src.spacing_m)
        scale = np.maximum(
            np.linalg.norm(ref, axis=1), np.linalg.norm(pp.field(gross, pts), axis=1)
        )
        scale /= a**2
    _assert_rows_close(pp.field(big, a * pts, g), ref, scale=scale, rel=_rel(kind, 1e-9))


@PROPERTY
@given(kind=kinds, seed=seeds, g=st.floats(-3.0, 3.0))
def test_no_tangential_field_on_the_ground(kind, seed, g):
    # Source: a grounded conductor is an equipotential, so the field at its surface is normal
    # to it (Griffiths §2.5; Jackson §1.13): E_x = E_y = 0 on z = g, for every kind.
    rng = np.random.default_rng(seed)
    src = _random_source(kind, rng, z_min=g)
    pts = _points(rng, 12, z_min=g)
    pts[:, 2] = g
    e = pp.field(src, pts, ground_z_m=g)
    free = np.linalg.norm(pp.field(src, pts), axis=1)  # the scale the cancellation works at
    assert np.all(np.abs(e[:, :2]) <= _rel(kind, 1e-12) * free[:, None])


@PROPERTY
@given(seed=seeds, factor=st.floats(12.0, 1e4))
def test_gaussian_is_a_point_charge_far_away(seed, factor):
    # Source: Gauss's law; outside r = 12σ the Gaussian holds all but ~erfc(12/√2) ≈ 1e-33 of
    # its charge, so it is a point charge to double precision.
    rng = np.random.default_rng(seed)
    cloud = _random_source("gaussian", rng)
    u = rng.normal(size=(5, 3))
    u /= np.linalg.norm(u, axis=1)[:, None]
    pts = np.asarray(cloud.center_m) + factor * cloud.sigma_m * u
    point = pp.PointCharge(cloud.charge_c, cloud.center_m)
    _assert_rows_close(pp.field(cloud, pts), pp.field(point, pts), rel=1e-12)


@PROPERTY
@given(seed=seeds, factor=st.floats(1.0 + 1e-9, 1e4))
def test_ball_is_a_point_charge_outside(seed, factor):
    # Source: Gauss's law (shell theorem): outside a spherically symmetric charge the field is
    # that of the whole charge at the centre.
    rng = np.random.default_rng(seed)
    ball = _random_source("sphere", rng)
    u = rng.normal(size=(5, 3))
    u /= np.linalg.norm(u, axis=1)[:, None]
    pts = np.asarray(ball.center_m) + factor * ball.radius_m * u
    point = pp.PointCharge(ball.charge_c, ball.center_m)
    _assert_rows_close(pp.field(ball, pts), pp.field(point, pts), rel=1e-12)


# ----------------------------------------------------------------------------------------------
# Singular points
# ----------------------------------------------------------------------------------------------


def test_point_on_a_point_charge_is_named():
    # Source: Coulomb's law is infinite at the charge; the contract asks for the point's name.
    src = pp.PointCharge(1e-6, (1.0, 2.0, 3.0))
    with pytest.raises(ValueError, match=r"point 1 at \(1, 2, 3\) m lies on a point charge"):
        pp.field(src, [[0.0, 0.0, 5.0], [1.0, 2.0, 3.0]])


@pytest.mark.parametrize(
    "point, where", [((0.5, 0.0, 1.0), "inside"), ((2.0, 0.0, 1.0), "end"), ((0, 0, 1), "start")]
)
def test_point_on_a_line_charge_is_named(point, where):
    # Source: the field of a line density diverges like 1/distance at the line.
    src = pp.LineCharge(1e-6, (0.0, 0.0, 1.0), (2.0, 0.0, 1.0))
    p = ", ".join(f"{v:g}" for v in point)
    with pytest.raises(ValueError, match=rf"point 2 at \({p}\) m lies on a line charge"):
        pp.field(src, [[0.0, 3.0, 1.0], [5.0, 0.0, 1.0], point], ground_z_m=0.0)


def test_point_on_a_charged_grid_corner_is_named_when_the_jacobian_is_asked():
    # Source: the field of a uniformly charged box is finite everywhere, but its gradient
    # diverges at the box's corners (the ln terms of the closed form, Nagy et al. 2000): the
    # field alone is fine there, the Jacobian's centre columns are not, and the error names
    # the point (its index among all points) instead of returning inf.
    grid = pp.DensityGrid(np.full((2, 2, 2), 1e-6), (0.0, 0.0, 0.0), 1.0)
    pts = np.array([[3.0, 0.0, 0.0], [0.5, 0.5, 2.5], [0.0, 0.0, 0.0]])
    assert np.all(np.isfinite(pp.field(grid, pts)))
    with pytest.raises(ValueError, match=r"point 2 at \(0, 0, 0\) m lies on a corner of a charged"):
        pp.field_jacobian(grid, pts)


def test_singular_point_index_is_global_across_blocks_and_scenarios():
    # Source: the contract (the error names the point); points are processed in blocks, so a
    # point far down the list checks the index bookkeeping. Scenario 2 moves charge 7 onto it.
    rng = np.random.default_rng(5)
    sources = [pp.PointCharge(1e-6, c) for c in _points(rng, 200, z_min=1.0)]
    pts = _points(rng, 500, z_min=20.0)
    scene = pp.Scene(sources)
    thetas = np.repeat(scene.nominal()[None, :], 3, axis=0)
    thetas[2, 7 * 4 + 1 : 7 * 4 + 4] = pts[431]
    scene.evaluate(thetas[:2], pts)  # fine without scenario 2
    with pytest.raises(ValueError, match=r"point 431 at \(.*\) m lies on a point charge"):
        scene.evaluate(thetas, pts)


# ----------------------------------------------------------------------------------------------
# Bad input to field(): one clear ValueError naming the argument, what it got, what it needs
# ----------------------------------------------------------------------------------------------

_Q = pp.PointCharge(1e-6, (0.0, 0.0, 2.0))


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda: pp.field(_Q, np.zeros((4, 2))), r"`points_m` must have shape \(n_points, 3\) "),
        (lambda: pp.field(_Q, [1.0, 2.0, 3.0]), r"`points_m` must have shape .* got shape \(3,\)"),
        (lambda: pp.field(_Q, np.zeros((2, 3, 1))), r"got shape \(2, 3, 1\)"),
        (
            lambda: pp.field(_Q, [[0, 0, 0], [np.nan, 0, 1]]),
            r"`points_m` row 1 must be finite; got \[nan, 0\.0, 1\.0\]",
        ),
        (lambda: pp.field(_Q, [[0, np.inf, 1]]), r"`points_m` row 0 must be finite; got \[0\.0, "),
        (
            lambda: pp.field(_Q, [[0, 0, 1], [0, 0, -0.1]], ground_z_m=0.0),
            r"`points_m` row 1 at z = -0\.1 m is below the ground plane at z = 0 m",
        ),
        (
            lambda: pp.field([_Q, pp.PointCharge(1.0, (0, 0, -1.0))], [[0, 0, 1]], 0.0),
            r"source 1 \(point\) reaches down to z = -1 m, not above the ground plane at z = 0 m",
        ),
        (
            lambda: pp.field(pp.PointCharge(1.0, (0, 0, 0.0)), [[0, 0, 1]], 0.0),
            r"source 0 \(point\) reaches down to z = 0 m, not above the ground plane",
        ),
        (
            lambda: pp.field(pp.LineCharge(1.0, (0, 0, 1), (0, 1, -0.5)), [[0, 0, 1]], 0.0),
            r"source 0 \(line\) reaches down to z = -0\.5 m",
        ),
        (
            lambda: pp.field(pp.SphereCharge(1.0, (0, 0, 1), 1.5), [[0, 0, 3]], 0.0),
            r"source 0 \(sphere\) reaches down to z = -0\.5 m",
        ),
        (
            lambda: pp.field(pp.GaussianCharge(1.0, (0, 0, -2), 0.5), [[0, 0, 3]], -1.0),
            r"source 0 \(gaussian\) reaches down to z = -2 m, not above .* at z = -1 m",
        ),
        (
            lambda: pp.field(pp.DensityGrid(np.ones((1, 1, 2)), (0, 0, -1), 1.0), [[0, 0, 3]], 0.0),
            r"source 0 \(grid\) reaches down to z = -1 m",
        ),
        (
            lambda: pp.field(_Q, [[0, 0, 1]], ground_z_m=np.nan),
            r"`ground_z_m` must be a finite number or None; got nan",
        ),
        (
            lambda: pp.field(_Q, [[0, 0, 1]], ground_z_m=np.inf),
            r"`ground_z_m` must be a finite number or None; got inf",
        ),
        (
            lambda: pp.field(_Q, [[0, 0, 1]], ground_z_m="level"),
            r"`ground_z_m` must be a finite number or None; got 'level'",
        ),
        (lambda: pp.field(5, [[0, 0, 1]]), r"`sources` must be a source object .* got int"),
        (
            lambda: pp.field([_Q, "storm"], [[0, 0, 1]]),
            r"`sources\[1\]` must be a PointCharge, LineCharge, .* got str",
        ),
    ],
)
def test_bad_field_input(call, match):
    # Source: the project's contract on bad input (a convention: checks wording, not physics).
    with pytest.raises(ValueError, match=match):
        call()


@pytest.mark.parametrize("ground", [None, 0.0])
def test_evaluate_writes_into_a_reused_output(ground):
    # `out=` is numpy's convention: same numbers as a fresh array, written in place.
    scene = pp.Scene(
        (pp.PointCharge(-3.0, (10.0, -5.0, 400.0)), pp.PointCharge(2.0, (-30.0, 20.0, 650.0))),
        ground,
    )
    theta = np.stack([scene.nominal(), scene.nominal() * 1.01])
    pts = np.array([[0.0, 0.0, 0.0], [100.0, 50.0, 5.0], [-80.0, 10.0, 20.0]])
    e, jac = scene.evaluate(theta, pts)
    buf = np.full_like(jac, np.nan)
    e2, jac2 = scene.evaluate(theta, pts, out=buf)
    assert jac2 is buf
    np.testing.assert_array_equal(jac2, jac)
    np.testing.assert_array_equal(e2, e)
    with pytest.raises(ValueError, match="could not broadcast|must have shape"):
        scene.evaluate(theta, pts, out=np.empty((2, 3, 3, 7)))


@pytest.mark.parametrize(
    "source",
    [
        pp.PointCharge(-3.0, (10.0, -5.0, 400.0)),
        pp.SphereCharge(2.0, (-30.0, 20.0, 650.0), 40.0),
        pp.GaussianCharge(1.5, (5.0, 5.0, 300.0), 25.0),
    ],
)
def test_one_kind_writes_any_output_layout_with_one_compiled_version(source):
    # One kind in free space: the kernel writes straight into `out=`. Outputs that are strided
    # or Fortran-ordered, read-only points, float32 points and a truthy int for `jacobian` give
    # the same numbers as the plain call, and the compiled loop is not compiled again for them
    # (numba compiles once per argument type; see probeplan.sources._radial_kernel).
    from probeplan.sources import _radial_loops

    scene = pp.Scene((source,))
    theta = np.stack([scene.nominal(), scene.nominal() * 1.01])
    pts = np.array([[0.0, 0.0, 0.0], [100.0, 50.0, 5.0], [-30.0, 20.0, 640.0], [5.0, 5.0, 301.0]])
    e, jac = scene.evaluate(theta, pts)
    n_versions = sum(len(f.signatures) for d in _radial_loops.values() for f in d.values())
    wide = np.full(jac.shape[:-1] + (2 * jac.shape[-1],), np.nan)
    fortran = np.asfortranarray(np.full(jac.shape, np.nan))
    frozen = pts.copy()
    frozen.setflags(write=False)
    for out in (wide[..., ::2], fortran):
        e2, jac2 = scene.evaluate(theta, frozen, out=out)
        assert jac2 is out
        np.testing.assert_array_equal(out, jac)
        np.testing.assert_array_equal(e2, e)
    assert np.isnan(wide[..., 1::2]).all()
    e32, jac32 = scene.evaluate(theta, pts.astype(np.float32), jacobian=1)
    np.testing.assert_array_equal(jac32, jac)  # these points are exact in float32
    assert sum(len(f.signatures) for d in _radial_loops.values() for f in d.values()) == n_versions


@pytest.mark.parametrize("ground", [None, 0.0])
def test_evaluate_into_a_strided_output_and_without_jacobian(ground):
    # numpy's `out=` convention again, for an output that is a strided view (the compiled
    # radial loop writes C-ordered arrays only), and for every radial kind; the field computed
    # without a Jacobian is the same field.
    scene = pp.Scene(
        (
            pp.PointCharge(-3.0, (10.0, -5.0, 400.0)),
            pp.SphereCharge(2.0, (-30.0, 20.0, 650.0), 40.0),
            pp.GaussianCharge(1.5, (5.0, 5.0, 300.0), 25.0),
        ),
        ground,
    )
    theta = np.stack([scene.nominal(), scene.nominal() * 1.01])
    pts = np.array([[0.0, 0.0, 0.0], [100.0, 50.0, 5.0], [-30.0, 20.0, 640.0], [5.0, 5.0, 301.0]])
    e, jac = scene.evaluate(theta, pts)
    wide = np.full(jac.shape[:-1] + (2 * jac.shape[-1],), np.nan)
    view = wide[..., ::2]
    e2, jac2 = scene.evaluate(theta, pts, out=view)
    assert np.shares_memory(jac2, wide)
    np.testing.assert_array_equal(view, jac)
    assert np.isnan(wide[..., 1::2]).all()
    np.testing.assert_array_equal(e2, e)
    e3, none = scene.evaluate(theta, pts, jacobian=False)
    assert none is None
    np.testing.assert_array_equal(e3, e)


@pytest.mark.parametrize("ground", [None, -0.4], ids=["free", "ground"])
@pytest.mark.parametrize("kind", ["point", "sphere", "gaussian"])
def test_the_two_radial_loops_agree_to_the_bit(kind, ground):
    # The radial kinds run one of two compiled loops: source by source over blocks of points
    # (few sources) or point by point over every source (many). Both sum each point's sources
    # in the same order with the same arithmetic, so they must agree exactly; the choice is
    # speed only (definition of the split, probeplan.sources.radial.FEW_SOURCES).
    from probeplan.sources import K_COULOMB, radial

    rng = np.random.default_rng(8)
    sources = [_random_source(kind, rng, z_min=0.5) for _ in range(5)]
    scene = pp.Scene(sources, ground_z_m=ground)
    theta = _fd_thetas(scene, rng, n_scenarios=3)
    pts = _points_for(scene, rng, n=150)  # past one block of 64 points
    params = np.ascontiguousarray(theta.reshape(3, 5, -1))
    results = []
    # (the many-source loop also with non-temporal stores, as for outputs past the caches)
    for few, stream in ((True, False), (False, False), (False, True)):
        loops = radial._radial_loops[few, ground is not None, False]
        loop = loops[("point", "sphere", "gaussian").index(kind)]
        e = np.zeros((3, len(pts), 3))
        jac = np.full((3, len(pts), 3, params.shape[1] * params.shape[2]), np.nan)
        g = math.nan if ground is None else ground
        assert loop(K_COULOMB, params, np.ascontiguousarray(pts), g, e, jac, True, stream) == -1
        results.append((e, jac))
    for e, jac in results[1:]:
        np.testing.assert_array_equal(e, results[0][0])
        np.testing.assert_array_equal(jac, results[0][1])
    # and what Scene.evaluate returns is the same numbers
    e, jac = scene.evaluate(theta, pts)
    np.testing.assert_array_equal(e, results[0][0])
    np.testing.assert_array_equal(jac, results[0][1])


@pytest.mark.parametrize("ground", [None, 0.0], ids=["free", "ground"])
@pytest.mark.parametrize("kind", ["point", "gaussian", "line"])
def test_kept_columns_are_the_full_jacobians_columns(kind, ground):
    # `columns=` keeps some Jacobian columns: they must be the full Jacobian's columns exactly
    # (definition of the option), whichever path writes them: the kernel straight into the
    # output (a kind's own columns then background ones) or the general assembly.
    rng = np.random.default_rng(2)
    sources = [_random_source(kind, rng, z_min=0.5) for _ in range(2)]
    scene = pp.Scene(sources, ground_z_m=ground, background=True)
    theta = _fd_thetas(scene, rng, n_scenarios=2)
    pts = _points_for(scene, rng, n=20)
    e, full = scene.evaluate(theta, pts)
    n_own = scene.n_params - 3
    subsets = [
        np.arange(scene.n_params),
        np.r_[np.arange(n_own), n_own + 2],
        np.r_[np.arange(n_own), n_own, n_own + 2],
        np.arange(n_own),
        np.r_[1, 2, n_own + 1],
        np.r_[n_own + 2, np.arange(n_own)],
    ]
    for cols in subsets:
        e2, part = scene.evaluate(theta, pts, columns=cols)
        np.testing.assert_array_equal(e2, e)
        np.testing.assert_array_equal(part, full[..., cols])
        buf = np.full(part.shape, np.nan)
        scene.evaluate(theta, pts, columns=cols, out=buf)
        np.testing.assert_array_equal(buf, part)
