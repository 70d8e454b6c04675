"""Charge distributions and their fields, with derivatives with respect to their parameters.

Map of this module (read top to bottom):

1. Constants and the five public source kinds (small frozen dataclasses). Each validates its own
   arguments once, in ``__post_init__``, and can turn itself into a parameter vector and back.
2. Private kernels, one per kind, on strict arrays with no checks. A kernel takes the
   parameters of *all sources of its kind in all scenarios* at once and returns the summed field
   and the per-source parameter Jacobian. Line and grid kernels are vectorised numpy over blocks
   of points; the radial kinds (point, ball, Gaussian) share one loop compiled by numba, because
   their Jacobian costs a few flops per number and only a compiled loop writes it at memory
   speed. Closed forms from the literature are used everywhere:

   * point: Coulomb's law;
   * line: the finite uniform segment in its prolate-spheroidal form,
     V = kλ ln((r1 + r2 + L)/(r1 + r2 − L)) (e.g. Jackson, Classical Electrodynamics, problem 1.x;
     Smythe, Static and Dynamic Electricity, §5.x), whose gradient is regular everywhere off the
     segment, also on its extension;
   * ball: Gauss's law inside and out;
   * Gaussian: enclosed-charge fraction P(3/2, r²/2σ²) (regularised lower incomplete gamma);
   * grid: every cell a uniformly charged rectangular box, field and field gradient in closed
     form (Nagy, Papp & Benedek 2000, "The gravitational potential and its derivatives for the
     prism", J. Geodesy 74), summed by parts over the shared cell corners.

   The derivative of a field with respect to a rigid shift of its source is minus the field
   gradient at the observation point, so every kernel computes the gradient tensor once and
   uses it for the centre columns.

Shapes: ``S`` scenarios, ``M`` points, ``N`` sources of one kind, ``P`` parameters of a kind.
Units: SI throughout (C, m, V/m). Sign: physics convention, E points away from positive charge.
"""

from __future__ import annotations

import contextlib
import math
import signal
import threading
from dataclasses import dataclass, field
from typing import ClassVar

import numba
import numpy as np
from scipy import constants

#: Coulomb constant k = 1/(4 pi eps0) in N m^2 / C^2, from scipy.constants (CODATA).
K_COULOMB: float = 1.0 / (4.0 * math.pi * constants.epsilon_0)

#: Parameter names shared by every kind, in the contract's order: charge, then the centre.
BASE_PARAMS: tuple[str, ...] = ("charge_c", "x_m", "y_m", "z_m")

# Kernels work on blocks of points small enough that their temporaries stay in cache.
_BLOCK_ELEMENTS = 1 << 15


def _vector3(value, name: str) -> tuple[float, float, float]:
    arr = np.asarray(value, dtype=float)
    if arr.shape != (3,):
        got = arr.size if arr.ndim == 1 else f"shape {arr.shape}"
        raise ValueError(f"`{name}` must be 3 numbers (x, y, z) in metres; got {got}.")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"`{name}` must be finite; got {arr.tolist()}.")
    return (float(arr[0]), float(arr[1]), float(arr[2]))


def _finite(value, name: str, *, positive: bool = False) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"`{name}` must be a number; got {value!r}.") from None
    if not math.isfinite(out):
        raise ValueError(f"`{name}` must be finite; got {out}.")
    if positive and out <= 0.0:
        raise ValueError(f"`{name}` must be > 0; got {out}.")
    return out


# --------------------------------------------------------------------------------------------
# Public source kinds
# --------------------------------------------------------------------------------------------


class _SourceBase:
    """What every kind shares: its parameter names and vector, in the contract's order."""

    extra_params: ClassVar[tuple[str, ...]] = ()

    @property
    def param_names(self) -> tuple[str, ...]:
        """Names of the parameters, ``charge_c, x_m, y_m, z_m`` then the kind's own."""
        return BASE_PARAMS + self.extra_params

    def param_vector(self) -> np.ndarray:
        """Return ``(charge_c, x_m, y_m, z_m, *extra)`` as a ``(P,) float`` array (SI)."""
        return np.array([self.charge_c, *self.center_m, *self._extra_values()])

    def _extra_values(self) -> tuple[float, ...]:
        return ()


@dataclass(frozen=True)
class PointCharge(_SourceBase):
    """A point charge.

    Parameters
    ----------
    charge_c : float
        Charge in coulombs.
    center_m : (3,) float
        Position in metres.
    """

    charge_c: float
    center_m: tuple[float, float, float]

    kind: ClassVar[str] = "point"

    def __post_init__(self) -> None:
        object.__setattr__(self, "charge_c", _finite(self.charge_c, "charge_c"))
        object.__setattr__(self, "center_m", _vector3(self.center_m, "center_m"))

    def with_params(self, values) -> PointCharge:
        """Return a copy with parameters ``values : (P,) float`` in :meth:`param_vector` order."""
        v = [float(x) for x in values]
        return type(self)(v[0], tuple(v[1:4]))

    def lowest_z_m(self) -> float:
        """Lowest height of the charge, m (for the check against a ground plane)."""
        return self.center_m[2]


