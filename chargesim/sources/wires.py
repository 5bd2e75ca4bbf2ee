"""Wire electrodes: a wire in a grounded tube, and a row of wires between grounded plates.

The wire-plate channel is the standard precipitator design model: each wire
is a line charge, the grounded plates are represented by its images, and the
line charges are chosen so that each wire's surface sits at the applied
voltage. The image series across the plates (alternating line charges at
x = 2 m s, m = +-1, +-2, ...) is summed in closed form by conformal mapping
of the strip between the plates onto a half plane: for a line charge lambda at
the centre plane between plates at x = +-s,

    phi = lambda/(4 pi eps0) ln[(cosh(beta y) + cos(beta x))/(cosh(beta y) - cos(beta x))],
    beta = pi/(2 s),

which vanishes on both plates and tends to -lambda/(2 pi eps0) ln r at the wire.
Exact to rounding, it needs no truncation; the sum over the row of wires is
truncated where a wire's contribution falls below ``tol`` (it decays as
exp(-beta |y|)), which only matters for an infinite periodic row.
"""
import math

import numba
import numpy as np

from ..coulomb import _checks
from ..physics.constants import EPSILON_0
from .. import _validate
from .base import FieldSource

_TWO_PI_EPS0 = 2.0 * math.pi * EPSILON_0


class WireInTube(FieldSource):
    """A wire of radius a at voltage V on the axis of a grounded tube of radius b.

    E(r) = V/(r ln(b/a)) radially, phi(r) = V ln(b/r)/ln(b/a) (standard
    electrostatics); inside the wire phi = V and E = 0; outside the tube 0.

    Parameters
    ----------
    voltage : float
        Wire potential, V (the tube is grounded).
    wire_radius : float
        a, m (> 0).
    tube_radius : float
        b, m (> a).
    origin : array_like of 3 floats
        A point on the axis, m (the middle of the tube if ``length`` is given).
    axis : array_like of 3 floats
        Axis direction (normalized here).
    length : float, optional
        Tube length, m, for outlines only (the field is that of an infinite tube).
    name : str
        Name.
    """

    def __init__(self, voltage, wire_radius, tube_radius, origin=(0.0, 0.0, 0.0), axis=(0.0, 0.0, 1.0),
                 length=None, name="wire in tube"):
        self.name = str(name)
        self.voltage = _validate.finite(voltage, "voltage")
        self.wire_radius = _validate.positive(wire_radius, "wire_radius")
        self.tube_radius = _validate.positive(tube_radius, "tube_radius")
        if self.tube_radius <= self.wire_radius:
            raise ValueError(f"tube_radius ({tube_radius!r} m) must exceed wire_radius ({wire_radius!r} m)")
        self.origin = _validate.vector(origin, "origin")
        self.axis = _validate.unit(axis, "axis")
        self.length = None if length is None else _validate.positive(length, "length")
        self._log = math.log(self.tube_radius / self.wire_radius)

    def _radial(self, pts):
        d = pts - self.origin
        rvec = d - np.outer(d @ self.axis, self.axis)
        return rvec, np.sqrt(np.einsum("ij,ij->i", rvec, rvec))

    def _field(self, pts):
        rvec, r = self._radial(pts)
        inside = (r >= self.wire_radius) & (r <= self.tube_radius)
        with np.errstate(divide="ignore", invalid="ignore"):
            scale = np.where(inside, self.voltage / (self._log * r * r), 0.0)
        return rvec * scale[:, None]

    def _potential(self, pts):
        _, r = self._radial(pts)
        rr = np.clip(r, self.wire_radius, self.tube_radius)
        return self.voltage * np.log(self.tube_radius / rr) / self._log

    def peak_field(self):
        """Field at the wire surface, V/(a ln(b/a)), V/m."""
        return abs(self.voltage) / (self.wire_radius * self._log)

    @property
    def corona_wire_radius(self):
        """The wire is a corona discharge electrode: its radius, m."""
        return self.wire_radius

    def gap_field(self):
        """Voltage over the wire-to-tube distance, |V|/b, V/m (the mean field of the gap)."""
        return abs(self.voltage) / self.tube_radius

    def line_charge(self, eps_r=1.0):
        """Free charge per length on the wire, 2 pi eps0 eps_r V/ln(b/a), C/m."""
        return _TWO_PI_EPS0 * float(eps_r) * self.voltage / self._log

    def _geometry(self):
        params = {"voltage": self.voltage, "wire_radius": self.wire_radius, "tube_radius": self.tube_radius,
                  "origin": self.origin.tolist(), "axis": self.axis.tolist(), "length": self.length}
        outlines = []
        for r in (self.wire_radius, self.tube_radius):
            o = {"shape": "cylinder", "point": self.origin.tolist(), "axis": self.axis.tolist(), "radius": r}
            if self.length is not None:
                o["length"] = self.length
            outlines.append(o)
        return params, outlines


