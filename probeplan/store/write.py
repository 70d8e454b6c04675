"""Writing a result to HDF5: every path of the contract's "Result file (HDF5)" table and what
``probeplan show`` needs to reprint the summary from the file alone (see :mod:`probeplan.store`
for the file layout). The file is written whole or not at all (:mod:`.files`)."""

from __future__ import annotations

import dataclasses
import io
import os
from collections.abc import Iterable
from pathlib import Path

import h5py
import numpy as np

from .._version import package_version
from ..result import Result
from ..resulttypes import BudgetTable, SearchInfo, param_unit, probe_names, value_unit
from .files import check_writable, write_atomically

#: The sign convention every stored field value follows (root attr ``sign_convention``).
SIGN_CONVENTION = "physics: E points away from positive charge"

_STR = h5py.string_dtype()
_FISHER_UNITS = "SI (1/(unit_i unit_j))"


def write_result(
    result: Result,
    path: str | os.PathLike,
    *,
    force: bool = False,
    option: str | None = "--out",
    names: Iterable[Path] = (),
) -> Path:
    """Write a result to an HDF5 file, whole or not at all (see :mod:`probeplan.store.files`).

    Parameters
    ----------
    result : Result
    path : str or path-like
        The file to write (its folder must exist).
    force, option, names
        As for :func:`probeplan.store.files.write_atomically`: replace an existing regular
        file; the command-line option naming the file (None: none); where ``path`` is a
        default name, the names to take in turn if it was taken meanwhile.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    InputError
        The file exists (without ``force``), the path is not a regular file (a folder, a
        link, a FIFO, a device …), its folder is missing, or the file cannot be written there
        (read-only folder, full disk …); nothing is left behind.
    """
    names = iter(names)
    target = Path(os.fspath(path))
    # A default name another run took since this one began: move on to the next free one
    # here too (the final link moves on the same way if one is taken during the write).
    while not force and os.path.lexists(target):
        following = next(names, None)
        if following is None:
            break  # an explicit name: check_writable says it exists
        target = following
    target = check_writable(target, force=force, option=option)

    def write(tmp: Path) -> None:
        # The file is built in memory and written with plain file I/O: HDF5's own writes on
        # a full disk leave objects that crash the interpreter when freed (exit 139), where
        # a plain write raises one OSError (a result is kilobytes to a few megabytes).
        image = io.BytesIO()
        with h5py.File(image, "w") as f:
            _write(f, result)
        with open(tmp, "wb") as fh:
            fh.write(image.getbuffer())

    return write_atomically(
        target, write, "the result file", force=force, option=option, names=names
    )


def _dataset(group: h5py.Group, name: str, data, units: str | list[str] | None = None):
    ds = group.create_dataset(name, data=data)
    if units is not None:
        ds.attrs["units"] = np.array(units, dtype=_STR) if isinstance(units, list) else units
    return ds


def _strings(group: h5py.Group, name: str, values) -> h5py.Dataset:
    return group.create_dataset(name, data=np.array(list(values), dtype=object), dtype=_STR)


