"""chargesim: point-charge electrostatics and charged-particle motion.

The front door of each capability is importable from here:

* Coulomb sums: :func:`field`, :func:`potential`, :func:`energy`,
  :func:`forces`, :func:`neighbors` (``chargesim.coulomb``).
* Scenarios and runs: :func:`load_scenario`, :func:`run` (``chargesim.scenario``).
* Results files: :func:`open_results` (``chargesim.io``).
* Layouts: :func:`relax` (``chargesim.layout``).
* Physics relations: ``chargesim.aerosol``, ``chargesim.charging``,
  ``chargesim.hazards`` (modules).

Higher layers are imported on first use, so ``import chargesim`` stays quick.
"""
import importlib as _importlib

from ._version import __version__
from .coulomb import energy, field, field_and_potential, forces, neighbors, potential
from .physics import constants

# name -> module that defines it; imported on first attribute access
_LAZY = {
    "load_scenario": "chargesim.scenario",
    "run": "chargesim.scenario",
    "open_results": "chargesim.io",
    "relax": "chargesim.layout",
    "aerosol": "chargesim.aerosol",
    "charging": "chargesim.charging",
    "hazards": "chargesim.hazards",
    "materials": "chargesim.physics.materials",
}


def __getattr__(name):
    target = _LAZY.get(name)
    if target is None:
        raise AttributeError(f"module 'chargesim' has no attribute {name!r}")
    mod = _importlib.import_module(target)
    return mod if target.endswith("." + name) else getattr(mod, name)


__all__ = [
    "__version__",
    "constants",
    "energy",
    "field",
    "field_and_potential",
    "forces",
    "neighbors",
    "potential",
    *_LAZY,
]
