"""Pieces shared by the two periodic methods, :mod:`.ewald` and :mod:`.mesh`.

Both split the Coulomb sum of a periodic (orthorhombic) system the Ewald way,

    1/r = erfc(alpha r)/r  +  erf(alpha r)/r,

summing the short-ranged first part in real space (pairs closer than the
real-space cutoff, through the linked-cell list of :mod:`.cells`) and the
smooth second part in reciprocal space (over k-vectors in :mod:`.ewald`, on an
FFT mesh in :mod:`.mesh`). This module holds what the two have in common:

* option checking (:func:`setup`), the splitting parameter alpha and the
  real-space cutoff chosen from the asked ``accuracy``;
* the real-space sum (:func:`real_space`), including the finite-radius
  correction (uniformly charged sphere minus point kernel for pairs closer
  than a = max(R_i, R_j));
* the self term -2 alpha q_i / sqrt(pi), the neutralizing background
  -pi Q / (V alpha^2) for a net charge Q (with a warning), the surface term of
  a "vacuum" boundary and the Yeh--Berkowitz slab correction
  (:func:`corrections`).

Conventions: sums are returned without the factor k/eps_r, as the evaluator
contract of :mod:`chargesim.coulomb` asks; ``potential`` at particle i with
``targets=None`` is the Ewald potential, so that 1/2 sum_i q_i phi_i is the
lattice energy of the periodic system.

References: P. P. Ewald, Ann. Phys. 369, 253 (1921); J. Kolafa and
J. W. Perram, Mol. Simul. 9, 351 (1992) (error estimates, the form used
here); S. W. de Leeuw, J. W. Perram and E. R. Smith, Proc. R. Soc. A 373, 27
(1980) (surface term); I.-C. Yeh and M. L. Berkowitz, J. Chem. Phys. 111,
3155 (1999) (slab correction); V. Ballenegger, A. Arnold and J. J. Cerda,
J. Chem. Phys. 131, 094107 (2009) (slab correction with a net charge).
"""
import math
import warnings
from dataclasses import dataclass

import numba
import numpy as np

from . import _checks, cells

#: Options both periodic methods take, with their defaults.
COMMON_OPTIONS = {
    # three orthorhombic edge lengths, m (required)
    "box": None,
    # target rms relative error of fields/forces (see accuracy_product)
    "accuracy": 1e-5,
    # None (3-D periodic) or the non-periodic axis 0, 1 or 2 (slab geometry)
    "slab": None,
    # "tin-foil" (conducting surroundings) or "vacuum" (dipole surface term)
    "boundary": "tin-foil",
    # force the splitting parameter, 1/m (None: chosen from accuracy)
    "alpha": None,
    # force the real-space cutoff, m (None: chosen from accuracy)
    "real_cutoff": None,
}

_BOUNDARIES = ("tin-foil", "vacuum")
SQRT_PI = math.sqrt(math.pi)

# A net charge below this fraction of sum |q| is rounding, not a user's
# choice: it is still neutralized, but silently.
_NET_CHARGE_QUIET = 1e-10


@dataclass
class Setup:
    """Checked options and derived parameters of one periodic evaluation.

    Attributes
    ----------
    box : ndarray (3,)
        Edge lengths, m.
    volume : float
        Box volume, m^3.
    accuracy : float
        Asked rms relative error.
    s : float
        Dimensionless cutoff product alpha * real_cutoff.
    alpha : float
        Splitting parameter, 1/m.
    real_cutoff : float
        Real-space cutoff, m.
    slab, boundary
        As given.
    net_charge : float
        Sum of the charges, C.
    """

    box: np.ndarray
    volume: float
    accuracy: float
    s: float
    alpha: float
    real_cutoff: float
    slab: object
    boundary: str
    net_charge: float


