"""The run loop: a :class:`System` (what is simulated) and a :class:`Simulation`
(how it is stepped, recorded and checkpointed).

One step, of length dt, from t to t + dt:

1. turbulent mixing as an eddy diffusivity: a position random walk
   mirrored at collectors (mixing brings particles to the wall region, the
   drift through the laminar sublayer deposits them, as Deutsch assumed);
2. integrate, first half: positions to t + dt with the forces at t
   (velocities provisional), plus Brownian motion (a random walk that may
   deposit);
3. boundaries and collectors: the earliest contact along each particle's
   segment is a deposit (collector) or an escape (open face); survivors are
   reflected or wrapped; dead rows are dropped;
4. inlets emit new particles;
5. forces: the field at all particles (space charge, sources, images);
6. charging in the charging zones (Rayleigh capping of droplets);
7. integrate, second half: velocities completed with the forces at t + dt;
8. recorder: deposits, escapes, frames, diagnostics, checkpoints at their
   cadences.

The field of step 5 is kept (and checkpointed) as the force of the next step's
first half, so one field evaluation is made per step. Within the step the
space charge uses the charges before the step's charging update.
"""
import json
import math
from time import monotonic as _monotonic

import numba
import numpy as np

from .boundaries import Collector, Domain, earliest_events
from .forces import Coulomb, FieldModel
from .inlets import Inlet, Population
from .integrators import FRESH, PARALLEL_MIN, SCRATCH_COLUMNS, StepControl, make_integrator
from .medium import Medium
from .recorder import EVENT_FIELDS, join_records
from .state import ParticleState, sphere_mass
from .zones import ChargingZone
from .._numba import serial_and_parallel
from .._validate import vector as _vector

_DEFAULT = object()

#: Diagnostics written each ``diagnostics_every`` steps: name -> SI unit.
DIAGNOSTICS = {
    "n_alive": "1",
    "n_emitted": "1",
    "n_deposited": "1",
    "n_escaped": "1",
    "dt": "s",
    "error_estimate": "m",
    "collection_efficiency": "1",
    "total_charge": "C",
    "kinetic_energy": "J",
    "coulomb_energy": "J",
    "applied_energy": "J",
}

#: Name and version of the checkpoint dict layout.
CHECKPOINT_FORMAT = ("chargesim.motion.checkpoint", 1)


