"""Scenario files: TOML + units -> validated :class:`Scenario` -> System -> run.

* :func:`load_scenario` reads and validates a file (every key, units,
  physics), raising :class:`ScenarioError` naming the file, key path and bad
  value; :func:`loads_scenario` does the same for text.
* :func:`build` makes the motion ``System`` (and the pieces ``check`` shows).
* :func:`run` runs a scenario, writing HDF5 through ``chargesim.io``.
* :func:`plan` is what ``chargesim check`` prints: counts, steps, methods,
  estimates and hazard findings.

The vocabulary is in :mod:`chargesim.scenario.vocabulary` and documented in
``docs/scenario.md`` (generated from it by :func:`render_reference`).
"""
import importlib as _importlib

from .build import build  # eager: the submodule of the same name would shadow a lazy name
from .errors import ScenarioError
from .load import Scenario, load_scenario, loads_scenario

_LAZY = {
    "run": "runner",
    "run_fields": "runner",
    "plan": "plan",
    "render_reference": "docs",
}


def __getattr__(name):
    mod = _LAZY.get(name)
    if mod is None:
        raise AttributeError(f"module 'chargesim.scenario' has no attribute {name!r}")
    return getattr(_importlib.import_module(f"{__name__}.{mod}"), name)


__all__ = ["Scenario", "ScenarioError", "build", "load_scenario", "loads_scenario", *_LAZY]
