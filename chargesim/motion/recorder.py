"""What the run loop reports, and to whom.

The run loop (``chargesim.motion``) calls a *recorder*: any object with the
methods of :class:`Recorder`. ``chargesim.io`` writes them to HDF5;
:class:`MemoryRecorder` keeps them in memory for tests and quick studies.
The motion layer never imports the file layer: the recorder is handed in.

Records of deposits and escapes are dicts of equal-length arrays with the keys
of :data:`EVENT_FIELDS` (SI; ``position`` has shape (k, 3); ``surface`` holds
the surface or outlet name of each event as str).
"""
from typing import Protocol

import numpy as np

#: Keys (and units) of one deposit or escape record.
EVENT_FIELDS = {
    "id": "1",
    "time": "s",
    "position": "m",
    "velocity": "m/s",
    "surface": "1",
    "charge": "C",
    "mass": "kg",
    "diameter": "m",
    "weight": "1",
    "population": "1",
}


class Recorder(Protocol):
    """The recorder protocol the run loop calls, in this order."""

    def start(self, info: dict) -> None:
        """Once, before the first step (or on resume): a dict describing the
        run (surface names and areas, population names, time step, ...)."""

    def frame(self, step: int, time: float, state) -> None:
        """A particle frame at the output cadence: ``state`` is the live
        :class:`~chargesim.motion.state.ParticleState` (read, do not keep)."""

    def deposits(self, records: dict) -> None:
        """Particles that landed on a collector since the last call, in the
        order they landed. The loop gathers the records of a few steps
        (``Simulation.EVENT_STEPS``) and hands them over before each frame,
        diagnostics row and checkpoint, and before ``finish``."""

    def escapes(self, records: dict) -> None:
        """Particles that left through an outlet since the last call (as
        :meth:`deposits`)."""

    def diagnostics(self, step: int, time: float, values: dict) -> None:
        """Scalars over time (counts, energies, efficiency so far), SI."""

    def checkpoint(self, snapshot: dict) -> None:
        """The full state needed to resume bitwise: a nested dict of arrays,
        scalars and strings (see ``Simulation.snapshot``). It is the
        recorder's to keep: its arrays share no memory with the run, so a
        recorder may store them, or write them later, as they are."""

    def finish(self, summary: dict) -> None:
        """Once, after the last step: the run summary (masses in kg,
        collection efficiency, counts)."""


class MemoryRecorder:
    """A recorder that keeps everything in lists: for tests and notebooks."""

    def __init__(self, keep_frames=True):
        self.keep_frames = keep_frames
        self.info = None
        self.frames = []
        self.deposit_records = []
        self.escape_records = []
        self.diagnostic_rows = []
        self.snapshots = []
        self.summary = None

    def start(self, info):
        self.info = dict(info)

    def frame(self, step, time, state):
        if self.keep_frames:
            self.frames.append((step, time, state.copy()))

    def deposits(self, records):
        self.deposit_records.append({k: np.array(v, copy=True) for k, v in records.items()})

    def escapes(self, records):
        self.escape_records.append({k: np.array(v, copy=True) for k, v in records.items()})

    def diagnostics(self, step, time, values):
        self.diagnostic_rows.append((step, time, dict(values)))

    def checkpoint(self, snapshot):
        self.snapshots.append(snapshot)

    def finish(self, summary):
        self.summary = dict(summary)

    @property
    def all_deposits(self):
        """All deposit records joined into one dict of arrays."""
        return join_records(self.deposit_records)

    @property
    def all_escapes(self):
        """All escape records joined into one dict of arrays."""
        return join_records(self.escape_records)


def join_records(chunks):
    """Records (dicts of equal-length arrays with the same keys) joined into
    one, in order (new arrays); {} for none."""
    if not chunks:
        return {}
    return {k: np.concatenate([c[k] for c in chunks]) for k in chunks[0]}