def accuracy_product(accuracy):
    """The product s = alpha r_c for a relative error ``accuracy``.

    ``accuracy`` means the rms relative error of the fields (forces) on the
    particles, sqrt(sum |dE_i|^2 / sum |E_i|^2), for particles that do not
    nearly touch (a hard-core gas, e.g. no two closer than a third of the
    mean spacing). For uniformly random points the rms field is dominated by
    the few closest pairs, and the same settings give a relative error lower
    by up to an order of magnitude. Potentials and the energy come out with a
    similar rms relative error per particle.

    The Kolafa--Perram real-space estimate of the rms force error is
    ~ 2 Q sqrt(1/(N r_c V)) exp(-s^2) with Q = sum q^2; relative to the rms
    force of a neutral system at mean spacing d this is O(1) exp(-s^2) for
    r_c of a few d. Here exp(-s^2)/s = accuracy / 2 (the 1/s from the erfc
    asymptote; the 1/2 because exp(-s^2)/s = accuracy measured 0.6-1.1 x
    accuracy on a hard-core gas, benchmarks/bench_periodic.py's system).
    Solved for s by Newton steps.
    """
    target = -math.log(0.5 * accuracy)
    s = math.sqrt(target)
    for _ in range(20):
        # f(s) = s^2 + ln s - target
        f = s * s + math.log(s) - target
        s -= f / (2.0 * s + 1.0 / s)
    return max(s, 1.0)


def _check_accuracy(value):
    acc = _checks.positive(value, "accuracy")
    if not acc < 0.1:
        raise ValueError(f"accuracy must be a relative error below 0.1 (for example 1e-5), got {value!r}")
    if acc < 1e-15:
        raise ValueError(f"accuracy below 1e-15 is beyond float64 arithmetic, got {value!r}")
    return acc


def _check_slab(value):
    if value is None:
        return None
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or int(value) not in (0, 1, 2):
        raise ValueError(f"slab must be None or the non-periodic axis 0, 1 or 2, got {value!r}")
    return int(value)


def setup(sources, charges, targets, radii, options, *, neighbours_per_particle):
    """Check the periodic options and choose alpha and the real-space cutoff.

    Parameters
    ----------
    sources : ndarray (N, 3)
        Source positions, m.
    charges : ndarray (N,)
        Charges, C.
    targets : ndarray (M, 3) or None
        Target points, m.
    radii : ndarray (N,) or None
        Particle radii, m.
    options : dict
        The method's options with defaults filled in (see COMMON_OPTIONS).
    neighbours_per_particle : float or None
        Mean number of sources within the real-space cutoff the method wants
        (the balance between its real and reciprocal cost); None: the largest
        cutoff the box allows (half the shortest edge).

    Returns
    -------
    Setup
    """
    if options.get("box") is None:
        raise ValueError("box is required for a periodic method: three edge lengths in m, e.g. box=(L, L, L)")
    box = _checks.as_box(options["box"])
    acc = _check_accuracy(options["accuracy"])
    slab = _check_slab(options["slab"])
    boundary = options["boundary"]
    if boundary not in _BOUNDARIES:
        raise ValueError(f"boundary must be one of {_BOUNDARIES}, got {boundary!r}")
    if slab is not None and boundary != "tin-foil":
        raise ValueError("boundary='vacuum' is a 3-D periodic surface term; with slab= the slab correction "
                         "already sets the boundary along the slab axis (leave boundary='tin-foil')")
    volume = float(np.prod(box))
    n = sources.shape[0]
    # the minimum-image real-space sum needs the cutoff below half the shortest edge
    half = 0.5 * float(box.min())
    if slab is not None:
        extent = float(np.ptp(sources[:, slab])) if n else 0.0
        if targets is not None and targets.shape[0]:
            ext_all = max(sources[:, slab].max(), targets[:, slab].max()) - min(sources[:, slab].min(),
                                                                                 targets[:, slab].min())
            extent = max(extent, float(ext_all))
        if extent >= box[slab]:
            raise ValueError(
                f"slab={slab}: the particles span {extent:g} m along axis {slab}, not less than box[{slab}] = "
                f"{box[slab]:g} m; the box must hold the layer plus an empty gap (at least the larger "
                f"periodic edge for about 1e-5, see the ewald module docstring)")

    s = accuracy_product(acc)
    alpha = options.get("alpha")
    rc = options.get("real_cutoff")
    if alpha is not None:
        alpha = _checks.positive(alpha, "alpha")
    if rc is not None:
        rc = _checks.positive(rc, "real_cutoff")
        if rc > half:
            raise ValueError(f"real_cutoff must not exceed half the shortest box edge ({half:g} m), got {rc!r}")
    if alpha is None and rc is None:
        if neighbours_per_particle is None or n == 0:
            rc = half
        else:
            density = n / volume
            rc = min(half, (3.0 * neighbours_per_particle / (4.0 * math.pi * density)) ** (1.0 / 3.0))
        alpha = s / rc
    elif alpha is None:
        alpha = s / rc
    elif rc is None:
        rc = min(half, s / alpha)
    else:
        # both forced: the accuracy then follows from them, not the other way round
        s = alpha * rc
    if alpha * rc < s * (1.0 - 1e-12):
        # alpha forced so small that the cutoff the box allows loses accuracy
        warnings.warn(
            f"alpha={alpha:g} 1/m with the largest real-space cutoff the box allows ({rc:g} m) gives "
            f"alpha*r_c = {alpha * rc:.3g} < {s:.3g} needed for accuracy={acc:g}; results are less accurate",
            RuntimeWarning, stacklevel=5)
    if radii is not None and radii.size and float(radii.max()) >= half:
        raise ValueError(f"radii must be below half the shortest box edge ({half:g} m); "
                         f"index {int(np.argmax(radii))} is {float(radii.max())!r}")

    net = float(np.sum(charges))
    scale = float(np.sum(np.abs(charges)))
    if scale > 0 and abs(net) > _NET_CHARGE_QUIET * scale:
        warnings.warn(
            f"periodic system carries a net charge {net:g} C: a uniform neutralizing background is added "
            "(the energy then includes -pi Q^2/(2 V alpha^2) and depends on that convention)",
            RuntimeWarning, stacklevel=5)
    return Setup(box=box, volume=volume, accuracy=acc, s=s, alpha=float(alpha), real_cutoff=float(rc),
                 slab=slab, boundary=boundary, net_charge=net)


