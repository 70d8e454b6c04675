"""Constants and input checks shared by the mounting-geometry modules.

Messages name the field in backticks, say what was found and what is allowed. Units: metres.
"""

from __future__ import annotations

import math

import numpy as np

#: How close a position must be to a region (or to a keep-out's boundary) to count as on it, m.
TOLERANCE_M: float = 1e-6
#: Two probes closer than this share one mounting position, which is never allowed, m.
COINCIDENT_M: float = 1e-6
#: Area per point of the densest packing of points ``s`` apart: the hexagonal lattice cell,
#: (sqrt(3)/2) s^2 (Thue / Fejes Toth; density pi/(2 sqrt(3)) of the equal-disk packing).
HEX_CELL_FACTOR: float = math.sqrt(3.0) / 2.0

# Spacing comparisons forgive round-off: a lattice drawn at exactly the minimum spacing passes.
SPACING_RTOL = 1e-9

_COORDS = {2: "(x, y)", 3: "(x, y, z)"}


def vector(value, n: int, name: str, what: str) -> tuple[float, ...]:
    """``n`` finite numbers as a tuple of floats, or a ValueError naming ``name`` of ``what``."""
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(
            f"`{name}` of {what} must be {n} numbers {_COORDS[n]} in metres; got {value!r}."
        ) from None
    if arr.shape != (n,):
        got = arr.size if arr.ndim == 1 else f"shape {arr.shape}"
        raise ValueError(
            f"`{name}` of {what} must be {n} numbers {_COORDS[n]} in metres; got {got}."
        )
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"`{name}` of {what} must be finite; got {arr.tolist()}.")
    return tuple(float(x) for x in arr)


def rows(value, name: str, what: str, dims: tuple[int, ...]) -> np.ndarray:
    """A non-empty ``(k, d)`` float array with ``d`` in ``dims``, all finite."""
    allowed = " or ".join(f"[{', '.join('xyz'[:d])}]" for d in dims)
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(
            f"`{name}` of {what} must be a list of {allowed} rows in metres, all of one "
            f"length; got {value!r}."
        ) from None
    if arr.ndim != 2 or arr.shape[1] not in dims or arr.shape[0] == 0:
        raise ValueError(
            f"`{name}` of {what} must be a non-empty list of {allowed} rows in metres; "
            f"got shape {arr.shape}."
        )
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"`{name}` of {what} must be finite; got {arr.tolist()}.")
    return arr


def number(value, name: str, what: str) -> float:
    """One finite number as a float."""
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"`{name}` of {what} must be a number; got {value!r}.") from None
    if not math.isfinite(out):
        raise ValueError(f"`{name}` of {what} must be finite; got {out}.")
    return out


def positive_int(value, name: str, *, minimum: int = 1) -> int:
    """An integer (not a bool) of at least ``minimum``."""
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise ValueError(f"`{name}` must be an integer >= {minimum}; got {value!r}.")
    if value < minimum:
        raise ValueError(f"`{name}` must be an integer >= {minimum}; got {value}.")
    return int(value)


def spacing(value, name: str = "spacing_m") -> float:
    """A positive finite number of metres."""
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"`{name}` must be a positive number of metres; got {value!r}.") from None
    if not math.isfinite(out) or out <= 0.0:
        raise ValueError(f"`{name}` must be a positive number of metres; got {out}.")
    return out


def points(points_m, name: str = "points_m") -> np.ndarray:
    """``(n_points, 3)`` finite float positions, m."""
    arr = np.asarray(points_m, dtype=float)
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise ValueError(f"`{name}` must have shape (n_points, 3) in metres; got {arr.shape}.")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"`{name}` must be finite.")
    return arr


def fmt(p) -> str:
    """A position as ``(x, y, z)`` with 6 significant digits."""
    return "(" + ", ".join(f"{float(c):.6g}" for c in p) + ")"


def fmt_list(values) -> str:
    """Numbers as ``[a, b]`` in ``%g``."""
    return "[" + ", ".join(f"{v:g}" for v in values) + "]"


def describe(region) -> str:
    """``kind 'name'``, or the kind alone for an unnamed region."""
    return f"{region.kind} {region.name!r}" if region.name else region.kind


def label(word: str, index: int, region) -> str:
    """``region 2 (rectangle 'roof')``: how messages point at one region of a site."""
    return f"{word} {index} ({describe(region)})"


def check_name(name) -> None:
    """A region's name must be text."""
    if not isinstance(name, str):
        raise ValueError(f"`name` of a region must be text; got {name!r}.")


def what_of(kind: str, name: str) -> str:
    """``a rectangle 'roof'``: how a region's own messages name it."""
    return f"a {kind}" + (f" {name!r}" if name else "")
