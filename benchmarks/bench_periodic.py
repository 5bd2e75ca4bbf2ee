"""Periodic sums: Ewald against smooth particle-mesh Ewald, side by side.

Random neutral charges in a cube at a fixed density (a hard-core gas, see
:func:`system`); forces at an rms
relative error of at most 1e-4, measured against a tight Ewald sum on a
sample of particles. For each method the loosest ``accuracy`` setting that
meets 1e-4 on the smallest N is used for all N (and its error is measured
again at every N). Prints medians of wall time, the Ewald/mesh ratio, the
scaling exponent between sizes (N log N is 1.10 from 1e4 to 1e5) and, with
``--crossover``, the N above which mesh beats Ewald at the default accuracy
(``ewald.MESH_CROSSOVER``).

    python benchmarks/bench_periodic.py             # N = 1e4 and 1e5
    python benchmarks/bench_periodic.py --quick     # N = 1e4 only
    python benchmarks/bench_periodic.py --crossover # the auto switch point
"""
import argparse
import math
import os
import statistics
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import chargesim  # noqa: E402
from chargesim.coulomb import _ewald_common, ewald, mesh  # noqa: E402
from _timing import table  # noqa: E402

DENSITY = 1e6  # particles per m^3 (only the dimensionless setup matters)
TARGET = 1e-4  # rms relative force error to reach
REF_ACCURACY = 1e-7  # the reference's own error is ~0.3 of this (tests/test_ewald.py)
# The rms relative error is dominated by the few particles with a close
# neighbour (|F|^2 has a heavy tail), so the sample must be large.
SAMPLE = 1000


def system(n, seed):
    """n random neutral charges in a cube, as a hard-core gas.

    Positions: n sites drawn at random from a simple-cubic lattice of m^3 >=
    n sites, each jittered uniformly by +-0.35 of the spacing, so no two
    particles are closer than 0.3 spacing. With uniformly random points the
    rms force is set by the single closest pair and the rms relative error is
    not a property of the method (see _ewald_common.accuracy_product).
    Charges: normal, shifted to a zero sum.
    """
    rng = np.random.default_rng(seed)
    m = math.ceil(n ** (1.0 / 3.0) - 1e-9)
    length = (n / DENSITY) ** (1.0 / 3.0)
    d = length / m
    sites = rng.choice(m ** 3, size=n, replace=False)
    grid = np.stack(np.unravel_index(sites, (m, m, m)), axis=1).astype(float)
    x = (grid + 0.5 + rng.uniform(-0.35, 0.35, size=(n, 3))) * d
    q = rng.normal(size=n) * 1e-15
    q -= q.mean()
    return x, q, np.full(3, length)


def reference_sample(x, q, box, sample):
    """Tight Ewald field sums on the particles ``sample`` (excluding each one itself).

    Field is linear in the charges: the field on particle i is that of all the
    others at its place, i.e. of the particles outside the sample (at free
    targets) plus the sample among itself (targets=None; a particle's own
    images give no field at its place). Net charges of the two parts cancel.
    """
    rest = np.setdiff1d(np.arange(x.shape[0]), sample)
    o = dict(ewald.OPTIONS, box=box, accuracy=REF_ACCURACY, real_cutoff=0.4 * box.min())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        f_rest, _ = ewald.evaluate(x[rest], q[rest], x[sample], None, need_field=True, need_potential=False, **o)
        f_self, _ = ewald.evaluate(x[sample], q[sample], None, None, need_field=True, need_potential=False, **o)
    return f_rest + f_self


def median_times(fn, repeats, warmup=0):
    """Median wall time and median CPU time (all threads of this process) of fn(), s.

    On the shared machine the wall time depends on the others' load; the CPU
    time divided by the threads used is what an idle machine would show if
    the parallel parts scale.
    """
    for _ in range(warmup):
        fn()
    wall = []
    cpu = []
    for _ in range(repeats):
        w0 = time.perf_counter()
        c0 = time.process_time()
        fn()
        cpu.append(time.process_time() - c0)
        wall.append(time.perf_counter() - w0)
    return statistics.median(wall), statistics.median(cpu)


def rms_rel(f, ref):
    return float(np.sqrt(np.mean(np.sum((f - ref) ** 2, axis=1)) / np.mean(np.sum(ref ** 2, axis=1))))


def forces(method, x, q, box, acc):
    return chargesim.coulomb.forces(x, q, method=method, box=box, accuracy=acc)


