"""The enhancement map: reading with the structures over the undisturbed reading, nominal
scenario, over the mounting regions (``probeplan plot`` draws it for results with structures)."""

from __future__ import annotations

import numpy as np
from sites import make_config

from probeplan.enhancement_map import add_enhancement_map, enhancement_at, enhancement_points
from probeplan.plots import PlotFiles
from probeplan.problem import build_problem
from probeplan.result import make_result

# The base test site (tests/sites.py): a charge 3 km straight above the origin, flush meters.
TANK = {"kind": "cylinder", "base_m": [0.0, 0.0, 0.0], "radius_m": 200.0, "height_m": 400.0}
LAYOUT = np.array([[300.0, 0.0, 0.0], [1800.0, 0.0, 0.0], [-1000.0, 500.0, 0.0]])
Z_AXIS = np.array([[0.0, 0.0, 1.0]])


def test_map_values_at_the_meters_are_the_stored_enhancement_and_tend_to_one():
    cfg = make_config("<t>", structure=[{**TANK, "name": "tank"}])
    problem = build_problem(cfg)
    score = problem.score(LAYOUT)
    # The map and the summary compute the same quantity: equal at the meters.
    np.testing.assert_allclose(
        enhancement_at(problem, score.positions_m, score.axes[-1]), score.enhancement, rtol=1e-12
    )
    # Far from the tank the induced charge's field decays (Jackson §2.5, §2.2: the induced
    # charge's field falls off as its multipoles do): the enhancement tends to 1.
    r = np.array([300.0, 600.0, 1200.0, 1900.0])
    e = enhancement_at(problem, np.c_[0 * r, r, 0 * r], Z_AXIS)
    assert np.all(np.diff(np.abs(e - 1.0)) < 0) and abs(e[-1] - 1.0) < 0.02


def test_hemispherical_boss_matches_the_sphere_in_a_uniform_field():
    # A grounded sphere centred on the ground plane is a hemispherical boss; with the charge
    # 3 km up the field near it is nearly uniform, and on the axis E = E0 (1 + 2R³/z³)
    # (Jackson, Classical Electrodynamics, §2.5). Points beyond two panel sizes of the surface.
    radius = 50.0
    cfg = make_config(
        "<t>", structure=[{"kind": "sphere", "center_m": [0, 0, 0], "radius_m": 50.0}]
    )
    z = np.array([80.0, 100.0, 150.0])
    e = enhancement_at(build_problem(cfg), np.c_[0 * z, 0 * z, z], Z_AXIS)
    np.testing.assert_allclose(e, 1.0 + 2.0 * radius**3 / z**3, rtol=1e-2)


def test_plot_writes_the_map_only_with_structures(tmp_path):
    cfg = make_config("<t>", structure=[{**TANK, "name": "tank"}])
    problem = build_problem(cfg)
    assert enhancement_points(cfg).shape[1] == 3
    result = make_result("score", cfg, problem.score(LAYOUT))
    paths = add_enhancement_map(PlotFiles(), result, problem, tmp_path, "svg")
    assert [p.name for p in paths] == ["enhancement_map.svg"]
    svg = paths[0].read_text()
    assert "tank" in svg and "enhancement" in svg
    bare = make_config("<t>")
    bare_problem = build_problem(bare)
    result = make_result("score", bare, bare_problem.score(LAYOUT))
    paths = add_enhancement_map(PlotFiles(), result, bare_problem, tmp_path, "png")
    assert list(paths) == [] and paths.skipped == []


MAST = {
    "kind": "cylinder",
    "name": "mast",
    "base_m": [500.0, 0.0, 0.0],
    "radius_m": 1.0,
    "height_m": 30.0,
    "mesh_size_m": 1.0,
}
MAST_TOP = {
    "kind": "structure",
    "name": "mast top",
    "structure": "mast",
    "face": "top",
    "standoff_m": 0.5,
}


def test_mounting_points_on_structures_are_marked_with_their_enhancement(tmp_path):
    # A region on the mast's top and an installed meter beside its top; a meter far out on the
    # ground is on no structure. A grounded tip concentrates the field: a sphere triples it at
    # its pole (Jackson, Classical Electrodynamics, §2.5), and a mast 30 radii tall more.
    from sites import rectangle

    from probeplan.enhancement_map import enhancement_map, structure_marks

    cfg = make_config(
        "<t>",
        structure=[MAST],
        region=[rectangle(2000.0), MAST_TOP],
        probes={
            "count": 2,
            "installed": [
                {"name": "beside", "position_m": [501.6, 0.0, 29.0]},
                {"name": "gate", "position_m": [-1500.0, 0.0, 0.0]},
            ],
        },
    )
    problem = build_problem(cfg)
    score = problem.score(np.array([[300.0, 900.0, 0.0], [-900.0, -700.0, 0.0]]))
    names = ("beside", "gate", "new-0", "new-1")
    marks = structure_marks(problem, score, names)
    assert [(m[0], m[1]) for m in marks] == [(0, "mast top"), (0, "meter beside")]
    _, _, top_pts, top_value = marks[0]
    np.testing.assert_allclose(top_value, enhancement_at(problem, top_pts, Z_AXIS), rtol=1e-12)
    assert np.all(top_value > 3.0)
    np.testing.assert_allclose(marks[1][3], score.enhancement[:1], rtol=1e-12)
    path = enhancement_map(problem, score, tmp_path / "map.svg", names=names)
    svg = path.read_text()
    assert "mast top" in svg and "meter beside" in svg and "mounting point on a structure" in svg
