"""Time integrators of particle motion with linear (Stokes) drag.

Each particle obeys

    dx/dt = v,    dv/dt = a(x) + beta (u(x) - v),

with a = q E/m + g the acceleration of the non-drag forces, u the gas velocity
and beta = 1/tau the drag rate (0 in vacuum or with drag off).

The contract (like scipy's ODE solver base): :class:`Integrator` checks the
inputs once, keeps the counters, and calls the scheme's two halves, which a
concrete class fills in:

``_first(x, v, a, u, beta, dt, codes, f0)``
    moves positions to t + dt and velocities to a provisional value, using the
    forces at t (``f0``: per-particle scratch of ``SCRATCH_COLUMNS``, kept for
    the second half and carried by the run loop from step to step);
``_second(v, a1, u1, beta, dt, codes, f0, err)``
    completes velocities with the forces at the new positions and writes the
    local error estimate ``err`` (m) used by :class:`StepControl`.

Between the halves the run loop applies boundaries, collectors, new particles
and the force evaluation. Each particle carries an integer ``code`` naming its
scheme; a scheme only touches particles with its own code, and new particles
(code -1) skip the second half. :class:`AutoIntegrator` assigns codes per
particle from beta dt.

Error criterion (documented, used for adaptive steps): the local position
error of a step is estimated as ``err_i = dt^2 phi2(beta_i dt) |f_i(t+dt) -
f_i(t)|``, with f = a + beta u the driving acceleration and
phi2(h) = (h - 1 + e^-h)/h^2 (1/2 without drag: the classical Verlet estimate
dt^2/2 |a(t+dt) - a(t)|; about dt tau |df| for strongly damped particles: the
displacement error from the change of terminal velocity over the step).
:class:`StepControl` keeps max_i err_i near its ``tolerance``.
"""
import math

import numba
import numpy as np

from .._numba import serial_and_parallel

#: Code of particles emitted during the step (no second half yet).
FRESH = -1


@numba.njit(inline="always")
def _phi(h):
    """e^-h, phi1 = (1 - e^-h)/h and phi2 = (h - 1 + e^-h)/h^2, stable for h -> 0."""
    if h < 1e-3:
        e = 1.0 - h + 0.5 * h * h - h * h * h / 6.0
        p1 = 1.0 - 0.5 * h + h * h / 6.0 - h * h * h / 24.0
        p2 = 0.5 - h / 6.0 + h * h / 24.0 - h * h * h / 120.0
    else:
        em1 = math.expm1(-h)
        e = em1 + 1.0
        p1 = -em1 / h
        p2 = (h + em1) / (h * h)
    return e, p1, p2


def _exp_first_py(x, v, a, u, beta, dt, codes, code, f0):
    for i in numba.prange(x.shape[0]):
        if codes[i] != code:
            continue
        h = beta[i] * dt
        if f0[i, 3] == h and f0[i, 4] > 0.0:
            # the coefficients of an earlier step with the same h (new rows
            # have zeros, never valid: e^-h > 0 unless it underflows, and
            # then they are recomputed); measured on the 2-core reference
            # machine at N = 1e5: 2.3 ms for this half against 7.1 ms with
            # _phi every step
            e, p1, p2 = f0[i, 4], f0[i, 5], f0[i, 6]
        else:
            e, p1, p2 = _phi(h)
            f0[i, 3] = h
            f0[i, 4] = e
            f0[i, 5] = p1
            f0[i, 6] = p2
        for k in range(3):
            f = a[i, k] + beta[i] * u[i, k]
            f0[i, k] = f
            x[i, k] += dt * p1 * v[i, k] + dt * dt * p2 * f
            v[i, k] = e * v[i, k] + dt * p1 * f


def _exp_second_py(v, a, u, beta, dt, codes, code, f0, err):
    for i in numba.prange(v.shape[0]):
        if codes[i] != code:
            continue
        p2 = f0[i, 6]  # from the first half (recomputing it here: 4.0 ms against 0.9 ms at N = 1e5)
        s = 0.0
        for k in range(3):
            df = a[i, k] + beta[i] * u[i, k] - f0[i, k]
            v[i, k] += dt * p2 * df
            s += df * df
        err[i] = dt * dt * p2 * math.sqrt(s)


