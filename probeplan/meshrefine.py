"""The automatic mesh made finer near meters mounted on or close to a structure.

A meter ``d`` off a surface reads the charge of the panels within a few ``d`` of it; panels
much larger than ``d`` there misplace that charge (σ is constant on a panel) and, on a curved
body, misplace the surface itself by the chord's sagitta. So every panel is split into four
(edge midpoints, put back on the true surface where the body has one) until it is no larger
than ``FRACTION`` of its distance to every nearby meter. The wanted size then grows linearly
with the distance from the meter (a graded mesh): the panel count added near one meter is about
2π/FRACTION² · ln(coarse size / d) whatever the standoff, so it stays bounded.

The split leaves hanging vertices where a split panel meets an unsplit one. Piecewise-constant
collocation does not need a conforming mesh (each panel only carries its own σ), and the
hanging edges lie where the panels are already small beside their distance to the meter.

Imports only numpy.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

#: Largest panel edge near a meter, as a fraction of the distance from the panel's centroid to
#: the meter (measured on a 1 m sphere in a uniform field, meter 0.1 m above the pole: 0.25
#: brings the field within 1e-3 of Jackson's closed form; see tests/test_meshrefine.py).
FRACTION = 0.25
#: At most this many rounds of splitting (4⁸ panels from one coarse panel at most).
MAX_ROUNDS = 8
#: No round that would take one structure past this many panels (the LU grows as its cube:
#: ~4 s at 4,000 panels on 2 cores); with many meters on one structure the last rounds are
#: left out, and the mesh is finer near each meter than without them all the same.
MAX_PANELS = 6000


def refine_near(
    triangles_m: np.ndarray,
    meters_m: np.ndarray,
    project: Callable[[np.ndarray], np.ndarray] | None = None,
) -> np.ndarray:
    """Split panels until each is at most ``FRACTION`` × its distance to every meter.

    Parameters
    ----------
    triangles_m : (n_panels, 3, 3) float
        Oriented panels of one structure, m.
    meters_m : (n_meters, 3) float
        Meters on or near it, m (off the surface: a meter on a panel stops at ``MAX_ROUNDS``).
    project : callable or None
        ``project(mids (n, 3), ends_a (n, 3), ends_b (n, 3)) -> (n, 3)``: new vertices (the
        midpoints of the edges from ``ends_a`` to ``ends_b``) put on the body's true surface
        (curved bodies); ``None`` keeps them on the flat panel.

    Returns
    -------
    (n_refined, 3, 3) float
        The panels, orientation kept (unsplit ones first, in their order).
    """
    tris = np.asarray(triangles_m, dtype=float)
    meters = np.asarray(meters_m, dtype=float).reshape(-1, 3)
    if meters.shape[0] == 0 or tris.shape[0] == 0:
        return tris
    done = []
    for _ in range(MAX_ROUNDS):
        split = _too_big(tris, meters)
        kept = sum(len(t) for t in done) + tris.shape[0]
        if not split.any() or kept + 3 * int(split.sum()) > MAX_PANELS:
            break
        done.append(tris[~split])
        tris = _quarter(tris[split], project)
    return np.concatenate([*done, tris])


def _too_big(tris: np.ndarray, meters: np.ndarray) -> np.ndarray:
    """``(n_panels,) bool``: longest edge above ``FRACTION`` × the centroid's distance to the
    nearest meter (meters in blocks, so memory stays small with many of them)."""
    sizes = np.linalg.norm(np.roll(tris, -1, axis=1) - tris, axis=2).max(axis=1)
    centres = tris.mean(axis=1)
    nearest = np.full(tris.shape[0], np.inf)
    step = max(1, (1 << 20) // max(tris.shape[0], 1))
    for start in range(0, meters.shape[0], step):  # blocks of meters, not meters
        d = np.linalg.norm(centres[:, None, :] - meters[None, start : start + step], axis=2)
        nearest = np.minimum(nearest, d.min(axis=1))
    return sizes > FRACTION * nearest


def _quarter(tris: np.ndarray, project) -> np.ndarray:
    """Each panel as four, by its edge midpoints (put on the surface by ``project``)."""
    a, b, c = tris[:, 0], tris[:, 1], tris[:, 2]
    mids = np.stack([(a + b) / 2, (b + c) / 2, (c + a) / 2], axis=1)
    if project is not None:
        ends_a = np.stack([a, b, c], axis=1).reshape(-1, 3)
        ends_b = np.stack([b, c, a], axis=1).reshape(-1, 3)
        mids = project(mids.reshape(-1, 3), ends_a, ends_b).reshape(mids.shape)
    ab, bc, ca = mids[:, 0], mids[:, 1], mids[:, 2]
    out = np.stack(
        [
            np.stack([a, ab, ca], axis=1),
            np.stack([ab, b, bc], axis=1),
            np.stack([ca, bc, c], axis=1),
            np.stack([ab, bc, ca], axis=1),
        ],
        axis=1,
    )
    return out.reshape(-1, 3, 3)


def onto_ellipsoid(center_m: np.ndarray, semi_axes_m: np.ndarray, ground_z_m: float | None):
    """A ``project`` for :func:`refine_near`: a new vertex radially (in the body's scaled
    frame) onto the axis-aligned ellipsoid, or, on the cut by the ground plane (both ends on
    it), within the plane onto the cut's ellipse."""
    c = np.asarray(center_m, dtype=float)
    axes = np.asarray(semi_axes_m, dtype=float)

    def project(mids: np.ndarray, ends_a: np.ndarray, ends_b: np.ndarray) -> np.ndarray:
        rel = mids - c
        if ground_z_m is not None:
            tol = 1e-9 * float(axes.max())
            cut = (np.abs(ends_a[:, 2] - ground_z_m) <= tol) & (
                np.abs(ends_b[:, 2] - ground_z_m) <= tol
            )
            level = 1.0 - ((ground_z_m - c[2]) / axes[2]) ** 2
            rel_in = rel / axes
            rel_in[:, 2] = 0.0
            flat = np.linalg.norm(rel_in, axis=1) / np.sqrt(max(level, 0.0))
            rel[cut, :2] /= np.where(flat > 0, flat, 1.0)[cut, None]
        else:
            cut = np.zeros(len(mids), dtype=bool)
        scale = np.linalg.norm(rel / axes, axis=1)
        radial = ~cut & (scale > 0)
        rel[radial] /= scale[radial, None]
        return c + rel

    return project


