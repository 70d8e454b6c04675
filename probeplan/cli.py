"""The ``probeplan`` command line: parse, load, call the library, report. No physics here.

Commands (the contract's "Command line"):

* ``probeplan plan [CONFIG] [--out FILE.h5] [--force] [--resume FILE.h5] [--quiet]``
* ``probeplan score CONFIG --layout LAYOUT.csv [--out FILE.h5] [--force]``
* ``probeplan show FILE.h5``

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

import numpy as np

from . import report
from .errors import InputError

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_INPUT = 2
EXIT_INTERRUPTED = 130

_DEMO = "demo.toml"


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
    "x_m,y_m,z_m (metres, any order). Optional columns: name; component (x, y, z, vector or a "
    "unit vector as three numbers separated by spaces; must match [probes] component, "
    "per-probe components are not supported in this version); grade (a [[grade]] name of the "
    "config, the same on every row); gain (calibration factor > 0, e.g. for a meter on a mast). "
    "Installed probes come from the config's [[probes.installed]] and are added in front."
)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``probeplan`` (exposed for documentation and tests)."""
    from . import __version__

    parser = _Parser(
        prog="probeplan",
        description=(
            "Plan where to mount electric-field meters: score a layout by the Fisher "
            "information of its readings (Cramér–Rao bounds), or search for a better one. "
            "SI units; physics sign convention (E points away from positive charge); z up."
        ),
        epilog="Exit status: 0 done, 2 bad input, 130 interrupted (plan), 1 internal error.",
    )
    parser.add_argument("--version", action="version", version=f"probeplan {__version__}")
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
    p.add_argument(
        "--out",
        metavar="FILE.h5",
        help="result file (default: <config name>.h5 in the working folder, or <name>-2.h5 … "
        "if taken; with --resume: the resumed file itself)",
    )
    p.add_argument("--force", action="store_true", help="overwrite an existing --out file")
    p.add_argument(
        "--resume",
        metavar="FILE.h5",
        help="continue from the layout and search history stored in FILE.h5",
    )
    p.add_argument(
        "--quiet", action="store_true", help="no progress bar and no summary; name the file only"
    )

    s = sub.add_parser(
        "score",
        help="score a given layout, no search",
        description="Score a given layout of new probes (plus the config's installed ones).",
    )
    s.add_argument("config", metavar="CONFIG", help="TOML config")
    s.add_argument("--layout", metavar="LAYOUT.csv", required=True, help=_LAYOUT_HELP)
    s.add_argument("--out", metavar="FILE.h5", help="also write the result to this HDF5 file")
    s.add_argument("--force", action="store_true", help="overwrite an existing --out file")

    w = sub.add_parser(
        "show",
        help="the terminal summary of a stored result",
        description="Print the terminal summary of a result file, from the file alone.",
    )
    w.add_argument("file", metavar="FILE.h5", help="result file written by plan or score")
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
    parser = build_parser()
    try:
        try:
            args = parser.parse_args(argv)
        except SystemExit as exc:  # --help and --version
            return int(exc.code or 0)
        if args.command is None:
            raise _UsageError("choose a command: plan, score or show (see `probeplan --help`)")
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


# --------------------------------------------------------------------------------------------
# Commands
# --------------------------------------------------------------------------------------------