def _vv_first_py(x, v, a, u, beta, dt, codes, code, f0):
    for i in numba.prange(x.shape[0]):
        if codes[i] != code:
            continue
        for k in range(3):
            f = a[i, k] + beta[i] * (u[i, k] - v[i, k])
            f0[i, k] = f
            v[i, k] += 0.5 * dt * f
            x[i, k] += dt * v[i, k]


def _vv_second_py(v, a, u, beta, dt, codes, code, f0, err):
    for i in numba.prange(v.shape[0]):
        if codes[i] != code:
            continue
        s = 0.0
        for k in range(3):
            f = a[i, k] + beta[i] * (u[i, k] - v[i, k])
            v[i, k] += 0.5 * dt * f
            df = f - f0[i, k]
            s += df * df
        err[i] = 0.5 * dt * dt * math.sqrt(s)


#: Columns of the per-particle scratch ``f0`` of the schemes: the driving
#: acceleration at t (0-2); drag-exact keeps h = beta dt and its e^-h, phi1,
#: phi2 (3-6), valid while h stays the same.
SCRATCH_COLUMNS = 7

#: Particles from which the kernels run in parallel threads: below, the cost of
#: waking threads (large on a shared, loaded machine) exceeds the work.
PARALLEL_MIN = 20000


# serial and parallel compilations of each kernel; each particle's update is
# the same in both
_KERNELS = {name: serial_and_parallel(fn) for name, fn in (("exp_first", _exp_first_py), ("exp_second", _exp_second_py),
                                              ("vv_first", _vv_first_py), ("vv_second", _vv_second_py))}


def _kernel(name, n):
    return _KERNELS[name][1 if n >= PARALLEL_MIN else 0]


def _check_arrays(x, v, a, u, beta, codes):
    n = x.shape[0]
    for name, arr in (("positions", x), ("velocities", v), ("accelerations", a), ("gas_velocity", u)):
        if arr.shape != (n, 3) or arr.dtype != np.float64 or not arr.flags.c_contiguous:
            raise ValueError(f"{name} must be a C-contiguous float64 array of shape ({n}, 3)")
    if beta.shape != (n,) or codes.shape != (n,):
        raise ValueError(f"beta and codes must have shape ({n},)")


