"""Scenario -> the motion layer's ``System`` and the pieces around it.

:func:`build` turns the validated dict (SI) into sources, image systems,
collectors, populations, inlets, the domain and the medium, and returns them
with the ``System`` in a :class:`Built`. Nothing here validates again: the
scenario was checked completely at load time; a ``ValueError`` from a
constructor below would be a bug in the checks.
"""
import math
from dataclasses import dataclass, field

import numpy as np

from .. import motion
from ..physics import materials
from ..sources.simple import ParallelPlates, UniformField
from ..sources.wires import WireInTube, WirePlateChannel
from .checks import periodic_axes
from .models import DielectricPlane, FixedCharges, IonCharge, NozzleInlet, TruncatedLognormalSize

_AXIS = {"x": 0, "y": 1, "z": 2}


@dataclass
class Built:
    """What :func:`build` makes.

    Attributes
    ----------
    system : chargesim.motion.System or None
        The moving system (None when nothing moves: only fixed charges).
    sources : list
        Applied field sources (electrodes; not the fixed charges).
    fixed : FixedCharges or None
        The fixed charges of all fixed populations together.
    fixed_names : list of str
        Population name of each fixed charge.
    images : list
        Image systems of grounded conductors and dielectrics.
    medium : chargesim.motion.Medium
    info : dict
        Extra run information for the results file (electrode outlines, size
        bins, migration estimates, specific collection area).
    """

    system: object
    sources: list
    fixed: object
    fixed_names: list
    images: list
    medium: object
    info: dict = field(default_factory=dict)


def eps_medium(d):
    m = d["medium"]
    if m["eps_r"] is not None:
        return m["eps_r"]
    return 1.0 if m["gas"] == "vacuum" else materials.dielectric("air").eps_r


def make_medium(d):
    m, f = d["medium"], d["flow"]
    if f["profile"] == "channel":
        lo, hi = f["walls"]
        flow = motion.ChannelFlow(f["mean_velocity"], _AXIS[f["flow_axis"]], _AXIS[f["wall_axis"]], lo, hi)
    elif np.any(f["velocity"] != 0):
        flow = motion.UniformFlow(f["velocity"])
    else:
        flow = None
    return motion.Medium(temperature=m["temperature"], pressure=m["pressure"], eps_r=eps_medium(d),
                         viscosity=m["viscosity"], mean_free_path=m["mean_free_path"], flow=flow)


def make_sources(d):
    """Applied field sources of the electrodes, in scenario order."""
    out = []
    lo, hi = d["domain"]["lower"], d["domain"]["upper"]
    for e in d["electrodes"]:
        t, name = e["type"], e["name"]
        if t == "uniform":
            out.append(UniformField(e["field"], reference_point=lo, name=name))
        elif t == "parallel_plates":
            k = _AXIS[e["axis"]]
            others = [a for a in range(3) if a != k]
            out.append(ParallelPlates(k, (e["lower"], e["upper"]), (e["voltage_lower"], e["voltage_upper"]),
                                      extent=[[lo[a], hi[a]] for a in others], name=name))
        elif t == "wire_plate":
            p0, p1 = sorted(e["plates"])
            origin = (0.5 * (p0 + p1), e["first_wire"], 0.5 * (lo[2] + hi[2]))
            out.append(WirePlateChannel(e["voltage"], e["wire_radius"], 0.5 * (p1 - p0), e["wire_spacing"],
                                        n_wires=e["n_wires"], origin=origin, length=hi[2] - lo[2], name=name))
        elif t == "wire_in_tube":
            k = _AXIS[e["axis"]]
            axis = np.zeros(3)
            axis[k] = 1.0
            origin = np.array(e["center"], dtype=np.float64)
            origin[k] = 0.5 * (lo[k] + hi[k])
            out.append(WireInTube(e["voltage"], e["wire_radius"], e["tube_radius"], origin=origin, axis=axis,
                                  length=hi[k] - lo[k], name=name))
    return out


