"""``[[source]]``: the charge distributions, what of them is estimated, and their ranges."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from ..geo import Frame
from ..sources import BASE_PARAMS, KINDS, Source
from .frame import lonlat_position, one_of
from .model import SourceSpec
from .reader import XYZ, Table, all_keys, did_you_mean, found, show
from .vocab import ESTIMATE_NAMES, PARAM_TO_ESTIMATE, SOURCE_KINDS

SOURCE_KIND_KEYS = {
    "point": ("charge_c", "center_m", "center_lonlat"),
    "line": ("charge_c", "start_m", "end_m"),
    "sphere": ("charge_c", "center_m", "center_lonlat", "radius_m", "radius_range_m"),
    "gaussian": ("charge_c", "center_m", "center_lonlat", "sigma_m", "sigma_range_m"),
    "grid": ("density_path", "origin_m", "spacing_m"),
}
SOURCE_COMMON = ("kind", "name", "estimate", "charge_range_c", "center_range_m")

#: A source name that would read as another source's parameter prefix (``s1`` for source 0).
_PREFIX_NAME = re.compile(r"s\d+")


def parse_sources(
    root: Table, ground_z_m: float | None, base: Path, frame: Frame | None = None
) -> tuple[SourceSpec, ...]:
    tables = root.array_of_tables(
        "source",
        required=True,
        hint='a charge distribution, e.g. kind = "point", charge_c, center_m',
    )
    specs = tuple(_parse_source(t, ground_z_m, base, frame, k) for k, t in enumerate(tables))
    seen: dict[str, int] = {}
    for k, (t, spec) in enumerate(zip(tables, specs, strict=True)):
        if spec.name in seen:
            t.ck.fail(
                f"`{t.key('name')}` = {show(spec.name)} is already the name of "
                f"source[{seen[spec.name]}]; source names must be unique."
            )
        seen[spec.name] = k
    return specs


def _source_name(t: Table, k: int) -> str:
    """``name`` of source ``k``: free text, default ``s{k}``; never another source's prefix."""
    name = t.string("name", default=f"s{k}", nonempty=True, what="a name for this source")
    if _PREFIX_NAME.fullmatch(name.strip()) and name.strip() != f"s{k}":
        t.ck.fail(
            f"`{t.key('name')}` = {show(name)} would read as another source's parameters "
            f"(`{name.strip()}.charge_c` …); name source[{k}] otherwise, or `s{k}`."
        )
    return name


def _parse_source(
    t: Table, ground_z_m: float | None, base: Path, frame: Frame | None = None, k: int = 0
) -> SourceSpec:
    kind = t.choice("kind", SOURCE_KINDS)
    t.check_keys(
        ("kind", *SOURCE_KIND_KEYS[kind], *SOURCE_COMMON[1:]),
        elsewhere=all_keys(SOURCE_KIND_KEYS),
        owner=f"a {kind} source",
    )
    cls = KINDS[kind]
    if kind == "grid":
        args: tuple = (
            _load_density(t, base),
            t.vector("origin_m", 3, what=XYZ + " (the lower corner of cell (0, 0, 0))"),
            t.spacing("spacing_m"),
        )
    elif kind == "line":
        args = (
            t.number("charge_c"),
            t.vector("start_m", 3, what=XYZ),
            t.vector("end_m", 3, what=XYZ),
        )
    else:
        if one_of(t, "center_m", "center_lonlat") == "center_m":
            center = t.vector("center_m", 3, what=XYZ)
        else:  # [lon, lat, height above the ground], with the [frame]
            center = lonlat_position(t, "center_lonlat", frame, ground_z_m, need_height=True)
        args = (t.number("charge_c"), center)
        if kind == "sphere":
            args += (t.number("radius_m", what="the radius in metres"),)
        elif kind == "gaussian":
            args += (t.number("sigma_m", what="the spread in metres"),)
    try:
        src = cls(*args)
    except ValueError as exc:
        t.ck.fail(f"{t.prefix}: {exc}")

    param_names = BASE_PARAMS + cls.extra_params
    estimate = _parse_estimate(t, kind, param_names)
    ranges: list[tuple[str, float, float]] = []
    if "charge_range_c" in t.data:
        ranges.append(("charge_c", *t.pair("charge_range_c")))
    if "center_range_m" in t.data:
        for axis, (lo, hi) in zip("xyz", t.pairs("center_range_m", 3), strict=True):
            ranges.append((f"{axis}_m", lo, hi))
    for extra in cls.extra_params:  # radius_m / sigma_m
        key = extra.replace("_m", "_range_m")
        if key in t.data:
            ranges.append((extra, *t.pair(key, gt=0.0)))

    if kind == "grid" and src.neutral:
        # A neutral grid has no charge scale to vary (DensityGrid keeps its density as is).
        bad = ["estimate"] if "charge_c" in estimate else []
        bad += ["charge_range_c"] if "charge_range_c" in t.data else []
        if bad:
            t.ck.fail(
                f"`{t.key(bad[0])}`: the grid's net charge is zero, so its charge cannot be "
                "scaled or estimated; drop `charge` / `charge_range_c` for this grid."
            )
    if ground_z_m is not None:
        _check_source_above_ground(t, src, ranges, ground_z_m)
    return SourceSpec(source=src, estimate=estimate, ranges=tuple(ranges), name=_source_name(t, k))


