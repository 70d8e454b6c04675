"""GeoJSON in and out: site files read into local metres, layouts written as RFC 7946.

Outside references: pyproj's geodesics (Karney, Algorithms for geodesics, J. Geodesy 2013) for
every distance; the rules of RFC 7946 (§3.1.6 linear rings: closed, at least four positions,
exterior rings counter-clockwise; §3.1.1 longitude before latitude; §4 no `crs`; §3.1.9
antimeridian cutting) checked here by hand, with the shoelace sign for orientation."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pyproj
import pytest
from geojson_rules import check_rfc7946

from probeplan.errors import InputError
from probeplan.geo import Frame, MapShape, layout_collection, read_geojson, write_geojson

GEOD = pyproj.Geod(ellps="WGS84")
FRAME = Frame(-4.0, 48.2)  # fictional site off a rocky coast


def _poly(ring, role="region", name="field", **props):
    return {
        "type": "Feature",
        "properties": {"role": role, "name": name, **props},
        "geometry": {"type": "Polygon", "coordinates": [ring]},
    }


def _point(lon, lat, name="mast", **props):
    props = {"role": "installed", "name": name, "height_m": 3.0, **props}
    return {
        "type": "Feature",
        "properties": props,
        "geometry": {"type": "Point", "coordinates": [lon, lat]},
    }


# A clockwise square (readers must accept either orientation, RFC 7946 §3.1.6).
SQUARE = [[-4.01, 48.19], [-4.01, 48.21], [-3.99, 48.21], [-3.99, 48.19], [-4.01, 48.19]]
KEEPOUT = [[-4.001, 48.199], [-3.999, 48.199], [-3.999, 48.201], [-4.001, 48.201], [-4.001, 48.199]]


def _write(tmp_path: Path, features, **top) -> Path:
    path = tmp_path / "site.geojson"
    path.write_text(json.dumps({"type": "FeatureCollection", **top, "features": features}))
    return path


def test_read_roles_into_local_metres(tmp_path):
    path = _write(
        tmp_path,
        [
            _poly(SQUARE),
            _poly(KEEPOUT, role="keepout", name="tank bund"),
            _poly(KEEPOUT, role="structure", name="tank", height_m=12.0),
            _point(-4.0005, 48.2003, component="z", grade="standard"),
        ],
    )
    layer = read_geojson(path, FRAME)
    (region,), (keep,), (struct,), (meter,) = (
        layer.regions,
        layer.keepouts,
        layer.structures,
        layer.installed,
    )
    assert region.coords_m.shape == (4, 2) and region.height_m is None
    assert keep.name == "tank bund" and struct.height_m == 12.0
    assert meter.properties["grade"] == "standard" and meter.height_m == 3.0
    # Side lengths of the square against the geodesic between its corners.
    ring = np.array(SQUARE)
    _, _, true_m = GEOD.inv(ring[:-1, 0], ring[:-1, 1], ring[1:, 0], ring[1:, 1])
    local = region.coords_m
    map_m = np.hypot(*(local - np.roll(local, -1, axis=0)).T)
    assert np.abs(map_m - true_m).max() < 1e-3
    # The meter's distance and azimuth from the origin against the geodesic.
    az, _, dist = GEOD.inv(-4.0, 48.2, -4.0005, 48.2003)
    x, y = meter.coords_m[0]
    assert np.hypot(x, y) == pytest.approx(dist, abs=1e-6)
    assert np.degrees(np.arctan2(x, y)) % 360 == pytest.approx(az % 360, abs=1e-7)


def test_heights_multipolygons_and_wgs84_crs(tmp_path):
    ring3 = [[lon, lat, 60.0] for lon, lat in KEEPOUT]
    multi = {
        "type": "Feature",
        "id": "pads",
        "properties": {"role": "region"},
        "geometry": {"type": "MultiPolygon", "coordinates": [[SQUARE], [ring3]]},
    }
    crs = {"type": "name", "properties": {"name": "urn:ogc:def:crs:OGC:1.3:CRS84"}}
    path = _write(tmp_path, [multi], crs=crs)
    frame = Frame(-4.0, 48.2, origin_height_m=55.0)
    a, b = read_geojson(path, frame).regions
    assert (a.name, a.part, b.part) == ("pads", 0, 1)
    assert a.coords_m.shape == (4, 2)
    assert b.coords_m[:, 2] == pytest.approx(5.0)  # 60 m above the ellipsoid, origin at 55 m
    assert b.label.endswith("feature 0 ('pads') part 1")


def test_filter_selects_features(tmp_path):
    north = [[lon, lat + 0.05] for lon, lat in SQUARE]
    path = _write(
        tmp_path,
        [
            _poly(SQUARE, site="south"),
            _poly(north, name="north field", site="north"),
            {"type": "Feature", "properties": {"site": "south", "role": "river"}, "geometry": None},
        ],
    )
    (only,) = read_geojson(path, FRAME, select=("site", "north")).regions
    assert only.name == "north field" and only.index == 1
    with pytest.raises(InputError) as info:
        read_geojson(path, FRAME, select=("site", "east"))
    assert str(info.value) == (
        f'{path}: no feature has property \'site\' = "east"; values found: "north", "south".'
    )


BOWTIE = [[-4.01, 48.19], [-3.99, 48.21], [-3.99, 48.19], [-4.01, 48.21], [-4.01, 48.19]]


def _refusals(p):
    """(features or whole document, expected message) pairs; ``p`` is the file's path."""
    return [
        (
            {"type": "FeatureCollection", "features": []},
            f"{p}: the FeatureCollection has no features; a site file needs at least one "
            "feature with property `role` = 'region'.",
        ),
        (
            {
                "type": "FeatureCollection",
                "crs": {"type": "name", "properties": {"name": "EPSG:32630"}},
                "features": [_poly(SQUARE)],
            },
            f'{p}: a `crs` member {{"type": "name", "properties": {{"name": "EPSG:32630"}}}} is '
            "not WGS84; RFC 7946 positions are WGS84 longitude and latitude only (allowed `crs` "
            "names: 'urn:ogc:def:crs:OGC:1.3:CRS84', 'urn:ogc:def:crs:OGC::CRS84', 'OGC:CRS84', "
            "'CRS84', 'EPSG:4326', 'urn:ogc:def:crs:EPSG::4326'); reproject the file to WGS84 "
            "(EPSG:4326) first.",
        ),
        (
            [_poly(SQUARE), _poly(SQUARE[:-1] + [[-4.0, 48.0]], name="yard")],
            f"{p}: feature 1 ('yard'): the ring does not close: first position [-4.01, 48.19], "
            "last [-4.0, 48.0]; RFC 7946 rings must end on their first position.",
        ),
        (
            [_poly(BOWTIE, name="bow")],
            # the crossing is straight in the map, not in lon/lat: near, not at, the centre
            rf"{re.escape(str(p))}: feature 0 \('bow'\): the polygon is not simple "
            r"\(Self-intersection near \(lon, lat\) = \(-4\.00000\d\d, 48\.20000\d\d\)\); a "
            "region, keep-out or structure outline must not cross or touch itself.",
        ),
        (
            [_poly(KEEPOUT, role="keepout", name="bund")],
            f"{p}: no feature has property `role` = 'region'; roles found: 'keepout'.",
        ),
        (
            [_poly(SQUARE), _poly(KEEPOUT, role="fence", name="f")],
            f"{p}: feature 1 ('f') has `role` = 'fence'; allowed roles: 'region', 'keepout', "
            "'structure', 'installed'.",
        ),
        (
            [_poly(SQUARE), {"type": "Feature", "properties": {}, "geometry": None}],
            f"{p}: feature 1 (no name) has no `role` property; allowed roles: 'region', "
            "'keepout', 'structure', 'installed'.",
        ),
        (
            [_poly(SQUARE), _point(-4.0, 95.0, name="m1")],
            f"{p}: feature 1 ('m1'): the Point: position 0 [-4.0, 95.0]: latitude 95.0 is "
            "beyond ±90 degrees.",
        ),
        (
            [_poly(SQUARE), _point(-4.0, "48.2", name="m1")],
            f"{p}: feature 1 ('m1'): the Point: position 0 must be [longitude, latitude] or "
            "[longitude, latitude, height] in degrees and metres; got [-4.0, '48.2'].",
        ),
        (
            [_poly(SQUARE), _point(-1.0, 48.2, name="far mast")],
            f"{p}: feature 1 ('far mast'): the Point: position 0 [-1.0, 48.2]: it is "
            f"{GEOD.inv(-4.0, 48.2, -1.0, 48.2)[2] / 1000:.1f} km from the frame origin; the "
            "frame at (lon, lat) = (-4.0, 48.2) is stated accurate within 150 km of its origin; "
            "move the origin nearer the site.",
        ),
        (
            [_poly(SQUARE), _point(-4.0, 48.2, name="m2", height_m=None)],
            f"{p}: feature 1 ('m2'): property `height_m` must be a finite number of metres; "
            "got None.",
        ),
        (
            [_poly(SQUARE), _poly(KEEPOUT, role="structure", name="tank")],
            f"{p}: feature 1 ('tank'): a structure needs property `height_m` (its height, m).",
        ),
        (
            [_poly(SQUARE), _point(-4.0, 48.2, name="m3") | {"geometry": None}],
            f"{p}: feature 1 ('m3') has no geometry; a 'installed' feature must be a Point.",
        ),
        (
            [
                _poly(SQUARE, name="ring")
                | {"geometry": {"type": "Polygon", "coordinates": [SQUARE, KEEPOUT]}}
            ],
            f"{p}: feature 0 ('ring'): the polygon has 1 hole(s) (interior rings), which are not "
            "supported; give a region's hole as a keep-out, and split a keep-out around its hole.",
        ),
        (
            [_poly(SQUARE[:2] + SQUARE[:1], name="thin")],
            f"{p}: feature 0 ('thin'): a linear ring needs at least 4 positions, the last equal "
            "to the first (RFC 7946 §3.1.6); got 3.",
        ),
        (
            [_poly([[*SQUARE[0], 1.0], *SQUARE[1:-1], [*SQUARE[0], 1.0]], name="mixed")],
            f"{p}: feature 0 ('mixed'): the ring mixes positions with and without a height; "
            "give all or none a height.",
        ),
        (
            {"type": "Feature", "properties": {}, "geometry": None},
            f"{p}: the top level must be a GeoJSON FeatureCollection (RFC 7946 §3.3); got "
            "'Feature'.",
        ),
    ]


