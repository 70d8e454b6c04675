"""The frame of a planar region: a plane, two in-plane axes and an outline in their coordinates.

Rectangles, horizontal polygons and planar 3-D polygons (walls, roofs) share this one frame, so
they share one code path. The outline is a shapely polygon in the frame's ``(a, b)`` coordinates;
every point-in-polygon test and distance to a polygon is shapely's (vectorised shapely 2).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import shapely
from shapely.validation import explain_validity

from ._common import TOLERANCE_M


@dataclass(frozen=True, eq=False)
class Plane:
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


def make_plane(origin, axes, normal, shape, footprint: bool) -> Plane:
    """A :class:`Plane` with its outline and tolerance-grown outline prepared for fast tests."""
    shape_tol = shape.buffer(TOLERANCE_M)
    shapely.prepare(shape)
    shapely.prepare(shape_tol)
    return Plane(
        np.asarray(origin, dtype=float),
        np.asarray(axes, dtype=float),
        np.asarray(normal, dtype=float),
        shape,
        shape_tol,
        footprint,
    )


def horizontal_plane(shape: shapely.Polygon, z: float) -> Plane:
    """The plane ``z`` = const with ``(a, b) = (x, y)``: a footprint."""
    return make_plane(
        (0.0, 0.0, z), ((1.0, 0.0, 0.0), (0.0, 1.0, 0.0)), (0.0, 0.0, 1.0), shape, True
    )


def check_polygon(shape: shapely.Polygon, what: str) -> None:
    """Raise unless ``shape`` is simple with a nonzero area."""
    if not shape.is_valid:
        raise ValueError(
            f"`vertices_m` of {what} must describe a simple polygon (edges meet only at "
            f"consecutive vertices); shapely reports: {explain_validity(shape)}."
        )
    if not shape.area > 0.0:
        raise ValueError(f"`vertices_m` of {what} must enclose a nonzero area; got area 0.")


def distinct_ring(vertices: np.ndarray) -> np.ndarray:
    """Drop consecutive repeats and a closing copy of the first vertex."""
    keep = np.ones(len(vertices), dtype=bool)
    keep[1:] = np.any(vertices[1:] != vertices[:-1], axis=1)
    ring = vertices[keep]
    if len(ring) > 1 and np.array_equal(ring[0], ring[-1]):
        ring = ring[:-1]
    return ring


def plane_of_3d_polygon(vertices: np.ndarray, what: str) -> Plane:
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
    check_polygon(shape, what)
    return make_plane(centre, axes, normal, shape, footprint=False)


def offsets(shape: shapely.Polygon, distance: float) -> tuple[shapely.Geometry, ...]:
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
