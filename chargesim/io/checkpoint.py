"""Checkpoint files: the run loop's snapshot, stored exactly, written atomically.

A snapshot is a nested structure of dicts (str keys), lists, tuples, numpy
arrays, numpy scalars, Python ints (any size: the RNG state holds 128-bit
integers), floats, bools, strings and None. :func:`load_checkpoint` returns an
equal structure with the same types and bitwise-equal arrays.

Layout of a checkpoint file (HDF5): root attributes ``format``
(``"chargesim-checkpoint"``), ``format_version``, ``meta`` (JSON text, the
writer's counters); the snapshot under ``/snapshot``. Each node carries
``kind``: ``dict`` / ``list`` / ``tuple`` groups keep their keys in the JSON
attribute ``keys`` and name their children ``0``, ``1``, ...; ``ndarray`` and
``npscalar`` are datasets (exact dtype); ``json`` is a Python scalar in the
attribute ``value`` as JSON text (Python's JSON writes floats by their
shortest round-trip repr, so they come back bitwise; ints of any size exact);
``rows`` is an array kept elsewhere: rows ``start:stop`` of the dataset named
in the attribute ``dataset`` of the checkpoint's results file (a
:class:`ResultsRows` in the snapshot saved), with the attributes ``dtype``
and ``shape`` it must have. The results writer stores a snapshot's particle
columns so when a frame of the same step holds them bitwise: a checkpoint of
1e5 particles then takes 4 MB instead of 12.

Atomicity: the file is written as ``PATH.tmp``, flushed, fsync'ed, then
``os.replace``d onto ``PATH`` and the directory fsync'ed, so a reader sees
the old checkpoint or the new one, never half of one.
"""
import json
import os

import h5py
import numpy as np

from .repair import open_for_reading
from .schema import CHECKPOINT_FORMAT, FORMAT_VERSION


class ResultsRows:
    """An array of a snapshot that the results file already holds, bitwise.

    Parameters
    ----------
    dataset : str
        Path of the dataset in the results file (``"frames/position"``).
    start, stop : int
        Its rows ``start:stop`` are the array.
    dtype : numpy dtype
        The array's dtype (checked on loading).
    shape : tuple of int
        The array's shape (checked on loading).
    """

    __slots__ = ("dataset", "start", "stop", "dtype", "shape")

    def __init__(self, dataset, start, stop, dtype, shape):
        self.dataset, self.start, self.stop = str(dataset), int(start), int(stop)
        self.dtype, self.shape = np.dtype(dtype), tuple(int(k) for k in shape)
        if not 0 <= self.start <= self.stop or self.shape[:1] != (self.stop - self.start,):
            raise ValueError(f"rows {self.start}:{self.stop} do not match shape {self.shape}")


def _plain(value):
    """True for a value that JSON gives back as it was: None, bool, int,
    float (repr round trip, NaN and inf included), str, and lists and
    str-keyed dicts of those (a tuple would come back as a list, a numpy
    scalar as a Python one: both keep their own nodes)."""
    if value is None or isinstance(value, (bool, int, float, str)):
        return not isinstance(value, np.generic)
    if isinstance(value, list):
        return all(_plain(v) for v in value)
    if isinstance(value, dict):
        return all(isinstance(k, str) and _plain(v) for k, v in value.items())
    return False


def _put(group, key, value):
    if isinstance(value, dict) and _plain(value):
        # a dict of plain values (counters, masses, per-surface totals) as
        # one JSON attribute: every HDF5 group and attribute costs ~0.2 ms
        # of a call that holds Python's lock, and a checkpoint of a run with
        # a few surfaces had ~100 of them (17 ms a checkpoint)
        sub = group.create_group(key)
        sub.attrs["kind"] = "json"
        sub.attrs["value"] = json.dumps(value)
    elif isinstance(value, dict):
        sub = group.create_group(key)
        sub.attrs["kind"] = "dict"
        keys = list(value)
        for k in keys:
            if not isinstance(k, str):
                raise ValueError(f"snapshot dict keys must be str, got {k!r}")
        sub.attrs["keys"] = json.dumps(keys)
        for i, k in enumerate(keys):
            _put(sub, str(i), value[k])
    elif isinstance(value, (list, tuple)):
        sub = group.create_group(key)
        sub.attrs["kind"] = "list" if isinstance(value, list) else "tuple"
        sub.attrs["keys"] = json.dumps(len(value))
        for i, v in enumerate(value):
            _put(sub, str(i), v)
    elif isinstance(value, np.ndarray):
        if value.dtype.kind == "O":
            raise ValueError(f"snapshot entry {group.name}/{key}: object arrays cannot be stored")
        if value.dtype.kind == "U":
            # numpy unicode -> UTF-32 bytes, exact, with the dtype kept
            ds = group.create_dataset(key, data=value.view(np.uint32).reshape(value.shape + (-1,)))
            ds.attrs["kind"] = "unicode"
            ds.attrs["dtype"] = value.dtype.str
        else:
            ds = group.create_dataset(key, data=np.require(value, requirements="C"))  # keeps 0-d
            ds.attrs["kind"] = "ndarray"
        ds.attrs["units"] = "see the run loop's snapshot"
    elif isinstance(value, ResultsRows):
        sub = group.create_group(key)
        sub.attrs["kind"] = "rows"
        sub.attrs["dataset"] = value.dataset
        sub.attrs["start"], sub.attrs["stop"] = value.start, value.stop
        sub.attrs["dtype"] = value.dtype.str
        sub.attrs["shape"] = json.dumps(value.shape)
    elif isinstance(value, np.generic):
        ds = group.create_dataset(key, data=value)
        ds.attrs["kind"] = "npscalar"
        ds.attrs["units"] = "see the run loop's snapshot"
    elif value is None or isinstance(value, (bool, int, float, str)):
        sub = group.create_group(key)
        sub.attrs["kind"] = "json"
        sub.attrs["value"] = json.dumps(value)
    else:
        raise ValueError(f"snapshot entry {group.name}/{key} has unsupported type {type(value).__name__}")


