"""Checks across keys, after each key has passed its own.

Physically impossible scenarios are refused here with the reason: particles
or inlets outside the domain, electrodes that overlap or cut through each
other, grids and intervals that make no sense, a periodic sum without a
periodic box. Each check raises :class:`~chargesim.scenario.schema.Fail` with
the key path of the value at fault.
"""
import math

import numpy as np

from .schema import Fail, suggest
from .vocabulary import AXES

MAX_STEPS = 100_000_000
MAX_GRID_POINTS = 20_000_000


def _axis(name):
    return AXES.index(name)


def _fmt(x):
    return f"{x:.6g}"


def _pt(p):
    return "[" + ", ".join(_fmt(v) for v in p) + "] m"


def check_all(d, atmospheres=None):
    """Run every cross-key check on the validated dict ``d`` (SI)."""
    lo, hi = _domain(d)
    _electrodes(d, lo, hi)
    _grounded(d, lo, hi)
    _dielectrics(d)
    _time_and_output(d)
    names = _populations(d, lo, hi)
    _inlets(d, lo, hi, names)
    _coulomb(d, lo, hi)
    _flow(d, lo, hi)
    _charging(d, lo, hi)
    _hazards(d, atmospheres)
    _surfaces_unique(d)


def _domain(d):
    lo, hi = d["domain"]["lower"], d["domain"]["upper"]
    for k in range(3):
        if not hi[k] > lo[k]:
            raise Fail(f"domain.upper[{k}]", f"{_fmt(hi[k])} m must be greater than domain.lower[{k}] = "
                                             f"{_fmt(lo[k])} m (the domain has positive size along {AXES[k]})")
    b = d["domain"]["boundaries"]
    for ax in AXES:
        a, z = b[f"{ax}_min"], b[f"{ax}_max"]
        for kind in ("periodic", "reflect"):
            if (a == kind) != (z == kind):
                bad = f"{ax}_max" if a == kind else f"{ax}_min"
                raise Fail(f"domain.boundaries.{bad}", f"{(z if a == kind else a)!r} is not allowed here: "
                                                       f"{ax}_min and {ax}_max are {kind!r} together or not at all")
    return lo, hi


def periodic_axes(d):
    """Which axes of the domain are periodic (tuple of bool)."""
    b = d["domain"]["boundaries"]
    return tuple(b[f"{ax}_min"] == "periodic" for ax in AXES)


def _inside(p, lo, hi, tol=0.0):
    return bool(np.all(p >= lo - tol) and np.all(p <= hi + tol))


