"""The gas the particles move in: its state and its velocity field.

The relations (Sutherland viscosity, mean free path, slip, mobility) are those
of :mod:`chargesim.physics.aerosol`; this module only holds the gas state and
hands the right arguments to them.
"""
import math

import numpy as np

from ..physics import aerosol
from ..physics.constants import ROOM_TEMPERATURE, STANDARD_PRESSURE
from .._validate import positive as _positive, vector as _vector


def _axis(value, name):
    if value in ("x", "y", "z"):
        return "xyz".index(value)
    try:
        a = int(value)
    except (TypeError, ValueError):
        a = -1
    if a not in (0, 1, 2):
        raise ValueError(f"{name} must be 0, 1, 2 or 'x', 'y', 'z', got {value!r}")
    return a


def _as_points(points):
    return np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)


class UniformFlow:
    """Gas moving everywhere at one velocity.

    Parameters
    ----------
    velocity : array_like of 3 floats
        Gas velocity, m/s.
    """

    def __init__(self, velocity):
        self.velocity = _vector(velocity, "velocity")

    def __call__(self, points):
        """Gas velocity at ``points`` ((M, 3), m), m/s, shape (M, 3)."""
        p = _as_points(points)
        return np.broadcast_to(self.velocity, p.shape).copy()

    def describe(self):
        return {"kind": "uniform", "velocity": self.velocity.copy()}


class ChannelFlow:
    """Fully developed laminar flow between two parallel walls (plane Poiseuille).

    u(s) = 1.5 U (1 - ((s - c)/h)^2) along ``flow_axis``, where s is the
    coordinate along ``wall_axis``, c the mid-plane and h the half gap; zero
    outside the walls.

    Parameters
    ----------
    mean_velocity : float
        Mean gas velocity U over the gap, m/s.
    flow_axis, wall_axis : int or {"x", "y", "z"}
        Axis of the flow and axis normal to the walls (different).
    wall_lo, wall_hi : float
        Wall positions along ``wall_axis``, m (wall_lo < wall_hi).
    """

    def __init__(self, mean_velocity, flow_axis, wall_axis, wall_lo, wall_hi):
        try:
            self.mean_velocity = float(mean_velocity)
        except (TypeError, ValueError):
            raise ValueError(f"mean_velocity must be a number, got {mean_velocity!r}") from None
        if not math.isfinite(self.mean_velocity):
            raise ValueError(f"mean_velocity must be finite, got {mean_velocity!r}")
        self.flow_axis = _axis(flow_axis, "flow_axis")
        self.wall_axis = _axis(wall_axis, "wall_axis")
        if self.flow_axis == self.wall_axis:
            raise ValueError("wall_axis must differ from flow_axis")
        self.wall_lo = float(wall_lo)
        self.wall_hi = float(wall_hi)
        if not (math.isfinite(self.wall_lo) and math.isfinite(self.wall_hi) and self.wall_lo < self.wall_hi):
            raise ValueError(f"wall_lo must be < wall_hi (finite), got {wall_lo!r}, {wall_hi!r}")

    def __call__(self, points):
        """Gas velocity at ``points`` ((M, 3), m), m/s, shape (M, 3)."""
        p = _as_points(points)
        c = 0.5 * (self.wall_lo + self.wall_hi)
        h = 0.5 * (self.wall_hi - self.wall_lo)
        s = (p[:, self.wall_axis] - c) / h
        out = np.zeros_like(p)
        out[:, self.flow_axis] = np.where(np.abs(s) < 1.0, 1.5 * self.mean_velocity * (1.0 - s * s), 0.0)
        return out

    def describe(self):
        return {"kind": "channel", "mean_velocity": self.mean_velocity, "flow_axis": self.flow_axis,
                "wall_axis": self.wall_axis, "wall_lo": self.wall_lo, "wall_hi": self.wall_hi}


