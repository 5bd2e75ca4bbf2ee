"""chargesim: point-charge electrostatics and charged-particle motion.

The front door of each capability is importable from here::

    chargesim.field, potential, energy, forces, neighbors   # Coulomb sums
"""
import sys as _sys

from ._version import __version__
from .coulomb import energy, field, field_and_potential, forces, neighbors, potential
from .physics import constants

__all__ = [
    "__version__",
    "constants",
    "energy",
    "field",
    "field_and_potential",
    "forces",
    "neighbors",
    "potential",
]
