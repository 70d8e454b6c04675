"""``[[region]]`` and ``[[keepout]]``: where a probe may be mounted and where not.

The geometry is checked here key by key; the site (:mod:`probeplan.site`) then checks the
shapes themselves, and :func:`check_feasible` lets it say whether the mounting rules can hold.
"""

from __future__ import annotations

from typing import Any

from ..site import Region, make_region
from .ground import check_at_or_above_ground
from .model import Config
from .reader import REQUIRED, XYZ, Checker, Table, all_keys
from .vocab import MAP_KIND, REGION_KINDS

REGION_KIND_KEYS = {
    "rectangle": ("min_m", "max_m", "z_m"),
    "polygon": ("vertices_m", "z_m"),
    "segment": ("start_m", "end_m"),
    "points": ("positions_m",),
    "structure": ("structure", "face", "standoff_m", "spacing_m"),
}
#: Which part of a structure carries meters (see probeplan.Conductor.surface_points).
STRUCTURE_FACES = ("top", "walls", "all")
REGION_COMMON = {
    "region": ("kind", "name", "gain"),
    "keepout": ("kind", "name", "buffer_m"),
}


def parse_regions(
    root: Table, which: str, ground_z_m: float | None, structures: tuple = ()
) -> tuple[Region, ...]:
    """``[[region]]`` (no mounting point below the ground) or ``[[keepout]]``; a mounting
    region of kind ``structure`` sits on one of ``structures`` (parsed ``[[structure]]``).

    A keep-out rectangle or ``[x, y]`` polygon is a footprint at every height, so its ``z_m``
    does not matter and may be left out (the ground height, or 0, is passed on).
    """
    mounting = which == "region"
    tables = root.array_of_tables(
        which,
        required=mounting,
        hint='where a probe may be mounted, e.g. kind = "rectangle", min_m, max_m, z_m',
    )
    kinds = (*REGION_KINDS, MAP_KIND) if mounting else REGION_KINDS
    out = []
    for t in tables:
        kind = t.choice("kind", kinds)
        if kind == MAP_KIND:
            continue  # expanded by .maps, with the frame
        allowed = ("kind", *REGION_KIND_KEYS[kind], *REGION_COMMON[which][1:])
        elsewhere = (*all_keys(REGION_KIND_KEYS), "gain", "buffer_m")
        t.check_keys(allowed, elsewhere=elsewhere, owner=f"a {kind} {which}")
        geom: dict[str, Any] = {}
        if kind == "rectangle":
            geom["min_m"] = t.vector("min_m", 2, what="2 numbers (x, y) in metres")
            geom["max_m"] = t.vector("max_m", 2, what="2 numbers (x, y) in metres")
            for k, axis in enumerate("xy"):
                if geom["min_m"][k] > geom["max_m"][k]:
                    t.ck.fail(
                        f"`{t.key('min_m')}` {axis} = {geom['min_m'][k]!r} is above "
                        f"`{t.key('max_m')}` {axis} = {geom['max_m'][k]!r}; min_m must hold the "
                        "lower corner (bounds are never swapped)."
                    )
        elif kind == "polygon":
            geom["vertices_m"] = t.points("vertices_m", dims=(2, 3), at_least=3)
        elif kind == "segment":
            geom["start_m"] = t.vector("start_m", 3, what=XYZ)
            geom["end_m"] = t.vector("end_m", 3, what=XYZ)
        elif kind == "structure":
            if not mounting:
                t.ck.fail(
                    f'`{t.key("kind")}` = "structure" applies to [[region]] only; a structure '
                    "keeps meters out of itself by its own panels."
                )
            geom.update(_structure_surface(t, structures, ground_z_m))
        else:
            geom["positions_m"] = t.points("positions_m", dims=(3,), at_least=1)
        flat = kind == "rectangle" or (kind == "polygon" and len(geom["vertices_m"][0]) == 2)
        if flat or "z_m" in t.data:
            footprint_z = 0.0 if ground_z_m is None else ground_z_m
            default = REQUIRED if mounting else footprint_z
            geom["z_m"] = t.number("z_m", default, what="the mounting height in metres")
        if mounting and ground_z_m is not None:
            _check_region_height(t, geom, ground_z_m)
        extra: dict[str, Any] = {}
        if mounting:
            extra["gain"] = t.number("gain", default=1.0, gt=0.0)
        else:
            extra["buffer_m"] = t.number("buffer_m", default=0.0, ge=0.0)
        # Unnamed: the site's own messages then say "region 2 (rectangle)".
        name = t.string("name", default="", nonempty=True)
        try:
            out.append(make_region(kind, **geom, name=name, **extra))
        except ValueError as exc:
            t.ck.fail(f"{t.prefix}: {exc}")
    return tuple(out)


def _structure_surface(t: Table, structures: tuple, ground_z_m: float | None) -> dict:
    """Keys of a ``structure`` region: the structure by name, the face, the standoff, and the
    mounting points they give (about one per ``spacing_m`` square; default four standoffs)."""
    names = [c.name for c in structures]
    listing = ", ".join(repr(n) for n in names) or "none: add a [[structure]] table"
    name = t.string("structure", what=f"the `name` of a [[structure]] ({listing})")
    if name not in names:
        t.ck.fail(f"`{t.key('structure')}` = {name!r} names no [[structure]]; given: {listing}.")
    cond = structures[names.index(name)]
    face = t.choice("face", STRUCTURE_FACES, default="top")
    standoff = t.number("standoff_m", gt=0.0, what="the meters' distance off the surface in metres")
    spacing = t.number("spacing_m", default=None, gt=0.0)
    if spacing is None:
        spacing = max(4.0 * standoff, 1e-3)
    pts = cond.surface_points(ground_z_m, face, standoff, spacing)
    if len(pts) == 0:
        t.ck.fail(
            f"{t.prefix}: structure {name!r} ({cond.kind}) has no {face!r} surface to mount on; "
            f"allowed faces: {', '.join(STRUCTURE_FACES)}."
        )
    return {
        "positions_m": pts,
        "structure": name,
        "face": face,
        "standoff_m": standoff,
    }


def _check_region_height(t: Table, geom: dict, ground_z_m: float) -> None:
    """Mounting points of a region must be on or above the ground plane."""
    if geom.get("z_m") is not None:
        check_at_or_above_ground(t.ck, t.key("z_m"), geom["z_m"], ground_z_m)
    for key in ("start_m", "end_m"):
        if key in geom:
            check_at_or_above_ground(t.ck, t.key(key), geom[key][2], ground_z_m)
    for key in ("vertices_m", "positions_m"):
        for j, p in enumerate(geom.get(key, ())):
            if len(p) == 3:
                check_at_or_above_ground(t.ck, f"{t.key(key)}[{j}]", p[2], ground_z_m)


def check_feasible(ck: Checker, config: Config) -> None:
    """Let the site check that the mounting rules can hold for every count asked for."""
    checks = [("probes.count", config.probes.count)] if config.probes.count > 0 else []
    if config.budget is not None:
        # A budget needs one count that fits; larger ones that do not are rows marked
        # infeasible (the sweep plans the others), not a refused config.
        checks.append(("budget.counts", min(config.budget.counts)))
    try:
        site = config.site()
    except ValueError as exc:
        ck.fail(f"[[region]] / [[keepout]] / [[probes.installed]]: {exc}")
    spacing = config.probes.min_spacing_m
    for key, count in checks:
        try:
            site.check_feasible(count)
        except ValueError as exc:
            ck.fail(
                f"[[region]] / [[keepout]] with `{key}` = {count} and `probes.min_spacing_m` = "
                f"{spacing:g}: {exc}"
            )