@dataclass(frozen=True)
class LineCharge(_SourceBase):
    """Charge spread uniformly along a finite straight segment.

    Parameters
    ----------
    charge_c : float
        Total charge in coulombs.
    start_m, end_m : (3,) float
        The two ends in metres; they must differ.
    """

    charge_c: float
    start_m: tuple[float, float, float]
    end_m: tuple[float, float, float]

    kind: ClassVar[str] = "line"

    def __post_init__(self) -> None:
        object.__setattr__(self, "charge_c", _finite(self.charge_c, "charge_c"))
        object.__setattr__(self, "start_m", _vector3(self.start_m, "start_m"))
        object.__setattr__(self, "end_m", _vector3(self.end_m, "end_m"))
        if self.length_m <= 0.0:
            raise ValueError(
                "`start_m` and `end_m` of a line charge must differ; "
                f"both are {list(self.start_m)}."
            )

    @property
    def length_m(self) -> float:
        return float(np.linalg.norm(np.subtract(self.end_m, self.start_m)))

    @property
    def center_m(self) -> tuple[float, float, float]:
        c = 0.5 * (np.asarray(self.start_m) + np.asarray(self.end_m))
        return (float(c[0]), float(c[1]), float(c[2]))

    @property
    def half_vector_m(self) -> np.ndarray:
        """``(3,) float``: from the centre to ``end_m``."""
        return 0.5 * (np.asarray(self.end_m) - np.asarray(self.start_m))

    def with_params(self, values) -> LineCharge:
        """Return a copy with charge and centre from ``values``; the segment keeps its shape."""
        v = np.asarray(values, dtype=float)
        hv = self.half_vector_m
        return LineCharge(float(v[0]), tuple(v[1:4] - hv), tuple(v[1:4] + hv))

    def lowest_z_m(self) -> float:
        return min(self.start_m[2], self.end_m[2])


@dataclass(frozen=True)
class SphereCharge(_SourceBase):
    """Charge spread uniformly through the volume of a ball.

    Parameters
    ----------
    charge_c : float
        Total charge in coulombs.
    center_m : (3,) float
        Centre in metres.
    radius_m : float
        Radius in metres, > 0.
    """

    charge_c: float
    center_m: tuple[float, float, float]
    radius_m: float

    kind: ClassVar[str] = "sphere"
    extra_params: ClassVar[tuple[str, ...]] = ("radius_m",)

    def __post_init__(self) -> None:
        object.__setattr__(self, "charge_c", _finite(self.charge_c, "charge_c"))
        object.__setattr__(self, "center_m", _vector3(self.center_m, "center_m"))
        object.__setattr__(self, "radius_m", _finite(self.radius_m, "radius_m", positive=True))

    def _extra_values(self) -> tuple[float, ...]:
        return (self.radius_m,)

    def with_params(self, values) -> SphereCharge:
        v = [float(x) for x in values]
        return SphereCharge(v[0], tuple(v[1:4]), v[4])

    def lowest_z_m(self) -> float:
        return self.center_m[2] - self.radius_m


@dataclass(frozen=True)
class GaussianCharge(_SourceBase):
    """An isotropic 3-D Gaussian charge cloud, rho(r) = Q (2 pi s^2)^(-3/2) exp(-r^2 / 2 s^2).

    Parameters
    ----------
    charge_c : float
        Total charge (the integral of the density) in coulombs.
    center_m : (3,) float
        Centre in metres.
    sigma_m : float
        Standard deviation along each axis in metres, > 0.
    """

    charge_c: float
    center_m: tuple[float, float, float]
    sigma_m: float

    kind: ClassVar[str] = "gaussian"
    extra_params: ClassVar[tuple[str, ...]] = ("sigma_m",)

    def __post_init__(self) -> None:
        object.__setattr__(self, "charge_c", _finite(self.charge_c, "charge_c"))
        object.__setattr__(self, "center_m", _vector3(self.center_m, "center_m"))
        object.__setattr__(self, "sigma_m", _finite(self.sigma_m, "sigma_m", positive=True))

    def _extra_values(self) -> tuple[float, ...]:
        return (self.sigma_m,)

    def with_params(self, values) -> GaussianCharge:
        v = [float(x) for x in values]
        return GaussianCharge(v[0], tuple(v[1:4]), v[4])

    def lowest_z_m(self) -> float:
        # The tails are unbounded; the contract asks that the centre lie above the ground.
        return self.center_m[2]


