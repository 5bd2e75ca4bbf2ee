"""Cutoff field evaluation: linked cells in numba against cKDTree + numpy.

Uniform random points at unit density in an open cube of N points, with the
cutoff giving about 60 neighbours per point (4/3 pi rc^3 = 60). Each timing is
one whole field evaluation at every particle, neighbour build included: ours
is ``chargesim.coulomb.cutoff.evaluate`` (plain truncation); the reference
pipeline is ``scipy.spatial.cKDTree`` + ``query_pairs(output_type='ndarray')``
+ ``np.bincount`` accumulation of the pair fields. Both run in the same
process, taking turns repeat after repeat; medians of the repeats are printed
with their ratio and the scaling exponent of our time from the smallest to the
largest N.

Usage: python benchmarks/bench_cutoff.py [--quick] [--repeats R]
(--quick: N = 1e5 only).
"""
import argparse
import math
import os
import sys
import time

import numpy as np
from scipy.spatial import cKDTree

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))
from chargesim.coulomb import cutoff  # noqa: E402

NEIGHBOURS = 60


def reference_field(points, charges, rc):
    """Plain-truncated field sums via cKDTree pairs and np.bincount (and the pair count)."""
    n = points.shape[0]
    pairs = cKDTree(points).query_pairs(rc, output_type="ndarray")
    i, j = pairs[:, 0], pairs[:, 1]
    d = points[i] - points[j]
    inv3 = np.sum(d * d, axis=1) ** -1.5
    field = np.empty((n, 3))
    for k in range(3):
        w = d[:, k] * inv3
        field[:, k] = np.bincount(i, charges[j] * w, minlength=n) - np.bincount(j, charges[i] * w, minlength=n)
    return field, i.size


def ours(points, charges, rc):
    return cutoff.evaluate(points, charges, None, None, need_field=True, need_potential=False,
                           cutoff=rc)[0]


def interleaved_medians(fns, repeats):
    """Median time of each function, run in turn repeat after repeat.

    Interleaving spreads the load of a shared machine evenly over the
    contenders, so their ratio is fair even when the load changes.
    """
    times = [[] for _ in fns]
    outs = [None] * len(fns)
    for _ in range(repeats):
        for k, fn in enumerate(fns):
            t0 = time.perf_counter()
            outs[k] = fn()
            times[k].append(time.perf_counter() - t0)
    return [float(np.median(t)) for t in times], outs


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="N = 1e5 only")
    ap.add_argument("--repeats", type=int, default=3, help="repeats of each contender (median)")
    args = ap.parse_args(argv)
    sizes = [100_000] if args.quick else [100_000, 1_000_000]
    rc = (NEIGHBOURS / (4.0 / 3.0 * math.pi)) ** (1.0 / 3.0)  # unit density
    rng = np.random.default_rng(20261201)

    # compile outside the timings
    warm = rng.random((2000, 3)) * 10.0
    ours(warm, rng.normal(size=2000), rc)

    import numba
    print(f"cutoff field, plain truncation, ~{NEIGHBOURS} neighbours, numba threads {numba.get_num_threads()}")
    print(f"{'N':>9} {'nbrs/pt':>8} {'ours s':>9} {'ours ns/pt':>10} {'cKDTree+numpy s':>16} {'ratio':>7} {'max rel diff':>13}")
    rows = []
    for n in sizes:
        edge = n ** (1.0 / 3.0)
        pts = rng.random((n, 3)) * edge
        q = rng.normal(size=n)
        (t_ours, t_ref), (f_ours, (f_ref, npairs)) = interleaved_medians(
            [lambda: ours(pts, q, rc), lambda: reference_field(pts, q, rc)], args.repeats)
        diff = float(np.abs(f_ours - f_ref).max() / np.abs(f_ref).max())
        rows.append((n, t_ours, t_ref))
        print(f"{n:>9} {2 * npairs / n:>8.1f} {t_ours:>9.4f} {1e9 * t_ours / n:>10.1f} {t_ref:>16.3f} "
              f"{t_ref / t_ours:>7.1f} {diff:>13.1e}")
    if len(rows) > 1:
        (n0, t0, _), (n1, t1, _) = rows[0], rows[-1]
        expo = math.log(t1 / t0) / math.log(n1 / n0)
        print(f"scaling exponent of our time, N {n0} -> {n1}: {expo:.3f} (goal <= 1.1)")
    print(f"speed-up against cKDTree + numpy at N = {rows[-1][0]}: {rows[-1][2] / rows[-1][1]:.1f}x "
          "(goal >= 20x at N = 1e6)")


if __name__ == "__main__":
    main()