def _text(value):
    return value.decode() if isinstance(value, bytes) else str(value)


def _get(node, rows):
    kind = _text(node.attrs["kind"])
    if kind == "dict":
        keys = json.loads(node.attrs["keys"])
        return {k: _get(node[str(i)], rows) for i, k in enumerate(keys)}
    if kind in ("list", "tuple"):
        n = json.loads(node.attrs["keys"])
        items = [_get(node[str(i)], rows) for i in range(n)]
        return items if kind == "list" else tuple(items)
    if kind == "rows":
        return rows(_text(node.attrs["dataset"]), int(node.attrs["start"]), int(node.attrs["stop"]),
                    np.dtype(_text(node.attrs["dtype"])), tuple(json.loads(node.attrs["shape"])), node.name)
    if kind == "ndarray":
        return np.array(node[()]) if node.shape == () else node[...]
    if kind == "unicode":
        raw = node[...]
        dt = np.dtype(node.attrs["dtype"])
        return np.ascontiguousarray(raw).view(dt).reshape(raw.shape[:-1])
    if kind == "npscalar":
        return node[()]
    if kind == "json":
        return json.loads(node.attrs["value"])
    raise ValueError(f"unknown checkpoint node kind {kind!r} at {node.name}")


def _fsync_dir(path):
    try:
        fd = os.open(os.path.dirname(os.path.abspath(path)) or ".", os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def save_checkpoint(path, snapshot, meta=None):
    """Write a snapshot to ``path`` atomically.

    Parameters
    ----------
    path : str or os.PathLike
        Checkpoint file to (re)place.
    snapshot : dict
        The nested state (see the module docstring for the types allowed).
    meta : dict, optional
        JSON-serialisable extras (the writer stores its row counts here).
    """
    if not isinstance(snapshot, dict):
        raise ValueError(f"snapshot must be a dict, got {type(snapshot).__name__}")
    path = os.fspath(path)
    tmp = path + ".tmp"
    with h5py.File(tmp, "w") as f:
        f.attrs["format"] = CHECKPOINT_FORMAT
        f.attrs["format_version"] = FORMAT_VERSION
        f.attrs["meta"] = json.dumps(meta or {})
        _put(f, "snapshot", snapshot)
        f.flush()
    with open(tmp, "rb+") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    _fsync_dir(path)


def load_checkpoint(path, results=None):
    """Read a checkpoint written by :func:`save_checkpoint`.

    Parameters
    ----------
    path : str or os.PathLike
        Checkpoint file.
    results : str or os.PathLike, optional
        The results file the checkpoint belongs to (its partial file while
        the run is unfinished): needed when the snapshot keeps arrays there
        (:class:`ResultsRows`); a file a killed writer left marked open is
        read too.

    Returns
    -------
    snapshot : dict
        Equal to the snapshot saved (same types, bitwise-equal arrays).
    meta : dict
        The ``meta`` saved with it.

    Raises
    ------
    ValueError
        If the file is not a checkpoint of ours or cannot be read, or if an
        array it keeps in the results file is not there as recorded (or no
        results file was given).
    """
    path = os.fspath(path)
    try:
        f = h5py.File(path, "r")
    except OSError as exc:
        raise ValueError(f"{path}: not a readable checkpoint file ({exc})") from None
    opened = []

    def rows(dataset, start, stop, dtype, shape, where):
        if results is None:
            raise ValueError(f"{path}: {where} is kept as rows {start}:{stop} of {dataset} in the run's "
                             f"results file; give that file (results=...)")
        if not opened:
            try:
                opened.append(open_for_reading(os.fspath(results)))
            except OSError as exc:
                raise ValueError(f"{results}: cannot read the rows the checkpoint {path} refers to "
                                 f"({exc})") from None
        res = opened[0]
        ds = res.get(dataset)
        if not isinstance(ds, h5py.Dataset) or ds.shape[0] < stop or ds.dtype != dtype:
            raise ValueError(f"{results}: has no rows {start}:{stop} of {dataset} ({dtype}) for {where} of "
                             f"the checkpoint {path}")
        arr = ds[start:stop]
        if arr.shape != shape:
            raise ValueError(f"{results}: rows {start}:{stop} of {dataset} have shape {arr.shape}, the "
                             f"checkpoint {path} expects {shape} for {where}")
        return arr

    try:
        with f:
            fmt = f.attrs.get("format")
            if isinstance(fmt, bytes):
                fmt = fmt.decode()
            if fmt != CHECKPOINT_FORMAT:
                raise ValueError(f"{path}: not a chargesim checkpoint (format attribute {fmt!r})")
            if "snapshot" not in f:
                raise ValueError(f"{path}: checkpoint has no /snapshot")
            return _get(f["snapshot"], rows), json.loads(f.attrs.get("meta", "{}"))
    finally:
        for res in opened:
            res.close()
