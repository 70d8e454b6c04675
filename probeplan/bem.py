"""Boundary elements: the surface charge induced on grounded or floating conductors.

Method (see the "Conductors" section of the design notes): the unknown is the surface charge
density σ, constant on each flat triangular panel; the potential of the panels at every panel's
centroid (collocation) plus the sources' potential φ_ext equals the conductor's potential
(0 V grounded, an unknown V_k floating, with one more equation Σ σ_j A_j = Q_k). The Green's
function holds the grounded plane z = g by images, G(x, y) = k (1/|x − y| − 1/|x − y*|), so
the plane is never meshed and a structure standing on it has no base.

Panel integrals are exact for every pair, near or far: the potential of a uniformly charged flat
triangle, ∫ 1/R dA = Σᵢ tᵢ fᵢ − |d| Ω, and its gradient −Σᵢ ûᵢ fᵢ − n̂ sign(d) Ω, with
fᵢ = ln((R⁺ᵢ + l⁺ᵢ)/(R⁻ᵢ + l⁻ᵢ)) over each edge (Wilton, Rao, Glisson, Schaubert, Al-Bundak &
Butler 1984, IEEE Trans. Antennas Propag. 32, 276; Graglia 1993, ibid. 41, 1448) and the solid
angle Ω by van Oosterom & Strackee (1983, IEEE Trans. Biomed. Eng. 30, 125). A meter a small
standoff off a panel therefore reads the exact field of the piecewise-constant charge, with no
quadrature to refine. The logarithms are formed so that none cancels (R + l as R₀²/(R − l)
where l < 0).

Why an own collocation rather than bempp-cl: bempp-cl has no half-space Green's function, so the
ground plane would have to be meshed (a large truncated plate, whose edge is a new error) or the
images added as a second operator on a mirrored grid, which its assembly does not provide for a
single-layer potential evaluated off the surface with our sources; it also brings gmsh and
OpenCL. The collocation here is ~300 lines on numba, assembles 4,000 panels (16 M exact
panel-pair integrals with images) and factors them in seconds on 2 cores (benchmarks/
structures.py), and evaluates the field exactly close to the panels, where a meter on a mast sits.

Everything after the factorisation is linear: with A the panel matrix and K the panel-to-point
field operator, E = E_ext − K A⁻¹ φ_ext and ∂E/∂θ = ∂E_ext/∂θ − K A⁻¹ ∂φ_ext/∂θ, every scenario
and every parameter a right-hand side. The factorisation is cached on disk, keyed by a hash of
the panels and the settings (:func:`factorize`).
"""

from __future__ import annotations

import hashlib
import math
import os
import tempfile
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path

import numba
import numpy as np
from scipy import linalg

from .conductors import check_overlaps, check_points
from .lowrank import Responses, Skeleton, small_products
from .sources import K_COULOMB

#: Bumped whenever the matrix changes meaning, so older cache files are not read.
_CACHE_VERSION = 1
#: Environment variable naming the folder of cached factorisations.
CACHE_ENV = "PROBEPLAN_CACHE_DIR"

_TWO_PI = 2.0 * math.pi


