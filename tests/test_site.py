"""Tests of probeplan.site: mounting regions, keep-outs, spacing, candidate lattices, layouts.

Geometric facts are checked against sources outside the project, named beside each check:
the shoelace (Gauss) area formula, the area of a tilted plane figure (projected area = area x
cos tilt), the centroid of a composite figure, the distance from a point to a segment, the
hexagonal packing of the plane (density pi / (2 sqrt 3), Thue's theorem; e.g. Conway & Sloane,
"Sphere Packings, Lattices and Groups", ch. 1), Groemer's bound for points in a convex region,
shapely's own ``nearest_points`` and scipy's ``cKDTree`` as reference libraries. All site numbers
below are invented for the tests.
"""

from __future__ import annotations

import math
import pickle

import numpy as np
import pytest
import shapely
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.spatial import cKDTree
from shapely.ops import nearest_points

from probeplan.site import (
    HEX_CELL_FACTOR,
    REGION_KINDS,
    Buffered,
    Candidates,
    Gained,
    Region,
    Site,
    make_region,
)

FAST = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def rect(x0=0.0, y0=0.0, x1=30.0, y1=20.0, z=1.5, **kw) -> Region:
    return make_region("rectangle", min_m=(x0, y0), max_m=(x1, y1), z_m=z, **kw)


# An L-shaped yard (invented): the 10 x 10 square minus its upper-right 5 x 5 quarter.
L_SHAPE = [[0, 0], [10, 0], [10, 5], [5, 5], [5, 10], [0, 10]]


def l_yard(**kw) -> Region:
    return make_region("polygon", vertices_m=L_SHAPE, z_m=2.0, **kw)


# A wall (invented): the plane y = 60, from x = 0 to 40, z = 0 to 10.
def wall(**kw) -> Region:
    return make_region(
        "polygon", vertices_m=[[0, 60, 0], [40, 60, 0], [40, 60, 10], [0, 60, 10]], **kw
    )


# ============================================================================================
# Regions (site.kinds, site.regions): validation
# ============================================================================================


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        (dict(kind="circle"), r"`kind` of a region must be one of 'rectangle', 'polygon'"),
        (
            dict(kind="rectangle", min_m=(5, 0), max_m=(0, 10), z_m=1.0),
            r"`min_m` of a rectangle must be below `max_m` on both axes; "
            r"got min_m=\[5, 0\], max_m=\[0, 10\]\.",
        ),
        (dict(kind="rectangle", min_m=(0, 3), max_m=(5, 3), z_m=1.0), r"`min_m` .* below"),
        (dict(kind="rectangle", min_m=(0, 0), max_m=(5, 5)), r"needs `z_m`"),
        (dict(kind="rectangle", min_m=(0, 0, 0), max_m=(5, 5), z_m=1), r"`min_m` .* 2 numbers"),
        (dict(kind="rectangle", min_m=(0, np.nan), max_m=(5, 5), z_m=1), r"`min_m` .* finite"),
        (
            dict(kind="rectangle", min_m=(0, 0), max_m=(5, 5), z_m=1, vertices_m=[[0, 0]]),
            r"`vertices_m` is not used by a rectangle",
        ),
        (
            dict(kind="polygon", vertices_m=[[0, 0], [1, 1], [0, 0], [1, 1]], z_m=0),
            r"`vertices_m` .* at least 3 distinct vertices; got 2",
        ),
        (
            dict(kind="polygon", vertices_m=[[0, 0], [2, 2], [2, 0], [0, 2]], z_m=0),
            r"`vertices_m` .* simple polygon .*Self-intersection",
        ),
        (dict(kind="polygon", vertices_m=[[0, 0], [1, 0], [2, 0]], z_m=0), r"`vertices_m`"),
        (dict(kind="polygon", vertices_m=[[0, 0], [1, 0], [1, 1]]), r"needs `z_m`"),
        (
            dict(kind="polygon", vertices_m=[[0, 0, 0], [1, 0, 0], [1, 1, 0]], z_m=2.0),
            r"`z_m` is not used by a polygon with \[x, y, z\] vertices",
        ),
        (
            dict(kind="polygon", vertices_m=[[0, 0, 0], [4, 0, 0], [4, 4, 0], [0, 4, 1]]),
            r"`vertices_m` .* one plane .*vertex \d is 0\.\d+ m off the best-fit plane",
        ),
        (
            dict(kind="polygon", vertices_m=[[0, 0, 0], [0, 0, 5], [0, 0, 9]]),
            r"`vertices_m` .* lie on one line",
        ),
        (dict(kind="polygon", vertices_m=[[0, 0], [1, 0, 0], [1, 1]], z_m=0), r"`vertices_m`"),
        (
            dict(kind="segment", start_m=(1, 2, 3), end_m=(1, 2, 3)),
            r"`start_m` and `end_m` of a segment must differ",
        ),
        (
            dict(kind="segment", start_m=(0, 0, 0), end_m=(1, 0, 0), z_m=3),
            r"`z_m` is not used by a segment",
        ),
        (dict(kind="segment", start_m=(0, 0), end_m=(1, 0, 0)), r"`start_m` .* 3 numbers"),
        (dict(kind="points", positions_m=[]), r"`positions_m` .* non-empty"),
        (dict(kind="points", positions_m=[[0, 0]]), r"`positions_m`"),
        (dict(kind="points", positions_m=[[0, 0, 1]], gain=0.0), r"`gain` .* > 0"),
        (dict(kind="points", positions_m=[[0, 0, 1]], buffer_m=-1), r"`buffer_m` .* >= 0"),
        (dict(kind="points", positions_m=[[0, 0, 1]], name=3), r"`name`"),
    ],
)
def test_region_rejects_bad_input_with_a_message_naming_the_field(kwargs, match):
    with pytest.raises(ValueError, match=match):
        make_region(**kwargs)


