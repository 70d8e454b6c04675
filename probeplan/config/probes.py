"""``[probes]`` and ``[[probes.installed]]``: the meters to place and the ones already mounted."""

from __future__ import annotations

import math

from ..geo import Frame
from .frame import lonlat_position, one_of
from .ground import check_at_or_above_ground
from .model import InstalledProbe, ProbeSpec
from .reader import XYZ, Table, show

PROBE_KEYS = (
    "count",
    "component",
    "noise_v_per_m",
    "relative_noise",
    "range_v_per_m",
    "min_spacing_m",
    "gain",
    "installed",
)
INSTALLED_KEYS = ("position_m", "position_lonlat", "name", "component", "gain", "grade")


def parse_probes(root: Table, ground_z_m: float | None, frame: Frame | None = None):
    t = root.table("probes", required=True, hint="give at least `count` and `noise_v_per_m`")
    t.check_keys(PROBE_KEYS)
    installed = _parse_installed(t, ground_z_m, frame)
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


def _parse_installed(
    probes: Table, ground_z_m: float | None, frame: Frame | None
) -> tuple[InstalledProbe, ...]:
    out: list[InstalledProbe] = []
    seen: dict[str, int] = {}
    for k, t in enumerate(probes.array_of_tables("installed")):
        t.check_keys(INSTALLED_KEYS)
        key = one_of(t, "position_m", "position_lonlat")
        if key == "position_m":
            pos = t.vector("position_m", 3, what=XYZ)
        else:
            pos = lonlat_position(t, key, frame, ground_z_m)
        check_at_or_above_ground(t.ck, t.key(key), pos[2], ground_z_m)
        name = t.string("name", default=f"installed-{k}", nonempty=True)
        if name in seen:
            t.ck.fail(
                f"`{t.key('name')}` = {show(name)} is already the name of "
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
