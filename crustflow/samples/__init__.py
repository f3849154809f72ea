"""The invented sample scenarios: a fictional plateau and its margins (projected and lon/lat) and a
salt-bearing wedge. Demo data only, never a real region's."""

from crustflow.samples.plateau import (
    SAMPLE_NAMES,
    demo_scenario,
    plateau_crust_thickness,
    plateau_elevation,
    write_sample_grids,
)

__all__ = [
    "SAMPLE_NAMES",
    "demo_scenario",
    "plateau_crust_thickness",
    "plateau_elevation",
    "write_sample_grids",
]