@dataclass(frozen=True, eq=False)
class DensityGrid(_SourceBase):
    """A piecewise-constant charge density on a regular 3-D grid of boxes.

    Parameters
    ----------
    density_c_per_m3 : (nx, ny, nz) float
        Charge density of each cell in C/m^3.
    origin_m : (3,) float
        The outer corner of cell (0, 0, 0) (its lowest x, y and z), metres.
    spacing_m : float or (3,) float
        Cell size along x, y, z in metres, > 0.

    Notes
    -----
    The field is the exact Coulomb integral over the boxes (closed form per box), so points next
    to or inside the charge are fine. The parameters seen by the Fisher stage are the total
    charge (the density scales with it; undefined for a grid with zero net charge) and the
    centre of the grid's bounding box (the whole grid shifts).

    The closed form sums alternating corner terms that grow with distance, so it would lose
    digits far away (relative error ~1e-8 at 100 cell sizes, 1e-5 at 1,000). Points at least
    ten cells from the grid's box therefore take Gauss–Legendre quadrature over every charged
    cell instead, whose error falls as (cell / distance)^(2g) for g nodes per axis: with g = 4,
    3, 2 beyond 10, 30 and 300 cells, field and gradient stay within ~1e-11 of the exact
    integral at every distance (measured in tests/test_sources.py).
    """

    density_c_per_m3: np.ndarray
    origin_m: tuple[float, float, float]
    spacing_m: tuple[float, float, float] = field(default=(1.0, 1.0, 1.0))

    kind: ClassVar[str] = "grid"

    def __post_init__(self) -> None:
        rho = np.array(self.density_c_per_m3, dtype=float)
        if rho.ndim != 3 or min(rho.shape) < 1:
            raise ValueError(
                f"`density_c_per_m3` must be a 3-D array (nx, ny, nz); got shape {rho.shape}."
            )
        if not np.all(np.isfinite(rho)):
            raise ValueError("`density_c_per_m3` must be finite; it holds NaN or inf.")
        rho.setflags(write=False)
        object.__setattr__(self, "density_c_per_m3", rho)
        object.__setattr__(self, "origin_m", _vector3(self.origin_m, "origin_m"))
        sp = np.asarray(self.spacing_m, dtype=float)
        # Checked before broadcasting: numpy's own broadcast error does not name the argument.
        if sp.shape not in ((), (1,), (3,)):
            got = sp.size if sp.ndim == 1 else f"shape {sp.shape}"
            raise ValueError(
                f"`spacing_m` must be one number or 3 numbers (dx, dy, dz) in metres; got {got}."
            )
        sp = np.broadcast_to(sp, (3,))
        if not np.all(np.isfinite(sp)) or np.any(sp <= 0):
            raise ValueError(f"`spacing_m` must be > 0 and finite; got {sp.tolist()}.")
        object.__setattr__(self, "spacing_m", (float(sp[0]), float(sp[1]), float(sp[2])))

    @property
    def cell_volume_m3(self) -> float:
        return float(np.prod(self.spacing_m))

    @property
    def charge_c(self) -> float:
        """Total charge, C."""
        return float(self.density_c_per_m3.sum() * self.cell_volume_m3)

    @property
    def size_m(self) -> np.ndarray:
        """``(3,) float``: edge lengths of the bounding box."""
        return np.asarray(self.density_c_per_m3.shape) * np.asarray(self.spacing_m)

    @property
    def center_m(self) -> tuple[float, float, float]:
        c = np.asarray(self.origin_m) + 0.5 * self.size_m
        return (float(c[0]), float(c[1]), float(c[2]))

    def with_params(self, values) -> DensityGrid:
        """Copy scaled to total charge ``values[0]`` and shifted to centre ``values[1:4]``."""
        v = np.asarray(values, dtype=float)
        q0 = self.charge_c
        scale = 1.0 if q0 == 0.0 else v[0] / q0
        origin = v[1:4] - 0.5 * self.size_m
        return DensityGrid(self.density_c_per_m3 * scale, tuple(origin), self.spacing_m)

    def lowest_z_m(self) -> float:
        # Only cells that hold charge count: an empty bottom layer may dip below the ground.
        charged = np.nonzero(np.any(self.density_c_per_m3 != 0.0, axis=(0, 1)))[0]
        k = int(charged[0]) if charged.size else 0
        return self.origin_m[2] + k * self.spacing_m[2]


Source = PointCharge | LineCharge | SphereCharge | GaussianCharge | DensityGrid

#: Every public kind by its config name.
KINDS: dict[str, type] = {
    cls.kind: cls for cls in (PointCharge, LineCharge, SphereCharge, GaussianCharge, DensityGrid)
}


# --------------------------------------------------------------------------------------------
# Kernels: strict arrays, no checks. params (S, N, P); points (M, 3).
# Return field (S, M, 3) summed over sources and, if wanted, jac (S, M, 3, N, P).
# --------------------------------------------------------------------------------------------


