"""The mounting rules of a site: where a probe may go, and how far apart probes must be.

:class:`Site` gathers the mounting regions, the keep-outs, the minimum spacing and the probes
already installed, and answers vectorised questions: whether positions are allowed
(:meth:`Site.allowed`), whether layouts keep their spacing (:meth:`Site.spacing_ok`), why a
layout breaks the rules (:meth:`Site.violations`) and whether a count of probes can be placed at
all (:meth:`Site.check_feasible`, with clear messages). Candidate lattices and random and
regular layouts over a site live in :mod:`.layouts`; ``Site`` offers them as methods too.

Units: metres throughout. Shapes: ``n_points`` positions are ``(n_points, 3)`` arrays of
``(x, y, z)``; z is up.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import shapely

from ..resulttypes import format_quantity
from . import layouts
from ._common import (
    COINCIDENT_M,
    HEX_CELL_FACTOR,
    SPACING_RTOL,
    fmt,
    label,
    points,
    positive_int,
)
from ._pointsets import greedy_independent
from .layouts import Candidates
from .regions import Region

# Memory bound for broadcast distance blocks (elements of the largest temporary).
_BLOCK_ELEMENTS = 1 << 22


@dataclass(frozen=True, eq=False)
class Site:
    """Where probes may be mounted: regions, keep-outs, spacing and installed probes.

    Parameters
    ----------
    regions : tuple of Region
        Mounting regions, at least one; a position is allowed on any of them.
    keepouts : tuple of Region
        Zones where no probe may go (see :meth:`Region.contains` for their semantics).
    min_spacing_m : float
        Least 3-D distance between any two probes, installed ones included, m, >= 0.
    installed_m : (n_installed, 3) float
        Probes already mounted: fixed, counted in every spacing check, m.
    obstacles : object or None
        Conducting structures (:class:`probeplan.conductors.Obstacles`): a position inside one,
        or nearer its surface than its panel size, is not allowed (as in a keep-out).

    Notes
    -----
    Two probes never share a position: besides ``min_spacing_m``, every pair of probes must be
    more than :data:`COINCIDENT_M` apart (a mounting point holds one meter).
    """

    regions: tuple[Region, ...]
    keepouts: tuple[Region, ...] = ()
    min_spacing_m: float = 0.0
    installed_m: np.ndarray = field(default_factory=lambda: np.empty((0, 3)))
    obstacles: object = None

    def __post_init__(self) -> None:
        regions = tuple(self.regions) if not isinstance(self.regions, Region) else (self.regions,)
        keepouts = (
            tuple(self.keepouts) if not isinstance(self.keepouts, Region) else (self.keepouts,)
        )
        if not regions:
            raise ValueError("`regions` must hold at least one mounting region; got none.")
        for word, group in (("regions", regions), ("keepouts", keepouts)):
            for i, r in enumerate(group):
                if not isinstance(r, Region):
                    raise ValueError(f"`{word}[{i}]` must be a Region; got {type(r).__name__}.")
        for i, r in enumerate(regions):
            if r.buffer_m != 0.0:
                raise ValueError(
                    f"`buffer_m` applies to keep-outs only; {label('region', i, r)} has "
                    f"buffer_m={r.buffer_m:g}."
                )
        for k, r in enumerate(keepouts):
            if r.gain != 1.0:
                raise ValueError(
                    f"`gain` applies to mounting regions only; {label('keep-out', k, r)} has "
                    f"gain={r.gain:g}."
                )
        try:
            spacing = float(self.min_spacing_m)
        except (TypeError, ValueError):
            raise ValueError(
                f"`min_spacing_m` must be a number of metres >= 0; got {self.min_spacing_m!r}."
            ) from None
        if not math.isfinite(spacing) or spacing < 0.0:
            raise ValueError(f"`min_spacing_m` must be a number of metres >= 0; got {spacing}.")
        installed = np.array(self.installed_m, dtype=float)
        if installed.size == 0:
            installed = np.empty((0, 3))
        if installed.ndim != 2 or installed.shape[1] != 3:
            raise ValueError(
                f"`installed_m` must have shape (n_installed, 3) in metres; got {installed.shape}."
            )
        if not np.all(np.isfinite(installed)):
            raise ValueError("`installed_m` must be finite.")
        installed.setflags(write=False)
        object.__setattr__(self, "regions", regions)
        object.__setattr__(self, "keepouts", keepouts)
        object.__setattr__(self, "min_spacing_m", spacing)
        object.__setattr__(self, "installed_m", installed)

    # ---------------------------------------------------------------- rules, vectorised
    @property
    def _sep(self) -> float:
        return max(self.min_spacing_m, COINCIDENT_M)

    def _far_enough(self, d2: np.ndarray) -> np.ndarray:
        """Squared distances -> True where the pair keeps the spacing rule."""
        return d2 >= (self._sep * (1.0 - SPACING_RTOL)) ** 2

    def _in_regions(self, p: np.ndarray) -> np.ndarray:
        inside = np.zeros(len(p), dtype=bool)
        for r in self.regions:
            inside |= r._covers(p)
        return inside

    def _keepout_free(self, p: np.ndarray) -> np.ndarray:
        free = np.ones(len(p), dtype=bool)
        for k in self.keepouts:
            free &= ~k._contains(p)
        if self.obstacles is not None:
            free &= ~self.obstacles.blocked(p)
        return free

    def _clear_of_installed(self, p: np.ndarray) -> np.ndarray:
        if len(self.installed_m) == 0:
            return np.ones(len(p), dtype=bool)
        d2 = np.sum((p[:, None, :] - self.installed_m[None, :, :]) ** 2, axis=-1)
        return np.all(self._far_enough(d2), axis=1)

    def allowed(self, points_m) -> np.ndarray:
        """Whether each position is an allowed mounting position.

        Parameters
        ----------
        points_m : (n_points, 3) float
            Positions, m.

        Returns
        -------
        (n_points,) bool
            On some region (:meth:`Region.covers`, within 1e-6 m) and in no keep-out
            (:meth:`Region.contains`). Spacing is not part of this test (see
            :meth:`spacing_ok`).
        """
        p = points(points_m)
        return self._in_regions(p) & self._keepout_free(p)

    def spacing_ok(self, layouts_m) -> np.ndarray:
        """Whether each layout keeps the minimum spacing.

        Parameters
        ----------
        layouts_m : (n_layouts, n_probes, 3) float
            Layouts, m.

        Returns
        -------
        (n_layouts,) bool
            True when every pair of the layout's probes, and every probe with every installed
            probe, is at least ``min_spacing_m`` apart (3-D distance) and no two share a position.
        """
        lay = np.asarray(layouts_m, dtype=float)
        if lay.ndim != 3 or lay.shape[2] != 3:
            raise ValueError(
                f"`layouts_m` must have shape (n_layouts, n_probes, 3) in metres; got {lay.shape}."
            )
        if not np.all(np.isfinite(lay)):
            raise ValueError("`layouts_m` must be finite.")
        n_layouts, n_probes, _ = lay.shape
        ok = np.ones(n_layouts, dtype=bool)
        n_inst = len(self.installed_m)
        if n_probes == 0:
            return ok
        iu = np.triu_indices(n_probes, 1)
        block = max(1, _BLOCK_ELEMENTS // (3 * n_probes * (n_probes + n_inst)))
        for lo in range(0, n_layouts, block):
            part = lay[lo : lo + block]
            if n_probes > 1:
                d2 = np.sum((part[:, :, None, :] - part[:, None, :, :]) ** 2, axis=-1)
                ok[lo : lo + block] &= np.all(self._far_enough(d2[:, iu[0], iu[1]]), axis=1)
            if n_inst:
                d2 = np.sum((part[:, :, None, :] - self.installed_m[None, None]) ** 2, axis=-1)
                ok[lo : lo + block] &= np.all(self._far_enough(d2), axis=(1, 2))
        return ok

    def violations(self, layout_m, names=None, installed_names=None) -> list[str]:
        """Human-readable reasons a layout breaks the mounting rules.

        Parameters
        ----------
        layout_m : (n_probes, 3) float
            One layout, m. Probes are numbered from 0 in this order; installed probes from 0 in
            ``installed_m`` order; regions and keep-outs from 0 in the site's order.
        names, installed_names : sequence of str or None
            What the user calls the probes and the installed probes (the summary's names):
            the sentences name them so, instead of by number.

        Returns
        -------
        list of str
            One sentence per broken rule; empty when the layout is fine.
        """
        p = points(layout_m, "layout_m")
        out: list[str] = []
        if len(p) == 0:
            return out

        def probe(i, names=names, word="probe") -> str:
            return f"{word} {names[i]!r}" if names is not None else f"{word} {i}"

        inside = self._in_regions(p)
        if not inside.all():
            bad = np.flatnonzero(~inside)
            dist = np.stack([r._distance(p[bad]) for r in self.regions])  # (n_regions, n_bad)
            nearest = np.argmin(dist, axis=0)
            for j, i in enumerate(bad):
                r = int(nearest[j])
                out.append(
                    f"{probe(i)} at {fmt(p[i])} m lies outside every mounting region (nearest: "
                    f"{label('region', r, self.regions[r])}, "
                    f"{format_quantity(dist[r, j], 'm')} away)."
                )
        for k, ko in enumerate(self.keepouts):
            for i in np.flatnonzero(ko._contains(p)):
                out.append(f"{probe(i)} at {fmt(p[i])} m lies in {label('keep-out', k, ko)}.")
        d = np.linalg.norm(p[:, None, :] - p[None, :, :], axis=-1)
        ii, jj = np.triu_indices(len(p), 1)
        close = ~self._far_enough(d[ii, jj] ** 2)
        for i, j in zip(ii[close], jj[close], strict=True):
            pair = (
                f"{probe(i)} and {probe(j)} are" if names is not None else f"probes {i} and {j} are"
            )
            out.append(self._too_close(pair, d[i, j]))
        if len(self.installed_m):
            di = np.linalg.norm(p[:, None, :] - self.installed_m[None, :, :], axis=-1)
            for i, k in zip(*np.nonzero(~self._far_enough(di**2)), strict=True):
                other = probe(k, installed_names, "installed probe")
                out.append(self._too_close(f"{probe(i)} and {other} are", di[i, k]))
        return out

    def _too_close(self, who: str, dist: float) -> str:
        if dist <= COINCIDENT_M:
            return f"{who} at the same position; a mounting position holds one meter."
        return (
            f"{who} {format_quantity(dist, 'm')} apart, closer than the minimum spacing of "
            f"{format_quantity(self.min_spacing_m, 'm')} (`min_spacing_m`)."
        )

    # ---------------------------------------------------------------- layouts (see .layouts)
    def candidate_grid(self, spacing_m: float | None = None, target: int = 1500) -> Candidates:
        """A lattice of allowed candidate positions over all regions
        (:func:`.layouts.candidate_grid`)."""
        return layouts.candidate_grid(self, spacing_m, target)

    def random_layouts(
        self,
        n_layouts: int,
        count: int,
        rng: np.random.Generator,
        max_tries: int = 50,
        keep_placed: bool = False,
    ) -> np.ndarray:
        """``(n_placed, count, 3)``: random feasible layouts (:func:`.layouts.random_layouts`)."""
        return layouts.random_layouts(self, n_layouts, count, rng, max_tries, keep_placed)

    def regular_layout(self, count: int) -> np.ndarray:
        """``(count, 3)``: the layout an engineer would draw by hand
        (:func:`.layouts.regular_layout`)."""
        return layouts.regular_layout(self, count)

    # ---------------------------------------------------------------- feasibility
    def _covering_keepouts(self, region: Region) -> list[int]:
        """Keep-outs that together cover the whole region; empty when some of it is free."""
        if not self.keepouts:
            return []
        foot = [(k, ko) for k, ko in enumerate(self.keepouts) if ko.is_footprint]
        if foot:
            shadow = region._xy_projection()
            grown = {
                k: (ko.plane.shape.buffer(ko.buffer_m) if ko.buffer_m else ko.plane.shape_tol)
                for k, ko in foot
            }
            for k, g in grown.items():
                if g.covers(shadow):
                    return [k]
            if shapely.union_all(list(grown.values())).covers(shadow):
                return [k for k, g in grown.items() if g.intersects(shadow)]
        test = region._test_points()
        inside = np.stack([ko._contains(test) for ko in self.keepouts])  # (n_keepouts, n_test)
        whole = np.flatnonzero(inside.all(axis=1))
        if len(whole):
            return [int(whole[0])]
        if inside.any(axis=0).all():
            return [int(k) for k in np.flatnonzero(inside.any(axis=1))]
        return []

    def _free_points(self, region: Region) -> np.ndarray:
        """Distinct allowed listed points of a points region, clear of installed probes."""
        pts = np.unique(np.array(region.positions_m), axis=0)
        return pts[self._keepout_free(pts) & self._clear_of_installed(pts)]

    def _capacity(self, region: Region) -> float:
        """An upper estimate of how many probes ``min_spacing_m`` apart the region holds."""
        s = self.min_spacing_m
        if region.dimension == 0:
            pts = self._free_points(region)
            return float(len(greedy_independent(pts, self._sep)))
        if s == 0.0:
            return math.inf
        if region.dimension == 1:
            return math.floor(region.measure / s + 1e-9) + 1.0
        shape = region.plane.shape
        if region.is_footprint:
            for ko in self.keepouts:
                if ko.is_footprint:
                    shape = shape.difference(ko.plane.shape.buffer(ko.buffer_m))
        if shape.is_empty:
            return 0.0
        n_parts = len(shapely.get_parts(shape))
        # Packing bound: a hexagonal cell of (sqrt 3 / 2) s^2 per point, plus a boundary term.
        return shape.area / (HEX_CELL_FACTOR * s * s) + shape.length / s + n_parts

    def check_feasible(self, count: int) -> None:
        """Raise ``ValueError`` when ``count`` probes obviously cannot be placed.

        Checks, in order: every region lies wholly inside keep-outs (tested exactly with
        shapely for footprint keep-outs, on a dense sample of the region otherwise); a
        points-only site has fewer distinct allowed points than ``count``; the packing estimate
        of all regions is below ``count``. The estimate per region: a 2-D region of area A and
        perimeter P (footprint keep-outs removed) holds at most about A / (0.866 s²) + P / s + 1
        points ``s`` apart, a segment of length L holds floor(L / s) + 1, a points region its
        greedy count of allowed points ``s`` apart.

        Parameters
        ----------
        count : int
            Probes to place besides the installed ones, >= 1.
        """
        count = positive_int(count, "count")
        covered = [self._covering_keepouts(r) for r in self.regions]
        if all(covered):
            parts = []
            for i, (r, ks) in enumerate(zip(self.regions, covered, strict=True)):
                names = " and ".join(label("keep-out", k, self.keepouts[k]) for k in ks)
                parts.append(f"{label('region', i, r)} lies wholly inside {names}")
            raise ValueError(
                "no mounting position is left: "
                + "; ".join(parts)
                + ". Shrink or remove the keep-outs, or add a mounting region."
            )
        if all(r.dimension == 0 for r in self.regions):
            pts = np.concatenate([self._free_points(r) for r in self.regions])
            distinct = len(np.unique(pts, axis=0)) if len(pts) else 0
            listed = sum(len(r.positions_m) for r in self.regions)
            if distinct < count:
                raise ValueError(
                    f"cannot place {count} probes: only {distinct} distinct allowed mounting "
                    f"points remain (of {listed} listed; the rest lie in keep-outs or too close "
                    "to installed probes). Lower `count` or list more `positions_m`."
                )
            held = len(greedy_independent(np.unique(pts, axis=0), self._sep))
            if held < count:
                raise ValueError(
                    f"cannot place {count} probes at least {self.min_spacing_m:g} m apart: only "
                    f"about {held} of the {distinct} allowed mounting points keep that spacing "
                    "(greedy count). Lower `count` or `min_spacing_m`, or list more points."
                )
            return
        capacity = sum(
            self._capacity(r) for r, c in zip(self.regions, covered, strict=True) if not c
        )
        if count > capacity:
            raise ValueError(
                f"cannot place {count} probes at least {self.min_spacing_m:g} m apart: the "
                f"mounting regions hold about {int(capacity)} at most at that spacing (packing "
                "estimate: area / (0.866 s²) + perimeter / s + 1 per 2-D region, "
                "floor(length / s) + 1 per segment). Lower `count` or `min_spacing_m`, or "
                "enlarge the mounting regions."
            )
