"""GeoJSON (RFC 7946) in and out: site features read into local metres, layouts written back.

Read: a FeatureCollection whose features carry a property ``role``:

========== ========================= ===============================================
role       geometry                  becomes
========== ========================= ===============================================
region     Polygon, MultiPolygon     a mounting region (each part one region);
           LineString, MultiPoint    a LineString one segment per pair of positions,
                                     a MultiPoint a points region
keepout    as region                 a keep-out
structure  Polygon, MultiPolygon     a structure: a prism on its footprint, ``height_m`` > 0
installed  Point                     an installed meter: ``name``, ``component``, ``grade``
========== ========================= ===============================================

Positions are [longitude, latitude] or [longitude, latitude, height above the WGS84
ellipsoid] (RFC 7946 §3.1.1, §4). A property ``height_m`` is a height above the ground instead:
a meter's or a region's mounting height, a structure's height. What comes out is plain data in
the frame's local metres; the config turns it into regions, keep-outs and meters.

Write: every meter a Point with ``name``, ``kind`` ("installed" or "new"), ``component``,
``grade`` and ``height_m``; regions and keep-outs as Polygons with counter-clockwise outer rings
(the right-hand rule of RFC 7946 §3.1.6); longitude before latitude, 7 decimals (1.1 cm), no
``crs`` member; shapes that cross the antimeridian cut there (§3.1.9); written atomically.
"""

from __future__ import annotations

import json
import math
import os
import re
import tempfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np

from ..errors import InputError
from .frame import Frame

#: Feature roles a site file may use, and the geometry types each takes.
ROLES: dict[str, tuple[str, ...]] = {
    "region": ("Polygon", "MultiPolygon", "LineString", "MultiPoint"),
    "keepout": ("Polygon", "MultiPolygon", "LineString", "MultiPoint"),
    "structure": ("Polygon", "MultiPolygon"),
    "installed": ("Point",),
}

#: ``crs`` names that mean WGS84 longitude/latitude, as older (2008) GeoJSON files wrote them;
#: RFC 7946 dropped the member, and any other reference system is refused.
WGS84_CRS_NAMES = (
    "urn:ogc:def:crs:OGC:1.3:CRS84",
    "urn:ogc:def:crs:OGC::CRS84",
    "OGC:CRS84",
    "CRS84",
    "EPSG:4326",
    "urn:ogc:def:crs:EPSG::4326",
)

#: Decimals of longitude and latitude written: 1e-7 degree of latitude is 1.1 cm.
LONLAT_DECIMALS = 7
#: Decimals of heights written, m.
HEIGHT_DECIMALS = 3

_WHERE_XY = re.compile(r"\[\s*(\S+)\s+(\S+)\s*\]")


@dataclass(frozen=True, eq=False)
class MapFeature:
    """One site feature (one part of a MultiPolygon) in local metres.

    Attributes
    ----------
    index : int
        The feature's index in the file's ``features`` list.
    part : int
        The polygon's index within a MultiPolygon; 0 otherwise.
    name : str
        The property ``name``, else the feature's ``id``, else "".
    role : str
        One of :data:`ROLES`.
    kind : str
        "polygon" (a Polygon or one part of a MultiPolygon), "segment" (two consecutive
        positions of a LineString), "points" (a MultiPoint) or "point" (a Point).
    coords_m : (k, 2) or (k, 3) float
        A polygon's outer ring without its closing position, a segment's two ends, the points,
        or the point (k = 1), m: x east, y north, and z when the file gave heights (height
        above the ellipsoid minus the frame origin's height). Points and segments always have
        a height: z here or ``height_m``.
    height_m : float or None
        The property ``height_m``: height above the ground, m.
    properties : Mapping
        All the feature's properties, read-only, for the config to check.
    label : str
        "FILE: feature 3 ('mast A')", for messages about this feature.
    """

    index: int
    part: int
    name: str
    role: str
    kind: str
    coords_m: np.ndarray
    height_m: float | None
    properties: Mapping[str, Any]
    label: str


