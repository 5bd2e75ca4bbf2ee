"""Reference checks against the outside world, runnable by any user.

``chargesim verify [--json] [--quick]`` runs the case table :data:`CASES`;
the test suite runs the same table (``tests/test_verify.py``), so the two can
never drift apart. Each case computes one number through the public API and
compares it with a value from a published source, a handbook, an analytic
result or a general-purpose reference library, within a stated tolerance.
"""
import json
import math
import sys
import time
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Case:
    """One reference check.

    Attributes
    ----------
    name : str
        Short identifier.
    compute : callable
        ``compute() -> float``: the value chargesim computes.
    reference : float
        The value from the source.
    source : str
        Where the reference value comes from ("from memory" where it is).
    tolerance : float
        Allowed relative difference (absolute when ``absolute``).
    units : str
        Units of the value.
    quick : bool
        Part of ``--quick``.
    absolute : bool
        Compare ``|computed - reference| <= tolerance`` instead of relative.
    """

    name: str
    compute: object
    reference: float
    source: str
    tolerance: float
    units: str = "1"
    quick: bool = True
    absolute: bool = False

    def run(self):
        """Compute the case and compare; returns a :class:`Outcome`."""
        t0 = time.perf_counter()
        try:
            value = float(self.compute())
            error = None
        except Exception as exc:  # a case that crashes is a failed case, reported
            value, error = math.nan, f"{type(exc).__name__}: {exc}"
        seconds = time.perf_counter() - t0
        if self.absolute:
            deviation = abs(value - self.reference)
        else:
            deviation = abs(value - self.reference) / abs(self.reference)
        passed = error is None and math.isfinite(value) and deviation <= self.tolerance
        return Outcome(self, value, deviation, passed, seconds, error)


@dataclass(frozen=True)
class Outcome:
    """The result of running one :class:`Case`."""

    case: Case
    computed: float
    deviation: float
    passed: bool
    seconds: float
    error: str = None

    def as_dict(self):
        """JSON-ready record: name, computed, reference, source, tolerance, passed, ..."""
        c = self.case
        return {
            "name": c.name,
            "computed": self.computed if math.isfinite(self.computed) else None,
            "reference": c.reference,
            "units": c.units,
            "source": c.source,
            "tolerance": c.tolerance,
            "tolerance_kind": "absolute" if c.absolute else "relative",
            "deviation": self.deviation if math.isfinite(self.deviation) else None,
            "passed": self.passed,
            "seconds": round(self.seconds, 3),
            "error": self.error,
        }


CASES = []

# Reference values are computed from the published CODATA 2018 epsilon_0, not
# from the package's own constant, so a wrong constant shows up everywhere.
# scipy may ship a newer CODATA release (2022: epsilon_0 differs by 7e-10
# relative), hence tolerances of 1e-9 on values that scale with k.
_EPS0_CODATA = 8.8541878128e-12
_K = 1.0 / (4.0 * math.pi * _EPS0_CODATA)


def case(name, reference, source, tolerance, units="1", quick=True, absolute=False):
    """Register ``compute`` as a reference case (decorator)."""

    def register(compute):
        CASES.append(Case(name, compute, reference, source, tolerance, units, quick, absolute))
        return compute

    return register


# --- constants -----------------------------------------------------------------

@case("epsilon_0", 8.8541878128e-12, "CODATA 2018", 1e-9, "F/m")
def _epsilon_0():
    from .physics.constants import EPSILON_0

    return EPSILON_0


@case("coulomb_constant", 8.9875517923e9, "CODATA 2018 (derived)", 1e-9, "N m^2/C^2")
def _coulomb_k():
    from .physics.constants import COULOMB_K

    return COULOMB_K


@case("elementary_charge", 1.602176634e-19, "SI 2019 definition (exact)", 0.0, "C")
def _elementary_charge():
    from .physics.constants import ELEMENTARY_CHARGE

    return ELEMENTARY_CHARGE


# --- fields of charge distributions ---------------------------------------------

_RING_R, _RING_Q, _RING_Z = 0.1, 5e-9, 0.05