def _parse_estimate(t: Table, kind: str, param_names: tuple[str, ...]) -> tuple[str, ...]:
    raw = t.get("estimate", default=[])
    key = t.key("estimate")
    allowed_names = [PARAM_TO_ESTIMATE[p] for p in param_names]
    allowed = ", ".join(allowed_names)
    if not isinstance(raw, list):
        t.ck.fail(
            f"`{key}` must be an array of parameter names (allowed: {allowed}); got {found(raw)}."
        )
    chosen: set[str] = set()
    for j, name in enumerate(raw):
        if not isinstance(name, str):
            t.ck.fail(f"`{key}[{j}]` must be a parameter name ({allowed}); got {found(name)}.")
        if name not in ESTIMATE_NAMES:
            t.ck.fail(
                f"`{key}[{j}]`: unknown parameter name {show(name)}; allowed for a {kind} "
                f"source: {allowed}{did_you_mean(name, allowed_names) or '.'}"
            )
        if name not in allowed_names:
            t.ck.fail(
                f"`{key}[{j}]`: `{name}` is not a parameter of a {kind} source; allowed: {allowed}."
            )
        if name in chosen:
            t.ck.fail(f"`{key}[{j}]`: `{name}` is listed twice; list each parameter once.")
        chosen.add(name)
    return tuple(p for p in param_names if PARAM_TO_ESTIMATE[p] in chosen)


def _load_density(t: Table, base: Path) -> np.ndarray:
    raw = t.string("density_path", nonempty=True, what="the path of a .npy file of C/m³")
    key = t.key("density_path")
    p = Path(raw).expanduser()
    full = p if p.is_absolute() else base / p
    if not full.is_file():
        t.ck.fail(
            f"`{key}` = {show(raw)}: no such file ({full}); relative paths start at the "
            "config file's folder."
        )
    try:
        arr = np.load(full, allow_pickle=False)
    except (OSError, ValueError) as exc:
        t.ck.fail(f"`{key}` = {show(raw)}: not a readable .npy array file ({exc}).")
    if not isinstance(arr, np.ndarray) or arr.ndim != 3:
        shape = getattr(arr, "shape", "an archive")
        t.ck.fail(
            f"`{key}` = {show(raw)}: the array must be 3-D (nx, ny, nz) of C/m³; got shape {shape}."
        )
    if arr.dtype.kind not in "iuf" or min(arr.shape) < 1:
        t.ck.fail(
            f"`{key}` = {show(raw)}: the array must hold real numbers and have no empty axis; "
            f"got dtype {arr.dtype} and shape {arr.shape}."
        )
    arr = arr.astype(float)
    if not np.all(np.isfinite(arr)):
        t.ck.fail(f"`{key}` = {show(raw)}: the density must be finite; the array holds NaN or inf.")
    return arr


def _check_source_above_ground(t: Table, src: Source, ranges, ground_z_m: float) -> None:
    """The nominal source, and every source the ranges allow, must lie above the ground."""
    g = ground_z_m
    low = src.lowest_z_m()
    nominal_key = {
        "line": "start_m` / `end_m",
        "grid": "origin_m",
        "sphere": "center_m` / `radius_m",
    }
    if not low > g:
        key = t.key(nominal_key.get(src.kind, "center_m"))
        t.ck.fail(
            f"`{key}` puts the {src.kind} source down to z = {low:g} m, not above the ground plane "
            f"at z = {g:g} m (`ground.z_m`); every source must lie above the ground."
        )
    bounds = {name: (lo, hi) for name, lo, hi in ranges}
    if "z_m" not in bounds and "radius_m" not in bounds:
        return
    cz = src.center_m[2]
    z_lo = bounds.get("z_m", (cz, cz))[0]
    drop = cz - low  # from the centre down to the lowest charge: radius, half a line, …
    if "radius_m" in bounds:
        drop = bounds["radius_m"][1]
    if not z_lo - drop > g:
        keys = [
            k for k, n in (("center_range_m", "z_m"), ("radius_range_m", "radius_m")) if n in bounds
        ]
        detail = ""
        if drop > 0:
            detail = f" (centre z down to {z_lo:g} m, minus {drop:g} m from the centre to its"
            detail += " lowest charge)"
        t.ck.fail(
            f"`{'` / `'.join(t.key(k) for k in keys)}` let the {src.kind} source reach down to "
            f"z = {z_lo - drop:g} m{detail}, not above the ground plane at z = {g:g} m; every "
            "scenario's source must lie above the ground."
        )
