"""Ewald summation for periodic (orthorhombic) systems.

The conditionally convergent lattice sum of a periodic cell is split (see
:mod:`._ewald_common`) into a real-space part over pairs closer than a cutoff
r_c (erfc kernel, through the linked-cell list of :mod:`.cells`) and a
reciprocal-space part summed exactly over the k-vectors with |k| <= k_c:

    phi_rec(r) = 4 pi / V  sum_{k != 0}  exp(-k^2 / (4 alpha^2)) / k^2  Re[S(k) exp(-i k.r)],
    S(k) = sum_j q_j exp(i k.r_j).

Conducting ("tin-foil") surroundings by default; ``boundary="vacuum"`` adds
the dipole surface term 2 pi |M|^2 / (3V). A net charge is neutralized by a
uniform background (with a warning). ``slab=axis`` treats the system as
periodic in the other two axes only, with the Yeh--Berkowitz correction; the
box edge along that axis must then hold the layer *and an empty gap*. What
is left of the coupling between the layer and its images across the gap
decays about as exp(-2 pi gap / L) with L the larger periodic edge (measured
in tests/test_ewald.py: relative energy error ~1e-5 at gap = 1.7 L, ~3e-8
at 2.7 L; a gap of only 3 layer thicknesses, a common rule, gave 2e-3 for a
layer 0.3 L thick). Positions along the slab axis are used as given (not
wrapped) for the dipole moment: keep the layer inside one box length.

Finite radii as in the evaluator contract: pairs closer than
a = max(R_i, R_j) interact as uniformly charged spheres (the sphere-minus-
point correction is added in real space); each radius must stay below half
the shortest box edge. The potential of a periodic system is defined up to a
constant; here it is the one whose 1/2 sum q_i phi_i is the Ewald energy
(including, with a net charge, the background term -pi Q^2 / (2 V alpha^2)
and, with ``slab``, the constant of the slab correction).

The cost is O(N^(3/2)) at the best splitting parameter (the k-space sum runs
over all particles for every k-vector), so for large N use :mod:`.mesh`; the
front door's ``method="auto"`` switches at :data:`MESH_CROSSOVER`.

Options (beyond the front door's common ones)
---------------------------------------------
box : 3 floats, m
    Edge lengths of the periodic box (required).
accuracy : float
    Target rms relative error of the fields/forces on the particles, default
    1e-5 (measured: 0.4-0.6 x accuracy on a gas of particles that do not
    nearly touch; lower on uniformly random points): it sets alpha * r_c and
    k_c / alpha from Kolafa--Perram-type error estimates (see
    :func:`._ewald_common.accuracy_product`).
slab : None or 0, 1, 2
    Non-periodic axis (slab geometry), default None (periodic in 3-D).
boundary : "tin-foil" or "vacuum"
    Surroundings of the infinite lattice, default "tin-foil".
alpha : float, 1/m, optional
    Force the splitting parameter (the result must not depend on it: a
    check used in the tests); the cutoffs then follow from ``accuracy``.
real_cutoff : float, m, optional
    Force the real-space cutoff (at most half the shortest edge).
"""
import math

import numba
import numpy as np

from . import _ewald_common as common

OPTIONS = dict(common.COMMON_OPTIONS)

#: N above which the mesh method beats Ewald at the default accuracy (1e-5),
#: measured with ``benchmarks/bench_periodic.py --crossover`` on the shared
#: 2-core reference machine (load average ~7), forces, medians of 7:
#: N = 8: Ewald 0.6 ms, mesh 0.7 ms; 27: 0.8/0.7; 64: 1.6/1.4; 125: 6.5/4.1;
#: 250: 12.1/7.6; 500: 37/11.5; 1000: 86/23; 4000: 592/184. Below ~100 the
#: two are within the noise of each other, so Ewald (exact k-space sum) keeps
#: the small systems.
MESH_CROSSOVER = 100

# Targets per chunk of the parallel k-space loop.
_CHUNK = 64

# Real-space work per pair relative to reciprocal work per (particle, k) pair:
# sets the splitting parameter at which the two parts cost the same
# (alpha^6 ~ c_real pi^3 N / (2 c_k V^2)). Measured (forces, accuracy 1e-5,
# medians of 3): N = 1000: 99/54/56/89 ms and N = 1e4: 2.15/2.24/2.04/2.53 s
# for ratios 5/10/20/40; the optimum is flat between 10 and 20.
_COST_RATIO = 15.0


