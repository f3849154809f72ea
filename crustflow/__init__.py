"""crustflow: maps of lower-crustal channel flow from gridded topography and crustal thickness.

Research estimates of a simplified model (thin channel, rigid walls, lithostatic load); no basis for
hazard or engineering decisions without local, licensed review.
"""

from __future__ import annotations

__version__ = "0.1.0"

from crustflow.errors import CrustflowError, CrustflowInputError  # noqa: E402
from crustflow.scenario.document import (
    ModelParameters,
    Scenario,
    load_scenario,
    scenario_from_dict,
)  # noqa: E402

__all__ = [
    "__version__",
    "CrustflowError",
    "CrustflowInputError",
    "ModelParameters",
    "Scenario",
    "load_scenario",
    "scenario_from_dict",
    "compute_fields",
    "solve",
    "channel_flow",
    "velocity_profile",
    "budget_table",
    "section_budgets",
    "region_budgets",
    "samples",
    "velocity_profiles",
]


def __getattr__(name: str):
    # Heavy modules (xarray, rasterio) load on first use so that `crustflow --help` stays quick.
    if name in ("compute_fields", "solve", "VARIABLES"):
        from crustflow.engine import api as model

        return getattr(model, name)
    if name in ("budget_table", "section_budgets", "region_budgets"):
        from crustflow.analyses import budgets

        return getattr(budgets, name)
    if name == "velocity_profiles":
        from crustflow.analyses.profiles import velocity_profiles

        return velocity_profiles
    if name == "samples":
        import importlib

        return importlib.import_module(".samples", __name__)
    if name in ("channel_flow", "velocity_profile"):
        from crustflow.physics import channel

        return getattr(channel, name)
    raise AttributeError(f"module 'crustflow' has no attribute {name!r}")
