"""Runs that start from a stored result: ``--resume``, ``--from``, ``--from-as`` and the
commands that read a result back (``simulate``, ``plot``). No physics here: the stored layouts
are handed to the library as they are.

Map of this module:

1. :func:`prepare_run`: what ``plan`` and ``budget`` resolve from their arguments before any
   work (the config given, resumed or bundled; the ``--from`` result; the output file).
2. Stored results as inputs: :func:`read_resumed`, :func:`read_old`, :func:`with_old_installed`
   (old probes kept as installed meters), :func:`stored_problem`, :func:`stored_options`.
3. :func:`changes`: what changed against the ``--from`` result, with its layout rescored.
4. Layout files as inputs: :func:`check_grades`, :func:`csv_axes`, :func:`csv_gains`.
"""

from __future__ import annotations

import argparse
import os
from collections.abc import Iterator
from dataclasses import replace
from importlib import resources
from pathlib import Path
from typing import NamedTuple

import numpy as np

from .errors import InputError

_DEMO = "demo.toml"

RESUME_OR_FROM = (
    "give --resume or --from, not both: --resume continues a run, --from starts a new one "
    "from an earlier result."
)


# --------------------------------------------------------------------------------------------
# Loading the inputs
# --------------------------------------------------------------------------------------------


def load_config(path: str):
    """The config of a file (every check; bad input raises InputError)."""
    from .config import load_config as load

    return load(path)


def parse_config_text(text: str, path: str):
    """The config of a stored config text (every check; bad input raises InputError)."""
    from .config import parse_config

    return parse_config(text, path)


def demo_config():
    """The bundled fictional demo site (probeplan/data/demo.toml)."""
    ref = resources.files("probeplan") / "data" / _DEMO
    if not ref.is_file():
        raise InputError(
            f"the bundled demo config {_DEMO} is missing from this installation; "
            "give a CONFIG file."
        )
    with resources.as_file(ref) as path:
        return load_config(str(path))


def build_problem(config, **kwargs):
    """:func:`probeplan.problem.build_problem`; a meter of the config on a point or line
    charge (an infinite field) is the config's fault and said so."""
    from .problem import build_problem as build
    from .sources import SingularPointError

    try:
        return build(config, **kwargs)
    except SingularPointError as exc:
        raise InputError(f"{config.path}: {exc}") from None


# --------------------------------------------------------------------------------------------
# plan and budget: the run's inputs and output
# --------------------------------------------------------------------------------------------


class Run(NamedTuple):
    """What plan and budget resolve from their arguments before any work."""

    stored: object  # the resumed result, or None
    config: object  # the config to run (with --from-as installed: old probes added)
    base_config: object  # the config as the user wrote it
    old: object  # the --from result, or None
    out: Path
    force: bool
    names: Iterator[Path]  # a default `out`: the names to take if it is taken meanwhile


def prepare_run(args: argparse.Namespace, command: str, suffix: str) -> Run:
    """Config (given, resumed or the demo), --resume / --from, and the output file, checked
    writable before the search spends its time."""
    from .store import check_writable, free_names

    stored = read_resumed(args.resume, command) if args.resume else None
    if args.config:
        config = load_config(args.config)
    elif stored is not None:
        config = parse_config_text(stored.config_text, stored.config_path)
    elif command == "plan":
        config = demo_config()
    else:
        raise InputError(f"{command} needs a CONFIG (or --resume FILE.h5)")
    if stored is not None:
        config = with_old_installed(config, stored, args.resume, resumed=True)
    base_config, old = config, None
    if args.from_file:
        if stored is not None:
            raise InputError(RESUME_OR_FROM)
        old = read_old(args.from_file)
        if args.from_as == "installed":
            config = with_old_installed(config, old, args.from_file)
    resume_path = Path(args.resume) if args.resume else None
    names: Iterator[Path] = iter(())
    if args.out:
        out = Path(args.out)
    elif resume_path is not None:
        out = resume_path
    else:
        names = free_names(Path(config.path).stem + suffix)
        out = next(p for p in names if not os.path.lexists(p))
    # Resuming into the resumed file replaces it: that is what --resume is for.
    force = bool(args.force) or (resume_path is not None and _same_file(out, resume_path))
    reading = [p for p in (args.config, args.from_file) if p]
    check_writable(out, force=force, reading=reading)
    return Run(stored, config, base_config, old, out, force, names)


def _same_file(a: Path, b: Path) -> bool:
    try:
        return a.resolve() == b.resolve()
    except OSError:
        return False