class Medium:
    """Gas state: temperature, pressure, permittivity, viscosity, flow.

    Parameters
    ----------
    temperature : float
        Gas temperature, K (> 0).
    pressure : float
        Gas pressure, Pa (> 0).
    eps_r : float
        Relative permittivity of the gas, 1 (>= 1; dry air about 1.00059).
    viscosity : float, optional
        Dynamic viscosity, Pa s; None: air by Sutherland's law at
        ``temperature`` (:func:`chargesim.physics.aerosol.air_viscosity`).
    mean_free_path : float, optional
        Gas mean free path, m; None: air's, scaled with T and p
        (:func:`chargesim.physics.aerosol.mean_free_path`).
    flow : callable, optional
        Gas velocity field: ``flow(points) -> (M, 3)`` m/s, e.g.
        :class:`UniformFlow`, :class:`ChannelFlow`, :class:`GriddedFlow`.
        None: still gas.
    """

    def __init__(self, temperature=ROOM_TEMPERATURE, pressure=STANDARD_PRESSURE, eps_r=1.0, viscosity=None,
                 mean_free_path=None, flow=None):
        self.temperature = _positive(temperature, "temperature")
        self.pressure = _positive(pressure, "pressure")
        try:
            self.eps_r = float(eps_r)
        except (TypeError, ValueError):
            raise ValueError(f"eps_r must be a number >= 1, got {eps_r!r}") from None
        if not math.isfinite(self.eps_r) or self.eps_r < 1.0:
            raise ValueError(f"eps_r must be a finite number >= 1, got {eps_r!r}")
        self.viscosity = (aerosol.air_viscosity(self.temperature) if viscosity is None
                          else _positive(viscosity, "viscosity"))
        air_mfp = aerosol.mean_free_path(self.temperature, self.pressure)
        self.mean_free_path = air_mfp if mean_free_path is None else _positive(mean_free_path, "mean_free_path")
        # The slip relation takes (T, p); a given mean free path enters as the
        # pressure at which air would have it (lambda ~ 1/p), so the one slip
        # formula of the physics layer serves both cases.
        self._slip_pressure = self.pressure * air_mfp / self.mean_free_path
        # 2 lambda of the slip relation, for the run loop's drag rate (as
        # aerosol.knudsen_number forms it, so the results are the same bits)
        self._two_lambda = 2.0 * aerosol.mean_free_path(self.temperature, self._slip_pressure)
        if flow is not None and not callable(flow):
            raise ValueError("flow must be callable as flow(points) -> (M, 3) m/s, or None")
        self.flow = flow

    def gas_velocity(self, points):
        """Gas velocity at ``points`` ((M, 3), m), m/s, shape (M, 3)."""
        p = _as_points(points)
        if self.flow is None:
            return np.zeros_like(p)
        return np.asarray(self.flow(p), dtype=np.float64).reshape(p.shape)

    def slip_correction(self, diameter):
        """Cunningham slip correction Cc for ``diameter`` (m), 1."""
        return aerosol.slip_correction(diameter, self.temperature, self._slip_pressure)

    def mobility(self, diameter):
        """Mechanical mobility B = Cc/(3 pi mu d), s/kg."""
        return aerosol.mobility(diameter, self.temperature, self._slip_pressure, self.viscosity)

    def relaxation_time(self, diameter, density):
        """Relaxation time tau = rho d^2 Cc/(18 mu), s."""
        return aerosol.relaxation_time(diameter, density, self.temperature, self._slip_pressure, self.viscosity)

    def drag_rate(self, diameter, density):
        """1/tau, 1/s, for the arrays of a particle state (checked when the
        particles were added, so not again: the run loop calls this every
        step, and the argument checks of :meth:`relaxation_time` cost more
        than its arithmetic for a thousand particles)."""
        cc = aerosol.slip_from_knudsen(self._two_lambda / diameter)
        return 1.0 / aerosol.relaxation_time_from(diameter, density, cc, self.viscosity)

    def diffusivity(self, diameter):
        """Brownian diffusivity D = k T B, m^2/s."""
        return aerosol.particle_diffusivity(diameter, self.temperature, self._slip_pressure, self.viscosity)

    def describe(self):
        """Scalars of the gas state (for run info and checkpoints)."""
        return {"temperature": self.temperature, "pressure": self.pressure, "eps_r": self.eps_r,
                "viscosity": self.viscosity, "mean_free_path": self.mean_free_path}


class GriddedFlow:
    """Gas velocity given on a regular grid, trilinear interpolation.

    The interpolation is that of :class:`chargesim.sources.GriddedField` (the
    same grid code serves applied fields and gas velocities).

    Parameters
    ----------
    origin : array_like of 3 floats
        Position of grid node (0, 0, 0), m.
    spacing : array_like of 3 floats (or one float)
        Node spacing per axis, m (> 0).
    values : array_like, shape (nx, ny, nz, 3)
        Gas velocity at the nodes, m/s (each n >= 2).

    Raises
    ------
    ValueError
        From the call, for points outside the grid (naming the first).
    """

    def __init__(self, origin, spacing, values):
        from ..sources import GriddedField  # the layer above physics that holds grids

        try:
            self._grid = GriddedField(origin, spacing, values, name="gas velocity grid")
        except ValueError as exc:
            # the grid speaks of a "field": say which argument it was here
            raise ValueError(str(exc).replace("field", "values", 1)) from None
        self.origin = self._grid.origin
        self.spacing = self._grid.spacing
        self.values = self._grid.values

    def __call__(self, points):
        """Gas velocity at ``points`` ((M, 3), m), m/s, shape (M, 3)."""
        return self._grid.field(_as_points(points))

    def describe(self):
        return {"kind": "grid", "origin": self.origin.copy(), "spacing": self.spacing.copy(),
                "shape": np.array(self.values.shape[:3])}
