"""The TOML config: read once, check everything once, hand out frozen dataclasses.

Map of this module (read top to bottom):

1. Vocabulary: the enumerated options a config may name (components, criteria, aggregates,
   cautions, kinds) and the keys each table accepts.
2. The public dataclasses (:class:`Config` and its parts). They hold checked values only: the
   rest of the program never re-validates a config.
3. :func:`load_config` / :func:`parse_config`, then one private ``_parse_*`` function per table.
4. Small checking helpers on raw TOML values. Every failure is one :class:`InputError` whose
   message names the file, the key (dotted path, arrays indexed from 0: ``source[2].center_m``),
   what was found and what is allowed.

Units are SI throughout (m, C, V/m); every key carries its unit as a suffix.
"""

from __future__ import annotations

import difflib
import json
import math
import os
import re
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NoReturn

import numpy as np

from .errors import InputError
from .site import Region, Site
from .sources import BASE_PARAMS, KINDS, Source

# --------------------------------------------------------------------------------------------
# Vocabulary
# --------------------------------------------------------------------------------------------

#: Estimate names a config may use, and the source parameter each one stands for.
ESTIMATE_NAMES: dict[str, str] = {
    "charge": "charge_c",
    "x": "x_m",
    "y": "y_m",
    "z": "z_m",
    "radius": "radius_m",
    "sigma": "sigma_m",
}
_PARAM_TO_ESTIMATE = {v: k for k, v in ESTIMATE_NAMES.items()}

#: What a meter reads: one axis, all three, or (given as a vector instead) an arbitrary axis.
COMPONENTS: tuple[str, ...] = ("x", "y", "z", "vector")
#: Design criteria (see the contract for their exact definitions).
CRITERIA: tuple[str, ...] = ("d", "location", "charge")
#: Aggregates over scenarios; ``quantile:q`` stands for any 0 < q < 1, e.g. ``quantile:0.9``.
AGGREGATES: tuple[str, ...] = ("mean", "worst", "quantile:q")
#: Caution lines the summary can carry (the top-level ``caution`` key).
CAUTIONS: tuple[str, ...] = ("lightning", "esd", "high-voltage", "general", "none")
#: Mounting-region and keep-out kinds.
REGION_KINDS: tuple[str, ...] = ("rectangle", "polygon", "segment", "points")
#: Source kinds, in the order of :data:`probeplan.sources.KINDS`.
SOURCE_KINDS: tuple[str, ...] = tuple(KINDS)

#: A source centred at least this high above a ground plane marks a storm-watch config
#: (charge in a thundercloud sits kilometres up; common practice of the trade).
STORM_HEIGHT_M: float = 1000.0

_ROOT_KEYS = (
    "title",
    "seed",
    "caution",
    "ground",
    "probes",
    "region",
    "keepout",
    "source",
    "background",
    "design",
    "grade",
    "budget",
)
_GROUND_KEYS = ("z_m",)
_PROBE_KEYS = (
    "count",
    "component",
    "noise_v_per_m",
    "relative_noise",
    "range_v_per_m",
    "min_spacing_m",
    "gain",
    "installed",
)
_INSTALLED_KEYS = ("position_m", "name", "component", "gain", "grade")
_REGION_KIND_KEYS = {
    "rectangle": ("min_m", "max_m", "z_m"),
    "polygon": ("vertices_m", "z_m"),
    "segment": ("start_m", "end_m"),
    "points": ("positions_m",),
}
_REGION_COMMON = {
    "region": ("kind", "name", "gain"),
    "keepout": ("kind", "name", "buffer_m"),
}
_SOURCE_KIND_KEYS = {
    "point": ("charge_c", "center_m"),
    "line": ("charge_c", "start_m", "end_m"),
    "sphere": ("charge_c", "center_m", "radius_m", "radius_range_m"),
    "gaussian": ("charge_c", "center_m", "sigma_m", "sigma_range_m"),
    "grid": ("density_path", "origin_m", "spacing_m"),
}
_SOURCE_COMMON = ("kind", "estimate", "charge_range_c", "center_range_m")
_BACKGROUND_KEYS = ("field_v_per_m", "estimate", "field_range_v_per_m")
_DESIGN_KEYS = (
    "criterion",
    "scenarios",
    "aggregate",
    "evaluations",
    "tolerate_failures",
    "grid_spacing_m",
    "random_layouts",
)
_GRADE_KEYS = ("name", "noise_v_per_m", "relative_noise", "cost", "range_v_per_m")
_BUDGET_KEYS = ("counts", "target", "evaluations")

_XYZ = "3 numbers (x, y, z) in metres"

# --------------------------------------------------------------------------------------------
# Public dataclasses
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class SourceSpec:
    """One ``[[source]]``: the nominal source, what is estimated and the scenario ranges.

    Attributes
    ----------
    source : Source
        The nominal source object (scenario 0).
    estimate : tuple of str
        Parameter names of the source that are unknown, in the source's own order
        (``charge_c, x_m, y_m, z_m`` then ``radius_m`` / ``sigma_m``).
    ranges : tuple of (str, float, float)
        ``(param_name, lo, hi)`` with ``lo <= hi``, in the same order: scenarios draw the
        parameter uniformly between the bounds. A range may be given for a known parameter.
    """

    source: Source
    estimate: tuple[str, ...]
    ranges: tuple[tuple[str, float, float], ...]


