"""Shared helpers: small synthetic grids and scenario files written to a temporary folder.

The grids here are invented test data (analytic shapes), used only to exercise the code paths.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

UTM = "EPSG:32633"

SCENARIO = """\
title = "test scenario"
[grids]
topography = "topo.tif"
crust_thickness = "crust.tif"
[densities]
crust = "2800 kg/m^3"
mantle = "3300 kg/m^3"
[channel]
thickness = "15 km"
viscosity = "1e19 Pa*s"
"""


def write_grid(
    path,
    data,
    *,
    crs=UTM,
    west=300e3,
    north=5200e3,
    cell=5e3,
    cell_y=None,
    nodata=-9999.0,
    south_up=False,
):
    """Write a float32 GeoTIFF; ``south_up`` writes rows south-to-north (positive y step)."""
    import rasterio
    from rasterio.transform import Affine

    data = np.asarray(data, dtype="float32")
    cy = cell if cell_y is None else cell_y
    if south_up:
        south = north - cy * data.shape[0]
        transform = Affine(cell, 0, west, 0, cy, south)
        data = data[::-1]
    else:
        transform = Affine(cell, 0, west, 0, -cy, north)
    out = np.where(np.isfinite(data), data, nodata).astype("float32")
    profile = dict(
        driver="GTiff",
        width=data.shape[1],
        height=data.shape[0],
        count=1,
        dtype="float32",
        transform=transform,
        nodata=nodata,
    )
    if crs is not None:
        profile["crs"] = crs
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(out, 1)
    return Path(path)


def bump(shape=(40, 50), cell=5e3, height=3000.0, radius=70e3):
    """A smooth cos^2 plateau that is exactly flat outside ``radius`` (m): elevation, m."""
    ny, nx = shape
    y = (np.arange(ny) - (ny - 1) / 2) * cell
    x = (np.arange(nx) - (nx - 1) / 2) * cell
    r = np.hypot(*np.meshgrid(x, y))
    return np.where(r < radius, height * np.cos(np.pi * r / (2 * radius)) ** 2, 0.0) + 200.0


def airy(topo, reference=35e3, rho_c=2800.0, rho_m=3300.0):
    """Airy crustal thickness on land (Turcotte & Schubert 2002, section 2.2), m."""
    return reference + topo * rho_m / (rho_m - rho_c)


@pytest.fixture
def scenario_dir(tmp_path):
    """A folder with topo.tif, crust.tif and scenario.toml for a small projected run."""
    topo = bump()
    write_grid(tmp_path / "topo.tif", topo)
    write_grid(tmp_path / "crust.tif", airy(topo))
    (tmp_path / "scenario.toml").write_text(SCENARIO)
    return tmp_path
