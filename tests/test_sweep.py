"""Parameter sweeps: validation, local pool vs Dask cluster, resume, failing points."""
import csv
import os
import signal
import subprocess
import sys
import time

import pytest

from chargesim import cli, sweep

HERE = os.path.dirname(__file__)
BASE = os.path.abspath(os.path.join(HERE, "..", "scenarios", "precipitator_duct.toml"))

# a short run of the shipped precipitator duct: a few hundred particles
SHORT = """
"time.end" = "0.4 s"
"inlets[0].rate" = "150 1/s"
"output.frame_interval" = "100 ms"
"""


def _sweep_text(axes, metrics='["collection_efficiency", "grade_efficiency"]', extra=""):
    return f"""
title = "test sweep"
base = {BASE!r}
metrics = {metrics}
grade_bins = ["0.3 um", "2 um", "30 um"]
{extra}
[overrides]
{SHORT}
{axes}
"""


AXES = """
[[axes]]
key = "electrodes[0].voltage"
values = ["-35 kV", "-50 kV"]
[[axes]]
key = "populations[0].median_diameter"
range = { start = "4 um", stop = "16 um", num = 2, spacing = "log" }
"""


def _write(tmp_path, text, name="s.toml"):
    p = tmp_path / name
    p.write_text(text)
    return str(p)


