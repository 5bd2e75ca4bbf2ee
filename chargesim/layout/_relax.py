"""Relaxation of a layout to equilibrium: L-BFGS or FIRE, then Newton polish.

Why three stages: L-BFGS (``scipy.optimize``, L-BFGS-B for box walls) gets
close fast but its line search needs energy differences, and near the
minimum these sink below the round-off of the total energy (E ~ N^2 pair
terms) long before the forces reach a relative residual of 1e-8. A few
Newton steps with the analytic constrained Hessian (see :mod:`._stability`)
converge quadratically from there and need only forces. FIRE (Bitzek et al.,
Phys. Rev. Lett. 97, 170201 (2006)) is the force-only minimizer, used when
the applied field has no known potential.
"""
import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import Bounds as _ScipyBounds
from scipy.optimize import minimize

from . import _stability
from ._system import nearest_neighbours


#: Relative residual at which the first minimizer round hands over to Newton.
HANDOFF = 1e-5


@dataclass
class RelaxResult:
    """A relaxed layout.

    Attributes
    ----------
    positions : ndarray (N, 3)
        Relaxed positions, m (fixed particles unchanged).
    energy : float
        Total energy, J: Coulomb pair energy plus the applied-field energy
        sum q_i phi(x_i) (NaN if the applied field has no known potential).
    pair_energy, field_energy : float
        The two parts, J.
    forces : ndarray (N, 3)
        Total force on each particle, N (on fixed particles: what holds them).
    residual_forces : ndarray (N, 3)
        Force components the constraint does not hold (tangential), N; zero
        rows for fixed particles.
    residual : float
        max_i |residual_forces_i| / force_scale over the free particles.
    force_scale : float
        k q_rms^2 / (eps_r d^2) at the median nearest-neighbour distance d, N
        (or the rms applied-field force if larger).
    length_scale : float
        Median nearest-neighbour distance d, m.
    nearest_distance : ndarray (N,)
        Distance of each particle to its nearest neighbour, m.
    iterations : int
        Minimizer iterations plus Newton steps, over all starts.
    evaluations : int
        Force evaluations, over all starts (including the Hessian's finite
        differences in a periodic box).
    converged : bool
        residual <= tolerance.
    message : str
        How the best start ended.
    start_energies : ndarray
        Final energy of each start (the given layout first), J.
    best_start : int
        Which start the result comes from (0: the given positions).
    stability : Stability or None
        Hessian eigenvalues at the result (None when not asked, or when
        particles ran away).
    method : str
        Coulomb method used.
    minimizer : str
        "lbfgs" or "fire".
    constraint : dict
        The constraint's parameters.
    fixed : ndarray (N,) of bool
        Which particles were held.
    escaped : ndarray of int
        Particles that ran away (farther than 100 layout sizes from the
        start: nothing holds them); the result then is not converged.
    """

    positions: np.ndarray
    energy: float
    pair_energy: float
    field_energy: float
    forces: np.ndarray
    residual_forces: np.ndarray
    residual: float
    force_scale: float
    length_scale: float
    nearest_distance: np.ndarray
    iterations: int
    evaluations: int
    converged: bool
    message: str
    start_energies: np.ndarray
    best_start: int
    stability: object
    method: str
    minimizer: str
    constraint: dict
    fixed: np.ndarray
    escaped: np.ndarray


class _Collision(Exception):
    pass


def _energy_gradient(system, c, unit, e0):
    free = system.free

    def fun(z):
        y = z * unit
        x_all = system.full(c.from_vars(y))
        try:
            pair, fe, f = system.evaluate(x_all)
        except ValueError as exc:
            if "coincides" not in str(exc):
                raise
            raise _Collision() from None
        g = c.pullback(y, -f[free]) * (unit / e0)
        return (pair + fe) / e0, g, x_all

    return fun


def _lbfgs_bounded(system, xf, length, fscale, tol, maxiter):
    """scipy's L-BFGS-B for box walls (the bounds are handled exactly there)."""
    c = system.constraint
    unit = 0.1 * length
    e0 = fscale * unit
    fun3 = _energy_gradient(system, c, unit, e0)

    def fun(z):
        try:
            f, g, _ = fun3(z)
        except _Collision:
            return 1e30, np.zeros_like(z)  # infinitely high: the line search backs off
        return f, g

    lo, hi = c.var_bounds(system.free.size)
    res = minimize(fun, c.to_vars(xf) / unit, jac=True, method="L-BFGS-B",
                   bounds=_ScipyBounds(lo / unit, hi / unit),
                   options={"maxiter": maxiter, "maxfun": 2 * maxiter, "ftol": 0.0,
                            "gtol": 0.5 * tol, "maxcor": 30, "maxls": 40})
    return c.from_vars(res.x * unit), int(res.nit), str(res.message)


