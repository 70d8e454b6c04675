"""Charge distributions and their fields, with derivatives with respect to their parameters.

Map of this package (read top to bottom):

1. :mod:`.kinds`: constants and the five public source kinds (small frozen dataclasses). Each
   validates its own arguments once, in ``__post_init__``, and can turn itself into a parameter
   vector and back.
2. Private kernels, one per kind (:mod:`.radial`, :mod:`.line`, :mod:`.grid`; shared helpers
   and the numba compilation in :mod:`._common`), on strict arrays with no checks. A kernel
   takes the parameters of *all sources of its kind in all scenarios* at once and returns the
   summed field and the per-source parameter Jacobian. Line and grid kernels are vectorised
   numpy over blocks of points; the radial kinds (point, ball, Gaussian) share one loop
   compiled by numba, because their Jacobian costs a few flops per number and only a compiled
   loop writes it at memory speed. Closed forms from the literature are used everywhere:

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

3. :mod:`.potentials`: the potential of every kind and its parameter Jacobian, in closed form,
   for the boundary-element solve of conducting structures (:mod:`probeplan.bem`).

   The derivative of a field with respect to a rigid shift of its source is minus the field
   gradient at the observation point, so every kernel computes the gradient tensor once and
   uses it for the centre columns.

Shapes: ``S`` scenarios, ``M`` points, ``N`` sources of one kind, ``P`` parameters of a kind.
Units: SI throughout (C, m, V/m). Sign: physics convention, E points away from positive charge.
"""

from __future__ import annotations

# Private names other modules and the tests reach through the package.
from ._common import SingularPointError, _call_compiled, _jit  # noqa: F401
from .grid import _grid_kernel, grid_entries
from .kinds import (
    BASE_PARAMS,
    K_COULOMB,
    KINDS,
    NEUTRAL_RTOL,
    DensityGrid,
    GaussianCharge,
    LineCharge,
    PointCharge,
    Source,
    SphereCharge,
    _SourceBase,  # noqa: F401
)
from .line import _line_kernel
from .radial import _gaussian_kernel, _point_kernel, _radial_loops, _sphere_kernel  # noqa: F401

#: kind name -> kernel(params (S, N, P), points (M, 3), geometry, want_jac, out=None)
KERNELS = {
    "point": _point_kernel,
    "line": _line_kernel,
    "sphere": _sphere_kernel,
    "gaussian": _gaussian_kernel,
    "grid": _grid_kernel,
}

#: Kinds whose kernel also takes ``ground_z=`` (the images folded into the sources' Jacobian
#: columns) and an ``out`` of shape (S, M, 3, C ≥ N·P) (see :func:`radial._radial_kernel`).
FOLDS_IMAGES = frozenset({"point", "sphere", "gaussian"})

__all__ = [
    "BASE_PARAMS",
    "KERNELS",
    "KINDS",
    "K_COULOMB",
    "NEUTRAL_RTOL",
    "DensityGrid",
    "GaussianCharge",
    "LineCharge",
    "PointCharge",
    "SingularPointError",
    "Source",
    "SphereCharge",
    "grid_entries",
]
