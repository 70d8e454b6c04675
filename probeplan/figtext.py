"""The words and numbers on a figure: titles that fit, user text that is safe, heights,
colour-bar ticks and contour labels (every number through
:func:`~probeplan.resulttypes.format_quantity`). :mod:`probeplan.plots` draws with them."""

from __future__ import annotations

import textwrap

import numpy as np

from .prose import safe_text
from .resulttypes import format_quantity, probe_names

#: Characters of a title line (an 8-inch figure at 11 pt holds about 75).
TITLE_CHARS = 64


def plain(text: object) -> str:
    """User text for a figure: escaped (:func:`safe_text`) and never read as mathematics."""
    return safe_text(text).replace("$", r"\$")


def title(ax, title: str, what: str) -> None:
    """The config's title (at most two lines of :data:`TITLE_CHARS`) over what the plot is."""
    lines = textwrap.wrap(plain(title or "(untitled)"), TITLE_CHARS, max_lines=2, placeholder=" …")
    ax.set_title("\n".join([*lines, what]), fontsize=11)


def heights_differ(pos: np.ndarray) -> bool:
    z = pos[:, 2]
    return z.size > 1 and float(np.ptp(z)) > 1e-6 * max(1.0, float(np.max(np.abs(z))))


def height_caption(pos: np.ndarray) -> str:
    """A caption line on the meters' heights: each label has it when they differ."""
    if not pos.size:
        return ""
    if heights_differ(pos):
        return "Meters stand at different heights: each label gives its z.\n"
    return f"Every meter at z = {format_quantity(float(pos[0, 2]), 'm')}.\n"


def colorbar_ticks(lo: float, hi: float) -> np.ndarray:
    """At least two labelled ticks for a logarithmic colour bar from ``lo`` to ``hi`` (> 0).

    Values 1, 2, 5 × 10^k inside the range (decades only when there are many); where fewer
    than two fall inside it (a narrow range), its ends and their geometric mean.
    """
    if not (lo > 0 and hi > lo):
        return np.array([lo]) if lo > 0 else np.zeros(0)
    inside = decade_levels(lo, hi, ends=True)
    if inside.size >= 2:
        return inside
    return np.array([lo, float(np.sqrt(lo * hi)), hi])


def decade_levels(lo: float, hi: float, ends: bool = False) -> np.ndarray:
    """Levels 1, 2, 5 × 10^k in (lo, hi) ([lo, hi] with ``ends``); decades only if many."""
    if not (lo > 0 and hi > lo):
        return np.zeros(0)
    ks = np.arange(np.floor(np.log10(lo)), np.ceil(np.log10(hi)) + 1)
    levels = (np.array([1.0, 2.0, 5.0])[None, :] * 10.0 ** ks[:, None]).ravel()
    if ends:
        levels = levels[(levels >= lo) & (levels <= hi)]
    else:
        levels = levels[(levels > lo) & (levels < hi)]
    if levels.size > 6:  # a wide range: decades only, to keep the labels readable
        levels = levels[np.isclose(np.log10(levels) % 1.0, 0.0, atol=1e-9)]
    return levels


def level_label(v: float) -> str:
    return format_quantity(v, "m")


def meter_names(config, result, installed: np.ndarray) -> tuple[str, ...]:
    """Meter names, installed first: the result's, else the config's installed names, new-k."""
    if result is not None and hasattr(result, "config_text"):
        return probe_names(result)
    n_new = int(np.count_nonzero(~installed))
    inst = tuple(getattr(p, "name", f"installed-{k}") for k, p in enumerate(config.installed))
    return inst + tuple(f"new-{k}" for k in range(n_new))


def label_meters(ax, pos: np.ndarray, names, scale: float) -> None:
    """Each meter's name beside it, and its height when the meters' heights differ."""
    heights = heights_differ(pos)
    for k in range(pos.shape[0]):
        label = plain(names[k])
        if heights:
            label += f"\nz = {format_quantity(float(pos[k, 2]), 'm')}"
        xy = (pos[k, 0] / scale, pos[k, 1] / scale)
        ax.annotate(label, xy, textcoords="offset points", xytext=(6, 4), fontsize=7, zorder=8)


def label_keepout(ax, xy, name: str, color: str) -> None:
    """A keep-out's name at a point inside it, under the meters and the charges."""
    box = {"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none", "alpha": 0.6}
    ax.annotate(
        plain(name),
        tuple(xy),
        fontsize=7,
        color=color,
        ha="center",
        va="center",
        bbox=box,
        zorder=3,
    )


def label_source(ax, xy, name: str, color: str) -> None:
    """A source's name beside its star."""
    ax.annotate(
        plain(name),
        tuple(xy),
        xytext=(7, -10),
        textcoords="offset points",
        fontsize=7,
        color=color,
        zorder=8,
    )
