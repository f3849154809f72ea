"""Volume budgets through sections and of regions: analytic fluxes, geodesics, Gauss, files, errors.

Fields are invented test data: uniform fluxes built by hand and the cos^2 plateau of conftest.py run
through compute_fields.
"""

from __future__ import annotations

import json

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
import shapely
import xarray as xr
from conftest import airy
from scipy import integrate

import crustflow
from crustflow import CrustflowInputError, ModelParameters
from crustflow.analyses.budgets import (
    CSV_COLUMNS,
    arrow_layers,
    budget_table,
    read_features,
    region_budgets,
    section_budgets,
    section_profile,
    write_budget_outputs,
)
from crustflow.geometry.grid import cell_areas, cell_spacings, grid_geometry

UTM = "EPSG:32633"
PARAMS = ModelParameters(channel_thickness=15e3, viscosity=1e19)
WGS84_GEOD = pyproj.Geod(a=6378137.0, f=1 / 298.257223563)  # NIMA TR8350.2, table 3.1


def uniform_fields(q_east, q_north, x, y, crs, *, nodata=None):
    """Hand-built fields: uniform flux (m2/yr), zero thickening; ``nodata`` a [rows, cols] slice."""
    shape = (y.size, x.size)
    qe, qn = np.full(shape, float(q_east)), np.full(shape, float(q_north))
    if nodata is not None:
        qe[nodata] = np.nan
        qn[nodata] = np.nan
    zero = np.where(np.isnan(qe), np.nan, 0.0)
    ds = xr.Dataset(
        {
            "flux_east": (("y", "x"), qe, {"units": "m2 yr-1"}),
            "flux_north": (("y", "x"), qn, {"units": "m2 yr-1"}),
            "thickening_rate": (("y", "x"), zero, {"units": "mm yr-1"}),
            "uplift_rate": (("y", "x"), zero, {"units": "mm yr-1"}),
        },
        coords={"y": y, "x": x},
    )
    return ds.rio.write_crs(crs)


def ground(path, crs=UTM):
    """Ground length of each straight projected segment of a path, m: the integral of ds / k with
    k pyproj's point scale factor (``Proj.get_factors``; UTM is conformal), by scipy's
    Gauss-Legendre quadrature."""
    proj, to_lonlat = (
        pyproj.Proj(crs),
        pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True),
    )
    out = []
    for (x0, y0), (x1, y1) in zip(path[:-1], path[1:], strict=True):

        def inverse_k(t, x0=x0, y0=y0, x1=x1, y1=y1):
            lon, lat = to_lonlat.transform(x0 + t * (x1 - x0), y0 + t * (y1 - y0))
            return 1.0 / proj.get_factors(lon, lat).parallel_scale

        mean, _ = integrate.fixed_quad(inverse_k, 0.0, 1.0, n=10)  # 1/k is smooth: exact
        out.append(mean * np.hypot(x1 - x0, y1 - y0))
    return np.array(out)


def uniform_line_flux(q_east, q_north, path, crs=UTM):
    """Volume flux of a uniform q (local frame, m2/yr) through a projected polyline, m3/yr: on a
    conformal projection each segment keeps its direction in the local frame, so the flux is
    ``(q_e dy - q_n dx) / L_projected`` times the ground length (value derived)."""
    p = np.asarray(path, dtype=float)
    d = np.diff(p, axis=0)
    per_metre = (q_east * d[:, 1] - q_north * d[:, 0]) / np.hypot(d[:, 0], d[:, 1])
    return float(np.sum(per_metre * ground(path, crs)))


def utm_axes(n_x=40, n_y=30, cell=1e3):
    """Cell centres of a UTM grid whose west edge is x = 500 km and north edge y = 5000 km."""
    x = 500e3 + cell * (np.arange(n_x) + 0.5)
    y = 5000e3 - cell * (np.arange(n_y) + 0.5)
    return x, y


