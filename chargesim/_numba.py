"""Compiling one numba kernel both serial and parallel.

Small calls run serially (waking the thread pool costs more than the work);
large ones in parallel. numba's on-disk cache keys a compilation by the
function's qualified name and line, not by its ``parallel`` flag, so the same
Python function compiled twice would share one cache entry: the parallel
dispatcher could load the serial machine code (measured: half the speed on
two cores). The serial copy is therefore compiled under its own name.
"""
import types

import numba


def serial_and_parallel(fn, **options):
    """``(serial, parallel)`` dispatchers of ``fn`` (``prange`` acts as ``range``
    in the serial one), both ``cache=True``; ``options`` go to ``numba.njit``."""
    copy = types.FunctionType(fn.__code__, fn.__globals__, fn.__name__ + "_serial", fn.__defaults__,
                              fn.__closure__)
    copy.__qualname__ = fn.__qualname__ + "_serial"
    copy.__module__ = fn.__module__
    serial = numba.njit(cache=True, **options)(copy)
    parallel = numba.njit(parallel=True, cache=True, **options)(fn)
    return serial, parallel
