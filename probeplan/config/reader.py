"""The typed-table reader: checks of raw TOML values, and the wording of every failure.

Internal to :mod:`probeplan.config`. A :class:`Table` is one TOML table with its dotted path
(``source[2]``); its methods read one key each (a number with bounds, a whole number, a
string, a choice, a vector, ranges, points …) and fail with one :class:`InputError` whose
message names the file, the key (dotted path, arrays indexed from 0: ``source[2].center_m``),
what was found and what is allowed. :func:`show` and :func:`found` write values the way TOML
would, so the user recognises what they typed.
"""

from __future__ import annotations

import difflib
import json
import math
import re
import tomllib
from typing import Any, NoReturn

import numpy as np

from ..errors import InputError
from .vocab import COMPONENTS

#: What a position is, in messages.
XYZ = "3 numbers (x, y, z) in metres"

REQUIRED: Any = object()


#: The largest length (m) a config may give: 100,000 km, far beyond any site or storm, and
#: small enough that areas and squared distances of such lengths stay finite floats.
LENGTH_LIMIT_M = 1e8


def _is_length(key: str) -> bool:
    """A key in metres: its name (indices dropped) ends in ``_m`` but not ``_per_m``."""
    name = re.sub(r"\[\d+\]", "", key).rsplit(".", 1)[-1]
    return name.endswith("_m") and not name.endswith("_per_m")


class Checker:
    """Checks of raw TOML values; every failure names the file."""

    def __init__(self, path: str) -> None:
        self.path = path

    def fail(self, message: str) -> NoReturn:
        raise InputError(f"{self.path}: {message}")

    def number(
        self,
        key: str,
        value: Any,
        *,
        gt: float | None = None,
        ge: float | None = None,
        allow_inf: bool = False,
    ) -> float:
        rule = "a number" + (
            f" > {gt:g}" if gt is not None else f" >= {ge:g}" if ge is not None else ""
        )
        if isinstance(value, bool) or not isinstance(value, int | float):
            self.fail(f"`{key}` must be {rule}; got {found(value)}{_quote_hint(value)}.")
        try:
            x = float(value)
        except OverflowError:
            x = math.inf
        if math.isnan(x) or (math.isinf(x) and not (allow_inf and x > 0)):
            extra = " (inf means no limit)" if allow_inf else ""
            self.fail(f"`{key}` must be a finite number{extra}; got {show(value)}.")
        if abs(x) > LENGTH_LIMIT_M and _is_length(key) and not math.isinf(x):
            self.fail(
                f"`{key}` = {x:g} m is beyond the {LENGTH_LIMIT_M:g} m any length may have "
                "(lengths that far apart overflow areas and squared distances); check the units."
            )
        if gt is not None and not x > gt:
            self.fail(f"`{key}` must be > {gt:g}; got {x!r}.")
        if ge is not None and not x >= ge:
            self.fail(f"`{key}` must be >= {ge:g}; got {x!r}.")
        return x

    def integer(
        self, key: str, value: Any, *, ge: int | None = None, choices: tuple[int, ...] = ()
    ) -> int:
        rule = (
            f"one of {', '.join(map(str, choices))}"
            if choices
            else "a whole number" + (f" >= {ge}" if ge is not None else "")
        )
        if isinstance(value, bool) or not isinstance(value, int):
            self.fail(f"`{key}` must be {rule}; got {found(value)}{_quote_hint(value)}.")
        if (choices and value not in choices) or (ge is not None and value < ge):
            self.fail(f"`{key}` must be {rule}; got {value}.")
        return int(value)

    def vector(self, key: str, value: Any, n: int, what: str, **rule) -> tuple[float, ...]:
        if not isinstance(value, list):
            self.fail(f"`{key}` must be {what}; got {found(value)}.")
        if len(value) != n:
            self.fail(f"`{key}` must be {what}; got {len(value)}: {show(value)}.")
        return tuple(self.number(f"{key}[{j}]", v, **rule) for j, v in enumerate(value))

    def pair(self, key: str, value: Any, *, unit: str = "", **rule) -> tuple[float, float]:
        lo, hi = self.vector(key, value, 2, f"a range [lo, hi]{unit and ' in ' + unit}", **rule)
        if lo > hi:
            self.fail(
                f"`{key}` must be [lo, hi] with lo <= hi; got {show(value)}. Bounds are never "
                "swapped: write the lower one first."
            )
        return lo, hi