def _lbfgs(system, xf, length, fscale, tol, maxiter, memory=20):
    """L-BFGS (two-loop recursion) with a per-particle step cap.

    The cap -- a quarter of each particle's nearest-neighbour distance per
    step -- keeps a particle from jumping over a fixed charge (a step-based
    minimizer can otherwise tunnel through the 1/r barrier into a region of
    lower energy beyond it). Variables are those of the constraint's
    parametrization, in units of d/10.
    """
    c = system.constraint
    if c.var_bounds(system.free.size) is not None:
        return _lbfgs_bounded(system, xf, length, fscale, tol, maxiter)
    unit = 0.1 * length
    e0 = fscale * unit
    fun = _energy_gradient(system, c, unit, e0)
    nf = system.free.size
    z = c.to_vars(xf) / unit
    dim = z.size // nf
    f, g, x_all = fun(z)
    hist_s, hist_y = [], []
    message = "L-BFGS stopped at max_iterations"
    it = 0
    for it in range(1, maxiter + 1):
        gmax = float(np.sqrt(np.max(np.sum(g.reshape(nf, dim) ** 2, axis=1))))
        if gmax <= 0.5 * tol:
            message = f"L-BFGS reached residual {tol:g}"
            break
        # two-loop recursion
        d = -g.copy()
        alphas = []
        for s_, y_ in zip(reversed(hist_s), reversed(hist_y)):
            a = float(s_ @ d) / float(y_ @ s_)
            alphas.append(a)
            d -= a * y_
        if hist_s:
            d *= float(hist_s[-1] @ hist_y[-1]) / float(hist_y[-1] @ hist_y[-1])
        for (s_, y_), a in zip(zip(hist_s, hist_y), reversed(alphas)):
            b = float(y_ @ d) / float(y_ @ s_)
            d += (a - b) * s_
        slope = float(g @ d)
        if slope >= 0:
            hist_s, hist_y = [], []
            d = -g
            slope = float(g @ d)
        if it % 5 == 1 and system.escaped(c.from_vars(z * unit)).size:
            message = "particles ran away: no equilibrium holds them"
            break
        if it % 5 == 1:
            # the cap needs only the scale of each particle's neighbourhood:
            # refresh it every few steps (a k-d tree costs as much as a force sum)
            near, _ = nearest_neighbours(x_all, system.box)
            cap = 0.2 * near[system.free] / unit
        step_len = np.sqrt(np.sum(d.reshape(nf, dim) ** 2, axis=1))
        with np.errstate(divide="ignore"):
            amax = float(np.min(np.where(step_len > 0, cap / step_len, np.inf)))
        alpha = min(1.0, amax) if hist_s else min(1.0 / max(gmax, 1e-300), amax)
        accepted = False
        for _ in range(30):
            zn = z + alpha * d
            try:
                fn, gn, xn = fun(zn)
            except _Collision:
                alpha *= 0.5
                continue
            armijo = fn <= f + 1e-4 * alpha * slope
            # below the round-off of the energy, judge by the gradient instead
            flat = abs(fn - f) <= 1e-13 * max(abs(f), 1.0) and float(gn @ gn) < float(g @ g)
            if armijo or flat:
                accepted = True
                break
            alpha *= 0.5
        if not accepted:
            if hist_s:
                hist_s, hist_y = [], []
                continue
            message = "L-BFGS line search failed"
            break
        s_, y_ = zn - z, gn - g
        if float(s_ @ y_) > 1e-12 * float(np.linalg.norm(s_) * np.linalg.norm(y_)):
            hist_s.append(s_)
            hist_y.append(y_)
            if len(hist_s) > memory:
                hist_s.pop(0)
                hist_y.pop(0)
        z, f, g, x_all = zn, fn, gn, xn
    return c.from_vars(z * unit), it, message


def _fire(system, xf, length, fscale, tol, maxiter):
    """FIRE in scaled units (length d, force F0, unit mass) with projection."""
    c = system.constraint
    free = system.free
    n_min, f_inc, f_dec, a_start, f_a = 5, 1.1, 0.5, 0.1, 0.99
    dt, dt_max = 0.05, 0.5
    alpha = a_start
    since = 0
    v = np.zeros_like(xf)
    x = xf.copy()
    it = 0
    for it in range(1, maxiter + 1):
        x_all = system.full(x)
        f = system.forces_only(x_all)
        frames = system.frames(x_all, f)
        ft = system.tangential(x_all, f, frames) / fscale
        fnorm = np.sqrt(np.sum(ft**2, axis=1))
        if fnorm.max() <= tol:
            return x, it, f"FIRE reached residual {tol:g}"
        if it % 5 == 1 and system.escaped(x).size:
            return x, it, "particles ran away: no equilibrium holds them"
        p = float(np.sum(ft * v))
        if p > 0:
            vn = math.sqrt(float(np.sum(v * v)))
            fn = math.sqrt(float(np.sum(ft * ft)))
            v = (1.0 - alpha) * v + alpha * vn * ft / fn
            since += 1
            if since > n_min:
                dt = min(dt * f_inc, dt_max)
                alpha *= f_a
        else:
            v[:] = 0.0
            dt *= f_dec
            alpha = a_start
            since = 0
        v = v + dt * ft
        # keep the velocity on the tangent space of the new point's frame
        basis, keep, _ = frames
        v = system.expand(system.reduce(v, basis, keep), basis, keep)
        step = dt * v
        biggest = float(np.sqrt(np.max(np.sum(step**2, axis=1))))
        if biggest > 0.1:
            step *= 0.1 / biggest
        x = c.project(x + step * length)
    return x, it, "FIRE stopped at max_iterations"