class System:
    """Everything that is simulated.

    Parameters
    ----------
    rng : numpy.random.Generator
        The one source of randomness (inlets, Brownian motion, mixing).
    particles : ParticleState, optional
        Particles present at t = 0 (their mass counts as emitted).
    populations : sequence of Population
        Populations; those of the inlets are added if missing. The index in
        this list is the particles' ``population`` value.
    medium : Medium, optional
        Gas (default: air at 293.15 K, 101325 Pa, still, eps_r = 1).
    sources : sequence
        Applied field sources (``field(points)``, V/m), summed.
    images : sequence
        Image providers of grounded conductors (``images(positions, charges)``).
    domain : Domain, optional
        Box and per-axis boundary kinds (default: unbounded, open).
    collectors : sequence of Collector
        Absorbing surfaces (names unique, distinct from the outlet names).
    inlets : sequence of Inlet
        Particle sources.
    gravity : array_like of 3 floats
        Acceleration of gravity, m/s^2 (default none; e.g. (0, 0, -9.80665)).
    coulomb : Coulomb or None
        Space charge evaluation (default ``Coulomb()``: method "auto",
        particle radii); None switches it off.
    brownian : bool
        Brownian motion of the particles (D = k T B), as a position random walk.
    eddy_diffusivity : float or array_like of 3 floats
        Turbulent (eddy) diffusivity per axis, m^2/s (>= 0), as a position
        random walk that does not itself deposit (see the module docstring).
    charging : sequence of ChargingZone
        Regions with ions where particles charge each step.
    drag : bool
        Stokes drag with slip (off: vacuum).
    """

    def __init__(self, rng, *, particles=None, populations=(), medium=None, sources=(), images=(), domain=None,
                 collectors=(), inlets=(), gravity=(0.0, 0.0, 0.0), coulomb=_DEFAULT, brownian=False,
                 eddy_diffusivity=0.0, charging=(), drag=True):
        if not isinstance(rng, np.random.Generator):
            raise ValueError("rng must be a numpy.random.Generator (seeded), e.g. numpy.random.default_rng(seed)")
        self.rng = rng
        if particles is None:
            particles = ParticleState()
        if not isinstance(particles, ParticleState):
            raise ValueError("particles must be a ParticleState or None")
        self.state = particles
        self.medium = Medium() if medium is None else medium
        if not isinstance(self.medium, Medium):
            raise ValueError("medium must be a Medium")
        self.domain = Domain() if domain is None else domain
        if not isinstance(self.domain, Domain):
            raise ValueError("domain must be a Domain")
        self.collectors = list(collectors)
        for i, c in enumerate(self.collectors):
            if not isinstance(c, Collector):
                raise ValueError(f"collectors[{i}] must be a PlaneCollector, CylinderCollector or SphereCollector")
        names = [c.name for c in self.collectors] + [o[2] for o in self.domain.outlets]
        dup = sorted({x for x in names if names.count(x) > 1})
        if dup:
            raise ValueError(f"surface and outlet names must be unique; repeated: {dup}")
        self.inlets = list(inlets)
        for i, inl in enumerate(self.inlets):
            if not isinstance(inl, Inlet):
                raise ValueError(f"inlets[{i}] must be an Inlet")
        self.populations = list(populations)
        for i, p in enumerate(self.populations):
            if not isinstance(p, Population):
                raise ValueError(f"populations[{i}] must be a Population")
        for inl in self.inlets:
            if not any(inl.population is p for p in self.populations):
                self.populations.append(inl.population)
        pnames = [p.name for p in self.populations]
        dup = sorted({x for x in pnames if pnames.count(x) > 1})
        if dup:
            raise ValueError(f"population names must be unique; repeated: {dup}")
        if self.state.n and self.state.population.max() >= max(len(self.populations), 1):
            raise ValueError("particles.population refers to a population index not in populations")
        self.gravity = _vector(gravity, "gravity")
        if coulomb is _DEFAULT:
            coulomb = Coulomb()
        self.field_model = FieldModel(coulomb, sources, images, self.medium.eps_r)
        self.brownian = bool(brownian)
        ed = np.asarray(eddy_diffusivity, dtype=np.float64).reshape(-1)
        if ed.size == 1:
            ed = np.full(3, float(ed[0]))
        if ed.shape != (3,) or not np.all(np.isfinite(ed)) or np.any(ed < 0):
            raise ValueError(f"eddy_diffusivity must be >= 0 (one value or three, m^2/s), got {eddy_diffusivity!r}")
        self.eddy_diffusivity = ed
        self.charging = list(charging)
        for i, z in enumerate(self.charging):
            if not isinstance(z, ChargingZone):
                raise ValueError(f"charging[{i}] must be a ChargingZone")
        self.drag = bool(drag)
        # surface tension per population (inf: solid, no Rayleigh cap)
        self._sigma = np.array([np.inf if p.surface_tension is None else p.surface_tension
                                for p in self.populations] or [np.inf])

    @property
    def coulomb(self):
        return self.field_model.coulomb

    def population_index(self, population):
        for i, p in enumerate(self.populations):
            if p is population:
                return i
        raise ValueError("population not in this system")

    def surface_names(self):
        """Collector names, then outlet names (the event ``surface`` values)."""
        return [c.name for c in self.collectors] + [o[2] for o in self.domain.outlets]


@numba.njit(cache=True)
def _particle_sums(v, w, d, rho, q, pot):
    """In one pass: the kinetic energy sum_i w_i m_i |v_i|^2 / 2 with
    m_i = (pi/6) d_i^3 rho_i, the charge sum_i w_i q_i, and the applied
    energy sum_i w_i q_i pot_i (0 when ``pot`` is empty). numpy's einsum and
    products took 1.3 ms at N = 1e5 for the kinetic energy alone, the mass
    array 0.3 ms, the charge products and dot 0.4 ms more, for every
    diagnostics row."""
    e = 0.0
    qt = 0.0
    qp = 0.0
    with_pot = pot.size == w.size
    for i in range(w.size):
        m = (math.pi / 6.0) * d[i] * d[i] * d[i] * rho[i]  # state.sphere_mass, inline
        e += w[i] * m * (v[i, 0] * v[i, 0] + v[i, 1] * v[i, 1] + v[i, 2] * v[i, 2])
        wq = w[i] * q[i]
        qt += wq
        if with_pot:
            qp += wq * pot[i]
    return 0.5 * e, qt, qp