@dataclass(frozen=True)
class MapLayer:
    """The features of a site file, by role (each in file order)."""

    path: str
    regions: tuple[MapFeature, ...] = ()
    keepouts: tuple[MapFeature, ...] = ()
    structures: tuple[MapFeature, ...] = ()
    installed: tuple[MapFeature, ...] = ()

    def by_role(self, role: str) -> tuple[MapFeature, ...]:
        """The features of one role of :data:`ROLES`."""
        return {
            "region": self.regions,
            "keepout": self.keepouts,
            "structure": self.structures,
            "installed": self.installed,
        }[role]


# --------------------------------------------------------------------------------------------
# Read
# --------------------------------------------------------------------------------------------


def read_geojson(
    path: str | os.PathLike,
    frame: Frame,
    *,
    select: tuple[str, Any] | None = None,
    need: str | None = "region",
) -> MapLayer:
    """Read the site features of a GeoJSON file into the frame's local metres.

    Parameters
    ----------
    path : str or path-like
        A GeoJSON FeatureCollection (RFC 7946).
    frame : Frame
        The local frame; every position must lie within its accuracy radius.
    select : (str, value) or None
        Keep only the features whose property ``select[0]`` equals ``select[1]``; the others
        are not looked at.
    need : str or None
        A role of :data:`ROLES` at least one selected feature must have.

    Returns
    -------
    MapLayer

    Raises
    ------
    InputError
        Naming the file, the feature's index and name, what was found and what is allowed.
    """
    where = str(os.fspath(path))
    doc = _load_json(where)
    if not isinstance(doc, dict) or doc.get("type") != "FeatureCollection":
        found = doc.get("type") if isinstance(doc, dict) else type(doc).__name__
        raise InputError(
            f"{where}: the top level must be a GeoJSON FeatureCollection (RFC 7946 §3.3); got "
            f"{found!r}."
        )
    _check_crs(doc, where)
    features = doc.get("features")
    if not isinstance(features, list):
        raise InputError(
            f"{where}: `features` must be a list of Feature objects; got {features!r:.80}."
        )
    if not features:
        raise InputError(
            f"{where}: the FeatureCollection has no features; a site file needs at least one "
            f"feature with property `role` = {need or 'region'!r}."
        )
    chosen = _select(features, select, where)
    out: dict[str, list[MapFeature]] = {role: [] for role in ROLES}
    for k, feat in chosen:
        for item in _read_feature(feat, k, frame, where):
            out[item.role].append(item)
    if need is not None and not out[need]:
        picked = f" among the features with {select[0]} = {select[1]!r}" if select else ""
        raise InputError(
            f"{where}: no feature has property `role` = {need!r}{picked}; roles found: "
            f"{_list(sorted({f.role for v in out.values() for f in v}))}."
        )
    return MapLayer(
        path=where,
        regions=tuple(out["region"]),
        keepouts=tuple(out["keepout"]),
        structures=tuple(out["structure"]),
        installed=tuple(out["installed"]),
    )


def _load_json(where: str) -> Any:
    def no_constant(name: str) -> Any:
        raise InputError(f"{where}: {name} is not a JSON number (RFC 8259); write a number.")

    try:
        with open(where, encoding="utf-8") as fh:
            return json.load(fh, parse_constant=no_constant)
    except FileNotFoundError:
        raise InputError(f"{where}: no such file.") from None
    except IsADirectoryError:
        raise InputError(f"{where}: is a folder; give a GeoJSON file.") from None
    except UnicodeDecodeError:
        raise InputError(f"{where}: not UTF-8 text; GeoJSON is UTF-8 (RFC 7946 §1).") from None
    except json.JSONDecodeError as exc:
        raise InputError(
            f"{where}: not valid JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}."
        ) from None
    except OSError as exc:
        raise InputError(f"{where}: cannot read the file ({exc.strerror}).") from None


def _check_crs(obj: dict, where: str) -> None:
    if "crs" not in obj:
        return
    crs = obj["crs"]
    props = crs.get("properties") if isinstance(crs, dict) else None
    name = props.get("name") if isinstance(props, dict) else None
    if crs is None or (isinstance(name, str) and name.strip() in WGS84_CRS_NAMES):
        return
    raise InputError(
        f"{where}: a `crs` member {json.dumps(crs)} is not WGS84; RFC 7946 positions are WGS84 "
        f"longitude and latitude only (allowed `crs` names: {_list(WGS84_CRS_NAMES)}); "
        "reproject the file to WGS84 (EPSG:4326) first."
    )


