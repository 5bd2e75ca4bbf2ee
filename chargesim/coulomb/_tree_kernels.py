"""Numba kernels of the tree evaluator (see :mod:`chargesim.coulomb.tree`).

Layout: sources are sorted by Morton code, so every tree node owns one
contiguous index range ``[start, end)`` of the sorted arrays. Node geometry
is kept in one (n_nodes, NODE_COLS) float64 array, one row per node:

=====  ==============================================================
cols   meaning
=====  ==============================================================
0-2    geometric centre c (centre of the bounding box of the node's particles), m
3      b = max |x_j - c| over the node's particles, m
4      largest particle radius in the node, m
5      number of particles
=====  ==============================================================

and the node's moments about c in a (n_nodes, n_reduced) array: the
reduced, scaled raw moments of :func:`chargesim.coulomb._multipoles.m2l_table`.

Every target's sum runs in one thread in a fixed order (the traversal order),
so results are bitwise reproducible and do not depend on the thread count.
"""
import math

import numba
import numpy as np

NODE_COLS = 6
#: Bits per axis in the Morton code (3 * 21 = 63 bits fit an int64).
MORTON_BITS = 21
_MORTON_MAX = (1 << MORTON_BITS) - 1

# As in the direct sum: fast-math without no-NaN/no-inf, so the exact selects
# stay exact while reductions may be vectorised.
_FM = {"nsz", "arcp", "contract", "afn", "reassoc"}
#: Pairs summed in single precision before their sum joins the double one.
_RUN32 = 128
#: Single-precision near sums of spheres take the point kernel (1e5 dust-like
#: spheres: 0.21 s against 0.24 s for the evaluation) when a target expects
#: fewer than this many of its near sources within the largest radius,
#: estimated as count x (R / extent)^3.
#: Outside a = max(R_i, R_j) the two kernels are equal; a target with a pair
#: closer than its largest a is summed again with the spheres in double.
_RADII_AS_POINTS = 0.05


@numba.njit(inline="always")
def _spread(v):
    # put the 21 low bits of v on every third bit (bit k -> bit 3k)
    v = v & 0x1FFFFF
    v = (v | (v << 32)) & 0x1F00000000FFFF
    v = (v | (v << 16)) & 0x1F0000FF0000FF
    v = (v | (v << 8)) & 0x100F00F00F00F00F
    v = (v | (v << 4)) & 0x10C30C30C30C30C3
    v = (v | (v << 2)) & 0x1249249249249249
    return v


@numba.njit(cache=True)
def bounds(points):
    """Lower corner and largest edge of the bounding box of points (N, 3)
    (numpy's min and max along axis 0 took 47 ms for 1e6 points)."""
    lo = points[0].copy()
    hi = points[0].copy()
    for i in range(1, points.shape[0]):
        for a in range(3):
            v = points[i, a]
            lo[a] = min(lo[a], v)
            hi[a] = max(hi[a], v)
    return lo, max(hi[0] - lo[0], hi[1] - lo[1], hi[2] - lo[2])


@numba.njit(parallel=True, cache=True)
def morton_codes(x, y, z, lo, scale, out):
    """Morton (Z-order) codes of points, 21 bits per axis, in ``out`` (int64).

    ``lo`` is the lower corner of the cube, ``scale`` = (2^21 - 1) / edge (1/m).
    """
    for i in numba.prange(x.size):
        ix = np.int64(min(max((x[i] - lo[0]) * scale, 0.0), float(_MORTON_MAX)))
        iy = np.int64(min(max((y[i] - lo[1]) * scale, 0.0), float(_MORTON_MAX)))
        iz = np.int64(min(max((z[i] - lo[2]) * scale, 0.0), float(_MORTON_MAX)))
        out[i] = (_spread(ix) << 2) | (_spread(iy) << 1) | _spread(iz)


@numba.njit(parallel=True, cache=True)
def _pack(codes, index_bits, keys):
    for i in numba.prange(codes.size):
        keys[i] = ((codes[i] >> index_bits) << index_bits) | i


@numba.njit(cache=True)
def _unpack(keys, codes, index_bits):
    n = keys.size
    mask = (np.int64(1) << index_bits) - 1
    perm = np.empty(n, np.int64)
    out = np.empty(n, np.int64)
    for i in range(n):
        perm[i] = keys[i] & mask
        out[i] = codes[perm[i]]
    i = 0
    while i < n:
        j = i + 1
        hi = keys[i] >> index_bits
        while j < n and (keys[j] >> index_bits) == hi:
            j += 1
        if j - i > 1:
            ordered = True
            for u in range(i + 1, j):
                if out[u] < out[u - 1]:
                    ordered = False
                    break
            if not ordered:
                # indices ascend within the run, so a stable sort by full
                # code keeps ties in index order
                o = np.argsort(out[i:j], kind="mergesort")
                sub_p = perm[i:j][o]
                sub_c = out[i:j][o]
                perm[i:j] = sub_p
                out[i:j] = sub_c
        i = j
    return perm, out


def sort_codes(codes):
    """Stable argsort of Morton codes (int64, >= 0), and the sorted codes.

    The codes' high bits and each index are packed into one int64 key and the
    keys sorted by value (numpy's sort of int64 values is several times
    faster than an argsort: 1e6 codes 0.03 s against 0.18 s for a stable
    argsort); runs whose high bits tie are then put in order by their full
    codes, stably. The result is exactly ``argsort(codes, kind="stable")``.
    """
    bits = max(1, int(codes.size - 1).bit_length())
    keys = np.empty(codes.size, np.int64)
    _pack(codes, bits, keys)
    keys.sort()
    return _unpack(keys, codes, bits)


@numba.njit(cache=True)
def _grow(a, cap):
    b = np.empty(cap, dtype=a.dtype)
    b[: a.size] = a
    return b


@numba.njit(cache=True)
def _grow_rows(a, cap, used):
    # explicit loops: slice copies inside a prange body are not reliable
    b = np.empty((a.shape[0], cap), dtype=a.dtype)
    for r in range(a.shape[0]):
        for c in range(used):
            b[r, c] = a[r, c]
    return b


