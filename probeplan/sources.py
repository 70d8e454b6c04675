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

#: A density grid is neutral when its net charge is within this fraction of its gross charge.
NEUTRAL_RTOL: float = 1e-12

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

    @property
    def neutral(self) -> bool:
        """No net charge: nothing to scale, and no charge to estimate."""
        return self.charge_c == 0.0


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
    digits far away (relative error ~1e-8 at 100 cell sizes, 1e-5 at 1,000). Far from the
    grid's box (at least ten cell sides, and ten times the smallest gap between the corners
    that carry weight: one cell for a varying density, the whole box for a uniform one) the
    field is instead Gauss–Legendre quadrature over every charged cell, whose error falls as
    (cell / distance)^(2g) for g nodes per axis: with g = 4, 3, 2 beyond 10, 30 and 300 cells,
    field and gradient stay within ~1e-11 of the exact integral (~3e-10 where a sparse set of
    corners is kept out to 30 gaps), for each scenario and point on its own (measured in
    tests/test_sources.py and tests/test_forward.py).

    A density whose net charge is within 1e-12 of its gross charge is :attr:`neutral`.
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
    def neutral(self) -> bool:
        """No net charge: |Σρ| within 1e-12 of Σ|ρ|, the rounding of summing mixed signs (a
        net charge that small has no scale to vary; the density is kept as given)."""
        rho = self.density_c_per_m3
        return bool(abs(rho.sum()) <= NEUTRAL_RTOL * np.abs(rho).sum())

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
        scale = 1.0 if self.neutral else v[0] / self.charge_c
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