@dataclass(frozen=True)
class BackgroundSpec:
    """The optional uniform background field ``[background]``.

    Attributes
    ----------
    field_v_per_m : (3,) float
        Nominal background field, V/m, physics sign convention.
    estimate : bool
        Whether its three components are estimated (nuisance parameters).
    ranges : tuple of (str, float, float)
        ``("x_v_per_m", lo, hi)`` … for scenario sampling, V/m.
    """

    field_v_per_m: tuple[float, float, float]
    estimate: bool
    ranges: tuple[tuple[str, float, float], ...]


@dataclass(frozen=True)
class ProbeSpec:
    """The new meters to place, ``[probes]``.

    Attributes
    ----------
    count : int
        How many to place besides the installed ones (0 only when some are installed).
    component : str or (3,) float
        ``"x"``, ``"y"``, ``"z"``, ``"vector"`` (three axes), or a unit vector (normalised).
    noise_v_per_m : float
        1-sigma additive noise of one reading, V/m, > 0.
    relative_noise : float
        1-sigma proportional error as a fraction of the reading, >= 0.
    range_v_per_m : float
        Readings beyond this magnitude saturate, V/m, > 0 (``inf``: never).
    min_spacing_m : float
        No two probes closer than this, m, >= 0.
    gain : float
        Calibration factor of the new meters (reading = gain × field), > 0.
    """

    count: int
    component: str | tuple[float, float, float]
    noise_v_per_m: float
    relative_noise: float = 0.0
    range_v_per_m: float = math.inf
    min_spacing_m: float = 0.0
    gain: float = 1.0


@dataclass(frozen=True)
class InstalledProbe:
    """A meter already mounted, ``[[probes.installed]]``: fixed, counted in every score.

    Attributes
    ----------
    position_m : (3,) float
    name : str
    component : str, (3,) float or None
        ``None``: the same as ``[probes] component``.
    gain : float
        Calibration factor, > 0.
    grade : str or None
        The name of its ``[[grade]]``; ``None``: the noise and range of ``[probes]``.
    """

    position_m: tuple[float, float, float]
    name: str
    component: str | tuple[float, float, float] | None = None
    gain: float = 1.0
    grade: str | None = None


@dataclass(frozen=True)
class DesignSpec:
    """How layouts are scored and searched, ``[design]``.

    Attributes
    ----------
    criterion : str
        One of :data:`CRITERIA`.
    scenarios : int
        Scenario count, >= 1; scenario 0 is the nominal config.
    aggregate : str
        ``"mean"``, ``"worst"`` or ``"quantile:q"`` with 0 < q < 1.
    evaluations : int
        Objective evaluations the search may spend, >= 0.
    tolerate_failures : int
        0, or 1 to score every layout by its worst case with one meter failed.
    grid_spacing_m : float or None
        Candidate-grid spacing, m, > 0; ``None`` lets the search choose.
    random_layouts : int
        Random layouts drawn for the "best random" baseline, >= 1.
    """

    criterion: str = "d"
    scenarios: int = 64
    aggregate: str = "mean"
    evaluations: int = 300
    tolerate_failures: int = 0
    grid_spacing_m: float | None = None
    random_layouts: int = 1000

    @property
    def quantile(self) -> float | None:
        """q of a ``quantile:q`` aggregate, else ``None``."""
        if self.aggregate.startswith("quantile:"):
            return float(self.aggregate.split(":", 1)[1])
        return None


@dataclass(frozen=True)
class Grade:
    """A meter grade on offer, ``[[grade]]``; noise and range default to ``[probes]``.

    Attributes
    ----------
    name : str
    noise_v_per_m : float
        > 0, V/m.
    relative_noise : float
        >= 0.
    cost : float
        Per meter, >= 0, in the user's currency.
    range_v_per_m : float
        > 0, V/m (``inf``: never saturates).
    """

    name: str
    noise_v_per_m: float
    relative_noise: float
    cost: float
    range_v_per_m: float


@dataclass(frozen=True)
class BudgetSpec:
    """``[budget]``: the probe counts to try with every grade, and the criterion target.

    Attributes
    ----------
    counts : tuple of int
        Sorted, distinct, each >= 1.
    target : float or None
        The criterion must reach this (>= for ``d``, <= for the others).
    evaluations : int
        Continuous-refinement evaluations per option (default 0: each option is planned by
        greedy + exchange on the candidate grid, which ranks options well at a fraction of the
        time; raise it to polish every option).
    """

    counts: tuple[int, ...]
    target: float | None = None
    evaluations: int = 0


@dataclass(frozen=True)
class Config:
    """A checked config. Build it with :func:`load_config` or :func:`parse_config`.

    Attributes
    ----------
    path : str
        The file it came from (or ``"<config>"``), used in every message.
    text : str
        The config text as given (stored as provenance).
    title : str
    seed : int
        Every random draw comes from ``np.random.default_rng(seed)``.
    ground_z_m : float or None
        Height of the grounded conducting plane, m; ``None`` is free space.
    probes : ProbeSpec
    installed : tuple of InstalledProbe
    regions, keepouts : tuple of Region
    sources : tuple of SourceSpec
    background : BackgroundSpec or None
    design : DesignSpec
    grades : tuple of Grade
    budget : BudgetSpec or None
    storm_watch : bool
        True for a lightning caution: a ground plane with a source centred at least
        :data:`STORM_HEIGHT_M` above it, or ``caution = "lightning"``.
    caution : str
        One of :data:`CAUTIONS`: the caution line the summary carries.
    """

    path: str
    text: str
    title: str
    seed: int
    ground_z_m: float | None
    probes: ProbeSpec
    installed: tuple[InstalledProbe, ...]
    regions: tuple[Region, ...]
    keepouts: tuple[Region, ...]
    sources: tuple[SourceSpec, ...]
    background: BackgroundSpec | None
    design: DesignSpec
    grades: tuple[Grade, ...]
    budget: BudgetSpec | None
    storm_watch: bool
    caution: str = "general"

    @property
    def installed_m(self) -> np.ndarray:
        """Positions of the installed probes, ``(n_installed, 3) float``, m."""
        pos = [p.position_m for p in self.installed]
        return np.array(pos, dtype=float).reshape(len(pos), 3)

    def site(self) -> Site:
        """The mounting rules: regions, keep-outs, spacing and installed probes."""
        return Site(
            self.regions,
            self.keepouts,
            min_spacing_m=self.probes.min_spacing_m,
            installed_m=self.installed_m,
        )


