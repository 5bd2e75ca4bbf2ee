"""``chargesim relax LAYOUT.toml``: read a layout file, relax it, write HDF5 and a figure.

The layout file (TOML, quantities as unit strings, converted by the scenario
layer's pint registry)::

    [layout]                 # all optional
    title = "..."
    eps_r = 1.0              # relative permittivity of the medium
    tolerance = 1e-8         # relative residual (see chargesim.layout)
    restarts = 0             # extra random starts (needs seed)
    seed = 1
    max_iterations = 5000

    [constraint]             # optional; kind = "none" | "sphere" | "plane" | "box"
    kind = "plane"
    point = ["0 mm", "0 mm", "0 mm"]      # plane
    normal = [0, 0, 1]
    # radius = "20 mm", centre = [...]    # sphere
    # lower = [...], upper = [...]        # box walls

    [field]                  # optional applied uniform field
    uniform = ["0 V/m", "0 V/m", "-30 kV/m"]

    [[particles]]            # one or more groups
    name = "beads"
    charge = "-8 pC"
    fixed = false
    positions = [["1 mm", "0 mm", "0 mm"], ...]   # or
    random = { count = 40, lower = [...], upper = [...] }   # (seeded) or
    ring = { count = 12, radius = "30 mm", centre = [...], normal = [0, 0, 1] }

    [output]                 # optional field grid (an axis-aligned plane)
    grid = { axis = "z", at = "1 mm", lower = ["-40 mm", "-40 mm"], upper = ["40 mm", "40 mm"], shape = [120, 120] }

The results file follows the project's results conventions (root attributes
format, version, program version, creation time, the layout text, seed; a
``units`` attribute on every dataset; the field grid under
``/fields/layout/`` through :class:`chargesim.io.ResultsWriter`, with its
XDMF sidecar), plus ``/layout/`` and ``/stability/`` (see :func:`write_results`).
"""
import difflib
import json
import math
import os
import sys

import numpy as np

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

from .. import coulomb
from ..scenario.errors import ScenarioError
from ..scenario.units import to_si

_TOP = {"layout", "constraint", "field", "particles", "output"}
_LAYOUT_KEYS = {"title", "eps_r", "tolerance", "restarts", "seed", "max_iterations", "description"}
_CONSTRAINT_KEYS = {"none": {"kind"}, "sphere": {"kind", "radius", "centre"},
                    "plane": {"kind", "point", "normal"}, "box": {"kind", "lower", "upper"}}
_PARTICLE_KEYS = {"name", "charge", "fixed", "positions", "random", "ring"}
_GRID_KEYS = {"axis", "at", "lower", "upper", "shape"}


class LayoutSpec:
    """A layout file read and checked: SI arrays and relax arguments."""

    def __init__(self, path, text, title, positions, charges, fixed, groups, relax_kwargs, grid, seed):
        self.path = path
        self.text = text
        self.title = title
        self.positions = positions
        self.charges = charges
        self.fixed = fixed
        self.groups = groups
        self.relax_kwargs = relax_kwargs
        self.grid = grid
        self.seed = seed


def _unknown(file, path, table, allowed):
    for key in table:
        if key not in allowed:
            near = difflib.get_close_matches(key, sorted(allowed), n=1)
            hint = f"; did you mean {near[0]!r}?" if near else ""
            raise ScenarioError(file, f"{path}.{key}" if path else key,
                                f"unknown key {key!r}{hint} (allowed: {', '.join(sorted(allowed))})")


def _qty(file, path, value, unit):
    try:
        return to_si(value, unit)
    except ValueError as exc:
        raise ScenarioError(file, path, f"{value!r}: {exc}") from None


def _vec(file, path, value, unit, n=3):
    if not isinstance(value, list) or len(value) != n:
        raise ScenarioError(file, path, f"{value!r}: expected a list of {n} values in {unit}")
    return np.array([_qty(file, f"{path}[{i}]", v, unit) for i, v in enumerate(value)])


def _int(file, path, value, low=0):
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        raise ScenarioError(file, path, f"{value!r}: expected an integer >= {low}")
    return value


def _table(file, path, value):
    if not isinstance(value, dict):
        raise ScenarioError(file, path, f"{value!r}: expected a table")
    return value