def _electrodes(d, lo, hi):
    wires = []  # (path, axis index, (a, b) coordinates across, radius)
    for i, e in enumerate(d["electrodes"]):
        path = f"electrodes[{i}]"
        t = e["type"]
        if t == "parallel_plates":
            if not e["upper"] > e["lower"]:
                raise Fail(f"{path}.upper", f"{_fmt(e['upper'])} m must be greater than lower = {_fmt(e['lower'])} m "
                                            "(the plates would touch or cross: overlapping electrodes)")
        elif t == "wire_plate":
            p0, p1 = sorted(e["plates"])
            if not p1 > p0:
                raise Fail(f"{path}.plates", "the two plates are at the same place (overlapping electrodes)")
            r = e["wire_radius"]
            if not r < 0.5 * (p1 - p0):
                raise Fail(f"{path}.wire_radius", f"{_fmt(r)} m: the wires midway would touch the plates "
                                                  f"{_fmt(p1 - p0)} m apart (overlapping electrodes)")
            if e["n_wires"] > 1 and e["wire_spacing"] is None:
                raise Fail(f"{path}.wire_spacing", f"missing required key for n_wires = {e['n_wires']}")
            if e["wire_spacing"] is None:
                e["wire_spacing"] = p1 - p0  # unused with one wire; the source wants a positive value
            if e["n_wires"] > 1 and not e["wire_spacing"] > 2 * r:
                raise Fail(f"{path}.wire_spacing", f"{_fmt(e['wire_spacing'])} m is not more than one wire diameter "
                                                   f"({_fmt(2 * r)} m): the wires overlap (overlapping electrodes)")
            for w in range(e["n_wires"]):
                wires.append((path, 2, {0: 0.5 * (p0 + p1), 1: e["first_wire"] + w * e["wire_spacing"]}, r))
        elif t == "wire_in_tube":
            if not e["tube_radius"] > e["wire_radius"]:
                raise Fail(f"{path}.tube_radius", f"{_fmt(e['tube_radius'])} m must be greater than wire_radius = "
                                                  f"{_fmt(e['wire_radius'])} m (the wire would touch the tube)")
            ax = _axis(e["axis"])
            wires.append((path, ax, {k: e["center"][k] for k in range(3) if k != ax}, e["wire_radius"]))
        elif t == "uniform":
            pass
    # wires of different electrodes along the same axis must not touch
    for i in range(len(wires)):
        for j in range(i + 1, len(wires)):
            (pi_, ai, ci, ri), (pj, aj, cj, rj) = wires[i], wires[j]
            if pi_ == pj or ai != aj:
                continue
            dist = math.hypot(*[ci[k] - cj[k] for k in ci])
            if dist <= ri + rj:
                raise Fail(pj, f"its wire at distance {_fmt(dist)} m touches a wire of {pi_} (overlapping electrodes)")
    # parallel plates of two electrodes on the same axis must not cross
    plates = [(i, e) for i, e in enumerate(d["electrodes"]) if e["type"] == "parallel_plates"]
    for a in range(len(plates)):
        for b in range(a + 1, len(plates)):
            (i, e), (j, f) = plates[a], plates[b]
            if e["axis"] == f["axis"] and {e["lower"], e["upper"]} & {f["lower"], f["upper"]}:
                shared = sorted({e["lower"], e["upper"]} & {f["lower"], f["upper"]})
                va = {e["lower"]: e["voltage_lower"], e["upper"]: e["voltage_upper"]}
                vb = {f["lower"]: f["voltage_lower"], f["upper"]: f["voltage_upper"]}
                if any(va[s] != vb[s] for s in shared):
                    raise Fail(f"electrodes[{j}]", f"a plate at {_fmt(shared[0])} m coincides with a plate of "
                                                   f"electrodes[{i}] at another voltage (overlapping electrodes)")


def _grounded(d, lo, hi):
    for i, g in enumerate(d["grounded"]):
        path = f"grounded[{i}]"
        t = g["type"]
        if t == "plane":
            if not np.linalg.norm(g["normal"]) > 0:
                raise Fail(f"{path}.normal", "the normal of a plane must not be zero")
            if g["extent_lower"] is not None or g["extent_upper"] is not None:
                a = lo if g["extent_lower"] is None else g["extent_lower"]
                b = hi if g["extent_upper"] is None else g["extent_upper"]
                for k in range(3):
                    if b[k] < a[k]:
                        raise Fail(f"{path}.extent_upper[{k}]", f"{_fmt(b[k])} m must not be less than "
                                                                f"extent_lower[{k}] = {_fmt(a[k])} m")
        elif t == "plates":
            if not g["upper"] > g["lower"]:
                raise Fail(f"{path}.upper", f"{_fmt(g['upper'])} m must be greater than lower = {_fmt(g['lower'])} m "
                                            "(the plates would touch: overlapping electrodes)")


def _dielectrics(d):
    for i, g in enumerate(d["dielectrics"]):
        if not np.linalg.norm(g["normal"]) > 0:
            raise Fail(f"dielectrics[{i}].normal", "the normal of a surface must not be zero")