# --------------------------------------------------------------------------------------------
# Entry points
# --------------------------------------------------------------------------------------------


def load_config(path: str | os.PathLike) -> Config:
    """Read and check a TOML config file.

    Parameters
    ----------
    path : str or path-like
        The file. Relative paths inside it (``density_path``) are relative to its folder.

    Raises
    ------
    InputError
        The file is missing or unreadable, or any key is bad (one message, naming the key).
    """
    name = os.fspath(path)
    try:
        text = Path(name).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"{name}: no such config file.") from None
    except IsADirectoryError:
        raise InputError(f"{name}: is a folder, not a config file.") from None
    except UnicodeDecodeError as exc:
        raise InputError(
            f"{name}: not UTF-8 text (byte {exc.start}); a TOML config must be UTF-8."
        ) from None
    except OSError as exc:
        raise InputError(f"{name}: cannot read the config file: {exc.strerror}.") from None
    return parse_config(text, name)


def parse_config(text: str, path: str = "<config>") -> Config:
    """Check a TOML config given as text.

    Parameters
    ----------
    text : str
        The TOML document.
    path : str
        Where it came from: named in every message, and its folder is the base of relative
        ``density_path`` values (the working folder for ``"<config>"``).

    Raises
    ------
    InputError
        On the first problem found, naming the file, the key, what was found and what is
        allowed.
    """
    path = os.fspath(path)
    ck = _Checker(path)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(_syntax_message(path, text, exc)) from None

    root = _Table(ck, data, "", "the top level")
    root.check_keys(_ROOT_KEYS)
    title = root.string("title", default="")
    seed = root.integer("seed", default=0, ge=0)
    ground_z_m = _parse_ground(root)
    probes, installed = _parse_probes(root, ground_z_m)
    regions = _parse_regions(root, "region", ground_z_m)
    keepouts = _parse_regions(root, "keepout", ground_z_m)
    sources = _parse_sources(root, ground_z_m, Path(path).expanduser().parent)
    background = _parse_background(root)
    design = _parse_design(root)
    _check_estimates(ck, sources, background, design)
    grades = _parse_grades(root, probes)
    _check_installed_grades(ck, installed, grades)
    budget = _parse_budget(root, grades, design)

    heuristic = ground_z_m is not None and any(
        s.source.center_m[2] - ground_z_m >= STORM_HEIGHT_M for s in sources
    )
    caution = root.choice("caution", CAUTIONS, default="lightning" if heuristic else "general")

    config = Config(
        path=path,
        text=text,
        title=title,
        seed=seed,
        ground_z_m=ground_z_m,
        probes=probes,
        installed=installed,
        regions=regions,
        keepouts=keepouts,
        sources=sources,
        background=background,
        design=design,
        grades=grades,
        budget=budget,
        storm_watch=caution == "lightning",
        caution=caution,
    )
    _check_feasible(ck, config)
    return config


# --------------------------------------------------------------------------------------------
# One parser per table
# --------------------------------------------------------------------------------------------


def _parse_ground(root: _Table) -> float | None:
    ground = root.table("ground")
    if ground is None:
        return None
    ground.check_keys(_GROUND_KEYS)
    return ground.number("z_m", what="the height of the conducting plane in metres")


def _parse_probes(root: _Table, ground_z_m: float | None):
    t = root.table("probes", required=True, hint="give at least `count` and `noise_v_per_m`")
    t.check_keys(_PROBE_KEYS)
    installed = _parse_installed(t, ground_z_m)
    count = t.integer("count", ge=0)
    if count == 0 and not installed:
        t.ck.fail(f"`{t.key('count')}` must be >= 1 when no [[probes.installed]] is given; got 0.")
    spec = ProbeSpec(
        count=count,
        component=t.component("component", default="z"),
        noise_v_per_m=t.number("noise_v_per_m", gt=0.0, what="the 1-sigma noise in V/m"),
        relative_noise=t.number("relative_noise", default=0.0, ge=0.0),
        range_v_per_m=t.number("range_v_per_m", default=math.inf, gt=0.0, allow_inf=True),
        min_spacing_m=t.number("min_spacing_m", default=0.0, ge=0.0),
        gain=t.number("gain", default=1.0, gt=0.0),
    )
    return spec, installed


def _parse_installed(probes: _Table, ground_z_m: float | None) -> tuple[InstalledProbe, ...]:
    out: list[InstalledProbe] = []
    seen: dict[str, int] = {}
    for k, t in enumerate(probes.array_of_tables("installed")):
        t.check_keys(_INSTALLED_KEYS)
        pos = t.vector("position_m", 3, what=_XYZ)
        _check_at_or_above_ground(t.ck, t.key("position_m"), pos[2], ground_z_m)
        name = t.string("name", default=f"installed-{k}", nonempty=True)
        if name in seen:
            t.ck.fail(
                f"`{t.key('name')}` = {_show(name)} is already the name of "
                f"probes.installed[{seen[name]}]; installed probe names must be unique."
            )
        seen[name] = k
        out.append(
            InstalledProbe(
                position_m=pos,
                name=name,
                component=t.component("component", default=None),
                gain=t.number("gain", default=1.0, gt=0.0),
                grade=t.string("grade", default=None, nonempty=True, what="a [[grade]] name"),
            )
        )
    return tuple(out)


