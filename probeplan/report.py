"""The terminal summary, the progress bar and the error lines: the only module that prints.

Everything here reads a :class:`~probeplan.result.Result` (fresh from a command or read back from
a file by ``probeplan show``) and prints it with rich. Tables fit an 80-column terminal; status
words carry the information, colour only repeats it.
"""

from __future__ import annotations

import contextlib
import math
import os
import sys
import traceback
from collections.abc import Callable, Iterator, Sequence

import numpy as np
from rich import box
from rich.console import Console
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from . import findings
from .locate_report import locate_parts
from .probes import axes_label
from .prose import Prose as Prose
from .prose import safe_text as safe_text
from .result import Result
from .resulttypes import format_number, param_unit, probe_names
from .resulttypes import format_quantity as format_quantity

#: The line every summary carries under its numbers (the contract asks for it wherever a
#: field value is printed).
SIGN_LINE = "Fields: physics sign convention, E points away from positive charge; z up."

#: Caution panels by the config's `caution`; they defer to codes, standards and qualified
#: practice because the tool only plans instruments.
CAUTIONS: dict[str, str] = {
    "lightning": (
        "probeplan plans instrument positions; it does not make lightning-safety decisions. "
        "Follow local codes, the applicable standards and qualified, licensed practice."
    ),
    "esd": (
        "probeplan plans instrument positions; it does not make electrostatic-ignition or "
        "ESD-compliance decisions. Follow local codes, the applicable standards (hazardous "
        "areas, electrostatic hazards) and qualified, licensed practice."
    ),
    "high-voltage": (
        "probeplan plans instrument positions; it does not make high-voltage safety decisions "
        "(clearances, earthing, access). Follow local codes, the applicable standards and "
        "qualified, licensed practice."
    ),
    "general": (
        "probeplan plans instrument positions; it does not make safety decisions about the "
        "charges it models (lightning, electrostatic ignition, high voltage). Follow local "
        "codes, the applicable standards and qualified, licensed practice."
    ),
}

#: The line a summary carries when the config has conducting structures.
STRUCTURES_LINE = (
    "Structures are modelled as perfect conductors in an electrostatic field (enhancement: each "
    "meter's computed reading over the undisturbed field, nominal scenario). The model does not "
    "replace lightning-protection or high-voltage clearance design."
)

#: The line a summary carries when its config says ``caution = "none"``.
CAUTION_LINE = (
    "probeplan plans instrument positions only; safety decisions follow local codes, the "
    "applicable standards and qualified, licensed practice."
)

_CRITERION_TEXT = {
    "d": "D-optimal: log det of the Fisher information (larger is better)",
    "location": "location error of source 0: sqrt(C_xx + C_yy) (smaller is better)",
    "charge": "relative charge error of source 0: sqrt(C_qq)/|q| (smaller is better)",
}
_CRITERION_UNIT = {"d": "log det, SI units", "location": "m", "charge": "fraction of |q|"}


def _console(console: Console | None, stderr: bool = False) -> Console:
    return console if console is not None else Console(stderr=stderr, highlight=False)


# --------------------------------------------------------------------------------------------
# User text, numbers and wrapping: every string of a summary passes through here
# --------------------------------------------------------------------------------------------


def _user(value: object, style: str | None = None) -> Text:
    """User text as a rich Text: escaped by :func:`safe_text`, never read as markup."""
    return Text(safe_text(value), style=style or "")


def _table(title: str | None = None, **kw) -> Table:
    """A summary table: a plain title (user text in it is escaped, never markup)."""
    kw.setdefault("box", box.SIMPLE_HEAD)
    # One space of padding and the box's one-space divider: two spaces between columns.
    kw.setdefault("padding", (0, 1, 0, 0))
    return Table(title=_user(title) if title else None, title_justify="left", **kw)


def _column(table: Table, header: str, *, number: bool = False, **kw) -> None:
    """A column; a number column never wraps (a number stays with its unit)."""
    if number:
        kw.setdefault("justify", "right")
        kw["no_wrap"] = True
    else:
        kw.setdefault("overflow", "fold")
    table.add_column(_user(header), **kw)


