"""Recorded readings (READINGS.csv) and known truths (TRUTH.csv): checked once, at the boundary.

A readings file is a CSV table with a header row:

* one time column: ``time_s`` (seconds, any origin) or ``time`` (ISO 8601, UTC; a time with an
  offset is converted to UTC, one without is taken as UTC), kept as seconds since
  1970-01-01T00:00:00Z;
* one column per meter reading, named as the meters of the result are: ``name`` for a meter
  that reads one axis, ``name.x``, ``name.y``, ``name.z`` for a 3-axis meter, in V/m. An empty
  cell is a missing reading; a meter without a column is missing throughout.

A truth file has the same time column and one column per estimated parameter, named as the
result names them (``s0.charge_c``, ``s0.x_m``, …), in SI units; an empty cell is unknown.

Times increase strictly down the file. Blank lines and lines whose first cell starts with ``#``
are skipped; a UTF-8 byte-order mark is accepted. Everything else that is wrong raises
:class:`~probeplan.errors.InputError` naming the file, the line and the column: unknown names
(with the closest known one), repeated columns, cells that are not finite numbers, times out of
order or repeated, no rows, and files beyond :data:`MAX_ROWS` rows or :data:`MAX_BYTES` bytes
(refused before they are read, rather than filling the memory).
"""

from __future__ import annotations

import csv
import datetime as _dt
import difflib
import math
import os
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass

import numpy as np

from .errors import InputError

#: Most data rows a readings or truth file may hold (about 12 days of 1-s readings; each row
#: costs one least-squares fit, a few milliseconds).
MAX_ROWS = 1_000_000

#: Largest readings or truth file read, bytes.
MAX_BYTES = 512 * 1024**2

#: The time columns, and what each holds.
TIME_COLUMNS = {"time_s": "seconds", "time": "ISO 8601 UTC"}

_AXIS_NAMES = "xyz"


@dataclass(frozen=True, eq=False)
class Readings:
    """Recorded meter readings, one row per time step.

    Attributes
    ----------
    path : str
        The file they came from.
    time_s : (n_times,) float
        Time of each step, s, strictly increasing (seconds since 1970-01-01T00:00:00Z when
        ``time_is_utc``).
    time_is_utc : bool
        The file gave ISO 8601 times (``time``) rather than seconds (``time_s``).
    values_v_per_m : (n_times, n_probes, n_axes) float
        Each reading, V/m, 0 where missing.
    present : (n_times, n_probes, n_axes) bool
        Which readings the file gives.
    meter_names : tuple of n_probes str
    columns : tuple of str
        The reading columns as the file names them, in file order.
    """

    path: str
    time_s: np.ndarray
    time_is_utc: bool
    values_v_per_m: np.ndarray
    present: np.ndarray
    meter_names: tuple[str, ...]
    columns: tuple[str, ...]

    @property
    def n_times(self) -> int:
        return self.time_s.shape[0]


@dataclass(frozen=True, eq=False)
class Truth:
    """Known parameters at some time steps (a calibration or a simulation).

    Attributes
    ----------
    path : str
    time_s : (n_rows,) float
        As in :class:`Readings`.
    time_is_utc : bool
    names : tuple of n_params str
        The estimated parameters, in the result's order.
    values : (n_rows, n_params) float
        SI units; 0 where unknown.
    present : (n_rows, n_params) bool
        Which values the file gives.
    """

    path: str
    time_s: np.ndarray
    time_is_utc: bool
    names: tuple[str, ...]
    values: np.ndarray
    present: np.ndarray


def reading_columns(meter_names, axes: np.ndarray) -> dict[str, tuple[int, int]]:
    """The column name of every reading of a set of meters.

    Parameters
    ----------
    meter_names : sequence of n_probes str
    axes : (n_probes, n_axes, 3) float
        Each meter's axes (zero rows unused); a meter with three axes is a 3-axis meter whose
        axes are x, y and z.

    Returns
    -------
    dict
        Column name → (meter index, axis index): ``name`` for a one-axis meter, ``name.x`` …
        for a 3-axis one.
    """
    used = np.linalg.norm(axes, axis=-1) > 0.0
    out: dict[str, tuple[int, int]] = {}
    for i, name in enumerate(meter_names):  # once per file, to name the columns
        rows = np.flatnonzero(used[i])
        if rows.size == 1:
            out[str(name)] = (i, int(rows[0]))
        else:
            for a in rows:
                out[f"{name}.{_AXIS_NAMES[int(np.argmax(np.abs(axes[i, a])))]}"] = (i, int(a))
    return out


