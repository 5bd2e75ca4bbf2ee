"""Read a results file into numpy arrays: :func:`open_results`.

Everything is read at open time except the frames (read one at a time on
demand) and the field grids (read on first access), so large runs open fast.
An unfinished file (``PATH.partial``, or a killed run's file) opens too:
``Results.finished`` is False and only complete records are returned (a frame
counts when all its particle rows are visible; an event when all its fields
are).
"""
import json
import os

import h5py
import numpy as np

from ..analysis import efficiency
from . import schema as S
from .repair import open_for_reading


def _attr(obj, name, default=None):
    v = obj.attrs.get(name, default)
    if isinstance(v, bytes):
        v = v.decode()
    if isinstance(v, np.generic):
        v = v.item()
    return v


def _decode_names(arr):
    return np.asarray([b.decode("utf-8") if isinstance(b, bytes) else str(b) for b in arr.tolist()], dtype=str)


def _open(path):
    if not os.path.exists(path):
        raise FileNotFoundError(f"{path}: no such results file")
    with open(path, "rb") as fh:
        head = fh.read(8)
    if head != b"\x89HDF\r\n\x1a\n":
        raise ValueError(f"{path}: not an HDF5 file (no HDF5 signature at the start)")
    try:
        return open_for_reading(path)
    except OSError as exc:
        raise ValueError(f"{path}: corrupt or truncated HDF5 file ({exc})") from None


class Frames:
    """Particle frames of a results file, read one at a time.

    ``len(frames)``; ``frames[k]`` -> dict of arrays (``id``, ``position``
    (n, 3) m, ``velocity`` m/s, ``charge`` C, ``diameter`` m, ``weight``,
    ``population``) of the live particles at ``frames.step[k]`` /
    ``frames.time[k]`` (s).
    """

    def __init__(self, path, step, time, offset, count):
        self._path = path
        self.step, self.time, self.offset, self.count = step, time, offset, count

    def __len__(self):
        return int(self.step.shape[0])

    def __getitem__(self, k):
        n = len(self)
        if not -n <= k < n:
            raise IndexError(f"frame {k} out of range ({n} frames)")
        k %= n
        o, c = int(self.offset[k]), int(self.count[k])
        with _open(self._path) as f:
            g = f["frames"]
            return {name: g[name][o:o + c] for name in S.FRAME_SCHEMA if name in g}

    def __iter__(self):
        for k in range(len(self)):
            yield self[k]


