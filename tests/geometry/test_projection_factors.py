"""Projected grids measured on the ground: projection factors, distances, areas, fluxes.

Sources of the projection factors and of the checks, named per test:

* pyproj ``Proj.get_factors`` (PROJ's ``proj_factors``): the factors crustflow uses, compared here
  with an independent closed form (Snyder 1987) and with the lattice interpolation.
* Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional Paper 1395: the
  Lambert conformal conic scale factor on the ellipsoid (ch. 15; equation numbers from memory).
* pyproj ``Geod.inv`` / ``Geod.polygon_area_perimeter`` (Karney 2013, J. Geodesy 87): geodesic
  distances and areas on the WGS84 ellipsoid (NIMA TR8350.2).

Grids are invented test data: a plateau whose elevation is a function of the geodesic distance from
its centre, so the ellipsoidal truth of the flux is known analytically.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pyproj
import pytest
import xarray as xr
from conftest import SCENARIO, airy, write_grid
from scipy.interpolate import RegularGridInterpolator

import crustflow
from crustflow import CrustflowInputError, ModelParameters
from crustflow.cli import main
from crustflow.constants import SECONDS_PER_YEAR
from crustflow.geometry.grid import (
    GridGeometry,
    azimuth,
    cell_areas,
    cell_spacings,
    divergence,
    face_lengths,
    gradient,
    grid_geometry,
    ground_steps,
)
from crustflow.geometry.projection import FACTOR_SPACING, is_conformal, point_factors
from crustflow.physics import flexure
from crustflow.variables import VARIABLES

#: Lambert conformal conic, standard parallels 25 and 45 N, origin 35 N 90 E, WGS84 (invented grid).
LCC = "+proj=lcc +lat_1=25 +lat_2=45 +lat_0=35 +lon_0=90 +datum=WGS84 +units=m +no_defs"
#: Albers equal-area conic on the same parallels: not conformal (shear d != 0).
AEA = "+proj=aea +lat_1=25 +lat_2=45 +lat_0=35 +lon_0=90 +datum=WGS84 +units=m +no_defs"
WGS84_GEOD = pyproj.Geod(a=6378137.0, f=1 / 298.257223563)  # NIMA TR8350.2, table 3.1
A, E2 = 6378137.0, (1 / 298.257223563) * (2 - 1 / 298.257223563)


def axes(half_width=1500e3, cell=20e3):
    """Cell centres of a square grid ``2 half_width`` across, centred on the projection's origin."""
    n = int(round(2 * half_width / cell))
    x = -half_width + cell * (np.arange(n) + 0.5)
    return x, x[::-1].copy()  # rows north to south


def to_lonlat(crs):
    return pyproj.Transformer.from_crs(pyproj.CRS(crs), "EPSG:4326", always_xy=True)


# --- the factors ------------------------------------------------------------------------------


def snyder_lcc_scale(lat_deg, lat1=25.0, lat2=45.0):
    """Point scale factor k of the ellipsoidal Lambert conformal conic (Snyder 1987, ch. 15:
    m (14-15), t (15-9), n (15-8), k = m1 t^n / (m t1^n); equation numbers from memory)."""
    e = math.sqrt(E2)

    def m(p):
        return np.cos(p) / np.sqrt(1 - E2 * np.sin(p) ** 2)

    def t(p):
        return np.tan(np.pi / 4 - p / 2) / ((1 - e * np.sin(p)) / (1 + e * np.sin(p))) ** (e / 2)

    p1, p2, p = np.radians(lat1), np.radians(lat2), np.radians(lat_deg)
    n = (np.log(m(p1)) - np.log(m(p2))) / (np.log(t(p1)) - np.log(t(p2)))
    return m(p1) * t(p) ** n / (m(p) * t(p1) ** n)


def test_conic_factors_match_snyder_and_pyproj():
    # Snyder (1987) closed form vs pyproj Proj.get_factors: 1e-9 relative (PROJ differentiates
    # numerically); k = 1 on both standard parallels (definition of a secant cone).
    lat = np.array([15.0, 25.0, 30.0, 35.0, 40.0, 45.0, 55.0])
    lon = np.array([80.0, 90.0, 95.0, 100.0, 70.0, 112.0, 90.0])
    x, y = pyproj.Transformer.from_crs("EPSG:4326", LCC, always_xy=True).transform(lon, lat)
    f = point_factors(pyproj.CRS(LCC), x, y)
    k = snyder_lcc_scale(lat)
    np.testing.assert_allclose(k[[1, 5]], 1.0, rtol=1e-14)
    np.testing.assert_allclose(f.east, k, rtol=1e-9)
    np.testing.assert_allclose(f.north, k, rtol=1e-9)
    np.testing.assert_array_equal(f.shear, 0.0)  # conformal
    pj = pyproj.Proj(LCC).get_factors(lon, lat)
    np.testing.assert_allclose(f.east, pj.parallel_scale, rtol=1e-9)
    np.testing.assert_allclose(f.areal, pj.areal_scale, rtol=1e-9)


