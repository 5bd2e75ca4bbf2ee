"""Collection between plates (laminar and mixed), accounting, checkpoints."""
import math

import numba
import numpy as np
import pytest

from chargesim.analysis import collection_efficiency, grade_efficiency
from chargesim.motion import (
    ChargingZone,
    Coulomb,
    CylinderCollector,
    Domain,
    FixedCharge,
    FixedSize,
    Inlet,
    LognormalSize,
    MemoryRecorder,
    Medium,
    ParticleState,
    PlaneCollector,
    Population,
    RectangleArea,
    SaturationCharge,
    Simulation,
    SphereCollector,
    StepControl,
    System,
    UniformFlow,
)
from chargesim.motion.recorder import EVENT_FIELDS
from chargesim.physics.constants import STANDARD_GRAVITY
from chargesim.sources import GroundedPlane, UniformField


@pytest.fixture(autouse=True)
def one_thread():
    old = numba.get_num_threads()
    numba.set_num_threads(1)
    yield
    numba.set_num_threads(old)


GAP, LENGTH, U, FIELD, D = 0.1, 1.0, 1.0, 3e5, 5e-6


def _channel(w, n, *, eddy=0.0, seed=1):
    """Plug flow U along x between a collecting plate at y = 0 (length L) and
    a reflecting wall at y = GAP; particles enter uniformly over the gap and
    drift toward the plate at the migration velocity w."""
    med = Medium(flow=UniformFlow((U, 0, 0)))
    q = -w * 3 * math.pi * med.viscosity * D / (FIELD * med.slip_correction(D))
    pop = Population("dust", FixedSize(D), 1000.0, charge=FixedCharge(q), weight=1e6)
    inlet = Inlet(pop, RectangleArea((0, GAP / 2, 0.05), (0, GAP, 0), (0, 0, 0.1)), rate=n / 0.2, stop=0.2)
    plate = PlaneCollector("plate", (0, 0, 0), (0, 1, 0), lo=(0, -1, 0), hi=(LENGTH, 1, 0.1))
    dom = Domain(lo=(-1, 0, 0), hi=(LENGTH, GAP, 0.1), kinds=("open", "reflecting", "periodic"),
                 outlet_names={"x+": "outlet", "x-": "upstream"})
    sys_ = System(np.random.default_rng(seed), medium=med, sources=[UniformField((0, FIELD, 0))], domain=dom,
                  collectors=[plate], inlets=[inlet], coulomb=None, eddy_diffusivity=(0, eddy, 0))
    return Simulation(sys_, dt=1e-3, diagnostics_every=0)


def _run_through(sim):
    rec = MemoryRecorder(keep_frames=False)
    summary = sim.run(t_end=0.2 + LENGTH / U + 0.05, recorder=rec)
    return summary, rec


def test_laminar_plug_flow_collection_between_plates():
    # eta = min(1, w L/(u s)) with no mixing (analytic; Hinds, Aerosol Technology)
    n, w = 4000, 0.05
    summary, rec = _run_through(_channel(w, n))
    eta = summary["collection_efficiency"]
    expect = min(1.0, w * LENGTH / (U * GAP))
    sigma = math.sqrt(expect * (1 - expect) / n)  # binomial, statistical error
    assert summary["n_emitted"] == n and summary["n_alive"] == 0
    assert abs(eta - expect) < 3 * sigma
    # deposits lie on the plate, at its surface, within its length
    dep = rec.all_deposits
    assert set(dep) == set(EVENT_FIELDS)
    assert np.all(dep["surface"] == "plate") and np.allclose(dep["position"][:, 1], 0.0)
    assert np.all((dep["position"][:, 0] >= 0) & (dep["position"][:, 0] <= LENGTH))
    # the deposition density falls off nowhere along a laminar plate: the
    # first and second halves of the plate get equal shares
    first = np.mean(dep["position"][:, 0] < LENGTH / 2)
    assert first == pytest.approx(0.5, abs=4 * math.sqrt(0.25 / dep["id"].size))
    assert collection_efficiency(dep, summary["emitted_mass"]) == pytest.approx(eta, rel=1e-12)


def test_laminar_collection_is_complete_beyond_w_l_over_u_s_of_one():
    # eta = min(1, w L/(u s)) = 1 for w L/(u s) = 1.5 (analytic; Hinds)
    summary, _ = _run_through(_channel(0.15, 500))
    assert summary["n_deposited"] == summary["n_emitted"] == 500
    assert summary["collection_efficiency"] == pytest.approx(1.0, rel=1e-12)


