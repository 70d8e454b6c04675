"""HDF5 result files in and out, and layout CSV files in.

Map of this module:

1. :func:`write_result` / :func:`read_result`: one :class:`~probeplan.result.Result` per file,
   every path of the contract's "Result file (HDF5)" table plus what ``probeplan show`` needs to
   reprint the whole summary from the file alone. Every dataset with a unit carries an attr
   ``units``. A file is written to a temporary name in the target folder and renamed, so a
   reader never sees a half-written file; an existing file is kept unless ``force``.
2. :func:`free_name`: the default output name of ``plan`` (``demo.h5``, ``demo-2.h5`` …).
3. :func:`read_layout_csv` / :func:`write_layout_csv`: a layout of new probes, one probe a row.

File layout (beyond the contract's paths)::

    /                      attrs probeplan_version, created_utc, command, config_toml, seed,
                           complete, title, config_path, caution, sign_convention,
                           [ground_z_m] (absent: free space)
    /layout/positions_m    (n_probes, 3)  m        all probes, installed first
    /layout/installed      (n_probes,)    bool
    /layout/names          (n_probes,)    str      installed names from the config, then new-k
    /layout/axes           (n_probes, n_axes, 3) 1 what each meter reads (zero rows: unused)
    /layout/grade          (n_probes,)    str      each meter's grade; "" = the [probes] noise
    /scenarios/params      (n_scenarios, n_params) attrs names, units (one per parameter)
    /score/fisher          (n_scenarios, n_params, n_params)
    /score/crb_std         (n_scenarios, n_params) attrs units (one per parameter)
    /score/value           ()             attrs criterion, aggregate, units
    /score/per_scenario    (n_scenarios,)
    /score/gain            (n_probes,)    1
    /score/saturated       (n_probes,)    1        fraction of scenarios saturating
    /score/singular        (n_scenarios,) bool
    /score/unresolved_text        (n_directions,) str   attr scenario
    /score/unresolved_weights     (n_directions, n_params)
    /score/unresolved_eigenvalue  (n_directions,)
    /score/unresolved_singular    (n_directions,) bool
    /score/failure_values  (n_probes,)    criterion with each single probe lost (if computed)
    /search/history, /search/bound, /search/bound_gap, /search/grid_spacing_m,
    /search/n_candidates, /search/seconds, /search/stage_names, /search/stage_values,
    /search/baseline_names, /search/baseline_values, /search/baselines/{k}/positions_m,
                           attr objective
    /budget/count, grade, cost, value, meets_target, pareto  attrs cheapest, [target]
    /budget/layouts/{row}/positions_m
    /extra                 attrs name -> float
    /notes                 (n_notes,)     str      what the user must know (rule violations …)
    /changes, /simulation  one field a dataset (arrays, floats) or attr (str, int, bool);
                           attr none_fields lists the fields that were None
"""

from __future__ import annotations

import csv
import dataclasses
import difflib
import math
import os
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from ._version import package_version
from .errors import InputError
from .probes import COMPONENTS
from .result import Result
from .resulttypes import (
    Baseline,
    BudgetTable,
    Changes,
    Direction,
    Score,
    SearchInfo,
    param_unit,
    probe_names,
    value_unit,
)

#: The sign convention every stored field value follows (root attr ``sign_convention``).
SIGN_CONVENTION = "physics: E points away from positive charge"

_STR = h5py.string_dtype()
_FISHER_UNITS = "SI (1/(unit_i unit_j))"


# --------------------------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------------------------


def write_result(result: Result, path: str | os.PathLike, *, force: bool = False) -> Path:
    """Write a result to an HDF5 file, atomically.

    Parameters
    ----------
    result : Result
    path : str or path-like
        The file to write (its folder must exist).
    force : bool
        Replace an existing file. Without it an existing file is an error.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    InputError
        The file exists (without ``force``), the path is a folder, its folder is missing, or
        the file cannot be created there.
    """
    target = check_writable(path, force=force)

    def write(tmp: Path) -> None:
        with h5py.File(tmp, "w") as f:
            _write(f, result)

    return _write_atomically(target, write, "the result file")


