"""The scenario vocabulary: every key a scenario file may hold.

One tree of schema nodes (:mod:`chargesim.scenario.schema`). Bounds that
follow from physics carry their reason, so the message says why a value is
impossible and not just that it is. Checks that involve more than one key
(particles inside the domain, electrodes that overlap, ...) live in
:mod:`chargesim.scenario.checks`.
"""
from ..physics.charging import DEFAULT_ION_MASS, DEFAULT_ION_MOBILITY
from .schema import (
    Boolean,
    Choice,
    Integer,
    IntegerVector,
    Points,
    Quantity,
    QuantityList,
    Table,
    Tables,
    Text,
    Vector,
)

AXES = ("x", "y", "z")
FACES = ("x_min", "x_max", "y_min", "y_max", "z_min", "z_max")

#: Gases the medium knows (viscosity by Sutherland's law, permittivity from
#: the materials table).
GASES = ("air", "vacuum")

#: Pair-sum methods of ``chargesim.coulomb`` plus "off" (no particle-particle force).
COULOMB_METHODS = ("auto", "direct", "cutoff", "tree", "ewald", "mesh", "off")

#: Motion integrators (names of ``chargesim.motion``'s integrators).
INTEGRATORS = ("auto", "drag-exact", "verlet")

_POSITIVE = dict(lo=0.0, lo_open=True)


def _face(name):
    return Choice(
        f"What happens to a particle that reaches the {name} face of the domain: `outlet` (it leaves and counts "
        "as escaped), `collector` (it deposits on the face, which counts as a collecting surface), "
        "`reflect` (it bounces back), `periodic` (it re-enters through the opposite face). `reflect` and "
        "`periodic` apply to both faces of an axis together.",
        ("outlet", "collector", "reflect", "periodic"),
        "outlet",
    )


MEDIUM = Table(
    "The gas (or vacuum) the particles move in: its drag, its permittivity, gravity.",
    {
        "gas": Choice("`air` (viscosity by Sutherland's law, drag on the particles) or `vacuum` (no drag, "
                      "eps_r 1); for another gas give its `viscosity`, `mean_free_path` and `eps_r`.", GASES, "air"),
        "temperature": Quantity("Gas temperature.", "K", "20 degC", lo=0.0, lo_open=True,
                                why="absolute temperature is above 0 K"),
        "pressure": Quantity("Gas pressure.", "Pa", "1 atm", lo=0.0, lo_open=True, why="a gas has positive pressure"),
        "eps_r": Quantity("Relative permittivity of the medium; divides the fields of free charges.", "1", None,
                          lo=1.0, why="no medium has a relative permittivity below that of vacuum",
                          default_doc="the gas's value (air 1.00059)"),
        "viscosity": Quantity("Dynamic viscosity of the gas.", "Pa*s", None, lo=0.0, lo_open=True,
                              why="a gas has positive viscosity",
                              default_doc="Sutherland's law at `temperature` (air 1.81e-5 Pa s at 20 degC)"),
        "mean_free_path": Quantity("Mean free path of the gas molecules (slip correction).", "m", None, lo=0.0,
                                   lo_open=True, why="a mean free path is positive",
                                   default_doc="from temperature and pressure (air 0.0665 um at 20 degC, 1 atm)"),
        "gravity": Vector("Gravitational acceleration.", "m/s^2", [0.0, 0.0, -9.80665]),
    },
)

DOMAIN = Table(
    "The box the particles live in, and what each of its faces does.",
    {
        "lower": Vector("Corner of the box with the smallest coordinates.", "m"),
        "upper": Vector("Corner of the box with the largest coordinates (each > `lower`).", "m"),
        "boundaries": Table("What each face of the domain does to particles that reach it.",
                            {f: _face(f) for f in FACES}),
    },
)

_ELECTRODE_COMMON = {
    "name": Text("Name of the electrode (used for surfaces in the results).", None, name=True,
                 default_doc="`<type><index>`"),
    "collect": Boolean("Particles that touch the electrode deposit on it (counted as collected).", True),
}

