"""The HDF5 recorder: one results file per run, crash safe, resumable.

Crash safety (why it holds): the run writes into ``PATH.partial`` opened in
HDF5's single-writer/multiple-reader (SWMR) mode. Every dataset the run
appends to is created, resizable and chunked, before SWMR starts; SWMR then
orders its writes so that the file on disk is a consistent HDF5 file at every
moment (raw data before the metadata that points at it). After each frame
the writer calls ``flush``, and held deposits, escapes and diagnostics rows
are written in that flush or at the latest ``flush_interval`` later; a killed
process loses nothing the operating system already has, so SIGKILL keeps
every flushed record. Within one frame the particle rows are
written before the frame's index row, and readers count a frame (or an
event) only when all its rows are visible, so a half-written frame is never
read. Checkpoints go to their own file, atomically (temp + fsync + rename),
after the partial file is flushed and fsync'ed, so a checkpoint never counts
a record that is not on disk; the particle columns a frame of the same step
holds bit for bit it keeps as references to that frame's rows, which are on
disk before it.

All HDF5 work on the partial file and the checkpoints during the run is done
by one background thread, in the order of the recorder calls. Why (measured
in ``benchmarks/bench_io.py``): the fsyncs wait for the disk, and h5py
releases the GIL inside the large dataset writes and the flushes, so the run
goes on meanwhile; h5py's small calls do hold the GIL, so the calls hand
over few, large items: a frame (its columns copied, since the run changes
the state) with the events held since the last hand-over, a checkpoint (its
snapshot, the writer's to keep) with them, or the held events alone after
``flush_interval``. A checkpoint is an item of the same queue, so every
record handed in before it is written, flushed and fsync'ed before the
checkpoint file is written, and the counts it stores are the thread's own.
The file's contents depend only on the order of the calls, never on timing.
The thread keeps the normal scheduling class: in Linux's idle class it cost
the run less on an otherwise idle machine, but on a busy one it got no core
and the run waited for it (docs/results-format.md).
An error in the thread is raised by the next call (``finish`` and ``close``
wait for the thread and raise it too). A SIGKILL loses what is still queued,
as it loses the events not yet flushed: at most ``_QUEUE_BYTES`` of copies.

``finish`` waits for the thread, writes ``/final`` and ``/summary`` last
(outside SWMR), renames the partial file onto ``PATH`` and writes the XDMF
sidecar: a file under the final name is always a finished one.

A killed partial file keeps HDF5's "open for writing" mark: h5py opens it
with ``h5py.File(p, "r", swmr=True)``; :func:`chargesim.io.open_results`
does that for you; resume rebuilds it.
"""
import atexit
import datetime
import json
import os
import queue
import threading
import time as _time
import warnings
import weakref

import h5py
import numpy as np
from h5py import h5s

from .._version import __version__
from . import schema as S
from .checkpoint import ResultsRows, save_checkpoint

# Chunk rows. Every flush recompresses the partly filled chunk of each
# compressed dataset, so the event and diagnostics chunks are kept small:
# measured (N = 1e5, a frame every 4 steps, 62 flushes a run), event chunks of
# 4096 rows and diagnostics value chunks of 1024 x 64 columns cost 1.5 s of
# the writer thread's CPU in flushes; 1024 and 64 rows cost 0.75 s.
_FRAME_CHUNK = 16384
_EVENT_CHUNK = 1024
_DIAG_CHUNK = 1024  # frame index and diagnostics step/time: 8 bytes a row
_DIAG_VALUE_CHUNK = 64  # diagnostics values: 64 columns of 8 bytes a row
#: Filter of the appendable integer columns (ids, populations, steps) when compressing:
#: HDF5's scale-offset filter, lossless for integers (each chunk stores its
#: minimum and the differences in as few bits as they need), built into every
#: HDF5 library. Measured per frame of 1e5 particles on the writer thread:
#: 2.6 + 1.6 ms for id + population against 4.6-7.4 + 1.9-2.4 ms with deflate
#: and shuffle, for 0.2 MB on disk against 0.09 MB (of 8.4 MB a frame); the
#: thread's CPU is what slows the run's steps beside it.
_INT_KW = {"scaleoffset": 0}
#: Most bytes of copied records waiting for the writer thread (an item larger
#: than this still goes, alone): the run waits rather than fill the memory
#: when the disk is slower than the run.
_QUEUE_BYTES = 256 * 2**20
_STOP = object()
#: Writers whose thread runs: closed at interpreter exit, so a run that forgot
#: ``close`` still gets its queued records written (as it did before there was
#: a thread: h5py flushes open files at exit).
_LIVE = weakref.WeakSet()


