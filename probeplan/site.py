"""Mounting geometry: where a field meter may go, where it may not, and how far apart.

Map of this module (read top to bottom):

1. :class:`Region` — one mounting region or one keep-out zone: a horizontal rectangle, a polygon
   (horizontal at a height, or planar in 3-D such as a wall), a segment (a fence, a rail, a mast)
   or a list of mounting points. It validates itself once and answers vectorised questions:
   distance, membership, keep-out test, a lattice of candidates, uniform random draws, and a map
   from the unit box used by the Bayesian optimiser.
2. :class:`Candidates` — a candidate lattice over a whole site, with the region and gain of every
   candidate.
3. :class:`Site` — regions, keep-outs, minimum spacing and installed probes together: whether
   positions are allowed, whether layouts keep their spacing, why a layout breaks the rules,
   random and hand-drawn ("regular") layouts, and a feasibility check with clear messages.

Two-dimensional shapes live in a plane with an orthonormal frame (origin, two in-plane axes, a
normal); their outline is a shapely polygon in that frame's coordinates, so rectangles, horizontal
polygons and walls share one code path. All point-in-polygon tests and distances to polygons are
shapely's (vectorised shapely 2 functions), not hand-written.

Units: metres throughout. Shapes: ``n_points`` positions are ``(n_points, 3)`` arrays of
``(x, y, z)``; z is up.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import shapely
from scipy.spatial import cKDTree
from shapely.validation import explain_validity

REGION_KINDS: tuple[str, ...] = ("rectangle", "polygon", "segment", "points")

#: How close a position must be to a region (or to a keep-out's boundary) to count as on it, m.
TOLERANCE_M: float = 1e-6
#: Two probes closer than this share one mounting position, which is never allowed, m.
COINCIDENT_M: float = 1e-6
#: Area per point of the densest packing of points ``s`` apart: the hexagonal lattice cell,
#: (sqrt(3)/2) s^2 (Thue / Fejes Toth; density pi/(2 sqrt(3)) of the equal-disk packing).
HEX_CELL_FACTOR: float = math.sqrt(3.0) / 2.0

# Spacing comparisons forgive round-off: a lattice drawn at exactly the minimum spacing passes.
_SPACING_RTOL = 1e-9
# A lattice finer than this many points per region is almost surely a units mistake.
_MAX_LATTICE_POINTS = 4_000_000
# Candidate positions drawn per pending layout in the first round of random_layouts; the number
# doubles with each round a layout stays unplaced (crowded sites), up to the cap.
_DRAWS_FIRST_ROUND = 2
_DRAWS_MAX = 64
# Memory bound for broadcast distance blocks (elements of the largest temporary).
_BLOCK_ELEMENTS = 1 << 22

_COORDS = {2: "(x, y)", 3: "(x, y, z)"}
_TAKES = {
    "rectangle": "`min_m`, `max_m` and `z_m`",
    "polygon": "`vertices_m`, and `z_m` when the vertices are [x, y]",
    "segment": "`start_m` and `end_m`",
    "points": "`positions_m`",
}
_GEOMETRY_FIELDS = ("min_m", "max_m", "z_m", "vertices_m", "start_m", "end_m", "positions_m")


# --------------------------------------------------------------------------------------------
# Small validation helpers (messages name the field in backticks)
# --------------------------------------------------------------------------------------------


def _vector(value, n: int, name: str, what: str) -> tuple[float, ...]:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(
            f"`{name}` of {what} must be {n} numbers {_COORDS[n]} in metres; got {value!r}."
        ) from None
    if arr.shape != (n,):
        got = arr.size if arr.ndim == 1 else f"shape {arr.shape}"
        raise ValueError(
            f"`{name}` of {what} must be {n} numbers {_COORDS[n]} in metres; got {got}."
        )
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"`{name}` of {what} must be finite; got {arr.tolist()}.")
    return tuple(float(x) for x in arr)


def _rows(value, name: str, what: str, dims: tuple[int, ...]) -> np.ndarray:
    allowed = " or ".join(f"[{', '.join('xyz'[:d])}]" for d in dims)
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(
            f"`{name}` of {what} must be a list of {allowed} rows in metres, all of one "
            f"length; got {value!r}."
        ) from None
    if arr.ndim != 2 or arr.shape[1] not in dims or arr.shape[0] == 0:
        raise ValueError(
            f"`{name}` of {what} must be a non-empty list of {allowed} rows in metres; "
            f"got shape {arr.shape}."
        )
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"`{name}` of {what} must be finite; got {arr.tolist()}.")
    return arr


def _number(value, name: str, what: str) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"`{name}` of {what} must be a number; got {value!r}.") from None
    if not math.isfinite(out):
        raise ValueError(f"`{name}` of {what} must be finite; got {out}.")
    return out


def _positive_int(value, name: str, *, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise ValueError(f"`{name}` must be an integer >= {minimum}; got {value!r}.")
    if value < minimum:
        raise ValueError(f"`{name}` must be an integer >= {minimum}; got {value}.")
    return int(value)


def _spacing(value, name: str = "spacing_m") -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"`{name}` must be a positive number of metres; got {value!r}.") from None
    if not math.isfinite(out) or out <= 0.0:
        raise ValueError(f"`{name}` must be a positive number of metres; got {out}.")
    return out


def _points(points_m, name: str = "points_m") -> np.ndarray:
    arr = np.asarray(points_m, dtype=float)
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise ValueError(f"`{name}` must have shape (n_points, 3) in metres; got {arr.shape}.")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"`{name}` must be finite.")
    return arr


def _fmt(p) -> str:
    return "(" + ", ".join(f"{float(c):.6g}" for c in p) + ")"


def _describe(region: Region) -> str:
    return f"{region.kind} {region.name!r}" if region.name else region.kind


def _label(word: str, index: int, region: Region) -> str:
    return f"{word} {index} ({_describe(region)})"


# --------------------------------------------------------------------------------------------
# The frame of a planar region
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _Plane:
    """A plane with an orthonormal frame and a polygon in its coordinates ``(a, b)``."""

    origin: np.ndarray  # (3,) m
    axes: np.ndarray  # (2, 3) in-plane unit vectors
    normal: np.ndarray  # (3,) unit normal
    shape: shapely.Polygon  # in (a, b), prepared
    shape_tol: shapely.Geometry  # grown by TOLERANCE_M, prepared: membership with round-off
    footprint: bool  # True for horizontal rectangles and 2-D polygons: (a, b) = (x, y)

    def to_plane(self, points_m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``(n, 3)`` positions -> in-plane ``(n, 2)`` coordinates and ``(n,)`` offsets, m."""
        d = points_m - self.origin
        return d @ self.axes.T, d @ self.normal

    def to_space(self, ab: np.ndarray) -> np.ndarray:
        """In-plane ``(..., 2)`` coordinates -> ``(..., 3)`` positions in the plane, m."""
        return self.origin + ab @ self.axes

    def inside(self, ab: np.ndarray) -> np.ndarray:
        """``(n,) bool``: on the polygon or its boundary, within TOLERANCE_M."""
        return shapely.intersects_xy(self.shape_tol, ab[:, 0], ab[:, 1])

    def distance(self, ab: np.ndarray) -> np.ndarray:
        """``(n,)`` in-plane distance from ``ab : (n, 2)`` to the polygon, 0 inside, m."""
        out = np.zeros(len(ab))
        inside = shapely.intersects_xy(self.shape, ab[:, 0], ab[:, 1])
        if not inside.all():
            far = ~inside
            out[far] = shapely.distance(self.shape, shapely.points(ab[far]))
        return out

    def nearest(self, ab: np.ndarray) -> np.ndarray:
        """``(n, 2)``: the nearest point of the polygon to each of ``ab : (n, 2)``."""
        lines = shapely.shortest_line(shapely.points(ab), self.shape)
        return shapely.get_coordinates(lines).reshape(-1, 2, 2)[:, 1]