def self_potential(charges, alpha):
    """The self term of the Ewald potential at each particle, -2 alpha q_i/sqrt(pi) (C/m)."""
    return (-2.0 * alpha / SQRT_PI) * charges


def corrections(st, sources, charges, targets, field, potential):
    """Add the background, surface and slab terms to the summed field and potential in place.

    Parameters
    ----------
    st : Setup
    sources : ndarray (N, 3)
        Source positions, m (as given: the dipole moment uses them unwrapped).
    charges : ndarray (N,)
        Charges, C.
    targets : ndarray (M, 3) or None
        Target points, m; None: at the sources.
    field : ndarray (M, 3) or None
        Field sum, C/m^2, updated in place.
    potential : ndarray (M,) or None
        Potential sum, C/m, updated in place.
    """
    tgt = sources if targets is None else targets
    q_net = st.net_charge
    if potential is not None and q_net != 0.0:
        # neutralizing background: the k=0 term left out of the reciprocal sum
        potential -= math.pi * q_net / (st.volume * st.alpha ** 2)
    if st.boundary == "vacuum":
        # surface term of a sphere of cells in vacuum: E = 2 pi |M|^2 / (3 V)
        dip = charges @ sources
        c = 4.0 * math.pi / (3.0 * st.volume)
        if potential is not None:
            potential += c * (tgt @ dip)
        if field is not None:
            field -= c * dip
    if st.slab is not None:
        # Yeh--Berkowitz, with the net-charge terms of Ballenegger et al.:
        # E = 2 pi / V (M_z^2 - Q sum q z^2 - Q^2 L_z^2 / 12)
        ax = st.slab
        z = sources[:, ax]
        mz = float(charges @ z)
        c = 2.0 * math.pi / st.volume
        zt = tgt[:, ax]
        if potential is not None:
            # phi_i = dE/dq_i, so 1/2 sum q_i phi_i = E (E is quadratic in q)
            sq2 = float(charges @ (z * z))
            potential += c * (2.0 * mz * zt - q_net * zt * zt - sq2 - q_net * st.box[ax] ** 2 / 6.0)
        if field is not None:
            field[:, ax] -= 2.0 * c * (mz - q_net * zt)


# --- real space --------------------------------------------------------------

# erfc(x) = exp(-x^2) erfcx(x): the pair kernel needs exp(-x^2) for the field
# anyway, and erfcx is smooth, so a table of degree-8 polynomials on 64 steps
# of 1/8 over [0, 8) (fitted at Chebyshev points to scipy.special.erfcx; rel.
# error ~3e-15, checked in tests/test_ewald.py) replaces the libm erfc, the
# slowest part of the pair kernel. Beyond x = 8, erfc < 1e-29: libm.
_ERFCX_STEPS = 8  # per unit of x
_ERFCX_SPAN = 64  # intervals
_ERFCX_DEGREE = 8