def _accel_py(q, d, rho, e, g, out):
    """The non-drag acceleration (q/m) E + g of each particle, m = (pi/6) d^3
    rho (state.sphere_mass, inline), in one pass instead of numpy's five."""
    for i in numba.prange(q.size):
        qm = q[i] / ((math.pi / 6.0) * d[i] * d[i] * d[i] * rho[i])
        for k in range(3):
            out[i, k] = qm * e[i, k] + g[k]


_ACCEL = serial_and_parallel(_accel_py)

_NO_POTENTIAL = np.zeros(0)


class _NullRecorder:
    def start(self, info): pass
    def frame(self, step, time, state): pass
    def deposits(self, records): pass
    def escapes(self, records): pass
    def diagnostics(self, step, time, values): pass
    def checkpoint(self, snapshot): pass
    def finish(self, summary): pass


class _HeldEvents:
    """Deposit and escape records of a few steps, handed to the recorder in
    one call each: per call the results writer checks and copies every
    column, which at N = 1e5 (a few records a step, no space charge) took
    100 us (deposits) and 50 us (escapes) a call within a run, 40 us alone:
    0.33 s of a 2000-step run of ~18 s (the channel of bench_io.py). Handed
    over after ``Simulation.EVENT_STEPS`` steps or ``Simulation.EVENT_SECONDS``
    of wall time, whichever comes first, and by the loop before each frame,
    diagnostics row and checkpoint, and before ``finish``."""

    def __init__(self, rec):
        self.rec = rec
        self.deposits = []
        self.escapes = []
        self.steps = 0
        self.since = _monotonic()

    def add(self, deposits, escapes):
        if deposits is not None:
            self.deposits.append(deposits)
        if escapes is not None:
            self.escapes.append(escapes)
        self.steps += 1
        if self.steps >= Simulation.EVENT_STEPS or _monotonic() - self.since >= Simulation.EVENT_SECONDS:
            self.hand_over()

    def hand_over(self):
        for batches, call in ((self.deposits, self.rec.deposits), (self.escapes, self.rec.escapes)):
            if batches:
                call(batches[0] if len(batches) == 1 else join_records(batches))
                batches.clear()
        self.steps = 0
        self.since = _monotonic()