@atexit.register
def _close_live_writers():
    for w in list(_LIVE):
        w.close()


def _now():
    return datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")


def _fsync_path(path):
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _compression_kw(compression):
    if compression is None:
        return {}
    if compression == "gzip":
        # level 1 + shuffle: most of gzip's gain on float64 at a fraction of its time
        return {"compression": "gzip", "compression_opts": 1, "shuffle": True}
    if compression == "lzf":
        return {"compression": "lzf", "shuffle": True}
    raise ValueError(f"compression must be 'gzip', 'lzf' or None, got {compression!r}")


def _one_name(arr):
    """The name all of ``arr`` (a non-empty "U" array) holds, or None."""
    if arr.size <= 64:
        # a set of a few Python strings: 1.5 us, where the numpy comparison
        # with its all() took 6 us (a step's batches are this small)
        names = set(arr.ravel().tolist())
        return names.pop() if len(names) == 1 else None
    first = arr.flat[0]
    return str(first) if bool((arr == first).all()) else None


def _encode_names(values, what):
    arr = np.asarray(values)
    if arr.dtype.kind in "iu":
        raise ValueError(f"{what} must hold names (str), got integers")
    one = _one_name(arr) if arr.size and arr.dtype.kind == "U" else None
    if one is not None:
        # a batch of events on one surface, the usual case: one name, no sort
        # (np.unique took 60 us of the 100 us of a step's deposits call)
        b = one.encode("utf-8")
        if len(b) > S.NAME_BYTES:
            raise ValueError(f"{what}: names are limited to {S.NAME_BYTES} UTF-8 bytes")
        return np.full(arr.shape, b, dtype=S.name_dtype())
    # few distinct names, many events: encode each name once
    uniq, inv = np.unique(arr.astype(str), return_inverse=True)
    enc = [u.encode("utf-8") for u in uniq.tolist()]
    if enc and max(len(b) for b in enc) > S.NAME_BYTES:
        raise ValueError(f"{what}: names are limited to {S.NAME_BYTES} UTF-8 bytes")
    table = np.array(enc, dtype=S.name_dtype()) if enc else np.zeros(0, dtype=S.name_dtype())
    return table[inv.reshape(arr.shape)] if arr.size else np.zeros(arr.shape, dtype=S.name_dtype())


