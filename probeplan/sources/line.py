"""The uniform finite segment: field and Jacobian in closed form, vectorised numpy.

V = kλ ln((r1 + r2 + L)/(r1 + r2 − L)) (e.g. Jackson, Classical Electrodynamics, problem 1.x;
Smythe, Static and Dynamic Electricity, §5.x), whose gradient is regular everywhere off the
segment, also on its extension.
"""

from __future__ import annotations

import numpy as np

from ._common import _blocks, _check_not_on_charge, _jac_buffer, _offsets
from .kinds import K_COULOMB


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
