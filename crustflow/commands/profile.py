"""``crustflow profile``: velocity and stress profiles across the channel at sites."""

from __future__ import annotations

from pathlib import Path

from crustflow.analyses.profiles import velocity_profiles, write_profile_outputs
from crustflow.errors import CrustflowInputError
from crustflow.io.features import read_points
from crustflow.io.folders import (
    atomic_folder,
    base_manifest,
    check_out_dir,
    protected_inputs,
    write_manifest,
)
from crustflow.scenario import load_scenario

__all__ = ["profile"]


def profile(scenario_path: Path, out: Path, *, at=None, points=None, crs=None):
    """Profiles at one site (``at = (x, y)`` in ``crs``, default the grid's) or at the Point
    features of a vector file; written into ``out``. Returns the profiles' Dataset."""
    if (at is None) == (points is None):
        raise CrustflowInputError("give the site with --at X Y, or several with --points FILE")
    scenario = load_scenario(scenario_path)
    inputs = protected_inputs(scenario, points)
    check_out_dir(out, inputs)
    if at is not None:
        sites = [(f"{at[0]:g}_{at[1]:g}", at[0], at[1], crs)]
    else:
        sites = read_points(points)
    ds = velocity_profiles(scenario, sites)
    with atomic_folder(out, inputs) as tmp:
        files = write_profile_outputs(
            ds, tmp, dpi=scenario.figure_dpi, formats=scenario.figure_formats
        )
        write_manifest(tmp, base_manifest(scenario, {}), files)
    ds.attrs["folder"] = str(Path(out).expanduser().resolve())
    return ds
