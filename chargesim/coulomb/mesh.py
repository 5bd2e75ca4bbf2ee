"""Smooth particle-mesh Ewald (SPME): the periodic sum for large N.

The same Ewald split as :mod:`.ewald` (the real-space part is the very same
function, :func:`._ewald_common.real_space`); the reciprocal part is done on a
regular mesh instead of over explicit k-vectors:

1. charges are spread onto a K1 x K2 x K3 mesh with cardinal B-splines of
   (even) order p (numba; particles sorted by mesh cell, x-slabs of even
   then odd parity in parallel, so there are no write races and the order of
   additions, hence every bit of the result, does not depend on the thread
   count);
2. the mesh is transformed (``scipy.fft.rfftn``, two workers), multiplied by
   the Ewald influence function 4 pi / V exp(-k^2/(4 alpha^2)) / k^2 and by
   the B-spline moduli |b(m)|^2 that undo the smoothing of the spreading, and
   transformed back: the mesh then holds the reciprocal potential;
3. potential and field are interpolated back at the targets with the same
   B-splines and their derivatives (analytic differentiation: one inverse
   FFT).

Cost O(N p^3 + K log K) with K ~ N mesh points: O(N log N). The order p
and the mesh are chosen from ``accuracy`` by the measured aliasing error and
a measured cost model (:func:`choose`); the real-space cutoff holds about 40
neighbours per particle.

Reference: U. Essmann, L. Perera, M. L. Berkowitz, T. Darden, H. Lee and
L. G. Pedersen, J. Chem. Phys. 103, 8577 (1995).

Options (beyond the front door's common ones)
---------------------------------------------
box, accuracy, slab, boundary, alpha, real_cutoff
    As in :mod:`.ewald` (``accuracy`` default 1e-5: rms relative error of the
    fields/forces; it sets alpha * r_c, the spline order and the mesh).
mesh : int or 3 ints, optional
    Force the mesh points per axis (each >= the spline order); None: chosen
    from ``accuracy`` and alpha.
order : int, optional
    Force the B-spline order (even, 4..12); None: chosen from ``accuracy``.
"""
import functools
import math

import numba
import numpy as np
import scipy.fft

from . import _ewald_common as common

OPTIONS = dict(common.COMMON_OPTIONS)
OPTIONS.update({"mesh": None, "order": None})

# Mean number of sources within the real-space cutoff: small enough that the
# pair sum is cheap, large enough that the mesh stays coarse (measured with
# benchmarks/bench_periodic.py).
_NEIGHBOURS = 40.0

#: FFT worker threads (the reference machine has two cores).
FFT_WORKERS = 2


# Measured mesh error of this implementation, rms relative force error
# ~ A_p (alpha h)^p at mesh spacing h, A_p the largest seen over alpha h =
# 0.2..0.55 (random neutral charges, the mesh part
# against an exact k-space sum; the fit behind mesh_for):
_ALIAS = {4: 0.025, 6: 7e-3, 8: 7e-3, 10: 0.012, 12: 0.02}
# share of the asked accuracy left to the mesh (the real-space cut and the
# k-space truncation take the rest). The A_p above were fitted on uniformly
# random points, whose rms force is inflated by the closest pairs; on a
# hard-core gas (the meaning of accuracy, see _ewald_common.accuracy_product)
# the same mesh error is ~3-5x larger relative to the rms force, hence 0.1
# (measured total: 0.45-0.55 x accuracy at 1e-3..1e-5 on that gas).
_MESH_SHARE = 0.1
# rough costs per spline point (spreading + interpolation) and per mesh point
# and FFT level (forward + inverse), s: only their ratio matters
_COST_POINT = 1.1e-8
_COST_FFT = 7.0e-9


def _good_size(n):
    # FFT-friendly size (products of 2, 3, 5), and even so the Nyquist plane
    # has the B-spline moduli of an even order well defined
    n = max(int(n), 2)
    while True:
        n = scipy.fft.next_fast_len(n, real=True)
        if n % 2 == 0:
            return n
        n += 1


