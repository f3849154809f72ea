"""A second invented sample scenario: the Tavesh Wedge, a sediment wedge building out over salt.

**Invented data; it depicts no real place.** The Tavesh Wedge and the Imbrel Salt are made-up names
for analytic shapes, placed in the UTM zone 25N frame (EPSG:32625, as :mod:`crustflow.samples.plateau`) only
because that part of the frame lies over the open Atlantic: no real margin, basin or salt body is
depicted. The grids cover 200 x 140 km (easting 300-500 km, northing 3000-3140 km) in 2 km cells.

The story. A river system (off the grid, to the west) has been building a sediment wedge eastwards
across a passive margin. The shelf lies 150 m deep; at its edge, which has prograded furthest in a
lobe in the middle of the grid (the Tavesh lobe, centred at northing 3070 km), the sea floor drops
down a slope some 25 km wide to a basin floor 2800 m deep. The wedge (2400 kg/m^3) thickens seaward,
from about 0.8 km under the inner shelf to about 4 km under the slope and nearly 5 km under the basin
floor, where it ends in a steep toe some 65 km beyond the shelf break; beyond the toe only about 1 km
of pelagic sediment continues. Beneath it lies the Imbrel Salt, a viscous layer of rock salt
(2200 kg/m^3, viscosity 1e18 Pa s) about 2.5 km thick under the shelf, thinning to 1.5 km under the
basin. The salt sits directly on a thinned continental crust (2750 kg/m^3), 24 km thick landward,
14 km seaward.

The salt is the channel (placement "depths": its top and base are grids), the sediments are the one
roof layer over it, and the sea lies on top. At a fixed depth in the salt the drive is
``G = g ((rho_w - rho_salt) grad(w) + (rho_sed - rho_salt) grad(s))`` (w: water depth, s: sediment
thickness; from SCIENCE.md's general form): the deepening sea drives the salt seaward down the slope,
the seaward-thickening wedge pushes it back landward under the shelf, and at the toe, where the wedge
thins abruptly, the salt is pushed seaward again.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from crustflow.samples.rasters import SAMPLE_CRS, ramp, write_raster

__all__ = [
    "WEDGE_BOUNDS",
    "WEDGE_CELL",
    "wedge_bathymetry",
    "wedge_sediment_thickness",
    "wedge_salt_thickness",
    "wedge_crust_thickness",
    "write_wedge_sample",
]

#: Region bounds in SAMPLE_CRS (UTM zone 25N), m: west, south, east, north. Invented placement.
WEDGE_BOUNDS = (300e3, 3000e3, 500e3, 3140e3)

#: Cell size of every wedge grid, m.
WEDGE_CELL = 2e3

#: Water depth over the shelf, the basin floor, m (invented).
SHELF_DEPTH, BASIN_DEPTH = 150.0, 2800.0

#: Densities of the sample, kg/m^3 (invented, typical of the rock types: common practice, no source).
RHO_SEDIMENT, RHO_SALT, RHO_CRUST = 2400.0, 2200.0, 2750.0

SCENARIO_TEXT = """\
title = "Tavesh Wedge over the Imbrel Salt (invented)"

[grids]
topography = "topography.tif"
crust_thickness = "crust_thickness.tif"

[[roof.layers]]
name = "sediments"
thickness = { grid = "sediments.tif", units = "m" }
density = "2400 kg/m^3"

[densities]
crust = "2750 kg/m^3"
mantle = "3300 kg/m^3"
water = "1030 kg/m^3"
channel = "2200 kg/m^3"

[channel]
placement = "depths"
top_depth = { grid = "salt_top.tif", units = "m" }
base_depth = { grid = "salt_base.tif", units = "m" }
viscosity = "1e18 Pa*s"

# [load]
# smoothing = "4 km"
# elastic_thickness = "2 km"
"""

README_TEXT = """\
# Sample grids: the Tavesh Wedge over the Imbrel Salt (invented)

**This is invented demo data. It depicts no real region.** The Tavesh Wedge and the Imbrel Salt are
made-up names for analytic shapes placed in the UTM zone 25N frame (EPSG:32625) only because that
part of the frame lies over the open North Atlantic (about 33-35 W, 27-28.4 N). Do not read anything
in these files or in the output as a statement about a real place.

## The story

A river system off the grid to the west has built a sediment wedge eastwards across a passive
margin. The shelf is 150 m deep; its edge has prograded furthest in the Tavesh lobe in the middle of
the grid (northing ~3070 km), where the sea floor drops down a slope some 25 km wide to a basin floor
2800 m deep. The wedge (2400 kg/m3) thickens seaward, from about 0.8 km under the inner shelf to
about 4 km under the slope and nearly 5 km under the basin floor, where it ends in a steep toe some
65 km beyond the shelf break; beyond the toe only about 1 km of pelagic sediment continues.

Under the wedge lies the Imbrel Salt, a viscous layer of rock salt (2200 kg/m3, viscosity 1e18 Pa s)
2.5 km thick under the shelf and 1.5 km under the basin, directly on a thinned continental crust
(2750 kg/m3; 24 km thick landward, 14 km seaward).