def test_strong_lateral_mixing_approaches_deutsch_anderson():
    # eta = 1 - exp(-w A/Q) (Deutsch 1922), A/Q = L/(u s) for this channel,
    # in the limit of complete lateral mixing. Eddy diffusivity 0.05 m^2/s:
    # Peclet number w s/D = 0.1 and mixing time s^2/D = 0.2 s against a
    # residence of 1 s. Stated tolerance 0.025: three binomial standard
    # errors (0.023 at N = 4000) on top of the residual incomplete mixing.
    n, w = 4000, 0.05
    summary, _ = _run_through(_channel(w, n, eddy=0.05))
    eta = summary["collection_efficiency"]
    deutsch = 1 - math.exp(-w * LENGTH / (U * GAP))
    assert eta == pytest.approx(deutsch, abs=0.025)
    # and clearly not the laminar value 0.5
    assert 0.5 - eta > 5 * math.sqrt(0.25 / n)


def test_mass_is_conserved_between_emitted_deposited_escaped_and_airborne():
    sim = _channel(0.05, 600)
    rec = MemoryRecorder(keep_frames=False)
    summary = sim.run(t_end=1.1, recorder=rec)
    s = sim.system.state
    dep, esc = rec.all_deposits, rec.all_escapes
    assert summary["n_alive"] > 0 and dep and esc  # all three are non-empty
    m_dep = float(np.sum(dep["weight"] * dep["mass"]))
    m_esc = float(np.sum(esc["weight"] * esc["mass"])) if esc else 0.0
    m_air = float(np.sum(s.weight * s.mass))
    assert summary["deposited_mass"] == pytest.approx(m_dep, rel=1e-12)
    assert summary["escaped_mass"] == pytest.approx(m_esc, rel=1e-12)
    assert summary["emitted_mass"] == pytest.approx(m_dep + m_esc + m_air, rel=1e-12)
    assert summary["n_emitted"] == summary["n_deposited"] + summary["n_escaped"] + summary["n_alive"]
    ids = np.concatenate([dep["id"], esc["id"], s.id])
    assert np.array_equal(np.sort(ids), np.arange(summary["n_emitted"]))  # every particle once
    assert summary["surfaces"]["plate"]["count"] == dep["id"].size


def _rich_system(seed=7):
    """Every feature at once: inlets, Coulomb, images, charging, Brownian motion,
    mixing, gravity, three kinds of collectors, outlets, a periodic axis."""
    rng = np.random.default_rng(seed)
    med = Medium(flow=UniformFlow((0.5, 0, 0)), eps_r=1.0006)
    fine = Population("fine", LognormalSize(0.5e-6, 1.6), 1500.0, eps_p=4.0, weight=1e3)
    coarse = Population("coarse", FixedSize(8e-6), 1000.0, charge=SaturationCharge(-2e5), weight=10.0,
                        surface_tension=0.072)
    inlets = [Inlet(fine, RectangleArea((0.0, 0.02, 0.01), (0, 0.03, 0), (0, 0, 0.02)), rate=4000.0),
              Inlet(coarse, RectangleArea((0.0, 0.02, 0.01), (0, 0.03, 0), (0, 0, 0.02)), rate=1500.0)]
    s0 = ParticleState()
    s0.add(rng.uniform([0, 0.01, 0], [0.05, 0.03, 0.02], (20, 3)), diameter=3e-6, density=2000.0, charge=-1e-17,
           population=0)
    collectors = [PlaneCollector("plate", (0, 0, 0), (0, 1, 0)),
                  SphereCollector("ball", (0.04, 0.03, 0.01), 0.004),
                  CylinderCollector("wire", (0.02, 0.035, 0.0), (0, 0, 1), 0.001, inside=False)]
    dom = Domain(lo=(-0.01, 0.0, 0.0), hi=(0.06, 0.04, 0.02), kinds=("open", "reflecting", "periodic"))
    zone = ChargingZone((0, 0, 0), (0.03, 0.04, 0.02), ion_density=1e14)
    return System(rng, particles=s0, populations=[fine, coarse], medium=med,
                  sources=[UniformField((0, 2e5, 0))], images=[GroundedPlane((0, 0, 0), (0, 1, 0))],
                  domain=dom, collectors=collectors, inlets=inlets, gravity=(0, -STANDARD_GRAVITY, 0),
                  coulomb=Coulomb("direct"), brownian=True, eddy_diffusivity=(0, 1e-4, 1e-4), charging=[zone])


