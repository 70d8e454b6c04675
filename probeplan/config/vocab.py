"""The enumerated options a config may name, each defined once.

A vocabulary owned by a stage to the left of the config (criteria and aggregates by
:mod:`probeplan.fisher`, components by :mod:`probeplan.probes`, source kinds by
:mod:`probeplan.sources`, region kinds by :mod:`probeplan.site`) is imported from there; the
ones only a config speaks (estimate names, cautions) are defined here.
"""

from __future__ import annotations

from ..fisher import AGGREGATE_NAMES
from ..fisher import CRITERIA as CRITERIA  # re-exported: the criteria a config names
from ..probes import COMPONENTS as COMPONENTS  # re-exported: what a meter reads
from ..site import REGION_KINDS as _SITE_REGION_KINDS
from ..sources import KINDS

#: Estimate names a config may use, and the source parameter each one stands for.
ESTIMATE_NAMES: dict[str, str] = {
    "charge": "charge_c",
    "x": "x_m",
    "y": "y_m",
    "z": "z_m",
    "radius": "radius_m",
    "sigma": "sigma_m",
}
#: The other way round: a source parameter -> the estimate name a config uses for it.
PARAM_TO_ESTIMATE: dict[str, str] = {v: k for k, v in ESTIMATE_NAMES.items()}

#: Aggregates over scenarios; ``quantile:q`` stands for any 0 < q < 1, e.g. ``quantile:0.9``.
AGGREGATES: tuple[str, ...] = AGGREGATE_NAMES
#: Caution lines the summary can carry (the top-level ``caution`` key).
CAUTIONS: tuple[str, ...] = ("lightning", "esd", "high-voltage", "general", "none")
#: Mounting-region and keep-out kinds, in the site's order.
REGION_KINDS: tuple[str, ...] = tuple(_SITE_REGION_KINDS)
#: The ``[[region]]`` kind that reads a GeoJSON site file (regions, keep-outs, meters).
MAP_KIND: str = "geojson"
#: Source kinds, in the order of :data:`probeplan.sources.KINDS`.
SOURCE_KINDS: tuple[str, ...] = tuple(KINDS)

#: A source centred at least this high above a ground plane marks a storm-watch config
#: (charge in a thundercloud sits kilometres up; common practice of the trade).
STORM_HEIGHT_M: float = 1000.0
