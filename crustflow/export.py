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
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path

import numpy as np
import rioxarray  # noqa: F401  (registers the .rio accessor)
import xarray as xr

from .errors import CrustflowInputError

__all__ = ["write_netcdf", "write_geotiff", "write_outputs", "package_versions", "check_out_dir"]

#: Packages whose versions go into the run manifest.
_PACKAGES = ("crustflow", "numpy", "scipy", "xarray", "rioxarray", "rasterio", "pyproj", "dask",
             "matplotlib", "pint", "netCDF4", "geopandas")

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


def write_netcdf(ds: xr.Dataset, path: str | Path, *, variables=None, attrs: dict | None = None) -> None:
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
    out = ds[names].copy()
    crs = ds.rio.crs
    out = out.rio.write_crs(crs).rio.write_coordinate_system()
    encoding = {}
    for name in names:
        flag = "flag_values" in out[name].attrs
        if flag:
            out[name] = out[name].fillna(-1).astype("int8")
            out[name].attrs.update(ds[name].attrs)
            encoding[name] = {"dtype": "int8", "_FillValue": np.int8(-1), "zlib": True,
                              "complevel": 4}
        else:
            encoding[name] = {"dtype": "float32", "_FillValue": np.float32(np.nan), "zlib": True,
                              "complevel": 4}
        out[name].attrs["grid_mapping"] = "spatial_ref"
        out[name].encoding = {}
    for coord in ("x", "y"):
        encoding[coord] = {"_FillValue": None}
    encoding["spatial_ref"] = {"dtype": "int32"}
    out.attrs = {k: v for k, v in ds.attrs.items() if isinstance(v, str | int | float)}
    out.attrs.update({
        "Conventions": "CF-1.8",
        "source": f"crustflow {ds.attrs.get('crustflow_version', '')}".strip(),
        "history": f"{datetime.now(UTC).isoformat(timespec='seconds')} crustflow run",
        "comment": "Rates use the Julian year (1 yr = 365.25 d).",
    })
    out.attrs.update(attrs or {})
    out.to_netcdf(path, encoding=encoding, format="NETCDF4")


def write_geotiff(da: xr.DataArray, path: str | Path, *, crs, transform) -> None:
    """Write one variable as a tiled, DEFLATE-compressed single-band GeoTIFF.

    Float variables are float32 with NaN nodata; flag variables are uint8 with nodata 255. The band
    description is the variable's ``long_name`` and the band unit its ``units``.
    """
    import rasterio

    flag = "flag_values" in da.attrs
    values = np.asarray(da.values)
    if flag:
        data = np.where(np.isfinite(values), values, 255).astype("uint8")
        dtype, nodata, predictor = "uint8", 255, 2
    else:
        data = values.astype("float32")
        dtype, nodata, predictor = "float32", float("nan"), 3
    height, width = data.shape
    block = 256 if min(height, width) >= 256 else 16 * max(1, min(height, width) // 16)
    profile = dict(driver="GTiff", width=width, height=height, count=1, dtype=dtype, crs=crs,
                   transform=transform, nodata=nodata, compress="deflate", predictor=predictor,
                   tiled=True, blockxsize=max(block, 16), blockysize=max(block, 16))
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data, 1)
        dst.set_band_description(1, da.attrs.get("long_name", str(da.name)))
        dst.units = (da.attrs.get("units", ""),)
        dst.update_tags(1, units=da.attrs.get("units", ""), long_name=da.attrs.get("long_name", ""))
        dst.update_tags(source="crustflow", caution=da.attrs.get("caution", ""))


def check_out_dir(out: Path, inputs: list[Path]) -> None:
    """Refuse output folders that hold inputs or that are not crustflow output folders."""
    out = out.resolve()
    for path in inputs:
        path = Path(path).resolve()
        if out == path or out in path.parents:
            raise CrustflowInputError(f"output folder {out} holds the input {path.name}; choose another "
                                      "--out folder (inputs are never overwritten)")
    if out.exists():
        if not out.is_dir():
            raise CrustflowInputError(f"--out {out} is a file; name a folder")
        if any(out.iterdir()) and not (out / MANIFEST).is_file():
            raise CrustflowInputError(f"--out folder {out} is not empty and holds no crustflow run; "
                                      "choose an empty or new folder")


def write_outputs(ds: xr.Dataset, out: str | Path, *, manifest: dict, variables=None,
                  formats=("netcdf", "geotiff", "figure"), inputs=(), stage=None) -> Path:
    """Write a run's outputs into ``out`` atomically.

    Parameters
    ----------
    ds : xarray.Dataset
        Fields from :func:`crustflow.compute_fields` / :func:`crustflow.solve`.
    out : path
        Output folder; replaced as a whole if it holds an earlier crustflow run.
    manifest : dict
        Run manifest (scenario, versions, checksums, timings); written as ``run.json``.
    variables : list of str, optional
        Variables for NetCDF and GeoTIFF (default: all).
    formats : sequence of str
        Any of "netcdf", "geotiff", "figure".
    inputs : sequence of path
        Input files, which must not lie inside ``out``.
    stage : callable, optional
        Called with a stage name as each output kind starts.

    Returns
    -------
    Path
        The output folder.
    """
    note = stage or (lambda name: None)
    out = Path(out).expanduser().resolve()
    check_out_dir(out, list(inputs))
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    try:
        written = []
        names = _file_variables(ds, variables)
        if "netcdf" in formats:
            note("write NetCDF")
            write_netcdf(ds, tmp / "fields.nc", variables=names,
                         attrs={"scenario": json.dumps(manifest.get("scenario_as_written", {}))})
            written.append("fields.nc")
        if "geotiff" in formats:
            note("write GeoTIFF")
            crs, transform = ds.rio.crs, ds.rio.transform()
            for name in names:
                da = ds[name]
                da.attrs["caution"] = ds.attrs.get("caution", "")
                write_geotiff(da, tmp / f"{name}.tif", crs=crs, transform=transform)
                written.append(f"{name}.tif")
        if "figure" in formats:
            note("draw figure")
            from .plot import flux_map

            flux_map(ds, tmp / "flux_map.png")
            written.append("flux_map.png")
        note("write manifest")
        manifest = dict(manifest, outputs=written + [MANIFEST])
        (tmp / MANIFEST).write_text(json.dumps(manifest, indent=2, default=str) + "\n")
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
    return out


def base_manifest(scenario, timings: dict, provenance: dict | None = None) -> dict:
    """The run manifest: scenario as written and resolved, versions, checksums, timings."""
    from .grids import file_checksum

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