@numba.njit(cache=True)
def _wire_plate_point(xi, yi, y_first, spacing, lam, beta, s, a, voltage, period, xi_cut, need_pot):
    """(E_x, E_y, phi) at one point, without the factor 1/(4 pi eps0).

    x is measured from the centre plane, y from the first wire; wire j sits at
    y_first + j spacing with line charge lam[j]. With period > 0 the row is
    infinite: y is folded into one period and the wires are the copies kept by
    the tolerance. Only wires within beta |dy| <= xi_cut are visited.
    """
    if abs(xi) > s:
        return 0.0, 0.0, 0.0
    if period > 0.0:
        yi -= period * np.floor(yi / period + 0.5)
    nw = lam.shape[0]
    reach = xi_cut / beta
    j0 = max(0, int(math.ceil((yi - reach - y_first) / spacing)))
    j1 = min(nw - 1, int(math.floor((yi + reach - y_first) / spacing)))
    bx = beta * xi
    cx = math.cos(bx)
    sx = math.sin(bx)
    hs = math.sin(0.5 * bx)
    hs2 = hs * hs
    a2 = a * a
    phi = 0.0
    ex = 0.0
    ey = 0.0
    for j in range(j0, j1 + 1):
        dy = yi - (y_first + j * spacing)
        if xi * xi + dy * dy < a2:
            return 0.0, 0.0, voltage  # inside a wire: its potential, no field
        # cosh and sinh of xi/2 from one expm1, without cancellation near the wire
        e1 = math.expm1(0.5 * beta * dy)
        eh = 1.0 + e1
        sh2 = 0.5 * e1 * (e1 + 2.0) / eh
        ch2 = 0.5 * (eh + 1.0 / eh)
        # D = cosh(xi) - cos(bx), N = cosh(xi) + cos(bx)
        d = 2.0 * (sh2 * sh2 + hs2)
        n = 2.0 * (ch2 * ch2 - hs2)
        if need_pot:
            phi += lam[j] * math.log1p(2.0 * cx / d)
        ex += lam[j] * beta * sx * (1.0 / n + 1.0 / d)
        ey -= lam[j] * beta * (2.0 * sh2 * ch2) * (1.0 / n - 1.0 / d)
    return ex, ey, phi


@numba.njit(cache=True)
def _wire_plate_serial(x, y, y_first, spacing, lam, beta, s, a, voltage, period, xi_cut, need_pot, fx, fy, pot):
    for i in range(x.shape[0]):
        fx[i], fy[i], pot[i] = _wire_plate_point(x[i], y[i], y_first, spacing, lam, beta, s, a, voltage, period,
                                                 xi_cut, need_pot)


@numba.njit(cache=True, parallel=True)
def _wire_plate_parallel(x, y, y_first, spacing, lam, beta, s, a, voltage, period, xi_cut, need_pot, fx, fy, pot):
    for i in numba.prange(x.shape[0]):
        fx[i], fy[i], pot[i] = _wire_plate_point(x[i], y[i], y_first, spacing, lam, beta, s, a, voltage, period,
                                                 xi_cut, need_pot)


#: Below this many points the serial loop wins (starting threads costs more).
PARALLEL_THRESHOLD = 4000


