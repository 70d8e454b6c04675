"""The TOML config: read once, check everything once, hand out frozen dataclasses.

Map of this package:

* :mod:`.load` — the ways in: :func:`load_config` (a file), :func:`parse_config` (TOML text),
  :func:`config_from_mapping` (the mapping ``tomllib`` returns); all three run the same checks.
* :mod:`.reader` — the typed-table reader: one :class:`InputError` per failure, naming the file,
  the key (dotted path, arrays indexed from 0: ``source[2].center_m``), what was found and
  what is allowed.
* :mod:`.vocab` — the enumerated options a config may name, each defined once.
* one parser module per section: :mod:`.ground`, :mod:`.probes` (``[probes]`` and
  ``[[probes.installed]]``), :mod:`.regions` (``[[region]]``, ``[[keepout]]``),
  :mod:`.sources`, :mod:`.background`, :mod:`.design`, :mod:`.grades` (``[[grade]]``,
  ``[budget]``).
* :mod:`.model` — the checked config as frozen dataclasses (:class:`Config` and its parts); the
  rest of the program never re-validates a config.
* :mod:`.render` — a mapping written back as TOML (the text a mapping-built config keeps).

Units are SI throughout (m, C, V/m); every key carries its unit as a suffix.
"""

from __future__ import annotations

from .load import config_from_mapping, load_config, parse_config
from .model import (
    BackgroundSpec,
    BudgetSpec,
    Config,
    DesignSpec,
    Grade,
    InstalledProbe,
    ProbeSpec,
    SourceSpec,
)
from .vocab import (
    AGGREGATES,
    CAUTIONS,
    COMPONENTS,
    CRITERIA,
    ESTIMATE_NAMES,
    REGION_KINDS,
    SOURCE_KINDS,
    STORM_HEIGHT_M,
)

__all__ = [
    "AGGREGATES",
    "CAUTIONS",
    "COMPONENTS",
    "CRITERIA",
    "ESTIMATE_NAMES",
    "REGION_KINDS",
    "SOURCE_KINDS",
    "STORM_HEIGHT_M",
    "BackgroundSpec",
    "BudgetSpec",
    "Config",
    "DesignSpec",
    "Grade",
    "InstalledProbe",
    "ProbeSpec",
    "SourceSpec",
    "config_from_mapping",
    "load_config",
    "parse_config",
]