def _newton(system, xf, tol, max_steps=8):
    """Newton steps on the constraint until the residual is below tol/10."""
    c = system.constraint
    steps = 0
    x_all = system.full(xf)
    pair, fe, f = system.evaluate(x_all)
    energy = pair + fe
    length, fscale, stiff = system.scales(x_all)
    res = system.residual(x_all, f, fscale)
    for _ in range(max_steps):
        if res <= 0.1 * tol or res > 1e-2:
            break  # done, or too far from an equilibrium for Newton to be trusted
        model = _stability.HessianModel(system, x_all, f, length)
        if model.m == 0:
            break
        g = -system.reduce(f[system.free], model.basis, model.keep)
        triv = _stability.trivial_modes(system, x_all, model, length)
        w = _stability.newton_step(model, g, triv, stiff)
        dx = system.expand(w, model.basis, model.keep)
        biggest = float(np.sqrt(np.max(np.sum(dx**2, axis=1))))
        if not math.isfinite(biggest):
            break
        if biggest > 0.3 * length:
            dx *= 0.3 * length / biggest
        accepted = False
        for t in (1.0, 0.5, 0.25, 0.125):
            xn = c.project(xf + t * dx)
            xa = system.full(xn)
            pn, fen, fn = system.evaluate(xa)
            en = pn + fen
            rn = system.residual(xa, fn, fscale)
            no_rise = not math.isfinite(energy) or en <= energy + 1e-11 * abs(energy) + 1e-300
            if rn < res and no_rise:
                xf, x_all, f, energy, res = xn, xa, fn, en, rn
                accepted = True
                break
        steps += 1
        if not accepted:
            break
    return xf, steps


def run_start(system, x_start_free, *, tol, minimizer, maxiter):
    """Relax from one start: (x_free, iterations, message)."""
    x_all = system.full(x_start_free)
    length, fscale, _ = system.scales(x_all)
    xf = x_start_free
    iterations = 0
    message = ""
    for round_ in range(3):
        # the first round hands over to Newton at HANDOFF: from there Newton
        # converges quadratically where L-BFGS would still crawl linearly
        target = max(tol, HANDOFF) if round_ == 0 else tol
        if minimizer == "fire":
            xf, it, message = _fire(system, xf, length, fscale, target, maxiter - iterations)
        else:
            xf, it, message = _lbfgs(system, xf, length, fscale, target, maxiter - iterations)
        iterations += it
        xf, ns = _newton(system, xf, tol)
        iterations += ns
        if ns:
            message += f"; then {ns} Newton step(s)"
        x_all = system.full(xf)
        length, fscale, _ = system.scales(x_all)
        f = system.forces_only(x_all)
        if system.residual(x_all, f, fscale) <= tol or iterations >= maxiter or system.escaped(xf).size:
            break
    return xf, iterations, message


def finish(system, xf, tol):
    """Energy, forces and residual of a final free configuration (a dict)."""
    x_all = system.full(xf)
    if system.box is not None and system.constraint.kind == "none":
        x_all[system.free] = np.mod(x_all[system.free], system.box)
    pair, fe, f = system.evaluate(x_all)
    length, fscale, stiff = system.scales(x_all)
    tang = np.zeros_like(x_all)
    if system.free.size:
        tang[system.free] = system.tangential(x_all, f)
    res = float(np.sqrt(np.max(np.sum(tang**2, axis=1)))) / fscale if system.free.size else 0.0
    if not system.applied.has_energy:
        fe = float("nan")
    d, _ = nearest_neighbours(x_all, system.box)
    gone = system.escaped(x_all[system.free])
    return {"positions": x_all, "escaped": system.free[gone], "pair": pair, "field": fe, "energy": pair + fe,
            "forces": f,
            "tangential": tang, "residual": res, "length": length, "force_scale": fscale,
            "stiffness": stiff, "nearest": d, "converged": bool(res <= tol and gone.size == 0)}