def _sim(system):
    return Simulation(system, dt=2e-4, step_control=StepControl(1e-5, 1e-6, 1e-3), checkpoint_every=15,
                      frame_every=10, diagnostics_every=5)


def _plain(obj):
    """Only dicts, ndarrays, numbers and strings (what a results file can hold)."""
    if isinstance(obj, dict):
        return all(isinstance(k, str) and _plain(v) for k, v in obj.items())
    return isinstance(obj, (np.ndarray, np.generic, int, float, str, bool))


def test_snapshot_restore_is_bitwise_identical_to_an_uninterrupted_run():
    straight = _sim(_rich_system())
    rec_a = MemoryRecorder()
    sum_a = straight.run(steps=40, recorder=rec_a)
    assert sum_a["n_deposited"] > 0 and sum_a["n_escaped"] >= 0 and sum_a["n_alive"] > 50
    snap = rec_a.snapshots[0]
    assert snap["step"] == 15 and _plain(snap)

    resumed = _sim(_rich_system(seed=12345))  # the seed is overwritten by the checkpoint
    resumed.restore(snap)
    rec_b = MemoryRecorder()
    sum_b = resumed.run(steps=25, recorder=rec_b)

    a, b = straight.system.state.to_dict(), resumed.system.state.to_dict()
    for k in a:
        assert np.array_equal(a[k], b[k]), k
    assert straight.time == resumed.time and straight.dt == resumed.dt
    for k in ("emitted_mass", "deposited_mass", "escaped_mass", "n_deposited", "n_escaped", "surfaces"):
        assert sum_a[k] == sum_b[k], k
    # the deposits after the checkpoint are the same records
    all_a, joined_b = rec_a.all_deposits, rec_b.all_deposits
    later = all_a["time"] > snap["time"]
    assert later.sum() == joined_b["id"].size > 0
    for k in EVENT_FIELDS:
        assert np.array_equal(all_a[k][later], joined_b[k]), k
    # and so are the frames and diagnostics from there on
    assert [f[0] for f in rec_b.frames] == [20, 30, 40]
    np.testing.assert_array_equal(rec_b.frames[-1][2].position, rec_a.frames[-1][2].position)
    assert rec_b.diagnostic_rows[-1] == rec_a.diagnostic_rows[-1]


def test_snapshot_shares_no_memory_with_the_run():
    """A recorder keeps a snapshot as handed over (the results writer saves
    it later, on its own thread): no array of it may be one the run changes."""
    sim = _sim(_rich_system())
    sim.run(steps=20)
    snap = sim.snapshot()
    live = list(sim.system.state._data.values()) + [sim._field]

    def arrays(obj):
        if isinstance(obj, dict):
            for v in obj.values():
                yield from arrays(v)
        elif isinstance(obj, np.ndarray):
            yield obj
    found = list(arrays(snap))
    assert len(found) >= 10  # the particle columns and the field at least
    for a in found:
        assert not any(np.shares_memory(a, b) for b in live)
    before = {k: v.copy() for k, v in snap["particles"].items()}
    sim.run(steps=5)
    for k, v in before.items():
        np.testing.assert_array_equal(snap["particles"][k], v, err_msg=k)


