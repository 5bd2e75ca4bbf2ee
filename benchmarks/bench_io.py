"""Output overhead of the HDF5 results writer, and its write throughput.

A run of N particles (default 1e5) in a uniform field and gas flow is timed
without a recorder and with the HDF5 writer, alternately, at the scenario
defaults' output cadence (50 frames, 10 checkpoints and 200 diagnostics rows
per run, i.e. a frame every steps/50 steps). Space charge is off unless
``--coulomb``: that is the cheapest step, so the overhead share printed is an
upper bound for runs with Coulomb forces on. Prints medians, the overhead
ratio, the median of the per-pair overheads (each recorded run against the
bare run just before it: steadier on a shared machine whose load drifts),
the time spent in the writer's calls (what the run waits for), the time the
writer's background thread spends writing meanwhile, the process CPU time
(all threads) of both runs, and the write throughput: bytes on disk per
second of that thread's writing. On a shared machine the CPU time is the
steadier measure of the writer's cost: the wall time of the bare runs drifts
with the other load by more than the writer costs.

    python benchmarks/bench_io.py            # N = 1e5, 200 steps, 3 repeats
    python benchmarks/bench_io.py --quick    # N = 2e4, 100 steps, 2 repeats
    python benchmarks/bench_io.py --coulomb --steps 50 --repeats 1
"""
import argparse
import os
import statistics
import tempfile
import time

import numpy as np


def build(n, steps, seed=1, coulomb=False):
    from chargesim.motion import (Coulomb, Domain, Medium, ParticleState, PlaneCollector, Simulation, System,
                                  UniformFlow)
    from chargesim.sources import UniformField

    rng = np.random.default_rng(seed)
    st = ParticleState(n)
    st.add(rng.random((n, 3)) * (0.5, 0.1, 0.1), diameter=rng.lognormal(np.log(5e-6), 0.4, n), density=1000.0,
           charge=-1e-16, weight=100.0)
    plate = PlaneCollector("plate", (0, 0, 0), (0, 1, 0), lo=(0, -1, 0), hi=(0.5, 1, 0.1))
    dom = Domain(lo=(-1, -1, 0), hi=(0.5, 1, 0.1), kinds=("open", "open", "periodic"))
    sys_ = System(rng, particles=st, medium=Medium(flow=UniformFlow((1.0, 0, 0))),
                  sources=[UniformField((0, 3e5, 0))], domain=dom, collectors=[plate],
                  coulomb=Coulomb() if coulomb else None)
    every = max(1, steps // 50)
    return Simulation(sys_, dt=2e-4, frame_every=every, diagnostics_every=max(1, steps // 200),
                      checkpoint_every=max(1, steps // 10))


class _Timed:
    """Wraps the writer to add up the time spent in its calls."""

    def __init__(self, inner):
        self.inner = inner
        self.seconds = 0.0

    def __getattr__(self, name):
        fn = getattr(self.inner, name)

        def call(*a, **k):
            t = time.perf_counter()
            try:
                return fn(*a, **k)
            finally:
                self.seconds += time.perf_counter() - t
        return call


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small run (N = 2e4, 100 steps, 2 repeats)")
    ap.add_argument("-n", type=int, default=None, help="particles (default 1e5; quick 2e4)")
    ap.add_argument("--steps", type=int, default=None, help="steps per run (default 200; quick 100)")
    ap.add_argument("--repeats", type=int, default=None, help="timed pairs (default 3; quick 2)")
    ap.add_argument("--coulomb", action="store_true",
                    help="space charge on (method auto): the usual case, each step far dearer")
    args = ap.parse_args()
    n = args.n or (20000 if args.quick else 100000)
    steps = args.steps or (100 if args.quick else 200)
    reps = args.repeats or (2 if args.quick else 3)

    import numba

    from chargesim.io import ResultsWriter

    build(1000, 10).run(steps=2)  # compile the kernels once
    bare, rec, inside, busy, sizes = [], [], [], [], []
    cpu_bare, cpu_rec = [], []
    with tempfile.TemporaryDirectory() as tmp:
        for r in range(reps):
            sim = build(n, steps, coulomb=args.coulomb)
            t, c = time.perf_counter(), time.process_time()
            sim.run(steps=steps)
            bare.append(time.perf_counter() - t)
            cpu_bare.append(time.process_time() - c)

            path = os.path.join(tmp, f"run{r}.h5")
            sim = build(n, steps, coulomb=args.coulomb)
            writer = ResultsWriter(path, scenario_text="benchmark channel", seed=1)
            w = _Timed(writer)
            t, c = time.perf_counter(), time.process_time()
            sim.run(steps=steps, recorder=w)
            rec.append(time.perf_counter() - t)
            cpu_rec.append(time.process_time() - c)
            inside.append(w.seconds)
            # 0 for a writer without a thread (an older commit, benchmarked for comparison)
            busy.append(getattr(writer, "background_seconds", 0.0))
            sizes.append(os.path.getsize(path) + os.path.getsize(os.path.splitext(path)[0] + ".xdmf"))
    tb, tr, ti = statistics.median(bare), statistics.median(rec), statistics.median(inside)
    tw = statistics.median(busy)
    paired = statistics.median((r - b) / b for r, b in zip(rec, bare))
    cb, cr = statistics.median(cpu_bare), statistics.median(cpu_rec)
    size = statistics.median(sizes)
    frames = steps // max(1, steps // 50) + 1
    raw_frame = n * (8 + 24 + 24 + 8 + 8 + 8 + 4)
    print(f"HDF5 results writer, N = {n}, {steps} steps, {frames} frames, {reps} repeats, "
          f"{numba.get_num_threads()} threads, space charge {'on' if args.coulomb else 'off'} (medians)")
    print(f"{'run':<28}{'seconds':>10}{'ratio':>8}")
    print(f"{'no recorder':<28}{tb:>10.3f}{1.0:>8.3f}")
    print(f"{'HDF5 writer':<28}{tr:>10.3f}{tr / tb:>8.3f}")
    print(f"{'  in the writer calls':<28}{ti:>10.3f}{ti / tb:>8.3f}")
    print(f"{'writer thread (overlapped)':<28}{tw:>10.3f}{tw / tb:>8.3f}")
    print(f"{'CPU time, no recorder':<28}{cb:>10.3f}{1.0:>8.3f}")
    print(f"{'CPU time, HDF5 writer':<28}{cr:>10.3f}{cr / cb:>8.3f}")
    print(f"output overhead: {100 * (tr - tb) / tb:.1f} % of the run time (ratio of medians), "
          f"{100 * paired:.1f} % (median of the pairs), {100 * (cr - cb) / cb:.1f} % in CPU time; goal <= 5 %")
    print(f"time inside the writer calls: {100 * ti / tr:.1f} % of the recorded run")
    writing = tw if tw > 0 else ti  # the thread's writing, or the calls' for a writer without a thread
    print(f"file size {size / 1e6:.1f} MB (raw frame data {frames * raw_frame / 1e6:.1f} MB); "
          f"write throughput {size / 1e6 / writing:.0f} MB/s on disk, "
          f"{frames * raw_frame / 1e6 / writing:.0f} MB/s of raw data")


if __name__ == "__main__":
    main()