In crustflow's terms the salt is the channel (placement "depths": top and base as grids), the
sediments are a roof layer, and the sea lies on top. At a fixed depth in the salt the drive is
`G = g ((rho_w - rho_salt) grad(w) + (rho_sed - rho_salt) grad(s))` (w water depth, s sediment
thickness): the deepening sea drives the salt seaward down the slope, the seaward-thickening wedge
pushes it landward under the shelf, and at the toe, where the wedge thins abruptly, the salt is
pushed seaward again.

## Files

| file | content |
|---|---|
| `topography.tif` | sea-floor elevation, m (negative: all of the grid is under water) |
| `crust_thickness.tif` | crustal thickness from the sea floor to the Moho, m (sediments and salt included) |
| `sediments.tif` | thickness of the sediment wedge (the roof layer), m |
| `salt_top.tif`, `salt_base.tif` | depth below sea level of the top and base of the salt, m, positive down |
| `scenario.toml` | the scenario |

Every grid: 100 x 70 cells of 2 km, EPSG:32625, easting 300-500 km, northing 3000-3140 km, float32.
They are the analytic functions of `crustflow/wedge_sample.py`; `write_wedge_sample(folder)` writes
them again.
"""


def _lobe(y):
    """Seaward advance of the shelf edge, km, at northing y (m): the Tavesh lobe."""
    yk = np.asarray(y) / 1e3
    return 20.0 * np.exp(-(((yk - 3070.0) / 35.0) ** 2))


def _across(x):
    """Distance east of the grid's west edge, km."""
    return (np.asarray(x) - WEDGE_BOUNDS[0]) / 1e3


def wedge_bathymetry(x, y):
    """Sea-floor elevation, m (negative), at projected coordinates ``x``, ``y`` (m)."""
    edge = 70.0 + _lobe(y)  # shelf edge, km east of the west edge
    return -SHELF_DEPTH - (BASIN_DEPTH - SHELF_DEPTH) * ramp(_across(x), edge + 15.0, 8.0)


def wedge_sediment_thickness(x, y):
    """Thickness of the sediment wedge, m, at projected coordinates ``x``, ``y`` (m)."""
    s = _across(x)
    edge = 70.0 + _lobe(y)
    wedge = 800.0 + 4200.0 * ramp(s, edge, 30.0)
    toe = ramp(s, edge + 70.0, 8.0)
    return wedge * (1.0 - toe) + 1000.0 * toe


def wedge_salt_thickness(x, y):
    """Thickness of the salt layer, m, at projected coordinates ``x``, ``y`` (m)."""
    s, _ = np.broadcast_arrays(_across(x), np.asarray(y))
    return 1500.0 + 1000.0 * (1.0 - ramp(s, 100.0, 40.0))


def wedge_crust_thickness(x, y):
    """Crustal thickness, sea floor to Moho, m (sediments and salt included)."""
    s, _ = np.broadcast_arrays(_across(x), np.asarray(y))
    return 14e3 + 10e3 * (1.0 - ramp(s, 110.0, 45.0))


def write_wedge_sample(folder: str | Path) -> Path:
    """Write the wedge sample (grids, scenario, README) into ``folder``; return the scenario path.

    Parameters
    ----------
    folder : str or Path
        Created if missing; files of the same names are overwritten.

    Returns
    -------
    Path
        ``folder / "scenario.toml"``.

    Notes
    -----
    The salt's top and base depths are computed from the float32 values actually written for the
    sea floor and the sediments, so the roof ends exactly at the salt top to float32 rounding (well
    within :data:`crustflow.physics.column.DEPTH_TOLERANCE`).
    """
    from rasterio.transform import Affine

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    west, south, east, north = WEDGE_BOUNDS
    xs = np.arange(west + WEDGE_CELL / 2, east, WEDGE_CELL)
    ys = np.arange(north - WEDGE_CELL / 2, south, -WEDGE_CELL)
    xx, yy = np.meshgrid(xs, ys)
    bathymetry = wedge_bathymetry(xx, yy).astype("float32")
    sediments = wedge_sediment_thickness(xx, yy).astype("float32")
    salt_top = -bathymetry.astype(float) + sediments.astype(float)
    salt_base = salt_top + wedge_salt_thickness(xx, yy)
    transform = Affine(
        WEDGE_CELL, 0.0, west, 0.0, -WEDGE_CELL, north
    )  # north-up, from the NW corner
    for name, data, text in (
        ("topography.tif", bathymetry, "sea-floor elevation above sea level (m)"),
        (
            "crust_thickness.tif",
            wedge_crust_thickness(xx, yy),
            "crustal thickness, sea floor to Moho (m)",
        ),
        ("sediments.tif", sediments, "sediment thickness, roof layer (m)"),
        ("salt_top.tif", salt_top, "depth of the salt top below sea level (m)"),
        ("salt_base.tif", salt_base, "depth of the salt base below sea level (m)"),
    ):
        write_raster(folder / name, data, SAMPLE_CRS, transform, text)
    (folder / "README.md").write_text(README_TEXT)
    scenario = folder / "scenario.toml"
    scenario.write_text(SCENARIO_TEXT)
    return scenario
