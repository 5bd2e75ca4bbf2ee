"""Linked cells (a cell list): O(N) neighbour search, open or periodic.

The points are binned into a regular grid of cells no narrower than
``cutoff / reach`` and sorted by cell (a counting sort, stable, so within a
cell particles keep their input order). Everything within the cutoff of a point
in cell (kx, ky, kz) then lies in the cells kx-reach..kx+reach (and the same
along y and z). In a periodic box the neighbour cells wrap around and carry an
image shift, which gives the minimum image when the cutoff is at most half the
smallest box edge.

The cell grid is a reusable piece: :func:`pairs` (the ``neighbors`` front
door) and the cutoff evaluator use it, and the real-space part of an Ewald sum
can too.

API
---
``build(positions, cutoff, box=None, *, reach=REACH) -> Cells``
    Bin and sort. ``Cells`` is a NamedTuple of plain arrays (pass the fields to
    numba kernels one by one):

    ``points`` (3, N) float64
        Coordinates in cell order ("slots"), m; wrapped into [0, L) when
        periodic. ``points[0]``, ``points[1]``, ``points[2]`` are contiguous.
    ``order`` (N,) int64
        ``order[s]`` is the input index of the particle in slot s.
    ``start`` (ncell + 1,) int64
        Slots of cell c are ``start[c]:start[c + 1]``; cell
        c = (cx * ny + cy) * nz + cz, so cells adjacent in z are adjacent in
        slot order (a run of cells along z is one slice of slots).
    ``shape`` (3,) int64, ``width`` (3,) float64, ``origin`` (3,) float64
        Cells per axis, cell edge per axis (m, >= cutoff / reach) and the
        grid's lower corner (m; 0 when periodic).
    ``box`` (3,) float64
        Periodic box edges, m (zeros when open); ``periodic`` bool.
    ``reach`` int, ``cutoff`` float
        Neighbour cells per axis on each side, and the cutoff (m) the grid
        was built for.

Numba helpers (``njit``, callable from other kernels):

``wrap_point(x, length)``
    x folded into [0, length).
``locate(x, y, z, origin, width, shape, periodic)``
    Cell coordinates (kx, ky, kz) of a point (wrapped first when periodic).
    Open grids return the unclamped index (possibly outside 0..n-1) so a point
    off the grid finds only the cells near it.
``axis_range(k, n, reach, periodic)``
    Inclusive range (lo, hi) of neighbour cell coordinates along one axis:
    clipped to the grid when open (lo > hi: none), unwrapped when periodic.
``wrap(c, n, length, periodic)``
    (cell coordinate in 0..n-1, shift in m): the image of the particles of
    an unwrapped cell c is at their stored coordinate **plus** the shift.

The visiting pattern (each unwrapped neighbour cell visited once; with a run
of cells along z taken as one slice)::

    kx, ky, kz = locate(x, y, z, origin, width, shape, periodic)
    lox, hix = axis_range(kx, shape[0], reach, periodic)   # and y, z
    for cx in range(lox, hix + 1):
        wx, shx = wrap(cx, shape[0], box[0], periodic)
        for cy in range(loy, hiy + 1):
            wy, shy = wrap(cy, shape[1], box[1], periodic)
            row = (wx * shape[1] + wy) * shape[2]
            cz = loz
            while cz <= hiz:
                wz, shz = wrap(cz, shape[2], box[2], periodic)
                run = min(shape[2] - 1 - wz, hiz - cz)   # same shift along the run
                for s in range(start[row + wz], start[row + wz + run + 1]):
                    dx = x - (points[0, s] + shx)   # and y, z
                    ...
                cz += run + 1

In a periodic box a small grid (fewer than 2 reach + 1 cells on an axis)
visits the same cell more than once, each time with a different shift: each
visit is a different image, and with the cutoff at most half the box edge at
most one image of a particle is within the cutoff, so nothing is counted twice.
A pair closer than the cutoff counts (strict ``r < cutoff``).
"""
import math
from typing import NamedTuple

import numba
import numpy as np

#: Cells per cutoff along each axis (the stencil reaches this many cells each
#: side). Two cells per cutoff scan 125 cells of (rc/2)^3, about 15.6 rc^3 of
#: candidates, against 27 rc^3 with one: measured faster on dense sets.
REACH = 2

#: Cells allowed per point (plus a floor): keeps memory O(N) when a few points
#: are spread over a region much wider than the cutoff.
_CELLS_PER_POINT = 4
_MIN_CELLS = 64


class Cells(NamedTuple):
    """A cell grid with its points sorted by cell (see the module docstring)."""

    points: np.ndarray
    order: np.ndarray
    start: np.ndarray
    shape: np.ndarray
    width: np.ndarray
    origin: np.ndarray
    box: np.ndarray
    periodic: bool
    reach: int
    cutoff: float


