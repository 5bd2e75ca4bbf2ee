"""The two small contracts of this layer: applied field sources and image systems.

Applied field sources (:class:`FieldSource`) are electrodes held at fixed
potentials, or a given field. They do not depend on the medium's relative
permittivity: an electrode at a fixed potential sets V/d whatever fills the
gap (the free charge on it scales with eps_r, the field does not).

Image systems (:class:`ImageSystem`) give the image charges that make a
grounded conductor's surface an equipotential for a set of free charges. The
images are charges like the free ones: the caller divides their field by the
medium's eps_r, exactly as for the free charges.
"""

import numpy as np

from .. import coulomb
from ..coulomb import _checks


class FieldSource:
    """Base contract of an applied field source.

    A concrete source sets ``name`` and fills in ``_field``, ``_potential``,
    :meth:`peak_field` and ``_geometry``; the public methods check the points
    once and hand over a C-contiguous float64 (M, 3) array.

    For the safety checks a corona discharge electrode (a thin wire) also sets
    ``corona_wire_radius`` and gives :meth:`gap_field`: then
    :func:`chargesim.hazards.assess` compares its surface field with the
    corona onset field and its gap field with the breakdown field (sparkover),
    instead of its surface field with the breakdown field.

    Attributes
    ----------
    name : str
        Name of the source (used in findings, plots and files).
    corona_wire_radius : float or None
        Radius of the corona wire(s), m; None for electrodes not meant to run
        in corona (plates, uniform fields).
    """

    name = "source"
    corona_wire_radius = None

    def field(self, points):
        """Electric field at ``points``.

        Parameters
        ----------
        points : array_like, shape (M, 3)
            Points, m.

        Returns
        -------
        ndarray, shape (M, 3)
            Field, V/m.
        """
        return self._field(_checks.as_points(points, "points"))

    def potential(self, points):
        """Electric potential at ``points``.

        Parameters
        ----------
        points : array_like, shape (M, 3)
            Points, m.

        Returns
        -------
        ndarray, shape (M,)
            Potential, V (grounded electrodes at 0 V).
        """
        return self._potential(_checks.as_points(points, "points"))

    def peak_field(self):
        """Highest field magnitude at an electrode surface or across a gap, V/m.

        For the safety checks (:func:`chargesim.hazards.assess` takes the
        source itself).
        """
        raise NotImplementedError

    def gap_field(self):
        """Mean field across the electrode gap (voltage over gap), V/m, or None without a gap of its own.

        For the sparkover check of corona electrodes.
        """
        return None

    def describe(self):
        """Parameters and electrode outlines, for files and plots.

        Returns
        -------
        dict
            ``kind`` (class name), ``name``, ``parameters`` (SI floats and
            lists), ``outlines``: list of dicts, each a shape with SI
            coordinates: ``{"shape": "plane", "point", "normal"}``,
            ``{"shape": "cylinder", "point", "axis", "radius"}`` (infinite
            unless it has ``length``, then ``point`` is the middle),
            ``{"shape": "box", "low", "high"}`` (a flat box is a finite plate),
            ``{"shape": "sphere", "centre", "radius"}``.
        """
        params, outlines = self._geometry()
        return {"kind": type(self).__name__, "name": self.name, "parameters": params, "outlines": outlines}

    def _field(self, pts):
        raise NotImplementedError

    def _potential(self, pts):
        raise NotImplementedError

    def _geometry(self):
        raise NotImplementedError

    def __repr__(self):
        return f"{type(self).__name__}(name={self.name!r})"


class ImageSystem:
    """Base contract of the image charges of a grounded conductor.

    A concrete system fills in ``_images`` (checked positions and charges in,
    image positions and charges out) and ``_geometry``. Memory is O(N x terms).
    """

    name = "images"

    def images(self, positions, charges):
        """Image charges of free charges near the grounded conductor.

        Parameters
        ----------
        positions : array_like, shape (N, 3)
            Free charge positions, m.
        charges : array_like, shape (N,)
            Free charges, C (for weighted particles, weight x charge).

        Returns
        -------
        image_positions : ndarray, shape (K, 3)
            m.
        image_charges : ndarray, shape (K,)
            C. Their field (divided by the medium's eps_r) plus that of the free
            charges makes the conductor's surface an equipotential at 0 V.
        """
        pos = _checks.as_points(positions, "positions")
        q = _checks.as_values(charges, "charges", pos.shape[0])
        if pos.shape[0] == 0:
            return np.zeros((0, 3)), np.zeros(0)
        return self._images(pos, q)

    def field_at_charges(self, positions, charges, *, eps_r=1.0, method="auto", **options):
        """Field of the images at the free charges (the image attraction), V/m.

        Goes through :func:`chargesim.coulomb.field` with the free charges as
        targets; ``eps_r`` divides it as for any free charge.
        """
        pos = _checks.as_points(positions, "positions")
        ipos, iq = self.images(pos, charges)
        if ipos.shape[0] == 0:
            return np.zeros_like(pos)
        return coulomb.field(ipos, iq, pos, eps_r=eps_r, method=method, **options)

    def describe(self):
        """Parameters and outlines, as :meth:`FieldSource.describe`."""
        params, outlines = self._geometry()
        return {"kind": type(self).__name__, "name": self.name, "parameters": params, "outlines": outlines}

    def _images(self, pos, q):
        raise NotImplementedError

    def _geometry(self):
        raise NotImplementedError

    def __repr__(self):
        return f"{type(self).__name__}(name={self.name!r})"
