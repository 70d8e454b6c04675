"""Radial kinds (point, uniform ball, Gaussian): two loops compiled by numba.

Closed forms: Coulomb's law; Gauss's law inside and outside a uniform ball; the Gaussian's
enclosed-charge fraction P(3/2, r²/2σ²) (regularised lower incomplete gamma).
"""

from __future__ import annotations

import math
import types

import numba
import numpy as np

from ._common import (
    _call_compiled,
    _jac_buffer,
    _jit,
    _plain,
    _raise_on_charge,
    _store_fence,
    _stream_store,
)
from .kinds import K_COULOMB

# ---- radial kinds (point, ball, Gaussian): compiled loops ------------------------------------
#
# Their field is E = k q a(r) R with R = x − c, so the whole Jacobian follows from three radial
# functions: ∂E/∂q = k a R, ∂E/∂c = −k q (a I + b R Rᵀ) with b = a′(r)/r, and the size parameter's
# column ∂E/∂θ₄ = k q e R. The work per output number is a few flops. With many sources the
# kernel is bound by writing the (S, M, 3, N, P) Jacobian: a compiled loop writes each point's
# rows once, in order (numpy's ~40 whole-array passes over strided columns ran at a fifth of the
# memory bandwidth; see benchmarks/forward.py). With few sources, as when scoring layouts, it is
# bound by the arithmetic: another loop runs each source over a block of points.

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


@_jit
def _first_on_point(params, pts, m0, m1, ground_z):
    """The first point m in [m0, m1) within ``_ON_POINT_M2`` of a point charge of ``params``
    ``(N, P)`` or (when ``ground_z`` is not NaN) of its image; −1 if none."""
    for m in range(m0, m1):
        for n in range(params.shape[0]):
            dx = pts[m, 0] - params[n, 1]
            dy = pts[m, 1] - params[n, 2]
            for cz in (params[n, 3], 2.0 * ground_z - params[n, 3]):
                dz = pts[m, 2] - cz
                if dx * dx + dy * dy + dz * dz < _ON_POINT_M2:
                    return m
    return -1


@_jit
def _source_terms(kind, k_coulomb, q, size, dx, dy, dz, dzi, mirrored):
    """What one source (and, when ``mirrored``, its image) gives at one point.

    ``(dx, dy, dz)``: point minus source centre; ``dzi``: the point's height above the image
    (charge −q at height 2g − z). Returns (smallest squared distance, the field (3), then
    ∂E/∂θ row by row: ∂E_i/∂q, ∂E_i/∂(x, y, z), ∂E_i/∂size for i = x, y, z (15 numbers)).
    The image's entries are added with its charge and height columns negated (chain rule
    through q' = −q, z' = 2g − z): each entry is real ± image rounded once.
    """
    r2 = dx * dx + dy * dy + dz * dz
    a, b, e = _radial_profile(kind, r2, size)
    ka = k_coulomb * a
    kqa = q * ka
    kq = k_coulomb * q
    nkqb = -kq * b
    kqe = kq * e
    fx, fy, fz = kqa * dx, kqa * dy, kqa * dz
    q0, q1, q2 = ka * dx, ka * dy, ka * dz
    gxx, gyy, gzz = nkqb * dx * dx - kqa, nkqb * dy * dy - kqa, nkqb * dz * dz - kqa
    gxy, gxz, gyz = nkqb * dx * dy, nkqb * dx * dz, nkqb * dy * dz
    s0, s1, s2 = kqe * dx, kqe * dy, kqe * dz
    hxx = hyy = hzz = hxy = hxz = hyz = 0.0
    if mirrored:
        r2i = dx * dx + dy * dy + dzi * dzi
        r2 = min(r2, r2i)
        ai, bi, ei = _radial_profile(kind, r2i, size)
        kai = k_coulomb * ai
        kqai = -q * kai
        nkqbi = kq * bi
        kqei = -kq * ei
        fx, fy, fz = fx + kqai * dx, fy + kqai * dy, fz + kqai * dzi
        q0, q1, q2 = q0 - kai * dx, q1 - kai * dy, q2 - kai * dzi
        hxx = nkqbi * dx * dx - kqai
        hyy = nkqbi * dy * dy - kqai
        hzz = nkqbi * dzi * dzi - kqai
        hxy = nkqbi * dx * dy
        hxz = nkqbi * dx * dzi
        hyz = nkqbi * dy * dzi
        s0, s1, s2 = s0 + kqei * dx, s1 + kqei * dy, s2 + kqei * dzi
    return (
        (r2, fx, fy, fz),
        (q0, gxx + hxx, gxy + hxy, gxz - hxz, s0),
        (q1, gxy + hxy, gyy + hyy, gyz - hyz, s1),
        (q2, gxz + hxz, gyz + hyz, gzz - hzz, s2),
    )


