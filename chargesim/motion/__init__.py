"""Charged particles moving in a gas: state, medium, inlets, forces, integrators,
boundaries, collectors and the run loop.

All SI. Every constructor checks its arguments once and raises ``ValueError``
naming the argument. Randomness comes only from the seeded
``numpy.random.Generator`` handed to :class:`System`.

API summary (the scenario builder and the HDF5 recorder build against this)
--------------------------------------------------------------------------
Particles (``state.py``)
    ``ParticleState(capacity=64)``: structure of arrays that grows by doubling.
    ``add(position, velocity=0, *, diameter, density, eps_p=inf, charge=0.0,
    weight=1.0, population=0) -> ids``; views of the ``n`` live rows: ``id``
    (int64, stable), ``position`` (n, 3) m, ``velocity`` (n, 3) m/s,
    ``diameter`` m, ``density`` kg/m^3, ``eps_p`` (1; inf = conductor),
    ``charge`` C (one real particle), ``weight`` (real particles per simulated
    one), ``population`` (int32), ``alive`` (bool); derived ``mass`` (one real
    particle, kg), ``radius``. ``copy()``, ``to_dict()``,
    ``ParticleState.from_dict(d)``, ``compact()`` (drops dead rows, stable order).

Medium and gas flow (``medium.py``)
    ``Medium(temperature=293.15, pressure=101325.0, eps_r=1.0, viscosity=None,
    mean_free_path=None, flow=None)``: viscosity from Sutherland's law for air
    and mean free path scaled with T and p unless given; ``flow`` is one of
    ``UniformFlow(velocity)``,
    ``ChannelFlow(mean_velocity, flow_axis, wall_axis, wall_lo, wall_hi)``
    (plane Poiseuille, peak 1.5 x mean),
    ``GriddedFlow(origin, spacing, values)`` (values (nx, ny, nz, 3), trilinear,
    error outside the grid); None means still gas.
    Methods: ``gas_velocity(points)``, ``slip_correction(d)``,
    ``relaxation_time(d, rho)``, ``diffusivity(d)``.

Populations and inlets (``inlets.py``)
    Sizes: ``FixedSize(diameter)``, ``LognormalSize(median, gsd)`` (count
    median diameter, geometric standard deviation), ``TableSize(diameters,
    fractions)`` (count fractions). Charges: ``NoCharge()``,
    ``FixedCharge(charge)``, ``ChargeToMass(ratio)`` (C/kg),
    ``SaturationCharge(field, fraction=1.0)`` (Pauthenier limit in field V/m).
    ``Population(name, size, density, eps_p=inf, charge=NoCharge(),
    weight=1.0, surface_tension=None)``.
    Areas: ``RectangleArea(center, edge_u, edge_v)`` (two edge vectors, m),
    ``DiscArea(center, normal, radius)``.
    ``Inlet(population, area, rate, velocity="gas", start=0.0, stop=inf,
    name=None)``: ``rate`` in simulated particles per second; the fractional
    carry is inlet state (checkpointed).

Absorbing surfaces and the domain (``boundaries.py``)
    ``Domain(lo=(-inf,)*3, hi=(inf,)*3, kinds=("open",)*3, outlet_names=None)``:
    per axis "open" (leaving = escape, recorded with outlet name, default
    "x-", "x+", ...), "periodic" or "reflecting".
    Collectors (every deposit recorded with the fields of
    ``recorder.EVENT_FIELDS``; contact point, interpolated contact time):
    ``PlaneCollector(name, point, normal, lo=None, hi=None, area=None)`` (fluid
    on the side ``normal`` points to; ``lo``/``hi`` box bounding the plate),
    ``CylinderCollector(name, point, axis, radius, inside=True, extent=None,
    area=None)`` (tube wall when ``inside``; a wire when not),
    ``SphereCollector(name, center, radius, inside=False)``. A particle deposits when its
    surface touches the collector.

Forces (``forces.py``, ``zones.py``)
    ``Coulomb(method="auto", radii="particle", **options)`` (radii
    "particle", "none" or one softening radius in m; options such as
    ``accuracy=1e-3`` go to the front door): space charge through
    ``chargesim.coulomb.field`` with ``weight * charge`` and the medium's
    eps_r; images of each provider through ``chargesim.coulomb.field(img_pos,
    img_q, targets=positions, eps_r=...)``; sources summed. The open-space sum
    is used (pass ``box=`` in the options for a periodic sum).
    ``ChargingZone(lo, hi, ion_density, ion_mobility=1.5e-4, ion_mass=...,
    ion_sign=-1, field_charging=True, diffusion=True, name="charging")``:
    per-step ``chargesim.charging.charge_step`` in the box, then
    ``cap_rayleigh`` for droplets (populations with ``surface_tension``).

Run (``simulation.py``)
    ``System(rng, *, particles=None, populations=(), medium=None,
    sources=(), images=(), domain=None, collectors=(), inlets=(),
    gravity=(0, 0, 0), coulomb=Coulomb(), brownian=False,
    eddy_diffusivity=0.0, charging=(), drag=True)``; ``coulomb=None`` is off;
    ``eddy_diffusivity`` one value or per axis, m^2/s (a random walk that is
    mirrored at collectors: mixing does not deposit, the drift does).
    ``Simulation(system, dt, *, integrator="auto", step_control=None,
    frame_every=0, diagnostics_every=1, checkpoint_every=0,
    energy_max_n=2000)``; ``run(t_end=None, steps=None, recorder=None) ->
    summary`` (exactly one of ``t_end`` (s, absolute) or ``steps``);
    ``advance(dt) -> (deposits, escapes)`` one step; ``snapshot() -> dict``
    and ``restore(snapshot)`` (bitwise resume for the same thread count);
    ``info()``, ``diagnostics()``, ``energies()``, ``summary()``; attributes
    ``step``, ``time``, ``dt``, ``counters``.
    Step order: mixing, integrate (first half), Brownian motion, collectors
    and outlets (earliest contact on the segment wins), reflect/wrap, inlets
    emit, field at all particles, charging, integrate (second half),
    recorder calls (deposits, escapes, frames, diagnostics, checkpoints at
    their cadences). ``recorder.start(info())`` once per recorder (also on
    resume); ``recorder.finish(summary | {"state": ParticleState})`` at the
    end of every ``run``.
    ``info()`` keys: ``surfaces`` {name: area m^2 or None}, ``surface_names``,
    ``surface_kinds``, ``outlet_names``, ``populations`` [names],
    ``population_details``, ``collectors``, ``diagnostics`` {name: unit}
    (``simulation.DIAGNOSTICS``), ``domain``, ``medium``, ``gravity``,
    ``coulomb`` (method), ``integrator``, ``dt``, ``adaptive``, ``brownian``,
    ``eddy_diffusivity``, ``step``, ``time``.
    Summary keys: ``emitted_mass`` (initial + emitted), ``deposited_mass``,
    ``escaped_mass``, ``airborne_mass`` (kg, real = weight x particle mass),
    ``collection_efficiency`` (deposited / emitted), ``n_initial``,
    ``n_emitted``, ``n_deposited``, ``n_escaped``, ``n_alive``,
    ``n_rayleigh_capped``, ``surfaces`` {name: {"count", "mass"}} (collectors
    and outlets), ``steps``, ``time``, ``particle_steps``.
    Snapshot: ``format`` "chargesim.motion.checkpoint", ``version`` 1,
    ``step``, ``time``, ``dt``, ``last_error``, ``particles``
    (``ParticleState.to_dict()``), ``field`` (n, 3) V/m, ``inlets``
    {"0": {"carry", "emitted"}, ...}, ``rng`` (JSON string of
    ``rng.bit_generator.state``), ``counters``, ``masses``, ``surfaces``,
    ``integrator`` counters: only dicts, arrays, numbers and strings.

Integrators (``integrators.py``)
    ``Integrator`` (base contract: ``assign``, ``first_half``,
    ``second_half``, ``stable_step``, counters), ``VelocityVerlet()``
    (refuses dt > 2 tau under drag), ``DragExact()`` (exponential; any dt;
    equals Verlet without drag), ``AutoIntegrator(ratio=0.1)`` (drag-exact
    where dt > ratio tau); ``StepControl(tolerance, dt_min, dt_max,
    safety=0.9, grow=2.0)``: local position error estimate
    err_i = dt^2 phi2(dt/tau_i) |f_i(t+dt) - f_i(t)| kept near ``tolerance``
    (m), f = a + u/tau. Kernels run serially below ``PARALLEL_MIN`` particles.

The analysis functions on event records (collection, grade and transfer
efficiency, deposition density and maps, counts) are in
:mod:`chargesim.analysis.efficiency`.
"""
import importlib as _importlib

