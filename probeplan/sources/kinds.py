"""The five public source kinds: small frozen dataclasses that validate their own arguments
once and turn themselves into a parameter vector and back (see :mod:`probeplan.sources`)."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import ClassVar

import numpy as np
from scipy import constants

#: Coulomb constant k = 1/(4 pi eps0) in N m^2 / C^2, from scipy.constants (CODATA).
K_COULOMB: float = 1.0 / (4.0 * math.pi * constants.epsilon_0)

#: A density grid is neutral when its net charge is within this fraction of its gross charge.
NEUTRAL_RTOL: float = 1e-12

#: Parameter names shared by every kind, in the contract's order: charge, then the centre.
BASE_PARAMS: tuple[str, ...] = ("charge_c", "x_m", "y_m", "z_m")


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