def read_readings(
    path: str | os.PathLike,
    meter_names,
    axes: np.ndarray,
    *,
    max_rows: int = MAX_ROWS,
    max_bytes: int = MAX_BYTES,
) -> Readings:
    """Read and check a readings CSV (see the module docstring for the format).

    Parameters
    ----------
    path : str or path-like
    meter_names : sequence of n_probes str
        The result's meter names, installed first.
    axes : (n_probes, n_axes, 3) float
        What each meter reads (see :func:`reading_columns`).
    max_rows, max_bytes : int
        Larger files are refused with a clear message.

    Returns
    -------
    Readings

    Raises
    ------
    InputError
        Naming the file, line and column of the first problem found.
    """
    names = tuple(str(n) for n in meter_names)
    columns = reading_columns(names, axes)

    def unknown(col: str) -> str:
        return _unknown_reading(col, names, columns, axes)

    table = _read_table(os.fspath(path), "readings", columns, unknown, max_rows, max_bytes)
    n_t = table.time_s.shape[0]
    values = np.zeros((n_t, *axes.shape[:2]))
    present = np.zeros((n_t, *axes.shape[:2]), dtype=bool)
    meter = np.array([columns[c][0] for c in table.columns], dtype=int)
    axis = np.array([columns[c][1] for c in table.columns], dtype=int)
    values[:, meter, axis] = table.values
    present[:, meter, axis] = table.present
    return Readings(
        path=table.path,
        time_s=table.time_s,
        time_is_utc=table.time_is_utc,
        values_v_per_m=values,
        present=present,
        meter_names=names,
        columns=table.columns,
    )


def read_truth(
    path: str | os.PathLike,
    names,
    *,
    max_rows: int = MAX_ROWS,
    max_bytes: int = MAX_BYTES,
) -> Truth:
    """Read and check a truth CSV: the time column and one column per known parameter.

    Parameters
    ----------
    path : str or path-like
    names : sequence of n_params str
        The estimated parameter names of the result.
    max_rows, max_bytes : int
        Larger files are refused.

    Returns
    -------
    Truth
    """
    names = tuple(names)
    index = {n: (k, 0) for k, n in enumerate(names)}

    def unknown(col: str) -> str:
        close = difflib.get_close_matches(col, names, n=1)
        hint = f"; did you mean `{close[0]}`?" if close else "."
        return (
            f"`{col}` is not an estimated parameter of this result{hint} Parameters: "
            f"{', '.join(names)}."
        )

    table = _read_table(os.fspath(path), "truth", index, unknown, max_rows, max_bytes)
    values = np.zeros((table.time_s.shape[0], len(names)))
    present = np.zeros(values.shape, dtype=bool)
    cols = np.array([index[c][0] for c in table.columns], dtype=int)
    values[:, cols] = table.values
    present[:, cols] = table.present
    return Truth(table.path, table.time_s, table.time_is_utc, names, values, present)


# --------------------------------------------------------------------------------------------
# One table reader for both files
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _Table:
    path: str
    time_s: np.ndarray  # (n_rows,)
    time_is_utc: bool
    columns: tuple[str, ...]  # (n_cols,) data columns in file order
    values: np.ndarray  # (n_rows, n_cols), 0 where empty
    present: np.ndarray  # (n_rows, n_cols) bool


