"""Reading a result file written by :func:`probeplan.store.write_result`: every number exactly
as written; a missing or inconsistent path is an :class:`~probeplan.errors.InputError` naming
the file and the path."""

from __future__ import annotations

import dataclasses
import os
import tomllib
from collections.abc import Callable
from pathlib import Path

import h5py
import numpy as np

from ..errors import InputError
from ..geo import Frame
from ..result import Result
from ..resulttypes import (
    Baseline,
    BudgetTable,
    Changes,
    Direction,
    Score,
    SearchInfo,
    StructureSurfaces,
)

#: Dataset dtypes a reader accepts, by the dtype asked for: numpy dtype kinds.
_KINDS = {float: "fiu", np.int64: "iu", bool: "biu"}
_KIND_WORDS = {float: "numbers", np.int64: "integers", bool: "true/false flags"}
_ATTR_WORDS = {str: "text", bool: "true or false", int: "an integer", float: "a finite number"}


class _Reader:
    """The one checked reader of a result file's paths.

    Every dataset is read through :meth:`array` or :meth:`strings`, which check it against what
    the result means before anything uses it: present, a dataset, of a numeric (or string)
    type, of the expected rank and of the expected length along each named dimension (the
    first dataset to name a dimension, e.g. ``"n_probes"``, fixes it for the others), finite
    where the meaning requires it and never NaN, flags 0 or 1. A failure is one
    :class:`InputError` naming the file, the dataset, what was found and what is allowed.
    """

    def __init__(self, f: h5py.File, name: str) -> None:
        self.f = f
        self.name = name
        self.dims: dict[str, tuple[int, str]] = {}  # dimension name → (length, set by)

    def missing(self, what: str) -> InputError:
        return InputError(
            f"{self.name}: not a complete probeplan result file: {what} is missing "
            "(was it written by another program, or by an older probeplan?)."
        )

    def bad(self, path: str, found: str, allowed: str) -> InputError:
        return InputError(
            f"{self.name}: the dataset /{path.lstrip('/')} {found}; {allowed}. The file is "
            "damaged or was edited by hand."
        )

    def has(self, path: str) -> bool:
        return path in self.f

    def node(self, path: str):
        if path not in self.f:
            raise self.missing(f"/{path.lstrip('/')}")
        return self.f[path]

    def dataset(self, path: str) -> h5py.Dataset:
        ds = self.node(path)
        if not isinstance(ds, h5py.Dataset):
            raise self.missing(f"the dataset /{path.lstrip('/')}")
        return ds

    def _check_shape(self, path: str, shape: tuple[int, ...], want: tuple) -> None:
        if len(shape) != len(want):
            raise self.bad(path, f"has {len(shape)} dimensions", f"expected {len(want)}")
        for axis, (n, w) in enumerate(zip(shape, want, strict=True)):
            by = ""
            if isinstance(w, str):
                w, by = self.dims.setdefault(w, (n, path))
            if w is not None and n != w:
                like = f" like /{by.lstrip('/')}" if by else ""
                raise self.bad(path, f"has length {n} along axis {axis}", f"expected {w}{like}")

    def array(
        self,
        path: str,
        dtype=float,
        shape: tuple | None = None,
        finite: bool = True,
        nan: bool = False,
    ) -> np.ndarray:
        """The dataset at ``path`` as ``dtype``, checked (see the class).

        ``shape`` gives each axis as a length, a dimension name, or None (any); ``finite``
        false allows ±inf where the meaning has an infinite value; ``nan`` allows NaN where a
        section's own docstring gives it a meaning (``Changes.old_rescored``).
        """
        ds = self.dataset(path)
        kind = ds.dtype.kind
        if kind not in _KINDS[dtype]:
            raise self.bad(path, f"holds {ds.dtype} values", f"expected {_KIND_WORDS[dtype]}")
        if shape is not None:
            self._check_shape(path, ds.shape, shape)
        raw = np.asarray(ds[()])
        if not nan and raw.dtype.kind == "f" and np.isnan(raw).any():
            raise self.bad(path, "holds NaN", "expected numbers")
        if dtype is not float and raw.dtype.kind == "f" and not np.all(raw == np.round(raw)):
            raise self.bad(path, "holds fractions", f"expected {_KIND_WORDS[dtype]}")
        if finite and raw.dtype.kind == "f" and not np.isfinite(raw[~np.isnan(raw)]).all():
            raise self.bad(path, "holds an infinite value", "expected finite numbers")
        if dtype is bool and not np.isin(raw, (0, 1)).all():
            raise self.bad(path, "holds values other than 0 and 1", "expected true/false flags")
        if dtype is np.int64 and raw.size and np.abs(raw.astype(float)).max() > 2.0**53:
            raise self.bad(path, "holds an integer too large", "expected a count")
        return raw.astype(dtype)

    def scalar(self, path: str, finite: bool = True, nan: bool = False) -> float:
        return float(self.array(path, shape=(), finite=finite, nan=nan))

    def strings(self, path: str, length: str | int | None = None) -> tuple[str, ...]:
        ds = self.dataset(path)
        if h5py.check_string_dtype(ds.dtype) is None:
            raise self.bad(path, f"holds {ds.dtype} values", "expected text")
        self._check_shape(path, ds.shape, (length,))
        try:
            return tuple(str(s) for s in ds.asstr()[()])
        except UnicodeDecodeError:
            raise self.bad(path, "holds text that is not UTF-8", "expected UTF-8 text") from None

    def attr(self, path: str, key: str, convert: Callable = str):
        obj = self.node(path) if path not in ("", "/") else self.f
        where = "the root" if path in ("", "/") else f"/{path.lstrip('/')}"
        if key not in obj.attrs:
            raise self.missing(f"the attribute `{key}` of {where}")
        value = obj.attrs[key]
        # Each type read strictly: `complete = "no"` is not true, `seed = 2.5` is not 2.
        ok = {
            str: isinstance(value, str | bytes),
            bool: isinstance(value, bool | np.bool_),
            int: isinstance(value, int | np.integer) and not isinstance(value, bool | np.bool_),
            float: isinstance(value, float | int | np.floating | np.integer) and np.isfinite(value),
            _str_list: all(isinstance(v, str | bytes) for v in np.atleast_1d(value).tolist()),
        }.get(convert, True)
        if not ok:
            raise InputError(
                f"{self.name}: the attribute `{key}` of {where} is {value!r}; expected "
                f"{_ATTR_WORDS.get(convert, 'a value')}. The file is damaged or was edited "
                "by hand."
            )
        if convert is str and isinstance(value, bytes):
            value = value.decode("utf-8", "replace")
        return convert(value)