@case(
    "ring_on_axis_field",
    _K * _RING_Q * _RING_Z / (_RING_Z**2 + _RING_R**2) ** 1.5,
    "Griffiths, Introduction to Electrodynamics: E = k Q z/(z^2 + R^2)^(3/2)",
    1e-9,
    "V/m",
)
def _ring():
    from . import field

    n = 4000
    phi = np.linspace(0.0, 2 * np.pi, n, endpoint=False)
    pos = np.stack([_RING_R * np.cos(phi), _RING_R * np.sin(phi), np.zeros(n)], axis=1)
    return field(pos, np.full(n, _RING_Q / n), [[0.0, 0.0, _RING_Z]], method="direct")[0, 2]


def _fibonacci_sphere(n, radius):
    i = np.arange(n) + 0.5
    z = 1 - 2 * i / n
    phi = np.pi * (1 + 5**0.5) * i
    s = np.sqrt(1 - z * z)
    return radius * np.stack([s * np.cos(phi), s * np.sin(phi), z], axis=1)


@case(
    "charged_sphere_outside_shells",
    _K * 1e-6 / 2.0**2,
    "Gauss's law (shell theorem): E = k Q/r^2 outside a uniformly charged sphere",
    1e-4,
    "V/m",
)
def _sphere_outside():
    from . import field

    # a ball of 1 m as 40 concentric shells of point charges, charge ~ r^2 dr
    radii = (np.arange(40) + 0.5) / 40
    pos = np.concatenate([_fibonacci_sphere(2000, r) for r in radii])
    q = np.repeat(radii**2 / np.sum(radii**2) * 1e-6 / 2000, 2000)
    return field(pos, q, [[0.0, 0.0, 2.0]], method="direct")[0, 2]


@case(
    "charged_sphere_inside",
    _K * 1e-9 * 0.004 / 0.01**3,
    "Gauss's law: E = k Q r/R^3 inside a uniformly charged sphere",
    1e-9,
    "V/m",
)
def _sphere_inside():
    from . import field

    return field([[0.0, 0.0, 0.0]], [1e-9], [[0.004, 0.0, 0.0]], radii=[0.01], method="direct")[0, 0]


_IMG_Q, _IMG_Z = 1e-12, 2e-3


@case(
    "image_force_grounded_plane",
    _K * _IMG_Q**2 / (4 * _IMG_Z**2),
    "method of images: F = k q^2/(4 z^2) toward a grounded plane",
    1e-9,
    "N",
)
def _image_force():
    from . import field
    from .sources import GroundedPlane

    pos = np.array([[0.0, 0.0, _IMG_Z]])
    q = np.array([_IMG_Q])
    ip, iq = GroundedPlane(point=(0, 0, 0), normal=(0, 0, 1)).images(pos, q)
    return -(_IMG_Q * field(ip, iq, pos, method="direct")[0, 2])


# --- capacitors and stored energy -------------------------------------------------

_PLATE_A, _PLATE_D, _PLATE_EPS, _PLATE_V = 0.01, 1e-3, 2.1, 1000.0


@case(
    "plate_capacitance",
    _EPS0_CODATA * _PLATE_EPS * _PLATE_A / _PLATE_D,
    "parallel-plate capacitor C = eps0 eps_r A/d (standard relation; CODATA 2018 eps0; PTFE 2.1, CRC)",
    1e-9,
    "F",
)
def _plate_c():
    from .physics import hazards

    return hazards.plate_capacitance(_PLATE_A, _PLATE_D, eps_r=_PLATE_EPS)


@case(
    "plate_energy_two_ways",
    0.5 * _EPS0_CODATA * _PLATE_EPS * _PLATE_A / _PLATE_D * _PLATE_V**2,
    "U = 1/2 C V^2 = Q^2/(2C), Q = C V (standard relations)",
    1e-9,
    "J",
)
def _plate_u():
    from .physics import hazards

    c = hazards.plate_capacitance(_PLATE_A, _PLATE_D, eps_r=_PLATE_EPS)
    q = hazards.charge_from_voltage(c, _PLATE_V)
    u1 = hazards.stored_energy(c, _PLATE_V)
    u2 = hazards.energy_from_charge(q, c)
    if abs(u1 - u2) > 1e-12 * u1:
        raise ArithmeticError(f"1/2 C V^2 = {u1} differs from Q^2/2C = {u2}")
    return u1


@case("person_10kV_energy", 5e-3, "human-body model 100 pF (ESD test standard, from memory): 1/2 C V^2 at 10 kV",
      1e-12, "J")
def _person():
    from .physics import hazards

    return hazards.stored_energy(hazards.HUMAN_BODY_CAPACITANCE, 10e3)


