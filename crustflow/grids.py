"""Reading the input grids, checking them and aligning them onto the topography grid.

Only this module and :mod:`crustflow.export` touch files. Grids leave here as ``xarray.DataArray`` objects
in SI units (m), float64, nodata as NaN, rows running north to south (``y`` descending), with the CRS
written through rioxarray, and the second grid on exactly the topography grid's cells.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from .errors import CrustflowInputError

__all__ = ["InputGrids", "read_grid", "align_to", "read_inputs", "file_checksum"]


@dataclass
class InputGrids:
    """The input grids of one run, aligned on the topography grid.

    Attributes
    ----------
    topography : xarray.DataArray
        Surface elevation, m above sea level.
    crust_thickness : xarray.DataArray or None
        Surface to Moho, m.
    moho_depth : xarray.DataArray or None
        Moho depth below sea level, m.
    provenance : dict
        How each grid was read and aligned (for the run manifest).
    """

    topography: xr.DataArray
    crust_thickness: xr.DataArray | None = None
    moho_depth: xr.DataArray | None = None
    provenance: dict = field(default_factory=dict)


def file_checksum(path: str | Path) -> str:
    """SHA-256 of a file, as hex text."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def read_grid(path: str | Path, name: str, *, crs: str | None = None) -> xr.DataArray:
    """Read a single-band raster as a float64 DataArray with nodata as NaN, north up.

    Parameters
    ----------
    path : path
        Any raster GDAL reads (GeoTIFF, NetCDF variable, ...).
    name : str
        Scenario key of the grid, for messages (``"grids.topography"``).
    crs : str, optional
        CRS to assign when the file carries none.

    Returns
    -------
    xarray.DataArray
        Dimensions (y, x), y descending, ``rio.crs`` set when known.

    Raises
    ------
    CrustflowInputError
        Missing file, not a raster, several bands, all nodata.
    """
    import rasterio
    import rioxarray

    path = Path(path)
    if not path.exists():
        raise CrustflowInputError(f"{name}: file not found: {path}; check the path in the scenario")
    try:
        da = rioxarray.open_rasterio(path, masked=True)
    except (rasterio.errors.RasterioIOError, rasterio.errors.RasterioError, ValueError, OSError) as exc:
        first = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
        raise CrustflowInputError(f"{name}: {path} is not a raster GDAL can read ({first}); give a "
                                  "GeoTIFF or another single-band raster") from None
    if isinstance(da, list | xr.Dataset):
        raise CrustflowInputError(f"{name}: {path} holds several variables; point to one, e.g. "
                                  f"'netcdf:{path.name}:elevation'")
    if "band" in da.dims:
        if da.sizes["band"] != 1:
            raise CrustflowInputError(f"{name}: {path} has {da.sizes['band']} bands; give a "
                                      "single-band raster")
        da = da.squeeze("band", drop=True)
    if da.ndim != 2 or min(da.shape) < 3:
        raise CrustflowInputError(f"{name}: {path} must be a 2-D grid of at least 3 x 3 cells "
                                  f"(shape {da.shape})")
    da = da.astype("float64")
    da.attrs = {k: v for k, v in da.attrs.items() if k not in ("_FillValue", "scale_factor",
                                                                "add_offset")}
    if da.rio.crs is None and crs is not None:
        da = da.rio.write_crs(crs)
    if da.y.values[0] < da.y.values[-1]:  # south-to-north rows: flip to north-up
        da = da.isel(y=slice(None, None, -1))
        da = da.rio.write_transform(da.rio.transform(recalc=True))
    da = da.load()
    if not np.isfinite(da.values).any():
        raise CrustflowInputError(f"{name}: {path} holds no valid cells (all nodata); check the file "
                                  "or its nodata value")
    da.name = name.split(".")[-1]
    return da


def _same_pixel_grid(a: xr.DataArray, b: xr.DataArray) -> bool:
    if a.shape != b.shape:
        return False
    ta, tb = a.rio.transform(), b.rio.transform()
    tol = 1e-6 * max(abs(ta.a), abs(ta.e))
    return all(abs(p - q) <= tol for p, q in zip(tuple(ta)[:6], tuple(tb)[:6], strict=True))