_LAZY = {
    "ParticleState": "state",
    "Medium": "medium",
    "UniformFlow": "medium",
    "ChannelFlow": "medium",
    "GriddedFlow": "medium",
    "FixedSize": "inlets",
    "LognormalSize": "inlets",
    "TableSize": "inlets",
    "NoCharge": "inlets",
    "FixedCharge": "inlets",
    "ChargeToMass": "inlets",
    "SaturationCharge": "inlets",
    "Population": "inlets",
    "RectangleArea": "inlets",
    "DiscArea": "inlets",
    "Inlet": "inlets",
    "Domain": "boundaries",
    "PlaneCollector": "boundaries",
    "CylinderCollector": "boundaries",
    "SphereCollector": "boundaries",
    "Integrator": "integrators",
    "VelocityVerlet": "integrators",
    "DragExact": "integrators",
    "AutoIntegrator": "integrators",
    "StepControl": "integrators",
    "Coulomb": "forces",
    "ChargingZone": "zones",
    "System": "simulation",
    "Simulation": "simulation",
    "MemoryRecorder": "recorder",
    "EVENT_FIELDS": "recorder",
}


def __getattr__(name):
    mod = _LAZY.get(name)
    if mod is None:
        raise AttributeError(f"module 'chargesim.motion' has no attribute {name!r}")
    return getattr(_importlib.import_module(f"{__name__}.{mod}"), name)


__all__ = sorted(_LAZY)