def test_events_are_gathered_and_all_handed_over_before_each_checkpoint(monkeypatch):
    """The loop hands a recorder a few steps' deposits and escapes at once: the
    same records in the same order as one call per step, and every record of
    a step before that step's frame, diagnostics row, checkpoint and finish
    (the checkpoint counts them: a resumed run starts after them)."""

    class Log(MemoryRecorder):
        def __init__(self):
            super().__init__(keep_frames=False)
            self.calls = []

        def deposits(self, records):
            super().deposits(records)
            self.calls.append(("deposits", float(np.min(records["time"])), float(np.max(records["time"]))))

        def escapes(self, records):
            super().escapes(records)
            self.calls.append(("escapes", float(np.min(records["time"])), float(np.max(records["time"]))))

        def frame(self, step, time, state):
            self.calls.append(("frame", time, time))

        def diagnostics(self, step, time, values):
            super().diagnostics(step, time, values)
            self.calls.append(("diagnostics", time, time))

        def checkpoint(self, snapshot):
            super().checkpoint(snapshot)
            self.calls.append(("checkpoint", snapshot["time"], snapshot["time"]))

        def finish(self, summary):
            super().finish(summary)
            self.calls.append(("finish", summary["time"], summary["time"]))

    def run(event_steps):
        monkeypatch.setattr(Simulation, "EVENT_STEPS", event_steps)
        monkeypatch.setattr(Simulation, "EVENT_SECONDS", 1e9)
        sim = _sim(_rich_system())  # a checkpoint every 15 steps, frames every 10, diagnostics every 5
        rec = Log()
        sim.run(steps=40, recorder=rec)
        return rec

    each, gathered = run(1), run(16)
    assert each.all_deposits["id"].size > 0
    assert gathered.all_escapes.keys() == each.all_escapes.keys()
    for got, want in ((gathered.all_deposits, each.all_deposits), (gathered.all_escapes, each.all_escapes)):
        for k in want:
            assert np.array_equal(got[k], want[k]), k
    n_each = sum(c[0] == "deposits" for c in each.calls)
    assert sum(c[0] == "deposits" for c in gathered.calls) < n_each
    # every record of a step reaches the recorder before the reports at the
    # step's end (an event happens within its step, so before that time) and
    # none of a later step does
    events = ("deposits", "escapes")
    for i, (kind, t, _) in enumerate(gathered.calls):
        if kind not in events:
            assert all(hi <= t for k, _, hi in gathered.calls[:i] if k in events), (kind, t)
            assert all(lo > t for k, lo, _ in gathered.calls[i + 1:] if k in events), (kind, t)
    assert [c[0] for c in gathered.calls if c[0] == "checkpoint"] == ["checkpoint"] * 2
    assert gathered.calls[-1][0] == "finish"


def test_grade_efficiency_of_a_size_distribution_rises_with_size():
    # field charging: w grows with d (q_s ~ d^2, drag ~ d), so the grade
    # efficiency rises with size (Hinds; the Deutsch-Anderson picture)
    med = Medium(flow=UniformFlow((U, 0, 0)))
    pop = Population("dust", LognormalSize(2e-6, 2.0), 1000.0, eps_p=4.0, charge=SaturationCharge(-3e5))
    inlet = Inlet(pop, RectangleArea((0, GAP / 2, 0.05), (0, GAP, 0), (0, 0, 0.1)), rate=1500 / 0.1, stop=0.1)
    plate = PlaneCollector("plate", (0, 0, 0), (0, 1, 0), lo=(0, -1, 0), hi=(LENGTH, 1, 0.1))
    dom = Domain(lo=(-1, 0, 0), hi=(LENGTH, GAP, 0.1), kinds=("open", "reflecting", "periodic"))
    sys_ = System(np.random.default_rng(3), medium=med, sources=[UniformField((0, FIELD, 0))], domain=dom,
                  collectors=[plate], inlets=[inlet], coulomb=None)
    rec = MemoryRecorder(keep_frames=False)
    Simulation(sys_, dt=2e-3, diagnostics_every=0).run(t_end=0.1 + LENGTH / U + 0.05, recorder=rec)
    g = grade_efficiency(rec.all_deposits, rec.all_escapes, [0.5e-6, 1e-6, 2e-6, 4e-6, 8e-6])
    eff = g["efficiency"]
    assert np.all(np.diff(eff) > 0)
    # laminar plug flow, per size: eta(d) = min(1, w(d) L/(u s)) (analytic;
    # Hinds) at the bin's geometric centre, within 4 standard errors plus the
    # spread of w over the bin
    from chargesim.physics import aerosol, charging
    for k, dc in enumerate(g["centers"]):
        w = aerosol.migration_velocity(dc, charging.saturation_charge(dc, FIELD, 4.0), FIELD)
        lo_w = aerosol.migration_velocity(g["edges"][k], charging.saturation_charge(g["edges"][k], FIELD, 4.0), FIELD)
        hi_w = aerosol.migration_velocity(g["edges"][k + 1],
                                          charging.saturation_charge(g["edges"][k + 1], FIELD, 4.0), FIELD)
        lo, hi = (min(1, x * LENGTH / (U * GAP)) for x in (lo_w, hi_w))
        assert lo - 4 * g["stderr"][k] <= eff[k] <= hi + 4 * g["stderr"][k]
        assert lo <= min(1, w * LENGTH / (U * GAP)) <= hi