def align_to(grid: xr.DataArray, target: xr.DataArray, name: str) -> tuple[xr.DataArray, dict]:
    """Put ``grid`` on exactly the cells of ``target`` (bilinear where it must be resampled).

    Parameters
    ----------
    grid : xarray.DataArray
        The grid to align (crust thickness or Moho depth).
    target : xarray.DataArray
        The topography grid.
    name : str
        Scenario key of ``grid``, for messages.

    Returns
    -------
    aligned : xarray.DataArray
        On ``target``'s coordinates exactly.
    record : dict
        What was done, for the run manifest.
    """
    from rasterio.enums import Resampling
    from rasterio.warp import transform_bounds

    if grid.rio.crs is None:
        if _same_pixel_grid(grid, target) and target.rio.crs is not None:
            grid = grid.rio.write_crs(target.rio.crs)
        else:
            raise CrustflowInputError(
                f"{name} carries no CRS and is not on the topography's pixel grid; save it with a "
                "CRS, or resample it onto the topography grid")
    if grid.rio.crs == target.rio.crs and _same_pixel_grid(grid, target):
        aligned = grid.assign_coords(x=target.x, y=target.y)
        return aligned, {"method": "none (same pixel grid)"}
    left, bottom, right, top = transform_bounds(grid.rio.crs, target.rio.crs, *grid.rio.bounds(),
                                                densify_pts=21)
    tl, tb, tr, tt = target.rio.bounds()
    if left >= tr or right <= tl or bottom >= tt or top <= tb:
        raise CrustflowInputError(
            f"{name} does not overlap the topography grid (bounds {left:.6g}, {bottom:.6g}, "
            f"{right:.6g}, {top:.6g} vs {tl:.6g}, {tb:.6g}, {tr:.6g}, {tt:.6g} in the topography's "
            "CRS); check both files cover the same region")
    src = grid.rio.write_nodata(np.nan)
    aligned = src.rio.reproject_match(target, resampling=Resampling.bilinear)
    aligned = aligned.assign_coords(x=target.x, y=target.y)
    record = {
        "method": "bilinear resampling onto the topography grid (rasterio/GDAL warp)",
        "source_crs": grid.rio.crs.to_string(),
        "source_shape": list(grid.shape),
        "source_resolution": [abs(r) for r in grid.rio.resolution()],
    }
    if not np.isfinite(aligned.values).any():
        raise CrustflowInputError(f"{name} has no valid cells where the topography grid is; check "
                                  "both files cover the same region")
    return aligned, record


def read_inputs(scenario) -> InputGrids:
    """Read, check and align the grids a :class:`~crustflow.scenario.Scenario` names.

    Parameters
    ----------
    scenario : Scenario

    Returns
    -------
    InputGrids
        Grids in m on the topography grid.

    Raises
    ------
    CrustflowInputError
        Missing CRS, grids that do not overlap, thickness grids that look like kilometres, ...
    """
    from . import constants

    topo = read_grid(scenario.topography, "grids.topography", crs=scenario.crs)
    if topo.rio.crs is None:
        raise CrustflowInputError(
            f"grids.topography ({scenario.topography.name}) carries no CRS; add it to the file or set "
            '[grids] crs = "EPSG:...", naming the CRS of the grid')
    provenance = {"topography": {"path": str(scenario.topography), "shape": list(topo.shape),
                                 "crs": topo.rio.crs.to_string()}}
    out = InputGrids(topography=topo, provenance=provenance)
    for key in ("crust_thickness", "moho_depth"):
        path = getattr(scenario, key)
        if path is None:
            continue
        grid = read_grid(path, f"grids.{key}", crs=scenario.crs)
        grid, record = align_to(grid, topo, f"grids.{key}")
        finite = grid.values[np.isfinite(grid.values)]
        if finite.max() < constants.KILOMETRE_SUSPICION:
            raise CrustflowInputError(
                f"grids.{key} values look like kilometres (max {finite.max():.4g}); give the grid in "
                "metres (multiply by 1000)")
        if key == "crust_thickness" and finite.min() <= 0:
            raise CrustflowInputError(
                f"grids.crust_thickness has values <= 0 (min {finite.min():.4g} m); crustal thickness "
                "is surface to Moho and must be positive")
        record["path"] = str(path)
        provenance[key] = record
        setattr(out, key, grid)
    return out