def _select(features: list, select: tuple[str, Any] | None, where: str) -> list[tuple[int, Any]]:
    """The (index, feature) pairs the filter keeps."""
    if select is None:
        return list(enumerate(features))
    key, value = select
    kept, seen = [], set()
    for k, feat in enumerate(features):
        props = feat.get("properties") if isinstance(feat, dict) else None
        if isinstance(props, dict) and key in props:
            if props[key] == value:
                kept.append((k, feat))
            seen.add(json.dumps(props[key]))
    if not kept:
        found = f"values found: {', '.join(sorted(seen))}" if seen else "no feature has it"
        raise InputError(
            f"{where}: no feature has property {key!r} = {json.dumps(value)}; {found}."
        )
    return kept


def _read_feature(feat: Any, k: int, frame: Frame, where: str) -> list[MapFeature]:
    if not isinstance(feat, dict) or feat.get("type") != "Feature":
        raise InputError(
            f"{where}: feature {k} must be a GeoJSON Feature object; got {feat!r:.80}."
        )
    props = feat.get("properties")
    if props is None:
        props = {}
    name = props.get("name", feat.get("id", "")) if isinstance(props, dict) else ""
    label = f"{where}: feature {k}" + (f" ({name!r})" if name != "" else " (no name)")
    if not isinstance(props, dict):
        raise InputError(f"{label}: `properties` must be an object; got {props!r:.80}.")
    if not isinstance(name, str | int) or isinstance(name, bool):
        raise InputError(f"{label}: property `name` must be text; got {name!r}.")
    _check_crs(feat, label)
    role = props.get("role")
    if role not in ROLES:
        found = "no `role` property" if "role" not in props else f"`role` = {role!r}"
        raise InputError(f"{label} has {found}; allowed roles: {_list(ROLES)}.")
    geom = feat.get("geometry")
    gtype = geom.get("type") if isinstance(geom, dict) else None
    if gtype not in ROLES[role]:
        found = "no geometry" if geom is None else f"geometry {gtype!r}"
        raise InputError(
            f"{label} has {found}; a {role!r} feature must be a {' or '.join(ROLES[role])}."
        )
    _check_crs(geom, label)
    height = _height(props, role, label)
    common = dict(
        index=k,
        name=str(name),
        role=role,
        height_m=height,
        properties=MappingProxyType(dict(props)),
    )
    pieces = _GEOMETRY_READERS[gtype](geom.get("coordinates"), frame, label, height)
    return [
        MapFeature(part=j, kind=kind, coords_m=c, label=what, **common)
        for j, (kind, c, what) in enumerate(pieces)
    ]


def _read_points(
    coords: Any, frame: Frame, label: str, height: float | None, *, single: bool
) -> list:
    """A Point (an installed meter) or a MultiPoint (a points region)."""
    if not single and (not isinstance(coords, list) or not coords):
        raise InputError(f"{label}: a MultiPoint needs a list of positions; got {coords!r:.80}.")
    what = f"{label}: the Point" if single else f"{label}: the MultiPoint"
    pos = _positions([coords] if single else coords, frame, what)
    _one_height(pos, height, label)
    return [("point" if single else "points", pos, label)]


def _read_line(coords: Any, frame: Frame, label: str, height: float | None) -> list:
    """A LineString (a fence, a rail): one segment per pair of consecutive positions."""
    if not isinstance(coords, list) or len(coords) < 2:
        raise InputError(f"{label}: a LineString needs at least 2 positions; got {coords!r:.80}.")
    pos = _positions(coords, frame, f"{label}: the LineString")
    _one_height(pos, height, label)
    many = len(pos) > 2
    return [
        ("segment", pos[j : j + 2], f"{label} segment {j}" if many else label)
        for j in range(len(pos) - 1)
    ]


def _read_polygons(
    coords: Any, frame: Frame, label: str, height: float | None, *, multi: bool
) -> list:
    """A Polygon, or each part of a MultiPolygon, by its outer ring."""
    del height  # optional for outlines: a keep-out footprint has none
    if not isinstance(coords, list) or not coords:
        raise InputError(
            f"{label}: a Polygon or MultiPolygon needs coordinates; got {coords!r:.80}."
        )
    polygons = coords if multi else [coords]
    out = []
    for j, rings in enumerate(polygons):
        what = f"{label} part {j}" if multi else label
        out.append(("polygon", _outer_ring(rings, frame, what), what))
    return out