def kvectors(box, kc):
    """The half-space of reciprocal vectors with 0 < |k| <= kc.

    Parameters
    ----------
    box : ndarray (3,)
        Edge lengths, m.
    kc : float
        Reciprocal cutoff, 1/m.

    Returns
    -------
    n : ndarray (K, 3) of int64
        Integer indices (k = 2 pi n / L), one of each +-k pair.
    nmax : ndarray (3,) of int64
        Largest |n| per axis.
    """
    nmax = np.floor(kc * box / (2.0 * math.pi)).astype(np.int64)
    axes = [np.arange(-m, m + 1) for m in nmax]
    n1, n2, n3 = np.meshgrid(*axes, indexing="ij")
    n = np.stack((n1.ravel(), n2.ravel(), n3.ravel()), axis=1)
    k = 2.0 * math.pi * n / box
    k2 = np.einsum("ij,ij->i", k, k)
    half = (n[:, 0] > 0) | ((n[:, 0] == 0) & ((n[:, 1] > 0) | ((n[:, 1] == 0) & (n[:, 2] > 0))))
    keep = half & (k2 <= kc * kc)
    return np.ascontiguousarray(n[keep]), nmax


# Fast-math flags without the no-NaN/no-inf assumptions (as in direct.py):
# reassociation lets LLVM vectorise the sums over a row of k-vectors.
_FM = {"nsz", "arcp", "contract", "afn", "reassoc"}


def _rows(nvec):
    """Runs of k-vectors sharing (n1, n2): (n1, n2, first n3, start) per row, and the end.

    kvectors() lists them sorted by n1, n2, n3, and in each row the kept n3
    are consecutive (a sphere cut, and n3 > 0 on the n1 = n2 = 0 row), so a
    row is exp(i(k1 x + k2 y)) times a contiguous run of exp(i k3 z).
    """
    new = np.ones(nvec.shape[0], dtype=bool)
    new[1:] = (nvec[1:, 0] != nvec[:-1, 0]) | (nvec[1:, 1] != nvec[:-1, 1])
    start = np.flatnonzero(new)
    rows = np.empty((start.size, 4), dtype=np.int64)
    rows[:, 0] = nvec[start, 0]
    rows[:, 1] = nvec[start, 1]
    rows[:, 2] = nvec[start, 2]
    rows[:, 3] = start
    return rows, np.int64(nvec.shape[0])


@numba.njit(inline="always")
def _phase_buffers(nmax):
    """cos and sin buffers of one point's phases along x, y, z (see _phases)."""
    return (np.empty(2 * nmax[0] + 1), np.empty(2 * nmax[0] + 1), np.empty(2 * nmax[1] + 1),
            np.empty(2 * nmax[1] + 1), np.empty(2 * nmax[2] + 1), np.empty(2 * nmax[2] + 1))


@numba.njit(inline="always")
def _row_phase(rows, r, nrow, nk, nmax, cx, sx, cy, sy):
    """exp(i(k1 x + k2 y)) of k-vector row r (real, imaginary part), its first
    z index into the phase buffers and its range [lo, hi) of k-vectors."""
    a = rows[r, 0] + nmax[0]
    b = rows[r, 1] + nmax[1]
    ar = cx[a] * cy[b] - sx[a] * sy[b]
    ai = cx[a] * sy[b] + sx[a] * cy[b]
    hi = rows[r + 1, 3] if r + 1 < nrow else nk
    return ar, ai, rows[r, 2] + nmax[2], rows[r, 3], hi


@numba.njit(inline="always")
def _phases(x, y, z, box, nmax, cx, sx, cy, sy, cz, sz):
    # cos and sin of 2 pi n x / L for n = -nmax..nmax on each axis, by direct
    # evaluation (a recurrence would accumulate rounding over many n)
    tx = 2.0 * math.pi * x / box[0]
    ty = 2.0 * math.pi * y / box[1]
    tz = 2.0 * math.pi * z / box[2]
    for n in range(-nmax[0], nmax[0] + 1):
        cx[n + nmax[0]] = math.cos(n * tx)
        sx[n + nmax[0]] = math.sin(n * tx)
    for n in range(-nmax[1], nmax[1] + 1):
        cy[n + nmax[1]] = math.cos(n * ty)
        sy[n + nmax[1]] = math.sin(n * ty)
    for n in range(-nmax[2], nmax[2] + 1):
        cz[n + nmax[2]] = math.cos(n * tz)
        sz[n + nmax[2]] = math.sin(n * tz)


@numba.njit(inline="always", fastmath=_FM)
def _sf_row(qj, ar, ai, cz, sz, z0, lo, hi, s_re, s_im):
    for k in range(lo, hi):
        u = z0 + k - lo
        s_re[k] += qj * (ar * cz[u] - ai * sz[u])
        s_im[k] += qj * (ar * sz[u] + ai * cz[u])