def _read_table(
    path: str,
    what: str,
    allowed: dict,
    unknown: Callable[[str], str],
    max_rows: int,
    max_bytes: int,
) -> _Table:
    """Read a CSV of a time column and data columns named in ``allowed``, row by row."""
    with csv_errors(path, what):
        size = os.path.getsize(path)
        if size > max_bytes:
            raise InputError(
                f"{path}: the {what} file has {size:,} bytes, more than the {max_bytes:,} this "
                "command reads at once; split it into shorter periods."
            )
        with open(path, encoding="utf-8-sig", newline="") as fh:
            parser = _Parser(path, what, allowed, unknown, max_rows)
            for row in (reader := csv.reader(fh)):
                parser.add(reader.line_num, row)
            return parser.table()


@contextmanager
def csv_errors(path: str, what: str) -> Iterator[None]:
    """Turn what opening and reading a CSV file can raise into one :class:`InputError` that
    names the file (``what``: "layout", "readings", … as the message calls the file)."""
    try:
        yield
    except FileNotFoundError:
        raise InputError(f"{path}: no such {what} file.") from None
    except IsADirectoryError:
        raise InputError(f"{path}: is a folder, not a {what} CSV file.") from None
    except UnicodeDecodeError as exc:
        raise InputError(f"{path}: not UTF-8 text (byte {exc.start}).") from None
    except csv.Error as exc:
        raise InputError(f"{path}: not a readable CSV file: {exc}.") from None
    except OSError as exc:
        reason = exc.strerror or str(exc) or type(exc).__name__
        raise InputError(f"{path}: cannot read the {what} file: {reason}.") from None


class _Parser:
    """Checks and converts one row at a time, keeping numbers only (8 bytes a cell)."""

    _CHUNK = 4096  # rows converted to one array at a time

    def __init__(self, path: str, what: str, allowed: dict, unknown, max_rows: int) -> None:
        self.path, self.what, self.allowed, self.unknown = path, what, allowed, unknown
        self.max_rows = max_rows
        self.header: list[str] | None = None
        self.rows = 0
        self.chunks: list[np.ndarray] = []
        self.pending: list[list[float]] = []
        self.last = (0, "", -np.inf)  # line, text and seconds of the previous time

    def add(self, line: int, row: list[str]) -> None:
        if not any(c.strip() for c in row) or row[0].lstrip().startswith("#"):
            return
        if self.header is None:
            self.header, self.header_line = [c.strip() for c in row], line
            where = f"{self.path}: line {line}"
            self.time_col, self.data = _check_header(
                where, self.header, self.allowed, self.unknown, self.what
            )
            self.is_utc = self.header[self.time_col] == "time"
            return
        if self.rows >= self.max_rows:
            raise InputError(
                f"{self.path}: line {line}: more than {self.max_rows:,} rows, the most this "
                f"command reads from a {self.what} file; split it into shorter periods."
            )
        if len(row) != len(self.header):
            raise InputError(
                f"{self.path}: line {line}: {len(row)} cells where the header on line "
                f"{self.header_line} has {len(self.header)} columns."
            )
        self.pending.append([self._time(line, row[self.time_col].strip())])
        self.pending[-1].extend(self._number(line, k, row[k].strip()) for k in self.data)
        self.rows += 1
        if len(self.pending) == self._CHUNK:
            self.chunks.append(np.array(self.pending))
            self.pending = []

    def table(self) -> _Table:
        if self.header is None:
            raise InputError(
                f"{self.path}: empty file; expected a header row with `time_s` (or `time`) and "
                f"the {self.what} columns, then one time step a row."
            )
        if not self.rows:
            raise InputError(
                f"{self.path}: no rows: the header is on line {self.header_line} but no row "
                "follows; give one time step a row."
            )
        if self.pending:
            self.chunks.append(np.array(self.pending))
        all_rows = np.concatenate(self.chunks)
        data = all_rows[:, 1:]
        present = ~np.isnan(data)
        return _Table(
            path=self.path,
            time_s=all_rows[:, 0].copy(),
            time_is_utc=self.is_utc,
            columns=tuple(self.header[k] for k in self.data),
            values=np.where(present, data, 0.0),
            present=present,
        )

    def _number(self, line: int, col: int, text: str) -> float:
        """A data cell: NaN (here only) marks an empty one; anything else a finite number."""
        if not text:
            return np.nan
        where = f"{self.path}: line {line}, column {col + 1} (`{self.header[col]}`)"
        try:
            value = float(text)
        except ValueError:
            raise InputError(
                f"{where}: {text!r} is not a number; give a number or leave the cell empty "
                "for a missing value."
            ) from None
        if not math.isfinite(value):
            raise InputError(
                f"{where}: {text!r} is not a finite number; leave the cell empty for a missing "
                "value."
            )
        return value

    def _time(self, line: int, text: str) -> float:
        """A time cell in seconds, checked finite and after the previous row's."""
        col = self.time_col
        where = f"{self.path}: line {line}, column {col + 1} (`{self.header[col]}`)"
        try:
            value = _iso_seconds(text) if self.is_utc else float(text)
        except (ValueError, OverflowError):
            allowed = "an ISO 8601 time such as 2026-07-01T14:05:00Z" if self.is_utc else "seconds"
            shown = repr(text) if text else "an empty cell"
            raise InputError(f"{where}: {shown} is not a time; give {allowed}.") from None
        if not math.isfinite(value):
            raise InputError(f"{where}: {text!r} is not a finite time.")
        prev_line, prev_text, prev = self.last
        if value <= prev:
            how = "repeats" if value == prev else "comes before"
            raise InputError(
                f"{where}: time {text} {how} the time on line {prev_line} ({prev_text}); "
                "times must increase strictly down the file."
            )
        self.last = (line, text, value)
        return value


