"""Tree evaluator: time, measured error and memory, side by side with fmm3dpy.

Field at every particle of N = 1e5 and 1e6 mixed-sign charges (uniform in a
cube and clustered), accuracy 1e-3, against ``fmm3dpy.lfmm3d`` at eps = 1e-3
on the same points in the same run. Error: rms relative field error
sqrt(sum|E - E_ref|^2 / sum|E_ref|^2) on 1000 sampled particles against the
direct sum. fmm3dpy at eps 1e-3 lands well below 1e-3, so the equal-error
comparison takes the tree at the largest accuracy of the ladder MATCH_LADDER
(1e-3 down to 5e-5) whose measured error is at most fmm3dpy's. Then the crossover
against the direct sum (N = 500 .. 2e4).

Usage: python benchmarks/bench_tree.py [--quick] [--no-fmm] [--crossover-only]
"""
import argparse
import os
import sys
import time
import tracemalloc

import numba
import numpy as np

sys.path.insert(0, os.path.dirname(__file__))
from _timing import median_time, table  # noqa: E402

from chargesim.coulomb import direct, tree  # noqa: E402


def uniform(rng, n):
    return rng.random((n, 3))


def clustered(rng, n):
    # Gaussian clumps with widths over a decade plus a 5 % uniform background
    k = 12
    centres = rng.random((k, 3))
    widths = 10.0 ** rng.uniform(-2.5, -1.0, k)
    which = rng.integers(0, k, n)
    pos = centres[which] + rng.normal(size=(n, 3)) * widths[which, None]
    back = rng.random(n) < 0.05
    pos[back] = rng.random((int(back.sum()), 3))
    return pos


def reference(pos, q, idx):
    """Direct field at particles ``idx`` from all the others (C/m^2)."""
    src = np.ascontiguousarray(pos.T)
    tgt = np.ascontiguousarray(pos[idx].T)
    m = idx.size
    ex, ey, ez, phi = (np.empty(m) for _ in range(4))
    nz = np.empty(m, np.int64)
    # the direct kernel skips zero-distance pairs (and counts them): at a
    # particle that is exactly its own term
    direct._sum_points(src[0], src[1], src[2], q, tgt[0], tgt[1], tgt[2], ex, ey, ez, phi, nz)
    assert nz.max() == 1
    return np.column_stack([ex, ey, ez])


def timed(fn, repeats):
    """Median wall time of ``fn()`` over ``repeats`` runs (s) and the last result."""
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return float(np.median(times)), out


def rms_rel(a, ref):
    return float(np.sqrt(np.sum((a - ref) ** 2) / np.sum(ref**2)))


#: Accuracies tried for the equal-error comparison, coarsest first.
MATCH_LADDER = (1e-3, 7e-4, 5e-4, 4e-4, 3e-4, 2.5e-4, 2e-4, 1.5e-4, 1e-4, 7e-5, 5e-5)


def run_tree(pos, q, accuracy=1e-3):
    return tree.evaluate(pos, q, None, None, need_field=True, need_potential=False, accuracy=accuracy)[0]