def _write_atomically(target: Path, write: Callable[[Path], None], what: str) -> Path:
    """``write`` a temporary file beside ``target``, then rename it to ``target``: a reader
    sees the old file or the whole new one, never half of it."""
    tmp = target.with_name(f".{target.name}.tmp-{os.getpid()}")
    try:
        write(tmp)
        os.replace(tmp, target)
    except OSError as exc:
        _remove_quietly(tmp)
        raise InputError(f"{target}: cannot write {what}: {_os_reason(exc)}.") from None
    except BaseException:
        # Never leave a half-written temporary behind, whatever stopped the write.
        _remove_quietly(tmp)
        raise
    return target


def check_writable(
    path: str | os.PathLike, *, force: bool = False, option: str = "--out", suffix: str = ".h5"
) -> Path:
    """Check, before any work is spent, that a result could be written to ``path``.

    ``option`` and ``suffix`` name the command-line option and file type in the messages.

    Raises
    ------
    InputError
        As :func:`write_result` would.
    """
    target = Path(os.fspath(path))
    if target.is_dir():
        raise InputError(f"{target}: is a folder; give a file name ending in {suffix} to {option}.")
    folder = target.parent
    if not folder.is_dir():
        raise InputError(f"{target}: the folder {folder} does not exist; create it first.")
    if target.exists() and not force:
        raise InputError(
            f"{target} exists; pass --force to overwrite it, or choose another {option}."
        )
    try:  # a real probe: permissions alone do not tell (root, read-only or special mounts)
        with tempfile.TemporaryFile(dir=folder):
            pass
    except OSError as exc:
        raise InputError(
            f"{target}: cannot write in the folder {folder} ({exc.strerror}); choose another "
            f"{option}."
        ) from None
    return target


def write_layout_csv(result: Result, path: str | os.PathLike, *, force: bool = False) -> Path:
    """Write the new probes of a result as a layout CSV, atomically: the file ``score --layout``
    reads (one probe a row: name, x_m, y_m, z_m, component, grade, gain), to hand to the
    installers or to rescore later. Installed probes are left out: they come from the config.

    Coordinates and gains are written with every digit (``repr``), so scoring the file gives
    the stored score exactly. A first comment line says where the layout came from.

    Parameters
    ----------
    result : Result
    path : str or path-like
    force : bool
        Replace an existing file.

    Returns
    -------
    Path
    """
    from .probes import component_of

    target = check_writable(path, force=force, option="--layout-csv", suffix=".csv")
    s = result.score
    new = ~np.asarray(s.installed, dtype=bool)
    names = probe_names(result)
    rows = []
    for k in np.flatnonzero(new):
        comp = "" if s.axes is None else component_of(s.axes[k])
        if isinstance(comp, tuple):
            comp = " ".join(repr(a) for a in comp)
        grade = "" if s.grade is None else s.grade[k]
        x, y, z = (repr(float(v)) for v in s.positions_m[k])
        rows.append([names[k], x, y, z, comp, grade, repr(float(s.gain[k]))])
    title = " ".join(result.title.split()) or "untitled"

    def write(tmp: Path) -> None:
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            fh.write(
                f"# new probes of {result.command} '{title}' ({result.config_path}), written "
                f"by probeplan {result.version}; installed probes come from the config\n"
            )
            writer = csv.writer(fh, lineterminator="\n")
            writer.writerow(["name", "x_m", "y_m", "z_m", "component", "grade", "gain"])
            writer.writerows(rows)

    return _write_atomically(target, write, "the layout file")


def _remove_quietly(path: Path) -> None:
    try:
        path.unlink()
    except FileNotFoundError:
        pass


def _os_reason(exc: OSError) -> str:
    return exc.strerror or str(exc) or type(exc).__name__


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
    if result.simulation is not None:
        per_param = [param_unit(n) for n in result.simulation.names]
        units = {n: per_param for n in ("truth", "fitted", "rms_error", "crb_std")}
        units |= {"charge_rms_rel": "1", "charge_crb_rel": "1", "saturated": "1"}
        _write_dataclass(f.create_group("simulation"), result.simulation, units)


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


# --------------------------------------------------------------------------------------------
# Reading
# --------------------------------------------------------------------------------------------