def _row(table: Table, *cells, style: str | None = None) -> None:
    """A table row: every cell as escaped, plain text."""
    table.add_row(*(c if isinstance(c, Text) else _user(c) for c in cells), style=style)


def _value(x: float) -> str:
    """A ``d`` value with enough digits to compare layouts (and to parse back)."""
    return f"{x:.6g}" if math.isfinite(x) else f"{x:g}"


def _crit(result: Result, x: float) -> str:
    """A criterion value: ``d`` as a number, ``location`` in m or km, ``charge`` in %."""
    unit = {"location": "m", "charge": "%"}.get(result.score.criterion)
    return _value(x) if unit is None else format_quantity(x, unit)


def _coordinate_decimals(positions_m: np.ndarray) -> int:
    """Decimals that show a site's coordinates to about 4 significant digits of its extent."""
    extent = float(np.max(np.abs(positions_m))) if positions_m.size else 0.0
    if extent <= 0.0 or not math.isfinite(extent):
        return 2
    return int(min(4, max(0, 3 - math.floor(math.log10(extent)))))


# --------------------------------------------------------------------------------------------
# The summary
# --------------------------------------------------------------------------------------------


def print_result(result: Result, console: Console | None = None) -> None:
    """Print the terminal summary of a result.

    Parameters
    ----------
    result : Result
        From a command, or read back by :func:`probeplan.store.read_result`.
    console : rich Console or None
        Default: a new console on standard output.
    """
    con = _console(console)
    for part in summary_parts(result):
        con.print(part)


def summary_parts(result: Result) -> list:
    """The renderables of the summary, in order (tables end with their own blank line).

    Every string in them went through :func:`safe_text`; prose is :class:`Prose`.
    """
    blank = Text("")
    parts: list = [_header(result), blank]
    warnings = _findings_text("WARNING: ", findings.units_slip(result), "bold red")
    if warnings is not None:
        parts += [warnings, blank]
    if result.notes:
        parts += [_findings_text("Note: ", result.notes, "bold yellow"), blank]
    meters = _meters_table(result)
    parts += [_layout_table(result), *([meters] if meters is not None else [])]
    parts.append(_bounds_table(result))
    wide = _findings_text("Not resolved there: ", findings.wide_bounds(result), "bold yellow")
    if wide is not None:
        parts += [wide, blank]
    parts += [_criterion_text(result), blank]
    failure = _failure_text(result)
    if failure is not None:
        parts += [failure, blank]
    if result.search is not None:
        parts += [_search_table(result), _search_notes(result), blank]
    if result.budget is not None:
        parts.append(_budget_table(result))
    if result.changes is not None:
        parts += [_changes_text(result), _changes_table(result)]
    if result.simulation is not None:
        parts += [*_simulation_parts(result), blank]
    if result.location is not None:
        parts += [*locate_parts(result.location, format_quantity), blank]
    parts += [_unresolved_text(result), blank]
    assumed = _findings_text("Assumed: ", findings.assumptions(result), "bold")
    if assumed is not None:
        parts += [assumed, blank]
    parts.append(Text(SIGN_LINE))
    if result.structures is not None:
        parts.append(Text(STRUCTURES_LINE))
    caution = CAUTIONS.get(result.caution)
    if caution:
        text = Prose(Text(caution), hang=False)
        parts.append(Panel(text, title="Caution", title_align="left", width=80))
    else:
        parts.append(Text(CAUTION_LINE))  # even `caution = "none"` keeps one line of it
    return [Prose(p) if isinstance(p, Text) else p for p in parts]


def _findings_text(label: str, sentences, style: str) -> Text | None:
    """Sentences as labelled lines (user text in them escaped); None when there are none."""
    if not sentences:
        return None
    text = Text()
    for k, sentence in enumerate(sentences):
        text.append(label, style=style)
        text.append_text(_user(sentence))
        if k + 1 < len(sentences):
            text.append("\n")
    return text


