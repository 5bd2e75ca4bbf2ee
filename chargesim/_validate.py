"""Checks of scalar and vector arguments, shared by every layer.

Each raises ``ValueError`` naming the argument; the lowest layer of the
package, importing nothing of chargesim.
"""
import math

import numba
import numpy as np


@numba.njit(cache=True)
def _zero_sum(a):
    # x - x is 0 for a finite x and NaN for inf or NaN; four sums run side by side
    s0 = s1 = s2 = s3 = 0.0
    m = a.size - a.size % 4
    for i in range(0, m, 4):
        s0 += a[i] - a[i]
        s1 += a[i + 1] - a[i + 1]
        s2 += a[i + 2] - a[i + 2]
        s3 += a[i + 3] - a[i + 3]
    for i in range(m, a.size):
        s0 += a[i] - a[i]
    return s0 + s1 + s2 + s3


def all_finite(arr):
    """True when every element of the float array is finite.

    One compiled pass summing x - x (0 when x is finite, NaN otherwise, so
    no sum of finite values can overflow): 0.1 ms for 3e5 values against
    2.5 ms for an element test, and ~1 us for small arrays, where numpy's
    sum in an ``errstate`` took 45 us (the run loop checks its particle
    arrays several times a step).
    """
    a = np.asarray(arr)
    if a.dtype != np.float64:
        a = a.astype(np.float64)
    return _zero_sum(a.reshape(-1)) == 0.0


def finite(value, name):
    """A finite float."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(v):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return v


def positive(value, name, *, allow_inf=False):
    """A float > 0 (finite unless ``allow_inf``)."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a positive number, got {value!r}") from None
    if math.isnan(v) or v <= 0 or (math.isinf(v) and not allow_inf):
        raise ValueError(f"{name} must be a {'' if allow_inf else 'finite '}positive number, got {value!r}")
    return v


def vector(value, name, *, nonzero=False):
    """Three finite floats as a float64 array of shape (3,)."""
    try:
        v = np.asarray(value, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be three numbers, got {value!r}") from None
    if v.shape != (3,) or not np.all(np.isfinite(v)):
        raise ValueError(f"{name} must be three finite numbers, got {value!r}")
    if nonzero and not np.any(v):
        raise ValueError(f"{name} must not be the zero vector")
    return v


def unit(value, name):
    """A non-zero vector scaled to length 1."""
    v = vector(value, name)
    n = float(np.linalg.norm(v))
    if not n > 0:
        raise ValueError(f"{name} must be a non-zero vector")
    return v / n