def _make_plane(origin, axes, normal, shape, footprint: bool) -> _Plane:
    shape_tol = shape.buffer(TOLERANCE_M)
    shapely.prepare(shape)
    shapely.prepare(shape_tol)
    return _Plane(
        np.asarray(origin, dtype=float),
        np.asarray(axes, dtype=float),
        np.asarray(normal, dtype=float),
        shape,
        shape_tol,
        footprint,
    )


def _check_polygon(shape: shapely.Polygon, what: str) -> None:
    if not shape.is_valid:
        raise ValueError(
            f"`vertices_m` of {what} must describe a simple polygon (edges meet only at "
            f"consecutive vertices); shapely reports: {explain_validity(shape)}."
        )
    if not shape.area > 0.0:
        raise ValueError(f"`vertices_m` of {what} must enclose a nonzero area; got area 0.")


def _distinct_ring(vertices: np.ndarray) -> np.ndarray:
    """Drop consecutive repeats and a closing copy of the first vertex."""
    keep = np.ones(len(vertices), dtype=bool)
    keep[1:] = np.any(vertices[1:] != vertices[:-1], axis=1)
    ring = vertices[keep]
    if len(ring) > 1 and np.array_equal(ring[0], ring[-1]):
        ring = ring[:-1]
    return ring


def _plane_of_3d_polygon(vertices: np.ndarray, what: str) -> _Plane:
    """Fit a plane through 3-D vertices, check planarity, and build its frame."""
    centre = vertices.mean(axis=0)
    d = vertices - centre
    _, sv, vt = np.linalg.svd(d, full_matrices=False)
    if sv[1] <= 1e-9 * max(sv[0], 1e-300):
        raise ValueError(
            f"`vertices_m` of {what} lie on one line; a 3-D polygon must span a plane "
            "(a wall needs vertices at two heights or two horizontal positions)."
        )
    normal = vt[2]
    extent = float(np.ptp(vertices, axis=0).max())
    tol = TOLERANCE_M + 1e-9 * extent
    off = np.abs(d @ normal)
    worst = int(np.argmax(off))
    if off[worst] > tol:
        raise ValueError(
            f"`vertices_m` of {what} must lie in one plane (within {tol:.3g} m); vertex "
            f"{worst} is {off[worst]:.3g} m off the best-fit plane."
        )
    # A frame a person can read: the first axis horizontal along the plane, the second up the
    # slope (straight up for a wall); a horizontal plane keeps x and y.
    if normal[2] < 0.0 or (normal[2] == 0.0 and (normal[1], normal[0]) < (0.0, 0.0)):
        normal = -normal
    along = np.cross([0.0, 0.0, 1.0], normal)
    if np.linalg.norm(along) < 1e-9:
        along = np.array([1.0, 0.0, 0.0])
    along /= np.linalg.norm(along)
    up = np.cross(normal, along)
    axes = np.stack([along, up])
    ab = d @ axes.T
    shape = shapely.Polygon(ab)
    _check_polygon(shape, what)
    return _make_plane(centre, axes, normal, shape, footprint=False)


