"""Cartesian expansion tables of the tree evaluator (the fast multipole method).

For charges q_j at s_j = y_j - c_s about a source centre c_s and a target
x = c_t + t about a target centre c_t, with R = c_t - c_s,

    1/|x - y_j| = 1/|R + t - s_j| = sum_m D_m(R) (t - s_j)^m / m!,

D_m = d^m (1/|R|) / dR^m (multi-indices m = (mx, my, mz), m! = mx! my! mz!).
Split (t - s)^m / m! = sum_{n + k = m} t^k/k! (-s)^n/n! and keep the terms
of total order |n| + |k| <= ORDER: the potential of a source node near a
target node is the polynomial

    phi(c_t + t) = sum_k L_k t^k,   L_k = (1/k!) sum_n Ahat_n D_(n+k)(R),

with the node's raw moments A_n = sum_j q_j s_j^n and Ahat_n = (-1)^|n|
A_n / n! (M2L). Raw moments are taken from the particles at the leaves and
shifted to the parents' centres with the binomial theorem (M2M); local
expansions are shifted to the children's centres the same way (L2L), and
evaluated with their gradient at the targets (L2P). The truncation error of
a pair falls as ((r_t + r_s)/|R|)^(ORDER+1) for the potential, one power less
for the field (r_t, r_s the radii of the two nodes).

Components. Multi-indices of order n are stored in the order of
:func:`multi_indices`, orders 0..ORDER one after the other. Each table here is
built once at import, as small integer and float arrays for the numba
kernels.
"""
import math
import numpy as np

#: Total order of the translations (|n| + |k| <= ORDER): the field error of
#: an accepted pair falls as theta^ORDER. Measured on 1e5 uniform mixed-sign
#: charges, one thread, at equal error (~6e-5): order 6 1.29 s (theta
#: 0.468), 7 1.04 s (theta 0.55), 8 1.08 s (theta ~0.58): higher orders cost
#: more per translation but let theta grow, which shrinks the exact near
#: field. See chargesim.coulomb.tree for the calibration.
ORDER = 7


def multi_indices(n):
    """Multi-indices (mx, my, mz) of order n, mx descending then my descending."""
    return [(a, b, n - a - b) for a in range(n, -1, -1) for b in range(n - a, -1, -1)]


def n_components(p):
    """Number of stored components of orders 0..p."""
    return (p + 1) * (p + 2) * (p + 3) // 6


_ALL = [m for n in range(ORDER + 1) for m in multi_indices(n)]
_INDEX = {m: i for i, m in enumerate(_ALL)}


def _fact(m):
    return math.factorial(m[0]) * math.factorial(m[1]) * math.factorial(m[2])


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


def exponent_table(p=ORDER):
    """idx[a, b, c] = stored component of s^(a, b, c) for a + b + c <= p, else -1."""
    idx = np.full((p + 1, p + 1, p + 1), -1, np.int64)
    for c, m in enumerate(_components(p)):
        idx[m] = c
    return idx


def binomial_table(p=ORDER):
    """C[a, b] = binomial coefficient (a choose b) for 0 <= b <= a <= p (0 above a), float64: the
    one-axis factors of the moment and local-expansion shifts (M2M, L2L)."""
    return np.array([[math.comb(a, b) for b in range(p + 1)] for a in range(p + 1)], dtype=np.float64)


def derivative_table(p=ORDER):
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