@pytest.mark.parametrize("case", range(len(_refusals("x"))))
def test_refusals_name_the_file_and_feature(tmp_path, case):
    path = tmp_path / "site.geojson"
    doc, message = _refusals(path)[case]
    if isinstance(doc, list):
        doc = {"type": "FeatureCollection", "features": doc}
    path.write_text(json.dumps(doc))
    with pytest.raises(InputError) as info:
        read_geojson(path, FRAME)
    if "Self-intersection" in message:
        assert re.fullmatch(message, str(info.value))
    else:
        assert str(info.value) == message


def test_refusals_of_the_file_itself(tmp_path):
    path = tmp_path / "site.geojson"
    path.write_text(json.dumps({"type": "FeatureCollection", "crs": {"type": "link"}}))
    with pytest.raises(InputError, match=r'a `crs` member \{"type": "link"\} is not WGS84;'):
        read_geojson(path, FRAME)
    path.unlink()
    with pytest.raises(InputError, match=r"site\.geojson: no such file\.$"):
        read_geojson(path, FRAME)
    path.write_text('{"type": "FeatureCollection",\n "features": [}')
    with pytest.raises(InputError) as info:
        read_geojson(path, FRAME)
    assert str(info.value) == f"{path}: not valid JSON at line 2, column 15: Expecting value."
    path.write_text('{"type": "FeatureCollection", "features": [NaN]}')
    with pytest.raises(InputError) as info:
        read_geojson(path, FRAME)
    assert str(info.value) == f"{path}: NaN is not a JSON number (RFC 8259); write a number."


