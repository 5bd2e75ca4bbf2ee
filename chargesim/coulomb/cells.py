"""Linked cells (a cell list): O(N) neighbour search, open or periodic.

The points are binned into a regular grid of cells no narrower than
``cutoff / reach`` and sorted by cell (a counting sort, stable, so within a
cell particles keep their input order). Everything within the cutoff of a
point in cell (kx, ky, kz) then lies in the cells kx-reach..kx+reach (and the
same along y and z). In a periodic box the neighbour cells wrap around and
carry an image shift, which gives the minimum image when the cutoff is at most
half the smallest box edge.

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
``segments(x, y, z, rc, start, shape, width, origin, box, periodic, lo, hi, shift)``
    Per point: the cells within rc (<= the grid's cutoff) of a point as slot
    ranges ``lo[g]:hi[g]`` with image shifts ``shift[g, :]`` (a run of cells
    along z is one range; cells out of reach of the point are pruned);
    returns the count. Buffers of length ``max_segments(reach)``.
``cell_segments(cx, cy, cz, start, shape, box, periodic, reach, lo, hi, shift)``
    Per cell: the same for the whole stencil of a cell, which holds every
    source within the cutoff of any point in the cell.
``gather(nseg, lo, hi, shift, points, bx, by, bz, bslot)``, ``segment_total(nseg, lo, hi)``
    Copy the segments' sources (image coordinates, slots) into contiguous
    buffers, and the number of them.
``cell_coords(c, shape)``
    (cx, cy, cz) of a cell index.

``bin_targets(targets, cells) -> (points, order, start)`` sorts separate
targets into the source grid's cells the same way (targets of an open grid
beyond the stencil's reach are left out: no source is within the cutoff).
``run(parallel_kernel, serial_kernel, size, *args)`` calls a kernel pair:
serial below ``PARALLEL_MIN`` points, else parallel with dynamic scheduling.

The visiting pattern used by the pair and cutoff kernels (per cell: the
stencil's sources are copied once into contiguous buffers, then each target of
the cell sweeps them all in one long branch-free loop that vectorises; this
measured 2.5x faster than cutting each run to the z window a target's cutoff
sphere reaches, which halves the candidates but leaves short loops)::

    for chunk in numba.prange((ncell + CELL_CHUNK - 1) // CELL_CHUNK):
        lo = np.empty(max_segments(reach), np.int64); hi = ...; sh = np.empty((..., 3))
        for c in range(chunk * CELL_CHUNK, min(ncell, (chunk + 1) * CELL_CHUNK)):
            cx, cy, cz = cell_coords(c, shape)
            nseg = cell_segments(cx, cy, cz, start, shape, box, periodic, reach, lo, hi, sh)
            # grow bx, by, bz, bs to segment_total(nseg, lo, hi) if needed
            k = gather(nseg, lo, hi, sh, points, bx, by, bz, bs)
            for t in range(tstart[c], tstart[c + 1]):         # the targets of cell c
                for u in range(k):
                    dx = tpoints[0, t] - bx[u]                 # and y, z; slot bs[u]
                    ...                                        # order[bs[u]]: input index

Each target's sources come in a fixed order whatever the thread count, so a
sum per target in one thread is bitwise reproducible.

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
#: side). One cell per cutoff: the 27-cell stencil holds 27 rc^3 of candidates
#: (125 cells of (rc/2)^3 hold 15.6 rc^3), but the runs of sources are long, so
#: the cutoff kernel's inner loop vectorises; measured about 1.5x faster at 60
#: neighbours per point (benchmarks/bench_cutoff.py setting).
REACH = 1

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


#: Below this many points kernels run serially: starting threads costs more
#: than it saves there (and much more on a busy machine).
PARALLEL_MIN = 4096


def run(parallel_kernel, serial_kernel, size, *args):
    """Call the parallel kernel (dynamic scheduling) from PARALLEL_MIN points up, else the serial one.

    For kernels whose prange runs over chunks of cells (CELL_CHUNK). Dynamic
    scheduling hands out the prange iterations a few at a time, so a
    thread that the operating system holds back (a busy shared machine) does
    not hold up the others. Results do not depend on it: each output is
    computed whole by one thread.
    """
    if size < PARALLEL_MIN:
        return serial_kernel(*args)
    old = numba.set_parallel_chunksize(4)
    try:
        return parallel_kernel(*args)
    finally:
        numba.set_parallel_chunksize(old)


@numba.njit(cache=True)
def _bounds(pos):
    lo = pos[0].copy()
    hi = pos[0].copy()
    for i in range(1, pos.shape[0]):
        for a in range(3):
            lo[a] = min(lo[a], pos[i, a])
            hi[a] = max(hi[a], pos[i, a])
    return lo, hi


@numba.njit(inline="always")
def _cell_id(i, pos, origin, width, shape, box, periodic, reach, drop_far, cell):
    ny, nz = shape[1], shape[2]
    x, y, z = pos[i, 0], pos[i, 1], pos[i, 2]
    if periodic:
        x = wrap_point(x, box[0])
        y = wrap_point(y, box[1])
        z = wrap_point(z, box[2])
    kx, ky, kz = locate(x, y, z, origin, width, shape, periodic)
    if drop_far and (kx < -reach or ky < -reach or kz < -reach or kx >= shape[0] + reach
                     or ky >= ny + reach or kz >= nz + reach):
        # no source of the grid can be within the cutoff
        cell[i] = -1
        return
    # sources: clamp only against rounding; near targets: their stencil from
    # the clamped cell still covers every source within the cutoff
    kx = min(max(kx, 0), shape[0] - 1)
    ky = min(max(ky, 0), ny - 1)
    kz = min(max(kz, 0), nz - 1)
    cell[i] = (kx * ny + ky) * nz + kz


@numba.njit(parallel=True, cache=True)
def _cell_ids_parallel(pos, origin, width, shape, box, periodic, reach, drop_far, cell):
    for i in numba.prange(pos.shape[0]):
        _cell_id(i, pos, origin, width, shape, box, periodic, reach, drop_far, cell)


@numba.njit(cache=True)
def _cell_ids_serial(pos, origin, width, shape, box, periodic, reach, drop_far, cell):
    for i in range(pos.shape[0]):
        _cell_id(i, pos, origin, width, shape, box, periodic, reach, drop_far, cell)


@numba.njit(cache=True)
def _scatter(pos, cell, box, periodic, start, points, order):
    """Stable counting sort of the points by cell (cell -1 left out)."""
    counts = np.zeros(start.size, np.int64)
    for i in range(cell.size):
        if cell[i] >= 0:
            counts[cell[i] + 1] += 1
    start[0] = 0
    for c in range(1, start.size):
        start[c] = start[c - 1] + counts[c]
    fill = start[:-1].copy()
    for i in range(cell.size):
        c = cell[i]
        if c < 0:
            continue
        s = fill[c]
        fill[c] += 1
        order[s] = i
        x, y, z = pos[i, 0], pos[i, 1], pos[i, 2]
        if periodic:
            x = wrap_point(x, box[0])
            y = wrap_point(y, box[1])
            z = wrap_point(z, box[2])
        points[0, s] = x
        points[1, s] = y
        points[2, s] = z


def _sort(pos, origin, width, shape, box, periodic, reach, drop_far):
    n = pos.shape[0]
    cell = np.empty(n, np.int64)
    start = np.zeros(int(np.prod(shape)) + 1, np.int64)
    if n:
        # one cheap step per point: static scheduling (dynamic would hand out
        # a few points at a time)
        ids = _cell_ids_parallel if n >= PARALLEL_MIN else _cell_ids_serial
        ids(pos, origin, width, shape, box, periodic, reach, drop_far, cell)
    kept = n if not drop_far else int(np.count_nonzero(cell >= 0))
    points = np.empty((3, kept))
    order = np.empty(kept, np.int64)
    if n:
        _scatter(pos, cell, box, periodic, start, points, order)
    return points, order, start


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
            lo, hi = _bounds(pos)  # numpy's axis-0 min/max is strided and slow
        else:
            lo = hi = np.zeros(3)
        extent = hi - lo
        w0 = rc / reach
        counts = _cap([math.floor(extent[a] / w0) + 1.0 for a in range(3)], limit)
        shape = np.array(counts, dtype=np.int64)
        # every source must fall inside the grid: width * n > extent
        width = np.maximum(w0, extent / shape * (1.0 + 1e-12))
        origin = lo.copy()
    points, order, start = _sort(pos, origin, width, shape, bx, periodic, reach, False)
    return Cells(points, order, start, shape, width, origin, bx, periodic, reach, rc)


def bin_targets(targets, cells):
    """Sort target points into the cells of a source grid.

    Parameters
    ----------
    targets : ndarray, shape (M, 3)
        Target points, m (wrapped into the box when periodic).
    cells : Cells
        The source grid (:func:`build`).

    Returns
    -------
    points : ndarray (3, M')
        Target coordinates in cell order, m.
    order : ndarray (M',) int64
        Input index of each sorted target.
    start : ndarray (ncell + 1,) int64
        Targets of cell c are ``start[c]:start[c + 1]``; the stencil of cell c
        (:func:`cell_segments`) holds every source within the cutoff of them.
        Targets of an open grid farther than the stencil reaches have no
        source within the cutoff and are left out (M' <= M).
    """
    pos = np.ascontiguousarray(targets, dtype=np.float64).reshape(-1, 3)
    return _sort(pos, cells.origin, cells.width, cells.shape, cells.box, cells.periodic,
                 cells.reach, not cells.periodic)


@numba.njit(inline="always")
def max_segments(reach):
    """Length of the ``segments`` buffers that suffices for any point."""
    return (2 * reach + 1) * (2 * reach + 1) * (2 * reach + 2)


@numba.njit(inline="always")
def _gap(x, lo, hi):
    """Distance from x to the interval [lo, hi] (0 inside)."""
    return max(0.0, lo - x, x - hi)


@numba.njit(inline="always")
def _cell_span(x, ext, origin, width, n, periodic):
    """Unwrapped cells along one axis touched by [x - ext, x + ext] (clipped when open)."""
    # clamp in floating point first: a far point must not overflow int64
    f_lo = min(max((x - ext - origin) / width, -4.0 - n), 2.0 * n + 4.0)
    f_hi = min(max((x + ext - origin) / width, -4.0 - n), 2.0 * n + 4.0)
    c_lo = int(math.floor(f_lo))
    c_hi = int(math.floor(f_hi))
    if not periodic:
        c_lo = max(c_lo, 0)
        c_hi = min(c_hi, n - 1)
    return c_lo, c_hi


@numba.njit(inline="always")
def segments(x, y, z, rc, start, shape, width, origin, box, periodic, lo, hi, shift):
    """Slot ranges holding every source within ``rc`` of a point, with image shifts.

    Fills ``lo[g]:hi[g]`` (slots) and ``shift[g, :]`` (m, added to the stored
    coordinates) for g below the returned count, in a fixed order (x, then y,
    then z cells). Only cells whose box comes within rc of the point are
    listed (the corners of the stencil are pruned per point). Buffers: int64
    (max_segments(reach),) twice and float64 (max_segments(reach), 3),
    allocated once per chunk of points. The point must be wrapped into the box
    first when periodic; rc must not exceed the grid's cutoff.
    """
    rc2 = rc * rc
    nx, ny, nz = shape[0], shape[1], shape[2]
    lox, hix = _cell_span(x, rc, origin[0], width[0], nx, periodic)
    g = 0
    for cx in range(lox, hix + 1):
        gx = _gap(x, origin[0] + cx * width[0], origin[0] + (cx + 1) * width[0])
        wx, shx = wrap(cx, nx, box[0], periodic)
        ey = math.sqrt(max(rc2 - gx * gx, 0.0))
        loy, hiy = _cell_span(y, ey, origin[1], width[1], ny, periodic)
        for cy in range(loy, hiy + 1):
            gy = _gap(y, origin[1] + cy * width[1], origin[1] + (cy + 1) * width[1])
            r2 = gx * gx + gy * gy
            if r2 >= rc2:
                continue
            wy, shy = wrap(cy, ny, box[1], periodic)
            row = (wx * ny + wy) * nz
            loz, hiz = _cell_span(z, math.sqrt(rc2 - r2), origin[2], width[2], nz, periodic)
            cz = loz
            while cz <= hiz:
                wz, shz = wrap(cz, nz, box[2], periodic)
                run = min(nz - 1 - wz, hiz - cz)  # the same shift along the run
                b = start[row + wz]
                e = start[row + wz + run + 1]
                if e > b:
                    lo[g] = b
                    hi[g] = e
                    shift[g, 0] = shx
                    shift[g, 1] = shy
                    shift[g, 2] = shz
                    g += 1
                cz += run + 1
    return g


@numba.njit(inline="always")
def cell_segments(cx, cy, cz, start, shape, box, periodic, reach, lo, hi, shift):
    """Slot ranges of all the stencil cells around cell (cx, cy, cz), with shifts.

    The cell-level version of :func:`segments`: the (2 reach + 1)^3 cells
    around the cell (clipped to the grid when open; wrapped, with image
    shifts, when periodic) as ranges ``lo[g]:hi[g]``, a run along z being one
    range, in a fixed order. Every source within the grid's cutoff of any
    point of the cell is listed. Returns the count; buffers as for
    :func:`segments`.
    """
    nx, ny, nz = shape[0], shape[1], shape[2]
    lox, hix = axis_range(cx, nx, reach, periodic)
    loy, hiy = axis_range(cy, ny, reach, periodic)
    loz, hiz = axis_range(cz, nz, reach, periodic)
    g = 0
    for ux in range(lox, hix + 1):
        wx, shx = wrap(ux, nx, box[0], periodic)
        for uy in range(loy, hiy + 1):
            wy, shy = wrap(uy, ny, box[1], periodic)
            row = (wx * ny + wy) * nz
            uz = loz
            while uz <= hiz:
                wz, shz = wrap(uz, nz, box[2], periodic)
                run = min(nz - 1 - wz, hiz - uz)
                b = start[row + wz]
                e = start[row + wz + run + 1]
                if e > b:
                    lo[g] = b
                    hi[g] = e
                    shift[g, 0] = shx
                    shift[g, 1] = shy
                    shift[g, 2] = shz
                    g += 1
                uz += run + 1
    return g


@numba.njit(inline="always")
def gather(nseg, lo, hi, shift, points, bx, by, bz, bslot):
    """Copy the sources of segments 0..nseg-1 into contiguous buffers.

    ``bx, by, bz`` get the image coordinates (m, shift applied) and ``bslot``
    the slots, in segment order; returns the count. The buffers must hold
    ``sum(hi[:nseg] - lo[:nseg])`` entries (check with :func:`segment_total`).
    """
    k = 0
    for g in range(nseg):
        shx, shy, shz = shift[g, 0], shift[g, 1], shift[g, 2]
        for s in range(lo[g], hi[g]):
            bx[k] = points[0, s] + shx
            by[k] = points[1, s] + shy
            bz[k] = points[2, s] + shz
            bslot[k] = s
            k += 1
    return k


@numba.njit(inline="always")
def segment_total(nseg, lo, hi):
    """Number of slots in segments 0..nseg-1."""
    k = 0
    for g in range(nseg):
        k += hi[g] - lo[g]
    return k


#: Cells handled per buffer allocation in the parallel per-cell kernels.
CELL_CHUNK = 32


@numba.njit(inline="always")
def cell_coords(c, shape):
    """(cx, cy, cz) of cell index c = (cx * ny + cy) * nz + cz."""
    nz = shape[2]
    ny = shape[1]
    return c // (ny * nz), (c // nz) % ny, c % nz


@numba.njit(inline="always")
def _pair_chunk(chunk, points, order, start, shape, box, periodic, reach, rc, offsets, ii, jj):
    """Count (jj empty) or store the neighbours j > i of the points of a chunk of cells."""
    ncell = start.size - 1
    rc2 = rc * rc
    store = jj.size > 0
    nbuf = max_segments(reach)
    lo = np.empty(nbuf, np.int64)
    hi = np.empty(nbuf, np.int64)
    sh = np.empty((nbuf, 3))
    cap = 0
    bx = np.empty(cap)
    by = np.empty(cap)
    bz = np.empty(cap)
    bs = np.empty(cap, np.int64)
    tmp = np.empty(cap, np.int64)
    for c in range(chunk * CELL_CHUNK, min(ncell, (chunk + 1) * CELL_CHUNK)):
        if start[c + 1] == start[c]:
            continue
        cx, cy, cz = cell_coords(c, shape)
        nseg = cell_segments(cx, cy, cz, start, shape, box, periodic, reach, lo, hi, sh)
        tot = segment_total(nseg, lo, hi)
        if tot > cap:
            cap = 2 * tot
            bx = np.empty(cap)
            by = np.empty(cap)
            bz = np.empty(cap)
            bs = np.empty(cap, np.int64)
        k = gather(nseg, lo, hi, sh, points, bx, by, bz, bs)
        if tmp.size < k:
            tmp = np.empty(cap, np.int64)
        for u in range(k):
            bs[u] = order[bs[u]]  # input indices from here on
        for t in range(start[c], start[c + 1]):
            i = order[t]
            x, y, z = points[0, t], points[1, t], points[2, t]
            if not store:
                # counting only: an integer tally of a select keeps the loop
                # vectorised (and exact, so both passes decide alike)
                tally = 0
                for u in range(k):
                    dx = x - bx[u]
                    dy = y - by[u]
                    dz = z - bz[u]
                    r2 = dx * dx + dy * dy + dz * dz
                    tally += 1 if ((bs[u] > i) & (r2 < rc2)) else 0
                offsets[i + 1] = tally
                continue
            cnt = 0
            for u in range(k):
                j = bs[u]
                dx = x - bx[u]
                dy = y - by[u]
                dz = z - bz[u]
                r2 = dx * dx + dy * dy + dz * dz
                # branch-free: always write, advance only on a pair
                tmp[cnt] = j
                cnt += 1 if ((j > i) & (r2 < rc2)) else 0
            if store:
                # neighbours arrive in cell order: sort the row (short: insertion)
                for a in range(1, cnt):
                    v = tmp[a]
                    e = a - 1
                    while e >= 0 and tmp[e] > v:
                        tmp[e + 1] = tmp[e]
                        e -= 1
                    tmp[e + 1] = v
                b = offsets[i]
                # the count pass made the same decisions; never write past the row
                cnt = min(cnt, offsets[i + 1] - b)
                for a in range(cnt):
                    ii[b + a] = i
                    jj[b + a] = tmp[a]


@numba.njit(parallel=True, cache=True)
def _pair_rows_parallel(points, order, start, shape, box, periodic, reach, rc, offsets, ii, jj):
    for chunk in numba.prange((start.size - 1 + CELL_CHUNK - 1) // CELL_CHUNK):
        _pair_chunk(chunk, points, order, start, shape, box, periodic, reach, rc, offsets, ii, jj)


@numba.njit(cache=True)
def _pair_rows_serial(points, order, start, shape, box, periodic, reach, rc, offsets, ii, jj):
    for chunk in range((start.size - 1 + CELL_CHUNK - 1) // CELL_CHUNK):
        _pair_chunk(chunk, points, order, start, shape, box, periodic, reach, rc, offsets, ii, jj)


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
    args = (cells.points, cells.order, cells.start, cells.shape, cells.box, cells.periodic,
            cells.reach, cells.cutoff)
    offsets = np.zeros(n + 1, np.int64)
    none = np.empty(0, np.int64)
    if n:  # counts into offsets[1:]
        run(_pair_rows_parallel, _pair_rows_serial, n, *args, offsets, none, none)
    np.cumsum(offsets[1:], out=offsets[1:])
    ii = np.empty(int(offsets[-1]), np.int64)
    jj = np.empty(int(offsets[-1]), np.int64)
    if jj.size:
        run(_pair_rows_parallel, _pair_rows_serial, n, *args, offsets, ii, jj)
    return ii, jj