class Table:
    """One TOML table with its dotted path (``source[1]``) and a label for messages."""

    def __init__(self, ck: Checker, data: dict, prefix: str, label: str) -> None:
        self.ck = ck
        self.data = data
        self.prefix = prefix
        self.label = label

    @property
    def _where(self) -> str:
        return f"in {self.label}" if self.prefix else f"at {self.label}"

    def key(self, name: str) -> str:
        return f"{self.prefix}.{name}" if self.prefix else name

    def check_keys(
        self, allowed: tuple[str, ...], *, elsewhere: tuple[str, ...] = (), owner: str = ""
    ) -> None:
        """Reject keys not in ``allowed``; ``elsewhere`` are keys of other kinds of ``owner``."""
        for name, value in self.data.items():
            if name in allowed:
                continue
            what = "table" if _is_table(value) else "key"
            listing = ", ".join(allowed)
            if name in elsewhere:
                self.ck.fail(
                    f"{what} `{name}` does not apply to {owner} ({self.label}); allowed: {listing}."
                )
            close = difflib.get_close_matches(name, allowed, n=1)
            if close:
                self.ck.fail(f"unknown {what} `{name}` {self._where}; did you mean `{close[0]}`?")
            self.ck.fail(f"unknown {what} `{name}` {self._where}; allowed: {listing}.")

    def get(self, name: str, default: Any = REQUIRED, what: str = "") -> Any:
        if name in self.data:
            return self.data[name]
        if default is REQUIRED:
            self.ck.fail(f"`{self.key(name)}` is missing; give {what or 'it'}.")
        return default

    def number(self, name, default=REQUIRED, *, what="", gt=None, ge=None, allow_inf=False):
        rule = "a number" + (
            f" > {gt:g}" if gt is not None else f" >= {ge:g}" if ge is not None else ""
        )
        value = self.get(name, default, what=f"{what} ({rule})" if what else rule)
        if name not in self.data:
            return value
        return self.ck.number(self.key(name), value, gt=gt, ge=ge, allow_inf=allow_inf)

    def integer(self, name, default=REQUIRED, *, ge=None, choices=()):
        value = self.get(
            name, default, what="a whole number" + (f" >= {ge}" if ge is not None else "")
        )
        if name not in self.data:
            return value
        return self.ck.integer(self.key(name), value, ge=ge, choices=choices)

    def string(self, name, default=REQUIRED, *, nonempty=False, what="a string"):
        value = self.get(name, default, what=what)
        if name not in self.data:
            return value
        if not isinstance(value, str):
            self.ck.fail(f"`{self.key(name)}` must be {what}; got {found(value)}.")
        if nonempty and not value.strip():
            self.ck.fail(f"`{self.key(name)}` must not be empty; give {what}.")
        return value

    def boolean(self, name, default=REQUIRED) -> bool:
        value = self.get(name, default, what="true or false")
        if name in self.data and not isinstance(value, bool):
            self.ck.fail(f"`{self.key(name)}` must be true or false; got {found(value)}.")
        return value

    def choice(self, name, choices: tuple[str, ...], default=REQUIRED) -> str:
        listing = ", ".join(show(c) for c in choices)
        value = self.get(name, default, what=f"one of {listing}")
        if isinstance(value, str) and value in choices:
            return value
        hint = did_you_mean(value, choices) if isinstance(value, str) else ""
        self.ck.fail(
            f"`{self.key(name)}` must be one of {listing}; got {found(value)}{hint or '.'}"
        )

    def vector(self, name, n, *, what, default=REQUIRED, **rule):
        value = self.get(name, default, what=what)
        if name not in self.data:
            return value
        return self.ck.vector(self.key(name), value, n, what, **rule)

    def pair(self, name, **rule) -> tuple[float, float]:
        return self.ck.pair(self.key(name), self.get(name), **rule)

    def pairs(self, name, n, unit="m") -> tuple[tuple[float, float], ...]:
        key = self.key(name)
        value = self.get(name)
        what = f"{n} ranges [[x_lo, x_hi], [y_lo, y_hi], [z_lo, z_hi]] in {unit}"
        if not isinstance(value, list) or len(value) != n:
            got = f"{len(value)}: {show(value)}" if isinstance(value, list) else found(value)
            self.ck.fail(f"`{key}` must be {what}; got {got}.")
        return tuple(self.ck.pair(f"{key}[{j}]", v, unit=unit) for j, v in enumerate(value))

    def points(self, name, *, dims: tuple[int, ...], at_least: int):
        """An array of points, each with one of ``dims`` coordinates, all the same length."""
        key = self.key(name)
        shape = " or ".join(f"[{', '.join('xyz'[:d])}]" for d in dims)
        what = f"an array of at least {at_least} points {shape} in metres"
        value = self.get(name, what=what)
        if not isinstance(value, list) or len(value) < at_least:
            got = f"{len(value)} points" if isinstance(value, list) else found(value)
            self.ck.fail(f"`{key}` must be {what}; got {got}.")
        d0 = len(value[0]) if isinstance(value[0], list) and len(value[0]) in dims else dims[0]
        return tuple(
            self.ck.vector(
                f"{key}[{j}]",
                v,
                d0,
                f"{d0} numbers {shape[:0]}in metres"
                + ("" if len(dims) == 1 else ", like the first point"),
            )
            for j, v in enumerate(value)
        )

    def spacing(self, name) -> tuple[float, float, float]:
        value = self.get(name, what="a number > 0 or 3 numbers > 0 (dx, dy, dz) in metres")
        if isinstance(value, list):
            return self.ck.vector(
                self.key(name), value, 3, "3 numbers > 0 (dx, dy, dz) in metres", gt=0.0
            )
        x = self.ck.number(self.key(name), value, gt=0.0)
        return (x, x, x)

    def component(self, name, default=REQUIRED):
        value = self.get(name, default)
        if name not in self.data:
            return value
        return read_component(self.ck, self.key(name), value)

    def table(self, name, *, required=False, hint=""):
        value = self.get(name, None)
        if value is None:
            if required:
                self.ck.fail(f"the [{name}] table is missing; {hint}.")
            return None
        if not isinstance(value, dict):
            self.ck.fail(
                f"`{self.key(name)}` must be a table [{self.key(name)}]; got {found(value)}."
            )
        return Table(self.ck, value, self.key(name), f"[{self.key(name)}]")

    def array_of_tables(self, name, *, required=False, hint="") -> list[Table]:
        full = self.key(name)
        value = self.get(name, None)
        if value is None:
            if required:
                self.ck.fail(f"no [[{full}]] table is given; at least one is needed: {hint}.")
            return []
        if isinstance(value, dict):
            self.ck.fail(
                f"`{full}` must be an array of tables, each headed [[{full}]]; got a single "
                f"table [{full}]: write [[{full}]] (two brackets)."
            )
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            self.ck.fail(
                f"`{full}` must be an array of tables, each headed [[{full}]]; got {found(value)}."
            )
        if required and not value:
            self.ck.fail(f"no [[{full}]] table is given; at least one is needed: {hint}.")
        return [Table(self.ck, v, f"{full}[{i}]", f"{full}[{i}]") for i, v in enumerate(value)]