@case("sphere_1m_capacitance", 111e-12, "isolated sphere C = 4 pi eps0 R: 1 m sphere ~ 111 pF (standard relation)",
      3e-3, "F")
def _sphere_c():
    from .physics import hazards

    return hazards.sphere_capacitance(1.0)


# --- aerosol mechanics -------------------------------------------------------------

_HINDS = "Hinds, Aerosol Technology, appendix table (from memory)"


@case("slip_correction_0.1um", 2.9, _HINDS, 0.02)
def _cc01():
    from .physics import aerosol

    return aerosol.slip_correction(0.1e-6)


@case("slip_correction_1um", 1.15, _HINDS, 0.01)
def _cc1():
    from .physics import aerosol

    return aerosol.slip_correction(1e-6)


@case("slip_correction_10um", 1.016, _HINDS, 0.002)
def _cc10():
    from .physics import aerosol

    return aerosol.slip_correction(10e-6)


@case("settling_velocity_1um", 3.5e-5, _HINDS + "; 1000 kg/m^3, 20 degC", 0.03, "m/s")
def _vts():
    from .physics import aerosol

    return aerosol.settling_velocity(1e-6, 1000.0)


@case("relaxation_time_1um", 3.6e-6, _HINDS + "; 1000 kg/m^3, 20 degC", 0.03, "s")
def _tau():
    from .physics import aerosol

    return aerosol.relaxation_time(1e-6, 1000.0)


# --- motion ---------------------------------------------------------------------------

def _rutherford_tan_half(b_over_d0):
    """tan(theta/2) of a light charge passing a 1e12 times heavier one (Verlet, adaptive)."""
    from .motion import Coulomb, ParticleState, Simulation, StepControl, System
    from .physics.constants import COULOMB_K

    q, m, v0 = 1e-12, 1e-12, 1.0
    d0 = COULOMB_K * q * q / (m * v0**2)  # distance scale k q1 q2/(mu v0^2)
    b, length = b_over_d0 * d0, 4000 * d0
    rho = m / (math.pi / 6 * 1e-18)
    s = ParticleState()
    s.add([[-length, b, 0]], [[v0, 0, 0]], diameter=1e-6, density=rho, charge=q)
    s.add([[0, 0, 0]], diameter=1e-6, density=rho * 1e12, charge=q)
    system = System(np.random.default_rng(0), particles=s, drag=False, coulomb=Coulomb("direct", radii="none"))
    ctl = StepControl(tolerance=1e-6 * d0, dt_min=1e-6 * d0 / v0, dt_max=50 * d0 / v0)
    Simulation(system, dt=1e-3 * d0 / v0, integrator="verlet", step_control=ctl,
               diagnostics_every=0).run(t_end=2 * length / v0)
    v = s.velocity[0]
    return math.tan(math.atan2(v[1], v[0]) / 2)


@case("rutherford_angle", 1.0 / 2.0, "Rutherford scattering tan(theta/2) = k q1 q2/(mu v0^2 b), "
      "b = 2 k q1 q2/(mu v0^2) (any classical mechanics text)", 1e-3)
def _rutherford():
    # start and end 4000 distance scales away: the finite path shifts the angle by ~2.5e-4
    return _rutherford_tan_half(2.0)


_GAP, _LEN, _U, _W = 0.1, 1.0, 1.0, 0.05  # plate gap m, length m, gas m/s, migration m/s
_N_CHANNEL = 2000


def _plate_channel_efficiency(eddy):
    """Collection on one plate of a plug-flow channel (the other wall reflects)."""
    import numba

    from .motion import (Domain, FixedCharge, FixedSize, Inlet, Medium, PlaneCollector, Population,
                         RectangleArea, Simulation, System, UniformFlow)
    from .sources import UniformField

    d, e = 5e-6, 3e5
    med = Medium(flow=UniformFlow((_U, 0, 0)))
    q = -_W * 3 * math.pi * med.viscosity * d / (e * med.slip_correction(d))  # w = q E Cc/(3 pi mu d)
    pop = Population("dust", FixedSize(d), 1000.0, charge=FixedCharge(q))
    inlet = Inlet(pop, RectangleArea((0, _GAP / 2, 0.05), (0, _GAP, 0), (0, 0, 0.1)), rate=_N_CHANNEL / 0.2,
                  stop=0.2)
    plate = PlaneCollector("plate", (0, 0, 0), (0, 1, 0), lo=(0, -1, 0), hi=(_LEN, 1, 0.1))
    dom = Domain(lo=(-1, 0, 0), hi=(_LEN, _GAP, 0.1), kinds=("open", "reflecting", "periodic"))
    system = System(np.random.default_rng(5), medium=med, sources=[UniformField((0, e, 0))], domain=dom,
                    collectors=[plate], inlets=[inlet], coulomb=None, eddy_diffusivity=(0, eddy, 0))
    threads = numba.get_num_threads()
    numba.set_num_threads(1)  # the same result on any machine
    try:
        summary = Simulation(system, dt=1e-3, diagnostics_every=0).run(t_end=0.2 + _LEN / _U + 0.05)
    finally:
        numba.set_num_threads(threads)
    return summary["collection_efficiency"]