def onto_cylinder(center_xy_m, radius_m: float):
    """A ``project`` for :func:`refine_near`: the midpoint of an edge whose two ends are on
    the wall (at least ``radius_m`` from the axis: the mesh widens its rings a little, by
    their panel count) goes back out to their mean distance from the axis, so the wall stays
    round; other (disc) midpoints stay flat."""
    cx, cy = float(center_xy_m[0]), float(center_xy_m[1])
    floor = (1.0 - 1e-9) * float(radius_m)

    def project(mids: np.ndarray, ends_a: np.ndarray, ends_b: np.ndarray) -> np.ndarray:
        out = mids.copy()
        ra = np.hypot(ends_a[:, 0] - cx, ends_a[:, 1] - cy)
        rb = np.hypot(ends_b[:, 0] - cx, ends_b[:, 1] - cy)
        rho = np.hypot(out[:, 0] - cx, out[:, 1] - cy)
        wall = (ra >= floor) & (rb >= floor) & (rho > 0)
        scale = np.where(wall, 0.5 * (ra + rb) / np.where(rho > 0, rho, 1.0), 1.0)
        out[:, 0] = cx + (out[:, 0] - cx) * scale
        out[:, 1] = cy + (out[:, 1] - cy) * scale
        return out

    return project


__all__ = ["FRACTION", "onto_cylinder", "onto_ellipsoid", "refine_near"]
