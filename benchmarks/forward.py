"""Forward-model benchmark: field + full parameter Jacobian against the memory bandwidth.

    python benchmarks/forward.py [--quick] [--json FILE]

The case (fictional numbers): 500 point charges in a storm-sized volume, 2,000 observation
points near the ground, one scenario, free space. ``Scene.evaluate`` returns the field
``(1, 2000, 3)`` and the full Jacobian ``(1, 2000, 3, 2000)`` (4 parameters per charge): about
96 MB of float64 written per call. The work per output number is small, so the natural yardstick
is how fast the machine can stream memory at all, measured in the same run.

Figures
-------
forward_bandwidth_ratio
    (bytes of field + Jacobian written per second by ``Scene.evaluate``) ÷ (bytes per second of
    the streaming kernel below). Best of the repeats for both. Target ≥ 0.25. Like the streaming
    kernel, which writes into an array allocated once, the forward model writes its Jacobian
    into a buffer reused between calls (``Scene.evaluate(..., out=buf)``), so both are measured
    in the steady state a scoring or planning loop runs in.
forward_fresh_bandwidth_ratio
    The same with a freshly allocated Jacobian on every call: the operating system then maps
    and zeroes 96 MB of new pages per call, which on this kind of machine costs about as long as
    writing them.
forward_naive_bandwidth_ratio
    The same ratio for a naive numpy version (broadcast the (points, sources, 3) offsets, build
    field and Jacobian with ``einsum``, then assemble the output), for comparison.
forward_stream_gb_per_s
    The streaming kernel ``c = a + 2·b`` over 20 M doubles, done in place without temporaries
    as ``np.multiply(b, 2, out=c); np.add(a, c, out=c)``, counted as 3 × 8 × 20 M bytes per run
    (each array once, as the classic "triad" counts it; the two ufuncs actually pass over ``c``
    twice, so this is the conservative, faster-looking reference and the lower ratio).
forward_gb_per_s, forward_naive_gb_per_s
    Output bytes per second of each version.
forward_seconds, forward_naive_seconds
    Best time per call.
forward_max_rel_diff_vs_naive
    Largest difference between the two versions' outputs, relative to the largest output
    magnitude of that column (a correctness check of the fast path).

The three kernels are timed alternately, repeat after repeat, so they see the same machine load.
Timings live here only; no test asserts a wall-clock time.
"""

from __future__ import annotations

import numpy as np
from _common import interleaved, standalone

import probeplan as pp
from probeplan.sources import K_COULOMB

N_POINTS = 2000
N_SOURCES = 500
STREAM_N = 20_000_000
STREAM_BYTES = 3 * 8 * STREAM_N


def _case(seed: int = 20240611):
    """500 point charges 4-9 km up over a 20 km square; 2,000 points 0-50 m above the ground."""
    rng = np.random.default_rng(seed)
    centres = np.c_[rng.uniform(-10e3, 10e3, (N_SOURCES, 2)), rng.uniform(4e3, 9e3, N_SOURCES)]
    charges = rng.uniform(-30.0, 10.0, N_SOURCES)
    points = np.c_[rng.uniform(-12e3, 12e3, (N_POINTS, 2)), rng.uniform(0.0, 50.0, N_POINTS)]
    scene = pp.Scene([pp.PointCharge(q, c) for q, c in zip(charges, centres, strict=True)])
    return scene, scene.nominal()[None, :], points, charges, centres


def naive_field_jacobian(charges: np.ndarray, centres: np.ndarray, points: np.ndarray):
    """Point charges the straightforward numpy way: whole (M, N, ...) arrays and einsum.

    Parameters
    ----------
    charges : (n_sources,) float, C
    centres : (n_sources, 3) float, m
    points : (n_points, 3) float, m

    Returns
    -------
    field : (n_points, 3) float, V/m
    jacobian : (n_points, 3, 4 n_sources) float; columns (q, x, y, z) per source
    """
    m, n = len(points), len(charges)
    d = points[:, None, :] - centres[None, :, :]  # (M, N, 3)
    r2 = np.einsum("mnk,mnk->mn", d, d)
    inv_r3 = r2**-1.5
    unit = K_COULOMB * d * inv_r3[..., None]  # dE/dq, (M, N, 3)
    field = np.einsum("mnk,n->mk", unit, charges)
    kq = K_COULOMB * charges[None, :, None, None]
    grad = kq * (
        np.eye(3) * inv_r3[..., None, None]
        - 3.0 * np.einsum("mni,mnj->mnij", d, d) * (inv_r3 / r2)[..., None, None]
    )  # dE_i/dx_j, (M, N, 3, 3)
    jac = np.empty((m, 3, n, 4))
    jac[..., 0] = unit.transpose(0, 2, 1)
    jac[..., 1:] = -grad.transpose(0, 2, 1, 3)  # moving the charge is minus moving the point
    return field, jac.reshape(m, 3, 4 * n)


