"""Grids handed to the Python API, made ready as the command makes its files ready.

A raster opened the usual way (``rioxarray.open_rasterio(path)``) has a ``band`` dimension, its
nodata value unmasked and spatial dimensions that may be called ``x``/``y``, ``lon``/``lat`` or
anything rioxarray recognises. :func:`prepared_grid` squeezes a length-1 band, masks the nodata value
(``rio.nodata``, ``rio.encoded_nodata`` or ``_FillValue``) to NaN, renames the spatial dimensions to
``y``/``x`` and puts the rows north up. :func:`aligned_grid` puts a second grid on the topography
grid's cells: unchanged where the cells already coincide, otherwise resampled bilinearly with GDAL's
warper (``rio.reproject_match``), the same resampling the command applies through a warped VRT.
Dask-backed grids stay lazy, except when they must be resampled (rioxarray reprojects eagerly).
"""

from __future__ import annotations

import numpy as np
import rioxarray  # noqa: F401  (registers the .rio accessor)
import xarray as xr
from affine import Affine

from crustflow.errors import CrustflowInputError

__all__ = ["prepared_grid", "aligned_grid", "same_cells", "is_lazy"]

#: Relative tolerance on coordinates for two grids to count as the same cells (of a cell size).
SAME_CELL_RTOL = 1e-6


def is_lazy(da: xr.DataArray | None) -> bool:
    """True for a dask-backed DataArray."""
    return da is not None and da.chunks is not None


def prepared_grid(da: xr.DataArray, name: str, *, crs=None) -> xr.DataArray:
    """A 2-D float grid with dims ``(y, x)``, rows north up, nodata as NaN and a CRS.

    Parameters
    ----------
    da : xarray.DataArray
        The grid as the user has it (any spatial dimension names rioxarray recognises, an optional
        length-1 ``band`` dimension, nodata tagged or already NaN).
    name : str
        Its role (``topography``, ``crust_thickness``, ...), for messages.
    crs : optional
        CRS to use when the grid carries none.
    """
    if not isinstance(da, xr.DataArray):
        raise CrustflowInputError(
            f"{name} must be an xarray.DataArray (e.g. rioxarray.open_rasterio(path)), "
            f"not {type(da).__name__}"
        )
    da = _squeezed(da, name)
    da = _renamed(da, name)
    nodata = _nodata(da)
    if crs is not None and da.rio.crs is None:
        da = da.rio.write_crs(crs)
    transform = da.rio.transform()  # as stored (exact spacing), else from the coordinates
    out = da.astype("float64")
    if nodata is not None and np.isfinite(nodata):
        out = out.where(da != nodata)
    out = out.rio.write_crs(da.rio.crs) if da.rio.crs is not None else out
    out.attrs = {k: v for k, v in da.attrs.items() if k not in ("_FillValue", "nodata")}
    out.encoding = {}
    if out.y.size > 1 and out.y.values[0] < out.y.values[-1]:  # rows south to north: flip
        out = out.isel(y=slice(None, None, -1))
        t = transform
        transform = Affine(t.a, t.b, t.c, t.d, -t.e, t.f + t.e * out.sizes["y"])
    return out.rio.write_transform(transform)


def _squeezed(da: xr.DataArray, name: str) -> xr.DataArray:
    for dim in list(da.dims):
        if dim == "band" or (dim not in (_spatial_dims(da) or ()) and da.sizes[dim] == 1):
            if da.sizes[dim] != 1:
                raise CrustflowInputError(
                    f"{name} has {da.sizes[dim]} bands; select one, e.g. grid.sel(band=1)"
                )
            da = da.isel({dim: 0}, drop=True)
    if da.ndim != 2:
        raise CrustflowInputError(
            f"{name} must be a 2-D grid (dims {da.dims}); select one layer of the others"
        )
    return da


#: Dimension names taken as (y, x) when rioxarray recognises none (it knows x/y,
#: latitude/longitude and CF ``axis`` attributes).
_OTHER_NAMES = (("lat", "lon"), ("lat", "long"), ("Y", "X"), ("northing", "easting"))


def _spatial_dims(da: xr.DataArray) -> tuple[str, str] | None:
    """The (y, x) dimension names: rioxarray's, else a common pair of names, else None."""
    try:
        return da.rio.y_dim, da.rio.x_dim
    except Exception:  # noqa: BLE001 - rioxarray's MissingSpatialDimensionError and kin
        pass
    for pair in _OTHER_NAMES:
        if set(pair) <= set(da.dims):
            return pair
    return None


def _renamed(da: xr.DataArray, name: str) -> xr.DataArray:
    dims = _spatial_dims(da)
    if dims is None:
        raise CrustflowInputError(
            f"{name}: cannot tell its spatial dimensions (dims {da.dims}); name them y/x, "
            "lat/lon or latitude/longitude, or call grid.rio.set_spatial_dims(...)"
        )
    y_dim, x_dim = dims
    if (y_dim, x_dim) != ("y", "x"):
        da = da.rename({y_dim: "y", x_dim: "x"})
    da = da.rio.set_spatial_dims(x_dim="x", y_dim="y")
    return da.transpose("y", "x")


def _nodata(da: xr.DataArray):
    for value in (da.rio.nodata, da.rio.encoded_nodata, da.attrs.get("_FillValue")):
        if value is not None:
            return float(value)
    return None


def same_cells(a: xr.DataArray, b: xr.DataArray) -> bool:
    """Do two prepared grids have the same cells (shape and coordinates)?"""
    if a.shape != b.shape:
        return False
    cell = max(abs(float(a.x[1] - a.x[0])) if a.x.size > 1 else 1.0, 1e-12)
    tol = SAME_CELL_RTOL * cell
    return bool(
        np.allclose(a.x.values, b.x.values, rtol=0, atol=tol)
        and np.allclose(a.y.values, b.y.values, rtol=0, atol=tol)
    )


def aligned_grid(da: xr.DataArray, target: xr.DataArray, name: str) -> xr.DataArray:
    """``da`` (prepared) on the cells of ``target`` (prepared): as is, or resampled bilinearly."""
    if same_cells(da, target) and (da.rio.crs is None or da.rio.crs == target.rio.crs):
        return da.assign_coords(x=target.x.values, y=target.y.values)
    if da.rio.crs is None:
        raise CrustflowInputError(
            f"{name} is not on the topography grid's cells and has no CRS to resample it with; "
            "write one with grid.rio.write_crs('EPSG:...')"
        )
    from rasterio.enums import Resampling

    moved = da.rio.write_nodata(np.nan).rio.reproject_match(target, resampling=Resampling.bilinear)
    return moved.assign_coords(x=target.x.values, y=target.y.values)
