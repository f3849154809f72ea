"""Volume budgets of the channel flux: through sections (lines) and of regions (polygons).

A *section* budget is the volume of lower crust that crosses a line per unit time, the line integral of
the flux per unit width ``q`` along the line. A *region* budget is the volume a polygon gains per unit
time, the area integral of the thickening rate, checked against the flux through its boundary.

Sign conventions:

* Section: positive towards the line's RIGHT-hand side when walking from its first to its last vertex
  (the unit normal ``n`` is the walking direction turned 90 degrees clockwise).
* Region: ``volume_flux`` is the NET INFLOW (positive = crust volume gained); ``boundary_outflow`` is
  positive out of the polygon.

Units: SI inside; at the edges volumes in m^3/yr and km^3/Myr (1 km^3/Myr = 1000 m^3/yr), lengths in
km, areas in km^2, rates in mm/yr, flux per unit width in m^2/yr.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import shapely
import xarray as xr

from crustflow.errors import CrustflowInputError
from crustflow.figures import budgets as budget_plots
from crustflow.geometry.grid import FULL_TURN, cell_areas, ground_steps
from crustflow.io.features import (
    KINDS,
    FieldGrid,
    PathPoints,
    arrow_layers,
    checked_features,
    field_grid,
    geodesic_densify,
    read_features,
    safe_name,
    walk,
    write_layer,
)
from crustflow.io.styles import arrow_style, region_style, section_style, write_layer_styles

__all__ = [
    "read_features",
    "section_budgets",
    "region_budgets",
    "budget_table",
    "section_profile",
    "arrow_layers",
    "write_budget_outputs",
    "CSV_COLUMNS",
    "POSITIVE_SIDE",
]

#: m^3/yr in one km^3/Myr: 1e9 m^3 / 1e6 yr (definition).
M3_PER_YR_PER_KM3_PER_MYR = 1e3

#: Metres per millimetre (definition).
M_PER_MM = 1e-3

#: Default samples per cell along a section: the sample spacing is half the smallest cell side.
#: Common practice, no source (the bilinear interpolant has a kink at every cell-centre line).
SAMPLES_PER_CELL = 2

#: Cells handed to shapely at once when weighting cells by a region. Project choice (memory bound).
CELLS_PER_BLOCK = 250_000

#: The section sign convention, carried in metadata.
POSITIVE_SIDE = (
    "positive volume flux crosses a section towards its right-hand side, walking from its first to "
    "its last vertex; for regions volume_flux is the net inflow and boundary_outflow is positive out"
)

#: Columns of budgets.csv, in order; empty where a column does not apply to the row's kind.
CSV_COLUMNS = [
    "name", "kind", "volume_flux_m3_per_yr", "volume_flux_km3_per_Myr", "length_km", "area_km2",
    "covered_fraction", "positive_m3_per_yr", "negative_m3_per_yr", "sample_spacing_m",
    "mean_thickening_mm_per_yr", "mean_uplift_mm_per_yr", "boundary_outflow_m3_per_yr",
    "discrepancy",
]  # fmt: skip
#: Columns that apply to sections (attributes of the ``sections`` layer).
SECTION_COLUMNS = [c for c in CSV_COLUMNS[:10] if c != "area_km2"]
#: Columns that apply to regions (attributes of the ``regions`` layer).
REGION_COLUMNS = [c for c in CSV_COLUMNS if not c.startswith(("positive", "negative"))]


def _features(grid: FieldGrid, features, kind: str) -> gpd.GeoDataFrame:
    """Features from a path or a GeoDataFrame/GeoSeries, checked and in the grid's CRS."""
    if isinstance(features, str | Path):
        return read_features(features, kind, grid.crs)
    if isinstance(features, gpd.GeoDataFrame | gpd.GeoSeries):
        return checked_features(features, kind, f"the {kind} GeoDataFrame", grid.crs)
    raise CrustflowInputError(
        f"{kind} is a {type(features).__name__}; give a vector file path or a GeoDataFrame"
    )


# ----------------------------------------------------------------------------------------------
# sampling a path


