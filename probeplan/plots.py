"""Plots of a result: the site map, the coverage map and the budget curve (PNG or SVG).

Every figure is built on matplotlib's object-oriented :class:`~matplotlib.figure.Figure` and
saved by its Agg (PNG) or SVG renderer: no display, no pyplot state, safe in a batch job. Files
are written under a temporary name in the target folder and renamed, so a plot is never half
written.

* :func:`site_map` — mounting regions, keep-outs, installed and new meters, the charge(s) on
  the ground plan and the spread of the scenarios.
* :func:`coverage_grid` / :func:`coverage_map` — the 1-sigma horizontal location error of
  source 0 for a charge at each horizontal position (Cramér–Rao, batched over the grid).
* :func:`budget_curve` — cost against the criterion for every grade, the Pareto front and the
  target.
* :func:`plot_all` — the plots that apply to a result, and why any other was not drawn.

Symbols (our own): installed meters are blue squares, new meters orange triangles, charges
purple stars; mounting regions are light green, keep-outs red hatching. Meters and keep-outs
carry their names, and their heights when these differ (walls, masts); the words and numbers
are :mod:`probeplan.figtext`'s (rounded, escaped, ``$`` never read as mathematics).
"""

from __future__ import annotations

import textwrap
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import shapely
from matplotlib.colors import LogNorm
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Circle, Patch, Polygon
from matplotlib.ticker import FixedFormatter, FixedLocator, NullFormatter

from .figtext import colorbar_ticks as colorbar_ticks
from .figtext import decade_levels as _decade_levels
from .figtext import height_caption as _height_caption
from .figtext import label_keepout, label_meters, label_source, meter_names
from .figtext import level_label as _level_label
from .figtext import title as _title
from .fisher import CRITERIA, covariance, fisher_from_rows
from .probes import whitened_rows
from .problem import draw_scenarios
from .resulttypes import format_quantity, param_unit, probe_names
from .store.files import write_atomically

#: Output formats.
FORMATS: tuple[str, ...] = ("png", "svg")
#: Figure size in inches and raster resolution: a PNG is FIGSIZE_IN × DPI pixels.
FIGSIZE_IN: tuple[float, float] = (8.0, 6.5)
DPI: int = 120
#: A site at least this wide (m) is drawn in km.
KM_SPAN_M: float = 2000.0
#: Grid points of the coverage map per batch (keeps the Jacobian near a few MB).
_COVERAGE_BATCH = 2048

SIGN_CAPTION = (
    "Local frame, z up, ground plan (x, y). Fields: physics sign convention "
    "(E points away from positive charge)."
)

_REGION_FACE = "#d7ebcf"
_REGION_EDGE = "#5f8f4e"
_KEEPOUT_EDGE = "#b03a2e"
_INSTALLED = {"marker": "s", "color": "#2f5597", "ms": 8, "label": "installed meter"}
_NEW = {"marker": "^", "color": "#e07b00", "ms": 10, "label": "new meter (planned)"}
_SOURCE = "#6a2c8c"
_GRADE_STYLES = (
    ("o", "#1b7f79"),
    ("D", "#c2410c"),
    ("v", "#4338ca"),
    ("P", "#a16207"),
    ("X", "#be185d"),
    ("h", "#3f6212"),
)


# --------------------------------------------------------------------------------------------
# Coverage: the numbers behind the coverage map
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Coverage:
    """Location error of source 0 over a horizontal grid.

    Attributes
    ----------
    x_m : (n_x,) float
        Grid positions along x, m.
    y_m : (n_y,) float
        Grid positions along y, m.
    error_m : (n_y, n_x) float
        sqrt(C_xx + C_yy) of source 0 with its centre at (x, y), m; +inf where the layout
        cannot resolve the parameters there.
    z_m : float
        The (nominal) height of source 0's centre used throughout, m.
    charge_c : float
        Its (nominal) charge, C.
    """

    x_m: np.ndarray
    y_m: np.ndarray
    error_m: np.ndarray
    z_m: float
    charge_c: float


