"""``[[region]] kind = "geojson"``: a GIS layer of the site expanded into regions, keep-outs
and installed meters.

The file (RFC 7946, read by :func:`probeplan.geo.read_geojson`) gives features with a
property ``role``: ``region`` becomes a mounting region, ``keepout`` a keep-out, ``installed``
an installed meter (``name``, ``component``, ``grade``, ``gain``), ``structure`` (with
``height_m``) a conducting structure: a vertical prism over the footprint from the ground to
``height_m``, grounded unless ``floating = true`` (with ``charge_c``), meshed as a
:meth:`Conductor.mesh` with no base on the grounded plane; its footprint also stays a keep-out
for meters. Mounting heights: a
feature's ``height_m`` (above the ground), else heights in its coordinates, else the table's
``z_m``. ``filter = { key = value }`` keeps only the features whose property ``key`` equals
``value``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy.spatial
import shapely

from ..conductors import _AUTO_PANELS, Conductor
from ..errors import InputError
from ..geo import Frame, MapFeature, read_geojson
from ..site import Region, make_region
from .model import InstalledProbe
from .reader import Table, read_component, show

MAP_KEYS = ("kind", "path", "filter", "z_m", "gain", "buffer_m")


@dataclass(frozen=True)
class MapSite:
    """What the GeoJSON ``[[region]]`` tables of a config add to the site."""

    regions: tuple[Region, ...] = ()
    keepouts: tuple[Region, ...] = ()
    installed: tuple[InstalledProbe, ...] = ()
    structures: tuple[Conductor, ...] = ()


def parse_map_regions(
    root: Table, frame: Frame | None, ground_z_m: float | None, base: Path
) -> MapSite:
    """Every ``[[region]]`` with ``kind = "geojson"``, in order."""
    regions: list[Region] = []
    keepouts: list[Region] = []
    installed: list[InstalledProbe] = []
    structures: list[Conductor] = []
    for t in root.array_of_tables("region"):
        if t.data.get("kind") != "geojson":
            continue
        t.check_keys(MAP_KEYS, owner="a geojson region")
        if frame is None:
            t.ck.fail(
                f"{t.label}: a GeoJSON site needs a [frame] table (origin_lon_deg, "
                "origin_lat_deg) near the site, to turn longitude and latitude into metres."
            )
        path = Path(t.string("path", nonempty=True, what="the GeoJSON file")).expanduser()
        layer = read_geojson(base / path, frame, select=_filter(t), need="region")
        ground = 0.0 if ground_z_m is None else ground_z_m
        z_m = t.number("z_m", default=None, what="the mounting height in metres")
        gain = t.number("gain", default=1.0, gt=0.0)
        buffer_m = t.number("buffer_m", default=0.0, ge=0.0)
        for f in layer.regions:
            geom = _geometry(t, f, ground, z_m, mounting=True)
            regions.append(_region(t, f, geom, gain=gain))
        for f in (*layer.keepouts, *layer.structures):
            geom = _geometry(t, f, ground, z_m, mounting=False)
            keepouts.append(_region(t, f, geom, buffer_m=buffer_m))
        structures.extend(_structure(t, f, ground, ground_z_m) for f in layer.structures)
        installed.extend(_meter(t, f, ground) for f in layer.installed)
    return MapSite(tuple(regions), tuple(keepouts), tuple(installed), tuple(structures))


def _filter(t: Table) -> tuple[str, Any] | None:
    value = t.get("filter", None)
    if value is None:
        return None
    if not isinstance(value, dict) or len(value) != 1:
        t.ck.fail(
            f"`{t.key('filter')}` must be a table of one property and its value, e.g. "
            f'filter = {{ site = "north" }}; got {show(value)}.'
        )
    ((key, val),) = value.items()
    return key, val


def _geometry(t: Table, f: MapFeature, ground: float, z_m, *, mounting: bool) -> dict:
    """The region keys of one feature: heights from ``height_m``, coordinates or ``z_m``."""
    c = f.coords_m
    if c.shape[1] == 2:
        if f.height_m is not None and f.role != "structure":
            z = ground + f.height_m
        elif z_m is not None:
            z = z_m
        elif not mounting:
            z = ground  # a keep-out footprint holds at every height
        else:
            t.ck.fail(
                f"{f.label}: no mounting height; give the feature a property `height_m` "
                f"(above the ground, m) or `{t.key('z_m')}` (the mounting height in metres)."
            )
        c = np.column_stack([c, np.full(len(c), z)])
    if f.kind == "polygon":
        flat = np.ptp(c[:, 2]) == 0.0
        return (
            {"vertices_m": c[:, :2].tolist(), "z_m": float(c[0, 2])}
            if flat
            else {"vertices_m": c.tolist()}
        )
    if f.kind == "segment":
        return {"start_m": tuple(c[0]), "end_m": tuple(c[1])}
    return {"positions_m": [tuple(p) for p in c]}


def _region(t: Table, f: MapFeature, geom: dict, **extra) -> Region:
    try:
        return make_region(f.kind, **geom, name=f.name or f.label, **extra)
    except ValueError as exc:
        t.ck.fail(f"{f.label}: {exc}")


def _structure(t: Table, f: MapFeature, ground: float, ground_z_m: float | None) -> Conductor:
    """A ``structure`` feature as a grounded (or floating) prism over its footprint."""
    p = f.properties
    where = f"{f.label}: property"
    floating = p.get("floating", False)
    if not isinstance(floating, bool):
        t.ck.fail(f"{where} `floating` must be true or false; got {show(floating)}.")
    charge_c = t.ck.number(f"{where} `charge_c`", p["charge_c"]) if "charge_c" in p else 0.0
    if charge_c != 0.0 and not floating:
        t.ck.fail(
            f"{where} `charge_c` needs property `floating` = true: a grounded structure is at "
            "0 V and its charge follows from the field."
        )
    size = p.get("mesh_size_m")
    size = None if size is None else t.ck.number(f"{where} `mesh_size_m`", size, gt=0.0)
    outline = f.coords_m[:, :2]
    size = prism_panel_size_m(outline, f.height_m) if size is None else size
    try:
        surface = prism_surface(outline, ground, ground + f.height_m, size)
        return Conductor.mesh(
            surface,
            floating=floating,
            charge_c=charge_c,
            mesh_size_m=size,
            name=f.name or f.label,
        )
    except InputError as exc:
        t.ck.fail(f"{f.label}: {exc}")


def prism_panel_size_m(outline_m: np.ndarray, height_m: float) -> float:
    """The automatic largest panel edge of a footprint prism, m: about as many panels as the
    other kinds' automatic meshes (the right triangles of :func:`prism_surface`, legs
    ``size / √2``, over the top and walls), and walls of at least two rows.

    Parameters
    ----------
    outline_m : (k, 2) float
        The footprint's outer ring, without its closing position, m.
    height_m : float
        The prism's height, m.
    """
    ring = shapely.Polygon(outline_m)
    area_m2 = ring.area + ring.length * height_m
    return math.sqrt(2.0) * min(math.sqrt(2.0 * area_m2 / _AUTO_PANELS), 0.5 * height_m)


def prism_surface(
    outline_m: np.ndarray, bottom_z_m: float, top_z_m: float, size_m: float
) -> tuple[np.ndarray, np.ndarray]:
    """A closed vertical prism over a simple polygon, triangulated to panels of ``size_m``.

    The walls are rows of near-square quads (each ring edge and the height cut into pieces of
    at most ``size_m / √2``, so a quad's diagonal is at most ``size_m``); the top and the
    bottom share the ring's nodes, so the surface is watertight, and hold an inner lattice of
    the same spacing, so their triangles stay well shaped instead of fanning across the
    footprint. The bottom face is dropped by
    :class:`Conductor` when it lies on the grounded plane.

    Parameters
    ----------
    outline_m : (k, 2) float
        The outer ring (either orientation, no closing position), m.
    bottom_z_m, top_z_m : float
        The prism's bottom and top, m.
    size_m : float
        The largest panel edge wanted, m (> 0); the few Delaunay edges along the rim that
        exceed it are split by :class:`Conductor`.

    Returns
    -------
    vertices : (n, 3) float
        m.
    faces : (m, 3) int
        Indices into ``vertices``, counter-clockwise seen from outside.
    """
    ring = np.asarray(outline_m, dtype=float)[:, :2]
    size_m = size_m / math.sqrt(2.0)  # the quads' side
    if shapely.Polygon(ring).exterior.is_ccw is False:
        ring = ring[::-1]  # counter-clockwise from above: every face below wound outwards
    ends = np.roll(ring, -1, axis=0)
    pieces = np.maximum(1, np.ceil(np.linalg.norm(ends - ring, axis=1) / size_m)).astype(int)
    t = np.concatenate([np.arange(k) / k for k in pieces])
    start = np.repeat(np.arange(len(ring)), pieces)
    nodes = ring[start] + t[:, None] * (ends - ring)[start]
    n = len(nodes)
    rows = max(1, math.ceil((top_z_m - bottom_z_m) / size_m))
    levels = np.linspace(bottom_z_m, top_z_m, rows + 1)
    walls_v = np.column_stack([np.tile(nodes, (len(levels), 1)), np.repeat(levels, n)])
    j, i = np.meshgrid(np.arange(len(levels) - 1), np.arange(n), indexing="ij")
    a, b = (j * n + i).ravel(), (j * n + (i + 1) % n).ravel()
    walls_f = np.concatenate([np.c_[a, b, b + n], np.c_[a, b + n, a + n]])
    inner, caps = _cap(nodes, size_m)
    m, top_row = len(inner), (len(levels) - 1) * n
    on_ring = caps < n
    top = np.where(on_ring, caps + top_row, caps - n + len(walls_v))
    bottom = np.where(on_ring, caps, caps - n + len(walls_v) + m)
    vertices = np.concatenate(
        [walls_v, np.c_[inner, np.full(m, top_z_m)], np.c_[inner, np.full(m, bottom_z_m)]]
    )
    return vertices, np.concatenate([walls_f, top, bottom[:, ::-1]])


def _cap(nodes: np.ndarray, size_m: float) -> tuple[np.ndarray, np.ndarray]:
    """The footprint's triangles: ``(inner (m, 2), faces (f, 3))``, indices < n the ring's
    ``nodes (n, 2)`` and n + k the k-th inner point. A Delaunay triangulation of the ring and
    an inner lattice (points at least half a panel inside), kept inside the polygon; where it
    misses a ring edge (a deep notch), the constrained triangulation of the ring alone."""
    poly = shapely.Polygon(nodes)
    lo, hi = nodes.min(axis=0), nodes.max(axis=0)
    gx, gy = np.meshgrid(*(np.arange(lo[k] + size_m / 2, hi[k], size_m) for k in range(2)))
    grid = np.c_[gx.ravel(), gy.ravel()]
    inside = shapely.contains_xy(poly, grid[:, 0], grid[:, 1])
    grid = grid[inside]
    far = shapely.distance(poly.exterior, shapely.points(grid)) >= 0.5 * size_m
    inner = grid[far]
    pts = np.concatenate([nodes, inner])
    faces = scipy.spatial.Delaunay(pts).simplices
    centre = pts[faces].mean(axis=1)
    faces = faces[shapely.contains_xy(poly, centre[:, 0], centre[:, 1])]
    n = len(nodes)
    edges = {tuple(sorted(e)) for f in faces for e in ((f[0], f[1]), (f[1], f[2]), (f[2], f[0]))}
    if all(tuple(sorted((k, (k + 1) % n))) in edges for k in range(n)):
        return inner, _upwards(pts, faces)
    tris = shapely.get_parts(shapely.constrained_delaunay_triangles(poly))
    corners = shapely.get_coordinates(tris).reshape(len(tris), 4, 2)[:, :3]
    index = {tuple(p): k for k, p in enumerate(nodes.tolist())}
    faces = np.array([[index[tuple(p)] for p in tri.tolist()] for tri in corners])
    return inner[:0], _upwards(nodes, faces)


def _upwards(pts: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """``faces`` of points ``pts (n, 2)`` each counter-clockwise seen from above."""
    a, b, c = pts[faces[:, 0]], pts[faces[:, 1]], pts[faces[:, 2]]
    cross = (b - a)[:, 0] * (c - a)[:, 1] - (b - a)[:, 1] * (c - a)[:, 0]
    return np.where((cross < 0)[:, None], faces[:, ::-1], faces)


def _meter(t: Table, f: MapFeature, ground: float) -> InstalledProbe:
    c = f.coords_m[0]
    z = ground + f.height_m if f.height_m is not None else c[2]
    p = f.properties
    where = f"{f.label}: property"
    component = p.get("component")
    grade = p.get("grade")
    if grade is not None and (not isinstance(grade, str) or not grade):
        t.ck.fail(f"{where} `grade` must be a [[grade]] name; got {show(grade)}.")
    gain = t.ck.number(f"{where} `gain`", p["gain"], gt=0.0) if "gain" in p else 1.0
    return InstalledProbe(
        position_m=(float(c[0]), float(c[1]), float(z)),
        name=f.name or f"{Path(f.label.split(':')[0]).stem}-{f.index}",
        component=_component(t, where, component),
        gain=gain,
        grade=grade,
    )


def _component(t: Table, where: str, value: Any):
    return None if value is None else read_component(t.ck, f"{where} `component`", value)


def check_installed_names(ck, installed: tuple[InstalledProbe, ...]) -> tuple[InstalledProbe, ...]:
    """Meters from a GeoJSON file join the config's own: every name once."""
    seen: set[str] = set()
    for p in installed:
        if p.name in seen:
            ck.fail(
                f"installed meter name {show(p.name)} is used twice (in [[probes.installed]] "
                "and a GeoJSON site file, or twice in the file); installed meter names must be "
                "unique."
            )
        seen.add(p.name)
    return installed