# --------------------------------------------------------------------------------------------
# Exact integrals over one flat triangle (compiled)
# --------------------------------------------------------------------------------------------


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _r_plus_l(r, l, r0_sq):
    """R + l without cancellation: R₀²/(R − l) where l < 0 (R² = R₀² + l²)."""
    if l >= 0.0:
        return r + l
    return r0_sq / (r - l)


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _triangle(px, py, pz, v, want_grad, out):
    """∫ 1/|p − y| dA over the triangle ``v`` (3, 3); its gradient in p into ``out[1:4]``.

    ``out[0]`` the potential integral (m). Exact (see the module docstring); on the panel's own
    plane (d = 0) the gradient's normal part is not defined and is left as the in-plane limit.
    """
    e1x, e1y, e1z = v[1, 0] - v[0, 0], v[1, 1] - v[0, 1], v[1, 2] - v[0, 2]
    e2x, e2y, e2z = v[2, 0] - v[0, 0], v[2, 1] - v[0, 1], v[2, 2] - v[0, 2]
    nx = e1y * e2z - e1z * e2y
    ny = e1z * e2x - e1x * e2z
    nz = e1x * e2y - e1y * e2x
    nn = math.sqrt(nx * nx + ny * ny + nz * nz)
    nx, ny, nz = nx / nn, ny / nn, nz / nn
    d = (px - v[0, 0]) * nx + (py - v[0, 1]) * ny + (pz - v[0, 2]) * nz
    # vertex offsets r_k = v_k − p and their lengths
    rx0, ry0, rz0 = v[0, 0] - px, v[0, 1] - py, v[0, 2] - pz
    rx1, ry1, rz1 = v[1, 0] - px, v[1, 1] - py, v[1, 2] - pz
    rx2, ry2, rz2 = v[2, 0] - px, v[2, 1] - py, v[2, 2] - pz
    R0 = math.sqrt(rx0 * rx0 + ry0 * ry0 + rz0 * rz0)
    R1 = math.sqrt(rx1 * rx1 + ry1 * ry1 + rz1 * rz1)
    R2 = math.sqrt(rx2 * rx2 + ry2 * ry2 + rz2 * rz2)
    # solid angle (van Oosterom & Strackee): negative on the side n points to
    num = (
        rx0 * (ry1 * rz2 - rz1 * ry2)
        + ry0 * (rz1 * rx2 - rx1 * rz2)
        + rz0 * (rx1 * ry2 - ry1 * rx2)
    )
    den = (
        R0 * R1 * R2
        + (rx0 * rx1 + ry0 * ry1 + rz0 * rz1) * R2
        + (rx0 * rx2 + ry0 * ry2 + rz0 * rz2) * R1
        + (rx1 * rx2 + ry1 * ry2 + rz1 * rz2) * R0
    )
    omega = 2.0 * math.atan2(num, den)
    if d == 0.0:
        omega = 0.0  # on the panel's plane: the |d| Ω term vanishes; no normal jump here
    pot = -abs(d) * abs(omega)
    gx = nx * omega
    gy = ny * omega
    gz = nz * omega
    for i in range(3):
        j = (i + 1) % 3
        sx, sy, sz = v[i, 0] - px, v[i, 1] - py, v[i, 2] - pz
        ex, ey, ez = v[j, 0] - v[i, 0], v[j, 1] - v[i, 1], v[j, 2] - v[i, 2]
        length = math.sqrt(ex * ex + ey * ey + ez * ez)
        ex, ey, ez = ex / length, ey / length, ez / length
        ux = ey * nz - ez * ny  # outward in-plane normal of the edge, ê × n̂
        uy = ez * nx - ex * nz
        uz = ex * ny - ey * nx
        lm = sx * ex + sy * ey + sz * ez
        lp = lm + length
        t = sx * ux + sy * uy + sz * uz
        r0_sq = t * t + d * d
        rm = R0 if i == 0 else (R1 if i == 1 else R2)
        rp = R1 if i == 0 else (R2 if i == 1 else R0)
        f = math.log(_r_plus_l(rp, lp, r0_sq)) - math.log(_r_plus_l(rm, lm, r0_sq))
        if t != 0.0:
            pot += t * f
        if want_grad:
            gx -= ux * f
            gy -= uy * f
            gz -= uz * f
    out[0] = pot
    out[1] = gx
    out[2] = gy
    out[3] = gz


