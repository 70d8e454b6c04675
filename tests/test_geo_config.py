"""Sites given on a map: ``[frame]``, ``position_lonlat`` and ``[[region]] kind = "geojson"`` in
the config, and the map and lon/lat columns a result writes back (``show --geojson``,
``show --layout-csv``). Distances are checked against pyproj's geodesics (Karney, Algorithms for
geodesics, J. Geodesy 2013) and the written GeoJSON against the rules of RFC 7946."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pyproj
import pytest
from geojson_rules import check_rfc7946
from sites import site_mapping, write_site

import probeplan as pp
from probeplan.cli import main
from probeplan.config import config_from_mapping, load_config
from probeplan.errors import InputError
from probeplan.geo import Frame
from probeplan.store import read_result

GEOD = pyproj.Geod(ellps="WGS84")
ORIGIN = (-31.5, 44.5)  # open ocean: a fictional site
FRAME = {"origin_lon_deg": ORIGIN[0], "origin_lat_deg": ORIGIN[1]}
F = Frame(*ORIGIN)


def _lonlat(x: float, y: float) -> list[float]:
    lon, lat, _ = F.to_lonlat(np.array([[x, y, 0.0]]))
    return [float(lon[0]), float(lat[0])]


def _ring(corners) -> list:
    ring = [_lonlat(x, y) for x, y in corners]
    return ring + ring[:1]


def _site_file(folder: Path) -> Path:
    features = [
        {
            "type": "Feature",
            "properties": {"role": "region", "name": "field", "height_m": 1.5, "layer": "a"},
            "geometry": {
                "type": "Polygon",
                "coordinates": [
                    _ring([(-2000, -2000), (2000, -2000), (2000, 2000), (-2000, 2000)])
                ],
            },
        },
        {
            "type": "Feature",
            "properties": {"role": "structure", "name": "tank", "height_m": 12.0, "layer": "a"},
            "geometry": {
                "type": "Polygon",
                "coordinates": [_ring([(-100, -100), (100, -100), (100, 100), (-100, 100)])],
            },
        },
        {
            "type": "Feature",
            "properties": {"role": "installed", "name": "gate", "height_m": 2.0, "layer": "a"},
            "geometry": {"type": "Point", "coordinates": _lonlat(-1500.0, -1500.0)},
        },
        {
            "type": "Feature",
            "properties": {"role": "region", "name": "far field", "height_m": 0.0, "layer": "b"},
            "geometry": {
                "type": "Polygon",
                "coordinates": [_ring([(5000, 5000), (6000, 5000), (6000, 6000)])],
            },
        },
    ]
    path = folder / "site.geojson"
    path.write_text(json.dumps({"type": "FeatureCollection", "features": features}))
    return path


MAP_REGION = {"kind": "geojson", "path": "site.geojson", "filter": {"layer": "a"}}


def test_frame_lonlat_and_geojson_become_local_metres(tmp_path):
    _site_file(tmp_path)
    config = config_from_mapping(
        site_mapping(
            frame=FRAME,
            region=[MAP_REGION],
            probes={"installed": [{"name": "mast", "position_lonlat": [*_lonlat(300, 400), 3]}]},
        ),
        str(tmp_path / "c.toml"),
    )
    assert config.frame == F
    (field,), (tank,) = config.regions, config.keepouts
    assert field.name == "field" and field.z_m == 1.5  # height above the ground (z = 0)
    assert tank.name == "tank" and tank.is_footprint  # a structure's footprint stays a keep-out
    (prism,) = config.structures  # and the structure itself is a conductor
    assert prism.name == "tank" and prism.kind == "mesh" and not prism.floating
    mast, gate = config.installed
    assert mast.position_m == pytest.approx((300.0, 400.0, 3.0), abs=1e-6)
    assert gate.name == "gate" and gate.position_m == pytest.approx((-1500, -1500, 2), abs=1e-6)
    # The field's side against the geodesic between its corners.
    corners = np.array(field.outline_m())
    lon, lat, _ = F.to_lonlat(corners)
    _, _, side = GEOD.inv(lon[0], lat[0], lon[1], lat[1])
    assert side == pytest.approx(np.hypot(*(corners[1, :2] - corners[0, :2])), abs=1e-3)


@pytest.mark.parametrize(
    "overrides, message",
    [
        (
            dict(frame={"origin_lon_deg": 0.0, "origin_lat_deg": 95.0}),
            "c.toml: frame `origin_lat_deg` must be between -90 and 90 degrees north (a pole has "
            "no east or north); got 95.0.",
        ),
        (
            dict(probes={"installed": [{"position_lonlat": [1.0, 2.0]}]}),
            "c.toml: `probes.installed[0].position_lonlat` needs a [frame] table (origin_lon_deg, "
            "origin_lat_deg) to turn longitude and latitude into metres; add one, or give the "
            "position in metres.",
        ),
        (
            dict(frame=FRAME, probes={"installed": [{"position_lonlat": [-31.5, 46.0]}]}),
            "c.toml: `probes.installed[0].position_lonlat` = [-31.5, 46.0]: it is "
            f"{GEOD.inv(-31.5, 44.5, -31.5, 46.0)[2] / 1000:.1f} km from the frame origin; the "
            "frame at (lon, lat) = (-31.5, 44.5) is stated accurate within 150 km of its origin; "
            "move the origin nearer the site.",
        ),
        (
            dict(
                frame=FRAME,
                probes={"installed": [{"position_lonlat": [-31.5, 44.5], "position_m": [0, 0, 0]}]},
            ),
            "c.toml: probes.installed[0]: give `position_m` (local metres) or `position_lonlat` "
            "([longitude, latitude] or [longitude, latitude, height above the ground] (deg, deg, "
            "m)), not both.",
        ),
        (
            dict(region=[MAP_REGION]),
            "c.toml: region[0]: a GeoJSON site needs a [frame] table (origin_lon_deg, "
            "origin_lat_deg) near the site, to turn longitude and latitude into metres.",
        ),
        (
            dict(frame=FRAME, region=[{**MAP_REGION, "filter": "a"}]),
            "c.toml: `region[0].filter` must be a table of one property and its value, e.g. "
            'filter = { site = "north" }; got "a".',
        ),
    ],
)
def test_config_refusals(tmp_path, overrides, message):
    _site_file(tmp_path)
    with pytest.raises(InputError) as info:
        config_from_mapping(site_mapping(**overrides), str(tmp_path / "c.toml"))
    assert str(info.value) == str(tmp_path / message)


def test_a_map_region_without_a_height_names_the_feature(tmp_path):
    path = _site_file(tmp_path)
    doc = json.loads(path.read_text())
    del doc["features"][0]["properties"]["height_m"]
    path.write_text(json.dumps(doc))
    with pytest.raises(InputError) as info:
        config_from_mapping(
            site_mapping(frame=FRAME, region=[MAP_REGION]), str(tmp_path / "c.toml")
        )
    assert str(info.value) == (
        f"{tmp_path / 'c.toml'}: {tmp_path / 'site.geojson'}: feature 0 ('field'): no mounting "
        "height; give the feature a property `height_m` (above the ground, m) or "
        "`region[0].z_m` (the mounting height in metres)."
    )


def test_show_writes_the_map_and_lonlat_columns(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    _site_file(tmp_path)
    spacing_m = 1000.0
    write_site(
        "c.toml",
        frame=FRAME,
        region=[MAP_REGION],
        probes={"count": 3, "min_spacing_m": spacing_m},
    )
    layout = "x_m,y_m,z_m\n1800.123456,0,1.5\n-1800,1200.5,1.5\n0,-1900.987654,1.5\n"
    Path("layout.csv").write_text(layout)
    assert main(["score", "c.toml", "--layout", "layout.csv", "--out", "r.h5"]) == 0
    result = read_result("r.h5")
    assert result.frame == F
    assert main(["show", "r.h5", "--geojson", "map.geojson", "--layout-csv", "out.csv"]) == 0
    doc = json.loads(Path("map.geojson").read_text())
    check_rfc7946(doc)
    meters = [f for f in doc["features"] if f["geometry"]["type"] == "Point"]
    assert [m["properties"]["kind"] for m in meters] == ["installed", "new", "new", "new"]
    assert [m["properties"]["name"] for m in meters][0] == "gate"
    roles = [f["properties"]["role"] for f in doc["features"][4:]]
    assert roles == ["region", "keepout"]
    # Distances between the exported meters on the ellipsoid: the local ones, to the frame's
    # stated error plus the 7-decimal rounding; the spacing rule holds on the ellipsoid too.
    lonlat = np.array([m["geometry"]["coordinates"] for m in meters])
    i, j = np.triu_indices(len(lonlat), 1)
    _, _, true_m = GEOD.inv(lonlat[i, 0], lonlat[i, 1], lonlat[j, 0], lonlat[j, 1])
    p = result.score.positions_m
    local_m = np.hypot(*(p[i, :2] - p[j, :2]).T)
    assert np.abs(true_m - local_m).max() < F.distortion(p).distance_error_m + 0.025
    assert true_m.min() >= spacing_m - 0.025
    # The CSV for installers: centimetres, and lon/lat beside them.
    rows = list(csv.DictReader(Path("out.csv").read_text().splitlines()[1:]))
    assert [r["x_m"] for r in rows] == ["1800.12", "-1800.0", "0.0"]
    assert [r["y_m"] for r in rows] == ["0.0", "1200.5", "-1900.99"]
    lon, lat, _ = F.to_lonlat(p[1:])
    assert [float(r["lon_deg"]) for r in rows] == pytest.approx(lon, abs=5e-8)
    assert [float(r["lat_deg"]) for r in rows] == pytest.approx(lat, abs=5e-8)


def test_show_geojson_needs_a_frame(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    write_site("c.toml", probes={"count": 1})
    Path("layout.csv").write_text("x_m,y_m,z_m\n10,20,0\n")
    assert main(["score", "c.toml", "--layout", "layout.csv", "--out", "r.h5"]) == 0
    capsys.readouterr()
    assert main(["show", "r.h5", "--geojson", "map.geojson"]) == 2
    err = capsys.readouterr().err
    assert "r.h5: the result has no [frame], so --geojson has no longitude or latitude" in err
    assert not Path("map.geojson").exists()


def test_small_sites_round_to_the_millimetre(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    write_site(
        "c.toml",
        frame=FRAME,
        probes={"count": 2},
        region=[{"kind": "rectangle", "min_m": [-40, -40], "max_m": [40, 40], "z_m": 0.0}],
    )
    Path("layout.csv").write_text("x_m,y_m,z_m\n10.123456,-20.98765,0\n30,5.5,0\n")
    assert main(["score", "c.toml", "--layout", "layout.csv", "--out", "r.h5"]) == 0
    assert main(["show", "r.h5", "--layout-csv", "out.csv"]) == 0
    rows = list(csv.DictReader(Path("out.csv").read_text().splitlines()[1:]))
    assert (rows[0]["x_m"], rows[0]["y_m"]) == ("10.123", "-20.988")
    assert len(rows[0]["lat_deg"].split(".")[1]) <= 8


def test_the_fictional_example_loads():
    root = Path(__file__).resolve().parents[1] / "configs" / "coastal_map_site.toml"
    c = load_config(root)
    assert c.frame is not None and len(c.regions) == 1 and len(c.keepouts) == 2
    assert [p.name for p in c.installed] == ["north mast", "gatehouse"]


def test_a_source_centre_by_longitude_and_latitude(tmp_path):
    source = {
        "kind": "point",
        "charge_c": -20.0,
        "center_lonlat": [*_lonlat(300.0, 400.0), 7000.0],
        "estimate": ["charge", "x", "y", "z"],
    }
    config = config_from_mapping(site_mapping(frame=FRAME, source=[source]), "c.toml")
    assert config.sources[0].source.center_m == pytest.approx((300.0, 400.0, 7000.0), abs=1e-6)


def test_map_furniture_on_a_site_with_a_frame(tmp_path):
    import matplotlib.pyplot as plt
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    from probeplan import plots

    _site_file(tmp_path)
    config = config_from_mapping(
        site_mapping(frame=FRAME, region=[MAP_REGION]), str(tmp_path / "c.toml")
    )
    assert plots._scale(0.0, 0.0, 500.0, 500.0, config) == (1000.0, "km")  # km on a map
    fig, ax = plt.subplots()
    ax.set_xlim(-3.0, 3.0)
    ax.set_ylim(-3.0, 3.0)
    pos = np.array([[-1500.0, -1500.0, 2.0], [100.0, 200.0, 0.0]])
    plots._axis_labels(ax, config, "km")
    plots._map_furniture(ax)
    # The names of meters and keep-outs are on every map, drawn with them.
    plots._draw_probes(ax, pos, np.array([True, False]), 1000.0, ("gate", "new-0"))
    plots._draw_keepouts(ax, config.keepouts, 1000.0)
    texts = [t.get_text().split("\n")[0] for t in ax.texts]  # a meter's height follows
    assert {"N", "gate", "new-0", "tank"} <= set(texts)
    (bar,) = [a for a in ax.artists if isinstance(a, AnchoredSizeBar)]
    assert bar.txt_label.get_text() == "1 km"  # a fifth of 6 km, rounded down to 1-2-5
    assert ax.get_xlabel() == "east of the frame origin (km)"
    plt.close(fig)


def _structure_file(folder: Path, **props) -> None:
    """A 2 m square footprint centred on the origin, 2 m high."""
    feature = {
        "type": "Feature",
        "properties": {"role": "structure", "name": "hut", "height_m": 2.0, **props},
        "geometry": {
            "type": "Polygon",
            "coordinates": [_ring([(-1, -1), (1, -1), (1, 1), (-1, 1)])],
        },
    }
    region = {
        "type": "Feature",
        "properties": {"role": "region", "name": "yard", "height_m": 1.0},
        "geometry": {"type": "Polygon", "coordinates": [_ring([(3, 3), (9, 3), (9, 9), (3, 9)])]},
    }
    text = json.dumps({"type": "FeatureCollection", "features": [feature, region]})
    (folder / "site.geojson").write_text(text)


def test_a_structure_footprint_is_a_prism_reading_like_the_same_box(tmp_path):
    _structure_file(tmp_path, mesh_size_m=0.5)
    region = {"kind": "geojson", "path": "site.geojson"}
    config = config_from_mapping(
        site_mapping(frame=FRAME, region=[region]), str(tmp_path / "c.toml")
    )
    (prism,) = config.structures
    box = pp.Conductor.box((-1, -1, 0), (1, 1, 2), mesh_size_m=0.5)
    charge = pp.PointCharge(1e-9, (4.0, 1.0, 3.0))
    pts = np.array([[3, 0, 1], [0, 3, 2.5], [2, 2, 0.5], [0, 0, 4]], dtype=float)
    bg = (0.0, 0.0, -100.0)
    got = pp.field(charge, pts, 0.0, conductors=[prism], background_v_per_m=bg)
    want = pp.field(charge, pts, 0.0, conductors=[box], background_v_per_m=bg)
    bare = pp.field(charge, pts, 0.0, background_v_per_m=bg)
    # The same grounded solid, meshed two ways, reads the same to the mesh accuracy (1 % of
    # the largest component: common practice for panel sizes of a quarter of the body), while
    # the structure itself changes the field by far more than that.
    scale = np.abs(want).max()
    np.testing.assert_allclose(got, want, atol=0.01 * scale)
    assert np.abs(want - bare).max() > 0.2 * scale


def test_a_floating_structure_feature_keeps_its_charge(tmp_path):
    _structure_file(tmp_path, floating=True, charge_c=1e-9)
    region = {"kind": "geojson", "path": "site.geojson"}
    config = config_from_mapping(
        site_mapping(frame=FRAME, region=[region]), str(tmp_path / "c.toml")
    )
    (prism,) = config.structures
    assert prism.floating and prism.charge_c == 1e-9


def test_a_grounded_structure_feature_with_a_charge_is_refused(tmp_path):
    _structure_file(tmp_path, charge_c=1e-9)
    region = {"kind": "geojson", "path": "site.geojson"}
    with pytest.raises(InputError, match="`charge_c` needs property `floating` = true"):
        config_from_mapping(site_mapping(frame=FRAME, region=[region]), str(tmp_path / "c.toml"))
