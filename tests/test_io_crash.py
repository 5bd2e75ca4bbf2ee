"""Crash safety and resume: a run killed with SIGKILL at several points.

The run is a small invented collector channel driven through
``chargesim.motion.Simulation`` with the HDF5 writer, in a subprocess that
kills itself (SIGKILL) at a chosen point: inside a frame (particle rows
written, index row not), inside a deposit batch, while a checkpoint is being
written, during ``finish``, and at a random moment. What the killed file
holds must read back and equal the same records of an uninterrupted run
(bitwise); the resumed run must end bitwise equal to the uninterrupted one
(``/final``, ``/deposits``, frames, diagnostics). Same thread count (1).

This drives the Simulation + writer level; the scenario front door
(``chargesim run --resume``) has its own test in test_scenario_resume.py.

Outside reference for the superblock repair: the HDF5 File Format
Specification (superblock v2/v3 fields; metadata checksums are Bob Jenkins'
lookup3 hash), checked against checksums the HDF5 library itself wrote.
"""
import contextlib
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from chargesim.io.schema import FRAME_SCHEMA

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
SCENARIO = "invented channel for crash tests\n"
T_END = 0.6


def build():
    from chargesim.motion import (Domain, FixedCharge, Inlet, LognormalSize, Medium, PlaneCollector, Population,
                                  RectangleArea, Simulation, System, UniformFlow)
    from chargesim.sources import UniformField

    med = Medium(flow=UniformFlow((1.0, 0, 0)))
    pop = Population("dust", LognormalSize(4e-6, 1.6), 1000.0, charge=FixedCharge(-1e-16), weight=100.0)
    inlet = Inlet(pop, RectangleArea((0, 0.05, 0.05), (0, 0.1, 0), (0, 0, 0.1)), rate=2000.0, stop=0.15)
    plate = PlaneCollector("plate", (0, 0, 0), (0, 1, 0), lo=(0, -1, 0), hi=(0.5, 1, 0.1))
    dom = Domain(lo=(-1, 0, 0), hi=(0.5, 0.1, 0.1), kinds=("open", "reflecting", "periodic"))
    sys_ = System(np.random.default_rng(5), medium=med, sources=[UniformField((0, 3e5, 0))], domain=dom,
                  collectors=[plate], inlets=[inlet], coulomb=None, brownian=True)
    return Simulation(sys_, dt=5e-3, diagnostics_every=1, frame_every=5, checkpoint_every=10)


@contextlib.contextmanager
def _one_thread():
    """numba's thread count of the reference run (bitwise equality holds for one count)."""
    import numba

    old = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        yield
    finally:
        numba.set_num_threads(old)


def _resume_and_finish(out):
    """Resume the killed run at ``out`` from its checkpoint (from the start
    if it has none) and run it to the end with the reference's thread count;
    returns the snapshot resumed from."""
    from chargesim.io import open_for_resume

    with _one_thread():
        writer, snap = open_for_resume(out, scenario_text=SCENARIO, seed=5)
        sim = build()
        if snap is not None:
            sim.restore(snap)
        sim.run(t_end=T_END, recorder=writer)
    return snap


def _same_run(res, reference):
    """A finished run recorded exactly what the reference did."""
    assert res.finished
    for name in ("final", "deposits", "escapes", "diagnostics"):
        _same(getattr(res, name), getattr(reference, name), name)
    assert len(res.frames) == len(reference.frames)
    for k in range(len(res.frames)):
        _same(res.frames[k], reference.frames[k], f"frame {k}")


def _drive(out, kill):
    """Subprocess body: run with the writer, SIGKILL ourselves at ``kill``."""
    import chargesim.io.checkpoint as ck
    from chargesim.io import ResultsWriter
    from chargesim.io import writer as wmod

    def die():
        os.kill(os.getpid(), signal.SIGKILL)

    resume = kill.startswith("resume,")  # resume a killed run first, then kill it again
    kill = kill.removeprefix("resume,")
    what, _, arg = kill.partition(":")
    if what == "append":
        n = {"left": int(arg)}
        orig = wmod.ResultsWriter._append

        def _append(self, ds, data, at):
            n["left"] -= 1
            if n["left"] == 0:
                die()
            return orig(self, ds, data, at)
        wmod.ResultsWriter._append = _append
    elif what == "checkpoint":
        n = {"left": int(arg)}
        orig_replace = ck.os.replace

        class _OS:
            def __getattr__(self, name):
                return getattr(os, name)

            @staticmethod
            def replace(a, b):
                n["left"] -= 1
                if n["left"] == 0:
                    die()  # temp file written, not yet renamed
                return orig_replace(a, b)
        ck.os = _OS()
    elif what == "finish":
        def _write_summary(self, f, summary):
            f.flush()
            die()
        wmod.ResultsWriter._write_summary = _write_summary
    if resume:
        _resume_and_finish(out)
    else:
        build().run(t_end=T_END, recorder=ResultsWriter(out, scenario_text=SCENARIO, seed=5))


