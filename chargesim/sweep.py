"""Parameter sweeps: one full run per point, one results table.

A sweep file (TOML) names a base scenario, the axes (any scenario key path,
with a list of values or a range) and the metrics to tabulate::

    base = "precipitator_duct.toml"          # relative to the sweep file
    combine = "grid"                          # every combination ("zip": pairwise)
    metrics = ["collection_efficiency", "grade_efficiency", "peak_field"]

    [overrides]                               # applied to every point
    "time.end" = "1 s"

    [[axes]]
    key = "electrodes[0].voltage"
    values = ["-35 kV", "-45 kV"]

    [[axes]]
    key = "populations[0].diameter"
    range = { start = "1 um", stop = "10 um", num = 4, spacing = "log" }

Each point is a full run writing ``DIR/points/point-NNNN.h5``; the table is
written as ``DIR/sweep.csv`` and ``DIR/sweep.h5`` in point order (row-major
over the axes in file order), whichever machine ran the points. Points run in
a local process pool by default, or on an existing Dask distributed cluster
(``--scheduler tcp://host:port``; extra ``chargesim[cluster]``). Every point
runs with the same numba thread count (``threads_per_point``, default 1), so
its results do not depend on where it ran.

A killed sweep started again skips points whose files are complete (their
rows are kept beside them as ``point-NNNN.json``) and reruns half-written
ones. A point that fails (a bad combination of values, a failure while
running) is recorded in the table with its message; the others go on, and the
exit code is 1.
"""
import csv
import itertools
import json
import logging
import math
import os
import sys
import time
from dataclasses import dataclass, field

import numpy as np

from ._version import __version__
from .scenario import ScenarioError, load_scenario
from .scenario.schema import Boolean, Choice, Fail, Integer, Node, Table, Tables, Text, show, suggest, validate
from .scenario.units import to_si

log = logging.getLogger(__name__)

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

#: Metrics a sweep can tabulate, with their units.
METRICS = {
    "collection_efficiency": "1",
    "grade_efficiency": "1",
    "transfer_efficiency": "1",
    "deposited_mass": "kg",
    "emitted_mass": "kg",
    "peak_field": "V/m",
    "hazards": "1",
    "run_time": "s",
}

FORMAT_NAME = "chargesim-sweep"
FORMAT_VERSION = "1.0"


class _RawValues(Node):
    """A list of raw scenario values (validated later by the scenario loader)."""

    kind = "values"

    def convert(self, value, path):
        if not isinstance(value, list) or not value:
            raise Fail(path, f"expected a non-empty list of values, got {show(value)}")
        for i, v in enumerate(value):
            if isinstance(v, (dict, list)) or (isinstance(v, float) and not math.isfinite(v)):
                raise Fail(f"{path}[{i}]", f"expected a number, a string such as '30 kV', or a boolean; got {show(v)}")
        return list(value)


class _Raw(Node):
    """A raw scalar value: a number or a unit string; converted per axis."""

    def convert(self, value, path):
        if isinstance(value, bool) or not isinstance(value, (int, float, str)):
            raise Fail(path, f"expected a number or a string with a unit such as '1 um', got {show(value)}")
        if isinstance(value, float) and not math.isfinite(value):
            raise Fail(path, f"NaN and inf are not allowed, got {show(value)}")
        return value


class _Overrides(Node):
    """A table of dotted key paths to raw values."""

    kind = "table"

    def convert(self, value, path):
        if not isinstance(value, dict):
            raise Fail(path, f"expected a table of key paths to values, got {show(value)}")
        for k, v in value.items():
            if isinstance(v, float) and not math.isfinite(v):
                raise Fail(f"{path}.{k}", "NaN and inf are not allowed")
        return dict(value)


