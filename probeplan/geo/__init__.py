"""Sites on a map: the WGS84 frame of a site and GeoJSON in and out.

A boundary module, like the config: it imports only :mod:`probeplan.errors`, and the config
uses it to turn longitudes and latitudes into the local metre frame every other stage works in.

* :mod:`.frame`: :class:`Frame` (origin, ``to_local``, ``to_lonlat``, ``distortion``) and the
  rounding of positions for people.
* :mod:`.geojson`: :func:`read_geojson` (site features → local metres) and
  :func:`layout_collection` / :func:`write_geojson` (a layout and its site → RFC 7946).
"""

from __future__ import annotations

from .frame import (
    ACCURACY_RADIUS_M,
    ACCURACY_SCALE_ERROR,
    Distortion,
    Frame,
    Rounding,
    rounding_for,
    site_extent_m,
)
from .geojson import (
    ROLES,
    MapFeature,
    MapLayer,
    MapShape,
    geojson_text,
    layout_collection,
    read_geojson,
    write_geojson,
)

__all__ = [
    "ACCURACY_RADIUS_M",
    "ACCURACY_SCALE_ERROR",
    "ROLES",
    "Distortion",
    "Frame",
    "MapFeature",
    "MapLayer",
    "MapShape",
    "geojson_text",
    "Rounding",
    "layout_collection",
    "read_geojson",
    "rounding_for",
    "site_extent_m",
    "write_geojson",
]
