"""``[frame]``: the site's WGS84 origin, and positions given as longitude and latitude.

With a frame, a position may be written ``position_lonlat = [lon, lat]`` or ``[lon, lat,
height above the ground]`` (degrees, degrees, metres) wherever ``position_m`` is allowed; it
becomes the frame's local east-north-up metres (:class:`probeplan.geo.Frame`).
"""

from __future__ import annotations

from ..errors import InputError
from ..geo import Frame
from .reader import Table, found, show

FRAME_KEYS = ("origin_lon_deg", "origin_lat_deg", "origin_height_m")
LONLAT = "[longitude, latitude] or [longitude, latitude, height above the ground] (deg, deg, m)"


def parse_frame(root: Table) -> Frame | None:
    t = root.table("frame")
    if t is None:
        return None
    t.check_keys(FRAME_KEYS)
    lon = t.number("origin_lon_deg", what="the origin's WGS84 longitude in degrees east")
    lat = t.number("origin_lat_deg", what="the origin's WGS84 latitude in degrees north")
    height = t.number("origin_height_m", default=0.0)
    try:
        return Frame(lon, lat, height)
    except InputError as exc:
        t.ck.fail(str(exc))


def lonlat_position(
    t: Table, name: str, frame: Frame | None, ground_z_m: float | None, *, need_height=False
) -> tuple[float, float, float]:
    """``t[name]`` = [lon, lat] or [lon, lat, height above the ground] as local (x, y, z), m.

    A missing height puts the point on the ground (z = ground, or 0 in free space).
    """
    key = t.key(name)
    if frame is None:
        t.ck.fail(
            f"`{key}` needs a [frame] table (origin_lon_deg, origin_lat_deg) to turn longitude "
            "and latitude into metres; add one, or give the position in metres."
        )
    value = t.get(name)
    sizes = (3,) if need_height else (2, 3)
    what = LONLAT if not need_height else "[longitude, latitude, height above the ground]"
    if not isinstance(value, list) or len(value) not in sizes:
        got = f"{len(value)}: {show(value)}" if isinstance(value, list) else found(value)
        t.ck.fail(f"`{key}` must be {what}; got {got}.")
    lon, lat, *h = (t.ck.number(f"{key}[{j}]", v) for j, v in enumerate(value))
    problem = frame.check_lonlat([lon], [lat])
    if problem is not None:
        t.ck.fail(f"`{key}` = {show(value)}: {problem[1]}.")
    x, y, _ = frame.to_local([lon], [lat])[0]
    ground = 0.0 if ground_z_m is None else ground_z_m
    return float(x), float(y), ground + (h[0] if h else 0.0)


def one_of(t: Table, metres: str, lonlat: str) -> str:
    """Which of the two keys ``t`` gives (``metres`` when neither: its own message then says
    what is missing); both is an error."""
    if metres in t.data and lonlat in t.data:
        t.ck.fail(f"{t.label}: give `{metres}` (local metres) or `{lonlat}` ({LONLAT}), not both.")
    return lonlat if lonlat in t.data else metres
