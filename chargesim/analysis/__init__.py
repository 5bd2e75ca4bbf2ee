"""Analysis of run results: efficiencies, grade efficiency, deposition density.

Pure functions on the event records of a run (dicts of equal-length arrays
with the keys of :data:`chargesim.motion.recorder.EVENT_FIELDS`), so the run
loop, the results-file reader and the report all compute them the same way.
"""
from .efficiency import (
    collection_efficiency,
    counts,
    deposition_density,
    deposition_map,
    grade_efficiency,
    grade_efficiency_from_results,
    real_mass,
    transfer_efficiency,
)

__all__ = [
    "collection_efficiency",
    "counts",
    "deposition_density",
    "deposition_map",
    "grade_efficiency",
    "grade_efficiency_from_results",
    "real_mass",
    "transfer_efficiency",
]