def test_region_message_carries_its_name():
    with pytest.raises(ValueError, match=r"`min_m` of a rectangle 'roof' must be below"):
        make_region("rectangle", min_m=(0, 0), max_m=(0, 1), z_m=1, name="roof")


def test_region_normalises_to_tuples_of_floats():
    r = make_region("rectangle", min_m=np.array([0, 1]), max_m=[2, 3], z_m=np.int64(4))
    assert r.min_m == (0.0, 1.0) and r.max_m == (2.0, 3.0) and r.z_m == 4.0
    assert all(type(v) is float for v in (*r.min_m, *r.max_m, r.z_m))
    p = make_region("points", positions_m=np.array([[1, 2, 3]]))
    assert p.positions_m == ((1.0, 2.0, 3.0),)
    poly = make_region("polygon", vertices_m=[[0, 0], [1, 0], [1, 1], [0, 0]], z_m=0)  # closed ring
    assert poly.vertices_m[1] == (1.0, 0.0)
    assert tuple(REGION_KINDS) == ("rectangle", "polygon", "segment", "points", "structure")


def test_registry_builds_each_kind_and_wrappers_carry_gain_and_buffer():
    tables = {
        "rectangle": dict(min_m=(0, 0), max_m=(4, 2), z_m=1.0),
        "polygon": dict(vertices_m=L_SHAPE, z_m=2.0),
        "segment": dict(start_m=(0, 0, 0), end_m=(0, 0, 6)),
        "points": dict(positions_m=[[0, 0, 1], [3, 4, 1]]),
        "structure": dict(positions_m=[[0, 0, 1], [3, 4, 1]], structure="tank", standoff_m=0.2),
    }
    for kind, geometry in tables.items():
        bare = REGION_KINDS[kind](**geometry)
        assert bare.kind == kind and isinstance(bare, Region)
        assert (bare.gain, bare.buffer_m) == (1.0, 0.0)
        assert type(make_region(kind, **geometry)) is REGION_KINDS[kind]
        # A wrapper changes only what it carries; the geometry answers stay the bare kind's.
        gained = make_region(kind, **geometry, gain=1.7, name="mast")
        assert isinstance(gained, Gained) and isinstance(gained, Region)
        assert (gained.gain, gained.name, gained.kind) == (1.7, "mast", kind)
        p = np.random.default_rng(1).uniform(-2, 6, size=(50, 3))
        np.testing.assert_array_equal(gained.distance(p), bare.distance(p))
        np.testing.assert_array_equal(gained.grid(0.5), bare.grid(0.5))
        np.testing.assert_array_equal(gained.outline_m(), bare.outline_m())
    with pytest.raises(ValueError, match=r"`foo` is not used by a segment; a segment takes"):
        make_region("segment", start_m=(0, 0, 0), end_m=(1, 0, 0), foo=1)
    with pytest.raises(ValueError, match=r"`region` must be a Region; got str"):
        Gained("roof", 2.0)


def test_buffered_region_grows_only_the_keepout_test_and_survives_pickling():
    mast = REGION_KINDS["segment"](start_m=(0, 0, 0), end_m=(0, 0, 20))
    grown = Buffered(mast, 5.0)
    # Distance from a point to a segment (textbook): (4.9, 0, 10) is 4.9 m from the mast.
    p = np.array([[4.9, 0, 10], [5.1, 0, 10]])
    assert grown.contains(p).tolist() == [True, False]
    assert mast.contains(p).tolist() == [False, False]
    assert grown.covers(p).tolist() == mast.covers(p).tolist() == [False, False]
    # Unpickling asks a wrapper for attributes before its fields exist: it must not recurse.
    again = pickle.loads(pickle.dumps(Gained(grown, 1.0)))
    assert again.buffer_m == 5.0 and again.contains(p).tolist() == [True, False]


# ============================================================================================
# Regions: sizes
# ============================================================================================


def test_measure_and_dimension_of_every_kind():
    r = rect()
    assert (r.dimension, r.unit_dim, r.measure) == (2, 2, 600.0)
    # Shoelace (Gauss) area formula, textbook: A = |sum(x_i y_{i+1} - x_{i+1} y_i)| / 2.
    v = np.array(L_SHAPE, dtype=float)
    shoelace = 0.5 * abs(np.sum(v[:, 0] * np.roll(v[:, 1], -1) - np.roll(v[:, 0], -1) * v[:, 1]))
    assert l_yard().measure == pytest.approx(shoelace) == pytest.approx(75.0)
    assert wall().measure == pytest.approx(400.0)
    # A roof tilted by 30 degrees over a 10 x 8 footprint: area = footprint / cos(30 deg)
    # (projected area of a plane figure, textbook).
    t = math.tan(math.radians(30.0))
    roof = make_region(
        "polygon", vertices_m=[[0, 0, 5], [10, 0, 5], [10, 8, 5 + 8 * t], [0, 8, 5 + 8 * t]]
    )
    assert roof.measure == pytest.approx(80.0 / math.cos(math.radians(30.0)))
    assert (roof.dimension, roof.unit_dim) == (2, 2)
    seg = make_region("segment", start_m=(0, 0, 0), end_m=(3, 4, 12))
    assert (seg.dimension, seg.unit_dim, seg.measure) == (1, 1, pytest.approx(13.0))  # 3-4-12-13
    pts = make_region("points", positions_m=[[0, 0, 1], [5, 0, 1], [9, 9, 2]])
    assert (pts.dimension, pts.unit_dim, pts.measure) == (0, 1, 3.0)


