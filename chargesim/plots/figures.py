"""Report figures from a results file (matplotlib, Agg backend).

Each function takes a :class:`chargesim.io.Results` and an output path and
returns the path written, or a string note (starting "skipped:") saying why
there is nothing to draw. Axes carry quantities and SI units (lengths in m
as stored, field in kV/m, diameters in um for readability, as labelled).
"""
import math

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import LogNorm  # noqa: E402
from matplotlib.patches import Circle, Rectangle  # noqa: E402
from matplotlib.ticker import FuncFormatter, MaxNLocator  # noqa: E402

from ..analysis import efficiency  # noqa: E402

_AX = "xyz"
_MAX_PATHS = 300


def _save(fig, path):
    fig.savefig(path, dpi=110, bbox_inches="tight")
    plt.close(fig)
    return path


def _minor_label(v, _pos=None):
    """Label minor log ticks at 2 and 5 times a power of ten only (room)."""
    if v <= 0:
        return ""
    lead = round(v / 10 ** math.floor(math.log10(v) + 1e-9))
    return f"{v:g}" if lead in (2, 5) else ""


def _plain_log_axis(axis):
    """Log-axis labels as plain numbers (0.5, 1, 2, 5, 10), not 5 x 10^-1."""
    axis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
    axis.set_minor_formatter(FuncFormatter(_minor_label))


def _plain(cbar):
    """Colour-bar labels as plain numbers."""
    _plain_log_axis(cbar.ax.yaxis)
    return cbar


def _figure(width, height):
    """A figure for a map of ``width`` x ``height`` (m): equal axes unless the
    map is more than 4:1, which would leave a sliver."""
    ratio = width / height if height > 0 else 10.0
    if 0.25 <= ratio <= 4:
        fig, ax = plt.subplots(figsize=(8.0, max(3.0, min(7.0, 8.0 / ratio))))
        ax.set_aspect("equal", adjustable="box")
        return fig, ax, True
    fig, ax = plt.subplots(figsize=(10.0, 4.0))
    return fig, ax, False


# -- field map -------------------------------------------------------------------
def _slice_plane(shape):
    """Axes (a, b) of the drawn plane and the normal axis c: the two axes with
    the most grid points (a 2-D grid has one axis of length 1)."""
    order = sorted(range(3), key=lambda k: (-shape[k], k))
    a, b = sorted(order[:2])
    return a, b, order[2]