@_jit
def _put(jac, s, m, i, j, value, stream):
    """``jac[s, m, i, j] = value``; a non-temporal store when ``stream``."""
    if stream:
        _stream_store(jac, s, m, i, j, value)
    else:
        jac[s, m, i, j] = value


@_jit
def _store(jac, s, m, c, P, rows, stream):
    """One source's ∂E/∂θ ``rows`` (3 × 5 numbers, see :func:`_source_terms`) into
    ``jac[s, m, :, c:c + P]`` (the size column only for P = 5), in column order; with
    non-temporal stores when ``stream``."""
    rx, ry, rz = rows  # (unrolled: a tuple indexed in a loop is copied to the stack)
    _put(jac, s, m, 0, c, rx[0], stream)
    _put(jac, s, m, 0, c + 1, rx[1], stream)
    _put(jac, s, m, 0, c + 2, rx[2], stream)
    _put(jac, s, m, 0, c + 3, rx[3], stream)
    _put(jac, s, m, 1, c, ry[0], stream)
    _put(jac, s, m, 1, c + 1, ry[1], stream)
    _put(jac, s, m, 1, c + 2, ry[2], stream)
    _put(jac, s, m, 1, c + 3, ry[3], stream)
    _put(jac, s, m, 2, c, rz[0], stream)
    _put(jac, s, m, 2, c + 1, rz[1], stream)
    _put(jac, s, m, 2, c + 2, rz[2], stream)
    _put(jac, s, m, 2, c + 3, rz[3], stream)
    if P > 4:
        _put(jac, s, m, 0, c + 4, rx[4], stream)
        _put(jac, s, m, 1, c + 4, ry[4], stream)
        _put(jac, s, m, 2, c + 4, rz[4], stream)


#: Points per block of :func:`_radial_blocks_py`: one thread a block of one scenario's points,
#: which the innermost loop runs through for one source at a time (measured on a scoring chunk,
#: one charge over ground, 64 scenarios × 136 points: 3x faster than point by point).
_M_BLOCK = 64
#: (scenario, point) pairs per block of :func:`_radial_points_py`: one thread a block.
_SM_BLOCK = 64
#: Sources up to which :func:`_radial_blocks_py` runs; with more, a point's Jacobian row is
#: long, and :func:`_radial_points_py` writes it in order, point after point (measured: with
#: 500 sources the blocks wrote at 0.3-0.4 of the stream bandwidth, the points at 0.8-1.1).
FEW_SOURCES = 16
#: The kind a copy of the loops is compiled for, and whether it adds images (see
#: :func:`_loop_for`): globals, so that the compiler sees constants and drops the branches
#: that copy never takes (measured: 1.5x faster with many sources in free space).
_KIND = -1
_MIRRORED = False

_LOOP_NOTES = """
    ``ground_z`` (m) is read by the copies with images only (see :func:`_loop_for`): each
    source's mirror image in the plane z = ground_z is added with it and folded into the
    source's Jacobian columns (see :func:`_source_terms`); the field adds real + image,
    source after source.

    ``k_coulomb`` is an argument, not the global: numba would freeze a global into the machine
    code it caches, and keep it when scipy's CODATA constants change. Each point is summed by
    one thread in source order, so the result does not depend on the number of threads, nor
    on which of the two loops ran.
    Returns the flat index s·M + m of the first (scenario, point) on a point charge, else −1.
"""