# ============================================================================================
# Regions: membership and keep-out semantics
# ============================================================================================


def test_covers_a_rectangle_at_its_height_with_boundary_inside():
    r = rect()
    p = np.array([[0, 0, 1.5], [30, 20, 1.5], [15, 10, 1.5 + 5e-7], [15, 10, 1.6], [31, 10, 1.5]])
    assert r.covers(p).tolist() == [True, True, True, False, False]


def test_footprint_keepout_excludes_every_height_and_buffer_grows_it():
    tank = rect(0, 0, 10, 10, z=0.0, buffer_m=2.0, name="tank")
    p = np.array(
        [
            [5, 5, 0], [5, 5, 80],        # inside the footprint at any height
            [11.9, 5, 3], [12.1, 5, 3],   # 1.9 m and 2.1 m beside an edge
            [11.4, 11.4, 0],              # sqrt(2) * 1.4 = 1.98 m from the corner
            [11.5, 11.5, 0],              # sqrt(2) * 1.5 = 2.12 m: rounded corner, outside
        ]
    )  # fmt: skip
    assert tank.contains(p).tolist() == [True, True, True, False, True, False]
    bare = rect(0, 0, 10, 10, z=0.0)
    assert bare.contains(np.array([[10, 10, 7], [10 + 1e-3, 5, 0]])).tolist() == [True, False]


def test_buffered_footprint_matches_shapely_scalar_distance():
    # Reference: shapely's scalar Polygon.distance(Point), one point at a time.
    tank = make_region("polygon", vertices_m=L_SHAPE, z_m=0.0, buffer_m=1.5)
    outline = shapely.Polygon(L_SHAPE)
    p = np.random.default_rng(2).uniform(-3, 13, size=(1500, 3))
    ref = [outline.distance(shapely.Point(x, y)) <= 1.5 + 1e-6 for x, y, _ in p]
    assert tank.contains(p).tolist() == ref


def test_wall_keepout_is_its_plate_in_3d():
    w = wall()
    p = np.array([[20, 60, 5], [20, 60 + 1e-3, 5], [20, 60, 11], [40, 60, 10], [50, 60, 5]])
    assert w.contains(p).tolist() == [True, False, False, True, False]
    thick = wall(buffer_m=1.0)
    p = np.array([[20, 60.9, 5], [20, 61.1, 5], [20, 60, 10.9], [40.6, 60.6, 5]])
    # (40.6, 60.6, 5) is sqrt(0.6^2 + 0.6^2) = 0.85 m from the wall's edge: inside.
    assert thick.contains(p).tolist() == [True, False, True, True]


def test_segment_and_points_keepouts_use_3d_distance():
    mast = make_region("segment", start_m=(0, 0, 0), end_m=(0, 0, 20), buffer_m=5.0)
    # Distance from a point to a segment (textbook): to the nearest point of the segment.
    p = np.array([[4.9, 0, 10], [5.1, 0, 10], [0, 0, 24.9], [3, 0, 24], [3, 0, 24.1], [0, 0, -6]])
    assert mast.contains(p).tolist() == [True, False, True, True, False, False]
    vents = make_region("points", positions_m=[[0, 0, 0], [10, 0, 0]], buffer_m=1.0)
    q = np.array([[0.6, 0.8, 0], [10, 0, 1.01], [5, 0, 0]])
    assert vents.contains(q).tolist() == [True, False, False]
    on_line = make_region("segment", start_m=(0, 0, 0), end_m=(10, 0, 0))
    assert on_line.contains(np.array([[5, 0, 0], [5, 1e-3, 0]])).tolist() == [True, False]


def test_distance_to_a_segment_matches_the_textbook_formula():
    seg = make_region("segment", start_m=(0, 0, 0), end_m=(10, 0, 0))
    p = np.array([[5, 3, 4], [-3, 4, 0], [13, 0, 4]])
    np.testing.assert_allclose(seg.distance(p), [5.0, 5.0, 5.0])


def test_membership_rejects_bad_point_arrays():
    with pytest.raises(ValueError, match=r"`points_m` must have shape \(n_points, 3\)"):
        rect().contains(np.zeros((4, 2)))


# ============================================================================================
# Regions: grid, sample, unit parametrisation
# ============================================================================================


def test_grid_of_a_rectangle_is_the_centred_square_lattice():
    r = rect(0, 0, 10, 10, z=3.0)
    g = r.grid(2.5)
    # floor(L / s) + 1 = 5 lattice lines per axis (elementary), 25 points.
    assert g.shape == (25, 3)
    assert np.all(g[:, 2] == 3.0)
    assert sorted(set(g[:, 0])) == [0.0, 2.5, 5.0, 7.5, 10.0]
    g = r.grid(3.0)  # 4 lines per axis, centred in the 10 m: 0.5, 3.5, 6.5, 9.5
    np.testing.assert_allclose(sorted(set(g[:, 0])), [0.5, 3.5, 6.5, 9.5])


