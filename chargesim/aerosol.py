"""Public name of :mod:`chargesim.physics.aerosol` (the same module object)."""
import sys

from .physics import aerosol as _impl

sys.modules[__name__] = _impl
