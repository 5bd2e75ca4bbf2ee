"""Speed of the run loop: particle-steps per second with space charge on.

A charged dust cloud drifts in a uniform field through still air between
two collecting plates (drag-exact integrator, Coulomb method "auto", particle
radii). For each N the script times whole steps and, inside them, the Coulomb
evaluations, and prints medians over the timed steps (at least 7, and at
least 2 s of them):

    N  method  steps  step [ms]  coulomb [ms]  outside share  particle-steps/s

Each size is also timed with Coulomb off: the loop's own rate (integrator,
drag, sources, collectors, bookkeeping). "outside share" is the part of a step spent outside the Coulomb evaluation
(goal <= 20 %). Goal once the tree evaluator is in: >= 5e5 particle-steps/s
at N = 1e5 on the 2-core reference machine. The peak memory of the step
(tracemalloc, numpy buffers) is printed per particle to show it is O(N).

Usage: python benchmarks/bench_motion.py [--quick] [--steps K] [--sizes 1000,10000]
"""
import argparse
import math
import statistics
import time
import tracemalloc

import numpy as np

from chargesim.motion import Coulomb, Domain, Medium, ParticleState, PlaneCollector, Simulation, System
from chargesim.motion import forces as _forces
from chargesim.sources import UniformField


def build(n, seed=0, coulomb=True):
    rng = np.random.default_rng(seed)
    s = ParticleState(n)
    pos = rng.uniform([0.0, 0.0, 0.0], [0.5, 0.3, 0.5], (n, 3))
    d = np.exp(rng.normal(np.log(3e-6), 0.5, n))
    # a few hundred elementary charges, like field-charged micron dust
    s.add(pos, diameter=d, density=1500.0, charge=-3e-17 * (d / 3e-6) ** 2, weight=1e3)
    plates = [PlaneCollector("plate low", (0, 0, 0), (0, 1, 0)), PlaneCollector("plate high", (0, 0.3, 0), (0, -1, 0))]
    dom = Domain(lo=(0, -1, 0), hi=(0.5, 1.3, 0.5), kinds=("periodic", "open", "periodic"))
    return System(rng, particles=s, medium=Medium(), sources=[UniformField((0, 2e5, 0))], domain=dom,
                  collectors=plates, coulomb=Coulomb("auto") if coulomb else None)


class _Timed:
    """Wraps Coulomb.field to add up the time spent in it."""

    def __init__(self):
        self.total = 0.0
        self._orig = _forces.Coulomb.field

    def __enter__(self):
        orig = self._orig
        timer = self

        def field(this, *a, **k):
            t = time.perf_counter()
            try:
                return orig(this, *a, **k)
            finally:
                timer.total += time.perf_counter() - t

        _forces.Coulomb.field = field
        return self

    def __exit__(self, *exc):
        _forces.Coulomb.field = self._orig


def measure(n, steps, coulomb=True, min_seconds=2.0):
    system = build(n, coulomb=coulomb)
    sim = Simulation(system, dt=1e-3, diagnostics_every=0)
    sim.run(steps=2)  # compile, build caches
    t = time.perf_counter()
    sim.run(steps=1)
    # at least min_seconds of timed steps: 7 steps of 5 ms (N = 1e3) gave an
    # outside share that moved by 3 points between runs of the script
    steps = max(steps, math.ceil(min_seconds / (time.perf_counter() - t)))
    step_times, coul_times = [], []
    with _Timed() as timer:
        for _ in range(steps):
            before = timer.total
            t = time.perf_counter()
            sim.run(steps=1)
            step_times.append(time.perf_counter() - t)
            coul_times.append(timer.total - before)
    tracemalloc.start()
    sim.run(steps=1)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    step = statistics.median(step_times)
    coul = statistics.median(coul_times)
    method = system.coulomb.method_for(system.state.n) if coulomb else "off"
    return {"n": n, "method": method, "steps": steps, "step": step, "coulomb": coul,
            "outside": (step - coul) / step, "rate": system.state.n / step, "bytes": peak / n}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="N = 1e3 and 1e4, few steps")
    ap.add_argument("--steps", type=int, default=None, help="fewest timed steps per size (default 7; quick 3)")
    ap.add_argument("--min-seconds", type=float, default=None,
                    help="time at least this long per size, in more steps if needed (default 2; quick 0.5)")
    ap.add_argument("--sizes", type=str, default=None, help="comma-separated particle counts")
    args = ap.parse_args(argv)
    sizes = [1000, 10000] if args.quick else [1000, 10000, 100000]
    if args.sizes:
        sizes = [int(float(x)) for x in args.sizes.split(",")]
    steps = args.steps or (3 if args.quick else 7)
    min_seconds = args.min_seconds if args.min_seconds is not None else (0.5 if args.quick else 2.0)
    print(f"{'N':>8} {'method':>8} {'steps':>6} {'step [ms]':>10} {'coulomb [ms]':>13} {'outside':>8} "
          f"{'particle-steps/s':>17} {'peak B/particle':>16}")
    for n in sizes:
        for on in (True, False):  # with space charge, then the loop alone
            r = measure(n, steps, coulomb=on, min_seconds=min_seconds)
            print(f"{r['n']:>8d} {r['method']:>8} {r['steps']:>6d} {1e3 * r['step']:>10.2f} {1e3 * r['coulomb']:>13.2f} "
                f"{100 * r['outside']:>7.1f}% {r['rate']:>17.3g} {r['bytes']:>16.0f}")


if __name__ == "__main__":
    main()
