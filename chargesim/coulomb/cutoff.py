"""Cutoff sums: only sources within a cutoff distance act, O(N) with linked cells.

For dense arrangements where only near neighbours matter: charges in
electrolytes or plasmas (Debye–Hückel screening), short-range contact work,
and the real-space half of Ewald sums. The sources are binned into linked
cells (:mod:`chargesim.coulomb.cells`); each target sums the sources within
the cutoff in one thread in a fixed order, so results are bitwise reproducible
for a given input whatever the thread count. Memory is O(N + M).

Pair interaction, per unit source charge, before truncation
    u(r) = e^(-r/λ) / r (λ = ``screening_length``; plain Coulomb 1/r without
    it), field magnitude f(r) = -du/dr = e^(-r/λ) (1 + r/λ) / r^2.

Truncation at the cutoff rc (the standard shifted forms of molecular
simulation, e.g. Allen & Tildesley, Computer Simulation of Liquids):
    ``"plain"``  u(r), f(r) for r < rc; nothing beyond.
    ``"shifted-potential"``  u(r) - u(rc): the potential is continuous at rc,
    the field is the plain one.
    ``"shifted-force"``  u(r) - u(rc) + (r - rc) f(rc) and f(r) - f(rc): both
    go to zero at rc, so a trajectory feels no jump when a pair crosses the
    cutoff and energy stays conserved.

Finite particles (``radii``): inside the contact distance a (a = max(R_i, R_j)
between particles, a = R_j at an outside target) the pair potential is
continued by the parabola u(a) + f(a) (a^2 - r^2) / (2 a), whose field
f(a) r / a is linear in r, matching value and slope at r = a. For plain
Coulomb this is exactly the uniformly charged sphere of the contract,
q (3a^2 - r^2) / (2a^3) and q r / a^3; with screening it is the same smooth
cap on the screened pair. Truncation applies on top. Two exactly coincident
spheres exert no field on each other (by symmetry; the shifted-force term
-f(rc) r̂ has no direction there).

Cutoff rule without ``cutoff``: with a screening length the cutoff is
``SCREENING_CUTOFFS`` λ = ln(1e6) λ ≈ 13.8 λ, where the screening factor
e^(-r/λ) has fallen to 1e-6 (common practice: truncate where the screened
interaction is negligible). Without either a ValueError is raised.

Periodic ``box``: minimum-image distances, the cutoff at most half the
smallest box edge; sources and targets outside the box are wrapped.
"""
import math

import numba
import numpy as np

from . import _checks
from . import cells as _cells
from ._checks import coincident

#: Options of this method (beyond the front door's common ones), with defaults.
OPTIONS = {"cutoff": None, "truncation": "plain", "screening_length": None, "box": None}

#: Allowed ``truncation`` values.
TRUNCATIONS = ("plain", "shifted-potential", "shifted-force")

#: Default cutoff in screening lengths: e^(-rc/λ) = 1e-6.
SCREENING_CUTOFFS = math.log(1e6)

# Fast-math without the no-NaN/no-inf assumptions (as in direct.py): the
# selects stay exact, reassociation lets LLVM vectorise the inner sums.
_FM = {"nsz", "arcp", "contract", "afn", "reassoc"}


def _outer_py(r, lam):
    """u(r), f(r) of the untruncated pair (per unit charge), r > 0."""
    if lam is None:
        return 1.0 / r, 1.0 / (r * r)
    e = math.exp(-r / lam)
    return e / r, e * (1.0 + r / lam) / (r * r)


