"""The region protocol and the base of the region kinds.

:class:`Region` is what the site, the layouts and the search ask of a mounting region or a
keep-out zone, whatever its kind or wrapper. :class:`Kind` is the base of the kinds in
:mod:`.kinds`: its public methods check their input once and call the unchecked per-kind
methods (two levels: strict arrays below, validation above).

Units: metres throughout. Shapes: ``n_points`` positions are ``(n_points, 3)`` arrays of
``(x, y, z)``; z is up. Boundaries count as part of a region (within :data:`TOLERANCE_M`).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import Any, ClassVar, Protocol, runtime_checkable

import numpy as np
import shapely

from ._common import TOLERANCE_M, check_name, describe, points, positive_int, spacing, what_of
from ._plane import Plane

# --------------------------------------------------------------------------------------------
# The protocol
# --------------------------------------------------------------------------------------------


@runtime_checkable
class Region(Protocol):
    """What the site asks of a mounting region or a keep-out zone, whatever its kind.

    Attributes
    ----------
    kind : str
        The key of the kind in :data:`REGION_KINDS`.
    name : str
        Free text used in messages ("" when unnamed).
    dimension : int
        2 for a rectangle or polygon, 1 for a segment, 0 for points.
    unit_dim : int
        Dimension of the unit box of :meth:`from_unit`: 2, 1 (segment) or 1 (points).
    measure : float
        Area in m² (2-D), length in m (1-D) or number of points (0-D).
    gain : float
        Calibration factor of a meter mounted here; 1 unless wrapped in :class:`Gained`.
    buffer_m : float
        Clearance a keep-out is grown by, m; 0 unless wrapped in :class:`Buffered`.
    is_footprint : bool
        True for a horizontal rectangle or 2-D polygon (as a keep-out: a footprint).
    plane : Plane or None
        The plane and in-plane outline of a 2-D region; None for the others.
    """

    kind: str
    name: str

    @property
    def dimension(self) -> int: ...
    @property
    def unit_dim(self) -> int: ...
    @property
    def measure(self) -> float: ...
    @property
    def gain(self) -> float: ...
    @property
    def buffer_m(self) -> float: ...
    @property
    def is_footprint(self) -> bool: ...
    @property
    def plane(self) -> Plane | None: ...

    def outline_m(self) -> np.ndarray:
        """``(k, 3) float``: corners of a 2-D region in order, the two ends of a segment, or
        the points, m (for plots and messages)."""
        ...

    def distance(self, points_m) -> np.ndarray:
        """``(n_points,) float``: 3-D distance from each of ``points_m : (n_points, 3)`` to the
        region, 0 on it, m (a horizontal rectangle or polygon is a flat plate at ``z_m``)."""
        ...

    def covers(self, points_m) -> np.ndarray:
        """``(n_points,) bool``: whether each of ``points_m : (n_points, 3)`` is a mounting
        position of this region, within :data:`TOLERANCE_M` (boundary included): for a 2-D
        region within the tolerance of its plane and covered by its outline; for a segment or
        points within the tolerance (3-D distance)."""
        ...

    def contains(self, points_m) -> np.ndarray:
        """Keep-out test, ``(n_points,) bool`` for ``points_m : (n_points, 3)``.

        * rectangle or polygon with ``[x, y]`` vertices: the zone is its horizontal footprint at
          *every* height (a building, a tank): a position is inside when ``(x, y)`` is within
          ``buffer_m`` of the outline; ``z`` and ``z_m`` do not matter;
        * polygon with ``[x, y, z]`` vertices (a wall): positions within 1e-6 m of the plate,
          or within ``buffer_m`` of it when a buffer is given (3-D distance);
        * segment or points: positions within ``buffer_m`` (3-D distance) of the segment or of
          any point (a mast, a tank's vent).

        The boundary counts as inside (within :data:`TOLERANCE_M`).
        """
        ...

    def grid(self, spacing_m: float) -> np.ndarray:
        """``(k, 3) float``: a regular lattice of candidate positions ``spacing_m`` apart, m."""
        ...

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``(n, 3) float``: ``n`` uniform random positions in the region, m."""
        ...

    def from_unit(self, u) -> np.ndarray:
        """``(..., unit_dim)`` coordinates in [0, 1] -> ``(..., 3)`` positions in the region."""
        ...

    def to_unit(self, points_m) -> np.ndarray:
        """``(..., 3)`` positions -> ``(..., unit_dim)`` coordinates, inverse of from_unit."""
        ...

    def spread(self, count: int, sep_m: float) -> np.ndarray:
        """``(count, 3) float``: ``count`` probes spread as a person would draw them, m."""
        ...

    # Unchecked twins of the public tests, on strict (n, 3) float arrays (the site's hot paths).
    def _distance(self, p: np.ndarray) -> np.ndarray: ...
    def _covers(self, p: np.ndarray) -> np.ndarray: ...
    def _contains(self, p: np.ndarray) -> np.ndarray: ...

    def _xy_projection(self) -> shapely.Geometry:
        """The region's shadow on the ground plane, as a shapely geometry in (x, y)."""
        ...

    def _test_points(self) -> np.ndarray:
        """A dense sample of the region (lattice plus boundary), for coverage tests."""
        ...


# --------------------------------------------------------------------------------------------
# What every kind shares
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False, kw_only=True)
class Kind(ABC):
    """Base of the region kinds: public methods check their input once and call the unchecked
    per-kind methods. A bare kind has unit gain and no buffer (see the wrappers)."""

    kind: ClassVar[str]
    dimension: ClassVar[int]
    #: The keys the kind takes, for messages.
    takes: ClassVar[str]
    gain: ClassVar[float] = 1.0
    buffer_m: ClassVar[float] = 0.0

    name: str = ""

    def __post_init__(self) -> None:
        check_name(self.name)

    @property
    def what(self) -> str:
        """``a rectangle 'roof'``: how the region's own messages name it."""
        return what_of(self.kind, self.name)

    def _set(self, **values: Any) -> None:
        """Store normalised fields and derived geometry on the frozen instance."""
        for key, value in values.items():
            object.__setattr__(self, key, value)

    @property
    def unit_dim(self) -> int:
        """2 for a 2-D region, 1 otherwise (see :meth:`from_unit`)."""
        return 2 if self.dimension == 2 else 1

    @property
    def is_footprint(self) -> bool:
        """False unless the kind is a horizontal 2-D shape."""
        return False

    @property
    def plane(self) -> Plane | None:
        """None unless the kind is 2-D."""
        return None

    # ---------------------------------------------------------------- checked entry points
    def distance(self, points_m) -> np.ndarray:
        """``(n_points,)`` distance, m, to ``points_m : (n_points, 3)`` (Region.distance)."""
        return self._distance(points(points_m))

    def covers(self, points_m) -> np.ndarray:
        """``(n_points,) bool`` for ``points_m : (n_points, 3)`` (:meth:`Region.covers`)."""
        return self._covers(points(points_m))

    def contains(self, points_m) -> np.ndarray:
        """``(n_points,) bool`` for ``points_m : (n_points, 3)`` (:meth:`Region.contains`)."""
        return self._contains(points(points_m))

    def grid(self, spacing_m: float) -> np.ndarray:
        """``(k, 3)`` lattice positions, m, ``spacing_m`` > 0 apart (:meth:`Region.grid`)."""
        return self._grid(spacing(spacing_m))

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``(n, 3)`` uniform random positions, m, ``n`` >= 0 (:meth:`Region.sample`)."""
        return self._sample(positive_int(n, "n", minimum=0), rng)

    def from_unit(self, u) -> np.ndarray:
        """``u : (..., unit_dim)`` in [0, 1] (round-off clipped) -> ``(..., 3)`` positions, m."""
        d = self.unit_dim
        arr = np.asarray(u, dtype=float)
        if arr.ndim == 0 or arr.shape[-1] != d:
            raise ValueError(
                f"`u` for {describe(self)} must have shape (..., {d}); got {arr.shape}."
            )
        if (
            not np.all(np.isfinite(arr))
            or arr.min(initial=0.0) < -1e-9
            or arr.max(initial=0.0) > 1.0 + 1e-9
        ):
            raise ValueError(f"`u` for {describe(self)} must lie in [0, 1].")
        pos = self._from_unit(np.clip(arr.reshape(-1, d), 0.0, 1.0))
        return pos.reshape(arr.shape[:-1] + (3,))

    def to_unit(self, points_m) -> np.ndarray:
        """``points_m : (..., 3)`` -> ``(..., unit_dim)`` in [0, 1]: from_unit(to_unit(p)) == p
        for ``p`` in the region."""
        arr = np.asarray(points_m, dtype=float)
        if arr.ndim == 0 or arr.shape[-1] != 3:
            raise ValueError(f"`points_m` must have shape (..., 3) in metres; got {arr.shape}.")
        u = self._to_unit(points(arr.reshape(-1, 3)))
        return np.clip(u, 0.0, 1.0).reshape(arr.shape[:-1] + (self.unit_dim,))

    # ---------------------------------------------------------------- defaults
    def _covers(self, p: np.ndarray) -> np.ndarray:
        return self._distance(p) <= TOLERANCE_M

    def _contains(self, p: np.ndarray) -> np.ndarray:
        return self._keepout(p, 0.0, None)

    def _keepout(self, p: np.ndarray, buffer_m: float, grown) -> np.ndarray:
        """Keep-out test grown by ``buffer_m`` (see :meth:`Region.contains`); ``grown`` is
        what :meth:`_grow` prepared for that buffer."""
        return self._distance(p) <= buffer_m + TOLERANCE_M

    def _grow(self, buffer_m: float):
        """Geometry prepared once for a keep-out test grown by ``buffer_m``; None when the
        kind needs none."""
        return None

    # ---------------------------------------------------------------- per kind
    @property
    @abstractmethod
    def measure(self) -> float: ...

    @abstractmethod
    def outline_m(self) -> np.ndarray: ...

    @abstractmethod
    def spread(self, count: int, sep_m: float) -> np.ndarray: ...

    @abstractmethod
    def _distance(self, p: np.ndarray) -> np.ndarray: ...

    @abstractmethod
    def _grid(self, s: float) -> np.ndarray: ...

    @abstractmethod
    def _sample(self, n: int, rng: np.random.Generator) -> np.ndarray: ...

    @abstractmethod
    def _from_unit(self, flat: np.ndarray) -> np.ndarray:
        """``(n, unit_dim)`` in [0, 1] -> ``(n, 3)`` positions."""

    @abstractmethod
    def _to_unit(self, p: np.ndarray) -> np.ndarray:
        """``(n, 3)`` positions -> ``(n, unit_dim)``, not yet clipped."""

    @abstractmethod
    def _xy_projection(self) -> shapely.Geometry: ...

    @abstractmethod
    def _test_points(self) -> np.ndarray: ...