def _blocks(n_points: int, per_point: int):
    """Yield slices of points so that one block's temporaries hold ~_BLOCK_ELEMENTS numbers."""
    step = max(1, _BLOCK_ELEMENTS // max(per_point, 1))
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
    lost; held, each press is handed to the previous handler once the call is done.
    """
    if (
        fn.signatures
        or threading.current_thread() is not threading.main_thread()  # (signals go to main)
        or signal.getsignal(signal.SIGINT) is None  # a handler not set from Python: leave it
    ):
        return fn(*args)
    with _sigint_held():
        return fn(*args)


@contextlib.contextmanager
def _sigint_held():
    """Hold SIGINT in the block, then hand every press on to the handler that was in place
    before (the default one raises KeyboardInterrupt), also when the block raised."""
    held: list = []
    previous = signal.signal(signal.SIGINT, lambda *a: held.append(a))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
        for args in held:
            if callable(previous):
                previous(*args)
            elif previous != signal.SIG_IGN:
                raise KeyboardInterrupt


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


_INFINITE_FIELD = (
    "the field is infinite; move the point or use a finite-size source (sphere, gaussian)."
)


class SingularPointError(ValueError):
    """A point where the field is infinite: on a point charge, a line charge or a charged corner
    of a density grid. A ``ValueError``; the command that read the point (a layout, a config)
    reports it as that input's fault."""


def _raise_on_charge(index: int, point: np.ndarray, what: str, why: str = _INFINITE_FIELD) -> None:
    """One SingularPointError naming point ``index`` (among all points) and the ``what``."""
    raise SingularPointError(
        f"point {index} at ({point[0]:g}, {point[1]:g}, {point[2]:g}) m lies on a {what}, where "
        + why
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
# The corner sums lose digits with the distance measured in their own length scale, the smallest
# gap between the corners that carry weight (one cell for a varying density, the whole box for a
# uniform one): they are used within this many such gaps (error ~1e-11 there), and within the
# second number when they are also ten times fewer than the quadrature nodes (error ~3e-10).
_GRID_CORNER_GAPS = (10.0, 30.0)


def _grid_cells(base: np.ndarray, spacing: np.ndarray):
    """Charged cells: centres as offsets from the grid's lower corner ``(3, C)``, by coordinate
    for the compiled sums, and each cell's charge ``(C,)`` for the unit-scaled density."""
    cells = np.argwhere(base != 0.0)  # (C, 3)
    centres = np.ascontiguousarray(((cells + 0.5) * spacing).T)
    return centres, np.ascontiguousarray(base[tuple(cells.T)] * np.prod(spacing))


def _corner_gap_m(idx: tuple, spacing: np.ndarray) -> float:
    """Smallest gap between distinct coordinates of the weighted corners along any axis, m."""
    gaps = [np.diff(np.unique(i)).min() * h for i, h in zip(idx, spacing, strict=True) if i.size]
    gaps = [g for g in gaps if g > 0]
    return float(min(gaps)) if gaps else float(np.max(spacing))


# reassoc (with nsz): lets the compiler split each sum over cells into vector lanes, ~3x faster;
# the sums then round in another order (~1e-14 relative over 10⁴ cells), the same on every
# call. No approximate division or square root (no arcp, afn).
@_jit(fastmath={"reassoc", "nsz"})
def _cell_quadrature(k_coulomb, lower, pts, centres, charge, half, t, w, E, G):
    """Field and gradient of charged boxes by Gauss–Legendre quadrature, for pairs p of a grid
    position and a point: ``lower`` (P, 3) the grid's lower corner, ``pts`` (P, 3) the point;
    ``centres`` (3, C) cell centres from the lower corner, ``charge`` (C,), ``half`` (3,) half
    cell sides, ``t``, ``w`` (g,) nodes and weights on [−1, 1]. Writes E (P, 3) and G (P, 6:
    xx, yy, zz, xy, xz, yz). Nodes are formed on the fly: memory stays ~C numbers.
    """
    P = pts.shape[0]
    C = charge.shape[0]
    g = t.shape[0]
    cx, cy, cz = centres[0], centres[1], centres[2]
    for p in range(P):
        px = pts[p, 0] - lower[p, 0]
        py = pts[p, 1] - lower[p, 1]
        pz = pts[p, 2] - lower[p, 2]
        ex = ey = ez = 0.0
        gxx = gyy = gzz = gxy = gxz = gyz = 0.0
        for a in range(g):
            for b in range(g):
                for c in range(g):
                    qx = px - t[a] * half[0]
                    qy = py - t[b] * half[1]
                    qz = pz - t[c] * half[2]
                    sx = sy = sz = 0.0
                    sxx = syy = szz = sxy = sxz = syz = 0.0
                    for n in range(C):  # over cells: the loop the compiler vectorises
                        dx = qx - cx[n]
                        dy = qy - cy[n]
                        dz = qz - cz[n]
                        inv_r2 = 1.0 / (dx * dx + dy * dy + dz * dz)
                        wa = charge[n] * math.sqrt(inv_r2) * inv_r2
                        wb = -3.0 * wa * inv_r2
                        sx += wa * dx
                        sy += wa * dy
                        sz += wa * dz
                        sxx += wa + wb * dx * dx
                        syy += wa + wb * dy * dy
                        szz += wa + wb * dz * dz
                        sxy += wb * dx * dy
                        sxz += wb * dx * dz
                        syz += wb * dy * dz
                    wabc = 0.125 * w[a] * w[b] * w[c]
                    ex += wabc * sx
                    ey += wabc * sy
                    ez += wabc * sz
                    gxx += wabc * sxx
                    gyy += wabc * syy
                    gzz += wabc * szz
                    gxy += wabc * sxy
                    gxz += wabc * sxz
                    gyz += wabc * syz
        E[p, 0] = k_coulomb * ex
        E[p, 1] = k_coulomb * ey
        E[p, 2] = k_coulomb * ez
        G[p, 0] = k_coulomb * gxx
        G[p, 1] = k_coulomb * gyy
        G[p, 2] = k_coulomb * gzz
        G[p, 3] = k_coulomb * gxy
        G[p, 4] = k_coulomb * gxz
        G[p, 5] = k_coulomb * gyz


def _box_distance(pts: np.ndarray, lower: np.ndarray, size: np.ndarray) -> np.ndarray:
    """``(S, M)`` distance of each point from the grid's box in each scenario, m; ``lower``
    (S, 3) is the box's lower corner."""
    below = lower[:, None, :] - pts[None, :, :]
    above = pts[None, :, :] - (lower + size)[:, None, :]
    gap = np.maximum(np.maximum(below, above), 0.0)
    return np.sqrt(np.sum(gap * gap, axis=-1))


def grid_entries(grids) -> tuple:
    """The kernel's geometry for density grids: ``(grid, total charge, neutral)`` each, with the
    charge and the neutrality decided once (see :attr:`DensityGrid.neutral`)."""
    return tuple((g, g.charge_c, g.neutral) for g in grids)


def _grid_kernel(params, pts, grids, want_jac, out=None):
    """Density grids (a Python loop over grids only: each has its own shape).

    params (S, N, 4) = (total charge, centre); grids: N entries (DensityGrid, its total charge,
    neutral) from :func:`grid_entries`. The density is the grid's own shape scaled to the
    scenario's charge; a neutral grid keeps its density and has no charge column.

    Each (scenario, point) pair takes the box closed form summed over the weighted corners when
    the point is near the grid, and Gauss–Legendre quadrature per cell when it is far, where the
    corner sums would cancel (see ``_GRID_FAR_RULES`` and ``_GRID_CORNER_GAPS``).
    """
    S, N, P = params.shape
    M = pts.shape[0]
    E = np.zeros((S, M, 3))
    jac = _jac_buffer((S, M, 3, N, P), want_jac, out, zero=True)
    tensor = ((0, 3, 4), (3, 1, 5), (4, 5, 2))  # index into (xx, yy, zz, xy, xz, yz)
    for n, (grid, q0, neutral) in enumerate(grids):
        base = grid.density_c_per_m3 if neutral else grid.density_c_per_m3 / q0
        mult = np.ones(S) if neutral else params[:, n, 0]  # (S,)
        spacing = np.asarray(grid.spacing_m)
        lower = params[:, n, 1:4] - 0.5 * grid.size_m  # (S, 3)
        w = _corner_weights(base)
        idx = np.nonzero(w)
        wv = w[idx]
        dist = _box_distance(pts, lower, grid.size_m)  # (S, M)
        cell = float(spacing.max())
        # corners far cheaper than quadrature nodes (27 a cell at the 3-node rule)
        sparse = 10 * wv.size < 27 * np.count_nonzero(base)
        gaps = _GRID_CORNER_GAPS[1] if sparse else _GRID_CORNER_GAPS[0]
        far = (dist >= gaps * _corner_gap_m(idx, spacing)) & (dist >= 10.0 * cell)
        unit = np.zeros((S, M, 3))
        grad6 = np.zeros((S, M, 6))
        if far.any():
            centres, charge = _grid_cells(base, spacing)
            todo = far.copy()
            for cells_away, order in _GRID_FAR_RULES:
                s_i, m_i = np.nonzero(todo & (dist >= cells_away * cell))
                if s_i.size == 0:
                    continue
                todo[s_i, m_i] = False
                t, wq = np.polynomial.legendre.leggauss(order)
                e_p, g_p = np.empty((s_i.size, 3)), np.empty((s_i.size, 6))
                args = (lower[s_i], np.ascontiguousarray(pts[m_i]), centres, charge)
                args += (0.5 * spacing, t, wq, e_p, g_p)
                _call_compiled(_cell_quadrature, K_COULOMB, *args)
                unit[s_i, m_i], grad6[s_i, m_i] = e_p, g_p
        near_pts = np.flatnonzero(~far.all(axis=0))
        corner = [lower[:, k : k + 1] + idx[k] * spacing[k] for k in range(3)]  # (S, K) each
        for blk in _blocks(near_pts.size, S * wv.size * 8):
            take = near_pts[blk]
            p = pts[take]
            off = [corner[k][:, None, :] - p[None, :, k, None] for k in range(3)]
            gfield, grad = _grid_corner_terms(*off, want_jac)
            keep = ~far[:, take, None]  # (S, m, 1): the pairs the quadrature did not take
            u = K_COULOMB * np.stack([g @ wv for g in gfield], axis=-1)  # (S, m, 3)
            unit[:, take] = np.where(keep, u, unit[:, take])
            if grad is not None:
                gr = K_COULOMB * np.stack([g @ wv for g in grad], axis=-1)  # (S, m, 6)
                if not np.isfinite(gr).all():  # one cheap pass; the rest on the error path
                    m = int(np.flatnonzero(~np.isfinite(gr).all(axis=(0, 2)))[0])
                    why = (
                        "the field is finite but its gradient (the Jacobian's centre columns) is "
                        "infinite; move the point off the corner."
                    )
                    _raise_on_charge(int(take[m]), p[m], "corner of a charged grid cell", why)
                grad6[:, take] = np.where(keep, gr, grad6[:, take])
        E += unit * mult[:, None, None]
        if jac is None:
            continue
        if not neutral:
            jac[:, :, :, n, 0] = unit
        gv = grad6 * mult[:, None, None]
        for i in range(3):
            for j in range(3):
                jac[:, :, i, n, 1 + j] = -gv[..., tensor[i][j]]
    return E, jac


#: kind name -> kernel(params (S, N, P), points (M, 3), geometry, want_jac, out=None)
KERNELS = {
    "point": _point_kernel,
    "line": _line_kernel,
    "sphere": _sphere_kernel,
    "gaussian": _gaussian_kernel,
    "grid": _grid_kernel,
}
