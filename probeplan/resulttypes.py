"""Result-side types: what the stages hand to ``result``, ``store`` and ``report``.

A leaf of the package (it imports nothing of probeplan and nothing heavier than numpy), so
that every stage can build or read these without importing the stage that makes them: the
search builds :class:`Baseline` and :class:`SearchInfo`, the budget :class:`BudgetTable`,
``problem`` the :class:`Score`, and ``store`` and ``report`` write and print all of them with
the same units (:func:`param_unit`, :func:`value_unit`) and probe names (:func:`probe_names`).
Each is also importable from the module that makes it (``probeplan.problem.Score``,
``probeplan.result.SearchInfo``, ``probeplan.fisher.Direction`` …).
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field

import numpy as np

#: Unit of each criterion's value as stored (``/score/value`` attr ``units``).
_VALUE_UNITS = {"d": "log det, SI", "location": "m", "charge": "1"}


# --------------------------------------------------------------------------------------------
# Units and names
# --------------------------------------------------------------------------------------------


def param_unit(name: str) -> str:
    """Unit of a parameter from its name's suffix: ``_v_per_m`` → V/m, ``_c`` → C, ``_m`` → m.

    Parameters
    ----------
    name : str
        e.g. ``"s0.charge_c"``, ``"s0.z_m"``, ``"bg.z_v_per_m"``.

    Returns
    -------
    str
        ``"V/m"``, ``"C"``, ``"m"``, or ``"1"`` for a name without a unit suffix.
    """
    # `_v_per_m` first: it also ends in `_m`.
    for suffix, unit in (("_v_per_m", "V/m"), ("_c", "C"), ("_m", "m")):
        if name.endswith(suffix):
            return unit
    return "1"


def value_unit(criterion: str) -> str:
    """Unit of a criterion value: ``"log det, SI"`` (d), ``"m"`` (location), ``"1"`` (charge)."""
    return _VALUE_UNITS.get(criterion, "1")


#: The prefixed units a quantity is shown in, largest first: (scale, shown unit).
_PREFIXES: dict[str, tuple[tuple[float, str], ...]] = {
    "m": ((1e3, "km"), (0.1, "m"), (0.0, "mm")),
    "C": ((1.0, "C"), (1e-3, "mC"), (1e-6, "µC"), (1e-9, "nC"), (0.0, "pC")),
    "V/m": ((1e6, "MV/m"), (1e3, "kV/m"), (0.0, "V/m")),
}
_SCALE = {"km": 1e3, "m": 1.0, "mm": 1e-3, "mC": 1e-3, "µC": 1e-6, "nC": 1e-9, "pC": 1e-12}
_SCALE.update({"C": 1.0, "MV/m": 1e6, "kV/m": 1e3, "V/m": 1.0})


def format_quantity(value: float, unit: str, digits: int = 3) -> str:
    """A value for people: ``digits`` significant digits and a readable unit prefix.

    Every number the summary, its notes and the plots show goes through this function (or
    :func:`format_number` for a bare number), so they all round alike.

    Parameters
    ----------
    value : float
        In SI units.
    unit : str
        ``"m"`` (km from 1,000 m, mm below 10 cm), ``"C"`` (C, mC, µC, nC, pC), ``"V/m"``
        (kV/m from 1,000 V/m, MV/m), ``"%"`` (``value`` is a fraction), ``"1"`` (no unit), or
        any other unit, printed as given.
    digits : int
        Significant digits (3: what a bound or a position on a site plan supports).

    Returns
    -------
    str
        e.g. ``"1.25 km"``, ``"320 µC"``, ``"16.4 km"``; ``"unresolved"`` for +inf, ``"n/a"``
        for NaN or None.
    """
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    value = float(value)
    if math.isinf(value):
        return "unresolved" if value > 0 else "-inf"
    if value != 0.0:  # round first, so 999.7 m reads 1.00 km and not 1000 m
        value = float(f"{value:.{digits - 1}e}")
    if unit == "%":
        return f"{format_number(100.0 * value, digits)} %"
    if unit == "1":
        return format_number(value, digits)
    if value == 0.0 or unit not in _PREFIXES:
        return f"{format_number(value, digits)} {unit}"
    shown = next(name for scale, name in _PREFIXES[unit] if abs(value) >= scale)
    return f"{format_number(value / _SCALE[shown], digits)} {shown}"


def format_number(x: float, digits: int = 3) -> str:
    """``x`` with ``digits`` significant digits, without an exponent from 0.001 to 999,999.

    Examples: 13406.356024918538 → ``"13400"``, 0.0123456 → ``"0.0123"``, 1.5e-7 →
    ``"1.50e-07"``.
    """
    x = float(x)
    if not math.isfinite(x):
        return f"{x:g}"
    if x == 0.0:
        return "0"
    if 1e-3 <= abs(x) < 1e6:
        x = float(f"{x:.{digits - 1}e}")
        decimals = max(0, digits - 1 - int(math.floor(math.log10(abs(x)))))
        return f"{x:.{decimals}f}"
    return f"{x:.{digits - 1}e}"


def probe_names(result) -> tuple[str, ...]:
    """Names of all probes of a result, installed first.

    Installed probes carry the names their config gives them (``installed-k`` by default); new
    probes are called ``new-k``, k counting from 0.

    Parameters
    ----------
    result : probeplan.result.Result
        Read only through its ``probe_names``, ``score.installed`` and ``config_text``.

    Returns
    -------
    tuple of n_probes str
    """
    if result.probe_names is not None:
        return tuple(result.probe_names)
    installed = np.asarray(result.score.installed, dtype=bool)
    n_inst = int(installed.sum())
    names = [f"installed-{k}" for k in range(n_inst)]
    try:
        table = tomllib.loads(result.config_text).get("probes", {}).get("installed", [])
        for k, entry in enumerate(table[:n_inst]):
            name = entry.get("name") if isinstance(entry, dict) else None
            if isinstance(name, str) and name:
                names[k] = name
    except (tomllib.TOMLDecodeError, AttributeError, TypeError):
        pass  # the defaults above are the names the config checker would have given
    return tuple(names) + tuple(f"new-{k}" for k in range(installed.size - n_inst))


@dataclass(frozen=True)
class Direction:
    """A parameter combination a layout resolves poorly or not at all.

    Attributes
    ----------
    weights : (n_params,) float
        Unit eigenvector of the scaled information (dimensionless, relative changes).
    relative_eigenvalue : float
        Its eigenvalue over the largest; 0 for a parameter no reading sees.
    singular : bool
        True when the layout cannot resolve it at all.
    text : str
        The direction in words.
    """

    weights: np.ndarray
    relative_eigenvalue: float
    singular: bool
    text: str


@dataclass(frozen=True, eq=False)
class Score:
    """How well one layout pins down the estimated parameters.

    Attributes
    ----------
    positions_m : (n_probes, 3) float
        All probes, installed ones first.
    installed : (n_probes,) bool
    gain : (n_probes,) float
    names : tuple of n_params str
    theta : (n_scenarios, n_params) float
        Estimated parameters of each scenario.
    fisher : (n_scenarios, n_params, n_params) float
    crb_std : (n_scenarios, n_params) float
        1-sigma Cramér–Rao bounds (+inf where singular).
    per_scenario : (n_scenarios,) float
        Criterion of each scenario.
    value : float
        The aggregated criterion.
    criterion, aggregate : str
    singular : (n_scenarios,) bool
    saturated : (n_probes,) float
        Fraction of scenarios in which each probe saturates on some axis.
    unresolved : list of Direction
        For the scenario that scores worst (nominal if none is worse).
    unresolved_scenario : int
    failure_values : (n_probes,) float or None
        The criterion with each single probe lost (installed first); the worst entry is the
        layout's value under a single failure, and its index the probe that matters most.
    axes : (n_probes, n_axes, 3) float or None
        What each meter reads (zero rows pad the narrower meters); None in results stored
        before meters were recorded one by one.
    grade : tuple of n_probes str or None
        Each meter's grade ("" for the noise of ``[probes]`` itself); None as for ``axes``.
    enhancement : (n_probes,) float or None
        With conducting structures: each meter's computed reading over the undisturbed one at
        the same place (no structures), nominal scenario, as the norm over its axes (1 where
        the undisturbed reading is zero); None without structures. The hand ``gain`` is a
        calibration factor on top of it.
    """

    positions_m: np.ndarray
    installed: np.ndarray
    gain: np.ndarray
    names: tuple[str, ...]
    theta: np.ndarray
    fisher: np.ndarray
    crb_std: np.ndarray
    per_scenario: np.ndarray
    value: float
    criterion: str
    aggregate: str
    singular: np.ndarray
    saturated: np.ndarray
    unresolved: list[Direction] = field(default_factory=list)
    unresolved_scenario: int = 0
    failure_values: np.ndarray | None = None
    axes: np.ndarray | None = None
    grade: tuple[str, ...] | None = None
    enhancement: np.ndarray | None = None

    def new_meters(self) -> tuple[np.ndarray | None, tuple[str, ...] | None]:
        """``(axes, grades)`` of the new probes, as :meth:`Problem.meters` takes them, to score,
        simulate or draw this layout again; ``(None, None)`` where they were not recorded."""
        new = ~np.asarray(self.installed, dtype=bool)
        axes = None if self.axes is None else self.axes[new]
        grades = None if self.grade is None else tuple(np.asarray(self.grade, dtype=object)[new])
        return axes, grades


@dataclass(frozen=True, eq=False)
class StructureSurfaces:
    """Conducting structures as solved: their panels and the induced charge (nominal scenario).

    Attributes
    ----------
    names : tuple of n_structures str
    vertices_m : (n_vertices, 3) float
        Panel corners, m (three per panel, in panel order).
    faces : (n_panels, 3) int
        Indices into ``vertices_m`` of each panel's corners.
    owner : (n_panels,) int
        The structure each panel belongs to (index into ``names``).
    charge_density_c_per_m2 : (n_panels,) float
        Induced surface charge density of the nominal scenario, C/m².
    charge_c : (n_structures,) float
        Net induced charge of each structure (the plane's share not included), C.
    """

    names: tuple[str, ...]
    vertices_m: np.ndarray
    faces: np.ndarray
    owner: np.ndarray
    charge_density_c_per_m2: np.ndarray
    charge_c: np.ndarray


@dataclass(frozen=True, eq=False)
class Baseline:
    """A reference layout scored beside the plan.

    Attributes
    ----------
    name : str
        e.g. "regular", "best of 1000 random", "greedy", "exchange".
    value : float
        Its criterion value.
    positions_m : (n_probes, 3) float
        New probes only.
    """

    name: str
    value: float
    positions_m: np.ndarray


@dataclass(frozen=True, eq=False)
class SearchInfo:
    """How the plan was found.

    Attributes
    ----------
    history : (n_evaluations,) float
        Criterion of each evaluated layout that keeps the mounting rules, in order: the greedy
        and exchange layouts, a warm start, then every refinement proposal (proposals that
        break the rules are not recorded). ±inf for a layout that cannot resolve everything.
    bound : float or None
        Upper bound on the ``d`` value over the candidate grid (convex relaxation), if computed.
    bound_gap : float or None
        Duality gap of the relaxation when it stopped (the bound is the relaxed value + gap).
    grid_spacing_m : float
        Spacing of the candidate grid.
    n_candidates : int
    baselines : tuple of Baseline
        Reference layouts (greedy, exchange, regular, best random ...).
    stages : tuple of (str, float)
        Criterion after each stage of the search ("greedy", "exchange", "refine"), in order.
    seconds : float
        Wall time of the search.
    objective : str
        What the search optimised: "criterion", or "worst single loss" when the config asks
        to tolerate one failed probe (the stage and baseline values are then of that).
    evaluations_asked : int or None
        The refinement evaluations the config asked for (``[design] evaluations``); None in
        results that did not record it (the summary then reads the stored config text).
    evaluations_spent : tuple of (str, int)
        Objective evaluations spent per stage, in order, the entries disjoint (they add up to
        all that was spent), e.g. ``(("greedy", 1), ("exchange", 1), ("refinement", 33),
        ("baselines", 1001), ("refinement proposals that broke the mounting rules", 7))``;
        empty where not recorded (the summary then counts ``history``).
    restart_values : (n_runs,) float or None
        The final value of every complete exchange search on the grid when restarts ran (the
        relaxation bound was loose): first the exchange from the greedy layout, then one a
        restart from a randomised greedy start, in order. Their spread is the empirical
        figure beside the bound. None when no restart ran (the bound was tight, ``[design]
        restarts = 0``, a stop came first, or a file written before restarts).
    """

    history: np.ndarray
    bound: float | None
    bound_gap: float | None
    grid_spacing_m: float
    n_candidates: int
    baselines: tuple[Baseline, ...] = ()
    stages: tuple[tuple[str, float], ...] = ()
    seconds: float = 0.0
    objective: str = "criterion"
    evaluations_asked: int | None = None
    evaluations_spent: tuple[tuple[str, int], ...] = ()
    restart_values: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class BudgetTable:
    """One row per (count, grade) option tried.

    Attributes
    ----------
    count : (n_options,) int
    grade : (n_options,) str
    cost : (n_options,) float
    value : (n_options,) float
    meets_target : (n_options,) bool
    pareto : (n_options,) bool
        No other option is both cheaper (or equal) and better.
    cheapest : int
        Row of the cheapest option meeting the target, −1 if none.
    target : float or None
    layouts : tuple of (n_i, 3) float arrays
        Empty ``(0, 3)`` for a row that does not fit.
    feasible : (n_options,) bool or None
        False for a count the mounting rules cannot hold (its value is the worst, ∓inf, and it
        never meets the target); None when every row fits (results written before this field).
    reason : tuple of str
        Why each infeasible row does not fit ("" for the others, or empty when ``feasible`` is
        None).
    """

    count: np.ndarray
    grade: np.ndarray
    cost: np.ndarray
    value: np.ndarray
    meets_target: np.ndarray
    pareto: np.ndarray
    cheapest: int
    target: float | None
    layouts: tuple[np.ndarray, ...]
    feasible: np.ndarray | None = None
    reason: tuple[str, ...] = ()

    def fits(self) -> np.ndarray:
        """``(n_options,) bool``: the rows whose count the mounting rules can hold."""
        if self.feasible is None:
            return np.ones(len(self.count), dtype=bool)
        return np.asarray(self.feasible, dtype=bool)


@dataclass(frozen=True, eq=False)
class Changes:
    """What changed against an earlier result (``--from OLD.h5``).

    Attributes
    ----------
    old_path : str
    mode : {"installed", "start", "rescore"}
        The old probes were kept fixed as installed, used as the search's starting layout, or
        rescored as they are (``score --from``).
    old_value : float
        The criterion stored in the old file (under the old config, named ``old_criterion``).
    old_rescored : float
        The old layout scored under the current config (equal to ``old_value`` when nothing
        changed).
    kept_m : (n_kept, 3) float
    moved_from_m, moved_to_m : (n_moved, 3) float
    added_m : (n_added, 3) float
    removed_m : (n_removed, 3) float
    old_criterion : str
    rescore_note : str
        Why ``old_rescored`` is NaN when the old layout cannot be scored comparably under the
        current config ("" otherwise).
    structures_added, structures_removed : tuple of str
        Names of the conducting structures only the new (old) config has.
    structures_changed : tuple of n_changed str
        Names of the structures both have whose extent moved or changed size.
    structures_shift_m : (n_changed, 3) float or None
        How far each changed structure's bounding-box centre moved, m (None: not compared,
        a file written before structures were compared).
    structures_old_size_m, structures_new_size_m : (n_changed, 3) float or None
        Each changed structure's bounding-box size before and after, m.
    """

    old_path: str
    mode: str
    old_value: float
    old_rescored: float
    kept_m: np.ndarray
    moved_from_m: np.ndarray
    moved_to_m: np.ndarray
    added_m: np.ndarray
    removed_m: np.ndarray
    old_criterion: str = ""
    rescore_note: str = ""
    structures_added: tuple[str, ...] = ()
    structures_removed: tuple[str, ...] = ()
    structures_changed: tuple[str, ...] = ()
    structures_shift_m: np.ndarray | None = None
    structures_old_size_m: np.ndarray | None = None
    structures_new_size_m: np.ndarray | None = None