# --------------------------------------------------------------------------------------------
# Region
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Region:
    """A mounting region or a keep-out zone.

    Parameters
    ----------
    kind : str
        One of :data:`REGION_KINDS`.
    min_m, max_m : (2,) float, optional
        Rectangle: horizontal axis-aligned corners ``(x, y)``, m; ``min_m < max_m`` on both axes.
    z_m : float, optional
        Mounting height of a rectangle or a polygon with ``[x, y]`` vertices, m.
    vertices_m : (k, 2) or (k, 3) float, optional
        Polygon: ``[[x, y], ...]`` at ``z_m``, or ``[[x, y, z], ...]`` for a planar polygon in 3-D
        (a wall, a sloping roof), m. At least 3 distinct vertices, simple (no self-crossing).
    start_m, end_m : (3,) float, optional
        Segment ends (a fence, a rail, a mast), m.
    positions_m : (k, 3) float, optional
        Points: the only mounting positions, m.
    gain : float
        Calibration factor of a meter mounted here (mast or structure enhancement), > 0.
        Mounting regions only.
    buffer_m : float
        Keep-outs only: grow the zone by this distance, m, >= 0. The tool only applies the
        clearance it is given: clearances around tanks, vents, masts and high-voltage parts
        come from local codes, the applicable standards and qualified, licensed practice.
    name : str
        Free text used in messages.

    Notes
    -----
    Boundaries count as part of the region (within :data:`TOLERANCE_M`).
    """

    kind: str
    min_m: tuple[float, float] | None = None
    max_m: tuple[float, float] | None = None
    z_m: float | None = None
    vertices_m: tuple[tuple[float, ...], ...] | None = None
    start_m: tuple[float, float, float] | None = None
    end_m: tuple[float, float, float] | None = None
    positions_m: tuple[tuple[float, float, float], ...] | None = None
    gain: float = 1.0
    buffer_m: float = 0.0
    name: str = ""

    # ---------------------------------------------------------------- validation
    def __post_init__(self) -> None:
        if not isinstance(self.name, str):
            raise ValueError(f"`name` of a region must be text; got {self.name!r}.")
        if not isinstance(self.kind, str) or self.kind not in REGION_KINDS:
            allowed = ", ".join(repr(k) for k in REGION_KINDS)
            raise ValueError(f"`kind` of a region must be one of {allowed}; got {self.kind!r}.")
        kind = self.kind
        what = f"a {kind}" + (f" {self.name!r}" if self.name else "")
        set_ = object.__setattr__

        if kind == "polygon" and self.vertices_m is not None:
            vertices = _rows(self.vertices_m, "vertices_m", what, (2, 3))
            flat = vertices.shape[1] == 2
            used = {"vertices_m", "z_m"} if flat else {"vertices_m"}
            required = used
        else:
            vertices = None
            flat = True
            used = {
                "rectangle": {"min_m", "max_m", "z_m"},
                "polygon": {"vertices_m", "z_m"},
                "segment": {"start_m", "end_m"},
                "points": {"positions_m"},
            }[kind]
            required = used - ({"z_m"} if kind == "polygon" else set())
        for name in _GEOMETRY_FIELDS:
            value = getattr(self, name)
            if value is not None and name not in used:
                if kind == "polygon" and name == "z_m":
                    raise ValueError(
                        f"`z_m` is not used by {what} with [x, y, z] vertices (each vertex "
                        "carries its own height); remove `z_m` or give [x, y] vertices."
                    )
                raise ValueError(
                    f"`{name}` is not used by {what}; a {kind} takes {_TAKES[kind]}. "
                    f"Remove `{name}`."
                )
            if value is None and name in required:
                raise ValueError(f"{what} needs `{name}`; a {kind} takes {_TAKES[kind]}.")

        gain = _number(self.gain, "gain", what)
        if gain <= 0.0:
            raise ValueError(f"`gain` of {what} must be > 0; got {gain}.")
        buffer_m = _number(self.buffer_m, "buffer_m", what)
        if buffer_m < 0.0:
            raise ValueError(f"`buffer_m` of {what} must be >= 0 m; got {buffer_m}.")
        set_(self, "gain", gain)
        set_(self, "buffer_m", buffer_m)

        plane = seg = tree = None
        if kind == "rectangle":
            lo = _vector(self.min_m, 2, "min_m", what)
            hi = _vector(self.max_m, 2, "max_m", what)
            z = _number(self.z_m, "z_m", what)
            if not (lo[0] < hi[0] and lo[1] < hi[1]):
                raise ValueError(
                    f"`min_m` of {what} must be below `max_m` on both axes; got "
                    f"min_m={_list(lo)}, max_m={_list(hi)}."
                )
            set_(self, "min_m", lo)
            set_(self, "max_m", hi)
            set_(self, "z_m", z)
            plane = _horizontal_plane(shapely.box(lo[0], lo[1], hi[0], hi[1]), z)
        elif kind == "polygon":
            ring = _distinct_ring(vertices)
            if len(np.unique(ring, axis=0)) < 3:
                raise ValueError(
                    f"`vertices_m` of {what} must hold at least 3 distinct vertices; "
                    f"got {len(np.unique(ring, axis=0))}."
                )
            set_(self, "vertices_m", tuple(tuple(float(c) for c in row) for row in vertices))
            if flat:
                z = _number(self.z_m, "z_m", what)
                set_(self, "z_m", z)
                shape = shapely.Polygon(ring)
                _check_polygon(shape, what)
                plane = _horizontal_plane(shape, z)
            else:
                plane = _plane_of_3d_polygon(ring, what)
        elif kind == "segment":
            start = _vector(self.start_m, 3, "start_m", what)
            end = _vector(self.end_m, 3, "end_m", what)
            delta = np.subtract(end, start)
            length = float(np.linalg.norm(delta))
            if not length > 1e-9:
                raise ValueError(
                    f"`start_m` and `end_m` of {what} must differ (a segment needs a nonzero "
                    f"length); both are {_list(start)}."
                )
            set_(self, "start_m", start)
            set_(self, "end_m", end)
            seg = (np.asarray(start), delta, length)
        else:
            pos = _rows(self.positions_m, "positions_m", what, (3,))
            set_(self, "positions_m", tuple(tuple(float(c) for c in row) for row in pos))
            tree = cKDTree(pos)
        set_(self, "_plane", plane)
        grown = None
        if plane is not None and plane.footprint and buffer_m > 0.0:
            grown = _offsets(plane.shape, buffer_m + TOLERANCE_M)
        set_(self, "_grown", grown)
        set_(self, "_seg", seg)
        set_(self, "_tree", tree)

    # ---------------------------------------------------------------- sizes
    @property
    def dimension(self) -> int:
        """2 for a rectangle or polygon, 1 for a segment, 0 for points."""
        return {"rectangle": 2, "polygon": 2, "segment": 1, "points": 0}[self.kind]

    @property
    def unit_dim(self) -> int:
        """Dimension of the unit box of :meth:`from_unit`: 2, 1 (segment) or 1 (points)."""
        return 2 if self.dimension == 2 else 1

    @property
    def measure(self) -> float:
        """Area in m² (2-D), length in m (segment) or number of points (points)."""
        if self._plane is not None:
            return float(self._plane.shape.area)
        if self._seg is not None:
            return self._seg[2]
        return float(len(self.positions_m))

    @property
    def is_footprint(self) -> bool:
        """True for a horizontal rectangle or 2-D polygon (as a keep-out: a footprint)."""
        return self._plane is not None and self._plane.footprint

    def outline_m(self) -> np.ndarray:
        """``(k, 3) float``: corners of a 2-D region in order, the two ends of a segment, or
        the points, m (for plots and messages)."""
        if self._plane is not None:
            ring = np.asarray(self._plane.shape.exterior.coords)[:-1]
            return self._plane.to_space(ring)
        if self._seg is not None:
            return np.array([self.start_m, self.end_m])
        return np.array(self.positions_m)

    # ---------------------------------------------------------------- membership
    def distance(self, points_m) -> np.ndarray:
        """3-D distance from each position to the region, 0 on it.

        Parameters
        ----------
        points_m : (n_points, 3) float
            Positions, m.

        Returns
        -------
        (n_points,) float
            Distance in metres (a horizontal rectangle or polygon is a flat plate at ``z_m``).
        """
        p = _points(points_m)
        return self._distance(p)

    def _distance(self, p: np.ndarray) -> np.ndarray:
        if self._plane is not None:
            ab, off = self._plane.to_plane(p)
            return np.hypot(off, self._plane.distance(ab))
        if self._seg is not None:
            start, delta, length = self._seg
            t = np.clip((p - start) @ delta / length**2, 0.0, 1.0)
            return np.linalg.norm(p - (start + t[:, None] * delta), axis=1)
        if len(p) == 0:
            return np.zeros(0)
        return self._tree.query(p, k=1)[0]

    def covers(self, points_m) -> np.ndarray:
        """Whether each position is a mounting position of this region.

        Parameters
        ----------
        points_m : (n_points, 3) float
            Positions, m.

        Returns
        -------
        (n_points,) bool
            True on the region within :data:`TOLERANCE_M` (boundary included): for a 2-D region
            within the tolerance of its plane (``z_m`` for a horizontal one) and covered by its
            outline; for a segment or points within the tolerance (3-D distance).
        """
        return self._covers(_points(points_m))

    def _covers(self, p: np.ndarray) -> np.ndarray:
        if self._plane is not None:
            ab, off = self._plane.to_plane(p)
            return (np.abs(off) <= TOLERANCE_M) & self._plane.inside(ab)
        return self._distance(p) <= TOLERANCE_M

    def contains(self, points_m) -> np.ndarray:
        """Keep-out test: whether each position lies in this zone.

        Semantics, by kind:

        * rectangle or polygon with ``[x, y]`` vertices: the zone is its horizontal footprint at
          *every* height (a building, a tank): a position is inside when ``(x, y)`` is within
          ``buffer_m`` of the outline (``buffer_m`` grows the footprint); ``z`` and ``z_m`` do
          not matter;
        * polygon with ``[x, y, z]`` vertices (a wall): positions within 1e-6 m of the plate,
          or within ``buffer_m`` of it when a buffer is given (3-D distance);
        * segment or points: positions within ``buffer_m`` (3-D distance) of the segment or of
          any point (a mast, a tank's vent).

        The boundary counts as inside (within :data:`TOLERANCE_M`).

        Parameters
        ----------
        points_m : (n_points, 3) float
            Positions, m.

        Returns
        -------
        (n_points,) bool
        """
        return self._contains(_points(points_m))

    def _contains(self, p: np.ndarray) -> np.ndarray:
        reach = self.buffer_m + TOLERANCE_M
        plane = self._plane
        if plane is not None and plane.footprint:
            ab = p[:, :2]
            if self.buffer_m == 0.0:
                return plane.inside(ab)
            # Polygonal offsets inside and outside the exact one settle most points; only the
            # thin band between them needs an exact distance.
            inner, outer = self._grown
            inside = shapely.intersects_xy(inner, ab[:, 0], ab[:, 1])
            band = ~inside & shapely.intersects_xy(outer, ab[:, 0], ab[:, 1])
            inside[band] = plane.distance(ab[band]) <= reach
            return inside
        if plane is not None:
            ab, off = plane.to_plane(p)
            out = np.zeros(len(p), dtype=bool)
            near = np.abs(off) <= reach
            out[near] = np.hypot(off[near], plane.distance(ab[near])) <= reach
            return out
        return self._distance(p) <= reach

    # ---------------------------------------------------------------- candidates and draws
    def grid(self, spacing_m: float) -> np.ndarray:
        """A regular lattice of candidate positions over the region.

        Parameters
        ----------
        spacing_m : float
            Lattice spacing, m, > 0.

        Returns
        -------
        (k, 3) float
            Rectangle or polygon: a square lattice in the region's plane (at ``z_m`` for a
            horizontal one), centred on its bounding box and clipped to the outline; a shape too
            thin for any lattice point gives its representative point. Segment: evenly spaced
            points at most ``spacing_m`` apart, both ends included. Points: the points.
        """
        s = _spacing(spacing_m)
        if self._plane is not None:
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
                    f"`spacing_m` = {s:g} m is too fine for {_describe(self)} of "
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
        if self._seg is not None:
            start, delta, length = self._seg
            n_int = max(1, math.ceil(length / s - 1e-9))
            t = np.linspace(0.0, 1.0, n_int + 1)
            return start + t[:, None] * delta
        return np.array(self.positions_m)

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """Uniform random positions in the region.

        Parameters
        ----------
        n : int
            Number of positions, >= 0.
        rng : numpy.random.Generator
            The source of randomness.

        Returns
        -------
        (n, 3) float
            Uniform over the area (2-D; polygons by rejection from the bounding box in
            vectorised batches), the length (segment), or the listed points (points).
        """
        n = _positive_int(n, "n", minimum=0)
        if self._plane is not None:
            plane = self._plane
            a0, b0, a1, b1 = plane.shape.bounds
            if self.kind == "rectangle":
                return plane.to_space(rng.uniform((a0, b0), (a1, b1), size=(n, 2)))
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
        if self._seg is not None:
            start, delta, _ = self._seg
            return start + rng.uniform(0.0, 1.0, size=(n, 1)) * delta
        pos = np.array(self.positions_m)
        return pos[rng.integers(0, len(pos), size=n)]

    # ---------------------------------------------------------------- unit-box parametrisation
    def from_unit(self, u) -> np.ndarray:
        """Map the unit box of dimension :attr:`unit_dim` onto the region (continuous).

        * rectangle: affine onto the rectangle;
        * polygon (horizontal or 3-D): affine onto its bounding box in its plane, then any point
          outside the outline moves to the nearest point of the outline (shapely);
        * segment: along it from ``start_m`` (0) to ``end_m`` (1);
        * points: ``u`` picks index ``floor(u * n_points)``, clipped to the last point.

        Parameters
        ----------
        u : (..., unit_dim) float
            Coordinates in [0, 1] (round-off beyond the ends is clipped).

        Returns
        -------
        (..., 3) float
            Positions in the region, m.
        """
        d = self.unit_dim
        arr = np.asarray(u, dtype=float)
        if arr.ndim == 0 or arr.shape[-1] != d:
            raise ValueError(
                f"`u` for {_describe(self)} must have shape (..., {d}); got {arr.shape}."
            )
        if (
            not np.all(np.isfinite(arr))
            or arr.min(initial=0.0) < -1e-9
            or arr.max(initial=0.0) > 1.0 + 1e-9
        ):
            raise ValueError(f"`u` for {_describe(self)} must lie in [0, 1].")
        flat = np.clip(arr.reshape(-1, d), 0.0, 1.0)
        if self._plane is not None:
            plane = self._plane
            a0, b0, a1, b1 = plane.shape.bounds
            ab = np.array([a0, b0]) + flat * np.array([a1 - a0, b1 - b0])
            if self.kind == "polygon" and len(ab):
                out = ~plane.inside(ab)
                if out.any():
                    ab[out] = plane.nearest(ab[out])
            pos = plane.to_space(ab)
        elif self._seg is not None:
            start, delta, _ = self._seg
            pos = start + flat[:, :1] * delta
        else:
            pts = np.array(self.positions_m)
            idx = np.clip(np.floor(flat[:, 0] * len(pts)).astype(int), 0, len(pts) - 1)
            pos = pts[idx]
        return pos.reshape(arr.shape[:-1] + (3,))

    def to_unit(self, points_m) -> np.ndarray:
        """Inverse of :meth:`from_unit` for positions in the region.

        Parameters
        ----------
        points_m : (..., 3) float
            Positions, m (projected onto the region's plane or line; points snap to the
            nearest listed point).

        Returns
        -------
        (..., unit_dim) float
            Coordinates in [0, 1]; ``from_unit(to_unit(p)) == p`` for ``p`` in the region.
        """
        arr = np.asarray(points_m, dtype=float)
        if arr.ndim == 0 or arr.shape[-1] != 3:
            raise ValueError(f"`points_m` must have shape (..., 3) in metres; got {arr.shape}.")
        p = _points(arr.reshape(-1, 3))
        if self._plane is not None:
            ab, _ = self._plane.to_plane(p)
            a0, b0, a1, b1 = self._plane.shape.bounds
            u = (ab - np.array([a0, b0])) / np.array([a1 - a0, b1 - b0])
        elif self._seg is not None:
            start, delta, length = self._seg
            u = ((p - start) @ delta / length**2)[:, None]
        else:
            n = len(self.positions_m)
            idx = self._tree.query(p, k=1)[1] if len(p) else np.zeros(0, dtype=int)
            u = ((np.asarray(idx) + 0.5) / n)[:, None]
        return np.clip(u, 0.0, 1.0).reshape(arr.shape[:-1] + (self.unit_dim,))

    # ---------------------------------------------------------------- helpers for Site
    def _xy_projection(self) -> shapely.Geometry:
        """The region's shadow on the ground plane, as a shapely geometry in (x, y)."""
        if self._plane is not None and self._plane.footprint:
            return self._plane.shape
        outline = self.outline_m()[:, :2]
        if self._plane is not None:
            poly = shapely.Polygon(outline)
            if poly.is_valid and poly.area > 1e-12 * max(self.measure, 1.0):
                return poly
            return shapely.LineString(np.vstack([outline, outline[:1]]))
        if self._seg is not None:
            if np.allclose(outline[0], outline[1]):
                return shapely.Point(outline[0])
            return shapely.LineString(outline)
        return shapely.MultiPoint(outline)

    def _test_points(self) -> np.ndarray:
        """A dense sample of the region (lattice plus boundary), for coverage tests."""
        if self._plane is not None:
            a0, b0, a1, b1 = self._plane.shape.bounds
            inner = self.grid(max(a1 - a0, b1 - b0) / 40.0)
            ring = self._plane.shape.exterior
            t = np.linspace(0.0, ring.length, 400, endpoint=False)
            edge = shapely.get_coordinates(shapely.line_interpolate_point(ring, t))
            return np.vstack([inner, self._plane.to_space(edge)])
        if self._seg is not None:
            start, delta, _ = self._seg
            return start + np.linspace(0.0, 1.0, 401)[:, None] * delta
        return np.array(self.positions_m)


