"""Conducting structures (tanks, masts, buildings, screened rooms) and their surface meshes.

Layers:

* :class:`Conductor` — one structure, a small frozen object built by its class methods
  (``sphere``, ``spheroid``, ``box``, ``cylinder``, ``enclosure``, ``mesh``); grounded (0 V) or
  floating with a net charge.
* Meshing to flat triangles (:meth:`Conductor.triangles`): bodies of revolution (sphere,
  spheroid, cylinder) as rings along a graded profile, finer where the meridian curves (tips)
  and at rims; boxes as graded grids on each face, finer at edges. The part below the grounded
  plane is cut off and not meshed: the plane closes the body (its images are in the Green's
  function, :mod:`probeplan.bem`).
* Checks of points against the structures (:func:`check_points`): inside a solid structure
  (generalised winding number of its closed surface, mirrored in the plane when it stands on
  it) or closer to a surface than the panel size there (exact point–triangle distance).

Automatic mesh size: about ``_AUTO_PANELS`` panels on a smooth body, with edges and tips refined
(box and cylinder edges at a third of the size, growing away at ``_GROWTH`` per metre per metre)
and, given the meters, near them (:mod:`probeplan.meshrefine`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numba
import numpy as np

from .errors import InputError
from .meshrefine import onto_cylinder, onto_ellipsoid, refine_near

KINDS: tuple[str, ...] = ("sphere", "spheroid", "box", "cylinder", "enclosure", "mesh")
#: Which part of a structure's surface carries meters (see Conductor.surface_points).
FACES: tuple[str, ...] = ("top", "walls", "all")

# Panels on a smooth body with the automatic size; edges get a third of the size, and sizes
# grow away from an edge by this fraction of the distance.
_AUTO_PANELS = 600
_EDGE_FRACTION = 1.0 / 3.0
_GROWTH = 0.35
# A triangle of side h has area √3/4 h².
_TRI_AREA = math.sqrt(3.0) / 4.0


def _vec(value, name: str, n: int = 3) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if arr.shape != (n,) or not np.all(np.isfinite(arr)):
        raise InputError(f"`{name}` must be {n} finite numbers in metres; got {value!r}.")
    return arr


def _positive(value, name: str) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise InputError(f"`{name}` must be a number in metres; got {value!r}.") from None
    if not (math.isfinite(out) and out > 0.0):
        raise InputError(f"`{name}` must be > 0 and finite; got {value!r}.")
    return out


@dataclass(frozen=True, eq=False)
class Conductor:
    """One conducting structure.

    Build it with a class method: ``Conductor.sphere(center_m, radius_m)``,
    ``.spheroid(center_m, semi_axes_m)`` (axis-aligned), ``.box(min_m, max_m)``,
    ``.cylinder(base_m, radius_m, height_m)`` (vertical), ``.enclosure(min_m, max_m)`` (a
    closed room: sources and meters inside), ``.mesh(path_or_vertices_faces)`` (STL/OBJ/PLY in
    metres, read with trimesh, or ``(vertices (n, 3), faces (m, 3))``). Each takes
    ``floating=False, charge_c=0.0, mesh_size_m=None, name=""``.

    Attributes
    ----------
    kind : str
        One of :data:`KINDS`.
    geometry : tuple of float
        The kind's numbers (centre and radius, corners, …), metres.
    floating : bool
        ``False``: grounded, 0 V. ``True``: isolated, its potential follows from ``charge_c``.
    charge_c : float
        Net charge of a floating structure, C (ignored when grounded).
    mesh_size_m : float or None
        Largest panel edge, m; ``None`` picks one (about 600 panels, finer at edges and tips).
    name : str
        For messages and results.
    """

    kind: str
    geometry: tuple
    floating: bool = False
    charge_c: float = 0.0
    mesh_size_m: float | None = None
    name: str = ""
    surface: tuple | None = field(default=None, repr=False)  # mesh: (vertices, faces)

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise InputError(
                f"conductor kind must be one of {', '.join(KINDS)}; got {self.kind!r}."
            )
        charge = float(self.charge_c)
        if not math.isfinite(charge):
            raise InputError(f"`charge_c` must be finite; got {self.charge_c!r}.")
        object.__setattr__(self, "geometry", tuple(float(v) for v in self.geometry))
        object.__setattr__(self, "charge_c", charge)
        object.__setattr__(self, "floating", bool(self.floating))
        if charge != 0.0 and not self.floating:
            raise InputError(
                f"`charge_c` = {charge:g} C needs `floating = true`: a grounded structure's "
                "charge follows from the field (it is at 0 V)."
            )
        if self.mesh_size_m is not None:
            object.__setattr__(self, "mesh_size_m", _positive(self.mesh_size_m, "mesh_size_m"))

    # -- constructors ---------------------------------------------------------------------------

    @classmethod
    def sphere(cls, center_m, radius_m, **options) -> Conductor:
        """A sphere; centred on the grounded plane it is a hemispherical boss."""
        c, r = _vec(center_m, "center_m"), _positive(radius_m, "radius_m")
        return cls("sphere", (*c, r, r, r), **options)

    @classmethod
    def spheroid(cls, center_m, semi_axes_m, **options) -> Conductor:
        """An axis-aligned ellipsoid with semi-axes (a, b, c) along x, y, z (a mast with a
        rounded tip: a prolate one, c > a = b)."""
        c = _vec(center_m, "center_m")
        axes = _vec(semi_axes_m, "semi_axes_m")
        if np.any(axes <= 0):
            raise InputError(f"`semi_axes_m` must be > 0; got {axes.tolist()}.")
        return cls("spheroid", (*c, *axes), **options)

    @classmethod
    def box(cls, min_m, max_m, **options) -> Conductor:
        """A solid axis-aligned box (a building, a cabinet)."""
        return cls("box", _corners(min_m, max_m), **options)

    @classmethod
    def enclosure(cls, min_m, max_m, **options) -> Conductor:
        """A closed axis-aligned room of thin conducting walls, with sources and meters inside
        (a screened hall). Standing on the plane, its floor is the plane."""
        return cls("enclosure", _corners(min_m, max_m), **options)

    @classmethod
    def cylinder(cls, base_m, radius_m, height_m, **options) -> Conductor:
        """A vertical solid cylinder (a tank, a mast) from the centre of its base upwards."""
        b = _vec(base_m, "base_m")
        return cls(
            "cylinder",
            (*b, _positive(radius_m, "radius_m"), _positive(height_m, "height_m")),
            **options,
        )

    @classmethod
    def mesh(cls, path_or_vertices_faces, **options) -> Conductor:
        """A closed triangulated surface in metres: a file trimesh reads (STL, OBJ, PLY), or
        ``(vertices (n, 3) float, faces (m, 3) int)``. It must be closed, or closed by the
        grounded plane (its open edges on the plane)."""
        vertices, faces = _read_mesh(path_or_vertices_faces)
        return cls("mesh", (), surface=(vertices, faces), **options)

    # -- meshing --------------------------------------------------------------------------------

    @property
    def label(self) -> str:
        return f"{self.kind} {self.name!r}" if self.name else self.kind

    @property
    def solid(self) -> bool:
        """Whether the inside is metal (points there are refused); an enclosure is a thin wall."""
        return self.kind != "enclosure"

    def triangles(self, ground_z_m: float | None = None, meters_m=None) -> np.ndarray:
        """Flat panels of the surface above the plane, ``(n_panels, 3, 3)`` float, m,
        oriented outwards; with the automatic size, finer near ``meters_m`` ``(n, 3)``
        (:func:`probeplan.meshrefine.refine_near`)."""
        g, project = ground_z_m, None
        if self.kind in ("sphere", "spheroid"):
            tris = _ellipsoid(np.array(self.geometry[:3]), np.array(self.geometry[3:]), self, g)
            project = onto_ellipsoid(self.geometry[:3], self.geometry[3:], g)
        elif self.kind == "cylinder":
            tris = _cylinder(self, g)
            project = onto_cylinder(self.geometry[:2], self.geometry[3])
        elif self.kind in ("box", "enclosure"):
            tris = _box(np.array(self.geometry[:3]), np.array(self.geometry[3:]), self, g)
        else:
            tris = _mesh_triangles(self, g)
        if self.mesh_size_m is None and meters_m is not None:
            tris = refine_near(tris, meters_m, project)
        return tris

    def surface_points(
        self, ground_z_m: float | None, face: str, standoff_m: float, spacing_m: float
    ) -> np.ndarray:
        """Mounting points ``standoff_m`` off the surface, ``(n, 3)`` float, m.

        Parameters
        ----------
        face : str
            One of :data:`FACES`: ``"top"`` (panels facing up), ``"walls"`` (facing
            sideways), ``"all"``; for an enclosure the walls' and ceiling's inner side (meters
            inside the room), for every other kind the outer side.
        standoff_m : float
            Distance off the surface along its normal, m (> 0).
        spacing_m : float
            About one point per ``spacing_m`` square: the panel centroids, thinned to one per
            cell of a grid of that size.
        """
        if face not in FACES:
            raise InputError(f"`face` must be one of {', '.join(FACES)}; got {face!r}.")
        tris = self.triangles(ground_z_m)
        n = np.cross(tris[:, 1] - tris[:, 0], tris[:, 2] - tris[:, 0])
        n /= np.linalg.norm(n, axis=1)[:, None]
        if self.kind == "enclosure":
            n = -n  # meters inside the room
        keep = {"top": n[:, 2] > 0.7, "walls": np.abs(n[:, 2]) < 0.3, "all": np.ones(len(n), bool)}
        pts = tris.mean(axis=1)[keep[face]] + standoff_m * n[keep[face]]
        if pts.size == 0:
            return pts.reshape(0, 3)
        cells = np.floor(pts / spacing_m).astype(np.int64)
        _, first = np.unique(cells, axis=0, return_index=True)
        return pts[np.sort(first)]

    def key(self) -> bytes:
        """Bytes that identify the structure's geometry and settings (for the cache hash)."""
        parts = [self.kind, repr(self.geometry), repr(self.mesh_size_m), repr(self.floating)]
        out = ";".join(parts).encode()
        if self.surface is not None:
            out += self.surface[0].tobytes() + self.surface[1].tobytes()
        return out