def test_grid_of_a_polygon_wall_segment_points_and_a_thin_shape():
    g = l_yard().grid(1.0)
    assert len(g) == 121 - 25  # 11 x 11 lattice minus the 5 x 5 interior of the notch
    assert l_yard().covers(g).all()
    gw = wall().grid(2.0)
    assert len(gw) == 21 * 6 and np.all(gw[:, 1] == 60.0)
    seg = make_region("segment", start_m=(0, 0, 1), end_m=(10, 0, 1))
    gs = seg.grid(3.0)  # ceil(10 / 3) = 4 pieces, 5 points, both ends
    np.testing.assert_allclose(gs[:, 0], np.linspace(0, 10, 5))
    pts = make_region("points", positions_m=[[0, 0, 1], [5, 0, 1]])
    np.testing.assert_array_equal(pts.grid(100.0), [[0, 0, 1], [5, 0, 1]])
    sliver = make_region("polygon", vertices_m=[[0.1, 0.1], [0.4, 0.1], [0.4, 0.3]], z_m=0)
    one = sliver.grid(5.0)
    assert one.shape == (1, 3) and sliver.covers(one).all()


def test_grid_rejects_bad_spacing():
    with pytest.raises(ValueError, match=r"`spacing_m` must be a positive number"):
        rect().grid(0.0)
    with pytest.raises(ValueError, match=r"`spacing_m` = 1e-05 m is too fine"):
        rect().grid(1e-5)


def test_uniform_samples_of_an_l_shape_match_its_centroid_and_area_shares():
    rng = np.random.default_rng(7)
    s = l_yard().sample(40_000, rng)
    assert s.shape == (40_000, 3) and np.all(s[:, 2] == 2.0)
    assert l_yard().covers(s).all()
    # Centroid of a composite figure (textbook): the 10 x 5 bottom strip (centroid (5, 2.5)) and
    # the 5 x 5 upper-left square (centroid (2.5, 7.5)), weighted by area: (50, 25) / 75.
    cx = (50 * 5 + 25 * 2.5) / 75
    cy = (50 * 2.5 + 25 * 7.5) / 75
    # Standard error of a mean of 40 000 draws with spread < 3 m is < 0.015 m; 4 sigma.
    assert s[:, 0].mean() == pytest.approx(cx, abs=0.06)
    assert s[:, 1].mean() == pytest.approx(cy, abs=0.06)
    share = np.mean(s[:, 1] > 5)  # area share of the upper square: 25 / 75
    assert share == pytest.approx(1 / 3, abs=4 * math.sqrt(2 / 9 / 40_000))


def test_samples_of_every_kind_lie_on_the_region():
    rng = np.random.default_rng(3)
    for region in (
        rect(),
        wall(),
        make_region("segment", start_m=(0, 0, 0), end_m=(5, 5, 5)),
        make_region("points", positions_m=[[0, 0, 1], [2, 0, 1]]),
    ):
        s = region.sample(500, rng)
        assert s.shape == (500, 3) and region.covers(s).all()
    assert rect().sample(0, rng).shape == (0, 3)


def test_from_unit_is_affine_on_a_rectangle_and_along_a_segment():
    r = rect(2, 3, 12, 8, z=1.0)
    u = np.array([[0, 0], [1, 1], [0.5, 0.2]])
    np.testing.assert_allclose(r.from_unit(u), [[2, 3, 1], [12, 8, 1], [7, 4, 1]])
    seg = make_region("segment", start_m=(0, 0, 0), end_m=(0, 0, 20))
    np.testing.assert_allclose(
        seg.from_unit([[0.0], [0.25], [1.0]]), [[0, 0, 0], [0, 0, 5], [0, 0, 20]]
    )
    # Batched shape (..., d) -> (..., 3).
    assert r.from_unit(np.full((4, 5, 2), 0.5)).shape == (4, 5, 3)


def test_from_unit_picks_a_point_by_floor_of_u_times_n():
    pts = make_region("points", positions_m=[[0, 0, 1], [1, 0, 1], [2, 0, 1], [3, 0, 1]])
    u = np.array([[0.0], [0.24], [0.25], [0.74], [0.99], [1.0]])
    np.testing.assert_array_equal(pts.from_unit(u)[:, 0], [0, 0, 1, 2, 3, 3])


def test_from_unit_moves_points_outside_a_polygon_to_its_nearest_point():
    yard = l_yard()
    u = np.array([[0.8, 0.7], [0.2, 0.2], [0.55, 0.9]])
    out = yard.from_unit(u)
    outline = shapely.Polygon(L_SHAPE)
    for (a, b), (x, y, z) in zip(u * 10, out, strict=True):
        # Reference: shapely.ops.nearest_points, or the point itself when inside.
        ref = nearest_points(outline, shapely.Point(a, b))[0]
        assert (x, y, z) == pytest.approx((ref.x, ref.y, 2.0), abs=1e-9)
    np.testing.assert_allclose(out[0], [8.0, 5.0, 2.0])  # from (8, 7) straight down to the edge