def resume_start(stored, resume_path: str, count: int):
    """(n, 3) float and (n_evaluations,) float or None: the new probes and search history of
    a resumed plan, the layout checked against the config's ``[probes] count``."""
    warm = new_probes(stored)
    if warm.shape[0] != count:
        raise InputError(
            f"{resume_path}: holds {warm.shape[0]} new probes but the config asks for "
            f"[probes] count = {count}; resume with the same count, or start a new "
            "plan without --resume."
        )
    return warm, (stored.search.history if stored.search is not None else None)


# --------------------------------------------------------------------------------------------
# Stored results as inputs
# --------------------------------------------------------------------------------------------


def read_resumed(path: str, command: str):
    """The result ``command --resume path`` continues (of the same command)."""
    from .store import read_result

    stored = read_result(path)
    if stored.command != command:
        raise InputError(
            f"{path}: holds a `{stored.command}` result; `{command} --resume` continues a "
            f"`{command}` result."
        )
    return stored


def read_old(path: str):
    """The result ``--from path`` starts from: one holding a layout."""
    from .store import read_result

    old = read_result(path)
    if old.command not in ("plan", "score", "budget"):
        raise InputError(f"{path}: holds a `{old.command}` result, not a layout to start from.")
    return old


def new_probes(old) -> np.ndarray:
    """(n, 3) float: the new (not installed) probes of a stored result."""
    return old.score.positions_m[~np.asarray(old.score.installed, dtype=bool)]


def new_gains(old) -> np.ndarray:
    """(n,) float: the gains of the new probes of a stored result."""
    return old.score.gain[~np.asarray(old.score.installed, dtype=bool)]


def with_old_installed(config, old, old_path: str, resumed: bool = False):
    """The config with every probe of ``old`` added as installed (those already there kept),
    each reading what it read there, with its grade, when the file says so. ``resumed``: only
    the probes ``old`` had installed, under their stored names (a run started with
    ``--from-as installed`` keeps its extra installed meters when resumed)."""
    from .config import InstalledProbe
    from .probes import component_of
    from .store import probe_names

    have = config.installed_m
    axes, grades = old.score.axes, old.score.grade
    names = probe_names(old)
    check_grades(config, str(old_path), grades, names, rows=False)
    extra = []
    for k, pos in enumerate(old.score.positions_m):
        if resumed and not old.score.installed[k]:
            continue
        if have.shape[0] and np.min(np.linalg.norm(have - pos, axis=1)) < 1e-6:
            continue
        extra.append(
            InstalledProbe(
                position_m=tuple(float(v) for v in pos),
                name=names[k] if resumed else f"kept-{k}",
                component=None if axes is None else component_of(axes[k]),
                gain=float(old.score.gain[k]),
                grade=(grades[k] or None) if grades is not None else None,
            )
        )
    return replace(config, installed=tuple(config.installed) + tuple(extra))


def stored_problem(result, where: str):
    """The config and problem of a stored result, and its new probes: positions, gains and
    each one's axes and grade (None in files written before these were stored)."""
    config = parse_config_text(result.config_text, result.config_path)
    # Meters a `--from-as installed` run kept are in the file, not in its config text.
    config = with_old_installed(config, result, where, resumed=True)
    new = ~np.asarray(result.score.installed, dtype=bool)
    grade = None
    if result.budget is not None:
        row = int(result.extra.get("budget_row_scored", -1))
        if row >= 0:
            grade = next((g for g in config.grades if g.name == result.budget.grade[row]), None)
    axes, grades = result.score.new_meters()
    check_grades(config, where, grades, None)
    problem = build_problem(config, count=int(new.sum()), grade=grade, layout_axes=axes)
    meters = (result.score.positions_m[new], result.score.gain[new], axes, grades)
    return config, problem, meters


def stored_options(stored) -> tuple:
    """The finished options of a stored budget, as the sweep resumes them."""
    from .budget import OptionPlan

    b = stored.budget
    if b is None:
        return ()
    rows = zip(b.count, b.grade, b.cost, b.value, b.layouts, b.fits(), strict=True)
    # A row that did not fit is checked again (the config may have changed), not resumed.
    return tuple(
        OptionPlan(int(c), str(g), float(cost), float(v), np.asarray(lay), np.ones(len(lay)))
        for c, g, cost, v, lay, fits in rows
        if fits
    )


# --------------------------------------------------------------------------------------------
# --from: what changed
# --------------------------------------------------------------------------------------------


