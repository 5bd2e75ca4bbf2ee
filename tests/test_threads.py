"""Thread pools around the numba kernels.

chargesim's kernels use numba's threads on every core; a BLAS pool of its own
would spin on the same cores after each matrix product (OpenBLAS's idle
threads busy-wait: documented behaviour of the library). Importing chargesim
sets BLAS to one thread unless the user chose a count.
"""
import json
import os
import subprocess
import sys

import pytest

threadpoolctl = pytest.importorskip("threadpoolctl")

_PROBE = """
import json, numpy
import chargesim
import threadpoolctl
print(json.dumps([p["num_threads"] for p in threadpoolctl.threadpool_info() if p["user_api"] == "blas"]))
"""


def _blas_threads(env_extra):
    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
    env.update(env_extra)
    out = subprocess.run([sys.executable, "-c", _PROBE], env=env, capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_importing_chargesim_after_numpy_sets_one_blas_thread():
    counts = _blas_threads({})
    assert counts and all(c == 1 for c in counts)


def test_a_blas_thread_count_set_by_the_user_wins():
    counts = _blas_threads({"OPENBLAS_NUM_THREADS": "2"})
    assert counts and all(c == 2 for c in counts)
