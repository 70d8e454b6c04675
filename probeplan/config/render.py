"""A mapping of TOML values written back as TOML text, for :func:`config_from_mapping`.

A config built from a mapping keeps, as its provenance, a TOML document that
:func:`~probeplan.config.parse_config` reads back to the same mapping, so a result file made
from it can be rerun like any other. Tables come out as ``[table]`` headers, arrays of tables
as ``[[name]]`` headers, everything else inline. Values TOML cannot hold (``None``, arbitrary
objects) are bad input and named by their key.
"""

from __future__ import annotations

import datetime
import json
import math
import numbers
import re
from collections.abc import Mapping
from typing import Any

from ..errors import InputError

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")
_DATES = (datetime.datetime, datetime.date, datetime.time)


def mapping_to_toml(mapping: Mapping, path: str) -> str:
    """TOML text for ``mapping`` (what :func:`tomllib.loads` would return for it).

    Parameters
    ----------
    mapping : Mapping
        Keys are strings; values are strings, numbers, booleans, dates and times, arrays
        (lists or tuples) and tables (mappings).
    path : str
        Named in the message of a value TOML cannot hold.

    Raises
    ------
    InputError
        A key that is not a string, or a value TOML cannot hold, naming its dotted key.
    """
    if not isinstance(mapping, Mapping):
        raise InputError(
            f"{path}: a config mapping must be a dict of keys and tables (what tomllib "
            f"returns); got {type(mapping).__name__}."
        )
    lines: list[str] = []
    _table(mapping, (), "", path, lines)
    return "\n".join(lines).lstrip("\n") + "\n"


def _is_array_of_tables(value: Any) -> bool:
    return (
        isinstance(value, list | tuple)
        and bool(value)
        and all(isinstance(v, Mapping) for v in value)
    )


def _key(name: Any, where: str, path: str) -> str:
    if not isinstance(name, str):
        raise InputError(f"{path}: key {name!r} {where or 'at the top level'} must be a string.")
    return name if _BARE_KEY.fullmatch(name) else _string(name)


def _dotted(where: str, name: str) -> str:
    return f"{where}.{name}" if where else name


def _table(table: Mapping, header: tuple[str, ...], where: str, path: str, lines: list) -> None:
    """Append ``table``'s keys, then its sub-tables and arrays of tables, under ``header``."""
    items = [
        (name, _key(name, f"in {where}" if where else "", path), v) for name, v in table.items()
    ]
    for name, key, value in items:
        if not isinstance(value, Mapping) and not _is_array_of_tables(value):
            lines.append(f"{key} = {_inline(value, _dotted(where, name), path)}")
    for name, key, value in items:
        if isinstance(value, Mapping):
            lines += ["", f"[{'.'.join((*header, key))}]"]
            _table(value, (*header, key), _dotted(where, name), path, lines)
    for name, key, value in items:
        if _is_array_of_tables(value):
            for i, element in enumerate(value):
                lines += ["", f"[[{'.'.join((*header, key))}]]"]
                _table(element, (*header, key), f"{_dotted(where, name)}[{i}]", path, lines)


def _inline(value: Any, key: str, path: str) -> str:
    """One value written inline; ``key`` is its dotted path, for the message."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, numbers.Integral):
        return str(int(value))
    if isinstance(value, numbers.Real):
        x = float(value)
        if math.isnan(x):
            return "nan"
        return ("inf" if x > 0 else "-inf") if math.isinf(x) else repr(x)
    if isinstance(value, str):
        return _string(value)
    if isinstance(value, _DATES):
        return value.isoformat()
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_inline(v, f"{key}[{j}]", path) for j, v in enumerate(value)) + "]"
    if isinstance(value, Mapping):
        parts = [
            f"{_key(k, f'in {key}', path)} = {_inline(v, _dotted(key, k), path)}"
            for k, v in value.items()
        ]
        return "{" + ", ".join(parts) + "}"
    shown = repr(value)
    shown = shown if len(shown) <= 60 else shown[:59] + "…"
    raise InputError(
        f"{path}: `{key}` is {shown} ({type(value).__name__}), which a TOML config cannot hold; "
        "give a string, a number, a boolean, an array or a table (leave a key out to take "
        "its default)."
    )


def _string(text: str) -> str:
    # JSON escapes are TOML basic-string escapes; DEL is the one control character JSON keeps.
    return json.dumps(text, ensure_ascii=False).replace("\x7f", "\\u007f")