def load_layout(path):
    """Read and check a layout file.

    Parameters
    ----------
    path : str or os.PathLike
        The TOML layout file.

    Returns
    -------
    LayoutSpec

    Raises
    ------
    ScenarioError (a ValueError)
        Naming the file, the key and the bad value.
    """
    file = os.fspath(path)
    try:
        with open(file, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise ScenarioError(file, "", f"cannot read the layout file ({exc.strerror or exc})") from None
    text = raw.decode("utf-8", errors="replace")
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(file, "", f"not valid TOML: {exc}") from None
    _unknown(file, "", doc, _TOP)

    lay = _table(file, "layout", doc.get("layout", {}))
    _unknown(file, "layout", lay, _LAYOUT_KEYS)
    title = str(lay.get("title", os.path.splitext(os.path.basename(file))[0]))
    eps_r = _qty(file, "layout.eps_r", lay.get("eps_r", 1.0), "1")
    if eps_r < 1:
        raise ScenarioError(file, "layout.eps_r", f"{eps_r!r}: a relative permittivity is >= 1")
    tol = _qty(file, "layout.tolerance", lay.get("tolerance", 1e-8), "1")
    if not tol > 0:
        raise ScenarioError(file, "layout.tolerance", f"{tol!r}: expected a positive number")
    restarts = _int(file, "layout.restarts", lay.get("restarts", 0))
    seed = lay.get("seed")
    if seed is not None:
        seed = _int(file, "layout.seed", seed)
    if restarts and seed is None:
        raise ScenarioError(file, "layout.seed", "restarts need a seed (an integer) for reproducible random starts")
    max_it = _int(file, "layout.max_iterations", lay.get("max_iterations", 5000), low=1)
    rng = np.random.default_rng(seed if seed is not None else 0)

    con = _table(file, "constraint", doc.get("constraint", {"kind": "none"}))
    kind = con.get("kind", "none")
    if kind not in _CONSTRAINT_KEYS:
        raise ScenarioError(file, "constraint.kind", f"{kind!r}: allowed are {', '.join(map(repr, _CONSTRAINT_KEYS))}")
    _unknown(file, "constraint", con, _CONSTRAINT_KEYS[kind])
    kwargs = {"constraint": kind, "eps_r": eps_r, "tolerance": tol, "restarts": restarts,
              "max_iterations": max_it}
    if kind == "sphere":
        if "radius" not in con:
            raise ScenarioError(file, "constraint.radius", "a sphere needs radius (e.g. \"20 mm\")")
        r = _qty(file, "constraint.radius", con["radius"], "m")
        if r <= 0:
            raise ScenarioError(file, "constraint.radius", f"{con['radius']!r}: must be positive")
        kwargs["radius"] = r
        kwargs["centre"] = _vec(file, "constraint.centre", con.get("centre", [0, 0, 0]), "m")
    elif kind == "plane":
        kwargs["point"] = _vec(file, "constraint.point", con.get("point", [0, 0, 0]), "m")
        normal = _vec(file, "constraint.normal", con.get("normal", [0, 0, 1]), "1")
        if not np.any(normal):
            raise ScenarioError(file, "constraint.normal", f"{con.get('normal')!r}: must not be zero")
        kwargs["normal"] = normal
    elif kind == "box":
        for key in ("lower", "upper"):
            if key not in con:
                raise ScenarioError(file, f"constraint.{key}", "a box needs lower and upper corners")
        lo = _vec(file, "constraint.lower", con["lower"], "m")
        hi = _vec(file, "constraint.upper", con["upper"], "m")
        if np.any(hi <= lo):
            raise ScenarioError(file, "constraint.upper", f"{con['upper']!r}: must exceed lower on every axis")
        kwargs["bounds"] = (lo, hi)

    if "field" in doc:
        fld = _table(file, "field", doc["field"])
        _unknown(file, "field", fld, {"uniform"})
        if "uniform" in fld:
            kwargs["field"] = _vec(file, "field.uniform", fld["uniform"], "V/m")

    groups = doc.get("particles")
    if not isinstance(groups, list) or not groups:
        raise ScenarioError(file, "particles", "at least one [[particles]] group is required")
    pos, q, fixed, names = [], [], [], []
    for g, grp in enumerate(groups):
        where = f"particles[{g}]"
        grp = _table(file, where, grp)
        _unknown(file, where, grp, _PARTICLE_KEYS)
        if "charge" not in grp:
            raise ScenarioError(file, f"{where}.charge", "every group needs a charge (e.g. \"-8 pC\")")
        charge = _qty(file, f"{where}.charge", grp["charge"], "C")
        is_fixed = grp.get("fixed", False)
        if not isinstance(is_fixed, bool):
            raise ScenarioError(file, f"{where}.fixed", f"{is_fixed!r}: expected true or false")
        ways = [k for k in ("positions", "random", "ring") if k in grp]
        if len(ways) != 1:
            raise ScenarioError(file, where, "give exactly one of positions, random, ring")
        way = ways[0]
        if way == "positions":
            pts = grp["positions"]
            if not isinstance(pts, list) or not pts:
                raise ScenarioError(file, f"{where}.positions", f"{pts!r}: expected a list of [x, y, z] points")
            xyz = np.array([_vec(file, f"{where}.positions[{i}]", p, "m") for i, p in enumerate(pts)])
        elif way == "random":
            rnd = _table(file, f"{where}.random", grp["random"])
            _unknown(file, f"{where}.random", rnd, {"count", "lower", "upper"})
            count = _int(file, f"{where}.random.count", rnd.get("count"), low=1)
            lo = _vec(file, f"{where}.random.lower", rnd.get("lower"), "m")
            hi = _vec(file, f"{where}.random.upper", rnd.get("upper"), "m")
            if np.any(hi < lo):
                raise ScenarioError(file, f"{where}.random.upper", f"{rnd.get('upper')!r}: must not be below lower")
            xyz = lo + (hi - lo) * rng.random((count, 3))
        else:
            ring = _table(file, f"{where}.ring", grp["ring"])
            _unknown(file, f"{where}.ring", ring, {"count", "radius", "centre", "normal", "phase"})
            count = _int(file, f"{where}.ring.count", ring.get("count"), low=1)
            radius = _qty(file, f"{where}.ring.radius", ring.get("radius"), "m")
            if radius <= 0:
                raise ScenarioError(file, f"{where}.ring.radius", f"{ring.get('radius')!r}: must be positive")
            centre = _vec(file, f"{where}.ring.centre", ring.get("centre", [0, 0, 0]), "m")
            normal = _vec(file, f"{where}.ring.normal", ring.get("normal", [0, 0, 1]), "1")
            if not np.any(normal):
                raise ScenarioError(file, f"{where}.ring.normal", "must not be zero")
            phase = _qty(file, f"{where}.ring.phase", ring.get("phase", 0.0), "1")
            n = normal / np.linalg.norm(normal)
            e = np.zeros(3)
            e[np.argmin(np.abs(n))] = 1.0
            e1 = np.cross(n, e)
            e1 /= np.linalg.norm(e1)
            e2 = np.cross(n, e1)
            ang = phase + 2 * math.pi * np.arange(count) / count
            xyz = centre + radius * (np.outer(np.cos(ang), e1) + np.outer(np.sin(ang), e2))
        pos.append(xyz)
        q.append(np.full(len(xyz), charge))
        fixed.append(np.full(len(xyz), is_fixed))
        names.append((str(grp.get("name", f"group {g}")), len(xyz), charge, is_fixed))
    positions = np.vstack(pos)
    charges = np.concatenate(q)
    fixed_mask = np.concatenate(fixed)
    if restarts:
        kwargs["rng"] = np.random.default_rng(seed)

    grid = None
    out = _table(file, "output", doc.get("output", {}))
    _unknown(file, "output", out, {"grid"})
    if "grid" in out:
        grd = _table(file, "output.grid", out["grid"])
        _unknown(file, "output.grid", grd, _GRID_KEYS)
        axis = grd.get("axis", "z")
        if axis not in ("x", "y", "z"):
            raise ScenarioError(file, "output.grid.axis", f"{axis!r}: allowed are 'x', 'y', 'z'")
        grid = {"axis": "xyz".index(axis)}
        if "at" in grd:
            grid["at"] = _qty(file, "output.grid.at", grd["at"], "m")
        if "lower" in grd or "upper" in grd:
            grid["lower"] = _vec(file, "output.grid.lower", grd.get("lower"), "m", n=2)
            grid["upper"] = _vec(file, "output.grid.upper", grd.get("upper"), "m", n=2)
            if np.any(grid["upper"] <= grid["lower"]):
                raise ScenarioError(file, "output.grid.upper", f"{grd.get('upper')!r}: must exceed lower")
        if "shape" in grd:
            shp = grd["shape"]
            if not isinstance(shp, list) or len(shp) != 2:
                raise ScenarioError(file, "output.grid.shape", f"{shp!r}: expected [n1, n2]")
            grid["shape"] = (_int(file, "output.grid.shape[0]", shp[0], 2), _int(file, "output.grid.shape[1]", shp[1], 2))
    return LayoutSpec(file, text, title, positions, charges, fixed_mask, names, kwargs, grid, seed)


# -- field grid ---------------------------------------------------------------------
def field_grid(spec, result, grid=None):
    """Field and potential of the relaxed layout on an axis-aligned plane.

    Returns
    -------
    dict with x, y, z (m, rectilinear axes, one of length 1), potential (V,
    (nx, ny, nz)), field (V/m, (nx, ny, nz, 3)), axis, at.
    """
    grid = dict(grid or {})
    x = result.positions
    kw = spec.relax_kwargs
    d = result.length_scale if math.isfinite(result.length_scale) else 1.0
    kind = kw.get("constraint", "none")
    if "axis" not in grid:
        grid["axis"] = int(np.argmax(np.abs(kw["normal"]))) if kind == "plane" else 2
    ax = grid["axis"]
    if "at" not in grid:
        if kind == "plane":
            # just above the sheet: the field the beads make there
            grid["at"] = float(kw["point"][ax]) + 0.5 * d
        elif kind == "sphere":
            grid["at"] = float(kw["centre"][ax])
        else:
            grid["at"] = float(np.mean(x[:, ax]))
    inplane = [i for i in range(3) if i != ax]
    if "lower" not in grid:
        lo = x[:, inplane].min(axis=0)
        hi = x[:, inplane].max(axis=0)
        pad = np.maximum(0.15 * (hi - lo), 2.0 * d)
        grid["lower"], grid["upper"] = lo - pad, hi + pad
    shape = grid.get("shape", (121, 121))
    axes = [None, None, None]
    axes[inplane[0]] = np.linspace(grid["lower"][0], grid["upper"][0], shape[0])
    axes[inplane[1]] = np.linspace(grid["lower"][1], grid["upper"][1], shape[1])
    axes[ax] = np.array([grid["at"]])
    mesh = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1)
    pts = mesh.reshape(-1, 3)
    eps = kw.get("eps_r", 1.0)
    e, p = coulomb.field_and_potential(x, spec.charges, pts, eps_r=eps, method="auto" if _tree_ok() else "direct")
    if "field" in kw:
        e = e + kw["field"]
        p = p - pts @ kw["field"]
    gshape = mesh.shape[:3]
    return {"x": axes[0], "y": axes[1], "z": axes[2], "potential": p.reshape(gshape),
            "field": e.reshape(gshape + (3,)), "axis": ax, "at": grid["at"], "inplane": inplane}