def _write(f: h5py.File, result: Result) -> None:
    score = result.score
    f.attrs["probeplan_version"] = result.version
    f.attrs["written_by_version"] = package_version()
    f.attrs["created_utc"] = result.created_utc
    f.attrs["command"] = result.command
    f.attrs["config_toml"] = result.config_text
    f.attrs["seed"] = np.int64(result.seed)
    f.attrs["complete"] = bool(result.complete)
    f.attrs["title"] = result.title
    f.attrs["config_path"] = result.config_path
    f.attrs["caution"] = result.caution
    f.attrs["sign_convention"] = SIGN_CONVENTION
    if result.ground_z_m is not None:
        f.attrs["ground_z_m"] = float(result.ground_z_m)
    if result.frame is not None:
        frame = f.create_group("frame")
        frame.attrs["datum"] = "WGS84"
        frame.attrs["local"] = "east-north-up, azimuthal equidistant at the origin"
        for key in ("origin_lon_deg", "origin_lat_deg", "origin_height_m"):
            frame.attrs[key] = float(getattr(result.frame, key))

    names = list(score.names)
    units = [param_unit(n) for n in names]
    n_params = len(names)

    layout = f.create_group("layout")
    _dataset(layout, "positions_m", np.asarray(score.positions_m, dtype=float), "m")
    _dataset(layout, "installed", np.asarray(score.installed, dtype=bool))
    _strings(layout, "names", probe_names(result))
    if score.axes is not None:
        _dataset(layout, "axes", np.asarray(score.axes, dtype=float), "1")
    if score.grade is not None:
        _strings(layout, "grade", score.grade)

    scen = f.create_group("scenarios")
    params = _dataset(scen, "params", np.asarray(score.theta, dtype=float), units)
    params.attrs["names"] = np.array(names, dtype=_STR)
    if result.source_names is not None:
        _strings(scen, "source_names", result.source_names)

    vunit = value_unit(score.criterion)
    g = f.create_group("score")
    _dataset(g, "fisher", np.asarray(score.fisher, dtype=float), _FISHER_UNITS)
    g["fisher"].attrs["param_units"] = np.array(units, dtype=_STR)
    _dataset(g, "crb_std", np.asarray(score.crb_std, dtype=float), units)
    value = _dataset(g, "value", np.float64(score.value), vunit)
    value.attrs["criterion"] = score.criterion
    value.attrs["aggregate"] = score.aggregate
    _dataset(g, "per_scenario", np.asarray(score.per_scenario, dtype=float), vunit)
    _dataset(g, "gain", np.asarray(score.gain, dtype=float), "1")
    _dataset(g, "saturated", np.asarray(score.saturated, dtype=float), "1")
    _dataset(g, "singular", np.asarray(score.singular, dtype=bool))
    directions = list(score.unresolved)
    text = _strings(g, "unresolved_text", [d.text for d in directions])
    text.attrs["scenario"] = np.int64(score.unresolved_scenario)
    weights = np.array([np.asarray(d.weights, dtype=float) for d in directions], dtype=float)
    _dataset(g, "unresolved_weights", weights.reshape(len(directions), n_params), "1")
    eig = np.array([d.relative_eigenvalue for d in directions], dtype=float)
    _dataset(g, "unresolved_eigenvalue", eig, "1")
    _dataset(g, "unresolved_singular", np.array([d.singular for d in directions], dtype=bool))
    if score.failure_values is not None:
        _dataset(g, "failure_values", np.asarray(score.failure_values, dtype=float), vunit)

    if result.search is not None:
        _write_search(f.create_group("search"), result.search, vunit)
    if result.budget is not None:
        _write_budget(f.create_group("budget"), result.budget, vunit)
    extra = f.create_group("extra")
    for key, val in result.extra.items():
        extra.attrs[str(key)] = np.float64(val)
    if result.notes:
        _strings(f, "notes", result.notes)
    if result.changes is not None:
        units = {n: "m" for n in ("kept_m", "moved_from_m", "moved_to_m", "added_m", "removed_m")}
        units |= {"old_value": vunit, "old_rescored": vunit}
        _write_dataclass(f.create_group("changes"), result.changes, units)
    if result.structures is not None:
        units = {"charge_density_c_per_m2": "C/m^2", "vertices_m": "m", "charge_c": "C"}
        _write_dataclass(f.create_group("structures"), result.structures, units)
    if score.enhancement is not None:
        _dataset(g, "enhancement", np.asarray(score.enhancement, dtype=float), "1")
    if result.simulation is not None:
        per_param = [param_unit(n) for n in result.simulation.names]
        units = {n: per_param for n in ("truth", "fitted", "rms_error", "crb_std")}
        units |= {"charge_rms_rel": "1", "charge_crb_rel": "1", "saturated": "1"}
        _write_dataclass(f.create_group("simulation"), result.simulation, units)
    if result.location is not None:
        _write_location(f.create_group("locate"), result.location)


def _write_location(g: h5py.Group, loc) -> None:
    """``/locate``: the :class:`~probeplan.locate.Location` and its delivery check."""
    per_param = [param_unit(n) for n in loc.names]
    units = {"time_s": "s", "estimate": per_param, "std": per_param, "chi2": "1"}
    _write_dataclass(g, dataclasses.replace(loc, delivery=None), units)
    g["estimate"].attrs["names"] = np.array(loc.names, dtype=_STR)
    for name in ("dof", "converged", "outliers", "saturated", "reported", "flag_counts"):
        g[name].attrs["units"] = "1"  # counts and flags: dimensionless
    if loc.delivery is not None:
        d = loc.delivery
        per = [param_unit(n) for n in d.names]
        units = {"rms_error": per, "bound_rms": per}
        units |= {n: "1" for n in ("ratio", "ratio_low", "ratio_high", "alpha")}
        _write_dataclass(g.create_group("delivery"), d, units)