def _cmd_plan(args: argparse.Namespace) -> int:
    from .result import make_result
    from .search import d_efficiency, plan
    from .store import check_writable, free_name, read_result, write_result

    stored = None
    if args.resume:
        stored = read_result(args.resume)
        if stored.command != "plan":
            raise InputError(
                f"{args.resume}: holds a `{stored.command}` result; --resume continues a "
                "`plan` result."
            )
    if args.config:
        config = _load_config(args.config)
    elif stored is not None:
        config = _parse_config_text(stored.config_text, stored.config_path)
    else:
        config = _demo_config()

    resume_path = Path(args.resume) if args.resume else None
    if args.out:
        out = Path(args.out)
    elif resume_path is not None:
        out = resume_path
    else:
        out = free_name(Path(config.path).stem)
    # Resuming into the resumed file replaces it: that is what --resume is for.
    force = bool(args.force) or (resume_path is not None and _same_file(out, resume_path))
    check_writable(out, force=force)  # before the search spends its time

    problem = _build_problem(config)
    warm = history = None
    if stored is not None:
        warm = stored.score.positions_m[~np.asarray(stored.score.installed, dtype=bool)]
        if warm.shape[0] != problem.count:
            raise InputError(
                f"{args.resume}: holds {warm.shape[0]} new probes but the config asks for "
                f"[probes] count = {problem.count}; resume with the same count, or start a new "
                "plan without --resume."
            )
        history = stored.search.history if stored.search is not None else None

    flag = _StopFlag()
    progress_cm = contextlib.nullcontext(None) if args.quiet else report.progress_bar()
    with progress_cm as progress, _signals_to(flag):
        outcome = plan(problem, progress=progress, stop=flag, warm_start_m=warm, history=history)

    extra = {}
    eff = d_efficiency(outcome.score.value, outcome.info.bound, problem.n_params)
    if eff is not None and problem.criterion.name == "d":
        extra["d_efficiency"] = float(eff)
    result = make_result(
        "plan", config, outcome.score, search=outcome.info, complete=outcome.complete, extra=extra
    )
    # A signal that arrives while the file is written must not leave it half-written:
    # write_result cleans its temporary up on any exception, KeyboardInterrupt included.
    written = write_result(result, out, force=force)
    if not args.quiet:
        report.print_result(result)
    report.print_written(written, complete=outcome.complete)
    return EXIT_OK if outcome.complete else EXIT_INTERRUPTED


def _same_file(a: Path, b: Path) -> bool:
    try:
        return a.resolve() == b.resolve()
    except OSError:
        return False


def _cmd_score(args: argparse.Namespace) -> int:
    from .result import make_result
    from .store import check_writable, read_layout_csv, write_result

    config = _load_config(args.config)
    layout = read_layout_csv(args.layout)
    if args.out:
        check_writable(args.out, force=args.force)
    _check_components(config, layout)
    grade = _layout_grade(config, layout)
    problem = _build_problem(config, count=layout.positions_m.shape[0], grade=grade)
    gain = None
    if layout.gains is not None and any(g is not None for g in layout.gains):
        default = problem.gain_at(layout.positions_m)
        gain = np.array(
            [default[k] if g is None else g for k, g in enumerate(layout.gains)], dtype=float
        )
    with _as_input_error():  # e.g. a probe placed on a point charge: the layout's fault
        score = problem.score(layout.positions_m, gain=gain)
    result = make_result("score", config, score)
    report.print_result(result)
    if args.out:
        written = write_result(result, args.out, force=args.force)
        report.print_written(written)
    return EXIT_OK


def _check_components(config, layout) -> None:
    """Per-probe components are not supported: a CSV component must equal the config's."""
    if layout.components is None:
        return
    from .probes import component_axes

    want = component_axes(config.probes.component)
    for k, comp in enumerate(layout.components):
        if comp is None:
            continue
        got = component_axes(comp)
        if got.shape != want.shape or not np.allclose(got, want, atol=1e-9):
            raise InputError(
                f"{layout.path}: probe {layout.names[k]!r} (row {k + 1}) has component "
                f"{_show_component(comp)} but [probes] component is "
                f"{_show_component(config.probes.component)} in {config.path}; a component per "
                "probe is not supported in this version: leave the column empty or make it "
                "match."
            )


def _show_component(comp) -> str:
    if isinstance(comp, str):
        return repr(comp)
    return "[" + ", ".join(f"{a:g}" for a in comp) + "]"


def _layout_grade(config, layout):
    """The one [[grade]] the CSV names (same on every row), or None."""
    if layout.grades is None:
        return None
    named = {g for g in layout.grades if g is not None}
    if not named:
        return None
    offered = {g.name: g for g in config.grades}
    listed = ", ".join(offered) or "none: the config has no [[grade]] table"
    for k, g in enumerate(layout.grades):
        if g is not None and g not in offered:
            raise InputError(
                f"{layout.path}: probe {layout.names[k]!r} (row {k + 1}) names grade {g!r}; "
                f"the grades of {config.path} are: {listed}."
            )
    if len(named) > 1 or None in layout.grades:
        shown = ", ".join(sorted(named)) + (" and empty cells" if None in layout.grades else "")
        raise InputError(
            f"{layout.path}: the grade column holds {shown}; a grade per probe is not "
            "supported in this version: give the same grade on every row."
        )
    return offered[named.pop()]


def _cmd_show(args: argparse.Namespace) -> int:
    from .store import read_result

    result = read_result(args.file)
    report.print_result(result)
    return EXIT_OK


_COMMANDS = {"plan": _cmd_plan, "score": _cmd_score, "show": _cmd_show}
