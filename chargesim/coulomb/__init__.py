"""The Coulomb front door: field, potential, energy and forces of point charges.

One contract, filled by each method module (``direct``, ``cutoff``, ``tree``,
``ewald``, ``mesh``). A method module provides

``OPTIONS``
    dict of the option names it takes beyond the common ones, with defaults.
``evaluate(sources, charges, targets, radii, *, need_field, need_potential, **options)``
    returns ``(field, potential)``: the sums *without* the factor k/eps_r, i.e.
    ``sum_j q_j (x_i - x_j)/r^3`` (C/m^2) and ``sum_j q_j / r`` (C/m), either
    None when not needed. ``targets=None`` means at each source, excluding
    itself. Inputs arrive checked (float64, C-contiguous, finite); options
    arrive with defaults filled in.

The front door checks inputs once, picks the method for ``method="auto"``,
applies k/eps_r, and derives forces (q_i E_i) and the energy
(1/2 sum_i q_i phi_i) from the same two sums, so no method repeats them.
"""
import importlib

import numpy as np

from ..physics.constants import COULOMB_K
from . import _checks

#: The method names the front door knows.
METHODS = ("direct", "cutoff", "tree", "ewald", "mesh")


def _module(method):
    return importlib.import_module(f"{__name__}.{method}")


def _choose(n_sources, n_targets, options):
    """The method ``method="auto"`` takes for these sizes and options.

    A cutoff or screening length asks for the cutoff method; a box asks for a
    periodic sum (Ewald for small N, mesh above its measured crossover); an
    open system takes the direct sum below the tree's measured crossover.
    """
    if "cutoff" in options or "screening_length" in options:
        return "cutoff"
    if "box" in options:
        ewald = _module("ewald")
        return "mesh" if n_sources >= ewald.MESH_CROSSOVER else "ewald"
    tree = _module("tree")
    return "tree" if min(n_sources, n_targets) >= tree.CROSSOVER else "direct"


def _resolve(method, n_sources, n_targets, options):
    if method == "auto":
        method = _choose(n_sources, n_targets, options)
        mod = _module(method)
        # auto may be handed options meant for another method (accuracy for an
        # exact method): drop those the chosen method does not take
        extra = {k: v for k, v in options.items() if k in mod.OPTIONS}
        dropped = set(options) - set(extra) - {"accuracy"}
        if dropped:
            raise ValueError(
                f"option(s) {sorted(dropped)} are not taken by method {method!r} (chosen by method='auto'); "
                f"it takes {sorted(mod.OPTIONS) or 'no options'}"
            )
        options = extra
    elif method not in METHODS:
        raise ValueError(f"unknown method {method!r}; allowed: 'auto', " + ", ".join(repr(m) for m in METHODS))
    else:
        mod = _module(method)
        unknown = set(options) - set(mod.OPTIONS)
        if unknown:
            raise ValueError(
                f"method {method!r} does not take option(s) {sorted(unknown)}; "
                f"it takes {sorted(mod.OPTIONS) or 'no options'}"
            )
    full = dict(mod.OPTIONS)
    full.update(options)
    return method, mod, full


def _prepare(positions, charges, targets, eps_r, radii):
    pos = _checks.as_points(positions, "positions")
    n = pos.shape[0]
    q = _checks.as_values(charges, "charges", n)
    tgt = None if targets is None else _checks.as_points(targets, "targets")
    eps = _checks.as_eps_r(eps_r)
    rad = None if radii is None else _checks.as_values(radii, "radii", n, nonnegative=True)
    return pos, q, tgt, eps, rad


def _evaluate(positions, charges, targets, eps_r, method, radii, options, need_field, need_potential):
    pos, q, tgt, eps, rad = _prepare(positions, charges, targets, eps_r, radii)
    m = pos.shape[0] if tgt is None else tgt.shape[0]
    _, mod, opts = _resolve(method, pos.shape[0], m, options)
    if pos.shape[0] == 0 or m == 0:
        return q, np.zeros((m, 3)), np.zeros(m), eps
    field, pot = mod.evaluate(pos, q, tgt, rad, need_field=need_field, need_potential=need_potential, **opts)
    return q, field, pot, eps


