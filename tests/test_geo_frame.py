"""The WGS84 frame against an outside reference: pyproj's geodesics (Karney's algorithm,
C. F. F. Karney, Algorithms for geodesics, J. Geodesy 87, 43-55, 2013), which are accurate to
about 15 nm, far below the millimetre checked here."""

from __future__ import annotations

import numpy as np
import pyproj
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from probeplan.errors import InputError
from probeplan.geo import ACCURACY_RADIUS_M, Frame, rounding_for, site_extent_m

GEOD = pyproj.Geod(ellps="WGS84")

# Origins at several latitudes, both hemispheres, up to a high latitude, one by the antimeridian.
ORIGINS = [(0.0, 0.0), (-73.5, 40.7), (151.2, -33.9), (18.9, 69.6), (-45.0, 84.0), (179.9, -17.8)]


def _square(half_m: float, n: int = 9) -> np.ndarray:
    """An n × n grid of local points over a square of side 2·half_m, at heights 0..50 m."""
    u = np.linspace(-half_m, half_m, n)
    x, y = np.meshgrid(u, u)
    z = np.linspace(0.0, 50.0, x.size)
    return np.column_stack([x.ravel(), y.ravel(), z])


@pytest.mark.parametrize("origin", ORIGINS)
@pytest.mark.parametrize("half_m", [50.0, 5_000.0, 100_000.0])  # extents 100 m to 200 km
def test_round_trip_within_a_millimetre(origin, half_m):
    frame = Frame(*origin, origin_height_m=12.5)
    local = _square(half_m)
    lon, lat, h = frame.to_lonlat(local)
    back = frame.to_local(lon, lat, h)
    assert np.abs(back - local).max() < 1e-3
    # and lon/lat → local → lon/lat, measured on the ellipsoid
    lon2, lat2, h2 = frame.to_lonlat(back)
    _, _, moved_m = GEOD.inv(lon, lat, lon2, lat2)
    assert np.max(moved_m) < 1e-3
    assert np.abs(h2 - h).max() < 1e-3
    assert np.all(np.abs(lon) <= 180.0)


@pytest.mark.parametrize("origin", ORIGINS)
def test_distance_and_azimuth_from_the_origin_are_geodesic(origin):
    # Distances and azimuths from the centre are true in the azimuthal equidistant projection
    # (Snyder, Map Projections: A Working Manual, USGS PP 1395, 1987); Geod.inv is the reference.
    frame = Frame(*origin)
    local = _square(60_000.0, 7)
    lon, lat, _ = frame.to_lonlat(local)
    az, _, dist = GEOD.inv(np.full(len(lon), origin[0]), np.full(len(lon), origin[1]), lon, lat)
    assert np.abs(dist - np.hypot(local[:, 0], local[:, 1])).max() < 1e-3
    away = dist > 1.0
    map_az = np.degrees(np.arctan2(local[away, 0], local[away, 1]))
    diff = (map_az - az[away] + 180.0) % 360.0 - 180.0
    assert np.abs(diff).max() < 1e-7


@pytest.mark.parametrize("origin", ORIGINS)
def test_east_and_north_axes_by_geodesic_azimuth(origin):
    frame = Frame(*origin)
    lon, lat, _ = frame.to_lonlat(np.array([[1000.0, 0.0, 0.0], [0.0, 1000.0, 0.0]]))
    az, _, dist = GEOD.inv([origin[0]] * 2, [origin[1]] * 2, lon, lat)
    assert az[0] == pytest.approx(90.0, abs=1e-9)  # x is east
    assert az[1] == pytest.approx(0.0, abs=1e-9)  # y is north
    assert dist == pytest.approx([1000.0, 1000.0], abs=1e-6)


@pytest.mark.parametrize("origin", ORIGINS)
def test_distances_between_points_within_the_stated_error(origin):
    frame = Frame(*origin)
    rng = np.random.default_rng(7)
    local = np.column_stack([rng.uniform(-90e3, 90e3, (400, 2)), np.zeros(400)])
    d = frame.distortion(local)
    lon, lat, _ = frame.to_lonlat(local)
    i, j = rng.integers(0, 400, (2, 2000))
    _, _, true_m = GEOD.inv(lon[i], lat[i], lon[j], lat[j])
    map_m = np.hypot(*(local[i, :2] - local[j, :2]).T)
    err = np.abs(map_m - true_m)
    assert err.max() <= d.distance_error_m
    assert (err / np.maximum(true_m, 1.0)).max() <= d.scale_error * (1 + 1e-9)
    # the bound is not loose by orders of magnitude
    assert err.max() > 0.05 * d.distance_error_m