def resolve_options(cutoff, truncation, screening_length, box):
    """Check the options and derive what the kernels take.

    Parameters
    ----------
    cutoff : float or None
        Cutoff distance, m (> 0); None: from the screening length.
    truncation : str
        One of :data:`TRUNCATIONS`.
    screening_length : float or None
        Debye length λ, m (> 0); None: unscreened Coulomb.
    box : array_like of 3 floats or None
        Periodic box edges, m.

    Returns
    -------
    rc : float
        Cutoff, m.
    mode : int
        0 plain, 1 shifted-potential, 2 shifted-force.
    inv_lam : float
        1/λ, 1/m (0 when unscreened).
    box : ndarray (3,) or None

    Raises
    ------
    ValueError
        Naming the option and the allowed values.
    """
    if not isinstance(truncation, str) or truncation not in TRUNCATIONS:
        raise ValueError(f"truncation must be one of {', '.join(repr(t) for t in TRUNCATIONS)}; "
                         f"got {truncation!r}")
    lam = None if screening_length is None else _checks.positive(screening_length, "screening_length")
    bx = None if box is None else _checks.as_box(box)
    if cutoff is None:
        if lam is None:
            raise ValueError("cutoff must be given (m, > 0) for method 'cutoff' unless "
                             "screening_length is, which sets a default cutoff")
        rc = SCREENING_CUTOFFS * lam
        if bx is not None and rc > 0.5 * bx.min():
            raise ValueError(f"the default cutoff {rc!r} m ({SCREENING_CUTOFFS:.1f} screening lengths) "
                             f"exceeds half the smallest box edge ({0.5 * bx.min()!r} m): give cutoff= "
                             "explicitly")
    else:
        rc = _checks.positive(cutoff, "cutoff")
    if bx is not None and rc > 0.5 * bx.min():
        raise ValueError(f"cutoff {rc!r} m exceeds half the smallest box edge ({0.5 * bx.min()!r} m): "
                         "minimum-image distances need cutoff <= box/2")
    return rc, TRUNCATIONS.index(truncation), (0.0 if lam is None else 1.0 / lam), bx


@numba.njit(inline="always", fastmath=_FM)
def _outer(r, inv_r, inv_lam, screened):
    # u = e^(-r/λ)/r, f = -du/dr = u (1/r + 1/λ)
    if screened:
        u = math.exp(-r * inv_lam) * inv_r
        return u, u * (inv_r + inv_lam)
    return inv_r, inv_r * inv_r


@numba.njit(inline="always", fastmath=_FM)
def _capped(r2, a, inv_lam, screened):
    """(u, f, r) of the untruncated pair with the parabolic cap inside a > 0."""
    if r2 >= a * a:
        r = math.sqrt(r2)
        u, f = _outer(r, 1.0 / r, inv_lam, screened)
        return u, f, r
    r = math.sqrt(r2)
    ua, fa = _outer(a, 1.0 / a, inv_lam, screened)
    return ua + fa * (a * a - r2) / (2.0 * a), fa * r / a, r


