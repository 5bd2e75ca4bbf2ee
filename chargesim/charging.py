"""Public name of :mod:`chargesim.physics.charging` (the same module object)."""
import sys

from .physics import charging as _impl

sys.modules[__name__] = _impl
