"""Direct summation: every source acts on every target.

The reference method and the fastest one for small N. Two implementations:

* :func:`evaluate` -- numba, parallel over targets, structure of arrays. Each
  target's sum runs in one thread in a fixed order, so results do not depend
  on the thread count.
* :func:`evaluate_numpy` -- plain numpy in blocks of targets whose size is set
  by a memory budget (never an N x N array); the obvious reference in tests.

Both fill the evaluator contract of :mod:`chargesim.coulomb`: they return the
sums without the factor k/eps_r,
``field[i] = sum_j q_j (x_i - x_j) / |x_i - x_j|^3`` (C/m^2) and
``potential[i] = sum_j q_j / |x_i - x_j|`` (C/m).

Finite particles (``radii``) are uniformly charged spheres: a target at
distance r < a from a source sees ``q r / a^3`` and potential
``q (3 a^2 - r^2) / (2 a^3)``. Between two particles a = max(R_i, R_j), so the
pair interaction is symmetric (Newton's third law holds); at an outside target
a = R_j.
"""
import numba
import numpy as np

from .._numba import serial_and_parallel
from ._checks import coincident

#: This method takes no options beyond the front door's common ones.
OPTIONS = {}

# Fast-math without the no-NaN/no-inf assumptions: the selects below must stay
# exact, while reassociation lets LLVM vectorise the inner reductions.
_FM = {"nsz", "arcp", "contract", "afn", "reassoc"}


@numba.njit(inline="always", fastmath=_FM)
def _point(dx, dy, dz, qj):
    r2 = dx * dx + dy * dy + dz * dz
    live = r2 > 0.0
    inv = 1.0 / np.sqrt(r2 if live else 1.0)
    inv = inv if live else 0.0
    s = qj * inv
    s3 = s * inv * inv
    return s3 * dx, s3 * dy, s3 * dz, s, (0 if live else 1)


@numba.njit(inline="always", fastmath=_FM)
def _sphere(dx, dy, dz, qj, a2):
    r2 = dx * dx + dy * dy + dz * dz
    d = max(r2, a2)
    live = d > 0.0
    d = d if live else 1.0
    invd = 1.0 / np.sqrt(d)
    inside = r2 < a2
    # outside: 1/r; inside: (3 a^2 - r^2) / (2 a^3)
    pot = 0.5 * (3.0 * a2 - r2) * invd * invd * invd if inside else invd
    s3 = qj * invd * invd * invd
    s3 = s3 if live else 0.0
    pot = qj * pot if live else 0.0
    return s3 * dx, s3 * dy, s3 * dz, pot, (0 if live else 1)


def _sum_points_py(sx, sy, sz, q, tx, ty, tz, ex, ey, ez, phi, nzero):
    n = sx.size
    for i in numba.prange(tx.size):
        xi, yi, zi = tx[i], ty[i], tz[i]
        ax = 0.0
        ay = 0.0
        az = 0.0
        p = 0.0
        c = 0
        for j in range(n):
            fx, fy, fz, pj, cj = _point(xi - sx[j], yi - sy[j], zi - sz[j], q[j])
            ax += fx
            ay += fy
            az += fz
            p += pj
            c += cj
        ex[i] = ax
        ey[i] = ay
        ez[i] = az
        phi[i] = p
        nzero[i] = c


def _sum_spheres_py(sx, sy, sz, q, rad, tx, ty, tz, trad, self_targets, ex, ey, ez, phi, nzero):
    n = sx.size
    for i in numba.prange(tx.size):
        xi, yi, zi, ri = tx[i], ty[i], tz[i], trad[i]
        ax = 0.0
        ay = 0.0
        az = 0.0
        p = 0.0
        c = 0
        # With self targets the self pair is skipped by index: coincident
        # distinct spheres are legitimate and must still be summed.
        stop = i if self_targets else n
        for j in range(stop):
            a = max(rad[j], ri)
            fx, fy, fz, pj, cj = _sphere(xi - sx[j], yi - sy[j], zi - sz[j], q[j], a * a)
            ax += fx
            ay += fy
            az += fz
            p += pj
            c += cj
        start = i + 1 if self_targets else n
        for j in range(start, n):
            a = max(rad[j], ri)
            fx, fy, fz, pj, cj = _sphere(xi - sx[j], yi - sy[j], zi - sz[j], q[j], a * a)
            ax += fx
            ay += fy
            az += fz
            p += pj
            c += cj
        ex[i] = ax
        ey[i] = ay
        ez[i] = az
        phi[i] = p
        nzero[i] = c


# The same kernels compiled without threads: below SERIAL_PAIRS pair
# interactions waking the thread pool costs more than the sum (milliseconds on
# a loaded machine against microseconds of work).
_sum_points_serial, _sum_points = serial_and_parallel(_sum_points_py, fastmath=_FM)
_sum_spheres_serial, _sum_spheres = serial_and_parallel(_sum_spheres_py, fastmath=_FM)

