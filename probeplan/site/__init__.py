"""Mounting geometry: where a field meter may go, where it may not, and how far apart.

The package, read in this order:

* :mod:`.protocol` — the :class:`Region` protocol and :class:`Kind`, the base of the kinds;
* :mod:`.kinds` — the region kinds: rectangle, polygon (horizontal or a planar wall), segment,
  points;
* :mod:`.regions` — the :class:`Gained` and :class:`Buffered` wrappers, the registry
  :data:`REGION_KINDS` and :func:`make_region`;
* :mod:`.rules` — :class:`Site`: regions, keep-outs, spacing and installed probes;
* :mod:`.layouts` — candidate lattices (:class:`Candidates`), random and regular layouts.

Units: metres throughout; positions are ``(n_points, 3)`` arrays of ``(x, y, z)``, z up.
"""

from ._common import COINCIDENT_M, HEX_CELL_FACTOR, TOLERANCE_M
from .kinds import Points, Polygon, Rectangle, Segment
from .layouts import Candidates, auto_spacing, candidate_grid, random_layouts, regular_layout
from .protocol import Kind, Region
from .regions import REGION_KINDS, Buffered, Gained, make_region
from .rules import Site

__all__ = [
    "COINCIDENT_M",
    "HEX_CELL_FACTOR",
    "REGION_KINDS",
    "TOLERANCE_M",
    "Buffered",
    "Candidates",
    "Gained",
    "Kind",
    "Points",
    "Polygon",
    "Rectangle",
    "Region",
    "Segment",
    "Site",
    "auto_spacing",
    "candidate_grid",
    "make_region",
    "random_layouts",
    "regular_layout",
]