# Beyond these distances from a panel's centroid, in panel sizes (longest edge), a quadrature
# rule replaces the exact integral: the 3-point rule of degree 2 (Strang & Fix; Dunavant 1985)
# from 6 sizes and the centroid from 30 (measured worst relative error of one panel's potential
# and field over random directions: 1e-5 and 5e-5 at 6 sizes, 4e-5 and 1e-4 at 30).
_QUAD3_SIZES = 6.0
_CENTROID_SIZES = 30.0


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _panel(px, py, pz, tri, area, size2, sign_z, ground, want_grad, buf, img):
    """``buf`` ← ∫ 1/R dA and its gradient for one panel, mirrored in z = ground when
    ``sign_z`` is −1: exact near the panel, a quadrature rule far away."""
    if sign_z < 0.0:
        for a in range(3):
            img[a, 0] = tri[a, 0]
            img[a, 1] = tri[a, 1]
            img[a, 2] = 2.0 * ground - tri[a, 2]
        tri = img
    cx = (tri[0, 0] + tri[1, 0] + tri[2, 0]) / 3.0
    cy = (tri[0, 1] + tri[1, 1] + tri[2, 1]) / 3.0
    cz = (tri[0, 2] + tri[1, 2] + tri[2, 2]) / 3.0
    dx, dy, dz = px - cx, py - cy, pz - cz
    r2 = dx * dx + dy * dy + dz * dz
    if r2 < _QUAD3_SIZES * _QUAD3_SIZES * size2:
        _triangle(px, py, pz, tri, want_grad, buf)
        return
    if r2 >= _CENTROID_SIZES * _CENTROID_SIZES * size2:
        inv = 1.0 / math.sqrt(r2)
        buf[0] = area * inv
        w = -area * inv * inv * inv
        buf[1], buf[2], buf[3] = w * dx, w * dy, w * dz
        return
    pot = gx = gy = gz = 0.0
    for k in range(3):
        # the point 2/3 of the way from the centroid to vertex k
        qx = px - (cx + 0.5 * (tri[k, 0] - cx))
        qy = py - (cy + 0.5 * (tri[k, 1] - cy))
        qz = pz - (cz + 0.5 * (tri[k, 2] - cz))
        inv = 1.0 / math.sqrt(qx * qx + qy * qy + qz * qz)
        pot += inv
        w = inv * inv * inv
        gx -= w * qx
        gy -= w * qy
        gz -= w * qz
    a3 = area / 3.0
    buf[0], buf[1], buf[2], buf[3] = a3 * pot, a3 * gx, a3 * gy, a3 * gz


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _far(px, py, pz, cx, cy, cz, area, size2, buf):
    """The centroid rule of :func:`_panel` when it applies (returns True), inline and without
    the image copy: most (point, panel) pairs of a site are far, and this is all they cost."""
    dx, dy, dz = px - cx, py - cy, pz - cz
    r2 = dx * dx + dy * dy + dz * dz
    if r2 < _CENTROID_SIZES * _CENTROID_SIZES * size2:
        return False
    inv = 1.0 / math.sqrt(r2)
    buf[0] = area * inv
    w = -area * inv * inv * inv
    buf[1], buf[2], buf[3] = w * dx, w * dy, w * dz
    return True


@numba.njit(cache=True, nogil=True, error_model="numpy", parallel=True)
def _matrices(points, tris, cents, image_cents, areas, sizes, ground, has_ground, want_grad):
    """∫ G/k dA of panel j at point i per unit σ (m), ``(M, N)``, or with ``want_grad`` the
    field per unit σ over k, ``(M, 3, N)`` (−∇ of it); G holds the images when ``has_ground``.
    ``cents`` and ``image_cents`` ``(N, 3)``: the panels' centroids and their mirror images',
    formed as :func:`_panel` forms them, so the inline far rule gives the same numbers."""
    M = points.shape[0]
    N = tris.shape[0]
    out = np.empty((M, 3 if want_grad else 1, N))
    for i in numba.prange(M):
        buf = np.empty(4)
        img = np.empty((3, 3))
        px, py, pz = points[i, 0], points[i, 1], points[i, 2]
        for j in range(N):
            s2 = sizes[j] * sizes[j]
            if not _far(px, py, pz, cents[j, 0], cents[j, 1], cents[j, 2], areas[j], s2, buf):
                _panel(px, py, pz, tris[j], areas[j], s2, 1.0, ground, want_grad, buf, img)
            v0, v1, v2, v3 = buf[0], buf[1], buf[2], buf[3]
            if has_ground:
                ix, iy, iz = image_cents[j, 0], image_cents[j, 1], image_cents[j, 2]
                if not _far(px, py, pz, ix, iy, iz, areas[j], s2, buf):
                    _panel(px, py, pz, tris[j], areas[j], s2, -1.0, ground, want_grad, buf, img)
                v0 -= buf[0]
                v1 -= buf[1]
                v2 -= buf[2]
                v3 -= buf[3]
            if want_grad:
                out[i, 0, j] = -v1
                out[i, 1, j] = -v2
                out[i, 2, j] = -v3
            else:
                out[i, 0, j] = v0
    return out