def _header(result: Result) -> Text:
    text = Text()
    text.append_text(_user(f"probeplan {result.command}: ", style="bold"))
    text.append_text(_user(result.title or "(untitled)", style="bold"))
    g = result.ground_z_m
    ground = "free space" if g is None else f"ground plane at z = {format_quantity(g, 'm')}"
    text.append("\n")
    text.append_text(_user(f"config {result.config_path}, seed {result.seed}, {ground}"))
    text.append("\n")
    if result.frame is not None:
        text.append_text(_user(_frame_line(result)))
        text.append("\n")
    text.append_text(_user(f"written {result.created_utc} by probeplan {result.version}"))
    text.append("\n")
    if result.complete:
        text.append("status: complete")
    else:
        text.append(
            "status: INTERRUPTED - the best layout found before the search was stopped",
            style="bold yellow",
        )
    return text


def _frame_line(result: Result) -> str:
    """The map frame and what its flat metres leave out over the meters."""
    d = result.frame.distortion(result.score.positions_m)
    return (
        f"map frame: {result.frame.describe()}; over the meters "
        f"({format_quantity(d.radius_m, 'm')} from the origin) scale error <= "
        f"{d.scale_error:.1e}, distances within {format_quantity(d.distance_error_m, 'm')}; "
        f"the curved ground falls {format_quantity(d.ground_drop_m, 'm')} below the flat "
        "model's at that distance"
    )


def _layout_table(result: Result) -> Table:
    s = result.score
    pos = np.asarray(s.positions_m, dtype=float)
    installed = np.asarray(s.installed, dtype=bool)
    names = probe_names(result)
    # Heights to their own scale: a meter 12.3 m up a mast on a 10 km site is not at "12".
    dec = (_coordinate_decimals(pos[:, :2]),) * 2 + (_coordinate_decimals(pos[:, 2:]),)
    n_inst = int(installed.sum())
    title = f"Layout: {n_inst} installed + {installed.size - n_inst} new probes"
    table = _table(title, pad_edge=False)
    # No row numbers: the notes name every probe by its name.
    _column(table, "name", max_width=16)
    _column(table, "kind")
    for axis in "xyz":
        _column(table, f"{axis} (m)", number=True)
    _column(table, "gain", number=True)
    enh = s.enhancement
    if enh is not None:
        _column(table, "enhancement", number=True)  # computed: structures over none
    _column(table, "saturated", number=True)
    for k in range(pos.shape[0]):
        sat = float(s.saturated[k]) if k < len(s.saturated) else float("nan")
        _row(
            table,
            names[k],
            "installed" if installed[k] else "new",
            *(f"{pos[k, j]:.{dec[j]}f}" for j in range(3)),
            format_number(float(s.gain[k])),
            *([] if enh is None else [format_number(float(enh[k]))]),
            f"{100.0 * sat:.0f} %" if math.isfinite(sat) else "n/a",
        )
    return table


def _meters_table(result: Result) -> Table | None:
    """What each meter reads and its grade, when they differ from meter to meter (else the
    config's ``[probes]`` says it for all, and the table is left out)."""
    s = result.score
    if s.axes is None or s.grade is None:
        return None
    reads = [axes_label(a) for a in s.axes]
    if len(set(reads)) == 1 and len(set(s.grade)) == 1:
        return None
    table = _table("Meters", pad_edge=False)
    _column(table, "name", max_width=16)
    _column(table, "reads")
    _column(table, "grade")
    for k, name in enumerate(probe_names(result)):
        _row(table, name, reads[k], s.grade[k] or "as [probes]")
    return table


def _bounds_table(result: Result) -> Table:
    s = result.score
    crb = np.asarray(s.crb_std, dtype=float)
    theta = np.asarray(s.theta, dtype=float)
    n_s = crb.shape[0]
    title = f"1-sigma Cramér–Rao bound over {n_s} scenario{'s' if n_s != 1 else ''}"
    table = _table(title, pad_edge=False)
    _column(table, "parameter")
    for header in ("nominal", "median 1-sigma", "worst 1-sigma"):
        _column(table, header, number=True)
    for j, name in enumerate(s.names):
        unit = param_unit(name)
        col = crb[:, j]
        # The median of a column with +inf entries is still meaningful when most are finite.
        med = float(np.median(col)) if n_s else float("nan")
        worst = float(np.max(col)) if n_s else float("nan")
        nominal = float(theta[0, j]) if theta.size else float("nan")
        _row(
            table,
            findings.param_label(result, name),
            format_quantity(nominal, unit),
            format_quantity(med, unit),
            format_quantity(worst, unit),
        )
    return table


