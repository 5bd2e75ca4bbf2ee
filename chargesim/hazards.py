"""Public name of :mod:`chargesim.physics.hazards` (the same module object)."""
import sys

from .physics import hazards as _impl

sys.modules[__name__] = _impl