def _centroids(triangles_m: np.ndarray, ground_z_m) -> tuple[np.ndarray, np.ndarray]:
    """Centroids and image centroids ``(N, 3)``, summed in :func:`_panel`'s order."""
    t = triangles_m
    cents = (t[:, 0] + t[:, 1] + t[:, 2]) / 3.0
    images = cents.copy()
    if ground_z_m is not None:
        z = 2.0 * float(ground_z_m) - t[:, :, 2]
        images[:, 2] = (z[:, 0] + z[:, 1] + z[:, 2]) / 3.0
    return np.ascontiguousarray(cents), np.ascontiguousarray(images)


def _operator(points_m, panels: Panels, ground_z_m, want_grad: bool) -> np.ndarray:
    g = ground_z_m
    tris = np.ascontiguousarray(panels.triangles_m, dtype=float)
    out = _matrices(
        np.ascontiguousarray(points_m, dtype=float),
        tris,
        *_centroids(tris, g),
        panels.areas_m2,
        panels.sizes_m,
        0.0 if g is None else float(g),
        g is not None,
        want_grad,
    )
    return out if want_grad else out[:, 0]


def triangle_integrals(points_m: np.ndarray, triangles_m: np.ndarray) -> np.ndarray:
    """∫ 1/R dA and its gradient for every point and triangle, free space (for tests).

    Parameters
    ----------
    points_m : (n_points, 3) float
    triangles_m : (n_panels, 3, 3) float

    Returns
    -------
    (n_points, n_panels, 4) float
        ``[..., 0]`` the integral in m; ``[..., 1:4]`` its gradient in the point (dimensionless).
    """
    panels = Panels(np.asarray(triangles_m, dtype=float), np.zeros(len(triangles_m), int))
    pot = _operator(points_m, panels, None, False)
    grad = -_operator(points_m, panels, None, True)
    return np.concatenate([pot[..., None], np.moveaxis(grad, 1, 2)], axis=-1)


# --------------------------------------------------------------------------------------------
# Panels, the system and its factorisation
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Panels:
    """Flat triangular panels of all conductors.

    Attributes
    ----------
    triangles_m : (n_panels, 3, 3) float
        Vertices of every panel, metres.
    owner : (n_panels,) int
        Index of the conductor each panel belongs to.
    """

    triangles_m: np.ndarray
    owner: np.ndarray

    @property
    def n_panels(self) -> int:
        return int(self.triangles_m.shape[0])

    @property
    def centroids_m(self) -> np.ndarray:
        """``(n_panels, 3)`` collocation points, m."""
        return self.triangles_m.mean(axis=1)

    @property
    def areas_m2(self) -> np.ndarray:
        """``(n_panels,)`` m²."""
        t = self.triangles_m
        return 0.5 * np.linalg.norm(np.cross(t[:, 1] - t[:, 0], t[:, 2] - t[:, 0]), axis=1)

    @property
    def sizes_m(self) -> np.ndarray:
        """``(n_panels,)`` longest edge of each panel, m."""
        t = self.triangles_m
        edges = np.stack([t[:, 1] - t[:, 0], t[:, 2] - t[:, 1], t[:, 0] - t[:, 2]], axis=1)
        return np.linalg.norm(edges, axis=2).max(axis=1)