def coverage_grid(
    problem, positions_m, gain=None, resolution: int = 40, *, axes=None, grades=None
) -> Coverage:
    """1-sigma horizontal location error of source 0 at every point of a grid over the site
    and over every horizontal position the scenarios give source 0.

    Every other parameter keeps its nominal value (scenario 0): height, charge, size of source
    0, the other sources and the background. The bound is the same one :meth:`Problem.score`
    reports, for one scenario per grid point, computed for all grid points in a few batches.

    Parameters
    ----------
    problem : probeplan.problem.Problem
        Must estimate x and y of source 0.
    positions_m : (n_new, 3) float
        New probes (installed ones are added from the problem), m.
    gain : (n_new,) float or None
        Default: ``problem.gain_at(positions_m)``.
    resolution : int
        Grid points along each axis, 2 to 400.
    axes : (n_new, n_axes, 3) float or None
    grades : sequence of n_new str or None
        Each new meter's own axes and grade (see :meth:`Problem.meters`).

    Returns
    -------
    Coverage
    """
    names = problem.names
    if "s0.x_m" not in names or "s0.y_m" not in names:
        raise ValueError(
            "the coverage map needs the horizontal position of source 0 estimated; add "
            f'"x" and "y" to source[0].estimate (estimated now: {", ".join(names) or "none"}).'
        )
    if (
        isinstance(resolution, bool)
        or not isinstance(resolution, int | np.integer)
        or not 2 <= resolution <= 400
    ):
        raise ValueError(f"`resolution` must be an integer from 2 to 400; got {resolution!r}.")
    meters = problem.meters(positions_m, gain, axes, grades)
    scene = problem.scene
    base = problem.theta[0]
    cx, cy = (scene.param_names.index(n) for n in ("s0.x_m", "s0.y_m"))
    ix, iy = names.index("s0.x_m"), names.index("s0.y_m")
    # The map spans where the charge may be (the scenarios), not only where meters may go.
    spread = problem.theta[:, [cx, cy]]
    around = np.vstack([meters.positions_m[:, :2], spread])
    x0, y0, x1, y1 = _extent(problem.config, np.c_[around, np.zeros(len(around))], margin=0.05)
    xs = np.linspace(x0, x1, int(resolution))
    ys = np.linspace(y0, y1, int(resolution))
    gx, gy = np.meshgrid(xs, ys)
    theta = np.tile(base, (gx.size, 1))
    theta[:, cx] = gx.ravel()
    theta[:, cy] = gy.ravel()
    p = len(names)
    err = np.empty(gx.size)
    for start in range(0, gx.size, _COVERAGE_BATCH):
        sl = slice(start, min(start + _COVERAGE_BATCH, gx.size))
        with np.errstate(all="ignore"):
            e, jac = scene.evaluate(theta[sl], meters.positions_m, columns=problem.est_cols)
            rows, _ = whitened_rows(e, jac, meters.axes, meters.gain, meters)
            info = fisher_from_rows(rows.reshape(rows.shape[0], -1, p))
            bad = ~np.all(np.isfinite(info), axis=(-2, -1))
            info[bad] = 0.0
            cov, _ = covariance(info)
            err[sl] = np.sqrt(cov[:, ix, ix] + cov[:, iy, iy])
    err = np.where(np.isfinite(err), err, np.inf)
    return Coverage(
        x_m=xs,
        y_m=ys,
        error_m=err.reshape(gx.shape),
        z_m=float(base[scene.param_names.index("s0.z_m")]),
        charge_c=float(base[scene.param_names.index("s0.charge_c")]),
    )


# --------------------------------------------------------------------------------------------
# The figures
# --------------------------------------------------------------------------------------------