# binomial standard error of N = 2000 particles at eta ~ 0.5: 0.011; three of them
@case("laminar_plate_collection", min(1.0, _W * _LEN / (_U * _GAP)),
      "laminar plug flow, no mixing: eta = min(1, w L/(u s)) (analytic; Hinds, Aerosol Technology)",
      0.034, quick=False, absolute=True)
def _laminar():
    return _plate_channel_efficiency(0.0)


# strong mixing (Peclet w s/D = 0.1): three standard errors plus residual incomplete mixing
@case("deutsch_anderson_mixing", 1 - math.exp(-_W * _LEN / (_U * _GAP)),
      "complete lateral mixing: eta = 1 - exp(-w A/Q) (Deutsch 1922, 'Deutsch-Anderson')",
      0.04, quick=False, absolute=True)
def _deutsch():
    return _plate_channel_efficiency(0.05)


# --- charging -----------------------------------------------------------------------

_PAUTH_D, _PAUTH_E, _PAUTH_EPS = 5e-6, 400e3, 4.0


@case(
    "pauthenier_limit",
    3 * math.pi * _EPS0_CODATA * _PAUTH_D**2 * _PAUTH_E * _PAUTH_EPS / (_PAUTH_EPS + 2),
    "Pauthenier & Moreau-Hanot (1932); Hinds: q_s = 3 pi eps0 d^2 E eps_p/(eps_p + 2)",
    1e-9,
    "C",
)
def _pauthenier():
    from .physics import charging

    return charging.saturation_charge(_PAUTH_D, _PAUTH_E, _PAUTH_EPS)


# --- periodic sums ---------------------------------------------------------------------

_MADELUNG = 1.747564594633
_MADELUNG_SRC = "OEIS A085469; Kittel, Introduction to Solid State Physics"


def _rock_salt_madelung(method, accuracy):
    from . import energy
    from .physics.constants import COULOMB_K

    # conventional cube of edge 2 (nearest-neighbour distance 1): 8 ions
    pos = np.array([[i, j, k] for i in range(2) for j in range(2) for k in range(2)], dtype=float)
    q = np.where(pos.sum(axis=1) % 2 == 0, 1.0, -1.0)
    u = energy(pos, q, method=method, box=[2.0, 2.0, 2.0], accuracy=accuracy) / COULOMB_K
    return -u / 4.0  # 4 ion pairs per cell; E = -M k q^2 / r0 per pair


@case("madelung_rock_salt_ewald", _MADELUNG, _MADELUNG_SRC, 1e-8)
def _madelung_ewald():
    return _rock_salt_madelung("ewald", 1e-10)


@case("madelung_rock_salt_mesh", _MADELUNG, _MADELUNG_SRC, 1e-5)
def _madelung_mesh():
    return _rock_salt_madelung("mesh", 1e-6)


# --- layouts ------------------------------------------------------------------------------

_THOMSON = {2: 0.500000, 3: 1.732051, 4: 3.674234, 5: 6.474691, 6: 9.985281, 12: 49.165253}


def _thomson(n):
    from . import relax
    from .physics.constants import COULOMB_K

    rng = np.random.default_rng(100 + n)
    q = 1.0 / math.sqrt(COULOMB_K)  # k q^2 = 1: energies in the problem's units
    res = relax(rng.normal(size=(n, 3)), np.full(n, q), radius=1.0, restarts=3, rng=rng)
    if not res.converged:
        raise ArithmeticError(f"relaxation of {n} charges did not converge (residual {res.residual:.2e})")
    return res.energy


