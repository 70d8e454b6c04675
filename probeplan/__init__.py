"""probeplan: plan where to mount electric-field meters.

A forward model of charge distributions over a grounded plane, a Fisher-information score of
probe layouts with Cramér–Rao bounds, and a layout search within mounting rules.

The public names below are imported on first use (PEP 562), so that ``import probeplan`` and
the ``probeplan`` command start without loading numpy, scipy and numba: the command can then
cover its own start-up with its Ctrl-C handling (see :mod:`probeplan._entry`).
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # for type checkers and IDEs; at run time see __getattr__
    from .conductors import Conductor
    from .forward import Scene, field, field_jacobian
    from .sources import (
        K_COULOMB,
        DensityGrid,
        GaussianCharge,
        LineCharge,
        PointCharge,
        SphereCharge,
    )

#: Public name -> the module that defines it.
_EXPORTS: dict[str, str] = {
    "Conductor": ".conductors",
    "Scene": ".forward",
    "field": ".forward",
    "field_jacobian": ".forward",
    "K_COULOMB": ".sources",
    "DensityGrid": ".sources",
    "GaussianCharge": ".sources",
    "LineCharge": ".sources",
    "PointCharge": ".sources",
    "SphereCharge": ".sources",
}

__all__ = [
    "K_COULOMB",
    "Conductor",
    "DensityGrid",
    "GaussianCharge",
    "LineCharge",
    "PointCharge",
    "Scene",
    "SphereCharge",
    "__version__",
    "field",
    "field_jacobian",
]


def __getattr__(name: str):
    if name == "__version__":
        from ._version import package_version

        value = package_version()
    elif name in _EXPORTS:
        value = getattr(import_module(_EXPORTS[name], __name__), name)
    else:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *__all__})