def site_map(config, result_or_score, path) -> Path:
    """Draw the site: regions, keep-outs, meters, the charges and the scenario spread.

    Parameters
    ----------
    config : probeplan.config.Config
    result_or_score : probeplan.result.Result or probeplan.problem.Score
        The layout to draw (``positions_m`` with installed probes first, ``installed`` flags).
    path : str or path-like
        Output file; its suffix (``.png`` or ``.svg``) chooses the format.

    Returns
    -------
    Path
        The file written.
    """
    path, fmt = _check_path(path)
    score = getattr(result_or_score, "score", result_or_score)
    pos = np.asarray(score.positions_m, dtype=float).reshape(-1, 3)
    installed = np.asarray(score.installed, dtype=bool).reshape(-1)
    names = meter_names(config, result_or_score, installed)
    x0, y0, x1, y1 = _extent(config, pos, margin=0.06)
    scale, unit = _scale(x0, y0, x1, y1, config)

    fig, ax = _figure()
    handles = []
    if _draw_regions(ax, config.regions, scale):
        handles.append(
            Patch(facecolor=_REGION_FACE, edgecolor=_REGION_EDGE, label="mounting region")
        )
    if _draw_keepouts(ax, config.keepouts, scale):
        handles.append(
            Patch(facecolor="none", edgecolor=_KEEPOUT_EDGE, hatch="xx", label="keep-out")
        )
    _draw_structures(ax, config, scale)
    spread = _scenario_xy(config, score)
    if spread is not None and len(spread) > 1:
        ax.plot(spread[:, 0] / scale, spread[:, 1] / scale, ".", color=_SOURCE, alpha=0.25, ms=4)
        handles.append(
            Line2D([], [], ls="", marker=".", color=_SOURCE, alpha=0.4, label="scenario spread")
        )
    _draw_sources(ax, config, scale)
    handles.append(
        Line2D([], [], ls="", marker="*", color=_SOURCE, ms=12, label="charge (nominal)")
    )
    handles += _draw_probes(ax, pos, installed, scale, names)
    _finish_map(ax, config, (x0, y0, x1, y1), scale, unit)
    _title(ax, config.title, f"site map: {int((~installed).sum())} new meter(s)")
    shadow = "Walls and 3-D keep-outs are drawn as their shadows on the ground plan."
    _legend_and_caption(fig, handles, f"{shadow}\n{_height_caption(pos)}{SIGN_CAPTION}")
    return _save(fig, path, fmt)


def coverage_map(
    problem, positions_m, gain, path, resolution: int = 40, *, axes=None, grades=None, names=None
) -> Path:
    """Draw the 1-sigma horizontal location error of source 0 over the site and the scenarios.

    Parameters
    ----------
    problem, positions_m, gain, resolution, axes, grades
        As in :func:`coverage_grid` (x and y of source 0 must be estimated).
    path : str or path-like
        Output file, ``.png`` or ``.svg``.
    names : sequence of n_probes str or None
        Meter names, installed first (default: the config's installed names, then ``new-k``).

    Returns
    -------
    Path
    """
    path, fmt = _check_path(path)
    fig = _coverage_figure(
        problem, positions_m, gain, resolution, axes=axes, grades=grades, names=names
    )
    return _save(fig, path, fmt)


def _coverage_figure(problem, positions_m, gain, resolution, *, axes, grades, names) -> Figure:
    cov = coverage_grid(problem, positions_m, gain, resolution, axes=axes, grades=grades)
    meters = problem.meters(positions_m, gain, axes, grades)
    config = problem.config
    scale, unit = _scale(cov.x_m[0], cov.y_m[0], cov.x_m[-1], cov.y_m[-1], config)

    fig, ax = _figure()
    ax.set_facecolor("0.8")  # unresolved grid points stay grey
    err = np.ma.masked_invalid(np.where(np.isfinite(cov.error_m), cov.error_m, np.nan))
    finite = err.compressed()
    if finite.size:
        lo, hi = float(finite.min()), float(finite.max())
        hi = hi if hi > lo else lo * 1.01 + 1e-12
        norm = LogNorm(vmin=lo, vmax=hi)
        mesh = ax.pcolormesh(
            cov.x_m / scale, cov.y_m / scale, err, norm=norm, cmap="viridis_r", shading="nearest"
        )
        bar = fig.colorbar(mesh, ax=ax, shrink=0.85)
        bar.set_label("1-σ horizontal location error of source 0, sqrt(C_xx + C_yy)")
        ticks = colorbar_ticks(lo, hi)
        bar.locator = FixedLocator(ticks)
        bar.formatter = FixedFormatter([format_quantity(v, "m") for v in ticks])
        bar.minorformatter = NullFormatter()
        levels = _decade_levels(lo, hi)
        if levels.size and finite.size > 3:
            cs = ax.contour(
                cov.x_m / scale,
                cov.y_m / scale,
                err,
                levels=levels,
                colors="white",
                linewidths=0.7,
                norm=norm,
            )
            ax.clabel(cs, fmt=_level_label, fontsize=7)
    _draw_keepouts(ax, config.keepouts, scale, fill=False)
    if names is None:
        names = meter_names(config, None, meters.installed)
    handles = _draw_probes(ax, meters.positions_m, meters.installed, scale, names)
    _finish_map(ax, config, (cov.x_m[0], cov.y_m[0], cov.x_m[-1], cov.y_m[-1]), scale, unit)
    _title(ax, config.title, "coverage: where a charge is located how well")
    grey = "grey: not resolvable" if finite.size else "grey: no point here is resolvable"
    note = (
        f"Source 0 at z = {format_quantity(cov.z_m, 'm')}, q = "
        f"{format_quantity(cov.charge_c, 'C')}, other parameters nominal; the map spans the "
        f"site and every scenario's source 0; {grey}.\n"
        f"{_height_caption(meters.positions_m)}{SIGN_CAPTION}"
    )
    _legend_and_caption(fig, handles, note)
    return fig


