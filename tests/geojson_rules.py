"""The rules of RFC 7946 a GeoJSON writer must keep, checked by hand: §3.1.1 positions are
longitude before latitude (and an optional height); §3.1.6 linear rings are closed, have at
least four positions, and exterior rings run counter-clockwise (the shoelace sign); §4 no
`crs` member. Shared by the geo and CLI tests."""

from __future__ import annotations

import numpy as np


def _positions(geom) -> list:
    """Every position of a geometry, flattened."""
    c = geom["coordinates"]
    depth = {"Point": 0, "MultiPoint": 1, "LineString": 1, "Polygon": 2, "MultiPolygon": 3}
    out = [c]
    for _ in range(depth[geom["type"]]):
        out = [q for p in out for q in p]
    return out


def _outer_rings(geom) -> list:
    if geom["type"] == "Polygon":
        return [geom["coordinates"][0]]
    if geom["type"] == "MultiPolygon":
        return [poly[0] for poly in geom["coordinates"]]
    return []


def _shoelace(ring) -> float:
    """Twice the signed area of a closed ring in (lon, lat); > 0 is counter-clockwise."""
    a = np.asarray(ring)[:, :2]
    return float(np.sum(a[:-1, 0] * a[1:, 1] - a[1:, 0] * a[:-1, 1]))


def check_rfc7946(doc: dict) -> None:
    """The RFC 7946 rules a writer must keep (sections named in the module docstring)."""
    assert doc["type"] == "FeatureCollection" and "crs" not in doc
    for feat in doc["features"]:
        assert feat["type"] == "Feature" and "crs" not in feat and "crs" not in feat["geometry"]
        for pos in _positions(feat["geometry"]):
            assert len(pos) in (2, 3)
            assert -180.0 <= pos[0] <= 180.0 and -90.0 <= pos[1] <= 90.0  # lon first
            assert all(round(v, 7) == v for v in pos[:2])  # 7 decimals
        for ring in _outer_rings(feat["geometry"]):
            assert len(ring) >= 4 and ring[0] == ring[-1]
            assert _shoelace(ring) > 0.0