def _corners(min_m, max_m) -> tuple:
    lo, hi = _vec(min_m, "min_m"), _vec(max_m, "max_m")
    if np.any(hi <= lo):
        raise InputError(
            f"`max_m` {hi.tolist()} must exceed `min_m` {lo.tolist()} along every axis."
        )
    return (*lo, *hi)


def _read_mesh(source) -> tuple[np.ndarray, np.ndarray]:
    import trimesh  # only this kind needs it

    if isinstance(source, (str, Path)):
        path = Path(source)
        try:
            mesh = trimesh.load(path, force="mesh", process=True)
        except Exception as exc:  # trimesh raises many types for unreadable files
            raise InputError(
                f"mesh file {str(path)!r} cannot be read as STL, OBJ or PLY: {exc}"
            ) from None
        if not isinstance(mesh, trimesh.Trimesh) or len(mesh.faces) == 0:
            raise InputError(f"mesh file {str(path)!r} holds no triangles.")
    else:
        try:
            vertices, faces = source
            mesh = trimesh.Trimesh(np.asarray(vertices, float), np.asarray(faces, int))
        except (TypeError, ValueError, IndexError):
            raise InputError(
                "`path_or_vertices_faces` must be a file path or (vertices (n, 3), faces (m, 3))."
            ) from None
    trimesh.repair.fix_normals(mesh)
    vertices = np.ascontiguousarray(mesh.vertices, dtype=float)
    faces = np.ascontiguousarray(mesh.faces, dtype=np.int64)
    if not np.all(np.isfinite(vertices)):
        raise InputError("mesh vertices must be finite.")
    vertices.setflags(write=False)
    faces.setflags(write=False)
    return vertices, faces