def _draw_outlines(ax, info, a, b, c, c0, extent):
    """Electrodes and collectors, cut by the plane axis c = c0."""
    (a0, a1), (b0, b1) = extent
    drawn = []

    def line_in_plane(p, n):
        # points of the plane n.(x - p) = 0 within the plane c = c0
        na, nb = n[a], n[b]
        rhs = n[a] * p[a] + n[b] * p[b] - n[c] * (c0 - p[c])
        if abs(nb) >= abs(na) and abs(nb) > 1e-12:
            xs = np.array([a0, a1])
            return xs, (rhs - na * xs) / nb
        if abs(na) > 1e-12:
            ys = np.array([b0, b1])
            return (rhs - nb * ys) / na, ys
        return None

    items = list(info.get("electrodes") or [])
    for name, col in (info.get("collectors") or {}).items():
        item = dict(col)
        item.setdefault("name", name)
        items.append(item)
    for it in items:
        kind = it.get("kind")
        name = it.get("name", "")
        try:
            if kind in ("wire", "cylinder"):
                p = np.asarray(it["points"][0] if "points" in it else it["point"], float)
                axis = np.asarray(it.get("axis", (0, 0, 1)), float)
                r = float(it.get("radius", 0.0))
                if abs(axis[c]) > 0.99 * np.linalg.norm(axis):
                    ax.add_patch(Circle((p[a], p[b]), r, fill=kind == "wire" or not it.get("inside", 0),
                                        color="k", lw=1.2, zorder=5))
                    if kind == "wire" or not it.get("inside", 0):
                        ax.plot(p[a], p[b], "o", color="k", ms=3, zorder=6)
                else:
                    continue
            elif kind == "sphere":
                p = np.asarray(it["center"], float)
                r = float(it["radius"])
                h = abs(c0 - p[c])
                if h < r:
                    ax.add_patch(Circle((p[a], p[b]), math.sqrt(r * r - h * h), fill=False, color="k", lw=1.5,
                                        zorder=5))
            elif kind == "plate":
                lo, hi = np.asarray(it["points"][0], float), np.asarray(it["points"][1], float)
                lo_a, hi_a = np.clip([lo[a], hi[a]], a0, a1)
                lo_b, hi_b = np.clip([lo[b], hi[b]], b0, b1)
                size = np.abs(hi - lo)
                if np.argmin(size) == c:
                    # seen face-on: its outline behind the paths, never a solid
                    # block that hides them
                    ax.add_patch(Rectangle((lo_a, lo_b), max(hi_a - lo_a, 0), max(hi_b - lo_b, 0), fill=False,
                                           edgecolor="0.3", ls="--", lw=1.2, zorder=1))
                else:
                    ax.add_patch(Rectangle((lo_a, lo_b), max(hi_a - lo_a, 0), max(hi_b - lo_b, 0), fill=True,
                                           color="0.3", lw=2, zorder=5))
            elif kind == "plane":
                p = np.asarray(it["points"][0] if "points" in it else it["point"], float)
                n = np.asarray(it["normal"], float)
                seg = line_in_plane(p, n)
                if seg is None:
                    continue
                xs, ys = seg
                if "lo" in it and "hi" in it:
                    lo, hi = np.asarray(it["lo"], float), np.asarray(it["hi"], float)
                    xs = np.clip(xs, max(lo[a], a0), min(hi[a], a1))
                    ys = np.clip(ys, max(lo[b], b0), min(hi[b], b1))
                ax.plot(xs, ys, color="0.2", lw=3, solid_capstyle="butt", zorder=5)
            else:
                continue
            drawn.append(name)
        except (KeyError, IndexError, TypeError, ValueError):
            continue  # an outline we cannot draw is left out, never invented
    return drawn


def field_map(res, path, name=None):
    """Field magnitude (colour) with field lines and the electrodes drawn."""
    if not res.field_names:
        return "skipped: the file holds no field grids (/fields)"
    name = name or res.field_names[0]
    g = res.fields[name]
    coords = [g["x"], g["y"], g["z"]]
    if "field" not in g:
        return f"skipped: field grid {name!r} holds no field components"
    e = g["field"]
    shape = e.shape[:3]
    if sorted(shape)[-2] < 2:
        return f"skipped: field grid {name!r} is not two-dimensional ({shape})"
    a, b, c = _slice_plane(shape)
    k = shape[c] // 2
    sl = [slice(None)] * 3
    sl[c] = k
    ec = e[tuple(sl)]  # (n_a, n_b, 3)
    ca, cb, c0 = coords[a], coords[b], coords[c][k]
    if np.ptp(cb) > np.ptp(ca):  # the longer side across the page
        ec, (a, b), (ca, cb) = ec.transpose(1, 0, 2), (b, a), (cb, ca)
    mag = np.linalg.norm(ec, axis=-1)
    fig, ax, to_scale = _figure(np.ptp(ca), np.ptp(cb))
    pos = mag[mag > 0]
    norm = LogNorm(vmin=max(pos.min(), pos.max() * 1e-4) / 1e3, vmax=pos.max() / 1e3) if pos.size and \
        pos.max() > 30 * pos.min() else None
    pm = ax.pcolormesh(ca, cb, mag.T / 1e3, shading="auto", cmap="viridis", norm=norm)
    _plain(fig.colorbar(pm, ax=ax, label="electric field magnitude |E| (kV/m)"))
    # field lines: resample the in-plane components on an even grid for streamplot
    from scipy.interpolate import RegularGridInterpolator

    if ca.size >= 2 and cb.size >= 2:
        ua, ub = np.linspace(ca[0], ca[-1], 120), np.linspace(cb[0], cb[-1], 120)
        A, B = np.meshgrid(ua, ub, indexing="ij")
        pts = np.stack([A.ravel(), B.ravel()], -1)
        fa = RegularGridInterpolator((ca, cb), ec[..., a])(pts).reshape(A.shape)
        fb = RegularGridInterpolator((ca, cb), ec[..., b])(pts).reshape(A.shape)
        if np.any(fa != 0) or np.any(fb != 0):
            ax.streamplot(ua, ub, fa.T, fb.T, color="w", linewidth=0.6, density=1.2, arrowsize=0.7)
    drawn = _draw_outlines(ax, res.info, a, b, c, c0, ((ca[0], ca[-1]), (cb[0], cb[-1])))
    ax.set_xlim(ca[0], ca[-1])
    ax.set_ylim(cb[0], cb[-1])
    ax.set_xlabel(f"{_AX[a]} (m)")
    ax.set_ylabel(f"{_AX[b]} (m)")
    note = "electrodes drawn in dark grey / black" if drawn else "no electrode outlines stored"
    if not to_scale:
        note += "; axes not to scale"
    ax.set_title(f"Field grid '{name}': |E| and field lines at {_AX[c]} = {c0:.3g} m\n({note})", fontsize=10)
    return _save(fig, path)


