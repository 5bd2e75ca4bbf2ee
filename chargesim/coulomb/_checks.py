"""Input checks for the Coulomb front door, gathered in one place.

Every public evaluator call goes through :func:`prepare` once; the method
modules then trust their inputs (float64, C-contiguous, finite, right shapes).
"""
import math

import numpy as np

from .._validate import all_finite
from .._validate import positive  # noqa: F401  (re-exported for the method modules)


def _first_bad_row(arr):
    if all_finite(arr):  # fast path; else search the elements
        return None
    bad = ~np.isfinite(arr)
    if arr.ndim > 1:
        bad = bad.any(axis=tuple(range(1, arr.ndim)))
    idx = np.flatnonzero(bad)
    return int(idx[0]) if idx.size else None


def as_points(value, name, n=None):
    """Return ``value`` as a C-contiguous float64 array of shape (M, 3).

    Parameters
    ----------
    value : array_like
        Points, m.
    name : str
        Argument name used in error messages.
    n : int, optional
        Required number of rows.
    """
    try:
        arr = np.ascontiguousarray(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name} must be a numeric array of shape (N, 3): {exc}") from None
    if arr.ndim == 1 and arr.size == 0:
        arr = arr.reshape(0, 3)
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise ValueError(f"{name} must have shape (N, 3), got {arr.shape}")
    if n is not None and arr.shape[0] != n:
        raise ValueError(f"{name} has {arr.shape[0]} rows but {n} are required")
    bad = _first_bad_row(arr)
    if bad is not None:
        raise ValueError(f"{name} holds a non-finite value (NaN or inf) at index {bad}: {arr[bad].tolist()}")
    return arr


def as_values(value, name, n, *, nonnegative=False):
    """Return ``value`` as a C-contiguous float64 array of shape (n,).

    A scalar is broadcast to all n entries.
    """
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name} must be numeric: {exc}") from None
    if arr.ndim == 0:
        arr = np.full(n, float(arr))
    if arr.ndim != 1 or arr.shape[0] != n:
        raise ValueError(f"{name} must have shape ({n},) to match positions, got {arr.shape}")
    bad = _first_bad_row(arr)
    if bad is not None:
        raise ValueError(f"{name} holds a non-finite value (NaN or inf) at index {bad}")
    if nonnegative:
        neg = np.flatnonzero(arr < 0)
        if neg.size:
            raise ValueError(f"{name} must be >= 0; index {int(neg[0])} is {arr[neg[0]]!r}")
    return np.ascontiguousarray(arr)


def as_eps_r(value):
    """Check a relative permittivity: a finite float >= 1."""
    try:
        eps = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"eps_r must be a number >= 1, got {value!r}") from None
    if not math.isfinite(eps) or eps < 1.0:
        raise ValueError(f"eps_r must be a finite number >= 1 (relative permittivity), got {value!r}")
    return eps


def as_box(value):
    """Check a periodic box: three finite positive edge lengths, m."""
    try:
        box = np.asarray(value, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        raise ValueError(f"box must be three edge lengths in m, got {value!r}") from None
    if box.shape != (3,) or not np.all(np.isfinite(box)) or np.any(box <= 0):
        raise ValueError(f"box must be three finite positive edge lengths in m, got {value!r}")
    return box


def coincident(target, source, self_targets):
    """The error for a target that sits exactly on a point source."""
    what = "particle" if self_targets else "target"
    return ValueError(
        f"{what} {target} coincides with source particle {source}; the field of a point charge is "
        "infinite there (give radii= to treat particles as finite spheres)"
    )