def _one_height(pos: np.ndarray, height: float | None, label: str) -> None:
    """A point or line needs exactly one height: in its coordinates or as ``height_m``."""
    if pos.shape[1] == 3 and height is not None:
        raise InputError(
            f"{label} gives both a height in its coordinates (above the WGS84 ellipsoid) "
            "and property `height_m` (above the ground); give one of them."
        )
    if pos.shape[1] == 2 and height is None:
        raise InputError(
            f"{label} has no height: give property `height_m` (the height above the ground, m) "
            "or a third coordinate (height above the WGS84 ellipsoid, m)."
        )


_GEOMETRY_READERS = {
    "Point": partial(_read_points, single=True),
    "MultiPoint": partial(_read_points, single=False),
    "LineString": _read_line,
    "Polygon": partial(_read_polygons, multi=False),
    "MultiPolygon": partial(_read_polygons, multi=True),
}


def _height(props: dict, role: str, label: str) -> float | None:
    if "height_m" not in props:
        if role == "structure":
            raise InputError(f"{label}: a structure needs property `height_m` (its height, m).")
        return None
    h = props["height_m"]
    if isinstance(h, bool) or not isinstance(h, int | float) or not math.isfinite(h):
        raise InputError(
            f"{label}: property `height_m` must be a finite number of metres; got {h!r}."
        )
    if h < 0 or (role == "structure" and h == 0):
        rule = "> 0" if role == "structure" else ">= 0 (above the ground)"
        raise InputError(f"{label}: property `height_m` must be {rule}; got {h!r}.")
    return float(h)


def _outer_ring(rings: Any, frame: Frame, what: str) -> np.ndarray:
    """The outer ring of one Polygon's coordinates, checked, in local metres, unclosed."""
    if not isinstance(rings, list) or not rings:
        raise InputError(f"{what}: a Polygon needs a list of linear rings; got {rings!r:.80}.")
    if len(rings) > 1:
        raise InputError(
            f"{what}: the polygon has {len(rings) - 1} hole(s) (interior rings), which are not "
            "supported; give a region's hole as a keep-out, and split a keep-out around its hole."
        )
    ring = rings[0]
    if not isinstance(ring, list) or len(ring) < 4:
        n = len(ring) if isinstance(ring, list) else ring
        raise InputError(
            f"{what}: a linear ring needs at least 4 positions, the last equal to the first "
            f"(RFC 7946 §3.1.6); got {n!r:.80}."
        )
    if ring[0] != ring[-1]:
        raise InputError(
            f"{what}: the ring does not close: first position {ring[0]!r}, last {ring[-1]!r}; "
            "RFC 7946 rings must end on their first position."
        )
    local = _positions(ring[:-1], frame, f"{what}: the ring")
    _check_simple(local, frame, what)
    return local


def _positions(positions: list, frame: Frame, what: str) -> np.ndarray:
    """Positions [lon, lat] or [lon, lat, h] → (k, 2) or (k, 3) local metres."""
    dims = set()
    for j, p in enumerate(positions):
        ok = isinstance(p, list) and len(p) in (2, 3)
        ok = ok and all(isinstance(v, int | float) and not isinstance(v, bool) for v in p)
        if not ok:
            raise InputError(
                f"{what}: position {j} must be [longitude, latitude] or [longitude, latitude, "
                f"height] in degrees and metres; got {p!r:.80}."
            )
        dims.add(len(p))
    if len(dims) > 1:
        raise InputError(
            f"{what} mixes positions with and without a height; give all or none a height."
        )
    a = np.asarray(positions, dtype=float)
    h = a[:, 2] if a.shape[1] == 3 else None
    problem = frame.check_lonlat(a[:, 0], a[:, 1], h)
    if problem is not None:
        j, reason = problem
        raise InputError(f"{what}: position {j} {positions[j]!r}: {reason}.")
    local = frame._to_local(
        a[:, 0], a[:, 1], np.full(len(a), frame.origin_height_m) if h is None else h
    )
    return local if h is not None else local[:, :2]


