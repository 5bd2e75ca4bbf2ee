"""Applied fields of electrodes, and image charges of grounded conductors.

Two small contracts (:mod:`chargesim.sources.base`):

* a field source has ``name``, ``field(points) -> (M, 3)`` V/m,
  ``potential(points) -> (M,)`` V, ``peak_field() -> float`` V/m (for the
  safety checks) and ``describe()`` (parameters and electrode outlines);
* an image system has ``images(positions, charges) -> (image_positions,
  image_charges)`` and ``field_at_charges(positions, charges, eps_r=...)``.

Sources do not depend on the medium's permittivity (electrodes at fixed
potentials); the field of image charges is divided by eps_r by the caller,
as for any free charge.
"""
from .base import FieldSource, ImageSystem
from .gridded import GriddedField
from .images import GroundedPlane, GroundedPlates, GroundedSphere
from .simple import ParallelPlates, Superposition, UniformField
from .wires import WireInTube, WirePlateChannel

__all__ = [
    "FieldSource",
    "GriddedField",
    "GroundedPlane",
    "GroundedPlates",
    "GroundedSphere",
    "ImageSystem",
    "ParallelPlates",
    "Superposition",
    "UniformField",
    "WireInTube",
    "WirePlateChannel",
]
