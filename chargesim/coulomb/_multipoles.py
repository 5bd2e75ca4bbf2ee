"""Cartesian multipole tables of the tree evaluator, and the generator of its far-field loops.

A node's charges q_j at s_j = x_j - c (c its geometric centre) are expanded in
symmetric trace-free (STF) Cartesian moments. With T_n = sum_j q_j STF(s_j^n)
(the trace-free part of the n-fold outer product) the potential at r = x - c,
|r| > max |s_j|, is the Legendre series written in tensors,

    phi(r) = sum_n (2n - 1)!! / n! * (T_n . r^n) / r^(2n+1),

since (2n - 1)!!/n! STF(s^n) . r^n = |s|^n |r|^n P_n(cos gamma)
(Jackson, Classical Electrodynamics, ch. 4; Thorne, Rev. Mod. Phys. 52,
299 (1980), eq. 2.11; from memory). Differentiating,

    E_n(r) = c_n [ (2n + 1) S r / r^(2n+3) - n V / r^(2n+1) ],
    V_a = (T_n . r^(n-1))_a,   S = r . V = T_n . r^n,   c_n = (2n - 1)!!/n!.

Components. A symmetric tensor of order n is stored by its distinct
components, one per multi-index m = (mx, my, mz) with mx + my + mz = n, in the
order of :func:`multi_indices`; orders 0..p follow one another (``OFFSET``).
The node moments kept for evaluation are ``W_m = c_n (n-1)!/m! T_m`` (order
0: the charge), so that ``V_a = sum_{m, m_a >= 1} m_a W_m r^(m - e_a)`` is a
plain sum of products, and ``S = r . V``.

Moments are built from raw moments ``A_m = sum_j q_j s_j^m`` (P2M at leaves,
then shifted to the parents' centres with the binomial theorem, M2M),
projected on the trace-free part order by order. The projection is the
orthogonal projection, in the tensors' full inner product
``<A, B> = sum_m n!/m! A_m B_m``, onto the kernel of the trace map; it is
computed here once at import (small dense matrices).

The numba loops that evaluate the far field are generated as source text
(straight-line code per order, vectorised over far nodes) into
``_far_terms.py`` by ``python -m chargesim.coulomb._multipoles``; a test keeps
that file equal to this generator's output.
"""
import math
from pathlib import Path

import numpy as np

#: Expansion order of the tree (highest STF order kept). The error of an
#: accepted node falls as theta^(ORDER + 1); see chargesim.coulomb.tree for
#: the measurements behind the choice.
ORDER = 5

#: Order of the local (Taylor) expansions about target groups: the
#: translation keeps the terms with |n| + |k| <= LOCAL_ORDER (n the source's
#: moment, k the local coefficient), the Taylor series of 1/|R + t - s|
#: truncated at that total order.
LOCAL_ORDER = 6

#: Orders evaluated together in one loop over far nodes (more rows in one
#: loop spill registers; see the generated file).
LOOP_ORDERS = ((0, 1, 2),) + tuple((n,) for n in range(3, ORDER + 1))


def multi_indices(n):
    """Multi-indices (mx, my, mz) of order n, mx descending then my descending."""
    return [(a, b, n - a - b) for a in range(n, -1, -1) for b in range(n - a, -1, -1)]


def n_components(p):
    """Number of stored components of orders 0..p."""
    return (p + 1) * (p + 2) * (p + 3) // 6


#: Offset of order n's first component.
OFFSET = [n_components(n - 1) if n > 0 else 0 for n in range(ORDER + 2)]
NCOMP = n_components(ORDER)
_ALL = [m for n in range(LOCAL_ORDER + 1) for m in multi_indices(n)]
_INDEX = {m: i for i, m in enumerate(_ALL)}


def _fact(m):
    return math.factorial(m[0]) * math.factorial(m[1]) * math.factorial(m[2])


def _double_fact(k):
    return 1 if k <= 0 else k * _double_fact(k - 2)


