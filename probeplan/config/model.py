"""The checked config as frozen dataclasses: :class:`Config` and its parts.

They hold checked values only: the rest of the program never re-validates a config. Build them
with :func:`probeplan.config.load_config`, :func:`~probeplan.config.parse_config` or
:func:`~probeplan.config.config_from_mapping`. Units are SI (m, C, V/m).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..geo import Frame
from ..site import Region, Site
from ..sources import Source


@dataclass(frozen=True)
class SourceSpec:
    """One ``[[source]]``: the nominal source, what is estimated and the scenario ranges.

    Attributes
    ----------
    source : Source
        The nominal source object (scenario 0).
    estimate : tuple of str
        Parameter names of the source that are unknown, in the source's own order
        (``charge_c, x_m, y_m, z_m`` then ``radius_m`` / ``sigma_m``).
    ranges : tuple of (str, float, float)
        ``(param_name, lo, hi)`` with ``lo <= hi``, in the same order: scenarios draw the
        parameter uniformly between the bounds. A range may be given for a known parameter.
    name : str
        What the summary, the result file and the maps call it (``s{i}`` by default; its
        parameters keep the names ``s{i}.charge_c`` …).
    """

    source: Source
    estimate: tuple[str, ...]
    ranges: tuple[tuple[str, float, float], ...]
    name: str = ""


@dataclass(frozen=True)
class BackgroundSpec:
    """The optional uniform background field ``[background]``.

    Attributes
    ----------
    field_v_per_m : (3,) float
        Nominal background field, V/m, physics sign convention.
    estimate : bool
        Whether its three components are estimated (nuisance parameters).
    ranges : tuple of (str, float, float)
        ``("x_v_per_m", lo, hi)`` … for scenario sampling, V/m.
    """

    field_v_per_m: tuple[float, float, float]
    estimate: bool
    ranges: tuple[tuple[str, float, float], ...]


@dataclass(frozen=True)
class ProbeSpec:
    """The new meters to place, ``[probes]``.

    Attributes
    ----------
    count : int
        How many to place besides the installed ones (0 only when some are installed).
    component : str or (3,) float
        ``"x"``, ``"y"``, ``"z"``, ``"vector"`` (three axes), or a unit vector (normalised).
    noise_v_per_m : float
        1-sigma additive noise of one reading, V/m, > 0.
    relative_noise : float
        1-sigma proportional error as a fraction of the reading, >= 0.
    range_v_per_m : float
        Readings beyond this magnitude saturate, V/m, > 0 (``inf``: never).
    min_spacing_m : float
        No two probes closer than this, m, >= 0.
    gain : float
        Calibration factor of the new meters (reading = gain × field), > 0.
    """

    count: int
    component: str | tuple[float, float, float]
    noise_v_per_m: float
    relative_noise: float = 0.0
    range_v_per_m: float = math.inf
    min_spacing_m: float = 0.0
    gain: float = 1.0


@dataclass(frozen=True)
class InstalledProbe:
    """A meter already mounted, ``[[probes.installed]]``: fixed, counted in every score.

    Attributes
    ----------
    position_m : (3,) float
    name : str
    component : str, (3,) float or None
        ``None``: the same as ``[probes] component``.
    gain : float
        Calibration factor, > 0.
    grade : str or None
        The name of its ``[[grade]]``; ``None``: the noise and range of ``[probes]``.
    """

    position_m: tuple[float, float, float]
    name: str
    component: str | tuple[float, float, float] | None = None
    gain: float = 1.0
    grade: str | None = None


#: The most restarts ``[design] restarts`` may ask for: each is a whole greedy and exchange
#: search over the grid (seconds to a minute on a regional grid), and a few already show
#: whether the search ends at the same quality from different starts.
RESTARTS_LIMIT = 100


@dataclass(frozen=True)
class DesignSpec:
    """How layouts are scored and searched, ``[design]``.

    Attributes
    ----------
    criterion : str
        One of :data:`CRITERIA`.
    scenarios : int
        Scenario count, >= 1; scenario 0 is the nominal config.
    aggregate : str
        ``"mean"``, ``"worst"`` or ``"quantile:q"`` with 0 < q < 1.
    evaluations : int
        Objective evaluations the search may spend, >= 0.
    tolerate_failures : int
        0, or 1 to score every layout by its worst case with one meter failed.
    grid_spacing_m : float or None
        Candidate-grid spacing, m, > 0; ``None`` lets the search choose.
    random_layouts : int
        Random layouts drawn for the "best random" baseline, >= 1.
    scheduler : str or None
        Address of a dask.distributed scheduler to run on (``"tcp://host:8786"``); the
        ``--scheduler`` option and the ``PROBEPLAN_SCHEDULER`` variable come before it.
    scheduler_timeout_s : float
        How long to try to reach the scheduler before giving up, s, > 0.
    restarts : int
        Further exchange searches from randomised greedy starts when the relaxation bound is
        loose (their spread is the summary's empirical figure), 0 to :data:`RESTARTS_LIMIT`;
        0 runs none.
    """

    criterion: str = "d"
    scenarios: int = 64
    aggregate: str = "mean"
    evaluations: int = 300
    tolerate_failures: int = 0
    grid_spacing_m: float | None = None
    random_layouts: int = 1000
    scheduler: str | None = None
    scheduler_timeout_s: float = 10.0
    restarts: int = 4

    @property
    def quantile(self) -> float | None:
        """q of a ``quantile:q`` aggregate, else ``None``."""
        if self.aggregate.startswith("quantile:"):
            return float(self.aggregate.split(":", 1)[1])
        return None


@dataclass(frozen=True)
class Grade:
    """A meter grade on offer, ``[[grade]]``; noise and range default to ``[probes]``.

    Attributes
    ----------
    name : str
    noise_v_per_m : float
        > 0, V/m.
    relative_noise : float
        >= 0.
    cost : float
        Per meter, >= 0, in the user's currency.
    range_v_per_m : float
        > 0, V/m (``inf``: never saturates).
    """

    name: str
    noise_v_per_m: float
    relative_noise: float
    cost: float
    range_v_per_m: float


@dataclass(frozen=True)
class BudgetSpec:
    """``[budget]``: the probe counts to try with every grade, and the criterion target.

    Attributes
    ----------
    counts : tuple of int
        Sorted, distinct, each >= 1.
    target : float or None
        The criterion must reach this (>= for ``d``, <= for the others).
    evaluations : int
        Continuous-refinement evaluations per option (default 0: each option is planned by
        greedy + exchange on the candidate grid, which ranks options well at a fraction of the
        time; raise it to polish every option).
    """

    counts: tuple[int, ...]
    target: float | None = None
    evaluations: int = 0


@dataclass(frozen=True)
class Config:
    """A checked config. Build it with :func:`load_config`, :func:`parse_config` or
    :func:`config_from_mapping`.

    Attributes
    ----------
    path : str
        The file it came from (``"<config>"`` for text, ``"<mapping>"`` for a mapping, unless
        named), used in every message.
    text : str
        The config text as given (stored as provenance).
    title : str
    seed : int
        Every random draw comes from ``np.random.default_rng(seed)``.
    ground_z_m : float or None
        Height of the grounded conducting plane, m; ``None`` is free space.
    probes : ProbeSpec
    installed : tuple of InstalledProbe
    regions, keepouts : tuple of Region
    sources : tuple of SourceSpec
    background : BackgroundSpec or None
    structures : tuple of probeplan.Conductor
        Conducting structures (``[[structure]]``), solved for by boundary elements.
    design : DesignSpec
    grades : tuple of Grade
    budget : BudgetSpec or None
    storm_watch : bool
        True for a lightning caution: a ground plane with a source centred at least
        :data:`STORM_HEIGHT_M` above it, or ``caution = "lightning"``.
    caution : str
        One of :data:`CAUTIONS`: the caution line the summary carries.
    frame : Frame or None
        The ``[frame]``: the site's WGS84 origin, for longitudes and latitudes in and out.
    """

    path: str
    text: str
    title: str
    seed: int
    ground_z_m: float | None
    probes: ProbeSpec
    installed: tuple[InstalledProbe, ...]
    regions: tuple[Region, ...]
    keepouts: tuple[Region, ...]
    sources: tuple[SourceSpec, ...]
    background: BackgroundSpec | None
    design: DesignSpec
    grades: tuple[Grade, ...]
    budget: BudgetSpec | None
    storm_watch: bool
    caution: str = "general"
    frame: Frame | None = None
    structures: tuple = ()

    @property
    def installed_m(self) -> np.ndarray:
        """Positions of the installed probes, ``(n_installed, 3) float``, m."""
        pos = [p.position_m for p in self.installed]
        return np.array(pos, dtype=float).reshape(len(pos), 3)

    @property
    def structure_meters_m(self) -> np.ndarray:
        """Meters the automatic structure mesh is made finer near, ``(n, 3) float``, m: the
        installed meters and the points of every structure region."""
        mounted = [r.outline_m() for r in self.regions if r.kind == "structure"]
        return np.concatenate([self.installed_m, *mounted]).reshape(-1, 3)

    def site(self) -> Site:
        """The mounting rules: regions, keep-outs, spacing, installed probes, and the
        structures as obstacles (no meter inside one or nearer it than its panel size)."""
        obstacles = None
        if self.structures:
            from ..conductors import Obstacles

            mounted = [r.outline_m() for r in self.regions if r.kind == "structure"]
            mounted_m = np.concatenate(mounted) if mounted else np.empty((0, 3))
            obstacles = Obstacles(self.structures, self.ground_z_m, mounted_m)
        return Site(
            self.regions,
            self.keepouts,
            min_spacing_m=self.probes.min_spacing_m,
            installed_m=self.installed_m,
            obstacles=obstacles,
        )