def _erfcx_table():
    from numpy.polynomial import chebyshev, polynomial
    from scipy.special import erfcx

    deg = _ERFCX_DEGREE
    nodes = 0.5 + 0.5 * np.cos(np.pi * (np.arange(deg + 1) + 0.5) / (deg + 1))  # in [0, 1]
    table = np.empty((_ERFCX_SPAN, deg + 1))
    for k in range(_ERFCX_SPAN):
        cheb = chebyshev.chebfit(2.0 * nodes - 1.0, erfcx((k + nodes) / _ERFCX_STEPS), deg)
        # to monomials in t in [0, 1): u = 2 t - 1
        mono = polynomial.Polynomial(chebyshev.cheb2poly(cheb))(polynomial.Polynomial([-1.0, 2.0]))
        table[k] = mono.coef
    return table


ERFCX_TABLE = _erfcx_table()

# cells per cutoff of the real-space grid (see cells.REACH)
_REACH = cells.REACH

#: Inner-loop iterations below which the kernels run serially: waking the
#: worker threads costs more than it saves there. Measured on the shared
#: 2-core reference machine under load: a parallel region cost ~25 ms
#: (250 particles x 1300 k-vectors: 29 ms parallel, 2.9 ms serial), and
#: parallel did not pay below a few million iterations.
PARALLEL_WORK = 2_000_000


@numba.njit(inline="always")
def erfc_exp(x, table):
    """(erfc(x), exp(-x^2)) for x >= 0, erfc from the erfcx table (see above)."""
    e = math.exp(-x * x)
    xx = x * 8.0
    if xx < 64.0:
        k = int(xx)
        t = xx - k
        c = table[k]
        g = c[8]
        g = g * t + c[7]
        g = g * t + c[6]
        g = g * t + c[5]
        g = g * t + c[4]
        g = g * t + c[3]
        g = g * t + c[2]
        g = g * t + c[1]
        g = g * t + c[0]
        return e * g, e
    return math.erfc(x), e


@numba.njit(cache=True)
def erfc_many(x, table):
    """erfc of an array through :func:`erfc_exp` (for tests)."""
    out = np.empty(x.size)
    for i in range(x.size):
        out[i] = erfc_exp(x[i], table)[0]
    return out


# Targets handled per buffer allocation in the real-space kernel. The kernel
# visits, per target, the pruned cell segments of cells.segments: measured
# about 3x faster here than the per-cell gather-and-sweep pattern of
# cells.py (whose table look-ups for erfc do not vectorise), at 40 neighbours.
_CHUNK = 256
# Fast-math flags without the no-NaN/no-inf assumptions (as in direct.py):
# reassociation lets LLVM vectorise the pair sweep.
_FM = {"nsz", "arcp", "contract", "afn", "reassoc"}


@numba.njit(inline="always", fastmath=_FM)
def _pair_sweep(k, bdx, bdy, bdz, br2, bq, alpha, table):
    # the point kernel over a compact list of candidates within the cutoff,
    # branch-free; r2 = 0 (the particle itself, or a coincident one) gives 0
    two_over_sqrtpi = 2.0 / math.sqrt(math.pi)
    fx = 0.0
    fy = 0.0
    fz = 0.0
    p = 0.0
    for u in range(k):
        r2 = br2[u]
        live = r2 > 0.0
        r2s = r2 if live else 1.0
        inv = 1.0 / math.sqrt(r2s)
        x = alpha * r2s * inv
        e = math.exp(-x * x)
        xx = x * 8.0
        far = xx >= 64.0
        xx = 0.0 if far else xx
        kk = int(xx)
        t = xx - kk
        g = table[kk, 8]
        g = g * t + table[kk, 7]
        g = g * t + table[kk, 6]
        g = g * t + table[kk, 5]
        g = g * t + table[kk, 4]
        g = g * t + table[kk, 3]
        g = g * t + table[kk, 2]
        g = g * t + table[kk, 1]
        g = g * t + table[kk, 0]
        # erfc(x) = exp(-x^2) erfcx(x); beyond x = 8 it is below 1e-29: 0
        ec = 0.0 if far else e * g
        w = bq[u] if live else 0.0
        erfc_r = ec * inv
        p += w * erfc_r
        fac = w * (erfc_r + alpha * two_over_sqrtpi * e) * inv * inv
        fx += fac * bdx[u]
        fy += fac * bdy[u]
        fz += fac * bdz[u]
    return fx, fy, fz, p