def mesh_for(st, order):
    """Mesh points per axis so that the mesh error of order ``order`` stays within the accuracy of ``st``.

    From the measured aliasing error A_p (alpha h)^p (see _ALIAS), and never
    coarser than the k-space cutoff k_c = 2 alpha s of :mod:`.ewald` needs.
    """
    ah = (_MESH_SHARE * st.accuracy / _ALIAS[order]) ** (1.0 / order)
    kmax = st.alpha * st.s * st.box / math.pi
    out = []
    for a in range(3):
        k = max(st.alpha * st.box[a] / ah, 2.0 * kmax[a] + 1.0, order)
        out.append(_good_size(math.ceil(k)))
    return np.array(out, dtype=np.int64)


def choose(st, n):
    """(order, mesh shape) of least estimated cost for ``n`` particles at the accuracy of ``st``."""
    best = None
    for order in sorted(_ALIAS):
        shape = mesh_for(st, order)
        m = float(np.prod(shape))
        cost = _COST_POINT * n * order ** 3 + _COST_FFT * m * math.log2(m)
        if best is None or cost < best[0]:
            best = (cost, order, shape)
    return best[1], best[2]


@numba.njit(inline="always")
def _spline(t, p, w, dw):
    # w[j] = M_p(t + j), dw[j] = M_p'(t + j) for j = 0..p-1 (0 <= t < 1),
    # by the recursion M_n(x) = (x M_{n-1}(x) + (n - x) M_{n-1}(x - 1)) / (n - 1)
    w[0] = t
    w[1] = 1.0 - t
    for j in range(2, p):
        w[j] = 0.0
    for n in range(3, p + 1):
        if n == p:
            # derivative from order p - 1: M_p'(x) = M_{p-1}(x) - M_{p-1}(x - 1)
            dw[0] = w[0]
            for j in range(1, p):
                dw[j] = w[j] - w[j - 1]
        inv = 1.0 / (n - 1)
        for j in range(n - 1, 0, -1):
            x = t + j
            w[j] = (x * w[j] + (n - x) * w[j - 1]) * inv
        w[0] = t * w[0] * inv
    if p == 2:
        dw[0] = 1.0
        dw[1] = -1.0


@numba.njit(inline="always")
def _base(x, length, k):
    # scaled fractional coordinate u in [0, K) and its integer cell
    u = k * (x / length - math.floor(x / length))
    iu = int(math.floor(u))
    if iu >= k:  # rounding at the upper edge
        iu -= k
        u -= k
    return iu, u - iu


# Spreading writes to one shared mesh without races and in a fixed order:
# particles are sorted by mesh cell (x-major), the x-planes are cut into an
# even number of slabs at least p planes thick, and the even slabs are done in
# parallel, then the odd ones. A particle in plane i writes to planes
# i-p+1..i, so two slabs of the same parity never touch the same plane (the
# wrap-around of slab 0 lands in the last slab, of the other parity). The
# order of additions depends only on the mesh, not on the thread count.

@numba.njit(cache=True)
def _cell_keys(px, py, pz, box, shape, key):
    for i in range(px.size):
        ix, _ = _base(px[i], box[0], shape[0])
        iy, _ = _base(py[i], box[1], shape[1])
        iz, _ = _base(pz[i], box[2], shape[2])
        key[i] = (ix * shape[1] + iy) * shape[2] + iz


@numba.njit(inline="always")
def _indices(i0, k, p, out):
    # periodic mesh indices i0, i0-1, ..., i0-p+1 of the p spline points
    for a in range(p):
        j = i0 - a
        out[a] = j + k if j < 0 else j