def _criterion_text(result: Result) -> Text:
    s = result.score
    n_s = len(s.per_scenario)
    n_sing = int(np.sum(s.singular))
    text = Text()
    text.append_text(_user(f"Criterion {s.criterion}", style="bold"))
    if s.criterion == "d":
        value = f"{_value(s.value)} (log det, SI units)"
    else:
        value = _crit(result, s.value)
    text.append_text(_user(f" = {value}, {s.aggregate} over {n_s} scenarios"))
    text.append(f"\n  {_CRITERION_TEXT.get(s.criterion, '')}")
    if n_sing:
        text.append(f"\n  singular scenarios: {n_sing} of {n_s} (some parameter is unresolved).")
    return text


def _ratio(result: Result, value: float, other: float) -> str:
    """How ``value`` compares with ``other``: D-ratio for d, error ratio otherwise."""
    s = result.score
    n = max(len(s.names), 1)
    if math.isnan(other) or math.isnan(value):
        return "n/a"
    if not (math.isfinite(other) and math.isfinite(value)):
        if math.isfinite(value) or math.isfinite(other):
            plan_better = math.isfinite(value)
            return "inf" if plan_better else "0"
        return "n/a"
    ratio = (
        math.exp((value - other) / n) if s.criterion == "d" else (other / value if value else None)
    )
    if ratio is None:
        return "n/a"
    # Three decimals near 1, where stages differ by fractions of a percent; else 3 digits.
    return f"{ratio:.3f}" if 0.1 <= ratio < 10 else format_number(ratio)


def _plan_objective(result: Result) -> float:
    """The plan's value of what the search optimised (the criterion, or its worst single loss)."""
    s = result.score
    robust = result.search is not None and result.search.objective != "criterion"
    if robust and s.failure_values is not None and len(s.failure_values):
        fv = np.asarray(s.failure_values, dtype=float)
        return float(np.min(fv) if s.criterion == "d" else np.max(fv))
    return float(s.value)


def _search_table(result: Result) -> Table:
    s = result.score
    info = result.search
    ratio = "D-ratio" if s.criterion == "d" else "error ratio"
    title = "Search: what the plan bought"
    if info.objective != "criterion":
        title += f" (values: {info.objective})"
    table = _table(title)
    _column(table, "layout")
    _column(table, f"{s.criterion} value", number=True)
    _column(table, f"plan vs it ({ratio})", justify="right")
    plan = _plan_objective(result)
    for name, value in info.stages:
        _row(table, f"stage: {name}", _crit(result, value), _ratio(result, plan, value))
    stage_rows = set(info.stages)
    for b in info.baselines:
        if (b.name, b.value) in stage_rows:
            continue  # a stage's layout kept as a baseline: already on its stage row
        _row(table, f"baseline: {b.name}", _crit(result, b.value), _ratio(result, plan, b.value))
    _row(table, "the plan", _crit(result, plan), _ratio(result, plan, plan), style="bold")
    return table


def _failure_text(result: Result) -> Text | None:
    """Which single meter failure hurts most, and how much."""
    s = result.score
    if s.failure_values is None or len(s.failure_values) == 0:
        return None
    fv = np.asarray(s.failure_values, dtype=float)
    bad = np.where(np.isnan(fv), -np.inf if s.criterion == "d" else np.inf, fv)
    k = int(np.argmin(bad) if s.criterion == "d" else np.argmax(bad))
    names = probe_names(result)
    text = Text()
    text.append("If one meter fails: ", style="bold")
    if not np.any(np.isfinite(bad)):
        text.append("losing any one of them leaves some parameter unresolved.")
        return text
    text.append_text(
        _user(f"losing {names[k]} hurts most; {s.criterion} becomes {_crit(result, bad[k])}")
    )
    if not math.isfinite(bad[k]):
        text.append("\n  and the layout no longer resolves every parameter.")
    else:
        what = "D-ratio" if s.criterion == "d" else "error ratio"
        text.append(f"\n  ({what} of the full layout over it: {_ratio(result, s.value, bad[k])}).")
    return text