def _parse_regions(root: _Table, which: str, ground_z_m: float | None) -> tuple[Region, ...]:
    """``[[region]]`` (no mounting point below the ground) or ``[[keepout]]``.

    A keep-out rectangle or ``[x, y]`` polygon is a footprint at every height, so its ``z_m``
    does not matter and may be left out (the ground height, or 0, is passed on).
    """
    mounting = which == "region"
    tables = root.array_of_tables(
        which,
        required=mounting,
        hint='where a probe may be mounted, e.g. kind = "rectangle", min_m, max_m, z_m',
    )
    out = []
    for t in tables:
        kind = t.choice("kind", REGION_KINDS)
        allowed = ("kind", *_REGION_KIND_KEYS[kind], *_REGION_COMMON[which][1:])
        elsewhere = (*_all_keys(_REGION_KIND_KEYS), "gain", "buffer_m")
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
            geom["start_m"] = t.vector("start_m", 3, what=_XYZ)
            geom["end_m"] = t.vector("end_m", 3, what=_XYZ)
        else:
            geom["positions_m"] = t.points("positions_m", dims=(3,), at_least=1)
        flat = kind == "rectangle" or (kind == "polygon" and len(geom["vertices_m"][0]) == 2)
        if flat or "z_m" in t.data:
            footprint_z = 0.0 if ground_z_m is None else ground_z_m
            default = _REQUIRED if mounting else footprint_z
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
            out.append(Region(kind, **geom, name=name, **extra))
        except ValueError as exc:
            t.ck.fail(f"{t.prefix}: {exc}")
    return tuple(out)


def _check_region_height(t: _Table, geom: dict, ground_z_m: float) -> None:
    """Mounting points of a region must be on or above the ground plane."""
    if geom.get("z_m") is not None:
        _check_at_or_above_ground(t.ck, t.key("z_m"), geom["z_m"], ground_z_m)
    for key in ("start_m", "end_m"):
        if key in geom:
            _check_at_or_above_ground(t.ck, t.key(key), geom[key][2], ground_z_m)
    for key in ("vertices_m", "positions_m"):
        for j, p in enumerate(geom.get(key, ())):
            if len(p) == 3:
                _check_at_or_above_ground(t.ck, f"{t.key(key)}[{j}]", p[2], ground_z_m)


def _parse_sources(root: _Table, ground_z_m: float | None, base: Path) -> tuple[SourceSpec, ...]:
    tables = root.array_of_tables(
        "source",
        required=True,
        hint='a charge distribution, e.g. kind = "point", charge_c, center_m',
    )
    return tuple(_parse_source(t, ground_z_m, base) for t in tables)


def _parse_source(t: _Table, ground_z_m: float | None, base: Path) -> SourceSpec:
    kind = t.choice("kind", SOURCE_KINDS)
    t.check_keys(
        ("kind", *_SOURCE_KIND_KEYS[kind], *_SOURCE_COMMON[1:]),
        elsewhere=_all_keys(_SOURCE_KIND_KEYS),
        owner=f"a {kind} source",
    )
    cls = KINDS[kind]
    if kind == "grid":
        args: tuple = (
            _load_density(t, base),
            t.vector("origin_m", 3, what=_XYZ + " (the lower corner of cell (0, 0, 0))"),
            t.spacing("spacing_m"),
        )
    elif kind == "line":
        args = (
            t.number("charge_c"),
            t.vector("start_m", 3, what=_XYZ),
            t.vector("end_m", 3, what=_XYZ),
        )
    else:
        args = (t.number("charge_c"), t.vector("center_m", 3, what=_XYZ))
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
    return SourceSpec(source=src, estimate=estimate, ranges=tuple(ranges))


def _parse_estimate(t: _Table, kind: str, param_names: tuple[str, ...]) -> tuple[str, ...]:
    raw = t.get("estimate", default=[])
    key = t.key("estimate")
    allowed_names = [_PARAM_TO_ESTIMATE[p] for p in param_names]
    allowed = ", ".join(allowed_names)
    if not isinstance(raw, list):
        t.ck.fail(
            f"`{key}` must be an array of parameter names (allowed: {allowed}); got {_found(raw)}."
        )
    chosen: set[str] = set()
    for j, name in enumerate(raw):
        if not isinstance(name, str):
            t.ck.fail(f"`{key}[{j}]` must be a parameter name ({allowed}); got {_found(name)}.")
        if name not in ESTIMATE_NAMES:
            t.ck.fail(
                f"`{key}[{j}]`: unknown parameter name {_show(name)}; allowed for a {kind} "
                f"source: {allowed}{_did_you_mean(name, allowed_names) or '.'}"
            )
        if name not in allowed_names:
            t.ck.fail(
                f"`{key}[{j}]`: `{name}` is not a parameter of a {kind} source; allowed: {allowed}."
            )
        if name in chosen:
            t.ck.fail(f"`{key}[{j}]`: `{name}` is listed twice; list each parameter once.")
        chosen.add(name)
    return tuple(p for p in param_names if _PARAM_TO_ESTIMATE[p] in chosen)