@numba.njit(inline="always")
def _stencil(x, y, z, box, k1, k2, k3, p, wx, wy, wz, dx, dy, dz, ia, ib, ic):
    """B-spline weights (wx, wy, wz), their derivatives (dx, dy, dz) and the
    wrapped mesh indices (ia, ib, ic) of the p x p x p stencil of a point."""
    ix, fx = _base(x, box[0], k1)
    iy, fy = _base(y, box[1], k2)
    iz, fz = _base(z, box[2], k3)
    _spline(fx, p, wx, dx)
    _spline(fy, p, wy, dy)
    _spline(fz, p, wz, dz)
    _indices(ix, k1, p, ia)
    _indices(iy, k2, p, ib)
    _indices(iz, k3, p, ic)

@numba.njit(cache=True)
def _spread_range(px, py, pz, q, box, shape, p, visit, lo, hi, mesh):
    k1, k2, k3 = shape[0], shape[1], shape[2]
    wx = np.empty(p)
    wy = np.empty(p)
    wz = np.empty(p)
    dw = np.empty(p)
    ia = np.empty(p, np.int64)
    ib = np.empty(p, np.int64)
    ic = np.empty(p, np.int64)
    for s in range(lo, hi):
        i = visit[s]
        _stencil(px[i], py[i], pz[i], box, k1, k2, k3, p, wx, wy, wz, dw, dw, dw, ia, ib, ic)
        qi = q[i]
        for a in range(p):
            qa = qi * wx[a]
            for b in range(p):
                qab = qa * wy[b]
                row = mesh[ia[a], ib[b]]
                for c in range(p):
                    row[ic[c]] += qab * wz[c]