def _search_notes(result: Result) -> Text:
    s = result.score
    info = result.search
    n = max(len(s.names), 1)
    text = Text()
    if s.criterion == "d":
        text.append("  D-ratio = exp((plan - other)/n_params); above 1 the plan is better.\n")
    else:
        text.append("  error ratio = other / plan; above 1 the plan is better.\n")
    if info.bound is not None and math.isfinite(info.bound):
        text.append(f"  relaxation bound on the candidate grid: {_value(info.bound)}")
        if info.bound_gap is not None:
            text.append(f" (gap {format_number(info.bound_gap)})")
        text.append("\n")
        if s.criterion == "d" and math.isfinite(s.value):
            eff = math.exp((s.value - info.bound) / n)
            text.append(f"  D-efficiency: {100.0 * eff:.1f} % of the bound, ")
            text.append("exp((plan - bound)/n_params)\n")
        for words in findings.bound_words(result):
            text.append_text(_user(f"  {words}"))
            text.append("\n")
    spacing = (
        f"spacing {format_quantity(info.grid_spacing_m, 'm')}"
        if info.grid_spacing_m > 0
        else "the listed mounting points"
    )
    text.append(
        f"  candidate grid: {info.n_candidates} points, {spacing}; search took "
        f"{format_number(info.seconds)} s\n"
    )
    text.append_text(_user(f"  {findings.evaluation_account(result)}"))
    return text


def _budget_table(result: Result) -> Table:
    b = result.budget
    target = "no target" if b.target is None else f"target {_crit(result, b.target)}"
    table = _table(f"Budget options ({target})")
    _column(table, "row", number=True)
    _column(table, "count", number=True)
    _column(table, "grade")
    _column(table, "cost", number=True)
    _column(table, f"{result.score.criterion} value", number=True)
    _column(table, "meets target")
    _column(table, "note")
    for k in range(len(b.count)):
        notes = []
        if k == b.cheapest:
            notes.append("CHEAPEST")
        if b.pareto[k]:
            notes.append("Pareto")
        if not b.fits()[k]:
            notes.append("does not fit")
        _row(
            table,
            str(k),
            str(int(b.count[k])),
            str(b.grade[k]),
            f"{float(b.cost[k]):,.0f}",
            _crit(result, float(b.value[k])),
            "yes" if b.meets_target[k] else "no",
            " + ".join(notes),
        )
    return table


def _unresolved_text(result: Result) -> Text:
    s = result.score
    if not s.unresolved:
        return Text("Every estimated parameter is resolved.")
    text = Text()
    k = s.unresolved_scenario
    text.append(f"Unresolved directions (scenario {k}", style="bold")
    where = findings.scenario_where(result, int(k))
    if where:
        text.append_text(_user(f": {where}", style="bold"))
    text.append("):", style="bold")
    for d in s.unresolved:
        how = (
            "not resolved"
            if d.singular
            else f"poorly resolved, relative eigenvalue {d.relative_eigenvalue:.1e}"
        )
        text.append("\n")
        text.append_text(_user(f"  - {d.text} [{how}]"))
    return text


def _changes_text(result: Result) -> Text:
    c = result.changes
    s = result.score
    how = {
        "installed": "its probes kept fixed as installed",
        "start": "its probes as the starting layout",
        "rescore": "its layout rescored under this config",
    }.get(c.mode, c.mode)
    old_name = c.old_criterion or s.criterion
    text = Text()
    text.append_text(_user(f"Changes against {c.old_path} ({how}):", style="bold"))
    line = f"  old layout: {old_name} = {_value(c.old_value)} as stored"
    if c.rescore_note:
        line += f"; {c.rescore_note}"
    elif c.old_rescored != c.old_value or old_name != s.criterion:
        line += f"; {s.criterion} = {_crit(result, c.old_rescored)} under this config"
    text.append("\n")
    text.append_text(_user(line))
    what = "D-ratio" if s.criterion == "d" else "error ratio"
    line = f"  new layout: {s.criterion} = {_crit(result, s.value)}"
    if not c.rescore_note:
        line += f"; {what} new vs old: {_ratio(result, s.value, c.old_rescored)}"
    text.append("\n")
    text.append_text(_user(line))
    text.append("\n")
    counts = [
        (len(c.kept_m), "kept"),
        (len(c.moved_to_m), "moved"),
        (len(c.added_m), "added"),
        (len(c.removed_m), "removed"),
    ]
    text.append("  " + ", ".join(f"{n} {what}" for n, what in counts))
    structures = _structure_changes(c)
    if structures:
        text.append("\n  structures: " + structures)
    return text


