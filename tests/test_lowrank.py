"""The far-field skeleton and the kept responses: the induced field at far points against the
Kelvin image, and against every panel's own integral."""

from __future__ import annotations

import numpy as np

import probeplan as pp
from probeplan import bem
from probeplan.forward import Scene


def _far_points(centre, radius, n, seed, upper=True):
    rng = np.random.default_rng(seed)
    d = rng.normal(size=(n, 3))
    if upper:
        d[:, 2] = np.abs(d[:, 2])
    d /= np.linalg.norm(d, axis=1)[:, None]
    return np.asarray(centre) + radius * rng.uniform(1.0, 4.0, (n, 1)) * d


def test_far_points_read_the_kelvin_image_through_the_skeleton():
    # Kelvin image (Jackson, Classical Electrodynamics, §2.2): a grounded sphere of radius R and
    # a charge q at distance d: the field outside is q's and q' = −qR/d at R²/d. Points beyond
    # the far radius go through the skeleton panels only.
    r, d, q = 1.0, 2.5, 1e-9
    structures = bem.Structures.build([pp.Conductor.sphere((0, 0, 0), r, mesh_size_m=0.2)])
    skel = structures.skeleton
    assert np.isfinite(skel.far_m[0]) and skel.panels.size < structures.factor.panels.n_panels
    pts = _far_points((0, 0, 0), skel.far_m[0], 60, 1, upper=False)
    assert skel.far(pts).all()
    src = pp.PointCharge(q, (0, 0, d))
    scene = Scene((src,), None, structures=structures)
    e, _ = scene.evaluate(scene.nominal()[None], pts, jacobian=False)
    want = pp.field([src, pp.PointCharge(-q * r / d, (0, 0, r * r / d))], pts)
    err = np.linalg.norm(e[0] - want, axis=1) / np.linalg.norm(want, axis=1)
    assert err.max() < 3e-3  # the panels' own accuracy (test_bem's Kelvin test)


def test_skeleton_field_matches_every_panel_at_far_points():
    # The skeleton stands for all panels of a tank on the plane: random panel charges give the
    # same field at fresh far points as the full operator, to its 1e-10 check.
    tank = pp.Conductor.cylinder((3.0, -2.0, 0.0), 4.0, 5.0)
    structures = bem.Structures.build([tank], 0.0)
    skel = structures.skeleton
    pts = _far_points(skel.centres_m[0], skel.far_m[0] * 1.001, 80, 2)
    full = structures.factor.field_operator(pts).reshape(-1, structures.factor.panels.n_panels)
    charges = np.random.default_rng(4).normal(size=(full.shape[1], 3)) + 0.5
    want = full @ charges
    got = full[:, skel.panels] @ (skel.interpolation @ charges)
    assert np.abs(got - want).max() <= 1e-10 * np.abs(want).max()


def test_kept_responses_give_the_same_field_on_every_call():
    # A plan maps one block of scenarios at many point sets: the kept block and the rows solved
    # afresh in a new scene agree (superposition: each scenario's field is its own).
    sphere = pp.Conductor.sphere((0, 0, 2.0), 0.5, mesh_size_m=0.25)
    structures = bem.Structures.build([sphere], 0.0)
    src = pp.PointCharge(1e-9, (1.5, 0.5, 3.0))
    scene = Scene((src,), 0.0, background=True, structures=structures)
    theta = np.tile(scene.nominal((0, 0, -100.0)), (5, 1))
    theta[:, 0] *= np.linspace(0.5, 2.0, 5)
    near = np.array([[0.0, 0.0, 2.7], [0.6, 0.0, 2.0]])
    far = _far_points((0, 0, 0), 30.0, 4, 3)
    pts = np.concatenate([near, far])
    cols = np.array([0, 1, 3, 5])
    e1, j1 = scene.evaluate(theta, pts, columns=cols)
    e2, j2 = scene.evaluate(theta, pts, columns=cols)
    fresh = Scene((src,), 0.0, background=True, structures=structures)
    e3, j3 = fresh.evaluate(theta[2:3], pts, columns=cols)
    np.testing.assert_array_equal(e1, e2)
    np.testing.assert_array_equal(j1, j2)
    np.testing.assert_allclose(e3[0], e1[2], rtol=1e-12, atol=1e-12 * np.abs(e1).max())
    np.testing.assert_allclose(j3[0], j1[2], rtol=1e-12, atol=1e-12 * np.abs(j1).max())