@numba.njit(inline="always", fastmath=_FM)
def _points_chunk(chunk, points, q, start, shape, box, periodic, reach, tpoints, tstart, tmap,
                  rc, inv_lam, kind, c0, c1, field, phi, nzero):
    """Point sources: u - c0 + c1 (r - rc) and field (f - c1)/r per pair, r < rc.

    ``kind`` 0: Coulomb with c1 = 0; 1: Coulomb, shifted force; 2: screened.

    The sources of a cell's stencil are copied once into contiguous buffers
    and every target of the cell sweeps them: a long branch-free loop that
    vectorises.
    """
    ncell = start.size - 1
    rc2 = rc * rc
    nbuf = _cells.max_segments(reach)
    lo = np.empty(nbuf, np.int64)
    hi = np.empty(nbuf, np.int64)
    sh = np.empty((nbuf, 3))
    cap = 0
    bx = np.empty(cap)
    by = np.empty(cap)
    bz = np.empty(cap)
    bq = np.empty(cap)
    bs = np.empty(cap, np.int64)
    for c in range(chunk * _cells.CELL_CHUNK, min(ncell, (chunk + 1) * _cells.CELL_CHUNK)):
        t0, t1 = tstart[c], tstart[c + 1]
        if t1 == t0:
            continue
        cx, cy, cz = _cells.cell_coords(c, shape)
        nseg = _cells.cell_segments(cx, cy, cz, start, shape, box, periodic, reach, lo, hi, sh)
        tot = _cells.segment_total(nseg, lo, hi)
        if tot > cap:
            cap = 2 * tot
            bx = np.empty(cap)
            by = np.empty(cap)
            bz = np.empty(cap)
            bq = np.empty(cap)
            bs = np.empty(cap, np.int64)
        k = _cells.gather(nseg, lo, hi, sh, points, bx, by, bz, bs)
        for u in range(k):
            bq[u] = q[bs[u]]
        for t in range(t0, t1):
            x, y, z = tpoints[0, t], tpoints[1, t], tpoints[2, t]
            ax = 0.0
            ay = 0.0
            az = 0.0
            p = 0.0
            sw = 0.0
            zc = 0.0
            # one lean loop per kind, so each vectorises; the shifts are
            # applied to the sums after the loop (sum_w: live charges)
            if kind == 0:
                for u in range(k):
                    dx = x - bx[u]
                    dy = y - by[u]
                    dz = z - bz[u]
                    r2 = dx * dx + dy * dy + dz * dz
                    near = r2 < rc2
                    live = near and r2 > 0.0
                    inv = 1.0 / math.sqrt(r2 if live else 1.0)
                    w = bq[u] if live else 0.0
                    g3 = w * inv * inv * inv
                    ax += g3 * dx
                    ay += g3 * dy
                    az += g3 * dz
                    p += w * inv
                    sw += w
                    zc += 1.0 if (near and not live) else 0.0
            elif kind == 1:
                for u in range(k):
                    dx = x - bx[u]
                    dy = y - by[u]
                    dz = z - bz[u]
                    r2 = dx * dx + dy * dy + dz * dz
                    near = r2 < rc2
                    live = near and r2 > 0.0
                    inv = 1.0 / math.sqrt(r2 if live else 1.0)
                    w = bq[u] if live else 0.0
                    g3 = w * inv * (inv * inv - c1)
                    ax += g3 * dx
                    ay += g3 * dy
                    az += g3 * dz
                    p += w * (inv + c1 * (r2 * inv))
                    sw += w
                    zc += 1.0 if (near and not live) else 0.0
            else:
                for u in range(k):
                    dx = x - bx[u]
                    dy = y - by[u]
                    dz = z - bz[u]
                    r2 = dx * dx + dy * dy + dz * dz
                    near = r2 < rc2
                    live = near and r2 > 0.0
                    inv = 1.0 / math.sqrt(r2 if live else 1.0)
                    r = r2 * inv
                    uu = math.exp(-r * inv_lam) * inv
                    w = bq[u] if live else 0.0
                    g3 = w * (uu * (inv + inv_lam) - c1) * inv
                    ax += g3 * dx
                    ay += g3 * dy
                    az += g3 * dz
                    p += w * (uu + c1 * r)
                    sw += w
                    zc += 1.0 if (near and not live) else 0.0
            i = tmap[t]
            field[i, 0] = ax
            field[i, 1] = ay
            field[i, 2] = az
            # u - c0 + c1 (r - rc) summed: sum w u + c1 sum w r - (c0 + c1 rc) sum w
            phi[i] = p - (c0 + c1 * rc) * sw
            nzero[i] = int(zc)


