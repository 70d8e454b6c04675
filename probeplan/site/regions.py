"""Regions as the config gives them: a kind from the registry, wrapped in what it carries.

Map of the region modules (read in this order):

1. :mod:`.protocol` — :class:`Region`, what every kind and wrapper answers, and :class:`Kind`,
   the base of the kinds.
2. :mod:`.kinds` — :class:`Rectangle`, :class:`Polygon` (horizontal with ``[x, y]`` vertices,
   or planar in 3-D such as a wall), :class:`Segment` (a fence, a rail, a mast) and
   :class:`Points` (listed mounting points).
3. This module — the wrappers :class:`Gained` (a mounting region's calibration factor) and
   :class:`Buffered` (a keep-out grown by a clearance), the registry :data:`REGION_KINDS` the
   config parser dispatches through, and :func:`make_region`, one call from a table of keys to
   a checked region.

A new kind is one frozen class in :mod:`.kinds` and one line in :data:`REGION_KINDS`.
"""

from __future__ import annotations

from dataclasses import MISSING, dataclass, fields

import numpy as np

from ._common import check_name, describe, number, points, what_of
from .kinds import Points, Polygon, Rectangle, Segment, StructureSurface
from .protocol import Kind, Region

# --------------------------------------------------------------------------------------------
# Wrappers: what a region carries besides its geometry
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _Wrapper:
    """A region with one extra property; everything else is the wrapped region's."""

    region: Region

    def __post_init__(self) -> None:
        if not isinstance(self.region, Region):
            raise ValueError(f"`region` must be a Region; got {type(self.region).__name__}.")

    def __getattr__(self, attr: str):
        # Only reached for names the wrapper lacks. Dunder lookups (pickle, copy) and `region`
        # itself must fail plainly, or an instance without its fields yet would recurse.
        if attr.startswith("__") or attr == "region":
            raise AttributeError(attr)
        return getattr(self.region, attr)

    @property
    def what(self) -> str:
        return "a " + describe(self.region)


@dataclass(frozen=True, eq=False)
class Gained(_Wrapper):
    """A mounting region whose meters read ``gain`` times the undisturbed field (a mast or a
    structure enhances it).

    Parameters
    ----------
    region : Region
        The mounting region.
    gain : float
        Calibration factor of a meter mounted there, > 0.
    """

    gain: float = 1.0

    def __post_init__(self) -> None:
        super().__post_init__()
        gain = number(self.gain, "gain", self.what)
        if gain <= 0.0:
            raise ValueError(f"`gain` of {self.what} must be > 0; got {gain}.")
        object.__setattr__(self, "gain", gain)


@dataclass(frozen=True, eq=False)
class Buffered(_Wrapper):
    """A keep-out grown by a clearance (see :meth:`Region.contains` for the semantics).

    The tool only applies the clearance it is given: clearances around tanks, vents, masts and
    high-voltage parts come from local codes, the applicable standards and qualified, licensed
    practice.

    Parameters
    ----------
    region : Region
        The keep-out zone.
    buffer_m : float
        Grow the zone by this distance, m, >= 0.
    """

    buffer_m: float = 0.0

    def __post_init__(self) -> None:
        super().__post_init__()
        buffer_m = number(self.buffer_m, "buffer_m", self.what)
        if buffer_m < 0.0:
            raise ValueError(f"`buffer_m` of {self.what} must be >= 0 m; got {buffer_m}.")
        object.__setattr__(self, "buffer_m", buffer_m)
        object.__setattr__(self, "_grown", self.region._grow(buffer_m))

    def contains(self, points_m) -> np.ndarray:
        return self._contains(points(points_m))

    def _contains(self, p: np.ndarray) -> np.ndarray:
        return self.region._keepout(p, self.buffer_m, self._grown)


# --------------------------------------------------------------------------------------------
# The registry
# --------------------------------------------------------------------------------------------

#: Region kinds by their ``kind`` key, in the order messages list them.
REGION_KINDS: dict[str, type[Kind]] = {
    "rectangle": Rectangle,
    "polygon": Polygon,
    "segment": Segment,
    "points": Points,
    "structure": StructureSurface,
}


def _is_default(value, default: float) -> bool:
    return isinstance(value, int | float) and value == default


def make_region(
    kind: str, *, name: str = "", gain: float = 1.0, buffer_m: float = 0.0, **geometry
) -> Region:
    """A checked region from its kind and keys, as a ``[[region]]`` or ``[[keepout]]`` table
    gives them.

    Parameters
    ----------
    kind : str
        A key of :data:`REGION_KINDS`.
    name : str
        Free text used in messages.
    gain : float
        Mounting regions: calibration factor, > 0; a value other than 1 wraps the region in
        :class:`Gained`.
    buffer_m : float
        Keep-outs: clearance, m, >= 0; a value other than 0 wraps the region in
        :class:`Buffered`.
    **geometry
        The kind's own keys (see each kind's class); a key given as None counts as absent.

    Returns
    -------
    Region

    Raises
    ------
    ValueError
        One message naming the key, what was found and what is allowed.
    """
    check_name(name)
    if not isinstance(kind, str) or kind not in REGION_KINDS:
        allowed = ", ".join(repr(k) for k in REGION_KINDS)
        raise ValueError(f"`kind` of a region must be one of {allowed}; got {kind!r}.")
    cls = REGION_KINDS[kind]
    what = what_of(kind, name)
    keys = {f.name: f for f in fields(cls) if f.name != "name"}
    geometry = {k: v for k, v in geometry.items() if v is not None}
    for key in geometry:
        if key not in keys:
            raise ValueError(
                f"`{key}` is not used by {what}; a {kind} takes {cls.takes}. Remove `{key}`."
            )
    for key, f in keys.items():
        if key not in geometry and f.default is MISSING:
            raise ValueError(f"{what} needs `{key}`; a {kind} takes {cls.takes}.")
    region: Region = cls(name=name, **geometry)
    if not _is_default(gain, 1.0):
        region = Gained(region, gain)
    if not _is_default(buffer_m, 0.0):
        region = Buffered(region, buffer_m)
    return region