def _load_density(t: _Table, base: Path) -> np.ndarray:
    raw = t.string("density_path", nonempty=True, what="the path of a .npy file of C/m³")
    key = t.key("density_path")
    p = Path(raw).expanduser()
    full = p if p.is_absolute() else base / p
    if not full.is_file():
        t.ck.fail(
            f"`{key}` = {_show(raw)}: no such file ({full}); relative paths start at the "
            "config file's folder."
        )
    try:
        arr = np.load(full, allow_pickle=False)
    except (OSError, ValueError) as exc:
        t.ck.fail(f"`{key}` = {_show(raw)}: not a readable .npy array file ({exc}).")
    if not isinstance(arr, np.ndarray) or arr.ndim != 3:
        shape = getattr(arr, "shape", "an archive")
        t.ck.fail(
            f"`{key}` = {_show(raw)}: the array must be 3-D (nx, ny, nz) of C/m³; "
            f"got shape {shape}."
        )
    if arr.dtype.kind not in "iuf" or min(arr.shape) < 1:
        t.ck.fail(
            f"`{key}` = {_show(raw)}: the array must hold real numbers and have no empty axis; "
            f"got dtype {arr.dtype} and shape {arr.shape}."
        )
    arr = arr.astype(float)
    if not np.all(np.isfinite(arr)):
        t.ck.fail(
            f"`{key}` = {_show(raw)}: the density must be finite; the array holds NaN or inf."
        )
    return arr


def _check_source_above_ground(t: _Table, src: Source, ranges, ground_z_m: float) -> None:
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


def _parse_background(root: _Table) -> BackgroundSpec | None:
    t = root.table("background")
    if t is None:
        return None
    t.check_keys(_BACKGROUND_KEYS)
    ranges = ()
    if "field_range_v_per_m" in t.data:
        pairs = t.pairs("field_range_v_per_m", 3, unit="V/m")
        ranges = tuple((f"{a}_v_per_m", lo, hi) for a, (lo, hi) in zip("xyz", pairs, strict=True))
    return BackgroundSpec(
        field_v_per_m=t.vector("field_v_per_m", 3, what="3 numbers (x, y, z) in V/m"),
        estimate=t.boolean("estimate", default=True),
        ranges=ranges,
    )


def _parse_design(root: _Table) -> DesignSpec:
    t = root.table("design")
    if t is None:
        return DesignSpec()
    t.check_keys(_DESIGN_KEYS)
    d = DesignSpec()
    return DesignSpec(
        criterion=t.choice("criterion", CRITERIA, default=d.criterion),
        scenarios=t.integer("scenarios", default=d.scenarios, ge=1),
        aggregate=_parse_aggregate(t, d.aggregate),
        evaluations=t.integer("evaluations", default=d.evaluations, ge=0),
        tolerate_failures=t.integer("tolerate_failures", default=0, choices=(0, 1)),
        grid_spacing_m=t.number("grid_spacing_m", default=None, gt=0.0),
        random_layouts=t.integer("random_layouts", default=d.random_layouts, ge=1),
    )


def _parse_aggregate(t: _Table, default: str) -> str:
    raw = t.string("aggregate", default=default)
    allowed = '"mean", "worst" or "quantile:q" with 0 < q < 1 (e.g. "quantile:0.9")'
    if raw in ("mean", "worst"):
        return raw
    m = re.fullmatch(r"quantile:\s*(\S+)", raw)
    if m:
        try:
            q = float(m.group(1))
        except ValueError:
            q = math.nan
        if 0.0 < q < 1.0:
            return f"quantile:{q!r}"
    t.ck.fail(f"`{t.key('aggregate')}` must be {allowed}; got {_show(raw)}.")


def _check_estimates(
    ck: _Checker, sources: tuple[SourceSpec, ...], bg: BackgroundSpec | None, design: DesignSpec
) -> None:
    n = sum(len(s.estimate) for s in sources) + (3 if bg is not None and bg.estimate else 0)
    if n == 0:
        ck.fail(
            "nothing to estimate: no `source[i].estimate` lists a parameter and no [background] "
            'is estimated; add e.g. estimate = ["charge", "x", "y", "z"] to a [[source]].'
        )
    # The location and charge criteria read source 0's bound: its parameters must be unknowns.
    need = {"location": ("x_m", "y_m"), "charge": ("charge_c",)}.get(design.criterion, ())
    missing = [p for p in need if p not in sources[0].estimate]
    if missing:
        names = ", ".join(_show(_PARAM_TO_ESTIMATE[p]) for p in missing)
        ck.fail(
            f"`design.criterion` = {_show(design.criterion)} scores source 0, but "
            f"`source[0].estimate` lacks {names}; add {'them' if len(missing) > 1 else 'it'} "
            'there or choose criterion "d".'
        )
    if design.criterion == "charge" and sources[0].source.neutral:
        ck.fail(
            '`design.criterion` = "charge" is the bound relative to |q|, and source 0 has '
            'q = 0 C; give source 0 a nonzero charge or choose criterion "d".'
        )


def _check_installed_grades(ck, installed, grades) -> None:
    """An installed meter's ``grade`` must name one of the ``[[grade]]`` tables."""
    names = [g.name for g in grades]
    for k, p in enumerate(installed):
        if p.grade is not None and p.grade not in names:
            listed = ", ".join(names) or "none: the config has no [[grade]] table"
            ck.fail(
                f"`probes.installed[{k}].grade` = {_show(p.grade)} names no [[grade]]; the grades "
                f"are: {listed}."
            )