def _check_header(where: str, header, allowed: dict, unknown, what: str):
    """Index of the time column and of the data columns; every name checked."""
    seen: dict[str, int] = {}
    for k, col in enumerate(header):
        if col in seen:
            raise InputError(
                f"{where}, column {k + 1}: column `{col}` appears twice (also column "
                f"{seen[col] + 1}); give each reading one column."
            )
        seen[col] = k
        if col not in allowed and col not in TIME_COLUMNS:
            raise InputError(
                f"{where}, column {k + 1}: unknown column `{col}`: {unknown(col)}"
                if col
                else f"{where}, column {k + 1}: a column without a name."
            )
    times = [k for k, c in enumerate(header) if c in TIME_COLUMNS]
    if len(times) != 1:
        found = "both `time_s` and `time`" if times else "neither `time_s` nor `time`"
        raise InputError(
            f"{where}: the header has {found}; give exactly one time column: `time_s` "
            "(seconds) or `time` (ISO 8601 UTC, e.g. 2026-07-01T14:05:00Z)."
        )
    data = [k for k, c in enumerate(header) if c in allowed]
    if not data:
        raise InputError(
            f"{where}: no {what} columns; after the time column, name one column per "
            + ("meter reading" if what == "readings" else "known parameter")
            + f" (e.g. {', '.join(list(allowed)[:3])})."
        )
    return times[0], data


def _iso_seconds(text: str) -> float:
    """Seconds since 1970-01-01T00:00:00Z of an ISO 8601 time (no offset: UTC)."""
    t = _dt.datetime.fromisoformat(text)
    if t.tzinfo is None:
        t = t.replace(tzinfo=_dt.UTC)
    return t.timestamp()


def _unknown_reading(col: str, names, columns: dict, axes: np.ndarray) -> str:
    """Why a readings column is not known, with the closest known column."""
    base, _, suffix = col.rpartition(".")
    if col in names:  # a 3-axis meter named without its axis
        return f"meter `{col}` reads three axes; name its columns `{col}.x`, `{col}.y`, `{col}.z`."
    if base in names and suffix in _AXIS_NAMES:
        return f"meter `{base}` reads one axis; name its column `{base}`."
    close = difflib.get_close_matches(col, list(columns), n=1)
    hint = f"did you mean `{close[0]}`? " if close else ""
    shown = list(columns)
    listed = ", ".join(shown[:12]) + (f", … ({len(shown)} in all)" if len(shown) > 12 else "")
    return f"no meter of this result reads it; {hint}Reading columns: {listed}."