class _Reader:
    """Reads paths of one open file; a missing one is an InputError naming the file and path."""

    def __init__(self, f: h5py.File, name: str) -> None:
        self.f = f
        self.name = name

    def missing(self, what: str) -> InputError:
        return InputError(
            f"{self.name}: not a complete probeplan result file: {what} is missing "
            "(was it written by another program, or by an older probeplan?)."
        )

    def has(self, path: str) -> bool:
        return path in self.f

    def node(self, path: str):
        if path not in self.f:
            raise self.missing(f"/{path.lstrip('/')}")
        return self.f[path]

    def array(self, path: str, dtype=float, ndim: int | None = None) -> np.ndarray:
        ds = self.node(path)
        if not isinstance(ds, h5py.Dataset):
            raise self.missing(f"the dataset /{path.lstrip('/')}")
        out = np.asarray(ds[()], dtype=dtype)
        if ndim is not None and out.ndim != ndim:
            raise InputError(
                f"{self.name}: /{path.lstrip('/')} has {out.ndim} dimensions; expected {ndim}."
            )
        return out

    def scalar(self, path: str) -> float:
        return float(self.array(path, ndim=0))

    def strings(self, path: str) -> tuple[str, ...]:
        ds = self.node(path)
        return tuple(str(s) for s in ds.asstr()[()])

    def attr(self, path: str, key: str, convert: Callable = str):
        obj = self.node(path) if path not in ("", "/") else self.f
        if key not in obj.attrs:
            where = "the root" if path in ("", "/") else f"/{path.lstrip('/')}"
            raise self.missing(f"the attribute `{key}` of {where}")
        return convert(obj.attrs[key])


def _str_list(value) -> tuple[str, ...]:
    return tuple(v.decode() if isinstance(v, bytes) else str(v) for v in np.atleast_1d(value))


def read_result(path: str | os.PathLike) -> Result:
    """Read a result file written by :func:`write_result`.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    Result
        Every number exactly as it was written.

    Raises
    ------
    InputError
        The file is missing, is not HDF5, or is not a (complete) probeplan result; the message
        names the file and what is missing.
    """
    name = os.fspath(path)
    p = Path(name)
    if not p.exists():
        raise InputError(f"{name}: no such result file.")
    if p.is_dir():
        raise InputError(f"{name}: is a folder, not a result file.")
    try:
        f = h5py.File(p, "r")
    except OSError:
        raise InputError(
            f"{name}: not an HDF5 file; expected a result written by `probeplan plan` or "
            "`probeplan score --out`."
        ) from None
    with f:
        if "probeplan_version" not in f.attrs:
            raise InputError(
                f"{name}: an HDF5 file, but not a probeplan result (no root attribute "
                "`probeplan_version`)."
            )
        return _read(_Reader(f, name))


def _layout_axes(r: _Reader, n_probes: int) -> np.ndarray | None:
    if not r.has("layout/axes"):
        return None  # written before each meter's axes were stored
    axes = r.array("layout/axes", ndim=3)
    if axes.shape[0] != n_probes or axes.shape[2] != 3 or not np.all(np.isfinite(axes)):
        raise InputError(
            f"{r.name}: /layout/axes must be finite with shape ({n_probes}, n_axes, 3), one "
            f"table per probe; found shape {axes.shape}. The file is inconsistent."
        )
    return axes


def _layout_grade(r: _Reader, n_probes: int) -> tuple[str, ...] | None:
    if not r.has("layout/grade"):
        return None
    grade = r.strings("layout/grade")
    if len(grade) != n_probes:
        raise InputError(
            f"{r.name}: /layout/grade holds {len(grade)} names for {n_probes} probes; the file "
            "is inconsistent."
        )
    return grade


