"""Whole-globe geographic grids: longitude wraps at the antimeridian, the poles, budgets across the seam.

Fields are invented test data: analytic trigonometric fields, uniform fluxes built by hand and a smooth
plateau straddling the antimeridian run through compute_fields. Reference values name their source
beside each check; pyproj.Geod (GeographicLib geodesics) is the independent library for lengths.
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pyproj
import pytest
import shapely
import xarray as xr

import crustflow
from crustflow import ModelParameters
from crustflow.analyses.budgets import region_budgets, section_budgets, section_profile
from crustflow.engine.strips import HALO_ROWS
from crustflow.geometry.grid import (
    GridGeometry,
    cell_areas,
    divergence,
    face_lengths,
    gradient,
    grid_geometry,
)
from crustflow.io.features import geodesic_densify

#: WGS84 semi-major axis, m, and inverse flattening. NIMA TR8350.2 (3rd ed., 2000), table 3.1.
A_WGS84 = 6378137.0
INVF_WGS84 = 298.257223563
#: Area of the whole WGS84 ellipsoid, km^2. NIMA TR8350.2 (3rd ed., 2000).
AREA_WGS84_KM2 = 510_065_621.7

GEOD = pyproj.Geod(a=A_WGS84, f=1.0 / INVF_WGS84)
WGS84_CRS = "EPSG:4326"


def radii(phi_deg):
    """N and M of WGS84 at latitude phi (deg), written out here (SCIENCE.md, Maps; NIMA TR8350.2)."""
    f = 1.0 / INVF_WGS84
    e2 = f * (2 - f)
    w = np.sqrt(1 - e2 * np.sin(np.radians(phi_deg)) ** 2)
    return A_WGS84 / w, A_WGS84 * (1 - e2) / w**3


def global_axes(step=1.0, *, pole_rows=False):
    """Cell centres of a global grid, rows north to south: lon -180+step/2 .. 180-step/2."""
    lon = np.arange(-180 + step / 2, 180, step)
    lat = (
        np.arange(90, -90 - step / 2, -step) if pole_rows else np.arange(90 - step / 2, -90, -step)
    )
    return lon, lat


def global_grid(step=1.0, *, pole_rows=False):
    lon, lat = global_axes(step, pole_rows=pole_rows)
    return grid_geometry(lon, lat, WGS84_CRS, spacing=(step, -step))


# ----------------------------------------------------------------------------------------------
# the seam in maps.gradient and maps.divergence


def test_periodic_x_only_for_the_whole_circle():
    lon, lat = global_axes(1.0)
    assert global_grid(1.0).periodic_x
    assert grid_geometry(lon, lat, WGS84_CRS).periodic_x  # steps from the coordinates
    assert grid_geometry(lon[::-1], lat[::-1], WGS84_CRS).periodic_x  # columns running west
    assert grid_geometry(lon + 180.0, lat, WGS84_CRS).periodic_x  # 0..360 longitudes
    assert not grid_geometry(lon[:-1], lat, WGS84_CRS).periodic_x  # 359 degrees: edges
    projected = GridGeometry("projected", np.arange(360.0), np.arange(10.0))
    assert not projected.periodic_x  # 360 m wide is not a turn


def test_east_gradient_is_central_across_the_antimeridian():
    # f = cos(phi) cos(lambda - 30 deg). Analytic ellipsoidal gradient (SCIENCE.md, Maps):
    # east = (1 / (N cos phi)) df/dlambda = -sin(lambda - 30 deg) / N, north = (1 / M) df/dphi,
    # N and M of WGS84 (NIMA TR8350.2). A central difference over +-h turns sin into
    # sin x sin(h)/h exactly (value derived), in every column, the seam columns 0 and 359 included.
    geom = global_grid(1.0)
    lam = np.radians(geom.x)[None, :]
    phi = np.radians(geom.y)[:, None]
    n_rad, m_rad = radii(geom.y[:, None])
    shift = np.radians(30.0)
    f = np.cos(phi) * np.cos(lam - shift)
    ge, gn = gradient(f, geom)
    exact_e = -np.sin(lam - shift) / n_rad
    h = np.radians(1.0)
    np.testing.assert_allclose(ge, exact_e * np.sin(h) / h, rtol=0, atol=1e-12 / n_rad.min())
    # Accuracy against the analytic gradient, relative to its size on the row: the seam columns
    # are as good as the best interior ones (truncation h^2 / 6 = 5.1e-5, value derived).
    err = np.abs(ge - exact_e) * n_rad
    seam = err[:, [0, -1]].max()
    assert seam <= err[:, 1:-1].max() * (1 + 1e-9)
    assert seam < 1.01 * h**2 / 6
    # The north gradient does not see the seam: central differences (sin(h)/h again) on every
    # row but the two edge rows, which are one-sided (rows never wrap over a pole).
    exact_n = -np.sin(phi) * np.cos(lam - shift) / m_rad
    inner = slice(1, -1)
    np.testing.assert_allclose(
        gn[inner], (exact_n * np.sin(h) / h)[inner], rtol=0, atol=1e-12 / m_rad.min()
    )


def test_gradient_across_the_seam_stays_one_sided_next_to_nodata():
    geom = global_grid(2.0)
    n_rad, _ = radii(geom.y)
    lam = np.radians(geom.x)
    f = np.broadcast_to(np.sin(lam), geom.shape).copy()
    f[10, -1] = np.nan  # column 0's western neighbour across the seam
    f[20, 1] = np.nan  # column 0's eastern neighbour; the last column keeps both of its own
    ge, _ = gradient(f, geom)
    east_len = n_rad * np.cos(np.radians(geom.y)) * np.radians(2.0)
    assert np.isnan(ge[10, -1]) and np.isfinite(ge[10]).sum() == geom.shape[1] - 1
    # Finite difference value, derived: one-sided towards the valid neighbour, as anywhere else.
    assert ge[10, 0] == pytest.approx((f[10, 1] - f[10, 0]) / east_len[10], rel=1e-12)
    assert ge[20, 0] == pytest.approx((f[20, 0] - f[20, -1]) / east_len[20], rel=1e-12)
    assert ge[20, -1] == pytest.approx((f[20, 0] - f[20, -2]) / (2 * east_len[20]), rel=1e-12)


def test_uniform_fluxes_have_no_seam():
    geom = global_grid(1.0)
    q = 2.5  # m^2/s
    div = divergence(np.zeros(geom.shape), np.full(geom.shape, q), geom)
    n_rad, _ = radii(geom.y[:, None])
    want = -np.tan(np.radians(geom.y[:, None])) * q / n_rad  # SCIENCE.md / ECOSYSTEM.md
    # Every column, 0 and 359 included, to the accuracy of the existing interior check (1e-5).
    np.testing.assert_allclose(div, np.broadcast_to(want, geom.shape), rtol=1e-5)
    assert np.all(div[:, [0, -1]] == div[:, [1]])  # the seam columns equal their neighbours
    # Uniform eastward flux: no edge at the antimeridian, zero everywhere.
    assert np.all(divergence(np.full(geom.shape, q), np.zeros(geom.shape), geom) == 0.0)


def test_smooth_eastward_flux_divergence_across_the_seam():
    # q_e = sin(lambda): div = (1 / (N cos phi M)) d(M q_e)/dlambda = cos(lambda) / (N cos phi)
    # (SCIENCE.md, Maps). Finite volume: (sin(l + h/2) - sin(l - h/2)) / h = cos(l) sin(h/2)/(h/2).
    geom = global_grid(1.0)
    lam = np.radians(geom.x)[None, :]
    phi = np.radians(geom.y)[:, None]
    n_rad, _ = radii(geom.y[:, None])
    qe = np.broadcast_to(np.sin(lam), geom.shape)
    div = divergence(qe, np.zeros(geom.shape), geom)
    exact = np.cos(lam) / (n_rad * np.cos(phi))
    err = np.abs(div - exact) / np.abs(exact).max(axis=1, keepdims=True)
    assert err[:, [0, -1]].max() <= err[:, 1:-1].max() * (1 + 1e-6)
    # The face values are means of the two cells (second order): relative error ~ h^2 / 6.
    assert err.max() < 2e-4


@pytest.mark.parametrize("pole_rows", [False, True])
def test_volume_is_conserved_on_the_globe(pole_rows):
    # No boundary in longitude, zero-length faces at the poles: sum(div * area) = 0 for any flux
    # (telescoping sums over every row and column; LeVeque 2002, finite volumes).
    geom = global_grid(2.0, pole_rows=pole_rows)
    rng = np.random.default_rng(11)
    qe, qn = rng.normal(size=(2, *geom.shape))
    qe[[0, -1]] = qn[[0, -1]] = 0.0  # a flux that vanishes at the poles
    terms = divergence(qe, qn, geom) * cell_areas(geom)
    assert abs(terms.sum()) <= 1e-12 * np.abs(terms).sum()
    # Even a flux that does not vanish there: the pole faces have zero length.
    qe, qn = rng.normal(size=(2, *geom.shape))
    terms = divergence(qe, qn, geom) * cell_areas(geom)
    assert abs(terms.sum()) <= 1e-12 * np.abs(terms).sum()


def test_rows_centred_on_the_poles():
    # Rows at exactly +-90: zero-length pole faces, east gradient NaN there, finite next to it.
    geom = global_grid(1.0, pole_rows=True)
    lam = np.radians(geom.x)[None, :]
    phi = np.radians(geom.y)[:, None]
    f = np.cos(phi) * np.cos(lam)  # smooth on the globe (the x coordinate of the unit sphere)
    with np.errstate(all="raise"):  # no division by zero, no invalid operation
        ge, gn = gradient(f, geom)
        div = divergence(ge, gn, geom)
        areas = cell_areas(geom)
    assert np.all(np.isnan(ge[[0, -1]]))
    assert np.all(np.isfinite(ge[1:-1])) and np.all(np.isfinite(gn))
    # Next to the pole (89 N): central differences, as in the analytic test above.
    n_rad, _ = radii(geom.y[1])
    h = np.radians(1.0)
    np.testing.assert_allclose(
        ge[1], -np.sin(lam[0]) / n_rad * np.sin(h) / h, rtol=1e-9, atol=1e-9 / n_rad
    )
    # The gradient field is NaN on the pole rows, so is its divergence there; finite elsewhere.
    assert np.all(np.isnan(div[[0, -1]])) and np.all(np.isfinite(div[1:-1]))
    _, north_faces = face_lengths(geom)
    assert north_faces[0, 0] == 0.0 and north_faces[-1, 0] == 0.0
    assert np.all(areas > 0)
    # The pole cells are caps of half a step; all cells add up to the ellipsoid (NIMA TR8350.2).
    total = float(np.sum(areas * geom.shape[1]))
    assert total / 1e6 == pytest.approx(AREA_WGS84_KM2, rel=1e-9)
    # A flux defined at the pole rows (here uniform northward) has a finite divergence there.
    assert np.all(np.isfinite(divergence(np.ones(geom.shape), np.ones(geom.shape), geom)))


@pytest.mark.parametrize("strip", [1, 3, 7, 90])
def test_strips_of_rows_equal_the_whole_globe(strip):
    # The strip scheme of crustflow.engine.strips: HALO_ROWS rows on each inner side, full width, the
    # transform's spacing; gradient then divergence of the gradient (depth 2). Bit for bit.
    lon, lat = global_axes(2.0)
    spacing = (2.0, -2.0)
    whole = grid_geometry(lon, lat, WGS84_CRS, spacing=spacing)
    rng = np.random.default_rng(5)
    f = rng.normal(size=whole.shape)
    f[[4, 30], [0, -1]] = np.nan  # nodata on the seam
    ge, gn = gradient(f, whole)
    div = divergence(-ge, -gn, whole)
    nrow = whole.shape[0]
    for r0 in range(0, nrow, strip):
        r1 = min(nrow, r0 + strip)
        a, b = max(0, r0 - HALO_ROWS), min(nrow, r1 + HALO_ROWS)
        part = grid_geometry(lon, lat[a:b], WGS84_CRS, spacing=spacing)
        assert part.periodic_x
        pe, pn = gradient(f[a:b], part)
        pdiv = divergence(-pe, -pn, part)
        own = slice(r0 - a, r1 - a)
        np.testing.assert_array_equal(pe[own], ge[r0:r1])
        np.testing.assert_array_equal(pn[own], gn[r0:r1])
        np.testing.assert_array_equal(pdiv[own], div[r0:r1])


# ----------------------------------------------------------------------------------------------
# budgets across the antimeridian


def flux_fields(q_east, q_north, lon, lat, *, thickening=None):
    """Hand-built fields on a geographic grid: flux in m2/yr, thickening rate in mm/yr."""
    shape = (lat.size, lon.size)
    qe = np.broadcast_to(np.asarray(q_east, float), shape)
    qn = np.broadcast_to(np.asarray(q_north, float), shape)
    rate = np.zeros(shape) if thickening is None else thickening
    ds = xr.Dataset(
        {
            "flux_east": (("y", "x"), qe.copy(), {"units": "m2 yr-1"}),
            "flux_north": (("y", "x"), qn.copy(), {"units": "m2 yr-1"}),
            "thickening_rate": (("y", "x"), rate, {"units": "mm yr-1"}),
            "uplift_rate": (("y", "x"), rate, {"units": "mm yr-1"}),
        },
        coords={"y": lat, "x": lon},
    )
    return ds.rio.write_crs(WGS84_CRS)


def features(*geoms, names=None):
    names = names or [f"f{i}" for i in range(len(geoms))]
    return gpd.GeoDataFrame({"name": names}, geometry=list(geoms), crs=WGS84_CRS)


def shifted(geom, turns):
    return shapely.transform(geom, lambda xy: xy + [360.0 * turns, 0.0])


def test_section_across_the_antimeridian_uniform_flux():
    lon, lat = global_axes(1.0)
    ds = flux_fields(3.0, 2.0, lon, lat)
    equator = shapely.LineString([(170, 0), (190, 0)])
    oblique = shapely.LineString([(170, -5), (190, 5)])
    split = shapely.MultiLineString([[(170, 0), (180, 0)], [(-180, 0), (-170, 0)]])
    lines = [
        equator,
        oblique,
        split,
        shifted(equator, -1),
        shifted(oblique, -1),
        shifted(oblique, 1),
    ]
    out = section_budgets(ds, features(*lines))
    q = out.volume_flux_m3_per_yr.to_numpy()
    assert np.all(out.covered_fraction == 1.0)
    # Equator (a geodesic): length a * dlambda (NIMA TR8350.2 a), normal pointing south,
    # q . n = -q_n; Q = -2 m2/yr x L (value derived).
    length = A_WGS84 * np.radians(20.0)
    _, _, geod_length = GEOD.inv(170, 0, 190, 0)
    assert out.length_km[0] * 1e3 == pytest.approx(geod_length, rel=1e-12)
    assert geod_length == pytest.approx(length, rel=1e-12)
    assert q[0] == pytest.approx(-2.0 * length, rel=1e-9)
    # Oblique geodesic: cos(alpha) ds = M dphi and sin(alpha) ds = N cos(phi) dlambda along any
    # path (SCIENCE.md metric), so Q = q_e x meridian arc - q_n x integral N cos(phi) dlambda.
    # Both integrals from pyproj: the meridian arc by Geod.inv; the east part by the same walk.
    _, _, arc = GEOD.inv(180, -5, 180, 5)
    lons, lats = np.array(GEOD.npts(170, -5, 190, 5, 20000, initial_idx=0, terminus_idx=0)).T
    lons = np.unwrap(lons, period=360.0)
    n_rad, _ = radii(lats)
    east = np.trapezoid(n_rad * np.cos(np.radians(lats)), np.radians(lons))
    assert q[1] == pytest.approx(3.0 * arc - 2.0 * east, rel=1e-6)
    # Split at +-180, and shifted by whole turns: the same budgets (geodesics do not care).
    assert q[2] == pytest.approx(q[0], rel=1e-12)
    assert q[3] == pytest.approx(q[0], rel=1e-12)
    assert q[4] == pytest.approx(q[1], rel=1e-12)
    assert q[5] == pytest.approx(q[1], rel=1e-12)


def test_section_samples_read_across_the_seam():
    # q_e = sin(lambda) m2/yr (invented). A section along the 180 meridian reads the mean of the
    # columns at 179.5 and -179.5: sin(179.5) + sin(-179.5) = 0; a section at 185 reads the grid
    # at -175, the mean of the columns at -175.5 and -174.5, sin(-175) cos(0.5); at 180.25 the
    # weights are 1/4 on 179.5 and 3/4 on -179.5 (bilinear interpolation; values derived).
    lon, lat = global_axes(1.0)
    ds = flux_fields(np.sin(np.radians(lon))[None, :], 0.0, lon, lat)
    meridian = shapely.LineString([(180, -2), (180, 2)])
    at = [
        meridian,
        shapely.LineString([(185, -2), (185, 2)]),
        shapely.LineString([(-175, -2), (-175, 2)]),
        shapely.LineString([(180.25, -2), (180.25, 2)]),
    ]
    out = section_budgets(ds, features(*at))
    _, _, arc = GEOD.inv(0, -2, 0, 2)
    q = out.volume_flux_m3_per_yr.to_numpy()
    assert abs(q[0]) < 1e-10 * arc
    assert q[1] == pytest.approx(q[2], rel=1e-12)
    assert q[1] == pytest.approx(
        np.sin(np.radians(-175.0)) * np.cos(np.radians(0.5)) * arc, rel=1e-9
    )
    s = np.sin(np.radians(179.5))
    assert q[3] == pytest.approx((0.25 * s - 0.75 * s) * arc, rel=1e-9)
    profile = section_profile(ds, meridian)
    assert np.all(np.isfinite(profile.normal_flux_m2_per_yr))


@pytest.fixture(scope="module")
def spreading_globe():
    """A smooth outward flux around (180 E, 20 N) on a global 0.25-degree grid, and -div(q)."""
    lon, lat = global_axes(0.25)
    geom = grid_geometry(lon, lat, WGS84_CRS, spacing=(0.25, -0.25))
    dl = (lon[None, :] - 180.0 + 180.0) % 360.0 - 180.0  # degrees east of 180, continuous
    dp = lat[:, None] - 20.0
    s = 4.0  # degrees (invented)
    bell = np.exp(-(dl**2 + dp**2) / (2 * s**2))
    qe, qn = 50.0 * dl / s * bell, 50.0 * dp / s * bell  # m2/yr
    rate = -divergence(qe, qn, geom) * 1e3  # (m2/yr) / m -> mm/yr
    return flux_fields(qe, qn, lon, lat, thickening=rate)


def test_region_across_the_antimeridian_gauss(spreading_globe):
    # Divergence theorem: area integral of dT/dt = -(outward boundary flux), within 0.5 % as for
    # the plateau of tests/test_budgets.py. The same polygon given with longitudes past 180, shifted
    # by a turn, or split at +-180 gives the same budget.
    ds = spreading_globe
    poly = shapely.Polygon([(172, 12), (191, 14), (188, 27), (175, 25)])
    dense = geodesic_densify(poly, GEOD, 2e3)  # so the split follows the geodesic edges
    west = shapely.intersection(dense, shapely.box(0, -90, 180, 90))
    east = shifted(shapely.intersection(dense, shapely.box(180, -90, 360, 90)), -1)
    split = shapely.MultiPolygon([west, east])
    beyond = shapely.Polygon([(180.5, 15), (186, 16), (185.5, 24), (181, 23)])  # wholly past 180
    regions = features(poly, shifted(poly, -1), split, beyond, shifted(beyond, -1))
    out = region_budgets(ds, regions, spacing=5e3)
    inflow = out.volume_flux_m3_per_yr.to_numpy()
    outflow = out.boundary_outflow_m3_per_yr.to_numpy()
    assert np.all(inflow < 0)  # the flux spreads out from (180, 20): every region loses volume
    assert np.all(np.abs(inflow + outflow) < 5e-3 * np.abs(inflow))
    assert np.all(np.abs(out.discrepancy) < 5e-3)
    np.testing.assert_allclose(out.covered_fraction, 1.0, atol=1e-5)  # cell-share approximation
    # Area: pyproj.Geod.geometry_area_perimeter, whichever way the polygon is written.
    area, _ = GEOD.geometry_area_perimeter(poly)
    np.testing.assert_allclose(out.area_km2[:3] * 1e6, abs(area), rtol=1e-6)
    assert inflow[1] == pytest.approx(inflow[0], rel=1e-9)
    assert outflow[1] == pytest.approx(outflow[0], rel=1e-9)
    assert inflow[2] == pytest.approx(inflow[0], rel=1e-5)
    assert outflow[2] == pytest.approx(outflow[0], rel=1e-5)  # seam edges cancel
    assert inflow[4] == pytest.approx(inflow[3], rel=1e-9)
    assert outflow[4] == pytest.approx(outflow[3], rel=1e-9)


# ----------------------------------------------------------------------------------------------
# end to end


def plateau_run(lon, lat):
    """Invented plateau: 200 m + 3 km cos^2 of the great-circle angle from (180 E, 30 N), radius
    25 degrees, through compute_fields with the crust by Airy (Turcotte & Schubert 2002, 2.2) from
    reference_thickness = 35 km."""
    lam, phi = np.radians(lon)[None, :], np.radians(lat)[:, None]
    lam_c, phi_c, radius = np.radians(180.0), np.radians(30.0), np.radians(25.0)
    cos_r = np.sin(phi) * np.sin(phi_c) + np.cos(phi) * np.cos(phi_c) * np.cos(lam - lam_c)
    r = np.arccos(np.clip(cos_r, -1.0, 1.0))
    h = np.where(r < radius, 3000.0 * np.cos(np.pi * r / (2 * radius)) ** 2, 0.0) + 200.0
    topo = xr.DataArray(h, dims=("y", "x"), coords={"y": lat, "x": lon}).rio.write_crs(WGS84_CRS)
    params = ModelParameters(channel_thickness=15e3, viscosity=1e19, reference_thickness=35e3)
    return crustflow.compute_fields(topo, parameters=params)


def test_compute_fields_on_the_globe_conserves_volume():
    lon, lat = global_axes(2.0)
    ds = plateau_run(lon, lat)
    qe, qn = ds.flux_east.values, ds.flux_north.values
    assert np.all(np.isfinite(qe)) and np.all(np.isfinite(qn))
    assert np.abs(qn[:, [0, -1]]).max() > 0.5 * np.abs(qn).max()  # the seam is in the flow
    # Mirror symmetry about 180 E: column j and column ncol - 1 - j (value derived).
    scale = np.hypot(qe, qn).max()
    np.testing.assert_allclose(qe, -qe[:, ::-1], rtol=0, atol=1e-9 * scale)
    np.testing.assert_allclose(qn, qn[:, ::-1], rtol=0, atol=1e-9 * scale)
    # The same globe with longitudes 0..360 (the seam at 0 E, far from the plateau): the same
    # fields, columns rolled by half a turn, so the antimeridian is treated as an interior meridian.
    other = plateau_run(lon + 180.0, lat)
    for name in ("flux_east", "flux_north", "thickening_rate"):
        a, b = ds[name].values, np.roll(other[name].values, 90, axis=1)
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-9 * np.abs(a).max(), err_msg=name)
    rate = ds.thickening_rate.values
    assert np.all(np.isfinite(rate))
    terms = rate * cell_areas(grid_geometry(lon, lat, WGS84_CRS))
    assert abs(terms.sum()) <= 1e-9 * np.abs(terms).sum()  # no boundary: volume conserved
