"""Writing a run's outputs: CF NetCDF, GeoTIFFs, the figure and the run manifest.

Everything is written into a temporary folder beside the destination and moved into place at the end,
so a failed run leaves no half-written output. Inputs are never opened for writing.
"""

from __future__ import annotations

import json
import os
import platform
import shutil
import sys
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from crustflow.errors import CrustflowInputError

if TYPE_CHECKING:
    import xarray as xr

__all__ = [
    "write_netcdf",
    "write_geotiff",
    "package_versions",
    "check_out_dir",
    "atomic_folder",
    "write_manifest",
    "NetcdfWriter",
    "GeotiffWriter",
    "base_manifest",
]

#: Packages whose versions go into the run manifest.
_PACKAGES = (
    "crustflow",
    "numpy",
    "scipy",
    "xarray",
    "rioxarray",
    "rasterio",
    "pyproj",
    "dask",
    "matplotlib",
    "pint",
    "netCDF4",
    "geopandas",
)

#: Marker file that says a folder is a crustflow output folder (safe to replace).
MANIFEST = "run.json"


def package_versions() -> dict[str, str]:
    """Versions of Python, GDAL and the packages crustflow relies on."""
    out = {"python": platform.python_version()}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    try:
        import rasterio

        out["GDAL"] = rasterio.__gdal_version__
    except ImportError:  # pragma: no cover - rasterio is a dependency
        pass
    return out


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
    """

    def __init__(
        self, path, x, y, crs, transform, variables: dict, attrs: dict, chunk_rows: int = 256
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
                    zlib=True,
                    complevel=4,
                    chunksizes=chunks,
                    fill_value=np.int8(-1),
                )
            else:
                var = nc.createVariable(
                    name,
                    "f4",
                    ("y", "x"),
                    zlib=True,
                    complevel=4,
                    chunksizes=chunks,
                    fill_value=np.float32(np.nan),
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
                data = values.astype("float32")
            self.nc.variables[name][row0 : row0 + data.shape[0], :] = data

    def close(self) -> None:
        """Close the file."""
        self.nc.close()


class GeotiffWriter:
    """Writes one variable as a tiled, DEFLATE-compressed single-band GeoTIFF, strip by strip.

    Float variables are float32 with NaN nodata; flag variables are uint8 with nodata 255. The band
    description is the variable's ``long_name`` and the band unit its ``units``.
    """

    def __init__(self, path, *, crs, transform, height: int, width: int, attrs: dict) -> None:
        import rasterio

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
            compress="deflate",
            predictor=predictor,
            tiled=True,
            blockxsize=block,
            blockysize=block,
            num_threads="ALL_CPUS",
        )
        self.dst.set_band_description(1, attrs.get("long_name", ""))
        self.dst.units = (attrs.get("units", ""),)
        self.dst.update_tags(1, units=attrs.get("units", ""), long_name=attrs.get("long_name", ""))
        self.dst.update_tags(source="crustflow", caution=attrs.get("caution", ""))

    def write_rows(self, row0: int, values: np.ndarray) -> None:
        """Write rows starting at ``row0``."""
        from rasterio.windows import Window

        if self.flag:
            data = np.where(np.isfinite(values), values, 255).astype("uint8")
        else:
            data = values.astype("float32")
        self.dst.write(data, 1, window=Window(0, row0, data.shape[1], data.shape[0]))

    def close(self) -> None:
        """Close the file."""
        self.dst.close()


def to_cog(path: str | Path) -> None:
    """Rewrite a tiled GeoTIFF in place as a cloud-optimised GeoTIFF (DEFLATE, overviews).

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
        predictor = 3 if src.dtypes[0].startswith("float") else 2
    copy(
        path,
        tmp,
        driver="COG",
        compress="DEFLATE",
        predictor=predictor,
        overviews="AUTO",
        resampling="nearest",
    )  # GDAL's CreateCopy carries description, unit and tags over
    tmp.replace(path)


def netcdf_attrs(title: str, scenario_text: str = "", parameters: dict | None = None) -> dict:
    """Global attributes of ``fields.nc``."""
    from crustflow._version import __version__
    from crustflow.variables import CAUTION

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


def check_out_dir(out: Path, inputs: list[Path]) -> None:
    """Refuse output folders that hold inputs or that are not crustflow output folders."""
    out = out.resolve()
    for path in inputs:
        path = Path(path).resolve()
        if out == path or out in path.parents:
            raise CrustflowInputError(
                f"output folder {out} holds the input {path.name}; choose another "
                "--out folder (inputs are never overwritten)"
            )
    if out.exists():
        if not out.is_dir():
            raise CrustflowInputError(f"--out {out} is a file; name a folder")
        if any(out.iterdir()) and not (out / MANIFEST).is_file():
            raise CrustflowInputError(
                f"--out folder {out} is not empty and holds no crustflow run; "
                "choose an empty or new folder"
            )


@contextmanager
def atomic_folder(out: str | Path, inputs=()) -> Iterator[Path]:
    """A temporary folder beside ``out`` that replaces ``out`` only if the block succeeds.

    Parameters
    ----------
    out : path
        The final output folder. An earlier crustflow run there is replaced as a whole.
    inputs : sequence of path
        Input files, which must not lie inside ``out``.

    Yields
    ------
    Path
        The temporary folder to write into. On any error it is removed and ``out`` is untouched.
    """
    out = Path(out).expanduser().resolve()
    check_out_dir(out, list(inputs))
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    try:
        yield tmp
        old = None
        if out.exists():
            old = out.parent / f".{out.name}.old-{os.getpid()}"
            out.rename(old)
        tmp.rename(out)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def write_manifest(folder: Path, manifest: dict, written: list[str]) -> None:
    """Write ``run.json`` listing the outputs."""
    manifest = dict(manifest, outputs=list(written) + [MANIFEST])
    (Path(folder) / MANIFEST).write_text(json.dumps(manifest, indent=2, default=str) + "\n")


def base_manifest(scenario, timings: dict, provenance: dict | None = None) -> dict:
    """The run manifest: scenario as written and resolved, versions, checksums, timings."""
    from crustflow.io.grids import file_checksum

    return {
        "crustflow_run": "channel-flow fields",
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "command": " ".join(Path(sys.argv[0]).name.split() + sys.argv[1:]),
        "scenario_file": str(scenario.source) if scenario.source else None,
        "scenario_as_written": scenario.written,
        "scenario_resolved_SI": scenario.resolved(),
        "inputs": {str(p): {"sha256": file_checksum(p)} for p in scenario.input_paths},
        "alignment": provenance or {},
        "versions": package_versions(),
        "stage_seconds": {k: round(v, 4) for k, v in timings.items()},
        "units_note": "rates use the Julian year, 1 yr = 365.25 d",
    }