def _str_list(value) -> tuple[str, ...]:
    return tuple(v.decode() if isinstance(v, bytes) else str(v) for v in np.atleast_1d(value))


_ATTR_WORDS[_str_list] = "a list of names"


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


def _layout_axes(r: _Reader) -> np.ndarray | None:
    if not r.has("layout/axes"):
        return None  # written before each meter's axes were stored
    return r.array("layout/axes", shape=("n_probes", None, 3))


def _layout_grade(r: _Reader) -> tuple[str, ...] | None:
    if not r.has("layout/grade"):
        return None
    return r.strings("layout/grade", "n_probes")


def _read(r: _Reader) -> Result:
    names = r.attr("scenarios/params", "names", _str_list)
    r.dims["n_params"] = (len(names), "scenarios/params (attr names)")
    positions = r.array("layout/positions_m", shape=("n_probes", 3))
    theta = r.array("scenarios/params", shape=("n_scenarios", "n_params"))
    fisher = r.array("score/fisher", shape=("n_scenarios", "n_params", "n_params"))
    weights = r.array("score/unresolved_weights", shape=("n_unresolved", "n_params"))
    texts = r.strings("score/unresolved_text", "n_unresolved")
    eig = r.array("score/unresolved_eigenvalue", shape=("n_unresolved",))
    sing = r.array("score/unresolved_singular", dtype=bool, shape=("n_unresolved",))
    directions = [
        Direction(weights[k].copy(), float(eig[k]), bool(sing[k]), texts[k])
        for k in range(len(texts))
    ]
    score = Score(
        positions_m=positions,
        installed=r.array("layout/installed", dtype=bool, shape=("n_probes",)),
        gain=r.array("score/gain", shape=("n_probes",)),
        names=names,
        theta=theta,
        fisher=fisher,
        crb_std=r.array("score/crb_std", shape=("n_scenarios", "n_params"), finite=False),
        per_scenario=r.array("score/per_scenario", shape=("n_scenarios",), finite=False),
        value=r.scalar("score/value", finite=False),
        criterion=str(r.attr("score/value", "criterion")),
        aggregate=str(r.attr("score/value", "aggregate")),
        singular=r.array("score/singular", dtype=bool, shape=("n_scenarios",)),
        saturated=r.array("score/saturated", shape=("n_probes",)),
        unresolved=directions,
        unresolved_scenario=int(r.attr("score/unresolved_text", "scenario", int)),
        failure_values=(
            r.array("score/failure_values", shape=("n_probes",), finite=False)
            if r.has("score/failure_values")
            else None
        ),
        axes=_layout_axes(r),
        grade=_layout_grade(r),
        enhancement=(
            r.array("score/enhancement", shape=("n_probes",))
            if r.has("score/enhancement")
            else None
        ),
    )
    search = _read_search(r) if r.has("search") else None
    budget = _read_budget(r) if r.has("budget") else None
    extra = {}
    if r.has("extra"):
        extra = {str(k): r.attr("extra", str(k), float) for k in r.f["extra"].attrs}
    row = int(extra.get("budget_row_scored", -1))
    if score.grade is None and budget is not None and 0 <= row < len(budget.grade):
        # Written before each meter's grade was stored: the new meters of a budget result are
        # of the scored row's grade, installed ones of [probes]' (the only ones there were).
        grade = tuple("" if inst else str(budget.grade[row]) for inst in score.installed)
        score = dataclasses.replace(score, grade=grade)
    ground = r.attr("", "ground_z_m", float) if "ground_z_m" in r.f.attrs else None
    sections = {}
    if r.has("frame"):
        keys = ("origin_lon_deg", "origin_lat_deg", "origin_height_m")
        sections["frame"] = Frame(*(r.attr("frame", k, float) for k in keys))
    if r.has("changes"):
        sections["changes"] = _read_dataclass(r, "changes", Changes)
    if r.has("structures"):
        sections["structures"] = _read_dataclass(r, "structures", StructureSurfaces)
    if r.has("simulation"):
        from ..simulate import Simulation

        sections["simulation"] = _read_dataclass(r, "simulation", Simulation)
    if r.has("locate"):
        from ..locate import Delivery, Location

        location = _read_dataclass(r, "locate", Location)
        if r.has("locate/delivery"):
            delivery = _read_dataclass(r, "locate/delivery", Delivery)
            location = dataclasses.replace(location, delivery=delivery)
        sections["location"] = location
    names = r.strings("layout/names", "n_probes") if r.has("layout/names") else None
    notes = r.strings("notes") if r.has("notes") else ()
    sources = None
    if r.has("scenarios/source_names"):
        sources = r.strings("scenarios/source_names", _source_count(r))
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
        source_names=None if sources is None else tuple(sources),
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
            ds = r.dataset(f"{path}/{name}")
            kind = ds.attrs.get("python_type", "array")
            if kind == "tuple of str":
                kwargs[name] = r.strings(f"{path}/{name}")
            elif kind == "float":
                kwargs[name] = r.scalar(f"{path}/{name}", finite=False, nan=True)
            else:
                want = {"b": bool, "i": np.int64, "u": np.int64}.get(ds.dtype.kind, float)
                kwargs[name] = r.array(f"{path}/{name}", want, finite=False, nan=True)
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