def _path_samples(grid: FieldGrid, geom, spacing: float) -> PathPoints:
    """Midpoints of pieces <= spacing (m) along every part of a (Multi)LineString, in order."""
    parts, start = [], 0.0
    for part in shapely.get_parts(geom):
        xy = shapely.get_coordinates(part)
        p = _on_ground(grid, walk(xy[:, 0], xy[:, 1], grid.geod, spacing, 0.5, start), start)
        parts.append(p)
        start += float(p.ds.sum())
    names = [f.name for f in dataclasses.fields(PathPoints)]
    return PathPoints(*(np.concatenate([getattr(p, n) for p in parts]) for n in names))


def _on_ground(grid: FieldGrid, p: PathPoints, start: float) -> PathPoints:
    """Projected grids with a CRS: piece lengths, directions and distances on the ground.

    Each piece's projected length is scaled by the projection factors at its midpoint and its
    direction turned into the local frame of the flux components
    (:func:`crustflow.geometry.grid.ground_steps`); distances are summed from the true lengths.
    """
    if not grid.geometry.scaled or p.ds.size == 0:
        return p
    scale, east, north = ground_steps(grid.geometry, p.px, p.py, p.east, p.north)
    ds = p.ds * scale
    return PathPoints(p.px, p.py, ds, east, north, start + np.cumsum(ds) - 0.5 * ds)


def _line_integral(grid: FieldGrid, flux, geom, spacing: float) -> dict:
    """Normal flux samples and their integral along a path (see :func:`section_budgets`)."""
    p = _path_samples(grid, geom, spacing)
    (qe, qn), covered = grid.sample(flux, p.px, p.py)
    # Right-hand normal: the walking direction turned 90 degrees clockwise, n = (t_n, -t_e).
    normal = qe * p.north - qn * p.east
    part = np.where(covered, normal * p.ds, 0.0)
    any_cover = bool(covered.any())
    return {
        "samples": p,
        "flux_east": qe,
        "flux_north": qn,
        "normal": normal,
        "inside": bool(grid.locate(p.px, p.py)[2].any()),
        "total": float(part.sum()) if any_cover else math.nan,
        "positive": float(part[part > 0].sum()) if any_cover else math.nan,
        "negative": float(part[part < 0].sum()) if any_cover else math.nan,
        "length": float(p.ds.sum()),
        "covered": float(p.ds[covered].sum() / p.ds.sum()),
    }


def _spacing(grid: FieldGrid, spacing) -> float:
    if spacing is None:
        return grid.cell_size_m / SAMPLES_PER_CELL
    if not (isinstance(spacing, int | float) and math.isfinite(spacing) and spacing > 0):
        raise CrustflowInputError(f"spacing is {spacing!r}; give a positive sample spacing in m")
    return float(spacing)


# ----------------------------------------------------------------------------------------------
# sections


def section_budgets(fields: xr.Dataset, sections, *, spacing: float | None = None):
    """Volume flux through each section.

    Parameters
    ----------
    fields : xarray.Dataset
        Fields from :func:`crustflow.compute_fields` (or ``fields.nc`` opened with
        ``decode_coords="all"``): ``flux_east``, ``flux_north`` in m2/yr.
    sections : geopandas.GeoDataFrame or path
        Lines (see :func:`read_features`), reprojected to the grid's CRS if needed.
    spacing : float, optional
        Sample spacing along the line, m (default: half the smallest metric cell side).

    Returns
    -------
    geopandas.GeoDataFrame
        One row per section, in the grid's CRS, with columns ``name``, ``kind`` ("section"),
        ``volume_flux_m3_per_yr`` and ``volume_flux_km3_per_Myr`` (positive towards the line's
        RIGHT-hand side walking from its first to its last vertex), ``length_km``,
        ``covered_fraction``, ``positive_m3_per_yr`` and ``negative_m3_per_yr`` (the integral's
        positive and negative parts), ``sample_spacing_m``. The sign convention is in
        ``.attrs["positive_side"]``. A section on nodata only has NaN fluxes.

    Raises
    ------
    CrustflowInputError
        Bad features, or a section entirely outside the grid.

    Notes
    -----
    ``Q = integral of q . n ds`` along the line, with ``n`` the unit normal to the right of the walking
    direction ``t``: ``n = (t_n, -t_e)`` in (east, north) components. Each segment between vertices
    is split into ``m = ceil(L / spacing)`` equal pieces and the integral taken by the midpoint rule,
    ``Q = sum (q_e n_e + q_n n_n)(midpoint) L / m``, with q interpolated bilinearly
    (:meth:`crustflow.io.features.FieldGrid.sample`). The rule is second order, so halving the spacing
    changes Q little (checked in the tests).

    Geographic grids: segments are geodesics on the CRS's ellipsoid; L and the azimuths ``alpha``
    at the midpoints come from ``pyproj.Geod`` (``inv``, ``fwd``); ``t = (sin alpha, cos alpha)``
    in the local true east/north frame, so ``n`` has azimuth ``alpha + 90`` degrees.
    Projected grids: straight segments in projected coordinates; each piece's length and
    direction are taken on the ground with the projection factors at its midpoint
    (:func:`crustflow.geometry.grid.ground_steps`, as in the maps' finite-volume divergence), so
    L and the lengths are true ellipsoidal lengths.

    Samples outside the grid or on nodata are skipped: ``covered_fraction`` is the covered length
    over the total length.

    Grids spanning all longitudes (``GridGeometry.periodic_x``): a line may cross the antimeridian
    with continuous longitudes (170 to 190) or be split there into a MultiLineString (170 to 180,
    -180 to -170); samples are read at their longitude reduced into the grid's range, with
    interpolation across the seam, and lengths and azimuths are geodesic either way, so both forms
    (and the line shifted by any whole number of turns) give the same budget.

    References
    ----------
    Karney, C. F. F. (2013). Algorithms for geodesics. Journal of Geodesy 87 (the algorithms behind
    ``pyproj.Geod``).
    """
    grid = field_grid(fields)
    feats = _features(grid, sections, "sections")
    rows, _ = _section_rows(grid, feats, _spacing(grid, spacing))
    return _frame(rows, feats, SECTION_COLUMNS, grid.crs)