def _kill_run(out, kill):
    env = dict(os.environ, NUMBA_NUM_THREADS="1", PYTHONPATH=ROOT)
    p = subprocess.Popen([sys.executable, __file__, out, kill], env=env, cwd=ROOT,
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    if kill.startswith("time:"):
        ck = out + ".checkpoint"
        t0 = time.monotonic()
        while not os.path.exists(ck) and p.poll() is None and time.monotonic() - t0 < 120:
            time.sleep(0.01)
        time.sleep(float(kill.split(":")[1]))
        if p.poll() is None:
            p.send_signal(signal.SIGKILL)
    p.wait(timeout=120)
    return p.returncode, p.stderr.read().decode()


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    from chargesim.io import ResultsWriter, open_results

    path = str(tmp_path_factory.mktemp("ref") / "ref.h5")
    with _one_thread():
        build().run(t_end=T_END, recorder=ResultsWriter(path, scenario_text=SCENARIO, seed=5))
    return open_results(path)


def _same(a, b, what):
    assert set(a) == set(b), what
    for k in a:
        x, y = np.asarray(a[k]), np.asarray(b[k])
        assert x.dtype == y.dtype and x.shape == y.shape, (what, k)
        assert x.tobytes() == y.tobytes(), (what, k)


def _prefix(part, full, what):
    for k in part:
        n = len(part[k])
        assert n <= len(full[k]), (what, k)
        assert np.asarray(part[k]).tobytes() == np.asarray(full[k][:n]).tobytes(), (what, k)


@pytest.mark.parametrize("kill", ["append:9", "append:333", "checkpoint:2", "finish", "time:0.05"])
def test_kill_read_resume_bitwise(tmp_path, reference, kill):
    from chargesim.io import open_results

    out = str(tmp_path / "out.h5")
    rc, err = _kill_run(out, kill)
    if rc == 0:
        pytest.skip(f"the run finished before the kill at {kill}")
    assert rc == -signal.SIGKILL, err
    assert not os.path.exists(out), "a killed run left a file under the final name"
    assert os.path.exists(out + ".partial")

    # what is there reads back, and is exactly what the full run recorded
    part = open_results(out)
    assert not part.finished and part.path.endswith(".partial")
    assert len(part.frames) <= len(reference.frames)
    for k in range(len(part.frames)):
        _same(part.frames[k], reference.frames[k], f"frame {k}")
    _prefix(part.deposits, reference.deposits, "deposits")
    _prefix(part.escapes, reference.escapes, "escapes")
    _prefix(part.diagnostics, reference.diagnostics, "diagnostics")

    if os.path.exists(out + ".checkpoint"):
        # checkpoints fall on frames here: the snapshot's particle columns
        # are kept as the frame's rows, so resume reads them from the file
        assert _kept_as_rows(out + ".checkpoint") == set(FRAME_SCHEMA)

    _resume_and_finish(out)
    res = open_results(out)
    assert not os.path.exists(out + ".partial") and not os.path.exists(out + ".checkpoint")
    _same_run(res, reference)
    for key in ("emitted_mass", "deposited_mass", "escaped_mass", "collection_efficiency"):
        assert res.summary[key] == reference.summary[key], key
    import h5py

    with h5py.File(out, "r") as f:  # the rebuilt file keeps each dataset's filters
        assert f["frames/id"].scaleoffset == 0 and f["deposits/id"].scaleoffset == 0
        assert f["deposits/surface"].compression == "gzip" and f["deposits/surface"].shuffle


@pytest.mark.parametrize("second, step", [("resume,checkpoint:2", 20), ("resume,append:7", 10)])
def test_killed_again_after_resuming_resumes_bitwise(tmp_path, reference, second, step):
    # a resumed run killed again: after a checkpoint of its own (whose particle
    # columns are rows of frames it wrote after the rebuild), or before one
    # (the first run's checkpoint then refers to rows the rebuilt file kept)
    from chargesim.io import load_checkpoint, open_results

    out = str(tmp_path / "twice.h5")
    for kill, at in (("checkpoint:2", 10), (second, step)):  # checkpoints every 10 steps
        rc, err = _kill_run(out, kill)
        assert rc == -signal.SIGKILL, err
        assert os.path.exists(out + ".checkpoint") and not os.path.exists(out)
        assert _kept_as_rows(out + ".checkpoint") == set(FRAME_SCHEMA)
        assert load_checkpoint(out + ".checkpoint", results=out + ".partial")[0]["step"] == at
    assert _resume_and_finish(out) is not None
    _same_run(open_results(out), reference)


def _kept_as_rows(checkpoint):
    """Names of the snapshot's particle columns a checkpoint keeps as rows of the results file."""
    import json

    import h5py

    with h5py.File(checkpoint, "r") as f:
        tree = json.loads(f["snapshot"][()])
    return {k for k, v in tree["particles"].items() if isinstance(v, dict) and v.get("$") == "rows"}


def test_reference_run_is_not_trivial(reference):
    # the crash tests above mean something only if the run records all kinds
    assert len(reference.frames) >= 10 and len(reference.deposits["id"]) > 20
    assert len(reference.escapes["id"]) > 0 and len(reference.final["id"]) > 0


def test_lookup3_matches_the_hdf5_library(tmp_path):
    import h5py

    from chargesim.io.repair import clear_status_flags, lookup3, status_flags

    # checksums the HDF5 library wrote into superblocks of different files
    for i in range(3):
        p = str(tmp_path / f"f{i}.h5")
        with h5py.File(p, "w", libver="latest") as f:
            f.attrs["i"] = i
            f["x"] = np.arange(10 * i + 1)
        head = open(p, "rb").read(48)
        assert head[8] in (2, 3)
        assert lookup3(head[:44]) == int.from_bytes(head[44:48], "little")
        assert status_flags(p) == 0 and clear_status_flags(p) is False
    # reference values of hashlittle printed by the self-test in Jenkins' lookup3.c (from memory)
    assert lookup3(b"", 0) == 0xDEADBEEF
    assert lookup3(b"Four score and seven years ago", 0) == 0x17770551
    assert lookup3(b"Four score and seven years ago", 1) == 0xCD628161


def test_resume_with_nothing_to_resume_starts_fresh(tmp_path):
    from chargesim.io import open_for_resume

    out = str(tmp_path / "new.h5")
    w, snap = open_for_resume(out, scenario_text=SCENARIO)
    assert snap is None and os.path.exists(out + ".partial")
    w.close()


if __name__ == "__main__":
    _drive(sys.argv[1], sys.argv[2])