def _read(r: _Reader) -> Result:
    names = r.attr("scenarios/params", "names", _str_list)
    n_params = len(names)
    positions = r.array("layout/positions_m", ndim=2)
    theta = r.array("scenarios/params", ndim=2)
    fisher = r.array("score/fisher", ndim=3)
    weights = r.array("score/unresolved_weights", ndim=2)
    texts = r.strings("score/unresolved_text")
    eig = r.array("score/unresolved_eigenvalue", ndim=1)
    sing = r.array("score/unresolved_singular", dtype=bool, ndim=1)
    directions = [
        Direction(weights[k].copy(), float(eig[k]), bool(sing[k]), texts[k])
        for k in range(len(texts))
    ]
    if theta.shape[1] != n_params or fisher.shape[1:] != (n_params, n_params):
        raise InputError(
            f"{r.name}: /scenarios/params names {n_params} parameters but the stored arrays "
            f"have {theta.shape[1]}; the file is inconsistent."
        )
    score = Score(
        positions_m=positions,
        installed=r.array("layout/installed", dtype=bool, ndim=1),
        gain=r.array("score/gain", ndim=1),
        names=names,
        theta=theta,
        fisher=fisher,
        crb_std=r.array("score/crb_std", ndim=2),
        per_scenario=r.array("score/per_scenario", ndim=1),
        value=r.scalar("score/value"),
        criterion=str(r.attr("score/value", "criterion")),
        aggregate=str(r.attr("score/value", "aggregate")),
        singular=r.array("score/singular", dtype=bool, ndim=1),
        saturated=r.array("score/saturated", ndim=1),
        unresolved=directions,
        unresolved_scenario=int(r.attr("score/unresolved_text", "scenario", int)),
        failure_values=(
            r.array("score/failure_values", ndim=1) if r.has("score/failure_values") else None
        ),
        axes=_layout_axes(r, positions.shape[0]),
        grade=_layout_grade(r, positions.shape[0]),
    )
    search = _read_search(r) if r.has("search") else None
    budget = _read_budget(r) if r.has("budget") else None
    extra = {}
    if r.has("extra"):
        extra = {str(k): float(v) for k, v in r.f["extra"].attrs.items()}
    row = int(extra.get("budget_row_scored", -1))
    if score.grade is None and budget is not None and 0 <= row < len(budget.grade):
        # Written before each meter's grade was stored: the new meters of a budget result are
        # of the scored row's grade, installed ones of [probes]' (the only ones there were).
        grade = tuple("" if inst else str(budget.grade[row]) for inst in score.installed)
        score = dataclasses.replace(score, grade=grade)
    ground = r.f.attrs.get("ground_z_m")
    sections = {}
    if r.has("changes"):
        sections["changes"] = _read_dataclass(r, "changes", Changes)
    if r.has("simulation"):
        from .simulate import Simulation

        sections["simulation"] = _read_dataclass(r, "simulation", Simulation)
    names = r.strings("layout/names") if r.has("layout/names") else None
    notes = r.strings("notes") if r.has("notes") else ()
    return Result(
        command=r.attr("", "command"),
        config_text=r.attr("", "config_toml"),
        config_path=r.attr("", "config_path"),
        title=r.attr("", "title"),
        seed=r.attr("", "seed", int),
        version=r.attr("", "probeplan_version"),
        created_utc=r.attr("", "created_utc"),
        caution=r.attr("", "caution"),
        ground_z_m=None if ground is None else float(ground),
        score=score,
        search=search,
        budget=budget,
        complete=r.attr("", "complete", bool),
        extra=extra,
        probe_names=None if names is None else tuple(names),
        notes=tuple(notes),
        **sections,
    )


def _read_dataclass(r: _Reader, path: str, cls):
    """Inverse of :func:`_write_dataclass`."""
    g = r.node(path)
    none_fields = set(_str_list(g.attrs.get("none_fields", [])))
    kwargs = {}
    for fld in dataclasses.fields(cls):
        name = fld.name
        if name in none_fields:
            kwargs[name] = None
        elif name in g:
            ds = g[name]
            kind = ds.attrs.get("python_type", "array")
            if kind == "tuple of str":
                kwargs[name] = r.strings(f"{path}/{name}")
            elif kind == "float":
                kwargs[name] = float(ds[()])
            else:
                kwargs[name] = np.asarray(ds[()])
        elif name in g.attrs:
            v = g.attrs[name]
            if isinstance(v, np.bool_):
                v = bool(v)
            elif isinstance(v, np.integer):
                v = int(v)
            kwargs[name] = v
        elif fld.default is dataclasses.MISSING and fld.default_factory is dataclasses.MISSING:
            raise r.missing(f"/{path}/{name}")
    return cls(**kwargs)


def _read_search(r: _Reader) -> SearchInfo:
    names = r.strings("search/baseline_names")
    values = r.array("search/baseline_values", ndim=1)
    baselines = tuple(
        Baseline(names[k], float(values[k]), r.array(f"search/baselines/{k}/positions_m", ndim=2))
        for k in range(len(names))
    )
    stage_names = r.strings("search/stage_names")

    stage_values = r.array("search/stage_values", ndim=1)
    return SearchInfo(
        history=r.array("search/history", ndim=1),
        bound=r.scalar("search/bound") if r.has("search/bound") else None,
        bound_gap=r.scalar("search/bound_gap") if r.has("search/bound_gap") else None,
        grid_spacing_m=r.scalar("search/grid_spacing_m"),
        n_candidates=int(r.array("search/n_candidates", dtype=np.int64, ndim=0)),
        baselines=baselines,
        stages=tuple((stage_names[k], float(stage_values[k])) for k in range(len(stage_names))),
        seconds=r.scalar("search/seconds"),
        objective=r.attr("search", "objective"),
    )


