"""Run a scenario: build, step, record, write the field grids.

:func:`run` is the API behind ``chargesim run``; :func:`run_fields` behind
``chargesim field``. Output goes only where the caller says: nothing is
written without ``output``. The HDF5 writer (``chargesim.io``) keeps the file
under a temporary name until the run is complete, so a killed run never
leaves a half-written file under the final name, and ``resume=True``
continues it from its last checkpoint.
"""
import logging
import math
import os

import numpy as np

from .. import coulomb
from .build import build, coulomb_options, eps_medium, mean_cube
from .errors import ScenarioError

log = logging.getLogger(__name__)


def _steps_every(interval, dt):
    return max(1, int(round(interval / dt)))


def field_grid(built, grid):
    """Potential (nx, ny, nz) V and field (nx, ny, nz, 3) V/m of the applied
    sources and fixed charges on one ``[[output.field_grids]]`` entry."""
    axes = [np.linspace(grid["lower"][k], grid["upper"][k], grid["shape"][k]) for k in range(3)]
    mesh = np.meshgrid(*axes, indexing="ij")
    pts = np.ascontiguousarray(np.stack([m.reshape(-1) for m in mesh], axis=1))
    n = pts.shape[0]
    e = np.zeros((n, 3))
    phi = np.zeros(n)
    for s in built.sources:
        e += s.field(pts)
        phi += s.potential(pts)
    if built.fixed is not None:
        fx = built.fixed
        # fixed charges and their images in grounded conductors and dielectrics
        ipos, iq = [fx.positions], [fx.charges]
        for im in built.images:
            p, q = im.images(fx.positions, fx.charges)
            ipos.append(np.asarray(p).reshape(-1, 3))
            iq.append(np.asarray(q).reshape(-1))
        allp, allq = np.concatenate(ipos), np.concatenate(iq)
        radii = None
        if fx.radii is not None:
            radii = np.concatenate([fx.radii] + [np.zeros(a.shape[0]) for a in ipos[1:]])
        f, p = _open_sum(allp, allq, pts, fx.eps_r, radii, fx.method, fx.options)
        e += f
        phi += p
    shape = tuple(grid["shape"])
    return axes, phi.reshape(shape), e.reshape(shape + (3,))


def _open_sum(pos, q, targets, eps_r, radii, method, options):
    if radii is not None and not np.any(radii > 0):
        radii = None
    return coulomb.field_and_potential(pos, q, targets, eps_r=eps_r, method=method, radii=radii, **options)


def static_analysis(built):
    """Energy (J) and forces (N, (n, 3)) of the fixed charges, with their images."""
    fx = built.fixed
    if fx is None:
        return {}
    kw = dict(eps_r=fx.eps_r, method=fx.method, radii=fx.radii, **fx.options)
    energy = coulomb.energy(fx.positions, fx.charges, **kw)
    forces = coulomb.forces(fx.positions, fx.charges, **kw)
    for s in built.sources:
        forces = forces + fx.charges[:, None] * s.field(fx.positions)
    image_energy = 0.0
    for im in built.images:
        p, q = im.images(fx.positions, fx.charges)
        p = np.asarray(p).reshape(-1, 3)
        if p.shape[0] == 0:
            continue
        ef, ep = coulomb.field_and_potential(p, q, fx.positions, eps_r=fx.eps_r, method="direct")
        forces = forces + fx.charges[:, None] * ef
        image_energy += 0.5 * float(np.dot(fx.charges, ep))  # charge-image energy: half the image potential
    applied = 0.0
    for s in built.sources:
        applied += float(np.dot(fx.charges, s.potential(fx.positions)))
    return {"energy": energy, "image_energy": image_energy, "applied_energy": applied, "forces": forces,
            "n_fixed": int(fx.charges.size), "net_charge": float(fx.charges.sum())}


class _Progress:
    """A recorder in front of the writer: progress bar, end state into the summary."""

    def __init__(self, inner, sim, steps, show):
        self.inner, self.sim = inner, sim
        self.bar = None
        if show:
            from tqdm import tqdm

            self.bar = tqdm(total=steps, initial=sim.step, unit="step", desc="chargesim", leave=False)
        self._last = sim.step

    def start(self, info):
        self.inner.start(info)

    def frame(self, step, time, state):
        self.inner.frame(step, time, state)

    def deposits(self, records):
        self.inner.deposits(records)

    def escapes(self, records):
        self.inner.escapes(records)

    def diagnostics(self, step, time, values):
        self.inner.diagnostics(step, time, values)
        if self.bar is not None:
            self.bar.update(step - self._last)
            self._last = step

    def checkpoint(self, snapshot):
        self.inner.checkpoint(snapshot)

    def finish(self, summary):
        if self.bar is not None:
            self.bar.close()
        summary = dict(summary)
        summary["state"] = self.sim.system.state
        self.inner.finish(summary)


class _Null:
    def start(self, info): pass
    def frame(self, step, time, state): pass
    def deposits(self, records): pass
    def escapes(self, records): pass
    def diagnostics(self, step, time, values): pass
    def checkpoint(self, snapshot): pass
    def finish(self, summary): pass


