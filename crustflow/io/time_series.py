"""Writers for fields through time: CF NetCDF with a ``time`` dimension, GeoTIFFs with a band per time."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import rasterio
import rioxarray  # noqa: F401  (registers the .rio accessor)
import xarray as xr

from crustflow.io.writers import netcdf_attrs

__all__ = ["write_time_netcdf", "write_band_stack"]

#: Compression level of NetCDF variables (project choice: zlib level 4 is the common default).
ZLIB_LEVEL = 4


def write_time_netcdf(ds: xr.Dataset, path: str | Path, *, attrs: dict | None = None) -> None:
    """Write a dataset of (time, y, x) or (y, x) variables as CF-1.8 NetCDF.

    Parameters
    ----------
    ds : xarray.Dataset
        From :func:`crustflow.evolve`: CRS set with rioxarray, ``time`` in a named unit.
    path : path
        Destination ``.nc`` file.
    attrs : dict, optional
        Extra global attributes (scenario text, provenance).

    Notes
    -----
    Variables as float32 with zlib compression, a NaN ``_FillValue`` and ``grid_mapping`` pointing
    at the ``spatial_ref`` variable (CF-1.8 section 5.6); coordinates without a fill value. The
    ``time`` coordinate counts model time since the initial state (units such as ``Myr``; not a
    calendar date).
    """
    out = ds.copy()
    out = out.rio.write_crs(ds.rio.crs).rio.write_coordinate_system()
    glob = netcdf_attrs(ds.attrs.get("title", "crustflow"))
    glob.update({k: v for k, v in ds.attrs.items() if isinstance(v, str | int | float)})
    glob.update(attrs or {})
    out.attrs = glob
    encoding = {}
    for name, var in out.data_vars.items():
        if name == "spatial_ref":
            encoding[name] = {"dtype": "int32"}
            continue
        var.attrs["grid_mapping"] = "spatial_ref"
        encoding[name] = {
            "dtype": "float32",
            "zlib": True,
            "complevel": ZLIB_LEVEL,
            "_FillValue": np.float32(np.nan),
        }
    for name in out.coords:
        if name != "spatial_ref":
            encoding[name] = {"_FillValue": None}
    out.to_netcdf(path, encoding=encoding, engine="netcdf4")


def write_band_stack(
    values: np.ndarray,
    path: str | Path,
    *,
    crs,
    transform,
    descriptions,
    units: str,
    long_name: str,
) -> None:
    """Write a (band, y, x) stack as one tiled, compressed GeoTIFF, a band per time.

    Parameters
    ----------
    values : numpy.ndarray, shape (nband, nrow, ncol)
        Rows north to south.
    path : path
    crs, transform
        The grid's CRS and affine transform.
    descriptions : sequence of str
        One band description per band (e.g. ``"t = 0.5 Myr"``), shown by GIS software.
    units : str
        Unit of every band.
    long_name : str
        Written as the dataset's ``long_name`` tag.
    """
    values = np.asarray(values, dtype="float32")
    nband, height, width = values.shape
    profile = {
        "driver": "GTiff",
        "height": height,
        "width": width,
        "count": nband,
        "dtype": "float32",
        "crs": crs,
        "transform": transform,
        "nodata": np.nan,
        "compress": "deflate",
        "tiled": width >= 256 and height >= 256,
    }
    if profile["tiled"]:
        profile.update(blockxsize=256, blockysize=256)
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(values)
        for band, text in enumerate(descriptions, start=1):
            dst.set_band_description(band, text)
        dst.units = tuple([units] * nband)
        dst.update_tags(long_name=long_name, units=units)
