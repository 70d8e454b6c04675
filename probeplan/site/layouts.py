"""Candidate lattices and layouts over a site: what the search starts from and compares against.

Map of this module:

1. :class:`Candidates` and :func:`candidate_grid` — a lattice over every region at a given or
   automatic spacing (:func:`auto_spacing`), minus the keep-outs and the installed probes.
2. :func:`random_layouts` — uniform random layouts that keep the rules, for baselines and
   starts; :func:`region_weights` decides each region's share.
3. :func:`regular_layout` — the layout an engineer would draw by hand.

Each function takes a :class:`~.rules.Site` and asks it the rules (allowed positions, spacing,
feasibility); ``Site`` offers them as methods too. Units: metres; positions are ``(n, 3)``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from ._common import SPACING_RTOL, positive_int, spacing
from ._pointsets import first_fit, greedy_spread

if TYPE_CHECKING:
    from .regions import Region
    from .rules import Site

# Candidate positions drawn per pending layout in the first round of random_layouts; the number
# doubles with each round a layout stays unplaced (crowded sites), up to the cap.
_DRAWS_FIRST_ROUND = 2
_DRAWS_MAX = 64


@dataclass(frozen=True, eq=False)
class Candidates:
    """A candidate lattice over a site.

    Attributes
    ----------
    positions_m : (n_candidates, 3) float
        Allowed candidate positions, m.
    region_index : (n_candidates,) int
        Index into ``Site.regions`` of the region each came from.
    gain : (n_candidates,) float
        The calibration factor of that region.
    spacing_m : float
        Lattice spacing used, m (0.0 when the site has only points regions).
    """

    positions_m: np.ndarray
    region_index: np.ndarray
    gain: np.ndarray
    spacing_m: float

    @property
    def n_candidates(self) -> int:
        return int(len(self.positions_m))


# --------------------------------------------------------------------------------------------
# Candidate lattice
# --------------------------------------------------------------------------------------------


def auto_spacing(regions: Sequence[Region], target: int) -> float:
    """Spacing at which the lattices of all regions hold about ``target`` points, m.

    Solves area / s² + length / s = target - points for s > 0 (2-D regions weighed by area,
    segments by length, points regions adding their points); 0.0 for points regions alone.
    """
    area = sum(r.measure for r in regions if r.dimension == 2)
    length = sum(r.measure for r in regions if r.dimension == 1)
    n_points = sum(r.measure for r in regions if r.dimension == 0)
    n_cont = sum(1 for r in regions if r.dimension > 0)
    if n_cont == 0:
        return 0.0
    t = max(target - n_points, n_cont)
    # A / s^2 + L / s = t, solved for s > 0.
    if area > 0.0:
        return (length + math.sqrt(length**2 + 4.0 * t * area)) / (2.0 * t)
    return length / t


def region_weights(regions: Sequence[Region]) -> np.ndarray:
    """``(n_regions,)``: the share of each region in random draws and regular layouts.

    Proportional to the region's measure among regions of one dimension; across dimensions
    each region weighs as many points as its lattice holds at the automatic spacing, so a
    rectangle and a fence compete on the same footing.
    """
    s = auto_spacing(regions, 1500)
    w = np.array([r.measure / (s**r.dimension if r.dimension else 1.0) for r in regions])
    return w / w.sum()


def _lattice(site: Site, spacing_m: float) -> Candidates:
    parts, index, gain = [], [], []
    for i, r in enumerate(site.regions):
        pts = r.grid(spacing_m)
        parts.append(pts)
        index.append(np.full(len(pts), i))
        gain.append(np.full(len(pts), r.gain))
    pos = np.concatenate(parts)
    idx = np.concatenate(index)
    g = np.concatenate(gain)
    keep = site._keepout_free(pos) & site._clear_of_installed(pos)
    pos, idx, g = pos[keep], idx[keep], g[keep]
    if len(pos):
        _, first = np.unique(pos, axis=0, return_index=True)
        first = np.sort(first)
        pos, idx, g = pos[first], idx[first], g[first]
    return Candidates(pos, idx.astype(np.intp), g, float(spacing_m))


def candidate_grid(site: Site, spacing_m: float | None = None, target: int = 1500) -> Candidates:
    """A lattice of allowed candidate positions over all regions of ``site``.

    Parameters
    ----------
    site : Site
        The mounting rules.
    spacing_m : float, optional
        Lattice spacing, m. When omitted it is chosen so that the count is near ``target``
        (:func:`auto_spacing`), refined a few times for the share the keep-outs remove.
    target : int
        Desired number of candidates when ``spacing_m`` is omitted.

    Returns
    -------
    Candidates
        Lattice points of every region (``Region.grid``) outside every keep-out, and at least
        ``min_spacing_m`` from every installed probe; exact duplicates (overlapping regions)
        appear once, with the first region's index and gain.
    """
    if spacing_m is not None:
        cands = _lattice(site, spacing(spacing_m))
    else:
        target = positive_int(target, "target")
        s = auto_spacing(site.regions, target)
        if s == 0.0:
            cands = _lattice(site, 1.0)
            cands = Candidates(cands.positions_m, cands.region_index, cands.gain, 0.0)
        else:
            cont = [i for i, r in enumerate(site.regions) if r.dimension > 0]
            n_points = sum(r.measure for r in site.regions if r.dimension == 0)
            want = max(target - n_points, len(cont))
            cands = _lattice(site, s)
            for _ in range(4):  # the keep-outs may remove a share of the lattice
                n_cont = int(np.isin(cands.region_index, cont).sum())
                if n_cont == 0:
                    s *= 0.5
                else:
                    ratio = n_cont / want
                    if 0.8 <= ratio <= 1.25:
                        break
                    s *= math.sqrt(ratio)
                cands = _lattice(site, s)
    if cands.n_candidates == 0:
        raise ValueError(
            f"no candidate position is left at a lattice spacing of {cands.spacing_m:g} m: "
            "every lattice point lies in a keep-out or within `min_spacing_m` of an "
            "installed probe. Shrink the keep-outs, or give a finer `spacing_m`."
        )
    return cands


# --------------------------------------------------------------------------------------------
# Random layouts
# --------------------------------------------------------------------------------------------


def _draw(
    regions: Sequence[Region], n: int, rng: np.random.Generator, weights: np.ndarray
) -> np.ndarray:
    """``(n, 3)`` positions: a region by weight, then uniform in it."""
    which = rng.choice(len(regions), size=n, p=weights)
    out = np.empty((n, 3))
    for i, r in enumerate(regions):
        sel = which == i
        if sel.any():
            out[sel] = r.sample(int(sel.sum()), rng)
    return out


def random_layouts(
    site: Site,
    n_layouts: int,
    count: int,
    rng: np.random.Generator,
    max_tries: int = 50,
    keep_placed: bool = False,
) -> np.ndarray:
    """Random feasible layouts.

    Probe slots are filled one after another for all layouts at once: each round draws
    candidate positions for every layout still waiting (a region chosen by
    :func:`region_weights`, then uniform in it) and keeps the first one that lies outside the
    keep-outs and keeps the spacing to the probes already placed and to the installed ones.

    Parameters
    ----------
    site : Site
        The mounting rules.
    n_layouts : int
        Number of layouts, >= 1.
    count : int
        Probes per layout, >= 1.
    rng : numpy.random.Generator
        The source of randomness.
    max_tries : int
        Rounds allowed per slot before giving up.
    keep_placed : bool
        On a crowded site some layouts may leave a slot empty after ``max_tries`` rounds: when
        true they are dropped and the others returned (possibly none); when false that raises.

    Returns
    -------
    (n_placed, count, 3) float
        Every layout passes ``site.allowed`` and ``site.spacing_ok``; ``n_placed`` is
        ``n_layouts`` unless ``keep_placed`` dropped some.

    Raises
    ------
    ValueError
        When the rules cannot hold (``site.check_feasible``) or, unless ``keep_placed``, a slot
        stays empty after ``max_tries`` rounds.
    """
    n_layouts = positive_int(n_layouts, "n_layouts")
    count = positive_int(count, "count")
    max_tries = positive_int(max_tries, "max_tries")
    site.check_feasible(count)
    weights = region_weights(site.regions)
    out = np.zeros((n_layouts, count, 3))
    placed_ok = np.ones(n_layouts, dtype=bool)  # layouts whose every slot so far is filled
    for slot in range(count):
        pending = np.flatnonzero(placed_ok)
        if len(pending) == 0:
            break
        for attempt in range(max_tries):
            m, k = len(pending), min(_DRAWS_FIRST_ROUND << attempt, _DRAWS_MAX)
            cand = _draw(site.regions, m * k, rng, weights)
            ok = (site._keepout_free(cand) & site._clear_of_installed(cand)).reshape(m, k)
            cand = cand.reshape(m, k, 3)
            if slot:
                placed = out[pending, :slot]  # (m, slot, 3)
                d2 = np.sum((cand[:, :, None, :] - placed[:, None, :, :]) ** 2, axis=-1)
                ok &= np.all(site._far_enough(d2), axis=2)
            hit = ok.any(axis=1)
            first = np.argmax(ok, axis=1)
            out[pending[hit], slot] = cand[hit, first[hit]]
            pending = pending[~hit]
            if len(pending) == 0:
                break
        if len(pending) and keep_placed:
            placed_ok[pending] = False
        elif len(pending):
            raise ValueError(
                f"cannot place probe {slot + 1} of {count} in {len(pending)} of "
                f"{n_layouts} random layouts after {max_tries} rounds: the mounting rules "
                f"leave too little room (min_spacing_m={site.min_spacing_m:g} m, "
                f"{len(site.keepouts)} keep-outs, {len(site.installed_m)} installed probes). "
                "Lower `count` or `min_spacing_m`, or enlarge the mounting regions."
            )
    return out[placed_ok]


# --------------------------------------------------------------------------------------------
# The regular (hand-drawn) layout
# --------------------------------------------------------------------------------------------


def _largest_remainder(count: int, weights: np.ndarray) -> np.ndarray:
    """Split ``count`` in proportion to ``weights`` into integers summing to ``count``."""
    raw = count * weights
    base = np.floor(raw).astype(int)
    rest = count - int(base.sum())
    order = np.argsort(-(raw - base), kind="stable")
    base[order[:rest]] += 1
    return base


def regular_layout(site: Site, count: int) -> np.ndarray:
    """The layout an engineer would draw by hand.

    ``count`` is split among the regions in proportion to :func:`region_weights` (largest
    remainder), and each region spreads its share (``Region.spread``): in a 2-D region the
    probes sit at the centres of the cells of a near-square ``rows x cols`` lattice
    (``rows * cols >= count``, the last row centred) filling its bounding box; along a segment
    at the centres of ``count`` equal pieces; on points a spread-out choice of them. Probes that
    land outside the allowed area move to the nearest free candidate of :func:`candidate_grid`.
    When that still breaks the rules, a greedy max-min-distance choice from the candidate
    lattice replaces it.

    Parameters
    ----------
    site : Site
        The mounting rules.
    count : int
        Probes to place, >= 1.

    Returns
    -------
    (count, 3) float
        A layout that passes ``site.allowed`` and ``site.spacing_ok``.

    Raises
    ------
    ValueError
        When no feasible layout is found.
    """
    count = positive_int(count, "count")
    site.check_feasible(count)
    shares = _largest_remainder(count, region_weights(site.regions))
    layout = np.concatenate(
        [r.spread(k, site._sep) for r, k in zip(site.regions, shares, strict=True) if k]
    )
    cands = candidate_grid(site, target=max(1500, 50 * count))
    pushed = _push_allowed(site, layout, cands.positions_m)
    if pushed is not None:
        return pushed
    for target in (1500, 6000):
        pos = candidate_grid(site, target=max(target, 50 * count)).positions_m
        chosen = greedy_spread(pos, count, site.installed_m, site._sep)
        if chosen is None:
            # Max-min picks can strand room near capacity; a first-fit packing along the
            # long axis finds more room, and any subset of it keeps the spacing.
            packed = first_fit(pos, site.installed_m, site._sep)
            if len(packed) >= count:
                chosen = packed[greedy_spread(pos[packed], count, site.installed_m, 0.0)]
        if chosen is not None:
            return pos[chosen]
    raise ValueError(
        f"cannot place {count} probes at least {site.min_spacing_m:g} m apart on the "
        "candidate lattice: the mounting rules leave too little room. Lower `count` or "
        "`min_spacing_m`, or enlarge the mounting regions."
    )


def _push_allowed(site: Site, layout: np.ndarray, cands: np.ndarray) -> np.ndarray | None:
    """Move probes outside the allowed area to the nearest free candidate; None on failure."""
    layout = layout.copy()
    ok = site.allowed(layout)
    sep2 = (site._sep * (1.0 - SPACING_RTOL)) ** 2
    free = site._clear_of_installed(cands)
    for i in np.flatnonzero(~ok):  # only the few misplaced probes
        others = layout[ok]
        d2 = np.sum((cands - layout[i]) ** 2, axis=1)
        if len(others):
            near = np.sum((cands[:, None, :] - others[None]) ** 2, axis=-1) < sep2
            d2[near.any(axis=1)] = np.inf
        d2[~free] = np.inf
        j = int(np.argmin(d2)) if len(d2) else -1
        if j < 0 or not np.isfinite(d2[j]):
            return None
        layout[i] = cands[j]
        ok[i] = True
    if site.allowed(layout).all() and site.spacing_ok(layout[None])[0]:
        return layout
    return None
