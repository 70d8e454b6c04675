"""The bodies of the ``probeplan`` commands: load, call the library, write, report. No physics.

Each command takes the parsed arguments and a list it appends every file it has written to
(whole), so that the command line can say what was written whatever stops the run. Bad input
raises :class:`~probeplan.errors.InputError` where it enters (:mod:`probeplan.reruns`, the
config, the store); everything else that goes wrong is a bug.

Map of this module:

1. Signals: :class:`StopFlag`, :func:`signals_to`, :func:`stoppable` (SIGINT / SIGTERM end the
   search cleanly).
2. Writing: :func:`finish` (a plan or budget result), :func:`record_write`.
3. The commands, :data:`COMMANDS`.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import signal
from collections.abc import Callable, Iterator
from dataclasses import replace
from pathlib import Path

import numpy as np

from . import report, reruns
from .errors import EXIT_INTERRUPTED, EXIT_OK, InputError
from .resulttypes import probe_names

# --------------------------------------------------------------------------------------------
# Signals: SIGINT / SIGTERM end the search cleanly
# --------------------------------------------------------------------------------------------


class StopFlag:
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
def signals_to(handler: Callable) -> Iterator[None]:
    """Route SIGINT and SIGTERM to ``handler(signum, frame)`` inside the block; restore the
    old handlers after."""
    saved = {}
    try:
        for sig in (signal.SIGINT, signal.SIGTERM):
            try:
                saved[sig] = signal.signal(sig, handler)
            except ValueError:  # not the main thread (an embedding application): no handlers
                break
        yield
    finally:
        for sig, old in saved.items():
            signal.signal(sig, old)


def progress_bar(quiet: bool):
    """The progress callable of a run as a context: a drawn bar, or None when quiet."""
    return contextlib.nullcontext(None) if quiet else report.progress_bar()


@contextlib.contextmanager
def stoppable(quiet: bool) -> Iterator[tuple]:
    """A progress callable (None when quiet) and a stop flag set by SIGINT/SIGTERM."""
    flag = StopFlag()
    with progress_bar(quiet) as progress, signals_to(flag.handle):
        yield progress, flag


def summary(result, quiet: bool) -> None:
    """The summary of a result; with ``--quiet`` only its warnings (on standard error): a
    units slip is said even when nothing else is."""
    if quiet:
        report.print_warnings(result)
    else:
        report.print_result(result)


@contextlib.contextmanager
def on_cluster(args: argparse.Namespace, config) -> Iterator[object]:
    """The dask cluster the command runs on (:mod:`probeplan.cluster`), or None for this
    machine: ``--scheduler``, else ``$PROBEPLAN_SCHEDULER``, else ``[design] scheduler``."""
    from .cluster import connect, scheduler_address

    found = scheduler_address(getattr(args, "scheduler", None), config)
    if found is None:
        yield None
        return
    with connect(*found, timeout_s=config.design.scheduler_timeout_s) as cluster:
        yield cluster


def sharded(problem, cluster):
    """The problem with its large scenario sets split over ``cluster`` (:mod:`probeplan.shard`),
    or as it is without one."""
    if cluster is None:
        return problem
    from .shard import on_client

    return on_client(problem, cluster.client)


# --------------------------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------------------------


@contextlib.contextmanager
def signals_deferred() -> Iterator[None]:
    """Hold SIGINT and SIGTERM until the block is done, then act on them (KeyboardInterrupt).

    Around a write and its record in ``written``: a file is either written whole and named as
    written, or not written and not named, whenever the signal comes."""
    caught: list[int] = []
    with signals_to(lambda signum, frame: caught.append(signum)):
        yield
    if caught:
        raise KeyboardInterrupt


def record_write(write: Callable[[], Path], written: list[Path]) -> Path:
    """Run ``write()`` (which writes one file whole or not at all) and append the file to
    ``written``, with signals held until both are done."""
    with signals_deferred():
        path = write()
        written.append(path)
    return path


def finish(run: reruns.Run, result, quiet: bool, written: list[Path]) -> int:
    """Write a plan or budget result, print it, and give the exit status of its completion."""
    from .store import write_result

    def write() -> Path:
        return write_result(result, run.out, force=run.force, names=run.names)

    path = record_write(write, written)
    summary(result, quiet)
    report.print_written(path, complete=result.complete, command=result.command)
    return EXIT_OK if result.complete else EXIT_INTERRUPTED


# --------------------------------------------------------------------------------------------
# Commands
# --------------------------------------------------------------------------------------------


def solve_structures(config, quiet: bool) -> None:
    """Mesh and factor the config's structures under a progress bar (the problem built next
    finds the factors in memory or the disk cache); nothing without structures."""
    if not getattr(config, "structures", ()):
        return
    from .bem import Structures

    with stoppable(quiet) as (progress, _):
        report_to = None if progress is None else (lambda d, t: progress("structures", d, t))
        Structures.build(
            config.structures,
            config.ground_z_m,
            meters_m=config.structure_meters_m,
            progress=report_to,
        )


def cmd_plan(args: argparse.Namespace, written: list[Path]) -> int:
    """``probeplan plan``: search a layout and write it with its score."""
    from .result import make_result
    from .search import d_efficiency, plan

    run = reruns.prepare_run(args, "plan", suffix="")
    stored, config, old = run.stored, run.config, run.old
    solve_structures(config, args.quiet)
    problem = reruns.build_problem(config)
    check_enough_readings(problem, config)
    warm = history = None
    if old is not None and args.from_as == "start":
        warm = reruns.new_probes(old)
    if stored is not None:
        warm, history = reruns.resume_start(stored, args.resume, problem.count)

    with on_cluster(args, config) as cluster, stoppable(args.quiet) as (progress, flag):
        outcome = plan(
            sharded(problem, cluster),
            progress=progress,
            stop=flag,
            warm_start_m=warm,
            history=history,
        )
    # A search stopped before it had any layout says so (``has_layout``, the search stages).
    if not getattr(outcome, "has_layout", True):
        report.print_interrupted(when="before the search had a layout", written=written)
        return EXIT_INTERRUPTED  # nothing to write

    extra = {}
    eff = d_efficiency(outcome.score.value, outcome.info.bound, problem.n_params)
    if eff is not None and problem.criterion.name == "d":
        extra["d_efficiency"] = float(eff)
    changes = None
    if old is not None:
        changes = reruns.changes(old, args.from_file, args.from_as, run.base_config, outcome.score)
    result = make_result(
        "plan",
        config,
        outcome.score,
        search=outcome.info,
        complete=outcome.complete,
        extra=extra,
        changes=changes,
        probe_names=reruns.run_names(config, outcome.score),
    )
    return finish(run, result, args.quiet, written)


def check_enough_readings(problem, config) -> None:
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


def cmd_score(args: argparse.Namespace, written: list[Path]) -> int:
    """``probeplan score``: score a layout given as a CSV or an earlier result."""
    from .result import make_result
    from .sources import SingularPointError
    from .store import check_writable, read_layout_csv, write_result

    config = reruns.load_config(args.config)
    old = layout = None
    if args.from_file:
        old = reruns.read_old(args.from_file)
        positions, gain = reruns.new_probes(old), reruns.new_gains(old)
        axes, grades = old.score.new_meters()
        where, names = f"{args.from_file}", None
    else:
        layout = read_layout_csv(args.layout)
        positions, names = layout.positions_m, layout.names
        axes, grades = reruns.csv_axes(config, layout), layout.grades
        where = f"{layout.path}"
    reruns.check_grades(config, where, grades, names)
    if args.out:
        check_writable(args.out, force=args.force, reading=[args.config, where])
    problem = reruns.build_problem(config, count=positions.shape[0], layout_axes=axes)
    if layout is not None:
        gain = reruns.csv_gains(problem, layout)
    g = config.ground_z_m
    if g is not None and positions.size and positions[:, 2].min() < g:
        i = int(np.argmin(positions[:, 2]))
        raise InputError(
            f"{where}: probe {i} is at z = {positions[i, 2]:g} m, below the ground plane at "
            f"z = {g:g} m of {config.path}; a meter reads the field on or above the ground."
        )
    try:
        with on_cluster(args, config) as cluster:
            score = sharded(problem, cluster).score(
                positions, gain, axes, reruns.grade_names(grades)
            )
    except SingularPointError as exc:  # a probe placed on a point charge: the layout's fault
        raise InputError(f"{where} (installed probes counted first): {exc}") from None
    names = reruns.score_names(config, score, layout, problem.installed_m.shape[0])
    changes = None
    if old is not None:
        changes = reruns.changes(old, args.from_file, "rescore", config, score)
    result = make_result("score", config, score, changes=changes, probe_names=names)
    # Scoring a layout that breaks the mounting rules is allowed (it may be what is installed
    # today), but the summary says which rules it breaks, naming the probes as its layout
    # table does (installed first, then the CSV's names or new-k), never by a row number.
    shown = probe_names(result)
    n_inst = problem.installed_m.shape[0]
    notes = tuple(
        f"{where}: {v} The mounting rules of {config.path} do not allow this."
        for v in problem.site.violations(positions, shown[n_inst:], shown[:n_inst])
    )
    result = replace(result, notes=notes)
    summary(result, args.quiet)
    if args.out:
        path = record_write(lambda: write_result(result, args.out, force=args.force), written)
        report.print_written(path)
    return EXIT_OK


def cmd_budget(args: argparse.Namespace, written: list[Path]) -> int:
    """``probeplan budget``: plan every (count, grade) option and price it."""
    from .budget import chosen_option, run_budget
    from .result import make_result

    run = reruns.prepare_run(args, "budget", suffix="-budget")
    config = run.config
    solve_structures(config, args.quiet)
    reruns.build_problem(config)  # every config check before the sweep spends its time
    done = reruns.stored_options(run.stored) if run.stored is not None else ()

    with on_cluster(args, config) as cluster, stoppable(args.quiet) as (progress, flag):
        on = (
            {} if cluster is None else {"executor": cluster.executor, "event": cluster.stop_event()}
        )
        table, complete = run_budget(config, progress=progress, stop=flag, done=done, **on)
    if table.count.size == 0:
        report.print_interrupted(when="before any option was planned", written=written)
        return EXIT_INTERRUPTED  # stopped before any option was planned: nothing to write
    maximise = config.design.criterion == "d"
    row = chosen_option(table, maximise)
    grade = next(g for g in config.grades if g.name == table.grade[row])
    problem = reruns.build_problem(config, count=int(table.count[row]), grade=grade)
    score = problem.score(table.layouts[row])
    changes = None
    if run.old is not None:
        changes = reruns.changes(run.old, args.from_file, args.from_as, run.base_config, score)
    if table.cheapest >= 0:
        why = "the cheapest option that meets the target"
    elif table.target is not None:
        why = "no option meets the target; the best-scoring option"
    else:
        why = "no target set; the best-scoring option"
    note = (
        f"the layout and bounds below are budget row {row}: {table.count[row]} new "
        f'"{table.grade[row]}" meters, cost {table.cost[row]:,.0f} ({why}).'
    )
    notes = (note, *_budget_fit_notes(table))
    result = make_result(
        "budget",
        config,
        score,
        budget=table,
        complete=complete,
        extra={"budget_row_scored": float(row)},
        changes=changes,
        notes=notes,
        probe_names=reruns.run_names(config, score),
    )
    return finish(run, result, args.quiet, written)


def _budget_fit_notes(table) -> tuple[str, ...]:
    """One note for the counts the mounting rules cannot hold, naming the largest that fits."""
    fits = table.fits()
    if fits.all():
        return ()
    bad = sorted({int(c) for c in table.count[~fits]})
    why = next(r for r, f in zip(table.reason, fits, strict=True) if not f)
    largest = f"the largest count asked for that fits is {int(table.count[fits].max())}"
    counts = ("count " if len(bad) == 1 else "counts ") + ", ".join(map(str, bad))
    verb = "does" if len(bad) == 1 else "do"
    return (f"{counts} {verb} not fit the mounting rules, not planned ({why}); {largest}.",)


def cmd_show(args: argparse.Namespace, written: list[Path]) -> int:
    """``probeplan show``: the summary of a stored result (and its layout as a CSV or on a
    map)."""
    from .store import check_writable, read_result, write_layout_csv, write_layout_geojson

    result = read_result(args.file)
    site = None
    if args.geojson:
        if result.frame is None:
            raise InputError(
                f"{args.file}: the result has no [frame], so --geojson has no longitude or "
                "latitude to write; add a [frame] table (origin_lon_deg, origin_lat_deg) to the "
                "config and run it again."
            )
        # The site's outlines come from the stored config (its GeoJSON files must be found).
        site = reruns.parse_config_text(result.config_text, result.config_path)
    for option, target, suffix in (
        ("--layout-csv", args.layout_csv, ".csv"),
        ("--geojson", args.geojson, ".geojson"),
    ):
        if target:
            check_writable(
                target, force=args.force, option=option, suffix=suffix, reading=[args.file]
            )
    summary(result, args.quiet)
    if args.layout_csv:
        path = record_write(
            lambda: write_layout_csv(result, args.layout_csv, force=args.force), written
        )
        report.print_layout_written(path)
    if args.geojson:
        path = record_write(
            lambda: write_layout_geojson(
                result,
                args.geojson,
                regions=site.regions,
                keepouts=site.keepouts,
                force=args.force,
            ),
            written,
        )
        report.print_layout_written(path)
    return EXIT_OK


def cmd_simulate(args: argparse.Namespace, written: list[Path]) -> int:
    """``probeplan simulate``: simulated fits of a stored layout, stored back into its file."""
    from .simulate import simulate
    from .store import check_writable, read_result, write_result

    if args.trials < 2:
        raise InputError(f"--trials must be a whole number >= 2; got {args.trials}.")
    result = read_result(args.file)
    check_writable(args.file, force=True, option=None)  # before the fits spend their time
    config, problem, (positions, gain, axes, grades) = reruns.stored_problem(result, args.file)
    seed = config.seed if args.seed is None else args.seed
    with progress_bar(args.quiet) as progress:
        sim = simulate(
            problem,
            positions,
            gain,
            axes=axes,
            grades=grades,
            trials=args.trials,
            rng=np.random.default_rng(seed),
            progress=progress,
        )
    result = replace(result, simulation=sim)
    summary(result, args.quiet)
    # Stored back into the file it read: there is no option naming another file.
    path = record_write(lambda: write_result(result, args.file, force=True, option=None), written)
    report.print_written(path)
    return EXIT_OK


def cmd_plot(args: argparse.Namespace, written: list[Path]) -> int:
    """``probeplan plot``: site map, coverage map and budget curve of a stored result."""
    from .enhancement_map import add_enhancement_map
    from .plots import plot_all
    from .store import read_result

    result = read_result(args.file)
    config, problem, _ = reruns.stored_problem(result, args.file)
    src = Path(args.file)
    folder = Path(args.folder) if args.folder else src.with_name(src.stem + "_plots")
    if folder.exists() and not folder.is_dir():
        raise InputError(f"{folder}: exists and is not a folder; give --folder a folder name.")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{folder}: cannot create the folder ({exc.strerror}).") from None
    # Each image is written whole; signals wait until the set is written and recorded.
    with signals_deferred():
        paths = plot_all(result, config, problem, folder, fmt=args.fmt)
        add_enhancement_map(paths, result, problem, folder, fmt=args.fmt)
        written.extend(paths)
    report.print_plots(paths)
    return EXIT_OK


def cmd_locate(args: argparse.Namespace, written: list[Path]) -> int:
    """``probeplan locate``: fit the charge from recorded readings of a stored layout, check
    the meters and, with a truth, whether the network delivers; stored in FILE.h5 (or --out)."""
    from .locate import locate
    from .readings import read_readings, read_truth
    from .store import check_writable, probe_names, read_result, write_result

    result = read_result(args.file)
    others = [args.readings, *([args.truth] if args.truth else [])]
    if args.out is None:  # stored back into the file it read, as `simulate` does
        out, force, option, reading = args.file, True, None, others
    else:
        out, force, option, reading = args.out, args.force, "--out", [args.file, *others]
    check_writable(out, force=force, option=option, reading=reading)
    _, problem, (positions, gain, axes, grades) = reruns.stored_problem(result, args.file)
    meters = problem.meters(positions, gain, axes, grades)
    if meters.gain.size == 0:
        raise InputError(
            f"{args.file}: the result holds no meters; `locate` needs the layout that recorded "
            "the readings (a result of `plan`, `score` or `budget`)."
        )
    table = read_readings(args.readings, probe_names(result), meters.axes)
    truth = read_truth(args.truth, problem.names) if args.truth else None
    with report.progress_bar() as progress:
        location = locate(
            problem,
            meters,
            table,
            truth=truth,
            workers=os.cpu_count() or 1,
            progress=lambda done, total: progress("fitting steps", done, total),
        )
    result = replace(result, location=location)
    report.print_result(result)
    path = record_write(lambda: write_result(result, out, force=force, option=option), written)
    report.print_written(path)
    return EXIT_OK


#: Command name -> its body.
COMMANDS: dict[str, Callable[[argparse.Namespace, list[Path]], int]] = {
    "plan": cmd_plan,
    "score": cmd_score,
    "budget": cmd_budget,
    "show": cmd_show,
    "simulate": cmd_simulate,
    "plot": cmd_plot,
    "locate": cmd_locate,
}