# --------------------------------------------------------------------------------------------
# Meshing
# --------------------------------------------------------------------------------------------


def _size(cond: Conductor, area_m2: float, thickness_m: float = math.inf) -> float:
    """The largest panel edge: the user's, or about ``_AUTO_PANELS`` equilateral panels over
    ``area_m2``, and no more than the body's smallest half-thickness (a slender mast keeps
    ~6 panels round and a resolved tip)."""
    if cond.mesh_size_m is not None:
        return cond.mesh_size_m
    return min(math.sqrt(area_m2 / (_TRI_AREA * _AUTO_PANELS)), thickness_m)


def _nodes_along(s: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Parameters of nodes along a curve sampled densely at arc lengths ``s`` with wanted panel
    size ``h`` there: equal steps of ∫ ds/h, both ends included."""
    count = np.concatenate([[0.0], np.cumsum(np.diff(s) * 0.5 * (1 / h[1:] + 1 / h[:-1]))])
    n = max(1, math.ceil(count[-1]))
    return np.interp(np.linspace(0.0, count[-1], n + 1), count, np.arange(s.size, dtype=float))


def _profile_nodes(r, z, h):
    """Nodes (r, z, size) along one smooth piece of a meridian sampled densely."""
    s = np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(r), np.diff(z)))])
    t = _nodes_along(s, h)
    idx = np.arange(r.size, dtype=float)
    return np.interp(t, idx, r), np.interp(t, idx, z), np.interp(t, idx, h)


def _ring_strip(a0: int, na: int, off_a: float, b0: int, nb: int, off_b: float) -> np.ndarray:
    """Triangles joining ring A (``na`` vertices from index ``a0``, angles off_a + 2πi/na) to
    ring B; a ring of one vertex is a pole (a fan)."""
    if na == 1 or nb == 1:
        pole, first, n, reverse = (a0, b0, nb, False) if na == 1 else (b0, a0, na, True)
        i = np.arange(n)
        tri = np.stack([np.full(n, pole), first + i, first + (i + 1) % n], axis=1)
        return tri[:, [0, 2, 1]] if reverse else tri
    ta = off_a + 2 * np.pi * np.arange(1, na + 1) / na
    tb = off_b + 2 * np.pi * np.arange(1, nb + 1) / nb
    order = np.argsort(np.concatenate([ta, tb]), kind="stable")
    from_a = order < na
    i = np.cumsum(from_a) - from_a
    j = np.cumsum(~from_a) - ~from_a
    a_i, a_n = a0 + i % na, a0 + (i + 1) % na
    b_j, b_n = b0 + j % nb, b0 + (j + 1) % nb
    return np.where(
        from_a[:, None],
        np.stack([a_i, a_n, b_j], axis=1),
        np.stack([a_i, b_n, b_j], axis=1),
    )


def _revolve(r, z, h, center_xy, *, widen: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Vertices and faces of the surface swept by the meridian nodes (r, z) about the vertical
    through ``center_xy``; ``h`` the wanted size at each node. ``widen``: enlarge each ring so
    that the panels hold the body's volume (see below); a flat sheet keeps its rim."""
    scale = max(float(np.max(r)), 1e-300)
    counts = np.where(r <= 1e-9 * scale, 1, np.maximum(6, np.ceil(2 * np.pi * r / h))).astype(int)
    offsets = np.pi * (np.arange(r.size) % 2) / counts
    # Rings turned by half a step make antiprism bands whose mean cross-section (prismatoid
    # rule: the two n-gons and, four times, the 2n-gon through the slanted edges' midpoints)
    # is below the circle's: widen every ring so that the band holds the body's own volume.
    n = np.maximum(counts, 3).astype(float)
    section = (
        n / 2 * np.sin(2 * np.pi / n) + 2 * n * np.cos(np.pi / (2 * n)) ** 2 * np.sin(np.pi / n)
    ) / 3
    if widen:
        r = np.where(counts > 1, r * np.sqrt(np.pi / section), r)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    ring = np.repeat(np.arange(r.size), counts)
    local = np.arange(ring.size) - starts[ring]
    phi = offsets[ring] + 2 * np.pi * local / counts[ring]
    verts = np.stack(
        [center_xy[0] + r[ring] * np.cos(phi), center_xy[1] + r[ring] * np.sin(phi), z[ring]],
        axis=1,
    )
    strips = [
        _ring_strip(starts[k], counts[k], offsets[k], starts[k + 1], counts[k + 1], offsets[k + 1])
        for k in range(r.size - 1)  # rings, not panels: a few dozen
    ]
    return verts, np.concatenate(strips)


def _orient_outwards(tris: np.ndarray, inner_point: np.ndarray) -> np.ndarray:
    """Flip panels whose normal points towards ``inner_point`` (convex bodies)."""
    n = np.cross(tris[:, 1] - tris[:, 0], tris[:, 2] - tris[:, 0])
    inward = np.einsum("ij,ij->i", n, tris.mean(axis=1) - inner_point) < 0
    tris = tris.copy()
    tris[inward] = tris[inward][:, [0, 2, 1]]
    return tris


def _below_ground(cond: Conductor, top_z: float, g: float | None) -> None:
    if g is not None and top_z <= g:
        raise InputError(
            f"conductor {cond.label} lies entirely below the grounded plane at z = {g:g} m."
        )


def _ellipsoid(c: np.ndarray, axes: np.ndarray, cond: Conductor, g) -> np.ndarray:
    a_bar, cz = float(max(axes[0], axes[1])), float(axes[2])
    _below_ground(cond, c[2] + cz, g)
    # Knud Thomsen's approximation of the ellipsoid's area (within ~1 %, enough for a size).
    p = 1.6075
    ab, ac, bc = (axes[0] * axes[1]) ** p, (axes[0] * axes[2]) ** p, (axes[1] * axes[2]) ** p
    h0 = _size(cond, 4 * np.pi * ((ab + ac + bc) / 3) ** (1 / p), float(axes.min()))
    theta_lo = 0.0
    if g is not None and c[2] - cz < g:
        theta_lo = math.acos(min(1.0, (c[2] - g) / cz))  # the plane cuts the body here
    theta = np.linspace(theta_lo, np.pi, 4001)  # from the bottom (or the cut) to the top
    r, z = a_bar * np.sin(theta), c[2] - cz * np.cos(theta)
    if theta_lo:
        z[0] = g
    # meridian radius of curvature; panels a little finer than it at tips
    rho = (a_bar**2 * np.cos(theta) ** 2 + cz**2 * np.sin(theta) ** 2) ** 1.5 / (a_bar * cz)
    h = np.minimum(h0, np.maximum(h0 / 20, 0.5 * rho))
    rn, zn, hn = _profile_nodes(r, z, h)
    # Chords between meridian nodes cut inside the curve by Δs²/(12 ρ) on average: move every
    # node out along the normal by that much, so the panels enclose the body's own area.
    th = np.arctan2(rn / a_bar, (c[2] - zn) / cz)
    ds = np.hypot(np.diff(rn), np.diff(zn))
    gap = 0.5 * (np.concatenate([[ds[0]], ds]) + np.concatenate([ds, [ds[-1]]]))
    rho_n = (a_bar**2 * np.cos(th) ** 2 + cz**2 * np.sin(th) ** 2) ** 1.5 / (a_bar * cz)
    normal = np.stack([cz * np.sin(th), -a_bar * np.cos(th)])
    normal /= np.linalg.norm(normal, axis=0)
    shift = np.minimum(gap, rho_n) ** 2 / (12 * rho_n)  # (a chord longer than ρ: no fit)
    if theta_lo:
        shift[0] = 0.0  # the cut stays on the plane
    rn, zn = rn + shift * normal[0], zn + shift * normal[1]
    verts, faces = _revolve(rn, zn, hn, c[:2])
    verts[:, 0] = c[0] + (verts[:, 0] - c[0]) * axes[0] / a_bar
    verts[:, 1] = c[1] + (verts[:, 1] - c[1]) * axes[1] / a_bar
    inner = c.copy()
    if g is not None:
        inner[2] = max(c[2], g) + 0.5 * (c[2] + cz - max(c[2], g))
    return _orient_outwards(verts[faces], inner)


def _graded_sizes(s: np.ndarray, corners: np.ndarray, h0: float) -> np.ndarray:
    """Wanted size along a curve at arc lengths ``s``: ``h0``, refined near ``corners``."""
    if corners.size == 0:
        return np.full(s.shape, h0)
    dist = np.min(np.abs(s[:, None] - corners[None, :]), axis=1)
    return np.minimum(h0, _EDGE_FRACTION * h0 + _GROWTH * dist)


def _graded_nodes(lo: float, hi: float, h0: float, graded: tuple[bool, bool]) -> np.ndarray:
    s = np.linspace(0.0, hi - lo, 2001)
    corners = np.array([x for x, on in zip((0.0, hi - lo), graded, strict=True) if on])
    return lo + np.interp(_nodes_along(s, _graded_sizes(s, corners, h0)), np.arange(s.size), s)


def _cylinder(cond: Conductor, g) -> np.ndarray:
    x, y, z0, radius, height = cond.geometry
    top = z0 + height
    _below_ground(cond, top, g)
    base = z0 if g is None else max(z0, g)
    on_ground = g is not None and z0 <= g
    h0 = _size(cond, 2 * np.pi * radius * (radius + height), radius)
    # (meridian piece, sharp rim at its start, at its end); the foot on the plane is no rim
    pieces = [] if on_ground else [((np.linspace(0, radius, 1001), np.full(1001, base)), 0, 1)]
    pieces.append(((np.full(2001, radius), np.linspace(base, top, 2001)), not on_ground, 1))
    pieces.append(((np.linspace(radius, 0, 1001), np.full(1001, top)), 1, 0))
    rs, zs, hs = [], [], []
    for k, ((r, z), at_start, at_end) in enumerate(pieces):
        s = np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(r), np.diff(z)))])
        rims = np.array([x for x, on in ((0.0, at_start), (s[-1], at_end)) if on])
        rn, zn, hn = _profile_nodes(r, z, _graded_sizes(s, rims, h0))
        keep = slice(1, None) if k else slice(None)  # the joint is the previous piece's end
        rs.append(rn[keep])
        zs.append(zn[keep])
        hs.append(hn[keep])
    verts, faces = _revolve(np.concatenate(rs), np.concatenate(zs), np.concatenate(hs), (x, y))
    return _orient_outwards(verts[faces], np.array([x, y, 0.5 * (base + top)]))


