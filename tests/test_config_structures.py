"""``[[structure]]`` tables: parsed into conductors, checked at the boundary, and carried into
the planning problem (field, Jacobian and mounting rules)."""

from __future__ import annotations

import numpy as np
import pytest
from sites import make_config

import probeplan as pp
from probeplan.errors import InputError
from probeplan.problem import build_problem

# The base test site: flush ground meters over a 4 km square, a charge 3 km up (tests/sites.py).
TANK = {"kind": "cylinder", "base_m": [0.0, 0.0, 0.0], "radius_m": 200.0, "height_m": 400.0}


def test_every_kind_parses_with_its_keys(tmp_path):
    import trimesh

    box = trimesh.creation.box(extents=(100.0, 100.0, 100.0))
    box.apply_translation((-1500.0, 1500.0, 50.0))
    box.export(tmp_path / "shed.stl")
    (tmp_path / "site.toml").write_text("")
    structures = [
        {**TANK, "name": "tank"},
        {"kind": "box", "min_m": [500, 500, 0], "max_m": [700, 600, 80]},
        {"kind": "sphere", "center_m": [-800, 0, 0], "radius_m": 60.0},
        {"kind": "spheroid", "center_m": [900, -900, 0], "semi_axes_m": [5, 5, 150]},
        {"kind": "mesh", "path": "shed.stl", "floating": True, "charge_c": 1e-6},
    ]
    cfg = make_config(str(tmp_path / "site.toml"), structure=structures)
    kinds = [c.kind for c in cfg.structures]
    assert kinds == ["cylinder", "box", "sphere", "spheroid", "mesh"]
    assert cfg.structures[0].name == "tank" and cfg.structures[1].name == "structure[1]"
    assert cfg.structures[4].floating and cfg.structures[4].charge_c == 1e-6


@pytest.mark.parametrize(
    "structure, match",
    [
        ({**TANK, "min_m": [0, 0, 0]}, r"`min_m` does not apply to a cylinder"),
        ({**TANK, "charge_c": 1e-6}, r"`structure\[0\].charge_c` needs `structure\[0\].floating"),
        ({**TANK, "kind": "tower"}, r"`structure\[0\].kind` must be one of"),
        ({**TANK, "radius_m": -1.0}, r"`structure\[0\].radius_m`"),
        ({"kind": "mesh", "path": "nowhere.stl"}, r"no such mesh file"),
    ],
)
def test_bad_structure_tables_name_the_key(structure, match):
    with pytest.raises(InputError, match=match):
        make_config("<t>", structure=[structure])


def test_overlapping_structures_and_a_charge_inside_are_refused():
    hall = {"kind": "box", "min_m": [100, -100, 0], "max_m": [400, 100, 150]}
    with pytest.raises(InputError, match="overlap"):
        make_config("<t>", structure=[TANK, hall])
    inside = {"kind": "sphere", "center_m": [0, 0, 3000.0], "radius_m": 300.0}
    with pytest.raises(InputError, match=r"source\[0\] \(point\) .* inside conductor 0"):
        make_config("<t>", structure=[inside])


def test_an_unreadable_mesh_file_is_named(tmp_path):
    bad = tmp_path / "broken.stl"
    bad.write_bytes(b"not a mesh")
    with pytest.raises(InputError, match="broken.stl"):
        make_config(str(tmp_path / "site.toml"), structure=[{"kind": "mesh", "path": str(bad)}])


def test_the_problem_sees_the_structures():
    # The planner's field is the forward model's with the same conductor (pp.field), and the
    # candidates keep out of the tank.
    cfg = make_config("<t>", structure=[TANK])
    problem = build_problem(cfg)
    pts = np.array([[300.0, 0.0, 0.0], [1500.0, 800.0, 0.0]])
    e, _ = problem.scene.evaluate(problem.theta[:1], pts, jacobian=False)
    src = cfg.sources[0].source
    tank = pp.Conductor.cylinder((0.0, 0.0, 0.0), 200.0, 400.0)
    np.testing.assert_allclose(e[0], pp.field(src, pts, 0.0, conductors=[tank]), rtol=1e-10)
    bare = pp.field(src, pts, 0.0)
    assert abs(e[0, 0, 2]) < abs(bare[0, 2])  # beside a grounded tank the field is weaker
    cand = cfg.site().candidate_grid(target=300).positions_m
    assert np.hypot(cand[:, 0], cand[:, 1]).min() > 200.0
    layout = np.array([[300.0, 0.0, 0.0], [1800.0, 0.0, 0.0], [-1000.0, 500.0, 0.0],
                       [0.0, -1500.0, 0.0], [900.0, 1400.0, 0.0]])  # fmt: skip
    score = problem.score(layout)
    assert np.all(np.isfinite(score.crb_std))
    # each meter's computed enhancement: the grounded tank shields its neighbour most
    assert score.enhancement.shape == (5,)
    assert 0 < score.enhancement[0] < score.enhancement[1] < 1.0