def test_conformal_projections_are_recognised():
    # pyproj Proj.get_factors (angular distortion 0 on conformal projections, Snyder 1987): UTM,
    # Lambert conformal conic and polar stereographic take the conformal path; Albers and Lambert
    # azimuthal equal-area, and the spherical web Mercator on the WGS84 ellipsoid, do not.
    for crs in ("EPSG:32633", LCC, "EPSG:3413", "EPSG:3031"):
        assert is_conformal(pyproj.CRS(crs)), crs
    for crs in (AEA, "EPSG:3035", "EPSG:3857"):
        assert not is_conformal(pyproj.CRS(crs)), crs


@pytest.mark.parametrize("crs", ["EPSG:3413", "EPSG:3031", "EPSG:3574"])
def test_factors_on_a_cell_centred_on_the_pole(crs):
    # pyproj Proj.get_factors (PROJ's h, computed from the latitude derivatives, stays exact at a
    # pole): polar stereographic (north and south) and polar Lambert azimuthal equal-area grids
    # with a cell centred on the pole and lattice nodes on it get finite, right factors there and
    # around; a plane in grid coordinates has a finite gradient everywhere.
    x = np.arange(-10, 11) * 1000.0
    y = x[::-1].copy()
    geom = grid_geometry(x, y, crs)
    xx, yy = np.meshgrid(x, y)
    lon, lat = to_lonlat(crs).transform(xx, yy)
    h = pyproj.Proj(crs).get_factors(lon, lat).meridional_scale
    np.testing.assert_allclose(np.broadcast_to(geom.centre_factors.north, h.shape), h, rtol=1e-6)
    np.testing.assert_allclose(np.broadcast_to(geom.centre_factors.east, h.shape), h, rtol=1e-5)
    ge, gn = gradient(0.01 * xx - 0.02 * yy, geom)
    f = geom.centre_factors
    np.testing.assert_allclose(
        ge, 0.01 * f.east - 0.02 * f.shear, rtol=1e-9
    )  # d_east = c f_x + d f_y
    np.testing.assert_allclose(gn, -0.02 * geom.centre_factors.north, rtol=1e-9)
    assert np.isfinite(np.broadcast_to(cell_areas(geom), geom.shape)).all()


def test_equal_area_factors_keep_area_and_carry_the_shear():
    # pyproj Proj.get_factors: the Albers projection is equal-area (areal scale 1) but not conformal.
    lon, lat = np.array([70.0, 90.0, 110.0]), np.array([50.0, 35.0, 20.0])
    x, y = pyproj.Transformer.from_crs("EPSG:4326", AEA, always_xy=True).transform(lon, lat)
    f = point_factors(pyproj.CRS(AEA), x, y)
    np.testing.assert_allclose(f.areal, 1.0, rtol=1e-9)
    assert abs(f.shear[0]) > 1e-3 and f.shear[1] == 0.0  # the central meridian is not sheared


@pytest.mark.parametrize("crs", [LCC, AEA, "EPSG:32633"])
def test_lattice_interpolation_matches_pyproj_at_every_cell(crs):
    # pyproj Proj.get_factors at every cell centre and face vs the interpolated lattice
    # (FACTOR_SPACING; faces: means of the neighbouring cells): 5e-7 relative (value derived:
    # L^2 |k''| / 8, largest near the conic's northern edge, 2.3e-7 measured).
    cell = 1e3
    assert cell < FACTOR_SPACING  # lattice mode
    x, _ = axes(1500e3, cell)
    if crs == "EPSG:32633":
        x = x / 3 + 500e3  # a UTM zone
    for y0 in (2_000e3, 0.0, -1_400e3):  # strips of rows: north, middle, south
        y = y0 - cell * (np.arange(12) + 0.5)
        step = x[1] - x[0]
        geom = grid_geometry(x, y, crs, spacing=(step, -cell))
        exact = point_factors(pyproj.CRS(crs), x[None, :], y[:, None])
        got = geom.centre_factors
        np.testing.assert_allclose(got.east, exact.east, rtol=5e-7)
        np.testing.assert_allclose(got.north, exact.north, rtol=5e-7)
        shape = exact.east.shape  # conformal: shear and offset are zeros of shape (1, 1)
        np.testing.assert_allclose(np.broadcast_to(got.shear, shape), exact.shear, atol=5e-7)
        offset = np.broadcast_to(got.north_offset, shape)
        np.testing.assert_allclose(offset, exact.north_offset, atol=1e-5)  # degrees
        xf = np.concatenate(([x[0] - step / 2], 0.5 * (x[:-1] + x[1:]), [x[-1] + step / 2]))
        exact_f = point_factors(pyproj.CRS(crs), xf[None, :], y[:, None])
        np.testing.assert_allclose(geom.x_face_factors.north, exact_f.north, rtol=5e-7)


