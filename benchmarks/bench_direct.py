"""Direct Coulomb sum: pair interactions per second, numba kernel vs numpy path.

Field and potential at every particle from all others (N^2 - N pairs), float64.
Prints medians and the ratio. Usage: python benchmarks/bench_direct.py [--quick]
"""
import argparse
import os
import sys

import numba
import numpy as np

sys.path.insert(0, os.path.dirname(__file__))
from _timing import median_time, table  # noqa: E402

from chargesim.coulomb import direct  # noqa: E402


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true", help="N = 1e3 and 1e4 only")
    args = ap.parse_args()
    sizes = [1_000, 10_000] if args.quick else [1_000, 10_000, 40_000]
    rng = np.random.default_rng(1)
    rows = []
    for n in sizes:
        pos = rng.random((n, 3))
        q = rng.normal(size=n)
        pairs = n * (n - 1)
        t_nb = median_time(lambda: direct.evaluate(pos, q, None, None), repeats=5)
        # the numpy path is slow at 4e4: one timed run there
        reps = 3 if n <= 10_000 else 1
        t_np = median_time(lambda: direct.evaluate_numpy(pos, q, None, None), repeats=reps, warmup=0)
        rows.append([n, f"{t_nb:.4f}", f"{pairs / t_nb:.3e}", f"{t_np:.3f}", f"{pairs / t_np:.3e}", f"{t_np / t_nb:.1f}"])
    print(f"direct sum, field + potential, float64, {numba.get_num_threads()} threads")
    table(["N", "numba s", "numba pairs/s", "numpy s", "numpy pairs/s", "numba/numpy speed"], rows)
    print("goal: >= 1.5e9 pair interactions per second at N = 4e4 (numba)")


if __name__ == "__main__":
    main()