def test_to_unit_inverts_from_unit():
    rng = np.random.default_rng(5)
    for region in (rect(), wall(), make_region("segment", start_m=(1, 1, 1), end_m=(4, 5, 1))):
        u = rng.uniform(size=(20, region.unit_dim))
        np.testing.assert_allclose(region.to_unit(region.from_unit(u)), u, atol=1e-12)
    pts = make_region("points", positions_m=[[0, 0, 1], [1, 0, 1], [2, 0, 1]])
    np.testing.assert_array_equal(pts.from_unit(pts.to_unit(pts.grid(1.0))), pts.grid(1.0))


def test_from_unit_rejects_bad_shapes_and_ranges():
    with pytest.raises(ValueError, match=r"`u` for rectangle must have shape \(\.\.\., 2\)"):
        rect().from_unit(np.zeros((3, 1)))
    with pytest.raises(ValueError, match=r"`u` for segment must lie in \[0, 1\]"):
        make_region("segment", start_m=(0, 0, 0), end_m=(1, 0, 0)).from_unit([[1.5]])


# ============================================================================================
# Rules (site.rules): validation, allowed, spacing, violations
# ============================================================================================


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        (dict(regions=()), r"`regions` must hold at least one mounting region"),
        (dict(regions=(rect(buffer_m=1.0),)), r"`buffer_m` applies to keep-outs only"),
        (dict(regions=(rect(),), keepouts=(rect(gain=2.0),)), r"`gain` applies to mounting"),
        (dict(regions=(rect(),), min_spacing_m=-1.0), r"`min_spacing_m` must be a number"),
        (dict(regions=(rect(),), installed_m=[[1, 2]]), r"`installed_m` must have shape"),
        (dict(regions=("roof",)), r"`regions\[0\]` must be a Region"),
    ],
)
def test_site_rejects_bad_input(kwargs, match):
    with pytest.raises(ValueError, match=match):
        Site(**kwargs)


def test_allowed_is_some_region_and_no_keepout():
    site = Site((rect(0, 0, 30, 20, z=1.0), wall()), (rect(10, 10, 20, 30, z=0.0),))
    p = np.array([[5, 5, 1], [15, 15, 1], [15, 60, 5], [15, 60, 1.2], [35, 5, 1], [5, 5, 2]])
    # (15, 60, 5) is on the wall but inside the keep-out's footprint? No: footprint is y <= 30.
    assert site.allowed(p).tolist() == [True, False, True, True, False, False]


def test_spacing_ok_checks_pairs_and_installed_probes_in_3d():
    site = Site((rect(),), min_spacing_m=5.0, installed_m=[[0, 0, 1.5]])
    layouts = np.array(
        [
            [[10, 0, 1.5], [13, 4, 1.5]],  # 3-4-5 triangle: exactly 5 m apart, allowed
            [[10, 0, 1.5], [13, 3, 1.5]],  # 4.24 m
            [[3, 4, 1.5], [20, 10, 1.5]],  # 5 m from the installed probe, allowed
            [[3, 3, 1.5], [20, 10, 1.5]],  # 4.24 m from the installed probe
            [[10, 0, 1.5], [10, 0, 6.4]],  # 4.9 m, straight up: the distance is 3-D
        ]
    )
    assert site.spacing_ok(layouts).tolist() == [True, False, True, False, False]
    assert site.spacing_ok(np.zeros((0, 3, 3))).shape == (0,)
    # Without a minimum spacing, two probes still cannot share one position.
    free = Site((rect(),))
    assert free.spacing_ok(np.array([[[1, 1, 1.5], [1, 1, 1.5]]])).tolist() == [False]
    with pytest.raises(ValueError, match=r"`layouts_m` must have shape"):
        site.spacing_ok(np.zeros((3, 3)))


def test_violations_name_every_broken_rule():
    site = Site(
        (rect(0, 0, 30, 20, z=1.0),),
        (rect(10, 10, 20, 20, z=0.0, name="shed"),),
        min_spacing_m=4.0,
        installed_m=[[1, 1, 1]],
    )
    good = np.array([[25, 5, 1], [5, 15, 1]])
    assert site.violations(good) == []
    bad = np.array([[15, 15, 1], [40, 5, 1], [25, 5, 1], [27, 5, 1], [2, 1, 1]])
    msgs = site.violations(bad)
    assert "probe 0 at (15, 15, 1) m lies in keep-out 0 (rectangle 'shed')." in msgs
    assert any(
        m.startswith("probe 1 at (40, 5, 1) m lies outside every mounting region") for m in msgs
    )
    assert any("10.0 m away" in m for m in msgs)
    assert any(
        m.startswith("probes 2 and 3 are 2.00 m apart, closer than the minimum spacing of 4.00 m")
        for m in msgs
    )
    assert any(m.startswith("probe 4 and installed probe 0 are 1.00 m apart") for m in msgs)
    assert len(msgs) == 4
    # With the names the summary uses, the sentences name the probes so, never by a number.
    named = site.violations(bad, names=list("abcde"), installed_names=["mast"])
    assert "probe 'a' at (15, 15, 1) m lies in keep-out 0 (rectangle 'shed')." in named
    assert any(m.startswith("probe 'c' and probe 'd' are 2.00 m apart") for m in named)
    assert any(m.startswith("probe 'e' and installed probe 'mast' are 1.00 m apart") for m in named)
    far = site.violations(np.array([[16430.0, 5.0, 1.0]]))
    assert far[0].endswith("16.4 km away).")  # not 1.64e+04 m


# ============================================================================================
# Rules: feasibility
# ============================================================================================