class Integrator:
    """Base contract of the integrators (see the module docstring).

    Attributes
    ----------
    name : str
        Scheme name as used in options and logs.
    n_steps : int
        First halves taken (steps).
    n_particle_steps : int
        Particle steps taken (sum over steps of the particles moved).
    """

    name = "base"
    #: Code of the particles this scheme moves.
    code = -2

    def __init__(self):
        self.n_steps = 0
        self.n_particle_steps = 0

    # -- to be filled by each scheme ----------------------------------------
    def stable_step(self, beta):
        """Largest stable step for drag rates ``beta`` (1/s), s (inf: any)."""
        return np.full(np.shape(beta), np.inf)

    def _first(self, x, v, a, u, beta, dt, codes, f0):
        raise NotImplementedError

    def _second(self, v, a, u, beta, dt, codes, f0, err):
        raise NotImplementedError

    # -- the door: checks once, counters -------------------------------------
    def schemes(self):
        """The concrete schemes used (one, or several for a per-particle choice)."""
        return (self,)

    def assign(self, beta, dt, ids=None, *, refuse_unstable=True):
        """Scheme code per particle for step ``dt`` (s), checking stability.

        Raises
        ------
        ValueError
            When ``dt`` exceeds the scheme's stability limit for a particle
            (naming the particle and the limit).
        """
        beta = np.asarray(beta, dtype=np.float64)
        if refuse_unstable:
            limit = self.stable_step(beta)
            bad = np.flatnonzero(dt > limit)
            if bad.size:
                i = int(bad[0])
                who = f"particle id {int(ids[i])}" if ids is not None else f"particle index {i}"
                raise ValueError(
                    f"dt = {dt:.3e} s exceeds the {self.name} stability limit {limit[i]:.3e} s "
                    f"(2 tau, tau = {1.0 / beta[i]:.3e} s) for {who}; use integrator='auto' or 'drag-exact', "
                    f"or a step <= {limit[i]:.3e} s")
        return np.full(beta.shape, self.code, dtype=np.int8)

    def first_half(self, x, v, a, u, beta, dt, codes, f0):
        """Move positions and provisional velocities over ``dt`` (s), in place.

        Parameters
        ----------
        x, v : ndarray (n, 3)
            Positions (m) and velocities (m/s), updated in place.
        a : ndarray (n, 3)
            Non-drag acceleration at t, m/s^2.
        u : ndarray (n, 3)
            Gas velocity at the particles at t, m/s.
        beta : ndarray (n,)
            Drag rate 1/tau, 1/s (0: no drag).
        dt : float
            Step, s (> 0).
        codes : ndarray of int8 (n,)
            Scheme code of each particle (from :meth:`assign`).
        f0 : ndarray (n, SCRATCH_COLUMNS)
            Per-particle scratch of the schemes: the driving acceleration at
            t for the second half, and coefficients a scheme may keep from
            step to step. The run loop carries it with the particles (zeros
            for new ones).
        """
        _check_arrays(x, v, a, u, beta, codes)
        if not (dt > 0 and math.isfinite(dt)):
            raise ValueError(f"dt must be a finite positive step in s, got {dt!r}")
        for s in self._present(codes):
            s._first(x, v, a, u, beta, float(dt), codes, f0)
        self.n_steps += 1
        self.n_particle_steps += int(x.shape[0])

    def second_half(self, v, a, u, beta, dt, codes, f0, err):
        """Complete velocities with the forces at the new positions, in place;
        write the local error estimate ``err`` (m, (n,); 0 for fresh particles)."""
        err[:] = 0.0
        for s in self._present(codes):
            s._second(v, a, u, beta, float(dt), codes, f0, err)

    def _present(self, codes):
        """The schemes some particle uses: a pass of a scheme's kernel that
        skips every particle took 0.12 ms at N = 1e5, the test 0.02 ms
        (measured on the 2-core reference machine)."""
        schemes = self.schemes()
        if len(schemes) == 1:
            return schemes
        return [s for s in schemes if (codes == s.code).any()]

    def counters(self):
        return {"n_steps": self.n_steps, "n_particle_steps": self.n_particle_steps}

    def set_counters(self, d):
        self.n_steps = int(d["n_steps"])
        self.n_particle_steps = int(d["n_particle_steps"])


class VelocityVerlet(Integrator):
    """Velocity Verlet (kick-drift-kick), drag as an explicit force.

    Second order and symplectic without drag: the scheme for charged clouds in
    vacuum and ion optics. With drag its step must stay below 2 tau (beyond,
    the velocity update overshoots and changes sign): :meth:`assign` refuses
    such steps.
    """

    name = "verlet"
    code = 0

    def stable_step(self, beta):
        beta = np.asarray(beta, dtype=np.float64)
        with np.errstate(divide="ignore"):
            return np.where(beta > 0, 2.0 / np.where(beta > 0, beta, 1.0), np.inf)

    def _first(self, x, v, a, u, beta, dt, codes, f0):
        _kernel("vv_first", x.shape[0])(x, v, a, u, beta, dt, codes, self.code, f0)

    def _second(self, v, a, u, beta, dt, codes, f0, err):
        _kernel("vv_second", v.shape[0])(v, a, u, beta, dt, codes, self.code, f0, err)


class DragExact(Integrator):
    """Exponential integrator: the linear drag term integrated exactly.

    With f = a + beta u held over the step, x and v follow the exact solution
    of dv/dt = f - beta v:

        x1 = x0 + dt phi1(h) v0 + dt^2 phi2(h) f0,
        v1 = e^-h v0 + dt phi1(h) f0 + dt phi2(h) (f1 - f0),   h = beta dt,

    where the last term (applied once the forces f1 at the new positions are
    known) makes the velocity exact for f varying linearly over the step. Stable
    for any step: for dt >> tau the velocity is the terminal velocity
    u + tau a at the new position. Without drag (h = 0) it is velocity Verlet.
    """

    name = "drag-exact"
    code = 1

    def _first(self, x, v, a, u, beta, dt, codes, f0):
        _kernel("exp_first", x.shape[0])(x, v, a, u, beta, dt, codes, self.code, f0)

    def _second(self, v, a, u, beta, dt, codes, f0, err):
        _kernel("exp_second", v.shape[0])(v, a, u, beta, dt, codes, self.code, f0, err)


