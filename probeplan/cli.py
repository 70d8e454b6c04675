"""The ``probeplan`` command line: parse, load, call the library, report. No physics here.

Commands (the contract's "Command line"):

* ``probeplan plan [CONFIG] [--out FILE.h5] [--force] [--resume FILE.h5] [--quiet]``
* ``probeplan score CONFIG (--layout LAYOUT.csv | --from OLD.h5) [--out FILE.h5] [--force]``
* ``probeplan budget CONFIG [--out FILE.h5] [--force] [--from OLD.h5 [--from-as MODE]]``
* ``probeplan show FILE.h5 [--layout-csv LAYOUT.csv [--force]]`` — the summary; optionally the
  new probes as a layout CSV (what ``score --layout`` reads)
* ``probeplan simulate FILE.h5 [--trials N] [--seed S]`` — fits of simulated readings beside
  the bounds, stored back into FILE.h5
* ``probeplan plot FILE.h5 [--format png|svg] [--folder DIR]`` — site map, coverage map,
  budget curve

``--from OLD.h5`` (plan, budget) reruns after the geometry changed: the old probes are kept
fixed as installed ones (``--from-as installed``) or start the search (``--from-as start``,
the default), and the summary shows what changed.

Exit status: 0 done, 2 bad input (one line ``probeplan: error: …``, no traceback, no result
file), 130 after SIGINT/SIGTERM during ``plan`` (the best layout so far is written with
``complete = False``), 1 anything else (``probeplan: internal error: …``; the traceback only
with ``PROBEPLAN_DEBUG=1``).
"""

from __future__ import annotations

import argparse
import contextlib
import os
import signal
import sys
from collections.abc import Iterator
from importlib import resources
from pathlib import Path
from typing import NamedTuple

import numpy as np

from . import report
from .errors import EXIT_INTERRUPTED, InputError

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_INPUT = 2

_DEMO = "demo.toml"
FROM_MODES = ("start", "installed")
PLOT_FORMATS = ("png", "svg")


# --------------------------------------------------------------------------------------------
# Arguments
# --------------------------------------------------------------------------------------------


class _UsageError(Exception):
    """An argument error: reported as one line and exit status 2."""


class _Parser(argparse.ArgumentParser):
    """argparse, with its errors turned into one line instead of usage + message + exit."""

    def error(self, message: str):
        raise _UsageError(f"{message} (see `{self.prog} --help`)")


_LAYOUT_HELP = (
    "CSV file of the NEW probes to score, one probe a row, with a header row naming at least "
    "x_m,y_m,z_m (metres, any order). Optional columns, each per probe, an empty cell taking "
    "the config's setting: name; component (what the meter reads: x, y, z, vector or a unit "
    "vector as three numbers separated by spaces; default [probes] component); grade (a "
    "[[grade]] name of the config; default the noise and range of [probes]); gain (calibration "
    "factor > 0, e.g. for a meter on a mast). Installed probes come from the config's "
    "[[probes.installed]] and are added in front."
)


_QUIET_HELP = "no progress bar and no summary; name the file only"


def _add_out(parser: argparse.ArgumentParser, help_text: str) -> None:
    parser.add_argument("--out", metavar="FILE.h5", help=help_text)
    parser.add_argument("--force", action="store_true", help="overwrite an existing --out file")