def _tree_ok():
    try:
        coulomb._module("tree")
        return True
    except ModuleNotFoundError:
        return False


# -- results file ----------------------------------------------------------------------
def _ds(group, name, data, units, **kw):
    ds = group.create_dataset(name, data=data, **kw)
    ds.attrs["units"] = units
    return ds


def write_results(path, spec, result, grid, *, overwrite=False):
    """Write the relaxed layout to an HDF5 results file.

    Layout (besides the root attributes and ``/fields/layout/`` of the
    results conventions): ``/layout/`` position, initial_position (m),
    charge (C), fixed (1), force, residual_force (N), nearest_distance (m),
    nearest_index (1), energy, pair_energy, field_energy (J), residual,
    iterations, converged (1); ``/stability/`` eigenvalues,
    trivial_eigenvalues, unstable_eigenvalues, soft_eigenvalues (J/m^2),
    modes (1), counts as attributes.
    """
    import h5py

    from ..io import ResultsWriter

    if os.path.exists(path):
        if not overwrite:
            raise ValueError(f"{path} exists (pass --overwrite to replace it)")
        os.remove(path)
    writer = ResultsWriter(path, scenario_text=spec.text, seed=spec.seed, overwrite=True)
    writer.write_field("layout", grid["x"], grid["y"], grid["z"], potential=grid["potential"], field=grid["field"],
                       attrs={"description": "field of the relaxed layout (and the applied field) on a plane"})
    writer.finish({})
    from .. import layout as _layout

    _, nn_index = _layout.nearest_neighbours(result.positions)
    with h5py.File(path, "a") as f:
        f.attrs["content"] = "relaxed layout"
        f.attrs["layout_file"] = os.path.basename(spec.path)
        f.attrs["layout"] = spec.text
        g = f.create_group("layout")
        g.attrs["title"] = spec.title
        g.attrs["constraint"] = json.dumps({k: (v.tolist() if isinstance(v, np.ndarray) else v)
                                            for k, v in result.constraint.items()})
        g.attrs["coulomb_method"] = result.method
        g.attrs["minimizer"] = result.minimizer
        g.attrs["message"] = result.message
        g.attrs["residual_definition"] = ("max tangential force on a free particle / (k q_rms^2 / (eps_r d^2)), "
                                          "d = median nearest-neighbour distance")
        _ds(g, "position", result.positions, "m")
        _ds(g, "initial_position", spec.positions, "m")
        _ds(g, "charge", spec.charges, "C")
        _ds(g, "fixed", spec.fixed.astype(np.uint8), "1")
        _ds(g, "force", result.forces, "N")
        _ds(g, "residual_force", result.residual_forces, "N")
        _ds(g, "nearest_distance", result.nearest_distance, "m")
        _ds(g, "nearest_index", nn_index, "1")
        _ds(g, "energy", result.energy, "J")
        _ds(g, "pair_energy", result.pair_energy, "J")
        _ds(g, "field_energy", result.field_energy, "J")
        _ds(g, "start_energies", result.start_energies, "J")
        _ds(g, "residual", result.residual, "1")
        _ds(g, "force_scale", result.force_scale, "N")
        _ds(g, "iterations", result.iterations, "1")
        _ds(g, "converged", np.uint8(result.converged), "1")
        st = result.stability
        s = f.create_group("stability")
        if st is None:
            s.attrs["skipped"] = result.message
            return
        for key in ("n_trivial", "n_unstable", "n_soft", "dimension"):
            s.attrs[key] = int(getattr(st, key))
        s.attrs["stable"] = bool(st.stable)
        s.attrs["complete"] = bool(st.complete)
        s.attrs["method"] = st.method
        s.attrs["zero_tolerance"] = st.zero_tolerance
        s.attrs["soft_tolerance"] = st.soft_tolerance
        s.attrs["thresholds"] = ("unstable: eigenvalue < -zero_tolerance * stiffness_scale; soft: from there "
                                 "up to soft_tolerance * stiffness_scale")
        _ds(s, "eigenvalues", st.eigenvalues, "J/m^2")
        _ds(s, "trivial_eigenvalues", st.trivial_eigenvalues, "J/m^2")
        _ds(s, "unstable_eigenvalues", st.unstable_eigenvalues, "J/m^2")
        _ds(s, "soft_eigenvalues", st.soft_eigenvalues, "J/m^2")
        _ds(s, "stiffness_scale", st.stiffness_scale, "J/m^2")
        _ds(s, "modes", st.modes, "1")


