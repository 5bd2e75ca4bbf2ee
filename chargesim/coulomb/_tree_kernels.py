"""Numba kernels of the tree evaluator (see :mod:`chargesim.coulomb.tree`).

Layout: sources are sorted by Morton code, so every tree node owns one
contiguous index range ``[start, end)`` of the sorted arrays. Node data are
kept in one (n_nodes, NODE_COLS) float64 array, one row per node:

=====  ==============================================================
cols   meaning
=====  ==============================================================
0-2    geometric centre c (centre of the bounding box of the node's particles), m
3      b = max |x_j - c| over the node's particles, m
4      Q = sum q_j, C
5-7    D = sum q_j s_j (s_j = x_j - c), C m
8-13   M_ab = sum q_j (3 s_a s_b - |s|^2 delta_ab): xx, xy, xz, yy, yz, zz, C m^2
14     largest particle radius in the node, m
15     number of particles
16-25  O_abc = sum q_j (15 s_a s_b s_c - 3 |s|^2 (s_a d_bc + s_b d_ac + s_c d_ab)):
       xxx, xxy, xxz, xyy, xyz, xzz, yyy, yyz, yzz, zzz, C m^3
=====  ==============================================================

The multipole expansion about c, truncated after the octupole, gives at
r = x - c (|r| > b), with T = O:rrr and (O:rr)_a = O_abc r_b r_c::

    phi ~ Q/r + D.r/r^3 + (r.M.r)/(2 r^5) + T/(6 r^7)
    E   ~ Q r/r^3 + 3 (D.r) r/r^5 - D/r^3 + 5/2 (r.M.r) r/r^7 - M.r/r^5
          + 7/6 T r/r^9 - (O:rr)/(2 r^7)

Every target's sum runs in one thread in a fixed order (the traversal order),
so results are bitwise reproducible and do not depend on the thread count.
"""
import numba
import numpy as np

NODE_COLS = 26
#: Far-field buffer rows: centre (3), Q, D (3), M (6), O (10).
_FAR_ROWS = 23
#: Bits per axis in the Morton code (3 * 21 = 63 bits fit an int64).
MORTON_BITS = 21
_MORTON_MAX = (1 << MORTON_BITS) - 1