def budget_curve(budget_table, path, criterion: str, target: float | None) -> Path:
    """Draw cost against the criterion value for every grade, with the Pareto front.

    Parameters
    ----------
    budget_table : probeplan.result.BudgetTable
    path : str or path-like
        Output file, ``.png`` or ``.svg``.
    criterion : {"d", "location", "charge"}
    target : float or None
        The criterion target (a horizontal line), if any.

    Returns
    -------
    Path
    """
    path, fmt = _check_path(path)
    if criterion not in CRITERIA:
        raise ValueError(f"`criterion` must be one of {', '.join(CRITERIA)}; got {criterion!r}.")
    bt = budget_table
    cost = np.asarray(bt.cost, dtype=float)
    value = np.asarray(bt.value, dtype=float)
    count = np.asarray(bt.count)
    grade = np.asarray(bt.grade).astype(str)
    pareto = np.asarray(bt.pareto, dtype=bool)
    ok = np.isfinite(value)

    fig, ax = _figure()
    for k, name in enumerate(dict.fromkeys(grade.tolist())):
        marker, colour = _GRADE_STYLES[k % len(_GRADE_STYLES)]
        sel = np.nonzero((grade == name) & ok)[0]
        sel = sel[np.argsort(cost[sel], kind="stable")]
        ax.plot(cost[sel], value[sel], marker=marker, color=colour, label=f"grade {name}", ms=7)
        for i in sel:
            ax.annotate(
                f"{count[i]}",
                (cost[i], value[i]),
                textcoords="offset points",
                xytext=(5, 5),
                fontsize=7,
                color=colour,
            )
    front = np.nonzero(pareto & ok)[0]
    if front.size:
        ax.plot(
            cost[front],
            value[front],
            ls="",
            marker="o",
            ms=14,
            mfc="none",
            mec="black",
            mew=1.2,
            label="Pareto front (none cheaper and better)",
        )
    if target is not None and np.isfinite(target):
        ax.axhline(target, color="0.25", ls="--", lw=1.0, label=f"target {target:g}")
    if 0 <= bt.cheapest < cost.size and ok[bt.cheapest]:
        i = bt.cheapest
        ax.plot(
            cost[i],
            value[i],
            ls="",
            marker="*",
            ms=18,
            color="#f2c200",
            mec="black",
            mew=0.8,
            zorder=6,
            label="cheapest meeting the target",
        )
        ax.annotate(
            f"cheapest meeting the target:\n{count[i]} × {grade[i]}, cost {cost[i]:,.0f}",
            (cost[i], value[i]),
            textcoords="offset points",
            # Up and to the right, half transparent: the next options of a curve that falls
            # with cost lie down and to the right, and must stay visible.
            xytext=(30, 35),
            fontsize=8,
            arrowprops={"arrowstyle": "->", "color": "0.2"},
            bbox={"boxstyle": "round", "fc": "white", "ec": "0.6", "alpha": 0.85},
        )
    if criterion != "d" and ok.any():
        pos = value[ok & (value > 0)]
        if pos.size and pos.max() > 10 * pos.min():
            ax.set_yscale("log")
    ax.set_xlabel("cost of the new meters (user's currency)")
    ax.set_ylabel(_BUDGET_YLABEL[criterion])
    ax.set_title("budget: cost against the design criterion", fontsize=11)
    ax.grid(True, color="0.9")
    ax.legend(loc="best", fontsize=8, framealpha=0.85)
    n_bad = int((~ok).sum())
    caption = "Numbers beside the markers: meter count."
    if n_bad:
        caption += f" {n_bad} option(s) cannot resolve the parameters and are not drawn."
    fig.supxlabel(caption, fontsize=7, color="0.3")
    return _save(fig, path, fmt)