def run_info(scenario, built):
    """Extra run information for the results file and the report."""
    d = scenario.data
    info = dict(built.info)
    info["scenario_name"] = scenario.name
    info["hazards"] = [f.to_dict() for f in _hazard_findings(scenario, built)]
    moving = [p for p in d["populations"] if not p["fixed"]]
    if moving:
        p = moving[0]
        lo_d = p["min_diameter"] if p["distribution"] == "lognormal" else None
        if p["distribution"] == "lognormal":
            edges = np.geomspace(lo_d, p["max_diameter"], 13)
        elif p["distribution"] == "list":
            ds = np.sort(p["diameters"])
            edges = np.concatenate([[ds[0] / 1.2], np.sqrt(ds[1:] * ds[:-1]), [ds[-1] * 1.2]]) if ds.size > 1 \
                else np.array([ds[0] / 1.2, ds[0] * 1.2])
        else:
            edges = np.array([p["diameter"] / 1.2, p["diameter"] * 1.2])
        info["size_bins"] = edges.tolist()
        w = _migration_velocity(scenario, built, p, np.sqrt(edges[1:] * edges[:-1]))
        if w is not None:
            info["migration_velocity"] = w.tolist()
        aq = _specific_collection_area(d)
        if aq is not None:
            info["collection_area_per_flow"] = aq
    return info


def _migration_velocity(scenario, built, pdata, diameters):
    """Deutsch migration velocity w = q E B per size (the collecting field is the
    mean field between the electrodes), m/s; None without a collecting field."""
    from ..physics import aerosol

    d = scenario.data
    e_mean = None
    for e in d["electrodes"]:
        if e["type"] == "wire_plate":
            e_mean = abs(e["voltage"]) / (0.5 * abs(e["plates"][1] - e["plates"][0]))
        elif e["type"] == "parallel_plates":
            e_mean = abs(e["voltage_upper"] - e["voltage_lower"]) / (e["upper"] - e["lower"])
        elif e["type"] == "wire_in_tube":
            e_mean = abs(e["voltage"]) / (e["tube_radius"] - e["wire_radius"])
        if e_mean:
            break
    if not e_mean or built.system is None:
        return None
    pop = next(p for p in built.system.populations if p.name == pdata["name"])
    q = np.abs(pop.charge.assign(diameters, pop.density, pop.eps_p))
    m = d["medium"]
    return np.asarray(aerosol.migration_velocity(diameters, q, e_mean, m["temperature"], m["pressure"],
                                                 m["viscosity"]), dtype=np.float64)


def _specific_collection_area(d):
    """A/Q of a wire-plate duct with a uniform flow along y, s/m."""
    f = d["flow"]
    for e in d["electrodes"]:
        if e["type"] == "wire_plate":
            lo, hi = d["domain"]["lower"], d["domain"]["upper"]
            length, height = hi[1] - lo[1], hi[2] - lo[2]
            gap = abs(e["plates"][1] - e["plates"][0])
            u = f["mean_velocity"] if f["profile"] == "channel" else abs(float(f["velocity"][1]))
            if not u > 0:
                return None
            return float(2 * length * height / (u * gap * height))
    return None


def _hazard_findings(scenario, built):
    from .summary import hazard_findings

    return hazard_findings(scenario, built)


def _threads(threads):
    if threads is None:
        return
    import numba

    numba.set_num_threads(min(int(threads), numba.config.NUMBA_NUM_THREADS))


def run(scenario, output=None, overwrite=False, resume=False, quiet=True, threads=None):
    """Run a scenario.

    Parameters
    ----------
    scenario : Scenario or str or os.PathLike
        A loaded scenario, or the path of a scenario file.
    output : str or os.PathLike, optional
        HDF5 results file. None: nothing is written; the summary is returned.
    overwrite : bool
        Replace an existing results file.
    resume : bool
        Continue a killed run of ``output`` from its last checkpoint (the
        same scenario); a finished file is left as it is.
    quiet : bool
        No progress bar.
    threads : int, optional
        Numba threads (bitwise reproducibility holds for one thread count).

    Returns
    -------
    chargesim.io.Results or dict
        The opened results file, or (no output) the run summary with
        ``static`` results of fixed charges when there are any.
    """
    from .load import Scenario, load_scenario

    if not isinstance(scenario, Scenario):
        scenario = load_scenario(scenario)
    _threads(threads)
    built = build(scenario)
    d = scenario.data
    info = run_info(scenario, built)
    if built.system is None:
        return _run_static(scenario, built, info, output, overwrite, resume)
    from ..motion import Simulation

    dt = d["time"]["step"]
    o = d["output"]
    sim = Simulation(built.system, dt, integrator=d["time"]["integrator"],
                     frame_every=_steps_every(o["frame_interval"], dt) if o["frames"] else 0,
                     diagnostics_every=_steps_every(o["diagnostics_interval"], dt),
                     checkpoint_every=_steps_every(o["checkpoint_interval"], dt) if output else 0)
    writer = None
    if output is not None:
        writer = _open_writer(scenario, output, overwrite, resume, sim)
        if writer is None:  # resumed a finished run: nothing to do
            from ..io import open_results

            return open_results(output)
        _write_grids(scenario, built, writer)
    rec = _Progress(writer if writer is not None else _Null(), sim, scenario.steps, not quiet)
    _InfoWrap.install(sim, info)
    try:
        summary = sim.run(t_end=d["time"]["end"], recorder=rec)
    except BaseException:
        if writer is not None:
            writer.close()  # the partial file stays resumable
        raise
    if output is None:
        summary["static"] = static_analysis(built)
        return summary
    from ..io import open_results

    return open_results(output)