def _grounded_images(d, eps_m):
    from .. import sources as src_pkg

    images, collectors = [], []
    lo, hi = d["domain"]["lower"], d["domain"]["upper"]
    for g in d["grounded"]:
        t, name = g["type"], g["name"]
        if t == "plane":
            if g["images"]:
                images.append(src_pkg.GroundedPlane(g["point"], g["normal"], name=name))
            if g["collect"]:
                a = lo if g["extent_lower"] is None else g["extent_lower"]
                b = hi if g["extent_upper"] is None else g["extent_upper"]
                collectors.append(motion.PlaneCollector(name, g["point"], g["normal"], lo=a, hi=b))
        elif t == "plates":
            k = _AXIS[g["axis"]]
            if g["images"]:
                images.append(src_pkg.GroundedPlates(k, (g["lower"], g["upper"]), name=name))
            if g["collect"]:
                for u, sgn, tag in ((g["lower"], 1.0, "low"), (g["upper"], -1.0, "high")):
                    p, n = np.zeros(3), np.zeros(3)
                    p[k], n[k] = u, sgn
                    collectors.append(motion.PlaneCollector(f"{name}_{tag}", p, n, lo=_flat(lo, k, u),
                                                            hi=_flat(hi, k, u)))
        elif t == "sphere":
            if g["images"]:
                images.append(src_pkg.GroundedSphere(g["center"], g["radius"], name=name))
            if g["collect"]:
                collectors.append(motion.SphereCollector(name, g["center"], g["radius"]))
    for g in d["dielectrics"]:
        images.append(DielectricPlane(g["name"], g["point"], g["normal"], g["eps_r"], eps_m))
        if g["collect"]:
            collectors.append(motion.PlaneCollector(g["name"], g["point"], g["normal"], lo=lo, hi=hi))
    return images, collectors


def electrode_outlines(described):
    """Outlines for the field map in the results file's convention: a list of
    {"name", "kind", "points": [[x, y, z], ...], "radius"?, "axis"?, "normal"?}."""
    out = []
    for dsc in described:
        for o in dsc.get("outlines", []):
            shape = o.get("shape")
            item = {"name": dsc.get("name", ""), "kind": shape}
            if shape == "cylinder":
                item.update(kind="wire", points=[list(o["point"])], radius=float(o["radius"]), axis=list(o["axis"]))
            elif shape == "plane":
                item.update(kind="plane", points=[list(o["point"])], normal=list(o["normal"]))
            elif shape == "box":
                item.update(kind="plate", points=[list(o["low"]), list(o["high"])])
            else:
                continue
            out.append(item)
    return out


def _flat(corner, k, u):
    c = np.array(corner, dtype=np.float64)
    c[k] = u
    return c


def _electrode_collectors(d):
    out = []
    lo, hi = d["domain"]["lower"], d["domain"]["upper"]
    for e in d["electrodes"]:
        if not e["collect"]:
            continue
        t, name = e["type"], e["name"]
        if t == "parallel_plates":
            k = _AXIS[e["axis"]]
            for u, sgn, tag in ((e["lower"], 1.0, "low"), (e["upper"], -1.0, "high")):
                p, n = np.zeros(3), np.zeros(3)
                p[k], n[k] = u, sgn
                out.append(motion.PlaneCollector(f"{name}_{tag}", p, n, lo=_flat(lo, k, u), hi=_flat(hi, k, u)))
        elif t == "wire_plate":
            p0, p1 = sorted(e["plates"])
            for u, sgn, tag in ((p0, 1.0, "plate_low"), (p1, -1.0, "plate_high")):
                out.append(motion.PlaneCollector(f"{name}_{tag}", (u, 0.0, 0.0), (sgn, 0.0, 0.0),
                                                 lo=_flat(lo, 0, u), hi=_flat(hi, 0, u)))
            xm = 0.5 * (p0 + p1)
            for w in range(e["n_wires"]):
                y = e["first_wire"] + w * e["wire_spacing"]
                out.append(motion.CylinderCollector(f"{name}_wire{w}", (xm, y, 0.0), (0.0, 0.0, 1.0),
                                                    e["wire_radius"], inside=False))
        elif t == "wire_in_tube":
            k = _AXIS[e["axis"]]
            axis = np.zeros(3)
            axis[k] = 1.0
            out.append(motion.CylinderCollector(f"{name}_tube", e["center"], axis, e["tube_radius"], inside=True))
            out.append(motion.CylinderCollector(f"{name}_wire", e["center"], axis, e["wire_radius"], inside=False))
    return out