def read_component(ck: Checker, key: str, value: Any) -> str | tuple[float, float, float]:
    allowed = f"one of {', '.join(show(c) for c in COMPONENTS)} or a unit vector [ax, ay, az]"
    if isinstance(value, str):
        if value in COMPONENTS:
            return value
        hint = did_you_mean(value, COMPONENTS) or "."
        ck.fail(f"`{key}` must be {allowed}; got {show(value)}{hint}")
    if not isinstance(value, list):
        ck.fail(f"`{key}` must be {allowed}; got {found(value)}.")
    v = np.array(ck.vector(key, value, 3, f"{allowed} (3 numbers)"))
    norm = float(np.linalg.norm(v))
    if norm == 0.0:
        ck.fail(
            f"`{key}` must be {allowed}; got the zero vector {show(value)}, which has no direction."
        )
    u = v / norm
    return (float(u[0]), float(u[1]), float(u[2]))


def all_keys(per_kind: dict[str, tuple[str, ...]]) -> tuple[str, ...]:
    return tuple(dict.fromkeys(k for keys in per_kind.values() for k in keys))


def _is_table(value: Any) -> bool:
    return isinstance(value, dict) or (
        isinstance(value, list) and bool(value) and all(isinstance(v, dict) for v in value)
    )


def show(value: Any, limit: int = 60) -> str:
    """A value as it would be written in TOML, shortened."""
    if isinstance(value, bool):
        text = "true" if value else "false"
    elif isinstance(value, str):
        text = json.dumps(value, ensure_ascii=False)
    elif isinstance(value, float):
        text = repr(value)
    elif isinstance(value, dict):
        text = "{" + ", ".join(f"{k} = {show(v)}" for k, v in value.items()) + "}"
    elif isinstance(value, list):
        text = "[" + ", ".join(show(v) for v in value) + "]"
    else:
        text = str(value)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _type_name(value: Any) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a number"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "an array"
    return "a date/time"


def found(value: Any) -> str:
    return f"{show(value)} ({_type_name(value)})"


def _quote_hint(value: Any) -> str:
    if isinstance(value, str):
        try:
            float(value)
        except ValueError:
            return ""
        return "; write numbers without quotes"
    return ""


def did_you_mean(word: str, options) -> str:
    close = difflib.get_close_matches(word, list(options), n=1)
    return f"; did you mean {show(close[0])}?" if close else ""


_TOML_WHERE = re.compile(r"\s*\(at line (\d+), column (\d+)\)\s*$")
_TOML_END = re.compile(r"\s*\(at end of document\)\s*$")


def syntax_message(path: str, text: str, exc: tomllib.TOMLDecodeError) -> str:
    """``file: line N: TOML syntax error: …`` from tomllib's message (3.11 has no lineno attr)."""
    msg = str(exc.args[0]) if exc.args else str(exc)
    line = getattr(exc, "lineno", None)
    col = getattr(exc, "colno", None)
    m = _TOML_WHERE.search(msg)
    if m:
        line, col = int(m.group(1)), int(m.group(2))
        msg = msg[: m.start()]
    elif _TOML_END.search(msg):
        msg = msg[: _TOML_END.search(msg).start()]
        line = max(1, len(text.splitlines()))
        return f"{path}: line {line} (end of file): TOML syntax error: {msg}."
    where = f"line {line}" if line is not None else "?"
    column = f" (column {col})" if col is not None else ""
    return f"{path}: {where}: TOML syntax error: {msg}{column}."