class _InfoWrap:
    """Adds the scenario's run information to ``Simulation.info()``."""

    @staticmethod
    def install(sim, extra):
        base = sim.info

        def info():
            out = base()
            out.update(extra)
            return out

        sim.info = info


def _open_writer(scenario, output, overwrite, resume, sim):
    from ..io import ResultsWriter, RunAlreadyFinished, open_for_resume

    path = os.fspath(output)
    if resume:
        try:
            writer, snapshot = open_for_resume(path, scenario_text=scenario.text, seed=scenario.seed)
        except RunAlreadyFinished:
            log.warning("%s: the run has finished already; nothing to resume", path)
            return None
        except ValueError as exc:
            raise ScenarioError(path, "", f"cannot resume: {exc}") from None
        if snapshot is not None:
            sim.restore(snapshot)
            log.info("%s: resuming at step %d (t = %g s)", path, sim.step, sim.time)
        return writer
    try:
        return ResultsWriter(path, scenario_text=scenario.text, seed=scenario.seed, overwrite=overwrite)
    except FileExistsError:
        raise ScenarioError(path, "", "exists already; use overwrite=True (--overwrite) to replace it") from None


def _write_grids(scenario, built, writer):
    for g in scenario.data["output"]["field_grids"]:
        axes, phi, e = field_grid(built, g)
        writer.write_field(g["name"], *axes, potential=phi, field=e,
                           attrs={"sources": "applied sources and fixed charges"})


def _run_static(scenario, built, info, output, overwrite, resume=False):
    """Fixed charges only: energy, forces and field grids; no time stepping."""
    res = static_analysis(built)
    if output is None:
        return {"static": res, "steps": 0}
    from ..io import ResultsWriter, open_results
    from ..motion import ParticleState

    path = os.fspath(output)
    if resume and os.path.exists(path):
        done = open_results(path)
        if done.finished:
            log.warning("%s: the run has finished already; nothing to resume", path)
            return done
    try:
        w = ResultsWriter(path, scenario_text=scenario.text, seed=scenario.seed, overwrite=overwrite)
    except FileExistsError:
        raise ScenarioError(path, "", "exists already; use overwrite=True (--overwrite) to replace it") from None
    fx = built.fixed
    info = dict(info)
    info["static"] = True
    info["population_names"] = sorted(set(built.fixed_names))
    w.start(info)
    _write_grids(scenario, built, w)
    st = ParticleState()
    names = sorted(set(built.fixed_names))
    pop_idx = np.array([names.index(n) for n in built.fixed_names], dtype=np.int32)
    radii = fx.radii if fx.radii is not None else np.zeros(fx.charges.size)
    st.add(fx.positions, 0.0, diameter=np.where(radii > 0, 2 * radii, 1e-9), density=1000.0,
           charge=fx.charges, population=pop_idx)
    f = res["forces"]
    summary = {"energy": res["energy"], "image_energy": res["image_energy"], "applied_energy": res["applied_energy"],
               "net_charge": res["net_charge"], "n_fixed": res["n_fixed"],
               "max_force": float(np.max(np.linalg.norm(f, axis=1))) if f.size else 0.0,
               "forces": f.tolist() if f.shape[0] <= 10000 else None,
               "emitted_mass": 0.0, "deposited_mass": 0.0, "escaped_mass": 0.0,
               "collection_efficiency": math.nan, "state": st}
    w.frame(0, 0.0, st)
    w.finish(summary)
    return open_results(path)


def run_fields(scenario, output, overwrite=False):
    """Write only the field grids of the applied sources and fixed charges.

    Returns
    -------
    list of str
        Names of the grids written.
    """
    from ..io import ResultsWriter

    built = build(scenario, fields_only=True)
    path = os.fspath(output)
    try:
        w = ResultsWriter(path, scenario_text=scenario.text, seed=scenario.seed, overwrite=overwrite)
    except FileExistsError:
        raise ScenarioError(path, "", "exists already; use --overwrite to replace it") from None
    names = []
    for g in scenario.data["output"]["field_grids"]:
        axes, phi, e = field_grid(built, g)
        w.write_field(g["name"], *axes, potential=phi, field=e,
                      attrs={"sources": "applied sources and fixed charges"})
        names.append(g["name"])
    w.finish({})
    return names


__all__ = ["run", "run_fields", "field_grid", "static_analysis", "eps_medium", "coulomb_options", "mean_cube"]