# --- distances and areas ------------------------------------------------------------------------


@pytest.mark.parametrize("crs", [LCC, AEA])
def test_true_distances_match_geodesics(crs):
    # pyproj Geod.inv between the two ends of each cell's grid step (centre +- half a step) vs
    # cell_spacings: 1e-6 relative over a 3000 km grid (the straight projected step and the
    # geodesic differ by far less; midpoint rule in the factors, value derived: ~(dx / R)^2 / 24).
    x, y = axes(1500e3, 10e3)
    geom = grid_geometry(x, y, crs)
    east, north = cell_spacings(geom)
    assert east.shape == north.shape == geom.shape
    xx, yy = np.meshgrid(x, y)
    ll = to_lonlat(crs)
    sl = (slice(None, None, 7), slice(None, None, 5))
    for got, dxy in ((east, (5e3, 0.0)), (north, (0.0, 5e3))):
        lon1, lat1 = ll.transform(xx[sl] - dxy[0], yy[sl] - dxy[1])
        lon2, lat2 = ll.transform(xx[sl] + dxy[0], yy[sl] + dxy[1])
        want = WGS84_GEOD.inv(lon1, lat1, lon2, lat2)[2]
        np.testing.assert_allclose(got[sl], want, rtol=1e-6)
    # The projected metres are off by the scale factor: up to 1.3-1.6 % here (why this matters).
    assert np.abs(east / 10e3 - 1).max() > 0.01


@pytest.mark.parametrize("crs", [LCC, AEA])
def test_cell_areas_match_geodesic_areas(crs):
    # pyproj Geod.polygon_area_perimeter on each cell's outline (edges densified to 1 km, so the
    # geodesic edges follow the straight projected ones) vs cell_areas: 2e-6 relative.
    x, y = axes(1500e3, 20e3)
    geom = grid_geometry(x, y, crs)
    areas = np.broadcast_to(cell_areas(geom), geom.shape)
    ll = to_lonlat(crs)
    t = np.linspace(-0.5, 0.5, 21)[:-1]
    ring_x = np.concatenate([t, np.full(20, 0.5), -t, np.full(20, -0.5)]) * 20e3
    ring_y = np.concatenate([np.full(20, -0.5), t, np.full(20, 0.5), -t]) * 20e3
    for r in range(0, y.size, 29):
        for c in range(0, x.size, 23):
            lon, lat = ll.transform(x[c] + ring_x, y[r] + ring_y)
            want = abs(WGS84_GEOD.polygon_area_perimeter(lon, lat)[0])
            assert areas[r, c] == pytest.approx(want, rel=2e-6)


@pytest.mark.parametrize("crs", [LCC, AEA])
def test_divergence_conserves_volume_on_scaled_grids(crs):
    # Invariant (finite-volume form): each face flux enters two cells with opposite signs, so with no
    # flux through the grid's edge the area integral of the divergence vanishes to rounding.
    x, y = axes(300e3, 10e3)
    geom = grid_geometry(x + 400e3, y + 900e3, crs)
    rng = np.random.default_rng(5)
    qe, qn = rng.normal(size=(2, *geom.shape))
    for q in (qe, qn):
        q[0, :] = q[-1, :] = q[:, 0] = q[:, -1] = 0.0
    terms = divergence(qe, qn, geom) * cell_areas(geom)
    assert abs(terms.sum()) <= 1e-12 * np.abs(terms).sum()
    east_len, north_len = face_lengths(geom)
    assert east_len.shape == (y.size, x.size + 1) and north_len.shape == (y.size + 1, x.size)