@numba.njit(inline="always")
def _pair_buffers(cap):
    """Per-target gather buffers of the real-space sum: dx, dy, dz, r^2, q, source index."""
    return np.empty(cap), np.empty(cap), np.empty(cap), np.empty(cap), np.empty(cap), np.empty(cap, np.int64)


@numba.njit(inline="always")
def _real_chunk(chunk, tpoints, torder, self_targets, use_radii, rads, trad, qs, alpha, rc, table,
                 points, order, start, shape, width, origin, box, periodic, reach,
                 ex, ey, ez, phi, bad):
    # Per target (in cell order): the pruned cell segments of cells.segments
    # are filtered to the candidates within the cutoff (compact buffers),
    # then swept by the branch-free point kernel; pairs closer than a radius
    # and coincident points get a scalar pass over the same buffers. qs, rads:
    # charges and radii in slot order (contiguous reads).
    two_over_sqrtpi = 2.0 / math.sqrt(math.pi)
    rc2 = rc * rc
    px, py, pz = points[0], points[1], points[2]
    m = torder.size
    nbuf = cells.max_segments(reach)
    lo = np.empty(nbuf, np.int64)
    hi = np.empty(nbuf, np.int64)
    sh = np.empty((nbuf, 3))
    cap = 64
    bdx, bdy, bdz, br2, bq, bs = _pair_buffers(cap)
    for t in range(chunk * _CHUNK, min(m, (chunk + 1) * _CHUNK)):
        i = torder[t]
        x, y, z = tpoints[0, t], tpoints[1, t], tpoints[2, t]
        nseg = cells.segments(x, y, z, rc, start, shape, width, origin, box, periodic, lo, hi, sh)
        tot = cells.segment_total(nseg, lo, hi)
        if tot > cap:
            cap = 2 * tot
            bdx, bdy, bdz, br2, bq, bs = _pair_buffers(cap)
        k = 0
        nzero = 0
        for g in range(nseg):
            shx, shy, shz = sh[g, 0], sh[g, 1], sh[g, 2]
            for s in range(lo[g], hi[g]):
                dx = x - (px[s] + shx)
                dy = y - (py[s] + shy)
                dz = z - (pz[s] + shz)
                r2 = dx * dx + dy * dy + dz * dz
                if r2 < rc2:
                    bdx[k] = dx
                    bdy[k] = dy
                    bdz[k] = dz
                    br2[k] = r2
                    bq[k] = qs[s]
                    bs[k] = s
                    k += 1
                    if r2 == 0.0:
                        nzero += 1
        fx, fy, fz, p = _pair_sweep(k, bdx, bdy, bdz, br2, bq, alpha, table)
        if self_targets:
            nzero -= 1  # the particle itself
        bad[i] = -1
        if use_radii or nzero > 0:
            ri = trad[i] if use_radii else 0.0
            for u in range(k):
                r2 = br2[u]
                s = bs[u]
                a = max(rads[s], ri) if use_radii else 0.0
                if r2 >= a * a and r2 > 0.0:
                    continue
                if r2 == 0.0:
                    j = order[s]
                    if self_targets and j == i:
                        continue
                    if a == 0.0:
                        # a point target on a point source
                        if bad[i] < 0 or j < bad[i]:
                            bad[i] = j
                        continue
                    # sphere kernel minus the smooth erf/r part, at r = 0
                    p += bq[u] * (1.5 / a - alpha * two_over_sqrtpi)
                    continue
                # uniformly charged sphere instead of the point kernel
                inv = 1.0 / math.sqrt(r2)
                a3 = a * a * a
                qj = bq[u]
                p += qj * (0.5 * (3.0 * a * a - r2) / a3 - inv)
                fac = qj * (1.0 / a3 - inv * inv * inv)
                fx += fac * bdx[u]
                fy += fac * bdy[u]
                fz += fac * bdz[u]
        ex[i] = fx
        ey[i] = fy
        ez[i] = fz
        phi[i] = p