class PlotFiles(list):
    """The files :func:`plot_all` wrote; ``skipped``: ``(file name, why)`` of those not drawn."""

    def __init__(self, paths=()) -> None:
        super().__init__(paths)
        self.skipped: list[tuple[str, str]] = []


def plot_all(result, config, problem, folder, fmt: str = "png") -> PlotFiles:
    """Write every plot that applies to a result.

    Parameters
    ----------
    result : probeplan.result.Result
    config : probeplan.config.Config
        The config the result came from.
    problem : probeplan.problem.Problem
        Built from that config (its installed probes match the result's).
    folder : str or path-like
        Created if missing. Files: ``site_map.<fmt>``, ``coverage_map.<fmt>`` (when x and y of
        source 0 are estimated), ``budget_curve.<fmt>`` (when the result holds a budget),
        ``locate.<fmt>`` (when it holds fits of recorded readings, ``/locate``).
    fmt : {"png", "svg"}

    Returns
    -------
    PlotFiles
        The files written, in that order; ``.skipped`` says why a map was not drawn.
    """
    if fmt not in FORMATS:
        raise ValueError(f"`fmt` must be one of {', '.join(FORMATS)}; got {fmt!r}.")
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    score = result.score
    new = ~np.asarray(score.installed, dtype=bool)
    names = probe_names(result)
    out = PlotFiles([site_map(config, result, folder / f"site_map.{fmt}")])
    coverage = f"coverage_map.{fmt}"
    if "s0.x_m" in problem.names and "s0.y_m" in problem.names:
        axes, grades = score.new_meters()
        path = coverage_map(
            problem,
            score.positions_m[new],
            score.gain[new],
            folder / coverage,
            axes=axes,
            grades=grades,
            names=names,
        )
        out.append(path)
    else:
        estimated = ", ".join(problem.names) or "nothing"
        why = (
            "it shows the horizontal location error of source 0, which this config does not "
            f'estimate (it estimates {estimated}); add "x" and "y" to source[0].estimate.'
        )
        out.skipped.append((coverage, why))
    if result.budget is not None:
        out.append(
            budget_curve(
                result.budget,
                folder / f"budget_curve.{fmt}",
                config.design.criterion,
                result.budget.target,
            )
        )
    if getattr(result, "location", None) is not None:
        out.append(locate_plot(result.location, folder / f"locate.{fmt}"))
    return out


def locate_plot(location, path) -> Path:
    """Estimates of a :class:`~probeplan.locate.Location` against time: one panel each for
    charges (C), positions (km) and background (V/m), with ±1-sigma bands (steps not fitted
    left out), and a panel marking each meter's flagged readings. ``path``: ``.png`` or
    ``.svg``; returns the file written."""
    path, fmt = _check_path(path)
    loc = location
    units = [param_unit(n) for n in loc.names]
    kinds = (("charge (C)", "C", 1.0), ("position (km)", "m", 1e-3), ("bg. (V/m)", "V/m", 1.0))
    groups = [(label, [k for k, u in enumerate(units) if u == unit], s) for label, unit, s in kinds]
    groups = [g for g in groups if g[1]]
    flagged = np.flatnonzero(loc.flag_counts > 0)
    n_rows = len(groups) + 1
    fig = Figure(figsize=(FIGSIZE_IN[0], 2.0 * n_rows + 0.6), dpi=DPI, layout="constrained")
    axes = fig.subplots(n_rows, 1, sharex=True, squeeze=False)[:, 0]
    t, t_label = _locate_times(loc)
    ok = loc.converged & np.all(np.isfinite(loc.std), axis=1)
    for ax, (label, cols, scale) in zip(axes, groups, strict=False):
        for k in cols:
            est = np.where(loc.converged, loc.estimate[:, k] * scale, np.nan)
            sd = np.where(ok, loc.std[:, k] * scale, np.nan)
            (line,) = ax.plot(t, est, lw=1.0, label=loc.names[k])
            ax.fill_between(t, est - sd, est + sd, color=line.get_color(), alpha=0.25, lw=0)
        ax.set_ylabel(label, fontsize=8)
        ax.legend(fontsize=7, frameon=False, loc="upper left", ncols=min(4, len(cols)))
        ax.grid(True, lw=0.3, color="0.85")
    ax = axes[-1]
    if flagged.size:
        for row, i in enumerate(flagged):
            steps = np.flatnonzero(loc.outliers[:, i])
            ax.plot(t[steps], np.full(steps.size, row), "|", ms=8, color="tab:red")
        ax.set_yticks(range(flagged.size), [loc.meter_names[i] for i in flagged], fontsize=7)
        ax.set_ylim(-0.7, flagged.size - 0.3)
    else:
        ax.set_yticks([])
        ax.text(0.5, 0.5, "no reading flagged", transform=ax.transAxes, ha="center", va="center")
    ax.set_ylabel("flagged\nreadings", fontsize=8)
    ax.set_xlabel(t_label, fontsize=8)
    fig.suptitle("Estimates from recorded readings (bands: ±1 sigma)", fontsize=10)
    fig.supxlabel(
        "Fields: physics sign convention. The estimate is not a warning system and does not "
        "decide when to stop work outdoors.",
        fontsize=7,
        color="0.3",
    )
    return _save(fig, path, fmt)


