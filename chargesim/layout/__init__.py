"""Layouts of charges: relaxation to equilibrium, energy and stability.

Where do charged beads on a sheet, charges on a sphere or in a trap settle,
how much energy does the arrangement hold, and is it stable?

* :func:`relax` -- minimize the energy on a constraint (sphere, plane, box
  walls, or none), with fixed particles and an applied field, from the given
  layout and from random restarts; returns a :class:`RelaxResult` with the
  positions, energy, residual forces and a :class:`Stability`.
* :func:`stability` -- the Hessian eigenvalues of any layout (also one that
  is not an equilibrium: Earnshaw's theorem in action).
* :func:`add_arguments`, :func:`command` -- ``chargesim relax LAYOUT.toml``.

Energies and forces go through the Coulomb front door
(:func:`chargesim.coulomb.field_and_potential`): ``method="auto"`` takes the
fast evaluators above their measured crossovers, and with ``box=`` the
periodic sums.

Convergence is measured by the relative residual
``max_i |F_tangential,i| / F0`` over the free particles, where
``F0 = k q_rms^2 / (eps_r d^2)`` is the force between two neighbours of rms
charge at the median nearest-neighbour distance d (or the rms applied-field
force, if larger). Tangential means: the part the constraint does not hold
(on a sphere or plane the in-surface part; at a box wall the components
along the wall).
"""
import numpy as np

from . import _relax, _stability, constraints
from ._relax import RelaxResult
from ._stability import DENSE_LIMIT, Stability
from ._system import AppliedField, LayoutSystem, check_inputs, nearest_neighbours, warn_not_converged
from .constraints import Bounds, Free, Plane, Sphere

_MINIMIZERS = ("auto", "lbfgs", "fire")


def _build(positions, charges, constraint, radius, centre, point, normal, bounds, fixed, box, eps_r,
           field, potential, method, coulomb_options):
    pos, q, mask, bx, eps = check_inputs(positions, charges, fixed, box, eps_r)
    con = constraints.make(constraint, radius=radius, centre=centre, point=point, normal=normal, bounds=bounds)
    applied = AppliedField(field, potential)
    if coulomb_options is not None and not isinstance(coulomb_options, dict):
        raise ValueError(f"coulomb_options must be a dict of Coulomb method options, got {coulomb_options!r}")
    opts = dict(coulomb_options or {})
    if method == "auto" and "accuracy" not in opts:
        # fast evaluators must resolve forces far below the asked residual
        opts["accuracy"] = 1e-10
    system = LayoutSystem(pos, q, con, mask, bx, eps, applied, method, opts)
    return system