def _excluded(d, p):
    """Why point p lies inside a solid (electrode, grounded body), or None."""
    for i, e in enumerate(d["electrodes"]):
        if e["type"] == "parallel_plates":
            k = _axis(e["axis"])
            if not (e["lower"] <= p[k] <= e["upper"]):
                return f"outside the gap of the plates of electrodes[{i}]"
        elif e["type"] == "wire_plate":
            p0, p1 = sorted(e["plates"])
            if not (p0 <= p[0] <= p1):
                return f"outside the gap of the plates of electrodes[{i}]"
            xm, r = 0.5 * (p0 + p1), e["wire_radius"]
            for w in range(e["n_wires"]):
                if math.hypot(p[0] - xm, p[1] - (e["first_wire"] + w * e["wire_spacing"])) < r:
                    return f"inside a wire of electrodes[{i}]"
        elif e["type"] == "wire_in_tube":
            k = _axis(e["axis"])
            r = math.hypot(*[p[m] - e["center"][m] for m in range(3) if m != k])
            if r > e["tube_radius"]:
                return f"outside the tube of electrodes[{i}]"
            if r < e["wire_radius"]:
                return f"inside the wire of electrodes[{i}]"
    for i, g in enumerate(d["dielectrics"]):
        n = g["normal"] / np.linalg.norm(g["normal"])
        if float(np.dot(p - g["point"], n)) < 0:
            return f"inside the dielectric dielectrics[{i}] (its normal points out of it)"
    for i, g in enumerate(d["grounded"]):
        if g["type"] == "plane":
            n = g["normal"] / np.linalg.norm(g["normal"])
            if float(np.dot(p - g["point"], n)) < 0:
                return f"behind the grounded plane grounded[{i}] (its normal points to the particle side)"
        elif g["type"] == "plates":
            k = _axis(g["axis"])
            if not (g["lower"] <= p[k] <= g["upper"]):
                return f"outside the gap of the grounded plates grounded[{i}]"
        elif g["type"] == "sphere":
            if np.linalg.norm(p - g["center"]) < g["radius"]:
                return f"inside the grounded sphere grounded[{i}]"
    return None


def _check_point(d, p, lo, hi, path, what):
    if not _inside(p, lo, hi):
        raise Fail(path, f"{what} at {_pt(p)} is outside the domain {_pt(lo)} .. {_pt(hi)}")
    why = _excluded(d, p)
    if why:
        raise Fail(path, f"{what} at {_pt(p)} is {why}")


def _check_box(d, a, b, lo, hi, path_a, path_b, what):
    for k in range(3):
        if b[k] < a[k]:
            raise Fail(f"{path_b}[{k}]", f"{_fmt(b[k])} m must not be less than {path_a}[{k}] = {_fmt(a[k])} m")
    if not _inside(a, lo, hi):
        raise Fail(path_a, f"{what} corner {_pt(a)} is outside the domain {_pt(lo)} .. {_pt(hi)}")
    if not _inside(b, lo, hi):
        raise Fail(path_b, f"{what} corner {_pt(b)} is outside the domain {_pt(lo)} .. {_pt(hi)}")