ELECTRODE = Table(
    "Applied fields and the electrodes that make them. Several electrodes add their fields.",
    _ELECTRODE_COMMON,
    variants={
        "uniform": ("A uniform applied field everywhere (no surface).", {
            "field": Vector("The field vector.", "V/m"),
        }),
        "parallel_plates": ("Two infinite parallel plates normal to `axis`, at `lower` and `upper`.", {
            "axis": Choice("Axis normal to the plates.", AXES),
            "lower": Quantity("Coordinate of the lower plate along `axis`.", "m"),
            "upper": Quantity("Coordinate of the upper plate along `axis` (> `lower`).", "m"),
            "voltage_lower": Quantity("Potential of the lower plate.", "V", 0.0),
            "voltage_upper": Quantity("Potential of the upper plate.", "V"),
        }),
        "wire_plate": ("A row of corona wires midway between two grounded plates (one gas passage of a "
                       "plate-type precipitator). Fixed frame: the plates are normal to x, the wires run along z, "
                       "the row (and the gas flow) runs along y.", {
            "plates": QuantityList("x coordinates of the two grounded plates.", "m", min_len=2, max_len=2),
            "first_wire": Quantity("y coordinate of the first wire.", "m"),
            "wire_spacing": Quantity("Distance between neighbouring wires along y (needed for more than one "
                                     "wire).", "m", None, **_POSITIVE, why="wires are apart",
                                     default_doc="none (one wire)"),
            "n_wires": Integer("Number of wires in the row.", 1, lo=1, hi=200),
            "wire_radius": Quantity("Radius of each wire.", "m", **_POSITIVE, why="a wire has a positive radius"),
            "voltage": Quantity("Potential of the wires (the plates are grounded).", "V"),
        }),
        "wire_in_tube": ("A wire on the axis of a grounded tube (tubular precipitator).", {
            "axis": Choice("Axis of the tube.", AXES),
            "center": Vector("A point on the tube axis.", "m"),
            "wire_radius": Quantity("Radius of the wire.", "m", **_POSITIVE, why="a wire has a positive radius"),
            "tube_radius": Quantity("Inner radius of the tube (> `wire_radius`).", "m", **_POSITIVE,
                                    why="a tube has a positive radius"),
            "voltage": Quantity("Potential of the wire (the tube is grounded).", "V"),
        }),
    },
)

GROUNDED = Table(
    "Grounded conductors: they collect particles and attract them by image charges.",
    {
        "name": Text("Name of the surface (used in the results).", None, name=True, default_doc="`<type><index>`"),
        "images": Boolean("Include the image charges of the particles in this conductor.", True),
        "collect": Boolean("Particles that touch it deposit on it.", True),
    },
    variants={
        "plane": ("A grounded plane through `point` (a panel, a workpiece); particles live on the side `normal` "
                  "points to. Its images are those of an infinite plane; it collects within its extent.", {
            "point": Vector("A point on the plane.", "m"),
            "normal": Vector("Normal of the plane, pointing into the particle side (not zero).", "1"),
            "extent_lower": Vector("Lower corner of the box bounding the collecting part.", "m", None,
                                   default_doc="the domain"),
            "extent_upper": Vector("Upper corner of the box bounding the collecting part.", "m", None,
                                   default_doc="the domain"),
        }),
        "plates": ("Two grounded parallel plates normal to `axis` (alternating image series).", {
            "axis": Choice("Axis normal to the plates.", AXES),
            "lower": Quantity("Coordinate of the lower plate.", "m"),
            "upper": Quantity("Coordinate of the upper plate (> `lower`).", "m"),
        }),
        "sphere": ("A grounded sphere (Kelvin image).", {
            "center": Vector("Centre of the sphere.", "m"),
            "radius": Quantity("Radius of the sphere.", "m", **_POSITIVE, why="a sphere has a positive radius"),
        }),
    },
)