def test_structures_and_enhancement_round_trip_through_hdf5(tmp_path):
    from probeplan.result import make_result
    from probeplan.store import read_result, write_result

    cfg = make_config("<t>", structure=[{**TANK, "name": "tank"}])
    problem = build_problem(cfg)
    layout = np.array([[300.0, 0.0, 0.0], [1800.0, 0.0, 0.0], [-1000.0, 500.0, 0.0],
                       [0.0, -1500.0, 0.0], [900.0, 1400.0, 0.0]])  # fmt: skip
    result = make_result("score", cfg, problem.score(layout))
    s = result.structures
    assert s.names == ("tank",) and s.faces.shape[1] == 3
    # A grounded tank under a negative cloud charge takes positive induced charge (images).
    assert s.charge_c[0] > 0 and cfg.sources[0].source.charge_c < 0
    path = write_result(result, tmp_path / "r.h5")
    back = read_result(path)
    np.testing.assert_array_equal(back.structures.vertices_m, s.vertices_m)
    np.testing.assert_array_equal(
        back.structures.charge_density_c_per_m2, s.charge_density_c_per_m2
    )
    np.testing.assert_array_equal(back.score.enhancement, result.score.enhancement)
    import h5py

    with h5py.File(path) as f:
        assert f["structures/charge_density_c_per_m2"].attrs["units"] == "C/m^2"
        assert f["structures/vertices_m"].attrs["units"] == "m"


def test_summary_shows_enhancement_and_the_structures_caution():
    from rich.console import Console

    from probeplan import report
    from probeplan.result import make_result

    cfg = make_config("<t>", structure=[TANK])
    layout = np.array([[300.0, 0.0, 0.0], [1800.0, 0.0, 0.0], [-1000.0, 500.0, 0.0],
                       [0.0, -1500.0, 0.0], [900.0, 1400.0, 0.0]])  # fmt: skip
    result = make_result("score", cfg, build_problem(cfg).score(layout))
    console = Console(record=True, width=160)
    for part in report.summary_parts(result):
        console.print(part)
    text = console.export_text()
    assert "enhancement" in text
    assert "does not replace lightning-protection or high-voltage clearance design" in text


def test_meters_mounted_on_a_structure_top():
    # A region on the tank's roof, 2 m off it: its points are candidates although they are
    # nearer the panels than a panel size, and they read the enhanced field over the roof.
    region = {"kind": "structure", "structure": "tank", "face": "top", "standoff_m": 2.0,
              "spacing_m": 60.0, "name": "roof"}  # fmt: skip
    cfg = make_config("<t>", structure=[{**TANK, "name": "tank"}], region=[region])
    roof = cfg.regions[0]
    assert roof.kind == "structure" and roof.standoff_m == 2.0
    pts = roof.outline_m()
    np.testing.assert_allclose(pts[:, 2], 402.0)
    cand = cfg.site().candidate_grid().positions_m
    assert len(cand) == len(pts)
    problem = build_problem(cfg)
    score = problem.score(pts[:5])
    assert np.all(score.enhancement > 1.0)  # on a tank's roof the field is enhanced


@pytest.mark.parametrize(
    "region, match",
    [
        ({"kind": "structure", "structure": "silo", "standoff_m": 1.0}, "names no"),
        ({"kind": "structure", "structure": "tank", "standoff_m": 0.0}, "standoff_m"),
        ({"kind": "structure", "structure": "tank", "standoff_m": 1.0, "face": "roof"}, "face"),
        ({"kind": "points", "positions_m": [[0.0, 0.0, 100.0]]}, r"region\[0\] .* inside"),
    ],
)
def test_bad_structure_regions_are_named(region, match):
    with pytest.raises(InputError, match=match):
        make_config("<t>", structure=[{**TANK, "name": "tank"}], region=[region])


def test_site_map_draws_the_structures(tmp_path):
    from probeplan import plots
    from probeplan.result import make_result

    cfg = make_config("<t>", structure=[TANK])
    problem = build_problem(cfg)
    layout = np.array([[300.0, 0.0, 0.0], [1800.0, 0.0, 0.0], [-1000.0, 500.0, 0.0],
                       [0.0, -1500.0, 0.0], [900.0, 1400.0, 0.0]])  # fmt: skip
    result = make_result("score", cfg, problem.score(layout))
    path = plots.site_map(cfg, result, tmp_path / "site.png")
    assert path.stat().st_size > 0