def changes(old, old_path: str, mode: str, config, score):
    """What changed against the earlier result: probes and the criterion before and after.

    ``config`` is the current config as the user wrote it (without the old probes added as
    installed): the old layout is rescored under it to show the criterion before the change.
    """
    from .result import Changes, compare_layouts, compare_structures, stored_structure_boxes
    from .sources import SingularPointError

    old_new = new_probes(old)  # (may be none: a result of installed meters alone)
    rescored, note = float("nan"), ""
    axes, grades = old.score.new_meters()
    try:
        check_grades(config, str(old_path), grades, None)
    except InputError as exc:
        note = f"not rescored: {str(exc).split(': ', 1)[-1]}"
    if not note:
        problem = build_problem(config, count=old_new.shape[0], layout_axes=axes)
        if problem.names != tuple(score.names):
            note = (
                "not rescored: with the old meters this config would estimate "
                f"{', '.join(problem.names)}, not the {', '.join(score.names)} of this run, "
                "so the two criteria are not comparable"
            )
    if not note:
        try:
            rescored = float(problem.score(old_new, new_gains(old), axes, grades).value)
        except SingularPointError as exc:  # an old probe on a charge of the current config
            raise InputError(f"{old_path}: {exc}") from None
    radius = max(float(config.probes.min_spacing_m), 0.05 * _site_extent(config.site()))
    parts = compare_layouts(old.score.positions_m, score.positions_m, radius)
    if getattr(old, "structures", None) is not None or config.structures:
        new_boxes = {}
        for c in config.structures:
            tris = c.triangles(config.ground_z_m)
            new_boxes[c.name] = np.stack([tris.min(axis=(0, 1)), tris.max(axis=(0, 1))])
        parts |= compare_structures(stored_structure_boxes(old.structures), new_boxes)
    return Changes(
        old_path=str(old_path),
        mode=mode,
        old_value=float(old.score.value),
        old_rescored=rescored,
        old_criterion=old.score.criterion,
        rescore_note=note,
        **parts,
    )


def _site_extent(site) -> float:
    """Diagonal of the candidate grid's bounding box, m (a length scale for 'moved')."""
    pts = site.candidate_grid(target=200).positions_m
    return float(np.linalg.norm(pts.max(axis=0) - pts.min(axis=0))) if pts.size else 0.0


# --------------------------------------------------------------------------------------------
# Layout files as inputs, and the names of a run's meters
# --------------------------------------------------------------------------------------------


def check_grades(config, where: str, grades, names, rows: bool = True) -> None:
    """Every grade a layout names must be a [[grade]] of the config (None or "": [probes]).

    ``names``: the probes' names (None: counted as new probes); ``rows``: say the CSV row."""
    if grades is None:
        return
    offered = [g.name for g in config.grades]
    listed = ", ".join(offered) or "none: the config has no [[grade]] table"
    for k, g in enumerate(grades):
        if g and g not in offered:
            who = f"new probe {k}" if not names else f"probe {names[k]!r}"
            who += f" (row {k + 1})" if names and rows else ""
            raise InputError(
                f"{where}: {who} names grade {g!r}; the grades of {config.path} are: {listed}."
            )


def grade_names(grades) -> tuple[str, ...] | None:
    """Grade names as :meth:`Problem.meters` takes them: "" (not None) for ``[probes]``."""
    return None if grades is None else tuple(g or "" for g in grades)


def csv_gains(problem, layout) -> np.ndarray | None:
    """Per-probe gains from the CSV; empty cells take the mounting region's gain."""
    if layout.gains is None or all(g is None for g in layout.gains):
        return None
    default = problem.gain_at(layout.positions_m)
    return np.array([default[k] if g is None else g for k, g in enumerate(layout.gains)])


def csv_axes(config, layout) -> np.ndarray | None:
    """(n_probes, n_axes, 3) float: each CSV probe's axes, an empty cell taking ``[probes]``'."""
    if layout.components is None or all(c is None for c in layout.components):
        return None
    from .probes import axes_table

    return axes_table([config.probes.component if c is None else c for c in layout.components])


def run_names(config, score) -> tuple[str, ...]:
    """Names of a run's probes: its config's installed meters (with those a ``--from-as
    installed`` run kept, which the stored config text does not list), then new-k."""
    n_new = int(np.count_nonzero(~np.asarray(score.installed, dtype=bool)))
    return tuple(p.name for p in config.installed) + tuple(f"new-{k}" for k in range(n_new))


def score_names(config, score, layout, n_installed: int) -> tuple[str, ...] | None:
    """Names of a scored layout's probes: the config's installed ones, then the CSV's names
    (None: no CSV names, the defaults)."""
    if layout is None or layout.names is None:
        return None
    # The config's own names: meters from a GeoJSON site file are not in its text.
    installed = tuple(p.name for p in config.installed)
    installed += tuple(f"installed-{k}" for k in range(len(installed), n_installed))
    return installed[:n_installed] + tuple(layout.names)