@dataclass(frozen=True, eq=False)
class Factorization:
    """The LU factors of the collocation system of one geometry.

    The unknowns are σ (C/m²) on every panel, then ``v_k = V_k / k`` (C/m) of every floating
    conductor; the rows are the potential equations (divided by k, in m) then the charge
    equations (divided by ``length_m`` so that their entries are of the potential rows' size).
    """

    panels: Panels
    ground_z_m: float | None
    floating: tuple[bool, ...]
    lu: np.ndarray
    piv: np.ndarray
    length_m: float

    @property
    def n_floating(self) -> int:
        return sum(self.floating)

    def solve(self, potential_v: np.ndarray, charges_c: np.ndarray | None = None) -> np.ndarray:
        """Surface charge for right-hand sides.

        Parameters
        ----------
        potential_v : (n_panels, n_rhs) float
            The sources' potential at the collocation points, V.
        charges_c : (n_floating, n_rhs) float or None
            Net charge of each floating conductor (``None``: zero, as for a derivative).

        Returns
        -------
        (n_panels, n_rhs) float
            σ in C/m² (per unit of the right-hand side's parameter).
        """
        n = self.panels.n_panels
        rhs = np.zeros((n + self.n_floating, potential_v.shape[1]))
        rhs[:n] = -potential_v / K_COULOMB
        if charges_c is not None and self.n_floating:
            rhs[n:] = charges_c / self.length_m
        return linalg.lu_solve((self.lu, self.piv), rhs, check_finite=False)[:n]

    def potentials_v(self, potential_v: np.ndarray, charges_c=None) -> np.ndarray:
        """Potential of each floating conductor, V, ``(n_floating, n_rhs)``, for the same
        right-hand sides as :meth:`solve`."""
        n = self.panels.n_panels
        rhs = np.zeros((n + self.n_floating, potential_v.shape[1]))
        rhs[:n] = -potential_v / K_COULOMB
        if charges_c is not None and self.n_floating:
            rhs[n:] = charges_c / self.length_m
        x = linalg.lu_solve((self.lu, self.piv), rhs, check_finite=False)
        return K_COULOMB * x[n:]

    def field_operator(self, points_m: np.ndarray) -> np.ndarray:
        """``(n_points, 3, n_panels)``: the field at ``points_m`` of unit σ on each panel, V/m
        per C/m² (exact panel integrals, with the images)."""
        return K_COULOMB * _operator(points_m, self.panels, self.ground_z_m, True)

    def potential_operator(self, points_m: np.ndarray) -> np.ndarray:
        """``(n_points, n_panels)``: the potential of unit σ on each panel, V per C/m²."""
        return K_COULOMB * _operator(points_m, self.panels, self.ground_z_m, False)


#: Rows of the panel matrix assembled between two progress reports.
_PROGRESS_ROWS = 256