def _populations(d, lo, hi):
    names = {}
    for i, p in enumerate(d["populations"]):
        path = f"populations[{i}]"
        if p["name"] in names:
            raise Fail(f"{path}.name", f"{p['name']!r} is already the name of populations[{names[p['name']]}]; "
                                       "names are unique")
        names[p["name"]] = i
        dist = p["distribution"]
        keys = {"single": ("diameter",), "lognormal": ("median_diameter", "gsd"), "list": ("diameters",)}
        other = {"single": ("median_diameter", "gsd", "min_diameter", "max_diameter", "diameters", "fractions"),
                 "lognormal": ("diameter", "diameters", "fractions"),
                 "list": ("diameter", "median_diameter", "gsd", "min_diameter", "max_diameter")}
        for k in keys[dist]:
            if k == "diameter" and p["fixed"]:
                continue  # fixed charges may be points
            if p[k] is None:
                raise Fail(f"{path}.{k}", f"missing required key for distribution = {dist!r}")
        for k in other[dist]:
            if p[k] is not None:
                raise Fail(f"{path}.{k}", f"not used with distribution = {dist!r}; remove it or change distribution")
        if dist == "lognormal":
            dmin, dmax = p["min_diameter"], p["max_diameter"]
            med, g = p["median_diameter"], p["gsd"]
            dmin = med / g**3 if dmin is None else dmin
            dmax = med * g**3 if dmax is None else dmax
            if not dmax > dmin:
                raise Fail(f"{path}.max_diameter", f"{_fmt(dmax)} m must be greater than min_diameter {_fmt(dmin)} m")
            p["min_diameter"], p["max_diameter"] = dmin, dmax
        if dist == "list":
            n = p["diameters"].size
            if p["fractions"] is None:
                p["fractions"] = np.full(n, 1.0 / n)
            elif p["fractions"].size != n:
                raise Fail(f"{path}.fractions", f"has {p['fractions'].size} values but diameters has {n}")
            s = float(p["fractions"].sum())
            if not s > 0:
                raise Fail(f"{path}.fractions", "the fractions sum to zero")
            p["fractions"] = p["fractions"] / s
        if p["charge_to_mass"] is not None and p["charge"] != 0.0:
            raise Fail(f"{path}.charge_to_mass", "give either charge or charge_to_mass, not both")
        pos = p["positions"]
        if p["charges"] is not None:
            if pos is None:
                raise Fail(f"{path}.charges", "per-particle charges need `positions` of the same length")
            if p["charges"].size != pos.shape[0]:
                raise Fail(f"{path}.charges", f"has {p['charges'].size} values but positions has {pos.shape[0]}")
            if p["charge"] != 0.0 or p["charge_to_mass"] is not None:
                raise Fail(f"{path}.charges", "give per-particle charges or one charge/charge_to_mass, not both")
        if pos is not None:
            if p["count"]:
                raise Fail(f"{path}.count", "give either positions or count (random placement), not both")
            for j in range(pos.shape[0]):
                _check_point(d, pos[j], lo, hi, f"{path}.positions[{j}]", "particle")
        a = lo if p["region_lower"] is None else p["region_lower"]
        b = hi if p["region_upper"] is None else p["region_upper"]
        if p["region_lower"] is not None or p["region_upper"] is not None:
            if not p["count"]:
                raise Fail(f"{path}.region_lower", "a placement region needs `count` > 0")
            _check_box(d, a, b, lo, hi, f"{path}.region_lower", f"{path}.region_upper", "placement region")
        if p["fixed"] and p["velocity"] is not None and np.any(p["velocity"] != 0):
            raise Fail(f"{path}.velocity", "fixed particles do not move; remove velocity or fixed")
    return names


def _inlets(d, lo, hi, names):
    end = d["time"]["end"]
    for i, inl in enumerate(d["inlets"]):
        path = f"inlets[{i}]"
        if inl["population"] not in names:
            raise Fail(f"{path}.population", f"{inl['population']!r} is not a population{suggest(inl['population'], names)}; "
                                             "known: " + ", ".join(repr(n) for n in names))
        pop = d["populations"][names[inl["population"]]]
        if pop["fixed"]:
            raise Fail(f"{path}.population", f"{inl['population']!r} is fixed; an inlet feeds moving particles")
        stop = end if inl["stop"] is None else inl["stop"]
        if not stop > inl["start"]:
            raise Fail(f"{path}.stop", f"{_fmt(stop)} s must be later than start = {_fmt(inl['start'])} s")
        inl["stop"] = stop
        if inl["start"] >= end:
            raise Fail(f"{path}.start", f"{_fmt(inl['start'])} s is not before the end of the run ({_fmt(end)} s)")
        if inl["mass_flow"] is not None and pop["weight"] != 1.0:
            raise Fail(f"{path}.mass_flow", f"sets the weight of population {pop['name']!r}, which gives its own "
                                            "weight; give one of them")
        if inl["type"] == "rectangle":
            a, b = inl["lower"], inl["upper"]
            flat = [k for k in range(3) if a[k] == b[k]]
            if len(flat) != 1:
                raise Fail(f"{path}.upper", f"the corners {_pt(a)} and {_pt(b)} must agree on exactly one axis "
                                            f"(a flat rectangle); they agree on {len(flat)}")
            lo_c, hi_c = np.minimum(a, b), np.maximum(a, b)
            _check_box(d, lo_c, hi_c, lo, hi, f"{path}.lower", f"{path}.upper", "inlet rectangle")
            why = _excluded(d, 0.5 * (a + b))
            if why:
                raise Fail(f"{path}.lower", f"the inlet rectangle (centre {_pt(0.5 * (a + b))}) is {why}")
        elif inl["type"] == "disc":
            if not np.linalg.norm(inl["normal"]) > 0:
                raise Fail(f"{path}.normal", "the normal of a disc must not be zero")
            _check_point(d, inl["center"], lo, hi, f"{path}.center", "inlet disc centre")
        else:
            _check_point(d, inl["position"], lo, hi, f"{path}.position", "nozzle")
            if not np.linalg.norm(inl["direction"]) > 0:
                raise Fail(f"{path}.direction", "the spray direction must not be zero")
        n_in = inl["rate"] * (stop - inl["start"])
        if n_in > 10_000_000:
            raise Fail(f"{path}.rate", f"{inl['rate']:g} /s over {stop - inl['start']:g} s makes {n_in:.3g} simulated "
                                       "particles (at most 1e7); raise the population weight instead")
    fed = {inl["population"] for inl in d["inlets"]}
    for i, p in enumerate(d["populations"]):
        if p["positions"] is None and not p["count"] and p["name"] not in fed:
            raise Fail(f"populations[{i}]", f"population {p['name']!r} has no particles: give positions, count, "
                                            "or an [[inlets]] entry that feeds it")