def relax(positions, charges, *, constraint=None, radius=None, centre=None, point=None, normal=None,
          bounds=None, fixed=None, box=None, eps_r=1.0, field=None, potential=None, tolerance=1e-8,
          restarts=0, rng=None, method="auto", minimizer="auto", max_iterations=5000,
          coulomb_options=None, stability=True, stability_method="auto", soft_tolerance=1e-3,
          zero_tolerance=1e-6, n_modes=6):
    """Relax charges to an equilibrium of their energy and report its stability.

    Parameters
    ----------
    positions : array_like, shape (N, 3)
        Starting positions, m. Free particles are first put on the constraint
        (radially onto a sphere, orthogonally onto a plane); inside a box they
        must already lie within the bounds.
    charges : array_like, shape (N,) or scalar
        Charges, C.
    constraint : None, "none", "sphere", "plane", "box", or a constraint object
        Where the free particles may go (:class:`Sphere`, :class:`Plane`,
        :class:`Bounds`, :class:`Free`). None: a sphere if ``radius`` is
        given, a box if ``bounds`` is given, else free space.
    radius : float, optional
        Sphere radius, m.
    centre : array_like of 3 floats, optional
        Sphere centre, m (default the origin).
    point, normal : array_like of 3 floats, optional
        A point of the plane (m) and its normal (default the plane z = 0).
    bounds : (lower, upper), optional
        Opposite corners of the box the particles stay inside, m.
    fixed : array_like of int, or of bool with shape (N,), optional
        Particles that do not move (indices or a mask). They need not lie on
        the constraint (electrodes off a sheet, say).
    box : array_like of 3 floats, optional
        Periodic cell edges, m: the Coulomb sums become periodic (Ewald or
        mesh, through the front door). Not to be confused with ``bounds``.
    eps_r : float
        Relative permittivity of the medium (>= 1).
    field : None, array_like of 3 floats, or callable
        Applied field: a uniform vector (V/m), a callable ``field(points) ->
        (M, 3)`` in V/m, or an object with ``field`` (and ``potential``)
        methods.
    potential : callable, optional
        ``potential(points) -> (M,)`` in V for a callable field: needed for
        its energy and for L-BFGS (without it FIRE is used and the energy
        holds the pair part only, ``energy`` is NaN).
    tolerance : float
        Relative residual to reach (see the module docstring), default 1e-8.
    restarts : int
        Extra starts from random positions on the constraint (fixed particles
        stay); the lowest-energy converged result is returned.
    rng : numpy.random.Generator or int, optional
        Source of the random starts (required when ``restarts > 0``).
    method : str
        Coulomb method for the front door: "auto" (default), "direct",
        "tree", "ewald", "mesh"...
    minimizer : str
        "auto" (L-BFGS when the energy is known, else FIRE), "lbfgs", "fire".
    max_iterations : int
        Iteration budget per start.
    coulomb_options : dict, optional
        Options passed to the Coulomb front door (e.g. ``accuracy``). With
        ``method="auto"`` the default is ``accuracy=1e-10``.
    stability : bool
        Compute the Hessian eigenvalues at the result.
    stability_method : str
        "auto", "dense" or "lanczos" (see :func:`stability`).
    soft_tolerance, zero_tolerance : float
        Relative thresholds of soft and unstable modes (see :func:`stability`).
    n_modes : int
        Lowest modes to return (and eigenvalues for Lanczos).

    Returns
    -------
    RelaxResult
    """
    system = _build(positions, charges, constraint, radius, centre, point, normal, bounds, fixed, box, eps_r,
                    field, potential, method, coulomb_options)
    try:
        tol = float(tolerance)
    except (TypeError, ValueError):
        raise ValueError(f"tolerance must be a positive number, got {tolerance!r}") from None
    if not np.isfinite(tol) or tol <= 0:
        raise ValueError(f"tolerance must be a finite positive number, got {tolerance!r}")
    if isinstance(restarts, bool) or not isinstance(restarts, (int, np.integer)) or restarts < 0:
        raise ValueError(f"restarts must be an integer >= 0, got {restarts!r}")
    if isinstance(max_iterations, bool) or not isinstance(max_iterations, (int, np.integer)) or max_iterations < 1:
        raise ValueError(f"max_iterations must be an integer >= 1, got {max_iterations!r}")
    if minimizer not in _MINIMIZERS:
        raise ValueError(f"minimizer must be one of {', '.join(map(repr, _MINIMIZERS))}, got {minimizer!r}")
    if minimizer == "auto":
        minimizer = "lbfgs" if system.applied.has_energy else "fire"
    if minimizer == "lbfgs" and not system.applied.has_energy:
        raise ValueError("minimizer 'lbfgs' needs the energy: give potential= for a callable field, or use 'fire'")
    if restarts:
        if rng is None:
            raise ValueError("restarts need rng= (a seeded numpy.random.Generator or an int seed)")
        if isinstance(rng, (int, np.integer)) and not isinstance(rng, bool):
            rng = np.random.default_rng(int(rng))
        elif not isinstance(rng, np.random.Generator):
            raise ValueError(f"rng must be a numpy.random.Generator or an int seed, got {rng!r}")

    free = system.free
    x0 = system.constraint.prepare(system.x_start[free])
    starts = [x0]
    for _ in range(restarts):
        starts.append(system.constraint.random(free.size, rng, x0))
    outcomes = []
    total_it = 0
    for xs in starts:
        if free.size == 0:
            xf, it, msg = xs, 0, "no free particles"
        else:
            xf, it, msg = _relax.run_start(system, xs, tol=tol, minimizer=minimizer, maxiter=int(max_iterations))
        total_it += it
        out = _relax.finish(system, xf, tol)
        if out["escaped"].size:
            msg = (f"{out['escaped'].size} particle(s) ran away (first: {int(out['escaped'][0])}): "
                   "no equilibrium holds them")
        out["message"] = msg
        outcomes.append(out)

    def rank(o):
        e = o["energy"] if np.isfinite(o["energy"]) else o["pair"]
        return (not o["converged"], e)

    best_i = min(range(len(outcomes)), key=lambda i: rank(outcomes[i]))
    best = outcomes[best_i]
    stab = None
    if stability and not best["escaped"].size:  # no Hessian for particles at infinity
        stab = _stability.analyse(system, best["positions"], best["forces"], best["length"], best["stiffness"],
                                  method=stability_method, n_lowest=n_modes, zero_tolerance=zero_tolerance,
                                  soft_tolerance=soft_tolerance)
    if not best["converged"]:
        warn_not_converged(f"relax: not converged, residual {best['residual']:.3g} (tolerance {tol:g}): "
                           f"{best['message']}")
    return RelaxResult(
        positions=best["positions"],
        energy=float(best["energy"]),
        pair_energy=float(best["pair"]),
        field_energy=float(best["field"]),
        forces=best["forces"],
        residual_forces=best["tangential"],
        residual=float(best["residual"]),
        force_scale=float(best["force_scale"]),
        length_scale=float(best["length"]),
        nearest_distance=best["nearest"],
        iterations=int(total_it),
        evaluations=int(system.evaluations),
        converged=bool(best["converged"]),
        message=best["message"],
        start_energies=np.array([o["energy"] for o in outcomes]),
        best_start=int(best_i),
        stability=stab,
        method=system.method,
        minimizer=minimizer,
        constraint=system.constraint.describe(),
        fixed=system.fixed.copy(),
        escaped=best["escaped"],
    )