DIELECTRIC = Table(
    "A dielectric half-space (a thick sheet) below a plane: charges above it see the image "
    "-q (eps - eps_m)/(eps + eps_m) mirrored in its surface.",
    {
        "name": Text("Name of the surface (used in the results).", None, name=True,
                     default_doc="`dielectric<index>`"),
        "point": Vector("A point on the surface.", "m"),
        "normal": Vector("Normal of the surface, pointing out of the dielectric into the medium (not zero).", "1"),
        "eps_r": Quantity("Relative permittivity of the dielectric.", "1", lo=1.0,
                          why="no material has a relative permittivity below that of vacuum"),
        "material": Text("Name of the material, for the record (e.g. \"PTFE\").", ""),
        "collect": Boolean("Particles that touch the surface deposit on it.", True),
    },
)

FLOW = Table(
    "The gas flow that carries the particles.",
    {
        "profile": Choice("`uniform`: plug flow at `velocity`; `channel`: laminar flow between two walls "
                          "(plane Poiseuille, peak 1.5 x `mean_velocity`).", ("uniform", "channel"), "uniform"),
        "velocity": Vector("Gas velocity of a uniform flow.", "m/s", [0.0, 0.0, 0.0]),
        "mean_velocity": Quantity("Mean gas velocity of a channel flow.", "m/s", None, **_POSITIVE,
                                  why="a channel flow moves forward along flow_axis"),
        "flow_axis": Choice("Axis along which a channel flow runs.", AXES, "x"),
        "wall_axis": Choice("Axis normal to the channel walls.", AXES, "y"),
        "walls": QuantityList("Coordinates of the two channel walls along `wall_axis`.", "m", None, min_len=2,
                              max_len=2, default_doc="the domain faces"),
        "turbulent_diffusivity": Quantity(
            "Eddy diffusivity of turbulent mixing (random walk; 0 for laminar flow).",
            "m^2/s", 0.0, lo=0.0, why="a diffusivity is not negative"),
        "brownian": Boolean("Add Brownian motion of the particles (matters below about 1 um).", False),
    },
)

POPULATION = Table(
    "A kind of particle: size, density, permittivity, charge; placed at the start or fed by inlets.",
    {
        "name": Text("Name of the population (inlets refer to it).", name=True),
        "diameter": Quantity("Diameter of every particle (`distribution = \"single\"`).", "m", None, **_POSITIVE,
                             why="a particle has a positive diameter"),
        "distribution": Choice("Size distribution: one `diameter`; `lognormal` (count median and geometric "
                               "standard deviation); `list` (given `diameters` with number `fractions`).",
                               ("single", "lognormal", "list"), "single"),
        "median_diameter": Quantity("Count median diameter (lognormal).", "m", None, **_POSITIVE,
                                    why="a particle has a positive diameter"),
        "gsd": Quantity("Geometric standard deviation (lognormal, > 1).", "1", None, lo=1.0, lo_open=True,
                        why="a geometric standard deviation exceeds 1; use distribution = \"single\" for one size"),
        "min_diameter": Quantity("Smallest diameter drawn (lognormal; truncation).", "m", None, **_POSITIVE,
                                 why="a particle has a positive diameter", default_doc="median / gsd^3"),
        "max_diameter": Quantity("Largest diameter drawn (lognormal; truncation).", "m", None, **_POSITIVE,
                                 why="a particle has a positive diameter", default_doc="median * gsd^3"),
        "diameters": QuantityList("Diameters of the size classes (`list`).", "m", None, **_POSITIVE,
                                  why="a particle has a positive diameter"),
        "fractions": QuantityList("Number fractions of the size classes (`list`; normalized).", "1", None, lo=0.0,
                                  why="a fraction is not negative", default_doc="equal"),
        "density": Quantity("Material density of the particles.", "kg/m^3", 1000.0, **_POSITIVE,
                            why="matter has positive density"),
        "eps_r": Quantity("Relative permittivity of the particle material (field charging, images).", "1", 4.0,
                          lo=1.0, why="no material has a relative permittivity below that of vacuum"),
        "conductor": Boolean("The particles conduct (droplets, metal): permittivity taken as infinite.", False),
        "surface_tension": Quantity("Surface tension of a liquid droplet: caps its charge at the Rayleigh limit.",
                                    "N/m", None, **_POSITIVE, why="a surface tension is positive"),
        "charge": Quantity("Charge of each particle at the start (or at injection).", "C", 0.0),
        "charge_to_mass": Quantity("Charge per mass at the start, instead of `charge`.", "C/kg", None),
        "weight": Quantity("Real particles each simulated particle stands for (space charge, masses).", "1", 1.0,
                           lo=1.0, why="a simulated particle stands for at least one real particle"),
        "positions": Points("Positions of particles placed at the start (beads, ions).", "m", None),
        "charges": QuantityList("Charge of each placed particle (same length as `positions`).", "C", None),
        "count": Integer("Number of particles placed at random in `region_lower`..`region_upper` at the start.",
                         0, lo=0, hi=10_000_000),
        "region_lower": Vector("Lower corner of the random placement region.", "m", None,
                               default_doc="the domain's lower corner"),
        "region_upper": Vector("Upper corner of the random placement region.", "m", None,
                               default_doc="the domain's upper corner"),
        "velocity": Vector("Velocity of placed particles at the start.", "m/s", None,
                           default_doc="the gas velocity"),
        "fixed": Boolean("The particles do not move (fixed charges: beads, a lattice); they still make fields.",
                         False),
    },
)