#: Pair count below which the serial kernels run.
SERIAL_PAIRS = 200_000


@numba.njit(cache=True)
def _first_coincidence(sx, sy, sz, rad, tx, ty, tz, trad, self_targets, use_radii):
    for i in range(tx.size):
        for j in range(sx.size):
            if self_targets and i == j:
                continue
            if tx[i] == sx[j] and ty[i] == sy[j] and tz[i] == sz[j]:
                a = max(rad[j], trad[i]) if use_radii else 0.0
                if a == 0.0:
                    return i, j
    return -1, -1


def _soa(points):
    t = np.ascontiguousarray(points.T)
    return t[0], t[1], t[2]


def evaluate(sources, charges, targets, radii, *, need_field=True, need_potential=True):
    """Direct sums of field and potential, without the factor k/eps_r.

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
        Which results to return (the kernel computes both at once).

    Returns
    -------
    field : ndarray (M, 3) or None
        sum_j q_j (x_i - x_j)/r^3, C/m^2.
    potential : ndarray (M,) or None
        sum_j q_j / r, C/m.
    """
    self_targets = targets is None
    tgt = sources if self_targets else targets
    sx, sy, sz = _soa(sources)
    tx, ty, tz = (sx, sy, sz) if self_targets else _soa(tgt)
    m = tgt.shape[0]
    ex = np.empty(m)
    ey = np.empty(m)
    ez = np.empty(m)
    phi = np.empty(m)
    nzero = np.empty(m, dtype=np.int64)
    serial = m * sources.shape[0] < SERIAL_PAIRS
    if radii is None:
        (_sum_points_serial if serial else _sum_points)(sx, sy, sz, charges, tx, ty, tz, ex, ey, ez, phi, nzero)
        allowed = 1 if self_targets else 0
        rad = trad = np.zeros(0)
    else:
        rad = radii
        trad = radii if self_targets else np.zeros(m)
        (_sum_spheres_serial if serial else _sum_spheres)(sx, sy, sz, charges, rad, tx, ty, tz, trad, self_targets, ex, ey, ez, phi, nzero)
        allowed = 0
    if m and nzero.max() > allowed:
        i, j = _first_coincidence(sx, sy, sz, rad if radii is not None else np.zeros(sx.size),
                                  tx, ty, tz, trad if radii is not None else np.zeros(m),
                                  self_targets, radii is not None)
        raise coincident(i, j, self_targets)
    field = np.stack((ex, ey, ez), axis=1) if need_field else None
    return field, (phi if need_potential else None)


def evaluate_numpy(sources, charges, targets, radii, *, need_field=True, need_potential=True,
                   memory_budget=64 * 2**20):
    """The same sums in plain numpy, blockwise: the reference for tests.

    Parameters are those of :func:`evaluate`; ``memory_budget`` (bytes) bounds
    the temporaries, so memory stays O(N) for any N.
    """
    self_targets = targets is None
    tgt = sources if self_targets else targets
    n, m = sources.shape[0], tgt.shape[0]
    field = np.zeros((m, 3))
    phi = np.zeros(m)
    # about eight float64 temporaries of shape (block, N) live at once
    block = max(1, int(memory_budget // (8 * 8 * max(n, 1))))
    src_r = radii if radii is not None else np.zeros(n)
    for lo in range(0, m, block):
        hi = min(m, lo + block)
        d = tgt[lo:hi, None, :] - sources[None, :, :]
        r2 = np.einsum("ijk,ijk->ij", d, d)
        if radii is None:
            a2 = np.zeros_like(r2)
        else:
            tr = radii[lo:hi] if self_targets else np.zeros(hi - lo)
            a2 = np.maximum(src_r[None, :], tr[:, None]) ** 2
        if self_targets:
            r2[np.arange(hi - lo), np.arange(lo, hi)] = np.inf  # drop the self pair
        dd = np.maximum(r2, a2)
        zero = dd == 0
        if zero.any():
            i, j = np.argwhere(zero)[0]
            raise coincident(int(lo + i), int(j), self_targets)
        inv = 1.0 / np.sqrt(dd)
        inv3 = inv ** 3
        with np.errstate(invalid="ignore"):  # the dropped self pair: inf * 0
            pot = np.where(r2 < a2, 0.5 * (3 * a2 - r2) * inv3, inv)
        if self_targets:
            pot[np.arange(hi - lo), np.arange(lo, hi)] = 0.0
        field[lo:hi] = np.einsum("ij,ijk->ik", charges[None, :] * inv3, d)
        phi[lo:hi] = pot @ charges
    return (field if need_field else None), (phi if need_potential else None)
