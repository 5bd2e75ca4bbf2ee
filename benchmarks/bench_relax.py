"""Benchmark: relax N charges on a unit sphere (Thomson problem) to a residual of 1e-8.

Residual (relative): max over particles of the tangential force divided by
F0 = k q^2 / d^2, the force between two neighbours at the median
nearest-neighbour distance d (see chargesim.layout). Charges q = 1/sqrt(k),
so the energy in J is the dimensionless Thomson energy.

Start: uniformly random points on the sphere (seeded). Each configuration is
run ``--repeats`` times; the table gives the median wall time, iterations
(L-BFGS iterations plus Newton steps), force evaluations and the final
residual, for method "auto" and for each Coulomb method given side by side
in the same run, then the time of the stability analysis (dense Hessian
eigenvalues) at the result.

    python benchmarks/bench_relax.py [--n 1000] [--repeats 3] [--methods direct tree]

Goal (issue 11): N = 1000 under 30 s on the 2-core reference machine.
"""
import argparse
import math
import statistics
import time

import numba
import numpy as np

import chargesim
from chargesim import coulomb, layout
from chargesim.physics.constants import COULOMB_K


def _available(method):
    try:
        coulomb._module(method)
        return True
    except ModuleNotFoundError:
        return False


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--methods", nargs="*", default=["direct", "tree"])
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args()

    q = 1.0 / math.sqrt(COULOMB_K)
    start = np.random.default_rng(args.seed).normal(size=(args.n, 3))
    start /= np.linalg.norm(start, axis=1)[:, None]
    print(f"relax {args.n} charges on a unit sphere to residual 1e-8; numba threads {numba.get_num_threads()}, "
          f"threading layer {numba.config.THREADING_LAYER}")
    chargesim.relax(start[:50], q, radius=1.0, stability=False, method="direct")  # compile the kernels

    rows = []
    methods = ["auto"] + [m for m in args.methods if m != "auto"]
    for method in methods:
        if method != "auto" and not _available(method):
            print(f"  (method {method!r} is not installed; skipped)")
            continue
        times, res = [], None
        # a fast evaluator must resolve forces well below the residual asked:
        # the same accuracy "auto" passes (chargesim.layout)
        opts = None if method in ("auto", "direct") else {"accuracy": 1e-10}
        for _ in range(args.repeats):
            t0 = time.perf_counter()
            res = chargesim.relax(start, q, radius=1.0, stability=False, method=method, coulomb_options=opts)
            times.append(time.perf_counter() - t0)
        if method == "auto":
            auto_result = res
        rows.append((method, res.method, statistics.median(times), min(times), res.iterations, res.evaluations,
                     res.residual, res.converged, res.energy))
    base = rows[0][2]
    print(f"{'method':>8} {'used':>8} {'median s':>9} {'min s':>7} {'ratio':>6} {'iters':>6} {'evals':>6} "
          f"{'residual':>9} {'conv':>5} {'energy (J)':>16}")
    for m, used, med, mn, it, ev, r, conv, e in rows:
        print(f"{m:>8} {used:>8} {med:9.2f} {mn:7.2f} {med / base:6.2f} {it:6d} {ev:6d} {r:9.1e} {str(conv):>5} "
              f"{e:16.6f}")

    times = []
    for _ in range(args.repeats):
        t0 = time.perf_counter()
        st = layout.stability(auto_result.positions, q, radius=1.0, method="direct")
        times.append(time.perf_counter() - t0)
    print(f"stability at the result ({st.method}, {st.dimension} degrees of freedom): median "
          f"{statistics.median(times):.2f} s; {st.n_trivial} trivial, {st.n_unstable} unstable, {st.n_soft} soft; "
          f"lowest eigenvalue {st.eigenvalues[0]:.4g} J/m^2")


if __name__ == "__main__":
    main()