# --------------------------------------------------------------------------------------------
# Write
# --------------------------------------------------------------------------------------------


def _layout(frame: Frame, tmp_path: Path, shapes, positions_m):
    n = len(positions_m)
    doc = layout_collection(
        frame,
        positions_m,
        names=[f"m{k}" for k in range(n)],
        installed=[k == 0 for k in range(n)],
        components=["z"] * n,
        grades=["standard"] * n,
        ground_z_m=0.0,
        shapes=shapes,
    )
    path = write_geojson(tmp_path / "layout.geojson", doc)
    return path, json.loads(path.read_text())


def test_written_layout_keeps_rfc7946_and_geodesic_distances(tmp_path):
    frame = Frame(-4.0, 48.2, origin_height_m=30.0)
    meters = np.array([[0.0, 0.0, 2.0], [1234.5678, -250.25, 3.5], [-800.0, 2100.0, 10.0]])
    cw = np.array(
        [[-1000.0, -1000.0, 2.0], [-1000.0, 1000.0, 2.0], [1000, 1000, 2], [1000, -1000, 2]]
    )
    wall = np.array([[0.0, 50.0, 0.0], [100.0, 50.0, 0.0], [100.0, 50.0, 5.0], [0.0, 50.0, 5.0]])
    shapes = [
        MapShape("region", "field", "polygon", cw),  # clockwise in, counter-clockwise out
        MapShape("keepout", "bund", "polygon", cw[::-1] * 0.1),
        MapShape("region", "wall", "polygon", wall),
        MapShape("region", "fence", "segment", np.array([[0, 0, 1.0], [300, 40, 1.0]])),
    ]
    path, doc = _layout(frame, tmp_path, shapes, meters)
    check_rfc7946(doc)
    points = [f for f in doc["features"] if f["geometry"]["type"] == "Point"]
    assert [f["properties"]["kind"] for f in points] == ["installed", "new", "new"]
    assert [f["properties"]["height_m"] for f in points] == [2.0, 3.5, 10.0]
    lonlat = np.array([f["geometry"]["coordinates"] for f in points])
    # Distances between the exported points on the ellipsoid against the local distances:
    # within the frame's distortion plus the 7-decimal rounding (< 1.2 cm a coordinate).
    i, j = np.triu_indices(3, 1)
    _, _, true_m = GEOD.inv(lonlat[i, 0], lonlat[i, 1], lonlat[j, 0], lonlat[j, 1])
    local_m = np.hypot(*(meters[i, :2] - meters[j, :2]).T)
    allowed = frame.distortion(meters).distance_error_m + 0.025
    assert np.abs(true_m - local_m).max() < allowed
    types = [f["geometry"]["type"] for f in doc["features"][3:]]
    assert types == ["Polygon", "Polygon", "LineString", "LineString"]
    assert doc["features"][5]["geometry"]["coordinates"][2][2] == pytest.approx(35.0)
    # The export reads back as a site: its meters as installed ones, within the rounding.
    layer = read_geojson(path, frame)
    back = np.array([m.coords_m[0] for m in layer.installed])
    assert np.abs(back - meters[:, :2]).max() < 0.012
    regions = [(r.name, r.kind) for r in layer.regions]
    assert regions == [("field", "polygon")] + [("wall", "segment")] * 4 + [("fence", "segment")]
    assert layer.keepouts[0].name == "bund"
    assert layer.regions[-1].height_m == 1.0  # a flat shape: height above the ground
    wall_z = np.concatenate([r.coords_m[:, 2] for r in layer.regions[1:5]])
    assert sorted(set(np.round(wall_z, 3))) == [0.0, 5.0]  # a wall keeps its heights
    assert not list(tmp_path.glob(".*"))  # no temporary left behind