def _flux(grid: FieldGrid) -> list[np.ndarray]:
    return [grid.values("flux_east"), grid.values("flux_north")]


def _section_rows(grid: FieldGrid, feats: gpd.GeoDataFrame, step: float):
    flux = _flux(grid)
    rows, results = [], []
    for name, geom in zip(feats["name"], feats.geometry, strict=True):
        res = _line_integral(grid, flux, geom, step)
        if not res["inside"]:
            raise CrustflowInputError(
                f"section {name!r} lies entirely outside the grid; check its coordinates and CRS, "
                "or leave it out"
            )
        rows.append(
            {
                "name": name,
                "kind": "section",
                **_volume(res["total"]),
                "length_km": res["length"] / 1e3,
                "covered_fraction": res["covered"],
                "positive_m3_per_yr": res["positive"],
                "negative_m3_per_yr": res["negative"],
                "sample_spacing_m": step,
            }
        )
        results.append(res)
    return rows, results


def _volume(m3_per_yr: float) -> dict:
    return {
        "volume_flux_m3_per_yr": m3_per_yr,
        "volume_flux_km3_per_Myr": m3_per_yr / M3_PER_YR_PER_KM3_PER_MYR,
    }


def _frame(rows, feats, columns, crs) -> gpd.GeoDataFrame:
    table = pd.DataFrame(rows, columns=columns)
    out = gpd.GeoDataFrame(table, geometry=list(feats.geometry), crs=crs)
    out.attrs["positive_side"] = POSITIVE_SIDE
    return out


def section_profile(fields: xr.Dataset, line, *, spacing: float | None = None) -> pd.DataFrame:
    """Flux samples along one section.

    Parameters
    ----------
    fields : xarray.Dataset
        As for :func:`section_budgets`.
    line : shapely LineString or MultiLineString, or a one-feature GeoDataFrame/GeoSeries
        Shapely geometries are taken to be in the grid's CRS; frames are reprojected.
    spacing : float, optional
        Sample spacing, m (default: half the smallest metric cell side).

    Returns
    -------
    pandas.DataFrame
        One row per sample (piece midpoint): ``distance_km`` along the line, ``lon``/``lat``
        (degrees, geographic grids) or ``x``/``y`` (m, projected grids), ``flux_east_m2_per_yr``,
        ``flux_north_m2_per_yr``, and ``normal_flux_m2_per_yr`` (``q . n``, positive towards the
        line's right-hand side); NaN where not covered. ``.attrs`` holds the totals of
        :func:`section_budgets`.

    Notes
    -----
    Sampling and sign as in :func:`section_budgets`.
    """
    grid = field_grid(fields)
    if isinstance(line, gpd.GeoDataFrame | gpd.GeoSeries):
        line = checked_features(line, "sections", "the line", grid.crs).geometry.iloc[0]
    if getattr(line, "geom_type", None) not in KINDS["sections"]:
        raise CrustflowInputError(
            f"line is a {type(line).__name__}; give a shapely LineString in the grid's CRS"
        )
    step = _spacing(grid, spacing)
    res = _line_integral(grid, _flux(grid), line, step)
    return _profile_frame(grid, res, step)


