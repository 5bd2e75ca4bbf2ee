"""Resume a killed run from its last checkpoint.

The partial file of a killed run is a consistent SWMR file but still carries
HDF5's "open for writing" mark, and it may hold records made after the last
checkpoint. Resume rebuilds it: a fresh partial file gets the root
attributes, the field grids and exactly the rows the checkpoint counted (so
the resumed run, replaying the steps after the checkpoint, ends bitwise equal
to an uninterrupted one), then replaces the old partial file atomically and
is reopened for appending. Rebuilding copies the data once: O(file size).
"""
import json
import os

import h5py

from . import schema as S
from .checkpoint import load_checkpoint
from .repair import clear_status_flags, open_for_reading
from .writer import ResultsWriter, _sha


class RunAlreadyFinished(Exception):
    """Resume was asked for a run whose results file is finished."""


def _attr(f, name, default=None):
    v = f.attrs.get(name, default)
    return v.decode() if isinstance(v, bytes) else v


def _open_partial(path):
    try:
        return h5py.File(path, "r")
    except OSError as exc:
        if "already open for write" not in str(exc):
            return None  # not an HDF5 file we can read: nothing to keep
    try:
        return h5py.File(path, "r", swmr=True)  # a killed SWMR writer's file
    except OSError:
        pass
    # killed during the short non-SWMR phases (set-up, finish): clear the mark
    try:
        clear_status_flags(path)
        return h5py.File(path, "r")
    except (OSError, ValueError):
        return None


def _copy_prefix(src, dst, n, ckw_from):
    """Copy the first ``n`` rows of dataset ``src`` into a new dataset in ``dst``."""
    name = src.name.rsplit("/", 1)[1]
    ds = dst.create_dataset(name, shape=(n,) + src.shape[1:], maxshape=src.maxshape, dtype=src.dtype,
                            chunks=src.chunks, compression=src.compression,
                            compression_opts=src.compression_opts, shuffle=src.shuffle,
                            scaleoffset=src.scaleoffset)  # same filters
    step = max(1, 1 << 20)
    for lo in range(0, n, step):
        hi = min(n, lo + step)
        ds[lo:hi] = src[lo:hi]
    for k, v in src.attrs.items():
        ds.attrs[k] = v
    return ds


def _rebuild(partial, counts):
    tmp = partial + ".rebuild"
    with open_for_reading(partial) as old, h5py.File(tmp, "w", libver="latest") as new:
        for k, v in old.attrs.items():
            new.attrs[k] = v
        old.copy(old["fields"], new, "fields")
        rows = {
            "frames": {**{k: counts["frames"] for k in S.FRAME_INDEX},
                       **{k: counts["frame_rows"] for k in S.FRAME_SCHEMA}},
            "deposits": {k: counts["deposits"] for k in S.EVENT_SCHEMA},
            "escapes": {k: counts["escapes"] for k in S.EVENT_SCHEMA},
            "diagnostics": {"step": counts["diagnostics"], "time": counts["diagnostics"],
                            "values": counts["diagnostics"]},
        }
        for gname, sizes in rows.items():
            og, ng = old[gname], new.create_group(gname)
            for name, n in sizes.items():
                if og[name].shape[0] < n:
                    raise ValueError(f"{partial}: /{gname}/{name} has {og[name].shape[0]} rows, "
                                     f"the checkpoint counts {n}; the partial file is damaged")
                _copy_prefix(og[name], ng, n, og[name])
            for name in og:
                if name not in sizes:  # fixed tables (diagnostics names, units)
                    og.copy(og[name], ng, name)
        new.flush()
    with open(tmp, "rb+") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, partial)


def open_for_resume(path, *, scenario_text, seed=None, compression="gzip"):
    """Reopen a killed run's results for appending, from its last checkpoint.

    Parameters
    ----------
    path : str or os.PathLike
        The final results path the run was started with (``OUT.h5``).
    scenario_text : str
        Text of the scenario being resumed; must equal the stored one.
    seed : int or None
        Seed, used only when the run has to start afresh.
    compression : {"gzip", "lzf", None}
        Filter of a fresh file.

    Returns
    -------
    writer : ResultsWriter
        Ready for ``Simulation.run(..., recorder=writer)``.
    snapshot : dict or None
        The checkpointed state to ``Simulation.restore``; None means nothing
        to resume: run from the start (the writer is fresh).

    Raises
    ------
    RunAlreadyFinished
        If ``path`` is a finished results file.
    ValueError
        If the partial run was made from a different scenario text, or
        ``path`` exists but is not a finished chargesim results file.
    """
    path = os.fspath(path)
    partial = path + S.PARTIAL_SUFFIX
    ckpt = path + S.CHECKPOINT_SUFFIX
    if os.path.exists(path):
        from .reader import open_results

        res = open_results(path)
        if res.finished:
            raise RunAlreadyFinished(f"{path} is a finished run; nothing to resume")
        raise ValueError(f"{path}: exists but is not finished; remove it to run again")
    fresh = (lambda: (ResultsWriter(path, scenario_text=scenario_text, seed=seed, overwrite=True,
                                    compression=compression), None))
    if not os.path.exists(partial):
        return fresh()
    f = _open_partial(partial)
    if f is None:
        return fresh()
    with f:
        if _attr(f, "format") != S.FORMAT_NAME:
            raise ValueError(f"{partial}: not a chargesim results file (format attribute "
                             f"{_attr(f, 'format')!r}); not resuming over it")
        stored = _attr(f, "scenario", "")
        complete = "frames" in f and "diagnostics" in f
        stored_seed = f.attrs.get("seed")
    if stored != scenario_text:
        raise ValueError(f"{partial} was made from a different scenario; refusing to resume "
                         f"(use the same scenario file, or remove {partial} to start over)")
    if not complete or not os.path.exists(ckpt):
        return fresh()
    snapshot, meta = load_checkpoint(ckpt, results=partial)  # its particle columns may be a frame's rows
    if meta.get("scenario_sha256") not in (None, _sha(scenario_text)):
        raise ValueError(f"{ckpt} belongs to a different scenario; refusing to resume")
    _rebuild(partial, meta["counts"])
    stored_seed = None if stored_seed is None or int(stored_seed) == -1 else int(stored_seed)
    writer = ResultsWriter(path, scenario_text=scenario_text, seed=stored_seed, compression=compression,
                           _reopen=True)
    return writer, snapshot