@numba.njit(cache=True)
def build_topology(codes, leaf_size):
    """Octree over sorted Morton codes.

    A node holding at most ``leaf_size`` points (or points with one code) is a
    leaf. Chains of one-child nodes are collapsed (a node splits at the first
    Morton digit where its points differ), so every inner node has at least two
    children and the node count is below 2 N / 1 whatever the clustering.
    Children of a node are stored consecutively, in Morton order.

    Returns
    -------
    start, end, first_child, n_child : int64 arrays, one entry per node
    """
    n = codes.size
    cap = max(16, 4 * (n // max(leaf_size, 1)) + 16)
    start = np.empty(cap, np.int64)
    end = np.empty(cap, np.int64)
    first = np.zeros(cap, np.int64)
    nchild = np.zeros(cap, np.int64)
    start[0] = 0
    end[0] = n
    nn = 1
    # depth <= 21 digits, each pop pushes <= 8: 8 * 22 slots suffice
    st_node = np.empty(8 * (MORTON_BITS + 2), np.int64)
    st_lev = np.empty(8 * (MORTON_BITS + 2), np.int64)
    sp = 0
    if n > leaf_size:
        st_node[0] = 0
        st_lev[0] = 0
        sp = 1
    while sp > 0:
        sp -= 1
        node = st_node[sp]
        lev = st_lev[sp]
        s = start[node]
        e = end[node]
        # first digit where the node's points differ (sorted: compare the ends)
        while lev < MORTON_BITS:
            sh = 3 * (MORTON_BITS - 1 - lev)
            if ((codes[s] >> sh) & 7) != ((codes[e - 1] >> sh) & 7):
                break
            lev += 1
        if lev == MORTON_BITS:
            continue  # identical codes: stays a leaf
        if nn + 8 > cap:
            cap = 2 * cap
            start = _grow(start, cap)
            end = _grow(end, cap)
            first = _grow(first, cap)
            nchild = _grow(nchild, cap)
        sh = 3 * (MORTON_BITS - 1 - lev)
        first[node] = nn
        cnt = 0
        i = s
        while i < e:
            d = (codes[i] >> sh) & 7
            lo = i + 1
            hi = e
            while lo < hi:  # first index whose digit exceeds d
                mid = (lo + hi) // 2
                if ((codes[mid] >> sh) & 7) <= d:
                    lo = mid + 1
                else:
                    hi = mid
            start[nn] = i
            end[nn] = lo
            first[nn] = 0
            nchild[nn] = 0
            nn += 1
            cnt += 1
            i = lo
        nchild[node] = cnt
        # push in reverse so children are visited in Morton order
        for c in range(cnt - 1, -1, -1):
            k = first[node] + c
            if end[k] - start[k] > leaf_size:
                st_node[sp] = k
                st_lev[sp] = lev + 1
                sp += 1
    return start[:nn].copy(), end[:nn].copy(), first[:nn].copy(), nchild[:nn].copy()


@numba.njit(parallel=True, cache=True)
def node_data(start, end, x, y, z, rad, use_radii, out):
    """Fill ``out`` (n_nodes, NODE_COLS): centre, extent, max radius, count.

    Taken straight from each node's particles (cost N x depth, a few
    operations each): the extent b is then exact, not a bound from the
    children.
    """
    for k in numba.prange(start.size):
        s = start[k]
        e = end[k]
        x0 = x[s]
        x1 = x[s]
        y0 = y[s]
        y1 = y[s]
        z0 = z[s]
        z1 = z[s]
        for j in range(s + 1, e):
            x0 = min(x0, x[j])
            x1 = max(x1, x[j])
            y0 = min(y0, y[j])
            y1 = max(y1, y[j])
            z0 = min(z0, z[j])
            z1 = max(z1, z[j])
        cx = 0.5 * (x0 + x1)
        cy = 0.5 * (y0 + y1)
        cz = 0.5 * (z0 + z1)
        b2 = 0.0
        rmax = 0.0
        for j in range(s, e):
            sx = x[j] - cx
            sy = y[j] - cy
            sz = z[j] - cz
            b2 = max(b2, sx * sx + sy * sy + sz * sz)
            if use_radii:
                rmax = max(rmax, rad[j])
        out[k, 0] = cx
        out[k, 1] = cy
        out[k, 2] = cz
        out[k, 3] = np.sqrt(b2)
        out[k, 4] = rmax
        out[k, 5] = e - s


@numba.njit(inline="always")
def _monomials(vx, vy, vz, scale, parent, axis, out):
    """out[c] = scale * v^m_c for every component m_c (each from a lower one)."""
    v = (vx, vy, vz)
    out[0] = scale
    for c in range(1, out.size):
        out[c] = out[parent[c]] * v[axis[c]]


@numba.njit(parallel=True, fastmath=_FM, cache=True)
def leaf_moments(start, end, nchild, nd, x, y, z, q, expo, raw):
    """Raw moments A_m = sum q_j s_j^m of every leaf about its centre (P2M), in ``raw``.

    ``expo[a, b, c]`` is the component of s^(a, b, c) (-1 above the order).
    Per leaf, the powers q s_x^a, s_y^b, s_z^c are tabled over its particles
    and each moment is one dot product over them, a loop that vectorises
    (a monomial chain per particle did not: 0.16 s at 1e6 against 0.03 s).
    """
    p1 = expo.shape[0]
    for k in numba.prange(start.size):
        if nchild[k] != 0:
            continue
        s0 = start[k]
        cnt = end[k] - s0
        px = np.empty((p1, cnt))
        py = np.empty((p1, cnt))
        pz = np.empty((p1, cnt))
        w = np.empty(cnt)
        cx = nd[k, 0]
        cy = nd[k, 1]
        cz = nd[k, 2]
        for j in range(cnt):
            px[0, j] = q[s0 + j]
            py[0, j] = 1.0
            pz[0, j] = 1.0
        for a in range(1, p1):
            for j in range(cnt):
                px[a, j] = px[a - 1, j] * (x[s0 + j] - cx)
                py[a, j] = py[a - 1, j] * (y[s0 + j] - cy)
                pz[a, j] = pz[a - 1, j] * (z[s0 + j] - cz)
        for a in range(p1):
            for b in range(p1 - a):
                for j in range(cnt):
                    w[j] = px[a, j] * py[b, j]
                for c in range(p1 - a - b):
                    acc = 0.0
                    for j in range(cnt):
                        acc += w[j] * pz[c, j]
                    raw[k, expo[a, b, c]] = acc


@numba.njit(cache=True)
def _levels(first, nchild):
    """Inner nodes bucketed by depth: (nodes, offsets), level d in nodes[off[d]:off[d + 1]]."""
    n = first.size
    depth = np.zeros(n, np.int64)
    for k in range(n):  # children are stored after their parent
        for ch in range(first[k], first[k] + nchild[k]):
            depth[ch] = depth[k] + 1
    top = 0
    for k in range(n):
        top = max(top, depth[k])
    off = np.zeros(top + 2, np.int64)
    for k in range(n):
        if nchild[k] != 0:
            off[depth[k] + 1] += 1
    for d in range(top + 1):
        off[d + 1] += off[d]
    fill = off[:-1].copy()
    nodes = np.empty(off[-1], np.int64)
    for k in range(n):
        if nchild[k] != 0:
            nodes[fill[depth[k]]] = k
            fill[depth[k]] += 1
    return nodes, off


@numba.njit(inline="always")
def _at(expo, axis, a, b, c, i):
    """Component of the monomial (a, b, c) with its exponent along ``axis`` set to i."""
    if axis == 0:
        return expo[i, b, c]
    if axis == 1:
        return expo[a, i, c]
    return expo[a, b, i]


@numba.njit(inline="always")
def _axis_shift(dst, src, axis, d, expo, binom, pw, up):
    """One axis of a shift of a polynomial's coefficients by d along ``axis``:
    up (moments, M2M): dst_m = sum_{i <= m_axis} C(m_axis, i) d^(m_axis - i)
    src_(m with i); down (local coefficients, L2L): dst_k = sum_{i >= k_axis}
    C(i, k_axis) d^(i - k_axis) src_(k with i), total order <= p."""
    p = expo.shape[0] - 1
    pw[0] = 1.0
    for e in range(1, p + 1):
        pw[e] = pw[e - 1] * d
    for a in range(p + 1):
        for b in range(p + 1 - a):
            for c in range(p + 1 - a - b):
                w = a if axis == 0 else (b if axis == 1 else c)
                acc = 0.0
                if up:
                    for i in range(w + 1):
                        acc += binom[w, i] * pw[w - i] * src[_at(expo, axis, a, b, c, i)]
                else:
                    for i in range(w, p - (a + b + c - w) + 1):
                        acc += binom[i, w] * pw[i - w] * src[_at(expo, axis, a, b, c, i)]
                dst[expo[a, b, c]] = acc


@numba.njit(inline="always")
def _shift(out, src, dx, dy, dz, expo, binom, up, scratch):
    """out += ``src`` shifted by (dx, dy, dz): raw moments (``up``, M2M: A'_m =
    sum_{k <= m} C(m, k) A_k d^(m - k)) or local coefficients (L2L: L'_k =
    sum_{m >= k} C(m, k) L_m d^(m - k)), C(m, k) = prod_i C(m_i, k_i). The
    binomial theorem factors by axis, so the shift runs as three
    one-axis shifts (990 terms at order 7 instead of 1716; 2x the M2M
    rate, 1.5x the L2L rate, measured). ``scratch``: (3, >= n components)."""
    t1 = scratch[0]
    t2 = scratch[1]
    pw = scratch[2]
    _axis_shift(t1, src, 0, dx, expo, binom, pw, up)
    _axis_shift(t2, t1, 1, dy, expo, binom, pw, up)
    _axis_shift(t1, t2, 2, dz, expo, binom, pw, up)
    for c in range(out.size):
        out[c] += t1[c]


@numba.njit(parallel=True, cache=True)
def _shift_up(nodes, first, nchild, nd, raw, expo, binom):
    ncomp = raw.shape[1]
    for u in numba.prange(nodes.size):
        k = nodes[u]
        scratch = np.empty((3, ncomp))
        for c in range(ncomp):
            raw[k, c] = 0.0
        for ch in range(first[k], first[k] + nchild[k]):
            _shift(raw[k], raw[ch], nd[ch, 0] - nd[k, 0], nd[ch, 1] - nd[k, 1], nd[ch, 2] - nd[k, 2], expo, binom,
                   True, scratch)


def upward_moments(first, nchild, nd, raw, expo, binom):
    """Raw moments of inner nodes from their children's (M2M), bottom up.

    Level by level from the deepest, the nodes of a level in parallel (each
    writes its own row; 0.31 s serial at 1e6 uniform). The shift is the
    binomial theorem (:func:`_shift`), d the child's centre minus the
    parent's. Each node's sum runs over its children in order: results do
    not depend on the thread count.
    """
    nodes, off = _levels(first, nchild)
    for d in range(off.size - 2, -1, -1):
        _shift_up(nodes[off[d]:off[d + 1]], first, nchild, nd, raw, expo, binom)


@numba.njit(parallel=True, cache=True)
def fold_moments(raw, rows, cols, vals, out):
    """out[k, cols[t]] += vals[t] * raw[k, rows[t]] over the nonzero terms t of
    the fold (raw moments to the reduced ones of the M2L; 200 nonzeros of
    120 x 64, so a dense product spent 97 % of its work on zeros)."""
    for k in numba.prange(raw.shape[0]):
        for c in range(out.shape[1]):
            out[k, c] = 0.0
        for t in range(vals.size):
            out[k, cols[t]] += vals[t] * raw[k, rows[t]]


@numba.njit(cache=True)
def groups(start, end, first, nchild, group_size):
    """Target groups in Morton order, as ranges of tree nodes.

    A group is the largest node holding at most ``group_size`` points (or a
    leaf), or a run of consecutive small siblings merged while their total
    stays within ``group_size`` (a uniform octree level can hold far fewer
    points than ``group_size``; merged siblings are still one
    Morton-contiguous, compact run). Returns (g0, g1): group g is the nodes
    g0[g] .. g1[g] - 1 (siblings, consecutive), their points one contiguous
    range.
    """
    gs = np.empty(start.size, np.int64)
    ge = np.empty(start.size, np.int64)
    ng = 0
    stack = np.empty(8 * (MORTON_BITS + 2), np.int64)
    if end[0] - start[0] <= group_size or nchild[0] == 0:
        gs[0] = 0
        ge[0] = 1
        return gs[:1].copy(), ge[:1].copy()
    stack[0] = 0
    sp = 1
    big = np.empty(8, np.int64)
    while sp > 0:
        sp -= 1
        k = stack[sp]
        # k is too big: group its children, recurse into the big ones
        c0 = first[k]
        nc = nchild[k]
        run_s = -1
        run_n = 0
        nbig = 0
        for c in range(c0, c0 + nc):
            n_c = end[c] - start[c]
            if n_c <= group_size or nchild[c] == 0:
                if run_s >= 0 and run_n + n_c <= group_size:
                    run_n += n_c
                else:
                    if run_s >= 0:
                        gs[ng] = run_s
                        ge[ng] = c
                        ng += 1
                    run_s = c
                    run_n = n_c
            else:
                if run_s >= 0:
                    gs[ng] = run_s
                    ge[ng] = c
                    ng += 1
                    run_s = -1
                big[nbig] = c
                nbig += 1
        if run_s >= 0:
            gs[ng] = run_s
            ge[ng] = c0 + nc
            ng += 1
        for b in range(nbig - 1, -1, -1):
            stack[sp] = big[b]
            sp += 1
    # the stack order visits big children after the small runs of their
    # parent: sort the groups by their first point so they stay in Morton order
    o = np.argsort(start[gs[:ng]])
    return gs[:ng][o].copy(), ge[:ng][o].copy()


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _near_points(xi, yi, zi, sx, sy, sz, sq, a, b):
    ax = 0.0
    ay = 0.0
    az = 0.0
    p = 0.0
    c = 0
    for j in range(a, b):
        dx = xi - sx[j]
        dy = yi - sy[j]
        dz = zi - sz[j]
        r2 = dx * dx + dy * dy + dz * dz
        live = r2 > 0.0
        inv = 1.0 / np.sqrt(r2 if live else 1.0)
        inv = inv if live else 0.0
        s = sq[j] * inv
        s3 = s * inv * inv
        ax += s3 * dx
        ay += s3 * dy
        az += s3 * dz
        p += s
        c += 0 if live else 1
    return ax, ay, az, p, c


@numba.njit(inline="always")
def _gather_near(nodes, u0, u1, sstart, send, sx, sy, sz, sq, sr, use_radii, nb):
    """The particles of source nodes ``nodes[u0:u1]`` in one contiguous run
    (rows x, y, z, q, radius of ``nb``, grown as needed): one long vectorised
    loop per target instead of many short ones. Returns (nb, count)."""
    tot = 0
    for u in range(u0, u1):
        k = nodes[u]
        s0 = sstart[k]
        s1 = send[k]
        if tot + (s1 - s0) > nb.shape[1]:
            nb = _grow_rows(nb, max(2 * nb.shape[1], tot + (s1 - s0)), tot)
        for j in range(s0, s1):
            nb[0, tot] = sx[j]
            nb[1, tot] = sy[j]
            nb[2, tot] = sz[j]
            nb[3, tot] = sq[j]
            if use_radii:
                nb[4, tot] = sr[j]
            tot += 1
    return nb, tot


@numba.njit(fastmath=_FM, error_model="numpy", cache=True)
def _near_points32(xi, yi, zi, sx, sy, sz, sq, n, close2):
    """:func:`_near_points` with each pair in single precision (coordinates
    relative to a nearby centre, scaled to order 1), summed in single
    precision over runs of ``_RUN32`` pairs and in double precision over the
    runs: sums of many pairs of mixed signs, which can cancel, then keep
    about a pair's relative rounding (~1e-7) instead of growing with the
    count (one double sum per pair ran 1.25x the time). The count is of
    pairs closer than sqrt(``close2``) (> 0), coincident ones included: the
    caller sums a target again in double precision when it differs from the
    one expected. (A count vectorises; a running minimum of the distance
    did not, and took 4x the time. The count of a run is kept in single
    precision, exact up to 2^24, in the lanes of the sums: an integer count
    took 1.25x the time.)"""
    zero = np.float32(0.0)
    one = np.float32(1.0)
    ax = 0.0
    ay = 0.0
    az = 0.0
    p = 0.0
    c = 0
    # unsigned indices in while loops: the compiler then drops the
    # negative-index wrap of every load (2.40 against 2.89 cycles a pair
    # in isolation, one or two threads; 1.02-1.04x in the whole evaluation
    # at 1e6). Signed ranges kept the wrap.
    un = np.uint64(n)
    j0 = np.uint64(0)
    while j0 < un:
        j1 = min(j0 + np.uint64(_RUN32), un)
        bx = zero
        by = zero
        bz = zero
        bp = zero
        bc = zero
        j = j0
        while j < j1:
            dx = xi - sx[j]
            dy = yi - sy[j]
            dz = zi - sz[j]
            r2 = dx * dx + dy * dy + dz * dz
            live = r2 > zero
            inv = one / np.sqrt(r2 if live else one)
            inv = inv if live else zero
            s = sq[j] * inv
            s3 = s * inv * inv
            bx += s3 * dx
            by += s3 * dy
            bz += s3 * dz
            bp += s
            bc += one if r2 < close2 else zero
            j += np.uint64(1)
        ax += np.float64(bx)
        ay += np.float64(by)
        az += np.float64(bz)
        p += np.float64(bp)
        c += int(bc)
        j0 = j1
    return ax, ay, az, p, c


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _near_spheres(xi, yi, zi, ri, sx, sy, sz, sq, sr, a, b):
    ax = 0.0
    ay = 0.0
    az = 0.0
    p = 0.0
    c = 0
    for j in range(a, b):
        dx = xi - sx[j]
        dy = yi - sy[j]
        dz = zi - sz[j]
        r2 = dx * dx + dy * dy + dz * dz
        aa = max(sr[j], ri)
        a2 = aa * aa
        d = max(r2, a2)
        live = d > 0.0
        d = d if live else 1.0
        invd = 1.0 / np.sqrt(d)
        inv3 = invd * invd * invd
        inside = r2 < a2
        # outside: 1/r; inside a uniformly charged sphere: (3 a^2 - r^2) / (2 a^3)
        pot = 0.5 * (3.0 * a2 - r2) * inv3 if inside else invd
        s3 = sq[j] * inv3
        s3 = s3 if live else 0.0
        pot = sq[j] * pot if live else 0.0
        ax += s3 * dx
        ay += s3 * dy
        az += s3 * dz
        p += pot
        c += 0 if live else 1
    return ax, ay, az, p, c


@numba.njit(fastmath=_FM, error_model="numpy", cache=True)
def _near_spheres32(xi, yi, zi, ri, sx, sy, sz, sq, sr, n, close2, need_pot):
    """:func:`_near_spheres` in single precision, as :func:`_near_points32`
    (scaled coordinates, radii and charges; runs summed in double; the count
    of pairs closer than sqrt(``close2``)). A pair at zero distance adds
    nothing here: it is the target itself (whose own potential is then left
    out) or, counted, sends the target back to double precision. (Points
    keep their own kernel: through this one, with zero radii, the 1e6
    uniform evaluation took 3.9 s against 2.8 s.)"""
    zero = np.float32(0.0)
    one = np.float32(1.0)
    half = np.float32(0.5)
    three = np.float32(3.0)
    ax = 0.0
    ay = 0.0
    az = 0.0
    p = 0.0
    c = 0
    for j0 in range(0, n, _RUN32):
        bx = zero
        by = zero
        bz = zero
        bp = zero
        bc = zero
        for j in range(j0, min(j0 + _RUN32, n)):
            dx = xi - sx[j]
            dy = yi - sy[j]
            dz = zi - sz[j]
            r2 = dx * dx + dy * dy + dz * dz
            live = r2 > zero
            aa = max(sr[j], ri)
            a2 = aa * aa
            d = max(r2, a2)
            d = d if live else one
            invd = one / np.sqrt(d)
            inv3 = invd * invd * invd
            s3 = sq[j] * inv3
            s3 = s3 if live else zero
            bx += s3 * dx
            by += s3 * dy
            bz += s3 * dz
            if need_pot:  # loop-invariant: compiled as two loops, the field-only one shorter
                inside = r2 < a2
                pot = half * (three * a2 - r2) * inv3 if inside else invd
                pot = sq[j] * pot if live else zero
                bp += pot
            bc += one if r2 < close2 else zero
        ax += np.float64(bx)
        ay += np.float64(by)
        az += np.float64(bz)
        p += np.float64(bp)
        c += int(bc)
    return ax, ay, az, p, c


@numba.njit(inline="always")
def _distance_range(nd, mlist, nm, gx, gy, gz):
    """Smallest and largest squared distance from (gx, gy, gz) to the centres of the nodes ``mlist[:nm]``."""
    lo = np.inf
    hi = 0.0
    for f in range(nm):
        k = mlist[f]
        rx = gx - nd[k, 0]
        ry = gy - nd[k, 1]
        rz = gz - nd[k, 2]
        d2 = rx * rx + ry * ry + rz * rz
        lo = min(lo, d2)
        hi = max(hi, d2)
    return lo, hi


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _local_coefficients(nd, mm, mlist, nm, gx, gy, gz, am, dm, geo, didx, dcoef, deriv, rows, unfold, local_scale,
                        red_ptr, comp_order, qscale, d2min, wpow, gk, loc):
    """Add the local expansion about (gx, gy, gz) of the nodes in ``mlist`` to ``loc`` (M2L).

    Vectorised across the nodes: reduced moments gathered into ``am``
    (component, node), the derivatives of 1/|R| built by their recurrence
    in ``dm``, then one dot product over the nodes per translation term
    (see :func:`chargesim.coulomb._multipoles.m2l_table`); ``gk``, ``wpow``
    scratch. Lengths are in units of rho = sqrt(``d2min``), the distance of
    the nearest of the nodes (:func:`_distance_range`), and charges in units
    of ``qscale``: then every |R| >= 1, the derivatives are at most of order
    m!, and the moments of order n at most of order (theta |R|)^n. The scratch arrays ``am``, ``dm``, ``geo``,
    ``gk`` and the table ``dcoef`` may be single precision (``float32``,
    twice the lanes): the caller keeps the nodes' distances within a range
    where that neither overflows nor underflows. ``loc`` is double
    precision, in the units of the inputs.
    """
    gk[0] = 0.0
    zero = gk[0]  # of the scratch's precision
    irho = 1.0 / np.sqrt(d2min)
    w = 1.0 / qscale
    for o in range(wpow.size):
        wpow[o] = w
        w *= irho
    for f in range(nm):
        k = mlist[f]
        rx = (gx - nd[k, 0]) * irho
        ry = (gy - nd[k, 1]) * irho
        rz = (gz - nd[k, 2]) * irho
        geo[0, f] = rx
        geo[1, f] = ry
        geo[2, f] = rz
        ir2 = 1.0 / (rx * rx + ry * ry + rz * rz)
        geo[3, f] = ir2
        dm[0, f] = np.sqrt(ir2)
    # reduced moments come in blocks of equal order (red_ptr); row by row,
    # so that the stores run along the rows (node by node, each store hit
    # another row: 1.2x the time of this gather)
    for o in range(red_ptr.size - 1):
        w = wpow[o]
        for c in range(red_ptr[o], red_ptr[o + 1]):
            row = am[c]
            for f in range(nm):
                row[f] = mm[mlist[f], c] * w
    rx = geo[0]
    ry = geo[1]
    rz = geo[2]
    ir2 = geo[3]
    for u in range(deriv.size):
        c = deriv[u]
        a0 = dm[didx[c, 0]]
        a1 = dm[didx[c, 1]]
        a2 = dm[didx[c, 2]]
        a3 = dm[didx[c, 3]]
        a4 = dm[didx[c, 4]]
        a5 = dm[didx[c, 5]]
        k0 = dcoef[c, 0]
        k1 = dcoef[c, 1]
        k2 = dcoef[c, 2]
        k3 = dcoef[c, 3]
        k4 = dcoef[c, 4]
        k5 = dcoef[c, 5]
        out = dm[c]
        for f in range(nm):
            out[f] = (k0 * rx[f] * a0[f] + k1 * ry[f] * a1[f] + k2 * rz[f] * a2[f]
                      + k3 * a3[f] + k4 * a4[f] + k5 * a5[f]) * ir2[f]
    for c in range(gk.size):
        gk[c] = zero
    # rows in blocks of four terms sharing one moment (see
    # _multipoles.block_rows): one load of it for four products
    for r in range(rows.shape[0]):
        an = am[rows[r, 0]]
        d1 = dm[rows[r, 5]]
        d2 = dm[rows[r, 6]]
        d3 = dm[rows[r, 7]]
        d4 = dm[rows[r, 8]]
        s1 = zero
        s2 = zero
        s3 = zero
        s4 = zero
        for f in range(nm):
            a = an[f]
            s1 += a * d1[f]
            s2 += a * d2[f]
            s3 += a * d3[f]
            s4 += a * d4[f]
        gk[rows[r, 1]] += s1
        gk[rows[r, 2]] += s2
        gk[rows[r, 3]] += s3
        gk[rows[r, 4]] += s4
    for r in range(unfold.shape[0]):
        gk[unfold[r, 0]] = -gk[unfold[r, 1]] - gk[unfold[r, 2]]
    # back to the inputs' units: G_k scales as qscale / rho^(|k| + 1)
    w = qscale * irho
    for o in range(wpow.size):
        wpow[o] = w
        w *= irho
    for c in range(local_scale.size):
        loc[c] += np.float64(gk[c]) * local_scale[c] * wpow[comp_order[c]]


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _translate(nd, mm, mlist, nm, gx, gy, gz, s64, s32, didx, dcoef, dcoef32, deriv, rows, unfold, local_scale,
               red_ptr, comp_order, qscale, range2, wpow, loc):
    """M2L of the nodes ``mlist[:nm]`` into ``loc`` about (gx, gy, gz)
    (:func:`_local_coefficients`), in single precision when the farthest
    node is at most sqrt(``range2``) times farther than the nearest, else in
    double. ``s64``, ``s32``: scratch (am, dm, geo, gk) of each precision,
    grown here as needed; returns them."""
    d2lo, d2hi = _distance_range(nd, mlist, nm, gx, gy, gz)
    if d2hi <= range2 * d2lo:
        am, dm, geo, gk = s32
        if am.shape[1] < nm:
            am = np.empty((am.shape[0], 2 * nm), np.float32)
            dm = np.empty((dm.shape[0], 2 * nm), np.float32)
            geo = np.empty((4, 2 * nm), np.float32)
            s32 = (am, dm, geo, gk)
        _local_coefficients(nd, mm, mlist, nm, gx, gy, gz, am, dm, geo, didx, dcoef32, deriv, rows, unfold,
                            local_scale, red_ptr, comp_order, qscale, d2lo, wpow, gk, loc)
    else:
        am, dm, geo, gk = s64
        if am.shape[1] < nm:
            am = np.empty((am.shape[0], 2 * nm))
            dm = np.empty((dm.shape[0], 2 * nm))
            geo = np.empty((4, 2 * nm))
            s64 = (am, dm, geo, gk)
        _local_coefficients(nd, mm, mlist, nm, gx, gy, gz, am, dm, geo, didx, dcoef, deriv, rows, unfold,
                            local_scale, red_ptr, comp_order, qscale, d2lo, wpow, gk, loc)
    return s64, s32


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _evaluate_local(lc, grd, ngrad, tx, ty, tz, i0, nt, cx, cy, cz, parent, axis, need_pot, tl, lv):
    """L2P for the targets i0 .. i0 + nt - 1 of a leaf: the potential sum_k
    lc[k] t^k in lv[0] and the field -sum_k grd[:, k] t^k in lv[1:4], t the
    target about (cx, cy, cz). The monomials are tabled over the targets
    (``tl``, component by target) so that every loop runs across targets
    and vectorises (per target, the chained products did not).
    ``need_pot`` False: lv[0] holds the constant term only, and the
    monomials of the top order (which only the potential takes) are left
    out: 84 monomials and 3 x 84 products per target instead of 120 and
    4 x 120 (1.02-1.04x the whole evaluation at 1e5)."""
    for j in range(nt):
        tl[0, j] = 1.0
        lv[0, j] = lc[0]
        lv[1, j] = -grd[0, 0]
        lv[2, j] = -grd[1, 0]
        lv[3, j] = -grd[2, 0]
    nmono = lc.size if need_pot else ngrad
    for c in range(1, nmono):
        pc = parent[c]
        ac = axis[c]
        ctr = cx if ac == 0 else (cy if ac == 1 else cz)
        coord = tx if ac == 0 else (ty if ac == 1 else tz)
        for j in range(nt):
            tl[c, j] = tl[pc, j] * (coord[i0 + j] - ctr)
    if need_pot:
        for c in range(1, lc.size):
            lk = lc[c]
            for j in range(nt):
                lv[0, j] += lk * tl[c, j]
    for c in range(1, ngrad):
        g0 = grd[0, c]
        g1 = grd[1, c]
        g2 = grd[2, c]
        for j in range(nt):
            t = tl[c, j]
            lv[1, j] -= g0 * t
            lv[2, j] -= g1 * t
            lv[3, j] -= g2 * t


@numba.njit(cache=True)
def _bucket(tag, val, n, nbuckets, off, out):
    """Counting sort of val[:n] by tag[:n] (stable): bucket b is out[off[b]:off[b+1]]."""
    for b in range(nbuckets + 1):
        off[b] = 0
    for i in range(n):
        off[tag[i] + 1] += 1
    for b in range(nbuckets):
        off[b + 1] += off[b]
    fill = off[:nbuckets].copy()
    for i in range(n):
        out[fill[tag[i]]] = val[i]
        fill[tag[i]] += 1


@numba.njit(inline="always")
def _accept(snd, tnd, ta, k, th2, direct_max):
    """Whether target node ``ta`` takes source node ``k`` by a local expansion:
    (r_A + b_B) < theta d (``th2`` = theta^2), no target sphere can overlap a
    source sphere (d - r_A - b_B > the larger particle radius), and B holds
    more than ``direct_max`` particles."""
    if snd[k, 5] <= direct_max:
        return False
    rab = tnd[ta, 3] + snd[k, 3]
    dx = snd[k, 0] - tnd[ta, 0]
    dy = snd[k, 1] - tnd[ta, 1]
    dz = snd[k, 2] - tnd[ta, 2]
    d2 = dx * dx + dy * dy + dz * dz
    overlap = max(snd[k, 4], tnd[ta, 4])
    # in squares
    return rab * rab < th2 * d2 and d2 > (rab + overlap) ** 2


@numba.njit(cache=True)
def _make_room(pa, pb, sp, tag0, val0, n0, tag1, val1, n1):
    """Grow a walk's pair stack (room for 8 more) and its full lists (the
    walks stop for room rather than grow them: see :func:`_traverse`)."""
    if sp + 8 > pa.size:
        pa = _grow(pa, 2 * pa.size + 8)
        pb = _grow(pb, 2 * pb.size + 8)
    if n0 == tag0.size:
        tag0 = _grow(tag0, 2 * n0)
        val0 = _grow(val0, 2 * n0)
    if n1 == tag1.size:
        tag1 = _grow(tag1, 2 * n1)
        val1 = _grow(val1, 2 * n1)
    return pa, pb, tag0, val0, tag1, val1


@numba.njit(cache=True)
def _traverse(snd, sfirst, snchild, tnd, tnchild, tn, ntn, pend_off, pend_src, theta, direct_max, pa, pb, lists,
              counts):
    """Dual walk of one target group's nodes ``tn[:ntn]`` against the source tree.

    Pairs (target node A, source node B) start at each top node of the
    group with the source nodes the upper walk left it (:func:`upper_walk`,
    ``pend_src[pend_off[A]:pend_off[A + 1]]``). A pair goes
    - to A's local expansion (list 0) when (r_A + b_B) < theta d (d the
      distance of their centres, r_A and b_B their radii: the Taylor series
      of 1/|R + t - s| converges with ratio below theta), no target sphere
      can overlap a source sphere, and B holds more than ``direct_max``
      particles;
    - to A's near list (1) when A and B are leaves, or A is a leaf and B small;
    - otherwise the larger of A and B is opened (A when B is a leaf or small).
    ``pa``, ``pb`` are a stack of pairs (local index of A in ``tn``, B);
    lists[l] = (tags, nodes), grown as needed. Returns the stack, the lists
    and their lengths.
    """
    tag0, val0 = lists[0]
    tag1, val1 = lists[1]
    n0 = 0
    n1 = 0
    sp = 0
    for a in range(ntn):
        if counts[a] == -1:  # a top node of the group: its pairs from the upper walk
            ta = tn[a]
            # pushed in reverse, so that they are taken in the upper walk's order
            for u in range(pend_off[ta + 1] - 1, pend_off[ta] - 1, -1):
                if sp == pa.size:
                    pa = _grow(pa, 2 * sp)
                    pb = _grow(pb, 2 * sp)
                pa[sp] = a
                pb[sp] = pend_src[u]
                sp += 1
    th2 = theta * theta
    # the walk runs in _walk_pairs, which never replaces an array: here a
    # loop that may (growing one) took 6x the time, numba counting the
    # references of the arrays it carries at every pair
    while sp > 0:
        sp, n0, n1 = _walk_pairs(snd, sfirst, snchild, tnd, tnchild, tn, ntn, th2, direct_max, pa, pb, sp, tag0,
                                 val0, n0, tag1, val1, n1, counts)
        pa, pb, tag0, val0, tag1, val1 = _make_room(pa, pb, sp, tag0, val0, n0, tag1, val1, n1)
    return pa, pb, (tag0, val0), (tag1, val1), n0, n1


@numba.njit(cache=True)
def _walk_pairs(snd, sfirst, snchild, tnd, tnchild, tn, ntn, th2, direct_max, pa, pb, sp, tag0, val0, n0, tag1, val1,
                n1, counts):
    """:func:`_traverse`'s walk from the stack ``pa[:sp]``, ``pb[:sp]`` until
    it is empty or an array could overflow (a pair opened, or one more list
    entry); returns (sp, n0, n1)."""
    while sp > 0 and sp + 7 <= pa.size and n0 < tag0.size and n1 < tag1.size:
        sp -= 1
        a = pa[sp]
        k = pb[sp]
        ta = tn[a]
        if _accept(snd, tnd, ta, k, th2, direct_max):
            tag0[n0] = a
            val0[n0] = k
            n0 += 1
            continue
        a_leaf = tnchild[ta] == 0
        b_end = snd[k, 5] <= direct_max or snchild[k] == 0
        if a_leaf and b_end:
            tag1[n1] = a
            val1[n1] = k
            n1 += 1
            continue
        if not a_leaf and (b_end or tnd[ta, 3] >= snd[k, 3]):
            # open A: its children are consecutive in tn from counts[ntn + a]
            for c in range(tnchild[ta]):
                pa[sp] = counts[ntn + a] + c
                pb[sp] = k
                sp += 1
        else:
            c0 = sfirst[k]
            for c in range(snchild[k] - 1, -1, -1):
                pa[sp] = a
                pb[sp] = c0 + c
                sp += 1
    return sp, n0, n1


@numba.njit(cache=True)
def _group_nodes(tfirst, tnchild, g0, g1, tn, counts):
    """The target nodes of a group (top nodes g0..g1-1 and all below), in ``tn``.

    Children of a node are stored consecutively in ``tn``; counts[a] is -1 for
    a top node, else the local index of its parent; counts[ntn + a] is the
    local index of a's first child. Returns (tn, counts, ntn).
    """
    ntn = 0
    for k in range(g0, g1):
        if ntn == tn.size:
            tn = _grow(tn, 2 * ntn)
        tn[ntn] = k
        ntn += 1
    head = 0
    par = np.empty(tn.size, np.int64)
    fc = np.empty(tn.size, np.int64)
    for a in range(ntn):
        par[a] = -1
    while head < ntn:
        k = tn[head]
        fc[head] = ntn
        nc = tnchild[k]
        if ntn + nc > tn.size:
            tn = _grow(tn, 2 * (ntn + nc))
            par = _grow(par, tn.size)
            fc = _grow(fc, tn.size)
        for c in range(nc):
            tn[ntn] = tfirst[k] + c
            par[ntn] = head
            ntn += 1
        head += 1
    if counts.size < 2 * ntn:
        counts = np.empty(2 * tn.size, np.int64)
    for a in range(ntn):
        counts[a] = par[a]
        counts[ntn + a] = fc[a]
    return tn, counts, ntn


@numba.njit(cache=True)
def upper_walk(snd, sfirst, snchild, tnd, tfirst, tnchild, g0s, g1s, theta, direct_max):
    """Dual walk of the target nodes above the groups (the upper nodes) against the source tree.

    The upper nodes are the strict ancestors of the groups' top nodes; each
    child of an upper node is an upper node or a top node. Pairs (A, B)
    start at (target root, source root) and go as in :func:`_traverse`:
    to A's local expansion when A takes B (:func:`_accept`), else the
    larger of A and B is opened (A when B is a leaf or small; an upper node
    is never a leaf). A pair whose A is a top node is left to that group's
    walk. So the far field common to a group's targets is translated once,
    at the highest node it is far from, and shifted down (L2L), instead of
    once per group.

    Returns
    -------
    up_nodes : int64 (n_up,)
        Upper nodes, parents before children.
    par_up : int64 (n_target_nodes,)
        For an upper or top node: the index in ``up_nodes`` of its parent,
        -1 for the root or other nodes.
    m2l_off, m2l_src : int64
        Source nodes of upper node u's local expansion:
        m2l_src[m2l_off[u]:m2l_off[u + 1]].
    pend_off, pend_src : int64
        Source nodes left to top node A's group walk:
        pend_src[pend_off[A]:pend_off[A + 1]].
    """
    nt = tnd.shape[0]
    is_top = np.zeros(nt, np.bool_)
    for g in range(g0s.size):
        for k in range(g0s[g], g1s[g]):
            is_top[k] = True
    par_up = np.full(nt, -1, np.int64)
    up_index = np.full(nt, -1, np.int64)
    up_nodes = np.empty(64, np.int64)
    n_up = 0
    if not is_top[0]:
        up_nodes[0] = 0
        up_index[0] = 0
        n_up = 1
        head = 0
        while head < n_up:
            k = up_nodes[head]
            for c in range(tfirst[k], tfirst[k] + tnchild[k]):
                par_up[c] = head
                if not is_top[c]:
                    if n_up == up_nodes.size:
                        up_nodes = _grow(up_nodes, 2 * n_up)
                    up_nodes[n_up] = c
                    up_index[c] = n_up
                    n_up += 1
            head += 1
    th2 = theta * theta
    pa = np.empty(1024, np.int64)
    pb = np.empty(1024, np.int64)
    tag0 = np.empty(1024, np.int64)
    val0 = np.empty(1024, np.int64)
    tag1 = np.empty(1024, np.int64)
    val1 = np.empty(1024, np.int64)
    n0 = 0
    n1 = 0
    pa[0] = 0
    pb[0] = 0
    sp = 1
    # as in _traverse: the walk in a function that never replaces an array
    while sp > 0:
        sp, n0, n1 = _upper_pairs(snd, sfirst, snchild, tnd, tfirst, tnchild, is_top, up_index, th2, direct_max, pa,
                                  pb, sp, tag0, val0, n0, tag1, val1, n1)
        pa, pb, tag0, val0, tag1, val1 = _make_room(pa, pb, sp, tag0, val0, n0, tag1, val1, n1)
    m2l_off = np.empty(n_up + 1, np.int64)
    m2l_src = np.empty(n0, np.int64)
    _bucket(tag0, val0, n0, n_up, m2l_off, m2l_src)
    pend_off = np.empty(nt + 1, np.int64)
    pend_src = np.empty(n1, np.int64)
    _bucket(tag1, val1, n1, nt, pend_off, pend_src)
    return up_nodes[:n_up].copy(), par_up, m2l_off, m2l_src, pend_off, pend_src


@numba.njit(cache=True)
def _upper_pairs(snd, sfirst, snchild, tnd, tfirst, tnchild, is_top, up_index, th2, direct_max, pa, pb, sp, tag0, val0,
                 n0, tag1, val1, n1):
    """:func:`upper_walk`'s walk from the stack until it is empty or an array
    could overflow; returns (sp, n0, n1)."""
    while sp > 0 and sp + 7 <= pa.size and n0 < tag0.size and n1 < tag1.size:
        sp -= 1
        ta = pa[sp]
        k = pb[sp]
        if is_top[ta]:
            tag1[n1] = ta
            val1[n1] = k
            n1 += 1
            continue
        if _accept(snd, tnd, ta, k, th2, direct_max):
            tag0[n0] = up_index[ta]
            val0[n0] = k
            n0 += 1
            continue
        if snd[k, 5] <= direct_max or snchild[k] == 0 or tnd[ta, 3] >= snd[k, 3]:
            for c in range(tnchild[ta] - 1, -1, -1):
                pa[sp] = tfirst[ta] + c
                pb[sp] = k
                sp += 1
        else:
            for c in range(snchild[k] - 1, -1, -1):
                pa[sp] = ta
                pb[sp] = sfirst[k] + c
                sp += 1
    return sp, n0, n1


@numba.njit(parallel=True, fastmath=_FM, cache=True, error_model="numpy")
def upper_locals(up_nodes, par_up, m2l_off, m2l_src, snd, mm, tnd, didx, dcoef, dcoef32, deriv, rows, unfold,
                 local_scale, red_ptr, comp_order, expo, binom, single_range, qscale, uloc, uhas):
    """Local expansions of the upper nodes (:func:`upper_walk`): each one's
    own translations (M2L, in parallel, single precision as in
    :func:`evaluate_fmm`), then each parent's shifted to its children (L2L),
    parents first. Each node's sums run in a fixed order: the results do
    not depend on the thread count. ``uhas[u]``: u has a local expansion."""
    n_up = up_nodes.size
    ncl = local_scale.size
    nred = mm.shape[1]
    range2 = single_range * single_range
    for u in numba.prange(n_up):
        for c in range(ncl):
            uloc[u, c] = 0.0
        cnt = m2l_off[u + 1] - m2l_off[u]
        uhas[u] = cnt > 0
        if cnt == 0:
            continue
        ta = up_nodes[u]
        s64 = (np.empty((nred, 0)), np.empty((ncl, 0)), np.empty((4, 0)), np.empty(ncl + 1))
        s32 = (np.empty((nred, 0), np.float32), np.empty((ncl, 0), np.float32), np.empty((4, 0), np.float32),
               np.empty(ncl + 1, np.float32))
        _translate(snd, mm, m2l_src[m2l_off[u]:m2l_off[u + 1]], cnt, tnd[ta, 0], tnd[ta, 1], tnd[ta, 2], s64, s32,
                   didx, dcoef, dcoef32, deriv, rows, unfold, local_scale, red_ptr, comp_order, qscale, range2,
                   np.empty(comp_order.max() + 1), uloc[u])
    scratch = np.empty((3, ncl))
    for u in range(1, n_up):
        p = par_up[up_nodes[u]]
        if not uhas[p]:
            continue
        _shift_local(uloc[u], uloc[p], tnd, up_nodes[u], up_nodes[p], expo, binom, scratch)
        uhas[u] = True


@numba.njit(inline="always")
def _shift_local(out, src, tnd, child, par, expo, binom, scratch):
    """out += the local expansion ``src`` about node ``par``'s centre, shifted
    to node ``child``'s (L2L, :func:`_shift`)."""
    _shift(out, src, tnd[child, 0] - tnd[par, 0], tnd[child, 1] - tnd[par, 1], tnd[child, 2] - tnd[par, 2], expo,
           binom, False, scratch)


@numba.njit(parallel=True, fastmath=_FM, cache=True, error_model="numpy")
def evaluate_fmm(sstart, send, sfirst, snchild, snd, mm, sx, sy, sz, sq, sr, use_radii,
                 tstart, tend, tfirst, tnchild, tnd, tx, ty, tz, tr, self_targets, g0s, g1s,
                 theta, direct_max, didx, dcoef, dcoef32, rows, unfold, deriv, local_scale, red_ptr, comp_order,
                 grad_rows, expo, binom, parent, axis, n_blocks, single_rel, single_range, qscale,
                 up_nodes, par_up, uloc, uhas, pend_off, pend_src, need_pot, ex, ey, ez, phi, nzero):
    """Field and potential sums at the (Morton-sorted) targets, group by group.

    For each target group the dual walk (:func:`_traverse`) gives each of its
    target nodes a list of source nodes for its local expansion (M2L,
    vectorised across the nodes) and each of its target leaves a list of
    near source nodes, summed exactly. Local expansions are shifted down the
    group's nodes (L2L) and evaluated at the targets (L2P). Results depend
    on the group alone, never on the thread that ran it.
    ``self_targets``: targets are the sorted sources; the self pair is
    skipped by its zero distance (points, counted in ``nzero``) or its exact
    zero field (spheres).

    ``single_rel`` > 0: the near sums of point charges run in single
    precision (twice the speed), on coordinates relative to the target
    leaf's centre. Rounding them moves a pair at distance r by up to about
    2^-24 (2 |x| + r), |x| the target's distance from the centre (the
    source's is at most |x| + r); a target with a pair closer than
    ``single_rel`` x |x|, or an unexpected zero distance, is summed again
    in double precision. 0: double precision throughout. ``need_pot``
    False: the single-precision near sums of spheres and the local
    expansions (L2P) leave out the potential (``phi`` is then incomplete,
    and not for use).
    """
    ng = g0s.size
    ncl = local_scale.size
    # the gradient of the order-p expansion has terms of order < p only
    ngrad = 0
    for r in range(grad_rows.shape[0]):
        ngrad = max(ngrad, grad_rows[r, 2] + 1)
    rel2 = single_rel * single_rel
    nred = mm.shape[1]
    range2 = single_range * single_range
    for blk in numba.prange(n_blocks):
        ga = (blk * ng) // n_blocks
        gb = ((blk + 1) * ng) // n_blocks
        nb = np.empty((5, 4096), np.float64)
        nf = np.empty((5, 4096), np.float32)
        pa = np.empty(1024, np.int64)
        pb = np.empty(1024, np.int64)
        lists = ((np.empty(1024, np.int64), np.empty(1024, np.int64)),
                 (np.empty(1024, np.int64), np.empty(1024, np.int64)))
        tn = np.empty(64, np.int64)
        counts = np.empty(128, np.int64)
        srt0 = np.empty(1024, np.int64)
        srt1 = np.empty(1024, np.int64)
        o0 = np.empty(65, np.int64)
        o1 = np.empty(65, np.int64)
        # M2L scratch (am, dm, geo, gk) of each precision; gk has one slot for padded terms
        s64 = (np.empty((nred, 256)), np.empty((ncl, 256)), np.empty((4, 256)), np.empty(ncl + 1))
        s32 = (np.empty((nred, 256), np.float32), np.empty((ncl, 256), np.float32), np.empty((4, 256), np.float32),
               np.empty(ncl + 1, np.float32))
        wpow = np.empty(comp_order.max() + 1)
        loc = np.empty((64, ncl))
        has = np.empty(64, np.bool_)
        grd = np.empty((3, ncl))
        scratch = np.empty((3, ncl))
        tl = np.empty((ncl, 256))
        lv = np.empty((4, 256))
        dl = np.empty(256, np.int64)
        for g in range(ga, gb):
            tn, counts, ntn = _group_nodes(tfirst, tnchild, g0s[g], g1s[g], tn, counts)
            pa, pb, l0, l1, n0, n1 = _traverse(snd, sfirst, snchild, tnd, tnchild, tn, ntn, pend_off, pend_src,
                                               theta, direct_max, pa, pb, lists, counts)
            lists = (l0, l1)
            if loc.shape[0] < ntn:
                loc = np.empty((tn.size, ncl))
                has = np.empty(tn.size, np.bool_)
            if o0.size < ntn + 1:
                o0 = np.empty(tn.size + 1, np.int64)
                o1 = np.empty(tn.size + 1, np.int64)
            if srt0.size < n0:
                srt0 = np.empty(2 * n0, np.int64)
            if srt1.size < n1:
                srt1 = np.empty(2 * n1, np.int64)
            _bucket(l0[0], l0[1], n0, ntn, o0, srt0)
            _bucket(l1[0], l1[1], n1, ntn, o1, srt1)
            # M2L: per target node, its source nodes in one vectorised batch
            for a in range(ntn):
                has[a] = False
                for c in range(ncl):
                    loc[a, c] = 0.0
                if counts[a] == -1:
                    # a top node starts from its upper parent's expansion
                    pu = par_up[tn[a]]
                    if pu >= 0 and uhas[pu]:
                        _shift_local(loc[a], uloc[pu], tnd, tn[a], up_nodes[pu], expo, binom, scratch)
                        has[a] = True
                cnt = o0[a + 1] - o0[a]
                if cnt == 0:
                    continue
                ta = tn[a]
                s64, s32 = _translate(snd, mm, srt0[o0[a]:o0[a + 1]], cnt, tnd[ta, 0], tnd[ta, 1], tnd[ta, 2], s64,
                                      s32, didx, dcoef, dcoef32, deriv, rows, unfold, local_scale, red_ptr,
                                      comp_order, qscale, range2, wpow, loc[a])
                has[a] = True
            # L2L: parents come before their children in tn
            for a in range(ntn):
                pa_ = counts[a]
                if pa_ < 0 or not has[pa_]:
                    continue
                _shift_local(loc[a], loc[pa_], tnd, tn[a], tn[pa_], expo, binom, scratch)
                has[a] = True
            for a in range(ntn):
                ta = tn[a]
                if tnchild[ta] != 0:
                    continue
                cax = tnd[ta, 0]
                cay = tnd[ta, 1]
                caz = tnd[ta, 2]
                single = single_rel > 0.0
                fscale = 1.0
                pscale = 1.0
                ifar = 1.0
                nb_ready = False
                tot = 0
                as_points = False
                rsrc = 0.0
                if single:
                    # straight from the sources into single precision:
                    # coordinates relative to the leaf's centre over a bound
                    # of the farthest one (node geometry), charges over the
                    # largest of all: all of order 1, so single precision
                    # neither overflows nor underflows. The double copy is
                    # made only for a target summed again in double.
                    far = tnd[ta, 3]
                    for u in range(o1[a], o1[a + 1]):
                        k = srt1[u]
                        tot += send[k] - sstart[k]
                        rsrc = max(rsrc, snd[k, 4])  # the largest source radius (0 for points)
                        far = max(far, abs(snd[k, 0] - cax) + snd[k, 3], abs(snd[k, 1] - cay) + snd[k, 3],
                                  abs(snd[k, 2] - caz) + snd[k, 3])
                    # a power of two: the scaling itself rounds nothing
                    far = math.ldexp(1.0, math.frexp(far)[1]) if far > 0.0 else 1.0
                    ifar = 1.0 / far
                    iq = 1.0 / qscale
                    if nf.shape[1] < tot:
                        nf = np.empty((5, max(2 * nf.shape[1], tot)), np.float32)
                    w = 0
                    for u in range(o1[a], o1[a + 1]):
                        k = srt1[u]
                        for j in range(sstart[k], send[k]):
                            nf[0, w] = (sx[j] - cax) * ifar
                            nf[1, w] = (sy[j] - cay) * ifar
                            nf[2, w] = (sz[j] - caz) * ifar
                            nf[3, w] = sq[j] * iq
                            if use_radii:
                                nf[4, w] = sr[j] * ifar
                            w += 1
                    pscale = qscale * ifar
                    fscale = pscale * ifar
                    if use_radii:
                        ra = max(rsrc, tnd[ta, 4]) * ifar
                        as_points = tot * ra * ra * ra < _RADII_AS_POINTS
                        rsrc *= ifar
                else:
                    nb, tot = _gather_near(srt1, o1[a], o1[a + 1], sstart, send, sx, sy, sz, sq, sr, use_radii, nb)
                    nb_ready = True
                fbx = nf[0]
                fby = nf[1]
                fbz = nf[2]
                fbq = nf[3]
                fbr = nf[4]
                expect = 1 if self_targets else 0
                use_loc = has[a]
                if use_loc:
                    # E = -grad sum_k L_k t^k = -sum_j grd[:, j] t^j
                    for c in range(ncl):
                        grd[0, c] = 0.0
                        grd[1, c] = 0.0
                        grd[2, c] = 0.0
                    for r in range(grad_rows.shape[0]):
                        grd[grad_rows[r, 1], grad_rows[r, 2]] += grad_rows[r, 3] * loc[a, grad_rows[r, 0]]
                    i0 = tstart[ta]
                    nt = tend[ta] - i0
                    if tl.shape[1] < nt:
                        tl = np.empty((ncl, 2 * nt))
                        lv = np.empty((4, 2 * nt))
                    _evaluate_local(loc[a], grd, ngrad, tx, ty, tz, i0, nt, cax, cay, caz, parent, axis, need_pot, tl,
                                    lv)
                # targets whose near sum runs in double precision, summed after
                # the others: this loop then never replaces or slices an array
                # (each costs numba's reference counting, per target)
                if dl.size < tend[ta] - tstart[ta]:
                    dl = np.empty(2 * (tend[ta] - tstart[ta]), np.int64)
                ndl = 0
                for i in range(tstart[ta], tend[ta]):
                    ax = 0.0
                    ay = 0.0
                    az = 0.0
                    p = 0.0
                    if use_loc:
                        p = lv[0, i - i0]
                        ax = lv[1, i - i0]
                        ay = lv[2, i - i0]
                        az = lv[3, i - i0]
                    if single:
                        ux = (tx[i] - cax) * ifar
                        uy = (ty[i] - cay) * ifar
                        uz = (tz[i] - caz) * ifar
                        # the floor counts a zero distance at the very centre
                        close2 = np.float32(max(rel2 * (ux * ux + uy * uy + uz * uz), 1e-30))
                        if use_radii and as_points:
                            # a pair closer than max(R_i, R_j) counts as close
                            ai = max(np.float32(tr[i] * ifar), np.float32(rsrc))
                            close2 = max(close2, ai * ai)
                            gx, gy, gz, gp, c = _near_points32(np.float32(ux), np.float32(uy), np.float32(uz),
                                                               fbx, fby, fbz, fbq, tot, close2)
                        elif use_radii:
                            gx, gy, gz, gp, c = _near_spheres32(np.float32(ux), np.float32(uy), np.float32(uz),
                                                                np.float32(tr[i] * ifar), fbx, fby, fbz, fbq, fbr,
                                                                tot, close2, need_pot)
                        else:
                            gx, gy, gz, gp, c = _near_points32(np.float32(ux), np.float32(uy), np.float32(uz),
                                                               fbx, fby, fbz, fbq, tot, close2)
                        if c == expect:
                            # the target itself (self_targets) added nothing
                            ex[i] = ax + gx * fscale
                            ey[i] = ay + gy * fscale
                            ez[i] = az + gz * fscale
                            phi[i] = p + gp * pscale
                            # as the double sums report it: the self pair of
                            # points counted, of spheres taken out
                            nzero[i] = 0 if use_radii else expect
                            continue
                    ex[i] = ax
                    ey[i] = ay
                    ez[i] = az
                    phi[i] = p
                    dl[ndl] = i
                    ndl += 1
                if ndl == 0:
                    continue
                if not nb_ready:
                    nb, tot = _gather_near(srt1, o1[a], o1[a + 1], sstart, send, sx, sy, sz, sq, sr, use_radii, nb)
                bx = nb[0]
                by = nb[1]
                bz = nb[2]
                bq = nb[3]
                br = nb[4]
                for u in range(ndl):
                    i = dl[u]
                    if use_radii:
                        ri = tr[i]
                        fx, fy, fz, pp, c = _near_spheres(tx[i], ty[i], tz[i], ri, bx, by, bz, bq, br, 0, tot)
                        if self_targets:
                            # the self pair is in the sum (i's own leaf is near):
                            # at r = 0 it adds exactly zero field, and the
                            # uniformly charged sphere's own potential 3 q / (2 R),
                            # taken out here; with R = 0 it was counted as a
                            # coincidence instead. (Coincident distinct spheres
                            # are legitimate and stay summed.)
                            if ri > 0.0:
                                pp -= 1.5 * sq[i] / ri
                            else:
                                c -= 1
                    else:
                        fx, fy, fz, pp, c = _near_points(tx[i], ty[i], tz[i], bx, by, bz, bq, 0, tot)
                    ex[i] += fx
                    ey[i] += fy
                    ez[i] += fz
                    phi[i] += pp
                    nzero[i] = c


@numba.njit(parallel=True, cache=True)
def gather(perm, x, y, z, out):
    """out[:, i] = (x, y, z)[perm[i]]: the Morton-sorted coordinates, rows of ``out``."""
    for i in numba.prange(perm.size):
        k = perm[i]
        out[0, i] = x[k]
        out[1, i] = y[k]
        out[2, i] = z[k]


@numba.njit(parallel=True, cache=True)
def scatter(perm, ex, ey, ez, phi, field, pot, need_field, need_potential):
    """Undo the Morton sort: result of sorted target i goes to row perm[i]."""
    for i in numba.prange(perm.size):
        k = perm[i]
        if need_field:
            field[k, 0] = ex[i]
            field[k, 1] = ey[i]
            field[k, 2] = ez[i]
        if need_potential:
            pot[k] = phi[i]