@numba.njit(parallel=True, cache=True)
def _real_parallel(tpoints, torder, self_targets, use_radii, rads, trad, qs, alpha, rc, table,
                   points, order, start, shape, width, origin, box, periodic, reach, ex, ey, ez, phi, bad):
    for chunk in numba.prange((torder.size + _CHUNK - 1) // _CHUNK):
        _real_chunk(chunk, tpoints, torder, self_targets, use_radii, rads, trad, qs, alpha, rc, table,
                    points, order, start, shape, width, origin, box, periodic, reach, ex, ey, ez, phi, bad)


@numba.njit(cache=True)
def _real_serial(tpoints, torder, self_targets, use_radii, rads, trad, qs, alpha, rc, table,
                 points, order, start, shape, width, origin, box, periodic, reach, ex, ey, ez, phi, bad):
    for chunk in range((torder.size + _CHUNK - 1) // _CHUNK):
        _real_chunk(chunk, tpoints, torder, self_targets, use_radii, rads, trad, qs, alpha, rc, table,
                    points, order, start, shape, width, origin, box, periodic, reach, ex, ey, ez, phi, bad)


def real_space(st, sources, charges, targets, radii):
    """Real-space part of the Ewald sum (erfc kernel within the cutoff), with finite radii.

    Parameters
    ----------
    st : Setup
        Box, alpha and real-space cutoff.
    sources : ndarray (N, 3)
        Source positions, m.
    charges : ndarray (N,)
        Charges, C.
    targets : ndarray (M, 3) or None
        Target points, m; None: at each source, excluding itself.
    radii : ndarray (N,) or None
        Radii, m.

    Returns
    -------
    field : ndarray (M, 3)
        C/m^2.
    potential : ndarray (M,)
        C/m.

    Raises
    ------
    ValueError
        From :func:`._checks.coincident` when a point target sits on a point source.
    """
    self_targets = targets is None
    use_radii = radii is not None
    search = st.real_cutoff
    if use_radii and radii.size:
        # pairs closer than a = max(R_i, R_j) need the sphere correction
        search = max(search, float(radii.max()))
    grid = cells.build(sources, search, st.box, reach=_REACH)
    if self_targets:
        tpoints, torder = grid.points, grid.order
    else:
        # targets in cell order too, for locality
        tpoints, torder, _ = cells.bin_targets(targets, grid)
    m = sources.shape[0] if self_targets else targets.shape[0]
    rad = radii if use_radii else np.zeros(sources.shape[0])
    trad = rad if self_targets else np.zeros(m)
    ex = np.empty(m)
    ey = np.empty(m)
    ez = np.empty(m)
    phi = np.empty(m)
    bad = np.empty(m, dtype=np.int64)
    # parallel only where the work (targets x candidates) hides the cost of
    # waking the threads
    work = m * min(sources.shape[0], 4.0 / 3.0 * math.pi * search ** 3 * sources.shape[0] / st.volume * 4.0)
    kernel = _real_parallel if work >= PARALLEL_WORK else _real_serial
    kernel(tpoints, torder, self_targets, use_radii, rad[grid.order], trad, charges[grid.order],
                 st.alpha, search, ERFCX_TABLE, grid.points, grid.order, grid.start, grid.shape, grid.width,
                 grid.origin, grid.box, grid.periodic, grid.reach, ex, ey, ez, phi, bad)
    hit = np.flatnonzero(bad >= 0)
    if hit.size:
        i = int(hit[0])
        raise _checks.coincident(i, int(bad[i]), self_targets)
    return np.stack((ex, ey, ez), axis=1), phi


def assemble(st, sources, charges, targets, radii, need_field, need_potential, reciprocal):
    """Real space + ``reciprocal()`` + self, background, surface and slab terms.

    Parameters
    ----------
    st : Setup
    sources, charges, targets, radii
        As in the evaluator contract.
    need_field, need_potential : bool
        Which results to return.
    reciprocal : callable
        No arguments; returns the reciprocal-space (field, potential) at the
        targets (at the sources when targets is None, self Gaussian included).

    Returns
    -------
    field, potential
        As the evaluator contract asks (None where not needed).
    """
    # real space first: it raises on coincident point charges before any FFT work
    f_real, p_real = real_space(st, sources, charges, targets, radii)
    f_rec, p_rec = reciprocal()
    field = f_real + f_rec if need_field else None
    potential = p_real + p_rec if need_potential else None
    if potential is not None and targets is None:
        potential += self_potential(charges, st.alpha)
    corrections(st, sources, charges, targets, field, potential)
    return field, potential
