"""Reading observations for a fit: points from any vector file, or decimated rasters, placed on the
topography grid's cells.

Each observation is assigned to the grid cell that contains it (the cell whose model value it is
compared with). Observations outside the grid are dropped and named in the returned ``dropped``
list, never silently kept; those on nodata are found later, where the model is evaluated
(:mod:`crustflow.analyses.fitting.forward`). Values and errors are converted to SI on the way in.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from crustflow.errors import CrustflowInputError
from crustflow.io.grids import GridSource

__all__ = ["ObservationTable", "read_observations", "COLUMNS"]

#: Columns of :attr:`ObservationTable.frame`: observation and set names, variable, position in the
#: grid's CRS and cell, observed value and 1-sigma error in SI, and the units of the set's files
#: with their SI value (``scale``).
COLUMNS = ("name", "set", "variable", "x", "y", "row", "col", "observed", "sigma", "units", "scale")


@dataclass
class ObservationTable:
    """Observations on the grid.

    Attributes
    ----------
    frame : pandas.DataFrame
        One row per kept observation, columns :data:`COLUMNS` (SI values).
    dropped : list of tuple
        ``(name, reason)`` of every observation dropped (outside the grid, nodata, ...).
    crs : rasterio.crs.CRS
        CRS of ``x`` and ``y`` (the grid's).
    """

    frame: pd.DataFrame
    crs: object
    dropped: list = field(default_factory=list)

    def drop(self, mask: np.ndarray, reason: str) -> None:
        """Drop the observations where ``mask`` is true, recording their names and ``reason``."""
        mask = np.asarray(mask, dtype=bool)
        self.dropped += [(str(n), reason) for n in self.frame["name"][mask]]
        self.frame = self.frame[~mask].reset_index(drop=True)


def read_observations(spec, topography) -> ObservationTable:
    """Read every observation set of a ``[fit]`` table and place it on the grid.

    Parameters
    ----------
    spec : crustflow.scenario.fit.FitSpec
    topography : crustflow.io.grids.GridSource
        The topography grid (north up): its CRS, transform and size define the cells.

    Returns
    -------
    ObservationTable
        Observations outside the grid are already dropped (``dropped`` names them).

    Raises
    ------
    CrustflowInputError
        One line naming the file and the fix: a missing or unreadable file, no point features, no
        CRS, a missing attribute, an error that is not positive, duplicate names.

    Notes
    -----
    Point ``(x, y)`` in the grid's CRS falls in column ``floor((x - x0) / dx)`` and row
    ``floor((y - y0) / dy)`` of the north-up transform ``(dx, 0, x0, 0, dy, y0)``.
    """
    frames = []
    for s in spec.observations:
        frames.append(_points(s, topography) if s.kind == "points" else _raster(s, topography))
    frame = pd.concat(frames, ignore_index=True)
    names = frame["name"]
    if names.duplicated().any():
        dup = names[names.duplicated()].iloc[0]
        raise CrustflowInputError(
            f"observation name {dup!r} is used twice; give every point a distinct name attribute "
            "(names are prefixed by the set's name only when a set has no name attribute)"
        )
    t = topography.transform
    col = np.floor((frame["x"].to_numpy() - t.c) / t.a)
    row = np.floor((frame["y"].to_numpy() - t.f) / t.e)
    inside = (col >= 0) & (col < topography.width) & (row >= 0) & (row < topography.height)
    frame["row"] = np.where(inside, row, -1).astype(int)
    frame["col"] = np.where(inside, col, -1).astype(int)
    table = ObservationTable(frame[list(COLUMNS)], topography.crs)
    table.drop(~inside, "outside the grid")
    if len(table.frame) == 0:
        raise CrustflowInputError(
            f"no observation lies on the grid (all {len(table.dropped)} are outside it); check "
            "the observation files' CRS and the grid's extent"
        )
    return table


def _points(s, topography) -> pd.DataFrame:
    import geopandas as gpd
    import pyogrio

    label = f"observations file '{s.path}'"
    if not s.path.exists():
        raise CrustflowInputError(
            f"{label} does not exist; give the path of a vector file of points (GeoPackage, "
            "GeoJSON, shapefile)"
        )
    try:
        frame = pyogrio.read_dataframe(s.path)
    except (pyogrio.errors.DataSourceError, pyogrio.errors.DataLayerError):
        raise CrustflowInputError(
            f"{label} is not a vector file GDAL can read; save the points as a GeoPackage, "
            "GeoJSON or shapefile"
        ) from None
    if not isinstance(frame, gpd.GeoDataFrame) or len(frame) == 0:
        raise CrustflowInputError(f"{label} holds no point features; add some")
    if frame.crs is None:
        raise CrustflowInputError(
            f"{label} has no CRS; assign one in your GIS (e.g. EPSG:4326) and save it again"
        )
    kinds = set(frame.geometry.geom_type.dropna())
    if kinds != {"Point"}:
        raise CrustflowInputError(
            f"{label} holds {', '.join(sorted(kinds)) or 'empty'} geometries; observations must "
            "be Point features"
        )
    name_col = next((c for c in frame.columns if str(c).lower() == "name"), None)
    if name_col is None:
        names = [f"{s.label}:{i}" for i in frame.index]
    else:
        names = [str(v) if pd.notna(v) else f"{s.label}:{i}" for i, v in frame[name_col].items()]
    observed = _attribute(frame, s.value, label, "value") * s.scale
    if s.sigma_attribute is not None:
        sigma = _attribute(frame, s.sigma_attribute, label, "sigma") * s.scale
    else:
        sigma = np.full(len(frame), s.sigma)
    _check_sigma(sigma, names, label)
    moved = frame.to_crs(topography.crs)
    return pd.DataFrame(
        {
            "name": names,
            "set": s.label,
            "variable": s.variable,
            "x": moved.geometry.x.to_numpy(),
            "y": moved.geometry.y.to_numpy(),
            "observed": observed,
            "sigma": sigma,
            "units": s.units,
            "scale": s.scale,
        }
    )


def _attribute(frame, name: str, label: str, key: str) -> np.ndarray:
    if name not in frame.columns:
        others = [str(c) for c in frame.columns if c != frame.geometry.name]
        raise CrustflowInputError(
            f"{label} has no attribute {name!r} (the set's {key}); it has {', '.join(others)}; "
            f'fix {key} = "..." in [[fit.observations]]'
        )
    values = pd.to_numeric(frame[name], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    if bad.any():
        raise CrustflowInputError(
            f"{label}: attribute {name!r} is not a number in {int(bad.sum())} features (first: "
            f"feature {int(np.flatnonzero(bad)[0])}); fill it in or delete those points"
        )
    return values


def _check_sigma(sigma: np.ndarray, names, label: str) -> None:
    bad = ~(sigma > 0)
    if bad.any():
        first = names[int(np.flatnonzero(bad)[0])]
        raise CrustflowInputError(
            f"{label}: the error (sigma) of {int(bad.sum())} observations is not positive (first: "
            f"{first!r}); give every observation a positive 1-sigma error"
        )


def _raster(s, topography) -> pd.DataFrame:
    """A raster of observations, aligned on the grid and decimated."""
    key = f"observations grid '{s.path.name}'"
    values = _aligned(s.path, key, topography)
    if s.sigma_grid is not None:
        sigma = _aligned(s.sigma_grid, f"sigma grid '{s.sigma_grid.name}'", topography)
        sigma = sigma * s.scale
    else:
        sigma = np.full(values.shape, s.sigma)
    stride = s.decimate
    if s.correlation_length is not None:
        stride = max(stride, math.ceil(s.correlation_length / _cell_metres(topography)))
    rows = np.arange(stride // 2, values.shape[0], stride)
    cols = np.arange(stride // 2, values.shape[1], stride)
    r, c = (a.ravel() for a in np.meshgrid(rows, cols, indexing="ij"))
    v, e = values[r, c] * s.scale, sigma[r, c]
    keep = np.isfinite(v) & np.isfinite(e)
    r, c, v, e = r[keep], c[keep], v[keep], e[keep]
    names = [f"{s.label}:r{i}c{j}" for i, j in zip(r, c, strict=True)]
    _check_sigma(e, names, key)
    t = topography.transform
    return pd.DataFrame(
        {
            "name": names,
            "set": s.label,
            "variable": s.variable,
            "x": t.c + (c + 0.5) * t.a,
            "y": t.f + (r + 0.5) * t.e,
            "observed": v,
            "sigma": e,
            "units": s.units,
            "scale": s.scale,
        }
    )


def _aligned(path, key: str, topography) -> np.ndarray:
    """A raster resampled onto the topography grid (bilinear, as a scenario's second grid)."""
    source = GridSource(path, key, target=topography)
    try:
        return source.read()
    finally:
        source.close()


def _cell_metres(topography) -> float:
    """Typical cell height, m (on geographic grids: degrees times the meridian's mean arc length)."""
    step = abs(topography.transform.e)
    crs = topography.crs
    if crs is not None and crs.is_geographic:
        import pyproj

        a = pyproj.CRS.from_user_input(crs).ellipsoid.semi_major_metre
        return step * math.pi / 180.0 * a
    return step