def _stream(a: np.ndarray, b: np.ndarray, c: np.ndarray) -> None:
    np.multiply(b, 2.0, out=c)
    np.add(a, c, out=c)


def run(quick: bool = False) -> dict:
    """Measure the figures; ``quick`` takes fewer repeats of the same case.

    Returns
    -------
    dict
        Flat figures, plus ``_notes`` (figure → short text) for the table.
    """
    repeats = 5 if quick else 15
    scene, theta, points, charges, centres = _case()

    # Correctness first: both versions must agree before their speeds mean anything.
    e, jac = scene.evaluate(theta, points)
    e_naive, jac_naive = naive_field_jacobian(charges, centres, points)
    col_scale = np.abs(jac_naive).max(axis=(0, 1))
    max_rel = max(
        float(np.max(np.abs(e[0] - e_naive)) / np.abs(e_naive).max()),
        float(np.max(np.abs(jac[0] - jac_naive) / col_scale)),
    )
    out_bytes = e.nbytes + jac.nbytes
    del e, jac, e_naive, jac_naive

    a = np.full(STREAM_N, 1.0)
    b = np.full(STREAM_N, 2.0)
    c = np.empty(STREAM_N)
    _stream(a, b, c)  # touch every page once before timing

    buf = np.empty((1, N_POINTS, 3, 4 * N_SOURCES))
    scene.evaluate(theta, points, out=buf)  # touch every page once before timing
    times = interleaved(
        {
            "stream": lambda: _stream(a, b, c),
            "forward": lambda: scene.evaluate(theta, points, out=buf),
            "fresh": lambda: scene.evaluate(theta, points),
            "naive": lambda: naive_field_jacobian(charges, centres, points),
        },
        repeats,
    )
    t_stream, t_fwd, t_fresh, t_naive = times.values()

    stream_bps = STREAM_BYTES / min(t_stream)
    fwd_bps = out_bytes / min(t_fwd)
    fresh_bps = out_bytes / min(t_fresh)
    naive_bps = out_bytes / min(t_naive)
    med = {k: float(np.median(v)) for k, v in (("s", t_stream), ("f", t_fwd), ("n", t_naive))}
    return {
        "forward_bandwidth_ratio": round(fwd_bps / stream_bps, 4),
        "forward_fresh_bandwidth_ratio": round(fresh_bps / stream_bps, 4),
        "forward_naive_bandwidth_ratio": round(naive_bps / stream_bps, 4),
        "forward_gb_per_s": round(fwd_bps / 1e9, 3),
        "forward_naive_gb_per_s": round(naive_bps / 1e9, 3),
        "forward_stream_gb_per_s": round(stream_bps / 1e9, 3),
        "forward_seconds": round(min(t_fwd), 5),
        "forward_naive_seconds": round(min(t_naive), 5),
        "forward_output_mb": round(out_bytes / 1e6, 3),
        "forward_max_rel_diff_vs_naive": max_rel,
        "_notes": {
            "forward_bandwidth_ratio": (
                f"Scene.evaluate(out=reused), {N_POINTS:,} points × {N_SOURCES} point charges, "
                f"field + Jacobian; best of {repeats}; median ratio "
                f"{(out_bytes / med['f']) / (STREAM_BYTES / med['s']):.3f}"
            ),
            "forward_fresh_bandwidth_ratio": "the same, a new 96 MB Jacobian every call",
            "forward_naive_bandwidth_ratio": (
                f"broadcast + einsum; median ratio "
                f"{(out_bytes / med['n']) / (STREAM_BYTES / med['s']):.3f}"
            ),
            "forward_stream_gb_per_s": (
                "c = a + 2·b in place (np.multiply(b, 2, out=c); np.add(a, c, out=c)), "
                "20 M doubles, 3 × 8 × 20 M bytes counted per run"
            ),
            "forward_max_rel_diff_vs_naive": "per Jacobian column, relative to its largest entry",
        },
    }


if __name__ == "__main__":
    standalone("forward", run)