def _add_from(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--from",
        dest="from_file",
        metavar="OLD.h5",
        help="rerun from an earlier result (after the geometry changed); the summary shows "
        "the probes added, moved and removed, and the criterion before and after",
    )
    parser.add_argument(
        "--from-as",
        dest="from_as",
        choices=FROM_MODES,
        default=None,
        help="installed: keep the old probes fixed and place [probes] count new ones besides "
        "them; start: use the old layout as the search's starting point (default)",
    )


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``probeplan`` (exposed for documentation and tests)."""
    from ._version import package_version

    parser = _Parser(
        prog="probeplan",
        description=(
            "Plan where to mount electric-field meters: score a layout by the Fisher "
            "information of its readings (Cramér–Rao bounds), or search for a better one. "
            "SI units; physics sign convention (E points away from positive charge); z up."
        ),
        epilog="Exit status: 0 done, 2 bad input, 130 interrupted (plan), 1 internal error.",
    )
    parser.add_argument("--version", action="version", version=f"probeplan {package_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser(
        "plan",
        help="optimise a layout; with no CONFIG, plan the bundled demo site",
        description=(
            "Search for the layout of [probes] count new meters that best pins down the "
            "estimated parameters, and write it with its score to an HDF5 file. Ctrl-C (or "
            "SIGTERM) stops the search cleanly: the best layout so far is written with "
            "complete = False and the exit status is 130; continue with --resume."
        ),
    )
    p.add_argument(
        "config",
        nargs="?",
        metavar="CONFIG",
        help="TOML config (default: the bundled fictional demo site; with --resume: the "
        "config stored in the resumed file)",
    )
    _add_out(
        p,
        "result file (default: <config name>.h5 in the working folder, or <name>-2.h5 … "
        "if taken; with --resume: the resumed file itself)",
    )
    p.add_argument(
        "--resume",
        metavar="FILE.h5",
        help="continue from the layout and search history stored in FILE.h5",
    )
    _add_from(p)
    p.add_argument("--quiet", action="store_true", help=_QUIET_HELP)

    s = sub.add_parser(
        "score",
        help="score a given layout, no search",
        description="Score a given layout of new probes (plus the config's installed ones).",
    )
    s.add_argument("config", metavar="CONFIG", help="TOML config")
    src = s.add_mutually_exclusive_group(required=True)
    src.add_argument("--layout", metavar="LAYOUT.csv", help=_LAYOUT_HELP)
    src.add_argument(
        "--from",
        dest="from_file",
        metavar="OLD.h5",
        help="score the new probes of an earlier result under this config (its installed "
        "probes come from the config); the summary compares with the stored score",
    )
    _add_out(s, "also write the result to this HDF5 file")

    b = sub.add_parser(
        "budget",
        help="compare instrumentation budgets (counts x grades x cost)",
        description=(
            "Plan a layout for every [budget] count with every [[grade]] of meter, score it, "
            "price it, and mark the cheapest option that reaches [budget] target and the "
            "Pareto front (no option both cheaper and better). Options run in parallel on the "
            "local cores. Ctrl-C stops cleanly: the options planned so far are written with "
            "complete = False and the exit status is 130."
        ),
    )
    b.add_argument(
        "config",
        nargs="?",
        metavar="CONFIG",
        help="TOML config with [budget] and [[grade]] (with --resume: default the stored one)",
    )
    b.add_argument(
        "--resume",
        metavar="FILE.h5",
        help="continue an interrupted budget: keep its finished options, plan the others",
    )
    _add_out(
        b,
        "result file (default: <config name>-budget.h5 in the working folder, or "
        "<name>-budget-2.h5 … if taken)",
    )
    _add_from(b)
    b.add_argument("--quiet", action="store_true", help=_QUIET_HELP)

    w = sub.add_parser(
        "show",
        help="the terminal summary of a stored result",
        description="Print the terminal summary of a result file, from the file alone.",
    )
    w.add_argument("file", metavar="FILE.h5", help="result file written by plan or score")
    w.add_argument(
        "--layout-csv",
        metavar="LAYOUT.csv",
        help="also write the new probes to this CSV (name, x_m, y_m, z_m, component, grade, "
        "gain: the file `score --layout` reads), e.g. for the installers",
    )
    w.add_argument("--force", action="store_true", help="overwrite an existing --layout-csv file")

    m = sub.add_parser(
        "simulate",
        help="check a stored layout by simulated fits against its Cramér–Rao bounds",
        description=(
            "Draw noisy readings for the stored layout in several of its scenarios, fit the "
            "estimated parameters by nonlinear least squares, and report the achieved location "
            "and charge errors beside the Cramér–Rao bounds. The simulation is stored back "
            "into FILE.h5 (rewritten atomically)."
        ),
    )
    m.add_argument("file", metavar="FILE.h5", help="result file written by plan, score or budget")
    m.add_argument(
        "--trials", type=int, default=200, metavar="N", help="fits per scenario (default 200)"
    )
    m.add_argument(
        "--seed", type=int, default=None, metavar="S", help="random seed (default: the config's)"
    )

    q = sub.add_parser(
        "plot",
        help="site map, coverage map and budget curve of a stored result",
        description=(
            "Draw the site map (regions, keep-outs, installed and new probes, the charge), the "
            "coverage map (1-sigma location error of a charge at each horizontal position at "
            "the nominal height) and, for a budget, the cost-against-criterion curve."
        ),
    )
    q.add_argument("file", metavar="FILE.h5", help="result file")
    q.add_argument("--format", dest="fmt", choices=PLOT_FORMATS, default="png", help="image format")
    q.add_argument(
        "--folder",
        metavar="DIR",
        help="where to write the images (default: <FILE stem>_plots next to FILE.h5)",
    )
    return parser


# --------------------------------------------------------------------------------------------
# Entry point
# --------------------------------------------------------------------------------------------


def main(argv: list[str] | None = None) -> int:
    """Run the ``probeplan`` command line.

    Parameters
    ----------
    argv : list of str or None
        Arguments without the program name (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        Exit status: 0 done, 2 bad input, 130 interrupted, 1 internal error.
    """
    try:
        try:
            args = build_parser().parse_args(argv)
        except SystemExit as exc:  # --help and --version
            return int(exc.code or 0)
        if args.command is None:
            raise _UsageError(
                "choose a command: plan, score, budget, show, simulate or plot "
                "(see `probeplan --help`)"
            )
        if getattr(args, "from_as", None) and not getattr(args, "from_file", None):
            raise _UsageError("--from-as goes with --from OLD.h5 (see `probeplan plan --help`)")
        if getattr(args, "from_file", None) and getattr(args, "from_as", "x") is None:
            args.from_as = "start"
        return _COMMANDS[args.command](args)
    except (_UsageError, InputError) as exc:
        report.print_error(str(exc))
        return EXIT_INPUT
    except KeyboardInterrupt:
        report.print_interrupted()
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # `probeplan show x.h5 | head`: the reader left; not an error of ours.
        with contextlib.suppress(OSError):
            sys.stdout = open(os.devnull, "w")  # silences the exit-time flush
        return EXIT_OK
    except Exception as exc:  # the last line of defence: a bug
        report.print_internal_error(exc, debug=os.environ.get("PROBEPLAN_DEBUG") == "1")
        return EXIT_INTERNAL


# --------------------------------------------------------------------------------------------
# Loading (every ValueError here is bad input)
# --------------------------------------------------------------------------------------------


@contextlib.contextmanager
def _as_input_error() -> Iterator[None]:
    """Treat a plain ValueError raised while reading user input as bad input (exit 2)."""
    try:
        yield
    except InputError:
        raise
    except ValueError as exc:
        raise InputError(str(exc)) from None


def _load_config(path: str):
    from .config import load_config

    with _as_input_error():
        return load_config(path)


def _parse_config_text(text: str, path: str):
    from .config import parse_config

    with _as_input_error():
        return parse_config(text, path)


def _demo_config():
    """The bundled fictional demo site (probeplan/data/demo.toml)."""
    ref = resources.files("probeplan") / "data" / _DEMO
    if not ref.is_file():
        raise InputError(
            f"the bundled demo config {_DEMO} is missing from this installation; "
            "give a CONFIG file."
        )
    with resources.as_file(ref) as path:
        return _load_config(str(path))


def _build_problem(config, **kwargs):
    from .problem import build_problem

    with _as_input_error():
        return build_problem(config, **kwargs)


# --------------------------------------------------------------------------------------------
# Signals: SIGINT / SIGTERM end the search cleanly
# --------------------------------------------------------------------------------------------


class _StopFlag:
    """Set by SIGINT/SIGTERM; polled by the search through ``stop()``.

    A second signal while the flag is already set raises KeyboardInterrupt: the user insists,
    so the run ends at once without writing a file.
    """

    def __init__(self) -> None:
        self.signum: int | None = None

    def __call__(self) -> bool:
        return self.signum is not None

    def handle(self, signum, frame) -> None:
        if self.signum is not None:
            raise KeyboardInterrupt
        self.signum = signum


@contextlib.contextmanager
def _signals_to(flag: _StopFlag) -> Iterator[None]:
    """Route SIGINT and SIGTERM to ``flag`` inside the block; restore the old handlers after."""
    saved = {}
    try:
        for sig in (signal.SIGINT, signal.SIGTERM):
            try:
                saved[sig] = signal.signal(sig, flag.handle)
            except ValueError:  # not the main thread (an embedding application): no handlers
                break
        yield
    finally:
        for sig, old in saved.items():
            signal.signal(sig, old)


@contextlib.contextmanager
def _stoppable(quiet: bool) -> Iterator[tuple]:
    """A progress callable (None when quiet) and a stop flag set by SIGINT/SIGTERM."""
    flag = _StopFlag()
    progress_cm = contextlib.nullcontext(None) if quiet else report.progress_bar()
    with progress_cm as progress, _signals_to(flag):
        yield progress, flag


def _finish(result, out: Path, force: bool, quiet: bool) -> int:
    """Write a plan or budget result, print it, and give the exit status of its completion."""
    from .store import write_result

    # A signal that arrives while the file is written must not leave it half-written:
    # write_result cleans its temporary up on any exception, KeyboardInterrupt included.
    written = write_result(result, out, force=force)
    if not quiet:
        report.print_result(result)
    report.print_written(written, complete=result.complete, command=result.command)
    return EXIT_OK if result.complete else EXIT_INTERRUPTED


# --------------------------------------------------------------------------------------------
# Commands
# --------------------------------------------------------------------------------------------


class _Run(NamedTuple):
    """What plan and budget resolve from their arguments before any work."""

    stored: object  # the resumed result, or None
    config: object  # the config to run (with --from-as installed: old probes added)
    base_config: object  # the config as the user wrote it
    old: object  # the --from result, or None
    out: Path
    force: bool


def _prepare_run(args: argparse.Namespace, command: str, suffix: str) -> _Run:
    """Config (given, resumed or the demo), --resume / --from, and the output file, checked
    writable before the search spends its time."""
    from .store import check_writable, free_name

    stored = _read_resumed(args.resume, command) if args.resume else None
    if args.config:
        config = _load_config(args.config)
    elif stored is not None:
        config = _parse_config_text(stored.config_text, stored.config_path)
    elif command == "plan":
        config = _demo_config()
    else:
        raise _UsageError(f"{command} needs a CONFIG (or --resume FILE.h5)")
    if stored is not None:
        config = _with_old_installed(config, stored, args.resume, resumed=True)
    base_config, old = config, None
    if args.from_file:
        if stored is not None:
            raise InputError(_RESUME_OR_FROM)
        old = _read_old(args.from_file)
        if args.from_as == "installed":
            config = _with_old_installed(config, old, args.from_file)
    resume_path = Path(args.resume) if args.resume else None
    if args.out:
        out = Path(args.out)
    elif resume_path is not None:
        out = resume_path
    else:
        out = free_name(Path(config.path).stem + suffix)
    # Resuming into the resumed file replaces it: that is what --resume is for.
    force = bool(args.force) or (resume_path is not None and _same_file(out, resume_path))
    check_writable(out, force=force)
    return _Run(stored, config, base_config, old, out, force)


def _cmd_plan(args: argparse.Namespace) -> int:
    from .result import make_result
    from .search import d_efficiency, plan

    stored, config, base_config, old, out, force = _prepare_run(args, "plan", suffix="")
    problem = _build_problem(config)
    _check_enough_readings(problem, config)
    warm = history = None
    if old is not None and args.from_as == "start":
        warm = _new_probes(old)
    if stored is not None:
        warm = stored.score.positions_m[~np.asarray(stored.score.installed, dtype=bool)]
        if warm.shape[0] != problem.count:
            raise InputError(
                f"{args.resume}: holds {warm.shape[0]} new probes but the config asks for "
                f"[probes] count = {problem.count}; resume with the same count, or start a new "
                "plan without --resume."
            )
        history = stored.search.history if stored.search is not None else None

    with _stoppable(args.quiet) as (progress, flag):
        outcome = plan(problem, progress=progress, stop=flag, warm_start_m=warm, history=history)

    extra = {}
    eff = d_efficiency(outcome.score.value, outcome.info.bound, problem.n_params)
    if eff is not None and problem.criterion.name == "d":
        extra["d_efficiency"] = float(eff)
    changes = None
    if old is not None:
        changes = _changes(old, args.from_file, args.from_as, base_config, outcome.score)
    result = make_result(
        "plan",
        config,
        outcome.score,
        search=outcome.info,
        complete=outcome.complete,
        extra=extra,
        changes=changes,
        probe_names=_run_names(config, outcome.score),
    )
    return _finish(result, out, force, args.quiet)


_RESUME_OR_FROM = (
    "give --resume or --from, not both: --resume continues a run, --from starts a new one "
    "from an earlier result."
)


def _check_enough_readings(problem, config) -> None:
    """A layout of n scalar readings cannot determine more than n parameters: say so before
    searching (the Fisher information is a sum of n rank-one terms)."""
    axes = problem.new_axes.shape[0]
    readings = problem.count * axes + int(np.count_nonzero(np.any(problem.installed_axes, -1)))
    if readings < problem.n_params:
        raise InputError(
            f"{config.path}: `probes.count` = {problem.count} new meters of {axes} axis/axes"
            f"{' plus the installed ones' if problem.installed_m.shape[0] else ''} give "
            f"{readings} readings, which cannot determine {problem.n_params} estimated "
            f"parameters ({', '.join(problem.names)}); add meters, use 3-axis meters "
            '(component = "vector") or estimate fewer parameters.'
        )


def _read_resumed(path: str, command: str):
    from .store import read_result

    stored = read_result(path)
    if stored.command != command:
        raise InputError(
            f"{path}: holds a `{stored.command}` result; `{command} --resume` continues a "
            f"`{command}` result."
        )
    return stored


def _same_file(a: Path, b: Path) -> bool:
    try:
        return a.resolve() == b.resolve()
    except OSError:
        return False


def _cmd_score(args: argparse.Namespace) -> int:
    from .result import make_result
    from .store import check_writable, read_layout_csv, write_result

    config = _load_config(args.config)
    old = layout = None
    if args.from_file:
        old = _read_old(args.from_file)
        positions, gain = _new_probes(old), _new_gains(old)
        axes, grades = old.score.new_meters()
        where, names = f"{args.from_file}", None
    else:
        layout = read_layout_csv(args.layout)
        positions, names = layout.positions_m, layout.names
        axes, grades = _csv_axes(config, layout), layout.grades
        where = f"{layout.path}"
    _check_grades(config, where, grades, names)
    if args.out:
        check_writable(args.out, force=args.force)
    problem = _build_problem(config, count=positions.shape[0], layout_axes=axes)
    if layout is not None:
        gain = _csv_gains(problem, layout)
    g = config.ground_z_m
    if g is not None and positions.size and positions[:, 2].min() < g:
        i = int(np.argmin(positions[:, 2]))
        raise InputError(
            f"{where}: probe {i} is at z = {positions[i, 2]:g} m, below the ground plane at "
            f"z = {g:g} m of {config.path}; a meter reads the field on or above the ground."
        )
    with _as_input_error():  # e.g. a probe placed on a point charge: the layout's fault
        score = problem.score(positions, gain, axes, _grade_names(grades))
    # Scoring a layout that breaks the mounting rules is allowed (it may be what is installed
    # today), but the summary says which rules it breaks.
    notes = tuple(
        f"{where} (new probes counted from 0 in file order): {v} The mounting rules of "
        f"{config.path} do not allow this."
        for v in problem.site.violations(positions)
    )
    names = None
    if layout is not None and layout.names is not None:
        n_inst = problem.installed_m.shape[0]
        from .store import probe_names as default_names

        names = default_names(_names_only(config, score))[:n_inst] + tuple(layout.names)
    changes = _changes(old, args.from_file, "rescore", config, score) if old is not None else None
    result = make_result("score", config, score, changes=changes, notes=notes, probe_names=names)
    report.print_result(result)
    if args.out:
        written = write_result(result, args.out, force=args.force)
        report.print_written(written)
    return EXIT_OK


def _names_only(config, score):
    """A bare result carrying just what ``store.probe_names`` reads (config text, layout)."""
    from types import SimpleNamespace

    return SimpleNamespace(probe_names=None, config_text=config.text, score=score)


def _csv_gains(problem, layout) -> np.ndarray | None:
    """Per-probe gains from the CSV; empty cells take the mounting region's gain."""
    if layout.gains is None or all(g is None for g in layout.gains):
        return None
    default = problem.gain_at(layout.positions_m)
    return np.array([default[k] if g is None else g for k, g in enumerate(layout.gains)])


def _csv_axes(config, layout) -> np.ndarray | None:
    """(n_probes, n_axes, 3) float: each CSV probe's axes, an empty cell taking ``[probes]``'."""
    if layout.components is None or all(c is None for c in layout.components):
        return None
    from .probes import axes_table

    return axes_table([config.probes.component if c is None else c for c in layout.components])


def _check_grades(config, where: str, grades, names, rows: bool = True) -> None:
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


def _grade_names(grades) -> tuple[str, ...] | None:
    """Grade names as :meth:`Problem.meters` takes them: "" (not None) for ``[probes]``."""
    return None if grades is None else tuple(g or "" for g in grades)


def _run_names(config, score) -> tuple[str, ...]:
    """Names of a run's probes: its config's installed meters (with those a ``--from-as
    installed`` run kept, which the stored config text does not list), then new-k."""
    n_new = int(np.count_nonzero(~np.asarray(score.installed, dtype=bool)))
    return tuple(p.name for p in config.installed) + tuple(f"new-{k}" for k in range(n_new))


def _cmd_budget(args: argparse.Namespace) -> int:
    from .budget import chosen_option, run_budget
    from .result import make_result

    stored, config, base_config, old, out, force = _prepare_run(args, "budget", suffix="-budget")
    _build_problem(config)  # every config check before the sweep spends its time
    done = _stored_options(stored) if stored is not None else ()

    with _stoppable(args.quiet) as (progress, flag), _as_input_error():
        table, complete = run_budget(config, progress=progress, stop=flag, done=done)
    if table.count.size == 0:
        report.print_interrupted()
        return EXIT_INTERRUPTED  # stopped before any option was planned: nothing to write
    maximise = config.design.criterion == "d"
    row = chosen_option(table, maximise)
    grade = next(g for g in config.grades if g.name == table.grade[row])
    problem = _build_problem(config, count=int(table.count[row]), grade=grade)
    score = problem.score(table.layouts[row])
    changes = None
    if old is not None:
        changes = _changes(old, args.from_file, args.from_as, base_config, score)
    why = (
        "the cheapest option that meets the target"
        if table.cheapest >= 0
        else (
            "no option meets the target; the best-scoring option"
            if table.target is not None
            else "no target set; the best-scoring option"
        )
    )
    note = (
        f"the layout and bounds below are budget row {row}: {table.count[row]} new "
        f'"{table.grade[row]}" meters, cost {table.cost[row]:,.0f} ({why}).'
    )
    result = make_result(
        "budget",
        config,
        score,
        budget=table,
        complete=complete,
        extra={"budget_row_scored": float(row)},
        changes=changes,
        notes=(note,),
        probe_names=_run_names(config, score),
    )
    return _finish(result, out, force, args.quiet)


def _stored_options(stored) -> tuple:
    """The finished options of a stored budget, as the sweep resumes them."""
    from .budget import OptionPlan

    b = stored.budget
    if b is None:
        return ()
    return tuple(
        OptionPlan(int(c), str(g), float(cost), float(v), np.asarray(lay), np.ones(len(lay)))
        for c, g, cost, v, lay in zip(b.count, b.grade, b.cost, b.value, b.layouts, strict=True)
    )


# --------------------------------------------------------------------------------------------
# --from: rerun from an earlier result
# --------------------------------------------------------------------------------------------


def _read_old(path: str):
    from .store import read_result

    old = read_result(path)
    if old.command not in ("plan", "score", "budget"):
        raise InputError(f"{path}: holds a `{old.command}` result, not a layout to start from.")
    return old


def _new_probes(old) -> np.ndarray:
    """(n, 3) float: the new (not installed) probes of a stored result."""
    return old.score.positions_m[~np.asarray(old.score.installed, dtype=bool)]


def _with_old_installed(config, old, old_path: str, resumed: bool = False):
    """The config with every probe of ``old`` added as installed (those already there kept),
    each reading what it read there, with its grade, when the file says so. ``resumed``: only
    the probes ``old`` had installed, under their stored names (a run started with
    ``--from-as installed`` keeps its extra installed meters when resumed)."""
    from dataclasses import replace

    from .config import InstalledProbe
    from .probes import component_of
    from .store import probe_names

    have = config.installed_m
    axes, grades = old.score.axes, old.score.grade
    names = probe_names(old)
    _check_grades(config, str(old_path), grades, names, rows=False)
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


def _new_gains(old) -> np.ndarray:
    return old.score.gain[~np.asarray(old.score.installed, dtype=bool)]


def _changes(old, old_path: str, mode: str, config, score):
    """What changed against the earlier result: probes and the criterion before and after.

    ``config`` is the current config as the user wrote it (without the old probes added as
    installed): the old layout is rescored under it to show the criterion before the change.
    """
    from .result import Changes, compare_layouts

    old_new = _new_probes(old)  # (may be none: a result of installed meters alone)
    rescored, note = float("nan"), ""
    axes, grades = old.score.new_meters()
    try:
        _check_grades(config, str(old_path), grades, None)
    except InputError as exc:
        note = f"not rescored: {str(exc).split(': ', 1)[-1]}"
    if not note:
        problem = _build_problem(config, count=old_new.shape[0], layout_axes=axes)
        if problem.names != tuple(score.names):
            note = (
                "not rescored: with the old meters this config would estimate "
                f"{', '.join(problem.names)}, not the {', '.join(score.names)} of this run, "
                "so the two criteria are not comparable"
            )
    if not note:
        with _as_input_error():
            rescored = float(problem.score(old_new, _new_gains(old), axes, grades).value)
    radius = max(float(config.probes.min_spacing_m), 0.05 * _site_extent(config.site()))
    parts = compare_layouts(old.score.positions_m, score.positions_m, radius)
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


def _cmd_show(args: argparse.Namespace) -> int:
    from .store import check_writable, read_result, write_layout_csv

    result = read_result(args.file)
    if args.layout_csv:
        check_writable(args.layout_csv, force=args.force, option="--layout-csv", suffix=".csv")
    report.print_result(result)
    if args.layout_csv:
        report.print_layout_written(write_layout_csv(result, args.layout_csv, force=args.force))
    return EXIT_OK


def _stored_problem(result, where: str):
    """The config and problem of a stored result, and its new probes: positions, gains and
    each one's axes and grade (None in files written before these were stored)."""
    config = _parse_config_text(result.config_text, result.config_path)
    # Meters a `--from-as installed` run kept are in the file, not in its config text.
    config = _with_old_installed(config, result, where, resumed=True)
    new = ~np.asarray(result.score.installed, dtype=bool)
    grade = None
    if result.budget is not None:
        row = int(result.extra.get("budget_row_scored", -1))
        if row >= 0:
            grade = next((g for g in config.grades if g.name == result.budget.grade[row]), None)
    axes, grades = result.score.new_meters()
    _check_grades(config, where, grades, None)
    problem = _build_problem(config, count=int(new.sum()), grade=grade, layout_axes=axes)
    meters = (result.score.positions_m[new], result.score.gain[new], axes, grades)
    return config, problem, meters


def _cmd_simulate(args: argparse.Namespace) -> int:
    from dataclasses import replace

    from .simulate import simulate
    from .store import read_result, write_result

    if args.trials < 2:
        raise InputError(f"--trials must be a whole number >= 2; got {args.trials}.")
    result = read_result(args.file)
    config, problem, (positions, gain, axes, grades) = _stored_problem(result, args.file)
    seed = config.seed if args.seed is None else args.seed
    with _as_input_error():
        sim = simulate(
            problem,
            positions,
            gain,
            axes=axes,
            grades=grades,
            trials=args.trials,
            rng=np.random.default_rng(seed),
        )
    result = replace(result, simulation=sim)
    report.print_result(result)
    written = write_result(result, args.file, force=True)
    report.print_written(written)
    return EXIT_OK


def _cmd_plot(args: argparse.Namespace) -> int:
    from .plots import plot_all
    from .store import read_result

    result = read_result(args.file)
    config, problem, _ = _stored_problem(result, args.file)
    src = Path(args.file)
    folder = Path(args.folder) if args.folder else src.with_name(src.stem + "_plots")
    if folder.exists() and not folder.is_dir():
        raise InputError(f"{folder}: exists and is not a folder; give --folder a folder name.")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{folder}: cannot create the folder ({exc.strerror}).") from None
    with _as_input_error():
        paths = plot_all(result, config, problem, folder, fmt=args.fmt)
    report.print_plots(paths)
    return EXIT_OK


_COMMANDS = {
    "plan": _cmd_plan,
    "score": _cmd_score,
    "budget": _cmd_budget,
    "show": _cmd_show,
    "simulate": _cmd_simulate,
    "plot": _cmd_plot,
}
