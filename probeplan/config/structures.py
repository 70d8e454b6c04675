"""``[[structure]]``: conducting structures (tanks, masts, buildings, screened rooms).

Each table is one :class:`probeplan.Conductor`; its induced charge is solved for by boundary
elements (:mod:`probeplan.bem`). Checked here, once: the keys of each kind, the geometry, a mesh
file that can be read and is closed (or closed by the ground plane), structures that cut into
each other, and sources inside or touching a structure.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..conductors import Conductor, check_overlaps, check_points
from ..errors import InputError
from .reader import Table, all_keys

_COMMON = ("kind", "name", "floating", "charge_c", "mesh_size_m")
STRUCTURE_KEYS: dict[str, tuple[str, ...]] = {
    "box": _COMMON + ("min_m", "max_m"),
    "enclosure": _COMMON + ("min_m", "max_m"),
    "cylinder": _COMMON + ("base_m", "radius_m", "height_m"),
    "sphere": _COMMON + ("center_m", "radius_m"),
    "spheroid": _COMMON + ("center_m", "semi_axes_m"),
    "mesh": _COMMON + ("path",),
}
STRUCTURE_KINDS = tuple(STRUCTURE_KEYS)

_XYZ = "3 numbers (x, y, z) in metres"


def parse_structures(
    root: Table, ground_z_m: float | None, base: Path, sources=(), mapped: tuple = ()
) -> tuple:
    """The structures in config order, each a :class:`Conductor` (``name`` defaults to
    ``structure[i]``), then ``mapped`` (the prisms of GeoJSON ``structure`` features); all of
    them are checked against each other, and ``sources`` (parsed ``SourceSpec``) must stay
    clear of them."""
    out = []
    for t in root.array_of_tables("structure"):
        kind = t.choice("kind", STRUCTURE_KINDS)
        t.check_keys(STRUCTURE_KEYS[kind], elsewhere=all_keys(STRUCTURE_KEYS), owner=f"a {kind}")
        options = {
            "name": t.string("name", default=t.prefix, nonempty=True),
            "floating": t.boolean("floating", default=False),
            "charge_c": t.number("charge_c", default=0.0),
            "mesh_size_m": t.number("mesh_size_m", default=None, gt=0.0),
        }
        if options["charge_c"] != 0.0 and not options["floating"]:
            t.ck.fail(
                f"`{t.key('charge_c')}` needs `{t.key('floating')} = true`: a grounded "
                "structure is at 0 V and its charge follows from the field."
            )
        try:
            out.append(_make(t, kind, options, base))
        except InputError as exc:  # geometry the kind itself refuses: name the table
            t.ck.fail(f"{t.label}: {exc}")
    structures = tuple(out) + tuple(mapped)
    if structures:
        _check_meshes(root, structures, ground_z_m, sources, len(out))
    return structures


def _make(t: Table, kind: str, options: dict, base: Path) -> Conductor:
    if kind in ("box", "enclosure"):
        lo = t.vector("min_m", 3, what=_XYZ)
        hi = t.vector("max_m", 3, what=_XYZ)
        return getattr(Conductor, kind)(lo, hi, **options)
    if kind == "cylinder":
        return Conductor.cylinder(
            t.vector("base_m", 3, what=_XYZ),
            t.number("radius_m", gt=0.0, what="the radius in metres"),
            t.number("height_m", gt=0.0, what="the height in metres"),
            **options,
        )
    if kind == "sphere":
        return Conductor.sphere(
            t.vector("center_m", 3, what=_XYZ),
            t.number("radius_m", gt=0.0, what="the radius in metres"),
            **options,
        )
    if kind == "spheroid":
        axes = t.vector("semi_axes_m", 3, what="3 semi-axes (a, b, c) > 0 in metres", gt=0.0)
        return Conductor.spheroid(t.vector("center_m", 3, what=_XYZ), axes, **options)
    path = Path(t.string("path", nonempty=True, what="the path of an STL, OBJ or PLY file"))
    full = path if path.is_absolute() else base / path
    if not full.is_file():
        t.ck.fail(f"`{t.key('path')}`: no such mesh file {str(full)!r}.")
    return Conductor.mesh(full, **options)


def _check_meshes(
    root: Table, structures: tuple, ground_z_m: float | None, sources, n_tables: int
) -> None:
    """Mesh every structure once and check them against each other and the sources; the
    first ``n_tables`` are ``[[structure]]`` tables, the rest GeoJSON features."""
    ck = root.ck
    surfaces = []
    for i, c in enumerate(structures):
        try:
            surfaces.append(c.triangles(ground_z_m))
        except InputError as exc:
            where = f"structure[{i}]" if i < n_tables else f"GeoJSON structure {c.name!r}"
            ck.fail(f"{where}: {exc}")
    try:
        check_overlaps(structures, surfaces, ground_z_m)
    except InputError as exc:
        ck.fail(f"[[structure]]: {exc}")
    for i, spec in enumerate(sources):
        src = spec.source
        pts = [src.center_m] + ([src.start_m, src.end_m] if src.kind == "line" else [])
        try:
            check_points(np.array(pts, dtype=float), structures, surfaces, ground_z_m)
        except InputError as exc:
            where = str(exc).split(" m ", 1)[-1]  # "lies inside conductor k (...)..." / "is ..."
            ck.fail(
                f"source[{i}] ({src.kind}) at {list(src.center_m)} m: {where} A charge must stay "
                "outside every [[structure]], clear of it by at least a panel size."
            )


def check_regions_clear(ck, config) -> None:
    """A mounting region must not lie wholly inside a structure (or within a panel of it)."""
    if not config.structures:
        return
    blocked = config.site().obstacles.blocked
    for i, region in enumerate(config.regions):
        if region.kind == "structure":
            continue
        pts = np.asarray(region._test_points(), dtype=float).reshape(-1, 3)
        if len(pts) and blocked(pts).all():
            ck.fail(
                f"region[{i}] ({region.kind}{' ' + repr(region.name) if region.name else ''}) "
                "lies inside a [[structure]] (or within a panel size of one): no meter can be "
                'mounted there; move it, or mount on the structure with kind = "structure".'
            )
