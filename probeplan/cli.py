"""The ``probeplan`` command line: parse, load, call the library, report. No physics here.

Commands (the contract's "Command line"):

* ``probeplan plan [CONFIG] [--out FILE.h5] [--force] [--resume FILE.h5] [--scheduler ADDRESS]``
* ``probeplan score CONFIG (--layout LAYOUT.csv | --from OLD.h5) [--out FILE.h5] [--force]
  [--scheduler ADDRESS]``
* ``probeplan budget CONFIG [--out FILE.h5] [--force] [--from OLD.h5 [--from-as MODE]]
  [--scheduler ADDRESS]``

``--scheduler``: a dask.distributed cluster (:mod:`probeplan.cluster`) runs the budget's options,
and the large scenario sets of ``plan`` and ``score`` in scenario blocks (:mod:`probeplan.shard`).
* ``probeplan show FILE.h5 [--layout-csv LAYOUT.csv] [--geojson OUT.geojson] [--force]`` — the
  summary; optionally the new probes as a layout CSV (what ``score --layout`` reads) and every
  meter with the site as GeoJSON (with a ``[frame]``)
* ``probeplan simulate FILE.h5 [--trials N] [--seed S]`` — fits of simulated readings beside
  the bounds, stored back into FILE.h5
* ``probeplan plot FILE.h5 [--format png|svg] [--folder DIR]`` — site map, coverage map,
  budget curve (and the estimates of a file with /locate)
* ``probeplan locate FILE.h5 --readings READINGS.csv [--truth TRUTH.csv] [--out FILE.h5]
  [--force]`` — fits of recorded readings, meter health and the delivery check, stored as
  /locate

Every command takes ``--quiet``: no progress bar and no summary, only the files written (and,
on standard error, a warning that the config cannot mean what it says: the run still exits 0).

``--from OLD.h5`` (plan, budget) reruns after the geometry changed: the old probes are kept
fixed as installed ones (``--from-as installed``) or start the search (``--from-as start``,
the default), and the summary shows what changed.

``--from``, ``--resume`` and the stored results they read are :mod:`probeplan.reruns`; the
command bodies :mod:`probeplan.commands`. This module parses the arguments and is the one
error boundary (:func:`main`).

Exit status (:mod:`probeplan.errors`): 0 done; 2 bad input (one line ``probeplan: error: …``,
no traceback, no result file); 130 after SIGINT/SIGTERM (``plan`` and ``budget`` write the
best layout so far with ``complete = False``; one line says whether a result file was written);
1 anything else, a bug (one line ``probeplan COMMAND: internal error: …``; the traceback only
with ``PROBEPLAN_DEBUG=1``).
"""

from __future__ import annotations

import argparse
import contextlib
import os
import signal
import sys
from collections.abc import Iterator
from pathlib import Path

from . import report
from .commands import COMMANDS
from .errors import (
    EXIT_INPUT,
    EXIT_INTERNAL,
    EXIT_INTERRUPTED,
    EXIT_OK,
    InputError,
    raise_interrupt,
)

FROM_MODES = ("start", "installed")
PLOT_FORMATS = ("png", "svg")
#: Set to 1 to see the traceback of an internal error.
DEBUG_VARIABLE = "PROBEPLAN_DEBUG"


# --------------------------------------------------------------------------------------------
# Arguments
# --------------------------------------------------------------------------------------------


class _Parser(argparse.ArgumentParser):
    """argparse, with its errors turned into one InputError instead of usage + message + exit."""

    def error(self, message: str):
        raise InputError(f"{message} (see `{self.prog} --help`)")


_LAYOUT_HELP = (
    "CSV file of the NEW probes to score, one probe a row, with a header row naming at least "
    "x_m,y_m,z_m (metres, any order). Optional columns, each per probe, an empty cell taking "
    "the config's setting: name; component (what the meter reads: x, y, z, vector or a unit "
    "vector as three numbers separated by spaces; default [probes] component); grade (a "
    "[[grade]] name of the config; default the noise and range of [probes]); gain (calibration "
    "factor > 0, e.g. for a meter on a mast). Installed probes come from the config's "
    "[[probes.installed]] and are added in front."
)


_QUIET_HELP = (
    "no progress bar and no summary: name the files written only (a warning that the config "
    "cannot mean what it says still goes to standard error)"
)
_SCHEDULER_HELP = (
    "run on an existing dask.distributed cluster, e.g. tcp://host:8786 (needs the extra: pip "
    'install "probeplan[cluster]"); default: the environment variable PROBEPLAN_SCHEDULER, '
    "then [design] scheduler of the config, else this machine alone. plan and score send only "
    "large scenario sets (README: Running on a cluster). Same seed, same result"
)