INLET = Table(
    "Where and how fast particles of a population enter during the run.",
    {
        "population": Text("Name of the population it feeds.", name=True),
        "rate": Quantity("Simulated particles per second.", "1/s", **_POSITIVE, why="a feed rate is positive"),
        "mass_flow": Quantity("Real mass per second it carries: sets the population's weight.", "kg/s", None,
                              **_POSITIVE, why="a mass flow is positive", default_doc="none (weight as given)"),
        "start": Quantity("Time the inlet opens.", "s", 0.0, lo=0.0, why="time starts at 0"),
        "stop": Quantity("Time the inlet closes.", "s", None, lo=0.0, why="time starts at 0",
                         default_doc="the end of the run"),
        "velocity": Vector("Velocity of injected particles.", "m/s", None,
                           default_doc="the local gas velocity (`rectangle`, `disc`)"),
    },
    variants={
        "rectangle": ("Particles appear uniformly on a flat rectangle (a duct cross-section): `lower` and "
                      "`upper` are opposite corners and agree on exactly one axis.", {
            "lower": Vector("One corner of the rectangle.", "m"),
            "upper": Vector("The opposite corner.", "m"),
        }),
        "disc": ("Particles appear uniformly on a disc.", {
            "center": Vector("Centre of the disc.", "m"),
            "normal": Vector("Normal of the disc (not zero).", "1"),
            "radius": Quantity("Radius of the disc.", "m", **_POSITIVE, why="a disc has a positive radius"),
        }),
        "nozzle": ("A spray nozzle: droplets leave the orifice disc at `speed` in directions spread evenly "
                   "over a cone around `direction`.", {
            "position": Vector("Centre of the nozzle orifice.", "m"),
            "direction": Vector("Axis of the spray cone (not zero).", "1"),
            "radius": Quantity("Radius of the orifice.", "m", 0.5e-3, **_POSITIVE,
                               why="an orifice has a positive radius"),
            "speed": Quantity("Exit speed of the droplets.", "m/s", **_POSITIVE, why="a spray leaves the nozzle"),
            "cone_angle": Quantity("Full opening angle of the spray cone (\"30 deg\" works).", "1", 0.5, lo=0.0,
                                   hi=3.0, why="a full cone angle in radians between 0 and 3"),
        }),
    },
)