class AutoIntegrator(Integrator):
    """Per-particle choice: drag-exact where beta dt > ``ratio``, Verlet elsewhere.

    Parameters
    ----------
    ratio : float
        Threshold on dt/tau, 1 (> 0, <= 2: Verlet is never used beyond its
        stability limit).
    """

    name = "auto"

    def __init__(self, ratio=0.1):
        super().__init__()
        ratio = float(ratio)
        if not (0 < ratio <= 2.0):
            raise ValueError(f"ratio must be in (0, 2], got {ratio!r}")
        self.ratio = ratio
        self._verlet = VelocityVerlet()
        self._exact = DragExact()

    def schemes(self):
        return (self._verlet, self._exact)

    def assign(self, beta, dt, ids=None, *, refuse_unstable=True):
        beta = np.asarray(beta, dtype=np.float64)
        return np.where(beta * dt > self.ratio, DragExact.code, VelocityVerlet.code).astype(np.int8)


_BY_NAME = {"verlet": VelocityVerlet, "drag-exact": DragExact, "auto": AutoIntegrator}


def make_integrator(spec):
    """An integrator from a name ("auto", "verlet", "drag-exact") or instance."""
    if isinstance(spec, Integrator):
        return spec
    if spec not in _BY_NAME:
        raise ValueError(f"integrator must be one of {sorted(_BY_NAME)} or an Integrator, got {spec!r}")
    return _BY_NAME[spec]()


class StepControl:
    """Adaptive step size from the local error estimate of the integrators.

    After each step the largest estimated position error e = max_i err_i (m,
    see the module docstring) sets the next step,
    dt_next = dt * clip(safety * (tolerance/e)^(1/3), 1/grow, grow), bounded by
    [dt_min, dt_max] (the exponent 1/3 because the estimate scales as dt^3 for
    smooth forces). Steps are not rejected: the estimate of one step sets the
    next, which keeps runs reproducible and resumable.

    Parameters
    ----------
    tolerance : float
        Target local position error per step, m (> 0).
    dt_min, dt_max : float
        Bounds of the step, s (0 < dt_min <= dt_max).
    safety : float
        Factor below 1 keeping the error under the tolerance, 1.
    grow : float
        Largest change of the step between steps, 1 (> 1).
    """

    def __init__(self, tolerance, dt_min, dt_max, safety=0.9, grow=2.0):
        vals = {"tolerance": tolerance, "dt_min": dt_min, "dt_max": dt_max, "safety": safety, "grow": grow}
        for k, val in vals.items():
            try:
                f = float(val)
            except (TypeError, ValueError):
                raise ValueError(f"{k} must be a positive number, got {val!r}") from None
            if not (math.isfinite(f) and f > 0):
                raise ValueError(f"{k} must be a finite positive number, got {val!r}")
            vals[k] = f
        if vals["dt_min"] > vals["dt_max"]:
            raise ValueError(f"dt_min must be <= dt_max, got {dt_min!r} > {dt_max!r}")
        if not vals["safety"] <= 1.0:
            raise ValueError(f"safety must be <= 1, got {safety!r}")
        if not vals["grow"] > 1.0:
            raise ValueError(f"grow must be > 1, got {grow!r}")
        self.tolerance = vals["tolerance"]
        self.dt_min = vals["dt_min"]
        self.dt_max = vals["dt_max"]
        self.safety = vals["safety"]
        self.grow = vals["grow"]

    def next_dt(self, dt, error):
        """The next step, s, from this step ``dt`` (s) and its error (m)."""
        if error > 0:
            factor = self.safety * (self.tolerance / error) ** (1.0 / 3.0)
            factor = min(self.grow, max(1.0 / self.grow, factor))
        else:
            factor = self.grow
        return min(self.dt_max, max(self.dt_min, dt * factor))

    def describe(self):
        return {"tolerance": self.tolerance, "dt_min": self.dt_min, "dt_max": self.dt_max,
                "safety": self.safety, "grow": self.grow}