def _horizontal_plane(shape: shapely.Polygon, z: float) -> _Plane:
    return _make_plane(
        (0.0, 0.0, z), ((1.0, 0.0, 0.0), (0.0, 1.0, 0.0)), (0.0, 0.0, 1.0), shape, True
    )


def _offsets(shape: shapely.Polygon, distance: float) -> tuple[shapely.Geometry, ...]:
    """Polygons inside and outside the exact offset of ``shape`` by ``distance``.

    shapely's buffer puts the vertices of each rounded corner on the arc, so its chords lie
    inside the exact offset; growing the radius by 1 / cos(half the chord angle) puts the chords
    outside it (each chord of a quarter circle split into q pieces spans pi / (2 q)).
    """
    q = 16
    inner = shape.buffer(distance * (1.0 - 1e-9), quad_segs=q)
    outer = shape.buffer(distance / math.cos(math.pi / (4 * q)) * (1.0 + 1e-9), quad_segs=q)
    shapely.prepare(inner)
    shapely.prepare(outer)
    return inner, outer


def _list(values) -> str:
    return "[" + ", ".join(f"{v:g}" for v in values) + "]"


# --------------------------------------------------------------------------------------------
# Candidates and Site
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Candidates:
    """A candidate lattice over a site.

    Attributes
    ----------
    positions_m : (n_candidates, 3) float
        Allowed candidate positions, m.
    region_index : (n_candidates,) int
        Index into ``Site.regions`` of the region each came from.
    gain : (n_candidates,) float
        The calibration factor of that region.
    spacing_m : float
        Lattice spacing used, m (0.0 when the site has only points regions).
    """

    positions_m: np.ndarray
    region_index: np.ndarray
    gain: np.ndarray
    spacing_m: float

    @property
    def n_candidates(self) -> int:
        return int(len(self.positions_m))


