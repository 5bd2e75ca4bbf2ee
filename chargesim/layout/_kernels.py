"""Numba kernels for the second derivatives of the Coulomb pair energy.

The pair energy ``U = sum_{i<j} q_i q_j / r_ij`` (the factor k/eps_r is
applied by the caller) has the 3 x 3 pair blocks

    A_ij = q_i q_j (3 r_hat r_hat^T - I) / r^3,   r = x_i - x_j,

so that d2U/dx_i dx_i = sum_{j != i} A_ij and d2U/dx_i dx_j = -A_ij. Two
kernels use them:

* :func:`hessian_vector` -- (H v)_i = sum_j A_ij (v_i - v_j) over all pairs,
  parallel over i, memory O(N): the matrix-free product behind Newton steps
  and Lanczos eigenvalues for large layouts.
* :func:`reduced_hessian` -- the dense Hessian written straight into the
  reduced (tangent-space) coordinates of the free particles: each particle
  carries an orthonormal frame ``basis[a]`` (columns) and the index of each
  kept frame axis in the reduced vector (-1 for an axis the constraint
  removes), so no 3N x 3N intermediate is built.

Each row's sum runs in one thread in a fixed order: results do not depend on
the thread count.
"""
import numba
import numpy as np


@numba.njit(parallel=True, cache=True)
def hessian_vector(x, q, v, out):
    """out[i] = sum_{j != i} A_ij (v_i - v_j), without the factor k/eps_r.

    Parameters
    ----------
    x : ndarray (N, 3)
        Positions, m.
    q : ndarray (N,)
        Charges, C.
    v : ndarray (N, 3)
        Displacement direction, m (zero rows for particles that do not move).
    out : ndarray (N, 3)
        Result, C^2/m^3 * m (written).
    """
    n = x.shape[0]
    for i in numba.prange(n):
        xi0 = x[i, 0]
        xi1 = x[i, 1]
        xi2 = x[i, 2]
        vi0 = v[i, 0]
        vi1 = v[i, 1]
        vi2 = v[i, 2]
        a0 = 0.0
        a1 = 0.0
        a2 = 0.0
        for j in range(n):
            if j == i:
                continue
            d0 = xi0 - x[j, 0]
            d1 = xi1 - x[j, 1]
            d2 = xi2 - x[j, 2]
            r2 = d0 * d0 + d1 * d1 + d2 * d2
            inv2 = 1.0 / r2
            s = q[i] * q[j] * inv2 / np.sqrt(r2)
            w0 = vi0 - v[j, 0]
            w1 = vi1 - v[j, 1]
            w2 = vi2 - v[j, 2]
            proj = 3.0 * (d0 * w0 + d1 * w1 + d2 * w2) * inv2
            a0 += s * (proj * d0 - w0)
            a1 += s * (proj * d1 - w1)
            a2 += s * (proj * d2 - w2)
        out[i, 0] = a0
        out[i, 1] = a1
        out[i, 2] = a2


@numba.njit(cache=True)
def _block(x, q, i, j, blk):
    d0 = x[i, 0] - x[j, 0]
    d1 = x[i, 1] - x[j, 1]
    d2 = x[i, 2] - x[j, 2]
    r2 = d0 * d0 + d1 * d1 + d2 * d2
    inv2 = 1.0 / r2
    s = q[i] * q[j] * inv2 / np.sqrt(r2)
    d = (d0, d1, d2)
    for a in range(3):
        for b in range(3):
            blk[a, b] = s * (3.0 * d[a] * d[b] * inv2 - (1.0 if a == b else 0.0))


@numba.njit(parallel=True, cache=True)
def reduced_hessian(x, q, free, basis, index, out):
    """Dense Hessian of the pair energy in reduced coordinates.

    Parameters
    ----------
    x : ndarray (N, 3)
        All positions, m (fixed particles act on the free ones).
    q : ndarray (N,)
        All charges, C.
    free : ndarray (F,) of int64
        Indices of the free particles.
    basis : ndarray (F, 3, 3)
        Orthonormal frame of each free particle, axes as columns.
    index : ndarray (F, 3) of int64
        Position of each frame axis in the reduced vector, -1 if removed.
    out : ndarray (m, m)
        Written with B^T H B (without the factor k/eps_r).
    """
    n = x.shape[0]
    nf = free.size
    for a in numba.prange(nf):
        i = free[a]
        blk = np.empty((3, 3))
        diag = np.zeros((3, 3))
        tmp = np.empty((3, 3))
        # the diagonal block sums over every other particle, fixed ones too
        for j in range(n):
            if j == i:
                continue
            _block(x, q, i, j, blk)
            for r in range(3):
                for c in range(3):
                    diag[r, c] += blk[r, c]
        for b in range(nf):
            if b == a:
                src = diag
                sign = 1.0
            else:
                _block(x, q, i, free[b], blk)
                src = blk
                sign = -1.0
            # tmp = basis[a]^T src basis[b]
            for r in range(3):
                for c in range(3):
                    acc = 0.0
                    for k in range(3):
                        for m in range(3):
                            acc += basis[a, k, r] * src[k, m] * basis[b, m, c]
                    tmp[r, c] = sign * acc
            for r in range(3):
                ir = index[a, r]
                if ir < 0:
                    continue
                for c in range(3):
                    ic = index[b, c]
                    if ic >= 0:
                        out[ir, ic] = tmp[r, c]