def _system(panels: Panels, ground_z_m, floating: tuple[bool, ...], progress=None):
    """The collocation matrix (see :class:`Factorization`), assembled in blocks of rows so
    that ``progress(done, total)`` can follow it (the LU is one more step)."""
    float_ids = [k for k, f in enumerate(floating) if f]
    n, nf = panels.n_panels, len(float_ids)
    length = float(np.median(panels.sizes_m))
    a = np.zeros((n + nf, n + nf))
    centroids = panels.centroids_m
    steps = -(-n // _PROGRESS_ROWS) + 1
    for k, start in enumerate(range(0, n, _PROGRESS_ROWS)):  # blocks, not panels
        stop = min(start + _PROGRESS_ROWS, n)
        a[start:stop, :n] = _operator(centroids[start:stop], panels, ground_z_m, False)
        if progress is not None:
            progress(k + 1, steps)
    for col, k in enumerate(float_ids):
        mine = panels.owner == k
        a[:n][mine, n + col] = -1.0
        a[n + col, :n] = np.where(mine, panels.areas_m2, 0.0) / length
    return a, length


def cache_dir() -> Path:
    """Folder of cached factorisations: ``$PROBEPLAN_CACHE_DIR``, else the user cache dir."""
    env = os.environ.get(CACHE_ENV)
    if env:
        return Path(env)
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "probeplan" / "bem"


def _key(panels: Panels, ground_z_m, floating) -> str:
    h = hashlib.sha256()
    h.update(f"v{_CACHE_VERSION};{ground_z_m!r};{floating!r};".encode())
    h.update(np.ascontiguousarray(panels.triangles_m, dtype=np.float64).tobytes())
    h.update(np.ascontiguousarray(panels.owner, dtype=np.int64).tobytes())
    return h.hexdigest()


def factorize(
    panels: Panels,
    ground_z_m: float | None,
    floating: tuple[bool, ...],
    *,
    use_cache: bool = True,
    progress=None,
) -> Factorization:
    """Assemble and LU-factor the collocation system, or load it from the disk cache.

    Parameters
    ----------
    panels : Panels
    ground_z_m : float or None
        The grounded plane (images), or free space.
    floating : tuple of bool
        Per conductor (index as ``panels.owner``): whether it floats.
    use_cache : bool
        Read and write ``cache_dir()/<hash>.npz``. Writing goes to a temporary file in the same
        folder, renamed into place, so concurrent writers never leave a half-written file; an
        unreadable cache file is ignored and rebuilt.
    progress : callable or None
        ``progress(done, total)`` after each block of assembled rows and after the LU (not
        called when the factors come from the cache).
    """
    key = _key(panels, ground_z_m, floating)
    if use_cache and key in _RECENT:  # this process solved it already (a budget's options)
        lu, piv, length = _RECENT[key]
        return Factorization(panels, ground_z_m, floating, lu, piv, length)
    path = cache_dir() / f"{key}.npz" if use_cache else None
    if path is not None and path.exists():
        try:
            with np.load(path) as f:
                lu, piv, length = f["lu"], f["piv"], float(f["length_m"])
            n = panels.n_panels + sum(floating)
            if lu.shape == (n, n):
                _remember(key, lu, piv, length)
                return Factorization(panels, ground_z_m, floating, lu, piv, length)
        except (OSError, ValueError, KeyError):
            pass
    a, length = _system(panels, ground_z_m, floating, progress)
    lu, piv = linalg.lu_factor(a, overwrite_a=True, check_finite=False)
    if progress is not None:
        steps = -(-panels.n_panels // _PROGRESS_ROWS) + 1
        progress(steps, steps)
    if path is not None:
        _write_atomic(path, lu=lu, piv=piv, length_m=np.float64(length))
        _remember(key, lu, piv, length)
    return Factorization(panels, ground_z_m, floating, lu, piv, length)


#: Bumped whenever the far-field skeleton changes meaning (see :attr:`Structures.skeleton`).
_FAR_VERSION = 1
_SKELETON_FIELDS = ("centres_m", "far_m", "panels", "interpolation")

# The last factorisations of this process, by key: a budget builds one problem per option.
_RECENT: dict = {}


def _remember(key: str, lu: np.ndarray, piv: np.ndarray, length: float) -> None:
    if len(_RECENT) >= 2:
        _RECENT.clear()
    lu.setflags(write=False)
    _RECENT[key] = (lu, piv, length)


def _write_atomic(path: Path, **arrays) -> None:
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=".npz", dir=path.parent)
        try:
            with os.fdopen(fd, "wb") as f:
                np.savez(f, **arrays)
            os.replace(tmp, path)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
    except OSError:
        pass  # a cache that cannot be written only costs the next run the solve again


# --------------------------------------------------------------------------------------------
# Structures: conductors meshed and factored, and the field they add
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Structures:
    """Conductors over the (optional) grounded plane, meshed and factored once.

    Build with :meth:`build`; then :meth:`induced` gives the field of the induced charge for
    any scene, scenarios and points, with its parameter Jacobian.

    Attributes
    ----------
    conductors : tuple of Conductor
    ground_z_m : float or None
    surfaces : tuple of (n_panels_k, 3, 3) float
        Each conductor's panels, m.
    factor : Factorization
    """

    conductors: tuple
    ground_z_m: float | None
    surfaces: tuple
    factor: Factorization
    use_cache: bool = True

    @classmethod
    def build(
        cls,
        conductors,
        ground_z_m: float | None = None,
        *,
        meters_m=None,
        use_cache: bool = True,
        progress=None,
    ):
        """Mesh every conductor, assemble and factor (or load the cached factors);
        ``progress(done, total)`` follows the assembly (see :func:`factorize`). ``meters_m``
        ``(n, 3)``: meters on or near the structures, where the automatic mesh is made finer
        (the cache key is the panels themselves, so it covers that refinement)."""
        conductors = tuple(conductors)
        surfaces = tuple(c.triangles(ground_z_m, meters_m) for c in conductors)
        check_overlaps(conductors, surfaces, ground_z_m)
        owner = np.concatenate([np.full(len(s), k) for k, s in enumerate(surfaces)])
        panels = Panels(np.ascontiguousarray(np.concatenate(surfaces)), owner)
        floating = tuple(c.floating for c in conductors)
        return cls(
            conductors,
            ground_z_m,
            surfaces,
            factorize(panels, ground_z_m, floating, use_cache=use_cache, progress=progress),
            use_cache,
        )

    @property
    def charges_c(self) -> np.ndarray:
        """``(n_floating,)`` net charge of every floating conductor, C."""
        return np.array([c.charge_c for c in self.conductors if c.floating])

    def check_points(self, points_m, *, mounted=None, name: str = "points_m") -> None:
        """Refuse points inside a structure or nearer its surface than a panel (see
        :func:`probeplan.conductors.check_points`); ``mounted`` rows are exempt from the
        distance rule."""
        check_points(
            points_m, self.conductors, self.surfaces, self.ground_z_m, mounted=mounted, name=name
        )

    def charge_density(self, scene, theta: np.ndarray) -> np.ndarray:
        """Induced σ on every panel for every scenario, ``(n_scenarios, n_panels)`` C/m²."""
        phi, _ = scene.potential(theta, self.factor.panels.centroids_m, jacobian=False)
        charges = np.repeat(self.charges_c[:, None], theta.shape[0], axis=1)
        return self.factor.solve(phi.T, charges).T

    def responses(
        self, scene, theta: np.ndarray, columns: np.ndarray | None, jacobian: bool = True
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Induced σ for every scenario, and its derivative for every kept θ column.

        Returns
        -------
        sigma : (n_panels, n_scenarios) float
            C/m².
        d_sigma : (n_panels, n_scenarios * n_cols) float or None
            ∂σ/∂θ = −A⁻¹ ∂φ_ext/∂θ, scenario-major (the floating charges are constants).
        """
        n_s = theta.shape[0]
        n = self.factor.panels.n_panels
        phi, jphi = scene.potential(theta, self.factor.panels.centroids_m, jacobian=jacobian)
        charges = np.repeat(self.charges_c[:, None], n_s, axis=1)
        sigma = self.factor.solve(phi.T, charges)
        if not jacobian:
            return sigma, None
        cols = np.arange(scene.n_params) if columns is None else np.asarray(columns, dtype=int)
        rhs = jphi[:, :, cols].transpose(1, 0, 2).reshape(n, n_s * cols.size)
        return sigma, self.factor.solve(rhs)

    @staticmethod
    def responses_of(sigma: np.ndarray, d_sigma: np.ndarray | None = None) -> Responses:
        """The output of :meth:`responses` as :class:`~probeplan.lowrank.Responses`."""
        return Responses(sigma, d_sigma)

    @cached_property
    def skeleton(self) -> Skeleton:
        """Skeleton panels for far points (:class:`probeplan.lowrank.Skeleton`), built on
        first use (about half a second per conductor) and cached on disk beside the factors."""
        panels = self.factor.panels
        path = None
        if self.use_cache:
            key = _key(panels, self.ground_z_m, self.factor.floating)
            path = cache_dir() / f"{key}-far{_FAR_VERSION}.npz"
            try:
                with np.load(path) as f:
                    found = Skeleton(*(f[name] for name in _SKELETON_FIELDS))
                if found.interpolation.shape[1] == panels.n_panels:
                    return found
            except (OSError, ValueError, KeyError):
                pass

        def operator(points_m, cols):
            sub = Panels(panels.triangles_m[cols], panels.owner[cols])
            return K_COULOMB * _operator(points_m, sub, self.ground_z_m, True)

        skeleton = Skeleton.build(
            panels.triangles_m,
            panels.owner,
            panels.sizes_m,
            self.ground_z_m,
            operator,
            _CENTROID_SIZES,
        )
        if path is not None:
            _write_atomic(path, **{name: getattr(skeleton, name) for name in _SKELETON_FIELDS})
        return skeleton

    def field_of(
        self, points_m: np.ndarray, responses: Responses
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Field ``(n_scenarios, n_points, 3)`` of :class:`~probeplan.lowrank.Responses`,
        and its Jacobian ``(n_scenarios, n_points, 3, n_cols)``.

        Points far from every conductor see only the skeleton panels (:attr:`skeleton`),
        near ones every panel, with the exact integrals close to them.
        """
        n_pts = points_m.shape[0]
        cols = responses.columns
        mapped = np.empty((n_pts, 3, cols.shape[1]))
        far = self.skeleton.far(points_m) if n_pts else np.zeros(0, bool)
        if far.any():
            skel = self.skeleton
            panels = self.factor.panels
            sub = Panels(panels.triangles_m[skel.panels], panels.owner[skel.panels])
            op = K_COULOMB * _operator(points_m[far], sub, self.ground_z_m, True)
            basis, coef, keep = responses.reduced(skel)
            # in single-thread pieces: a worker process rounds them as this process does
            op = op.reshape(-1, skel.panels.size)
            mid = small_products(op, basis, np.empty((op.shape[0], basis.shape[1])))
            got = small_products(mid, coef, np.empty((op.shape[0], coef.shape[1])))
            mapped[far] = (got if keep is None else got[:, keep]).reshape(-1, 3, cols.shape[1])
        if not far.all():
            op = self.factor.field_operator(points_m[~far])
            mapped[~far] = (op.reshape(-1, op.shape[2]) @ cols).reshape(-1, 3, cols.shape[1])
        field, jac = responses.split(mapped.reshape(n_pts * 3, cols.shape[1]))
        n_s = responses.n_scenarios
        field = field.reshape(n_pts, 3, n_s).transpose(2, 0, 1)
        if jac is None:
            return field, None
        n_cols = jac.shape[1] // n_s
        jac = jac.reshape(n_pts, 3, n_s, n_cols).transpose(2, 0, 1, 3)
        return field, np.ascontiguousarray(jac)

    def induced(
        self,
        scene,
        theta: np.ndarray,
        points_m: np.ndarray,
        *,
        jacobian: bool = True,
        columns: np.ndarray | None = None,
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Field of the induced charge at ``points_m`` and its derivatives.

        Parameters
        ----------
        scene : probeplan.forward.Scene
        theta : (n_scenarios, n_params) float
        points_m : (n_points, 3) float
        jacobian : bool
        columns : (n_cols,) int or None
            θ columns kept in the Jacobian (default all).

        Returns
        -------
        field_v_per_m : (n_scenarios, n_points, 3) float
        jacobian : (n_scenarios, n_points, 3, n_cols) float or None
            ∂E_induced/∂θ = K A⁻¹ ∂(−φ_ext)/∂θ.
        """
        sigma, d_sigma = self.responses(scene, theta, columns, jacobian)
        return self.field_of(points_m, Responses(sigma, d_sigma))


__all__ = [
    "CACHE_ENV",
    "Factorization",
    "Panels",
    "Structures",
    "cache_dir",
    "factorize",
    "triangle_integrals",
]
