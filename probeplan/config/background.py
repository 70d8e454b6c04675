"""``[background]``: the optional uniform background field, a nuisance parameter."""

from __future__ import annotations

from .model import BackgroundSpec
from .reader import Table

BACKGROUND_KEYS = ("field_v_per_m", "estimate", "field_range_v_per_m")


def parse_background(root: Table) -> BackgroundSpec | None:
    t = root.table("background")
    if t is None:
        return None
    t.check_keys(BACKGROUND_KEYS)
    ranges = ()
    if "field_range_v_per_m" in t.data:
        pairs = t.pairs("field_range_v_per_m", 3, unit="V/m")
        ranges = tuple((f"{a}_v_per_m", lo, hi) for a, (lo, hi) in zip("xyz", pairs, strict=True))
    return BackgroundSpec(
        field_v_per_m=t.vector("field_v_per_m", 3, what="3 numbers (x, y, z) in V/m"),
        estimate=t.boolean("estimate", default=True),
        ranges=ranges,
    )
