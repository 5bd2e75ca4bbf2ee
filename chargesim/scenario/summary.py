"""What ``chargesim check`` shows: the plan of a run, estimates, safety findings.

:func:`plan` returns a plain dict (the ``--json`` output); :func:`render_text`
prints it for people, ending with the cautions of
:mod:`chargesim.physics.hazards`. The memory and run-time figures are rough
estimates from per-particle costs, stated as such.
"""
import math

import numpy as np

from .. import coulomb
from ..physics import hazards
from .build import build, coulomb_options, mean_cube

# rough costs for the estimates (order of magnitude on a 2-core workstation)
_BYTES_PER_PARTICLE = 600  # state arrays, forces, integrator and evaluator workspace
_BYTES_PER_GRID_POINT = 32 + 8 * 3  # potential + field + coordinates
_FRAME_BYTES_PER_PARTICLE = 8 + 24 + 24 + 8 + 8 + 8 + 4  # id, position, velocity, charge, diameter, weight, pop
_SECONDS_PER_PARTICLE_STEP = 2e-6  # integrator, drag, boundaries, sources
_SECONDS_PER_PAIR = 2e-9  # direct sum, numba


def hazard_findings(scenario, built=None):
    """Safety findings (list of :class:`chargesim.hazards.Finding`) of a scenario."""
    d = scenario.data
    if built is None:
        built = build(scenario, fields_only=True)
    h, m = d["hazards"], d["medium"]
    fields = [s for s in built.sources if hasattr(s, "peak_field")]
    surface = fixed_surface_field(built)
    if surface is not None:
        fields.append(("fixed charges (particle surface)", surface))
    conductors = []
    for c in h["conductors"]:
        conductors.append(hazards.Conductor(c["name"], capacitance=c["capacitance"], voltage=c["voltage"],
                                            charge=c["charge"], radius=c["radius"], area=c["area"], gap=c["gap"],
                                            eps_r=c["eps_r"]))
    for p in h["people"]:
        conductors.append(hazards.Conductor(p["name"], capacitance=p["capacitance"], voltage=p["voltage"],
                                            person=True))
    gas = m["gas"] != "vacuum"
    # the load-time checks refuse atmosphere and minimum_ignition_energy together
    return hazards.assess(fields=fields if gas else (), conductors=conductors, atmosphere=h["atmosphere"],
                          temperature=m["temperature"], pressure=m["pressure"], margin=h["breakdown_margin"],
                          min_ignition_energy=h["minimum_ignition_energy"])


def fixed_surface_field(built):
    """Highest field at the surface of a fixed charged particle, V/m (None for point charges).

    Its own surface field k|q|/(eps_r R^2) (Gauss's law) plus the field of the
    other fixed charges and the applied sources at its centre: an upper
    estimate of the field on its surface.
    """
    fx = built.fixed
    if fx is None or fx.radii is None or not np.any(fx.radii > 0) or fx.charges.size == 0:
        return None
    from ..physics.constants import COULOMB_K

    r = np.where(fx.radii > 0, fx.radii, np.inf)
    own = COULOMB_K * np.abs(fx.charges) / (fx.eps_r * r * r)
    others = np.zeros_like(fx.positions)
    if fx.charges.size > 1:
        others = coulomb.field(fx.positions, fx.charges, eps_r=fx.eps_r, method="direct" if fx.charges.size < 5000
                               else "auto")
    for src in built.sources:
        others = others + src.field(fx.positions)
    return float(np.max(own + np.linalg.norm(others, axis=1)))


def _population_plan(d):
    rows = []
    for p in d["populations"]:
        placed = p["positions"].shape[0] if p["positions"] is not None else p["count"]
        fed = sum(i["rate"] * (i["stop"] - i["start"]) for i in d["inlets"] if i["population"] == p["name"])
        size = {"single": lambda: "point charges" if p["diameter"] is None else f"{p['diameter'] * 1e6:.4g} um",
                "lognormal": lambda: f"lognormal, median {p['median_diameter'] * 1e6:.4g} um, gsd {p['gsd']:.3g}",
                "list": lambda: f"{p['diameters'].size} sizes"}[p["distribution"]]()
        weight = p["weight"]
        for i in d["inlets"]:
            if i["population"] == p["name"] and i["mass_flow"] is not None:
                weight = max(1.0, i["mass_flow"] / (i["rate"] * p["density"] * math.pi / 6.0 * mean_cube(p)))
                break
        rows.append({"name": p["name"], "fixed": p["fixed"], "placed": int(placed), "fed": int(round(fed)),
                     "size": size, "weight": weight})
    return rows