@pytest.mark.parametrize(
    "axes, extra, fragment",
    [
        ("[[axes]]\nkey = 'electrodes[0].voltag'\nvalues = ['1 kV']", "", "is not a scenario key path"),
        ("[[axes]]\nkey = 'electrodes[0].voltage'\nvalues = ['1 kV']\nrange = {start = 1, stop = 2, num = 2}", "",
         "give exactly one of `values` or `range`"),
        ("[[axes]]\nkey = 'electrodes[0].voltage'\nrange = {start = '1 kV', stop = '2 kV'}", "",
         "axes[0].range.num: missing required key"),
        ("[[axes]]\nkey = 'electrodes[0].voltage'\nrange = {start = '1 m', stop = '2 m', num = 2}", "",
         "axes[0].range"),
        ("[[axes]]\nkey = 'populations[0].median_diameter'\nrange = {start = '-1 um', stop = '2 um', num = 3, "
         "spacing = 'log'}", "", "log spacing needs positive start and stop"),
        ("[[axes]]\nkey = 'electrodes[0].voltage'\nvalues = []", "", "expected a non-empty list of values"),
        ("[[axes]]\nkey = 'electrodes[0].voltage'\nvalues = [nan]", "", "expected a number"),
        ("[[axes]]\nkey = 'electrodes[0].voltage'\nvalues = ['1 kV']\nspeling = 1", "", "unknown key"),
        ("[[axes]]\nkey = 'electrodes[0].voltage'\nvalues = ['1 kV']", 'combine = "zipped"', "'zipped' is not allowed"),
        ("[[axes]]\nkey = 'electrodes[0].voltage'\nvalues = ['1 kV', '2 kV']\n[[axes]]\nkey = 'time.step'\n"
         "values = ['1 ms']", 'combine = "zip"', "`zip` needs all axes to have the same number of values"),
        ("[[axes]]\nkey = 'electrodes[0].voltage'\nvalues = ['1 kV']\n[[axes]]\nkey = 'electrodes[0].voltage'\n"
         "values = ['2 kV']", "", "is swept twice"),
        ("[[axes]]\nkey = 'electrodes[0].voltage'\nvalues = ['1 kV']", "[figure]\nx = 'time.end'",
         "figure.x: 'time.end' is not one of the axes"),
        ("", "", "axes: missing"),
    ],
)
def test_sweep_file_errors_exit_2(tmp_path, capsys, axes, extra, fragment):
    path = _write(tmp_path, _sweep_text(axes, extra=extra))
    assert cli.main(["sweep", path, "-o", str(tmp_path / "out"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert fragment in err, err
    assert "Traceback" not in err
    assert path in err


def test_unknown_metric_and_missing_base(tmp_path, capsys):
    path = _write(tmp_path, _sweep_text(AXES, metrics='["colection_efficiency"]'))
    assert cli.main(["sweep", path, "-o", str(tmp_path / "o"), "--quiet"]) == 2
    assert "did you mean 'collection_efficiency'" in capsys.readouterr().err
    path = _write(tmp_path, _sweep_text(AXES).replace(BASE, "nowhere.toml"), "b.toml")
    assert cli.main(["sweep", path, "-o", str(tmp_path / "o"), "--quiet"]) == 2
    assert "base scenario 'nowhere.toml' not found" in capsys.readouterr().err


def test_points_in_stable_row_major_order(tmp_path):
    s = sweep.load_sweep(_write(tmp_path, _sweep_text(AXES)))
    got = [(p["electrodes[0].voltage"], p["populations[0].median_diameter"]) for p in s.points]
    assert got == [("-35 kV", 4e-6), ("-35 kV", pytest.approx(16e-6)), ("-50 kV", 4e-6), ("-50 kV", pytest.approx(16e-6))]


@pytest.fixture(scope="module")
def local_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("local")
    path = _write(tmp, _sweep_text(AXES))
    code = cli.main(["sweep", path, "-o", str(tmp / "out"), "--workers", "2", "--quiet"])
    return tmp, path, code


def test_local_pool_table(local_run):
    tmp, _, code = local_run
    assert code == 0
    text = (tmp / "out" / "sweep.csv").read_text()
    lines = text.splitlines()
    assert lines[0].startswith("index,electrodes[0].voltage,populations[0].median_diameter,status,message,")
    assert "collection_efficiency" in lines[0] and "grade_efficiency[1]" in lines[0]
    assert len(lines) == 5 and all(",ok," in ln for ln in lines[1:])
    # a real result: larger particles at the higher voltage are collected more
    with open(tmp / "out" / "sweep.csv", newline="") as fh:
        eff = [float(r["collection_efficiency"]) for r in csv.DictReader(fh)]
    assert eff[3] > eff[0] > 0
    assert (tmp / "out" / "sweep.h5").exists() and (tmp / "out" / "sweep.png").exists()
    for i in range(4):
        assert (tmp / "out" / "points" / f"point-{i:04d}.h5").exists()
    import h5py

    with h5py.File(tmp / "out" / "sweep.h5", "r") as f:
        assert f.attrs["format"] == "chargesim-sweep"
        for name, ds in f["table"].items():
            assert "units" in ds.attrs, name


def test_dask_cluster_gives_the_same_table(local_run, tmp_path):
    distributed = pytest.importorskip("distributed")
    tmp, path, _ = local_run
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        code = cli.main(["sweep", path, "-o", str(tmp_path / "dask"), "--scheduler", cluster.scheduler_address,
                         "--quiet"])
    assert code == 0
    assert (tmp_path / "dask" / "sweep.csv").read_bytes() == (tmp / "out" / "sweep.csv").read_bytes()


def test_failing_point_is_recorded_and_others_go_on(tmp_path, capsys):
    axes = "[[axes]]\nkey = 'populations[0].median_diameter'\nvalues = ['4 um', '-1 um', '8 um']"
    path = _write(tmp_path, _sweep_text(axes))
    assert cli.main(["sweep", path, "-o", str(tmp_path / "out"), "--workers", "2", "--quiet"]) == 1
    with open(tmp_path / "out" / "sweep.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["status"] for r in rows] == ["ok", "failed", "ok"]
    assert "positive diameter" in rows[1]["message"]
    assert float(rows[0]["collection_efficiency"]) > 0
    assert "point 1:" in capsys.readouterr().err


def _children(pid):
    """Processes whose parent is ``pid`` (Linux /proc; empty elsewhere)."""
    out = []
    if not os.path.isdir("/proc"):
        return out
    for name in os.listdir("/proc"):
        if not name.isdigit():
            continue
        try:
            with open(f"/proc/{name}/stat") as fh:
                fields = fh.read().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[1]) == pid:
            out.append(int(name))
    return out


def _alive(pid):
    """Whether process ``pid`` runs (a zombie does not)."""
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


def test_killed_sweep_resumes_skipping_complete_points(local_run, tmp_path):
    tmp, path, _ = local_run
    out = tmp_path / "killed"
    env = dict(os.environ, PYTHONPATH=os.path.abspath(os.path.join(HERE, "..")))
    proc = subprocess.Popen([sys.executable, "-m", "chargesim", "sweep", path, "-o", str(out), "--workers", "1",
                             "--quiet"], env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    first = out / "points" / "point-0000.json"
    deadline = time.time() + 240
    while not first.exists() and time.time() < deadline and proc.poll() is None:
        time.sleep(0.1)
    workers = _children(proc.pid)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    assert first.exists(), "the first point never completed"
    # its pool workers end with it (they would run on, orphaned, beside the
    # resumed sweep); Linux's /proc lists them
    if os.path.isdir("/proc"):
        assert workers, "no worker process found"
        deadline = time.time() + 30
        while any(_alive(w) for w in workers) and time.time() < deadline:
            time.sleep(0.1)
        assert not any(_alive(w) for w in workers), "a worker outlived the killed sweep"
    stamp = first.stat().st_mtime_ns
    assert cli.main(["sweep", path, "-o", str(out), "--workers", "2", "--quiet"]) == 0
    assert first.stat().st_mtime_ns == stamp  # complete point skipped, not rerun
    assert (out / "sweep.csv").read_bytes() == (tmp / "out" / "sweep.csv").read_bytes()
    # a half-written point (its results file never finished) is run again
    h5 = out / "points" / "point-0003.h5"
    os.remove(h5)
    (out / "points" / "point-0003.h5.partial").write_bytes(b"half a file")
    assert cli.main(["sweep", path, "-o", str(out), "--workers", "1", "--quiet"]) == 0
    assert h5.exists() and not (out / "points" / "point-0003.h5.partial").exists()
    assert (out / "sweep.csv").read_bytes() == (tmp / "out" / "sweep.csv").read_bytes()


def test_shipped_sweep_file_validates():
    shipped = [f for f in os.listdir(os.path.join(HERE, "..", "scenarios")) if "sweep" in f]
    assert shipped
    for name in shipped:
        s = sweep.load_sweep(os.path.join(HERE, "..", "scenarios", name))
        assert len(s.points) >= 4


def test_bad_worker_count_is_a_usage_error(tmp_path, capsys):
    path = _write(tmp_path, _sweep_text(AXES))
    assert cli.main(["sweep", path, "-o", str(tmp_path / "o"), "--workers", "0"]) == 2
    assert "must be a whole number >= 1" in capsys.readouterr().err


def test_a_sweep_with_no_valid_point_is_a_sweep_file_error(tmp_path, capsys):
    # every point asks for the 'single' distribution but gives no diameter
    extra_axes = "[[axes]]\nkey = 'populations[0].distribution'\nvalues = ['single']"
    path = _write(tmp_path, _sweep_text(extra_axes))
    assert cli.main(["sweep", path, "-o", str(tmp_path / "o"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "no point of the sweep is a valid scenario" in err and "for distribution = 'single'" in err