def test_check_feasible_names_the_region_and_the_keepout_that_swallows_it():
    site = Site((rect(45, 15, 50, 20, z=1.0),), (rect(0, 0, 5, 5, z=0), rect(40, 10, 60, 30, z=0)))
    with pytest.raises(
        ValueError,
        match=r"region 0 \(rectangle\) lies wholly inside keep-out 1 \(rectangle\)",
    ):
        site.check_feasible(1)
    # Covered only by two keep-outs together.
    two = Site((rect(0, 0, 10, 10),), (rect(-1, -1, 5, 11, z=0), rect(5, -1, 11, 11, z=0)))
    with pytest.raises(ValueError, match=r"wholly inside keep-out 0 .* and keep-out 1"):
        two.check_feasible(1)
    # A mast swallowed by the buffer around a point keep-out (3-D test).
    mast = make_region("segment", start_m=(0, 0, 0), end_m=(0, 0, 4))
    blob = make_region("points", positions_m=[[0, 0, 2]], buffer_m=3.0)
    with pytest.raises(ValueError, match=r"region 0 \(segment\) lies wholly inside keep-out 0"):
        Site((mast,), (blob,)).check_feasible(1)
    # One region free is enough.
    Site((rect(45, 15, 50, 20), rect(0, 0, 1, 1)), (rect(40, 10, 60, 30, z=0),)).check_feasible(1)


def test_hexagonal_packing_fits_the_estimate_and_the_estimate_admits_it():
    s = 2.0
    # Hexagonal lattice (rows s * sqrt(3)/2 apart, alternate rows shifted by s/2) clipped to a
    # 40 x 30 m field; its nearest-neighbour distance is s (checked with scipy's cKDTree).
    rows = np.arange(0.0, 30.0 + 1e-9, s * math.sqrt(3) / 2)
    pts = np.array(
        [(x, y) for i, y in enumerate(rows) for x in np.arange((i % 2) * s / 2, 40 + 1e-9, s)]
    )
    d, _ = cKDTree(pts).query(pts, k=2)
    assert d[:, 1].min() == pytest.approx(s)
    # Hexagonal packing density pi / (2 sqrt 3) (Thue's theorem, textbook) means each point owns
    # a cell of (pi s^2 / 4) / (pi / (2 sqrt 3)) = (sqrt 3 / 2) s^2.
    assert HEX_CELL_FACTOR == pytest.approx((math.pi / 4) / (math.pi / (2 * math.sqrt(3))))
    area, perimeter = 40 * 30, 2 * (40 + 30)
    # Groemer's inequality for points s apart in a convex region (recalled from memory:
    # n <= A / ((sqrt 3 / 2) s^2) + P / (2 s) + 1) bounds the lattice count, and so does the
    # looser estimate the site uses.
    assert len(pts) <= area / (HEX_CELL_FACTOR * s * s) + perimeter / (2 * s) + 1
    site = Site((rect(0, 0, 40, 30, z=0.0),), min_spacing_m=s)
    site.check_feasible(len(pts))  # achievable, so never rejected
    estimate = area / (0.866 * s * s) + perimeter / s + 1
    with pytest.raises(
        ValueError, match=r"cannot place \d+ probes at least 2 m apart: .*hold about"
    ):
        site.check_feasible(int(estimate) + 2)


def test_check_feasible_counts_segments_and_points():
    fence = Site((make_region("segment", start_m=(0, 0, 1), end_m=(10, 0, 1)),), min_spacing_m=2.5)
    fence.check_feasible(5)  # floor(10 / 2.5) + 1 = 5: the two ends and three between
    with pytest.raises(ValueError, match=r"cannot place 6 probes"):
        fence.check_feasible(6)
    posts = make_region("points", positions_m=[[0, 0, 1], [1, 0, 1], [0, 0, 1], [20, 0, 1]])
    site = Site((posts,), (make_region("points", positions_m=[[20, 0, 1]], buffer_m=0.5),))
    site.check_feasible(2)
    with pytest.raises(ValueError, match=r"only 2 distinct allowed mounting points remain \(of 4"):
        site.check_feasible(3)
    spaced = Site((posts,), min_spacing_m=5.0)
    with pytest.raises(ValueError, match=r"only about 2 of the 3 allowed mounting points"):
        spaced.check_feasible(3)
    with pytest.raises(ValueError, match=r"`count` must be an integer >= 1; got 0"):
        spaced.check_feasible(0)


# ============================================================================================
# Layouts (site.layouts): candidate lattice
# ============================================================================================


def test_candidate_grid_hits_the_target_and_reports_its_spacing():
    site = Site((rect(0, 0, 300, 200, z=1.0),))
    c = site.candidate_grid()
    assert isinstance(c, Candidates)
    assert 0.8 * 1500 <= c.n_candidates <= 1.25 * 1500
    # A / s^2 = 1500 for a 60 000 m^2 field: s = sqrt(40) = 6.32 m.
    assert c.spacing_m == pytest.approx(math.sqrt(60_000 / 1500), rel=0.15)
    assert site.allowed(c.positions_m).all()