#: What ``/search/restart_values`` holds, stored beside it.
RESTART_STARTS = (
    "final value of each complete exchange search on the candidate grid: first the one from "
    "the greedy layout, then one a restart from a randomised greedy start"
)


def _write_search(g: h5py.Group, s: SearchInfo, vunit: str) -> None:
    _dataset(g, "history", np.asarray(s.history, dtype=float).reshape(-1), vunit)
    if s.bound is not None:
        _dataset(g, "bound", np.float64(s.bound), "log det, SI")
    if s.bound_gap is not None:
        _dataset(g, "bound_gap", np.float64(s.bound_gap), "log det, SI")
    _dataset(g, "grid_spacing_m", np.float64(s.grid_spacing_m), "m")
    _dataset(g, "n_candidates", np.int64(s.n_candidates))
    _dataset(g, "seconds", np.float64(s.seconds), "s")
    g.attrs["objective"] = s.objective
    if s.evaluations_asked is not None:
        g.attrs["evaluations_asked"] = np.int64(s.evaluations_asked)
    if s.evaluations_spent:
        _strings(g, "evaluation_stages", [name for name, _ in s.evaluations_spent])
        _dataset(g, "evaluations_spent", np.array([n for _, n in s.evaluations_spent], np.int64))
    if s.restart_values is not None:
        runs = np.asarray(s.restart_values, dtype=float).reshape(-1)
        ds = _dataset(g, "restart_values", runs, vunit)
        ds.attrs["starts"] = RESTART_STARTS
    _strings(g, "stage_names", [name for name, _ in s.stages])
    _dataset(g, "stage_values", np.array([v for _, v in s.stages], dtype=float), vunit)
    _strings(g, "baseline_names", [b.name for b in s.baselines])
    _dataset(g, "baseline_values", np.array([b.value for b in s.baselines], dtype=float), vunit)
    base = g.create_group("baselines")
    for k, b in enumerate(s.baselines):
        pos = np.asarray(b.positions_m, dtype=float).reshape(-1, 3)
        _dataset(base.create_group(str(k)), "positions_m", pos, "m")


def _write_budget(g: h5py.Group, b: BudgetTable, vunit: str) -> None:
    _dataset(g, "count", np.asarray(b.count, dtype=np.int64))
    _strings(g, "grade", [str(x) for x in b.grade])
    _dataset(g, "cost", np.asarray(b.cost, dtype=float), "currency")
    _dataset(g, "value", np.asarray(b.value, dtype=float), vunit)
    _dataset(g, "meets_target", np.asarray(b.meets_target, dtype=bool))
    _dataset(g, "pareto", np.asarray(b.pareto, dtype=bool))
    _dataset(g, "feasible", b.fits())
    _strings(g, "reason", list(b.reason) if b.feasible is not None else [""] * len(b.count))
    g.attrs["cheapest"] = np.int64(b.cheapest)
    if b.target is not None:
        g.attrs["target"] = np.float64(b.target)
    layouts = g.create_group("layouts")
    for row, pos in enumerate(b.layouts):
        pos = np.asarray(pos, dtype=float).reshape(-1, 3)
        _dataset(layouts.create_group(str(row)), "positions_m", pos, "m")


def _write_dataclass(g: h5py.Group, obj, units: dict) -> None:
    """One dataclass a group: arrays and floats as datasets (with units), the rest as attrs.

    ``units`` maps field names to a unit or a per-last-axis list of units; a float field not in
    it takes the unit of its name's suffix (``param_unit``).
    """
    g.attrs["type"] = type(obj).__name__
    none_fields = []
    for fld in dataclasses.fields(obj):
        name, v = fld.name, getattr(obj, fld.name)
        if v is None:
            none_fields.append(name)
        elif isinstance(v, str):
            g.attrs[name] = v
        elif isinstance(v, bool | np.bool_):
            g.attrs[name] = bool(v)
        elif isinstance(v, int | np.integer):
            g.attrs[name] = np.int64(v)
        elif isinstance(v, tuple) and all(isinstance(x, str) for x in v):
            _strings(g, name, v).attrs["python_type"] = "tuple of str"
        else:
            arr = np.asarray(v)
            if arr.dtype.kind not in "biuf":
                raise TypeError(f"cannot store field `{name}` of {type(obj).__name__}: {arr.dtype}")
            unit = units.get(name, param_unit(name)) if arr.dtype.kind == "f" else None
            ds = _dataset(g, name, arr, unit)
            if isinstance(v, float | np.floating):
                ds.attrs["python_type"] = "float"
    g.attrs["none_fields"] = np.array(none_fields, dtype=_STR)