@numba.njit(inline="always")
def _sf_chunk(c, px, py, pz, q, box, rows, nk, nmax, nchunks, s_re, s_im):
    n = px.size
    cx, sx, cy, sy, cz, sz = _phase_buffers(nmax)
    nrow = rows.shape[0]
    for j in range(c * n // nchunks, (c + 1) * n // nchunks):
        _phases(px[j], py[j], pz[j], box, nmax, cx, sx, cy, sy, cz, sz)
        qj = q[j]
        for r in range(nrow):
            ar, ai, z0, lo, hi = _row_phase(rows, r, nrow, nk, nmax, cx, sx, cy, sy)
            _sf_row(qj, ar, ai, cz, sz, z0, lo, hi, s_re[c], s_im[c])


@numba.njit(parallel=True, cache=True)
def _sf_parallel(px, py, pz, q, box, rows, nk, nmax, nchunks, s_re, s_im):
    # fixed chunks of particles (not per-thread scheduling): a fixed sum order
    for c in numba.prange(nchunks):
        _sf_chunk(c, px, py, pz, q, box, rows, nk, nmax, nchunks, s_re, s_im)


@numba.njit(cache=True)
def _sf_serial(px, py, pz, q, box, rows, nk, nmax, nchunks, s_re, s_im):
    for c in range(nchunks):
        _sf_chunk(c, px, py, pz, q, box, rows, nk, nmax, nchunks, s_re, s_im)


@numba.njit(inline="always", fastmath=_FM)
def _target_row(ar, ai, cz, sz, z0, lo, hi, s_re, s_im, coef, kx, ky, kz):
    p = 0.0
    fx = 0.0
    fy = 0.0
    fz = 0.0
    for k in range(lo, hi):
        u = z0 + k - lo
        er = ar * cz[u] - ai * sz[u]
        ei = ar * sz[u] + ai * cz[u]
        # S(k) exp(-i k.r) = S conj(e)
        re = s_re[k] * er + s_im[k] * ei
        im = s_im[k] * er - s_re[k] * ei
        p += coef[k] * re
        w = coef[k] * im
        fx += w * kx[k]
        fy += w * ky[k]
        fz += w * kz[k]
    return p, fx, fy, fz


@numba.njit(inline="always")
def _targets_chunk(ch, tx, ty, tz, box, rows, nk, nmax, coef, s_re, s_im, kx, ky, kz, ex_out, ey_out, ez_out,
                   phi_out):
    cx, sx, cy, sy, cz, sz = _phase_buffers(nmax)
    nrow = rows.shape[0]
    for i in range(ch * _CHUNK, min(tx.size, (ch + 1) * _CHUNK)):
        _phases(tx[i], ty[i], tz[i], box, nmax, cx, sx, cy, sy, cz, sz)
        p = 0.0
        fx = 0.0
        fy = 0.0
        fz = 0.0
        for r in range(nrow):
            ar, ai, z0, lo, hi = _row_phase(rows, r, nrow, nk, nmax, cx, sx, cy, sy)
            dp, dx, dy, dz = _target_row(ar, ai, cz, sz, z0, lo, hi, s_re, s_im, coef, kx, ky, kz)
            p += dp
            fx += dx
            fy += dy
            fz += dz
        phi_out[i] = p
        # E = -grad phi = -(4 pi/V) sum A k Im[S exp(-i k.r)]
        ex_out[i] = -fx
        ey_out[i] = -fy
        ez_out[i] = -fz


@numba.njit(parallel=True, cache=True)
def _targets_parallel(tx, ty, tz, box, rows, nk, nmax, coef, s_re, s_im, kx, ky, kz, ex, ey, ez, phi):
    for ch in numba.prange((tx.size + _CHUNK - 1) // _CHUNK):
        _targets_chunk(ch, tx, ty, tz, box, rows, nk, nmax, coef, s_re, s_im, kx, ky, kz, ex, ey, ez, phi)


@numba.njit(cache=True)
def _targets_serial(tx, ty, tz, box, rows, nk, nmax, coef, s_re, s_im, kx, ky, kz, ex, ey, ez, phi):
    for ch in range((tx.size + _CHUNK - 1) // _CHUNK):
        _targets_chunk(ch, tx, ty, tz, box, rows, nk, nmax, coef, s_re, s_im, kx, ky, kz, ex, ey, ez, phi)


def _soa(points):
    t = np.ascontiguousarray(points.T)
    return t[0], t[1], t[2]


def reciprocal(sources, charges, targets, alpha, box, kc, *, need_field=True, need_potential=True):
    """Reciprocal-space Ewald sums over the k-vectors with |k| <= kc.

    Parameters
    ----------
    sources : ndarray (N, 3)
        Source positions, m.
    charges : ndarray (N,)
        Charges, C.
    targets : ndarray (M, 3) or None
        Target points, m; None: at the sources (self Gaussian included: the
        caller subtracts the self term).
    alpha : float
        Splitting parameter, 1/m.
    box : ndarray (3,)
        Edge lengths, m.
    kc : float
        Reciprocal cutoff, 1/m.

    Returns
    -------
    field : ndarray (M, 3) or None
        C/m^2.
    potential : ndarray (M,) or None
        C/m.
    """
    tgt = sources if targets is None else targets
    m = tgt.shape[0]
    nvec, nmax = kvectors(box, kc)
    if nvec.shape[0] == 0:
        return (np.zeros((m, 3)) if need_field else None), (np.zeros(m) if need_potential else None)
    kvec = np.ascontiguousarray(2.0 * math.pi * nvec / box)
    k2 = np.einsum("ij,ij->i", kvec, kvec)
    volume = float(np.prod(box))
    # 8 pi / V: the 4 pi / V of the full sum, doubled for the -k partner
    coef = (8.0 * math.pi / volume) * np.exp(-k2 / (4.0 * alpha * alpha)) / k2
    px, py, pz = _soa(sources)
    nk = nvec.shape[0]
    n = px.size
    rows, _ = _rows(nvec)
    # parallel only where the work hides the cost of waking the threads
    nchunks = max(1, numba.get_num_threads()) if n * nk >= common.PARALLEL_WORK else 1
    s_re = np.zeros((nchunks, nk))
    s_im = np.zeros((nchunks, nk))
    sf = _sf_parallel if nchunks > 1 else _sf_serial
    sf(px, py, pz, charges, box, rows, nk, nmax, nchunks, s_re, s_im)
    # chunk by chunk: a fixed order
    s_re = s_re.sum(axis=0)
    s_im = s_im.sum(axis=0)
    tx, ty, tz = (px, py, pz) if targets is None else _soa(targets)
    ex = np.empty(m)
    ey = np.empty(m)
    ez = np.empty(m)
    phi = np.empty(m)
    kt = np.ascontiguousarray(kvec.T)
    kernel = _targets_parallel if m * nk >= common.PARALLEL_WORK else _targets_serial
    kernel(tx, ty, tz, box, rows, nk, nmax, coef, s_re, s_im, kt[0], kt[1], kt[2], ex, ey, ez, phi)
    field = np.stack((ex, ey, ez), axis=1) if need_field else None
    return field, (phi if need_potential else None)


def reciprocal_cutoff(st):
    """The reciprocal cutoff k_c (1/m) for the accuracy of ``st``: exp(-k_c^2/(4 alpha^2)) matched to exp(-s^2)."""
    return 2.0 * st.alpha * st.s


def neighbours_for_balance(n, volume):
    """Mean number of neighbours within r_c that balances real and k-space cost (see _COST_RATIO)."""
    if n == 0:
        return None
    s = 3.0  # the balance hardly depends on s: both costs scale as s^3
    alpha = (_COST_RATIO * math.pi ** 3 * n / 2.0) ** (1.0 / 6.0) / volume ** (1.0 / 3.0)
    rc = s / alpha
    return 4.0 / 3.0 * math.pi * rc ** 3 * n / volume


def evaluate(sources, charges, targets, radii, *, need_field=True, need_potential=True, **options):
    """Ewald sums of field and potential, without the factor k/eps_r.

    Parameters
    ----------
    sources : ndarray, shape (N, 3)
        Source positions, m.
    charges : ndarray, shape (N,)
        Charges, C.
    targets : ndarray, shape (M, 3), or None
        Target points, m; None: at each source, excluding itself but
        including its periodic images.
    radii : ndarray, shape (N,), or None
        Particle radii, m (uniformly charged spheres for pairs closer than
        a = max(R_i, R_j)); each must be below half the shortest box edge.
    need_field, need_potential : bool
        Which results to return.
    **options
        See the module docstring (``box`` is required).

    Returns
    -------
    field : ndarray (M, 3) or None
        Periodic field sum, C/m^2.
    potential : ndarray (M,) or None
        Ewald potential, C/m; at the particles (targets=None) it includes the
        self-term correction, so 1/2 sum q_i phi_i is the lattice energy.
    """
    n = sources.shape[0]
    volume = float(np.prod(common._checks.as_box(options["box"]))) if options.get("box") is not None else 1.0
    st = common.setup(sources, charges, targets, radii, options,
                      neighbours_per_particle=neighbours_for_balance(n, volume))
    kc = reciprocal_cutoff(st)
    return common.assemble(st, sources, charges, targets, radii, need_field, need_potential,
                           lambda: reciprocal(sources, charges, targets, st.alpha, st.box, kc,
                                              need_field=need_field, need_potential=need_potential))