def _check_simple(local: np.ndarray, frame: Frame, what: str) -> None:
    import shapely
    from shapely.validation import explain_validity

    shape = shapely.Polygon(local[:, :2])
    if shape.is_valid and shape.area > 0.0:
        return
    reason = explain_validity(shape) if not shape.is_valid else "it has no area"
    near = ""
    m = _WHERE_XY.search(reason)
    if m:
        try:
            xy = np.array([[float(m.group(1)), float(m.group(2)), 0.0]])
            lon, lat, _ = frame._to_lonlat(xy)
            near = f" near (lon, lat) = ({lon[0]:.7f}, {lat[0]:.7f})"
            reason = _WHERE_XY.sub("", reason).strip()
        except ValueError:
            pass
    raise InputError(
        f"{what}: the polygon is not simple ({reason}{near}); a region, keep-out or structure "
        "outline must not cross or touch itself."
    )


# --------------------------------------------------------------------------------------------
# Write
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class MapShape:
    """A region, keep-out or structure outline to write.

    Attributes
    ----------
    role : str
        "region", "keepout" or "structure".
    name : str
    kind : str
        "polygon" (an outline), "segment" (two ends) or "points".
    outline_m : (k, 3) float
        Corners in order (not closed), the segment's ends, or the points, m.
    properties : Mapping
        Extra properties written with it.
    """

    role: str
    name: str
    kind: str
    outline_m: np.ndarray
    properties: Mapping[str, Any] = field(default_factory=dict)


def layout_collection(
    frame: Frame,
    positions_m,
    *,
    names: Sequence[str],
    installed,
    components: Sequence[str],
    grades: Sequence[str],
    ground_z_m: float | None = 0.0,
    shapes: Sequence[MapShape] = (),
) -> dict:
    """A layout and its site as a GeoJSON FeatureCollection (a dict ready for ``json``).

    Parameters
    ----------
    frame : Frame
    positions_m : (n_probes, 3) float
        Meter positions, m.
    names, components, grades : (n_probes,) str
        Per meter; "" for none.
    installed : (n_probes,) bool
        Installed (kept) meters; the rest are new.
    ground_z_m : float or None
        The ground's z, m; ``height_m`` is the height above it (above z = 0 in free space).
    shapes : sequence of MapShape
        Regions, keep-outs and structures.

    Returns
    -------
    dict
        Meters first (role "installed", ``kind`` "installed" or "new"), then the shapes; every
        feature carries ``role``, so the file reads back as a site with all meters installed.
    """
    p = np.asarray(positions_m, dtype=float).reshape(-1, 3)
    inst = np.asarray(installed, dtype=bool).reshape(-1)
    ground = 0.0 if ground_z_m is None else float(ground_z_m)
    lon, lat, _ = frame.to_lonlat(p)
    features = []
    for k in range(len(p)):
        props = {
            "role": "installed",
            "name": str(names[k]),
            "kind": "installed" if inst[k] else "new",
            "component": str(components[k]),
            "grade": str(grades[k]),
            "height_m": round(float(p[k, 2] - ground), HEIGHT_DECIMALS) + 0.0,
        }
        point = {"type": "Point", "coordinates": _lonlat_list(lon[k : k + 1], lat[k : k + 1])[0]}
        features.append({"type": "Feature", "geometry": point, "properties": props})
    for shape in shapes:
        features.append(_shape_feature(frame, shape, ground))
    return {"type": "FeatureCollection", "features": features}


def write_geojson(path: str | os.PathLike, collection: dict, *, force: bool = False) -> Path:
    """Write a FeatureCollection atomically (a temporary file beside it, then a rename).

    Raises
    ------
    InputError
        The file exists (without ``force``), the folder is missing, or the file cannot be
        written there.
    """
    target = Path(os.fspath(path))
    if target.exists() and not force:
        raise InputError(f"{target} exists; pass --force to overwrite it, or choose another name.")
    if target.is_dir() or not target.parent.is_dir():
        raise InputError(f"{target}: the folder {target.parent} does not exist or is not a folder.")
    text = geojson_text(collection)
    tmp = None
    try:
        with tempfile.NamedTemporaryFile(
            "w", encoding="utf-8", dir=target.parent, prefix=f".{target.name}.", delete=False
        ) as fh:
            tmp = Path(fh.name)
            fh.write(text)
        os.replace(tmp, target)
    except OSError as exc:
        raise InputError(f"{target}: cannot write the GeoJSON file ({exc.strerror}).") from None
    finally:
        if tmp is not None and tmp.exists():
            tmp.unlink()
    return target