def _box(lo: np.ndarray, hi: np.ndarray, cond: Conductor, g) -> np.ndarray:
    _below_ground(cond, hi[2], g)
    lo = lo.copy()
    on_ground = g is not None and lo[2] <= g
    if on_ground:
        lo[2] = g
    size = hi - lo
    area = 2 * (size[0] * size[1] + size[0] * size[2] + size[1] * size[2])
    h0 = _size(cond, area)
    # Every edge is sharp except those on the plane.
    nodes = [_graded_nodes(lo[k], hi[k], h0, (not (k == 2 and on_ground), True)) for k in range(3)]
    tris = []
    for axis in range(3):
        u, v = [k for k in range(3) if k != axis]
        for side in (lo[axis], hi[axis]):
            if axis == 2 and on_ground and side == lo[2]:
                continue  # the plane is the floor
            uu, vv = np.meshgrid(nodes[u], nodes[v], indexing="ij")
            pts = np.empty(uu.shape + (3,))
            pts[..., axis], pts[..., u], pts[..., v] = side, uu, vv
            p00, p10 = pts[:-1, :-1], pts[1:, :-1]
            p01, p11 = pts[:-1, 1:], pts[1:, 1:]
            quads = np.stack([p00, p10, p11, p01], axis=2).reshape(-1, 4, 3)
            tris.append(quads[:, [0, 1, 2]])
            tris.append(quads[:, [0, 2, 3]])
    return _orient_outwards(np.concatenate(tris), 0.5 * (lo + hi))