def _structure_changes(c) -> str:
    """What changed in the conducting structures, one phrase each ("" when not compared)."""
    if c.structures_shift_m is None:
        return ""
    parts = [f"added {name!r}" for name in c.structures_added]
    parts += [f"removed {name!r}" for name in c.structures_removed]
    for k, name in enumerate(c.structures_changed):
        shift = np.asarray(c.structures_shift_m[k], dtype=float)
        old, new = c.structures_old_size_m[k], c.structures_new_size_m[k]
        what = []
        if np.linalg.norm(shift) > 1e-3:
            what.append("moved by (" + ", ".join(f"{v:.2f}" for v in shift) + ") m")
        if np.abs(np.asarray(new) - np.asarray(old)).max() > 1e-3:
            size = " × ".join(f"{v:.2f}" for v in old), " × ".join(f"{v:.2f}" for v in new)
            what.append(f"resized from {size[0]} m to {size[1]} m")
        parts.append(f"{name!r} " + " and ".join(what or ["reshaped"]))
    return "; ".join(parts) or "unchanged"


def _changes_table(result: Result) -> Table:
    c = result.changes
    rows = []
    for a, b in zip(c.moved_from_m, c.moved_to_m, strict=True):
        rows += [("moved from", a), ("  to", b)]
    rows += [("added", p) for p in c.added_m] + [("removed", p) for p in c.removed_m]
    every = [np.asarray(p, dtype=float) for _, p in rows]
    dec = _coordinate_decimals(np.array(every)) if every else 2
    table = _table(pad_edge=False)
    _column(table, "change")
    for axis in "xyz":
        _column(table, f"{axis} (m)", number=True)
    for what, p in rows:
        _row(table, what, *(f"{float(v):.{dec}f}" for v in p))
    if not rows:
        _row(table, "no probe moved, added or removed", "", "", "")
    return table


def _simulation_parts(result: Result) -> list:
    from .simulate import summary_rows

    sim = result.simulation
    rows = summary_rows(sim)
    title = f"Simulated fits ({sim.trials} noisy draws a scenario) beside the bound"
    table = _table(title, pad_edge=False)
    _column(table, "scen.", number=True)
    _column(table, "quantity", max_width=24)
    for header in ("achieved", "bound", "ratio", "fits"):
        _column(table, header, number=True)
    for row in rows:
        unit = {"fraction": "%", "": "1"}.get(row["unit"], row["unit"])
        ratio = row["ratio"]
        shown = f"{ratio:.2f}" if math.isfinite(ratio) else "n/a"
        failed = row["converged"] < row["trials"]
        _row(
            table,
            str(row["scenario"]),
            row["quantity"],
            format_quantity(row["achieved"], unit) if math.isfinite(row["achieved"]) else "no fit",
            format_quantity(row["bound"], unit),
            Text(f"{shown} !", style="bold") if findings.ratio_flag(ratio) else shown,
            Text(f"{row['converged']}/{row['trials']}", style="bold" if failed else ""),
        )
    notes = Text(
        "  achieved: RMS error of the converged fits; bound: 1-sigma Cramér–Rao bound; fits: "
        "converged of tried. A ratio near 1 means the layout delivers its bound; the RMS of n "
        "fits is itself uncertain by about 1/sqrt(2n)."
    )
    flags = _findings_text("Check: ", findings.simulation_findings(sim, rows), "bold yellow")
    return [table, notes] + ([Text(""), flags] if flags is not None else [])


# --------------------------------------------------------------------------------------------
# Progress, files written, errors
# --------------------------------------------------------------------------------------------


