"""Vector data around the flux field: features in, the field sampled along paths, arrow layers out.

* :class:`FieldGrid` wraps a fields ``xarray.Dataset`` (as :func:`crustflow.compute_fields` returns it,
  or as ``xarray.open_dataset(..., decode_coords="all")`` reads ``fields.nc`` back) with its CRS,
  geometry and cell-centre coordinates, and samples gridded variables at arbitrary points.
* :func:`read_features` reads sections (lines) and regions (polygons) from a vector file, checks them
  and reprojects them to the grid's CRS.
* :func:`walk` places points along a path: straight in projected metres, or along geodesics on the
  ellipsoid for geographic grids.
* :func:`arrow_layers` turns the flux into GIS layers: one point per sampled cell and one arrow (a
  LineString) per point.

Vector components are east and north: true east/north on geographic grids, grid east/north on
projected grids (as in the fields themselves).
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyproj
import rioxarray  # noqa: F401  (registers the .rio accessor)
import shapely
import xarray as xr

from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import (
    FULL_TURN,
    Ellipsoid,
    GridGeometry,
    azimuth,
    cell_spacings,
    grid_geometry,
)

__all__ = [
    "FieldGrid",
    "field_grid",
    "read_features",
    "read_points",
    "safe_name",
    "write_layer",
    "checked_features",
    "geodesic_densify",
    "PathPoints",
    "walk",
    "arrow_layers",
    "arrow_stride",
    "KINDS",
    "ARROWS_ACROSS",
]

#: Accepted geometry types per feature kind.
KINDS = {"sections": ("LineString", "MultiLineString"), "regions": ("Polygon", "MultiPolygon")}

#: Longest straight piece, m, when features are reprojected: edges are first densified in the
#: feature's own CRS (along geodesics for a geographic CRS) so their shape survives. Project choice.
FEATURE_DENSIFY_M = 1000.0

#: Number of arrows across the wider side of the arrow layers. Common practice, no source.
ARROWS_ACROSS = 40

#: Length of the longest arrow as a share of the distance between arrows, dimensionless.
#: Common practice, no source (long enough to read, short enough not to overlap).
ARROW_FILL = 0.9

#: Millimetres per metre (definition).
MM_PER_M = 1e3


@dataclass(frozen=True, eq=False)
class FieldGrid:
    """A fields dataset seen as a regular grid that can be sampled at points.

    Parameters
    ----------
    fields : xarray.Dataset
        The fields, dims (y, x), in the practical units of :data:`crustflow.variables.VARIABLES`.
    crs : pyproj.CRS
        The grid's CRS.
    geometry : GridGeometry
        Its geometry (kind, coordinates, ellipsoid).

    Notes
    -----
    Cell centres sit at ``geometry.x[j]``, ``geometry.y[i]``; a point's fractional column and row
    are ``(x - x0) / dx`` and ``(y - y0) / dy`` with the signed steps, so rows may run either way.
    On a grid spanning all longitudes (``geometry.periodic_x``) a point's longitude is first
    reduced by whole turns into the grid's own 360-degree range (lon 185 reads the grid at -175 on
    a -180..180 grid), and interpolation continues across the antimeridian.
    """

    fields: xr.Dataset
    crs: pyproj.CRS
    geometry: GridGeometry

    @property
    def geographic(self) -> bool:
        """True for a longitude/latitude grid."""
        return self.geometry.kind == "geographic"

    @property
    def geod(self) -> pyproj.Geod | None:
        """Geodesic calculator on the grid's ellipsoid (geographic grids), else None."""
        if not self.geographic:
            return None
        ell = self.geometry.ellipsoid
        return pyproj.Geod(a=ell.semi_major, f=ell.flattening)

    @property
    def cell_size_m(self) -> float:
        """Smallest metric side of any cell, m (east sides shrink towards the poles)."""
        east, north = cell_spacings(self.geometry)
        sides = np.concatenate([east.ravel(), north.ravel()])
        sides = sides[sides > 0]
        return float(sides.min())

    @property
    def typical_cell_m(self) -> float:
        """Smaller metric side of a cell on the middle row, m."""
        shape = self.geometry.shape
        east, north = (np.broadcast_to(s, shape) for s in cell_spacings(self.geometry))
        mid = (shape[0] // 2, shape[1] // 2)
        return float(min(east[mid], north[mid]))

    def values(self, name: str) -> np.ndarray:
        """A variable as a float64 array indexed ``[row, col]``, NaN for nodata."""
        if name not in self.fields:
            raise CrustflowInputError(
                f"the fields have no variable {name!r}; compute all variables (leave "
                "[output] variables at its default) or add it"
            )
        return np.asarray(self.fields[name].transpose("y", "x").values, dtype="float64")

    @property
    def west_edge(self) -> float:
        """Western outer edge: longitude in degrees (geographic grids) or smallest x in m."""
        g = self.geometry
        return float(g.x.min()) - 0.5 * abs(g.dx)

    def locate(self, px, py, *, wrap: bool = True) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Fractional column and row of points, and whether each lies within the grid's outer edge.

        On a grid spanning all longitudes, ``wrap`` (default) first reduces longitudes by whole
        turns into the grid's range, so every latitude inside the grid is inside; with
        ``wrap=False`` columns are taken as given (no reduction).
        """
        g = self.geometry
        px = np.asarray(px, dtype=float)
        periodic = wrap and g.periodic_x
        if periodic:
            west = self.west_edge
            px = west + np.mod(px - west, FULL_TURN)
        col = (px - g.x[0]) / g.dx
        row = (np.asarray(py, dtype=float) - g.y[0]) / g.dy
        nrow, ncol = g.shape
        inside = (row >= -0.5) & (row <= nrow - 0.5)
        if not periodic:
            inside &= (col >= -0.5) & (col <= ncol - 0.5)
        return col, row, inside

    def sample(self, arrays, px, py) -> tuple[list[np.ndarray], np.ndarray]:
        """Bilinear values of gridded arrays at points, skipping nodata.

        Parameters
        ----------
        arrays : list of numpy.ndarray
            Gridded arrays indexed ``[row, col]``; a cell is valid where all of them are finite.
        px, py : array_like
            Point coordinates in the grid's CRS (m, or degrees east/north).

        Returns
        -------
        values : list of numpy.ndarray
            One array per input; NaN at points that are not covered.
        covered : numpy.ndarray of bool
            True where the point lies within the grid's outer edge and the cell containing it is
            valid.

        Notes
        -----
        Bilinear interpolation between the four surrounding cell centres, with the weights of
        invalid corners dropped and the rest renormalised (the containing cell always keeps a weight
        of at least 1/4). In the half-cell band inside the grid's outer edge the edge value is
        continued outward. On a grid spanning all longitudes the first and last columns are
        neighbours: points between their centres interpolate across the antimeridian.
        """
        nrow, ncol = self.geometry.shape
        col, row, inside = self.locate(px, py)
        valid = np.logical_and.reduce([np.isfinite(a) for a in arrays])
        rr = np.clip(row, 0, nrow - 1)
        r0 = np.minimum(np.floor(rr).astype(int), nrow - 2)
        tr = rr - r0
        home_r = np.clip(np.rint(row), 0, nrow - 1).astype(int)
        if self.geometry.periodic_x:
            left = np.floor(col)
            c0 = np.mod(left, ncol).astype(int)
            c1 = np.mod(left + 1, ncol).astype(int)
            tc = col - left
            home_c = np.mod(np.rint(col), ncol).astype(int)
        else:
            cc = np.clip(col, 0, ncol - 1)
            c0 = np.minimum(np.floor(cc).astype(int), ncol - 2)
            c1, tc = c0 + 1, cc - c0
            home_c = np.clip(np.rint(col), 0, ncol - 1).astype(int)
        covered = inside & valid[home_r, home_c]
        corners = [
            (r0, c0, (1 - tr) * (1 - tc)),
            (r0, c1, (1 - tr) * tc),
            (r0 + 1, c0, tr * (1 - tc)),
            (r0 + 1, c1, tr * tc),
        ]
        weight = np.zeros(col.shape)
        sums = [np.zeros(col.shape) for _ in arrays]
        for r, c, w in corners:
            ok = valid[r, c]
            w = np.where(ok, w, 0.0)
            weight += w
            for total, a in zip(sums, arrays, strict=True):
                total += w * np.where(ok, a[r, c], 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            out = [np.where(covered, s / weight, np.nan) for s in sums]
        return out, covered


def field_grid(fields: xr.Dataset) -> FieldGrid:
    """Check a fields dataset and wrap it as a :class:`FieldGrid`.

    Parameters
    ----------
    fields : xarray.Dataset
        Holds ``flux_east`` and ``flux_north`` (m2 yr-1) on dims (y, x), with a CRS readable as
        ``fields.rio.crs``.

    Returns
    -------
    FieldGrid

    Raises
    ------
    CrustflowInputError
        No CRS, missing flux variables, or coordinates that are not a regular grid.
    """
    if not isinstance(fields, xr.Dataset):
        raise CrustflowInputError(
            f"fields is a {type(fields).__name__}; pass the xarray.Dataset from "
            "crustflow.compute_fields or xarray.open_dataset('fields.nc', decode_coords='all')"
        )
    missing = [n for n in ("flux_east", "flux_north") if n not in fields]
    if missing or not {"x", "y"} <= set(fields.dims):
        raise CrustflowInputError(
            f"the fields lack {', '.join(missing) or 'dims (y, x)'}; pass the Dataset from "
            "crustflow.compute_fields or fields.nc opened with decode_coords='all'"
        )
    crs = fields.rio.crs
    if crs is None:
        raise CrustflowInputError(
            "the fields have no CRS; open fields.nc with decode_coords='all' or write one with "
            "fields.rio.write_crs('EPSG:...')"
        )
    crs = pyproj.CRS.from_user_input(crs)
    geom = grid_geometry(fields.x.values, fields.y.values, crs)
    return FieldGrid(fields=fields, crs=crs, geometry=geom)


# ----------------------------------------------------------------------------------------------
# features: sections and regions


def read_features(path, kind: str, grid_crs) -> gpd.GeoDataFrame:
    """Read sections or regions from a vector file and reproject them to the grid's CRS.

    Parameters
    ----------
    path : str or path
        Any vector file GDAL reads (GeoPackage, GeoJSON, shapefile, ...). A file with several layers
        must have one named after ``kind``.
    kind : {"sections", "regions"}
        Sections are LineString/MultiLineString features, regions Polygon/MultiPolygon.
    grid_crs : pyproj.CRS or any input of ``pyproj.CRS.from_user_input``
        The fields' CRS.

    Returns
    -------
    geopandas.GeoDataFrame
        Columns ``name`` (text: the ``name`` attribute, any capitalisation, else the feature's index)
        and ``geometry``, in ``grid_crs``.

    Raises
    ------
    CrustflowInputError
        One line naming the file and the fix: missing file, not a vector file, no features, wrong or
        missing geometries, invalid polygons, zero-length lines, no CRS, duplicate names.

    Notes
    -----
    Before reprojection every edge is densified to pieces of at most 1 km in the feature's own CRS
    (along geodesics for a geographic CRS), so a line keeps its shape in the grid's CRS.
    """
    check_kind(kind)
    path = Path(path)
    if not path.exists():
        raise CrustflowInputError(
            f"{kind} file '{path}' does not exist; give the path of a vector file (GeoPackage, "
            "GeoJSON, shapefile)"
        )
    try:
        layers = [str(name) for name in pyogrio.list_layers(path)[:, 0]]
    except (pyogrio.errors.DataSourceError, pyogrio.errors.DataLayerError):
        raise CrustflowInputError(
            f"{kind} file '{path}' is not a vector file GDAL can read; save the {kind} as a "
            "GeoPackage, GeoJSON or shapefile"
        ) from None
    if not layers:
        raise CrustflowInputError(f"{kind} file '{path}' has no layers; draw some {kind} in it")
    if len(layers) > 1 and kind not in layers:
        raise CrustflowInputError(
            f"{kind} file '{path}' has {len(layers)} layers ({', '.join(layers)}); keep one or "
            f"name the layer to use '{kind}'"
        )
    layer = kind if kind in layers else layers[0]
    try:
        frame = pyogrio.read_dataframe(path, layer=layer)
    except shapely.errors.GEOSException as exc:
        raise _geometry_error(path, layer, kind, exc) from None
    if not isinstance(frame, gpd.GeoDataFrame) or frame.geometry.name not in frame:
        raise CrustflowInputError(
            f"{kind} file '{path}' holds no geometries; save {kind} as "
            f"{' or '.join(KINDS[kind])} features"
        )
    return checked_features(frame, kind, f"{kind} file '{path}'", grid_crs)


def _geometry_error(path: Path, layer: str, kind: str, exc: Exception) -> CrustflowInputError:
    """One line naming the feature whose geometry GEOS refuses to build (a one-vertex line, a
    ring of fewer than four points); found by building the features one by one."""
    import pyogrio.raw

    _, _, wkbs, fields = pyogrio.raw.read(path, layer=layer)
    meta = pyogrio.read_info(path, layer=layer)
    names = list(meta["fields"])
    column = next((i for i, c in enumerate(names) if str(c).lower() == "name"), None)
    reason = str(exc).split(":", 1)[-1].strip().splitlines()[0]
    for index, wkb in enumerate(wkbs):
        try:
            shapely.from_wkb(wkb)
        except shapely.errors.GEOSException as bad:
            reason = str(bad).split(":", 1)[-1].strip().splitlines()[0]
            name = fields[column][index] if column is not None else index
            return CrustflowInputError(
                f"{kind} file '{path}': feature {str(name)!r} has an invalid geometry ({reason}); "
                "a line needs two or more vertices, a polygon ring four or more: fix it in your GIS"
            )
    return CrustflowInputError(
        f"{kind} file '{path}' holds an invalid geometry ({reason}); fix it in your GIS"
    )


def check_kind(kind: str) -> None:
    """Raise :class:`CrustflowInputError` unless ``kind`` is one of :data:`KINDS`."""
    if kind not in KINDS:
        raise CrustflowInputError(f"kind is {kind!r}; give one of {', '.join(KINDS)}")


def checked_features(frame, kind: str, label: str, grid_crs) -> gpd.GeoDataFrame:
    """Validate features (from a file or a GeoDataFrame), name them and reproject them.

    Parameters
    ----------
    frame : geopandas.GeoDataFrame or geopandas.GeoSeries
        The features, with a CRS.
    kind : {"sections", "regions"}
    label : str
        How error messages name the source (e.g. "sections file 'lines.gpkg'").
    grid_crs : pyproj.CRS or any input of ``pyproj.CRS.from_user_input``
        Target CRS.

    Returns
    -------
    geopandas.GeoDataFrame
        As :func:`read_features`.
    """
    frame = frame.to_frame() if isinstance(frame, gpd.GeoSeries) else frame
    if len(frame) == 0:
        raise CrustflowInputError(f"{label} has no features; add at least one of the {kind}")
    name_col = next((c for c in frame.columns if str(c).lower() == "name"), None)
    names = [
        str(v) if name_col is not None and pd.notna(v) and str(v) != "" else str(i)
        for i, v in zip(
            frame.index, frame[name_col] if name_col else [None] * len(frame), strict=True
        )
    ]
    allowed = KINDS[kind]
    for name, geom in zip(names, frame.geometry, strict=True):
        if geom is None or geom.is_empty:
            raise CrustflowInputError(
                f"{label}: feature {name!r} has no geometry; draw it or delete it"
            )
        if geom.geom_type not in allowed:
            raise CrustflowInputError(
                f"{label}: feature {name!r} is a {geom.geom_type}; {kind} must be "
                f"{' or '.join(allowed)} features (save them in a layer of their own)"
            )
        if kind == "regions" and not geom.is_valid:
            raise CrustflowInputError(
                f"{label}: region {name!r} is not a valid polygon "
                f"({shapely.is_valid_reason(geom)}); fix its geometry in your GIS"
            )
        if kind == "sections" and geom.length == 0:
            raise CrustflowInputError(
                f"{label}: section {name!r} has zero length; give it two distinct vertices"
            )
    seen = set()
    for name in names:
        if name in seen:
            raise CrustflowInputError(
                f"{label} names {name!r} more than once; rename the features so every name is "
                f"unique (e.g. '{name} 2')"
            )
        seen.add(name)
    if frame.crs is None:
        raise CrustflowInputError(
            f"{label} has no CRS; assign one in your GIS (e.g. EPSG:4326) and save it again"
        )
    out = gpd.GeoDataFrame({"name": names}, geometry=list(frame.geometry), crs=frame.crs)
    return reproject(out, pyproj.CRS.from_user_input(grid_crs))


def reproject(frame: gpd.GeoDataFrame, crs: pyproj.CRS) -> gpd.GeoDataFrame:
    """Reproject, densifying edges first in the source CRS (geodesics if it is geographic)."""
    src = pyproj.CRS.from_user_input(frame.crs)
    if src.equals(crs):
        return frame.set_crs(crs, allow_override=True)
    if src.is_geographic:
        ell = Ellipsoid.from_crs(src)
        geod = pyproj.Geod(a=ell.semi_major, f=ell.flattening)
        geoms = [geodesic_densify(g, geod, FEATURE_DENSIFY_M) for g in frame.geometry]
    else:
        unit = src.axis_info[0].unit_conversion_factor if src.axis_info else 1.0
        geoms = shapely.segmentize(np.asarray(frame.geometry), FEATURE_DENSIFY_M / unit)
    return gpd.GeoDataFrame(frame.drop(columns="geometry"), geometry=list(geoms), crs=src).to_crs(
        crs
    )


def geodesic_densify(geom, geod: pyproj.Geod, max_len: float):
    """The same geometry with every edge split along its geodesic into pieces <= max_len (m)."""
    kind = geom.geom_type
    if kind in ("LineString", "LinearRing"):
        xy = shapely.get_coordinates(geom)
        p = walk(xy[:, 0], xy[:, 1], geod, max_len, 0.0)
        pts = np.vstack([np.column_stack([p.px, p.py]), xy[-1:]])
        return shapely.LineString(pts) if kind == "LineString" else shapely.LinearRing(pts)
    if kind == "Polygon":
        return shapely.Polygon(
            geodesic_densify(geom.exterior, geod, max_len),
            [geodesic_densify(r, geod, max_len) for r in geom.interiors],
        )
    return type(geom)([geodesic_densify(g, geod, max_len) for g in geom.geoms])


# ----------------------------------------------------------------------------------------------
# walking along a path


@dataclass(frozen=True)
class PathPoints:
    """Points along segments: coordinates, piece lengths (m), directions and distances (m)."""

    px: np.ndarray
    py: np.ndarray
    ds: np.ndarray  #: length of the piece each point stands for, m
    east: np.ndarray  #: unit walking direction, east component (grid east on projected grids)
    north: np.ndarray  #: unit walking direction, north component
    dist: np.ndarray  #: distance from the start of the path to the point, m


def walk(x, y, geod: pyproj.Geod | None, max_len: float, offset: float, start=0.0) -> PathPoints:
    """Points along a polyline, each segment cut into equal pieces no longer than ``max_len``.

    Parameters
    ----------
    x, y : array_like
        Vertices: projected metres (``geod`` None) or longitude/latitude in degrees.
    geod : pyproj.Geod or None
        Geodesics on this ellipsoid for geographic vertices; None for straight projected segments.
    max_len : float
        Longest piece, m.
    offset : float
        Position of each point within its piece: 0 at its start, 0.5 at its middle.
    start : float
        Distance already walked before the first vertex, m.

    Returns
    -------
    PathPoints
        Points at fractions ``(k + offset) / n`` of each segment of length L,
        ``n = ceil(L / max_len)``, ``k = 0 .. n - 1``; zero-length segments give none.

    Notes
    -----
    Geographic: L and the start azimuth from ``Geod.inv``; points, and the forward azimuth alpha
    there, from ``Geod.fwd`` at distance ``(k + offset) L / n``; walking direction
    ``(sin alpha, cos alpha)`` in true east/north. Longitudes stay within 180 degrees of the
    segment's start (no wrap to [-180, 180)).
    Projected: linear interpolation; direction ``(dx, dy) / L`` in grid east/north.

    References
    ----------
    Karney, C. F. F. (2013). Algorithms for geodesics. Journal of Geodesy 87.
    """
    x, y = np.asarray(x, float), np.asarray(y, float)
    x1, y1, x2, y2 = x[:-1], y[:-1], x[1:], y[1:]
    if geod is None:
        length = np.hypot(x2 - x1, y2 - y1)
    else:
        az12, _, length = geod.inv(x1, y1, x2, y2, return_back_azimuth=False)
    n = np.where(length > 0, np.ceil(length / max_len), 0).astype(int)
    seg = np.repeat(np.arange(n.size), n)
    k = np.arange(seg.size) - np.repeat(np.cumsum(n) - n, n)
    frac = (k + offset) / n[seg]
    along = frac * length[seg]
    dist = start + np.repeat(np.cumsum(length) - length, n) + along
    ds = (length / np.maximum(n, 1))[seg]
    if geod is None:
        dx, dy = (x2 - x1)[seg], (y2 - y1)[seg]
        px, py = x1[seg] + frac * dx, y1[seg] + frac * dy
        east, north = dx / length[seg], dy / length[seg]
    else:
        px, py, fwd = geod.fwd(x1[seg], y1[seg], az12[seg], along, return_back_azimuth=False)
        px = x1[seg] + ((np.asarray(px) - x1[seg] + 180.0) % 360.0 - 180.0)  # no wrap-around
        alpha = np.radians(np.asarray(fwd))
        east, north = np.sin(alpha), np.cos(alpha)
    return PathPoints(np.asarray(px), np.asarray(py), ds, east, north, dist)


# ----------------------------------------------------------------------------------------------
# arrow layers


def arrow_stride(shape: tuple[int, int], across: int = ARROWS_ACROSS) -> int:
    """Stride in cells between samples so that about ``across`` of them span the wider side."""
    return max(1, int(round(max(shape) / across)))


def arrow_layers(fields: xr.Dataset, *, stride: int | None = None):
    """Flux samples and flux arrows as GIS layers.

    Parameters
    ----------
    fields : xarray.Dataset
        Fields as :func:`crustflow.compute_fields` returns them.
    stride : int, optional
        Cells between samples along both axes (default: about 40 samples across the wider side).

    Returns
    -------
    arrows : geopandas.GeoDataFrame
        One LineString per sample, from the cell centre along the flux direction, in the grid's CRS.
        Attributes as ``samples`` plus ``metres_per_m2_per_yr``, the arrow length in metres per
        m2/yr of flux (the same on every row; also in ``arrows.attrs``).
    samples : geopandas.GeoDataFrame
        One Point per sampled cell centre (nodata cells left out) with ``flux_east``,
        ``flux_north``, ``flux_magnitude`` (m2/yr), ``flux_azimuth`` (degrees clockwise from true
        north), ``grid_azimuth`` (degrees clockwise from grid north, for rotating point symbols
        in a GIS) and, when known, ``mean_speed`` (mm/yr).

    Notes
    -----
    The arrow length is ``L = s |q|`` with ``s`` chosen so the longest arrow is 0.9 times the
    distance between samples (on the middle row for geographic grids). Projected grids: the arrow
    ends at ``(x + s q_e, y + s q_n)`` in grid metres (grid east/north components). Geographic
    grids: it ends on the geodesic of azimuth ``atan2(q_e, q_n)`` and length L from the sample
    (``pyproj.Geod.fwd`` on the CRS's ellipsoid).

    ``grid_azimuth = atan2(q_e, q_n)`` of the grid components: on projected grids it is the true
    azimuth minus the meridian convergence; on geographic grids grid north is true north and it
    equals ``flux_azimuth``.

    ``flux_azimuth`` is taken from the fields when present, else computed with
    :func:`crustflow.geometry.grid.azimuth` (meridian convergence applied on projected grids). ``mean_speed``
    is ``|q| / h``: from ``mean_velocity_east/north`` when present, else from the channel thickness
    h in the fields' ``parameters_SI`` attribute, else left out.
    """
    grid = field_grid(fields)
    g = grid.geometry
    nrow, ncol = g.shape
    step = arrow_stride(g.shape) if stride is None else int(stride)
    if step < 1:
        raise CrustflowInputError(f"stride is {stride!r}; give a whole number of cells >= 1")
    rows = np.arange(step // 2, nrow, step)
    cols = np.arange(step // 2, ncol, step)
    sl = np.ix_(rows, cols)
    qe, qn = grid.values("flux_east")[sl], grid.values("flux_north")[sl]
    mag = np.hypot(qe, qn)
    if "flux_azimuth" in fields:
        az = grid.values("flux_azimuth")[sl]
    else:
        az = azimuth(grid.values("flux_east"), grid.values("flux_north"), g)[sl]
    with np.errstate(invalid="ignore"):
        grid_az = np.where(mag > 0, np.degrees(np.arctan2(qe, qn)) % FULL_TURN, 0.0)
    attrs = {
        "flux_east": qe,
        "flux_north": qn,
        "flux_magnitude": mag,
        "flux_azimuth": az,
        "grid_azimuth": grid_az,
    }
    speed = _mean_speed(grid, mag, sl)
    if speed is not None:
        attrs["mean_speed"] = speed
    xx, yy = np.meshgrid(g.x[cols], g.y[rows])
    keep = np.isfinite(qe) & np.isfinite(qn)
    table = {k: v[keep] for k, v in attrs.items()}
    px, py = xx[keep], yy[keep]
    biggest = float(table["flux_magnitude"].max()) if px.size else 0.0
    spacing = step * grid.typical_cell_m
    scale = ARROW_FILL * spacing / biggest if biggest > 0 else 0.0
    length = table["flux_magnitude"] * scale
    if grid.geographic:
        direction = np.degrees(np.arctan2(table["flux_east"], table["flux_north"]))
        ex, ey, _ = grid.geod.fwd(px, py, direction, length, return_back_azimuth=False)
        ex = px + ((np.asarray(ex) - px + 180.0) % 360.0 - 180.0)  # keep the grid's longitudes
    else:
        ex, ey = px + scale * table["flux_east"], py + scale * table["flux_north"]
    starts = np.column_stack([px, py])
    ends = np.column_stack([ex, ey])
    lines = shapely.linestrings(np.stack([starts, ends], axis=1))
    samples = gpd.GeoDataFrame(table, geometry=shapely.points(starts), crs=grid.crs)
    arrows = gpd.GeoDataFrame(
        dict(table, metres_per_m2_per_yr=np.full(px.size, scale)), geometry=lines, crs=grid.crs
    )
    arrows.attrs["metres_per_m2_per_yr"] = scale
    arrows.attrs["stride"] = step
    samples.attrs["stride"] = step
    return arrows, samples


def _mean_speed(grid: FieldGrid, magnitude: np.ndarray, sl) -> np.ndarray | None:
    """Mean channel speed |q| / h, mm/yr, at the sampled cells, or None when unknown."""
    fields = grid.fields
    if "mean_velocity_east" in fields and "mean_velocity_north" in fields:
        return np.hypot(
            grid.values("mean_velocity_east")[sl], grid.values("mean_velocity_north")[sl]
        )
    try:
        h = float(json.loads(fields.attrs["parameters_SI"])["channel_thickness"])
    except (KeyError, TypeError, ValueError):
        return None
    if not (math.isfinite(h) and h > 0):
        return None
    return magnitude / h * MM_PER_M  # (m2/yr) / m = m/yr


def read_points(path, grid_crs=None) -> list[tuple[str, float, float, object]]:
    """Sites from a vector file of points: (label, x, y, crs), label from a ``name`` attribute."""

    path = Path(path)
    if not path.is_file():
        raise CrustflowInputError(f"points file not found: {path}; check the path")
    try:
        frame = gpd.read_file(path)
    except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file
        raise CrustflowInputError(
            f"{path} is not a vector file geopandas can read ({exc})"
        ) from None
    if frame.empty:
        raise CrustflowInputError(f"points file {path} has no features; add at least one point")
    if frame.crs is None:
        raise CrustflowInputError(
            f"points file {path} has no CRS; assign one in your GIS and save it again"
        )
    if not (frame.geometry.geom_type == "Point").all():
        raise CrustflowInputError(f"points file {path} must hold Point features only")
    names = frame["name"].astype(str) if "name" in frame else frame.index.astype(str)
    return [(n, g.x, g.y, frame.crs) for n, g in zip(names, frame.geometry, strict=True)]


def safe_name(name: str, taken: set[str]) -> str:
    """A file-name-safe, unique form of a feature name (letters, digits, ``.``, ``_``, ``-``)."""
    base = re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("._") or "feature"
    candidate, k = base, 2
    while candidate.lower() in taken:
        candidate, k = f"{base}_{k}", k + 1
    taken.add(candidate.lower())
    return candidate


def write_layer(frame, path: Path, layer: str, options: dict, metadata: dict, kind=None) -> None:
    """Add one layer to a GeoPackage, with a description (layer option) and metadata."""
    pyogrio.write_dataframe(
        frame,
        path,
        layer=layer,
        driver="GPKG",
        geometry_type=kind,
        layer_options=options,
        layer_metadata=metadata or None,
    )