def _profile_frame(grid: FieldGrid, res: dict, step: float) -> pd.DataFrame:
    p = res["samples"]
    xname, yname = ("lon", "lat") if grid.geographic else ("x", "y")
    out = pd.DataFrame(
        {
            "distance_km": p.dist / 1e3,
            xname: p.px,
            yname: p.py,
            "flux_east_m2_per_yr": res["flux_east"],
            "flux_north_m2_per_yr": res["flux_north"],
            "normal_flux_m2_per_yr": res["normal"],
        }
    )
    out.attrs.update(
        {
            **_volume(res["total"]),
            "length_km": res["length"] / 1e3,
            "covered_fraction": res["covered"],
            "sample_spacing_m": step,
            "positive_side": POSITIVE_SIDE,
        }
    )
    return out


# ----------------------------------------------------------------------------------------------
# regions


def region_budgets(fields: xr.Dataset, regions, *, spacing: float | None = None):
    """Volume budget of each region: net inflow from the thickening rate, checked at the boundary.

    Parameters
    ----------
    fields : xarray.Dataset
        As for :func:`section_budgets`, also with ``thickening_rate`` (and ``uplift_rate``), mm/yr.
    regions : geopandas.GeoDataFrame or path
        Polygons (see :func:`read_features`).
    spacing : float, optional
        Sample spacing along the boundary, m (default: half the smallest metric cell side).

    Returns
    -------
    geopandas.GeoDataFrame
        One row per region, in the grid's CRS: ``name``, ``kind`` ("region"),
        ``volume_flux_m3_per_yr`` and ``volume_flux_km3_per_Myr`` (NET INFLOW, positive = volume
        gained), ``length_km`` (boundary length), ``area_km2``, ``covered_fraction`` (valid area over
        polygon area), ``sample_spacing_m``, ``mean_thickening_mm_per_yr``, ``mean_uplift_mm_per_yr``
        (area-weighted), ``boundary_outflow_m3_per_yr`` (positive out) and ``discrepancy``.

    Notes
    -----
    Net inflow ``V = integral over the region of dT/dt dA = sum_cells f_c A_c (dT/dt)_c``, with
    ``f_c`` the share of cell c inside the polygon (exact polygon intersection with shapely) and
    ``A_c`` the cell area (:func:`crustflow.geometry.grid.cell_areas`: exact ellipsoidal area on geographic
    grids). Means are ``sum f A x / sum f A`` over valid cells.

    Boundary outflow ``Q_out = closed integral of q . n_out ds`` along every ring, oriented
    (exterior counter-clockwise, holes clockwise) so the right-hand normal of
    :func:`section_budgets` points out of the region. By the divergence theorem
    ``V = -Q_out``; ``discrepancy = (V + Q_out) / max(G_A, G_B)`` with the gross magnitudes
    ``G_A = integral |dT/dt| dA`` and ``G_B = closed integral |q . n| ds`` (these equal ``|V|`` and
    ``|Q_out|`` when the integrands keep one sign; using them keeps the ratio meaningful for a
    region whose net budget is near zero). It is small for smooth fields fully covered by data.

    Geographic grids: the polygon (edges are geodesics, densified to the sample spacing) is
    intersected with the cells in longitude/latitude, and the share of the cell's lon/lat box is
    taken as its share of the ellipsoidal cell area. This assumes a uniform area density within a
    cell; the density ``M N cos(phi)`` varies by about ``tan(phi) dphi / 2`` across a cell, so a
    partly covered cell's area is off by at most that share (4e-4 for 0.05-degree cells at 45
    degrees), and fully covered cells are exact. ``area_km2`` is the geodesic polygon area
    (``pyproj.Geod.geometry_area_perimeter``); ``covered_fraction`` is capped at 1.
    Projected grids: cell areas are true areas (projected area over the areal scale of the
    projection); ``area_km2`` is the geodesic area of the polygon, its edges densified to the
    sample spacing in projected coordinates.

    Grids spanning all longitudes: a polygon crossing the antimeridian may be given with
    continuous longitudes beyond 180 (or below -180) or split at the seam into a MultiPolygon.
    Copies shifted by whole turns are intersected with the cells, so each part is weighted on the
    cells it covers; the boundary integral wraps as for sections. (A split polygon's seam edges
    are walked both ways and cancel in the boundary flux, but count twice in ``length_km``.)

    References
    ----------
    Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional Paper 1395.
    Karney, C. F. F. (2013). Algorithms for geodesics. Journal of Geodesy 87.
    """
    grid = field_grid(fields)
    feats = _features(grid, regions, "regions")
    rows = _region_rows(grid, feats, _spacing(grid, spacing))
    return _frame(rows, feats, REGION_COLUMNS, grid.crs)