def geojson_text(collection: dict) -> str:
    """A FeatureCollection as UTF-8 JSON text, one feature a line (no NaN: JSON has none)."""
    rest = {k: v for k, v in collection.items() if k != "features"}
    head = json.dumps(rest, ensure_ascii=False, allow_nan=False)[:-1]
    lines = [json.dumps(f, ensure_ascii=False, allow_nan=False) for f in collection["features"]]
    return head + ', "features": [\n' + ",\n".join(lines) + "\n]}\n"


def _shape_feature(frame: Frame, shape: MapShape, ground: float) -> dict:
    import shapely

    p = np.asarray(shape.outline_m, dtype=float).reshape(-1, 3)
    props = {"role": shape.role, "name": shape.name, **shape.properties}
    flat = bool(np.ptp(p[:, 2]) <= 1e-9) if len(p) else True
    if flat:
        props["height_m"] = round(float(p[0, 2] - ground), HEIGHT_DECIMALS) + 0.0
    lon, lat, h = frame.to_lonlat(p)
    # Longitudes unwrapped around the origin, so a shape across the antimeridian stays whole
    # until it is cut at ±180 below.
    lon = frame.origin_lon_deg + (lon - frame.origin_lon_deg + 180.0) % 360.0 - 180.0
    xyz = np.column_stack([lon, lat] if flat else [lon, lat, h])
    if shape.kind == "polygon" and shapely.Polygon(xyz[:, :2]).area > 0.0:
        geom = shapely.Polygon(xyz)
    elif shape.kind == "polygon":
        # A vertical wall has no area on a map: its closed trace; read back, its edges.
        geom = shapely.LineString(np.vstack([xyz, xyz[:1]]))
    elif shape.kind == "segment":
        geom = shapely.LineString(xyz)
    else:
        geom = shapely.MultiPoint(xyz)
    return {"type": "Feature", "geometry": _geometry(_cut_antimeridian(geom)), "properties": props}


def _cut_antimeridian(geom):
    """Pieces of ``geom`` (unwrapped longitudes) shifted back into [-180, 180] (RFC 7946
    §3.1.9: a geometry crossing the antimeridian is cut in two)."""
    import shapely

    lo, hi = shapely.bounds(geom)[[0, 2]]
    if lo >= -180.0 and hi <= 180.0:
        return geom
    pieces = []
    for shift in (-360.0, 0.0, 360.0):
        box = shapely.box(-180.0 + shift, -90.0, 180.0 + shift, 90.0)
        part = shapely.intersection(geom, box)
        if not part.is_empty:
            pieces.extend(shapely.get_parts(shapely.transform(part, lambda c, s=shift: c - [s, 0])))
    return shapely.GeometryCollection(pieces) if len(pieces) > 1 else pieces[0]


def _geometry(geom) -> dict:
    """GeoJSON of a shapely geometry, CCW outer rings, rounded; pieces become a Multi*."""
    import shapely
    from shapely.geometry.polygon import orient

    parts = list(shapely.get_parts(geom))
    kind = parts[0].geom_type
    if kind == "Polygon":
        coords = [[_round(orient(p, sign=1.0).exterior.coords)] for p in parts]
    elif kind == "LineString":
        coords = [_round(p.coords) for p in parts]
    else:
        coords = [_round(p.coords)[0] for p in parts]
        return {"type": "MultiPoint", "coordinates": coords}
    if len(coords) == 1:
        return {"type": kind, "coordinates": coords[0]}
    return {"type": f"Multi{kind}", "coordinates": coords}


def _round(coords) -> list[list[float]]:
    a = np.asarray(coords, dtype=float)
    out = np.round(a[:, :2], LONLAT_DECIMALS) + 0.0
    if a.shape[1] == 3:
        out = np.column_stack([out, np.round(a[:, 2], HEIGHT_DECIMALS) + 0.0])
    return out.tolist()


def _lonlat_list(lon: np.ndarray, lat: np.ndarray) -> list[list[float]]:
    return _round(np.column_stack([lon, lat]))


def _list(values) -> str:
    return ", ".join(repr(v) for v in values)