@numba.njit(parallel=True, cache=True)
def _spread_slabs(px, py, pz, q, box, shape, p, visit, bounds, parity, mesh):
    nslab = bounds.size - 1
    for h in numba.prange((nslab - parity + 1) // 2):
        sl = 2 * h + parity
        _spread_range(px, py, pz, q, box, shape, p, visit, bounds[sl], bounds[sl + 1], mesh)


def _spread(px, py, pz, q, box, shape, p, visit, keys):
    """Charge mesh (K1, K2, K3) from B-spline spreading (see the comment above)."""
    k1, k2, k3 = (int(v) for v in shape)
    mesh = np.zeros((k1, k2, k3))
    nslab = k1 // p
    nslab -= nslab % 2
    # serial where the work does not hide the cost of waking the threads
    if nslab < 2 or visit.size * p ** 3 < common.PARALLEL_WORK:
        _spread_range(px, py, pz, q, box, shape, p, visit, 0, visit.size, mesh)
        return mesh
    planes = (np.arange(nslab + 1) * k1) // nslab
    bounds = np.searchsorted(keys, planes * (k2 * k3)).astype(np.int64)
    _spread_slabs(px, py, pz, q, box, shape, p, visit, bounds, 0, mesh)
    _spread_slabs(px, py, pz, q, box, shape, p, visit, bounds, 1, mesh)
    return mesh


@numba.njit(inline="always")
def _interp_chunk(ch, tx, ty, tz, box, shape, p, phi_mesh, ex, ey, ez, phi):
    k1, k2, k3 = shape[0], shape[1], shape[2]
    s1 = k1 / box[0]
    s2 = k2 / box[1]
    s3 = k3 / box[2]
    m = tx.size
    wx = np.empty(p)
    wy = np.empty(p)
    wz = np.empty(p)
    dx = np.empty(p)
    dy = np.empty(p)
    dz = np.empty(p)
    ia = np.empty(p, np.int64)
    ib = np.empty(p, np.int64)
    ic = np.empty(p, np.int64)
    for i in range(ch * 256, min(m, (ch + 1) * 256)):
        _stencil(tx[i], ty[i], tz[i], box, k1, k2, k3, p, wx, wy, wz, dx, dy, dz, ia, ib, ic)
        v = 0.0
        gx = 0.0
        gy = 0.0
        gz = 0.0
        for a in range(p):
            for b in range(p):
                row = phi_mesh[ia[a], ib[b]]
                sv = 0.0
                sd = 0.0
                for c in range(p):
                    mv = row[ic[c]]
                    sv += wz[c] * mv
                    sd += dz[c] * mv
                v += wx[a] * wy[b] * sv
                gx += dx[a] * wy[b] * sv
                gy += wx[a] * dy[b] * sv
                gz += wx[a] * wy[b] * sd
        phi[i] = v
        # E = -grad phi; d/dx M_p(u - g) = (K/L) M_p'(u - g)
        ex[i] = -s1 * gx
        ey[i] = -s2 * gy
        ez[i] = -s3 * gz


@numba.njit(parallel=True, cache=True)
def _interp_parallel(tx, ty, tz, box, shape, p, phi_mesh, ex, ey, ez, phi):
    for ch in numba.prange((tx.size + 255) // 256):
        _interp_chunk(ch, tx, ty, tz, box, shape, p, phi_mesh, ex, ey, ez, phi)


@numba.njit(cache=True)
def _interp_serial(tx, ty, tz, box, shape, p, phi_mesh, ex, ey, ez, phi):
    for ch in range((tx.size + 255) // 256):
        _interp_chunk(ch, tx, ty, tz, box, shape, p, phi_mesh, ex, ey, ez, phi)


def _moduli(k, p):
    """|b(m)|^2 = 1 / |sum_{j=0}^{p-2} M_p(j + 1) exp(2 pi i m j / K)|^2 for m = 0..K-1."""
    w = np.empty(p)
    dw = np.empty(p)
    _spline(0.0, p, w, dw)  # w[j] = M_p(j); M_p(j + 1) = w[j + 1]
    mj = w[1:p]
    m = np.arange(k)
    arg = 2.0 * math.pi * np.outer(m, np.arange(p - 1)) / k
    den = (mj * np.cos(arg)).sum(axis=1) ** 2 + (mj * np.sin(arg)).sum(axis=1) ** 2
    return 1.0 / den


@functools.lru_cache(maxsize=2)
def influence(box, shape, alpha, p):
    """The mesh influence function G(m) on the rfftn half-mesh, with the K1 K2 K3 of the inverse FFT folded in.

    Cached (box and shape as tuples): a time-stepping loop calls it with the
    same parameters every step.
    """
    k1, k2, k3 = shape
    box = np.asarray(box, dtype=np.float64)
    m1 = np.fft.fftfreq(k1, 1.0 / k1)
    m2 = np.fft.fftfreq(k2, 1.0 / k2)
    m3 = np.arange(k3 // 2 + 1, dtype=np.float64)
    kx = (2.0 * math.pi / box[0]) * m1
    ky = (2.0 * math.pi / box[1]) * m2
    kz = (2.0 * math.pi / box[2]) * m3
    b1 = _moduli(k1, p)
    b2 = _moduli(k2, p)
    b3 = _moduli(k3, p)[: k3 // 2 + 1]
    k2sum = kx[:, None, None] ** 2 + ky[None, :, None] ** 2 + kz[None, None, :] ** 2
    k2sum[0, 0, 0] = 1.0
    volume = float(np.prod(box))
    g = (4.0 * math.pi / volume) * np.exp(-k2sum / (4.0 * alpha * alpha)) / k2sum
    g *= b1[:, None, None] * b2[None, :, None] * b3[None, None, :]
    g[0, 0, 0] = 0.0  # the k = 0 term: the neutralizing background's business
    return g * float(k1 * k2 * k3)


def _visit_order(px, py, pz, box, shape):
    """(indices sorted by mesh cell (stable), the sorted cell keys)."""
    key = np.empty(px.size, np.int64)
    _cell_keys(px, py, pz, box, shape, key)
    visit = np.argsort(key, kind="stable")
    return visit, key[visit]


def _soa(points):
    t = np.ascontiguousarray(points.T)
    return t[0], t[1], t[2]


def reciprocal(sources, charges, targets, alpha, box, shape, order, *, need_field=True, need_potential=True):
    """Reciprocal-space part on the mesh (SPME).

    Parameters
    ----------
    sources : ndarray (N, 3)
        Source positions, m.
    charges : ndarray (N,)
        Charges, C.
    targets : ndarray (M, 3) or None
        Target points, m; None: at the sources.
    alpha : float
        Splitting parameter, 1/m.
    box : ndarray (3,)
        Edge lengths, m.
    shape : ndarray (3,) of int
        Mesh points per axis.
    order : int
        B-spline order (even).

    Returns
    -------
    field : ndarray (M, 3) or None
        C/m^2.
    potential : ndarray (M,) or None
        C/m.
    """
    px, py, pz = _soa(sources)
    visit, keys = _visit_order(px, py, pz, box, shape)
    qmesh = _spread(px, py, pz, charges, box, shape, order, visit, keys)
    f = scipy.fft.rfftn(qmesh, workers=FFT_WORKERS)
    f *= influence(tuple(box), tuple(int(v) for v in shape), alpha, order)
    phi_mesh = scipy.fft.irfftn(f, s=tuple(int(v) for v in shape), workers=FFT_WORKERS)
    if targets is not None:
        px, py, pz = _soa(targets)
        # interpolate in mesh-cell order too (cache locality), then put back
        visit, _ = _visit_order(px, py, pz, box, shape)
    tx, ty, tz = px[visit], py[visit], pz[visit]
    m = tx.size
    ex = np.empty(m)
    ey = np.empty(m)
    ez = np.empty(m)
    phi = np.empty(m)
    kernel = _interp_parallel if m * order ** 3 >= common.PARALLEL_WORK else _interp_serial
    kernel(tx, ty, tz, box, shape, order, phi_mesh, ex, ey, ez, phi)
    inv = np.empty_like(visit)
    inv[visit] = np.arange(m)
    ex, ey, ez, phi = ex[inv], ey[inv], ez[inv], phi[inv]
    field = np.stack((ex, ey, ez), axis=1) if need_field else None
    return field, (phi if need_potential else None)


def _check_order(value):
    if value is None:
        return None
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) \
            or value % 2 or not 4 <= value <= 12:
        raise ValueError(f"order must be an even integer from 4 to 12 (B-spline order), got {value!r}")
    return int(value)


def _check_mesh(value, order):
    if value is None:
        return None
    arr = np.asarray(value)
    if arr.ndim == 0:
        arr = np.repeat(arr, 3)
    if arr.shape != (3,) or arr.dtype.kind not in "iu" or np.any(arr < order):
        raise ValueError(f"mesh must be an integer or three integers, each >= the spline order {order}, "
                         f"got {value!r}")
    return arr.astype(np.int64)


def parameters(st, options, n):
    """(order, mesh shape) for this evaluation: forced by the options or chosen from the accuracy."""
    order = _check_order(options.get("order"))
    if order is None and options.get("mesh") is None:
        return choose(st, n)
    if order is None:
        order = min(_ALIAS, key=lambda p: abs(p - 6))
    shape = _check_mesh(options.get("mesh"), order)
    if shape is None:
        shape = mesh_for(st, order)
    return order, shape


def evaluate(sources, charges, targets, radii, *, need_field=True, need_potential=True, **options):
    """Particle-mesh Ewald sums of field and potential, without the factor k/eps_r.

    Parameters and returns are those of :func:`chargesim.coulomb.ewald.evaluate`;
    ``options`` add ``mesh`` and ``order`` (module docstring).
    """
    st = common.setup(sources, charges, targets, radii, options, neighbours_per_particle=_NEIGHBOURS)
    order, shape = parameters(st, options, sources.shape[0])
    return common.assemble(st, sources, charges, targets, radii, need_field, need_potential,
                           lambda: reciprocal(sources, charges, targets, st.alpha, st.box, shape, order,
                                              need_field=need_field, need_potential=need_potential))
