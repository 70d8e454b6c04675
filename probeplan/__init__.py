"""probeplan: plan where to mount electric-field meters.

A forward model of charge distributions over a grounded plane, a Fisher-information score of
probe layouts with Cramér–Rao bounds, and a layout search within mounting rules.
"""

from importlib.metadata import PackageNotFoundError, version

from .forward import Scene, field, field_jacobian
from .sources import (
    K_COULOMB,
    DensityGrid,
    GaussianCharge,
    LineCharge,
    PointCharge,
    SphereCharge,
)

try:
    __version__ = version("probeplan")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0.0.0+unknown"

__all__ = [
    "K_COULOMB",
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