def field(positions, charges, targets=None, *, eps_r=1.0, method="auto", radii=None, **options):
    """Electric field of point (or finite spherical) charges.

    Parameters
    ----------
    positions : array_like, shape (N, 3)
        Source positions, m.
    charges : array_like, shape (N,)
        Source charges, C.
    targets : array_like, shape (M, 3), optional
        Points where the field is wanted, m. None: at each particle, from all
        the others (no self term).
    eps_r : float
        Relative permittivity of the medium, 1 (>= 1).
    method : str
        "auto", "direct", "cutoff", "tree", "ewald" or "mesh".
    radii : array_like, shape (N,), optional
        Particle radii, m: overlapping particles interact as uniformly charged
        spheres, so contact gives finite values.
    **options
        Method options (for example ``accuracy``, ``cutoff``, ``box``).

    Returns
    -------
    ndarray, shape (M, 3)
        Electric field, V/m.
    """
    _, f, _, eps = _evaluate(positions, charges, targets, eps_r, method, radii, options, True, False)
    return f * (COULOMB_K / eps)


def potential(positions, charges, targets=None, *, eps_r=1.0, method="auto", radii=None, **options):
    """Electric potential of the charges (zero at infinity for open systems).

    Parameters are those of :func:`field`.

    Returns
    -------
    ndarray, shape (M,)
        Potential, V.
    """
    _, _, p, eps = _evaluate(positions, charges, targets, eps_r, method, radii, options, False, True)
    return p * (COULOMB_K / eps)


def energy(positions, charges, *, eps_r=1.0, method="auto", radii=None, **options):
    """Total pair interaction energy, 1/2 sum_i q_i phi_i.

    Parameters are those of :func:`field` (no targets).

    Returns
    -------
    float
        Energy, J.
    """
    q, _, p, eps = _evaluate(positions, charges, None, eps_r, method, radii, options, False, True)
    return float(0.5 * (COULOMB_K / eps) * np.dot(q, p))


def forces(positions, charges, *, eps_r=1.0, method="auto", radii=None, **options):
    """Coulomb force on each particle from all the others.

    Parameters are those of :func:`field` (no targets).

    Returns
    -------
    ndarray, shape (N, 3)
        Force, N.
    """
    q, f, _, eps = _evaluate(positions, charges, None, eps_r, method, radii, options, True, False)
    return f * (q * (COULOMB_K / eps))[:, None]


def field_and_potential(positions, charges, targets=None, *, eps_r=1.0, method="auto", radii=None, **options):
    """Field (V/m, (M, 3)) and potential (V, (M,)) from one evaluation.

    For callers that need both (field grids, diagnostics); parameters are
    those of :func:`field`.
    """
    _, f, p, eps = _evaluate(positions, charges, targets, eps_r, method, radii, options, True, True)
    s = COULOMB_K / eps
    return f * s, p * s


def method_for(n_sources, n_targets=None, **options):
    """The method name ``method="auto"`` would use (for ``check`` and logs)."""
    return _choose(n_sources, n_sources if n_targets is None else n_targets, options)


def neighbors(positions, cutoff, *, box=None):
    """Pairs of particles closer than ``cutoff``.

    Parameters
    ----------
    positions : array_like, shape (N, 3)
        Positions, m.
    cutoff : float
        Distance, m (> 0).
    box : array_like of 3 floats, optional
        Periodic box edge lengths, m: distances by minimum image.

    Returns
    -------
    i, j : ndarray of int64
        Pair indices with i < j, in a stable order.
    """
    pos = _checks.as_points(positions, "positions")
    rc = _checks.positive(cutoff, "cutoff")
    bx = None if box is None else _checks.as_box(box)
    return _module("cells").pairs(pos, rc, bx)