def m2l_table(p=ORDER):
    """Translation of moments to local coefficients, terms with |n| + |k| <= p.

    phi(c_t + t) = sum_k L_k t^k with L_k = G_k / k!, G_k = sum_n Ahat_n
    D_(n+k)(R), Ahat_n = (-1)^|n| A_n / n! (A_n = sum_j q_j s_j^m the raw
    moments about the source centre, R the target centre minus the source
    centre): the Taylor series of 1/|R + t - s|, truncated at total order p.

    1/|R| is harmonic, so D_(m + 2e_z) = -D_(m + 2e_x) - D_(m + 2e_y). Folding
    every moment with n_z >= 2 onto n - 2e_z + 2e_x and n - 2e_z + 2e_y leaves
    the 2j + 1 "reduced" moments of each order j (n_z <= 1) with the same
    G; and G itself is harmonic (sum_i G_(k + 2e_i) = 0, also after the
    truncation, whose range of n is the same for the three terms), so only
    G_k with k_z <= 1 are summed and the others follow from them. For p = 6
    that is 532 terms instead of 924 (876 instead of 1716 for p = 7).

    Returns
    -------
    rows : int64 (n_terms, 3)
        (k, position of n among the reduced moments, n + k) component indices.
    fold : float64 (n_reduced, ncomp)
        Takes Ahat (all components) to the reduced moments.
    unfold : int64 (n, 3)
        (k, k - 2e_z + 2e_x, k - 2e_z + 2e_y) for every k with k_z >= 2, in
        increasing k_z: G_k = -G_a - G_b.
    deriv : int64
        Components m > 0 with m_z <= 2 (the derivatives the terms use), in
        order.
    moment_scale : float64 (ncomp,)
        (-1)^|n| / n!, taking A to Ahat.
    local_scale : float64 (ncomp,)
        1 / k!.
    """
    comps = _components(p)
    ncomp = len(comps)
    reduced = [c for c, m in enumerate(comps) if m[2] <= 1]
    pos = {c: i for i, c in enumerate(reduced)}
    t = np.eye(ncomp)
    for c in sorted(range(ncomp), key=lambda c: -comps[c][2]):
        m = comps[c]
        if m[2] < 2:
            continue
        for a in (0, 1):
            k = list(m)
            k[2] -= 2
            k[a] += 2
            t[_INDEX[tuple(k)], :] -= t[c, :]
        t[c, :] = 0.0
    fold = t[reduced, :]
    rows = []
    for k in comps:
        if k[2] > 1:
            continue
        for c in reduced:
            n = comps[c]
            if sum(k) + sum(n) <= p:
                nk = tuple(k[a] + n[a] for a in range(3))
                rows.append((_INDEX[k], pos[c], _INDEX[nk]))
    unfold = []
    for k in sorted((m for m in comps if m[2] >= 2), key=lambda m: m[2]):
        ka = (k[0] + 2, k[1], k[2] - 2)
        kb = (k[0], k[1] + 2, k[2] - 2)
        unfold.append((_INDEX[k], _INDEX[ka], _INDEX[kb]))
    deriv = np.array([c for c, m in enumerate(comps) if c > 0 and m[2] <= 2], np.int64)
    moment_scale = np.array([(-1) ** sum(m) / _fact(m) for m in comps])
    local_scale = np.array([1.0 / _fact(m) for m in comps])
    return (np.array(rows, np.int64), fold, np.array(unfold, np.int64).reshape(-1, 3), deriv,
            moment_scale, local_scale)


def orders(p=ORDER):
    """Total order |m| of each component (all of them) and of each reduced moment (m_z <= 1), int64."""
    comps = _components(p)
    return (np.array([sum(m) for m in comps], np.int64),
            np.array([sum(m) for m in comps if m[2] <= 1], np.int64))


def block_rows(rows, ncomp, width=4):
    """M2L terms grouped by moment, ``width`` local coefficients at a time.

    One pass over the nodes then loads the moment once for ``width``
    products. Rows (n, k_1..k_width, (n+k)_1..(n+k)_width); a block short
    of ``width`` terms is padded with the slot ``ncomp`` (a scratch
    coefficient that is never read) and a repeated n + k.
    """
    out = []
    for n in np.unique(rows[:, 1]):
        sel = rows[rows[:, 1] == n]
        for lo in range(0, sel.shape[0], width):
            part = sel[lo : lo + width]
            ks = list(part[:, 0]) + [ncomp] * (width - part.shape[0])
            nks = list(part[:, 2]) + [part[0, 2]] * (width - part.shape[0])
            out.append([n] + ks + nks)
    return np.array(out, np.int64)


def gradient_table(p=ORDER):
    """Terms of the gradient of sum_k L_k t^k: rows (k, axis, index of k - e_axis, k_axis)."""
    rows = []
    for c, m in enumerate(_components(p)):
        for a in range(3):
            if m[a] >= 1:
                k = list(m)
                k[a] -= 1
                rows.append((c, a, _INDEX[tuple(k)], m[a]))
    return np.array(rows, np.int64)