def stability(positions, charges, *, constraint=None, radius=None, centre=None, point=None, normal=None,
              bounds=None, fixed=None, box=None, eps_r=1.0, field=None, potential=None, method="auto",
              coulomb_options=None, stability_method="auto", n_modes=6, soft_tolerance=1e-3,
              zero_tolerance=1e-6):
    """Eigenvalues of the constrained Hessian of the energy at a layout.

    The layout need not be an equilibrium (then the eigenvalues describe the
    local curvature). Arguments are those of :func:`relax`; positions of free
    particles are put on the constraint first.

    Parameters
    ----------
    stability_method : str
        "auto": the dense Hessian up to :data:`DENSE_LIMIT` reduced
        coordinates (72 MB), else the ``n_modes`` lowest eigenvalues by
        Lanczos iteration on matrix-free Hessian-vector products (memory
        O(N)); "dense" or "lanczos" to force one.
    soft_tolerance, zero_tolerance : float
        A mode is unstable below ``-zero_tolerance * S`` and soft from there
        up to ``soft_tolerance * S``, with S = k q_rms^2 / (eps_r d^3) the
        stiffness of two neighbours at the median neighbour distance d
        (J/m^2).

    Returns
    -------
    Stability
    """
    system = _build(positions, charges, constraint, radius, centre, point, normal, bounds, fixed, box, eps_r,
                    field, potential, method, coulomb_options)
    x_all = system.full(system.constraint.prepare(system.x_start[system.free]))
    f = system.forces_only(x_all)
    length, _, stiff = system.scales(x_all)
    return _stability.analyse(system, x_all, f, length, stiff, method=stability_method, n_lowest=n_modes,
                              zero_tolerance=zero_tolerance, soft_tolerance=soft_tolerance)



from ._command import add_arguments, command, load_layout  # noqa: E402  (uses relax above)

__all__ = [
    "DENSE_LIMIT",
    "Bounds",
    "Free",
    "Plane",
    "RelaxResult",
    "Sphere",
    "Stability",
    "add_arguments",
    "command",
    "load_layout",
    "nearest_neighbours",
    "relax",
    "stability",
]