def geodesic_distance(crs, x, y, centre):
    """Geodesic distance (pyproj Geod.inv, WGS84) from ``centre`` (lon, lat) to each cell, m."""
    lon, lat = to_lonlat(crs).transform(*np.meshgrid(x, y))
    return WGS84_GEOD.inv(np.full(lon.shape, centre[0]), np.full(lat.shape, centre[1]), lon, lat)[2]


@pytest.mark.parametrize("crs", [LCC, AEA])
def test_gradient_of_geodesic_distance_has_unit_length(crs):
    # Analytic: the distance from a point on a surface has a gradient of unit length (the eikonal
    # property of distance functions; value derived) -- on the ground, not in projected metres.
    x, y = axes(1500e3, 10e3)
    geom = grid_geometry(x, y, crs)
    dist = geodesic_distance(crs, x, y, (100.0, 30.0))
    length = np.hypot(*gradient(dist, geom))
    far = dist > 300e3  # central differences of a distance err by ~dx^2 / (6 r^2) (value derived)
    inner = np.zeros(geom.shape, bool)
    inner[1:-1, 1:-1] = True
    err = np.abs(length - 1.0)[far & inner]
    assert np.median(err) < 2e-5 and err.max() < 5e-4


@pytest.mark.parametrize("crs", [LCC, AEA])
def test_azimuth_of_the_distance_gradient_matches_geodesics(crs):
    # pyproj Geod.inv: the gradient of the distance from a point points away from it, along the
    # geodesic (azimuth at the cell = back azimuth + 180). On the Albers grid this needs the offset
    # between grid north's true azimuth and PROJ's meridian convergence (up to ~1 degree here).
    x, y = axes(1500e3, 10e3)
    geom = grid_geometry(x, y, crs)
    centre = (100.0, 30.0)
    lon, lat = to_lonlat(crs).transform(*np.meshgrid(x, y))
    _, back, dist = WGS84_GEOD.inv(
        np.full(lon.shape, centre[0]), np.full(lat.shape, centre[1]), lon, lat
    )
    got = azimuth(*gradient(dist, geom), geom)
    diff = np.abs(np.mod(got - (back + 180.0) + 180.0, 360.0) - 180.0)
    far = dist > 300e3
    far[[0, -1], :] = far[:, [0, -1]] = False
    assert np.median(diff[far]) < 1e-3 and diff[far].max() < 2e-2


# --- end to end: fluxes -------------------------------------------------------------------------

PARAMS = ModelParameters(channel_thickness=15e3, viscosity=1e19)
CENTRE = (92.0, 36.0)  # plateau centre, lon/lat degrees (invented)
PEAK, SIGMA, BASE = 4000.0, 600e3, 500.0  # m, m, m


def plateau(dist):
    """Elevation (m) as a function of geodesic distance (m), and |dH/dd| (dimensionless)."""
    g = np.exp(-(dist**2) / (2 * SIGMA**2))
    return BASE + PEAK * g, PEAK * g * dist / SIGMA**2