@contextlib.contextmanager
def progress_bar(console: Console | None = None) -> Iterator[Callable[[str, int, int], None]]:
    """A progress callback for the search, drawn as a rich progress bar: one line a stage
    (its name, a bar, done of total, the time spent and an estimate of the time left).

    Parameters
    ----------
    console : rich Console or None
        Default: standard error. When it is not a terminal nothing is drawn.

    Yields
    ------
    progress(stage: str, done: int, total: int) -> None
    """
    con = _console(console, stderr=True)
    if not con.is_terminal:
        yield lambda stage, done, total: None
        return
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )

    columns = (
        TextColumn("{task.description:<14}"),
        BarColumn(bar_width=30),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        TextColumn("left"),
        TimeRemainingColumn(),
    )
    with Progress(*columns, console=con, transient=True) as bar:
        tasks: dict[str, int] = {}

        def progress(stage: str, done: int, total: int) -> None:
            total = total if total and total > 0 else None
            if stage not in tasks:
                tasks[stage] = bar.add_task(stage, total=total)
            bar.update(tasks[stage], completed=done, total=total)

        yield progress


def print_written(
    path, complete: bool = True, console: Console | None = None, command: str = "plan"
) -> None:
    """One line naming the result file written (and how to continue an interrupted run)."""
    con = _console(console)
    line = _user(f"Result written to {os.fspath(path)}")
    if not complete:
        line.append_text(
            _user(f" (interrupted; continue with `probeplan {command} --resume {os.fspath(path)}`)")
        )
    con.print(line, soft_wrap=True)


def print_layout_written(path, console: Console | None = None) -> None:
    """One line naming the layout CSV written by ``show --layout-csv``."""
    _console(console).print(_user(f"Layout written to {os.fspath(path)}"), soft_wrap=True)


def print_plots(paths, console: Console | None = None) -> None:
    """List the image files a ``plot`` command wrote, and each plot not drawn with why
    (``paths.skipped``: ``(file name, reason)`` pairs, see :func:`probeplan.plots.plot_all`)."""
    con = _console(console)
    for path in paths:
        con.print(_user(f"Plot written to {os.fspath(path)}"), soft_wrap=True)
    for name, why in getattr(paths, "skipped", ()):
        line = Text("Not drawn: ", style="bold yellow")
        line.append_text(_user(f"{name}: {why}"))
        con.print(Prose(line))


def print_warnings(result: Result, console: Console | None = None) -> bool:
    """The summary's warnings alone, on standard error (for ``--quiet``, which prints no
    summary: a units slip must still be seen). Returns whether there was any."""
    text = _findings_text("WARNING: ", findings.units_slip(result), "bold red")
    if text is not None:
        _console(console, stderr=True).print(Prose(text))
    return text is not None


def print_error(message: str, console: Console | None = None) -> None:
    """One line on standard error: ``probeplan: error: <message>``."""
    _line(f"probeplan: error: {message}", console)


def print_interrupted(
    console: Console | None = None, *, when: str = "", written: Sequence = ()
) -> None:
    """One line on standard error after an interrupt: the files written whole before it
    (``written``), or that no result file was written (``when``, e.g. "before the search had
    a layout", says why)."""
    if written:
        names = ", ".join(os.fspath(p) for p in written)
        _line(f"probeplan: interrupted after writing {names} (written whole).", console)
        return
    why = f" {when}" if when else ""
    _line(f"probeplan: interrupted{why}; no result file was written.", console)


def print_internal_error(
    exc: BaseException,
    debug: bool,
    console: Console | None = None,
    *,
    command: str | None = None,
    variable: str = "PROBEPLAN_DEBUG",
) -> None:
    """Report a bug: one line naming the command and how to see the traceback; the traceback
    itself only when debugging (``variable`` set to 1)."""
    who = f"probeplan {command}" if command else "probeplan"
    _line(
        f"{who}: internal error: {type(exc).__name__}: {' '.join(str(exc).split())} (a bug in "
        f"probeplan; please report it with the command and the config; set {variable}=1 to "
        "see the traceback)",
        console,
    )
    if debug:
        tb = "".join(traceback.format_exception(exc))
        _console(console, stderr=True).out(tb, highlight=False, end="")


def _line(text: str, console: Console | None) -> None:
    text = safe_text(text)  # a message may quote a file's contents
    if console is None:
        # Plain write: an error line must survive any terminal and never be re-wrapped.
        print(text, file=sys.stderr)
        return
    console.print(Text(text), soft_wrap=True)
