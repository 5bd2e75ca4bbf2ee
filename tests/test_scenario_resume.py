"""`chargesim run --resume` after SIGKILL ends bitwise equal to an uninterrupted run."""
import os
import pathlib
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

ROOT = pathlib.Path(__file__).resolve().parents[1]
OVERRIDES = {"time.end": "0.5 s", "output.checkpoint_interval": "0.02 s", "output.frame_interval": "0.02 s",
             "inlets[0].rate": "1500 1/s"}


def _cli(args, **kw):
    env = dict(os.environ, NUMBA_NUM_THREADS="1", PYTHONPATH=str(ROOT))
    return subprocess.Popen([sys.executable, "-m", "chargesim", *args], cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, **kw)


def _arrays(path):
    from chargesim.io import open_results

    r = open_results(path)
    return {f"final/{k}": np.asarray(v) for k, v in r.final.items()} | \
           {f"deposits/{k}": np.asarray(v) for k, v in r.deposits.items()}


@pytest.mark.slow
def test_kill_and_resume_bitwise(tmp_path):
    from chargesim.scenario import load_scenario

    s = load_scenario(ROOT / "scenarios" / "precipitator_duct.toml", overrides=OVERRIDES)
    scen = tmp_path / "short.toml"
    scen.write_text(s.text)
    ref, out = tmp_path / "ref.h5", tmp_path / "out.h5"
    p = _cli(["run", str(scen), "-o", str(ref), "--quiet"])
    assert p.wait(timeout=300) == 0, p.stderr.read().decode()

    p = _cli(["run", str(scen), "-o", str(out), "--quiet"])
    ckpt = pathlib.Path(str(out) + ".checkpoint")
    t0 = time.monotonic()
    while not ckpt.exists() and p.poll() is None and time.monotonic() - t0 < 300:
        time.sleep(0.05)
    time.sleep(0.1)  # somewhere after the first checkpoint
    assert p.poll() is None, "the run finished before it could be killed: lengthen OVERRIDES['time.end']"
    p.send_signal(signal.SIGKILL)
    assert p.wait() == -signal.SIGKILL, "the run ended before the kill: lengthen OVERRIDES['time.end']"
    assert not out.exists(), "a killed run must not leave a file under the final name"
    assert pathlib.Path(str(out) + ".partial").exists()

    p = _cli(["run", str(scen), "-o", str(out), "--resume", "--quiet"])
    assert p.wait(timeout=300) == 0, p.stderr.read().decode()
    a, b = _arrays(ref), _arrays(out)
    assert set(a) == set(b)
    for k in a:
        assert a[k].dtype == b[k].dtype and a[k].shape == b[k].shape, k
        assert np.array_equal(a[k], b[k]), k

    # a different scenario is refused for resuming: exit 2
    other = tmp_path / "other.toml"
    other.write_text(load_scenario(scen, overrides={"seed": 99}).text)
    out2 = tmp_path / "out2.h5"
    p = _cli(["run", str(scen), "-o", str(out2), "--quiet"])
    t0 = time.monotonic()
    ck2 = pathlib.Path(str(out2) + ".checkpoint")
    while not ck2.exists() and p.poll() is None and time.monotonic() - t0 < 300:
        time.sleep(0.05)
    if p.poll() is None:
        p.send_signal(signal.SIGKILL)
        p.wait()
        q = _cli(["run", str(other), "-o", str(out2), "--resume", "--quiet"])
        assert q.wait(timeout=300) == 2
        err = q.stderr.read().decode()
        assert "cannot resume" in err and "Traceback" not in err