class Simulation:
    """Steps a :class:`System`, reports to a recorder, checkpoints and resumes.

    Parameters
    ----------
    system : System
        What is simulated (its state is advanced in place).
    dt : float
        Time step, s (> 0); with ``step_control`` the first step.
    integrator : "auto", "verlet", "drag-exact" or Integrator
        "auto": drag-exact where dt > 0.1 tau, velocity Verlet elsewhere.
        "verlet" refuses a step above its stability limit 2 tau.
    step_control : StepControl, optional
        Adaptive steps from the integrators' error estimate; None: fixed dt.
    frame_every : int
        Steps between particle frames, 0: none (>= 0). With frames on, the
        initial state is a frame too.
    diagnostics_every : int
        Steps between diagnostics rows, 0: none.
    checkpoint_every : int
        Steps between checkpoints handed to ``recorder.checkpoint``, 0: none.
        None at the last step of a :meth:`run` call (``finish`` follows).
    energy_max_n : int
        Largest particle count for which the Coulomb energy enters the
        diagnostics (it costs one more evaluation).

    Notes
    -----
    Between steps and :meth:`run` calls the loop keeps the field at the
    particles and each particle's drag rate (computed once, when it enters:
    diameter, density and the medium do not change during a run). A caller
    who changes particles or the medium in place starts a new Simulation or
    restores a snapshot (:meth:`restore`).

    A recorder gets the deposits and escapes of up to ``EVENT_STEPS`` steps
    (or ``EVENT_SECONDS`` of wall time) in one call each, and all of them
    before each frame, diagnostics row and checkpoint, and before ``finish``.
    """

    #: Most steps whose deposit and escape records the loop gathers before
    #: handing them to the recorder (see :class:`_HeldEvents`).
    EVENT_STEPS = 16
    #: Longest wall-clock time, s, records wait in the loop: a run of slow
    #: steps hands them over about as often as the results writer flushes.
    EVENT_SECONDS = 0.5

    def __init__(self, system, dt, *, integrator="auto", step_control=None, frame_every=0, diagnostics_every=1,
                 checkpoint_every=0, energy_max_n=2000):
        if not isinstance(system, System):
            raise ValueError("system must be a System")
        self.system = system
        try:
            dt = float(dt)
        except (TypeError, ValueError):
            raise ValueError(f"dt must be a positive number of seconds, got {dt!r}") from None
        if not (math.isfinite(dt) and dt > 0):
            raise ValueError(f"dt must be a finite positive step in s, got {dt!r}")
        self.dt = dt
        self.integrator = make_integrator(integrator)
        if step_control is not None and not isinstance(step_control, StepControl):
            raise ValueError("step_control must be a StepControl or None")
        self.step_control = step_control
        for key, val in (("frame_every", frame_every), ("diagnostics_every", diagnostics_every),
                         ("checkpoint_every", checkpoint_every), ("energy_max_n", energy_max_n)):
            if int(val) != val or val < 0:
                raise ValueError(f"{key} must be an integer >= 0, got {val!r}")
        self.frame_every = int(frame_every)
        self.diagnostics_every = int(diagnostics_every)
        self.checkpoint_every = int(checkpoint_every)
        self.energy_max_n = int(energy_max_n)
        self.step = 0
        self.time = 0.0
        self.last_error = 0.0
        surfaces = system.surface_names()
        self._n_collectors = len(system.collectors)
        self.surface_totals = {name: {"count": 0, "mass": 0.0} for name in surfaces}
        st = system.state
        self.counters = {"initial": int(st.n), "emitted": int(st.n), "deposited": 0, "escaped": 0,
                         "rayleigh_capped": 0}
        self.masses = {"emitted": float(np.sum(st.weight * st.mass)), "deposited": 0.0, "escaped": 0.0}
        self._field = None
        self._beta = np.zeros(0)
        self._rated = 0  # leading rows of _beta that hold their particle's drag rate
        self._still = None  # the zero gas velocities of still gas, kept between steps
        self._scratch = np.zeros((0, SCRATCH_COLUMNS))  # the integrator's per-row scratch, kept between steps
        self._started = set()

    # -- kinematics -----------------------------------------------------------
    def _refresh(self, field=None):
        """Field, acceleration, gas velocity and drag rate at the current state."""
        sys_ = self.system
        s = sys_.state
        self._field = sys_.field_model.field(s) if field is None else field
        self._rated = 0  # drag rates of all rows anew
        self._kinematics()

    def _kinematics(self):
        sys_ = self.system
        s = sys_.state
        n = s.n
        if n == 0:
            self._accel = np.zeros((0, 3))
            self._u = np.zeros((0, 3))
            self._beta = np.zeros(0)
            self._rated = 0
            return
        # the compiled acceleration and the still gas's zeros kept: 5.3 -> 2.8 ms
        # at N = 1e5 with drag (measured on the 2-core reference machine)
        self._accel = np.empty((n, 3))
        _ACCEL[n >= PARALLEL_MIN](s.charge, s.diameter, s.density, np.ascontiguousarray(self._field), sys_.gravity,
                                  self._accel)
        if sys_.medium.flow is None and self._still is not None and self._still.shape[0] >= n:
            # still gas: the zeros of an earlier step serve again (nothing
            # writes to them), their first rows when particles left
            self._u = self._still[:n]
        else:
            self._u = np.ascontiguousarray(sys_.medium.gas_velocity(s.position))
            self._still = self._u if sys_.medium.flow is None else None
        if not sys_.drag:
            self._beta = np.zeros(n)
            self._rated = 0
        elif self._rated < n:
            # A particle's drag rate depends on its diameter and density and on
            # the medium, which do not change during a run: it is computed for
            # the rows that have none yet (those emitted this step, at the
            # end), the others' are carried through the compaction (numpy's
            # elementwise arithmetic gives each row the same bits either way).
            # _kinematics at N = 1e5: 2.6 ms with all rows' rates every step,
            # 0.7 ms with the carried ones (measured on the 2-core reference
            # machine).
            k = self._rated
            self._beta = np.concatenate([self._beta[:k], sys_.medium.drag_rate(s.diameter[k:], s.density[k:])])
            self._rated = n

    # -- one step ---------------------------------------------------------------
    def _mixing(self, dt):
        """Turbulent mixing: a position random walk that never deposits."""
        sys_ = self.system
        s = sys_.state
        n = s.n
        if n == 0 or not np.any(sys_.eddy_diffusivity > 0):
            return
        x = s.position
        y = x + np.sqrt(2.0 * sys_.eddy_diffusivity * dt) * sys_.rng.standard_normal((n, 3))
        if sys_.collectors:
            # a displacement that would carry a particle into a collector is
            # mirrored at the surface (which keeps a well-mixed density
            # uniform up to the wall), and dropped if the image overlaps a
            # collector too; deposits come from the deterministic drift
            r = s.radius
            for c in sys_.collectors:
                y = c.mirror(y, r)
            bad = np.zeros(n, dtype=bool)
            for c in sys_.collectors:
                bad |= c.signed_distance(y, r) < 0
            y[bad] = x[bad]
        x[:] = y

    def _brownian(self, dt):
        """Brownian motion: a position random walk with D = k T B (may deposit)."""
        sys_ = self.system
        s = sys_.state
        if s.n == 0 or not sys_.brownian:
            return
        sigma = np.sqrt(2.0 * np.asarray(sys_.medium.diffusivity(s.diameter)) * dt)
        s.position[:] += sigma[:, None] * sys_.rng.standard_normal((s.n, 3))

    def _boundaries(self, x0, dt):
        """Deposits and escapes along x0 -> x; returns (deposit records, escape records)."""
        sys_ = self.system
        s = sys_.state
        x1 = s.position
        best, which, point, fold = earliest_events(sys_.collectors, sys_.domain, x0, x1, s.radius)
        hit = which >= 0
        deposits = escapes = None
        if hit.any():
            names = np.array(sys_.surface_names(), dtype=str)
            for is_dep in (True, False):
                sel = np.flatnonzero(hit & ((which < self._n_collectors) == is_dep))
                if sel.size == 0:
                    continue
                # fancy indexing copies: the records share no memory with the state
                d = s.diameter[sel]
                mass = sphere_mass(d, s.density[sel])  # of these rows only, not the whole state
                rec = {
                    "id": s.id[sel],
                    "time": self.time + best[sel] * dt,
                    "position": point[sel],
                    "velocity": s.velocity[sel],
                    "surface": names[which[sel]],
                    "charge": s.charge[sel],
                    "mass": mass,
                    "diameter": d,
                    "weight": s.weight[sel],
                    "population": s.population[sel],
                }
                real = rec["weight"] * mass
                key = "deposited" if is_dep else "escaped"
                self.counters[key] += int(sel.size)
                self.masses[key] += float(np.sum(real))
                # per-surface totals in surface order (a fixed summation order)
                per_n = np.bincount(which[sel], minlength=names.size)
                per_m = np.bincount(which[sel], weights=real, minlength=names.size)
                for k in np.flatnonzero(per_n):
                    tot = self.surface_totals[str(names[k])]
                    tot["count"] += int(per_n[k])
                    tot["mass"] += float(per_m[k])
                if is_dep:
                    deposits = rec
                else:
                    escapes = rec
            s.alive[hit] = False
        if fold:
            sys_.domain.fold(x1, s.velocity)
        return deposits, escapes

    def _emit(self, dt):
        sys_ = self.system
        s = sys_.state
        added = 0
        for inl in sys_.inlets:
            new = inl.emit(sys_.rng, self.time, dt, sys_.medium)
            if new is None:
                continue
            k = new["position"].shape[0]
            s.add(new["position"], new["velocity"], diameter=new["diameter"], density=new["density"],
                  eps_p=new["eps_p"], charge=new["charge"], weight=new["weight"],
                  population=sys_.population_index(inl.population))
            self.counters["emitted"] += k
            self.masses["emitted"] += float(np.sum(s.weight[-k:] * s.mass[-k:]))
            added += k
        return added

    def advance(self, dt):
        """Take one step of ``dt`` (s); returns (deposit records, escape records),
        each None when empty."""
        sys_ = self.system
        s = sys_.state
        if self._field is None or self._field.shape[0] != s.n:
            self._refresh()
        integ = self.integrator
        n = s.n
        codes = integ.assign(self._beta, dt, s.id)
        if self._scratch.shape[0] != n:
            self._scratch = np.zeros((n, SCRATCH_COLUMNS))
        f0 = self._scratch  # carried with the rows: the schemes keep coefficients in it
        self._mixing(dt)
        x0 = s.position.copy()
        if n:
            integ.first_half(s.position, s.velocity, self._accel, self._u, self._beta, dt, codes, f0)
        self._brownian(dt)
        deposits, escapes = self._boundaries(x0, dt)
        codes, f0, self._beta = s.compact(extra=(codes, f0, self._beta))
        self._rated = min(self._rated, s.n)
        added = self._emit(dt)
        if added:
            codes = np.concatenate([codes, np.full(added, FRESH, dtype=np.int8)])
            f0 = np.concatenate([f0, np.zeros((added, SCRATCH_COLUMNS))])
        self._scratch = f0
        self._field = sys_.field_model.field(s)
        for zone in sys_.charging:
            self.counters["rayleigh_capped"] += zone.apply(s, self._field, dt, sys_.medium.temperature,
                                                           sys_._sigma[s.population])
        self._kinematics()
        err = np.zeros(s.n)
        if s.n:
            integ.second_half(s.velocity, self._accel, self._u, self._beta, dt, codes, f0, err)
        self.last_error = float(err.max()) if err.size else 0.0
        self.time += dt
        self.step += 1
        return deposits, escapes

    # -- the loop -----------------------------------------------------------------
    def info(self):
        """Run description handed to ``recorder.start``."""
        sys_ = self.system
        m = sys_.medium
        return {
            "surfaces": {c.name: (float(c.area) if math.isfinite(c.area) else None) for c in sys_.collectors},
            "surface_names": [c.name for c in sys_.collectors],
            "surface_kinds": [c.describe()["kind"] for c in sys_.collectors],
            "outlet_names": [o[2] for o in sys_.domain.outlets],
            "populations": [p.name for p in sys_.populations],
            "population_details": {p.name: p.describe() for p in sys_.populations},
            "collectors": {c.name: c.describe() for c in sys_.collectors},
            "diagnostics": dict(DIAGNOSTICS),
            "domain": sys_.domain.describe(),
            "medium": m.describe(),
            "gravity": sys_.gravity.copy(),
            "coulomb": "off" if sys_.coulomb is None else sys_.coulomb.method_for(sys_.state.n),
            "integrator": self.integrator.name,
            "dt": self.dt,
            "adaptive": self.step_control is not None,
            "brownian": sys_.brownian,
            "eddy_diffusivity": sys_.eddy_diffusivity.copy(),
            "step": self.step,
            "time": self.time,
        }

    def run(self, t_end=None, steps=None, recorder=None):
        """Advance to time ``t_end`` (s) or by ``steps`` steps, reporting to ``recorder``.

        ``recorder.start`` is called once per recorder and simulation (also
        after :meth:`restore`), ``finish`` at the end of every call.

        Returns
        -------
        dict
            :meth:`summary`.
        """
        if (t_end is None) == (steps is None):
            raise ValueError("give exactly one of t_end (s) and steps")
        if steps is not None and (int(steps) != steps or steps < 0):
            raise ValueError(f"steps must be an integer >= 0, got {steps!r}")
        if t_end is not None and not math.isfinite(float(t_end)):
            raise ValueError(f"t_end must be a finite time in s, got {t_end!r}")
        rec = _NullRecorder() if recorder is None else recorder
        # with nobody recording, the diagnostics and snapshots are not made
        # (measured at N = 1e5: a diagnostics row costs 6 ms, a tenth of a step)
        frame_every, diagnostics_every, checkpoint_every = (
            (0, 0, 0) if recorder is None else (self.frame_every, self.diagnostics_every, self.checkpoint_every))
        if id(rec) not in self._started:
            rec.start(self.info())
            self._started.add(id(rec))
            if self.frame_every and self.step == 0:
                rec.frame(self.step, self.time, self.system.state)
        held = _HeldEvents(rec)
        done = 0
        while True:
            if not self._more(steps, done, t_end):
                break
            dt = self.dt if steps is not None else min(self.dt, float(t_end) - self.time)
            deposits, escapes = self.advance(dt)
            done += 1
            if self.step_control is not None and dt == self.dt:
                nxt = self.step_control.next_dt(dt, self.last_error)
                if self._beta.size:
                    # never grow past the scheme's stability limit (Verlet: 2 tau)
                    nxt = min(nxt, 0.5 * float(self.integrator.stable_step(self._beta).min()))
                self.dt = nxt
            if recorder is not None:
                held.add(deposits, escapes)
            if frame_every and self.step % frame_every == 0:
                held.hand_over()
                rec.frame(self.step, self.time, self.system.state)
            if diagnostics_every and self.step % diagnostics_every == 0:
                held.hand_over()
                rec.diagnostics(self.step, self.time, self.diagnostics())
            if checkpoint_every and self.step % checkpoint_every == 0 and self._more(steps, done, t_end):
                # not at the run's last step: ``finish`` follows at once and
                # removes the checkpoint (its writing and fsyncs made the
                # finish wait 0.1-0.2 s at N = 1e5, measured); a run killed
                # in ``finish`` resumes from the checkpoint before. The
                # checkpoint counts every record before it.
                held.hand_over()
                rec.checkpoint(self.snapshot())
        held.hand_over()
        summary = self.summary()
        # the recorder also gets the live end state (for its /final record)
        rec.finish(dict(summary, state=self.system.state))
        return summary

    def _more(self, steps, done, t_end):
        """Whether :meth:`run` takes another step."""
        if steps is not None:
            return done < steps
        return float(t_end) - self.time > 1e-9 * self.dt

    # -- reports ---------------------------------------------------------------
    def energies(self):
        """Kinetic, Coulomb (pair) and applied-field potential energy, J.

        Real energies: each simulated particle counts ``weight`` times for the
        kinetic energy; the pair energy is that of the charges weight x charge.
        The Coulomb energy is NaN above ``energy_max_n`` particles (cost).
        """
        vals = self._energy_sums()
        del vals["total_charge"]
        return vals

    def _energy_sums(self):
        """:meth:`energies` and the total charge (C), from one pass over the particles."""
        sys_ = self.system
        s = sys_.state
        pot = sys_.field_model.applied_potential(s.position)
        kin, qtot, qpot = _particle_sums(s.velocity, s.weight, s.diameter, s.density, s.charge,
                                       _NO_POTENTIAL if pot is None else pot)
        coul = math.nan
        if sys_.coulomb is not None and s.n <= self.energy_max_n:
            coul = sys_.coulomb.energy(s.position, s.weight * s.charge, sys_.field_model.eps_r,
                                       radii=sys_.coulomb.radii_for(s)) if s.n > 1 else 0.0
        return {"kinetic_energy": kin, "coulomb_energy": float(coul), "applied_energy": math.nan if pot is None else qpot,
                "total_charge": qtot}

    def diagnostics(self):
        """Scalars of the current state: counts, energies, efficiency so far."""
        s = self.system.state
        vals = {
            "n_alive": int(s.n),
            "n_emitted": self.counters["emitted"],
            "n_deposited": self.counters["deposited"],
            "n_escaped": self.counters["escaped"],
            "dt": self.dt,
            "error_estimate": self.last_error,
            "collection_efficiency": self.masses["deposited"] / self.masses["emitted"] if self.masses["emitted"] else 0.0,
        }
        vals.update(self._energy_sums())
        return vals

    def summary(self):
        """Run totals: masses (kg, real particles), efficiency, counts."""
        s = self.system.state
        em = self.masses["emitted"]
        return {
            "emitted_mass": em,
            "deposited_mass": self.masses["deposited"],
            "escaped_mass": self.masses["escaped"],
            "airborne_mass": float(np.sum(s.weight * s.mass)),
            "collection_efficiency": self.masses["deposited"] / em if em > 0 else 0.0,
            "n_initial": self.counters["initial"],
            "n_emitted": self.counters["emitted"],
            "n_deposited": self.counters["deposited"],
            "n_escaped": self.counters["escaped"],
            "n_alive": int(s.n),
            "n_rayleigh_capped": self.counters["rayleigh_capped"],
            "surfaces": {k: dict(v) for k, v in self.surface_totals.items()},
            "steps": self.step,
            "time": self.time,
            "particle_steps": self.integrator.n_particle_steps,
        }

    # -- checkpoints ---------------------------------------------------------------
    def snapshot(self):
        """The full state needed to resume bitwise, as a nested dict of arrays,
        scalars and strings (the RNG state as a JSON string). Its arrays are
        fresh copies: the run goes on without changing them."""
        if self._field is None:
            self._refresh()
        sys_ = self.system
        return {
            "format": CHECKPOINT_FORMAT[0],
            "version": CHECKPOINT_FORMAT[1],
            "step": int(self.step),
            "time": float(self.time),
            "dt": float(self.dt),
            "last_error": float(self.last_error),
            "particles": sys_.state.to_dict(),
            "field": self._field.copy(),
            "inlets": {str(i): inl.get_state() for i, inl in enumerate(sys_.inlets)},
            "rng": json.dumps(sys_.rng.bit_generator.state),
            "counters": dict(self.counters),
            "masses": dict(self.masses),
            "surfaces": {k: dict(v) for k, v in self.surface_totals.items()},
            "integrator": self.integrator.counters(),
        }

    def restore(self, snapshot):
        """Resume from :meth:`snapshot` (of a simulation of the same system)."""
        if snapshot.get("format") != CHECKPOINT_FORMAT[0]:
            raise ValueError(f"snapshot is not a {CHECKPOINT_FORMAT[0]} dict")
        if int(snapshot.get("version", -1)) != CHECKPOINT_FORMAT[1]:
            raise ValueError(f"snapshot version {snapshot.get('version')!r} is not {CHECKPOINT_FORMAT[1]}")
        sys_ = self.system
        if len(snapshot["inlets"]) != len(sys_.inlets):
            raise ValueError("snapshot has a different number of inlets than the system")
        if set(snapshot["surfaces"]) != set(self.surface_totals):
            raise ValueError("snapshot has different surfaces than the system")
        state = ParticleState.from_dict(snapshot["particles"])
        sys_.state.__dict__.update(state.__dict__)
        self.step = int(snapshot["step"])
        self.time = float(snapshot["time"])
        self.dt = float(snapshot["dt"])
        self.last_error = float(snapshot["last_error"])
        for i, inl in enumerate(sys_.inlets):
            inl.set_state(snapshot["inlets"][str(i)])
        rng_state = snapshot["rng"]
        sys_.rng.bit_generator.state = json.loads(rng_state) if isinstance(rng_state, str) else rng_state
        self.counters = {k: int(v) for k, v in snapshot["counters"].items()}
        self.masses = {k: float(v) for k, v in snapshot["masses"].items()}
        self.surface_totals = {k: {"count": int(v["count"]), "mass": float(v["mass"])}
                               for k, v in snapshot["surfaces"].items()}
        self.integrator.set_counters(snapshot["integrator"])
        field = np.array(snapshot["field"], dtype=np.float64).reshape(-1, 3)
        if field.shape[0] != sys_.state.n:
            raise ValueError("snapshot field does not match its particles")
        self._refresh(field)
