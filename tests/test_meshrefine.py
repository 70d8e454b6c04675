"""The automatic structure mesh made finer near meters: checked against Jackson's closed form
for a grounded sphere in a uniform field, and for the bounds that keep the solve affordable."""

from __future__ import annotations

import numpy as np

import probeplan as pp
from probeplan import bem, meshrefine
from probeplan.forward import Scene


def _pole_reading(sphere, meter, *, meters_m):
    """E_z at ``meter`` over a grounded sphere in a uniform field E = −E0 ẑ (free space), and
    the panel count."""
    structures = bem.Structures.build([sphere], None, meters_m=meters_m)
    scene = Scene((), None, background=True)
    theta = np.array([[0.0, 0.0, -100.0]])
    e, _ = scene.evaluate(theta, meter, jacobian=False)
    e_ind, _ = structures.induced(scene, theta, meter, jacobian=False)
    return (e + e_ind)[0, 0, 2], structures.factor.panels.n_panels


def test_a_meter_off_the_pole_reads_jacksons_field_with_the_refined_mesh():
    # Jackson, Classical Electrodynamics, §2.5: a grounded sphere in a uniform field E0 has,
    # on its axis, E = E0 (1 + 2R³/r³) (3 E0 at the pole). A meter 0.1 m off the pole of a
    # 1 m sphere, automatic mesh: the accuracy is 1e-3.
    r, e0, standoff = 1.0, 100.0, 0.1
    sphere = pp.Conductor.sphere((0.0, 0.0, 0.0), r)
    meter = np.array([[0.0, 0.0, r + standoff]])
    want = -e0 * (1 + 2 * r**3 / (r + standoff) ** 3)
    coarse, n_coarse = _pole_reading(sphere, meter, meters_m=None)
    fine, n_fine = _pole_reading(sphere, meter, meters_m=meter)
    err_coarse, err_fine = abs(coarse / want - 1), abs(fine / want - 1)
    assert err_coarse > 1e-3  # the plain automatic mesh misses the target here
    assert err_fine < 1e-3
    assert err_fine < 0.2 * err_coarse
    assert n_coarse < n_fine <= meshrefine.MAX_PANELS


def test_refined_panels_stay_on_the_sphere_and_cover_it():
    # The new vertices go back onto the sphere, so the panels' area stays the sphere's 4πR²
    # (Archimedes) to the flat panels' usual deficit, and no vertex leaves the surface.
    r = 1.0
    sphere = pp.Conductor.sphere((0.0, 0.0, 0.0), r)
    meter = np.array([[0.3, 0.2, 1.1]])
    tris = sphere.triangles(None, meter)
    area = 0.5 * np.linalg.norm(np.cross(tris[:, 1] - tris[:, 0], tris[:, 2] - tris[:, 0]), axis=1)
    assert abs(area.sum() / (4 * np.pi * r * r) - 1) < 0.01
    radii = np.linalg.norm(tris.reshape(-1, 3), axis=1)
    assert np.all(np.abs(radii - r) < 0.02 * r)
    # Near the meter the panels are at most the fraction of their distance to it.
    sizes = np.linalg.norm(np.roll(tris, -1, axis=1) - tris, axis=2).max(axis=1)
    dist = np.linalg.norm(tris.mean(axis=1) - meter, axis=1)
    assert np.all(sizes <= meshrefine.FRACTION * dist + 1e-12)


def test_refinement_is_bounded_and_changes_the_cache_key():
    sphere = pp.Conductor.sphere((0.0, 0.0, 0.0), 1.0)
    rng = np.random.default_rng(3)
    d = rng.normal(size=(200, 3))
    many = 1.02 * d / np.linalg.norm(d, axis=1)[:, None]  # 200 meters 2 cm off the surface
    tris = sphere.triangles(None, many)
    assert len(tris) <= meshrefine.MAX_PANELS
    plain = sphere.triangles(None)
    owner = np.zeros(len(plain), int)
    key_plain = bem._key(bem.Panels(plain, owner), None, (False,))
    key_fine = bem._key(bem.Panels(tris, np.zeros(len(tris), int)), None, (False,))
    assert key_plain != key_fine
    # A given mesh size is the user's: no refinement.
    sized = pp.Conductor.sphere((0.0, 0.0, 0.0), 1.0, mesh_size_m=0.3)
    assert len(sized.triangles(None, many)) == len(sized.triangles(None))


def test_a_cylinder_wall_stays_round_and_the_cut_stays_on_the_plane():
    # Refinement near a meter beside a tank's wall and near a boss's foot: wall vertices keep
    # the ring's radius, and vertices on the ground cut stay on the plane.
    tank = pp.Conductor.cylinder((0.0, 0.0, 0.0), 5.0, 6.0)
    plain = tank.triangles(0.0)
    meter = np.array([[5.3, 0.0, 3.0]])
    tris = tank.triangles(0.0, meter)
    assert len(tris) > len(plain)
    v = tris.reshape(-1, 3)
    wall = (v[:, 2] > 1e-9) & (v[:, 2] < 6.0 - 1e-9)
    rho = np.hypot(v[wall, 0], v[wall, 1])
    pv = plain.reshape(-1, 3)
    rings = np.hypot(pv[:, 0], pv[:, 1])[(pv[:, 2] > 1e-9) & (pv[:, 2] < 6.0 - 1e-9)]
    assert np.all((rho >= rings.min() - 1e-9) & (rho <= rings.max() + 1e-9))
    boss = pp.Conductor.sphere((0.0, 0.0, 0.0), 1.0)
    tris = boss.triangles(0.0, np.array([[1.05, 0.0, 0.05]]))
    assert tris[..., 2].min() >= -1e-12
