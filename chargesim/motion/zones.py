"""Charging zones: boxes with unipolar ions where particles pick up charge.

Each step, particles inside a zone are charged by
:func:`chargesim.physics.charging.charge_step` in the local field strength
(field charging, Pauthenier rate; diffusion charging, White), then droplets are
capped at the Rayleigh limit (:func:`chargesim.physics.charging.cap_rayleigh`).
"""
import math

import numpy as np

from ..physics import charging


class ChargingZone:
    """An axis-aligned box filled with unipolar ions.

    Parameters
    ----------
    lo, hi : array_like of 3 floats
        Box corners, m (lo < hi; +-inf allowed).
    ion_density : float
        Ion number density, 1/m^3 (> 0).
    ion_mobility : float
        Ion mobility, m^2/(V s) (> 0).
    ion_mass : float
        Ion mass, kg (> 0), for the mean thermal ion speed.
    ion_sign : {-1, +1}
        Ion polarity (-1: negative corona, the usual precipitator case).
    field_charging, diffusion : bool
        Which mechanisms act.
    name : str
        Zone name (logs and run info).
    """

    def __init__(self, lo, hi, ion_density, ion_mobility=charging.DEFAULT_ION_MOBILITY,
                 ion_mass=charging.DEFAULT_ION_MASS, ion_sign=-1, field_charging=True, diffusion=True,
                 name="charging"):
        self.lo = np.asarray(lo, dtype=np.float64).reshape(-1)
        self.hi = np.asarray(hi, dtype=np.float64).reshape(-1)
        if self.lo.shape != (3,) or self.hi.shape != (3,) or np.any(np.isnan(self.lo)) \
                or np.any(np.isnan(self.hi)) or np.any(~(self.lo < self.hi)):
            raise ValueError(f"lo and hi must be three numbers each with lo < hi, got {lo!r}, {hi!r}")
        for key, val in (("ion_density", ion_density), ("ion_mobility", ion_mobility), ("ion_mass", ion_mass)):
            try:
                f = float(val)
            except (TypeError, ValueError):
                raise ValueError(f"{key} must be a positive number, got {val!r}") from None
            if not (math.isfinite(f) and f > 0):
                raise ValueError(f"{key} must be a finite positive number, got {val!r}")
            setattr(self, key, f)
        if ion_sign not in (-1, 1):
            raise ValueError(f"ion_sign must be -1 or +1, got {ion_sign!r}")
        self.ion_sign = int(ion_sign)
        self.field_charging = bool(field_charging)
        self.diffusion = bool(diffusion)
        if not (self.field_charging or self.diffusion):
            raise ValueError("field_charging and diffusion cannot both be off")
        self.name = str(name)

    def inside(self, points):
        """Boolean mask of points inside the zone."""
        return np.all((points >= self.lo) & (points <= self.hi), axis=1)

    def apply(self, state, field, dt, temperature, surface_tension):
        """Charge the particles inside over ``dt`` (s) in place.

        Parameters
        ----------
        state : ParticleState
        field : ndarray (n, 3)
            Field at the particles, V/m.
        dt : float
            Step, s.
        temperature : float
            Gas temperature, K.
        surface_tension : ndarray (n,)
            Surface tension of each particle, N/m (inf for solids: no cap).

        Returns
        -------
        int
            Number of charges capped at the Rayleigh limit.
        """
        idx = np.flatnonzero(self.inside(state.position))
        if idx.size == 0:
            return 0
        emag = np.sqrt(np.einsum("ij,ij->i", field[idx], field[idx]))
        q = charging.charge_step(state.charge[idx], state.diameter[idx], state.eps_p[idx], emag,
                                 self.ion_density, self.ion_mobility, temperature, self.ion_mass, dt,
                                 self.ion_sign, field_charging=self.field_charging, diffusion=self.diffusion)
        liquid = np.isfinite(surface_tension[idx])
        n_capped = 0
        if liquid.any():
            capped, n_capped = charging.cap_rayleigh(q[liquid], state.diameter[idx][liquid],
                                                     surface_tension[idx][liquid])
            q[liquid] = capped
        state.charge[idx] = q
        return n_capped

    def describe(self):
        return {"name": self.name, "lo": self.lo.copy(), "hi": self.hi.copy(), "ion_density": self.ion_density,
                "ion_mobility": self.ion_mobility, "ion_mass": self.ion_mass, "ion_sign": self.ion_sign}