def _read_budget(r: _Reader) -> BudgetTable:
    count = r.array("budget/count", dtype=np.int64, ndim=1)
    target = r.f["budget"].attrs.get("target")
    return BudgetTable(
        count=count,
        grade=np.array(r.strings("budget/grade"), dtype=object),
        cost=r.array("budget/cost", ndim=1),
        value=r.array("budget/value", ndim=1),
        meets_target=r.array("budget/meets_target", dtype=bool, ndim=1),
        pareto=r.array("budget/pareto", dtype=bool, ndim=1),
        cheapest=r.attr("budget", "cheapest", int),
        target=None if target is None else float(target),
        layouts=tuple(
            r.array(f"budget/layouts/{row}/positions_m", ndim=2) for row in range(count.size)
        ),
    )


# --------------------------------------------------------------------------------------------
# Output names
# --------------------------------------------------------------------------------------------


def free_name(stem: str, folder: str | os.PathLike = ".") -> Path:
    """The first free file name ``<stem>.h5``, ``<stem>-2.h5``, ``<stem>-3.h5`` … in a folder.

    Parameters
    ----------
    stem : str
        e.g. the config file's stem.
    folder : str or path-like

    Returns
    -------
    Path
        ``folder / name``; the file does not exist (at the time of the call).
    """
    base = Path(os.fspath(folder))
    candidate = base / f"{stem}.h5"
    k = 2
    while candidate.exists():
        candidate = base / f"{stem}-{k}.h5"
        k += 1
    return candidate


# --------------------------------------------------------------------------------------------
# Layout CSV
# --------------------------------------------------------------------------------------------

#: Columns a layout CSV may hold; the first three are required.
LAYOUT_COLUMNS: tuple[str, ...] = ("x_m", "y_m", "z_m", "name", "component", "grade", "gain")
_REQUIRED = ("x_m", "y_m", "z_m")


@dataclass(frozen=True, eq=False)
class LayoutFile:
    """A layout of probes read from a CSV file.

    Attributes
    ----------
    positions_m : (n_probes, 3) float
        Probe positions, m.
    names : tuple of n_probes str
        From the ``name`` column; ``new-k`` (k from 0) where absent or empty.
    components : tuple of n_probes (str, (3,) float tuple or None), or None
        From the ``component`` column: ``"x"``, ``"y"``, ``"z"``, ``"vector"`` or a unit vector
        given as three numbers separated by spaces; ``None`` in an empty cell. ``None`` when the
        column is absent.
    grades : tuple of n_probes (str or None), or None
        From the ``grade`` column; ``None`` when the column is absent.
    gains : tuple of n_probes (float or None), or None
        From the ``gain`` column, calibration factors > 0; ``None`` in an empty cell or for an
        absent column.
    path : str
        The file it came from.
    """

    positions_m: np.ndarray
    names: tuple[str, ...]
    components: tuple | None = None
    grades: tuple | None = None
    gains: tuple | None = None
    path: str = "<layout>"


def read_layout_csv(path: str | os.PathLike) -> LayoutFile:
    """Read a layout CSV: a header row with at least ``x_m,y_m,z_m``, then one probe a row.

    Optional columns: ``name``, ``component``, ``grade``, ``gain``, in any order. Blank lines
    and lines whose first cell starts with ``#`` are skipped.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    LayoutFile

    Raises
    ------
    InputError
        Naming the file and, for a bad cell, the line and column: a missing or unknown column,
        a cell that is not a finite number, an empty file, no probe rows.
    """
    name = os.fspath(path)
    try:
        with open(name, encoding="utf-8-sig", newline="") as fh:
            reader = csv.reader(fh)
            # line_num after a read is the file line the row ended on: what a user sees.
            rows = [(reader.line_num, row) for row in reader]
    except FileNotFoundError:
        raise InputError(f"{name}: no such layout file.") from None
    except IsADirectoryError:
        raise InputError(f"{name}: is a folder, not a layout CSV file.") from None
    except UnicodeDecodeError as exc:
        raise InputError(f"{name}: not UTF-8 text (byte {exc.start}).") from None
    except csv.Error as exc:
        raise InputError(f"{name}: not a readable CSV file: {exc}.") from None
    except OSError as exc:
        raise InputError(f"{name}: cannot read the layout file: {_os_reason(exc)}.") from None
    return _parse_layout(name, rows)