def _stf_projection(n):
    """Matrix of the trace-free projection on order-n components (raw -> STF)."""
    ms = multi_indices(n)
    size = len(ms)
    if n < 2:
        return np.eye(size)
    lower = multi_indices(n - 2)
    tr = np.zeros((len(lower), size))
    pos = {m: i for i, m in enumerate(ms)}
    for r, k in enumerate(lower):
        for a in range(3):
            m = list(k)
            m[a] += 2
            tr[r, pos[tuple(m)]] += 1.0
    w_inv = np.diag([_fact(m) / math.factorial(n) for m in ms])
    g = tr @ w_inv @ tr.T
    return np.eye(size) - w_inv @ tr.T @ np.linalg.solve(g, tr)


def _stored_scale(m):
    n = sum(m)
    if n == 0:
        return 1.0
    return _double_fact(2 * n - 1) / math.factorial(n) * math.factorial(n - 1) / _fact(m)


def raw_to_stored():
    """(NCOMP, NCOMP) block-diagonal matrix taking raw moments A to stored W."""
    out = np.zeros((NCOMP, NCOMP))
    for n in range(ORDER + 1):
        o = OFFSET[n]
        ms = multi_indices(n)
        scale = np.array([_stored_scale(m) for m in ms])
        out[o : o + len(ms), o : o + len(ms)] = scale[:, None] * _stf_projection(n)
    return out


def _components(p):
    return [m for n in range(p + 1) for m in multi_indices(n)]


def monomial_table(p=ORDER):
    """For each component c > 0 of orders <= p: (parent, axis) with s^m = s^parent * s_axis."""
    ncomp = n_components(p)
    parent = np.zeros(ncomp, np.int64)
    axis = np.zeros(ncomp, np.int64)
    for c, m in enumerate(_components(p)):
        if c == 0:
            continue
        a = 0 if m[0] else (1 if m[1] else 2)
        k = list(m)
        k[a] -= 1
        parent[c] = _INDEX[tuple(k)]
        axis[c] = a
    return parent, axis


def shift_table(p=ORDER):
    """Raw-moment shift A'_m = sum_{k <= m} C(m, k) A_k d^(m-k), orders <= p: rows (m, k, m - k, C(m, k))."""
    rows = []
    comps = _components(p)
    for m in comps:
        for k in comps:
            if all(k[a] <= m[a] for a in range(3)):
                d = tuple(m[a] - k[a] for a in range(3))
                coef = math.comb(m[0], k[0]) * math.comb(m[1], k[1]) * math.comb(m[2], k[2])
                rows.append((_INDEX[m], _INDEX[k], _INDEX[d], coef))
    t = np.array(rows, dtype=np.int64)
    return t[:, :3].copy(), t[:, 3].astype(np.float64)


def derivative_table(p=LOCAL_ORDER):
    """Recurrence of D_m = d^m (1/|R|) / dR^m, |m| <= p, for the local expansions.

    With a_m = D_m / m! (the Taylor coefficients of 1/|R + t|),
    |m| R^2 a_m = -(2|m| - 1) sum_i R_i a_(m - e_i) - (|m| - 1) sum_i a_(m - 2 e_i)
    (the recurrence of Duan & Krasny, J. Comput. Phys. 2001, for the Taylor
    coefficients of the Coulomb kernel, here in the sign convention of d/dR;
    from memory, checked in the tests against the direct sum); in D_m:

        R^2 D_m = sum_i [ -(2|m| - 1) m_i / |m| ] R_i D_(m - e_i)
                + sum_i [ -(|m| - 1) m_i (m_i - 1) / |m| ] D_(m - 2 e_i).

    Returns
    -------
    idx : int64 (ncomp, 6)
        Per component m > 0: indices of m - e_x, m - e_y, m - e_z, m - 2 e_x,
        m - 2 e_y, m - 2 e_z (0 where absent, with a zero coefficient).
    coef : float64 (ncomp, 6)
        The bracketed coefficients.
    """
    comps = _components(p)
    idx = np.zeros((len(comps), 6), np.int64)
    coef = np.zeros((len(comps), 6))
    for c, m in enumerate(comps):
        n = sum(m)
        for a in range(3):
            if m[a] >= 1:
                k = list(m)
                k[a] -= 1
                idx[c, a] = _INDEX[tuple(k)]
                coef[c, a] = -(2 * n - 1) * m[a] / n
            if m[a] >= 2:
                k = list(m)
                k[a] -= 2
                idx[c, 3 + a] = _INDEX[tuple(k)]
                coef[c, 3 + a] = -(n - 1) * m[a] * (m[a] - 1) / n
    return idx, coef