for _n, _e in _THOMSON.items():
    case(f"thomson_N{_n}", _e, "Thomson problem, unit sphere, k = q = 1: Wales & Ulker, Phys. Rev. B 74, "
         "212101 (2006)", 1e-6, "1", quick=_n <= 6, absolute=True)(lambda n=_n: _thomson(n))


# --- fast methods against the direct sum -------------------------------------------------

def _rms_error_against_direct(n, **options):
    from . import field

    rng = np.random.default_rng(12)
    # clustered mixed-sign charges: Gaussian blobs of different widths
    centres = rng.random((8, 3))
    pos = np.concatenate([c + rng.normal(scale=s, size=(n // 8, 3)) for c, s in zip(centres, np.geomspace(0.01, 0.2, 8))])
    q = rng.choice([-1.0, 1.0], size=pos.shape[0]) * rng.random(pos.shape[0])
    got = field(pos, q, **options)
    ref = field(pos, q, method="direct") if "cutoff" not in options else None
    if ref is None:
        # the plain cutoff sum equals the direct sum restricted to pairs within the
        # cutoff: reference pairs from scipy's cKDTree (general-purpose library)
        from scipy.spatial import cKDTree

        from .physics.constants import COULOMB_K

        i, j = cKDTree(pos).query_pairs(options["cutoff"], output_type="ndarray").T
        d = pos[i] - pos[j]
        w = (1.0 / np.einsum("ij,ij->i", d, d) ** 1.5)[:, None] * d * COULOMB_K
        ref = np.zeros_like(pos)
        for ax in range(3):
            ref[:, ax] = np.bincount(i, w[:, ax] * q[j], pos.shape[0]) - np.bincount(j, w[:, ax] * q[i], pos.shape[0])
    return float(np.sqrt(np.sum((got - ref) ** 2) / np.sum(ref**2)))


# the two checks of the fast methods at 16 000 charges are left out of --quick:
# on a fresh installation compiling their kernels alone takes about 35 s
@case("tree_vs_direct_rms_1e-3", 0.0, "direct sum (this package's exact method) as reference; asked accuracy 1e-3",
      1e-3, quick=False, absolute=True)
def _tree_rms():
    return _rms_error_against_direct(16_000, method="tree", accuracy=1e-3)


@case("cutoff_vs_restricted_direct", 0.0, "scipy.spatial.cKDTree pairs + numpy sum (general-purpose reference library)",
      1e-12, quick=False, absolute=True)
def _cutoff_rms():
    return _rms_error_against_direct(16_000, method="cutoff", cutoff=0.05)


# --- running and reporting -------------------------------------------------------------------

def run_cases(quick=False, cases=None):
    """Run the cases (all, or the quick ones) and return their outcomes in table order."""
    chosen = CASES if cases is None else cases
    return [c.run() for c in chosen if c.quick or not quick]


def _format(outcomes):
    rows = [["case", "computed", "reference", "units", "tolerance", "result", "source"]]
    for o in outcomes:
        c = o.case
        tol = f"{c.tolerance:.0e}" + ("" if c.absolute else " rel")
        rows.append([c.name, f"{o.computed:.10g}", f"{c.reference:.10g}", c.units, tol,
                     "pass" if o.passed else "FAIL" + (f" ({o.error})" if o.error else ""), c.source])
    widths = [max(len(r[i]) for r in rows) for i in range(6)]
    lines = []
    for k, r in enumerate(rows):
        lines.append("  ".join(x.ljust(w) for x, w in zip(r[:6], widths)) + "  " + r[6])
        if k == 0:
            lines.append("-" * (sum(widths) + 12 + len(r[6])))
    return "\n".join(lines)


def add_arguments(parser):
    """Command-line options of ``chargesim verify``."""
    parser.add_argument("--json", action="store_true", help="print a JSON list of case results")
    parser.add_argument("--quick", action="store_true", help="only the quick cases (under 20 s)")


def command(args):
    """Run ``chargesim verify``; exit code 0 when every case passes, else 1."""
    outcomes = run_cases(quick=args.quick)
    if args.json:
        print(json.dumps([o.as_dict() for o in outcomes], indent=1))
    else:
        print(_format(outcomes))
        failed = sum(not o.passed for o in outcomes)
        print(f"\n{len(outcomes) - failed} passed, {failed} failed")
    sys.stdout.flush()
    return 0 if all(o.passed for o in outcomes) else 1