# -- figure ---------------------------------------------------------------------------------
def _length_unit(extent):
    for unit, f in (("µm", 1e-6), ("mm", 1e-3), ("cm", 1e-2), ("m", 1.0)):
        if extent < 300 * f:
            return unit, f
    return "m", 1.0


def write_figure(path, spec, result, grid):
    """Report figure: the layout, the field map and the stability spectrum (PNG)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.colors import LogNorm

    x = result.positions
    ax_n = grid["axis"]
    i0, i1 = grid["inplane"]
    names = "xyz"
    extent = float(np.ptp(np.concatenate((grid[names[i0]], grid[names[i1]]))))
    unit, uf = _length_unit(extent)
    fig, axes = plt.subplots(1, 3, figsize=(16, 5.2), constrained_layout=True)
    fixed = spec.fixed
    pos_q = spec.charges > 0

    a = axes[0]
    if spec.relax_kwargs.get("constraint") == "sphere":
        fig.delaxes(a)
        a = fig.add_subplot(1, 3, 1, projection="3d")
        for m, lab, c in ((~fixed, "free", "tab:blue"), (fixed, "fixed", "tab:red")):
            if m.any():
                a.scatter(*(x[m] / uf).T, s=12, c=c, label=lab)
        a.set_box_aspect((1, 1, 1))
        a.set_xlabel(f"x ({unit})")
        a.set_ylabel(f"y ({unit})")
        a.set_zlabel(f"z ({unit})", labelpad=2)
    else:
        a.scatter(spec.positions[~fixed, i0] / uf, spec.positions[~fixed, i1] / uf, s=10, facecolors="none",
                  edgecolors="0.6", label="given start")
        for m, lab, mk in ((~fixed & pos_q, "free, q > 0", "o"), (~fixed & ~pos_q, "free, q < 0", "o"),
                           (fixed & pos_q, "fixed, q > 0", "s"), (fixed & ~pos_q, "fixed, q < 0", "s")):
            if m.any():
                a.scatter(x[m, i0] / uf, x[m, i1] / uf, s=22, marker=mk,
                          c="tab:red" if "q > 0" in lab else "tab:blue",
                          edgecolors="k" if "fixed" in lab else "none", label=lab)
        a.set_aspect("equal")
        a.set_xlabel(f"{names[i0]} ({unit})")
        a.set_ylabel(f"{names[i1]} ({unit})")
    a.set_title(f"{spec.title}: relaxed layout\nE = {result.energy:.6g} J, residual {result.residual:.1e}")
    a.legend(loc="best", fontsize=8)

    a = axes[1]
    e = np.linalg.norm(grid["field"], axis=-1).squeeze(axis=ax_n)
    p = grid["potential"].squeeze(axis=ax_n)
    g0, g1 = grid[names[i0]] / uf, grid[names[i1]] / uf
    emag = np.where(e > 0, e, np.nan)
    lo = np.nanpercentile(emag, 1)
    hi = np.nanmax(emag)
    im = a.pcolormesh(g0, g1, e.T / 1e3, shading="auto", cmap="viridis", norm=LogNorm(vmin=lo / 1e3, vmax=hi / 1e3))
    fig.colorbar(im, ax=a, label="|E| (kV/m)")
    a.contour(g0, g1, p.T, levels=15, colors="w", linewidths=0.6, alpha=0.7)
    a.scatter(x[:, i0] / uf, x[:, i1] / uf, s=6, c="k", label="charges (projected)")
    a.legend(loc="upper right", fontsize=8)
    a.set_aspect("equal")
    a.set_xlabel(f"{names[i0]} ({unit})")
    a.set_ylabel(f"{names[i1]} ({unit})")
    a.set_title(f"field magnitude and potential contours (white)\non the plane {names[ax_n]} = "
                f"{grid['at'] / uf:.3g} {unit}")

    a = axes[2]
    st = result.stability
    if st is None:
        a.text(0.5, 0.5, f"stability not computed:\n{result.message}", ha="center", va="center",
               transform=a.transAxes, wrap=True)
        a.set_axis_off()
        fig.savefig(path, dpi=110)
        plt.close(fig)
        return
    ev = st.eigenvalues
    if ev.size:
        idx = np.arange(ev.size)
        colours = np.where(ev < -st.zero_tolerance * st.stiffness_scale, "tab:red",
                           np.where(ev < st.soft_tolerance * st.stiffness_scale, "tab:orange", "tab:green"))
        a.scatter(idx, ev, s=10, c=colours)
        soft_line = st.soft_tolerance * st.stiffness_scale
        if np.all(ev > 0):
            a.set_yscale("log")
        else:
            a.axhline(0.0, color="k", lw=0.6)
            a.set_yscale("symlog", linthresh=max(soft_line, 1e-300))
        a.axhline(soft_line, color="tab:orange", lw=0.8, ls="--", label="soft threshold")
        a.legend(loc="lower right", fontsize=8)
    a.set_xlabel("mode index (ascending)")
    a.set_ylabel("Hessian eigenvalue (J/m²)")
    verdict = "stable" if st.stable and st.n_soft == 0 else ("marginal (soft modes)" if st.stable else "UNSTABLE")
    a.set_title(f"stability: {verdict}\n{st.n_unstable} unstable (red), {st.n_soft} soft (orange), "
                f"{st.n_trivial} trivial set aside")
    fig.savefig(path, dpi=110)
    plt.close(fig)


# -- command line -------------------------------------------------------------------------------
def add_arguments(parser):
    """Options of ``chargesim relax``."""
    parser.add_argument("layout", metavar="LAYOUT.toml", help="layout file (TOML)")
    parser.add_argument("-o", "--output", metavar="OUT.h5",
                        help="results file (default: LAYOUT stem + '_relaxed.h5' beside the layout)")
    parser.add_argument("--figure", metavar="FIG.png", help="report figure (default: OUT with suffix .png)")
    parser.add_argument("--no-figure", action="store_true", help="do not draw the report figure")
    parser.add_argument("--overwrite", action="store_true", help="replace existing output files")
    parser.add_argument("-q", "--quiet", action="store_true", help="print nothing on success")


def command(args):
    """Run ``chargesim relax``; bad input raises ValueError (exit code 2 at the command line).

    Returns
    -------
    int
        0 when the layout converged, 1 when it did not (the files are still written).
    """
    from .. import layout as _layout

    spec = load_layout(args.layout)
    out = args.output or os.path.splitext(spec.path)[0] + "_relaxed.h5"
    fig_path = None if getattr(args, "no_figure", False) else (args.figure or os.path.splitext(out)[0] + ".png")
    overwrite = bool(getattr(args, "overwrite", False))
    if fig_path and os.path.exists(fig_path) and not overwrite:
        raise ValueError(f"{fig_path} exists (pass --overwrite to replace it)")
    if os.path.exists(out) and not overwrite:
        raise ValueError(f"{out} exists (pass --overwrite to replace it)")
    try:
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # reported below instead
            result = _layout.relax(spec.positions, spec.charges, fixed=spec.fixed, **spec.relax_kwargs)
    except ValueError as exc:
        raise ScenarioError(spec.path, "particles", str(exc)) from None
    grid = field_grid(spec, result, spec.grid)
    write_results(out, spec, result, grid, overwrite=overwrite)
    if fig_path:
        write_figure(fig_path, spec, result, grid)
    if not getattr(args, "quiet", False):
        st = result.stability
        d = result.nearest_distance[np.isfinite(result.nearest_distance)]
        emax = float(np.max(np.linalg.norm(grid["field"], axis=-1)))
        lines = [
            f"{spec.title}: {spec.charges.size} charges ({int(spec.fixed.sum())} fixed), "
            f"constraint {result.constraint['kind']}",
            f"  energy            {result.energy:.9g} J",
            f"  residual          {result.residual:.2e} (tolerance {spec.relax_kwargs['tolerance']:g}), "
            f"{'converged' if result.converged else 'NOT converged: ' + result.message}",
            f"  iterations        {result.iterations} (best of {result.start_energies.size} start(s))",
            f"  nearest neighbour {d.min():.4g} .. {d.max():.4g} m" if d.size else "  nearest neighbour -",
            ("  stability         not computed" if st is None else
             f"  stability         {st.n_unstable} unstable, {st.n_soft} soft, {st.n_trivial} trivial of "
             f"{st.dimension} degrees of freedom; lowest eigenvalue "
             f"{(st.eigenvalues[0] if st.eigenvalues.size else float('nan')):.4g} J/m^2"),
            f"  max |E| on grid   {emax:.4g} V/m",
            f"  wrote {out}" + (f" and {fig_path}" if fig_path else ""),
        ]
        if emax > 3e6:
            lines.append("  caution: the field on the grid exceeds about 3 MV/m, the dielectric strength of air at "
                         "20 degC, 1 atm (common practice): expect discharges; follow local codes and licensed practice")
        print("\n".join(lines), file=sys.stdout)
    return 0 if result.converged else 1