def _region_rows(grid: FieldGrid, feats: gpd.GeoDataFrame, step: float) -> list[dict]:
    flux = _flux(grid)
    rate = grid.values("thickening_rate")
    uplift = grid.values("uplift_rate") if "uplift_rate" in grid.fields else None
    cell_area = np.broadcast_to(cell_areas(grid.geometry), grid.geometry.shape)
    rows = []
    for name, poly in zip(feats["name"], feats.geometry, strict=True):
        area_poly = poly
        if grid.geographic:
            area_poly = geodesic_densify(poly, grid.geod, step)
        r, c, share = _cell_shares(grid, area_poly)
        w = share * cell_area[r, c]
        ok = np.isfinite(rate[r, c])
        rings = _outward_rings(poly)
        res = _line_integral(grid, flux, rings, step)
        if share.sum() == 0 and not res["inside"]:
            raise CrustflowInputError(
                f"region {name!r} lies entirely outside the grid; check its coordinates and CRS, "
                "or leave it out"
            )
        valid_area = float(w[ok].sum())
        inflow = float((w * rate[r, c])[ok].sum()) * M_PER_MM if ok.any() else math.nan
        # Gross magnitudes; the boundary's is NaN when none of it is on data.
        gross_area = float((w * np.abs(rate[r, c]))[ok].sum()) * M_PER_MM
        gross = float(np.nanmax([gross_area, res["positive"] - res["negative"]]))
        if grid.geographic:
            area = abs(grid.geod.geometry_area_perimeter(poly)[0])
        else:
            area = _ground_area(grid, poly, step)
        rows.append(
            {
                "name": name,
                "kind": "region",
                **_volume(inflow),
                "length_km": res["length"] / 1e3,
                "area_km2": area / 1e6,
                "covered_fraction": min(1.0, valid_area / area),
                "sample_spacing_m": step,
                "mean_thickening_mm_per_yr": _mean(rate[r, c], w),
                "mean_uplift_mm_per_yr": math.nan if uplift is None else _mean(uplift[r, c], w),
                "boundary_outflow_m3_per_yr": res["total"],
                "discrepancy": (inflow + res["total"]) / gross if gross > 0 else math.nan,
            }
        )
    return rows


def _ground_area(grid: FieldGrid, poly, step: float) -> float:
    """Area of a projected polygon on the ellipsoid, m^2: edges densified to ``step`` (m),
    transformed to longitude/latitude and measured with ``pyproj.Geod.geometry_area_perimeter``
    (projected area when the grid has no CRS)."""
    if not grid.geometry.scaled:
        return float(poly.area)
    crs = grid.geometry.crs
    crs = crs.sub_crs_list[0] if crs.is_compound else crs
    to_lonlat = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    lonlat = shapely.transform(
        shapely.segmentize(poly, step),
        lambda xy: np.column_stack(to_lonlat.transform(xy[:, 0], xy[:, 1])),
    )
    ell = grid.geometry.ellipsoid
    geod = pyproj.Geod(a=ell.semi_major, f=ell.flattening)
    return abs(geod.geometry_area_perimeter(lonlat)[0])


def _mean(values: np.ndarray, weights: np.ndarray) -> float:
    ok = np.isfinite(values) & (weights > 0)
    return float(np.sum(values[ok] * weights[ok]) / np.sum(weights[ok])) if ok.any() else math.nan


def _outward_rings(poly):
    """All rings of a (Multi)Polygon as lines whose right-hand side is outside the region."""
    oriented = shapely.orient_polygons(poly, exterior_cw=False)
    rings = []
    for part in shapely.get_parts(oriented):
        rings.append(part.exterior.coords)
        rings.extend(r.coords for r in part.interiors)
    return shapely.MultiLineString(rings)


