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
import os as _os

# numba's OpenMP thread pool spins on its cores for a while after each
# parallel kernel by default; between kernels the main thread runs serial
# numpy code, which then shares a core with a spinning worker. Measured on
# 2 cores, 5000 charges: tree build 4 ms with passive waiting, 14-26 ms
# spinning; large sets unchanged. Set before numba starts its pool; a value
# set by the user wins.
_os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")


def _one_blas_thread():
    """Run BLAS (numpy's and scipy's OpenBLAS) on one thread, unless the user chose.

    OpenBLAS's idle threads spin after each call; a matrix product between
    two numba kernels then takes a core from them. Measured on 2 cores, 1e5
    charges, method "tree": 0.46 s with two BLAS threads, 0.40 s with one.
    Libraries loaded from now on read the variable; one already loaded (numpy
    imported before chargesim) is limited through threadpoolctl.
    """
    if "OPENBLAS_NUM_THREADS" in _os.environ:
        return
    _os.environ["OPENBLAS_NUM_THREADS"] = "1"
    import sys

    if "numpy" in sys.modules:
        from threadpoolctl import threadpool_limits

        threadpool_limits(limits=1, user_api="blas")


_one_blas_thread()

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