class ResultsWriter:
    """Record a run into one HDF5 file (implements the recorder protocol).

    Parameters
    ----------
    path : str or os.PathLike
        Final results file (``.h5``). Work goes to ``path + ".partial"``;
        checkpoints to ``path + ".checkpoint"``.
    scenario_text : str
        The scenario file's text, stored verbatim (resume compares it).
    seed : int or None
        Seed of the run's random generator (stored; None stored as -1).
    overwrite : bool
        Replace an existing ``path`` at ``finish``; else ``FileExistsError``.
    compression : {"gzip", "lzf", None}
        Filter of the appendable text columns (surface names; deflate level
        1 + shuffle for "gzip", which every HDF5 reader has; "lzf" needs
        h5py's plugin). The integer columns take HDF5's scale-offset filter
        instead (lossless, cheaper to write); None: no filter at all.
    float_compression : {"gzip", "lzf", None}
        Filter of the appendable floating-point columns (frames, deposits,
        escapes, diagnostics). Default None: measured on 1e5 particles,
        deflate shrinks float64 frame columns by only ~15 % at 10-20x the
        write time, and each flush recompresses the partly filled chunk of
        every compressed dataset (with the event and diagnostics floats
        deflated, the writer thread spent 1.2-1.5x the CPU time of a run).
    flush_interval : float
        Longest wall-clock time, s, between hand-overs of deposit, escape
        and diagnostics records to the writer thread, which writes and
        flushes them (they also go with every frame, checkpoint and at the
        end; frames are handed over at once). Measured at the recorder
        calls. 0 hands over every call; measured, an HDF5 flush costs
        milliseconds, which per step would exceed the output budget.

    Attributes
    ----------
    background_seconds : float
        Wall time, s, the writer thread has spent writing so far (frames,
        events, flushes, fsyncs, checkpoints), overlapped with the run.
    background_cpu_seconds : float
        CPU time, s, of that thread's writing (without its waits for the
        disk and for Python's interpreter lock): what it takes from the run
        on a machine whose cores the run uses.

    Notes
    -----
    The full layout is in ``docs/results-format.md``. From ``start`` on, a
    background thread does the writing, in call order (see the module
    docstring); ``finish`` or ``close`` waits for it.
    """

    def __init__(self, path, *, scenario_text, seed, overwrite=False, compression="gzip",
                 float_compression=None, flush_interval=1.0, _reopen=False):
        self.path = os.fspath(path)
        self.partial_path = self.path + S.PARTIAL_SUFFIX
        self.checkpoint_path = self.path + S.CHECKPOINT_SUFFIX
        if not isinstance(scenario_text, str):
            raise ValueError(f"scenario_text must be str, got {type(scenario_text).__name__}")
        self.scenario_text = scenario_text
        self.seed = seed
        self._ckw = _compression_kw(compression)
        self._fkw = _compression_kw(float_compression)
        self._f = None
        self._pending_fields = []
        self._started = False
        self._finished = False
        self._counts = {"frames": 0, "frame_rows": 0, "deposits": 0, "escapes": 0, "diagnostics": 0}
        self._diag_cols = {}
        self._diag_width = 0
        self._info = {}
        self._dsets = {}
        self._last_frame = None  # (step, first row, columns) of the last frame written
        # events and diagnostics rows wait here (run's thread) and go to the
        # writer thread in one piece with the next frame or checkpoint, or
        # after flush_interval: one queue item per event call cost ~1.7 ms each
        # in hand-overs between the threads (measured)
        self._held = {"deposits": [], "escapes": [], "diagnostics": []}
        self._pending = {"deposits": [], "escapes": [], "diagnostics": []}
        self.flush_interval = float(flush_interval)
        if not (self.flush_interval >= 0):
            raise ValueError(f"flush_interval must be >= 0 s, got {flush_interval!r}")
        self._last_hand_over = _time.monotonic()
        self.background_seconds = 0.0
        self.background_cpu_seconds = 0.0
        self._queue = queue.Queue()
        self._queued_bytes = 0
        self._room = threading.Condition()
        self._thread = None
        self._error = None
        self._error_raised = False
        if _reopen:
            self._reopen_swmr()
            return
        if os.path.exists(self.path) and not overwrite:
            raise FileExistsError(f"{self.path} exists (pass overwrite=True to replace it)")
        self._create()

    # -- file set-up ------------------------------------------------------------
    def _create(self):
        with h5py.File(self.partial_path, "w", libver="latest") as f:
            f.attrs["format"] = S.FORMAT_NAME
            f.attrs["format_version"] = S.FORMAT_VERSION
            f.attrs["program"] = "chargesim"
            f.attrs["program_version"] = __version__
            f.attrs["created"] = _now()
            f.attrs["scenario"] = self.scenario_text
            f.attrs["seed"] = -1 if self.seed is None else int(self.seed)
            f.attrs["run_info"] = "{}"
            f.create_group("fields")

    def _reopen_swmr(self):
        """Open a (rebuilt, cleanly closed) partial file for appending in SWMR mode."""
        f = h5py.File(self.partial_path, "r+", libver="latest")
        self._info = json.loads(f.attrs.get("run_info", "{}"))
        self._counts = {
            "frames": f["frames/step"].shape[0],
            "frame_rows": f["frames/id"].shape[0],
            "deposits": f["deposits/id"].shape[0],
            "escapes": f["escapes/id"].shape[0],
            "diagnostics": f["diagnostics/step"].shape[0],
        }
        names = [n.decode() if isinstance(n, bytes) else n for n in f["diagnostics/names"][...]]
        self._diag_width = len(names)
        self._diag_cols = {n: i for i, n in enumerate(names) if n}
        f.swmr_mode = True
        self._f = f
        self._started = True
        self._resumed = True
        self._start_thread()

    def _filters(self, dtype):
        """Filter keywords of an appendable column of this dtype (see ``__init__``)."""
        kind = np.dtype(dtype).kind
        if kind == "f":
            return self._fkw
        if kind in "iu":
            return _INT_KW if self._ckw else {}
        return self._ckw

    def _rows(self, group, name, dtype, shape, units, chunk):
        if dtype == "name":
            dtype = S.name_dtype()
        ds = group.create_dataset(name, shape=(0,) + shape, maxshape=(None,) + shape, dtype=dtype,
                                  chunks=(chunk,) + shape, **self._filters(dtype))
        ds.attrs["units"] = units
        return ds

    def _make_layout(self, f, info):
        fr = f.create_group("frames")
        for name, (dt, unit) in S.FRAME_INDEX.items():
            self._rows(fr, name, dt, (), unit, _DIAG_CHUNK)
        for name, (dt, shp, unit) in S.FRAME_SCHEMA.items():
            self._rows(fr, name, dt, shp, unit, _FRAME_CHUNK)
        for gname in ("deposits", "escapes"):
            g = f.create_group(gname)
            for name, (dt, shp, unit) in S.EVENT_SCHEMA.items():
                self._rows(g, name, dt, shp, unit, _EVENT_CHUNK)
        dg = f.create_group("diagnostics")
        self._rows(dg, "step", np.int64, (), "1", _DIAG_CHUNK)
        self._rows(dg, "time", np.float64, (), "s", _DIAG_CHUNK)
        declared = info.get("diagnostics") or {}
        if not isinstance(declared, dict):
            declared = {str(k): S.guess_unit(str(k)) for k in declared}
        width = len(declared) + S.DIAGNOSTIC_COLUMNS
        vals = dg.create_dataset("values", shape=(0, width), maxshape=(None, width), dtype=np.float64,
                                 chunks=(_DIAG_VALUE_CHUNK, width), **self._filters(np.float64))
        vals.attrs["units"] = "per column: /diagnostics/units"
        names = dg.create_dataset("names", shape=(width,), dtype=S.name_dtype())
        names.attrs["units"] = "1"
        units = dg.create_dataset("units", shape=(width,), dtype=S.name_dtype())
        units.attrs["units"] = "1"
        if declared:
            names[: len(declared)] = _encode_names(list(declared), "diagnostics names")
            units[: len(declared)] = _encode_names([str(u) for u in declared.values()], "diagnostics units")
        self._diag_cols = {k: i for i, k in enumerate(declared)}
        self._diag_width = width

    # -- fields -----------------------------------------------------------------
    def write_field(self, name, x, y, z, *, potential=None, field=None, attrs=None):
        """Store a field grid under ``/fields/<name>/``.

        Parameters
        ----------
        name : str
            Grid name (a valid HDF5 name: no "/").
        x, y, z : array_like, shapes (nx,), (ny,), (nz,)
            Grid coordinates, m, strictly increasing.
        potential : array_like, shape (nx, ny, nz), optional
            Electric potential, V.
        field : array_like, shape (nx, ny, nz, 3), optional
            Electric field components, V/m.
        attrs : dict, optional
            Extra descriptive attributes (str or numbers) for the group.
        """
        if not isinstance(name, str) or not name or "/" in name or name in (".", ".."):
            raise ValueError(f"name must be a non-empty str without '/', got {name!r}")
        axes = []
        for label, c in (("x", x), ("y", y), ("z", z)):
            c = np.asarray(c, dtype=np.float64)
            if c.ndim != 1 or c.size < 1:
                raise ValueError(f"{label} must be a 1-D array of grid coordinates, got shape {c.shape}")
            if not np.isfinite(c).all():
                raise ValueError(f"{label} holds a non-finite value at index {int(np.flatnonzero(~np.isfinite(c))[0])}")
            if c.size > 1 and not (np.diff(c) > 0).all():
                raise ValueError(f"{label} must be strictly increasing; index {int(np.flatnonzero(np.diff(c) <= 0)[0]) + 1} is not")
            axes.append(c)
        shape = tuple(a.size for a in axes)
        arrays = {}
        if potential is not None:
            p = np.asarray(potential, dtype=np.float64)
            if p.shape != shape:
                raise ValueError(f"potential must have shape {shape}, got {p.shape}")
            arrays["potential"] = p
        if field is not None:
            e = np.asarray(field, dtype=np.float64)
            if e.shape != shape + (3,):
                raise ValueError(f"field must have shape {shape + (3,)}, got {e.shape}")
            arrays["field"] = e
        if not arrays:
            raise ValueError("give potential, field or both")
        item = (name, axes, arrays, dict(attrs or {}))
        if self._f is not None:
            self._pending_fields.append(item)  # no new objects while in SWMR mode
        else:
            with h5py.File(self.partial_path, "r+", libver="latest") as f:
                self._store_field(f, *item)

    @staticmethod
    def _store_field(f, name, axes, arrays, attrs):
        g = f.require_group("fields")
        if name in g:
            del g[name]
        g = g.create_group(name)
        for label, c in zip("xyz", axes):
            ds = g.create_dataset(label, data=c)
            ds.attrs["units"] = "m"
        # stored with x fastest, (nz, ny, nx[, 3]), the order XDMF and VTK expect
        if "potential" in arrays:
            ds = g.create_dataset("potential", data=np.ascontiguousarray(arrays["potential"].transpose(2, 1, 0)),
                                  compression="gzip", compression_opts=4, shuffle=True)
            ds.attrs["units"] = "V"
        if "field" in arrays:
            ds = g.create_dataset("field", data=np.ascontiguousarray(arrays["field"].transpose(2, 1, 0, 3)),
                                  compression="gzip", compression_opts=4, shuffle=True)
            ds.attrs["units"] = "V/m"
        g.attrs["axis_order"] = "z, y, x (x fastest)"
        for k, v in attrs.items():
            g.attrs[k] = v

    # -- recorder protocol --------------------------------------------------------
    def start(self, info):
        """Lay out the file and enter SWMR mode (on resume: keep appending).

        Parameters
        ----------
        info : dict
            Description of the run (see ``chargesim.io`` for the keys used).
        """
        if self._finished:
            raise RuntimeError(f"{self.path}: the writer has finished")
        if self._started:
            return  # resumed: the layout is there; the loop reports the same run
        info = dict(info or {})
        f = h5py.File(self.partial_path, "r+", libver="latest")
        f.attrs["run_info"] = S.dumps_info(info)
        self._make_layout(f, info)
        f.flush()
        f.swmr_mode = True
        self._f = f
        self._info = json.loads(f.attrs["run_info"])
        self._started = True
        self._start_thread()

    # -- the writer thread ----------------------------------------------------------
    def _start_thread(self):
        self._thread = threading.Thread(target=self._work, name=f"chargesim writer {os.path.basename(self.path)}",
                                        daemon=True)  # never keeps the interpreter alive; _LIVE drains it at exit
        _LIVE.add(self)
        self._thread.start()

    def _submit(self, fn, *args, nbytes=0):
        """Queue ``fn(*args)`` for the writer thread (waits while the queue is full)."""
        self._raise_error()
        with self._room:
            while self._queued_bytes and self._queued_bytes + nbytes > _QUEUE_BYTES and self._error is None:
                self._room.wait()
            self._raise_error()  # the thread may have failed while this call waited
            self._queued_bytes += nbytes
        self._queue.put((fn, args, nbytes))

    def _work(self):
        """The writer thread: run the queued items in order."""
        while True:
            item = self._queue.get()
            if item is _STOP:
                return
            fn, args, nbytes = item
            if self._error is None:  # after an error the rest is dropped: the run is failing
                t, c = _time.perf_counter(), _time.thread_time()
                try:
                    fn(*args)
                except BaseException as exc:  # noqa: BLE001 - handed to the run's thread
                    self._error = exc
                self.background_seconds += _time.perf_counter() - t
                self.background_cpu_seconds += _time.thread_time() - c
            with self._room:
                self._queued_bytes -= nbytes
                self._room.notify_all()

    def _raise_error(self):
        if self._error is not None:
            self._error_raised = True
            raise self._error

    def _stop_thread(self):
        """Write what is queued, flush, end the thread; raise its error if any."""
        if self._thread is None:
            return
        self._queue.put((self._take_over, (self._hand_over(),), 0))
        self._queue.put(_STOP)
        self._thread.join()
        self._thread = None
        _LIVE.discard(self)

    def _append(self, ds, data, at):
        data = np.require(data, dtype=ds.dtype, requirements="C")
        # h5py's low-level calls: measured 0.07 ms per append against 0.25 ms
        # through resize + write_direct (whose selection machinery is Python),
        # and a frame with the events it carries makes about 35 appends
        dsid = ds.id
        dsid.set_extent((at + data.shape[0],) + data.shape[1:])
        fspace = dsid.get_space()
        fspace.select_hyperslab((at,) + (0,) * (data.ndim - 1), data.shape)
        # the file's own type as the memory type: numpy holds the same bytes, no conversion
        dsid.write(h5s.create_simple(data.shape), fspace, data, mtype=dsid.get_type())

    def _handles(self, group):
        """Dataset objects of a group, looked up once (h5py lookups are slow)."""
        h = self._dsets.get(group)
        if h is None:
            g = self._f[group]
            h = self._dsets[group] = {k: g[k] for k in g}
        return h

    def frame(self, step, time, state):
        """Append a frame of the live particles (``state`` is read, not kept).

        Parameters
        ----------
        step : int
            Step number.
        time : float
            Simulated time, s.
        state : ParticleState
            Live state (attributes ``id``, ``position``, ... and ``alive``).
        """
        self._need()
        alive = np.asarray(state.alive, dtype=bool)
        sel = None if alive.all() else alive
        cols = {}
        for name, (dt, _shp, _u) in S.FRAME_SCHEMA.items():
            arr = np.asarray(getattr(state, name))
            # a copy: the run changes the state while the thread writes it
            cols[name] = np.array(arr, dtype=dt, order="C") if sel is None else np.ascontiguousarray(arr[sel], dtype=dt)
        self._submit(self._write_frame, int(step), float(time), cols, self._hand_over(),
                     nbytes=sum(c.nbytes for c in cols.values()))

    def _write_frame(self, step, time, cols, held):
        self._take_over(held, flush=False)
        at = self._counts["frame_rows"]
        k = cols["id"].shape[0]
        g = self._handles("frames")
        for name in S.FRAME_SCHEMA:
            self._append(g[name], cols[name], at)
        i = self._counts["frames"]
        # the index row last: a frame counts once its rows are all there
        for name, value in (("step", step), ("time", time), ("offset", at), ("count", k)):
            self._append(g[name], np.asarray([value]), i)
        self._counts["frame_rows"] = at + k
        self._counts["frames"] = i + 1
        self._last_frame = (step, at, cols)  # a checkpoint at this step may refer to its rows
        # the frame at once, and the held events with it: one flush for both,
        # which spares most of the flush_interval flushes (each recompresses
        # the partly filled chunks)
        self._flush()

    def _events(self, group, key, records):
        self._need()
        if not records:
            return
        n = int(np.asarray(records["id"]).shape[0])
        if n == 0:
            return
        missing = [k for k in S.EVENT_SCHEMA if k not in records]
        if missing:
            raise ValueError(f"{group} records lack {missing}")
        batch = {}
        for name, (dt, shp, _u) in S.EVENT_SCHEMA.items():
            v = records[name]
            if dt == "name":
                v = _encode_names(v, f"{group} {name}")
            elif type(v) is np.ndarray and v.dtype == dt:
                v = v.copy()  # the run's own arrays: 0.4 us, where np.array(v, dtype) took 2 us
            else:
                v = np.array(v, dtype=dt)  # a copy
            if v.shape != (n,) + shp:
                raise ValueError(f"{group} records: {name} has shape {v.shape}, expected {(n,) + shp}")
            batch[name] = v
        self._hold(key, batch)

    def _hold(self, key, batch):
        """Keep a batch of rows; hand the held rows over once ``flush_interval`` has passed."""
        self._held[key].append(batch)
        if _time.monotonic() - self._last_hand_over >= self.flush_interval:
            self._submit(self._take_over, self._hand_over())

    def _hand_over(self):
        """The held batches, for the writer thread (the run's thread starts new lists)."""
        held, self._held = self._held, {key: [] for key in self._held}
        self._last_hand_over = _time.monotonic()
        return held

    def _take_over(self, held, flush=True):
        """Writer thread: queue handed-over batches for writing; write and flush them."""
        for key, batches in held.items():
            self._pending[key].extend(batches)
        if flush:
            self._flush()

    def deposits(self, records):
        """Record deposits (dict of arrays with the ``EVENT_FIELDS`` keys)."""
        self._events("deposits", "deposits", records)

    def escapes(self, records):
        """Record escapes (dict of arrays with the ``EVENT_FIELDS`` keys)."""
        self._events("escapes", "escapes", records)

    def diagnostics(self, step, time, values):
        """Record one row of scalar diagnostics.

        Parameters
        ----------
        step : int
            Step number.
        time : float
            Simulated time, s.
        values : dict of str to float
            Scalars, SI (units from ``info["diagnostics"]`` or by name).
        """
        self._need()
        row = np.full(self._diag_width, np.nan)
        for k, v in values.items():
            col = self._diag_cols.get(k)
            if col is None:
                col = len(self._diag_cols)
                if col >= self._diag_width:
                    raise ValueError(f"more than {self._diag_width} diagnostics names; declare them in "
                                     f"info['diagnostics'] (got {k!r})")
                self._submit(self._name_column, col, _encode_names([k], "diagnostics name")[0],
                             _encode_names([S.guess_unit(k)], "diagnostics unit")[0])
                self._diag_cols[k] = col
            row[col] = float(v)
        self._hold("diagnostics", {"values": row[None, :], "time": np.array([float(time)]),
                                   "step": np.array([int(step)], dtype=np.int64)})

    def _name_column(self, col, name, unit):
        g = self._handles("diagnostics")
        g["names"][col] = name
        g["units"][col] = unit

    def _drain(self):
        """Write the buffered events and diagnostics rows (no flush)."""
        for key, order in (("deposits", tuple(S.EVENT_SCHEMA)), ("escapes", tuple(S.EVENT_SCHEMA)),
                           ("diagnostics", ("values", "time", "step"))):
            batches = self._pending[key]
            if not batches:
                continue
            g = self._handles(key)
            at = self._counts[key]
            n = 0
            for name in order:  # "step" / "id" last would not matter: readers take the shortest
                data = batches[0][name] if len(batches) == 1 else np.concatenate([b[name] for b in batches])
                self._append(g[name], data, at)
                n = data.shape[0]
            self._counts[key] = at + n
            batches.clear()

    def _flush(self):
        self._drain()
        self._f.flush()

    def checkpoint(self, snapshot):
        """Save the loop's snapshot beside the file, atomically.

        Parameters
        ----------
        snapshot : dict
            Nested state from ``Simulation.snapshot()``, handed over: written
            later by the writer thread as it is, so the caller must not change
            it (``Simulation.snapshot`` makes fresh arrays).
        """
        self._need()
        # kept as handed over, not copied: a snapshot is the recorder's (its
        # arrays share no memory with the run; see the recorder protocol).
        # A second copy of the 12 MB of a 1e5-particle snapshot took 2-10 ms
        # of the run's thread per checkpoint (measured), mostly page faults.
        self._submit(self._write_checkpoint, snapshot, self._hand_over(), nbytes=_nbytes(snapshot))

    def _write_checkpoint(self, snapshot, held):
        """Writer thread: every record handed in before the checkpoint is written by now."""
        self._take_over(held)
        _fsync_path(self.partial_path)  # the records the checkpoint counts are on disk first
        meta = {"counts": dict(self._counts), "scenario_sha256": _sha(self.scenario_text), "saved": _now()}
        save_checkpoint(self.checkpoint_path, self._by_reference(snapshot), meta)

    def _by_reference(self, snapshot):
        """The snapshot with its particle columns that the frame of its step
        holds bitwise replaced by references to the frame's rows.

        At the default cadence every checkpoint falls on a frame's step: the
        columns a frame has are then 8.4 of the 12 MB of a snapshot of 1e5
        particles, written (and fsync'ed) once instead of twice. Compared
        bit for bit (0.1 ms per 2.4 MB), so that anything else (a column
        changed between the calls, -0.0 against 0.0, NaN) is stored in full.
        """
        last = self._last_frame
        particles = snapshot.get("particles")
        if last is None or not isinstance(particles, dict) or snapshot.get("step") != last[0]:
            return snapshot
        _step, at, cols = last
        kept = dict(particles)
        for name, col in cols.items():
            arr = particles.get(name)
            if (type(arr) is np.ndarray and arr.dtype == col.dtype and arr.shape == col.shape
                    and arr.flags.c_contiguous and _same_bits(arr, col)):
                kept[name] = ResultsRows(f"frames/{name}", at, at + col.shape[0], col.dtype, col.shape)
        return dict(snapshot, particles=kept)

    def finish(self, summary):
        """Write ``/final`` and ``/summary``, rename onto the final name, write XDMF.

        Parameters
        ----------
        summary : dict
            Run summary (masses kg, efficiencies, counts). ``summary["state"]``
            (a ``ParticleState``) or ``summary["final"]`` (dict of arrays), if
            given, becomes ``/final`` (else the last frame does).
        """
        if self._finished:
            return
        summary = dict(summary or {})
        state = summary.pop("state", None)
        final = summary.pop("final", None)
        self.close()
        if self._error is not None:  # raised before: records are missing, never mark this file finished
            raise self._error
        with h5py.File(self.partial_path, "r+", libver="latest") as f:
            for item in self._pending_fields:
                self._store_field(f, *item)
            self._pending_fields = []
            self._write_final(f, state, final)
            self._write_summary(f, summary)
            f.flush()
        _fsync_path(self.partial_path)
        os.replace(self.partial_path, self.path)
        from .xdmf import write_xdmf

        write_xdmf(self.path)
        if os.path.exists(self.checkpoint_path):
            os.remove(self.checkpoint_path)
        self._finished = True

    def close(self):
        """Write what is queued, close the partial file without finishing (it
        stays resumable); raise an error of the writer thread not raised yet."""
        try:
            self._stop_thread()
        finally:
            if self._f is not None:
                self._f.close()
                self._f = None
                self._dsets = {}
        if not self._error_raised:
            self._raise_error()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # -- helpers -----------------------------------------------------------------
    def _need(self):
        if self._f is None:
            raise RuntimeError("start(info) must be called before recording")
        self._raise_error()

    def _write_final(self, f, state, final):
        if "frames" not in f:
            return  # a field-only file
        if state is not None:
            alive = np.asarray(state.alive, dtype=bool)
            arrays = {k: np.asarray(getattr(state, k))[alive] for k in S.FINAL_SCHEMA}
            source = "run state at finish"
        elif final is not None:
            arrays = {k: np.asarray(final[k]) for k in S.FINAL_SCHEMA if k in final}
            source = "final records passed to finish"
        else:
            fr = f["frames"]
            nf = fr["step"].shape[0]
            if nf == 0:
                return
            o, c = int(fr["offset"][nf - 1]), int(fr["count"][nf - 1])
            arrays = {k: fr[k][o:o + c] for k in S.FRAME_SCHEMA}
            source = f"last frame (step {int(fr['step'][nf - 1])})"
            warnings.warn(f"{self.path}: /final taken from the {source}; pass summary['state'] for the end state",
                          stacklevel=3)
        g = f.create_group("final")
        g.attrs["source"] = source
        for k, (dt, _shp, unit) in S.FINAL_SCHEMA.items():
            if k not in arrays:
                continue
            ds = g.create_dataset(k, data=np.asarray(arrays[k], dtype=dt))
            ds.attrs["units"] = unit

    def _write_summary(self, f, summary):
        g = f.create_group("summary")  # last: its presence means the run finished
        units = {}
        for k, v in summary.items():
            if v is None:
                continue
            if isinstance(v, (dict, list, tuple)) and not (isinstance(v, (list, tuple)) and
                                                           all(isinstance(e, (int, float)) for e in v)):
                g.attrs[k] = S.dumps_info(v)
                units[k] = "json"
                continue
            g.attrs[k] = v
            units[k] = S.SUMMARY_UNITS.get(k, S.guess_unit(k) if isinstance(v, (int, float, np.number)) else "1")
        g.attrs["units"] = json.dumps(units)
        g.attrs["finished"] = _now()


def _nbytes(value):
    if isinstance(value, dict):
        return sum(_nbytes(v) for v in value.values())
    if isinstance(value, (list, tuple)):
        return sum(_nbytes(v) for v in value)
    return value.nbytes if isinstance(value, np.ndarray) else 0


def _same_bits(a, b):
    """True if two C-contiguous arrays of one dtype and shape hold the same bytes."""
    if a.dtype.itemsize in (1, 2, 4, 8) and a.size:
        view = np.dtype(f"u{a.dtype.itemsize}")
        return bool(np.array_equal(a.reshape(-1).view(view), b.reshape(-1).view(view)))
    return a.tobytes() == b.tobytes()


def _sha(text):
    import hashlib

    return hashlib.sha256(text.encode("utf-8")).hexdigest()
