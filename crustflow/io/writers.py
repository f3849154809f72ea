"""Writing gridded outputs: CF NetCDF and (cloud-optimised) GeoTIFF, whole or strip by strip.

Output folders, their atomic replacement and the run manifest are in :mod:`crustflow.io.folders`.
"""

from __future__ import annotations

import json
import warnings
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from crustflow._version import __version__
from crustflow.errors import CrustflowInputError
from crustflow.io.colour_ramps import flag_categories
from crustflow.io.styles import BandStatistics, finish_geotiff
from crustflow.variables import CAUTION

if TYPE_CHECKING:
    import xarray as xr

__all__ = [
    "write_netcdf",
    "write_geotiff",
    "NetcdfWriter",
    "GeotiffWriter",
    "check_compression",
]

#: DEFLATE level of the GeoTIFFs (zlib levels 1-9), dimensionless. Project choice: level 1 writes
#: about twice as fast as GDAL's default 6 for a few per cent larger files (benchmarks/RESULTS.md).
GEOTIFF_DEFLATE_LEVEL = 1

#: DEFLATE level of the NetCDF variables (zlib), dimensionless. Project choice, as above.
NETCDF_DEFLATE_LEVEL = 1

#: ZSTD level of both formats, dimensionless. Project choice: level 1 is the fastest; higher
#: levels gain little on float fields (benchmarks/RESULTS.md).
ZSTD_LEVEL = 1


def _geotiff_codec(compression: str, predictor: int) -> dict:
    """rasterio creation options of a codec (lossless in every case)."""
    if compression == "deflate":
        return {"compress": "deflate", "predictor": predictor, "zlevel": GEOTIFF_DEFLATE_LEVEL}
    if compression == "zstd":
        return {"compress": "zstd", "predictor": predictor, "zstd_level": ZSTD_LEVEL}
    if compression == "lerc_zstd":  # LERC with a zero error bound is lossless
        return {"compress": "lerc_zstd", "max_z_error": 0, "zstd_level": ZSTD_LEVEL}
    return {}


def _cog_codec(compression: str, predictor: int) -> dict:
    """GDAL COG driver options of a codec: the same codecs and levels as :func:`_geotiff_codec`
    under the COG driver's option names (``LEVEL`` for both DEFLATE and ZSTD)."""
    if compression == "deflate":
        return {"compress": "DEFLATE", "predictor": predictor, "level": GEOTIFF_DEFLATE_LEVEL}
    if compression == "zstd":
        return {"compress": "ZSTD", "predictor": predictor, "level": ZSTD_LEVEL}
    if compression == "lerc_zstd":
        return {"compress": "LERC_ZSTD", "max_z_error": 0, "level": ZSTD_LEVEL}
    return {"compress": "NONE"}


def _netcdf_codec(compression: str) -> dict:
    """netCDF4 ``createVariable`` options of a codec; NetCDF has no LERC, so lerc_zstd is zstd."""
    if compression == "deflate":
        return {"zlib": True, "complevel": NETCDF_DEFLATE_LEVEL, "shuffle": True}
    if compression in ("zstd", "lerc_zstd"):
        return {"compression": "zstd", "complevel": ZSTD_LEVEL, "shuffle": True}
    return {}


def check_compression(compression: str, formats) -> None:
    """Check that this GDAL and netCDF4 build can write ``compression`` in ``formats``.

    Raises
    ------
    CrustflowInputError
        Naming the library that lacks the codec and the fix.
    """
    if compression in ("deflate", "none"):
        return
    if "geotiff" in formats and not _gdal_writes(compression):
        raise CrustflowInputError(
            f"output.compression {compression!r}: this GDAL build cannot write it in GeoTIFF; "
            'use "deflate", or install a GDAL (rasterio wheel) built with ZSTD and LERC'
        )
    if "netcdf" in formats and not _netcdf_writes_zstd():
        raise CrustflowInputError(
            f"output.compression {compression!r}: this netCDF4 build has no ZSTD filter "
            '(HDF5 plugin); use "deflate", or install netCDF4 >= 1.6 wheels (which ship the '
            "plugin) or set HDF5_PLUGIN_PATH to a folder holding it"
        )


