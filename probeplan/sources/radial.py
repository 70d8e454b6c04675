"""Radial kinds (point, uniform ball, Gaussian): one loop compiled by numba.

Closed forms: Coulomb's law; Gauss's law inside and outside a uniform ball; the Gaussian's
enclosed-charge fraction P(3/2, r²/2σ²) (regularised lower incomplete gamma).
"""

from __future__ import annotations

import math
import types

import numba
import numpy as np

from ._common import _call_compiled, _jac_buffer, _jit, _plain, _raise_on_charge
from .kinds import K_COULOMB

# ---- radial kinds (point, ball, Gaussian): one compiled loop ---------------------------------
#
# Their field is E = k q a(r) R with R = x − c, so the whole Jacobian follows from three radial
# functions: ∂E/∂q = k a R, ∂E/∂c = −k q (a I + b R Rᵀ) with b = a′(r)/r, and the size parameter's
# column ∂E/∂θ₄ = k q e R. The work per output number is a few flops, so the kernel is bound by
# writing the (S, M, 3, N, P) Jacobian; a compiled loop writes each output row once, in order,
# which numpy's whole-array passes cannot (their ~40 passes over strided columns ran at a fifth
# of the memory bandwidth; see benchmarks/forward.py).

_RADIAL_POINT, _RADIAL_BALL, _RADIAL_GAUSSIAN = 0, 1, 2

#: Squared distance (m²) below which a point lies on a point charge. A point charge is a model
#: of a charge cloud, meaningless at atomic scales, and closer than about 1e-48 m its field's
#: gradient squared overflows a float64 (the Fisher information then held NaN): within 1 nm
#: the point is on the charge, as at r = 0. Read as a global by the compiled loop (a fixed
#: number, never changed).
_ON_POINT_M2 = 1e-18

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


#: (scenario, point) pairs per block of the compiled loop: one thread a block.
_SM_BLOCK = 64


def _radial_loop_py(kind, k_coulomb, params, pts, E, jac, want_jac):
    """Add the field of every source to ``E`` (S, M, 3) and write ``jac`` (S, M, 3, N, P).

    ``k_coulomb`` is an argument, not the global: numba would freeze a global into the machine
    code it caches, and keep it when scipy's CODATA constants change. The (scenario, point)
    pairs run in blocks, one thread a block; each pair is summed by one thread in source order,
    so the result does not depend on the number of threads.
    Returns the flat index s·M + m of the first (scenario, point) on a point charge, else −1.
    """
    S, N, P = params.shape
    M = pts.shape[0]
    n_blocks = (S * M + _SM_BLOCK - 1) // _SM_BLOCK
    first = np.full(n_blocks, -1, dtype=np.int64)
    for blk in numba.prange(n_blocks):
        for sm in range(blk * _SM_BLOCK, min(S * M, (blk + 1) * _SM_BLOCK)):
            s = sm // M
            m = sm - s * M
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
                if r2 < _ON_POINT_M2 and kind == _RADIAL_POINT:
                    if first[blk] < 0:
                        first[blk] = sm
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
    for blk in range(n_blocks):
        if first[blk] >= 0:
            return first[blk]
    return -1


def _renamed(fn, name: str):
    """A copy of ``fn`` under another name: numba caches compiled code by the function's
    name, and the serial and the parallel loop must not share a cache entry."""
    copy = types.FunctionType(fn.__code__, fn.__globals__, name, fn.__defaults__)
    copy.__qualname__ = name
    return copy


_radial_loop = _jit(_renamed(_radial_loop_py, "_radial_loop"))
#: The same loop on every core: for large calls only (see :data:`PARALLEL_MIN`).
_radial_loop_parallel = _jit(parallel=True)(_renamed(_radial_loop_py, "_radial_loop_parallel"))
#: Scenarios × points × sources from which a call runs the loop on every core: below it the
#: threads' start costs more than they save, and a small call (a dask worker's block, a
#: budget's helper process) keeps to its own core.
PARALLEL_MIN = 1_000_000

_NO_JAC = np.empty((1, 1, 1, 1, 1))


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
        loop = _radial_loop_parallel if S * M * N >= PARALLEL_MIN else _radial_loop
        singular = _call_compiled(
            loop,
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