# -- particle paths ---------------------------------------------------------------
def particle_paths(res, path):
    """Paths of up to 300 particles through the frames, coloured by diameter."""
    fr = res.frames
    if len(fr) < 2:
        return "skipped: fewer than two particle frames in the file (/frames)"
    ids = np.unique(np.concatenate([fr[k]["id"] for k in range(len(fr))]))
    chosen = ids[np.linspace(0, ids.size - 1, min(_MAX_PATHS, ids.size)).astype(int)] if ids.size else ids
    chosen = np.unique(chosen)
    tracks = {int(i): [] for i in chosen}
    diam = {}
    spread = np.zeros(3)
    lo, hi = np.full(3, np.inf), np.full(3, -np.inf)
    for k in range(len(fr)):
        f = fr[k]
        sel = np.isin(f["id"], chosen)
        for i, p, d in zip(f["id"][sel], f["position"][sel], f["diameter"][sel]):
            tracks[int(i)].append(p)
            diam[int(i)] = d
        if f["position"].size:
            lo = np.minimum(lo, f["position"].min(0))
            hi = np.maximum(hi, f["position"].max(0))
    dep = res.deposits
    if dep:
        sel = np.isin(dep["id"], chosen)
        for i, p in zip(dep["id"][sel], dep["position"][sel]):
            tracks[int(i)].append(p)  # the path ends on the surface
    spread = hi - lo
    # the page shows the main direction of travel and the widest other axis
    travel = np.zeros(3)
    for pts in tracks.values():
        if len(pts) > 1:
            travel += np.abs(np.asarray(pts[-1]) - np.asarray(pts[0]))
    t = int(np.argmax(travel)) if travel.any() else int(np.argmax(spread))
    others = [k for k in np.argsort(-spread, kind="stable") if k != t]
    a, b = sorted((t, int(others[0])), key=lambda k: -spread[k])  # the longer side across the page
    fig, ax, to_scale = _figure(spread[a], spread[b])
    ds = np.array([diam[i] for i in tracks if tracks[i]])
    if ds.size == 0:
        plt.close(fig)
        return "skipped: no particle appears in the frames"
    dmin, dmax = ds.min() * 1e6, ds.max() * 1e6
    norm = LogNorm(dmin, dmax) if dmax > 1.05 * dmin else plt.Normalize(dmin * 0.9, dmax * 1.1)
    cmap = plt.get_cmap("plasma")
    for i, pts in tracks.items():
        if len(pts) < 1:
            continue
        p = np.asarray(pts)
        col = cmap(norm(diam[i] * 1e6))
        ax.plot(p[:, a], p[:, b], "-", color=col, lw=0.8, alpha=0.8)
        ax.plot(p[-1, a], p[-1, b], ".", color=col, ms=2)
    sm = plt.cm.ScalarMappable(norm=norm, cmap=cmap)
    _plain(fig.colorbar(sm, ax=ax, label="particle diameter (µm)"))
    drawn = _draw_outlines(ax, res.info, a, b, 3 - a - b, 0.5 * (lo[3 - a - b] + hi[3 - a - b]),
                           ((lo[a], hi[a]), (lo[b], hi[b])))
    ax.set_xlabel(f"{_AX[a]} (m)")
    ax.set_ylabel(f"{_AX[b]} (m)")
    ax.set_title(f"Particle paths ({len(tracks)} of {ids.size} particles, {len(fr)} frames)\n"
                 f"dots: last position{'; electrodes in black' if drawn else ''}"
                 f"{'' if to_scale else '; axes not to scale'}", fontsize=10)
    ax.set_xlim(lo[a], hi[a])
    ax.set_ylim(lo[b], hi[b])
    return _save(fig, path)


