"""Layout CSV files: a layout of new probes, one probe a row (what ``score --layout`` reads and
``show --layout-csv`` writes)."""

from __future__ import annotations

import csv
import difflib
import itertools
import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..geo import rounding_for, site_extent_m
from ..probes import COMPONENTS
from ..readings import csv_errors
from ..result import Result
from ..resulttypes import probe_names
from .files import check_writable, write_atomically

#: Columns a layout CSV may hold; the first three are required. ``lon_deg`` and ``lat_deg``
#: (written when the result has a frame) are for people and are not read back: x, y, z are.
LAYOUT_COLUMNS: tuple[str, ...] = (
    "x_m",
    "y_m",
    "z_m",
    "name",
    "component",
    "grade",
    "gain",
    "lon_deg",
    "lat_deg",
)
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


#: Lines a layout CSV may hold (header and comments included): checked while reading, so a
#: file of a million rows is refused at once rather than read whole.
MAX_LINES = 10_000


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
    with csv_errors(name, "layout"), open(name, encoding="utf-8-sig", newline="") as fh:
        reader = csv.reader(fh)
        # line_num after a read is the file line the row ended on: what a user sees.
        rows = [(reader.line_num, row) for row in itertools.islice(reader, MAX_LINES + 1)]
    if len(rows) > MAX_LINES:
        raise InputError(
            f"{name}: more than {MAX_LINES:,} lines; a layout may list at most that many "
            "(each probe's Jacobian needs about 100 kB per 1,000 scenarios, so more could "
            "not be scored within the memory a run may use)."
        )
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


def write_layout_csv(result: Result, path: str | os.PathLike, *, force: bool = False) -> Path:
    """Write the new probes of a result as a layout CSV, atomically: the file ``score --layout``
    reads (one probe a row: name, x_m, y_m, z_m, component, grade, gain, and lon_deg, lat_deg
    when the result has a frame), to hand to the installers or to rescore later. Installed
    probes are left out: they come from the config.

    Positions are rounded for people (:func:`probeplan.geo.rounding_for`): to the centimetre,
    or the millimetre when all meters lie within 100 m; longitude and latitude to a matching
    7 or 8 decimals. Scoring the file therefore moves each meter by at most half that unit;
    ``score --from FILE.h5`` rescores the stored layout exactly. Gains keep every digit. A
    first comment line says where the layout came from.

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
    target = check_writable(path, force=force, option="--layout-csv", suffix=".csv")
    s = result.score
    new = ~np.asarray(s.installed, dtype=bool)
    names = probe_names(result)
    rounding = rounding_for(site_extent_m(s.positions_m))
    xyz = rounding.metres(s.positions_m)
    lonlat = None
    if result.frame is not None:
        lon, lat, _ = result.frame.to_lonlat(s.positions_m)
        lonlat = rounding.degrees(np.column_stack([lon, lat]))
    rows = []
    for k in np.flatnonzero(new):
        comp = component_text(s, k)
        grade = "" if s.grade is None else s.grade[k]
        x, y, z = (repr(float(v)) for v in xyz[k])
        row = [names[k], x, y, z, comp, grade, repr(float(s.gain[k]))]
        rows.append(row if lonlat is None else row + [repr(float(v)) for v in lonlat[k]])
    header = ["name", "x_m", "y_m", "z_m", "component", "grade", "gain"]
    header += [] if lonlat is None else ["lon_deg", "lat_deg"]
    title = " ".join(result.title.split()) or "untitled"

    def write(tmp: Path) -> None:
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            fh.write(
                f"# new probes of {result.command} '{title}' ({result.config_path}), written "
                f"by probeplan {result.version}; installed probes come from the config\n"
            )
            writer = csv.writer(fh, lineterminator="\n")
            writer.writerow(header)
            writer.writerows(rows)

    return write_atomically(target, write, "the layout file", force=force, option="--layout-csv")


def component_text(score, k: int) -> str:
    """What meter ``k`` of a score reads, as a layout cell: "z", "vector", or "ax ay az"."""
    from ..probes import component_of

    comp = "" if score.axes is None else component_of(score.axes[k])
    return " ".join(repr(a) for a in comp) if isinstance(comp, tuple) else comp
