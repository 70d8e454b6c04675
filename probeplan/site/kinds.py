"""The region kinds: horizontal rectangles, polygons (horizontal or planar in 3-D), segments and
listed points.

Each kind is a small frozen class that validates itself once and answers the
:class:`~.protocol.Region` questions. Rectangles and polygons share :class:`_Planar`: a plane
with an orthonormal frame and a shapely outline in its coordinates (:mod:`._plane`), so
horizontal shapes and walls share one code path. A new kind is one class here (deriving from
:class:`~.protocol.Kind` or :class:`_Planar`) and one line in :data:`.regions.REGION_KINDS`.

Units: metres throughout. Shapes: ``n_points`` positions are ``(n_points, 3)`` arrays of
``(x, y, z)``; z is up.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import shapely
from scipy.spatial import cKDTree

from ._common import TOLERANCE_M, describe, fmt_list, number, rows, vector
from ._plane import (
    Plane,
    check_polygon,
    distinct_ring,
    horizontal_plane,
    offsets,
    plane_of_3d_polygon,
)
from ._pointsets import greedy_spread
from .protocol import Kind

# A lattice finer than this many points per region is almost surely a units mistake.
_MAX_LATTICE_POINTS = 4_000_000


# --------------------------------------------------------------------------------------------
# Two-dimensional kinds
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False, kw_only=True)
class _Planar(Kind):
    """A 2-D region: an outline in a plane (:class:`~._plane.Plane`), set by the subclass."""

    dimension: ClassVar[int] = 2

    @property
    def plane(self) -> Plane:
        return self._plane

    @property
    def is_footprint(self) -> bool:
        return self._plane.footprint

    @property
    def measure(self) -> float:
        return float(self._plane.shape.area)

    def outline_m(self) -> np.ndarray:
        ring = np.asarray(self._plane.shape.exterior.coords)[:-1]
        return self._plane.to_space(ring)

    def _distance(self, p: np.ndarray) -> np.ndarray:
        ab, off = self._plane.to_plane(p)
        return np.hypot(off, self._plane.distance(ab))

    def _covers(self, p: np.ndarray) -> np.ndarray:
        ab, off = self._plane.to_plane(p)
        return (np.abs(off) <= TOLERANCE_M) & self._plane.inside(ab)

    def _grow(self, buffer_m: float):
        if self._plane.footprint and buffer_m > 0.0:
            return offsets(self._plane.shape, buffer_m + TOLERANCE_M)
        return None

    def _keepout(self, p: np.ndarray, buffer_m: float, grown) -> np.ndarray:
        reach = buffer_m + TOLERANCE_M
        plane = self._plane
        if plane.footprint:
            ab = p[:, :2]
            if buffer_m == 0.0:
                return plane.inside(ab)
            # Polygonal offsets inside and outside the exact one settle most points; only the
            # thin band between them needs an exact distance.
            inner, outer = grown
            inside = shapely.intersects_xy(inner, ab[:, 0], ab[:, 1])
            band = ~inside & shapely.intersects_xy(outer, ab[:, 0], ab[:, 1])
            inside[band] = plane.distance(ab[band]) <= reach
            return inside
        ab, off = plane.to_plane(p)
        out = np.zeros(len(p), dtype=bool)
        near = np.abs(off) <= reach
        out[near] = np.hypot(off[near], plane.distance(ab[near])) <= reach
        return out

    def _grid(self, s: float) -> np.ndarray:
        """A square lattice in the region's plane, centred on its bounding box and clipped to
        the outline; a shape too thin for any lattice point gives its representative point."""
        plane = self._plane
        a0, b0, a1, b1 = plane.shape.bounds
        axes = []
        for lo, hi in ((a0, a1), (b0, b1)):
            n = int(math.floor((hi - lo) / s + 1e-9)) + 1
            axes.append((n, lo + 0.5 * ((hi - lo) - (n - 1) * s), lo, hi))
        total = axes[0][0] * axes[1][0]
        if total > _MAX_LATTICE_POINTS:
            finest = math.sqrt(self.measure / _MAX_LATTICE_POINTS)
            raise ValueError(
                f"`spacing_m` = {s:g} m is too fine for {describe(self)} of "
                f"{self.measure:.6g} m²: {total} lattice points; use at least "
                f"{finest:.3g} m."
            )
        ga, gb = (np.clip(first + s * np.arange(n), lo, hi) for n, first, lo, hi in axes)
        ab = np.stack(np.meshgrid(ga, gb, indexing="xy"), axis=-1).reshape(-1, 2)
        ab = ab[plane.inside(ab)]
        if len(ab) == 0:
            rp = plane.shape.representative_point()
            ab = np.array([[rp.x, rp.y]])
        return plane.to_space(ab)

    def _sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """Uniform over the area, by rejection from the bounding box in vectorised batches."""
        plane = self._plane
        a0, b0, a1, b1 = plane.shape.bounds
        frac = plane.shape.area / ((a1 - a0) * (b1 - b0))
        out = np.empty((n, 2))
        filled = 0
        while filled < n:
            batch = min(int(math.ceil((n - filled) / frac * 1.2)) + 16, 1 << 20)
            ab = rng.uniform((a0, b0), (a1, b1), size=(batch, 2))
            ab = ab[shapely.intersects_xy(plane.shape, ab[:, 0], ab[:, 1])]
            take = min(len(ab), n - filled)
            out[filled : filled + take] = ab[:take]
            filled += take
        return plane.to_space(out)

    def _onto_outline(self, ab: np.ndarray) -> np.ndarray:
        """Move in-plane points outside the outline to its nearest point (shapely)."""
        if len(ab):
            out = ~self._plane.inside(ab)
            if out.any():
                ab[out] = self._plane.nearest(ab[out])
        return ab

    def _from_unit(self, flat: np.ndarray) -> np.ndarray:
        """Affine onto the bounding box in the plane, then onto the outline."""
        a0, b0, a1, b1 = self._plane.shape.bounds
        ab = np.array([a0, b0]) + flat * np.array([a1 - a0, b1 - b0])
        return self._plane.to_space(self._onto_outline(ab))

    def _to_unit(self, p: np.ndarray) -> np.ndarray:
        ab, _ = self._plane.to_plane(p)
        a0, b0, a1, b1 = self._plane.shape.bounds
        return (ab - np.array([a0, b0])) / np.array([a1 - a0, b1 - b0])

    def spread(self, count: int, sep_m: float) -> np.ndarray:
        """The centres of the cells of a near-square ``rows x cols`` lattice (``rows * cols >=
        count``, the last row centred) filling the bounding box; rules unchecked."""
        k = count
        a0, b0, a1, b1 = self._plane.shape.bounds
        w, h = a1 - a0, b1 - b0
        cols = int(min(max(round(math.sqrt(k * w / h)), 1), k))
        n_rows = math.ceil(k / cols)
        i = np.arange(k)
        row, col = i // cols, i % cols
        in_last = k - (n_rows - 1) * cols  # probes in the (possibly partial) last row
        last = row == n_rows - 1
        a = np.where(
            last,
            a0 + 0.5 * w + (col - 0.5 * (in_last - 1)) * w / cols,
            a0 + (col + 0.5) * w / cols,
        )
        b = b0 + (row + 0.5) * h / n_rows
        return self._plane.to_space(np.stack([a, b], axis=1))

    def _xy_projection(self) -> shapely.Geometry:
        if self._plane.footprint:
            return self._plane.shape
        outline = self.outline_m()[:, :2]
        poly = shapely.Polygon(outline)
        if poly.is_valid and poly.area > 1e-12 * max(self.measure, 1.0):
            return poly
        return shapely.LineString(np.vstack([outline, outline[:1]]))

    def _test_points(self) -> np.ndarray:
        a0, b0, a1, b1 = self._plane.shape.bounds
        inner = self.grid(max(a1 - a0, b1 - b0) / 40.0)
        ring = self._plane.shape.exterior
        t = np.linspace(0.0, ring.length, 400, endpoint=False)
        edge = shapely.get_coordinates(shapely.line_interpolate_point(ring, t))
        return np.vstack([inner, self._plane.to_space(edge)])


@dataclass(frozen=True, eq=False, kw_only=True)
class Rectangle(_Planar):
    """A horizontal axis-aligned rectangle.

    Parameters
    ----------
    min_m, max_m : (2,) float
        Corners ``(x, y)``, m; ``min_m < max_m`` on both axes.
    z_m : float
        Mounting height, m. As a keep-out the rectangle is a footprint at every height.
    name : str
        Free text used in messages.
    """

    kind: ClassVar[str] = "rectangle"
    takes: ClassVar[str] = "`min_m`, `max_m` and `z_m`"

    min_m: tuple[float, float]
    max_m: tuple[float, float]
    z_m: float

    def __post_init__(self) -> None:
        super().__post_init__()
        what = self.what
        lo = vector(self.min_m, 2, "min_m", what)
        hi = vector(self.max_m, 2, "max_m", what)
        z = number(self.z_m, "z_m", what)
        if not (lo[0] < hi[0] and lo[1] < hi[1]):
            raise ValueError(
                f"`min_m` of {what} must be below `max_m` on both axes; got "
                f"min_m={fmt_list(lo)}, max_m={fmt_list(hi)}."
            )
        box = shapely.box(lo[0], lo[1], hi[0], hi[1])
        self._set(min_m=lo, max_m=hi, z_m=z, _plane=horizontal_plane(box, z))

    def _sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        a0, b0, a1, b1 = self._plane.shape.bounds
        return self._plane.to_space(rng.uniform((a0, b0), (a1, b1), size=(n, 2)))

    def _onto_outline(self, ab: np.ndarray) -> np.ndarray:
        return ab  # the bounding box is the rectangle


@dataclass(frozen=True, eq=False, kw_only=True)
class Polygon(_Planar):
    """A simple polygon: horizontal at ``z_m``, or planar in 3-D (a wall, a sloping roof).

    Parameters
    ----------
    vertices_m : (k, 2) or (k, 3) float
        ``[[x, y], ...]`` at ``z_m``, or ``[[x, y, z], ...]`` in one plane, m. At least 3
        distinct vertices, simple (no self-crossing); a closing copy of the first is dropped.
    z_m : float, optional
        Mounting height of ``[x, y]`` vertices, m; not used with ``[x, y, z]`` vertices.
    name : str
        Free text used in messages.
    """

    kind: ClassVar[str] = "polygon"
    takes: ClassVar[str] = "`vertices_m`, and `z_m` when the vertices are [x, y]"

    vertices_m: tuple[tuple[float, ...], ...]
    z_m: float | None = None

    def __post_init__(self) -> None:
        super().__post_init__()
        what = self.what
        vertices = rows(self.vertices_m, "vertices_m", what, (2, 3))
        flat = vertices.shape[1] == 2
        if flat and self.z_m is None:
            raise ValueError(f"{what} needs `z_m`; a polygon takes {self.takes}.")
        if not flat and self.z_m is not None:
            raise ValueError(
                f"`z_m` is not used by {what} with [x, y, z] vertices (each vertex "
                "carries its own height); remove `z_m` or give [x, y] vertices."
            )
        ring = distinct_ring(vertices)
        if len(np.unique(ring, axis=0)) < 3:
            raise ValueError(
                f"`vertices_m` of {what} must hold at least 3 distinct vertices; "
                f"got {len(np.unique(ring, axis=0))}."
            )
        self._set(vertices_m=tuple(tuple(float(c) for c in row) for row in vertices))
        if flat:
            z = number(self.z_m, "z_m", what)
            shape = shapely.Polygon(ring)
            check_polygon(shape, what)
            self._set(z_m=z, _plane=horizontal_plane(shape, z))
        else:
            self._set(_plane=plane_of_3d_polygon(ring, what))


# --------------------------------------------------------------------------------------------
# One- and zero-dimensional kinds
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False, kw_only=True)
class Segment(Kind):
    """A straight segment (a fence, a rail, a mast).

    Parameters
    ----------
    start_m, end_m : (3,) float
        The two ends, m; they must differ.
    name : str
        Free text used in messages.
    """

    kind: ClassVar[str] = "segment"
    dimension: ClassVar[int] = 1
    takes: ClassVar[str] = "`start_m` and `end_m`"

    start_m: tuple[float, float, float]
    end_m: tuple[float, float, float]

    def __post_init__(self) -> None:
        super().__post_init__()
        what = self.what
        start = vector(self.start_m, 3, "start_m", what)
        end = vector(self.end_m, 3, "end_m", what)
        delta = np.subtract(end, start)
        length = float(np.linalg.norm(delta))
        if not length > 1e-9:
            raise ValueError(
                f"`start_m` and `end_m` of {what} must differ (a segment needs a nonzero "
                f"length); both are {fmt_list(start)}."
            )
        self._set(start_m=start, end_m=end, _start=np.asarray(start), _delta=delta, _len=length)

    @property
    def measure(self) -> float:
        return self._len

    def outline_m(self) -> np.ndarray:
        return np.array([self.start_m, self.end_m])

    def _at(self, t: np.ndarray) -> np.ndarray:
        """``(n, 1)`` fractions along the segment -> ``(n, 3)`` positions."""
        return self._start + t * self._delta

    def _distance(self, p: np.ndarray) -> np.ndarray:
        t = np.clip((p - self._start) @ self._delta / self._len**2, 0.0, 1.0)
        return np.linalg.norm(p - self._at(t[:, None]), axis=1)

    def _grid(self, s: float) -> np.ndarray:
        """Evenly spaced points at most ``s`` apart, both ends included."""
        n_int = max(1, math.ceil(self._len / s - 1e-9))
        return self._at(np.linspace(0.0, 1.0, n_int + 1)[:, None])

    def _sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        return self._at(rng.uniform(0.0, 1.0, size=(n, 1)))

    def _from_unit(self, flat: np.ndarray) -> np.ndarray:
        """Along the segment from ``start_m`` (0) to ``end_m`` (1)."""
        return self._at(flat[:, :1])

    def _to_unit(self, p: np.ndarray) -> np.ndarray:
        return ((p - self._start) @ self._delta / self._len**2)[:, None]

    def spread(self, count: int, sep_m: float) -> np.ndarray:
        """The centres of ``count`` equal pieces; rules unchecked."""
        return self._at(((np.arange(count) + 0.5) / count)[:, None])

    def _xy_projection(self) -> shapely.Geometry:
        outline = self.outline_m()[:, :2]
        if np.allclose(outline[0], outline[1]):
            return shapely.Point(outline[0])
        return shapely.LineString(outline)

    def _test_points(self) -> np.ndarray:
        return self._at(np.linspace(0.0, 1.0, 401)[:, None])


@dataclass(frozen=True, eq=False, kw_only=True)
class Points(Kind):
    """Listed mounting points: the only positions of the region.

    Parameters
    ----------
    positions_m : (k, 3) float
        The points, m; at least one.
    name : str
        Free text used in messages.
    """

    kind: ClassVar[str] = "points"
    dimension: ClassVar[int] = 0
    takes: ClassVar[str] = "`positions_m`"

    positions_m: tuple[tuple[float, float, float], ...]

    def __post_init__(self) -> None:
        super().__post_init__()
        pos = rows(self.positions_m, "positions_m", self.what, (3,))
        self._set(positions_m=tuple(tuple(float(c) for c in row) for row in pos))
        self._set(_tree=cKDTree(pos))

    @property
    def measure(self) -> float:
        return float(len(self.positions_m))

    def outline_m(self) -> np.ndarray:
        return np.array(self.positions_m)

    def _distance(self, p: np.ndarray) -> np.ndarray:
        if len(p) == 0:
            return np.zeros(0)
        return self._tree.query(p, k=1)[0]

    def _grid(self, s: float) -> np.ndarray:
        return np.array(self.positions_m)

    def _sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        pos = np.array(self.positions_m)
        return pos[rng.integers(0, len(pos), size=n)]

    def _from_unit(self, flat: np.ndarray) -> np.ndarray:
        """``u`` picks index ``floor(u * n_points)``, clipped to the last point."""
        pts = np.array(self.positions_m)
        idx = np.clip(np.floor(flat[:, 0] * len(pts)).astype(int), 0, len(pts) - 1)
        return pts[idx]

    def _to_unit(self, p: np.ndarray) -> np.ndarray:
        n = len(self.positions_m)
        idx = self._tree.query(p, k=1)[1] if len(p) else np.zeros(0, dtype=int)
        return ((np.asarray(idx) + 0.5) / n)[:, None]

    def spread(self, count: int, sep_m: float) -> np.ndarray:
        """A greedy max-min-distance choice of the points (cycling when too few keep
        ``sep_m``); rules unchecked."""
        pts = np.array(self.positions_m)
        chosen = greedy_spread(pts, count, np.empty((0, 3)), sep_m)
        return pts[chosen] if chosen is not None else pts[np.arange(count) % len(pts)]

    def _xy_projection(self) -> shapely.Geometry:
        return shapely.MultiPoint(self.outline_m()[:, :2])

    def _test_points(self) -> np.ndarray:
        return np.array(self.positions_m)


@dataclass(frozen=True, eq=False, kw_only=True)
class StructureSurface(Points):
    """Mounting points a standoff off a conducting structure's surface (its top, its walls, or
    the whole of it; the inner side of an enclosure): the points of :class:`Points`, computed
    from the structure's panels by the config (:meth:`probeplan.Conductor.surface_points`).

    Parameters
    ----------
    positions_m : (k, 3) float
        The mounting points, m.
    structure : str
        Name of the ``[[structure]]`` they sit on.
    face : str
        ``"top"``, ``"walls"`` or ``"all"``.
    standoff_m : float
        Distance off the surface, m, > 0. The field there is computed from the panels'
        exact integrals, so these meters may sit nearer the surface than a panel size.
    name : str
        Free text used in messages.
    """

    kind: ClassVar[str] = "structure"
    takes: ClassVar[str] = "`structure`, `face`, `standoff_m`"

    structure: str = ""
    face: str = "top"
    standoff_m: float = 0.0

    def __post_init__(self) -> None:
        super().__post_init__()
        self._set(standoff_m=number(self.standoff_m, "standoff_m", self.what))
        if not self.standoff_m > 0.0:
            raise ValueError(f"`standoff_m` of {self.what} must be > 0; got {self.standoff_m:g}.")