def _mesh_triangles(cond: Conductor, g) -> np.ndarray:
    vertices, faces = cond.surface
    tris = vertices[faces]
    if g is not None:
        tol = 1e-9 * max(1.0, float(np.ptp(vertices)))
        if np.any(vertices[:, 2] < g - tol):
            raise InputError(
                f"conductor {cond.label}: the mesh reaches below the grounded plane at "
                f"z = {g:g} m (lowest vertex z = {vertices[:, 2].min():g} m); cut it at the plane."
            )
        flat = np.all(np.abs(tris[:, :, 2] - g) <= tol, axis=1)
        tris, faces = tris[~flat], faces[~flat]
    _check_closed(cond, faces, vertices, g)
    if cond.mesh_size_m is not None:
        tris = _split_to_size(tris, cond.mesh_size_m)
    return np.ascontiguousarray(tris)


def _check_closed(cond: Conductor, faces: np.ndarray, vertices: np.ndarray, g) -> None:
    edges = np.sort(np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]]), axis=1)
    uniq, counts = np.unique(edges, axis=0, return_counts=True)
    open_edges = uniq[counts == 1]
    if open_edges.size == 0:
        return
    tol = 1e-9 * max(1.0, float(np.ptp(vertices)))
    if g is not None and np.all(np.abs(vertices[open_edges, 2] - g) <= tol):
        return  # closed by the grounded plane
    raise InputError(
        f"conductor {cond.label}: the mesh is not closed ({len(open_edges)} open edges away from "
        "the grounded plane); a structure must be a closed surface, or open only on the plane."
    )


