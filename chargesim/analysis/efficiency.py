"""Collection, grade and transfer efficiency, deposition density, counts.

Every function takes event records: dicts of equal-length arrays with (at
least) the keys it uses among ``id``, ``time``, ``position`` (k, 3) m,
``surface`` (str), ``charge`` C, ``mass`` (one real particle) kg,
``diameter`` m, ``weight`` (real particles per simulated one), ``population``.
An empty dict (no events) is allowed everywhere. Masses and counts of real
particles are weight x per-particle values; statistical errors are binomial on
the simulated particles (each carries its weight).
"""
import math

import numpy as np

_QUANTITIES = ("mass", "number", "charge")


def _n(records):
    if not records:
        return 0
    return int(np.asarray(records["weight"]).shape[0])


def _col(records, key):
    if not records:
        return np.zeros(0)
    if key not in records:
        raise ValueError(f"records lack the field {key!r}")
    return np.asarray(records[key])


def _select(records, surfaces):
    """Boolean mask of the events on ``surfaces`` (None: all)."""
    n = _n(records)
    if surfaces is None:
        return np.ones(n, dtype=bool)
    if isinstance(surfaces, str):
        surfaces = [surfaces]
    names = _col(records, "surface").astype(str)
    return np.isin(names, np.asarray(list(surfaces), dtype=str))


def _amount(records, quantity):
    if quantity not in _QUANTITIES:
        raise ValueError(f"quantity must be one of {_QUANTITIES}, got {quantity!r}")
    w = _col(records, "weight").astype(np.float64)
    if quantity == "number":
        return w
    return w * _col(records, quantity).astype(np.float64)


def real_mass(records, surfaces=None):
    """Real mass of the events (on ``surfaces``, None: all), kg."""
    if not records:
        return 0.0
    return float(np.sum(_amount(records, "mass")[_select(records, surfaces)]))


def counts(records, key="surface"):
    """Events per value of ``key`` (e.g. per surface or population).

    Returns
    -------
    dict
        value -> {"simulated": int, "real": float (sum of weights), "mass": kg}.
    """
    out = {}
    if not records:
        return out
    vals = _col(records, key)
    if vals.ndim != 1:
        raise ValueError(f"key {key!r} is not a one-value-per-event field")
    w = _col(records, "weight").astype(np.float64)
    m = w * _col(records, "mass").astype(np.float64)
    for v in np.unique(vals):
        sel = vals == v
        name = v.item() if hasattr(v, "item") else v
        out[name] = {"simulated": int(sel.sum()), "real": float(w[sel].sum()), "mass": float(m[sel].sum())}
    return out


def collection_efficiency(deposits, emitted_mass, surfaces=None):
    """Deposited over emitted real mass, 1.

    Parameters
    ----------
    deposits : dict
        Deposit records.
    emitted_mass : float
        Real mass emitted (the run summary's ``emitted_mass``), kg (> 0).
    surfaces : str or sequence of str, optional
        Count only deposits on these collectors; None: all.
    """
    em = float(emitted_mass)
    if not (math.isfinite(em) and em > 0):
        raise ValueError(f"emitted_mass must be a positive mass in kg, got {emitted_mass!r}")
    return real_mass(deposits, surfaces) / em


def transfer_efficiency(deposits, emitted_mass, target):
    """Share of the emitted mass landing on the workpiece ``target`` (coating), 1.

    Parameters
    ----------
    deposits : dict
        Deposit records.
    emitted_mass : float
        Real mass emitted (sprayed), kg (> 0).
    target : str or sequence of str
        Surface name(s) of the workpiece.
    """
    if target is None:
        raise ValueError("target must name the workpiece surface(s)")
    return collection_efficiency(deposits, emitted_mass, target)


