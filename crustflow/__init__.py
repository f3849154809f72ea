"""crustflow: maps of lower-crustal channel flow from gridded topography and crustal thickness.

Research estimates of a simplified model (thin channel, rigid walls, lithostatic load); no basis for
hazard or engineering decisions without local, licensed review.

The public names are re-exported here; heavy modules (xarray, rasterio, matplotlib) load on first
use so that ``crustflow --help`` stays quick. The package is layered (see DEVELOPERS.md):
``geometry`` and ``physics`` at the bottom, then ``scenario`` and ``io``, the ``engine``,
``figures``, ``analyses`` and the commands on top.
"""

from __future__ import annotations

import importlib
import importlib.abc
import importlib.util
import sys

from crustflow._version import __version__
from crustflow.errors import CrustflowError, CrustflowInputError
from crustflow.scenario import ModelParameters, Scenario, load_scenario, scenario_from_dict

#: Public name -> module that defines it (loaded on first use).
_LAZY = {
    "compute_fields": "crustflow.engine.api",
    "solve": "crustflow.engine.api",
    "VARIABLES": "crustflow.variables",
    "budget_table": "crustflow.analyses.budgets",
    "section_budgets": "crustflow.analyses.budgets",
    "region_budgets": "crustflow.analyses.budgets",
    "velocity_profiles": "crustflow.analyses.profiles",
    "channel_flow": "crustflow.physics.channel",
    "velocity_profile": "crustflow.physics.channel",
    "fit": "crustflow.analyses.fitting.run",
    "evolve": "crustflow.analyses.evolution.evolve",
}

#: Module paths documented before the package was layered -> where they live now. ``import
#: crustflow.channel`` and ``crustflow.channel.channel_flow`` keep working.
_MOVED = {
    "crustflow.channel": "crustflow.physics.channel",
    "crustflow.rheology": "crustflow.physics.rheology",
    "crustflow.flowlaws": "crustflow.physics.flowlaws",
    "crustflow.flexure": "crustflow.physics.flexure",
    "crustflow.column": "crustflow.physics.column",
    "crustflow.load": "crustflow.physics.isostasy",
    "crustflow.maps": "crustflow.geometry.grid",
    "crustflow.model": "crustflow.engine.api",
    "crustflow.fields": "crustflow.engine.fields",
    "crustflow.budgets": "crustflow.analyses.budgets",
    "crustflow.profiles": "crustflow.analyses.profiles",
    "crustflow.ensemble": "crustflow.analyses.ensemble",
    "crustflow.grids": "crustflow.io.grids",
    "crustflow.export": "crustflow.io.writers",
}

__all__ = [
    "__version__",
    "CrustflowError",
    "CrustflowInputError",
    "ModelParameters",
    "Scenario",
    "load_scenario",
    "scenario_from_dict",
    "samples",
    *_LAZY,
]


class _MovedModules(importlib.abc.MetaPathFinder, importlib.abc.Loader):
    """Serves the old flat module paths from the layered package (the same module objects)."""

    def find_spec(self, fullname, path=None, target=None):
        if fullname in _MOVED:
            return importlib.util.spec_from_loader(fullname, self)
        return None

    def create_module(self, spec):
        return importlib.import_module(_MOVED[spec.name])

    def exec_module(self, module):
        """Nothing to run: the module was imported under its new name."""


if not any(isinstance(f, _MovedModules) for f in sys.meta_path):
    sys.meta_path.append(_MovedModules())


def __getattr__(name: str):
    if name in _LAZY:
        return getattr(importlib.import_module(_LAZY[name]), name)
    if name == "samples":
        return importlib.import_module("crustflow.samples")
    old = f"crustflow.{name}"
    if old in _MOVED:
        return importlib.import_module(old)
    raise AttributeError(f"module 'crustflow' has no attribute {name!r}")
