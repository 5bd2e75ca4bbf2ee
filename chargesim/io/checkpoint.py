"""Checkpoint files: the run loop's snapshot, stored exactly, written atomically.

A snapshot is a nested structure of dicts (str keys), lists, tuples, numpy
arrays, numpy scalars, Python ints (any size: the RNG state holds 128-bit
integers), floats, bools, strings and None. :func:`load_checkpoint` returns an
equal structure with the same types and bitwise-equal arrays.

Layout of a checkpoint file (HDF5): root attributes ``format``
(``"chargesim-checkpoint"``), ``format_version`` (``CHECKPOINT_VERSION``),
``meta`` (JSON text, the writer's counters); the dataset ``/snapshot``, one
JSON text of the whole structure, whose arrays are the datasets
``/arrays/0``, ``/arrays/1``, ... (exact dtype and shape). In the JSON,
dicts, lists, str, None, bools, ints (any size) and floats stand for
themselves (Python's JSON writes floats by their shortest round-trip repr,
NaN and infinities included, so they come back bitwise); other nodes are
objects tagged by the key ``"$"``:

- ``{"$": "array", "i": k}``: the array ``/arrays/k``;
- ``{"$": "npscalar", "i": k}``: the numpy scalar held by the 0-d ``/arrays/k``;
- ``{"$": "unicode", "i": k, "dtype": "<U5"}``: a numpy str array, stored as
  its UTF-32 code units (uint32, one more axis);
- ``{"$": "tuple", "items": [...]}``;
- ``{"$": "dict", "items": {...}}``: a dict that has a key ``"$"`` itself;
- ``{"$": "rows", "dataset": ..., "start": ..., "stop": ..., "dtype": ...,
  "shape": [...]}``: an array kept elsewhere, rows ``start:stop`` of that
  dataset of the checkpoint's results file (a :class:`ResultsRows` in the
  snapshot saved). The results writer stores a snapshot's particle columns
  so when the frame of the same step holds them bitwise: a checkpoint of
  1e5 particles then takes 4 MB instead of 12.

Why one JSON text rather than a group per node: every HDF5 group and
attribute costs 50-80 us of a call that holds Python's lock; the snapshot of
a run had about 20 groups and 80 attributes (6-8 ms a checkpoint, measured),
now the file holds one dataset per array.

Atomicity: the file is written as ``PATH.tmp``, flushed, fsync'ed, then
``os.replace``d onto ``PATH`` and the directory fsync'ed, so a reader sees
the old checkpoint or the new one, never half of one.
"""
import json
import os

import h5py
import numpy as np

from .repair import open_for_reading
from .schema import CHECKPOINT_FORMAT, CHECKPOINT_VERSION


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


def _encode(value, arrays, where):
    """The JSON form of a snapshot node; its arrays are appended to ``arrays``."""
    if isinstance(value, np.generic) and value.dtype.kind != "U":  # before float: numpy's float64 is one
        arrays.append(np.asarray(value))
        return {"$": "npscalar", "i": len(arrays) - 1}
    if value is None or isinstance(value, (bool, int, float, str)) and not isinstance(value, np.generic):
        return value
    if isinstance(value, (np.ndarray, np.str_)):
        arr = np.asarray(value)
        if arr.dtype.kind == "O":
            raise ValueError(f"snapshot entry {where}: object arrays cannot be stored")
        if arr.dtype.kind == "U":  # as UTF-32 code units, which HDF5 has no type for
            arrays.append(np.ascontiguousarray(arr).view(np.uint32).reshape(arr.shape + (-1,)))
            node = {"$": "unicode", "i": len(arrays) - 1, "dtype": arr.dtype.str}
            return dict(node, scalar=True) if isinstance(value, np.str_) else node
        arrays.append(arr)
        return {"$": "array", "i": len(arrays) - 1}
    if isinstance(value, ResultsRows):
        return {"$": "rows", "dataset": value.dataset, "start": value.start, "stop": value.stop,
                "dtype": value.dtype.str, "shape": list(value.shape)}
    if isinstance(value, list):
        return [_encode(v, arrays, f"{where}/{i}") for i, v in enumerate(value)]
    if isinstance(value, tuple):
        return {"$": "tuple", "items": [_encode(v, arrays, f"{where}/{i}") for i, v in enumerate(value)]}
    if isinstance(value, dict):
        for k in value:
            if not isinstance(k, str):
                raise ValueError(f"snapshot dict keys must be str, got {k!r} in {where}")
        items = {k: _encode(v, arrays, f"{where}/{k}") for k, v in value.items()}
        return {"$": "dict", "items": items} if "$" in value else items
    raise ValueError(f"snapshot entry {where} has unsupported type {type(value).__name__}")