def _gdal_writes(compression: str) -> bool:
    import rasterio
    from rasterio.errors import RasterioError

    path = f"/vsimem/crustflow-codec-{compression}.tif"
    try:
        with rasterio.open(
            path,
            "w",
            driver="GTiff",
            width=16,
            height=16,
            count=1,
            dtype="float32",
            tiled=True,
            blockxsize=16,
            blockysize=16,
            **_geotiff_codec(compression, 3),
        ) as dst:
            dst.write(np.zeros((1, 16, 16), "float32"))
        return True
    except (RasterioError, ValueError):
        return False
    finally:
        from rasterio.shutil import delete

        try:
            delete(path)
        except (RasterioError, OSError):
            pass


def _netcdf_writes_zstd() -> bool:
    import netCDF4

    if not getattr(netCDF4, "__has_zstandard_support__", False):
        return False
    try:
        with netCDF4.Dataset("crustflow-codec.nc", "w", diskless=True, persist=False) as nc:
            nc.createDimension("x", 16)
            var = nc.createVariable("v", "f4", ("x",), **_netcdf_codec("zstd"))
            var[:] = np.zeros(16, "float32")
        return True
    except (RuntimeError, ValueError, OSError):
        return False


def finite_float32(values: np.ndarray, name: str) -> np.ndarray:
    """``values`` as float32 for a file; values beyond float32's range (about 3.4e38) become NaN
    (nodata) with a warning, never infinity."""
    with np.errstate(over="ignore", invalid="ignore"):
        data = np.asarray(values).astype("float32")
        overflow = np.isinf(data)
    if overflow.any():
        warnings.warn(
            f"{Path(str(name)).name}: {int(overflow.sum())} cells exceed the float32 range of the "
            "output and were written as nodata; check the inputs' units and magnitudes",
            stacklevel=3,
        )
        data[overflow] = np.nan
    return data


def _file_variables(ds: xr.Dataset, variables) -> list[str]:
    return [v for v in (variables or ds.data_vars) if v in ds.data_vars and v != "spatial_ref"]


def _cf_layout(x: np.ndarray, y: np.ndarray, crs, transform) -> tuple[dict, dict, dict]:
    """CF attributes of x, y and the ``spatial_ref`` grid mapping (CF-1.8 through pyproj).

    The grid mapping carries ``crs_wkt`` (CF) and ``spatial_ref`` and ``GeoTransform`` (read by GDAL),
    as rioxarray writes them.
    """
    import pyproj

    crs = pyproj.CRS.from_user_input(crs)
    mapping = dict(crs.to_cf())
    mapping["spatial_ref"] = crs.to_wkt()
    mapping["GeoTransform"] = " ".join(str(v) for v in transform.to_gdal())
    axes = {axis.get("axis"): axis for axis in crs.cs_to_cf()}
    x_attrs = dict(axes.get("X", {}))
    y_attrs = dict(axes.get("Y", {}))
    if crs.is_projected:  # metre grids: CF and UDUNITS spell the unit "m"
        x_attrs["units"] = y_attrs["units"] = "m"
    return x_attrs, y_attrs, mapping