class Results:
    """Contents of one results file (see :func:`open_results`).

    Attributes
    ----------
    path : str
    attrs : dict
        Root attributes (format, versions, creation time, scenario, seed).
    info : dict
        The run description given to the writer's ``start``.
    finished : bool
        True when the run finished (``/summary`` written).
    summary : dict
        ``/summary`` attributes (masses kg, ``collection_efficiency``, ...).
    deposits, escapes, final : dict of str to ndarray
    diagnostics : dict of str to ndarray (``step``, ``time`` s, one per value)
    diagnostics_units : dict of str to str
    frames : Frames
    """

    def __init__(self, path):
        self.path = os.fspath(path)
        f = _open(self.path)
        try:
            with f:
                self._check(f)
                self._read(f)
        except (KeyError, OSError, RuntimeError, TypeError) as exc:
            # h5py reports damaged metadata as KeyError / OSError on access
            raise ValueError(f"{self.path}: corrupt or damaged results file ({exc})") from None

    def _check(self, f):
        fmt = _attr(f, "format")
        if fmt != S.FORMAT_NAME:
            raise ValueError(f"{self.path}: not a chargesim results file "
                             f"(root attribute 'format' is {fmt!r}, expected {S.FORMAT_NAME!r})")
        ver = str(_attr(f, "format_version", ""))
        if ver.split(".")[0] != S.FORMAT_VERSION.split(".")[0]:
            raise ValueError(f"{self.path}: results format version {ver!r} is not readable by this "
                             f"version (reads {S.FORMAT_VERSION.split('.')[0]}.x)")

    def _read(self, f):
        self.attrs = {k: _attr(f, k) for k in f.attrs}
        try:
            self.info = json.loads(self.attrs.get("run_info") or "{}")
        except json.JSONDecodeError:
            raise ValueError(f"{self.path}: root attribute 'run_info' is not valid JSON") from None
        self.finished = "summary" in f and not self.path.endswith(S.PARTIAL_SUFFIX)
        self.summary = {}
        self.summary_units = {}
        if "summary" in f:
            for k in f["summary"].attrs:
                v = _attr(f["summary"], k)
                self.summary[k] = v
            self.summary_units = json.loads(self.summary.pop("units", "{}"))
            for k, u in self.summary_units.items():
                if u == "json" and isinstance(self.summary.get(k), str):
                    self.summary[k] = json.loads(self.summary[k])
        self.deposits = self._events(f, "deposits")
        self.escapes = self._events(f, "escapes")
        self.final = {}
        if "final" in f:
            self.final = {k: f["final"][k][...] for k in f["final"]}
        self.diagnostics, self.diagnostics_units = self._diagnostics(f)
        self.frames = self._frames(f)
        self.field_names = sorted(f["fields"]) if "fields" in f else []
        self._fields = None

    @staticmethod
    def _events(f, name):
        if name not in f:
            return {}
        g = f[name]
        n = min(g[k].shape[0] for k in S.EVENT_SCHEMA if k in g)
        out = {}
        for k in S.EVENT_SCHEMA:
            if k not in g:
                continue
            a = g[k][:n]
            out[k] = _decode_names(a) if k == "surface" else a
        return out

    @staticmethod
    def _diagnostics(f):
        if "diagnostics" not in f:
            return {}, {}
        g = f["diagnostics"]
        n = min(g["step"].shape[0], g["time"].shape[0], g["values"].shape[0])
        names = _decode_names(g["names"][...])
        units = _decode_names(g["units"][...])
        vals = g["values"][:n]
        out = {"step": g["step"][:n], "time": g["time"][:n]}
        uout = {"step": "1", "time": "s"}
        for i, nm in enumerate(names):
            if nm:
                out[str(nm)] = vals[:, i]
                uout[str(nm)] = str(units[i])
        return out, uout

    def _frames(self, f):
        if "frames" not in f:
            z = np.zeros(0, dtype=np.int64)
            return Frames(self.path, z, z.astype(float), z, z)
        g = f["frames"]
        m = min(g[k].shape[0] for k in S.FRAME_INDEX)
        rows = min(g[k].shape[0] for k in S.FRAME_SCHEMA if k in g)
        off, cnt = g["offset"][:m], g["count"][:m]
        m = int(np.count_nonzero(off + cnt <= rows)) if m else 0  # complete frames only
        return Frames(self.path, g["step"][:m], g["time"][:m], off[:m], cnt[:m])

    @property
    def fields(self):
        """Field grids: {name: {"x", "y", "z" (m), "potential" (nx, ny, nz) V,
        "field" (nx, ny, nz, 3) V/m, "attrs"}} (read on first access)."""
        if self._fields is None:
            out = {}
            with _open(self.path) as f:
                for name in self.field_names:
                    g = f["fields"][name]
                    d = {k: g[k][...] for k in ("x", "y", "z")}
                    if "potential" in g:
                        d["potential"] = g["potential"][...].transpose(2, 1, 0)
                    if "field" in g:
                        d["field"] = g["field"][...].transpose(2, 1, 0, 3)
                    d["attrs"] = {k: _attr(g, k) for k in g.attrs}
                    out[name] = d
            self._fields = out
        return self._fields

    @property
    def scenario_text(self):
        """The scenario file's text the run was made from."""
        return self.attrs.get("scenario", "")

    @property
    def seed(self):
        """Seed of the run (None if not given)."""
        s = self.attrs.get("seed")
        return None if s is None or int(s) == -1 else int(s)

    def surfaces(self):
        """Surface names (from the run info, else those seen in deposits)."""
        s = self.info.get("surfaces")
        if isinstance(s, dict):
            return list(s)
        if isinstance(s, list):
            return [x["name"] if isinstance(x, dict) else str(x) for x in s]
        return sorted(set(self.deposits.get("surface", np.zeros(0, str)).tolist()))

    def emitted_mass(self):
        """Real emitted mass, kg (from the summary; NaN while unfinished)."""
        return float(self.summary.get("emitted_mass", np.nan))

    def collection_efficiency(self):
        """Deposited / emitted mass (from the summary if written, else NaN)."""
        if "collection_efficiency" in self.summary:
            return float(self.summary["collection_efficiency"])
        e = self.emitted_mass()
        if not np.isfinite(e) or e <= 0:
            return float("nan")
        d = self.deposits
        return float(np.sum(d["mass"] * d["weight"]) / e) if d else float("nan")

    def grade_efficiency(self, edges=None):
        """Collection efficiency per diameter bin, through ``chargesim.analysis.efficiency``.

        Parameters
        ----------
        edges : array_like, optional
            Diameter bin edges, m (default: ``info["size_bins"]``).

        Returns
        -------
        The analysis layer's grade-efficiency result for this file.
        """
        if edges is None:
            edges = self.info.get("size_bins")
        return efficiency.grade_efficiency_from_results(self, edges)

    def __repr__(self):
        state = "finished" if self.finished else "unfinished"
        return (f"<Results {self.path!r} ({state}): {len(self.frames)} frames, "
                f"{len(self.deposits.get('id', ()))} deposits, {len(self.escapes.get('id', ()))} escapes>")


def open_results(path):
    """Open a chargesim results file.

    Parameters
    ----------
    path : str or os.PathLike
        A results file (``OUT.h5``) or an unfinished one (``OUT.h5.partial``).
        Given ``OUT.h5`` that does not exist while ``OUT.h5.partial`` does,
        the partial file is opened.

    Returns
    -------
    Results

    Raises
    ------
    ValueError
        If the file is not HDF5, not a chargesim results file, or corrupt or
        truncated; the message names the path and what is wrong.
    FileNotFoundError
        If neither the file nor its partial file exists.
    """
    path = os.fspath(path)
    if not os.path.exists(path) and os.path.exists(path + S.PARTIAL_SUFFIX):
        path = path + S.PARTIAL_SUFFIX
    return Results(path)