@numba.njit(parallel=True, fastmath=_FM, cache=True)
def _sum_points_parallel(points, q, start, shape, box, periodic, reach, tpoints, tstart, tmap,
                         rc, inv_lam, kind, c0, c1, field, phi, nzero):
    for chunk in numba.prange((start.size - 1 + _cells.CELL_CHUNK - 1) // _cells.CELL_CHUNK):
        _points_chunk(chunk, points, q, start, shape, box, periodic, reach, tpoints, tstart, tmap,
                      rc, inv_lam, kind, c0, c1, field, phi, nzero)


@numba.njit(fastmath=_FM, cache=True)
def _sum_points_serial(points, q, start, shape, box, periodic, reach, tpoints, tstart, tmap,
                       rc, inv_lam, kind, c0, c1, field, phi, nzero):
    for chunk in range((start.size - 1 + _cells.CELL_CHUNK - 1) // _cells.CELL_CHUNK):
        _points_chunk(chunk, points, q, start, shape, box, periodic, reach, tpoints, tstart, tmap,
                      rc, inv_lam, kind, c0, c1, field, phi, nzero)


@numba.njit(inline="always", fastmath=_FM)
def _spheres_chunk(chunk, points, q, rad, start, shape, box, periodic, reach, tpoints, trad, tstart,
                   tmap, self_targets, rc, inv_lam, screened, mode, c0, c1, field, phi, nzero):
    """Finite spheres: the capped pair inside a = max(R_source, R_target)."""
    ncell = start.size - 1
    rc2 = rc * rc
    nbuf = _cells.max_segments(reach)
    lo = np.empty(nbuf, np.int64)
    hi = np.empty(nbuf, np.int64)
    sh = np.empty((nbuf, 3))
    cap = 0
    bx = np.empty(cap)
    by = np.empty(cap)
    bz = np.empty(cap)
    bs = np.empty(cap, np.int64)
    for c in range(chunk * _cells.CELL_CHUNK, min(ncell, (chunk + 1) * _cells.CELL_CHUNK)):
        t0, t1 = tstart[c], tstart[c + 1]
        if t1 == t0:
            continue
        cx, cy, cz = _cells.cell_coords(c, shape)
        nseg = _cells.cell_segments(cx, cy, cz, start, shape, box, periodic, reach, lo, hi, sh)
        tot = _cells.segment_total(nseg, lo, hi)
        if tot > cap:
            cap = 2 * tot
            bx = np.empty(cap)
            by = np.empty(cap)
            bz = np.empty(cap)
            bs = np.empty(cap, np.int64)
        k = _cells.gather(nseg, lo, hi, sh, points, bx, by, bz, bs)
        for t in range(t0, t1):
            x, y, z, rt = tpoints[0, t], tpoints[1, t], tpoints[2, t], trad[t]
            ax = 0.0
            ay = 0.0
            az = 0.0
            p = 0.0
            cnt = 0
            for u in range(k):
                s = bs[u]
                # with self targets the self pair is skipped by slot:
                # coincident distinct spheres are legitimate
                if self_targets and s == t:
                    continue
                dx = x - bx[u]
                dy = y - by[u]
                dz = z - bz[u]
                r2 = dx * dx + dy * dy + dz * dz
                if r2 >= rc2:
                    continue
                a = max(rad[s], rt)
                if a == 0.0 and r2 == 0.0:
                    cnt += 1
                    continue
                uu, f, r = _capped(r2, a, inv_lam, screened)
                uc, fc = c0, c1
                if a > rc and mode > 0:
                    # the cut falls inside the cap: shift by the capped pair at rc
                    uc, fc, _ = _capped(rc2, a, inv_lam, screened)
                    if mode == 1:
                        fc = 0.0
                p += q[s] * (uu - uc + fc * (r - rc))
                if r > 0.0:
                    g3 = q[s] * (f - fc) / r
                    ax += g3 * dx
                    ay += g3 * dy
                    az += g3 * dz
            i = tmap[t]
            field[i, 0] = ax
            field[i, 1] = ay
            field[i, 2] = az
            phi[i] = p
            nzero[i] = cnt


@numba.njit(parallel=True, fastmath=_FM, cache=True)
def _sum_spheres_parallel(points, q, rad, start, shape, box, periodic, reach, tpoints, trad, tstart,
                          tmap, self_targets, rc, inv_lam, screened, mode, c0, c1, field, phi, nzero):
    for chunk in numba.prange((start.size - 1 + _cells.CELL_CHUNK - 1) // _cells.CELL_CHUNK):
        _spheres_chunk(chunk, points, q, rad, start, shape, box, periodic, reach, tpoints, trad,
                       tstart, tmap, self_targets, rc, inv_lam, screened, mode, c0, c1, field, phi,
                       nzero)


@numba.njit(fastmath=_FM, cache=True)
def _sum_spheres_serial(points, q, rad, start, shape, box, periodic, reach, tpoints, trad, tstart,
                        tmap, self_targets, rc, inv_lam, screened, mode, c0, c1, field, phi, nzero):
    for chunk in range((start.size - 1 + _cells.CELL_CHUNK - 1) // _cells.CELL_CHUNK):
        _spheres_chunk(chunk, points, q, rad, start, shape, box, periodic, reach, tpoints, trad,
                       tstart, tmap, self_targets, rc, inv_lam, screened, mode, c0, c1, field, phi,
                       nzero)


@numba.njit(cache=True)
def _first_coincident(t, x, y, z, rt, px, py, pz, rad, use_radii, order, start, shape, width,
                      origin, box, periodic, reach, rc, self_targets):
    """Smallest input index of a source exactly on target slot t (a == 0), or -1."""
    nbuf = _cells.max_segments(reach)
    lo = np.empty(nbuf, np.int64)
    hi = np.empty(nbuf, np.int64)
    sh = np.empty((nbuf, 3))
    if periodic:
        x = _cells.wrap_point(x, box[0])
        y = _cells.wrap_point(y, box[1])
        z = _cells.wrap_point(z, box[2])
    nseg = _cells.segments(x, y, z, rc, start, shape, width, origin, box, periodic, lo, hi, sh)
    best = -1
    for g in range(nseg):
        for s in range(lo[g], hi[g]):
            if self_targets and s == t:
                continue
            dx = (x - sh[g, 0]) - px[s]
            dy = (y - sh[g, 1]) - py[s]
            dz = (z - sh[g, 2]) - pz[s]
            a = max(rad[s], rt) if use_radii else 0.0
            if dx * dx + dy * dy + dz * dz == 0.0 and a == 0.0 and (best < 0 or order[s] < best):
                best = order[s]
    return best


def evaluate(sources, charges, targets, radii, *, need_field=True, need_potential=True,
             cutoff=None, truncation="plain", screening_length=None, box=None):
    """Field and potential sums over the sources within the cutoff (no k/eps_r).

    Parameters
    ----------
    sources : ndarray, shape (N, 3)
        Source positions, m (float64, C-contiguous, finite: the front door checks).
    charges : ndarray, shape (N,)
        Source charges, C.
    targets : ndarray, shape (M, 3), or None
        Target points, m; None means at each source, excluding itself.
    radii : ndarray, shape (N,), or None
        Particle radii, m; None for point charges.
    need_field, need_potential : bool
        Which results to return (the kernels compute both at once).
    cutoff : float, optional
        Cutoff distance, m (> 0); default from ``screening_length``.
    truncation : {"plain", "shifted-potential", "shifted-force"}
        How the pair is cut at the cutoff (module docstring).
    screening_length : float, optional
        Debye–Hückel screening length λ, m (> 0): pair potential q e^(-r/λ)/r.
    box : array_like of 3 floats, optional
        Periodic box edges, m: minimum image (cutoff <= half the smallest edge).

    Returns
    -------
    field : ndarray (M, 3) or None
        sum_j q_j f(r) (x_i - x_j)/r over r < rc, C/m^2.
    potential : ndarray (M,) or None
        sum_j q_j u(r) over r < rc, C/m.

    Raises
    ------
    ValueError
        Bad option values, a cutoff above half the box, or a point target
        exactly on a point source.
    """
    rc, mode, inv_lam, bx = resolve_options(cutoff, truncation, screening_length, box)
    screened = inv_lam > 0.0
    lam = 1.0 / inv_lam if screened else None
    uc, fc = _outer_py(rc, lam)
    c0 = uc if mode >= 1 else 0.0
    c1 = fc if mode == 2 else 0.0

    grid = _cells.build(sources, rc, bx)
    qs = np.ascontiguousarray(charges[grid.order])
    gargs = (grid.start, grid.shape, grid.box, grid.periodic, grid.reach)
    self_targets = targets is None
    if self_targets:
        tpoints, tmap, tstart = grid.points, grid.order, grid.start
        m = sources.shape[0]
    else:
        tpoints, tmap, tstart = _cells.bin_targets(targets, grid)
        m = targets.shape[0]
    # targets out of reach of every source (open grids) keep zeros
    field, phi = np.zeros((m, 3)), np.zeros(m)
    nzero = np.zeros(m, np.int64)
    if radii is None:
        kind = 2 if screened else (1 if mode == 2 else 0)
        _cells.run(_sum_points_parallel, _sum_points_serial, tmap.size, grid.points, qs, *gargs,
                   tpoints, tstart, tmap, rc, inv_lam, kind, c0, c1, field, phi, nzero)
        allowed = 1 if self_targets else 0  # the self pair sits at r = 0
        rs = trad = np.zeros(1)
    else:
        rs = np.ascontiguousarray(radii[grid.order])
        trad = rs if self_targets else np.zeros(tmap.size)
        _cells.run(_sum_spheres_parallel, _sum_spheres_serial, tmap.size, grid.points, qs, rs,
                   *gargs, tpoints, trad, tstart, tmap, self_targets, rc, inv_lam, screened, mode,
                   c0, c1, field, phi, nzero)
        allowed = 0
    if m and nzero.max() > allowed:
        i = int(np.flatnonzero(nzero > allowed)[0])
        t = int(np.flatnonzero(tmap == i)[0])
        rt = trad[t] if radii is not None else 0.0
        j = _first_coincident(t, tpoints[0, t], tpoints[1, t], tpoints[2, t], rt, grid.points[0],
                              grid.points[1], grid.points[2], rs, radii is not None, grid.order,
                              grid.start, grid.shape, grid.width, grid.origin, grid.box,
                              grid.periodic, grid.reach, rc, self_targets)
        raise coincident(i, int(j), self_targets)
    return (field if need_field else None), (phi if need_potential else None)