def lines(*coords, crs=UTM, names=None):
    geoms = [shapely.LineString(c) for c in coords]
    names = names or [f"L{i}" for i in range(len(geoms))]
    return gpd.GeoDataFrame({"name": names}, geometry=geoms, crs=crs)


def grid(values, x, y, crs):
    return xr.DataArray(values, dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs(crs)


def plateau_fields(kind):
    """The cos^2 plateau (conftest.bump's shape, radius 70 km) through compute_fields.

    Returns the fields, the plateau centre (grid CRS) and a function turning (east, north) offsets in
    metres into grid coordinates.
    """
    n, radius = 80, 70e3
    if kind == "projected":
        x = 400e3 + 2.5e3 * np.arange(n)
        y = 5300e3 - 2.5e3 * np.arange(n)
        xc, yc = x.mean(), y.mean()
        r = np.hypot(*np.meshgrid(x - xc, y - yc))
        crs = UTM

        def at(e, nn):
            return xc + e, yc + nn
    else:
        x = 10.0 + 0.025 * np.arange(n)
        y = 46.0 - 0.025 * np.arange(n)
        xc, yc = x.mean(), y.mean()
        k_e, k_n = 111.2e3 * np.cos(np.radians(yc)), 111.2e3  # metres per degree, rough
        r = np.hypot(*np.meshgrid((x - xc) * k_e, (y - yc) * k_n))
        crs = "EPSG:4326"

        def at(e, nn):
            return xc + e / k_e, yc + nn / k_n

    h = np.where(r < radius, 3000.0 * np.cos(np.pi * r / (2 * radius)) ** 2, 0.0) + 200.0
    ds = crustflow.compute_fields(
        grid(h, x, y, crs), parameters=PARAMS, crust_thickness=grid(airy(h), x, y, crs)
    )
    return ds, at


@pytest.fixture(scope="module")
def projected_plateau():
    return plateau_fields("projected")


@pytest.fixture(scope="module")
def geographic_plateau():
    return plateau_fields("geographic")


# ----------------------------------------------------------------------------------------------
# sections: analytic values


def test_uniform_flux_through_a_line_is_exact():
    # Analytic (value derived): for uniform q, integral of q.n ds with n the right-hand normal
    # (t_n, -t_e) is q_e (y_end - y_start) - q_n (x_end - x_start) per projected metre, for any
    # polyline; on the ground each segment's share is scaled by the mean of 1/k along it (pyproj
    # point scale factor, integrated by scipy: uniform_line_flux).
    x, y = utm_axes()
    ds = uniform_fields(3.0, -2.0, x, y, UTM)
    path = [(503e3, 4975e3), (512e3, 4990e3), (531.5e3, 4981e3)]
    out = section_budgets(ds, lines(path, path[::-1], names=["forward", "reverse"]))
    want = uniform_line_flux(3.0, -2.0, path)  # m3/yr
    assert want == pytest.approx(3.0 * (4981e3 - 4975e3) - (-2.0) * (531.5e3 - 503e3), rel=5e-4)
    fwd, rev = out.set_index("name").loc[["forward", "reverse"]].itertuples()
    # Midpoint rule on the sample pieces h: 1/k is off by about (h / R)^2 / 24 (value derived).
    assert fwd.volume_flux_m3_per_yr == pytest.approx(want, rel=1e-9)
    assert rev.volume_flux_m3_per_yr == pytest.approx(-want, rel=1e-9)  # reversing flips the sign
    assert fwd.volume_flux_km3_per_Myr == pytest.approx(
        fwd.volume_flux_m3_per_yr / 1e3, rel=1e-12
    )  # 1 km3/Myr = 1e3 m3/yr
    seg = ground(path).sum()
    assert fwd.length_km == pytest.approx(seg / 1e3, rel=1e-9)
    assert fwd.covered_fraction == 1.0
    assert fwd.positive_m3_per_yr - fwd.negative_m3_per_yr >= abs(want)
    assert fwd.positive_m3_per_yr + fwd.negative_m3_per_yr == pytest.approx(
        fwd.volume_flux_m3_per_yr, rel=1e-12
    )
    assert out.attrs["positive_side"].startswith("positive volume flux crosses a section towards")


def test_right_hand_side_is_positive():
    # Definition: walking north, the right-hand side is east; walking east, it is south.
    x, y = utm_axes()
    ds = uniform_fields(5.0, 7.0, x, y, UTM)
    out = section_budgets(
        ds, lines([(510e3, 4980e3), (510e3, 4990e3)], [(505e3, 4985e3), (515e3, 4985e3)])
    )
    want = [
        uniform_line_flux(5.0, 7.0, [(510e3, 4980e3), (510e3, 4990e3)]),
        uniform_line_flux(5.0, 7.0, [(505e3, 4985e3), (515e3, 4985e3)]),
    ]
    assert want[0] > 0 > want[1]
    np.testing.assert_allclose(out.volume_flux_m3_per_yr, want, rtol=1e-9)


def test_geographic_line_length_and_flux_match_pyproj_geod():
    # Second opinion: pyproj.Geod.line_length / Geod.inv on WGS84 (NIMA TR8350.2), 1e-6 relative.
    lon = 20.0 + 0.05 * (np.arange(60) + 0.5)
    lat = 50.0 - 0.05 * (np.arange(50) + 0.5)
    ds = uniform_fields(4.0, 0.0, lon, lat, "EPSG:4326")
    zigzag = [(20.3, 48.1), (21.7, 49.6), (22.6, 48.4), (22.9, 49.9)]
    meridian = [(21.0, 48.0), (21.0, 49.5)]
    out = section_budgets(ds, lines(zigzag, meridian, crs="EPSG:4326"))
    lons, lats = zip(*zigzag, strict=True)
    assert out.length_km[0] * 1e3 == pytest.approx(WGS84_GEOD.line_length(lons, lats), rel=1e-6)
    _, _, arc = WGS84_GEOD.inv(21.0, 48.0, 21.0, 49.5)
    assert out.length_km[1] * 1e3 == pytest.approx(arc, rel=1e-6)
    # Walking north along a meridian the right-hand normal is true east: Q = q_e x arc length.
    assert out.volume_flux_m3_per_yr[1] == pytest.approx(4.0 * arc, rel=1e-9)


def test_reprojected_line_gives_the_same_totals(projected_plateau):
    # Invariant: the same line given in EPSG:4326 (geodesic between the transformed vertices) and in
    # the grid's UTM CRS agree to the densification tolerance (1e-4 relative, value derived: the
    # geodesic departs from the straight UTM chord by metres over 150 km).
    ds, at = projected_plateau
    path = [at(-75e3, -10e3), at(5e3, 30e3), at(70e3, 5e3)]
    to_lonlat = pyproj.Transformer.from_crs(UTM, "EPSG:4326", always_xy=True)
    lonlat = [to_lonlat.transform(px, py) for px, py in path]
    utm = section_budgets(ds, lines(path))
    geo = section_budgets(ds, lines(lonlat, crs="EPSG:4326"))
    assert geo.crs == utm.crs
    assert geo.volume_flux_m3_per_yr[0] == pytest.approx(utm.volume_flux_m3_per_yr[0], rel=1e-4)
    assert geo.length_km[0] == pytest.approx(utm.length_km[0], rel=1e-5)


@pytest.mark.parametrize("kind", ["projected", "geographic"])
def test_section_total_converges_with_spacing(kind, projected_plateau, geographic_plateau):
    # Convergence (midpoint rule, second order): halving the spacing changes the total < 1e-3.
    ds, at = projected_plateau if kind == "projected" else geographic_plateau
    feats = lines([at(-80e3, 10e3), at(20e3, -5e3), at(85e3, 40e3)], crs=ds.rio.crs)
    base = section_budgets(ds, feats)
    step = base.sample_spacing_m[0]
    # Default: half the smallest cell side on the ground (2.5 km here on the projected grid).
    sides = cell_spacings(grid_geometry(ds.x.values, ds.y.values, ds.rio.crs))
    assert step == pytest.approx(0.5 * min(float(np.min(v)) for v in sides), rel=1e-12)
    assert 0 < step <= 1.25e3 * 1.001
    half = section_budgets(ds, feats, spacing=step / 2)
    total, finer = base.volume_flux_m3_per_yr[0], half.volume_flux_m3_per_yr[0]
    assert abs(finer - total) < 1e-3 * abs(total)


def test_covered_fraction_half_outside_and_across_nodata():
    # Value derived: samples every 0.5 km; half of the first line lies east of the grid (x > 540 km),
    # 5 km of the second line's 20 km cross nodata cells (columns 10-14, x from 510 to 515 km).
    # Fractions of ground length: the scale factor varies by < 1e-5 along these lines.
    x, y = utm_axes()
    ds = uniform_fields(0.0, 6.0, x, y, UTM, nodata=(slice(None), slice(10, 15)))
    out = section_budgets(
        ds, lines([(530e3, 4985e3), (550e3, 4985e3)], [(505e3, 4985e3), (525e3, 4985e3)])
    )
    np.testing.assert_allclose(out.covered_fraction, [0.5, 0.75], rtol=1e-5)
    # Walking east the positive side is south: Q = -q_n x covered ground length.
    covered = [
        ground([(530e3, 4985e3), (540e3, 4985e3)])[0],
        ground([(505e3, 4985e3), (510e3, 4985e3), (515e3, 4985e3), (525e3, 4985e3)])[[0, 2]].sum(),
    ]
    np.testing.assert_allclose(out.volume_flux_m3_per_yr, -6.0 * np.array(covered), rtol=1e-9)
    profile = section_profile(ds, out.geometry[1])
    assert profile["normal_flux_m2_per_yr"].isna().sum() == 10  # 5 km of 0.5 km pieces
    assert list(profile.columns) == [
        "distance_km",
        "x",
        "y",
        "flux_east_m2_per_yr",
        "flux_north_m2_per_yr",
        "normal_flux_m2_per_yr",
    ]
    # Last sample: the middle of the last 0.5 km piece, on the ground (the line's ground length
    # less half a piece).
    whole = ground([(505e3, 4985e3), (525e3, 4985e3)])[0]
    assert profile.distance_km.iloc[-1] == pytest.approx((whole - 0.25e3 * whole / 20e3) / 1e3)
    assert profile.attrs["volume_flux_m3_per_yr"] == pytest.approx(-6.0 * covered[1])


def test_fields_read_back_from_netcdf_give_the_same_budget(tmp_path, projected_plateau):
    # Write-then-read-back: fields.nc (float32) opened with decode_coords="all"; float32 rounding.
    from crustflow.io.writers import write_netcdf

    ds, at = projected_plateau
    write_netcdf(ds, tmp_path / "fields.nc")
    back = xr.open_dataset(tmp_path / "fields.nc", decode_coords="all")
    feats = lines([at(-60e3, -60e3), at(50e3, 65e3)])
    region = gpd.GeoDataFrame(
        {"name": ["r"]}, geometry=[shapely.Point(at(0, 0)).buffer(30e3)], crs=UTM
    )
    want = budget_table(ds, feats, region)
    got = budget_table(back, feats, region)
    back.close()
    for col in ("volume_flux_m3_per_yr", "boundary_outflow_m3_per_yr"):
        np.testing.assert_allclose(got[col], want[col], rtol=1e-5)


# ----------------------------------------------------------------------------------------------
# regions: divergence theorem


@pytest.mark.parametrize("kind", ["projected", "geographic"])
def test_gauss_theorem_on_the_plateau(kind, projected_plateau, geographic_plateau):
    # Divergence theorem: integral of dT/dt over the region = -(outward boundary flux); the area
    # integral (finite-volume thickening, cell shares) and the boundary line integral are independent
    # discretisations and agree within 0.5 %. Polygon with a hole to exercise interior rings.
    ds, at = projected_plateau if kind == "projected" else geographic_plateau
    square = shapely.Polygon(
        [at(-30e3, -20e3), at(40e3, -20e3), at(40e3, 25e3), at(-30e3, 25e3)],
        holes=[[at(-5e3, -5e3), at(-5e3, 10e3), at(10e3, 10e3), at(10e3, -5e3)]],
    )
    ring = shapely.Polygon(
        [at(50e3 * np.cos(a), 35e3 * np.sin(a)) for a in np.linspace(0, 6.28, 90)]
    )
    whole = shapely.Polygon([at(-90e3, -90e3), at(90e3, -90e3), at(90e3, 90e3), at(-90e3, 90e3)])
    regions = gpd.GeoDataFrame(
        {"name": ["square", "ellipse", "whole"]},
        geometry=[square, ring, whole],
        crs=ds.rio.crs,
    )
    out = region_budgets(ds, regions).set_index("name")
    for name in ("square", "ellipse"):
        inflow, outflow = out.loc[name, ["volume_flux_m3_per_yr", "boundary_outflow_m3_per_yr"]]
        assert inflow < 0  # the crust under the plateau's top thins
        assert abs(inflow + outflow) < 5e-3 * abs(inflow)
        assert abs(out.loc[name, "discrepancy"]) < 5e-3
        assert out.loc[name, "covered_fraction"] == pytest.approx(1.0, abs=1e-6)
    # The whole plateau: net ~0 relative to the gross volume flux (integral of |dT/dt| dA).
    geom = grid_geometry(ds.x.values, ds.y.values, ds.rio.crs)
    gross = np.nansum(np.abs(ds.thickening_rate.values) * cell_areas(geom)) * 1e-3  # m3/yr
    assert abs(out.loc["whole", "volume_flux_m3_per_yr"]) < 1e-9 * gross
    assert abs(out.loc["whole", "boundary_outflow_m3_per_yr"]) < 1e-9 * gross
    # Means are area-weighted: mean thickening x valid area = net inflow (mm/yr x m2 = 1e-3 m3/yr).
    sq = out.loc["square"]
    assert sq.mean_thickening_mm_per_yr * sq.area_km2 * 1e6 * 1e-3 == pytest.approx(
        sq.volume_flux_m3_per_yr, rel=1e-4
    )
    assert sq.mean_uplift_mm_per_yr / sq.mean_thickening_mm_per_yr == pytest.approx(
        1 - 2800 / 3300, rel=1e-6
    )  # Airy factor on land, README (Model)


def test_region_area_and_cover_half_outside():
    # Value derived: a 20 x 10 km box, half east of the grid edge (x = 540 km): area 200 km2 in
    # projected metres, cover 0.5. On the ground (UTM scale factor 0.9996 to 1.00003 x 0.9996 here):
    # the area is the geodesic area of the densified box (pyproj.Geod), about 200 / 0.9996^2 km2.
    x, y = utm_axes()
    ds = uniform_fields(2.0, 0.0, x, y, UTM)
    box = shapely.box(530e3, 4975e3, 550e3, 4985e3)
    out = region_budgets(ds, gpd.GeoDataFrame({"name": ["b"]}, geometry=[box], crs=UTM))
    to_lonlat = pyproj.Transformer.from_crs(UTM, "EPSG:4326", always_xy=True)
    dense = shapely.segmentize(box, 100.0)
    lon, lat = to_lonlat.transform(*np.asarray(dense.exterior.coords).T)
    area = abs(WGS84_GEOD.polygon_area_perimeter(lon, lat)[0])
    assert out.area_km2[0] == pytest.approx(area / 1e6, rel=1e-9)
    assert out.area_km2[0] == pytest.approx(200.0 / 0.9996**2, rel=1e-4)
    assert out.covered_fraction[0] == pytest.approx(0.5, rel=1e-5)
    corners = [(530e3, 4975e3), (550e3, 4975e3), (550e3, 4985e3), (530e3, 4985e3), (530e3, 4975e3)]
    assert out.length_km[0] == pytest.approx(ground(corners).sum() / 1e3, rel=1e-9)
    # Uniform q, zero thickening: the covered west side takes in 2 m2/yr x 10 km (on the ground).
    west = ground([(530e3, 4975e3), (530e3, 4985e3)])[0]
    assert out.boundary_outflow_m3_per_yr[0] == pytest.approx(-2.0 * west, rel=1e-9)


def test_geographic_region_area_matches_pyproj_geod():
    # Second opinion: pyproj.Geod.geometry_area_perimeter (WGS84) for the area; the cell-share sum
    # of exact cell areas (Snyder 1987) matches it to the stated approximation (1e-5 here).
    lon = 20.0 + 0.05 * (np.arange(60) + 0.5)
    lat = 50.0 - 0.05 * (np.arange(50) + 0.5)
    ds = uniform_fields(0.0, 0.0, lon, lat, "EPSG:4326")
    ds["thickening_rate"][:] = 1.0  # mm/yr everywhere: net inflow = area x 1e-3 m/yr
    poly = shapely.Polygon([(20.33, 48.02), (22.41, 47.93), (22.88, 49.61), (21.07, 49.3)])
    out = region_budgets(ds, gpd.GeoDataFrame({"name": ["p"]}, geometry=[poly], crs="EPSG:4326"))
    area, perimeter = WGS84_GEOD.geometry_area_perimeter(poly)
    assert out.area_km2[0] * 1e6 == pytest.approx(abs(area), rel=1e-9)
    assert out.length_km[0] * 1e3 == pytest.approx(perimeter, rel=1e-6)
    assert out.volume_flux_m3_per_yr[0] == pytest.approx(abs(area) * 1e-3, rel=1e-5)


# ----------------------------------------------------------------------------------------------
# files


def test_outputs_read_back(tmp_path, projected_plateau):
    # Write-then-read-back with geopandas (pyogrio) and pandas: CRS, layers, attributes, dtypes.
    ds, at = projected_plateau
    src = tmp_path / "features.gpkg"
    lines(
        [at(-80e3, 0), at(80e3, 10e3)], [at(0, -85e3), at(10e3, 85e3)], names=["West/East", "S N"]
    ).to_file(src, layer="sections")
    gpd.GeoDataFrame(
        {"name": ["core"]}, geometry=[shapely.Point(at(0, 0)).buffer(30e3)], crs=UTM
    ).to_file(src, layer="regions")
    folder = tmp_path / "out"
    written = write_budget_outputs(ds, folder, sections=src, regions=src, title="Test plateau")
    assert written == [
        "budgets.csv",
        "budgets.gpkg",
        "flux_arrows.gpkg",
        "section_West_East.png",
        "section_S_N.png",
        "budget_map.png",
    ]
    assert all((folder / name).stat().st_size > 0 for name in written)
    table = pd.read_csv(folder / "budgets.csv")
    assert list(table.columns) == CSV_COLUMNS
    assert list(table.kind) == ["section", "section", "region"]
    assert table.area_km2[:2].isna().all() and table.discrepancy[:2].isna().all()
    assert table.positive_m3_per_yr[2:].isna().all()
    assert [str(n) for n in pyogrio.list_layers(folder / "budgets.gpkg")[:, 0]] == [
        "sections",
        "regions",
        "layer_styles",  # default styles (OGC/GDAL convention), an attributes table
    ]
    sections = gpd.read_file(folder / "budgets.gpkg", layer="sections")
    regions = gpd.read_file(folder / "budgets.gpkg", layer="regions")
    for layer in (sections, regions):
        assert layer.crs == pyproj.CRS(UTM)
        assert all(pd.api.types.is_string_dtype(layer[c]) for c in ("name", "kind"))
    numeric = [c for c in sections.columns if c not in ("name", "kind", "geometry")]
    assert numeric == [
        "volume_flux_m3_per_yr",
        "volume_flux_km3_per_Myr",
        "length_km",
        "covered_fraction",
        "positive_m3_per_yr",
        "negative_m3_per_yr",
        "sample_spacing_m",
    ]
    assert all(sections[c].dtype == "float64" for c in numeric)
    assert "discrepancy" in regions and regions["area_km2"].dtype == "float64"
    np.testing.assert_allclose(sections.volume_flux_m3_per_yr, table.volume_flux_m3_per_yr[:2])
    info = pyogrio.read_info(folder / "budgets.gpkg", layer="sections")
    assert "right-hand side" in info["layer_metadata"]["DESCRIPTION"]
    layers = [str(n) for n in pyogrio.list_layers(folder / "flux_arrows.gpkg")[:, 0]]
    assert layers == ["arrows", "samples", "layer_styles"]
    arrows = gpd.read_file(folder / "flux_arrows.gpkg", layer="arrows")
    samples = gpd.read_file(folder / "flux_arrows.gpkg", layer="samples")
    assert arrows.crs == samples.crs == pyproj.CRS(UTM)
    assert set(arrows.geom_type) == {"LineString"} and set(samples.geom_type) == {"Point"}
    fields = [
        "flux_east",
        "flux_north",
        "flux_magnitude",
        "flux_azimuth",
        "grid_azimuth",
        "mean_speed",
    ]
    assert [c for c in samples.columns if c != "geometry"] == fields
    assert all(samples[c].dtype == "float64" for c in fields)
    scale = arrows.metres_per_m2_per_yr.iloc[0]
    assert (arrows.metres_per_m2_per_yr == scale).all()
    meta = pyogrio.read_info(folder / "flux_arrows.gpkg", layer="arrows")["layer_metadata"]
    assert float(meta["metres_per_m2_per_yr"]) == scale
    # Arrow length = scale x |q| (definition); mean speed = |q| / h (README, Model), mm/yr.
    # (atol: arrow ends are coordinates near 5e6 m, whose difference carries ~1e-9 m of rounding.)
    np.testing.assert_allclose(arrows.length, scale * arrows.flux_magnitude, rtol=1e-9, atol=1e-8)
    np.testing.assert_allclose(samples.mean_speed, samples.flux_magnitude / 15e3 * 1e3, rtol=1e-6)


def test_arrow_layers_geographic(geographic_plateau):
    # Second opinion: pyproj.Geod.inv from each sample to its arrow's tip gives the flux azimuth and
    # the arrow length scale x |q| (WGS84).
    ds, _ = geographic_plateau
    arrows, samples = arrow_layers(ds)
    assert arrows.attrs["stride"] == 2  # 80 cells / 40 arrows across
    assert len(samples) == 40 * 40
    moving = arrows[arrows.flux_magnitude > 1e-3 * arrows.flux_magnitude.max()]
    xy = np.array([np.asarray(g.coords) for g in moving.geometry])
    az, _, dist = WGS84_GEOD.inv(xy[:, 0, 0], xy[:, 0, 1], xy[:, 1, 0], xy[:, 1, 1])
    scale = arrows.attrs["metres_per_m2_per_yr"]
    np.testing.assert_allclose(dist, scale * moving.flux_magnitude, rtol=1e-9)
    np.testing.assert_allclose(np.mod(az - moving.flux_azimuth + 180, 360) - 180, 0, atol=1e-6)
    # The longest arrow is 0.9 x the distance between arrows: 2 cells of 0.025 degrees east on the
    # middle row (45 N), the smaller cell side there.
    east_step = WGS84_GEOD.inv(10.0, 45.0, 10.025, 45.0)[2]
    assert dist.max() == pytest.approx(0.9 * 2 * east_step, rel=1e-6)


def test_mean_speed_left_out_when_unknown():
    x, y = utm_axes()
    _, samples = arrow_layers(uniform_fields(1.0, 1.0, x, y, UTM), stride=5)
    assert "mean_speed" not in samples
    assert len(samples) == 8 * 6


# ----------------------------------------------------------------------------------------------
# bad input


def test_read_features_names_and_reprojection(tmp_path):
    path = tmp_path / "l.geojson"
    feats = lines([(14.0, 46.0), (15.0, 46.5)], [(14.2, 45.0), (14.4, 45.2)], crs="EPSG:4326")
    feats["name"] = ["Alpha", None]
    feats.to_file(path)
    got = read_features(path, "sections", UTM)
    assert list(got["name"]) == ["Alpha", "1"]  # missing name -> the feature index as text
    assert got.crs == pyproj.CRS(UTM)
    assert len(got.geometry[0].coords) > 50  # densified along the geodesic before reprojection


def test_bad_feature_files(tmp_path):
    missing = tmp_path / "nothing.gpkg"
    with pytest.raises(CrustflowInputError, match=r"sections file '.*nothing.gpkg' does not exist"):
        read_features(missing, "sections", UTM)
    text = tmp_path / "notes.gpkg"
    text.write_text("just some words\n")
    with pytest.raises(CrustflowInputError, match=r"is not a vector file GDAL can read; save the"):
        read_features(text, "sections", UTM)
    empty = tmp_path / "empty.geojson"
    empty.write_text(json.dumps({"type": "FeatureCollection", "features": []}))
    with pytest.raises(CrustflowInputError, match=r"empty.geojson' has no features; add at least"):
        read_features(empty, "regions", UTM)
    points = tmp_path / "points.gpkg"
    gpd.GeoDataFrame({"name": ["p"]}, geometry=[shapely.Point(0, 0)], crs=UTM).to_file(points)
    with pytest.raises(CrustflowInputError, match=r"feature 'p' is a Point; sections must be"):
        read_features(points, "sections", UTM)
    no_crs = tmp_path / "nocrs.gpkg"
    with pytest.warns(UserWarning):
        lines([(0, 0), (1, 1)], crs=None).to_file(no_crs)
    with pytest.raises(
        CrustflowInputError, match=r"nocrs.gpkg' has no CRS; assign one in your GIS"
    ):
        read_features(no_crs, "sections", UTM)
    twice = tmp_path / "twice.gpkg"
    lines([(0, 0), (1, 1)], [(2, 2), (3, 3)], names=["A", "A"]).to_file(twice)
    with pytest.raises(CrustflowInputError, match=r"names 'A' more than once; rename the features"):
        read_features(twice, "sections", UTM)
    with pytest.raises(
        CrustflowInputError, match=r"kind is 'lines'; give one of sections, regions"
    ):
        read_features(twice, "lines", UTM)
    bow = shapely.Polygon([(0, 0), (1, 1), (1, 0), (0, 1)])
    tie = gpd.GeoDataFrame({"name": ["bow"]}, geometry=[bow], crs=UTM)
    with pytest.raises(
        CrustflowInputError, match=r"region 'bow' is not a valid polygon \(Self-int"
    ):
        region_budgets(uniform_fields(1, 1, *utm_axes(), UTM), tie)


def test_features_outside_the_grid_and_bad_fields():
    x, y = utm_axes()
    ds = uniform_fields(1.0, 0.0, x, y, UTM)
    far = lines([(600e3, 4985e3), (620e3, 4985e3)], names=["far"])
    with pytest.raises(CrustflowInputError, match=r"section 'far' lies entirely outside the grid"):
        section_budgets(ds, far)
    box = gpd.GeoDataFrame({"name": ["away"]}, geometry=[shapely.box(0, 0, 1e3, 1e3)], crs=UTM)
    with pytest.raises(CrustflowInputError, match=r"region 'away' lies entirely outside the grid"):
        region_budgets(ds, box)
    with pytest.raises(CrustflowInputError, match=r"the fields have no CRS; open fields.nc with"):
        section_budgets(ds.drop_vars("spatial_ref"), far)
    with pytest.raises(CrustflowInputError, match=r"spacing is -1; give a positive sample spacing"):
        section_budgets(ds, far, spacing=-1)