def test_antimeridian_cut(tmp_path):
    frame = Frame(179.99, -17.0)  # a fictional site across the date line
    square = np.array([[-5000.0, -5000, 0], [5000, -5000, 0], [5000, 5000, 0], [-5000, 5000, 0]])
    _, doc = _layout(frame, tmp_path, [MapShape("region", "pad", "polygon", square)], square[:1])
    check_rfc7946(doc)
    geom = doc["features"][1]["geometry"]
    assert geom["type"] == "MultiPolygon" and len(geom["coordinates"]) == 2
    # The two pieces' ellipsoidal area adds up to the square's 1e8 m² (to the distortion).
    area = sum(
        GEOD.polygon_area_perimeter(*np.array(poly[0])[:, :2].T)[0] for poly in geom["coordinates"]
    )
    assert area == pytest.approx(1e8, rel=1e-4)


def test_write_refuses_to_overwrite(tmp_path):
    doc = {"type": "FeatureCollection", "features": []}
    path = write_geojson(tmp_path / "a.geojson", doc)
    with pytest.raises(InputError) as info:
        write_geojson(path, doc)
    assert str(info.value) == (
        f"{path} exists; pass --force to overwrite it, or choose another name."
    )
    write_geojson(path, doc, force=True)
    with pytest.raises(InputError, match="does not exist or is not a folder"):
        write_geojson(tmp_path / "missing" / "a.geojson", doc)