# As in the direct sum: fast-math without no-NaN/no-inf, so the exact selects
# stay exact while reductions may be vectorised.
_FM = {"nsz", "arcp", "contract", "afn", "reassoc"}


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
def node_data(start, end, x, y, z, q, rad, use_radii, out):
    """Fill ``out`` (n_nodes, NODE_COLS): centre, extent, moments, max radius.

    Moments are taken straight from the node's particles (not shifted from the
    children): cost N x depth, and no round-off from repeated shifts.
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
        qq = 0.0
        dx_ = 0.0
        dy_ = 0.0
        dz_ = 0.0
        mxx = 0.0
        mxy = 0.0
        mxz = 0.0
        myy = 0.0
        myz = 0.0
        mzz = 0.0
        rmax = 0.0
        o = np.zeros(10)
        for j in range(s, e):
            sx = x[j] - cx
            sy = y[j] - cy
            sz = z[j] - cz
            s2 = sx * sx + sy * sy + sz * sz
            b2 = max(b2, s2)
            qj = q[j]
            qq += qj
            dx_ += qj * sx
            dy_ += qj * sy
            dz_ += qj * sz
            mxx += qj * (3.0 * sx * sx - s2)
            mxy += qj * (3.0 * sx * sy)
            mxz += qj * (3.0 * sx * sz)
            myy += qj * (3.0 * sy * sy - s2)
            myz += qj * (3.0 * sy * sz)
            mzz += qj * (3.0 * sz * sz - s2)
            t = 3.0 * qj * s2
            u = 15.0 * qj
            o[0] += u * sx * sx * sx - 3.0 * t * sx
            o[1] += u * sx * sx * sy - t * sy
            o[2] += u * sx * sx * sz - t * sz
            o[3] += u * sx * sy * sy - t * sx
            o[4] += u * sx * sy * sz
            o[5] += u * sx * sz * sz - t * sx
            o[6] += u * sy * sy * sy - 3.0 * t * sy
            o[7] += u * sy * sy * sz - t * sz
            o[8] += u * sy * sz * sz - t * sy
            o[9] += u * sz * sz * sz - 3.0 * t * sz
            if use_radii:
                rmax = max(rmax, rad[j])
        out[k, 0] = cx
        out[k, 1] = cy
        out[k, 2] = cz
        out[k, 3] = np.sqrt(b2)
        out[k, 4] = qq
        out[k, 5] = dx_
        out[k, 6] = dy_
        out[k, 7] = dz_
        out[k, 8] = mxx
        out[k, 9] = mxy
        out[k, 10] = mxz
        out[k, 11] = myy
        out[k, 12] = myz
        out[k, 13] = mzz
        out[k, 14] = rmax
        out[k, 15] = e - s
        for c in range(10):
            out[k, 16 + c] = o[c]


@numba.njit(cache=True)
def groups(start, end, first, nchild, group_size):
    """Target groups in Morton order: the largest nodes holding at most
    ``group_size`` points (or leaves), and runs of consecutive small siblings
    merged while their total stays within ``group_size`` (a uniform octree
    level can hold far fewer points than ``group_size``; merged siblings are
    still one Morton-contiguous, compact run). Returns (gstart, gend)."""
    gs = np.empty(start.size, np.int64)
    ge = np.empty(start.size, np.int64)
    ng = 0
    stack = np.empty(8 * (MORTON_BITS + 2), np.int64)
    if end[0] - start[0] <= group_size or nchild[0] == 0:
        gs[0] = start[0]
        ge[0] = end[0]
        return gs[:1].copy(), ge[:1].copy()
    stack[0] = 0
    sp = 1
    while sp > 0:
        sp -= 1
        k = stack[sp]
        # k is too big: group its children, recurse into the big ones
        c0 = first[k]
        nc = nchild[k]
        run_s = -1
        run_e = -1
        big = np.empty(8, np.int64)
        nbig = 0
        for c in range(c0, c0 + nc):
            n_c = end[c] - start[c]
            if n_c <= group_size or nchild[c] == 0:
                if run_s >= 0 and run_e - run_s + n_c <= group_size:
                    run_e = end[c]
                else:
                    if run_s >= 0:
                        gs[ng] = run_s
                        ge[ng] = run_e
                        ng += 1
                    run_s = start[c]
                    run_e = end[c]
            else:
                if run_s >= 0:
                    gs[ng] = run_s
                    ge[ng] = run_e
                    ng += 1
                    run_s = -1
                big[nbig] = c
                nbig += 1
        if run_s >= 0:
            gs[ng] = run_s
            ge[ng] = run_e
            ng += 1
        for b in range(nbig - 1, -1, -1):
            stack[sp] = big[b]
            sp += 1
    # the stack order visits big children after the small runs of their
    # parent: sort the groups by start so they stay in Morton order
    o = np.argsort(gs[:ng])
    return gs[:ng][o].copy(), ge[:ng][o].copy()


@numba.njit(parallel=True, cache=True)
def group_geometry(gstart, gend, x, y, z, rad, use_radii, out):
    """Per target group: bounding box lower (0-2) and upper (3-5) corner, max radius (6)."""
    for g in numba.prange(gstart.size):
        s = gstart[g]
        e = gend[g]
        x0 = x[s]
        x1 = x[s]
        y0 = y[s]
        y1 = y[s]
        z0 = z[s]
        z1 = z[s]
        rmax = 0.0
        for j in range(s, e):
            x0 = min(x0, x[j])
            x1 = max(x1, x[j])
            y0 = min(y0, y[j])
            y1 = max(y1, y[j])
            z0 = min(z0, z[j])
            z1 = max(z1, z[j])
            if use_radii:
                rmax = max(rmax, rad[j])
        out[g, 0] = x0
        out[g, 1] = y0
        out[g, 2] = z0
        out[g, 3] = x1
        out[g, 4] = y1
        out[g, 5] = z1
        out[g, 6] = rmax


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


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _far(xi, yi, zi, fb, nf):
    """Monopole, dipole and quadrupole terms of the far nodes in ``fb``."""
    # one 1-D view per row: plain unit-stride loads, so the loop vectorises
    cx = fb[0]
    cy = fb[1]
    cz = fb[2]
    cq = fb[3]
    cdx = fb[4]
    cdy = fb[5]
    cdz = fb[6]
    mxx = fb[7]
    mxy = fb[8]
    mxz = fb[9]
    myy = fb[10]
    myz = fb[11]
    mzz = fb[12]
    ax = 0.0
    ay = 0.0
    az = 0.0
    p = 0.0
    for f in range(nf):
        rx = xi - cx[f]
        ry = yi - cy[f]
        rz = zi - cz[f]
        r2 = rx * rx + ry * ry + rz * rz
        inv = 1.0 / np.sqrt(r2)
        inv2 = inv * inv
        inv3 = inv * inv2
        inv5 = inv3 * inv2
        qq = cq[f]
        dx = cdx[f]
        dy = cdy[f]
        dz = cdz[f]
        mrx = mxx[f] * rx + mxy[f] * ry + mxz[f] * rz
        mry = mxy[f] * rx + myy[f] * ry + myz[f] * rz
        mrz = mxz[f] * rx + myz[f] * ry + mzz[f] * rz
        dr = dx * rx + dy * ry + dz * rz
        rmr = rx * mrx + ry * mry + rz * mrz
        s = qq * inv3 + 3.0 * dr * inv5 + 2.5 * rmr * inv5 * inv2
        ax += s * rx - dx * inv3 - mrx * inv5
        ay += s * ry - dy * inv3 - mry * inv5
        az += s * rz - dz * inv3 - mrz * inv5
        p += qq * inv + dr * inv3 + 0.5 * rmr * inv5
    return ax, ay, az, p


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _far_octupole(xi, yi, zi, fb, nf):
    """Octupole terms of the far nodes in ``fb``.

    A loop of its own: with all 23 rows in one loop the registers spill and
    the sum runs four times slower than the two loops together.
    """
    cx = fb[0]
    cy = fb[1]
    cz = fb[2]
    oxxx = fb[13]
    oxxy = fb[14]
    oxxz = fb[15]
    oxyy = fb[16]
    oxyz = fb[17]
    oxzz = fb[18]
    oyyy = fb[19]
    oyyz = fb[20]
    oyzz = fb[21]
    ozzz = fb[22]
    ax = 0.0
    ay = 0.0
    az = 0.0
    p = 0.0
    for f in range(nf):
        rx = xi - cx[f]
        ry = yi - cy[f]
        rz = zi - cz[f]
        r2 = rx * rx + ry * ry + rz * rz
        inv = 1.0 / np.sqrt(r2)
        inv2 = inv * inv
        inv7 = inv2 * inv2 * inv2 * inv
        xx = rx * rx
        yy = ry * ry
        zz = rz * rz
        xy = 2.0 * rx * ry
        xz = 2.0 * rx * rz
        yz = 2.0 * ry * rz
        orx = oxxx[f] * xx + oxxy[f] * xy + oxxz[f] * xz + oxyy[f] * yy + oxyz[f] * yz + oxzz[f] * zz
        ory = oxxy[f] * xx + oxyy[f] * xy + oxyz[f] * xz + oyyy[f] * yy + oyyz[f] * yz + oyzz[f] * zz
        orz = oxxz[f] * xx + oxyz[f] * xy + oxzz[f] * xz + oyyz[f] * yy + oyzz[f] * yz + ozzz[f] * zz
        t = (rx * orx + ry * ory + rz * orz) * inv7
        s = (7.0 / 6.0) * t * inv2
        ax += s * rx - 0.5 * orx * inv7
        ay += s * ry - 0.5 * ory * inv7
        az += s * rz - 0.5 * orz * inv7
        p += t * (1.0 / 6.0)
    return ax, ay, az, p


@numba.njit(cache=True)
def _lists(nd, first, nchild, gc, g, theta, direct_max, octupole, fb, near, stack):
    """Interaction lists of target group ``g``: far nodes into ``fb``, near ranges.

    A node is taken as a multipole when every point of the group's bounding box is at least
    b / theta from its centre and no target sphere can overlap a source sphere
    in it; a leaf that fails is summed exactly. Returns (n_far, n_near, fb,
    near) (the buffers grow when full).
    """
    x0 = gc[g, 0]
    y0 = gc[g, 1]
    z0 = gc[g, 2]
    x1 = gc[g, 3]
    y1 = gc[g, 4]
    z1 = gc[g, 5]
    grad = gc[g, 6]
    nf = 0
    nl = 0
    sp = 1
    stack[0] = 0
    while sp > 0:
        sp -= 1
        k = stack[sp]
        # distance from the node's centre to the nearest point of the
        # group's bounding box: the closest any of its targets can be
        cx = nd[k, 0]
        cy = nd[k, 1]
        cz = nd[k, 2]
        dx = max(0.0, x0 - cx, cx - x1)
        dy = max(0.0, y0 - cy, cy - y1)
        dz = max(0.0, z0 - cz, cz - z1)
        dmin = np.sqrt(dx * dx + dy * dy + dz * dz)
        b = nd[k, 3]
        far = dmin * theta > b and dmin - b > max(nd[k, 14], grad)
        if far and nd[k, 15] > direct_max:
            if nf == fb.shape[1]:
                fb = _grow_rows(fb, 2 * nf, nf)
            for c in range(3):
                fb[c, nf] = nd[k, c]
            for c in range(10):
                fb[3 + c, nf] = nd[k, 4 + c]
            if octupole:
                for c in range(10):
                    fb[13 + c, nf] = nd[k, 16 + c]
            nf += 1
        elif far or nchild[k] == 0:
            if nl == near.size:
                near = _grow(near, 2 * nl)
            near[nl] = k
            nl += 1
        else:
            c0 = first[k]
            for c in range(nchild[k] - 1, -1, -1):
                stack[sp] = c0 + c
                sp += 1
    return nf, nl, fb, near


@numba.njit(parallel=True, fastmath=_FM, cache=True, error_model="numpy")
def evaluate_groups(nstart, nend, first, nchild, nd, sx, sy, sz, sq, sr, use_radii,
                    tx, ty, tz, tr, self_targets, gstart, gend, gc, theta, direct_max, octupole,
                    n_blocks, ex, ey, ez, phi, nzero):
    """Field and potential sums at the (Morton-sorted) targets, group by group.

    ``self_targets``: targets are the sorted sources themselves; the self pair
    is skipped by index (spheres) or by its zero distance (points, counted in
    ``nzero`` like any other coincidence).
    """
    ng = gstart.size
    for blk in numba.prange(n_blocks):
        g0 = (blk * ng) // n_blocks
        g1 = ((blk + 1) * ng) // n_blocks
        fb = np.empty((_FAR_ROWS, 512), np.float64)
        near = np.empty(256, np.int64)
        nb = np.empty((5, 4096), np.float64)
        noff = np.empty(256, np.int64)
        stack = np.empty(8 * 64, np.int64)
        for g in range(g0, g1):
            nf, nl, fb, near = _lists(nd, first, nchild, gc, g, theta, direct_max, octupole, fb, near, stack)
            if noff.size < near.size:
                noff = np.empty(near.size, np.int64)
            # gather the near particles into one contiguous run: one long
            # vectorised loop per target instead of many short ones
            tot = 0
            for m in range(nl):
                k = near[m]
                a = nstart[k]
                b = nend[k]
                noff[m] = tot
                if tot + (b - a) > nb.shape[1]:
                    nb = _grow_rows(nb, max(2 * nb.shape[1], tot + (b - a)), tot)
                for j in range(a, b):
                    nb[0, tot] = sx[j]
                    nb[1, tot] = sy[j]
                    nb[2, tot] = sz[j]
                    nb[3, tot] = sq[j]
                    if use_radii:
                        nb[4, tot] = sr[j]
                    tot += 1
            bx = nb[0]
            by = nb[1]
            bz = nb[2]
            bq = nb[3]
            br = nb[4]
            for i in range(gstart[g], gend[g]):
                xi = tx[i]
                yi = ty[i]
                zi = tz[i]
                ax, ay, az, p = _far(xi, yi, zi, fb, nf)
                if octupole:
                    fx, fy, fz, pp = _far_octupole(xi, yi, zi, fb, nf)
                    ax += fx
                    ay += fy
                    az += fz
                    p += pp
                if use_radii:
                    ri = tr[i]
                    fx, fy, fz, pp, c = _near_spheres(xi, yi, zi, ri, bx, by, bz, bq, br, 0, tot)
                    if self_targets:
                        # the self pair is in the sum (i's own leaf is near):
                        # at r = 0 it adds exactly zero field, and the
                        # uniformly charged sphere's own potential 3 q / (2 R),
                        # taken out here; with R = 0 it was counted as a
                        # coincidence instead. One loop instead of two split
                        # at i: the split loops ran 1.6x slower. (Coincident
                        # distinct spheres are legitimate and stay summed.)
                        if ri > 0.0:
                            pp -= 1.5 * sq[i] / ri
                        else:
                            c -= 1
                else:
                    fx, fy, fz, pp, c = _near_points(xi, yi, zi, bx, by, bz, bq, 0, tot)
                ax += fx
                ay += fy
                az += fz
                p += pp
                ex[i] = ax
                ey[i] = ay
                ez[i] = az
                phi[i] = p
                nzero[i] = c


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