def m2l_table(p=LOCAL_ORDER):
    """Translation of moments to local coefficients, terms with |n| + |k| <= p.

    phi(c_t + t) = sum_k L_k t^k with L_k = (1/k!) sum_n Ahat_n D_(n+k)(R),
    Ahat_n = (-1)^|n| A_n / n! (A_n = sum_j q_j s_j^m the raw moments about
    the source centre, R the target centre minus the source centre): the
    Taylor series of 1/|R + t - s|, truncated at total order p.

    Returns
    -------
    rows : int64 (n_terms, 3)
        (k, n, n + k) component indices.
    moment_scale : float64 (ncomp,)
        (-1)^|n| / n!, taking A to Ahat.
    local_scale : float64 (ncomp,)
        1 / k!.
    """
    comps = _components(p)
    rows = []
    for k in comps:
        for n in comps:
            if sum(k) + sum(n) <= p:
                nk = tuple(k[a] + n[a] for a in range(3))
                rows.append((_INDEX[k], _INDEX[n], _INDEX[nk]))
    moment_scale = np.array([(-1) ** sum(m) / _fact(m) for m in comps])
    local_scale = np.array([1.0 / _fact(m) for m in comps])
    return np.array(rows, np.int64), moment_scale, local_scale


def gradient_table(p=LOCAL_ORDER):
    """Terms of the gradient of sum_k L_k t^k: rows (k, axis, index of k - e_axis, k_axis)."""
    rows = []
    for c, m in enumerate(_components(p)):
        for a in range(3):
            if m[a] >= 1:
                k = list(m)
                k[a] -= 1
                rows.append((c, a, _INDEX[tuple(k)], m[a]))
    return np.array(rows, np.int64)


# --------------------------------------------------------------------------
# generator of _far_terms.py

_HEADER = '''"""Far-field loops of the tree evaluator, generated: do not edit.

Made by ``python -m chargesim.coulomb._multipoles`` from the formulas in
:mod:`chargesim.coulomb._multipoles` (expansion order {order}). Each loop
sums, over the far nodes of a buffer ``fb`` (rows: centre x, y, z, then the
stored moments W of orders 0..{order}, one column per node), the field and
potential of some orders at one point, vectorised across nodes.
"""
import numba
import numpy as np

ORDER = {order}
#: Rows of a far-node buffer: the centre and the stored moments.
ROWS = {rows}

# fast-math without no-NaN/no-inf, as in the direct sum
_FM = {{"nsz", "arcp", "contract", "afn", "reassoc"}}
'''


def _mono_name(k):
    return "one" if k == (0, 0, 0) else "m" + "".join(str(v) for v in k)


def _w_name(m):
    return "w" + "".join(str(v) for v in m)


def _mono_lines(n_max):
    """Lines defining the monomials r^k, 1 <= |k| <= n_max, each from a lower one."""
    lines = []
    for n in range(1, n_max + 1):
        for k in multi_indices(n):
            a = 0 if k[0] else (1 if k[1] else 2)
            lo = list(k)
            lo[a] -= 1
            lo = tuple(lo)
            r = ("rx", "ry", "rz")[a]
            lines.append(f"{_mono_name(k)} = {r}" if lo == (0, 0, 0) else f"{_mono_name(k)} = {_mono_name(lo)} * {r}")
    return lines


