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

from .figtext import colorbar_ticks, meter_names
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
    xy = np.concatenate([pts[:, :2], pos[:, :2]])
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
    if names is None:
        names = meter_names(config, None, installed)
    handles = _draw_probes(ax, pos, installed, scale, names)
    _finish_map(ax, config, (x0, y0, x1, y1), scale, unit)
    _title(ax, config.title, "enhancement of the field by the structures")
    note = (
        "Nominal scenario; each dot a point of a mounting region at its height; structures "
        "outlined in black (their shadows on the ground plan).\n" + SIGN_CAPTION
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