class WirePlateChannel(FieldSource):
    """A row of wires at voltage V midway between two grounded plates.

    Frame: plates normal to x at ``origin[0] +- plate_distance``; wires
    parallel to z; the row runs along y (the gas-flow direction of a plate
    precipitator) from ``origin[1]`` in steps of ``wire_spacing``. Points
    outside the plates see no field (the plates shield them); points inside a
    wire see the wire's potential and no field.

    The charge per length of each wire is chosen so that the wire's surface
    (its mean potential around the circumference, exact for a thin wire)
    sits at V; for a finite row the end wires carry more charge than the
    inner ones, found from the small linear system of the wires.

    Parameters
    ----------
    voltage : float
        Wire potential, V (the plates are grounded).
    wire_radius : float
        a, m (> 0, below the plate distance and half the spacing).
    plate_distance : float
        Wire-to-plate distance s, m (> 0): the plates are 2 s apart.
    wire_spacing : float
        Distance between neighbouring wires along y, m (> 2 a).
    n_wires : int
        Number of wires in the row (ignored when ``periodic``).
    origin : array_like of 3 floats
        (x of the centre plane, y of the first wire, z unused), m.
    periodic : bool
        An infinite row with a wire at origin[1] + k spacing for every integer k.
    tol : float
        Relative truncation tolerance of the sum over the row: wires whose
        contribution falls below it (about 2 exp(-pi |dy|/(2 s))) are left out.
    length : float, optional
        Wire length along z, m, for outlines only.
    name : str
        Name.
    """

    def __init__(self, voltage, wire_radius, plate_distance, wire_spacing, n_wires=1, origin=(0.0, 0.0, 0.0),
                 periodic=False, tol=1e-12, length=None, name="wire-plate channel"):
        self.name = str(name)
        self.voltage = _validate.finite(voltage, "voltage")
        self.wire_radius = a = _validate.positive(wire_radius, "wire_radius")
        self.plate_distance = s = _validate.positive(plate_distance, "plate_distance")
        self.wire_spacing = sp = _validate.positive(wire_spacing, "wire_spacing")
        self.periodic = bool(periodic)
        self.tol = _validate.positive(tol, "tol")
        if not self.tol < 1:
            raise ValueError(f"tol must be below 1, got {tol!r}")
        try:
            nw = int(n_wires)
        except (TypeError, ValueError):
            raise ValueError(f"n_wires must be a positive integer, got {n_wires!r}") from None
        if nw < 1 or nw != n_wires:
            raise ValueError(f"n_wires must be a positive integer, got {n_wires!r}")
        self.n_wires = 1 if self.periodic else nw
        if a >= s:
            raise ValueError(f"wire_radius ({a} m) must be below plate_distance ({s} m)")
        if (self.n_wires > 1 or self.periodic) and 2 * a >= sp:
            raise ValueError(f"wire_spacing ({sp} m) must exceed the wire diameter ({2 * a} m)")
        self.origin = _validate.vector(origin, "origin")
        self.length = None if length is None else _validate.positive(length, "length")
        self.beta = beta = math.pi / (2.0 * s)
        # a wire beta |dy| away adds about 2 exp(-beta |dy|) of its own potential
        # (and of the mean field): wires beyond ln(2/tol) are left out
        self._xi_cut = max(1.0, math.log(2.0 / self.tol))
        self_term = math.log(2.0 / (beta * a))  # = ln(4 s/(pi a)), times 1/(2 pi eps0)
        if self.periodic:
            # copies of the one wire within the tolerance: a wire k periods away adds
            # about 2 exp(-beta k sp) of the wire's own potential
            k = int(math.ceil((math.log(2.0 / self.tol) / (beta * sp)))) + 1
            self._wire_y = sp * np.arange(-k, k + 1, dtype=np.float64)
            ks = np.arange(1, k + 1, dtype=np.float64)
            mutual = 2.0 * np.sum(np.log(1.0 / np.tanh(0.5 * beta * sp * ks)))
            lam = np.array([self.voltage / (self_term + mutual)])
            self._lam = np.full(self._wire_y.shape[0], lam[0]) * _TWO_PI_EPS0
            self._line_charge = lam * _TWO_PI_EPS0
        else:
            self._wire_y = sp * np.arange(nw, dtype=np.float64)
            dy = np.abs(self._wire_y[:, None] - self._wire_y[None, :])  # n_wires^2: a handful of wires
            with np.errstate(divide="ignore"):
                p = np.log(1.0 / np.tanh(0.5 * beta * np.where(dy > 0, dy, 1.0)))
            np.fill_diagonal(p, self_term)
            lam = np.linalg.solve(p, np.full(nw, self.voltage))
            self._lam = lam * _TWO_PI_EPS0
            self._line_charge = self._lam.copy()
        # the kernel sums lam_j/(4 pi eps0) ln(N/D): keep lam in C/m and scale there
        self._scale = 1.0 / (4.0 * math.pi * EPSILON_0)
        self._peak = None

    @property
    def wire_y(self):
        """y coordinates of the wires, m (one period for a periodic row)."""
        y0 = self.origin[1]
        return y0 + (np.array([0.0]) if self.periodic else self._wire_y)

    def line_charge(self, eps_r=1.0):
        """Free charge per length on each wire, C/m (it scales with the medium's eps_r)."""
        return self._line_charge * float(eps_r)

    @property
    def mean_field(self):
        """Voltage over wire-to-plate distance, V/m (the usual design figure)."""
        return abs(self.voltage) / self.plate_distance

    @property
    def corona_wire_radius(self):
        """The wires are corona discharge electrodes: their radius, m."""
        return self.wire_radius

    def gap_field(self):
        """Mean field of the wire-to-plate gap, |V|/s, V/m (the same as :attr:`mean_field`)."""
        return self.mean_field

    def _eval(self, pts, need_pot=True):
        x = np.ascontiguousarray(pts[:, 0] - self.origin[0])
        y = np.ascontiguousarray(pts[:, 1] - self.origin[1])
        m = pts.shape[0]
        fx, fy, pot = np.empty(m), np.empty(m), np.empty(m)
        kernel = _wire_plate_parallel if m >= PARALLEL_THRESHOLD else _wire_plate_serial
        kernel(x, y, float(self._wire_y[0]), self.wire_spacing, self._lam, self.beta, self.plate_distance,
               self.wire_radius, self.voltage / self._scale, self.wire_spacing if self.periodic else 0.0,
               self._xi_cut, need_pot, fx, fy, pot)
        return fx * self._scale, fy * self._scale, pot * self._scale

    def _field(self, pts):
        fx, fy, _ = self._eval(pts, need_pot=False)
        out = np.zeros_like(pts)
        out[:, 0] = fx
        out[:, 1] = fy
        return out

    def _potential(self, pts):
        return self._eval(pts)[2]

    def field_and_potential(self, points):
        """Field (V/m, (M, 3)) and potential (V, (M,)) from one pass."""
        pts = _checks.as_points(points, "points")
        fx, fy, pot = self._eval(pts)
        out = np.zeros_like(pts)
        out[:, 0] = fx
        out[:, 1] = fy
        return out, pot

    def peak_field(self):
        """Highest field on the wire surfaces (sampled at 256 angles per wire), V/m."""
        if self._peak is None:
            t = np.linspace(0.0, 2.0 * math.pi, 256, endpoint=False)
            r = self.wire_radius * (1.0 + 1e-9)  # just outside the wire
            pts = []
            for yw in self.wire_y:
                pts.append(np.column_stack([self.origin[0] + r * np.cos(t), yw + r * np.sin(t), np.zeros_like(t)]))
            e = self._field(np.ascontiguousarray(np.vstack(pts)))
            self._peak = float(np.sqrt(np.einsum("ij,ij->i", e, e)).max())
        return self._peak

    def _geometry(self):
        s, x0 = self.plate_distance, self.origin[0]
        yw = self.wire_y
        params = {"voltage": self.voltage, "wire_radius": self.wire_radius, "plate_distance": s,
                  "wire_spacing": self.wire_spacing, "n_wires": self.n_wires, "periodic": self.periodic,
                  "origin": self.origin.tolist(), "line_charge": self._line_charge.tolist(), "length": self.length}
        outlines = []
        y_lo, y_hi = yw[0] - 0.5 * self.wire_spacing, yw[-1] + 0.5 * self.wire_spacing
        for xp in (x0 - s, x0 + s):
            if self.periodic:
                outlines.append({"shape": "plane", "point": [xp, 0.0, 0.0], "normal": [1.0, 0.0, 0.0]})
            else:
                zl = 0.5 * (self.length or 0.0)
                outlines.append({"shape": "box", "low": [xp, y_lo, self.origin[2] - zl],
                                 "high": [xp, y_hi, self.origin[2] + zl]})
        for y in yw:
            o = {"shape": "cylinder", "point": [x0, float(y), float(self.origin[2])], "axis": [0.0, 0.0, 1.0],
                 "radius": self.wire_radius}
            if self.length is not None:
                o["length"] = self.length
            outlines.append(o)
        return params, outlines