def test_scale_error_follows_the_spherical_formula_and_the_accuracy_radius():
    # On a sphere the azimuthal equidistant scale across the radius is c/sin(c), c = rho/R
    # (Snyder, Map Projections: A Working Manual, 1987, azimuthal equidistant chapter; from
    # memory), about 1 + rho²/(6R²); the ellipsoid changes it by < 1 %. PROJ's Tissot factors
    # are numerical derivatives good to ~2e-8, hence the absolute tolerance.
    frame = Frame(10.0, 45.0)
    R = 6_371_008.8  # IUGG mean Earth radius, m (from memory)
    for rho in (1_000.0, 20_000.0, 60_000.0, ACCURACY_RADIUS_M):
        d = frame.distortion(np.array([[rho, 0.0], [-rho, 0.0]]))
        sphere = rho / (R * np.sin(rho / R)) - 1.0
        assert d.scale_error == pytest.approx(sphere, rel=0.01, abs=3e-8)
        assert d.distance_error_m == pytest.approx(d.scale_error * 2 * rho)
    assert frame.distortion(np.array([[ACCURACY_RADIUS_M, 0.0]])).scale_error < 1e-4


def test_ground_drop_matches_the_tangent_plane_by_ecef():
    # The flat model leaves out the curvature: the ellipsoid at 10 km falls d²/(2R) below the
    # tangent plane. Reference: pyproj's geodetic → Earth-centred conversion (EPSG:4979 →
    # EPSG:4978) rotated into the textbook east-north-up frame at the origin.
    lon0, lat0 = 24.0, 61.0
    frame = Frame(lon0, lat0)
    to_ecef = pyproj.Transformer.from_crs("EPSG:4979", "EPSG:4978", always_xy=True)
    lon, lat, _ = frame.to_lonlat(np.array([[10_000.0, 0.0, 0.0]]))
    p = np.array(to_ecef.transform(lon[0], lat[0], 0.0))
    p0 = np.array(to_ecef.transform(lon0, lat0, 0.0))
    lam, phi = np.radians([lon0, lat0])
    up = np.array([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam), np.sin(phi)])
    drop = -float(up @ (p - p0))
    d = frame.distortion(np.array([[10_000.0, 0.0]]))
    assert d.ground_drop_m == pytest.approx(drop, rel=0.01)


def test_seven_decimals_of_a_degree_are_about_a_centimetre():
    # The rounding promise: 1e-7 degree of latitude ≈ 1.1 cm, of longitude less (Geod.inv).
    _, _, dlat = GEOD.inv(5.0, 45.0, 5.0, 45.0 + 1e-7)
    _, _, dlon = GEOD.inv(5.0, 0.0, 5.0 + 1e-7, 0.0)
    assert 0.010 < dlat < 0.0112 and dlon < 0.0112
    assert rounding_for(99.99).decimals_m == 3 and rounding_for(99.99).decimals_deg == 8
    assert rounding_for(100.0).decimals_m == 2 and rounding_for(100.0).decimals_deg == 7


def test_rounding_for_people():
    small, big = rounding_for(40.0), rounding_for(13_406.0)
    assert big.metres([13406.356024918538, -0.004]).tolist() == [13406.36, 0.0]
    assert str(big.metres(-0.004)) == "0.0"  # no negative zero in a file for installers
    assert small.metres(1.23456).tolist() == 1.235
    assert small.degrees(10.123456789).tolist() == 10.12345679
    assert site_extent_m(np.array([[0.0, 0.0, 5.0], [30.0, -80.0, 0.0]])) == 80.0
    assert site_extent_m(np.empty((0, 3))) == 0.0


