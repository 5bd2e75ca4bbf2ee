"""Names, dtypes and units of the results file (one place; see docs/results-format.md)."""
import functools
import json

import numpy as np

#: Value of the root attribute ``format``.
FORMAT_NAME = "chargesim-results"
#: Value of the root attribute ``format_version`` (major.minor; a reader
#: accepts any minor version of its major).
FORMAT_VERSION = "1.0"
#: Root attribute ``format`` of a checkpoint file.
CHECKPOINT_FORMAT = "chargesim-checkpoint"
#: Root attribute ``format_version`` of a checkpoint file (2: one JSON text
#: and a dataset per array; 1, a group per node, is no longer read).
CHECKPOINT_VERSION = "2.0"

#: Suffixes of the files beside the final results file.
PARTIAL_SUFFIX = ".partial"
CHECKPOINT_SUFFIX = ".checkpoint"

#: Longest surface / outlet name stored in an event record (UTF-8 bytes).
NAME_BYTES = 64
#: Diagnostics columns reserved when ``info`` does not name them.
DIAGNOSTIC_COLUMNS = 64

#: Event (deposit / escape) fields: name -> (dtype, trailing shape, units).
#: Keys and units follow ``chargesim.motion.recorder.EVENT_FIELDS``.
EVENT_SCHEMA = {
    "id": (np.int64, (), "1"),
    "time": (np.float64, (), "s"),
    "position": (np.float64, (3,), "m"),
    "velocity": (np.float64, (3,), "m/s"),
    "surface": ("name", (), "1"),
    "charge": (np.float64, (), "C"),
    "mass": (np.float64, (), "kg"),
    "diameter": (np.float64, (), "m"),
    "weight": (np.float64, (), "1"),
    "population": (np.int32, (), "1"),
}

#: Per-particle fields of each frame (live particles only).
FRAME_SCHEMA = {
    "id": (np.int64, (), "1"),
    "position": (np.float64, (3,), "m"),
    "velocity": (np.float64, (3,), "m/s"),
    "charge": (np.float64, (), "C"),
    "diameter": (np.float64, (), "m"),
    "weight": (np.float64, (), "1"),
    "population": (np.int32, (), "1"),
}

#: Per-particle fields of ``/final`` (live particles at the end of the run).
FINAL_SCHEMA = {
    **FRAME_SCHEMA,
    "mass": (np.float64, (), "kg"),
    "density": (np.float64, (), "kg/m^3"),
}

#: Units of the summary attributes the writer knows; other numeric ones "1".
SUMMARY_UNITS = {
    "emitted_mass": "kg",
    "deposited_mass": "kg",
    "escaped_mass": "kg",
    "collection_efficiency": "1",
    "transfer_efficiency": "1",
    "time": "s",
    "steps": "1",
}

#: Frame index datasets: name -> (dtype, units).
FRAME_INDEX = {
    "step": (np.int64, "1"),
    "time": (np.float64, "s"),
    "offset": (np.int64, "1"),
    "count": (np.int64, "1"),
}


@functools.lru_cache(maxsize=None)
def name_dtype():
    """HDF5 dtype of stored surface / outlet names: fixed-length UTF-8
    (made once: h5py builds it in ~10 us, and events are encoded every step)."""
    import h5py

    return h5py.string_dtype("utf-8", NAME_BYTES)


def guess_unit(name):
    """Unit of a diagnostics value from its name when ``info`` does not say.

    Common practice for our own diagnostics names: counts and fractions are
    dimensionless, ``*energy*`` J, ``*mass*`` kg, ``*charge*`` C, ``*time*`` s.
    """
    low = name.lower()
    for part, unit in (("energy", "J"), ("mass", "kg"), ("charge", "C"), ("time", "s"),
                       ("field", "V/m"), ("potential", "V"), ("dt", "s"), ("speed", "m/s"),
                       ("velocity", "m/s")):
        if part in low:
            return unit
    return "1"


class _InfoEncoder(json.JSONEncoder):
    def default(self, o):
        if isinstance(o, np.ndarray):
            return o.tolist()
        if isinstance(o, np.generic):
            return o.item()
        if isinstance(o, (set, frozenset)):
            return sorted(o)
        return repr(o)  # last resort: the run info is descriptive, never code


def dumps_info(info):
    """JSON text of the run-info dict (arrays become lists)."""
    return json.dumps(info, cls=_InfoEncoder, sort_keys=False)