def _split_to_size(tris: np.ndarray, size: float) -> np.ndarray:
    """Split every panel into 4 (edge midpoints) until its longest edge is at most ``size``."""
    for _ in range(12):
        edges = np.linalg.norm(np.roll(tris, -1, axis=1) - tris, axis=2).max(axis=1)
        big = edges > size
        if not big.any():
            break
        t = tris[big]
        m01, m12, m20 = (t[:, 0] + t[:, 1]) / 2, (t[:, 1] + t[:, 2]) / 2, (t[:, 2] + t[:, 0]) / 2
        split = np.concatenate(
            [
                np.stack([t[:, 0], m01, m20], 1),
                np.stack([m01, t[:, 1], m12], 1),
                np.stack([m20, m12, t[:, 2]], 1),
                np.stack([m01, m12, m20], 1),
            ]
        )
        tris = np.concatenate([tris[~big], split])
    return tris


# --------------------------------------------------------------------------------------------
# Points against structures
# --------------------------------------------------------------------------------------------


@numba.njit(cache=True, nogil=True, parallel=True)
def _winding(points, tris):
    """Σ solid angles / 4π of the oriented panels seen from each point (van Oosterom &
    Strackee 1983): ±1 inside a closed surface, 0 outside, ½ on a face."""
    M = points.shape[0]
    out = np.empty(M)
    for i in numba.prange(M):
        px, py, pz = points[i, 0], points[i, 1], points[i, 2]
        total = 0.0
        for j in range(tris.shape[0]):
            ax, ay, az = tris[j, 0, 0] - px, tris[j, 0, 1] - py, tris[j, 0, 2] - pz
            bx, by, bz = tris[j, 1, 0] - px, tris[j, 1, 1] - py, tris[j, 1, 2] - pz
            cx, cy, cz = tris[j, 2, 0] - px, tris[j, 2, 1] - py, tris[j, 2, 2] - pz
            la = math.sqrt(ax * ax + ay * ay + az * az)
            lb = math.sqrt(bx * bx + by * by + bz * bz)
            lc = math.sqrt(cx * cx + cy * cy + cz * cz)
            num = ax * (by * cz - bz * cy) + ay * (bz * cx - bx * cz) + az * (bx * cy - by * cx)
            if abs(num) <= 1e-12 * la * lb * lc:
                continue  # in the panel's plane: on it, ±2π by the sign of a zero; count 0
            den = (
                la * lb * lc
                + (ax * bx + ay * by + az * bz) * lc
                + (ax * cx + ay * cy + az * cz) * lb
                + (bx * cx + by * cy + bz * cz) * la
            )
            total += 2.0 * math.atan2(num, den)
        out[i] = total / (4.0 * math.pi)
    return out


