"""Reading a result file written by :func:`probeplan.store.write_result`: every number exactly
as written; a missing or inconsistent path is an :class:`~probeplan.errors.InputError` naming
the file and the path."""

from __future__ import annotations

import dataclasses
import os
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
        enhancement=r.array("score/enhancement", ndim=1) if r.has("score/enhancement") else None,
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
    names = r.strings("layout/names") if r.has("layout/names") else None
    notes = r.strings("notes") if r.has("notes") else ()
    sources = r.strings("scenarios/source_names") if r.has("scenarios/source_names") else None
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
    spent = ()
    if r.has("search/evaluations_spent"):
        stages = r.strings("search/evaluation_stages")
        counts = r.array("search/evaluations_spent", dtype=np.int64, ndim=1)
        if len(stages) != counts.size:
            raise InputError(
                f"{r.name}: /search/evaluation_stages names {len(stages)} stages but "
                f"/search/evaluations_spent holds {counts.size} counts; the file is damaged."
            )
        spent = tuple((stages[k], int(counts[k])) for k in range(counts.size))
    asked = r.f["search"].attrs.get("evaluations_asked")
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
        evaluations_asked=None if asked is None else r.attr("search", "evaluations_asked", int),
        evaluations_spent=spent,
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