class _Metrics(Node):
    def convert(self, value, path):
        if not isinstance(value, list) or not value:
            raise Fail(path, f"expected a non-empty list of metric names, got {show(value)}")
        for i, m in enumerate(value):
            if m not in METRICS:
                hint = suggest(m, METRICS) if isinstance(m, str) else ""
                raise Fail(f"{path}[{i}]", f"unknown metric {show(m)}{hint}; allowed: " + ", ".join(METRICS))
        return list(dict.fromkeys(value))


RANGE = Table(
    "A range of values for an axis, in the unit of the scenario key.",
    {
        "start": _Raw("First value (a number is SI, or a string with a unit).", default=None,
                      default_doc="required with `range`"),
        "stop": _Raw("Last value (included).", default=None, default_doc="required with `range`"),
        "num": Integer("Number of values.", None, lo=2, hi=10000, default_doc="required with `range`"),
        "spacing": Choice("`linear` or `log` (geometric) spacing.", ("linear", "log"), "linear"),
    },
)

AXIS = Table(
    "One swept scenario key.",
    {
        "key": Text("Scenario key path, e.g. `electrodes[0].voltage`, `populations[0].diameter`.", max_len=200),
        "values": _RawValues("List of values as they would be written in the scenario.", default=None),
        "range": RANGE,
        "label": Text("Axis label for the table and figure (default: the key).", default=None),
    },
)

SWEEP = Table(
    "A parameter sweep over a base scenario.",
    {
        "title": Text("Title of the sweep.", default=None),
        "base": Text("Base scenario file, relative to the sweep file.", max_len=1000),
        "combine": Choice("`grid`: every combination of the axes' values; `zip`: the i-th values together "
                          "(all axes equally long).", ("grid", "zip"), "grid"),
        "metrics": _Metrics("Metrics to tabulate: " + ", ".join(METRICS) + ".",
                            default=["collection_efficiency"]),
        "grade_bins": _RawValues("Diameter bin edges for grade efficiency (list of lengths), default the run's "
                                 "bins.", default=None),
        "threads_per_point": Integer("numba threads each point runs with (the same everywhere, so results "
                                     "do not depend on where a point ran).", 1, lo=1, hi=256),
        "overrides": _Overrides("Scenario key paths set for every point (for example a shorter end time).",
                                default={}),
        "axes": Tables("The swept keys.", AXIS, min_len=1, max_len=8),
        "figure": Table(
            "The summary figure: a metric against one axis, one curve per value of another.",
            {
                "x": Text("Axis key on the horizontal axis (default: the first axis).", default=None),
                "series": Text("Axis key of the curves (default: the second axis, if any).", default=None),
                "y": Text("Metric on the vertical axis.", "collection_efficiency"),
                "log_x": Boolean("Logarithmic horizontal axis.", False),
            },
        ),
    },
)


@dataclass
class Sweep:
    """A validated sweep file.

    Attributes
    ----------
    path : str
        The sweep file.
    text : str
        Its text.
    base : str
        Absolute path of the base scenario.
    keys : list of str
        Axis key paths, in file order.
    values : list of list
        Raw values of each axis.
    points : list of dict
        Overrides of each point (fixed overrides included), in table order.
    data : dict
        The validated document.
    """

    path: str
    text: str
    base: str
    keys: list
    values: list
    points: list
    data: dict = field(repr=False)


def _grade_edges(value, path):
    if value is None:
        return None
    if not isinstance(value, list) or len(value) < 2:
        raise ScenarioError(path, "grade_bins", "expected a list of at least two diameters")
    try:
        edges = np.array([to_si(v, "m") for v in value])
    except ValueError as exc:
        raise ScenarioError(path, "grade_bins", str(exc)) from None
    if np.any(edges <= 0) or np.any(np.diff(edges) <= 0):
        raise ScenarioError(path, "grade_bins", "bin edges must be positive and increasing")
    return edges