@numba.njit(cache=True, nogil=True)
def _closest_on_triangle(p, a, b, c):
    """Closest point to p on triangle abc (Ericson, Real-Time Collision Detection, §5.1.5)."""
    ab, ac, ap = b - a, c - a, p - a
    d1, d2 = ab @ ap, ac @ ap
    if d1 <= 0 and d2 <= 0:
        return a
    bp = p - b
    d3, d4 = ab @ bp, ac @ bp
    if d3 >= 0 and d4 <= d3:
        return b
    vc = d1 * d4 - d3 * d2
    if vc <= 0 and d1 >= 0 and d3 <= 0:
        return a + d1 / (d1 - d3) * ab
    cp = p - c
    d5, d6 = ab @ cp, ac @ cp
    if d6 >= 0 and d5 <= d6:
        return c
    vb = d5 * d2 - d1 * d6
    if vb <= 0 and d2 >= 0 and d6 <= 0:
        return a + d2 / (d2 - d6) * ac
    va = d3 * d6 - d5 * d4
    if va <= 0 and (d4 - d3) >= 0 and (d5 - d6) >= 0:
        return b + (d4 - d3) / ((d4 - d3) + (d5 - d6)) * (c - b)
    denom = 1.0 / (va + vb + vc)
    return a + ab * (vb * denom) + ac * (vc * denom)


@numba.njit(cache=True, nogil=True, parallel=True)
def _too_close(points, tris, centres, reach, sizes):
    """For each point, a panel nearer to it than that panel's size (−1: none) and the
    distance, m. ``reach`` (n,) is each panel's circumradius about ``centres``: a panel whose
    bounding sphere is a size away is skipped without the exact distance."""
    M = points.shape[0]
    which = np.full(M, -1, dtype=np.int64)
    dist = np.full(M, np.inf)
    for i in numba.prange(M):
        p = points[i]
        for j in range(tris.shape[0]):
            dx = p[0] - centres[j, 0]
            dy = p[1] - centres[j, 1]
            dz = p[2] - centres[j, 2]
            lim = reach[j] + sizes[j]
            if dx * dx + dy * dy + dz * dz >= lim * lim:
                continue
            q = _closest_on_triangle(p, tris[j, 0], tris[j, 1], tris[j, 2])
            d = math.sqrt((p[0] - q[0]) ** 2 + (p[1] - q[1]) ** 2 + (p[2] - q[2]) ** 2)
            if d < sizes[j] and d < dist[i]:
                dist[i], which[i] = d, j
    return which, dist


def closed_surface(tris: np.ndarray, ground_z_m: float | None) -> np.ndarray:
    """The panels with their mirror images in the plane (orientation kept outward), so that a
    structure standing on the plane is a closed surface for the winding number."""
    if ground_z_m is None:
        return tris
    mirrored = tris[:, [0, 2, 1]].copy()
    mirrored[..., 2] = 2.0 * ground_z_m - mirrored[..., 2]
    return np.concatenate([tris, mirrored])


def check_points(
    points_m: np.ndarray,
    conductors,
    surfaces,
    ground_z_m: float | None,
    *,
    mounted: np.ndarray | None = None,
    name: str = "points_m",
) -> None:
    """Refuse points inside a solid structure, or closer to a surface than its panel size.

    Parameters
    ----------
    points_m : (n_points, 3) float
    conductors : sequence of Conductor
    surfaces : sequence of (n_panels_k, 3, 3) float
        Each conductor's panels (:meth:`Conductor.triangles`).
    ground_z_m : float or None
    mounted : (n_points,) bool or None
        Meters mounted on a structure at a standoff smaller than the panel size: only the
        inside test applies to them.

    Raises
    ------
    InputError
        Naming the first offending row and the structure.
    """
    pts = np.ascontiguousarray(points_m, dtype=float)
    for k, (cond, tris) in enumerate(zip(conductors, surfaces, strict=True)):
        tris = np.ascontiguousarray(tris)
        if cond.solid:
            wind = _winding(pts, np.ascontiguousarray(closed_surface(tris, ground_z_m)))
            inside = np.abs(wind) > 0.5
            if inside.any():
                i = int(np.argmax(inside))
                raise InputError(
                    f"`{name}` row {i} at {_fmt(pts[i])} m lies inside conductor {k} "
                    f"({cond.label}), where the field is zero; move it outside."
                )
        centres, reach, sizes = _panel_bounds(tris)
        which, dist = _too_close(pts, tris, centres, reach, sizes)
        close = which >= 0
        if mounted is not None:
            close &= ~np.asarray(mounted, dtype=bool)
        if close.any():
            i = int(np.argmax(close))
            raise InputError(
                f"`{name}` row {i} at {_fmt(pts[i])} m is {dist[i]:.3g} m from the surface of "
                f"conductor {k} ({cond.label}), closer than its panel size there "
                f"({sizes[which[i]]:.3g} m), where the computed field is not accurate; "
                "move it away or set a smaller `mesh_size_m`."
            )