def _blocks(n_points: int, per_point: int, elements: int | None = None):
    """Yield slices of points so that one block's temporaries hold ~_BLOCK_ELEMENTS numbers."""
    step = max(1, (elements or _BLOCK_ELEMENTS) // max(per_point, 1))
    for start in range(0, n_points, step):
        yield slice(start, min(start + step, n_points))


def _offsets(params: np.ndarray, pts: np.ndarray):
    """Observation point minus source centre, per component: three (S, m, N) arrays."""
    return tuple(np.subtract(pts[None, :, None, k], params[:, None, :, 1 + k]) for k in range(3))


# ---- radial kinds (point, ball, Gaussian): one compiled loop ---------------------------------
#
# Their field is E = k q a(r) R with R = x − c, so the whole Jacobian follows from three radial
# functions: ∂E/∂q = k a R, ∂E/∂c = −k q (a I + b R Rᵀ) with b = a′(r)/r, and the size parameter's
# column ∂E/∂θ₄ = k q e R. The work per output number is a few flops, so the kernel is bound by
# writing the (S, M, 3, N, P) Jacobian; a compiled loop writes each output row once, in order,
# which numpy's whole-array passes cannot (their ~40 passes over strided columns ran at a fifth
# of the memory bandwidth; see benchmarks/forward.py).

_RADIAL_POINT, _RADIAL_BALL, _RADIAL_GAUSSIAN = 0, 1, 2

# Series of (φ − 3h)/(−3 h(0) e^{−z}) in z = r²/(2σ²) for the Gaussian near its centre, where the
# closed form is 0/0: from the series of P(3/2, z) (Abramowitz & Stegun 6.5.29).
_GAUSS_SERIES = (
    2 / 5,
    4 / 35,
    8 / 315,
    16 / 3465,
    32 / 45045,
    64 / 675675,
    128 / 11486475,
    256 / 218243025,
)
_GAUSS_SERIES_Z = 0.05
_TWO_OVER_SQRT_PI = 2.0 / math.sqrt(math.pi)
_GAUSS_AMP = 2.0 / (3.0 * math.sqrt(2.0 * math.pi))


def _jit(fn=None, **extra):
    """Compile ``fn`` once per machine (cached beside the module, or in the user's cache when
    that is read-only); without any writable cache, compile once per process instead.
    ``extra``: more numba options (``@_jit(fastmath=...)``)."""
    if fn is None:
        return lambda f: _jit(f, **extra)
    options = {"nogil": True, "error_model": "numpy", "boundscheck": False, **extra}
    try:
        return numba.njit(cache=True, **options)(fn)
    except RuntimeError:  # numba: "cannot cache function ...: no locator available"
        return numba.njit(**options)(fn)


def _call_compiled(fn, *args):
    """``fn(*args)``; on its first call in this process, with Ctrl-C held until it returns.

    The first call compiles the loop or loads it from numba's cache through callbacks from
    compiled code, where a KeyboardInterrupt would be printed as an ignored exception and
    lost; held, it is delivered to the previous handler once the call is done.
    """
    if fn.signatures or threading.current_thread() is not threading.main_thread():
        return fn(*args)  # (only the main thread receives signals)
    with _sigint_held() as delivered:
        out = fn(*args)
    delivered()
    return out


@contextlib.contextmanager
def _sigint_held():
    """Hold SIGINT in the block; yields ``deliver`` that passes a held one on to the handler
    that was in place before (the default one raises KeyboardInterrupt)."""
    held: list = []
    previous = signal.signal(signal.SIGINT, lambda *a: held.append(a))

    def deliver() -> None:
        if not held:
            return
        if callable(previous):
            previous(*held[0])
        elif previous != signal.SIG_IGN:
            raise KeyboardInterrupt

    try:
        yield deliver
    finally:
        signal.signal(signal.SIGINT, previous)


@_jit
def _radial_profile(kind, r2, size):
    """(a, b, e) of one radial source at squared distance r2 (m²); ``size`` radius or σ (m)."""
    if kind == _RADIAL_BALL and r2 < size * size:
        # Inside a uniform ball (Gauss's law): E = k q R / ρ³; ∂E/∂ρ = −3 k q R / ρ⁴.
        a = 1.0 / (size * size * size)
        return a, 0.0, -3.0 * a / size
    if kind == _RADIAL_GAUSSIAN:
        # h = P(3/2, z)/r³, φ = 4π ρ₁(r) = 3 h(0) e^{−z}; gradient coefficient (φ − 3h)/r²;
        # ∂E/∂σ = −k q φ R / σ.
        s2 = size * size
        z = r2 / (2.0 * s2)
        ez = math.exp(-z)
        amp = _GAUSS_AMP / (s2 * size)  # h(0)
        phi = 3.0 * amp * ez
        if z < _GAUSS_SERIES_Z:
            poly = 0.0
            for c in _GAUSS_SERIES[::-1]:
                poly = poly * z + c
            return amp * ez * (1.0 + z * poly), -3.0 * amp * ez * poly / (2.0 * s2), -phi / size
        sz = math.sqrt(z)
        # P(3/2, z) = erf(√z) − 2 √(z/π) e^{−z} (Abramowitz & Stegun 6.5.22 with 7.1.1)
        h = (math.erf(sz) - _TWO_OVER_SQRT_PI * sz * ez) / (r2 * math.sqrt(r2))
        return h, (phi - 3.0 * h) / r2, -phi / size
    # Coulomb: point charges, and balls seen from outside.
    inv_r2 = 1.0 / r2
    a = math.sqrt(inv_r2) * inv_r2
    return a, -3.0 * a * inv_r2, 0.0


@_jit
def _radial_loop(kind, k_coulomb, params, pts, E, jac, want_jac):
    """Add the field of every source to ``E`` (S, M, 3) and write ``jac`` (S, M, 3, N, P).

    ``k_coulomb`` is an argument, not the global: numba would freeze a global into the machine
    code it caches, and keep it when scipy's CODATA constants change.
    Returns the flat index s·M + m of the first (scenario, point) on a point charge, else −1.
    """
    S, N, P = params.shape
    M = pts.shape[0]
    singular = -1
    for s in range(S):
        for m in range(M):
            px, py, pz = pts[m, 0], pts[m, 1], pts[m, 2]
            ex = 0.0
            ey = 0.0
            ez = 0.0
            for n in range(N):
                q = params[s, n, 0]
                dx = px - params[s, n, 1]
                dy = py - params[s, n, 2]
                dz = pz - params[s, n, 3]
                r2 = dx * dx + dy * dy + dz * dz
                if r2 == 0.0 and kind == _RADIAL_POINT:
                    if singular < 0:
                        singular = s * M + m
                    continue
                a, b, e = _radial_profile(kind, r2, params[s, n, 4] if P > 4 else 0.0)
                ka = k_coulomb * a
                kqa = q * ka
                ex += kqa * dx
                ey += kqa * dy
                ez += kqa * dz
                if not want_jac:
                    continue
                jac[s, m, 0, n, 0] = ka * dx
                jac[s, m, 1, n, 0] = ka * dy
                jac[s, m, 2, n, 0] = ka * dz
                nkqb = -k_coulomb * q * b
                gxy = nkqb * dx * dy
                gxz = nkqb * dx * dz
                gyz = nkqb * dy * dz
                jac[s, m, 0, n, 1] = nkqb * dx * dx - kqa
                jac[s, m, 0, n, 2] = gxy
                jac[s, m, 0, n, 3] = gxz
                jac[s, m, 1, n, 1] = gxy
                jac[s, m, 1, n, 2] = nkqb * dy * dy - kqa
                jac[s, m, 1, n, 3] = gyz
                jac[s, m, 2, n, 1] = gxz
                jac[s, m, 2, n, 2] = gyz
                jac[s, m, 2, n, 3] = nkqb * dz * dz - kqa
                if P > 4:
                    kqe = k_coulomb * q * e
                    jac[s, m, 0, n, 4] = kqe * dx
                    jac[s, m, 1, n, 4] = kqe * dy
                    jac[s, m, 2, n, 4] = kqe * dz
            E[s, m, 0] += ex
            E[s, m, 1] += ey
            E[s, m, 2] += ez
    return singular


_NO_JAC = np.empty((1, 1, 1, 1, 1))


def _plain(a: np.ndarray) -> bool:
    """A writable C-ordered float64 array: the one layout the compiled loop takes."""
    return a.dtype == np.float64 and a.flags.c_contiguous and a.flags.writeable


def _radial_kernel(kind: int, name: str, what: str = ""):
    """The kernel of one radial kind, around the compiled loop. The loop sees only writable
    C-ordered float64 arrays and Python scalars, so one compiled version serves every call (a
    read-only, strided or float32 array would each cost a compilation of its own); an ``out``
    of another layout gets the result through a temporary array."""

    def kernel(params, pts, geom, want_jac, out=None):
        S, N, P = params.shape
        M = pts.shape[0]
        E = np.zeros((S, M, 3))
        jac = _jac_buffer((S, M, 3, N, P), want_jac, out)
        target = jac
        if jac is not None and not _plain(jac):
            target = np.empty(jac.shape)
        params = np.require(params, float, ["C", "W"])
        pts = np.require(pts, float, ["C", "W"])
        singular = _call_compiled(
            _radial_loop,
            int(kind),
            K_COULOMB,
            params,
            pts,
            E,
            _NO_JAC if jac is None else target,
            bool(want_jac),
        )
        if singular >= 0:
            _raise_on_charge(singular % M, pts[singular % M], what)
        if target is not jac:
            jac[...] = target
        return E, jac

    kernel.__name__ = kernel.__qualname__ = name
    return kernel


_point_kernel = _radial_kernel(_RADIAL_POINT, "_point_kernel", "point charge")
_sphere_kernel = _radial_kernel(_RADIAL_BALL, "_sphere_kernel")
_gaussian_kernel = _radial_kernel(_RADIAL_GAUSSIAN, "_gaussian_kernel")


def _line_kernel(params, pts, half_vectors, want_jac, out=None):
    """Uniform finite segment, centre c and half-vector hv (N, 3), ends a = c − hv, b = c + hv.

    With d1 = x − a, d2 = x − b, r1, r2 their lengths, S = r1 + r2 and L = 2|hv|,
    E = 2 k q (d1/r1 + d2/r2) / (S² − L²), and
    ∇E = 2 k q [ −2S g gᵀ/(S² − L²)² + (I/r1 − d1 d1ᵀ/r1³ + I/r2 − d2 d2ᵀ/r2³)/(S² − L²) ],
    g = d1/r1 + d2/r2. S − L is formed without cancellation from the distance to the line.
    """
    S_, N, P = params.shape
    M = pts.shape[0]
    E = np.zeros((S_, M, 3))
    jac = _jac_buffer((S_, M, 3, N, P), want_jac, out)
    q = params[:, None, :, 0]
    hv = half_vectors  # (N, 3)
    length = 2.0 * np.sqrt(np.sum(hv * hv, axis=1))  # (N,)
    u = 2.0 * hv / length[:, None]
    for blk in _blocks(M, S_ * N * 3):
        R = _offsets(params, pts[blk])  # x − c
        d1 = [R[k] + hv[:, k] for k in range(3)]
        d2 = [R[k] - hv[:, k] for k in range(3)]
        r1 = np.sqrt(d1[0] ** 2 + d1[1] ** 2 + d1[2] ** 2)
        r2 = np.sqrt(d2[0] ** 2 + d2[1] ** 2 + d2[2] ** 2)
        t1 = d1[0] * u[:, 0] + d1[1] * u[:, 1] + d1[2] * u[:, 2]  # along the line from a
        t2 = t1 - length
        perp = [d1[k] - t1 * u[:, k] for k in range(3)]
        rho2 = perp[0] ** 2 + perp[1] ** 2 + perp[2] ** 2
        with np.errstate(divide="ignore", invalid="ignore"):
            # r1 − t1 and r2 + t2, each in the form that does not cancel.
            e1 = np.where(t1 > 0, rho2 / (r1 + t1), r1 - t1)
            e2 = np.where(t2 < 0, rho2 / (r2 - t2), r2 + t2)
        s_minus_l = e1 + e2
        on_line = ~(s_minus_l > 1e-12 * length)
        _check_not_on_charge(on_line, pts[blk], blk, "line charge")
        s_sum = r1 + r2
        denom = s_minus_l * (s_sum + length)
        inv_d = 1.0 / denom
        g = [d1[k] / r1 + d2[k] / r2 for k in range(3)]
        unit = [2.0 * K_COULOMB * inv_d * g[k] for k in range(3)]
        for i in range(3):
            E[:, blk, i] += np.einsum("smn,sn->sm", unit[i], q[:, 0, :])
        if jac is None:
            continue
        kq2 = 2.0 * K_COULOMB * q
        c_gg = -2.0 * s_sum * inv_d * inv_d * kq2
        c_i = (1.0 / r1 + 1.0 / r2) * inv_d * kq2
        c1 = inv_d * kq2 / r1**3
        c2 = inv_d * kq2 / r2**3
        for i in range(3):
            jac[:, blk, i, :, 0] = unit[i]
            for j in range(i, 3):
                grad = c_gg * g[i] * g[j] - c1 * d1[i] * d1[j] - c2 * d2[i] * d2[j]
                if i == j:
                    grad += c_i
                np.negative(grad, out=jac[:, blk, i, :, 1 + j])
                if j != i:
                    jac[:, blk, j, :, 1 + i] = jac[:, blk, i, :, 1 + j]
    return E, jac


def _jac_buffer(shape, want_jac: bool, out: np.ndarray | None, zero: bool = False):
    """The Jacobian output of a kernel: ``out`` when given (reused between calls: no fresh
    pages to fault in), else a new array. ``out`` must have exactly ``shape``."""
    if not want_jac:
        return None
    if out is None:
        return np.zeros(shape) if zero else np.empty(shape)
    if out.shape != shape:
        raise ValueError(f"`out` must have shape {shape}; got {out.shape}.")
    if zero:
        out.fill(0.0)
    return out


def _check_not_on_charge(mask: np.ndarray, pts_block: np.ndarray, blk: slice, what: str) -> None:
    """Raise naming the first point (global index) where ``mask`` (S, m, N) is true."""
    if np.any(mask):
        m = int(np.nonzero(np.any(mask, axis=(0, 2)))[0][0])
        _raise_on_charge(blk.start + m, pts_block[m], what)


def _raise_on_charge(index: int, point: np.ndarray, what: str) -> None:
    raise ValueError(
        f"point {index} at ({point[0]:g}, {point[1]:g}, {point[2]:g}) m lies on a {what}, where "
        "the field is infinite; move the point or use a finite-size source (sphere, gaussian)."
    )


# ---- density grid: sums over the corners of uniformly charged boxes ---------------------------


def _log_r_plus(a, r, b2):
    """ln(a + r) with r = sqrt(a² + b2), stable for a < 0; b2 = 0 and a < 0 uses a tiny b2.

    Where a < 0, ln(a + r) = ln(b2) − ln(r − a). A term that is constant along the coordinate
    ``a`` cancels in the alternating corner sum, so replacing b2 = 0 by a tiny value only
    matters on a charged edge, where the true value is infinite.
    """
    tiny = np.finfo(float).tiny
    with np.errstate(divide="ignore", invalid="ignore"):
        neg = np.log(np.maximum(b2, tiny)) - np.log(r - a)
        pos = np.log(np.where(a >= 0, a + r, 1.0))
    return np.where(a >= 0, pos, neg)


def _atan_ratio(num, den):
    """arctan(num/den) with den = +0 read as the limit from den > 0 (0 when num = 0)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.arctan(num / den)
    edge = den == 0.0
    return np.where(edge, 0.5 * np.pi * np.sign(num), out)


def _grid_corner_terms(xi, eta, zeta, want_grad):
    """Box antiderivatives at corner offsets (source corner − point), all (S, m, cx, cy, cz).

    Field: E_x = k Σ w [η ln(ζ+R) + ζ ln(η+R) − ξ atan(ηζ/(ξR))], cyclic for y, z.
    Gradient: dE_x/dx = k Σ w atan(ηζ/(ξR)), dE_x/dy = −k Σ w ln(ζ+R), and so on.
    """
    xi2, eta2, zeta2 = xi * xi, eta * eta, zeta * zeta
    r = np.sqrt(xi2 + eta2 + zeta2)
    ln_x = _log_r_plus(xi, r, eta2 + zeta2)
    ln_y = _log_r_plus(eta, r, xi2 + zeta2)
    ln_z = _log_r_plus(zeta, r, xi2 + eta2)
    at_x = _atan_ratio(eta * zeta, xi * r)
    at_y = _atan_ratio(xi * zeta, eta * r)
    at_z = _atan_ratio(xi * eta, zeta * r)
    with np.errstate(invalid="ignore"):
        gx = eta * ln_z + zeta * ln_y - xi * at_x
        gy = zeta * ln_x + xi * ln_z - eta * at_y
        gz = xi * ln_y + eta * ln_x - zeta * at_z
    # At a cell vertex (R = 0) the logs are -inf and 0 * -inf gave NaN, but every term tends to
    # 0 there (|η ln(ζ + R)| <= R |ln R| -> 0): the field at a vertex is finite, so use the limit.
    vertex = r == 0.0
    if np.any(vertex):
        gx, gy, gz = (np.where(vertex, 0.0, g) for g in (gx, gy, gz))
    if not want_grad:
        return (gx, gy, gz), None
    grad = (at_x, at_y, at_z, -ln_z, -ln_y, -ln_x)  # xx, yy, zz, xy, xz, yz
    return (gx, gy, gz), grad


def _corner_weights(rho: np.ndarray) -> np.ndarray:
    """Triple difference of the zero-padded density: Σ_cells ρ Σ_corners ± f = Σ_corners w f."""
    p = np.pad(rho, 1)
    return -np.diff(np.diff(np.diff(p, axis=0), axis=1), axis=2)


# Far from the grid, Gauss–Legendre quadrature per cell replaces the corner sums: (distance from
# the grid's box in largest cell sides, nodes per axis), the first row that applies. Measured
# error bounds of field and gradient per row: 6e-13/4e-12, 1e-12/5e-12, 2e-12/6e-12.
_GRID_FAR_RULES = ((300.0, 2), (30.0, 3), (10.0, 4))


def _grid_nodes(base: np.ndarray, spacing: np.ndarray, order: int):
    """Quadrature nodes of every charged cell, offsets from the grid's lower corner ``(3, K)``
    (by coordinate, for the compiled sums), and their weights ``(K,)`` (charge per node for
    the unit-scaled density ``base``)."""
    t, w = np.polynomial.legendre.leggauss(order)
    cells = np.argwhere(base != 0.0)  # (C, 3)
    centre = (cells + 0.5) * spacing
    grid_t = np.stack(np.meshgrid(t, t, t, indexing="ij"), axis=-1).reshape(-1, 3)  # (g³, 3)
    grid_w = np.einsum("i,j,k->ijk", w, w, w).reshape(-1) / 8.0
    nodes = (centre[:, None, :] + 0.5 * spacing * grid_t[None, :, :]).reshape(-1, 3)
    weights = (base[tuple(cells.T)][:, None] * np.prod(spacing) * grid_w[None, :]).reshape(-1)
    return np.ascontiguousarray(nodes.T), np.ascontiguousarray(weights)


# reassoc (with nsz): lets the compiler split each sum over nodes into vector lanes, ~3x
# faster; the sums then round in another order (~1e-14 relative over 10⁴ nodes), the same on
# every call. No approximate division or square root (no arcp, afn).
@_jit(fastmath={"reassoc", "nsz"})
def _node_sums(k_coulomb, lower, nodes, weights, pts, E, G):
    """Field E (S, m, 3) and gradient G (S, m, 6: xx, yy, zz, xy, xz, yz) of point charges
    ``weights`` (K,) at ``lower[s] + nodes``, nodes (3, K) by coordinate; written, not added."""
    S = lower.shape[0]
    M = pts.shape[0]
    K = nodes.shape[1]
    nx, ny, nz = nodes[0], nodes[1], nodes[2]
    for s in range(S):
        for m in range(M):
            px = pts[m, 0] - lower[s, 0]
            py = pts[m, 1] - lower[s, 1]
            pz = pts[m, 2] - lower[s, 2]
            ex = ey = ez = 0.0
            gxx = gyy = gzz = gxy = gxz = gyz = 0.0
            for n in range(K):
                dx = px - nx[n]
                dy = py - ny[n]
                dz = pz - nz[n]
                inv_r2 = 1.0 / (dx * dx + dy * dy + dz * dz)
                wa = weights[n] * math.sqrt(inv_r2) * inv_r2
                wb = -3.0 * wa * inv_r2
                ex += wa * dx
                ey += wa * dy
                ez += wa * dz
                gxx += wa + wb * dx * dx
                gyy += wa + wb * dy * dy
                gzz += wa + wb * dz * dz
                gxy += wb * dx * dy
                gxz += wb * dx * dz
                gyz += wb * dy * dz
            E[s, m, 0] = k_coulomb * ex
            E[s, m, 1] = k_coulomb * ey
            E[s, m, 2] = k_coulomb * ez
            G[s, m, 0] = k_coulomb * gxx
            G[s, m, 1] = k_coulomb * gyy
            G[s, m, 2] = k_coulomb * gzz
            G[s, m, 3] = k_coulomb * gxy
            G[s, m, 4] = k_coulomb * gxz
            G[s, m, 5] = k_coulomb * gyz


def _cells_away(pts: np.ndarray, lower: np.ndarray, size: np.ndarray, cell: float) -> np.ndarray:
    """``(M,)`` distance of each point from the grid's box, nearest over the scenarios, in
    largest cell sides; ``lower`` (S, 3) is the box's lower corner in each scenario."""
    below = lower[:, None, :] - pts[None, :, :]
    above = pts[None, :, :] - (lower + size)[:, None, :]
    gap = np.maximum(np.maximum(below, above), 0.0)  # (S, M, 3)
    return np.sqrt(np.sum(gap * gap, axis=-1)).min(axis=0) / cell


def _grid_kernel(params, pts, grids, want_jac, out=None):
    """Density grids (a Python loop over grids only: each has its own shape).

    params (S, N, 4) = (total charge, centre); grids: sequence of N DensityGrid. The density
    is the grid's own shape scaled to the scenario's charge; a neutral grid keeps its density
    and has no charge column.
    """
    S, N, P = params.shape
    M = pts.shape[0]
    E = np.zeros((S, M, 3))
    jac = _jac_buffer((S, M, 3, N, P), want_jac, out, zero=True)
    tensor = ((0, 3, 4), (3, 1, 5), (4, 5, 2))  # index into (xx, yy, zz, xy, xz, yz)
    for n, grid in enumerate(grids):
        q0 = grid.charge_c
        neutral = q0 == 0.0
        base = grid.density_c_per_m3 if neutral else grid.density_c_per_m3 / q0
        mult = np.ones(S) if neutral else params[:, n, 0]  # (S,)
        spacing = np.asarray(grid.spacing_m)
        lower = params[:, n, 1:4] - 0.5 * grid.size_m  # (S, 3)
        away = _cells_away(pts, lower, grid.size_m, float(spacing.max()))
        near = np.ones(M, dtype=bool)
        for cells, order in _GRID_FAR_RULES:
            take = np.flatnonzero(near & (away >= cells))
            if take.size == 0:
                continue
            near[take] = False
            nodes, weights = _grid_nodes(base, spacing, order)
            unit = np.empty((S, take.size, 3))
            grad6 = np.empty((S, take.size, 6))  # a fifth of the work: always computed
            sub = np.ascontiguousarray(pts[take])
            args = (K_COULOMB, np.ascontiguousarray(lower), nodes, weights, sub, unit, grad6)
            _call_compiled(_node_sums, *args)
            grad = [grad6[..., c] for c in range(6)] if want_jac else None
            _add_grid_terms(E, jac, n, take, unit, grad, mult, neutral, tensor)
        if not near.any():
            continue
        w = _corner_weights(base)
        idx = np.nonzero(w)
        wv = w[idx]
        corner = [lower[:, k : k + 1] + idx[k] * spacing[k] for k in range(3)]  # (S, K) each
        near_idx = np.flatnonzero(near)
        for blk in _blocks(near_idx.size, S * wv.size * 8):
            take = near_idx[blk]
            p = pts[take]
            off = [corner[k][:, None, :] - p[None, :, k, None] for k in range(3)]
            gfield, grad = _grid_corner_terms(*off, want_jac)
            unit = K_COULOMB * np.stack([g @ wv for g in gfield], axis=-1)  # (S, m, 3)
            grad = None if grad is None else [K_COULOMB * (g @ wv) for g in grad]
            _add_grid_terms(E, jac, n, take, unit, grad, mult, neutral, tensor)
    return E, jac


def _add_grid_terms(E, jac, n, take, unit, grad, mult, neutral, tensor) -> None:
    """Add grid ``n``'s field at points ``take`` to ``E`` and write its Jacobian columns.

    unit : (S, m, 3) field per unit scale; grad : six (S, m) gradient components (xx, yy, zz,
    xy, xz, yz) per unit scale, or None; mult : (S,) the scenario's scale.
    """
    # Views first, then one index array: numpy moves the axes of mixed advanced indices.
    E[:, take, :] += unit * mult[:, None, None]
    if jac is None:
        return
    if not neutral:
        jac[:, :, :, n, 0][:, take, :] = unit
    gv = [g * mult[:, None] for g in grad]
    for i in range(3):
        for j in range(3):
            jac[:, :, i, n, 1 + j][:, take] = -gv[tensor[i][j]]


#: kind name -> kernel(params (S, N, P), points (M, 3), geometry, want_jac, out=None)
KERNELS = {
    "point": _point_kernel,
    "line": _line_kernel,
    "sphere": _sphere_kernel,
    "gaussian": _gaussian_kernel,
    "grid": _grid_kernel,
}
