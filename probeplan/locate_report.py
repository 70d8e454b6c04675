"""The summary of ``probeplan locate``, as rich renderables (printed by :mod:`probeplan.report`).

Numbers are rounded for people and keep their units; meters and parameters are named; every
table fits 80 columns. The summary ends with the caution that the estimate is not a warning
system.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
from rich import box
from rich.table import Table
from rich.text import Text

from .resulttypes import param_unit

#: The caution every summary of recorded readings carries.
LOCATE_CAUTION = (
    "The estimate is not a warning system and does not decide when to stop work outdoors."
)


def locate_parts(loc, format_quantity) -> list:
    """The renderables of the ``locate`` summary: estimates, fit quality, meter health,
    delivery, the caution.

    Parameters
    ----------
    loc : probeplan.locate.Location
    format_quantity : callable(value, unit) -> str
        How the report writes a quantity with its unit (:func:`probeplan.report.format_quantity`).
    """
    parts = [_estimates(loc, format_quantity), _quality(loc), Text("")]
    parts += [_health(loc), Text("")]
    if loc.delivery is not None:
        parts += [_delivery(loc.delivery, format_quantity), Text("")]
    parts.append(Text(LOCATE_CAUTION, style="bold"))
    return parts


def _table(title: str, first: tuple[str, int], *numbers: str, last: str | None = None) -> Table:
    """A summary table: a folding name column (header, width), right-aligned number columns
    and an optional left-aligned last column."""
    table = Table(title=title, title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False)
    table.add_column(first[0], overflow="fold", max_width=first[1])
    for header in numbers:
        table.add_column(header, justify="right")
    if last is not None:
        table.add_column(last)
    return table


def _time_text(loc, k: int) -> str:
    if loc.time_is_utc:
        return dt.datetime.fromtimestamp(loc.time_s[k], dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    return f"{loc.time_s[k]:g} s"


def _estimates(loc, format_quantity) -> Table:
    n_ok = int(loc.converged.sum())
    span = f"{_time_text(loc, 0)} to {_time_text(loc, -1)}"
    table = _table(
        f"Recorded readings: {loc.n_times:,} steps, {span}; {n_ok:,} fitted",
        ("parameter", 22),
        *("first", "last", "lowest", "highest", "median 1σ"),
    )
    ok = loc.converged
    for k, name in enumerate(loc.names):
        unit = param_unit(name)
        est = loc.estimate[ok, k]
        if est.size == 0:
            table.add_row(name, "no fit", "", "", "", "")
            continue
        sd = loc.std[ok, k]
        table.add_row(
            name,
            format_quantity(float(est[0]), unit),
            format_quantity(float(est[-1]), unit),
            format_quantity(float(est.min()), unit),
            format_quantity(float(est.max()), unit),
            format_quantity(float(np.median(sd)), unit),
        )
    return table


def _quality(loc) -> Text:
    ok = loc.converged
    text = Text()
    failed = loc.n_times - int(ok.sum())
    if ok.any():
        dof = loc.dof[ok]
        ratio = loc.chi2[ok].sum() / max(int(dof.sum()), 1)
        text.append(
            f"  Fit quality: χ²/dof = {ratio:.2f} over the fitted steps\n"
            "  (about 1 when the meters' noise is as stored)"
        )
    if failed:
        text.append(
            f"\n  {failed:,} step(s) not fitted (fewer usable readings than unknowns, or no\n"
            "  fit converged); their estimates are left out of the table."
        )
    n_sat = int(loc.saturated.any(axis=1).sum())
    if n_sat:
        text.append(f"\n  {n_sat:,} step(s) had a reading at the end of its range (left out).")
    return text


def _health(loc) -> Table | Text:
    flagged = np.flatnonzero(loc.flag_counts > 0)
    if flagged.size == 0:
        return Text(
            f"  Meter health: no reading beyond {loc.threshold:g} sigma in any step; no meter "
            "suspect."
        )
    table = _table(
        f"Meter health: readings beyond {loc.threshold:g} sigma (left out of the fit)",
        ("meter", 24),
        *("flagged", "of steps", "share"),
        last="verdict",
    )
    order = flagged[np.argsort(-loc.flag_counts[flagged], kind="stable")]
    reported = loc.reported.sum(axis=0)
    for i in order:
        share = loc.flag_counts[i] / max(int(reported[i]), 1)
        table.add_row(
            Text(loc.meter_names[i]),
            f"{int(loc.flag_counts[i]):,}",
            f"{int(reported[i]):,}",
            f"{100 * share:.0f} %",
            Text("SUSPECT: stuck, drifting or miscalibrated?", style="bold red")
            if loc.suspect[i]
            else Text("occasional"),
        )
    return table


def _delivery(d, format_quantity) -> Table:
    verdict = "delivers its plan" if d.all_deliver else "does NOT deliver its plan"
    table = _table(
        f"Delivery check against the truth: the network {verdict}",
        ("parameter", 18),
        *("steps", "RMS error", "plan's 1σ", "ratio", "at most"),
        last="",
    )
    for k, name in enumerate(d.names):
        unit = param_unit(name)
        table.add_row(
            name,
            f"{int(d.steps[k]):,}",
            format_quantity(float(d.rms_error[k]), unit),
            format_quantity(float(d.bound_rms[k]), unit),
            f"{d.ratio[k]:.2f}",
            f"{d.ratio_high[k]:.2f}",
            "ok" if d.delivers[k] else Text("worse", style="bold red"),
        )
    return table