@dataclass(frozen=True, eq=False)
class Obstacles:
    """Structures as obstacles to mounting: a point inside a solid structure, or nearer its
    surface than the panel size there, is blocked (the site drops such candidates).

    Parameters
    ----------
    conductors : tuple of Conductor
    ground_z_m : float or None
    mounted_m : (n_mounted, 3) float
        Meters mounted on a structure (a structure region's points): only the inside rule
        applies to them, as their field is computed exactly close to the panels.
    """

    conductors: tuple
    ground_z_m: float | None
    mounted_m: np.ndarray = field(default_factory=lambda: np.empty((0, 3)))
    _surfaces: tuple = field(init=False, repr=False)

    def __post_init__(self) -> None:
        g = self.ground_z_m
        surfaces = tuple(np.ascontiguousarray(c.triangles(g)) for c in self.conductors)
        object.__setattr__(self, "_surfaces", surfaces)

    def blocked(self, points_m: np.ndarray) -> np.ndarray:
        """``(n_points,) bool``: inside a solid structure or too near a surface."""
        pts = np.ascontiguousarray(points_m, dtype=float).reshape(-1, 3)
        out = np.zeros(len(pts), dtype=bool)
        if len(pts) == 0:
            return out
        mounted = np.zeros(len(pts), dtype=bool)
        if len(self.mounted_m):
            from scipy.spatial import cKDTree

            mounted = cKDTree(np.asarray(self.mounted_m, dtype=float)).query(pts)[0] <= 1e-6
        for cond, tris in zip(self.conductors, self._surfaces, strict=True):
            centres, reach, sizes = _panel_bounds(tris)
            # only points within a panel size of the structure's box can be inside or near it
            lo = tris.reshape(-1, 3).min(axis=0) - sizes.max()
            hi = tris.reshape(-1, 3).max(axis=0) + sizes.max()
            near = np.flatnonzero(np.all((pts >= lo) & (pts <= hi), axis=1))
            if near.size == 0:
                continue
            p = np.ascontiguousarray(pts[near])
            hit = (_too_close(p, tris, centres, reach, sizes)[0] >= 0) & ~mounted[near]
            if cond.solid:
                closed = np.ascontiguousarray(closed_surface(tris, self.ground_z_m))
                hit |= np.abs(_winding(p, closed)) > 0.5
            out[near] |= hit
        return out


def _panel_bounds(tris: np.ndarray):
    """Centres, circumradii and sizes (longest edge) of panels, for :func:`_too_close`."""
    sizes = np.linalg.norm(np.roll(tris, -1, axis=1) - tris, axis=2).max(axis=1)
    centres = tris.mean(axis=1)
    reach = np.linalg.norm(tris - centres[:, None], axis=2).max(axis=1)
    return centres, reach, sizes


def check_overlaps(conductors, surfaces, ground_z_m: float | None) -> None:
    """Refuse structures that cut into one another: a vertex of one inside another solid
    structure, or a structure partly inside and partly outside an enclosure. Touching (a mast
    on a roof) is allowed.

    Raises
    ------
    InputError
        Naming both structures.
    """
    closed = [np.ascontiguousarray(closed_surface(t, ground_z_m)) for t in surfaces]
    for i, (a, ta) in enumerate(zip(conductors, surfaces, strict=True)):
        vertices = np.ascontiguousarray(np.unique(ta.reshape(-1, 3), axis=0))
        for j, b in enumerate(conductors):
            if i == j:
                continue
            wind = np.abs(_winding(vertices, closed[j]))
            # 1 inside, 0 outside, fractions on the surface (touching is allowed)
            inside, outside = wind > 0.9, wind < 0.1
            crossing = inside.any() if b.solid else (inside.any() and outside.any())
            if crossing:
                raise InputError(
                    f"conductor {i} ({a.label}) and conductor {j} ({b.label}) overlap; "
                    "structures must not cut into each other (make one mesh of both, or move "
                    "them apart)."
                )


def _fmt(p: np.ndarray) -> str:
    return f"({p[0]:g}, {p[1]:g}, {p[2]:g})"


__all__ = [
    "FACES",
    "KINDS",
    "Conductor",
    "Obstacles",
    "check_overlaps",
    "check_points",
    "closed_surface",
]