@pytest.mark.parametrize(
    "kwargs, message",
    [
        (
            dict(origin_lon_deg=10.0, origin_lat_deg=95.0),
            "frame `origin_lat_deg` must be between -90 and 90 degrees north (a pole has no "
            "east or north); got 95.0.",
        ),
        (
            dict(origin_lon_deg=10.0, origin_lat_deg=-90.0),
            "frame `origin_lat_deg` must be between -90 and 90 degrees north (a pole has no "
            "east or north); got -90.0.",
        ),
        (
            dict(origin_lon_deg=180.5, origin_lat_deg=0.0),
            "frame `origin_lon_deg` must be in [-180, 180] degrees east; got 180.5.",
        ),
        (
            dict(origin_lon_deg=float("nan"), origin_lat_deg=0.0),
            "frame `origin_lon_deg` must be a finite number; got nan.",
        ),
        (
            dict(origin_lon_deg=0.0, origin_lat_deg=0.0, origin_height_m=float("inf")),
            "frame `origin_height_m` must be a finite number; got inf.",
        ),
        (
            dict(origin_lon_deg="10", origin_lat_deg=0.0),
            "frame `origin_lon_deg` must be a number; got '10'.",
        ),
    ],
)
def test_frame_refusals(kwargs, message):
    with pytest.raises(InputError) as info:
        Frame(**kwargs)
    assert str(info.value) == message


ORIGIN_TEXT = (
    "the frame at (lon, lat) = (10.0, 60.0) is stated accurate within 150 km of its origin; "
    "move the origin nearer the site"
)


@pytest.mark.parametrize(
    "lon, lat, message",
    [
        (
            [10.0, 10.1],
            [60.0, 91.0],
            "point 1 (lon, lat) = (10.1, 91.0): latitude 91.0 is beyond ±90 degrees.",
        ),
        (
            [-181.0],
            [60.0],
            "point 0 (lon, lat) = (-181.0, 60.0): longitude -181.0 is beyond ±180 degrees.",
        ),
        (
            [10.0, np.nan],
            [60.0, 60.0],
            "point 1 (lon, lat) = (nan, 60.0): a coordinate is not a finite number.",
        ),
        (
            [10.0, 13.0],
            [60.0, 60.0],
            "point 1 (lon, lat) = (13.0, 60.0): it is "
            f"{GEOD.inv(10.0, 60.0, 13.0, 60.0)[2] / 1000:.1f} km from the "
            f"frame origin; {ORIGIN_TEXT}.",
        ),
    ],
)
def test_to_local_refusals(lon, lat, message):
    with pytest.raises(InputError) as info:
        Frame(10.0, 60.0).to_local(lon, lat)
    assert str(info.value) == message


def test_to_lonlat_refusals():
    frame = Frame(10.0, 60.0)
    with pytest.raises(InputError) as info:
        frame.to_lonlat(np.array([[0.0, 0.0, 0.0], [0.0, 160_000.0, 0.0]]))
    assert str(info.value) == (
        f"point 1 = [0.0, 160000.0, 0.0] m is 160.0 km from the frame origin; {ORIGIN_TEXT}."
    )
    with pytest.raises(InputError, match=r"^point 0 = \[nan, 0.0, 0.0\] is not finite\.$"):
        frame.to_lonlat(np.array([[np.nan, 0.0, 0.0]]))
    with pytest.raises(InputError, match=r"must have shape \(n_points, 3\); got \(2,\)"):
        frame.to_lonlat(np.array([1.0, 2.0]))


@settings(max_examples=40, deadline=None)
@given(
    lon0=st.floats(-180.0, 180.0),
    lat0=st.floats(-89.5, 89.5),
    r=st.floats(0.0, 140_000.0),
    az=st.floats(0.0, 360.0),
    h=st.floats(-400.0, 9_000.0),
)
def test_round_trip_anywhere(lon0, lat0, r, az, h):
    # A point placed on the ellipsoid by the direct geodesic problem (Geod.fwd) lands at the
    # geodesic distance and azimuth in the frame, and converts back within a millimetre.
    frame = Frame(lon0, lat0)
    lon, lat, _ = GEOD.fwd(lon0, lat0, az, r)
    p = frame.to_local([lon], [lat], [h])
    assert np.hypot(p[0, 0], p[0, 1]) == pytest.approx(r, abs=1e-3)
    assert p[0, 2] == pytest.approx(h, abs=1e-9)
    lon2, lat2, h2 = frame.to_lonlat(p)
    assert GEOD.inv(lon, lat, lon2[0], lat2[0])[2] < 1e-3