def _locate_times(loc) -> tuple[np.ndarray, str]:
    """Time axis values and label: UTC date-times, or seconds from the first step."""
    if loc.time_is_utc:
        return np.round(loc.time_s * 1e6).astype("datetime64[us]"), "time (UTC)"
    return loc.time_s, "time (s)"


# --------------------------------------------------------------------------------------------
# Private helpers
# --------------------------------------------------------------------------------------------

_BUDGET_YLABEL = {
    "d": "log det J (larger is better)",
    "location": "1-σ location error of source 0 (m, smaller is better)",
    "charge": "relative 1-σ charge error of source 0 (smaller is better)",
}


def _figure():
    fig = Figure(figsize=FIGSIZE_IN, dpi=DPI, layout="constrained")
    fig.get_layout_engine().set(h_pad=0.25)
    return fig, fig.add_subplot()


def _legend_and_caption(fig: Figure, handles: list, caption: str) -> None:
    """Legend right of the axes, caption under them; both inside the constrained layout."""
    fig.legend(handles=handles, loc="outside right upper", fontsize=8, frameon=False)
    lines = [w for line in caption.split("\n") for w in textwrap.wrap(line, 120) or [""]]
    fig.supxlabel("\n".join(lines), fontsize=7, color="0.3")


def _check_path(path) -> tuple[Path, str]:
    path = Path(path)
    fmt = path.suffix.lower().lstrip(".")
    if fmt not in FORMATS:
        raise ValueError(
            f"plot file `{path}` must end in one of {', '.join('.' + f for f in FORMATS)}; "
            f"got {path.suffix or 'no suffix'!r}."
        )
    return path, fmt


def _save(fig: Figure, path: Path, fmt: str) -> Path:
    """Write the figure whole or not at all, replacing only a regular file (an earlier plot):
    a failure (read-only folder, full disk) is an InputError naming the file."""

    def write(tmp: Path) -> None:
        with open(tmp, "wb") as fh:
            fig.savefig(fh, format=fmt, dpi=DPI)

    return write_atomically(Path(path), write, "the plot", force=True, option="--folder")


def _xy_geometry(region, buffer_m: float = 0.0):
    """The region's shadow on the ground plan (shapely), grown by ``buffer_m``."""
    outline = region.outline_m()[:, :2]
    if region.kind in ("rectangle", "polygon"):
        poly = shapely.Polygon(outline)
        if poly.is_valid and poly.area > 1e-9 * max(region.measure, 1.0):
            geom = poly
        else:  # a vertical wall: its shadow is a line
            geom = shapely.LineString(np.vstack([outline, outline[:1]]))
    elif region.kind == "segment":
        geom = shapely.LineString(outline)
        if geom.length == 0.0:
            geom = shapely.Point(outline[0])
    else:
        geom = shapely.MultiPoint(outline)
    return geom.buffer(buffer_m) if buffer_m > 0 else geom