def plan(scenario):
    """The plan of a run as a plain dict (what ``check --json`` prints).

    Keys: ``scenario``, ``title``, ``populations`` (per population: placed,
    fed, size), ``particles`` (total, moving, fixed), ``time`` (step, end,
    steps, integrator), ``coulomb`` (method asked and chosen), ``outputs``,
    ``estimate`` (memory bytes, run seconds; rough), ``hazards`` (findings:
    kind, value, threshold, units, message, name, severity; severity "info"
    marks the corona-onset information, not a hazard), ``cautions``.
    """
    d = scenario.data
    pops = _population_plan(d)
    moving = sum(r["placed"] + r["fed"] for r in pops if not r["fixed"])
    fixed = sum(r["placed"] for r in pops if r["fixed"])
    copt = coulomb_options(d)
    if copt["method"] == "off":
        chosen = "off"
    elif copt["method"] == "auto":
        chosen = coulomb.method_for(max(moving, fixed, 1), **copt["options"])
    else:
        chosen = copt["method"]
    steps = scenario.steps if moving else 0
    o = d["output"]
    frames = (int(d["time"]["end"] / o["frame_interval"]) + 1) if (o["frames"] and moving) else 0
    grid_points = sum(int(np.prod(g["shape"])) for g in o["field_grids"])
    n_avg = sum(r["placed"] + 0.5 * r["fed"] for r in pops if not r["fixed"])
    pair_cost = (n_avg * n_avg * _SECONDS_PER_PAIR if chosen == "direct"
                 else n_avg * max(1.0, math.log2(max(n_avg, 2))) * 50 * _SECONDS_PER_PAIR if chosen != "off" else 0.0)
    seconds = steps * (n_avg * _SECONDS_PER_PARTICLE_STEP + pair_cost) + grid_points * max(fixed, 1) * 5e-9
    memory = (moving + fixed) * _BYTES_PER_PARTICLE + grid_points * _BYTES_PER_GRID_POINT
    disk = frames * n_avg * _FRAME_BYTES_PER_PARTICLE + grid_points * _BYTES_PER_GRID_POINT
    findings = hazard_findings(scenario)
    return {
        "scenario": scenario.path,
        "title": scenario.name,
        "populations": pops,
        "particles": {"total": int(moving + fixed), "moving": int(moving), "fixed": int(fixed)},
        "time": {"step": d["time"]["step"], "end": d["time"]["end"], "steps": int(steps),
                 "integrator": d["time"]["integrator"]},
        "coulomb": {"method": copt["method"], "chosen": chosen,
                    "options": {k: (list(v) if isinstance(v, tuple) else v) for k, v in copt["options"].items()}},
        "outputs": {"frames": int(frames), "frame_interval": o["frame_interval"],
                    "checkpoint_interval": o["checkpoint_interval"],
                    "field_grids": [{"name": g["name"], "shape": list(g["shape"])} for g in o["field_grids"]]},
        "estimate": {"memory_bytes": int(memory), "output_bytes": int(disk), "run_seconds": float(seconds),
                     "note": "rough estimates from per-particle costs"},
        "hazards": [f.to_dict() for f in findings],
        "cautions": hazards.CAUTIONS,
    }


def _bytes(n):
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if n < 1000:
            return f"{n:.3g} {unit}"
        n /= 1000.0
    return f"{n:.3g} PB"


def _duration(s):
    if s < 120:
        return f"{s:.2g} s"
    if s < 7200:
        return f"{s / 60:.2g} min"
    return f"{s / 3600:.2g} h"


def render_text(p):
    """The plan as text for people, ending with the cautions."""
    lines = [f"Scenario: {p['title']} ({p['scenario']})", "", "Particles:"]
    for r in p["populations"]:
        kind = "fixed" if r["fixed"] else "moving"
        lines.append(f"  {r['name']}: {kind}, {r['size']}, {r['placed']} placed at start, "
                     f"{r['fed']} fed by inlets, each standing for {r['weight']:.3g} real particle(s)")
    t = p["time"]
    lines.append(f"  total {p['particles']['total']} ({p['particles']['moving']} moving, "
                 f"{p['particles']['fixed']} fixed)")
    lines.append("")
    if p["particles"]["moving"]:
        lines.append(f"Time: {t['steps']} steps of {t['step']:.3g} s to {t['end']:.3g} s, "
                     f"integrator {t['integrator']}")
    else:
        lines.append("Time: no moving particles: a static analysis (energy, forces, field grids)")
    c = p["coulomb"]
    lines.append(f"Coulomb sum: {c['method']}" + (f" -> {c['chosen']}" if c["method"] == "auto" else "")
                 + (f" (options: {', '.join(f'{k}={v}' for k, v in c['options'].items())})" if c["options"] else ""))
    o = p["outputs"]
    grids = ", ".join(f"{g['name']} {'x'.join(str(s) for s in g['shape'])}" for g in o["field_grids"]) or "none"
    lines.append(f"Outputs: {o['frames']} frames, field grids: {grids}")
    e = p["estimate"]
    lines.append(f"Estimate ({e['note']}): memory {_bytes(e['memory_bytes'])}, output {_bytes(e['output_bytes'])}, "
                 f"run time {_duration(e['run_seconds'])}")
    lines.append("")
    info = [f for f in p["hazards"] if f.get("severity") == "info"]
    found = [f for f in p["hazards"] if f.get("severity") != "info"]
    if info:
        lines.append("Corona electrodes:")
        for f in info:
            lines.append(f"  [{f['kind']}] {f['message']}")
        lines.append("")
    if found:
        lines.append(f"Safety findings ({len(found)}):")
        for f in found:
            lines.append(f"  [{f['kind']}] {f['message']}")
    else:
        lines.append("Safety findings: none for the fields, conductors and people described in the scenario.")
    lines.append("")
    lines.append(p["cautions"].rstrip())
    return "\n".join(lines)


def describe_result(scenario, result, output):
    """A few lines after ``chargesim run``."""
    lines = []
    if output:
        s = getattr(result, "summary", {}) or {}
        lines.append(f"results written to {output}")
    else:
        s = result
    if not s:
        return "\n".join(lines)
    if s.get("static") or "energy" in s:
        st = s.get("static", s)
        if "energy" in st:
            lines.append(f"fixed charges: {st.get('n_fixed', '?')}, energy {st['energy']:.6g} J")
    if s.get("emitted_mass"):
        lines.append(f"emitted {s['emitted_mass']:.4g} kg, deposited {s['deposited_mass']:.4g} kg, "
                     f"escaped {s['escaped_mass']:.4g} kg: collection efficiency "
                     f"{100 * s['collection_efficiency']:.2f} %")
    return "\n".join(lines)