def _radial_blocks_py(k_coulomb, params, pts, ground_z, E, jac, want_jac, stream):
    """Add the field of every source to ``E`` (S, M, 3) and write ``jac`` (S, M, 3, C) in its
    first N·P columns, source n's parameter j in column n·P + j: source by source over blocks
    of one scenario's points, for few sources (``stream`` is ignored: the stores of a block
    are strided)."""
    kind = _KIND
    S, N, P = params.shape
    M = pts.shape[0]
    mirrored = _MIRRORED
    per_s = (M + _M_BLOCK - 1) // _M_BLOCK
    n_blocks = S * per_s
    first = np.full(n_blocks, -1, dtype=np.int64)
    for blk in numba.prange(n_blocks):
        s = blk // per_s
        m0 = (blk - s * per_s) * _M_BLOCK
        m1 = min(M, m0 + _M_BLOCK)
        closest = np.inf
        for n in range(N):
            q, cx, cy, cz = params[s, n, 0], params[s, n, 1], params[s, n, 2], params[s, n, 3]
            size = params[s, n, 4] if P > 4 else 0.0
            zi = 2.0 * ground_z - cz  # the image's height (NaN in free space)
            for m in range(m0, m1):
                dx, dy = pts[m, 0] - cx, pts[m, 1] - cy
                head, rx, ry, rz = _source_terms(
                    kind, k_coulomb, q, size, dx, dy, pts[m, 2] - cz, pts[m, 2] - zi, mirrored
                )
                closest = min(closest, head[0])
                E[s, m, 0] += head[1]
                E[s, m, 1] += head[2]
                E[s, m, 2] += head[3]
                if want_jac:
                    _store(jac, s, m, n * P, P, (rx, ry, rz), False)
        if kind == _RADIAL_POINT and closest < _ON_POINT_M2:
            first[blk] = s * M + _first_on_point(params[s], pts, m0, m1, ground_z)
    for blk in range(n_blocks):
        if first[blk] >= 0:
            return first[blk]
    return -1


def _radial_points_py(k_coulomb, params, pts, ground_z, E, jac, want_jac, stream):
    """As :func:`_radial_blocks_py`, point after point, every source for each: for many
    sources. Each point's Jacobian rows are written in order, with non-temporal stores when
    ``stream`` (a large output: see :data:`STREAM_MIN_BYTES`)."""
    kind = _KIND
    S, N, P = params.shape
    M = pts.shape[0]
    mirrored = _MIRRORED
    n_blocks = (S * M + _SM_BLOCK - 1) // _SM_BLOCK
    first = np.full(n_blocks, -1, dtype=np.int64)
    for blk in numba.prange(n_blocks):
        for sm in range(blk * _SM_BLOCK, min(S * M, (blk + 1) * _SM_BLOCK)):
            s = sm // M
            m = sm - s * M
            px, py, pz = pts[m, 0], pts[m, 1], pts[m, 2]
            fx = fy = fz = 0.0
            closest = np.inf
            for n in range(N):
                cz = params[s, n, 3]
                head, rx, ry, rz = _source_terms(
                    kind,
                    k_coulomb,
                    params[s, n, 0],
                    params[s, n, 4] if P > 4 else 0.0,
                    px - params[s, n, 1],
                    py - params[s, n, 2],
                    pz - cz,
                    pz - (2.0 * ground_z - cz),
                    mirrored,
                )
                closest = min(closest, head[0])
                fx += head[1]
                fy += head[2]
                fz += head[3]
                if want_jac:
                    _store(jac, s, m, n * P, P, (rx, ry, rz), stream)
            E[s, m, 0] += fx
            E[s, m, 1] += fy
            E[s, m, 2] += fz
            if kind == _RADIAL_POINT and closest < _ON_POINT_M2 and first[blk] < 0:
                first[blk] = sm
        if stream:
            _store_fence()
    for blk in range(n_blocks):
        if first[blk] >= 0:
            return first[blk]
    return -1


_radial_blocks_py.__doc__ += _LOOP_NOTES
_radial_points_py.__doc__ += _LOOP_NOTES


def _loop_for(fn, kind: int, mirrored: bool, parallel: bool):
    """A compiled copy of loop ``fn`` for one kind, with or without images (``_KIND`` and
    ``_MIRRORED`` constants in its own globals), on one core or on every core. numba caches
    compiled code by the function's name: each copy has its own."""
    name = (
        f"{fn.__name__.removesuffix('_py')}_{kind}{'_mirrored' if mirrored else ''}"
        f"{'_parallel' if parallel else ''}"
    )
    copy = types.FunctionType(
        fn.__code__, {**fn.__globals__, "_KIND": kind, "_MIRRORED": mirrored}, name
    )
    copy.__qualname__ = name
    copy.__doc__ = fn.__doc__
    return _jit(parallel=True)(copy) if parallel else _jit(copy)


