"""Conducting structures by boundary elements, checked against outside references: exact
images, textbook fields, published capacitances, scipy quadrature and finite differences."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import constants, integrate

import probeplan as pp
from probeplan import bem, conductors
from probeplan.errors import InputError
from probeplan.forward import Scene, _field_jacobian

K = pp.K_COULOMB
EPS0 = constants.epsilon_0


# -- exact panel integrals ---------------------------------------------------------------------

_TRI = np.array([[0.1, 0.2, 0.3], [1.2, 0.1, 0.5], [0.4, 0.9, 0.2]])


def _quad_triangle(p, k):
    """scipy dblquad of 1/R (k = 0) or of ∂(1/R)/∂p_k over _TRI, in its barycentric map."""
    a, e1, e2 = _TRI[0], _TRI[1] - _TRI[0], _TRI[2] - _TRI[0]
    jac = np.linalg.norm(np.cross(e1, e2))

    def f(v, u):
        d = p - (a + u * e1 + v * e2)
        r = np.linalg.norm(d)
        return jac * (1 / r if k == 0 else -d[k - 1] / r**3)

    return integrate.dblquad(f, 0, 1, 0, lambda u: 1 - u, epsabs=1e-12, epsrel=1e-9)[0]


def _normal():
    n = np.cross(_TRI[1] - _TRI[0], _TRI[2] - _TRI[0])
    return n / np.linalg.norm(n)


@pytest.mark.parametrize(
    "where",
    [
        _TRI.mean(0) + 0.3 * _normal(),
        _TRI.mean(0) - 1e-2 * _normal(),  # a meter at a small standoff
        0.5 * (_TRI[0] + _TRI[1]) + 0.01 * _normal(),  # over an edge
        2 * _TRI[1] - _TRI[0],  # in the panel's plane, on an edge's extension
        _TRI.mean(0) + np.array([3.0, 4.0, 2.0]),  # the 3-point rule's range
        _TRI.mean(0) + np.array([30.0, 20.0, 10.0]),  # the centroid rule's range
    ],
)
def test_triangle_potential_and_field_match_quadrature(where):
    got = bem.triangle_integrals(where[None], _TRI[None])[0, 0]
    want = np.array([_quad_triangle(where, k) for k in range(4)])
    # exact formulas within rounding; the far rules within their measured error (bem.py)
    far = np.linalg.norm(where - _TRI.mean(0)) > 6 * 1.2
    np.testing.assert_allclose(got, want, rtol=2e-4 if far else 1e-8, atol=1e-11)


def test_self_potential_at_the_centroid_matches_polar_quadrature():
    # In polar coordinates about the centroid c, ∫ 1/R dA = Σ_edges ∫ ρ_edge(θ) dθ with
    # ρ = h / cos(θ − θ_foot): a smooth 1-D integral (scipy quad), no singularity left.
    c = _TRI.mean(0)
    total = 0.0
    for i in range(3):
        a, b = _TRI[i] - c, _TRI[(i + 1) % 3] - c
        edge = (b - a) / np.linalg.norm(b - a)
        foot = a - (a @ edge) * edge
        h = np.linalg.norm(foot)
        ang = lambda v, foot=foot, h=h: math.atan2(np.linalg.norm(np.cross(foot, v)), foot @ v)  # noqa: E731
        sa = np.sign(np.cross(foot, a) @ _normal())
        sb = np.sign(np.cross(foot, b) @ _normal())
        lo, hi = sa * ang(a), sb * ang(b)
        total += integrate.quad(lambda t, h=h: h / math.cos(t), min(lo, hi), max(lo, hi))[0]
    got = bem.triangle_integrals(c[None], _TRI[None])[0, 0, 0]
    np.testing.assert_allclose(got, total, rtol=1e-12)


# -- conductors against closed forms -----------------------------------------------------------


def test_grounded_sphere_and_point_charge_is_the_kelvin_image():
    # Kelvin image (Jackson, Classical Electrodynamics, §2.2; Griffiths, Introduction to
    # Electrodynamics, Ex. 3.2): q' = −qR/d at R²/d reproduces the field outside.
    r, d, q = 1.0, 2.5, 1e-9
    sphere = pp.Conductor.sphere((0.0, 0.0, 0.0), r, mesh_size_m=0.2)
    pts = np.array([[0, 0, 1.6], [0.5, 0.3, -1.8], [3, 1, 1], [0, 0, -2.0], [1.5, 0, 0]])
    got = pp.field(pp.PointCharge(q, (0, 0, d)), pts, conductors=[sphere])
    want = pp.field(
        [pp.PointCharge(q, (0, 0, d)), pp.PointCharge(-q * r / d, (0, 0, r * r / d))], pts
    )
    err = np.linalg.norm(got - want, axis=1) / np.linalg.norm(want, axis=1)
    assert err.max() < 3e-3


def test_kelvin_image_error_falls_under_refinement():
    # Collocation with flat panels: the field error off the surface falls about as h².
    r, d, q = 1.0, 2.0, 1e-9
    pts = np.array([[0.0, 0.0, 1.7], [1.6, 0.0, 0.4], [0.0, 0.0, -1.8]])
    want = pp.field(
        [pp.PointCharge(q, (0, 0, d)), pp.PointCharge(-q * r / d, (0, 0, r * r / d))], pts
    )
    errs = []
    for h in (0.5, 0.25):
        s = pp.Conductor.sphere((0.0, 0.0, 0.0), r, mesh_size_m=h)
        got = pp.field(pp.PointCharge(q, (0, 0, d)), pts, conductors=[s])
        errs.append(np.max(np.linalg.norm(got - want, axis=1) / np.linalg.norm(want, axis=1)))
    assert errs[1] < 0.5 * errs[0]


def test_grounded_sphere_in_a_uniform_field():
    # Jackson §2.5: on the axis E = E0 (1 + 2R³/z³), 3 E0 at the pole; near the pole read by
    # a meter mounted a quarter of a panel (5 % of R) off it, beyond the flat panels' sag.
    r, e0 = 1.0, 100.0
    sphere = pp.Conductor.sphere((0.0, 0.0, 0.0), r, mesh_size_m=0.2)
    z = np.array([1.05, 1.5, 2.0, 4.0])
    pts = np.c_[0 * z, 0 * z, z]
    mounted = np.array([True, False, False, False])
    e, _ = _field_jacobian([], pts, None, (sphere,), (0.0, 0.0, e0), False, mounted)
    want = e0 * (1 + 2 * r**3 / z**3)
    np.testing.assert_allclose(e[0, 2], want[0], rtol=1e-2)  # a mounted meter
    np.testing.assert_allclose(e[1:, 2], want[1:], rtol=3e-3)
    np.testing.assert_allclose(e[:, :2], 0.0, atol=1e-3 * e0)


def test_hemispherical_boss_on_the_ground_plane():
    # The sphere of Jackson §2.5 centred on the grounded plane: its upper half is a boss, and
    # by symmetry the field above it is the sphere's, E_z = −E0 (1 + 2R³/z³) for E = −E0 ẑ.
    r, e0 = 2.0, 120.0
    boss = pp.Conductor.sphere((1.0, -1.0, 0.0), r, mesh_size_m=0.35)
    z = np.array([3.0, 4.0, 6.0])
    e = pp.field([], np.c_[1 + 0 * z, -1 + 0 * z, z], 0.0, conductors=[boss],
                 background_v_per_m=(0.0, 0.0, -e0))  # fmt: skip
    np.testing.assert_allclose(e[:, 2], -e0 * (1 + 2 * r**3 / z**3), rtol=3e-3)


def _q1(x):
    return 0.5 * x * np.log((x + 1) / (x - 1)) - 1.0


def _q1_prime(x):
    return 0.5 * np.log((x + 1) / (x - 1)) - x / (x * x - 1)


def test_prolate_spheroid_mast_in_a_uniform_field():
    # Grounded prolate spheroid in a uniform axial field (Landau & Lifshitz, Electrodynamics of
    # Continuous Media, §4; Smythe, Static and Dynamic Electricity — from memory): on the axis
    # φ = −E0 (z − c Q1(z/f)/Q1(c/f)), f² = c² − a², so E_z = E0 (1 − (c/f) Q1'(z/f)/Q1(c/f)).
    # Centred on the grounded plane, its upper half is a mast with a rounded tip.
    a, c, e0 = 0.15, 2.0, 100.0
    f = math.sqrt(c * c - a * a)
    mast = pp.Conductor.spheroid((0.0, 0.0, 0.0), (a, a, c), mesh_size_m=0.12)
    z = np.array([2.3, 2.6, 3.0, 4.0])
    e = pp.field([], np.c_[0 * z, 0 * z, z], 0.0, conductors=[mast], background_v_per_m=(0, 0, e0))
    want = e0 * (1 - (c / f) * _q1_prime(z / f) / _q1(c / f))
    np.testing.assert_allclose(e[:, 2], want, rtol=2e-2)


def _floating_potential(conductor_list, charges=None, ground=None):
    structures = bem.Structures.build(conductor_list, ground)
    f = structures.factor
    n = f.panels.n_panels
    q = structures.charges_c[:, None] if charges is None else charges
    sigma = f.solve(np.zeros((n, 1)), q)
    return f.potentials_v(np.zeros((n, 1)), q)[:, 0], sigma[:, 0], f


def test_capacitance_of_an_isolated_sphere():
    # C = 4π ε0 R (any electrostatics text; scipy.constants for ε0).
    v, _, _ = _floating_potential(
        [pp.Conductor.sphere((0, 0, 0), 0.5, floating=True, charge_c=1e-9)]
    )
    np.testing.assert_allclose(1e-9 / v[0], 4 * np.pi * EPS0 * 0.5, rtol=3e-3)


def test_capacitance_of_a_thin_disc():
    # C = 8 ε0 R for a thin circular disc (Jackson §3.12 / Smythe — a classical result).
    r = 1.0
    rho = np.linspace(0, r, 2001)
    h = np.minimum(0.15, 0.03 + 0.35 * (r - rho))  # finer at the rim, where σ diverges
    rn, zn, hn = conductors._profile_nodes(rho, 0 * rho, h)
    verts, faces = conductors._revolve(rn, zn, hn, (0.0, 0.0), widen=False)
    panels = bem.Panels(np.ascontiguousarray(verts[faces]), np.zeros(len(faces), int))
    f = bem.factorize(panels, None, (True,), use_cache=False)
    n = panels.n_panels
    v = f.potentials_v(np.zeros((n, 1)), np.array([[1e-9]]))[0, 0]
    np.testing.assert_allclose(1e-9 / v, 8 * EPS0 * r, rtol=1.5e-2)


def test_capacitance_of_the_unit_cube():
    # C = 0.6606785 · 4π ε0 L (Hwang & Mascagni 2004, random-walk value — from memory).
    cube = pp.Conductor.box((0, 0, 0), (1, 1, 1), floating=True, charge_c=1e-9, mesh_size_m=0.2)
    v, _, _ = _floating_potential([cube])
    np.testing.assert_allclose(1e-9 / v[0], 0.6606785 * 4 * np.pi * EPS0, rtol=1e-2)


def test_floating_conductor_carries_its_net_charge():
    # Charge conservation on an isolated conductor: Σ σ_j A_j = Q, with a charge nearby.
    box = pp.Conductor.box((-1, -1, 1), (1, 1, 2), floating=True, charge_c=2e-9, mesh_size_m=0.5)
    scene = Scene((pp.PointCharge(-5e-9, (0.0, 0.0, 4.0)),), 0.0)
    s = bem.Structures.build([box], 0.0)
    sigma = s.charge_density(scene, scene.nominal()[None])
    np.testing.assert_allclose(sigma @ s.factor.panels.areas_m2, [2e-9], rtol=1e-10)
    # A grounded closed room around a charge takes exactly −q (Gauss's law over a surface
    # just outside its walls, where the field is zero).
    room = pp.Conductor.enclosure((-3, -3, -3), (3, 3, 3), mesh_size_m=1.0)
    inside = Scene((pp.PointCharge(-5e-9, (0.5, -0.4, 1.0)),))
    s = bem.Structures.build([room], None)
    sigma = s.charge_density(inside, inside.nominal()[None])
    np.testing.assert_allclose(sigma @ s.factor.panels.areas_m2, [5e-9], rtol=1e-2)


def test_enclosure_screens_the_outside():
    # A closed grounded room: the field outside does not see the charge inside (Faraday cage;
    # the single layer with the plane as floor closes it).
    room = pp.Conductor.enclosure((-2, -2, 0), (2, 2, 3), mesh_size_m=0.6)
    q = pp.PointCharge(1e-9, (0.3, -0.2, 1.5))
    outside = np.array([[4.0, 0.0, 1.0], [0.0, 5.0, 4.0]])
    inside = np.array([[0.5, 0.5, 1.0]])
    e_out = pp.field(q, outside, 0.0, conductors=[room])
    e_free = pp.field(q, outside, 0.0)
    assert np.abs(e_out).max() < 1e-2 * np.abs(e_free).max()
    e_in = pp.field(q, inside, 0.0, conductors=[room])
    assert np.linalg.norm(e_in) > 0.5 * np.linalg.norm(pp.field(q, inside, 0.0))


# -- laws and derivatives ----------------------------------------------------------------------

_BOX = pp.Conductor.box((-0.5, -0.5, 0.0), (0.5, 0.5, 1.0), mesh_size_m=0.3)


@settings(max_examples=6, deadline=None)
@given(
    q1=st.floats(-5e-9, 5e-9),
    q2=st.floats(-5e-9, 5e-9),
)
def test_superposition_holds_with_structures(q1, q2):
    pts = np.array([[1.5, 0.0, 0.5], [0.0, 2.0, 1.5]])
    a = pp.PointCharge(q1, (2.0, 1.0, 1.0))
    b = pp.GaussianCharge(q2, (-1.5, 0.5, 2.0), 0.3)
    both = pp.field([a, b], pts, 0.0, conductors=[_BOX], background_v_per_m=(0, 0, -100.0))
    parts = (
        pp.field(a, pts, 0.0, conductors=[_BOX])
        + pp.field(b, pts, 0.0, conductors=[_BOX])
        + pp.field([], pts, 0.0, conductors=[_BOX], background_v_per_m=(0, 0, -100.0))
    )
    np.testing.assert_allclose(both, parts, atol=1e-9 * (np.abs(both).max() + 1.0))


@settings(max_examples=5, deadline=None)
@given(
    x1=st.tuples(st.floats(1.2, 3.0), st.floats(-2, 2), st.floats(0.3, 2.5)),
    x2=st.tuples(st.floats(-3.0, -1.2), st.floats(-2, 2), st.floats(0.3, 2.5)),
)
def test_green_reciprocity_with_a_grounded_box(x1, x2):
    # Green's reciprocity (Jackson §1.10): the potential at x2 of a unit charge at x1 near
    # grounded conductors equals that at x1 of a unit charge at x2 (to the collocation error).
    s = bem.Structures.build([_BOX], 0.0)
    f = s.factor

    def green(src, obs):
        scene = Scene((pp.PointCharge(1.0, src),), 0.0)
        theta = scene.nominal()[None]
        sigma = s.charge_density(scene, theta)[0]
        direct, _ = scene.potential(theta, np.array([obs]), jacobian=False)
        return direct[0, 0] + f.potential_operator(np.array([obs]))[0] @ sigma

    g12, g21 = green(x1, x2), green(x2, x1)
    np.testing.assert_allclose(g12, g21, rtol=3e-3)


def test_jacobian_with_structures_matches_finite_differences():
    sources = [
        pp.PointCharge(2e-9, (1.5, 0.5, 1.2)),
        pp.GaussianCharge(-1e-9, (-1.4, 0.2, 1.8), 0.3),
        pp.LineCharge(1e-9, (0.2, 1.5, 1.5), (0.4, 1.8, 2.5)),
    ]
    pts = np.array([[1.0, -1.0, 0.5], [0.0, 0.0, 1.4], [-1.2, 1.0, 0.2]])
    bg = np.array([3.0, -2.0, -100.0])
    _, jac = pp.field_jacobian(sources, pts, 0.0, conductors=[_BOX], background_v_per_m=bg)
    scene = Scene(tuple(sources), 0.0, background=True)
    theta = scene.nominal(bg)
    for j, name in enumerate(scene.param_names):
        step = (1e-9 if name.endswith("charge_c") else 1.0) * 1e-5
        fields = []
        for sign in (1, -1):
            th = theta.copy()
            th[j] += sign * step
            moved = [s.with_params(th[o : o + len(s.param_names)]) for s, o in _offsets(scene)]
            fields.append(pp.field(moved, pts, 0.0, conductors=[_BOX], background_v_per_m=th[-3:]))
        fd = (fields[0] - fields[1]) / (2 * step)
        np.testing.assert_allclose(jac[..., j], fd, atol=1e-6 * np.abs(jac[..., j]).max() + 1e-9,
                                   err_msg=name)  # fmt: skip


def _offsets(scene):
    o = 0
    for s in scene.sources:
        yield s, o
        o += len(s.param_names)


def test_no_conductors_keeps_the_old_field():
    src = [pp.PointCharge(1e-9, (0, 0, 2.0))]
    pts = np.array([[1.0, 0.0, 0.5]])
    np.testing.assert_array_equal(pp.field(src, pts, 0.0), pp.field(src, pts, 0.0, conductors=()))


# -- refusals ----------------------------------------------------------------------------------


def test_point_inside_a_structure_is_refused():
    with pytest.raises(InputError, match=r"row 1 .* inside conductor 0 \(box 'hall'\)"):
        pp.field(
            pp.PointCharge(1e-9, (3, 0, 1)),
            [[2.0, 0, 0.5], [0.1, 0.1, 0.5]],
            0.0,
            conductors=[pp.Conductor.box((-1, -1, 0), (1, 1, 1), name="hall")],
        )


def test_point_too_near_a_surface_is_refused_unless_mounted():
    sphere = pp.Conductor.sphere((0, 0, 0), 1.0, mesh_size_m=0.4)
    pts = np.array([[0.0, 0.0, 1.05]])
    with pytest.raises(InputError, match="row 0 .* closer than its panel size"):
        pp.field([], pts, conductors=[sphere], background_v_per_m=(0, 0, 1.0))
    e, _ = _field_jacobian([], pts, None, (sphere,), (0, 0, 1.0), False, np.array([True]))
    assert np.isfinite(e).all()


def test_source_inside_a_structure_is_refused():
    with pytest.raises(InputError, match="source centres` row 0 .* inside conductor 0"):
        pp.field(
            pp.PointCharge(1e-9, (0, 0, 0.5)),
            [[3.0, 0, 1]],
            0.0,
            conductors=[pp.Conductor.cylinder((0, 0, 0), 1.0, 2.0)],
        )


def test_open_mesh_is_refused_and_a_closed_file_is_read(tmp_path):
    import trimesh

    box = trimesh.creation.box(extents=(1.0, 1.0, 1.0))
    box.apply_translation((0, 0, 1.5))
    open_faces = box.faces[:-1]
    with pytest.raises(InputError, match="not closed"):
        pp.Conductor.mesh((box.vertices, open_faces)).triangles(0.0)
    path = tmp_path / "cabinet.stl"
    box.export(path)
    from_file = pp.Conductor.mesh(path, mesh_size_m=0.25)
    same = pp.Conductor.box((-0.5, -0.5, 1.0), (0.5, 0.5, 2.0), mesh_size_m=0.25)
    src, pts = pp.PointCharge(1e-9, (2.0, 0.0, 1.5)), np.array([[-1.5, 0.3, 1.2]])
    a = pp.field(src, pts, 0.0, conductors=[from_file])
    b = pp.field(src, pts, 0.0, conductors=[same])
    np.testing.assert_allclose(a, b, atol=3e-3 * np.abs(b).max())
    bad = tmp_path / "broken.stl"
    bad.write_bytes(b"not a mesh at all")
    with pytest.raises(InputError, match="broken.stl"):
        pp.Conductor.mesh(bad)


def test_factorisation_is_cached_and_a_corrupt_file_is_rebuilt():
    sphere = pp.Conductor.sphere((0, 0, 5.0), 0.7, mesh_size_m=0.5)
    first = bem.Structures.build([sphere], 0.0)
    files = list(bem.cache_dir().glob("*.npz"))
    assert files
    bem._RECENT.clear()  # from the file, not this process's memory
    again = bem.Structures.build([sphere], 0.0)
    np.testing.assert_array_equal(first.factor.lu, again.factor.lu)
    key = bem._key(first.factor.panels, 0.0, (False,))
    (bem.cache_dir() / f"{key}.npz").write_bytes(b"garbage")
    bem._RECENT.clear()
    rebuilt = bem.Structures.build([sphere], 0.0)
    np.testing.assert_array_equal(first.factor.lu, rebuilt.factor.lu)


def test_scene_with_structures_batches_scenarios_and_columns():
    # The batched path (Scene.evaluate, as the planner calls it) against one pp.field call per
    # scenario, and a column subset against the full Jacobian.
    src = (pp.PointCharge(1e-9, (1.5, 0.0, 1.0)), pp.SphereCharge(-2e-9, (-1.5, 0.5, 2.0), 0.2))
    structures = bem.Structures.build([_BOX], 0.0)
    scene = Scene(src, 0.0, background=True, structures=structures)
    rng = np.random.default_rng(3)
    theta = scene.nominal((0.0, 0.0, -100.0))[None].repeat(3, axis=0)
    theta[:, [0, 4]] *= rng.uniform(0.5, 2.0, size=(3, 2))
    pts = np.array([[0.0, 1.2, 0.5], [1.0, -1.0, 1.5]])
    e, jac = scene.evaluate(theta, pts)
    for k in range(3):
        moved = [src[0].with_params(theta[k, :4]), src[1].with_params(theta[k, 4:9])]
        one = pp.field(moved, pts, 0.0, conductors=[_BOX], background_v_per_m=theta[k, -3:])
        np.testing.assert_allclose(e[k], one, rtol=1e-10, atol=1e-12)
    cols = np.array([1, 5, 9, 11])
    _, sub = scene.evaluate(theta, pts, columns=cols)
    np.testing.assert_allclose(sub, jac[..., cols], rtol=1e-10, atol=1e-12)
    e_only, none = scene.evaluate(theta, pts, jacobian=False)
    assert none is None
    np.testing.assert_allclose(e_only, e, rtol=1e-12)


def test_scene_refuses_a_source_inside_its_structures():
    structures = bem.Structures.build([_BOX], 0.0)
    with pytest.raises(InputError, match="source centres` row 1 .* inside conductor 0"):
        Scene(
            (pp.PointCharge(1e-9, (3, 0, 1)), pp.PointCharge(1e-9, (0, 0, 0.5))),
            0.0,
            structures=structures,
        )


def test_progress_follows_the_assembly_and_the_lu():
    calls = []
    sphere = pp.Conductor.sphere((0, 0, 3.0), 1.0, mesh_size_m=0.25)
    bem.Structures.build([sphere], 0.0, use_cache=False, progress=lambda d, t: calls.append((d, t)))
    done = [d for d, _ in calls]
    assert done == sorted(done) and calls[-1][0] == calls[-1][1] and len(calls) >= 2


def test_overlapping_structures_are_refused_and_touching_ones_allowed():
    hall = pp.Conductor.box((0, 0, 0), (4, 4, 3), name="hall", mesh_size_m=1.0)
    tank = pp.Conductor.cylinder((4.0, 2.0, 0), 1.0, 2.0, name="tank", mesh_size_m=0.6)
    with pytest.raises(InputError, match=r"conductor 0 \(box 'hall'\) and conductor 1 .* overlap"):
        bem.Structures.build([hall, tank], 0.0)
    mast = pp.Conductor.cylinder((2.0, 2.0, 3.0), 0.1, 2.0, mesh_size_m=0.1)  # on the roof
    bem.Structures.build([hall, mast], 0.0, use_cache=False)
    room = pp.Conductor.enclosure((-1, -1, 0), (6, 6, 5), mesh_size_m=1.5)
    bem.Structures.build([room, hall], 0.0, use_cache=False)  # a building inside a hall
    with pytest.raises(InputError, match="overlap"):
        bem.Structures.build([pp.Conductor.enclosure((1, 1, 0), (6, 6, 5)), hall], 0.0)


def test_a_grounded_structure_takes_no_charge_argument():
    with pytest.raises(InputError, match="`charge_c` = 1e-09 C needs `floating = true`"):
        pp.Conductor.sphere((0, 0, 1), 0.5, charge_c=1e-9)


def test_mounting_points_sit_off_the_chosen_faces():
    tank = pp.Conductor.cylinder((1.0, 2.0, 0.0), 2.0, 3.0, mesh_size_m=0.5)
    top = tank.surface_points(0.0, "top", 0.1, 0.5)
    np.testing.assert_allclose(top[:, 2], 3.1, atol=1e-9)
    assert np.all(np.hypot(top[:, 0] - 1.0, top[:, 1] - 2.0) < 2.0)
    walls = tank.surface_points(0.0, "walls", 0.2, 0.5)
    r = np.hypot(walls[:, 0] - 1.0, walls[:, 1] - 2.0)
    assert np.all((r > 2.1) & (r < 2.25)) and np.all((walls[:, 2] > 0) & (walls[:, 2] < 3))
    room = pp.Conductor.enclosure((0, 0, 0), (4, 4, 3), mesh_size_m=0.8)
    ceiling = room.surface_points(0.0, "top", 0.1, 1.0)
    np.testing.assert_allclose(ceiling[:, 2], 2.9, atol=1e-9)  # inside the room
    structures = bem.Structures.build([tank], 0.0)
    structures.check_points(top, mounted=np.ones(len(top), bool))  # mounted: accepted
    with pytest.raises(InputError, match="closer than its panel size"):
        structures.check_points(top)