COULOMB = Table(
    "How the forces between the particles (space charge) are summed.",
    {
        "method": Choice("Pair-sum method: `auto` picks by size; `ewald` and `mesh` need a periodic domain; "
                         "`off` ignores particle-particle forces.", COULOMB_METHODS, "auto"),
        "accuracy": Quantity("Relative accuracy asked of approximate methods (tree, ewald, mesh).", "1", 1e-5,
                             lo=0.0, hi=1.0, lo_open=True, hi_open=True,
                             why="a relative accuracy lies between 0 and 1"),
        "cutoff": Quantity("Interaction cutoff distance (method `cutoff`).", "m", None, **_POSITIVE,
                           why="a cutoff is a positive distance"),
        "softening": Quantity("One softening radius for all particles: they interact as charged spheres of "
                              "this radius when closer (useful when a simulated particle stands for a cloud "
                              "of real ones).", "m", None, **_POSITIVE, why="a radius is positive",
                              default_doc="each particle's own radius"),
    },
)

TIME = Table(
    "Time stepping.",
    {
        "step": Quantity("Time step.", "s", **_POSITIVE, why="time moves forward"),
        "end": Quantity("End time of the run (> `step`).", "s", **_POSITIVE, why="time moves forward"),
        "integrator": Choice("`drag-exact` integrates drag exactly (exponential update; stable for steps far "
                             "above the particle relaxation time), `verlet` is velocity Verlet (vacuum, ions), "
                             "`auto` picks drag-exact in a gas and verlet in vacuum.", INTEGRATORS, "auto"),
    },
)

CHARGING = Table(
    "Ion charging of the particles (field, diffusion or both), at injection or during flight.",
    {
        "mode": Choice("Which mechanism: `none`, `field` (Pauthenier), `diffusion` (White), `combined`.",
                       ("none", "field", "diffusion", "combined"), "none"),
        "where": Choice("`inlet`: the charge reached after `residence_time` is given at injection/start; "
                        "`in_flight`: charged step by step in the charging region.", ("inlet", "in_flight"),
                        "inlet"),
        "polarity": Choice("Sign of the ions (negative corona is usual in precipitators).",
                           ("negative", "positive"), "negative"),
        "ion_density": Quantity("Ion number density in the charging region.", "1/m^3", 1e14, **_POSITIVE,
                                why="charging needs ions"),
        "ion_mobility": Quantity("Electrical mobility of the ions.", "m^2/(V*s)", DEFAULT_ION_MOBILITY,
                                 **_POSITIVE, why="a mobility is positive"),
        "ion_mass": Quantity("Mass of one ion (its mean thermal speed enters diffusion charging).", "kg",
                             DEFAULT_ION_MASS, **_POSITIVE, why="an ion has positive mass",
                             default_doc=f"`{DEFAULT_ION_MASS:.4g}` (mean ion speed 240 m/s at 20 degC, Hinds)"),
        "field": Quantity("Charging field for `where = \"inlet\"`.", "V/m", None, lo=0.0, lo_open=True,
                          why="field charging needs a field",
                          default_doc="the magnitude of the applied field at the particle"),
        "residence_time": Quantity("Time spent in the charging zone for `where = \"inlet\"`.", "s", None,
                                   **_POSITIVE, why="charging takes time", default_doc="saturation (field) "
                                   "or 1 s (diffusion)"),
        "region_lower": Vector("Lower corner of the charging region (`in_flight`).", "m", None,
                               default_doc="the domain"),
        "region_upper": Vector("Upper corner of the charging region (`in_flight`).", "m", None,
                               default_doc="the domain"),
    },
)

FIELD_GRID = Table(
    "A grid on which the field of the applied sources and fixed charges is written.",
    {
        "name": Text("Name of the grid (`/fields/<name>/` in the results).", name=True),
        "lower": Vector("Lower corner of the grid.", "m"),
        "upper": Vector("Upper corner of the grid (>= `lower`; equal on an axis makes a plane).", "m"),
        "shape": IntegerVector("Points per axis.", lo=1, hi=2000),
    },
)