def grade_efficiency(deposits, escapes, edges, *, airborne=None, surfaces=None, quantity="number"):
    """Collection efficiency per size bin (grade efficiency).

    The particles that entered a bin are those deposited, escaped and (if
    given) still airborne; the efficiency is the share deposited (on
    ``surfaces``), by real number or mass.

    Parameters
    ----------
    deposits, escapes : dict
        Deposit and escape records.
    edges : array_like (B + 1,)
        Increasing diameter bin edges, m.
    airborne : dict, optional
        Records (``diameter``, ``weight``, ``mass``) of the particles still in
        flight, e.g. the final particle state.
    surfaces : str or sequence of str, optional
        Deposits counted as collected; None: all collectors.
    quantity : {"number", "mass"}
        Weighting of the efficiency.

    Returns
    -------
    dict
        ``edges`` m, ``centers`` (geometric means of the edges) m,
        ``efficiency`` (B,) (NaN for empty bins), ``collected`` and ``total``
        (B,) real amounts, ``n_simulated`` (B,) int, ``stderr`` (B,) binomial
        standard error on the simulated particles.
    """
    e = np.asarray(edges, dtype=np.float64).reshape(-1)
    if e.size < 2 or not np.all(np.isfinite(e)) or np.any(np.diff(e) <= 0) or e[0] < 0:
        raise ValueError("edges must be at least two finite, increasing diameters >= 0, m")
    if quantity not in ("number", "mass"):
        raise ValueError(f"quantity must be 'number' or 'mass', got {quantity!r}")
    nb = e.size - 1

    def binned(records, mask=None):
        if not records:
            return np.zeros(nb), np.zeros(nb, dtype=np.int64)
        d = _col(records, "diameter").astype(np.float64)
        a = _amount(records, quantity)
        if mask is not None:
            d, a = d[mask], a[mask]
        idx = np.searchsorted(e, d, side="right") - 1
        idx[d == e[-1]] = nb - 1
        ok = (idx >= 0) & (idx < nb)
        return (np.bincount(idx[ok], weights=a[ok], minlength=nb),
                np.bincount(idx[ok], minlength=nb).astype(np.int64))

    dep_mask = _select(deposits, surfaces) if deposits else None
    col, ncol = binned(deposits, dep_mask)
    other_dep, nother = binned(deposits, ~dep_mask) if deposits else (np.zeros(nb), np.zeros(nb, dtype=np.int64))
    esc, nesc = binned(escapes)
    air, nair = binned(airborne)
    total = col + other_dep + esc + air
    n_sim = ncol + nother + nesc + nair
    with np.errstate(invalid="ignore", divide="ignore"):
        eff = np.where(total > 0, col / np.where(total > 0, total, 1.0), np.nan)
        stderr = np.where(n_sim > 0, np.sqrt(np.clip(eff * (1 - eff), 0, None) / np.maximum(n_sim, 1)), np.nan)
    return {"edges": e, "centers": np.sqrt(e[:-1] * e[1:]) if e[0] > 0 else 0.5 * (e[:-1] + e[1:]),
            "efficiency": eff, "collected": col, "total": total, "n_simulated": n_sim, "stderr": stderr}


def grade_efficiency_from_results(results, edges, *, surfaces=None, quantity="number"):
    """:func:`grade_efficiency` of a results file (``chargesim.io.Results``).

    Uses its ``deposits``, ``escapes`` and ``final`` (particles still in
    flight at the end, counted as not collected).

    Parameters
    ----------
    results : object with ``deposits``, ``escapes``, ``final`` dicts
    edges : array_like
        Diameter bin edges, m.
    surfaces, quantity
        As in :func:`grade_efficiency`.
    """
    if edges is None:
        raise ValueError("edges (diameter bin edges, m) are needed: the results file names none")
    final = getattr(results, "final", None) or None
    if final is not None and not all(k in final for k in ("diameter", "weight", "mass")):
        final = None
    return grade_efficiency(results.deposits or {}, results.escapes or {}, edges, airborne=final,
                            surfaces=surfaces, quantity=quantity)


def deposition_density(deposits, surface, area, quantity="mass"):
    """Mean deposit per unit area on one surface.

    Parameters
    ----------
    deposits : dict
        Deposit records.
    surface : str
        Collector name.
    area : float
        Its area, m^2 (> 0; the run info's ``surface_areas``).
    quantity : {"mass", "number", "charge"}
        kg/m^2, real particles per m^2, or C/m^2.
    """
    a = float(area)
    if not (math.isfinite(a) and a > 0):
        raise ValueError(f"area must be a finite positive area in m^2, got {area!r}")
    if not deposits:
        return 0.0
    return float(np.sum(_amount(deposits, quantity)[_select(deposits, surface)])) / a


def deposition_map(deposits, surface, axes, bins, ranges, quantity="mass"):
    """Deposit per unit area on a plane surface, as a 2-D histogram.

    Parameters
    ----------
    deposits : dict
        Deposit records.
    surface : str
        Collector name (a plane whose normal is not in ``axes``).
    axes : (int, int)
        The two position components spanning the surface (0, 1, 2 = x, y, z).
    bins : int or (int, int)
        Cells per axis.
    ranges : ((float, float), (float, float))
        Extent of the map along each axis, m.
    quantity : {"mass", "number", "charge"}
        kg/m^2, real particles per m^2, or C/m^2.

    Returns
    -------
    density : ndarray (nu, nv)
        Per unit area of each cell.
    edges_u, edges_v : ndarray
        Cell edges, m.
    """
    ax = tuple(int(a) for a in axes)
    if len(ax) != 2 or ax[0] == ax[1] or any(a not in (0, 1, 2) for a in ax):
        raise ValueError(f"axes must be two different axes among 0, 1, 2, got {axes!r}")
    rng = np.asarray(ranges, dtype=np.float64)
    if rng.shape != (2, 2) or not np.all(np.isfinite(rng)) or np.any(rng[:, 1] <= rng[:, 0]):
        raise ValueError(f"ranges must be ((u0, u1), (v0, v1)) with u0 < u1, v0 < v1, got {ranges!r}")
    if deposits:
        sel = _select(deposits, surface)
        pos = _col(deposits, "position").astype(np.float64)[sel]
        amt = _amount(deposits, quantity)[sel]
    else:
        pos, amt = np.zeros((0, 3)), np.zeros(0)
    h, eu, ev = np.histogram2d(pos[:, ax[0]], pos[:, ax[1]], bins=bins, range=rng, weights=amt)
    cell = np.diff(eu)[:, None] * np.diff(ev)[None, :]
    return h / cell, eu, ev