@numba.njit(inline="always")
def wrap_point(x, length):
    """Fold x into [0, length) (m)."""
    y = x - length * math.floor(x / length)
    # rounding can land exactly on length (tiny negative x) or a hair below 0
    if y >= length:
        y -= length
    if y < 0.0:
        y = 0.0
    return y


@numba.njit(inline="always")
def _axis_cell(x, origin, width, n, periodic):
    f = (x - origin) / width
    if periodic:
        k = int(f)
        return min(max(k, 0), n - 1)
    # clamp in floating point first: a far point must not overflow int64
    f = min(max(f, -4.0 - n), 2.0 * n + 4.0)
    return int(math.floor(f))


@numba.njit(inline="always")
def locate(x, y, z, origin, width, shape, periodic):
    """Cell coordinates (kx, ky, kz) of a point (m); wrapped points when periodic."""
    return (_axis_cell(x, origin[0], width[0], shape[0], periodic),
            _axis_cell(y, origin[1], width[1], shape[1], periodic),
            _axis_cell(z, origin[2], width[2], shape[2], periodic))


@numba.njit(inline="always")
def axis_range(k, n, reach, periodic):
    """Inclusive neighbour cell range along one axis (unwrapped when periodic)."""
    if periodic:
        return k - reach, k + reach
    return max(k - reach, 0), min(k + reach, n - 1)


@numba.njit(inline="always")
def wrap(c, n, length, periodic):
    """(wrapped cell coordinate, image shift in m) of an unwrapped cell c."""
    if not periodic:
        return c, 0.0
    m = c // n  # floor division: several wraps when reach exceeds n
    return c - m * n, m * length


@numba.njit(cache=True)
def _bin(pos, origin, width, shape, box, periodic, points, order, start):
    n = pos.shape[0]
    ny, nz = shape[1], shape[2]
    cell = np.empty(n, np.int64)
    counts = np.zeros(start.size, np.int64)
    for i in range(n):
        x, y, z = pos[i, 0], pos[i, 1], pos[i, 2]
        if periodic:
            x = wrap_point(x, box[0])
            y = wrap_point(y, box[1])
            z = wrap_point(z, box[2])
        kx, ky, kz = locate(x, y, z, origin, width, shape, periodic)
        # open grids enclose the sources; clamp only against rounding
        kx = min(max(kx, 0), shape[0] - 1)
        ky = min(max(ky, 0), ny - 1)
        kz = min(max(kz, 0), nz - 1)
        c = (kx * ny + ky) * nz + kz
        cell[i] = c
        counts[c + 1] += 1
    for c in range(1, start.size):
        start[c] = start[c - 1] + counts[c]
    fill = start[:-1].copy()
    for i in range(n):
        s = fill[cell[i]]
        fill[cell[i]] += 1
        order[s] = i
        x, y, z = pos[i, 0], pos[i, 1], pos[i, 2]
        if periodic:
            x = wrap_point(x, box[0])
            y = wrap_point(y, box[1])
            z = wrap_point(z, box[2])
        points[0, s] = x
        points[1, s] = y
        points[2, s] = z


def _cap(counts, limit):
    """Shrink float cell counts per axis until their product is within limit."""
    counts = [max(1.0, c) for c in counts]
    while counts[0] * counts[1] * counts[2] > limit:
        a = int(np.argmax(counts))
        counts[a] = max(1.0, math.floor(counts[a] * 0.8))
    return counts


def build(positions, cutoff, box=None, *, reach=REACH):
    """Bin points into linked cells for a neighbour search within ``cutoff``.

    Parameters
    ----------
    positions : ndarray, shape (N, 3)
        Points, m (float64, finite).
    cutoff : float
        Search distance, m (> 0).
    box : ndarray, shape (3,), optional
        Periodic box edges, m; points outside are wrapped. The cutoff must not
        exceed half the smallest edge.
    reach : int
        Cells per cutoff along each axis (>= 1).

    Returns
    -------
    Cells
        The grid and the points sorted by cell (see the module docstring).

    Raises
    ------
    ValueError
        If the cutoff exceeds half the smallest box edge.
    """
    pos = np.ascontiguousarray(positions, dtype=np.float64).reshape(-1, 3)
    rc = float(cutoff)
    reach = int(reach)
    n = pos.shape[0]
    limit = max(_MIN_CELLS, _CELLS_PER_POINT * n)
    periodic = box is not None
    if periodic:
        bx = np.asarray(box, dtype=np.float64).reshape(3)
        if rc > 0.5 * bx.min():
            raise ValueError(
                f"cutoff {rc!r} m exceeds half the smallest box edge ({0.5 * bx.min()!r} m): "
                "minimum-image distances need cutoff <= box/2"
            )
        counts = _cap([math.floor(bx[a] * reach / rc) for a in range(3)], limit)
        shape = np.array(counts, dtype=np.int64)
        for a in range(3):
            # guard the floor against rounding: width * reach must cover rc
            while shape[a] > 1 and (bx[a] / shape[a]) * reach < rc:
                shape[a] -= 1
        width = bx / shape
        origin = np.zeros(3)
    else:
        bx = np.zeros(3)
        if n:
            lo, hi = pos.min(axis=0), pos.max(axis=0)
        else:
            lo = hi = np.zeros(3)
        extent = hi - lo
        w0 = rc / reach
        counts = _cap([math.floor(extent[a] / w0) + 1.0 for a in range(3)], limit)
        shape = np.array(counts, dtype=np.int64)
        # every source must fall inside the grid: width * n > extent
        width = np.maximum(w0, extent / shape * (1.0 + 1e-12))
        origin = lo.copy()
    ncell = int(np.prod(shape))
    points = np.empty((3, n))
    order = np.empty(n, np.int64)
    start = np.zeros(ncell + 1, np.int64)
    _bin(pos, origin, width, shape, bx, periodic, points, order, start)
    return Cells(points, order, start, shape, width, origin, bx, periodic, reach, rc)