OUTPUT = Table(
    "What is written to the results file, and how often.",
    {
        "frame_interval": Quantity("Time between particle frames.", "s", None, **_POSITIVE,
                                   why="frames are taken forward in time", default_doc="end / 50"),
        "diagnostics_interval": Quantity("Time between diagnostics rows (counts, energy, efficiency).", "s", None,
                                         **_POSITIVE, why="diagnostics are taken forward in time",
                                         default_doc="end / 200"),
        "checkpoint_interval": Quantity("Time between checkpoints of the full state (for `--resume`).", "s", None,
                                        **_POSITIVE, why="checkpoints are taken forward in time",
                                        default_doc="end / 10"),
        "frames": Boolean("Write particle frames at all.", True),
        "field_grids": Tables("Field grids to compute and write.", FIELD_GRID),
    },
)

CONDUCTOR = Table(
    "An isolated (ungrounded) conductor whose stored energy is checked against ignition: give `capacitance`, "
    "or `radius` (sphere), or `area` and `gap` (plate over ground); and `voltage` or `charge`.",
    {
        "name": Text("Name of the conductor (in the findings).", name=True),
        "capacitance": Quantity("Capacitance to ground.", "F", None, **_POSITIVE, why="a capacitance is positive"),
        "radius": Quantity("Radius of an isolated sphere.", "m", None, **_POSITIVE, why="a radius is positive"),
        "area": Quantity("Area of a plate over ground.", "m^2", None, **_POSITIVE, why="an area is positive"),
        "gap": Quantity("Gap between the plate and ground.", "m", None, **_POSITIVE, why="a gap is positive"),
        "eps_r": Quantity("Relative permittivity around it (or in the gap).", "1", 1.0, lo=1.0,
                          why="no medium is below vacuum"),
        "voltage": Quantity("Its potential.", "V", None),
        "charge": Quantity("Its charge, instead of `voltage`.", "C", None),
    },
)

PERSON = Table(
    "A person who may become charged (human-body model, 100 pF by default).",
    {
        "name": Text("Who (in the findings).", name=True),
        "voltage": Quantity("Body potential.", "V"),
        "capacitance": Quantity("Body capacitance.", "F", 100e-12, **_POSITIVE, why="a capacitance is positive",
                                default_doc="`\"100 pF\"` (human-body model)"),
    },
)

HAZARDS = Table(
    "Safety checks shown by `chargesim check` and in the report: breakdown and ignition.",
    {
        "atmosphere": Text("Flammable atmosphere present (a vapour or dust of the hazards table, e.g. "
                           "\"propane\"); spark energies are compared with its minimum ignition energy.", None,
                           default_doc="none"),
        "minimum_ignition_energy": Quantity("Minimum ignition energy, instead of a named atmosphere.", "J", None,
                                            **_POSITIVE, why="an ignition energy is positive"),
        "breakdown_margin": Quantity("A field above this fraction of the breakdown strength is a finding.", "1",
                                     0.8, lo=0.0, hi=1.0, lo_open=True, why="a fraction between 0 and 1"),
        "conductors": Tables("Isolated conductors.", CONDUCTOR),
        "people": Tables("People near the process.", PERSON),
    },
)

SCENARIO = Table(
    "A scenario file: one run.",
    {
        "title": Text("Short title of the scenario.", "", max_len=200),
        "description": Text("What the scenario is for.", "", max_len=5000),
        "seed": Integer("Seed of the random generator (placement, inlets, diffusion).", 0, lo=0, hi=2**63 - 1),
        "medium": MEDIUM,
        "domain": DOMAIN,
        "electrodes": Tables("Electrodes and applied fields.", ELECTRODE),
        "grounded": Tables("Grounded collectors with image charges.", GROUNDED),
        "dielectrics": Tables("Dielectric half-spaces with image charges.", DIELECTRIC),
        "flow": FLOW,
        "populations": Tables("Particle populations.", POPULATION, min_len=1),
        "inlets": Tables("Particle inlets.", INLET),
        "coulomb": COULOMB,
        "time": TIME,
        "charging": CHARGING,
        "output": OUTPUT,
        "hazards": HAZARDS,
    },
)