# -- deposition density -------------------------------------------------------------
def _surface_axes(info, surface, pos):
    col = (info.get("collectors") or {}).get(surface, {})
    if col.get("kind") == "plane" and "normal" in col:
        k = int(np.argmax(np.abs(np.asarray(col["normal"], float))))
        return tuple(i for i in range(3) if i != k), "per unit area"
    spread = pos.max(0) - pos.min(0) if pos.size else np.ones(3)
    a, b = sorted(np.argsort(-spread, kind="stable")[:2])
    return (a, b), "per unit projected area"


def deposition(res, path):
    """Deposited mass per unit area on each surface: maps and totals."""
    dep = res.deposits
    if not dep or dep["id"].size == 0:
        return "skipped: no deposits in the file (/deposits)"
    surfaces = [s for s in dict.fromkeys(dep["surface"].tolist())]
    surfaces.sort(key=lambda s: -np.sum((dep["surface"] == s) * dep["weight"] * dep["mass"]))
    shown = surfaces[:5]
    ncol = min(3, len(shown) + 1)
    nrow = math.ceil((len(shown) + 1) / ncol)
    fig, axes = plt.subplots(nrow, ncol, figsize=(5.2 * ncol, 4.3 * nrow), squeeze=False)
    axes = axes.ravel()
    areas = res.info.get("surfaces") if isinstance(res.info.get("surfaces"), dict) else {}
    names, dens, masses = [], [], []
    for s in surfaces:
        m = efficiency.real_mass(dep, s)
        area = areas.get(s)
        names.append(s)
        masses.append(m)
        dens.append(efficiency.deposition_density(dep, s, area) if area else np.nan)
    ax = axes[0]
    if np.all(np.isnan(dens)):
        ax.bar(names, np.asarray(masses) * 1e3, color="tab:blue")
        ax.set_ylabel("deposited mass (g)\n(surface areas not stored)")
    else:
        ax.bar(names, np.asarray(dens) * 1e3, color="tab:blue")
        ax.set_ylabel("mean deposit density (g/m²)")
    ax.set_xlabel("surface")
    ax.tick_params(axis="x", rotation=30)
    ax.set_title("Mean deposit per unit area, by surface", fontsize=10)
    for i, s in enumerate(shown):
        ax = axes[i + 1]
        sel = dep["surface"] == s
        pos = dep["position"][sel]
        (ua, va), what = _surface_axes(res.info, s, pos)
        lo, hi = pos.min(0), pos.max(0)
        pad = 1e-6 + 0.02 * (hi - lo)
        rng = ((lo[ua] - pad[ua], hi[ua] + pad[ua]), (lo[va] - pad[va], hi[va] + pad[va]))
        dmap, eu, ev = efficiency.deposition_map(dep, s, (ua, va), 30, rng)
        pm = ax.pcolormesh(eu, ev, dmap.T * 1e3, shading="flat", cmap="magma_r")
        fig.colorbar(pm, ax=ax, label=f"deposit (g/m², {what})")
        ax.set_xlabel(f"{_AX[ua]} (m)")
        ax.set_ylabel(f"{_AX[va]} (m)")
        ax.xaxis.set_major_locator(MaxNLocator(5))
        ax.yaxis.set_major_locator(MaxNLocator(6))
        ax.set_title(f"Deposit on '{s}' ({int(sel.sum())} simulated particles)", fontsize=10)
    for ax in axes[len(shown) + 1:]:
        ax.set_visible(False)
    fig.tight_layout()
    return _save(fig, path)