_KINDS = (_RADIAL_POINT, _RADIAL_BALL, _RADIAL_GAUSSIAN)
#: (few sources?, with images?, on every core?) -> kind -> compiled loop (each compiled on
#: its first call); every core for large calls only (see :data:`PARALLEL_MIN`).
_radial_loops = {
    (few, mirrored, par): {k: _loop_for(fn, k, mirrored, par) for k in _KINDS}
    for few, fn in ((True, _radial_blocks_py), (False, _radial_points_py))
    for mirrored in (False, True)
    for par in (False, True)
}
#: Scenarios × points × source terms (images count) from which a call runs the loop on every
#: core: below it the threads' start costs more than they save, and a small call (a dask
#: worker's block, a budget's helper process) keeps to its own core.
PARALLEL_MIN = 1_000_000
#: Jacobian bytes from which the many-source loop writes with non-temporal stores: an output
#: this large leaves the caches before anyone reads it (measured on the 96 MB of
#: benchmarks/forward.py: 13.3 → 9.9 ms; a plain fill of it, 2x faster).
STREAM_MIN_BYTES = 32 << 20

_NO_JAC = np.empty((1, 1, 1, 1))


def _radial_kernel(kind: int, name: str, what: str = ""):
    """The kernel of one radial kind, around the compiled loop. The loop sees only writable
    C-ordered float64 arrays and Python scalars, so one compiled version serves every call (a
    read-only, strided or float32 array would each cost a compilation of its own); an ``out``
    of another layout gets the result through a temporary array.

    Beyond the arguments every kernel takes, ``out`` may also be ``(S, M, 3, C)`` with
    C ≥ N·P: the Jacobian then fills its first N·P columns (source n's parameter j in column
    n·P + j) and the others are left as they are; and ``ground_z`` (m) adds each source's
    mirror image in that grounded plane with its Jacobian folded into the source's columns."""

    def kernel(params, pts, geom, want_jac, out=None, ground_z=None):
        S, N, P = params.shape
        M = pts.shape[0]
        E = np.zeros((S, M, 3))
        if out is not None and out.ndim == 4:
            if out.shape[:3] != (S, M, 3) or out.shape[3] < N * P:
                raise ValueError(
                    f"`out` must have shape {(S, M, 3)} + (at least {N * P},); got {out.shape}."
                )
            jac = out if want_jac else None
        else:
            jac = _jac_buffer((S, M, 3, N, P), want_jac, out)
        target = view = None
        if jac is not None:
            view = jac if jac.ndim == 4 or not _plain(jac) else jac.reshape(S, M, 3, N * P)
            target = view if _plain(view) else np.empty((S, M, 3, N * P))
        params = np.require(params, float, ["C", "W"])
        pts = np.require(pts, float, ["C", "W"])
        n_terms = N if ground_z is None else 2 * N
        loops = _radial_loops[
            N <= FEW_SOURCES, ground_z is not None, S * M * n_terms >= PARALLEL_MIN
        ]
        singular = _call_compiled(
            loops[kind],
            K_COULOMB,
            params,
            pts,
            math.nan if ground_z is None else float(ground_z),
            E,
            _NO_JAC if jac is None else target,
            bool(want_jac),
            target is not None and target.nbytes >= STREAM_MIN_BYTES,
        )
        if singular >= 0:
            _raise_on_charge(singular % M, pts[singular % M], what)
        if target is not view:
            if jac.ndim == 4:
                jac[..., : N * P] = target
            else:
                jac[...] = target.reshape(jac.shape)
        return E, jac

    kernel.__name__ = kernel.__qualname__ = name
    return kernel


_point_kernel = _radial_kernel(_RADIAL_POINT, "_point_kernel", "point charge")
_sphere_kernel = _radial_kernel(_RADIAL_BALL, "_sphere_kernel")
_gaussian_kernel = _radial_kernel(_RADIAL_GAUSSIAN, "_gaussian_kernel")