def _parse_grades(root: _Table, probes: ProbeSpec) -> tuple[Grade, ...]:
    out: list[Grade] = []
    seen: dict[str, int] = {}
    for i, t in enumerate(root.array_of_tables("grade")):
        t.check_keys(_GRADE_KEYS)
        name = t.string("name", nonempty=True, what="a name for this meter grade")
        if name in seen:
            t.ck.fail(
                f"`{t.key('name')}` = {_show(name)} is already the name of grade[{seen[name]}]; "
                "grade names must be unique."
            )
        seen[name] = i
        out.append(
            Grade(
                name=name,
                noise_v_per_m=t.number("noise_v_per_m", default=probes.noise_v_per_m, gt=0.0),
                relative_noise=t.number("relative_noise", default=probes.relative_noise, ge=0.0),
                cost=t.number("cost", ge=0.0, what="the cost per meter"),
                range_v_per_m=t.number(
                    "range_v_per_m", default=probes.range_v_per_m, gt=0.0, allow_inf=True
                ),
            )
        )
    return tuple(out)


def _parse_budget(root: _Table, grades: tuple[Grade, ...], design: DesignSpec) -> BudgetSpec | None:
    t = root.table("budget")
    if t is None:
        return None
    t.check_keys(_BUDGET_KEYS)
    if not grades:
        t.ck.fail("[budget] needs at least one [[grade]] (name, noise_v_per_m, cost) to compare.")
    raw = t.get("counts")
    key = t.key("counts")
    if not isinstance(raw, list) or not raw:
        t.ck.fail(f"`{key}` must be a non-empty array of whole numbers >= 1; got {_found(raw)}.")
    counts = [t.ck.integer(f"{key}[{j}]", v, ge=1) for j, v in enumerate(raw)]
    dupes = sorted({c for c in counts if counts.count(c) > 1})
    if dupes:
        t.ck.fail(
            f"`{key}` lists {', '.join(map(str, dupes))} more than once; list each count once."
        )
    target = t.number("target", default=None)
    if target is not None and design.criterion != "d" and not target > 0.0:
        t.ck.fail(
            f"`{t.key('target')}` must be > 0 for criterion {_show(design.criterion)} (a bound "
            f"to stay under); got {target!r}."
        )
    evaluations = t.integer("evaluations", default=0, ge=0)
    return BudgetSpec(counts=tuple(sorted(counts)), target=target, evaluations=evaluations)


def _check_feasible(ck: _Checker, config: Config) -> None:
    """Let the site check that the mounting rules can hold for every count asked for."""
    checks = [("probes.count", config.probes.count)] if config.probes.count > 0 else []
    if config.budget is not None:
        checks.append(("budget.counts", max(config.budget.counts)))
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


# --------------------------------------------------------------------------------------------
# Checking helpers
# --------------------------------------------------------------------------------------------

_REQUIRED: Any = object()


class _Checker:
    """Checks of raw TOML values; every failure names the file."""

    def __init__(self, path: str) -> None:
        self.path = path

    def fail(self, message: str) -> NoReturn:
        raise InputError(f"{self.path}: {message}")

    def number(
        self,
        key: str,
        value: Any,
        *,
        gt: float | None = None,
        ge: float | None = None,
        allow_inf: bool = False,
    ) -> float:
        rule = "a number" + (
            f" > {gt:g}" if gt is not None else f" >= {ge:g}" if ge is not None else ""
        )
        if isinstance(value, bool) or not isinstance(value, int | float):
            self.fail(f"`{key}` must be {rule}; got {_found(value)}{_quote_hint(value)}.")
        try:
            x = float(value)
        except OverflowError:
            x = math.inf
        if math.isnan(x) or (math.isinf(x) and not (allow_inf and x > 0)):
            extra = " (inf means no limit)" if allow_inf else ""
            self.fail(f"`{key}` must be a finite number{extra}; got {_show(value)}.")
        if gt is not None and not x > gt:
            self.fail(f"`{key}` must be > {gt:g}; got {x!r}.")
        if ge is not None and not x >= ge:
            self.fail(f"`{key}` must be >= {ge:g}; got {x!r}.")
        return x

    def integer(
        self, key: str, value: Any, *, ge: int | None = None, choices: tuple[int, ...] = ()
    ) -> int:
        rule = (
            f"one of {', '.join(map(str, choices))}"
            if choices
            else "a whole number" + (f" >= {ge}" if ge is not None else "")
        )
        if isinstance(value, bool) or not isinstance(value, int):
            self.fail(f"`{key}` must be {rule}; got {_found(value)}{_quote_hint(value)}.")
        if (choices and value not in choices) or (ge is not None and value < ge):
            self.fail(f"`{key}` must be {rule}; got {value}.")
        return int(value)

    def vector(self, key: str, value: Any, n: int, what: str, **rule) -> tuple[float, ...]:
        if not isinstance(value, list):
            self.fail(f"`{key}` must be {what}; got {_found(value)}.")
        if len(value) != n:
            self.fail(f"`{key}` must be {what}; got {len(value)}: {_show(value)}.")
        return tuple(self.number(f"{key}[{j}]", v, **rule) for j, v in enumerate(value))

    def pair(self, key: str, value: Any, *, unit: str = "", **rule) -> tuple[float, float]:
        lo, hi = self.vector(key, value, 2, f"a range [lo, hi]{unit and ' in ' + unit}", **rule)
        if lo > hi:
            self.fail(
                f"`{key}` must be [lo, hi] with lo <= hi; got {_show(value)}. Bounds are never "
                "swapped: write the lower one first."
            )
        return lo, hi