# -- grade efficiency ----------------------------------------------------------------
def _edges(res):
    e = res.info.get("size_bins")
    if e is not None and len(e) >= 2:
        return np.asarray(e, float)
    ds = [d["diameter"] for d in (res.deposits, res.escapes, res.final) if d and "diameter" in d]
    if not ds:
        return None
    d = np.concatenate(ds)
    if d.size == 0:
        return None
    lo, hi = d.min(), d.max()
    if hi <= lo * 1.01:
        return np.array([lo / 1.2, hi * 1.2])
    return np.geomspace(lo * 0.999, hi * 1.001, 13)


def deutsch_anderson(migration_velocity, area_per_flow):
    """Deutsch-Anderson efficiency eta = 1 - exp(-w A/Q) (Deutsch 1922).

    Parameters
    ----------
    migration_velocity : array_like
        Migration velocity w, m/s.
    area_per_flow : float
        Specific collection area A/Q, s/m.
    """
    return 1.0 - np.exp(-np.asarray(migration_velocity, float) * float(area_per_flow))


def grade_efficiency(res, path):
    """Grade efficiency with the Deutsch-Anderson curve for the same migration velocities."""
    if not res.deposits and not res.escapes:
        return "skipped: no deposits or escapes to count (/deposits, /escapes)", None
    edges = _edges(res)
    if edges is None:
        return "skipped: no particle diameters in the file", None
    g = res.grade_efficiency(edges)
    centers = g["centers"] * 1e6
    fig, ax = plt.subplots(figsize=(7, 4.8))
    ok = np.isfinite(g["efficiency"])
    ax.errorbar(centers[ok], g["efficiency"][ok], yerr=g["stderr"][ok], fmt="o-", capsize=3,
                label="simulated (± binomial standard error)")
    note = None
    w = res.info.get("migration_velocity")
    aq = res.info.get("collection_area_per_flow")
    if w is not None and aq is not None and len(w) == len(centers):
        da = deutsch_anderson(w, aq)
        ax.plot(centers, da, "s--", color="tab:red", label=f"Deutsch–Anderson 1 − exp(−wA/Q), A/Q = {aq:.3g} s/m")
    else:
        note = ("Deutsch–Anderson curve not drawn: the file stores no migration velocity per size bin "
                "and specific collection area (info 'migration_velocity', 'collection_area_per_flow')")
        ax.text(0.02, 0.02, "Deutsch–Anderson curve not drawn:\nno migration velocities / A/Q in the file",
                transform=ax.transAxes, fontsize=8, va="bottom")
    ax.set_xscale("log")
    _plain_log_axis(ax.xaxis)
    ax.set_ylim(-0.02, 1.05)
    ax.set_xlabel("particle diameter (µm), bin geometric centre")
    ax.set_ylabel("collection efficiency (1)")
    ax.set_title("Grade efficiency (by real particle number)", fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8, loc="lower right")
    return _save(fig, path), (g, note)


# -- diagnostics ------------------------------------------------------------------------
def diagnostics(res, path):
    """Counts, energies, efficiency so far and net charge over time."""
    d = res.diagnostics
    if not d or d["time"].size < 2:
        return "skipped: fewer than two diagnostics rows (/diagnostics)"
    t = d["time"]
    u = res.diagnostics_units
    groups = [
        ("particles (simulated)", "count (1)", [k for k in d if k.startswith("n_")]),
        ("energies", "energy (J)", [k for k in d if u.get(k) == "J"]),
        ("efficiency so far", "collection efficiency (1)", [k for k in d if "efficiency" in k]),
        ("net charge in flight", "charge (C)", [k for k in d if u.get(k) == "C"]),
    ]
    groups = [(ti, yl, [k for k in ks if np.any(np.isfinite(d[k]))]) for ti, yl, ks in groups]
    groups = [gr for gr in groups if gr[2]]
    if not groups:
        return "skipped: no diagnostics values with data"
    fig, axes = plt.subplots(len(groups), 1, figsize=(7.5, 2.4 * len(groups)), sharex=True, squeeze=False)
    for ax, (title, ylabel, keys) in zip(axes[:, 0], groups):
        for k in keys:
            ax.plot(t, d[k], label=k.replace("_", " "))
        ax.set_ylabel(ylabel)
        ax.set_title(title, fontsize=10)
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=7, loc="best")
    axes[-1, 0].set_xlabel("simulated time (s)")
    fig.tight_layout()
    return _save(fig, path)