def _coulomb(d, lo, hi):
    c = d["coulomb"]
    per = periodic_axes(d)
    if c["method"] in ("ewald", "mesh") and not all(per):
        raise Fail("coulomb.method", f"{c['method']!r} is a periodic sum: it needs all domain boundaries "
                                     "'periodic' (the domain is the periodic box)")
    if c["method"] == "cutoff" and c["cutoff"] is None:
        raise Fail("coulomb.cutoff", "missing required key for method = 'cutoff'")
    if c["cutoff"] is not None and c["method"] not in ("cutoff", "auto"):
        raise Fail("coulomb.cutoff", f"not used with method = {c['method']!r}")
    if c["cutoff"] is not None and any(per):
        half = 0.5 * float(np.min((hi - lo)[list(per)]))
        if c["cutoff"] > half:
            raise Fail("coulomb.cutoff", f"{_fmt(c['cutoff'])} m exceeds half the periodic box ({_fmt(half)} m)")
    if any(per) and not all(per) and c["method"] not in ("off", "direct", "cutoff", "auto", "tree"):
        raise Fail("coulomb.method", "partly periodic domains are not supported by this method")


def _flow(d, lo, hi):
    f = d["flow"]
    if f["profile"] == "channel":
        if f["mean_velocity"] is None:
            raise Fail("flow.mean_velocity", "missing required key for profile = 'channel'")
        if f["flow_axis"] == f["wall_axis"]:
            raise Fail("flow.wall_axis", f"{f['wall_axis']!r} is also the flow axis; walls run along the flow")
        k = _axis(f["wall_axis"])
        w = (lo[k], hi[k]) if f["walls"] is None else tuple(sorted(f["walls"]))
        if not w[1] > w[0]:
            raise Fail("flow.walls", "the two walls are at the same place")
        f["walls"] = np.array(w)
        if np.any(f["velocity"] != 0):
            raise Fail("flow.velocity", "used with profile = 'uniform'; a channel flow takes mean_velocity")
    else:
        for key in ("mean_velocity", "walls"):
            if f[key] is not None:
                raise Fail(f"flow.{key}", "used with profile = 'channel' only")