class _Table:
    """One TOML table with its dotted path (``source[1]``) and a label for messages."""

    def __init__(self, ck: _Checker, data: dict, prefix: str, label: str) -> None:
        self.ck = ck
        self.data = data
        self.prefix = prefix
        self.label = label

    @property
    def _where(self) -> str:
        return f"in {self.label}" if self.prefix else f"at {self.label}"

    def key(self, name: str) -> str:
        return f"{self.prefix}.{name}" if self.prefix else name

    def check_keys(
        self, allowed: tuple[str, ...], *, elsewhere: tuple[str, ...] = (), owner: str = ""
    ) -> None:
        """Reject keys not in ``allowed``; ``elsewhere`` are keys of other kinds of ``owner``."""
        for name, value in self.data.items():
            if name in allowed:
                continue
            what = "table" if _is_table(value) else "key"
            listing = ", ".join(allowed)
            if name in elsewhere:
                self.ck.fail(
                    f"{what} `{name}` does not apply to {owner} ({self.label}); allowed: {listing}."
                )
            close = difflib.get_close_matches(name, allowed, n=1)
            if close:
                self.ck.fail(f"unknown {what} `{name}` {self._where}; did you mean `{close[0]}`?")
            self.ck.fail(f"unknown {what} `{name}` {self._where}; allowed: {listing}.")

    def get(self, name: str, default: Any = _REQUIRED, what: str = "") -> Any:
        if name in self.data:
            return self.data[name]
        if default is _REQUIRED:
            self.ck.fail(f"`{self.key(name)}` is missing; give {what or 'it'}.")
        return default

    def number(self, name, default=_REQUIRED, *, what="", gt=None, ge=None, allow_inf=False):
        rule = "a number" + (
            f" > {gt:g}" if gt is not None else f" >= {ge:g}" if ge is not None else ""
        )
        value = self.get(name, default, what=f"{what} ({rule})" if what else rule)
        if name not in self.data:
            return value
        return self.ck.number(self.key(name), value, gt=gt, ge=ge, allow_inf=allow_inf)

    def integer(self, name, default=_REQUIRED, *, ge=None, choices=()):
        value = self.get(
            name, default, what="a whole number" + (f" >= {ge}" if ge is not None else "")
        )
        if name not in self.data:
            return value
        return self.ck.integer(self.key(name), value, ge=ge, choices=choices)

    def string(self, name, default=_REQUIRED, *, nonempty=False, what="a string"):
        value = self.get(name, default, what=what)
        if name not in self.data:
            return value
        if not isinstance(value, str):
            self.ck.fail(f"`{self.key(name)}` must be {what}; got {_found(value)}.")
        if nonempty and not value.strip():
            self.ck.fail(f"`{self.key(name)}` must not be empty; give {what}.")
        return value

    def boolean(self, name, default=_REQUIRED) -> bool:
        value = self.get(name, default, what="true or false")
        if name in self.data and not isinstance(value, bool):
            self.ck.fail(f"`{self.key(name)}` must be true or false; got {_found(value)}.")
        return value

    def choice(self, name, choices: tuple[str, ...], default=_REQUIRED) -> str:
        listing = ", ".join(_show(c) for c in choices)
        value = self.get(name, default, what=f"one of {listing}")
        if isinstance(value, str) and value in choices:
            return value
        hint = _did_you_mean(value, choices) if isinstance(value, str) else ""
        self.ck.fail(
            f"`{self.key(name)}` must be one of {listing}; got {_found(value)}{hint or '.'}"
        )

    def vector(self, name, n, *, what, default=_REQUIRED, **rule):
        value = self.get(name, default, what=what)
        if name not in self.data:
            return value
        return self.ck.vector(self.key(name), value, n, what, **rule)

    def pair(self, name, **rule) -> tuple[float, float]:
        return self.ck.pair(self.key(name), self.get(name), **rule)

    def pairs(self, name, n, unit="m") -> tuple[tuple[float, float], ...]:
        key = self.key(name)
        value = self.get(name)
        what = f"{n} ranges [[x_lo, x_hi], [y_lo, y_hi], [z_lo, z_hi]] in {unit}"
        if not isinstance(value, list) or len(value) != n:
            got = f"{len(value)}: {_show(value)}" if isinstance(value, list) else _found(value)
            self.ck.fail(f"`{key}` must be {what}; got {got}.")
        return tuple(self.ck.pair(f"{key}[{j}]", v, unit=unit) for j, v in enumerate(value))

    def points(self, name, *, dims: tuple[int, ...], at_least: int):
        """An array of points, each with one of ``dims`` coordinates, all the same length."""
        key = self.key(name)
        shape = " or ".join(f"[{', '.join('xyz'[:d])}]" for d in dims)
        what = f"an array of at least {at_least} points {shape} in metres"
        value = self.get(name, what=what)
        if not isinstance(value, list) or len(value) < at_least:
            got = f"{len(value)} points" if isinstance(value, list) else _found(value)
            self.ck.fail(f"`{key}` must be {what}; got {got}.")
        d0 = len(value[0]) if isinstance(value[0], list) and len(value[0]) in dims else dims[0]
        return tuple(
            self.ck.vector(
                f"{key}[{j}]",
                v,
                d0,
                f"{d0} numbers {shape[:0]}in metres"
                + ("" if len(dims) == 1 else ", like the first point"),
            )
            for j, v in enumerate(value)
        )

    def spacing(self, name) -> tuple[float, float, float]:
        value = self.get(name, what="a number > 0 or 3 numbers > 0 (dx, dy, dz) in metres")
        if isinstance(value, list):
            return self.ck.vector(
                self.key(name), value, 3, "3 numbers > 0 (dx, dy, dz) in metres", gt=0.0
            )
        x = self.ck.number(self.key(name), value, gt=0.0)
        return (x, x, x)

    def component(self, name, default=_REQUIRED):
        value = self.get(name, default)
        if name not in self.data:
            return value
        return _component(self.ck, self.key(name), value)

    def table(self, name, *, required=False, hint=""):
        value = self.get(name, None)
        if value is None:
            if required:
                self.ck.fail(f"the [{name}] table is missing; {hint}.")
            return None
        if not isinstance(value, dict):
            self.ck.fail(
                f"`{self.key(name)}` must be a table [{self.key(name)}]; got {_found(value)}."
            )
        return _Table(self.ck, value, self.key(name), f"[{self.key(name)}]")

    def array_of_tables(self, name, *, required=False, hint="") -> list[_Table]:
        full = self.key(name)
        value = self.get(name, None)
        if value is None:
            if required:
                self.ck.fail(f"no [[{full}]] table is given; at least one is needed: {hint}.")
            return []
        if isinstance(value, dict):
            self.ck.fail(
                f"`{full}` must be an array of tables, each headed [[{full}]]; got a single "
                f"table [{full}]: write [[{full}]] (two brackets)."
            )
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            self.ck.fail(
                f"`{full}` must be an array of tables, each headed [[{full}]]; got {_found(value)}."
            )
        if required and not value:
            self.ck.fail(f"no [[{full}]] table is given; at least one is needed: {hint}.")
        return [_Table(self.ck, v, f"{full}[{i}]", f"{full}[{i}]") for i, v in enumerate(value)]


