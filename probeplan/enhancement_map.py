"""The enhancement map: over the mounting regions, the reading with the structures over the
reading without them (the undisturbed field), nominal scenario, as a colour map.

The numbers are :func:`probeplan.problem._enhancement`'s, the per-meter enhancement of the
summary, evaluated at every grid point at once; the drawing reuses :mod:`probeplan.plots`'
figure, map furniture and safe writer.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.colors import LogNorm, Normalize
from matplotlib.ticker import FixedFormatter, FixedLocator, NullFormatter

from .figtext import colorbar_ticks, meter_names, plain
from .figtext import title as _title
from .plots import (
    SIGN_CAPTION,
    _check_path,
    _draw_probes,
    _draw_structures,
    _figure,
    _finish_map,
    _legend_and_caption,
    _save,
    _scale,
)
from .problem import _enhancement
from .resulttypes import probe_names

#: Points of the map (about): the regions' candidate lattice.
POINTS = 600
#: A range of enhancements wider than this factor either side of 1 is drawn on a log scale.
LOG_FACTOR = 3.0
#: An installed meter is "on a structure" within this many metres of its box, or this
#: fraction of the box's largest side, whichever is more.
ON_STRUCTURE_M = 1.0
ON_STRUCTURE_FRACTION = 0.05
_MARK = {"marker": "D", "ms": 7, "mfc": "white", "mec": "black", "mew": 1.0, "ls": ""}


def enhancement_points(config, target: int = POINTS) -> np.ndarray:
    """``(n_points, 3) float``, m: the regions' own candidate lattice at their mounting heights
    (outside keep-outs and structures), about ``target`` points."""
    return np.asarray(config.site().candidate_grid(target=target).positions_m, dtype=float)


def enhancement_at(problem, points_m, axes) -> np.ndarray | None:
    """Reading with the structures over the undisturbed reading at many points.

    Parameters
    ----------
    problem : probeplan.problem.Problem
    points_m : (n_points, 3) float
        Where, m.
    axes : (n_axes, 3) float
        The meter's sensing axes, the same at every point.

    Returns
    -------
    (n_points,) float or None
        ``‖axes · E‖`` with over without the structures (1 where the latter is 0), the nominal
        scenario; None without structures.
    """
    pts = np.asarray(points_m, dtype=float).reshape(-1, 3)
    ax3 = np.broadcast_to(np.asarray(axes, dtype=float), (pts.shape[0], *np.shape(axes)))
    return _enhancement(problem, pts, ax3)


def structure_marks(problem, score, names) -> list[tuple[int, str, np.ndarray, np.ndarray]]:
    """The mounting points on structures, with their enhancement: every structure region's
    points (the new meters' axes), and installed meters on a structure (their own axes, the
    summary's value).

    Parameters
    ----------
    problem : probeplan.problem.Problem
    score : probeplan.problem.Score
    names : sequence of n_probes str
        Meter names, installed first.

    Returns
    -------
    list of (structure, label, points_m (k, 3) float, enhancement (k,) float)
        ``structure`` the index of the structure they are on; one entry per structure region,
        then per installed meter on a structure.
    """
    config = problem.config
    conductors = problem.scene.structures.conductors
    boxes = [t.reshape(-1, 3) for t in problem.scene.structures.surfaces]
    marks = []
    new_axes = np.asarray(score.axes)[-1]
    for k, region in enumerate(config.regions):
        if region.kind != "structure":
            continue
        on = getattr(region, "structure", "")
        pts = np.asarray(region.outline_m(), dtype=float).reshape(-1, 3)
        which = next((i for i, c in enumerate(conductors) if c.name and c.name == on), None)
        if which is None:  # (named by index, or unnamed): the structure its points are near
            which = next((i for i, b in enumerate(boxes) if _near_box(pts[0], b)), 0)
        label = region.name or f"region {k}"
        marks.append((which, label, pts, enhancement_at(problem, pts, new_axes)))
    pos = np.asarray(score.positions_m, dtype=float).reshape(-1, 3)
    n_inst = int(np.count_nonzero(score.installed))
    for i in range(n_inst if score.enhancement is not None else 0):
        which = next((j for j, b in enumerate(boxes) if _near_box(pos[i], b)), None)
        if which is not None:
            marks.append((which, f"meter {names[i]}", pos[i][None], score.enhancement[i : i + 1]))
    return marks


def _near_box(point_m: np.ndarray, vertices_m: np.ndarray) -> bool:
    lo, hi = vertices_m.min(axis=0), vertices_m.max(axis=0)
    margin = max(ON_STRUCTURE_M, ON_STRUCTURE_FRACTION * float(np.max(hi - lo)))
    gap = np.maximum(np.maximum(lo - point_m, point_m - hi), 0.0)
    return bool(np.linalg.norm(gap) <= margin)


def _draw_marks(ax, marks, scale: float) -> list:
    """The mounting points on structures as white diamonds; one label per structure, a line
    per region or meter with its enhancement (a region of several points: its range)."""
    handles = []
    for which in dict.fromkeys(m[0] for m in marks):  # structures in order of appearance
        lines, anchor = [], None
        for _, label, pts, value in (m for m in marks if m[0] == which):
            (h,) = ax.plot(pts[:, 0] / scale, pts[:, 1] / scale, zorder=7, **_MARK)
            handles = handles or [h]
            lo, hi = float(value.min()), float(value.max())
            text = f"×{hi:.3g}" if np.isclose(lo, hi, rtol=5e-3) else f"×{lo:.3g} to ×{hi:.3g}"
            lines.append(f"{plain(label)}: {text}")
            anchor = pts[int(np.argmax(value))] if anchor is None else anchor
        ax.annotate(
            "enhancement\n" + "\n".join(lines),
            (anchor[0] / scale, anchor[1] / scale),
            xytext=(10, -18),
            textcoords="offset points",
            fontsize=8,
            va="top",
            bbox={"boxstyle": "round,pad=0.3", "fc": "white", "ec": "0.3", "lw": 0.6},
            arrowprops={"arrowstyle": "-", "color": "0.3", "lw": 0.6},
            zorder=9,
        )
    if handles:
        handles[0].set_label("mounting point on a structure")
    return handles


def enhancement_map(problem, score, path, names=None) -> Path:
    """Draw the enhancement over the mounting regions with structures, regions and meters.

    Parameters
    ----------
    problem : probeplan.problem.Problem
        With structures (``problem.scene.structures`` not None).
    score : probeplan.problem.Score
        The layout (``positions_m`` installed first, ``installed``, ``axes``).
    path : str or path-like
        ``.png`` or ``.svg``.
    names : sequence of n_probes str or None

    Returns
    -------
    Path
    """
    path, fmt = _check_path(path)
    config = problem.config
    pts = enhancement_points(config)
    pos = np.asarray(score.positions_m, dtype=float).reshape(-1, 3)
    installed = np.asarray(score.installed, dtype=bool).reshape(-1)
    value = enhancement_at(problem, pts, np.asarray(score.axes)[-1])
    if names is None:
        names = meter_names(config, None, installed)
    marks = structure_marks(problem, score, names)
    xy = np.concatenate([pts[:, :2], pos[:, :2], *(m[2][:, :2] for m in marks)])
    (x0, y0), (x1, y1) = xy.min(axis=0), xy.max(axis=0)
    pad = 0.06 * max(x1 - x0, y1 - y0, 1.0)
    x0, y0, x1, y1 = x0 - pad, y0 - pad, x1 + pad, y1 + pad
    scale, unit = _scale(x0, y0, x1, y1, config)

    fig, ax = _figure()
    lo, hi = float(value.min()), float(value.max())
    reach = max(hi, 1.0 / lo if lo > 0 else np.inf)
    log = lo > 0 and reach > LOG_FACTOR
    if log:  # a wide range: symmetric in log about 1
        norm = LogNorm(vmin=1.0 / reach, vmax=reach)
        ticks = colorbar_ticks(1.0 / reach, reach)
    else:
        d = max(abs(hi - 1.0), abs(1.0 - lo), 1e-3)
        norm = Normalize(vmin=1.0 - d, vmax=1.0 + d)
        ticks = np.array([1.0 - d, 1.0, 1.0 + d])
    # Enough decimals that 1 - d, 1 and 1 + d read apart ("0.999, 1.000, 1.001", not "1, 1").
    decimals = int(np.clip(np.ceil(-np.log10(min(d, 1.0))), 2, 6)) if not log else 0
    dots = ax.scatter(
        pts[:, 0] / scale, pts[:, 1] / scale, c=value, s=30, cmap="RdBu_r", norm=norm, lw=0
    )
    bar = fig.colorbar(dots, ax=ax, shrink=0.85)
    bar.set_label("enhancement: reading with the structures / undisturbed reading")
    bar.locator = FixedLocator(ticks)
    bar.formatter = FixedFormatter([f"{v:.3g}" if log else f"{v:.{decimals}f}" for v in ticks])
    bar.minorformatter = NullFormatter()
    _draw_structures(ax, config, scale, face="none", named=True)
    handles = _draw_probes(ax, pos, installed, scale, names) + _draw_marks(ax, marks, scale)
    _finish_map(ax, config, (x0, y0, x1, y1), scale, unit)
    _title(ax, config.title, "enhancement of the field by the structures")
    on_structures = (
        "; white diamonds: mounting points on structures, labelled with their own enhancement "
        "(new meters' axes; an installed meter's own)"
        if marks
        else ""
    )
    note = (
        "Nominal scenario; each dot a point of a mounting region at its height; structures "
        f"outlined in black (their shadows on the ground plan){on_structures}.\n" + SIGN_CAPTION
    )
    _legend_and_caption(fig, handles, note)
    return _save(fig, path, fmt)


def add_enhancement_map(paths, result, problem, folder, fmt: str = "png"):
    """Append ``enhancement_map.<fmt>`` in ``folder`` to ``paths`` (a
    :class:`~probeplan.plots.PlotFiles` from :func:`~probeplan.plots.plot_all`) when the
    result has structures; without them nothing is drawn and nothing said. Returns ``paths``."""
    if problem.scene.structures is not None:
        target = Path(folder) / f"enhancement_map.{fmt}"
        paths.append(enhancement_map(problem, result.score, target, names=probe_names(result)))
    return paths