@numba.njit(inline="always")
def _scan(x, y, z, i, points, order, start, shape, width, origin, box, periodic, reach,
          rc2, out, base):
    """Count (out is None-like: size 0) or store the j > i within the cutoff."""
    kx, ky, kz = locate(x, y, z, origin, width, shape, periodic)
    lox, hix = axis_range(kx, shape[0], reach, periodic)
    loy, hiy = axis_range(ky, shape[1], reach, periodic)
    loz, hiz = axis_range(kz, shape[2], reach, periodic)
    px, py, pz = points[0], points[1], points[2]
    store = out.size > 0
    cnt = 0
    for cx in range(lox, hix + 1):
        wx, shx = wrap(cx, shape[0], box[0], periodic)
        for cy in range(loy, hiy + 1):
            wy, shy = wrap(cy, shape[1], box[1], periodic)
            row = (wx * shape[1] + wy) * shape[2]
            cz = loz
            while cz <= hiz:
                wz, shz = wrap(cz, shape[2], box[2], periodic)
                run = min(shape[2] - 1 - wz, hiz - cz)
                for s in range(start[row + wz], start[row + wz + run + 1]):
                    j = order[s]
                    if j <= i:
                        continue
                    dx = x - (px[s] + shx)
                    dy = y - (py[s] + shy)
                    dz = z - (pz[s] + shz)
                    if dx * dx + dy * dy + dz * dz < rc2:
                        if store:
                            out[base + cnt] = j
                        cnt += 1
                cz += run + 1
    return cnt


@numba.njit(parallel=True, cache=True)
def _count_pairs(points, order, start, shape, width, origin, box, periodic, reach, rc2, counts):
    none = np.empty(0, np.int64)
    for s in numba.prange(order.size):
        counts[order[s]] = _scan(points[0, s], points[1, s], points[2, s], order[s], points, order,
                                 start, shape, width, origin, box, periodic, reach, rc2, none, 0)


@numba.njit(parallel=True, cache=True)
def _fill_pairs(points, order, start, shape, width, origin, box, periodic, reach, rc2, offsets, jj):
    for s in numba.prange(order.size):
        i = order[s]
        b = offsets[i]
        _scan(points[0, s], points[1, s], points[2, s], i, points, order,
              start, shape, width, origin, box, periodic, reach, rc2, jj, b)
        # neighbours arrive in cell order: sort each row for a stable output
        jj[b:offsets[i + 1]] = np.sort(jj[b:offsets[i + 1]])


def pairs(positions, cutoff, box=None):
    """Pairs (i, j), i < j, of points closer than ``cutoff``.

    Parameters
    ----------
    positions : ndarray, shape (N, 3)
        Points, m (checked by the front door).
    cutoff : float
        Distance, m (> 0).
    box : ndarray, shape (3,), optional
        Periodic box edges, m: minimum-image distances, points outside the box
        wrapped; the cutoff must not exceed half the smallest edge.

    Returns
    -------
    i, j : ndarray of int64
        The pairs sorted by i, then j.

    Raises
    ------
    ValueError
        If the cutoff exceeds half the smallest box edge.
    """
    cells = build(positions, cutoff, box)
    n = cells.order.size
    counts = np.zeros(n, np.int64)
    args = (cells.points, cells.order, cells.start, cells.shape, cells.width, cells.origin,
            cells.box, cells.periodic, cells.reach, cells.cutoff ** 2)
    if n:
        _count_pairs(*args, counts)
    offsets = np.zeros(n + 1, np.int64)
    np.cumsum(counts, out=offsets[1:])
    jj = np.empty(int(offsets[-1]), np.int64)
    if jj.size:
        _fill_pairs(*args, offsets, jj)
    ii = np.repeat(np.arange(n, dtype=np.int64), counts)
    return ii, jj
