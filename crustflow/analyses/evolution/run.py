"""A run through time into an output folder: NetCDF, GeoTIFF band stacks, figures, manifest entries."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyproj
from scipy.ndimage import map_coordinates

from crustflow.analyses.evolution.evolve import (
    STEADY_VARIABLES,
    TRANSIENT_VARIABLES,
    run_setup,
    setup_from_scenario,
)
from crustflow.analyses.evolution.model import ProgressCallback
from crustflow.figures.evolution import elevation_animation, profile_figure
from crustflow.io.features import read_features
from crustflow.io.time_series import write_band_stack, write_time_netcdf

__all__ = ["run_evolution", "OUTPUT_NAMES", "line_profiles"]

#: Output files by purpose (the NetCDF name depends on the mode).
OUTPUT_NAMES = {
    "transient": "evolution.nc",
    "steady": "steady.nc",
    "profiles": "elevation_profiles.png",
    "animation": "elevation_animation.gif",
}

#: Points per profile line (project choice: finer than any figure needs).
PROFILE_POINTS = 400


def _tif_name(name: str, mode: str) -> str:
    return f"{name}_through_time.tif" if mode == "transient" else f"{name}_steady.tif"


def line_profiles(ds, lines, elevation: np.ndarray) -> list[tuple[str, np.ndarray, np.ndarray]]:
    """Elevation along lines, bilinear between cell centres.

    Parameters
    ----------
    ds : xarray.Dataset
        From :func:`crustflow.evolve` (coordinates and CRS).
    lines : list of (name, xs, ys)
        Vertices in the grid's CRS.
    elevation : numpy.ndarray, shape (ntime, nrow, ncol)
        m, on the dataset's cells.

    Returns
    -------
    list of (name, distance km, elevation m of shape (ntime, npts))
    """
    x, y = ds.x.values, ds.y.values
    crs = pyproj.CRS.from_user_input(ds.rio.crs)
    geod = crs.get_geod() if crs.is_geographic else None
    elev = elevation
    out = []
    for name, xs, ys in lines:
        seg = np.hypot(np.diff(xs), np.diff(ys))
        along = np.concatenate([[0.0], np.cumsum(seg)])
        s = np.linspace(0.0, along[-1], PROFILE_POINTS)
        px, py = np.interp(s, along, xs), np.interp(s, along, ys)
        if geod is not None:
            step = geod.inv(px[:-1], py[:-1], px[1:], py[1:])[2]
        else:
            step = np.hypot(np.diff(px), np.diff(py))
        dist = np.concatenate([[0.0], np.cumsum(step)]) / 1e3
        col = (px - x[0]) / (x[1] - x[0])
        row = (py - y[0]) / (y[1] - y[0])
        values = np.stack(
            [map_coordinates(e, [row, col], order=1, mode="nearest", cval=np.nan) for e in elev]
        )
        out.append((str(name), dist, values))
    return out


def _lines(scenario, ds) -> list:
    """The scenario's ``[budgets]`` sections, or a west-east line through the middle row."""
    if scenario.sections is not None:
        frame = read_features(scenario.sections, "sections", ds.rio.crs)
        lines = []
        for name, geom in zip(frame["name"], frame.geometry, strict=True):
            parts = getattr(geom, "geoms", [geom])
            for k, part in enumerate(parts):
                xs, ys = np.asarray(part.coords.xy[0]), np.asarray(part.coords.xy[1])
                lines.append((name if len(parts) == 1 else f"{name} ({k + 1})", xs, ys))
        return lines
    x, y = ds.x.values, ds.y.values
    mid = y[y.size // 2]
    return [(f"west-east line at y = {mid:g}", np.array([x[0], x[-1]]), np.array([mid, mid]))]


def _write_tifs(ds, folder: Path, names, mode: str) -> list[str]:

    written = []
    if mode == "transient":
        labels = [f"t = {t:g} Myr" for t in ds.time.values]
    else:
        labels = ["steady state"]
    for name in names:
        values = ds[name].values
        values = values if values.ndim == 3 else values[None]
        file = _tif_name(name, mode)
        write_band_stack(
            values,
            folder / file,
            crs=ds.rio.crs,
            transform=ds.rio.transform(),
            descriptions=[f"{name}, {label}" for label in labels],
            units=ds[name].attrs["units"],
            long_name=ds[name].attrs["long_name"],
        )
        written.append(file)
    return written


def _figures(scenario, ds, folder: Path, mode: str) -> list[str]:
    if mode == "transient":
        stack = ds["elevation"].values
        labels = [f"{float(t):g} Myr" for t in ds.time.values]
    else:
        steady = ds["elevation"].values
        stack = np.stack([steady - ds["dynamic_topography"].values, steady])
        labels = ["initial", "steady state"]
    profiles = line_profiles(ds, _lines(scenario, ds), stack)
    profile_figure(profiles, labels, folder / OUTPUT_NAMES["profiles"], title=scenario.title)
    written = [OUTPUT_NAMES["profiles"]]
    if mode == "transient":
        elevation_animation(
            ds.x.values,
            ds.y.values,
            stack,
            ds["flux_east"].values,
            ds["flux_north"].values,
            labels,
            folder / OUTPUT_NAMES["animation"],
            title=scenario.title,
        )
        written.append(OUTPUT_NAMES["animation"])
    return written


def summary_of(ds) -> dict:
    """Steps, volume balance and largest elevation change of a run (for printing)."""
    balance = json.loads(ds.attrs["volume_balance"])
    stepping = json.loads(ds.attrs["stepping"])
    if "dynamic_topography" in ds:
        change = ds["dynamic_topography"].values
    else:
        change = ds["elevation"].values[-1] - ds["elevation"].values[0]
    finite = change[np.isfinite(change)]
    biggest = float(finite[np.argmax(np.abs(finite))]) if finite.size else float("nan")
    return {"volume_balance": balance, "stepping": stepping, "largest_elevation_change_m": biggest}


def run_evolution(scenario, folder: Path, progress: ProgressCallback | None = None) -> dict:
    """Step the scenario through time and write every output into ``folder``.

    Parameters
    ----------
    scenario : crustflow.scenario.document.Scenario
        With an ``[evolution]`` table.
    folder : Path
        An existing, empty folder (the command's atomic temporary folder).
    progress : callable, optional
        ``progress(t, total)``, model times in s.

    Returns
    -------
    dict
        ``written`` (file names), ``manifest`` (entries for run.json), ``summary`` (for printing)
        and ``dataset``.
    """
    setup, provenance = setup_from_scenario(scenario)
    ds = run_setup(setup, title=scenario.title, progress=progress)
    mode = setup.spec.mode
    names = TRANSIENT_VARIABLES if mode == "transient" else STEADY_VARIABLES
    written = []
    text = scenario.source.read_text() if scenario.source else ""
    if "netcdf" in scenario.formats:
        write_time_netcdf(ds, folder / OUTPUT_NAMES[mode], attrs={"scenario": text})
        written.append(OUTPUT_NAMES[mode])
    if "geotiff" in scenario.formats:
        written += _write_tifs(ds, folder, names, mode)
    if "figure" in scenario.formats:
        written += _figures(scenario, ds, folder, mode)
    summary = summary_of(ds)
    manifest = {
        "mode": mode,
        "evolution_SI": setup.spec.describe(),
        "snapshot_times_Myr": [float(t) for t in ds.time.values] if "time" in ds.dims else [],
        "volume_balance": summary["volume_balance"],
        "stepping": summary["stepping"],
        "largest_elevation_change_m": summary["largest_elevation_change_m"],
        "alignment": provenance,
    }
    return {"written": written, "manifest": manifest, "summary": summary, "dataset": ds}