def _source_count(r: _Reader) -> int | None:
    """How many ``[[source]]`` tables the stored config has (None if its text does not parse).

    The source names must match them one for one; the config text is the file's own record.
    """
    try:
        data = tomllib.loads(r.attr("", "config_toml"))
    except tomllib.TOMLDecodeError:
        return None
    tables = data.get("source", [])
    return len(tables) if isinstance(tables, list) else None


def _read_search(r: _Reader) -> SearchInfo:
    names = r.strings("search/baseline_names", "n_baselines")
    values = r.array("search/baseline_values", shape=("n_baselines",), finite=False)
    baselines = tuple(
        Baseline(
            names[k],
            float(values[k]),
            r.array(f"search/baselines/{k}/positions_m", shape=(None, 3)),
        )
        for k in range(len(names))
    )
    stage_names = r.strings("search/stage_names", "n_stages")
    stage_values = r.array("search/stage_values", shape=("n_stages",), finite=False)
    spent = ()
    if r.has("search/evaluations_spent"):
        stages = r.strings("search/evaluation_stages", "n_evaluation_stages")
        counts = r.array("search/evaluations_spent", dtype=np.int64, shape=("n_evaluation_stages",))
        spent = tuple((stages[k], int(counts[k])) for k in range(counts.size))
    asked = r.f["search"].attrs.get("evaluations_asked")
    return SearchInfo(
        history=r.array("search/history", shape=(None,), finite=False),
        bound=r.scalar("search/bound", finite=False) if r.has("search/bound") else None,
        bound_gap=(
            r.scalar("search/bound_gap", finite=False) if r.has("search/bound_gap") else None
        ),
        grid_spacing_m=r.scalar("search/grid_spacing_m"),
        n_candidates=int(r.array("search/n_candidates", dtype=np.int64, shape=())),
        baselines=baselines,
        stages=tuple((stage_names[k], float(stage_values[k])) for k in range(len(stage_names))),
        seconds=r.scalar("search/seconds"),
        objective=r.attr("search", "objective"),
        evaluations_asked=None if asked is None else r.attr("search", "evaluations_asked", int),
        evaluations_spent=spent,
        # Written since the restarts, and only where they ran.
        restart_values=(
            r.array("search/restart_values", shape=(None,), finite=False)
            if r.has("search/restart_values")
            else None
        ),
    )


def _read_budget(r: _Reader) -> BudgetTable:
    rows = ("n_rows",)
    count = r.array("budget/count", dtype=np.int64, shape=rows)
    target = r.attr("budget", "target", float) if "target" in r.f["budget"].attrs else None
    return BudgetTable(
        count=count,
        grade=np.array(r.strings("budget/grade", "n_rows"), dtype=object),
        cost=r.array("budget/cost", shape=rows),
        value=r.array("budget/value", shape=rows, finite=False),
        meets_target=r.array("budget/meets_target", dtype=bool, shape=rows),
        pareto=r.array("budget/pareto", dtype=bool, shape=rows),
        cheapest=r.attr("budget", "cheapest", int),
        target=target,
        layouts=tuple(
            r.array(f"budget/layouts/{row}/positions_m", shape=(None, 3))
            for row in range(count.size)
        ),
        # Written since a count that does not fit became a row rather than an error.
        feasible=(
            r.array("budget/feasible", dtype=bool, shape=rows) if r.has("budget/feasible") else None
        ),
        reason=r.strings("budget/reason", "n_rows") if r.has("budget/reason") else (),
    )
