"""Small timing helpers shared by the benchmark scripts."""
import statistics
import time


def median_time(fn, repeats=3, warmup=1):
    """Median wall time of ``fn()`` over ``repeats`` runs after ``warmup`` runs, s."""
    for _ in range(warmup):
        fn()
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def table(header, rows):
    """Print rows as an aligned text table."""
    cells = [list(map(str, header))] + [[str(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    for k, r in enumerate(cells):
        print("  ".join(c.rjust(w) for c, w in zip(r, widths)))
        if k == 0:
            print("  ".join("-" * w for w in widths))