def _add_scheduler(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--scheduler", metavar="ADDRESS", default=None, help=_SCHEDULER_HELP)


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


def _add_plan(sub) -> None:
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
    _add_scheduler(p)


def _add_score(sub) -> None:
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
    _add_scheduler(s)


def _add_budget(sub) -> None:
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
    _add_scheduler(b)


def _add_show(sub) -> None:
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
    w.add_argument(
        "--geojson",
        metavar="LAYOUT.geojson",
        help="also write every meter and the site's regions and keep-outs as GeoJSON (RFC 7946, "
        "WGS84 longitude/latitude) for a GIS program; needs a [frame] in the config",
    )
    w.add_argument(
        "--force", action="store_true", help="overwrite an existing --layout-csv or --geojson file"
    )


def _add_simulate(sub) -> None:
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


def _add_plot(sub) -> None:
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


def _add_locate(sub) -> None:
    loc = sub.add_parser(
        "locate",
        help="fit the charge from recorded readings of a stored layout",
        description=(
            "Fit the estimated parameters at every time step of a readings CSV with the model "
            "of a stored result (its meters, axes, grades, sources and background): weighted "
            "least squares, 1-sigma from the Fisher information, chi-square, readings beyond "
            "range left out; flag readings far beyond their noise and name the meters flagged "
            "in most steps (stuck, drifting, miscalibrated). With --truth, say whether the "
            "network delivers the plan's Cramér–Rao bounds. Stored as /locate in FILE.h5 (or "
            "--out). The estimate is not a warning system and does not decide when to stop "
            "work outdoors."
        ),
    )
    loc.add_argument("file", metavar="FILE.h5", help="result file written by plan, score or budget")
    loc.add_argument(
        "--readings",
        required=True,
        metavar="READINGS.csv",
        help="header row: time_s (seconds) or time (ISO 8601 UTC), then one column per meter "
        "reading named as in the result: NAME for a one-axis meter, NAME.x, NAME.y, NAME.z for "
        "a 3-axis one (V/m); an empty cell is a missing reading",
    )
    loc.add_argument(
        "--truth",
        metavar="TRUTH.csv",
        help="known parameters (calibration or simulation): the same time column, then columns "
        "named as the result's parameters (s0.charge_c, s0.x_m, …, SI units)",
    )
    _add_out(loc, "write the result with /locate here instead of back into FILE.h5")


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
        epilog="Exit status: 0 done, 2 bad input, 130 interrupted, 1 internal error.",
    )
    parser.add_argument("--version", action="version", version=f"probeplan {package_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    commands = (_add_plan, _add_score, _add_budget, _add_show, _add_simulate, _add_plot)
    for add in (*commands, _add_locate):
        add(sub)
    for command in sub.choices.values():  # every command: scripts want the file names only
        command.add_argument("--quiet", action="store_true", help=_QUIET_HELP)
    return parser


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    """The checked arguments (InputError on a bad one; SystemExit for --help, --version)."""
    args = build_parser().parse_args(argv)
    if args.command is None:
        raise InputError(
            "choose a command: plan, score, budget, show, simulate, plot or locate (see "
            "`probeplan --help`)"
        )
    if getattr(args, "from_as", None) and not getattr(args, "from_file", None):
        raise InputError("--from-as goes with --from OLD.h5 (see `probeplan plan --help`)")
    if getattr(args, "from_file", None) and getattr(args, "from_as", "x") is None:
        args.from_as = "start"
    return args


# --------------------------------------------------------------------------------------------
# Entry point: the one error boundary
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
    with _sigterm_interrupts():
        return _run(argv)


@contextlib.contextmanager
def _sigterm_interrupts() -> Iterator[None]:
    """SIGTERM means what Ctrl-C means inside the block (exit status 130, not 143)."""
    try:
        old = signal.signal(signal.SIGTERM, raise_interrupt)
    except ValueError:  # not the main thread (an embedding application): no handler
        old = None
    try:
        yield
    finally:
        if old is not None:
            signal.signal(signal.SIGTERM, old)


def _caused_by_interrupt(exc: BaseException) -> bool:
    """Whether a KeyboardInterrupt (Ctrl-C, or SIGTERM) is behind ``exc``: its cause, or the
    exception being handled when it was raised. Python 3.11 wraps an exception raised while a
    class is being made (``__set_name__``, as in a dataclass of a module imported on first
    use) in a RuntimeError (3.12 no longer does); an error raised while an interrupt was being
    handled, in clean-up code say, is the interrupt's doing too. Either way it is not a bug."""
    seen = set()
    while exc is not None and id(exc) not in seen:
        if isinstance(exc, KeyboardInterrupt):
            return True
        seen.add(id(exc))
        exc = exc.__cause__ or exc.__context__
    return False


def _run(argv: list[str] | None) -> int:
    """Parse and run one command; every exception ends here, as an exit status and one line."""
    command = None
    written: list[Path] = []  # every file written whole, for the message after an interrupt
    try:
        try:
            args = parse_args(argv)
        except SystemExit as exc:  # --help and --version
            return int(exc.code or 0)
        command = args.command
        return COMMANDS[command](args, written)
    except InputError as exc:  # bad input, and only that
        report.print_error(str(exc))
        return EXIT_INPUT
    except KeyboardInterrupt:
        report.print_interrupted(written=written)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # `probeplan show x.h5 | head`: the reader left; not an error of ours.
        with contextlib.suppress(OSError):
            sys.stdout = open(os.devnull, "w")  # silences the exit-time flush
        return EXIT_OK
    except Exception as exc:  # anything else is a bug
        if _caused_by_interrupt(exc):
            report.print_interrupted(written=written)
            return EXIT_INTERRUPTED
        debug = os.environ.get(DEBUG_VARIABLE) == "1"
        report.print_internal_error(exc, debug=debug, command=command, variable=DEBUG_VARIABLE)
        return EXIT_INTERNAL