def _face_collectors(d):
    lo, hi = d["domain"]["lower"], d["domain"]["upper"]
    out = []
    for k, ax in enumerate("xyz"):
        for side, u, sgn in (("min", lo[k], 1.0), ("max", hi[k], -1.0)):
            if d["domain"]["boundaries"][f"{ax}_{side}"] == "collector":
                p, n = np.zeros(3), np.zeros(3)
                p[k], n[k] = u, sgn
                out.append(motion.PlaneCollector(f"{ax}_{side}", p, n, lo=_flat(lo, k, u), hi=_flat(hi, k, u)))
    return out


def make_domain(d):
    b = d["domain"]["boundaries"]
    kinds = []
    names = {}
    for ax in "xyz":
        a, z = b[f"{ax}_min"], b[f"{ax}_max"]
        kinds.append("periodic" if a == "periodic" else "reflecting" if a == "reflect" else "open")
        if a == "outlet":
            names[f"{ax}-"] = f"{ax}_min"
        if z == "outlet":
            names[f"{ax}+"] = f"{ax}_max"
    return motion.Domain(d["domain"]["lower"], d["domain"]["upper"], kinds=tuple(kinds), outlet_names=names)


def _size(p):
    if p["distribution"] == "single":
        return motion.FixedSize(p["diameter"])
    if p["distribution"] == "lognormal":
        return TruncatedLognormalSize(p["median_diameter"], p["gsd"], p["min_diameter"], p["max_diameter"])
    return motion.TableSize(p["diameters"], p["fractions"])


def mean_cube(p):
    """E[d^3] of a population's size distribution, m^3 (0 for point charges)."""
    if p["distribution"] == "single":
        return (p["diameter"] or 0.0) ** 3
    if p["distribution"] == "lognormal":
        return _size(p).mean_cube()
    return float(np.dot(p["fractions"], p["diameters"] ** 3))


def eps_particle(p):
    return math.inf if p["conductor"] else p["eps_r"]


def _charge_model(d, p, field_at):
    c = d["charging"]
    if c["mode"] != "none" and c["where"] == "inlet":
        e = c["field"] if c["field"] is not None else field_at
        sign = -1.0 if c["polarity"] == "negative" else 1.0
        return IonCharge(c["mode"], e, c["ion_density"], c["ion_mobility"], c["ion_mass"],
                         d["medium"]["temperature"], sign, c["residence_time"])
    if p["charge_to_mass"] is not None:
        return motion.ChargeToMass(p["charge_to_mass"])
    if p["charge"] != 0.0:
        return motion.FixedCharge(p["charge"])
    return motion.NoCharge()


def _applied_field_magnitude(sources, point):
    if not sources:
        return 0.0
    e = sum(np.asarray(s.field(np.asarray(point, dtype=np.float64).reshape(1, 3)))[0] for s in sources)
    return float(np.linalg.norm(e))