def test_candidate_grid_mixes_areas_lengths_and_points_and_honours_keepouts():
    fence = make_region("segment", start_m=(0, -5, 1), end_m=(100, -5, 1), gain=1.3)
    posts = make_region("points", positions_m=[[0, 50, 3], [50, 50, 3], [100, 50, 3]], gain=2.0)
    site = Site(
        (rect(0, 0, 100, 40, z=1.0), fence, posts),
        (rect(40, 0, 60, 40, z=0.0),),
        installed_m=[[0, 50, 3]],
        min_spacing_m=2.0,
    )
    c = site.candidate_grid(target=600)
    counts = np.bincount(c.region_index, minlength=3)
    assert counts[2] == 2  # the post at (0, 50, 3) already holds a probe
    assert counts[1] > 0 and counts[0] > counts[1]
    assert 0.7 * 600 <= c.n_candidates <= 1.3 * 600
    np.testing.assert_array_equal(c.gain[c.region_index == 1], 1.3)
    np.testing.assert_array_equal(c.gain[c.region_index == 2], 2.0)
    assert site.allowed(c.positions_m).all()
    assert site.spacing_ok(c.positions_m[:, None, :]).all()  # each clear of the installed probe
    fixed = site.candidate_grid(spacing_m=5.0)
    assert fixed.spacing_m == 5.0


def test_candidate_grid_removes_exact_duplicates_of_overlapping_regions():
    a = rect(0, 0, 10, 10, z=1.0, gain=1.0)
    b = rect(0, 0, 10, 10, z=1.0, gain=3.0)
    c = Site((a, b)).candidate_grid(spacing_m=2.0)
    assert c.n_candidates == 36 and np.all(c.region_index == 0)
    assert len(np.unique(c.positions_m, axis=0)) == 36


def test_candidate_grid_of_points_only_reports_zero_spacing():
    site = Site((make_region("points", positions_m=[[0, 0, 1], [3, 0, 1]]),))
    c = site.candidate_grid()
    assert c.spacing_m == 0.0 and c.n_candidates == 2


def test_candidate_grid_raises_when_nothing_is_left():
    site = Site((rect(0, 0, 10, 10),), (rect(-1, -1, 11, 11, z=0.0),))
    with pytest.raises(ValueError, match=r"no candidate position is left"):
        site.candidate_grid(spacing_m=1.0)


# ============================================================================================
# Layouts: random and regular layouts
# ============================================================================================


def test_random_layouts_are_feasible_reproducible_and_spread_over_regions():
    fence = make_region("segment", start_m=(0, -10, 1), end_m=(100, -10, 1))
    site = Site(
        (rect(0, 0, 100, 50, z=1.0), fence),
        (
            make_region(
                "polygon", vertices_m=[[40, 10], [60, 10], [60, 30], [40, 30]], z_m=0, buffer_m=2
            ),
        ),
        min_spacing_m=5.0,
        installed_m=[[5, 5, 1]],
    )
    a = site.random_layouts(400, 6, np.random.default_rng(11))
    b = site.random_layouts(400, 6, np.random.default_rng(11))
    np.testing.assert_array_equal(a, b)
    assert a.shape == (400, 6, 3)
    assert site.allowed(a.reshape(-1, 3)).all() and site.spacing_ok(a).all()
    on_fence = np.isclose(a[..., 1], -10).mean()
    # Weight of the fence: its lattice points at the automatic spacing, about L / s of
    # A / s^2 + L / s; here s = 1.98 m, so about 50 / (1276 + 50) = 4 %.
    assert 0.01 < on_fence < 0.08


def test_random_layouts_give_up_with_a_clear_message():
    fence = Site((make_region("segment", start_m=(0, 0, 1), end_m=(10, 0, 1)),), min_spacing_m=5.0)
    # Three probes 5 m apart on 10 m need both ends exactly: a random draw never hits them.
    with pytest.raises(ValueError, match=r"cannot place probe 3 of 3 .*too little room"):
        fence.random_layouts(5, 3, np.random.default_rng(0), max_tries=5)


def test_regular_layout_is_the_hand_drawn_lattice():
    site = Site((rect(0, 0, 30, 20, z=1.5),))
    six = site.regular_layout(6)  # 3 columns x 2 rows, cell centres
    np.testing.assert_allclose(
        six, [[5, 5, 1.5], [15, 5, 1.5], [25, 5, 1.5], [5, 15, 1.5], [15, 15, 1.5], [25, 15, 1.5]]
    )
    five = site.regular_layout(5)  # the last row of two sits centred
    np.testing.assert_allclose(five[3:, :2], [[10, 15], [20, 15]])
    seg = Site((make_region("segment", start_m=(0, 0, 0), end_m=(0, 0, 20)),))
    np.testing.assert_allclose(seg.regular_layout(4)[:, 2], [2.5, 7.5, 12.5, 17.5])


def test_regular_layout_moves_a_probe_out_of_a_keepout():
    site = Site((rect(0, 0, 30, 30, z=1.0),), (rect(12, 12, 18, 18, z=0.0),), min_spacing_m=3.0)
    layout = site.regular_layout(9)
    assert site.allowed(layout).all() and site.spacing_ok(layout[None]).all()
    hand = np.array([[x, y, 1.0] for y in (5, 15, 25) for x in (5, 15, 25)])
    moved = np.any(layout != hand, axis=1)
    assert moved.tolist() == [False] * 4 + [True] + [False] * 4
    # Pushed to the nearest allowed lattice point: just beyond the keep-out's edge.
    assert np.min(np.abs(layout[4, :2] - 15.0)) <= 0.5 and np.max(np.abs(layout[4, :2] - 15)) <= 4