def _parse_layout(name: str, lines: list[tuple[int, list[str]]]) -> LayoutFile:
    rows = [(n, row) for n, row in lines if any(c.strip() for c in row)]
    rows = [(n, row) for n, row in rows if not row[0].lstrip().startswith("#")]
    if not rows:
        raise InputError(
            f"{name}: empty file; expected a header row with x_m,y_m,z_m and one probe a row."
        )
    header_line, header = rows[0]
    header = [c.strip() for c in header]
    allowed = ", ".join(LAYOUT_COLUMNS)
    for col in header:
        if col not in LAYOUT_COLUMNS:
            close = difflib.get_close_matches(col.lower(), LAYOUT_COLUMNS, n=1)
            hint = f" (did you mean `{close[0]}`?)" if close else ""
            shown = f"`{col}`" if col else "an empty column name"
            raise InputError(
                f"{name}: line {header_line}: unknown column {shown}{hint}; "
                f"allowed columns: {allowed}."
            )
    for col in header:
        if header.count(col) > 1:
            raise InputError(f"{name}: line {header_line}: column `{col}` appears twice.")
    missing = [c for c in _REQUIRED if c not in header]
    if missing:
        raise InputError(
            f"{name}: line {header_line}: missing column {', '.join(f'`{c}`' for c in missing)}; "
            "the header row must name x_m, y_m and z_m (any order; optional: name, component, "
            "grade, gain)."
        )
    body = rows[1:]
    if not body:
        raise InputError(
            f"{name}: no probes: the header is on line {header_line} but no row follows; "
            "give one probe a row."
        )
    col = {c: k for k, c in enumerate(header)}
    pos = np.empty((len(body), 3))
    names: list[str] = []
    comps: list = []
    grades: list = []
    gains: list = []
    for i, (line, row) in enumerate(body):
        if len(row) != len(header):
            raise InputError(
                f"{name}: line {line}: {len(row)} cells, expected {len(header)} "
                f"(one per header column: {','.join(header)})."
            )
        cell = {c: row[k].strip() for c, k in col.items()}
        for j, c in enumerate(_REQUIRED):
            pos[i, j] = _number(name, line, c, cell[c], "a number in metres")
        names.append(cell.get("name") or f"new-{i}")
        if "component" in col:
            comps.append(_component_cell(name, line, cell["component"]))
        if "grade" in col:
            grades.append(cell["grade"] or None)
        if "gain" in col:
            text = cell["gain"]
            g = _number(name, line, "gain", text, "a calibration factor > 0") if text else None
            if g is not None and g <= 0.0:
                raise InputError(
                    f"{name}: line {line}, column gain: expected a calibration factor > 0, "
                    f"got {text!r}."
                )
            gains.append(g)
    seen: dict[str, int] = {}
    for i, n in enumerate(names):
        if n in seen:
            raise InputError(
                f"{name}: line {body[i][0]}, column name: {n!r} is already the name of the "
                f"probe on line {body[seen[n]][0]}; probe names must be unique."
            )
        seen[n] = i
    return LayoutFile(
        positions_m=pos,
        names=tuple(names),
        components=tuple(comps) if "component" in col else None,
        grades=tuple(grades) if "grade" in col else None,
        gains=tuple(gains) if "gain" in col else None,
        path=name,
    )


def _number(name: str, line: int, column: str, text: str, what: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = None
    if value is None or not math.isfinite(value):
        kind = what if value is None else what.replace("a ", "a finite ", 1)
        got = repr(text) if text else "an empty cell"
        raise InputError(f"{name}: line {line}, column {column}: expected {kind}, got {got}.")
    return value


def _component_cell(name: str, line: int, text: str):
    if not text:
        return None
    if text in COMPONENTS:
        return text
    parts = text.replace(";", " ").split()
    try:
        axis = tuple(float(p) for p in parts)
    except ValueError:
        axis = ()
    norm = math.sqrt(sum(a * a for a in axis)) if len(axis) == 3 else 0.0
    if len(axis) != 3 or not math.isfinite(norm) or norm == 0.0:
        raise InputError(
            f"{name}: line {line}, column component: expected one of x, y, z, vector or a "
            f"unit vector as three numbers separated by spaces (e.g. '0 0 1'), got {text!r}."
        )
    return tuple(a / norm for a in axis)