def _component(ck: _Checker, key: str, value: Any) -> str | tuple[float, float, float]:
    allowed = f"one of {', '.join(_show(c) for c in COMPONENTS)} or a unit vector [ax, ay, az]"
    if isinstance(value, str):
        if value in COMPONENTS:
            return value
        hint = _did_you_mean(value, COMPONENTS) or "."
        ck.fail(f"`{key}` must be {allowed}; got {_show(value)}{hint}")
    if not isinstance(value, list):
        ck.fail(f"`{key}` must be {allowed}; got {_found(value)}.")
    v = np.array(ck.vector(key, value, 3, f"{allowed} (3 numbers)"))
    norm = float(np.linalg.norm(v))
    if norm == 0.0:
        ck.fail(
            f"`{key}` must be {allowed}; got the zero vector {_show(value)}, "
            "which has no direction."
        )
    u = v / norm
    return (float(u[0]), float(u[1]), float(u[2]))


def _check_at_or_above_ground(ck: _Checker, key: str, z: float, ground_z_m: float | None) -> None:
    if ground_z_m is not None and z < ground_z_m:
        ck.fail(
            f"`{key}` puts a probe at z = {z:g} m, below the ground plane at z = {ground_z_m:g} m "
            "(`ground.z_m`); probes mount on or above the ground."
        )


def _all_keys(per_kind: dict[str, tuple[str, ...]]) -> tuple[str, ...]:
    return tuple(dict.fromkeys(k for keys in per_kind.values() for k in keys))


def _is_table(value: Any) -> bool:
    return isinstance(value, dict) or (
        isinstance(value, list) and bool(value) and all(isinstance(v, dict) for v in value)
    )


def _show(value: Any, limit: int = 60) -> str:
    """A value as it would be written in TOML, shortened."""
    if isinstance(value, bool):
        text = "true" if value else "false"
    elif isinstance(value, str):
        text = json.dumps(value, ensure_ascii=False)
    elif isinstance(value, float):
        text = repr(value)
    elif isinstance(value, dict):
        text = "{" + ", ".join(f"{k} = {_show(v)}" for k, v in value.items()) + "}"
    elif isinstance(value, list):
        text = "[" + ", ".join(_show(v) for v in value) + "]"
    else:
        text = str(value)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _type_name(value: Any) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a number"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "an array"
    return "a date/time"


def _found(value: Any) -> str:
    return f"{_show(value)} ({_type_name(value)})"


def _quote_hint(value: Any) -> str:
    if isinstance(value, str):
        try:
            float(value)
        except ValueError:
            return ""
        return "; write numbers without quotes"
    return ""


def _did_you_mean(word: str, options) -> str:
    close = difflib.get_close_matches(word, list(options), n=1)
    return f"; did you mean {_show(close[0])}?" if close else ""


_TOML_WHERE = re.compile(r"\s*\(at line (\d+), column (\d+)\)\s*$")
_TOML_END = re.compile(r"\s*\(at end of document\)\s*$")


def _syntax_message(path: str, text: str, exc: tomllib.TOMLDecodeError) -> str:
    """``file: line N: TOML syntax error: …`` from tomllib's message (3.11 has no lineno attr)."""
    msg = str(exc.args[0]) if exc.args else str(exc)
    line = getattr(exc, "lineno", None)
    col = getattr(exc, "colno", None)
    m = _TOML_WHERE.search(msg)
    if m:
        line, col = int(m.group(1)), int(m.group(2))
        msg = msg[: m.start()]
    elif _TOML_END.search(msg):
        msg = msg[: _TOML_END.search(msg).start()]
        line = max(1, len(text.splitlines()))
        return f"{path}: line {line} (end of file): TOML syntax error: {msg}."
    where = f"line {line}" if line is not None else "?"
    column = f" (column {col})" if col is not None else ""
    return f"{path}: {where}: TOML syntax error: {msg}{column}."