def run_fmm(fmm3dpy, pos_t, q):
    out = fmm3dpy.lfmm3d(eps=1e-3, sources=pos_t, charges=q, pg=2)
    return -4.0 * np.pi * out.grad.T  # fmm3dpy: pot = sum q/(4 pi r), grad = its gradient


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true", help="N = 1e5 only")
    ap.add_argument("--no-fmm", action="store_true", help="skip fmm3dpy")
    ap.add_argument("--crossover-only", action="store_true", help="only the crossover against the direct sum")
    args = ap.parse_args()
    if args.crossover_only:
        rng = np.random.default_rng(7)
        tree.evaluate(rng.random((5000, 3)), rng.normal(size=5000), None, None)  # compile
        crossover(rng)
        return
    fmm3dpy = None
    if not args.no_fmm:
        import fmm3dpy
    rng = np.random.default_rng(7)
    sizes = [100_000] if args.quick else [100_000, 1_000_000]
    rows = []
    tree.evaluate(rng.random((5000, 3)), rng.normal(size=5000), None, None)  # compile
    for n in sizes:
        for name, gen in (("uniform", uniform), ("clustered", clustered)):
            pos = gen(rng, n)
            q = np.where(rng.random(n) < 0.5, 1.0, -1.0) * (0.5 + rng.random(n))
            idx = np.sort(rng.choice(n, 1000, replace=False))
            ref = reference(pos, q, idx)
            t_tree, e = timed(lambda: run_tree(pos, q), 3)
            e_tree = rms_rel(e[idx], ref)
            del e
            t0 = time.perf_counter()
            built = tree.Tree(pos, q)
            t_build = time.perf_counter() - t0
            tracemalloc.start()
            run_tree(pos, q)
            peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
            row = [f"{n:.0e}", name, f"{t_tree:.3f}", f"{t_build:.3f}", f"{e_tree:.2e}"]
            if fmm3dpy is not None:
                pos_t = np.ascontiguousarray(pos.T)
                # fmm3dpy takes 20-50 s at 1e6 here: one timed run there
                fr = 3 if n <= 100_000 else 1
                t_fmm, e = timed(lambda: run_fmm(fmm3dpy, pos_t, q), fr)
                e_fmm = rms_rel(e[idx], ref)
                del e
                # the tree at equal or better error: the first accuracy of the
                # ladder that reaches fmm3dpy's measured error
                for acc in MATCH_LADDER:
                    _, e = timed(lambda: run_tree(pos, q, acc), 1)
                    e_match = rms_rel(e[idx], ref)
                    if e_match <= e_fmm:
                        break
                t_match, e = timed(lambda: run_tree(pos, q, acc), 3)
                del e
                row += [f"{acc:.0e}", f"{t_match:.3f}", f"{e_match:.2e}", f"{t_fmm:.3f}", f"{e_fmm:.2e}",
                        f"{t_fmm / t_tree:.1f}", f"{t_fmm / t_match:.1f}"]
            else:
                row += ["-"] * 7
            row += [f"{built.nbytes / n:.0f}", f"{peak / n:.0f}"]
            del built
            rows.append(row)
            print(" ".join(row), flush=True)
    print()
    print(f"tree (accuracy 1e-3, and at equal or better error) vs fmm3dpy (eps 1e-3), field at every particle, "
          f"mixed-sign charges, {numba.get_num_threads()} threads (medians of 3 runs; fmm3dpy at 1e6: one run)")
    table(["N", "points", "tree s", "build s", "tree err", "matched acc", "matched s", "matched err",
           "fmm3dpy s", "fmm3dpy err", "fmm3dpy/tree", "fmm3dpy/matched", "tree B/particle",
           "eval peak B/particle"], rows)
    print("goal at N = 1e6: tree <= 3 s, >= 3x faster than fmm3dpy at equal or better error, <= 500 B/particle")
    print()
    crossover(rng)


def crossover(rng):
    """Direct vs tree, field + potential at every particle, uniform mixed-sign."""
    rows = []
    found = None
    for n in (500, 700, 1000, 1500, 2000, 3000, 5000, 10_000, 20_000):
        pos = rng.random((n, 3))
        q = rng.normal(size=n)
        t_d = median_time(lambda: direct.evaluate(pos, q, None, None), repeats=5)
        t_t = median_time(lambda: tree.evaluate(pos, q, None, None, accuracy=1e-3), repeats=5)
        rows.append([n, f"{t_d * 1e3:.2f}", f"{t_t * 1e3:.2f}", f"{t_d / t_t:.2f}"])
        if found is None and t_t < t_d:
            found = n
    print("crossover: direct vs tree (accuracy 1e-3), field + potential at every particle, uniform mixed-sign")
    table(["N", "direct ms", "tree ms", "direct/tree"], rows)
    print(f"tree faster from N = {found} (tree.CROSSOVER = {tree.CROSSOVER})")


if __name__ == "__main__":
    main()
