"""Velocity and stress profiles across the channel at chosen sites.

Each site's cell is computed exactly as the map computes it: the rows around the site are read by the
one block reader (:mod:`crustflow.engine.blocks`), with the scenario's whole-grid load step (filters,
thin-channel flag) when it has one, and the fields come from
:func:`~crustflow.engine.blocks.block_fields`. The one-cell solution of the scenario's rheology is
then evaluated at heights ``zeta`` from the lower wall (0) to the upper wall (h).
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import xarray as xr

from crustflow.constants import SECONDS_PER_YEAR
from crustflow.engine.blocks import BlockReader, block_fields
from crustflow.engine.cells import wall_temperatures
from crustflow.errors import CrustflowInputError
from crustflow.figures.profiles import profile_figure
from crustflow.physics.channel import velocity_profile
from crustflow.physics.flowlaws import linear_temperature_prefactor, temperature_profile
from crustflow.physics.rheology import power_law_profile

__all__ = ["velocity_profiles", "write_profile_outputs", "PROFILE_SAMPLES"]

#: Heights sampled across the channel for a profile (lower wall, upper wall and between).
PROFILE_SAMPLES = 101

#: Millimetres per year in one metre per second (Julian year).
_MM_PER_YR = 1e3 * SECONDS_PER_YEAR


def velocity_profiles(scenario, sites, *, samples: int = PROFILE_SAMPLES) -> xr.Dataset:
    """Profiles across the channel at sites.

    Parameters
    ----------
    scenario : Scenario
    sites : list of (label, x, y, crs)
        Coordinates in ``crs`` (None: the grid's CRS).
    samples : int
        Heights from the lower to the upper wall.

    Returns
    -------
    xarray.Dataset
        Dimensions (site, sample): ``height`` (m above the lower wall), ``velocity_east``,
        ``velocity_north``, ``speed`` (mm/yr), ``shear_stress_east``, ``shear_stress_north`` (MPa),
        ``viscosity`` (Pa s), ``temperature`` (degC, flow-law channels); per site ``flux_east``,
        ``flux_north`` (m2/yr), ``upper_wall_drag_*``, ``lower_wall_drag_*`` (MPa), ``x``, ``y``,
        ``drive_east``, ``drive_north`` (Pa/m), ``channel_thickness`` (km).

    Notes
    -----
    Newtonian: ``u(zeta) = U zeta/h + G (zeta^2 - h zeta)/(2 eta)``, ``tau = eta U/h + G (zeta - h/2)``
    (Turcotte & Schubert 2002, section 6.2). Power-law and flow-law channels: the profile of the
    per-cell solver of :mod:`crustflow.physics.rheology`. The flux and drags per site are the map's
    values at the site's cell.
    """
    with BlockReader(scenario) as reader:
        whole = reader.whole_grid_load(filtered=scenario.load.filtered, thin_channel=False)
        cells = [_site_cell(reader, whole, *site) for site in sites]
    fraction = np.linspace(0.0, 1.0, samples)
    profiles = [_profile(scenario, cell, fraction) for cell in cells]
    return _dataset(cells, profiles, samples, scenario.channel.rheology)


def _locate(reader: BlockReader, label: str, sx: float, sy: float, crs) -> tuple[int, int]:
    """Row and column of the topography cell holding a site."""
    from pyproj import Transformer

    if not (math.isfinite(sx) and math.isfinite(sy)):
        raise CrustflowInputError(
            f"site '{label}' has coordinates ({sx}, {sy}); give two finite numbers"
        )
    if crs is not None:
        sx, sy = Transformer.from_crs(crs, reader.crs, always_xy=True).transform(sx, sy)
    col, row = ~reader.transform @ (sx, sy)
    if not (math.isfinite(col) and math.isfinite(row)):
        raise CrustflowInputError(f"site '{label}' cannot be placed on the grid; check its CRS")
    col, row = math.floor(col), math.floor(row)
    if not (0 <= row < reader.height and 0 <= col < reader.width):
        raise CrustflowInputError(
            f"site '{label}' ({sx:.6g}, {sy:.6g}) lies outside the "
            "topography grid; give a point inside it"
        )
    return row, col


def _site_cell(reader: BlockReader, whole, label: str, sx: float, sy: float, crs) -> dict:
    """The map's SI values at a site's cell, and the local parameter grids."""
    row, col = _locate(reader, label, sx, sy, crs)
    p = reader.scenario.parameters
    block = reader.read(row, row + 1)
    si = block_fields(
        block, p, channel=reader.scenario.channel, load=reader.scenario.load, whole=whole
    )
    value = {k: float(v[0, col]) for k, v in si.items()}
    if not np.isfinite(value["drive_east"]):
        raise CrustflowInputError(f"site '{label}' falls on nodata; choose another point")
    at = (row - block.first, col)
    return {
        "label": label,
        "x": float(reader.x[col]),
        "y": float(reader.y[row]),
        "value": value,
        "local": {k: float(v[at]) for k, v in block.cell.items()},
        "elevation": float(block.elevation[at]),
    }


def _profile(scenario, cell: dict, fraction: np.ndarray) -> dict:
    """Velocity, stress, viscosity and temperature at heights across one cell's channel, SI."""
    p, setup = scenario.parameters, scenario.channel
    value, local = cell["value"], cell["local"]
    h = value["channel_thickness"]
    zeta = fraction * h
    ge, gn = value["drive_east"], value["drive_north"]
    walls = {"wall_east": p.wall_east, "wall_north": p.wall_north}
    temp = np.full_like(zeta, np.nan)
    if setup.rheology == "newtonian":
        eta = local.get("viscosity", p.viscosity)
        ue, un, te, tn = velocity_profile(zeta, ge, gn, h, eta, **walls)
        visc = np.full_like(zeta, eta)
    elif setup.rheology == "power-law":
        ue, un, te, tn, visc = power_law_profile(
            zeta, ge, gn, h, setup.prefactor, setup.stress_exponent, **walls
        )
    else:
        top, base = wall_temperatures(
            setup,
            local,
            elevation=cell["elevation"],
            top_depth=value["channel_top_depth"],
            thickness=h,
        )
        ue, un, te, tn, visc = power_law_profile(
            zeta,
            ge,
            gn,
            h,
            1.0,
            setup.law.stress_exponent,
            **walls,
            prefactor_profile=linear_temperature_prefactor(setup.law),
            profile_args=(h, float(top), float(base)),
        )
        temp = np.asarray(temperature_profile(zeta, h, float(top), float(base))) - 273.15
    out = {"ue": ue, "un": un, "te": te, "tn": tn, "eta": visc, "temp": temp, "zeta": zeta}
    return {k: np.broadcast_to(np.asarray(v, dtype=float), zeta.shape) for k, v in out.items()}


#: Per-site variables: name -> (factor from SI, units).
_PER_SITE = {
    "flux_east": (SECONDS_PER_YEAR, "m2 yr-1"),
    "flux_north": (SECONDS_PER_YEAR, "m2 yr-1"),
    "upper_wall_drag_east": (1e-6, "MPa"),
    "upper_wall_drag_north": (1e-6, "MPa"),
    "lower_wall_drag_east": (1e-6, "MPa"),
    "lower_wall_drag_north": (1e-6, "MPa"),
    "drive_east": (1.0, "Pa m-1"),
    "drive_north": (1.0, "Pa m-1"),
    "channel_thickness": (1e-3, "km"),
}


def _dataset(cells: list[dict], profiles: list[dict], samples: int, rheology: str) -> xr.Dataset:
    dims = ("site", "sample")

    def stacked(key, factor=1.0):
        return np.array([prof[key] for prof in profiles]) * factor

    ue, un = stacked("ue", _MM_PER_YR), stacked("un", _MM_PER_YR)
    data = {
        "height": (
            dims,
            stacked("zeta"),
            {"units": "m", "long_name": "height above the channel's lower wall"},
        ),
        "velocity_east": (dims, ue, {"units": "mm yr-1"}),
        "velocity_north": (dims, un, {"units": "mm yr-1"}),
        "speed": (dims, np.hypot(ue, un), {"units": "mm yr-1"}),
        "shear_stress_east": (dims, stacked("te", 1e-6), {"units": "MPa"}),
        "shear_stress_north": (dims, stacked("tn", 1e-6), {"units": "MPa"}),
        "viscosity": (dims, stacked("eta"), {"units": "Pa s"}),
        "temperature": (dims, stacked("temp"), {"units": "degC"}),
    }
    for key, (factor, units) in _PER_SITE.items():
        values = np.array([c["value"][key] * factor for c in cells])
        data[key] = ("site", values, {"units": units})
    data["x"] = ("site", np.array([c["x"] for c in cells]))
    data["y"] = ("site", np.array([c["y"] for c in cells]))
    coords = {"site": [c["label"] for c in cells], "sample": np.arange(samples)}
    ds = xr.Dataset(data, coords=coords)
    ds.attrs["rheology"] = rheology
    return ds


def _label(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", text).strip("_") or "site"


def write_profile_outputs(ds: xr.Dataset, folder, *, dpi: int = 120, formats=("png",)) -> list[str]:
    """``profile_<label>.csv`` and the figure ``profile_<label>.<format>`` (each of ``formats``:
    png, svg, pdf) for every site; returns file names."""
    folder = Path(folder)
    written = []
    taken: set[str] = set()
    for site in ds.site.values:
        s = ds.sel(site=site)
        label = _label(str(site))
        while label in taken:
            label += "_"
        taken.add(label)
        columns = {
            "height_m": s.height,
            "velocity_east_mm_per_yr": s.velocity_east,
            "velocity_north_mm_per_yr": s.velocity_north,
            "speed_mm_per_yr": s.speed,
            "shear_stress_east_MPa": s.shear_stress_east,
            "shear_stress_north_MPa": s.shear_stress_north,
            "viscosity_Pa_s": s.viscosity,
            "temperature_degC": s.temperature,
        }
        frame = xr.Dataset({k: ("sample", v.values) for k, v in columns.items()}).to_pandas()
        frame.to_csv(folder / f"profile_{label}.csv", index=False)
        formats = tuple(dict.fromkeys(formats))
        profile_figure(s, folder / f"profile_{label}.png", dpi=dpi, formats=formats)
        written += [f"profile_{label}.csv"] + [f"profile_{label}.{f}" for f in formats]
    return written