class NetcdfWriter:
    """Writes variables into a CF-1.8 NetCDF file strip by strip (float32, zlib, grid_mapping).

    Parameters
    ----------
    path : path
        Destination ``.nc`` file.
    x, y : ndarray
        Cell-centre coordinates (y descending).
    crs, transform
        The grid's CRS (rasterio/pyproj) and north-up affine transform.
    variables : dict
        Name -> attributes (``long_name``, ``units``, optional ``flag_values``/``flag_meanings``).
    attrs : dict
        Global attributes.
    chunk_rows : int
        Rows written at a time; the NetCDF chunks are this tall (16 to 256 rows).
    compression : str
        ``"deflate"`` (zlib), ``"zstd"`` or ``"lerc_zstd"`` (both ZSTD with byte shuffle: NetCDF
        has no LERC) or ``"none"``.
    """

    def __init__(
        self,
        path,
        x,
        y,
        crs,
        transform,
        variables: dict,
        attrs: dict,
        chunk_rows: int = 256,
        compression: str = "deflate",
    ) -> None:
        import netCDF4

        self.nc = netCDF4.Dataset(path, "w", format="NETCDF4")
        nc = self.nc
        nc.setncatts({k: v for k, v in attrs.items() if isinstance(v, str | int | float)})
        nc.createDimension("y", len(y))
        nc.createDimension("x", len(x))
        x_attrs, y_attrs, mapping = _cf_layout(x, y, crs, transform)
        for name, values, cattrs in (("y", y, y_attrs), ("x", x, x_attrs)):
            var = nc.createVariable(name, "f8", (name,))
            var[:] = values
            var.setncatts(cattrs)
        ref = nc.createVariable("spatial_ref", "i4")
        ref.setncatts(mapping)
        # Chunks as tall as the strips written (so each write completes its chunks), at most 256.
        chunks = (min(max(chunk_rows, 16), 256, len(y)), min(256, len(x)))
        # Chunk cache: one row of chunks, twice over (partly written chunks wait there).
        cache = 2 * (len(x) // chunks[1] + 1) * chunks[0] * chunks[1] * 4
        self.flags = set()
        for name, vattrs in variables.items():
            flag = "flag_values" in vattrs
            if flag:
                self.flags.add(name)
                var = nc.createVariable(
                    name,
                    "i1",
                    ("y", "x"),
                    chunksizes=chunks,
                    fill_value=np.int8(-1),
                    **_netcdf_codec(compression),
                )
            else:
                var = nc.createVariable(
                    name,
                    "f4",
                    ("y", "x"),
                    chunksizes=chunks,
                    fill_value=np.float32(np.nan),
                    **_netcdf_codec(compression),
                )
            var.set_auto_maskandscale(False)
            var.set_var_chunk_cache(
                size=cache, nelems=4 * (len(x) // chunks[1] + 1), preemption=0.9
            )
            var.setncatts({k: v for k, v in vattrs.items() if k != "caution"})
            var.grid_mapping = "spatial_ref"

    def write_rows(self, row0: int, arrays: dict[str, np.ndarray]) -> None:
        """Write rows starting at ``row0`` for each variable given."""
        for name, values in arrays.items():
            if name in self.flags:
                data = np.where(np.isfinite(values), values, -1).astype("int8")
            else:
                data = finite_float32(values, name)
            self.nc.variables[name][row0 : row0 + data.shape[0], :] = data

    def close(self) -> None:
        """Close the file."""
        self.nc.close()


class GeotiffWriter:
    """Writes one variable as a tiled, compressed single-band GeoTIFF, strip by strip.

    Float variables are float32 with NaN nodata; flag variables are uint8 with nodata 255, with a
    colour table and category names. The band description is the variable's ``long_name`` and the
    band unit its ``units``. On :meth:`close` the file gets statistics, overviews and a ``.qml``
    style sidecar (:func:`crustflow.io.styles.finish_geotiff`); ``variable`` (default: the file's
    base name) picks its colour ramp. ``compression``: ``"deflate"`` (default, with the
    floating-point or horizontal predictor), ``"zstd"`` (same predictors), ``"lerc_zstd"`` (LERC
    with a zero error bound, lossless) or ``"none"``; tiles are compressed on all cores (GDAL
    ``NUM_THREADS=ALL_CPUS``).
    """

    def __init__(
        self,
        path,
        *,
        crs,
        transform,
        height: int,
        width: int,
        attrs: dict,
        variable=None,
        compression: str = "deflate",
    ) -> None:
        import rasterio

        self.path, self.attrs = Path(path), dict(attrs)
        self.variable = variable or self.path.stem
        self.statistics = BandStatistics(height, width)
        self.flag = "flag_values" in attrs
        if self.flag:
            dtype, nodata, predictor = "uint8", 255, 2
        else:
            dtype, nodata, predictor = "float32", float("nan"), 3
        block = 256 if min(height, width) >= 256 else 16
        self.dst = rasterio.open(
            path,
            "w",
            driver="GTiff",
            width=width,
            height=height,
            count=1,
            dtype=dtype,
            crs=crs,
            transform=transform,
            nodata=nodata,
            tiled=True,
            blockxsize=block,
            blockysize=block,
            num_threads="ALL_CPUS",
            **_geotiff_codec(compression, predictor),
        )
        self.dst.set_band_description(1, attrs.get("long_name", ""))
        self.dst.units = (attrs.get("units", ""),)
        self.dst.update_tags(1, units=attrs.get("units", ""), long_name=attrs.get("long_name", ""))
        self.dst.update_tags(source="crustflow", caution=attrs.get("caution", ""))
        if self.flag:
            _flag_colour_table(self.dst, self.variable, attrs)

    def write_rows(self, row0: int, values: np.ndarray) -> None:
        """Write rows starting at ``row0``."""
        from rasterio.windows import Window

        if self.flag:
            self.statistics.add(row0, values)
            data = np.where(np.isfinite(values), values, 255).astype("uint8")
        else:
            data = finite_float32(values, self.dst.name)
            self.statistics.add(row0, data)  # the numbers as stored
        self.dst.write(data, 1, window=Window(0, row0, data.shape[1], data.shape[0]))

    def close(self) -> None:
        """Close the file, then add statistics, overviews and the ``.qml`` sidecar."""
        if self.dst.closed:
            return
        self.dst.close()
        finish_geotiff(
            self.path, variable=self.variable, attrs=self.attrs, statistics=self.statistics
        )


def _flag_colour_table(dst, variable: str, attrs: dict) -> None:
    """Colour table and category names of a flag band (nodata 255 transparent).

    Category names go in the band tags ``CATEGORY_0``/``CATEGORY_1`` and ``flag_meanings`` (CF);
    the colours are those of the ``.qml`` sidecar (:func:`crustflow.io.colour_ramps.flag_categories`).
    """
    meanings = str(attrs.get("flag_meanings", "no yes"))
    table = {255: (0, 0, 0, 0)}
    tags = {"flag_values": "0 1", "flag_meanings": meanings}
    for value, label, colour in flag_categories(variable, meanings):
        h = colour.lstrip("#")
        table[value] = tuple(int(h[i : i + 2], 16) for i in (0, 2, 4)) + (255,)
        tags[f"CATEGORY_{value}"] = label
    dst.write_colormap(1, table)
    dst.update_tags(1, **tags)


def to_cog(path: str | Path, compression: str = "deflate") -> None:
    """Rewrite a tiled GeoTIFF in place as a cloud-optimised GeoTIFF (the ``[output] compression``
    codec, lossless; overviews: average resampling for continuous variables, nearest for flags).

    Notes
    -----
    GDAL's COG driver is used through ``rasterio.shutil.copy`` on the finished file (writing a COG
    strip by strip is not possible); band description, unit and tags are carried over.
    """
    import rasterio
    from rasterio.shutil import copy

    path = Path(path)
    tmp = path.with_suffix(".cog.tif")
    with rasterio.open(path) as src:
        continuous = src.dtypes[0].startswith("float")
    copy(
        path,
        tmp,
        driver="COG",
        overviews="AUTO",
        resampling="average" if continuous else "nearest",
        **_cog_codec(compression, 3 if continuous else 2),
    )  # GDAL's CreateCopy carries description, unit, tags and the colour table over
    tmp.replace(path)


def netcdf_attrs(title: str, scenario_text: str = "", parameters: dict | None = None) -> dict:
    """Global attributes of ``fields.nc``."""

    return {
        "Conventions": "CF-1.8",
        "title": title,
        "institution": "",
        "source": f"crustflow {__version__}",
        "history": f"{datetime.now(UTC).isoformat(timespec='seconds')} crustflow run",
        "comment": "Rates use the Julian year (1 yr = 365.25 d).",
        "caution": CAUTION,
        "crustflow_version": __version__,
        "scenario": scenario_text,
        "parameters_SI": json.dumps(parameters or {}),
    }


def write_netcdf(
    ds: xr.Dataset, path: str | Path, *, variables=None, attrs: dict | None = None
) -> None:
    """Write fields as CF-1.8 NetCDF (float32, zlib, CRS through ``grid_mapping``).

    Parameters
    ----------
    ds : xarray.Dataset
        From :func:`crustflow.compute_fields`.
    path : path
        Destination ``.nc`` file.
    variables : list of str, optional
        Subset to write (default: all).
    attrs : dict, optional
        Extra global attributes (scenario text, provenance).
    """
    names = _file_variables(ds, variables)
    glob = netcdf_attrs(
        ds.attrs.get("title", "crustflow"),
        parameters=json.loads(ds.attrs.get("parameters_SI", "{}")),
    )
    glob.update(attrs or {})
    writer = NetcdfWriter(
        path,
        ds.x.values,
        ds.y.values,
        ds.rio.crs,
        ds.rio.transform(),
        {n: ds[n].attrs for n in names},
        glob,
    )
    try:
        writer.write_rows(0, {n: ds[n].values for n in names})
    finally:
        writer.close()


def write_geotiff(da: xr.DataArray, path: str | Path, *, crs, transform) -> None:
    """Write one variable (whole grid) as a GeoTIFF; see :class:`GeotiffWriter`."""
    writer = GeotiffWriter(
        path, crs=crs, transform=transform, height=da.shape[0], width=da.shape[1], attrs=da.attrs
    )
    try:
        writer.write_rows(0, np.asarray(da.values))
    finally:
        writer.close()
