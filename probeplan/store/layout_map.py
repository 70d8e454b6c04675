"""A result's layout and site as GeoJSON (RFC 7946), for GIS programs: ``show --geojson``."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..geo import MapShape, geojson_text, layout_collection
from ..result import Result
from ..resulttypes import probe_names
from .files import check_writable, write_atomically
from .layout_csv import component_text

#: Region kinds → how they are drawn on a map.
_SHAPES = {"rectangle": "polygon", "polygon": "polygon", "segment": "segment", "points": "points"}


def write_layout_geojson(
    result: Result,
    path: str | os.PathLike,
    *,
    regions: Sequence = (),
    keepouts: Sequence = (),
    force: bool = False,
) -> Path:
    """Write every meter of a result as a Point, and its regions and keep-outs, atomically.

    Parameters
    ----------
    result : Result
        With a frame (the config's ``[frame]``).
    path : str or path-like
    regions, keepouts : sequence of probeplan.site.Region
        The site, from the result's config.
    force : bool
        Replace an existing file.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    InputError
        The result has no frame, or the file cannot be written.
    """
    if result.frame is None:
        raise InputError(
            f"{os.fspath(path)}: the result has no [frame], so its metres have no longitude or "
            "latitude; add a [frame] table (origin_lon_deg, origin_lat_deg) to the config and "
            "run it again."
        )
    target = check_writable(path, force=force, option="--geojson", suffix=".geojson")
    s = result.score
    n = len(s.positions_m)
    shapes = [
        MapShape(role, r.name, _SHAPES[r.kind], r.outline_m(), _extra(r, role))
        for role, group in (("region", regions), ("keepout", keepouts))
        for r in group
    ]
    doc = layout_collection(
        result.frame,
        s.positions_m,
        names=probe_names(result),
        installed=np.asarray(s.installed, dtype=bool),
        components=[component_text(s, k) for k in range(n)],
        grades=["" if s.grade is None else str(s.grade[k]) for k in range(n)],
        ground_z_m=result.ground_z_m,
        shapes=shapes,
    )
    text = geojson_text(doc)

    def write(tmp: Path) -> None:
        tmp.write_text(text, encoding="utf-8")

    return write_atomically(target, write, "the GeoJSON file", force=force, option="--geojson")


def _extra(region, role: str) -> dict:
    if role == "keepout" and region.buffer_m > 0.0:
        return {"buffer_m": float(region.buffer_m)}
    if role == "region" and region.gain != 1.0:
        return {"gain": float(region.gain)}
    return {}