def run(values, x, y, crs):
    def da(v):
        return xr.DataArray(v, dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs(crs)

    return crustflow.compute_fields(da(values), parameters=PARAMS, crust_thickness=da(airy(values)))


def truth(slope):
    # Turcotte & Schubert (2002) 6.2 with Bird (1991): |q| = h^3 rho_c g |grad H| / (12 eta), in
    # m2/yr; |grad H| = |dH/dd| since the geodesic distance has a gradient of unit length.
    rho, g = PARAMS.rho_crust, PARAMS.gravity
    return 15e3**3 / (12 * 1e19) * rho * g * slope * SECONDS_PER_YEAR


@pytest.fixture(scope="module")
def conic_and_geographic():
    """The plateau on a 3000 km conic grid (20 km cells) and on a 0.2-degree EPSG:4326 grid
    covering the same region."""
    x, y = axes(1500e3, 20e3)
    dist = geodesic_distance(LCC, x, y, CENTRE)
    h, slope = plateau(dist)
    conic = run(h, x, y, LCC)
    lon, lat = to_lonlat(LCC).transform(*np.meshgrid(x, y))
    glon = np.arange(math.floor(lon.min()) - 1, math.ceil(lon.max()) + 1, 0.2) + 0.1
    glat = np.arange(math.ceil(lat.max()) + 1, math.floor(lat.min()) - 1, -0.2) - 0.1
    gdist = geodesic_distance("EPSG:4326", glon, glat, CENTRE)
    gh, gslope = plateau(gdist)
    # The thin-channel check smooths the geographic grid in one local frame (spans 20 degrees).
    with pytest.warns(UserWarning, match="filtering a geographic grid in a local frame"):
        geographic = run(gh, glon, glat, "EPSG:4326")
    return {
        "conic": (conic, slope, dist, lon, lat),
        "geographic": (geographic, gslope, gdist, glon, glat),
    }


def relative_errors(ds, slope, dist):
    want = truth(slope)
    got = ds.flux_magnitude.values
    ok = (want > 0.1 * want.max()) & np.isfinite(got)
    ok[[0, -1], :] = ok[:, [0, -1]] = False  # edge cells take one-sided differences
    return np.abs(got[ok] / want[ok] - 1.0)


@pytest.mark.parametrize("kind", ["conic", "geographic"])
def test_flux_matches_ellipsoidal_truth(conic_and_geographic, kind):
    # Done-when figure: median flux-magnitude error <= 0.2 % against the analytic ellipsoidal truth
    # on a 3000 km Lambert conformal conic grid (and on the equivalent geographic grid). Before the
    # projection factors the conic grid was off by ~3 % (projected metres are not ground metres).
    ds, slope, dist, *_ = conic_and_geographic[kind]
    err = relative_errors(ds, slope, dist)
    assert err.size > 1000
    assert np.median(err) <= 2e-3
    assert np.percentile(err, 95) <= 5e-3


def test_conic_grid_agrees_with_geographic_grid(conic_and_geographic):
    # Invariant: the same plateau on a projected and a geographic grid of the same region gives the
    # same flux magnitude and thickening rate (geographic result interpolated bilinearly to the
    # conic cell centres; scipy RegularGridInterpolator).
    conic, slope, _, lon, lat = conic_and_geographic["conic"]
    geo, _, _, glon, glat = conic_and_geographic["geographic"]
    pts = np.column_stack([lat.ravel(), lon.ravel()])
    ok = (truth(slope) > 0.1 * truth(slope).max()).ravel()
    for name, tol in (("flux_magnitude", 2e-3), ("thickening_rate", 5e-3)):
        interp = RegularGridInterpolator((glat[::-1], glon), geo[name].values[::-1])
        other = interp(pts)
        mine = conic[name].values.ravel()
        big = ok & (np.abs(mine) > 0.1 * np.nanmax(np.abs(mine)))
        rel = np.abs(mine[big] / other[big] - 1.0)
        assert np.median(rel) <= tol, name


def test_equal_area_grid_matches_truth_and_geographic_grid(conic_and_geographic):
    # Non-conformal projection (Albers equal-area conic): with the shear term the flux stays within
    # 0.2 % (median) of the ellipsoidal truth, and the thickening rate (divergence with the shear
    # flux through the faces between rows) agrees with the geographic grid's (interpolated by
    # scipy RegularGridInterpolator) to 0.5 % (median).
    x, y = axes(1500e3, 20e3)
    dist = geodesic_distance(AEA, x, y, CENTRE)
    h, slope = plateau(dist)
    ds = run(h, x, y, AEA)
    assert np.median(relative_errors(ds, slope, dist)) <= 2e-3
    geo, _, _, glon, glat = conic_and_geographic["geographic"]
    lon, lat = to_lonlat(AEA).transform(*np.meshgrid(x, y))
    interp = RegularGridInterpolator((glat[::-1], glon), geo["thickening_rate"].values[::-1])
    other = interp(np.column_stack([lat.ravel(), lon.ravel()]))
    mine = ds["thickening_rate"].values.ravel()
    big = (truth(slope) > 0.1 * truth(slope).max()).ravel()
    big &= np.abs(mine) > 0.1 * np.nanmax(np.abs(mine))
    assert np.median(np.abs(mine[big] / other[big] - 1.0)) <= 5e-3


def test_ground_steps_match_geodesics():
    # pyproj Geod.inv: a 100 m step in any grid direction on the Albers grid has the ground length
    # and (with the frame's north offset) the true azimuth that ground_steps gives; 1e-6 relative
    # and 1e-3 degree.
    x, y = axes(1500e3, 100e3)
    geom = grid_geometry(x, y, AEA)
    rng = np.random.default_rng(2)
    px, py = rng.uniform(-1.4e6, 1.4e6, size=(2, 50))
    theta = rng.uniform(0, 2 * np.pi, 50)
    te, tn = np.sin(theta), np.cos(theta)
    scale, ge, gn = ground_steps(geom, px, py, te, tn)
    ll = to_lonlat(AEA)
    lon1, lat1 = ll.transform(px - 50 * te, py - 50 * tn)
    lon2, lat2 = ll.transform(px + 50 * te, py + 50 * tn)
    az, _, length = WGS84_GEOD.inv(lon1, lat1, lon2, lat2)
    np.testing.assert_allclose(scale * 100.0, length, rtol=1e-6)
    f = point_factors(pyproj.CRS(AEA), px, py)
    lon, lat = ll.transform(px, py)
    gamma = pyproj.Proj(AEA).get_factors(lon, lat).meridian_convergence
    want = np.degrees(np.arctan2(ge, gn)) + gamma + f.north_offset
    diff = np.mod(want - az + 180.0, 360.0) - 180.0
    assert np.abs(diff).max() < 1e-3


def test_factors_need_the_crs():
    geom = GridGeometry("projected", np.arange(3.0), np.arange(2.0))
    assert not geom.scaled
    with pytest.raises(CrustflowInputError, match="projection factors need a projected grid"):
        geom.centre_factors  # noqa: B018


# --- strips and filters ------------------------------------------------------------------------


@pytest.mark.parametrize("crs", [LCC, AEA])
def test_strips_equal_whole_grid_with_lattice_factors(tmp_path, crs):
    # Invariant of the halo design (as tests/engine/test_strips.py): a strip-wise run equals the
    # whole grid bit for bit, here with 2 km cells (factors interpolated from the lattice) on a
    # conformal and a sheared projection.
    ny, nx, cell = 23, 19, 2e3
    yy, xx = np.meshgrid(
        (np.arange(ny) - ny / 2) * cell, (np.arange(nx) - nx / 2) * cell, indexing="ij"
    )
    topo = 200.0 + 2500.0 * np.exp(-(xx**2 + yy**2) / (2 * 12e3**2))
    topo[4, 6] = np.nan
    write_grid(tmp_path / "topo.tif", topo, crs=crs, west=800e3, north=1200e3, cell=cell)
    crust = airy(np.nan_to_num(topo, nan=200.0))
    write_grid(tmp_path / "crust.tif", crust, crs=crs, west=800e3, north=1200e3, cell=cell)
    (tmp_path / "scenario.toml").write_text(SCENARIO)
    out = tmp_path / "out"
    args = ["run", str(tmp_path / "scenario.toml"), "--out", str(out), "--quiet"]
    assert main([*args, "--strip-rows", "3"]) == 0
    whole = crustflow.solve(crustflow.load_scenario(tmp_path / "scenario.toml"))
    with xr.open_dataset(out / "fields.nc") as ds:
        for name in VARIABLES:
            want = whole[name].values.astype("float32")
            np.testing.assert_array_equal(ds[name].values.astype("float32"), want, err_msg=name)


def test_filter_frame_on_a_conic_grid():
    # pyproj Proj.get_factors: the filters' frame takes the ground spacing at the grid's centre,
    # and its error is the scale factor's variation over the grid (about 3 % over 3000 km).
    x, y = axes(1500e3, 20e3)
    geom = grid_geometry(x, y, LCC)
    frame = flexure.local_frame(geom)
    lon, lat = to_lonlat(LCC).transform(0.0, 0.0)
    k0 = pyproj.Proj(LCC).get_factors(lon, lat).parallel_scale
    assert frame.dx == pytest.approx(20e3 / k0, rel=1e-9)
    assert frame.dy == pytest.approx(20e3 / k0, rel=1e-9)
    lons, lats = to_lonlat(LCC).transform(*np.meshgrid(x, y))
    k = pyproj.Proj(LCC).get_factors(lons, lats).parallel_scale
    assert frame.relative_error == pytest.approx(np.abs(k0 / k - 1).max(), rel=0.05)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        flexure.gaussian_smoothing(np.ones(geom.shape), geom, sigma=50e3)


def test_filter_frame_warns_on_a_continental_grid():
    # Definition (flexure.LOCAL_FRAME_WARNING): across 8000 km the scale factor changes by > 5 %.
    x, y = axes(4000e3, 100e3)
    geom = grid_geometry(x, y, LCC)
    assert flexure.local_frame(geom).relative_error > 0.05
    with pytest.warns(UserWarning, match=r"the projection's scale changes by up to \d+\.\d %"):
        flexure.gaussian_smoothing(np.ones(geom.shape), geom, sigma=200e3)