def _axis_values(axis, path, where):
    has_values = axis["values"] is not None
    has_range = any(axis["range"][k] is not None for k in ("start", "stop", "num"))
    if has_values == has_range:
        raise ScenarioError(path, where, "give exactly one of `values` or `range`")
    if has_values:
        return axis["values"]
    rg = axis["range"]
    for name in ("start", "stop", "num"):
        if rg[name] is None:
            raise ScenarioError(path, f"{where}.range.{name}", "missing required key of a range")
    unit = _unit_of(axis["key"])
    try:
        a, b = to_si(rg["start"], unit), to_si(rg["stop"], unit)
    except ValueError as exc:
        raise ScenarioError(path, f"{where}.range", f"{exc} (the unit of {axis['key']})") from None
    if rg["spacing"] == "log":
        if a <= 0 or b <= 0:
            raise ScenarioError(path, f"{where}.range", "log spacing needs positive start and stop")
        return [float(v) for v in np.geomspace(a, b, rg["num"])]
    return [float(v) for v in np.linspace(a, b, rg["num"])]


def _node_at(key):
    """The vocabulary node of a scenario key path (None if unknown)."""
    from .scenario.vocabulary import SCENARIO

    node = SCENARIO
    for part in str(key).split("."):
        name = part.split("[")[0]
        while isinstance(node, Tables):
            node = node.item
        if not isinstance(node, Table):
            return None
        fields = dict(node.fields)
        for _, extra in (node.variants or {}).values():
            fields.update(extra)
        node = fields.get(name)
        if node is None:
            return None
        if "[" in part:
            while isinstance(node, Tables):
                node = node.item
    return node


def _unit_of(key):
    node = _node_at(key)
    return getattr(node, "unit", "1")