@dataclass(frozen=True, eq=False)
class Site:
    """Where probes may be mounted: regions, keep-outs, spacing and installed probes.

    Parameters
    ----------
    regions : tuple of Region
        Mounting regions, at least one; a position is allowed on any of them.
    keepouts : tuple of Region
        Zones where no probe may go (see :meth:`Region.contains` for their semantics).
    min_spacing_m : float
        Least 3-D distance between any two probes, installed ones included, m, >= 0.
    installed_m : (n_installed, 3) float
        Probes already mounted: fixed, counted in every spacing check, m.

    Notes
    -----
    Two probes never share a position: besides ``min_spacing_m``, every pair of probes must be
    more than :data:`COINCIDENT_M` apart (a mounting point holds one meter).
    """

    regions: tuple[Region, ...]
    keepouts: tuple[Region, ...] = ()
    min_spacing_m: float = 0.0
    installed_m: np.ndarray = field(default_factory=lambda: np.empty((0, 3)))

    def __post_init__(self) -> None:
        regions = tuple(self.regions) if not isinstance(self.regions, Region) else (self.regions,)
        keepouts = (
            tuple(self.keepouts) if not isinstance(self.keepouts, Region) else (self.keepouts,)
        )
        if not regions:
            raise ValueError("`regions` must hold at least one mounting region; got none.")
        for word, group in (("regions", regions), ("keepouts", keepouts)):
            for i, r in enumerate(group):
                if not isinstance(r, Region):
                    raise ValueError(f"`{word}[{i}]` must be a Region; got {type(r).__name__}.")
        for i, r in enumerate(regions):
            if r.buffer_m != 0.0:
                raise ValueError(
                    f"`buffer_m` applies to keep-outs only; {_label('region', i, r)} has "
                    f"buffer_m={r.buffer_m:g}."
                )
        for k, r in enumerate(keepouts):
            if r.gain != 1.0:
                raise ValueError(
                    f"`gain` applies to mounting regions only; {_label('keep-out', k, r)} has "
                    f"gain={r.gain:g}."
                )
        try:
            spacing = float(self.min_spacing_m)
        except (TypeError, ValueError):
            raise ValueError(
                f"`min_spacing_m` must be a number of metres >= 0; got {self.min_spacing_m!r}."
            ) from None
        if not math.isfinite(spacing) or spacing < 0.0:
            raise ValueError(f"`min_spacing_m` must be a number of metres >= 0; got {spacing}.")
        installed = np.array(self.installed_m, dtype=float)
        if installed.size == 0:
            installed = np.empty((0, 3))
        if installed.ndim != 2 or installed.shape[1] != 3:
            raise ValueError(
                f"`installed_m` must have shape (n_installed, 3) in metres; got {installed.shape}."
            )
        if not np.all(np.isfinite(installed)):
            raise ValueError("`installed_m` must be finite.")
        installed.setflags(write=False)
        object.__setattr__(self, "regions", regions)
        object.__setattr__(self, "keepouts", keepouts)
        object.__setattr__(self, "min_spacing_m", spacing)
        object.__setattr__(self, "installed_m", installed)

    # ---------------------------------------------------------------- rules, vectorised
    @property
    def _sep(self) -> float:
        return max(self.min_spacing_m, COINCIDENT_M)

    def _far_enough(self, d2: np.ndarray) -> np.ndarray:
        """Squared distances -> True where the pair keeps the spacing rule."""
        return d2 >= (self._sep * (1.0 - _SPACING_RTOL)) ** 2

    def _in_regions(self, p: np.ndarray) -> np.ndarray:
        inside = np.zeros(len(p), dtype=bool)
        for r in self.regions:
            inside |= r._covers(p)
        return inside

    def _keepout_free(self, p: np.ndarray) -> np.ndarray:
        free = np.ones(len(p), dtype=bool)
        for k in self.keepouts:
            free &= ~k._contains(p)
        return free

    def _clear_of_installed(self, p: np.ndarray) -> np.ndarray:
        if len(self.installed_m) == 0:
            return np.ones(len(p), dtype=bool)
        d2 = np.sum((p[:, None, :] - self.installed_m[None, :, :]) ** 2, axis=-1)
        return np.all(self._far_enough(d2), axis=1)

    def allowed(self, points_m) -> np.ndarray:
        """Whether each position is an allowed mounting position.

        Parameters
        ----------
        points_m : (n_points, 3) float
            Positions, m.

        Returns
        -------
        (n_points,) bool
            On some region (:meth:`Region.covers`, within 1e-6 m) and in no keep-out
            (:meth:`Region.contains`). Spacing is not part of this test (see
            :meth:`spacing_ok`).
        """
        p = _points(points_m)
        return self._in_regions(p) & self._keepout_free(p)

    def spacing_ok(self, layouts_m) -> np.ndarray:
        """Whether each layout keeps the minimum spacing.

        Parameters
        ----------
        layouts_m : (n_layouts, n_probes, 3) float
            Layouts, m.

        Returns
        -------
        (n_layouts,) bool
            True when every pair of the layout's probes, and every probe with every installed
            probe, is at least ``min_spacing_m`` apart (3-D distance) and no two share a position.
        """
        lay = np.asarray(layouts_m, dtype=float)
        if lay.ndim != 3 or lay.shape[2] != 3:
            raise ValueError(
                f"`layouts_m` must have shape (n_layouts, n_probes, 3) in metres; got {lay.shape}."
            )
        if not np.all(np.isfinite(lay)):
            raise ValueError("`layouts_m` must be finite.")
        n_layouts, n_probes, _ = lay.shape
        ok = np.ones(n_layouts, dtype=bool)
        n_inst = len(self.installed_m)
        if n_probes == 0:
            return ok
        iu = np.triu_indices(n_probes, 1)
        block = max(1, _BLOCK_ELEMENTS // (3 * n_probes * (n_probes + n_inst)))
        for lo in range(0, n_layouts, block):
            part = lay[lo : lo + block]
            if n_probes > 1:
                d2 = np.sum((part[:, :, None, :] - part[:, None, :, :]) ** 2, axis=-1)
                ok[lo : lo + block] &= np.all(self._far_enough(d2[:, iu[0], iu[1]]), axis=1)
            if n_inst:
                d2 = np.sum((part[:, :, None, :] - self.installed_m[None, None]) ** 2, axis=-1)
                ok[lo : lo + block] &= np.all(self._far_enough(d2), axis=(1, 2))
        return ok

    def violations(self, layout_m) -> list[str]:
        """Human-readable reasons a layout breaks the mounting rules.

        Parameters
        ----------
        layout_m : (n_probes, 3) float
            One layout, m. Probes are numbered from 0 in this order; installed probes from 0 in
            ``installed_m`` order; regions and keep-outs from 0 in the site's order.

        Returns
        -------
        list of str
            One sentence per broken rule; empty when the layout is fine.
        """
        p = _points(layout_m, "layout_m")
        out: list[str] = []
        if len(p) == 0:
            return out
        inside = self._in_regions(p)
        if not inside.all():
            bad = np.flatnonzero(~inside)
            dist = np.stack([r._distance(p[bad]) for r in self.regions])  # (n_regions, n_bad)
            nearest = np.argmin(dist, axis=0)
            for j, i in enumerate(bad):
                r = int(nearest[j])
                out.append(
                    f"probe {i} at {_fmt(p[i])} m lies outside every mounting region (nearest: "
                    f"{_label('region', r, self.regions[r])}, {dist[r, j]:.3g} m away)."
                )
        for k, ko in enumerate(self.keepouts):
            for i in np.flatnonzero(ko._contains(p)):
                out.append(f"probe {i} at {_fmt(p[i])} m lies in {_label('keep-out', k, ko)}.")
        d = np.linalg.norm(p[:, None, :] - p[None, :, :], axis=-1)
        ii, jj = np.triu_indices(len(p), 1)
        close = ~self._far_enough(d[ii, jj] ** 2)
        for i, j in zip(ii[close], jj[close], strict=True):
            out.append(self._too_close(f"probes {i} and {j} are", d[i, j]))
        if len(self.installed_m):
            di = np.linalg.norm(p[:, None, :] - self.installed_m[None, :, :], axis=-1)
            for i, k in zip(*np.nonzero(~self._far_enough(di**2)), strict=True):
                out.append(self._too_close(f"probe {i} and installed probe {k} are", di[i, k]))
        return out

    def _too_close(self, who: str, dist: float) -> str:
        if dist <= COINCIDENT_M:
            return f"{who} at the same position; a mounting position holds one meter."
        return (
            f"{who} {dist:.3g} m apart, closer than the minimum spacing of "
            f"{self.min_spacing_m:g} m (`min_spacing_m`)."
        )

    # ---------------------------------------------------------------- candidate lattice
    def _auto_spacing(self, target: int) -> float:
        """Spacing at which the lattices of all regions hold about ``target`` points."""
        area = sum(r.measure for r in self.regions if r.dimension == 2)
        length = sum(r.measure for r in self.regions if r.dimension == 1)
        n_points = sum(r.measure for r in self.regions if r.dimension == 0)
        n_cont = sum(1 for r in self.regions if r.dimension > 0)
        if n_cont == 0:
            return 0.0
        t = max(target - n_points, n_cont)
        # A / s^2 + L / s = t, solved for s > 0.
        if area > 0.0:
            return (length + math.sqrt(length**2 + 4.0 * t * area)) / (2.0 * t)
        return length / t

    def _region_weights(self) -> np.ndarray:
        """``(n_regions,)``: the share of each region in random draws and regular layouts.

        Proportional to the region's measure among regions of one dimension; across dimensions
        each region weighs as many points as its lattice holds at the automatic spacing, so a
        rectangle and a fence compete on the same footing.
        """
        s = self._auto_spacing(1500)
        w = np.array([r.measure / (s**r.dimension if r.dimension else 1.0) for r in self.regions])
        return w / w.sum()

    def _lattice(self, spacing: float) -> Candidates:
        parts, index, gain = [], [], []
        for i, r in enumerate(self.regions):
            pts = r.grid(spacing) if r.dimension else np.array(r.positions_m)
            parts.append(pts)
            index.append(np.full(len(pts), i))
            gain.append(np.full(len(pts), r.gain))
        pos = np.concatenate(parts)
        idx = np.concatenate(index)
        g = np.concatenate(gain)
        keep = self._keepout_free(pos) & self._clear_of_installed(pos)
        pos, idx, g = pos[keep], idx[keep], g[keep]
        if len(pos):
            _, first = np.unique(pos, axis=0, return_index=True)
            first = np.sort(first)
            pos, idx, g = pos[first], idx[first], g[first]
        return Candidates(pos, idx.astype(np.intp), g, float(spacing))

    def candidate_grid(self, spacing_m: float | None = None, target: int = 1500) -> Candidates:
        """A lattice of allowed candidate positions over all regions.

        Parameters
        ----------
        spacing_m : float, optional
            Lattice spacing, m. When omitted it is chosen so that the count is near ``target``:
            area / s² + length / s + points = target (2-D regions weighed by area, segments by
            length, points regions adding their points), refined a few times for the share the
            keep-outs remove.
        target : int
            Desired number of candidates when ``spacing_m`` is omitted.

        Returns
        -------
        Candidates
            Lattice points of every region (:meth:`Region.grid`) outside every keep-out, and at
            least ``min_spacing_m`` from every installed probe; exact duplicates (overlapping
            regions) appear once, with the first region's index and gain.
        """
        if spacing_m is not None:
            cands = self._lattice(_spacing(spacing_m))
        else:
            target = _positive_int(target, "target")
            s = self._auto_spacing(target)
            if s == 0.0:
                cands = self._lattice(1.0)
                cands = Candidates(cands.positions_m, cands.region_index, cands.gain, 0.0)
            else:
                cont = [i for i, r in enumerate(self.regions) if r.dimension > 0]
                n_points = sum(r.measure for r in self.regions if r.dimension == 0)
                want = max(target - n_points, len(cont))
                cands = self._lattice(s)
                for _ in range(4):  # the keep-outs may remove a share of the lattice
                    n_cont = int(np.isin(cands.region_index, cont).sum())
                    if n_cont == 0:
                        s *= 0.5
                    else:
                        ratio = n_cont / want
                        if 0.8 <= ratio <= 1.25:
                            break
                        s *= math.sqrt(ratio)
                    cands = self._lattice(s)
        if cands.n_candidates == 0:
            raise ValueError(
                f"no candidate position is left at a lattice spacing of {cands.spacing_m:g} m: "
                "every lattice point lies in a keep-out or within `min_spacing_m` of an "
                "installed probe. Shrink the keep-outs, or give a finer `spacing_m`."
            )
        return cands

    # ---------------------------------------------------------------- feasibility
    def _covering_keepouts(self, region: Region) -> list[int]:
        """Keep-outs that together cover the whole region; empty when some of it is free."""
        if not self.keepouts:
            return []
        foot = [(k, ko) for k, ko in enumerate(self.keepouts) if ko.is_footprint]
        if foot:
            shadow = region._xy_projection()
            grown = {
                k: (ko._plane.shape.buffer(ko.buffer_m) if ko.buffer_m else ko._plane.shape_tol)
                for k, ko in foot
            }
            for k, g in grown.items():
                if g.covers(shadow):
                    return [k]
            if shapely.union_all(list(grown.values())).covers(shadow):
                return [k for k, g in grown.items() if g.intersects(shadow)]
        test = region._test_points()
        inside = np.stack([ko._contains(test) for ko in self.keepouts])  # (n_keepouts, n_test)
        whole = np.flatnonzero(inside.all(axis=1))
        if len(whole):
            return [int(whole[0])]
        if inside.any(axis=0).all():
            return [int(k) for k in np.flatnonzero(inside.any(axis=1))]
        return []

    def _free_points(self, region: Region) -> np.ndarray:
        """Distinct allowed listed points of a points region, clear of installed probes."""
        pts = np.unique(np.array(region.positions_m), axis=0)
        return pts[self._keepout_free(pts) & self._clear_of_installed(pts)]

    def _capacity(self, region: Region) -> float:
        """An upper estimate of how many probes ``min_spacing_m`` apart the region holds."""
        s = self.min_spacing_m
        if region.dimension == 0:
            pts = self._free_points(region)
            return float(len(_greedy_independent(pts, self._sep)))
        if s == 0.0:
            return math.inf
        if region.dimension == 1:
            return math.floor(region.measure / s + 1e-9) + 1.0
        shape = region._plane.shape
        if region.is_footprint:
            for ko in self.keepouts:
                if ko.is_footprint:
                    shape = shape.difference(ko._plane.shape.buffer(ko.buffer_m))
        if shape.is_empty:
            return 0.0
        n_parts = len(shapely.get_parts(shape))
        # Packing bound: a hexagonal cell of (sqrt 3 / 2) s^2 per point, plus a boundary term.
        return shape.area / (HEX_CELL_FACTOR * s * s) + shape.length / s + n_parts

    def check_feasible(self, count: int) -> None:
        """Raise ``ValueError`` when ``count`` probes obviously cannot be placed.

        Checks, in order: every region lies wholly inside keep-outs (tested exactly with
        shapely for footprint keep-outs, on a dense sample of the region otherwise); a
        points-only site has fewer distinct allowed points than ``count``; the packing estimate
        of all regions is below ``count``. The estimate per region: a 2-D region of area A and
        perimeter P (footprint keep-outs removed) holds at most about A / (0.866 s²) + P / s + 1
        points ``s`` apart, a segment of length L holds floor(L / s) + 1, a points region its
        greedy count of allowed points ``s`` apart.

        Parameters
        ----------
        count : int
            Probes to place besides the installed ones, >= 1.
        """
        count = _positive_int(count, "count")
        covered = [self._covering_keepouts(r) for r in self.regions]
        if all(covered):
            parts = []
            for i, (r, ks) in enumerate(zip(self.regions, covered, strict=True)):
                names = " and ".join(_label("keep-out", k, self.keepouts[k]) for k in ks)
                parts.append(f"{_label('region', i, r)} lies wholly inside {names}")
            raise ValueError(
                "no mounting position is left: "
                + "; ".join(parts)
                + ". Shrink or remove the keep-outs, or add a mounting region."
            )
        if all(r.dimension == 0 for r in self.regions):
            pts = np.concatenate([self._free_points(r) for r in self.regions])
            distinct = len(np.unique(pts, axis=0)) if len(pts) else 0
            listed = sum(len(r.positions_m) for r in self.regions)
            if distinct < count:
                raise ValueError(
                    f"cannot place {count} probes: only {distinct} distinct allowed mounting "
                    f"points remain (of {listed} listed; the rest lie in keep-outs or too close "
                    "to installed probes). Lower `count` or list more `positions_m`."
                )
            held = len(_greedy_independent(np.unique(pts, axis=0), self._sep))
            if held < count:
                raise ValueError(
                    f"cannot place {count} probes at least {self.min_spacing_m:g} m apart: only "
                    f"about {held} of the {distinct} allowed mounting points keep that spacing "
                    "(greedy count). Lower `count` or `min_spacing_m`, or list more points."
                )
            return
        capacity = sum(
            self._capacity(r) for r, c in zip(self.regions, covered, strict=True) if not c
        )
        if count > capacity:
            raise ValueError(
                f"cannot place {count} probes at least {self.min_spacing_m:g} m apart: the "
                f"mounting regions hold about {int(capacity)} at most at that spacing (packing "
                "estimate: area / (0.866 s²) + perimeter / s + 1 per 2-D region, "
                "floor(length / s) + 1 per segment). Lower `count` or `min_spacing_m`, or "
                "enlarge the mounting regions."
            )

    # ---------------------------------------------------------------- layouts
    def _draw(self, n: int, rng: np.random.Generator, weights: np.ndarray) -> np.ndarray:
        """``(n, 3)`` positions: a region by weight, then uniform in it."""
        which = rng.choice(len(self.regions), size=n, p=weights)
        out = np.empty((n, 3))
        for i, r in enumerate(self.regions):
            sel = which == i
            if sel.any():
                out[sel] = r.sample(int(sel.sum()), rng)
        return out

    def random_layouts(
        self, n_layouts: int, count: int, rng: np.random.Generator, max_tries: int = 50
    ) -> np.ndarray:
        """Random feasible layouts.

        Probe slots are filled one after another for all layouts at once: each round draws
        candidate positions for every layout still waiting (a region chosen by
        :meth:`_region_weights`, then uniform in it) and keeps the first one that lies outside
        the keep-outs and keeps the spacing to the probes already placed and to the installed
        ones.

        Parameters
        ----------
        n_layouts : int
            Number of layouts, >= 1.
        count : int
            Probes per layout, >= 1.
        rng : numpy.random.Generator
            The source of randomness.
        max_tries : int
            Rounds allowed per slot before giving up.

        Returns
        -------
        (n_layouts, count, 3) float
            Every layout passes :meth:`allowed` and :meth:`spacing_ok`.

        Raises
        ------
        ValueError
            When the rules cannot hold (:meth:`check_feasible`) or a slot stays empty after
            ``max_tries`` rounds.
        """
        n_layouts = _positive_int(n_layouts, "n_layouts")
        count = _positive_int(count, "count")
        max_tries = _positive_int(max_tries, "max_tries")
        self.check_feasible(count)
        weights = self._region_weights()
        out = np.zeros((n_layouts, count, 3))
        for slot in range(count):
            pending = np.arange(n_layouts)
            for attempt in range(max_tries):
                m, k = len(pending), min(_DRAWS_FIRST_ROUND << attempt, _DRAWS_MAX)
                cand = self._draw(m * k, rng, weights)
                ok = (self._keepout_free(cand) & self._clear_of_installed(cand)).reshape(m, k)
                cand = cand.reshape(m, k, 3)
                if slot:
                    placed = out[pending, :slot]  # (m, slot, 3)
                    d2 = np.sum((cand[:, :, None, :] - placed[:, None, :, :]) ** 2, axis=-1)
                    ok &= np.all(self._far_enough(d2), axis=2)
                hit = ok.any(axis=1)
                first = np.argmax(ok, axis=1)
                out[pending[hit], slot] = cand[hit, first[hit]]
                pending = pending[~hit]
                if len(pending) == 0:
                    break
            if len(pending):
                raise ValueError(
                    f"cannot place probe {slot + 1} of {count} in {len(pending)} of "
                    f"{n_layouts} random layouts after {max_tries} rounds: the mounting rules "
                    f"leave too little room (min_spacing_m={self.min_spacing_m:g} m, "
                    f"{len(self.keepouts)} keep-outs, {len(self.installed_m)} installed probes). "
                    "Lower `count` or `min_spacing_m`, or enlarge the mounting regions."
                )
        return out

    def regular_layout(self, count: int) -> np.ndarray:
        """The layout an engineer would draw by hand.

        ``count`` is split among the regions in proportion to :meth:`_region_weights` (largest
        remainder). In a 2-D region the probes sit at the centres of the cells of a near-square
        ``rows x cols`` lattice (``rows * cols >= count``, the last row centred) filling its
        bounding box; along a segment at the centres of ``count`` equal pieces; on points a
        spread-out choice of them. Probes that land outside the allowed area move to the nearest
        free candidate of :meth:`candidate_grid`. When that still breaks the rules, a greedy
        max-min-distance choice from the candidate lattice replaces it.

        Parameters
        ----------
        count : int
            Probes to place, >= 1.

        Returns
        -------
        (count, 3) float
            A layout that passes :meth:`allowed` and :meth:`spacing_ok`.

        Raises
        ------
        ValueError
            When no feasible layout is found.
        """
        count = _positive_int(count, "count")
        self.check_feasible(count)
        shares = _largest_remainder(count, self._region_weights())
        layout = np.concatenate(
            [_hand_drawn(r, k, self._sep) for r, k in zip(self.regions, shares, strict=True) if k]
        )
        cands = self.candidate_grid(target=max(1500, 50 * count))
        pushed = self._push_allowed(layout, cands.positions_m)
        if pushed is not None:
            return pushed
        for target in (1500, 6000):
            pos = self.candidate_grid(target=max(target, 50 * count)).positions_m
            chosen = _greedy_spread(pos, count, self.installed_m, self._sep)
            if chosen is None:
                # Max-min picks can strand room near capacity; a first-fit packing along the
                # long axis finds more room, and any subset of it keeps the spacing.
                packed = _first_fit(pos, self.installed_m, self._sep)
                if len(packed) >= count:
                    chosen = packed[_greedy_spread(pos[packed], count, self.installed_m, 0.0)]
            if chosen is not None:
                return pos[chosen]
        raise ValueError(
            f"cannot place {count} probes at least {self.min_spacing_m:g} m apart on the "
            "candidate lattice: the mounting rules leave too little room. Lower `count` or "
            "`min_spacing_m`, or enlarge the mounting regions."
        )

    def _push_allowed(self, layout: np.ndarray, cands: np.ndarray) -> np.ndarray | None:
        """Move probes outside the allowed area to the nearest free candidate; None on failure."""
        layout = layout.copy()
        ok = self.allowed(layout)
        sep2 = (self._sep * (1.0 - _SPACING_RTOL)) ** 2
        free = self._clear_of_installed(cands)
        for i in np.flatnonzero(~ok):  # only the few misplaced probes
            others = layout[ok]
            d2 = np.sum((cands - layout[i]) ** 2, axis=1)
            if len(others):
                near = np.sum((cands[:, None, :] - others[None]) ** 2, axis=-1) < sep2
                d2[near.any(axis=1)] = np.inf
            d2[~free] = np.inf
            j = int(np.argmin(d2)) if len(d2) else -1
            if j < 0 or not np.isfinite(d2[j]):
                return None
            layout[i] = cands[j]
            ok[i] = True
        if self.allowed(layout).all() and self.spacing_ok(layout[None])[0]:
            return layout
        return None


# --------------------------------------------------------------------------------------------
# Private helpers for layouts
# --------------------------------------------------------------------------------------------


def _largest_remainder(count: int, weights: np.ndarray) -> np.ndarray:
    """Split ``count`` in proportion to ``weights`` into integers summing to ``count``."""
    raw = count * weights
    base = np.floor(raw).astype(int)
    rest = count - int(base.sum())
    order = np.argsort(-(raw - base), kind="stable")
    base[order[:rest]] += 1
    return base


def _hand_drawn(region: Region, k: int, sep: float) -> np.ndarray:
    """``(k, 3)``: a hand-drawn arrangement of ``k`` probes in one region (rules unchecked)."""
    if region._plane is not None:
        plane = region._plane
        a0, b0, a1, b1 = plane.shape.bounds
        w, h = a1 - a0, b1 - b0
        cols = int(min(max(round(math.sqrt(k * w / h)), 1), k))
        rows = math.ceil(k / cols)
        i = np.arange(k)
        row, col = i // cols, i % cols
        in_last = k - (rows - 1) * cols  # probes in the (possibly partial) last row
        last = row == rows - 1
        a = np.where(
            last,
            a0 + 0.5 * w + (col - 0.5 * (in_last - 1)) * w / cols,
            a0 + (col + 0.5) * w / cols,
        )
        b = b0 + (row + 0.5) * h / rows
        return plane.to_space(np.stack([a, b], axis=1))
    if region._seg is not None:
        start, delta, _ = region._seg
        return start + ((np.arange(k) + 0.5) / k)[:, None] * delta
    pts = np.array(region.positions_m)
    chosen = _greedy_spread(pts, k, np.empty((0, 3)), sep)
    return pts[chosen] if chosen is not None else pts[np.arange(k) % len(pts)]


def _greedy_spread(cands: np.ndarray, k: int, fixed: np.ndarray, sep: float) -> np.ndarray | None:
    """Greedy max-min-distance choice of ``k`` of ``cands : (n, 3)``, each ``sep`` from the
    others and from ``fixed : (m, 3)``. Returns ``(k,)`` indices, or None when it runs out."""
    if len(cands) < k:
        return None
    sep2 = (sep * (1.0 - _SPACING_RTOL)) ** 2
    if len(fixed):
        dmin2 = np.min(np.sum((cands[:, None, :] - fixed[None]) ** 2, axis=-1), axis=1)
    else:
        dmin2 = np.full(len(cands), np.inf)
    chosen = np.empty(k, dtype=np.intp)
    for step in range(k):  # one pick per probe; each pick is vectorised over candidates
        if step == 0 and not len(fixed):
            j = int(np.argmax(np.sum((cands - cands.mean(axis=0)) ** 2, axis=1)))
        else:
            j = int(np.argmax(dmin2))
        if dmin2[j] < sep2:
            return None
        chosen[step] = j
        dmin2 = np.minimum(dmin2, np.sum((cands - cands[j]) ** 2, axis=1))
    return chosen


def _first_fit(cands: np.ndarray, fixed: np.ndarray, sep: float) -> np.ndarray:
    """Indices of candidates kept by a first-fit sweep along their principal axis: each is kept
    when it is ``sep`` from every kept one and from ``fixed``. All kept pairs keep the spacing."""
    if len(cands) == 0:
        return np.zeros(0, dtype=np.intp)
    centred = cands - cands.mean(axis=0)
    _, _, vt = np.linalg.svd(centred, full_matrices=False)
    proj = centred @ vt.T
    order = np.lexsort(proj.T[::-1])
    sep2 = (sep * (1.0 - _SPACING_RTOL)) ** 2
    kept_pos = np.empty((len(cands) + len(fixed), 3))
    kept_pos[: len(fixed)] = fixed
    n_kept = len(fixed)
    kept = []
    for j in order:  # a sweep over candidates; each test is vectorised over the kept ones
        if np.all(np.sum((kept_pos[:n_kept] - cands[j]) ** 2, axis=1) >= sep2):
            kept.append(j)
            kept_pos[n_kept] = cands[j]
            n_kept += 1
    return np.asarray(kept, dtype=np.intp)


def _greedy_independent(pts: np.ndarray, sep: float) -> np.ndarray:
    """Indices of a large subset of ``pts : (n, 3)`` with all pairs at least ``sep`` apart.

    The minimum-degree greedy heuristic for a maximum independent set in the conflict graph:
    repeatedly keep the point with the fewest conflicts left and drop its conflicting neighbours.
    """
    if len(pts) == 0:
        return np.zeros(0, dtype=np.intp)
    sep2 = (sep * (1.0 - _SPACING_RTOL)) ** 2
    d2 = np.sum((pts[:, None, :] - pts[None]) ** 2, axis=-1)
    conflict = d2 < sep2
    np.fill_diagonal(conflict, False)
    alive = np.ones(len(pts), dtype=bool)
    kept = []
    while alive.any():  # each round removes at least one point
        degree = np.where(alive, (conflict & alive).sum(axis=1), np.iinfo(np.int64).max)
        j = int(np.argmin(degree))
        kept.append(j)
        alive[j] = False
        alive &= ~conflict[j]
    return np.asarray(kept, dtype=np.intp)