def _loop_source(orders):
    name = "_far_" + "".join(str(n) for n in orders)
    body = []
    loads = []
    for n in orders:
        for m in multi_indices(n):
            loads.append(f"    {_w_name(m)} = fb[{3 + _INDEX[m]}]")
    body.append("        rx = gx[f]")
    body.append("        ry = gy[f]")
    body.append("        rz = gz[f]")
    body.append("        inv = gi[f]")
    body.append("        inv2 = inv * inv")
    top = max(orders)
    if top >= 2:
        body += ["        " + ln for ln in _mono_lines(top - 1)]
    # inverse odd powers needed: inv^(2n+1)
    body.append("        ip1 = inv")
    for n in range(1, top + 2):
        body.append(f"        ip{2 * n + 1} = ip{2 * n - 1} * inv2")
    for n in orders:
        if n == 0:
            body.append("        q0 = w000[f]")
            body.append("        g = q0 * ip3")
            body.append("        ax += g * rx")
            body.append("        ay += g * ry")
            body.append("        az += g * rz")
            body.append("        p += q0 * ip1")
            continue
        for a, comp in enumerate(("vx", "vy", "vz")):
            terms = []
            for m in multi_indices(n):
                if m[a] == 0:
                    continue
                k = list(m)
                k[a] -= 1
                k = tuple(k)
                w = f"{_w_name(m)}[f]"
                coef = "" if m[a] == 1 else f"{float(m[a])!r} * "
                mono = "" if k == (0, 0, 0) else f" * {_mono_name(k)}"
                terms.append(f"{coef}{w}{mono}")
            body.append(f"        {comp} = " + " + ".join(terms))
        body.append("        s = rx * vx + ry * vy + rz * vz")
        body.append(f"        g = {float(2 * n + 1)!r} * s * ip{2 * n + 3}")
        body.append(f"        h = {float(n)!r} * ip{2 * n + 1}")
        body.append("        ax += g * rx - h * vx")
        body.append("        ay += g * ry - h * vy")
        body.append("        az += g * rz - h * vz")
        body.append(f"        p += s * ip{2 * n + 1}")
    src = [
        "",
        "",
        '@numba.njit(inline="always", fastmath=_FM, error_model="numpy")',
        f"def {name}(gx, gy, gz, gi, fb, nf):",
        f'    """Order(s) {", ".join(str(n) for n in orders)} of the far nodes in ``fb`` (geometry in gx..gi)."""',
        "    # one 1-D view per row: unit-stride loads, so the loop vectorises",
        *loads,
        "    ax = 0.0",
        "    ay = 0.0",
        "    az = 0.0",
        "    p = 0.0",
        "    for f in range(nf):",
        *body,
        "    return ax, ay, az, p",
    ]
    return name, src


def generate():
    """Source text of ``_far_terms.py``."""
    out = [_HEADER.format(order=ORDER, rows=3 + NCOMP).rstrip("\n")]
    names = []
    for orders in LOOP_ORDERS:
        name, src = _loop_source(orders)
        names.append(name)
        out += src
    out += [
        "",
        "",
        '@numba.njit(inline="always", fastmath=_FM, error_model="numpy")',
        "def far_sum(xi, yi, zi, fb, nf, gx, gy, gz, gi):",
        '    """Field sum (C/m^2) and potential sum (C/m) of the far nodes in ``fb`` at one point.',
        "",
        "    gx, gy, gz, gi: scratch arrays of at least nf entries (the point minus each",
        "    node's centre, and the inverse distance: one square root per node, shared",
        "    by the loops of all orders).",
        '    """',
        "    cx = fb[0]",
        "    cy = fb[1]",
        "    cz = fb[2]",
        "    for f in range(nf):",
        "        rx = xi - cx[f]",
        "        ry = yi - cy[f]",
        "        rz = zi - cz[f]",
        "        gx[f] = rx",
        "        gy[f] = ry",
        "        gz[f] = rz",
        "        gi[f] = 1.0 / np.sqrt(rx * rx + ry * ry + rz * rz)",
    ]
    for i, name in enumerate(names):
        if i == 0:
            out.append(f"    ax, ay, az, p = {name}(gx, gy, gz, gi, fb, nf)")
        else:
            out.append(f"    bx, by, bz, bp = {name}(gx, gy, gz, gi, fb, nf)")
            out += ["    ax += bx", "    ay += by", "    az += bz", "    p += bp"]
    out.append("    return ax, ay, az, p")
    return "\n".join(out) + "\n"


TARGET = Path(__file__).with_name("_far_terms.py")

if __name__ == "__main__":
    TARGET.write_text(generate())
    print(f"wrote {TARGET}")
