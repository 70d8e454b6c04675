"""``[[region]] kind = "geojson"``: a GIS layer of the site expanded into regions, keep-outs
and installed meters.

The file (RFC 7946, read by :func:`probeplan.geo.read_geojson`) gives features with a
property ``role``: ``region`` becomes a mounting region, ``keepout`` a keep-out, ``installed``
an installed meter (``name``, ``component``, ``grade``, ``gain``), ``structure`` (with
``height_m``) a keep-out footprint until structures are modelled. Mounting heights: a
feature's ``height_m`` (above the ground), else heights in its coordinates, else the table's
``z_m``. ``filter = { key = value }`` keeps only the features whose property ``key`` equals
``value``.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

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


def parse_map_regions(
    root: Table, frame: Frame | None, ground_z_m: float | None, base: Path
) -> MapSite:
    """Every ``[[region]]`` with ``kind = "geojson"``, in order."""
    regions: list[Region] = []
    keepouts: list[Region] = []
    installed: list[InstalledProbe] = []
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
        installed.extend(_meter(t, f, ground) for f in layer.installed)
    return MapSite(tuple(regions), tuple(keepouts), tuple(installed))


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