def build(scenario, *, fields_only=False):
    """Build the motion system of a scenario.

    Parameters
    ----------
    scenario : Scenario
        A loaded scenario.
    fields_only : bool
        Only the sources and fixed charges (for ``chargesim field``).

    Returns
    -------
    Built
    """
    d = scenario.data
    eps_m = eps_medium(d)
    medium = make_medium(d)
    sources = make_sources(d)
    copt = coulomb_options(d)
    # fixed charges: all fixed populations together
    fpos, fq, frad, fnames = [], [], [], []
    for p in d["populations"]:
        if not p["fixed"]:
            continue
        pos, q = _placed(d, p, np.random.default_rng(d["seed"]))
        fpos.append(pos)
        fq.append(q * p["weight"])
        dia = p["diameter"] if p["distribution"] == "single" else None
        frad.append(np.full(pos.shape[0], 0.5 * dia if dia else 0.0))
        fnames += [p["name"]] * pos.shape[0]
    fixed = None
    if fpos:
        method = "direct" if copt["method"] == "off" else copt["method"]
        radii = np.concatenate(frad)
        fixed = FixedCharges("fixed charges", np.concatenate(fpos), np.concatenate(fq),
                             radii=radii if np.any(radii > 0) else None, eps_r=eps_m, method=method,
                             options=copt["options"])
    images, collectors = _grounded_images(d, eps_m)
    described = [s.describe() for s in sources] + [im.describe() for im in images if hasattr(im, "describe")]
    info = {"sources": described, "electrodes": electrode_outlines(described)}
    if fields_only or not any(not p["fixed"] for p in d["populations"]):
        return Built(None, sources, fixed, fnames, images, medium, info)

    rng = np.random.default_rng(d["seed"])
    collectors = _electrode_collectors(d) + _face_collectors(d) + collectors
    all_sources = list(sources) + ([fixed] if fixed is not None else [])
    moving = [p for p in d["populations"] if not p["fixed"]]
    fed = {}
    for inl in d["inlets"]:
        fed.setdefault(inl["population"], inl)
    pops, state = [], motion.ParticleState()
    for p in moving:
        inl = fed.get(p["name"])
        where = None
        if inl is not None:
            where = {"rectangle": lambda i: 0.5 * (i["lower"] + i["upper"]), "disc": lambda i: i["center"],
                     "nozzle": lambda i: i["position"]}[inl["type"]](inl)
        elif p["positions"] is not None:
            where = p["positions"].mean(axis=0)
        else:
            a = d["domain"]["lower"] if p["region_lower"] is None else p["region_lower"]
            b = d["domain"]["upper"] if p["region_upper"] is None else p["region_upper"]
            where = 0.5 * (a + b)
        e_local = _applied_field_magnitude(sources, where)
        weight = p["weight"]
        if inl is not None and inl["mass_flow"] is not None:
            mean_mass = p["density"] * math.pi / 6.0 * mean_cube(p)
            weight = max(1.0, inl["mass_flow"] / (inl["rate"] * mean_mass))
        pop = motion.Population(p["name"], _size(p), p["density"], eps_p=eps_particle(p),
                                charge=_charge_model(d, p, e_local), weight=weight,
                                surface_tension=p["surface_tension"])
        pops.append(pop)
        if p["positions"] is not None or p["count"]:
            idx = len(pops) - 1  # moving populations come first in the System's list
            pos, q = _placed(d, p, rng, pop=pop)
            n = pos.shape[0]
            dia = pop.size.sample(rng, n)
            if p["charges"] is None:
                q = pop.charge.assign(dia, p["density"], eps_particle(p))
            vel = medium.gas_velocity(pos) if p["velocity"] is None else np.tile(p["velocity"], (n, 1))
            state.add(pos, vel, diameter=dia, density=p["density"], eps_p=eps_particle(p), charge=q,
                      weight=weight, population=idx)
    inlets = []
    by_name = {p.name: p for p in pops}
    for i, inl in enumerate(d["inlets"]):
        pop = by_name[inl["population"]]
        name = f"inlet{i}_{pop.name}"
        if inl["type"] == "rectangle":
            a, b = inl["lower"], inl["upper"]
            flat = [k for k in range(3) if a[k] == b[k]][0]
            u_ax, v_ax = [k for k in range(3) if k != flat]
            eu, ev = np.zeros(3), np.zeros(3)
            eu[u_ax], ev[v_ax] = b[u_ax] - a[u_ax], b[v_ax] - a[v_ax]
            area = motion.RectangleArea(0.5 * (a + b), eu, ev)
        elif inl["type"] == "disc":
            area = motion.DiscArea(inl["center"], inl["normal"], inl["radius"])
        else:
            area = motion.DiscArea(inl["position"], inl["direction"], inl["radius"])
        if inl["type"] == "nozzle":
            inlets.append(NozzleInlet(pop, area, inl["rate"], inl["direction"], inl["speed"], inl["cone_angle"],
                                      start=inl["start"], stop=inl["stop"], name=name))
        else:
            vel = "gas" if inl["velocity"] is None else inl["velocity"]
            inlets.append(motion.Inlet(pop, area, inl["rate"], velocity=vel, start=inl["start"], stop=inl["stop"],
                                       name=name))
    zones = []
    c = d["charging"]
    if c["mode"] != "none" and c["where"] == "in_flight":
        lo = d["domain"]["lower"] if c["region_lower"] is None else c["region_lower"]
        hi = d["domain"]["upper"] if c["region_upper"] is None else c["region_upper"]
        zones.append(motion.ChargingZone(lo, hi, c["ion_density"], c["ion_mobility"], c["ion_mass"],
                                         ion_sign=-1 if c["polarity"] == "negative" else 1,
                                         field_charging=c["mode"] in ("field", "combined"),
                                         diffusion=c["mode"] in ("diffusion", "combined")))
    if copt["method"] == "off":
        coul = None
    else:
        radii = "particle" if d["coulomb"]["softening"] is None else d["coulomb"]["softening"]
        coul = motion.Coulomb(copt["method"], radii=radii, **copt["options"])
    vacuum = d["medium"]["gas"] == "vacuum"
    system = motion.System(rng, particles=state, populations=pops, medium=medium, sources=all_sources,
                           images=images, domain=make_domain(d), collectors=collectors, inlets=inlets,
                           gravity=d["medium"]["gravity"], coulomb=coul, brownian=d["flow"]["brownian"],
                           eddy_diffusivity=d["flow"]["turbulent_diffusivity"], charging=zones, drag=not vacuum)
    return Built(system, sources, fixed, fnames, images, medium, info)