def test_regular_layout_falls_back_when_the_lattice_breaks_the_spacing():
    strip = Site((rect(0, 0, 10, 1, z=0.0),), min_spacing_m=3.0)
    layout = strip.regular_layout(4)  # the hand lattice is 2.5 m apart; 4 fit 3 m apart
    assert strip.allowed(layout).all() and strip.spacing_ok(layout[None]).all()
    posts = make_region(
        "points", positions_m=[[0, 0, 1], [1, 0, 1], [2, 0, 1], [3, 0, 1], [9, 0, 1]]
    )
    site = Site((posts,), min_spacing_m=2.0, installed_m=[[9, 0, 1]])
    # The listed post at x = 9 holds the installed probe; the widest free pair is 0 and 3.
    np.testing.assert_array_equal(np.sort(site.regular_layout(2)[:, 0]), [0, 3])
    with pytest.raises(ValueError, match=r"cannot place 3 probes"):
        site.regular_layout(3)


# ============================================================================================
# Property tests
# ============================================================================================


@st.composite
def star_polygons(draw, three_d: bool = False):
    """Star-shaped polygons (always simple): vertices at increasing angles around a centre."""
    n = draw(st.integers(3, 8))
    gaps = np.array(draw(st.lists(st.floats(0.3, 1.0), min_size=n, max_size=n)))
    angles = np.cumsum(gaps) / gaps.sum() * 2 * np.pi
    radii = np.array(draw(st.lists(st.floats(1.0, 10.0), min_size=n, max_size=n)))
    cx, cy = draw(st.floats(-50, 50)), draw(st.floats(-50, 50))
    ab = np.stack([cx + radii * np.cos(angles), cy + radii * np.sin(angles)], axis=1)
    if not three_d:
        return make_region("polygon", vertices_m=ab.tolist(), z_m=draw(st.floats(0, 5)))
    tilt, turn = draw(st.floats(0.0, np.pi / 2)), draw(st.floats(0.0, 2 * np.pi))
    u = np.array([np.cos(turn), np.sin(turn), 0.0])
    v = np.array([-np.sin(turn) * np.cos(tilt), np.cos(turn) * np.cos(tilt), np.sin(tilt)])
    return make_region("polygon", vertices_m=(ab[:, :1] * u + ab[:, 1:] * v + [0, 0, 3]).tolist())


@st.composite
def rectangles(draw):
    x0, y0 = draw(st.floats(-100, 100)), draw(st.floats(-100, 100))
    w, h = draw(st.floats(1.0, 80.0)), draw(st.floats(1.0, 80.0))
    return rect(x0, y0, x0 + w, y0 + h, z=draw(st.floats(0, 10)))


@st.composite
def segments(draw):
    a = np.array(draw(st.lists(st.floats(-50, 50), min_size=3, max_size=3)))
    d = np.array(draw(st.lists(st.floats(-20, 20), min_size=3, max_size=3)))
    if np.linalg.norm(d) < 1.0:
        d = d + np.array([1.0, 0.0, 0.0])
    return make_region("segment", start_m=tuple(a), end_m=tuple(a + d))


@st.composite
def point_sets(draw):
    xy = draw(
        st.lists(
            st.tuples(st.integers(-20, 20), st.integers(-20, 20)),
            min_size=3,
            max_size=12,
            unique=True,
        )
    )
    return make_region("points", positions_m=[[x, y, 2.0] for x, y in xy])


REGIONS = st.one_of(
    rectangles(), star_polygons(), star_polygons(three_d=True), segments(), point_sets()
)


@st.composite
def sites(draw):
    """A one-region site with a small footprint keep-out and a modest spacing (both feasible)."""
    region = draw(REGIONS)
    if region.dimension == 0:
        return Site((region,)), 3
    size = math.sqrt(region.measure) if region.dimension == 2 else region.measure
    centre = region.sample(1, np.random.default_rng(draw(st.integers(0, 1000))))[0]
    side = 0.1 * size
    keep = rect(centre[0] - side, centre[1] - side, centre[0] + side, centre[1] + side, z=0.0)
    keepouts = (keep,) if region.is_footprint else ()
    return Site((region,), keepouts, min_spacing_m=0.05 * size), 3


@FAST
@given(sites(), st.integers(0, 2**32 - 1))
def test_property_random_layouts_are_allowed_and_spaced(site_count, seed):
    site, count = site_count
    layouts = site.random_layouts(20, count, np.random.default_rng(seed))
    assert layouts.shape == (20, count, 3)
    assert site.allowed(layouts.reshape(-1, 3)).all()
    assert site.spacing_ok(layouts).all()


@FAST
@given(sites())
def test_property_regular_layouts_are_feasible(site_count):
    site, count = site_count
    layout = site.regular_layout(count)
    assert layout.shape == (count, 3)
    assert site.violations(layout) == []


@FAST
@given(REGIONS, st.floats(0.3, 5.0))
def test_property_grid_points_are_allowed(region, spacing):
    g = region.grid(spacing)
    assert len(g) >= 1
    assert Site((region,)).allowed(g).all()


@FAST
@given(REGIONS, st.integers(0, 2**32 - 1))
def test_property_from_unit_stays_in_the_region(region, seed):
    u = np.random.default_rng(seed).uniform(size=(64, region.unit_dim))
    u[:4] = [
        [0.0] * region.unit_dim,
        [1.0] * region.unit_dim,
        [0.0, 1.0][: region.unit_dim],
        [1.0, 0.0][: region.unit_dim],
    ]
    assert region.covers(region.from_unit(u)).all()