def _time_and_output(d):
    t = d["time"]
    if not t["end"] > t["step"]:
        raise Fail("time.end", f"{_fmt(t['end'])} s must be greater than time.step = {_fmt(t['step'])} s")
    steps = math.ceil(t["end"] / t["step"] - 1e-9)
    if steps > MAX_STEPS:
        raise Fail("time.step", f"{_fmt(t['step'])} s makes {steps:.3g} steps to {_fmt(t['end'])} s (at most {MAX_STEPS:.0e})")
    o = d["output"]
    for key, frac in (("frame_interval", 50), ("diagnostics_interval", 200), ("checkpoint_interval", 10)):
        if o[key] is None:
            o[key] = max(t["end"] / frac, t["step"])
        elif o[key] < t["step"]:
            raise Fail(f"output.{key}", f"{_fmt(o[key])} s is shorter than the time step ({_fmt(t['step'])} s)")
    seen = set()
    for i, g in enumerate(o["field_grids"]):
        path = f"output.field_grids[{i}]"
        if g["name"] in seen:
            raise Fail(f"{path}.name", f"{g['name']!r} is already the name of another grid")
        seen.add(g["name"])
        for k in range(3):
            if g["upper"][k] < g["lower"][k]:
                raise Fail(f"{path}.upper[{k}]", f"{_fmt(g['upper'][k])} m must not be less than lower[{k}]")
            if g["upper"][k] == g["lower"][k] and g["shape"][k] != 1:
                raise Fail(f"{path}.shape[{k}]", f"{g['shape'][k]} points on an axis of zero extent; use 1")
        n = int(np.prod(g["shape"]))
        if n > MAX_GRID_POINTS:
            raise Fail(f"{path}.shape", f"{n:.3g} points (at most {MAX_GRID_POINTS:.0e})")


def _charging(d, lo, hi):
    c = d["charging"]
    if c["mode"] == "none":
        return
    if c["region_lower"] is not None or c["region_upper"] is not None:
        if c["where"] != "in_flight":
            raise Fail("charging.region_lower", "a charging region is used with where = 'in_flight'")
        a = lo if c["region_lower"] is None else c["region_lower"]
        b = hi if c["region_upper"] is None else c["region_upper"]
        _check_box(d, a, b, lo, hi, "charging.region_lower", "charging.region_upper", "charging region")
    if c["where"] == "in_flight" and (c["field"] is not None or c["residence_time"] is not None):
        key = "field" if c["field"] is not None else "residence_time"
        raise Fail(f"charging.{key}", "used with where = 'inlet' only (in flight the local field and time count)")
    if c["mode"] in ("field", "combined") and c["where"] == "inlet" and c["field"] is None and not d["electrodes"]:
        raise Fail("charging.field", f"mode = {c['mode']!r} needs a charging field: give charging.field or an electrode")


def _hazards(d, atmospheres):
    h = d["hazards"]
    if h["atmosphere"] is not None:
        if h["minimum_ignition_energy"] is not None:
            raise Fail("hazards.minimum_ignition_energy", "give a named atmosphere or an ignition energy, not both")
        if atmospheres is not None:
            names = list(atmospheres)
            if h["atmosphere"].strip().lower() not in [n.lower() for n in names]:
                raise Fail("hazards.atmosphere", f"{h['atmosphere']!r} is not in the table of flammable atmospheres"
                                                 f"{suggest(h['atmosphere'], names)}; known: " + ", ".join(names)
                                                 + " (or give minimum_ignition_energy)")
    for i, c in enumerate(h["conductors"]):
        path = f"hazards.conductors[{i}]"
        given = [k for k in ("capacitance", "radius") if c[k] is not None]
        if c["area"] is not None or c["gap"] is not None:
            if c["area"] is None or c["gap"] is None:
                raise Fail(f"{path}.{'gap' if c['gap'] is None else 'area'}", "a plate needs both area and gap")
            given.append("area")
        if len(given) != 1:
            raise Fail(path, "give exactly one of capacitance, radius (sphere), or area and gap (plate); got "
                             + (", ".join(given) or "none"))
        if (c["voltage"] is None) == (c["charge"] is None):
            raise Fail(path, "give exactly one of voltage or charge")


def _surfaces_unique(d):
    seen = {}
    for group in ("electrodes", "grounded", "dielectrics"):
        for i, e in enumerate(d[group]):
            if e["name"] is None:
                e["name"] = f"{e.get('type', 'dielectric')}{i}"
            if e["name"] in seen:
                raise Fail(f"{group}[{i}].name", f"{e['name']!r} is already the name of {seen[e['name']]}; names are unique")
            seen[e["name"]] = f"{group}[{i}]"