def _draw_geometry(ax, geom, scale: float, *, face, edge, hatch=None, lw=1.0, point_ms=7):
    if geom.is_empty:
        return
    kind = geom.geom_type
    if kind in ("MultiPolygon", "MultiLineString", "GeometryCollection"):
        for part in geom.geoms:
            _draw_geometry(
                ax, part, scale, face=face, edge=edge, hatch=hatch, lw=lw, point_ms=point_ms
            )
    elif kind == "Polygon":
        xy = np.asarray(geom.exterior.coords) / scale
        ax.add_patch(Polygon(xy, closed=True, facecolor=face, edgecolor=edge, hatch=hatch, lw=lw))
    elif kind in ("LineString", "LinearRing"):
        xy = np.asarray(geom.coords) / scale
        ax.plot(xy[:, 0], xy[:, 1], color=edge, lw=3 * lw, solid_capstyle="round")
    else:  # Point, MultiPoint
        xy = shapely.get_coordinates(geom) / scale
        ax.plot(xy[:, 0], xy[:, 1], ls="", marker="o", mfc=face, mec=edge, ms=point_ms)


def _draw_regions(ax, regions, scale: float) -> bool:
    for r in regions:
        _draw_geometry(ax, _xy_geometry(r), scale, face=_REGION_FACE, edge=_REGION_EDGE)
    return bool(regions)


def _draw_keepouts(ax, keepouts, scale: float, fill: bool = True) -> bool:
    for k, r in enumerate(keepouts):
        geom = _xy_geometry(r, r.buffer_m)
        _draw_geometry(
            ax,
            geom,
            scale,
            face="none",
            edge=_KEEPOUT_EDGE,
            hatch="xx" if fill else None,
            lw=1.0 if fill else 1.4,
        )
        if not geom.is_empty:
            xy = np.asarray(geom.representative_point().coords[0]) / scale
            label_keepout(ax, xy, getattr(r, "name", "") or f"keep-out {k}", _KEEPOUT_EDGE)
    return bool(keepouts)


def _draw_structures(ax, config, scale: float, face="0.55", named: bool = False) -> None:
    """Footprints (grey, as steel seen from above; a room: its walls only), named if asked."""
    for k, c in enumerate(getattr(config, "structures", ())):
        xy = c.triangles(config.ground_z_m)[..., :2].reshape(-1, 2)
        hull = shapely.MultiPoint(xy).convex_hull
        _draw_geometry(ax, hull, scale, face="none" if c.kind == "enclosure" else face, edge="k")
        if named:
            xy = np.asarray(hull.centroid.coords[0]) / scale
            label_keepout(ax, xy, getattr(c, "name", "") or f"structure {k}", "k")


def _draw_probes(ax, pos: np.ndarray, installed: np.ndarray, scale: float, names=None) -> list:
    """The meters as markers, each labelled with its name (and its height when they differ)."""
    handles = []
    if names is not None:
        label_meters(ax, pos, names, scale)
    for mask, style in ((installed, _INSTALLED), (~installed, _NEW)):
        if mask.any():
            xy = pos[mask, :2].T / scale
            (h,) = ax.plot(*xy, ls="", mec="black", mew=0.6, zorder=5, **style)
            handles.append(h)
    return handles


def _draw_sources(ax, config, scale: float) -> None:
    """Every source at its nominal place, with its name (``s{i}`` by default)."""
    for i, spec in enumerate(config.sources):
        src = spec.source
        c = np.asarray(src.center_m)
        if src.kind == "line":
            ends = np.array([src.start_m, src.end_m]) / scale
            ax.plot(ends[:, 0], ends[:, 1], color=_SOURCE, lw=2.5, alpha=0.8, zorder=4)
        size = getattr(src, "radius_m", None) or getattr(src, "sigma_m", None)
        if size:
            ax.add_patch(
                Circle(c[:2] / scale, size / scale, fill=False, ec=_SOURCE, ls="--", lw=1.0)
            )
        if src.kind == "grid":
            lo = (c[:2] - 0.5 * src.size_m[:2]) / scale
            w, h = src.size_m[:2] / scale
            ax.add_patch(
                Polygon(
                    [lo, lo + [w, 0], lo + [w, h], lo + [0, h]],
                    closed=True,
                    fill=False,
                    ec=_SOURCE,
                    ls="--",
                )
            )
        star = {"color": _SOURCE, "ms": 14, "mec": "white", "mew": 0.5, "zorder": 6}
        ax.plot(c[0] / scale, c[1] / scale, "*", **star)
        label_source(ax, c[:2] / scale, getattr(spec, "name", "") or f"s{i}", _SOURCE)


