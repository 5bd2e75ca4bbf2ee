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
    ``SphereCollector(name, center, radius)``. A particle deposits when its
    surface touches the collector.

Run (``simulation.py``)
    ``Coulomb(method="auto", radii="particle", **options)`` or ``coulomb=None``
    (off): space charge through ``chargesim.coulomb.field`` with
    ``weight * charge``.
    ``ChargingZone(lo, hi, ion_density, ion_mobility=..., ...)``: per-step
    charging with ``chargesim.charging.charge_step`` inside a box.
    ``System(rng, *, particles=None, populations=(), medium=Medium(),
    sources=(), images=(), domain=Domain(), collectors=(), inlets=(),
    gravity=(0, 0, 0), coulomb=Coulomb(), brownian=False,
    eddy_diffusivity=0.0, charging=(), drag=True)``.
    ``Simulation(system, dt, *, integrator="auto", step_control=None,
    frame_every=0, diagnostics_every=1, checkpoint_every=0)``;
    ``run(t_end=None, steps=None, recorder=None) -> summary`` (dict);
    ``snapshot() -> dict`` and ``restore(snapshot)`` (bitwise resume);
    ``step``, ``time``, ``counters``, ``summary()``.
    Integrators (``integrators.py``): ``Integrator`` (base contract),
    ``VelocityVerlet()``, ``DragExact()``, ``AutoIntegrator(ratio=0.1)``;
    ``StepControl(tolerance, dt_min, dt_max)`` for adaptive steps.

The summary handed to ``recorder.finish`` holds ``emitted_mass``,
``deposited_mass``, ``escaped_mass`` (kg, real mass = weight x particle mass),
``collection_efficiency`` (deposited / emitted), counts per surface.
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
