"""One test site for the whole suite, built from a mapping, and overrides for what differs.

The base is a small fictional storm-watch site: a ground plane at z = 0, a 4 km square of
flush ground meters reading E_z, and one point charge of -20 C three kilometres up whose charge
and position are estimated, drawn from a 1 km box around its nominal place. A test states only
what its site needs beyond that, as overrides:

* ``site_mapping(probes={"count": 6})`` merges into a table; ``None`` removes a key or a table
  (``ground=None`` is free space, ``probes={"min_spacing_m": None}``);
* any other value (a number, a list of tables) replaces the base's;
* layers apply in turn: ``site_mapping(SITE, probes={"count": 5})`` is a test file's own
  ``SITE`` (a dict of overrides) with five new probes.

:func:`make_config` checks the mapping through :func:`probeplan.config.config_from_mapping`, the
same checks a file goes through; :func:`write_site` writes it as a TOML file for the CLI.
The numbers are invented for the tests, not taken from any real installation.
"""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

from probeplan.config import Config, config_from_mapping
from probeplan.config.render import mapping_to_toml

#: Every position parameter and the charge of a source.
ALL = ("charge", "x", "y", "z")


def rectangle(half_m: float, z_m: float = 0.0, **keys: Any) -> dict:
    """A horizontal square ``[-half_m, half_m]²`` at ``z_m``; ``keys`` adds e.g. ``gain``."""
    return {
        "kind": "rectangle",
        "min_m": [-half_m, -half_m],
        "max_m": [half_m, half_m],
        "z_m": z_m,
        **keys,
    }


def box(half_m: float, z_lo_m: float, z_hi_m: float) -> list[list[float]]:
    """A ``center_range_m`` of ±``half_m`` in x and y and ``[z_lo_m, z_hi_m]`` in z."""
    return [[-half_m, half_m], [-half_m, half_m], [z_lo_m, z_hi_m]]


def point_source(
    charge_c: float = -20.0,
    center_m: tuple[float, float, float] = (0.0, 0.0, 3000.0),
    estimate: tuple[str, ...] = ALL,
    **keys: Any,
) -> dict:
    """A ``[[source]]`` point charge; ``keys`` adds e.g. ``center_range_m``."""
    return {
        "kind": "point",
        "charge_c": charge_c,
        "center_m": list(center_m),
        "estimate": list(estimate),
        **keys,
    }


def meter_grade(name: str, noise_v_per_m: float, cost: float, **keys: Any) -> dict:
    """A ``[[grade]]``; ``keys`` adds e.g. ``relative_noise``."""
    return {"name": name, "noise_v_per_m": noise_v_per_m, **keys, "cost": cost}


BASE: dict[str, Any] = {
    "title": "Test site (fictional)",
    "seed": 3,
    "ground": {"z_m": 0.0},
    "probes": {"count": 4, "component": "z", "noise_v_per_m": 20.0},
    "region": [rectangle(2000.0)],
    "source": [point_source(center_range_m=box(500.0, 2500.0, 3500.0))],
    "design": {"scenarios": 4, "evaluations": 0},
}


def _merge(base: dict, overrides: dict) -> dict:
    out = copy.deepcopy(base)
    for key, value in overrides.items():
        if value is None:
            out.pop(key, None)
        elif isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = _merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def site_mapping(*layers: dict, **overrides: Any) -> dict:
    """The base site with each layer of overrides applied in turn, then ``overrides``.

    A layer is a dict of overrides (see the module docstring), e.g. a test file's own site;
    ``site_mapping(SITE, probes={"count": 5})`` is that site with five new probes.
    """
    out = BASE
    for layer in (*layers, overrides):
        out = _merge(out, layer)
    return out


def make_config(path: str = "<test site>", *layers: dict, **overrides: Any) -> Config:
    """The checked config of ``site_mapping(*layers, **overrides)``; ``path`` names it."""
    return config_from_mapping(site_mapping(*layers, **overrides), path)


def site_toml(*layers: dict, **overrides: Any) -> str:
    """``site_mapping(*layers, **overrides)`` as TOML text."""
    return mapping_to_toml(site_mapping(*layers, **overrides), "<test site>")


def write_site(path: str | Path, *layers: dict, **overrides: Any) -> Path:
    """Write ``site_mapping(*layers, **overrides)`` as a TOML file at ``path``; returns it."""
    path = Path(path)
    path.write_text(site_toml(*layers, **overrides), encoding="utf-8")
    return path


def small_site(
    count=4, component="z", spacing=0.0, installed=(), source=None, background=None, grades=None
):
    """A 6 km square of ground meters, one point charge 4 km up, three scenarios, no
    refinement: a small invented site whose arguments vary it per test."""
    site = dict(
        seed=4,
        title=None,
        probes={"count": count, "component": component, "min_spacing_m": spacing},
        region=[rectangle(3000.0)],
        source=[source or point_source(center_m=(0.0, 0.0, 4000.0))],
        background=background,
        design={
            "scenarios": 3,
            "evaluations": 0,
            "random_layouts": 10,
            "grid_spacing_m": 500.0,
        },
        grade=grades,
    )
    if installed:
        site["probes"]["installed"] = list(installed)
    return make_config("small.toml", **site)