def describe(method, x, q, box, acc):
    o = dict((ewald if method == "ewald" else mesh).OPTIONS, box=box, accuracy=acc)
    n = x.shape[0]
    if method == "ewald":
        st = _ewald_common.setup(x, q, None, None, o,
                                 neighbours_per_particle=ewald.neighbours_for_balance(n, float(np.prod(box))))
        nk = ewald.kvectors(st.box, ewald.reciprocal_cutoff(st))[0].shape[0]
        return f"alpha r_c={st.alpha * st.real_cutoff:.2f}, r_c/d={st.real_cutoff * DENSITY ** (1 / 3):.2f}, {nk} k"
    st = _ewald_common.setup(x, q, None, None, o, neighbours_per_particle=mesh._NEIGHBOURS)
    order, shape = mesh.parameters(st, o, n)
    return f"r_c/d={st.real_cutoff * DENSITY ** (1 / 3):.2f}, p={order}, mesh {'x'.join(map(str, shape))}"


def calibrate(method, x, q, box, ref, sample):
    """Loosest accuracy setting whose measured error is within TARGET."""
    for acc in (1e-3, 5e-4, 3e-4, 2e-4, 1e-4, 5e-5, 2e-5):
        err = rms_rel(forces(method, x, q, box, acc)[sample] / q[sample, None], ref * chargesim.coulomb.COULOMB_K)
        if err <= TARGET:
            return acc, err
    raise RuntimeError(f"{method}: no accuracy setting reached {TARGET}")


def speed(sizes, repeats):
    rows = []
    times = {}
    chosen = {}
    for k, n in enumerate(sizes):
        x, q, box = system(n, seed=n)
        sample = np.random.default_rng(1).choice(n, size=min(SAMPLE, n), replace=False)
        ref = reference_sample(x, q, box, sample)
        for method in ("ewald", "mesh"):
            if k == 0:
                chosen[method] = calibrate(method, x, q, box, ref, sample)[0]
            acc = chosen[method]
            f = forces(method, x, q, box, acc)
            err = rms_rel(f[sample] / q[sample, None], ref * chargesim.coulomb.COULOMB_K)
            reps = repeats if not (method == "ewald" and n > 30000) else max(1, repeats // 2)
            t, c = median_times(lambda: forces(method, x, q, box, acc), reps)
            times[method, n] = t
            rows.append([n, method, f"{acc:g}", f"{err:.2e}", f"{t:.3f}", f"{c:.3f}", reps,
                         describe(method, x, q, box, acc)])
    print(f"forces at rms relative error <= {TARGET:g} (measured on {SAMPLE} particles against Ewald "
          f"at accuracy {REF_ACCURACY:g}); times are medians, s; load average {os.getloadavg()[0]:.1f} "
          f"on {os.cpu_count()} cores")
    table(["N", "method", "accuracy", "rms rel err", "median s", "cpu s", "runs", "parameters"], rows)
    print()
    ratio_rows = []
    for n in sizes:
        ratio_rows.append([n, f"{times['ewald', n] / times['mesh', n]:.1f}"])
    table(["N", "Ewald / mesh"], ratio_rows)
    if len(sizes) > 1:
        print()
        a, b = sizes[0], sizes[-1]
        nlogn = math.log((b * math.log(b)) / (a * math.log(a))) / math.log(b / a)
        srows = []
        for method in ("ewald", "mesh"):
            srows.append([method, f"{math.log(times[method, b] / times[method, a]) / math.log(b / a):.2f}"])
        print(f"scaling exponent d ln t / d ln N from {a} to {b} (N log N: {nlogn:.2f}; N^1.5: 1.50)")
        table(["method", "exponent"], srows)


def crossover(repeats):
    """Median times of both methods at the default accuracy over small N."""
    acc = ewald.OPTIONS["accuracy"]
    rows = []
    for n in (8, 27, 64, 125, 250, 500, 1000, 2000, 4000):
        x, q, box = system(n, seed=n)
        te = median_times(lambda: forces("ewald", x, q, box, acc), repeats, warmup=1)[0]
        tm = median_times(lambda: forces("mesh", x, q, box, acc), repeats, warmup=1)[0]
        rows.append([n, f"{te * 1e3:.1f}", f"{tm * 1e3:.1f}", f"{te / tm:.2f}"])
    print(f"default accuracy {acc:g}: median ms; ewald.MESH_CROSSOVER = {ewald.MESH_CROSSOVER}; "
          f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    table(["N", "Ewald ms", "mesh ms", "Ewald / mesh"], rows)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="N = 1e4 only")
    ap.add_argument("--crossover", action="store_true", help="measure the Ewald/mesh switch point instead")
    ap.add_argument("--repeats", type=int, default=5, help="timed runs per case (median taken)")
    args = ap.parse_args(argv)
    # compile the kernels before timing anything
    x, q, box = system(300, seed=0)
    for method in ("ewald", "mesh"):
        forces(method, x, q, box, 1e-4)
    if args.crossover:
        crossover(args.repeats)
        return
    speed([10_000] if args.quick else [10_000, 100_000], args.repeats)


if __name__ == "__main__":
    main()