def loads_sweep(text, path="<string>"):
    """Validate sweep text (see :func:`load_sweep`)."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(path, "", f"not valid TOML: {exc}") from None
    data = validate(SWEEP, doc, path)
    where = os.path.dirname(os.path.abspath(path)) if path != "<string>" else os.getcwd()
    base = os.path.normpath(os.path.join(where, data["base"]))
    if not os.path.isfile(base):
        raise ScenarioError(path, "base", f"base scenario {data['base']!r} not found (looked for {base})")
    base_scenario = load_scenario(base)
    data["grade_bins"] = _grade_edges(data["grade_bins"], path)
    keys, values = [], []
    for i, axis in enumerate(data["axes"]):
        where_axis = f"axes[{i}]"
        if _node_at(axis["key"]) is None:
            raise ScenarioError(path, f"{where_axis}.key", f"{axis['key']!r} is not a scenario key path")
        if axis["key"] in keys:
            raise ScenarioError(path, f"{where_axis}.key", f"{axis['key']!r} is swept twice")
        keys.append(axis["key"])
        values.append(_axis_values(axis, path, where_axis))
    if data["combine"] == "zip":
        if len({len(v) for v in values}) != 1:
            raise ScenarioError(path, "combine", "`zip` needs all axes to have the same number of values, got "
                                + ", ".join(str(len(v)) for v in values))
        combos = list(zip(*values))
    else:
        combos = list(itertools.product(*values))
    fig = data["figure"]
    for name in ("x", "series"):
        if fig[name] is not None and fig[name] not in keys:
            raise ScenarioError(path, f"figure.{name}", f"{fig[name]!r} is not one of the axes: " + ", ".join(keys))
    if fig["y"] not in METRICS:
        raise ScenarioError(path, "figure.y", f"{fig['y']!r} is not a metric; allowed: " + ", ".join(METRICS))
    # a misspelt key path inside the scenario is a sweep-file error, found
    # before anything runs; other errors of a point are recorded in its row
    first = {**data["overrides"], **{k: v[0] for k, v in zip(keys, values)}}
    try:
        base_scenario.replace(first)
    except ScenarioError as exc:
        if "unknown key" in exc.reason or "not a key path" in exc.reason or "no list" in exc.reason:
            where = next((f"axes[{i}].key" for i, k in enumerate(keys) if exc.path.startswith(k.split("[")[0])),
                         "overrides")
            raise ScenarioError(path, where, f"{exc.path}: {exc.reason}") from None
    points = [{**data["overrides"], **dict(zip(keys, combo))} for combo in combos]
    # values that fail for some points are recorded in their rows; a sweep in
    # which no point is a valid scenario is a mistake in the sweep file
    first_error = None
    for point in points:
        try:
            base_scenario.replace(point)
            break
        except ScenarioError as exc:
            first_error = first_error or exc
    else:
        raise ScenarioError(path, "", f"no point of the sweep is a valid scenario; the first says: {first_error}")
    return Sweep(str(path), text, base, keys, values, points, data)


def load_sweep(path):
    """Load and validate a sweep file.

    Parameters
    ----------
    path : str or os.PathLike
        The sweep TOML file.

    Returns
    -------
    Sweep

    Raises
    ------
    ScenarioError
        For a file that does not validate (names the file, key path and value).
    """
    p = os.fspath(path)
    try:
        with open(p, "rb") as fh:
            text = fh.read().decode("utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ScenarioError(p, "", f"cannot read the sweep file ({exc})") from None
    return loads_sweep(text, p)


# --- one point -------------------------------------------------------------------------

def _point_name(index):
    return f"point-{index:04d}"


def _metrics_of(results, scenario, metrics, edges):
    row = {}
    summary = results.summary
    for m in metrics:
        if m == "collection_efficiency":
            row[m] = float(summary.get("collection_efficiency", math.nan))
        elif m in ("deposited_mass", "emitted_mass"):
            row[m] = float(summary.get(m, math.nan))
        elif m == "transfer_efficiency":
            row[m] = float(summary.get("transfer_efficiency", summary.get("collection_efficiency", math.nan)))
        elif m == "grade_efficiency":
            bins = edges if edges is not None else results.info.get("size_bins")
            if bins is None:
                continue
            eff = np.asarray(results.grade_efficiency(np.asarray(bins, dtype=float))["efficiency"])
            for k, v in enumerate(eff):
                row[f"grade_efficiency[{k}]"] = float(v)
        elif m in ("peak_field", "hazards"):
            from .scenario import build
            from .scenario.summary import fixed_surface_field, hazard_findings

            built = build(scenario, fields_only=True)
            if m == "peak_field":
                peaks = [float(s.peak_field()) for s in built.sources if hasattr(s, "peak_field")]
                surface = fixed_surface_field(built)
                if surface is not None:
                    peaks.append(float(surface))
                row[m] = max(peaks) if peaks else math.nan
            else:
                found = hazard_findings(scenario, built)
                # information findings (corona onset) are not hazards
                row["hazards"] = sum(1 for f in found if f.severity != "info")
                row["hazard_kinds"] = ";".join(sorted({f.kind for f in found}))
    return row


def run_point(spec):
    """Run one sweep point (in whichever process or worker it lands).

    Parameters
    ----------
    spec : dict
        ``index``, ``base`` (scenario path), ``overrides``, ``output`` (.h5
        path), ``metrics``, ``grade_bins`` (list or None), ``threads``.

    Returns
    -------
    dict
        The table row: ``index``, ``status`` ("ok" or "failed"), ``message``,
        ``file`` and the metric columns.
    """
    import numba

    from .scenario import run

    numba.set_num_threads(min(spec["threads"], numba.config.NUMBA_NUM_THREADS))
    row = {"index": spec["index"], "status": "ok", "message": "", "file": os.path.basename(spec["output"])}
    t0 = time.perf_counter()
    try:
        scenario = load_scenario(spec["base"], overrides=spec["overrides"])
        results = run(scenario, output=spec["output"], overwrite=True, quiet=True)
        edges = None if spec["grade_bins"] is None else np.asarray(spec["grade_bins"])
        row.update(_metrics_of(results, scenario, spec["metrics"], edges))
    except Exception as exc:  # one point's failure is recorded; the sweep goes on
        row["status"] = "failed"
        row["message"] = f"{type(exc).__name__}: {exc}" if not isinstance(exc, ValueError) else str(exc)
    if "run_time" in spec["metrics"]:
        row["run_time"] = time.perf_counter() - t0
    return row


def _done_row(spec):
    """The stored row of a point whose results file is complete, else None."""
    from .io import open_results

    side = spec["output"][:-3] + ".json"
    if not (os.path.exists(spec["output"]) and os.path.exists(side)):
        return None
    try:
        with open(side, encoding="utf-8") as fh:
            row = json.load(fh)
        if row.get("overrides") != json.loads(json.dumps(spec["overrides"])):
            return None
        if not open_results(spec["output"]).finished:
            return None
    except (OSError, ValueError):
        return None
    return row["row"]


def _save_row(spec, row):
    side = spec["output"][:-3] + ".json"
    tmp = side + ".tmp"
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump({"overrides": spec["overrides"], "row": row}, fh)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, side)


def _clear_partial(spec):
    for suffix in (".partial", ".checkpoint"):
        if os.path.exists(spec["output"] + suffix):
            os.remove(spec["output"] + suffix)


# --- the sweep --------------------------------------------------------------------------

def run_sweep(sweep, out_dir, *, scheduler=None, workers=None, quiet=True):
    """Run every point of a sweep and write the table.

    Parameters
    ----------
    sweep : Sweep
        From :func:`load_sweep`.
    out_dir : str
        Output directory (created).
    scheduler : str, optional
        Address of a Dask distributed scheduler (``tcp://host:port``); None
        runs a local process pool.
    workers : int, optional
        Local pool size (default: the number of cores).
    quiet : bool
        No progress bar.

    Returns
    -------
    list of dict
        The table rows in point order.
    """
    os.makedirs(os.path.join(out_dir, "points"), exist_ok=True)
    d = sweep.data
    specs = []
    for i, overrides in enumerate(sweep.points):
        specs.append({
            "index": i,
            "base": sweep.base,
            "overrides": overrides,
            "output": os.path.abspath(os.path.join(out_dir, "points", _point_name(i) + ".h5")),
            "metrics": d["metrics"],
            "grade_bins": None if d["grade_bins"] is None else [float(x) for x in d["grade_bins"]],
            "threads": d["threads_per_point"],
        })
    rows = [None] * len(specs)
    todo = []
    for s in specs:
        done = _done_row(s)
        if done is not None:
            rows[s["index"]] = done
        else:
            _clear_partial(s)
            todo.append(s)
    log.info("sweep: %d points, %d already complete", len(specs), len(specs) - len(todo))
    for row in _execute(todo, scheduler, workers, quiet):
        spec = specs[row["index"]]
        if row["status"] == "ok":
            _save_row(spec, row)
        rows[row["index"]] = row
    table = _table(sweep, rows)
    _write_csv(os.path.join(out_dir, "sweep.csv"), table)
    _write_h5(os.path.join(out_dir, "sweep.h5"), sweep, table)
    try:
        _figure(sweep, table, os.path.join(out_dir, "sweep.png"))
    except ValueError as exc:
        log.warning("sweep figure skipped: %s", exc)
    return rows


def _exit_with_parent():
    """Worker initializer: a thread that ends the worker when the sweep's
    process ends. A sweep killed hard (SIGKILL, a crashed session) would
    otherwise leave its workers running their points to the end, and a
    resumed sweep would run the same points beside them."""
    import multiprocessing
    import threading

    parent = multiprocessing.parent_process()
    if parent is None:
        return

    def watch():
        parent.join()  # returns when the parent's end of the pipe closes
        os._exit(1)

    threading.Thread(target=watch, name="exit-with-parent", daemon=True).start()


def _execute(todo, scheduler, workers, quiet):
    if not todo:
        return
    bar = None
    if not quiet and sys.stderr.isatty():
        from tqdm import tqdm

        bar = tqdm(total=len(todo), desc="sweep points", file=sys.stderr)
    try:
        if scheduler is not None:
            try:
                from distributed import Client, as_completed
            except ImportError:
                raise RuntimeError("--scheduler needs the optional extra: pip install 'chargesim[cluster]'") from None
            with Client(scheduler, timeout="30s") as client:
                futures = client.map(run_point, todo, pure=False)
                for fut in as_completed(futures):
                    yield fut.result()
                    if bar:
                        bar.update()
        else:
            import multiprocessing
            from concurrent.futures import ProcessPoolExecutor, as_completed

            n = workers or os.cpu_count() or 1
            # spawn: numba's thread pool must not be inherited through fork
            with ProcessPoolExecutor(max_workers=min(n, len(todo)), mp_context=multiprocessing.get_context("spawn"),
                                     initializer=_exit_with_parent) as pool:
                futures = [pool.submit(run_point, s) for s in todo]
                for fut in as_completed(futures):
                    yield fut.result()
                    if bar:
                        bar.update()
    finally:
        if bar:
            bar.close()


def _table(sweep, rows):
    """Columns (name -> list) in a stable order: index, axes, status, metrics."""
    cols = {"index": [r["index"] for r in rows]}
    for k, key in enumerate(sweep.keys):
        cols[key] = [sweep.points[r["index"]][key] for r in rows]
    cols["status"] = [r["status"] for r in rows]
    cols["message"] = [r["message"] for r in rows]
    names = []
    for r in rows:
        for name in r:
            if name not in ("index", "status", "message", "file") and name not in names:
                names.append(name)
    metric_order = list(METRICS) + ["hazard_kinds"]

    def rank(name):
        base = name.split("[")[0]
        return (metric_order.index(base) if base in metric_order else len(metric_order),
                int(name.split("[")[1][:-1]) if "[" in name else -1)

    for name in sorted(names, key=rank):
        default = "" if name == "hazard_kinds" else math.nan
        cols[name] = [r.get(name, default) for r in rows]
    cols["file"] = [r["file"] for r in rows]
    return cols


def _write_csv(path, table):
    tmp = path + ".tmp"
    with open(tmp, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(list(table))
        for row in zip(*table.values()):
            w.writerow([repr(v) if isinstance(v, float) else v for v in row])
    os.replace(tmp, path)


def _write_h5(path, sweep, table):
    import datetime

    import h5py

    tmp = path + ".tmp"
    with h5py.File(tmp, "w") as f:
        f.attrs["format"] = FORMAT_NAME
        f.attrs["format_version"] = FORMAT_VERSION
        f.attrs["program_version"] = __version__
        f.attrs["created"] = datetime.datetime.now(datetime.timezone.utc).isoformat()
        f.attrs["sweep_text"] = sweep.text
        with open(sweep.base, encoding="utf-8") as fh:
            f.attrs["base_scenario_text"] = fh.read()
        if sweep.data["grade_bins"] is not None:
            ds = f.create_dataset("grade_bins", data=np.asarray(sweep.data["grade_bins"]))
            ds.attrs["units"] = "m"
        g = f.create_group("table")
        g.attrs["columns"] = json.dumps(list(table))
        for name, col in table.items():
            numeric = all(isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool) for v in col)
            if numeric:
                ds = g.create_dataset(name, data=np.asarray(col, dtype=float if name != "index" else np.int64))
            else:
                ds = g.create_dataset(name, data=[str(v) for v in col], dtype=h5py.string_dtype())
            base = name.split("[")[0]
            ds.attrs["units"] = METRICS.get(base, _unit_of(name) if name in sweep.keys and numeric else "1")
    os.replace(tmp, path)


def _figure(sweep, table, path):
    """The summary figure: a metric against one axis, one curve per value of
    another; or, for grade efficiency, one curve per point against diameter."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig_spec = sweep.data["figure"]
    keys = sweep.keys
    y = fig_spec["y"]
    ok = [i for i, s in enumerate(table["status"]) if s == "ok"]
    if not ok:
        raise ValueError("no point finished")
    label_of = {a["key"]: a["label"] or a["key"] for a in sweep.data["axes"]}
    if y == "grade_efficiency":
        edges = sweep.data["grade_bins"]
        if edges is None:
            raise ValueError("a grade-efficiency figure needs grade_bins in the sweep file")
        centres = np.sqrt(edges[:-1] * edges[1:])
        cols = [f"grade_efficiency[{k}]" for k in range(centres.size)]
        if any(c not in table for c in cols):
            raise ValueError("the table has no grade-efficiency columns")
        curves = [(", ".join(f"{label_of[k]} = {table[k][i]}" for k in keys), centres * 1e6,
                   np.array([float(table[c][i]) for c in cols])) for i in ok]
        xlabel, ylabel, log_x = "particle diameter (µm), bin geometric centre", "grade efficiency (1)", True
        legend_title = None
    else:
        if y not in table:
            raise ValueError(f"metric {y!r} is not in the table")
        xkey = fig_spec["x"] or keys[0]
        skey = fig_spec["series"] or next((k for k in keys if k != xkey), None)

        def si(raw):
            try:
                return to_si(raw, _unit_of(xkey))
            except ValueError:
                return math.nan

        xs = np.array([si(table[xkey][i]) for i in ok])
        ys = np.array([float(table[y][i]) for i in ok])
        series = [table[skey][i] for i in ok] if skey else [None] * len(ok)
        curves = []
        for value in dict.fromkeys(series):
            sel = np.array([j for j, v in enumerate(series) if v == value])
            order = sel[np.argsort(xs[sel])]
            curves.append((None if value is None else f"{value}", xs[order], ys[order]))
        xlabel, ylabel = f"{label_of[xkey]} ({_unit_of(xkey)})", f"{y.replace('_', ' ')} ({METRICS[y]})"
        log_x, legend_title = fig_spec["log_x"], (label_of[skey] if skey else None)
    fig, ax = plt.subplots(figsize=(7, 4.5))
    for label, x, yv in curves:
        ax.plot(x, yv, "o-", label=label)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    if log_x:
        ax.set_xscale("log")
    if y == "grade_efficiency" or METRICS[y] == "1":
        ax.set_ylim(-0.02, 1.02)
    ax.grid(True, alpha=0.3)
    if any(c[0] for c in curves):
        ax.legend(title=legend_title, fontsize=8)
    ax.set_title(sweep.data["title"] or os.path.basename(sweep.path), fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


# --- command line -------------------------------------------------------------------------

def _count(text):
    import argparse

    try:
        n = int(text)
    except ValueError:
        n = 0
    if n < 1:
        raise argparse.ArgumentTypeError(f"must be a whole number >= 1, got {text!r}")
    return n


def add_arguments(parser):
    """Command-line options of ``chargesim sweep``."""
    parser.add_argument("sweep", help="sweep file (TOML)")
    parser.add_argument("-o", "--output", required=True, metavar="DIR", help="output directory")
    parser.add_argument("--scheduler", metavar="ADDRESS", help="Dask distributed scheduler, e.g. tcp://host:8786")
    parser.add_argument("--workers", type=_count, metavar="N", help="local worker processes (default: cores)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")


def command(args):
    """Run ``chargesim sweep``: 0 when every point succeeded, 1 if some failed.

    A sweep file that does not validate raises ``ScenarioError`` (exit 2 by the
    command line).
    """
    sweep = load_sweep(args.sweep)
    rows = run_sweep(sweep, args.output, scheduler=args.scheduler, workers=args.workers, quiet=args.quiet)
    failed = [r for r in rows if r["status"] != "ok"]
    print(f"sweep: {len(rows)} points, {len(rows) - len(failed)} ok, {len(failed)} failed; "
          f"table {os.path.join(args.output, 'sweep.csv')}")
    for r in failed:
        print(f"  point {r['index']}: {r['message']}", file=sys.stderr)
    return 1 if failed else 0
