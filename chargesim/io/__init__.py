"""Results files: the HDF5 recorder, checkpoints, resume, reader, XDMF sidecar.

One HDF5 file per run; the whole layout is documented in
``docs/results-format.md``. All SI; every dataset has a ``units`` attribute.

API summary (the scenario builder and ``chargesim report`` build against this)
-----------------------------------------------------------------------------
Writing a run (``writer.py``)
    ``ResultsWriter(path, *, scenario_text, seed, overwrite=False,
    compression="gzip", float_compression=None, flush_interval=1.0)``
    implements the recorder protocol of ``chargesim.motion.recorder``
    (``start``, ``frame``, ``deposits``, ``escapes``, ``diagnostics``,
    ``checkpoint``, ``finish``). While the run goes everything lands in
    ``PATH.partial`` (HDF5 SWMR mode; frames flushed at once, events and
    diagnostics within ``flush_interval`` seconds and with every frame and
    checkpoint) and checkpoints in ``PATH.checkpoint`` (written atomically),
    written by one background thread in call order (the calls copy what they
    are handed; ``finish`` and ``close`` wait for the thread, whose errors
    the next call raises; ``writer.background_seconds`` is its busy time,
    ``writer.background_cpu_seconds`` its CPU time);
    ``finish(summary)`` writes ``/final`` and ``/summary`` last, renames
    ``PATH.partial`` -> ``PATH``, writes the XDMF sidecar ``PATH`` with suffix
    ``.xdmf``, and removes the checkpoint. ``/final`` is taken from
    ``summary["state"]`` (a ``ParticleState``) when the loop passes it, else
    from the last frame. ``path`` existing already -> ``FileExistsError``
    unless ``overwrite``.

    ``writer.write_field(name, x, y, z, *, potential=None, field=None,
    attrs=None)``: a field grid on the rectilinear grid ``x`` (nx,), ``y``
    (ny,), ``z`` (nz,) in m; ``potential`` (nx, ny, nz) V, ``field``
    (nx, ny, nz, 3) V/m (indexing "ij", as ``numpy.meshgrid(x, y, z,
    indexing="ij")``). Call it any time before ``finish`` (grids given after
    ``start`` are kept in memory and written at ``finish``).

    A field-only file (``chargesim field``): ``w = ResultsWriter(...);
    w.write_field(...); w.finish({})``.

    The ``info`` dict given to ``start`` is stored as JSON (root attribute
    ``run_info``). Keys the writer and the report use when present:
    ``surfaces`` ({name: area m^2} or list of names), ``populations`` (list
    of names), ``diagnostics`` ({name: unit}; columns are pre-created),
    ``electrodes`` (list of {"name", "kind", "points": [[x, y, z], ...],
    "radius"?} outlines for the field map), ``collection_area_per_flow``
    (specific collection area A/Q, s/m), ``size_bins`` (diameter bin edges,
    m), ``migration_velocity`` (per bin, m/s), ``hazards`` (list of finding
    dicts or strings).

Resuming (``resume.py``)
    ``writer, snapshot = open_for_resume(path, *, scenario_text, seed=None)``
    - ``RunAlreadyFinished`` (an Exception) if ``path`` is a finished file;
    - ``ValueError`` if ``PATH.partial`` was made from another scenario text;
    - ``(fresh writer, None)`` when there is nothing to resume (no partial
      file or no checkpoint yet): run from step 0;
    - else the partial file rebuilt up to the checkpoint (frames, deposits,
      escapes and diagnostics recorded after it dropped) and the snapshot
      (the nested dict ``Simulation.snapshot()`` gave, bitwise):
      ``sim.restore(snapshot); sim.run(..., recorder=writer)``. The loop calls
      ``start(info)`` again; the writer then appends.

Checkpoints (``checkpoint.py``)
    ``save_checkpoint(path, snapshot, meta=None)`` (atomic: temp + fsync +
    rename) and ``load_checkpoint(path, results=None) -> (snapshot, meta)``:
    nested dicts, lists, tuples of numpy arrays, numpy scalars, Python ints
    (any size), floats, bools, str, None round-trip exactly. The writer keeps
    a snapshot's particle columns as references to the rows of the frame of
    the same step when they are bitwise the same (``ResultsRows``);
    ``results`` names the (partial) results file they are read from.

Reading (``reader.py``)
    ``open_results(path) -> Results``: ``attrs`` (root attributes),
    ``info``, ``summary`` (dict, empty while unfinished), ``finished``
    (bool), ``deposits``, ``escapes``, ``final`` (dicts of arrays),
    ``frames`` (:class:`Frames`: ``len``, ``[k]`` -> dict of arrays,
    ``step``, ``time``), ``diagnostics`` (dict of arrays incl. ``step``,
    ``time``), ``fields`` ({name: dict with x, y, z, potential, field}),
    ``collection_efficiency()``, ``grade_efficiency(edges)``. Opens
    ``PATH.partial`` too (``finished`` False). Not our format, corrupt or
    truncated -> ``ValueError`` naming the path and what is wrong.

Repair (``repair.py``)
    ``clear_status_flags(path)`` (like ``h5clear -s``) and
    ``open_for_reading(path)``: open files a killed writer left marked open.

XDMF (``xdmf.py``)
    ``write_xdmf(h5_path, xdmf_path=None) -> path``: XDMF 3 sidecar with the
    field grids (3DRectMesh) and particle frames (Polyvertex, a temporal
    collection).
"""
from .checkpoint import load_checkpoint, save_checkpoint
from .reader import Frames, Results, open_results
from .resume import RunAlreadyFinished, open_for_resume
from .schema import FORMAT_NAME, FORMAT_VERSION
from .writer import ResultsWriter
from .xdmf import write_xdmf

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "Frames",
    "Results",
    "ResultsWriter",
    "RunAlreadyFinished",
    "load_checkpoint",
    "open_for_resume",
    "open_results",
    "save_checkpoint",
    "write_xdmf",
]