def coulomb_options(d):
    """Method name and options for ``chargesim.coulomb`` from the scenario."""
    c = d["coulomb"]
    opts = {}
    method = c["method"]
    if all(periodic_axes(d)):
        opts["box"] = tuple(float(x) for x in (d["domain"]["upper"] - d["domain"]["lower"]))
    if c["cutoff"] is not None:
        opts["cutoff"] = c["cutoff"]
    if method in ("tree", "ewald", "mesh") or (method == "auto" and "cutoff" not in opts):
        opts["accuracy"] = c["accuracy"]
    return {"method": method, "options": opts}


def _placed(d, p, rng, pop=None):
    """Positions (n, 3) m and charges (n,) C of the particles placed at t = 0."""
    if p["positions"] is not None:
        pos = p["positions"]
        if p["charges"] is not None:
            q = p["charges"]
        elif p["charge_to_mass"] is not None:
            dia = p["diameter"] if p["diameter"] is not None else (mean_cube(p)) ** (1 / 3)
            q = np.full(pos.shape[0], p["charge_to_mass"] * p["density"] * math.pi / 6 * dia**3)
        else:
            q = np.full(pos.shape[0], p["charge"])
        return pos, q
    a = d["domain"]["lower"] if p["region_lower"] is None else p["region_lower"]
    b = d["domain"]["upper"] if p["region_upper"] is None else p["region_upper"]
    pos = a + (b - a) * rng.random((p["count"], 3))
    return pos, np.full(p["count"], p["charge"])