def _scenario_xy(config, score) -> np.ndarray | None:
    """(n_scenarios · n_sources, 2) horizontal centres of every source in every scenario."""
    names = tuple(score.names)
    cols = [(f"s{i}.x_m", f"s{i}.y_m") for i in range(len(config.sources))]
    if all(x in names and y in names for x, y in cols):
        th = np.asarray(score.theta)
        return np.concatenate([th[:, [names.index(x), names.index(y)]] for x, y in cols])
    from .forward import Scene

    scene = Scene(
        tuple(s.source for s in config.sources),
        config.ground_z_m,
        background=config.background is not None,
    )
    theta = draw_scenarios(config, scene, np.random.default_rng(config.seed))
    idx = [(scene.param_names.index(x), scene.param_names.index(y)) for x, y in cols]
    return np.concatenate([theta[:, list(ij)] for ij in idx])


def _extent(config, probes_m: np.ndarray, margin: float) -> tuple[float, float, float, float]:
    """Horizontal box around regions, keep-outs, probes and the nominal charges, m."""
    geoms = [_xy_geometry(r) for r in config.regions]
    geoms += [_xy_geometry(r, r.buffer_m) for r in config.keepouts]
    pts = [np.asarray(probes_m, dtype=float).reshape(-1, 3)[:, :2]]
    pts += [np.asarray(s.source.center_m)[None, :2] for s in config.sources]
    bounds = [g.bounds for g in geoms if not g.is_empty]
    allpts = np.concatenate(pts + [np.array(b).reshape(2, 2) for b in bounds])
    (x0, y0), (x1, y1) = allpts.min(axis=0), allpts.max(axis=0)
    span = max(x1 - x0, y1 - y0, 1.0)
    pad = margin * span
    return x0 - pad, y0 - pad, x1 + pad, y1 + pad


def _scale(x0, y0, x1, y1, config=None) -> tuple[float, str]:
    """Kilometres for wide sites and for every site on a map (a ``[frame]``), else metres."""
    on_map = getattr(config, "frame", None) is not None
    return (1000.0, "km") if on_map or max(x1 - x0, y1 - y0) >= KM_SPAN_M else (1.0, "m")


def _finish_map(ax, config, box_m, scale: float, unit: str) -> None:
    """Limits ``box_m`` = (x0, y0, x1, y1) in m, equal aspect, axis labels, map furniture."""
    ax.set_xlim(box_m[0] / scale, box_m[2] / scale)
    ax.set_ylim(box_m[1] / scale, box_m[3] / scale)
    ax.set_aspect("equal")
    _axis_labels(ax, config, unit)
    if getattr(config, "frame", None) is not None:
        _map_furniture(ax)


def _axis_labels(ax, config, unit: str) -> None:
    if getattr(config, "frame", None) is not None:
        ax.set_xlabel(f"east of the frame origin ({unit})")
        ax.set_ylabel(f"north of the frame origin ({unit})")
    else:
        ax.set_xlabel(f"x ({unit})")
        ax.set_ylabel(f"y ({unit})")


def _map_furniture(ax) -> None:
    """A scale bar and a north arrow (grid north of the frame: true north at its origin); the
    meters and keep-outs carry their names on every map (:func:`_draw_probes`,
    :func:`_draw_keepouts`)."""
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    lo, hi = ax.get_xlim()
    span = (hi - lo) / 5.0  # about a fifth of the width, rounded to 1, 2 or 5 × 10^k
    step = 10.0 ** np.floor(np.log10(span))
    length = step * max(m for m in (1.0, 2.0, 5.0) if m * step <= span)
    label = f"{length:g} km" if length >= 1.0 else f"{length * 1000:g} m"
    bar = AnchoredSizeBar(
        ax.transData,
        length,
        label,
        "lower left",
        pad=0.5,
        frameon=True,
        size_vertical=length / 40.0,
    )
    ax.add_artist(bar)
    ax.annotate(
        "N",
        xy=(0.95, 0.95),
        xytext=(0.95, 0.83),
        xycoords="axes fraction",
        ha="center",
        va="center",
        fontsize=10,
        fontweight="bold",
        arrowprops={"arrowstyle": "-|>", "color": "black", "lw": 1.5},
    )
