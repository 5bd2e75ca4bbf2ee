"""The electric field at the particles: space charge, applied sources, images.

Space charge goes through the Coulomb front door
(:func:`chargesim.coulomb.field`) with the charges ``weight * charge`` of the
simulated particles; applied sources (``source.field(points)``) add their
fields; image providers of grounded collectors (``images(positions,
charges) -> (img_pos, img_q)``) add the field of the image charges at the
particles. The medium's relative permittivity divides the fields of free and
image charges (not those of electrodes held at fixed potentials, which the
sources compute themselves).

A simulated particle of weight W acts, and is acted on, as a compact cloud of
W real particles: its image is that of W x charge, so each of its real
particles feels the images of the whole cloud (W times one particle's own
image force). That is right for a cloud small compared with its distance to
the conductor and an overestimate otherwise, as for the space charge between
simulated particles; keep weights modest where image attraction matters.
"""
import math
import warnings

import numpy as np

from .. import coulomb

_RADII = ("particle", "none")


class Coulomb:
    """How the particles' own field (space charge) is evaluated.

    Parameters
    ----------
    method : str
        A method of :func:`chargesim.coulomb.field`: "auto" (picked by N),
        "direct", "tree", "cutoff", "ewald", "mesh".
    radii : "particle", "none" or float
        "particle": particles interact as uniformly charged spheres of their
        own radius when they overlap; "none": point charges; a float: one
        softening radius for all, m (> 0), useful when one simulated particle
        stands for a cloud of real ones.
    **options
        Options of the method (e.g. ``accuracy=1e-3`` for the tree,
        ``cutoff``, ``box``).
    """

    def __init__(self, method="auto", radii="particle", **options):
        if method != "auto" and method not in coulomb.METHODS:
            raise ValueError(f"method must be 'auto' or one of {coulomb.METHODS}, got {method!r}")
        self.method = method
        if isinstance(radii, str):
            if radii not in _RADII:
                raise ValueError(f"radii must be 'particle', 'none' or a softening radius in m, got {radii!r}")
            self.radii = radii
        else:
            try:
                r = float(radii)
            except (TypeError, ValueError):
                raise ValueError(f"radii must be 'particle', 'none' or a number in m, got {radii!r}") from None
            if not (math.isfinite(r) and r > 0):
                raise ValueError(f"radii must be a finite positive softening radius in m, got {radii!r}")
            self.radii = r
        self.options = dict(options)
        self._fallback_warned = False

    def radii_for(self, state):
        """Radii handed to the front door (None for point charges), m."""
        if self.radii == "particle":
            return state.radius
        if self.radii == "none":
            return None
        return np.full(state.n, self.radii)

    def _call(self, fn, *args, **kw):
        try:
            return fn(*args, method=self.method, **kw, **self.options)
        except ModuleNotFoundError:
            # a method module not (yet) installed: the exact sum always exists
            if self.method != "auto":
                raise
            if not self._fallback_warned:
                warnings.warn("Coulomb method 'auto' could not load its fast evaluator; using 'direct'",
                              RuntimeWarning, stacklevel=3)
                self._fallback_warned = True
            opts = {k: v for k, v in self.options.items() if k != "accuracy"}
            return fn(*args, method="direct", **kw, **opts)

    def field(self, positions, charges, eps_r, radii=None, targets=None):
        """Field of ``charges`` (C) at ``positions`` (or at ``targets``), V/m."""
        return self._call(coulomb.field, positions, charges, targets, eps_r=eps_r, radii=radii)

    def energy(self, positions, charges, eps_r, radii=None):
        """Pair energy of the charges, J."""
        return self._call(coulomb.energy, positions, charges, eps_r=eps_r, radii=radii)

    def method_for(self, n):
        """The method actually used for n particles (for run info)."""
        if self.method != "auto":
            return self.method
        try:
            return coulomb.method_for(n, **self.options)
        except ModuleNotFoundError:
            return "direct"

    def describe(self):
        return {"method": self.method, "radii": str(self.radii),
                **{k: v for k, v in self.options.items() if np.isscalar(v)}}


def _check_source(src, i):
    if not callable(getattr(src, "field", None)):
        raise ValueError(f"sources[{i}] has no field(points) method")
    return src


def _check_image(img, i):
    if not callable(getattr(img, "images", None)):
        raise ValueError(f"images[{i}] has no images(positions, charges) method")
    return img


class FieldModel:
    """Sum of the field contributions at the particles.

    Parameters
    ----------
    coulomb : Coulomb or None
        Space charge among the particles; None: off.
    sources : sequence
        Applied field sources (``field(points) -> (M, 3)`` V/m).
    images : sequence
        Image providers of grounded conductors.
    eps_r : float
        Relative permittivity of the medium.
    """

    def __init__(self, coulomb=None, sources=(), images=(), eps_r=1.0):
        if coulomb is not None and not isinstance(coulomb, Coulomb):
            raise ValueError("coulomb must be a Coulomb(...) or None (off)")
        self.coulomb = coulomb
        self.sources = [_check_source(s, i) for i, s in enumerate(sources)]
        self.images = [_check_image(m, i) for i, m in enumerate(images)]
        self.eps_r = float(eps_r)

    def field(self, state):
        """Electric field at every particle of ``state``, V/m, shape (n, 3).

        Returns
        -------
        total : ndarray (n, 3)
        """
        n = state.n
        e = np.zeros((n, 3))
        if n == 0:
            return e
        pos = state.position
        q_sim = state.weight * state.charge
        if self.coulomb is not None and n > 1 and np.any(q_sim != 0):
            e += self.coulomb.field(pos, q_sim, self.eps_r, radii=self.coulomb.radii_for(state))
        for src in self.sources:
            e += np.asarray(src.field(pos), dtype=np.float64).reshape(n, 3)
        if self.images and np.any(q_sim != 0):
            for img in self.images:
                ipos, iq = img.images(pos, q_sim)
                ipos = np.asarray(ipos, dtype=np.float64).reshape(-1, 3)
                if ipos.shape[0] == 0:
                    continue
                if self.coulomb is not None:
                    e += self.coulomb.field(ipos, iq, self.eps_r, targets=pos)
                else:
                    e += coulomb.field(ipos, iq, pos, eps_r=self.eps_r, method="auto")
        return e

    def applied_potential(self, points):
        """Potential of the applied sources at ``points`` (V), or None if a
        source has no potential. Read it, do not change it: with one source
        it is that source's own result."""
        pot = None
        for src in self.sources:
            fn = getattr(src, "potential", None)
            if not callable(fn):
                return None
            part = np.asarray(fn(points), dtype=np.float64).reshape(-1)
            # one source, the usual case: its own array, without the zeros and
            # the sum into them (0.23 ms against 0.19 ms for 1e5 points, the
            # source's own evaluation, measured side by side; a diagnostics row
            # evaluates it at every particle); the caller only reads it
            pot = part if pot is None else pot + part
        return np.zeros(points.shape[0]) if pot is None else pot