def _decode(node, array, rows):
    if isinstance(node, list):
        return [_decode(v, array, rows) for v in node]
    if not isinstance(node, dict):
        return node
    tag = node.get("$")
    if tag is None:
        return {k: _decode(v, array, rows) for k, v in node.items()}
    if tag == "dict":
        return {k: _decode(v, array, rows) for k, v in node["items"].items()}
    if tag == "tuple":
        return tuple(_decode(v, array, rows) for v in node["items"])
    if tag == "array":
        return np.asarray(array(node["i"])[...])  # 0-d arrays stay arrays
    if tag == "npscalar":
        return array(node["i"])[()]
    if tag == "unicode":
        raw = array(node["i"])[...]
        arr = np.ascontiguousarray(raw).view(np.dtype(node["dtype"])).reshape(raw.shape[:-1])
        return arr[()] if node.get("scalar") else arr
    if tag == "rows":
        return rows(node["dataset"], int(node["start"]), int(node["stop"]), np.dtype(node["dtype"]),
                    tuple(node["shape"]))
    raise ValueError(f"unknown snapshot node {tag!r}")


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
    arrays = []
    tree = json.dumps(_encode(snapshot, arrays, "snapshot"))
    with h5py.File(tmp, "w") as f:
        f.attrs["format"] = CHECKPOINT_FORMAT
        f.attrs["format_version"] = CHECKPOINT_VERSION
        f.attrs["meta"] = json.dumps(meta or {})
        f.create_dataset("snapshot", data=tree, dtype=h5py.string_dtype("utf-8"))
        g = f.create_group("arrays")
        for i, arr in enumerate(arrays):
            g.create_dataset(str(i), data=np.require(arr, requirements="C"))
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

    def rows(dataset, start, stop, dtype, shape):
        if results is None:
            raise ValueError(f"{path}: the snapshot keeps rows {start}:{stop} of {dataset} in the run's "
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
            raise ValueError(f"{results}: has no rows {start}:{stop} of {dataset} ({dtype}) that the "
                             f"checkpoint {path} refers to")
        arr = ds[start:stop]
        if arr.shape != shape:
            raise ValueError(f"{results}: rows {start}:{stop} of {dataset} have shape {arr.shape}, the "
                             f"checkpoint {path} expects {shape}")
        return arr

    try:
        with f:
            fmt = f.attrs.get("format")
            if isinstance(fmt, bytes):
                fmt = fmt.decode()
            if fmt != CHECKPOINT_FORMAT:
                raise ValueError(f"{path}: not a chargesim checkpoint (format attribute {fmt!r})")
            ver = f.attrs.get("format_version", b"")
            ver = ver.decode() if isinstance(ver, bytes) else str(ver)
            if ver.split(".")[0] != CHECKPOINT_VERSION.split(".")[0] or not isinstance(f.get("snapshot"),
                                                                                       h5py.Dataset):
                raise ValueError(f"{path}: checkpoint layout {ver!r} is not readable by this version (reads "
                                 f"{CHECKPOINT_VERSION.split('.')[0]}.x); resume with the chargesim that made "
                                 f"it, or start the run over")
            try:
                tree = json.loads(f["snapshot"][()])
                arrays = f["arrays"]
                snapshot = _decode(tree, lambda i: arrays[str(i)], rows)
            except (KeyError, TypeError, json.JSONDecodeError) as exc:
                raise ValueError(f"{path}: damaged checkpoint ({exc!r})") from None
            return snapshot, json.loads(f.attrs.get("meta", "{}"))
    finally:
        for res in opened:
            res.close()