def _cell_shares(grid: FieldGrid, poly) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Row, column and inside share (0-1] of every cell the polygon overlaps.

    On a grid spanning all longitudes the polygon may lie partly or wholly outside the grid's
    longitude range (e.g. 170 to 190 on a -180..180 grid): it is shifted by whole turns and each
    copy intersected with the cells, so every part lands on the cells it covers once.
    """
    if not grid.geometry.periodic_x:
        return _shares_in_range(grid, poly)
    west = grid.west_edge
    x0, _, x1, _ = poly.bounds
    first, last = (math.floor((v - west) / FULL_TURN) for v in (x0, x1))
    if first == last == 0:
        return _shares_in_range(grid, poly)
    found = [
        _shares_in_range(grid, shapely.transform(poly, lambda xy, k=k: xy - [k * FULL_TURN, 0.0]))
        for k in range(first, last + 1)
    ]
    r, c, share = (np.concatenate(v) for v in zip(*found, strict=True))
    ncol = grid.geometry.shape[1]
    cells, where = np.unique(r * ncol + c, return_inverse=True)
    share = np.minimum(np.bincount(where, weights=share), 1.0)  # one cell, several copies
    return cells // ncol, cells % ncol, share


def _shares_in_range(grid: FieldGrid, poly) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_cell_shares` for a polygon taken in the grid's own coordinates (no wrapping)."""
    g = grid.geometry
    nrow, ncol = g.shape
    x0, y0, x1, y1 = poly.bounds
    cols, rows, _ = grid.locate([x0, x1], [y0, y1], wrap=False)
    c_lo, c_hi = (int(np.clip(np.floor(v), 0, ncol - 1)) for v in (cols.min(), cols.max() + 1))
    r_lo, r_hi = (int(np.clip(np.floor(v), 0, nrow - 1)) for v in (rows.min(), rows.max() + 1))
    hx, hy = 0.5 * abs(g.dx), 0.5 * abs(g.dy)
    box_area = 4.0 * hx * hy
    shapely.prepare(poly)
    xs = g.x[c_lo : c_hi + 1]
    block = max(1, CELLS_PER_BLOCK // xs.size)
    out_r, out_c, out_s = [], [], []
    for start in range(r_lo, r_hi + 1, block):
        rr = np.arange(start, min(start + block, r_hi + 1))
        cx, cy = np.meshgrid(xs, g.y[rr])
        boxes = shapely.box(cx - hx, cy - hy, cx + hx, cy + hy)
        inside = shapely.contains_properly(poly, boxes)
        edge = ~inside & shapely.intersects(poly, boxes)
        share = inside.astype(float)
        share[edge] = shapely.area(shapely.intersection(boxes[edge], poly)) / box_area
        keep = share > 0
        out_r.append(np.broadcast_to(rr[:, None], share.shape)[keep])
        out_c.append(np.broadcast_to(np.arange(c_lo, c_hi + 1), share.shape)[keep])
        out_s.append(share[keep])
    return np.concatenate(out_r), np.concatenate(out_c), np.concatenate(out_s)


# ----------------------------------------------------------------------------------------------
# tables and files


def budget_table(fields: xr.Dataset, sections=None, regions=None) -> pd.DataFrame:
    """Section and region budgets in one table, the columns of ``budgets.csv``.

    Parameters
    ----------
    fields : xarray.Dataset
        As for :func:`region_budgets`.
    sections, regions : geopandas.GeoDataFrame or path, optional
        Lines and polygons (see :func:`read_features`).

    Returns
    -------
    pandas.DataFrame
        One row per feature (sections first), columns :data:`CSV_COLUMNS`; NaN where a column does
        not apply to the row's kind. Signs and units as in :func:`section_budgets` and
        :func:`region_budgets`.
    """
    frames = []
    if sections is not None:
        frames.append(section_budgets(fields, sections))
    if regions is not None:
        frames.append(region_budgets(fields, regions))
    return _table(frames)


def _table(frames) -> pd.DataFrame:
    parts = [pd.DataFrame(f.drop(columns="geometry")) for f in frames if len(f)]
    table = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()
    table = table.reindex(columns=CSV_COLUMNS)
    for col in CSV_COLUMNS[2:]:
        table[col] = table[col].astype("float64")
    table.attrs["positive_side"] = POSITIVE_SIDE
    return table


def write_budget_outputs(
    fields: xr.Dataset,
    folder,
    *,
    sections=None,
    regions=None,
    title: str = "",
    figure_formats=("png",),
    figure_dpi: int = 150,
) -> list[str]:
    """Write the budgets, the flux arrow layers and their figures into a folder.

    Parameters
    ----------
    fields : xarray.Dataset
        As for :func:`region_budgets` (``thickening_rate`` is needed only with regions).
    folder : str or path
        Destination folder (created if missing); files of the same names are replaced.
    sections, regions : geopandas.GeoDataFrame or path, optional
        Lines and polygons (see :func:`read_features`).
    title : str
        Figure title (default: the fields' ``title`` attribute).
    figure_formats : sequence of str
        File formats of the figures (``png``, ``svg``, ``pdf``).
    figure_dpi : int
        Resolution of the figures.

    Returns
    -------
    list of str
        Names of the files written, in order: ``budgets.csv`` (always; header only without
        features), ``budgets.gpkg`` (layers ``sections`` and/or ``regions``, when there are
        features), ``flux_arrows.gpkg`` (layers ``arrows`` and ``samples``),
        ``section_<name>.png`` per section, ``budget_map.png`` (each figure in every one of
        ``figure_formats``).

    Notes
    -----
    Layers are in the grid's CRS; their attributes are the CSV columns that apply to the kind.
    Both GeoPackages carry default layer styles in their ``layer_styles`` table
    (:func:`crustflow.io.styles.write_layer_styles`; arrows drawn with heads).
    The sign convention is the GeoPackage layer description; the arrow scale
    (``metres_per_m2_per_yr``) is an attribute of every arrow and in the layer's description and
    metadata.
    """

    grid = field_grid(fields)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    step = grid.cell_size_m / SAMPLES_PER_CELL
    frames, results, written = {}, [], []
    if sections is not None:
        feats = _features(grid, sections, "sections")
        rows, results = _section_rows(grid, feats, step)
        frames["sections"] = _frame(rows, feats, SECTION_COLUMNS, grid.crs)
    if regions is not None:
        feats = _features(grid, regions, "regions")
        frames["regions"] = _frame(_region_rows(grid, feats, step), feats, REGION_COLUMNS, grid.crs)
    _table(frames.values()).to_csv(folder / "budgets.csv", index=False)
    written.append("budgets.csv")
    if frames:
        target = folder / "budgets.gpkg"
        target.unlink(missing_ok=True)
        for layer, frame in frames.items():
            write_layer(frame, target, layer, {"DESCRIPTION": POSITIVE_SIDE}, {})
        write_layer_styles(target, [section_style(), region_style()])
        written.append(target.name)
    arrows, samples = arrow_layers(fields)
    scale = arrows.attrs["metres_per_m2_per_yr"]
    note = f"arrow length: {scale:.6g} m per m2/yr of flux; flux components " + (
        "true east/north" if grid.geographic else "grid east/north"
    )
    target = folder / "flux_arrows.gpkg"
    target.unlink(missing_ok=True)
    meta = {"metres_per_m2_per_yr": repr(float(scale))}
    write_layer(arrows, target, "arrows", {"DESCRIPTION": note}, meta, "LineString")
    write_layer(samples, target, "samples", {"DESCRIPTION": note.split("; ")[1]}, {}, "Point")
    write_layer_styles(target, [arrow_style()])
    written.append(target.name)
    title = title or str(fields.attrs.get("title", ""))
    taken: set[str] = set()
    names = frames["sections"]["name"] if "sections" in frames else []
    options = {"formats": tuple(dict.fromkeys(figure_formats)), "dpi": figure_dpi}
    for name, res in zip(names, results, strict=True):
        stem = f"section_{safe_name(name, taken)}"
        profile = _profile_frame(grid, res, step)
        budget_plots.section_figure(profile, folder / stem, name=name, title=title, **options)
        written += [f"{stem}.{fmt}" for fmt in options["formats"]]
    budget_plots.budget_map(
        fields,
        folder / "budget_map",
        sections=frames.get("sections"),
        regions=frames.get("regions"),
        title=title,
        **options,
    )
    written += [f"budget_map.{fmt}" for fmt in options["formats"]]
    return written
