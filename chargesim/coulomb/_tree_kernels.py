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

and the node's multipole moments about c in a (n_nodes, NCOMP) array, in the
stored form of :mod:`chargesim.coulomb._multipoles` (symmetric trace-free
moments of orders 0..ORDER, scaled so that the generated far-field loops of
:mod:`chargesim.coulomb._far_terms` are plain sums of products).

Every target's sum runs in one thread in a fixed order (the traversal order),
so results are bitwise reproducible and do not depend on the thread count.
"""
import numba
import numpy as np

from ._far_terms import ROWS as _FAR_ROWS
from ._far_terms import far_sum

NODE_COLS = 6
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


@numba.njit(parallel=True, cache=True)
def leaf_moments(start, end, nchild, nd, x, y, z, q, parent, axis, raw):
    """Raw moments A_m = sum q_j s_j^m of every leaf about its centre (P2M), in ``raw``."""
    ncomp = raw.shape[1]
    for k in numba.prange(start.size):
        if nchild[k] != 0:
            continue
        mono = np.empty(ncomp)
        acc = np.zeros(ncomp)
        cx = nd[k, 0]
        cy = nd[k, 1]
        cz = nd[k, 2]
        for j in range(start[k], end[k]):
            sv = (x[j] - cx, y[j] - cy, z[j] - cz)
            mono[0] = q[j]
            for c in range(1, ncomp):
                mono[c] = mono[parent[c]] * sv[axis[c]]
            for c in range(ncomp):
                acc[c] += mono[c]
        for c in range(ncomp):
            raw[k, c] = acc[c]


@numba.njit(cache=True)
def upward_moments(first, nchild, nd, raw, parent, axis, shift_idx, shift_coef):
    """Raw moments of inner nodes from their children's (M2M), bottom up.

    Children are stored after their parent, so one pass over the nodes from
    the last to the first sees every child before its parent. The shift is
    the binomial theorem: A'_m = sum_{k <= m} C(m, k) A_k d^(m - k), d the
    child's centre minus the parent's.
    """
    ncomp = raw.shape[1]
    dm = np.empty(ncomp)
    for k in range(nd.shape[0] - 1, -1, -1):
        if nchild[k] == 0:
            continue
        for c in range(ncomp):
            raw[k, c] = 0.0
        for ch in range(first[k], first[k] + nchild[k]):
            dv = (nd[ch, 0] - nd[k, 0], nd[ch, 1] - nd[k, 1], nd[ch, 2] - nd[k, 2])
            dm[0] = 1.0
            for c in range(1, ncomp):
                dm[c] = dm[parent[c]] * dv[axis[c]]
            for r in range(shift_coef.size):
                raw[k, shift_idx[r, 0]] += shift_coef[r] * raw[ch, shift_idx[r, 1]] * dm[shift_idx[r, 2]]


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


@numba.njit(cache=True)
def _lists(nd, mom, first, nchild, gc, g, theta, direct_max, fb, near, mlist, stack):
    """Interaction lists of target group ``g``.

    A node goes, in this order of preference,
    - to the group's local expansion (``mlist``) when (b + r_g) < theta d, d
      the distance between the node's and the group's centres, b and r_g
      their radii (the Taylor series of both sides converges with ratio
      below theta), and no target sphere can overlap a source sphere;
    - to the per-target multipole list (``fb``) when every point of the
      group's bounding box is at least b / theta from the node's centre
      (and no spheres overlap);
    - to the near list when it is a leaf, or a small node that passes.
    Otherwise it is opened. Nodes with at most ``direct_max`` particles are
    summed exactly. Returns (n_far, n_near, n_local, fb, near, mlist) (the
    buffers grow when full).
    """
    x0 = gc[g, 0]
    y0 = gc[g, 1]
    z0 = gc[g, 2]
    x1 = gc[g, 3]
    y1 = gc[g, 4]
    z1 = gc[g, 5]
    grad = gc[g, 6]
    gx = 0.5 * (x0 + x1)
    gy = 0.5 * (y0 + y1)
    gz = 0.5 * (z0 + z1)
    rg = 0.5 * np.sqrt((x1 - x0) ** 2 + (y1 - y0) ** 2 + (z1 - z0) ** 2)
    nf = 0
    nl = 0
    nm = 0
    sp = 1
    stack[0] = 0
    while sp > 0:
        sp -= 1
        k = stack[sp]
        cx = nd[k, 0]
        cy = nd[k, 1]
        cz = nd[k, 2]
        b = nd[k, 3]
        overlap = max(nd[k, 4], grad)
        big = nd[k, 5] > direct_max
        d = np.sqrt((cx - gx) ** 2 + (cy - gy) ** 2 + (cz - gz) ** 2)
        if big and (b + rg) < theta * d and d - b - rg > overlap:
            if nm == mlist.size:
                mlist = _grow(mlist, 2 * nm)
            mlist[nm] = k
            nm += 1
            continue
        # distance from the node's centre to the nearest point of the
        # group's bounding box: the closest any of its targets can be
        dx = max(0.0, x0 - cx, cx - x1)
        dy = max(0.0, y0 - cy, cy - y1)
        dz = max(0.0, z0 - cz, cz - z1)
        dmin = np.sqrt(dx * dx + dy * dy + dz * dz)
        far = dmin * theta > b and dmin - b > overlap
        if far and big:
            if nf == fb.shape[1]:
                fb = _grow_rows(fb, 2 * nf, nf)
            for c in range(3):
                fb[c, nf] = nd[k, c]
            for c in range(mom.shape[1]):
                fb[3 + c, nf] = mom[k, c]
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
    return nf, nl, nm, fb, near, mlist


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _local_coefficients(nd, mm, mlist, nm, gx, gy, gz, am, dm, geo, didx, dcoef, rows, local_scale, loc):
    """Local expansion about (gx, gy, gz) of the nodes in ``mlist`` (M2L).

    Vectorised across the nodes: moments gathered into ``am`` (component,
    node), the derivatives of 1/|R| built by their recurrence in ``dm``, then
    one dot product over the nodes per translation term.
    """
    ncl = loc.size
    for f in range(nm):
        k = mlist[f]
        rx = gx - nd[k, 0]
        ry = gy - nd[k, 1]
        rz = gz - nd[k, 2]
        geo[0, f] = rx
        geo[1, f] = ry
        geo[2, f] = rz
        ir2 = 1.0 / (rx * rx + ry * ry + rz * rz)
        geo[3, f] = ir2
        dm[0, f] = np.sqrt(ir2)
        for c in range(ncl):
            am[c, f] = mm[k, c]
    rx = geo[0]
    ry = geo[1]
    rz = geo[2]
    ir2 = geo[3]
    for c in range(1, ncl):
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
    for c in range(ncl):
        loc[c] = 0.0
    for r in range(rows.shape[0]):
        an = am[rows[r, 1]]
        dk = dm[rows[r, 2]]
        acc = 0.0
        for f in range(nm):
            acc += an[f] * dk[f]
        loc[rows[r, 0]] += acc
    for c in range(ncl):
        loc[c] *= local_scale[c]


@numba.njit(parallel=True, fastmath=_FM, cache=True, error_model="numpy")
def evaluate_groups(nstart, nend, first, nchild, nd, mom, mm, sx, sy, sz, sq, sr, use_radii,
                    tx, ty, tz, tr, self_targets, gstart, gend, gc, theta, direct_max,
                    didx, dcoef, rows, local_scale, grad_rows, parent, axis,
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
        gx = np.empty(512)
        gy = np.empty(512)
        gz = np.empty(512)
        gi = np.empty(512)
        ncl = mm.shape[1]
        mlist = np.empty(256, np.int64)
        am = np.empty((ncl, 256))
        dm = np.empty((ncl, 256))
        geo = np.empty((4, 256))
        loc = np.empty(ncl)
        grd = np.empty((3, ncl))
        tm = np.empty(ncl)
        for g in range(g0, g1):
            nf, nl, nm, fb, near, mlist = _lists(nd, mom, first, nchild, gc, g, theta, direct_max, fb, near,
                                                 mlist, stack)
            cgx = 0.5 * (gc[g, 0] + gc[g, 3])
            cgy = 0.5 * (gc[g, 1] + gc[g, 4])
            cgz = 0.5 * (gc[g, 2] + gc[g, 5])
            if nm > 0:
                if am.shape[1] < nm:
                    am = np.empty((ncl, mlist.size))
                    dm = np.empty((ncl, mlist.size))
                    geo = np.empty((4, mlist.size))
                _local_coefficients(nd, mm, mlist, nm, cgx, cgy, cgz, am, dm, geo, didx, dcoef, rows,
                                    local_scale, loc)
                # gradient coefficients: E = -grad sum_k L_k t^k = -sum_j grd[:, j] t^j
                for a in range(3):
                    for c in range(ncl):
                        grd[a, c] = 0.0
                for r in range(grad_rows.shape[0]):
                    grd[grad_rows[r, 1], grad_rows[r, 2]] += grad_rows[r, 3] * loc[grad_rows[r, 0]]
            if gx.size < nf:
                gx = np.empty(fb.shape[1])
                gy = np.empty(fb.shape[1])
                gz = np.empty(fb.shape[1])
                gi = np.empty(fb.shape[1])
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
                ax, ay, az, p = far_sum(xi, yi, zi, fb, nf, gx, gy, gz, gi)
                if nm > 0:
                    # the group's local expansion at t = x_i - c_g (L2P)
                    tv = (xi - cgx, yi - cgy, zi - cgz)
                    tm[0] = 1.0
                    for c in range(1, ncl):
                        tm[c] = tm[parent[c]] * tv[axis[c]]
                    lp = 0.0
                    lx = 0.0
                    ly = 0.0
                    lz = 0.0
                    for c in range(ncl):
                        lp += loc[c] * tm[c]
                        lx += grd[0, c] * tm[c]
                        ly += grd[1, c] * tm[c]
                        lz += grd[2, c] * tm[c]
                    ax -= lx
                    ay -= ly
                    az -= lz
                    p += lp
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

