"""Tests of crustflow.geometry.grid: ellipsoid geometry, gradients, finite-volume divergence, azimuths.

Reference values name their source beside the check. pyproj.Geod (GeographicLib geodesics) is the
independent reference library for distances, areas and azimuths.
"""

from __future__ import annotations

import numpy as np
import pyproj
import pytest

from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import (
    WGS84,
    Ellipsoid,
    GridGeometry,
    azimuth,
    cell_areas,
    cell_spacings,
    divergence,
    face_lengths,
    gradient,
    grid_geometry,
    meridian_convergence,
)

#: WGS84 constants, m and dimensionless. NIMA TR8350.2 (3rd ed., 2000).
A_WGS84 = 6378137.0
INVF_WGS84 = 298.257223563
#: WGS84 semi-minor axis, m. NIMA TR8350.2 (3rd ed., 2000), derived constants (from memory).
B_WGS84 = 6356752.3142
#: Area of the whole WGS84 ellipsoid, km^2. NIMA TR8350.2 (3rd ed., 2000).
AREA_WGS84_KM2 = 510_065_621.7

GEOD = pyproj.Geod(a=A_WGS84, f=1.0 / INVF_WGS84)
KM2 = 1e6


def radii(phi_deg):
    """N and M of WGS84 at latitude phi (deg), written out independently of crustflow.geometry.grid."""
    f = 1.0 / INVF_WGS84
    e2 = f * (2 - f)
    w = np.sqrt(1 - e2 * np.sin(np.radians(phi_deg)) ** 2)
    return A_WGS84 / w, A_WGS84 * (1 - e2) / w**3


def geographic(x, y):
    return grid_geometry(np.asarray(x, float), np.asarray(y, float), "EPSG:4326")


def global_grid(step=1.0):
    """Global grid, rows north to south."""
    lon = np.arange(-180 + step / 2, 180, step)
    lat = np.arange(90 - step / 2, -90, -step)
    return geographic(lon, lat)


# --- ellipsoid and areas ---------------------------------------------------------------------


def test_ellipsoid_from_crs_is_wgs84():
    ell = Ellipsoid.from_crs("EPSG:4326")
    # NIMA TR8350.2: a = 6378137 m, 1/f = 298.257223563
    assert ell.semi_major == A_WGS84 == WGS84.semi_major
    assert ell.inverse_flattening == INVF_WGS84 == WGS84.inverse_flattening
    assert WGS84.semi_minor == pytest.approx(B_WGS84, abs=1e-4)
    assert ell.e2 == pytest.approx(0.00669437999014, rel=1e-12)  # NIMA TR8350.2 (from memory)
    assert Ellipsoid.from_crs(pyproj.CRS("EPSG:32633")).semi_major == A_WGS84
    # a CRS on a sphere keeps its sphere (pyproj reports 1/f = 0 for it)
    assert Ellipsoid.from_crs("EPSG:4035").flattening == 0.0
    # a compound CRS takes its kind and ellipsoid from the horizontal part
    geom = grid_geometry([0.0, 1.0], [0.0, 1.0], "EPSG:32633+5773")
    assert geom.kind == "projected" and geom.ellipsoid.semi_major == A_WGS84


@pytest.mark.parametrize(("lat0", "km2"), [(0.0, 12_308.46), (60.0, 6_123.14)])
def test_one_degree_cell_area_table(lat0, km2):
    # SCIENCE.md table: WGS84, exact authalic formula (Snyder 1987, USGS PP 1395)
    geom = geographic([0.5, 1.5], [lat0 + 0.5, lat0 + 1.5])
    assert cell_areas(geom).shape == (2, 1)
    assert cell_areas(geom)[0, 0] / KM2 == pytest.approx(km2, abs=0.01)


@pytest.mark.parametrize("lat0", [-75.0, 0.0, 33.0, 60.0, 88.0])
def test_cell_area_matches_geod_with_densified_parallels(lat0):
    # pyproj.Geod polygon area; parallels densified (meridians are geodesics already)
    geom = geographic([10.5, 11.5], [lat0 + 0.5, lat0 + 1.5])
    n = 1000
    lons = np.concatenate([np.linspace(10, 11, n), np.linspace(11, 10, n)])
    lats = np.concatenate([np.full(n, lat0), np.full(n, lat0 + 1)])
    ref, _ = GEOD.polygon_area_perimeter(lons, lats)
    assert cell_areas(geom)[0, 0] == pytest.approx(abs(ref), rel=1e-6)


def test_global_grid_area_sums_to_ellipsoid_area():
    geom = global_grid()
    total = cell_areas(geom).sum() * geom.shape[1]
    assert total / KM2 == pytest.approx(AREA_WGS84_KM2, abs=0.1)  # NIMA TR8350.2


def test_projected_areas_and_lengths():
    geom = GridGeometry("projected", np.arange(5) * 250.0, 1e6 - np.arange(4) * 500.0)
    assert cell_areas(geom).shape == (1, 1)
    assert cell_areas(geom)[0, 0] == 125_000.0
    ew, ns = face_lengths(geom)
    assert ew.shape == (4, 1) and ns.shape == (5, 1)
    assert np.all(ew == 500.0) and np.all(ns == 250.0)


# --- spacings and face lengths vs pyproj.Geod ----------------------------------------------------


def test_face_lengths_match_geod():
    lat = np.arange(55.5, 30, -1.0)
    geom = geographic(np.arange(20.5, 25), lat)
    ew, ns = face_lengths(geom)
    bounds = np.concatenate([lat + 0.5, [lat[-1] - 0.5]])
    # meridian segments between bounding parallels: geodesics, pyproj.Geod.inv is exact
    _, _, dist = GEOD.inv(np.full(lat.size, 20.0), bounds[:-1], np.full(lat.size, 20.0), bounds[1:])
    np.testing.assert_allclose(ew[:, 0], dist, rtol=1e-9)
    # parallel arcs: sum of 1000 short geodesics along the parallel (chord error ~1e-13 relative)
    lon = np.linspace(20.0, 21.0, 1001)
    for phi, length in zip(bounds, ns[:, 0], strict=True):
        _, _, d = GEOD.inv(lon[:-1], np.full(1000, phi), lon[1:], np.full(1000, phi))
        assert length == pytest.approx(d.sum(), rel=1e-6)


def test_cell_spacings_match_geod():
    step = 0.01  # ~1 km cells; geodesic vs parallel chord differs by < 1e-9 relative
    rows = np.arange(8) * step
    for lat0 in (0.0, 45.0, -70.0):
        geom = geographic([5.0, 5.0 + step], lat0 + rows)
        east, north = cell_spacings(geom)
        y = geom.y
        _, _, de = GEOD.inv(np.full(y.size, 5.0), y, np.full(y.size, 5.0 + step), y)
        _, _, dn = GEOD.inv(np.full(y.size, 5.0), y - step / 2, np.full(y.size, 5.0), y + step / 2)
        np.testing.assert_allclose(east[:, 0], de, rtol=1e-8)
        np.testing.assert_allclose(north[:, 0], dn, rtol=1e-8)


# --- gradient --------------------------------------------------------------------------------


def plateau(s, s1, s2, width):
    """Smooth box: tanh ramps up at s1 and down at s2; returns value and derivative."""
    a, b = np.tanh((s - s1) / width), np.tanh((s - s2) / width)
    return 0.5 * (a - b), 0.5 * ((1 - a**2) - (1 - b**2)) / width


def test_gradient_projected_plateau():
    x = np.arange(0.0, 1_000_001.0, 2000.0)
    y = np.arange(800_000.0, -1.0, -2000.0)  # north-to-south rows
    geom = grid_geometry(x, y, "EPSG:32633")
    height = 4000.0
    px, dpx = plateau(x, 300e3, 700e3, 50e3)
    py, dpy = plateau(y, 200e3, 600e3, 50e3)
    f = height * py[:, None] * px[None, :]
    ge, gn = gradient(f, geom)
    # Per ground metre: the derivative per projected metre times the point scale factor k of the
    # (conformal) UTM projection, from pyproj Proj.get_factors (up to 1.0027 at this grid's edges).
    lon, lat = pyproj.Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True).transform(
        *np.meshgrid(x, y)
    )
    k = pyproj.Proj("EPSG:32633").get_factors(lon, lat).parallel_scale
    want_e = k * height * py[:, None] * dpx[None, :]
    want_n = k * height * dpy[:, None] * px[None, :]
    peak = max(np.abs(want_e).max(), np.abs(want_n).max())
    assert np.abs(ge - want_e)[1:-1, 1:-1].max() < 2e-3 * peak
    assert np.abs(gn - want_n)[1:-1, 1:-1].max() < 2e-3 * peak


@pytest.mark.parametrize("y_step", [-500.0, 500.0])
def test_gradient_projected_linear_exact_everywhere(y_step):
    x = 400_000.0 + np.arange(7) * 1000.0
    y = 5_000_000.0 + np.arange(6) * y_step
    geom = GridGeometry("projected", x, y)
    f = 100.0 + 2e-3 * (x[None, :] - x[0]) - 5e-4 * (y[:, None] - y[0])
    ge, gn = gradient(f, geom)
    np.testing.assert_allclose(ge, 2e-3, rtol=1e-9)
    np.testing.assert_allclose(gn, -5e-4, rtol=1e-9)


def test_gradient_geographic_analytic():
    lon = np.arange(0.0, 30.01, 0.25)
    lat = np.arange(60.0, 19.99, -0.25)
    geom = geographic(lon, lat)
    lam, phi = np.radians(lon)[None, :], np.radians(lat)[:, None]
    f = np.sin(phi) + np.cos(phi) * np.sin(lam)  # dimensionless test field
    ge, gn = gradient(f, geom)
    n_rad, m_rad = radii(lat[:, None])
    # analytic ellipsoidal gradient (value derived): (1/(N cos phi)) df/dlam, (1/M) df/dphi
    want_e = np.cos(lam) / n_rad + 0 * phi
    want_n = (np.cos(phi) - np.sin(phi) * np.sin(lam)) / m_rad
    for got, want in ((ge, want_e), (gn, want_n)):
        err = np.abs(got - want)[1:-1, 1:-1].max()
        assert err < 2e-3 * np.abs(want).max()


def test_gradient_nan_hole_stays_local():
    x = np.arange(12) * 100.0
    y = np.arange(10) * -100.0
    geom = GridGeometry("projected", x, y)
    f = 3.0 + 0.01 * x[None, :] + 0.02 * y[:, None]
    f[3:5, 4:6] = np.nan  # 2 x 2 hole: its neighbours switch to one-sided differences
    f[7, 7] = f[7, 9] = np.nan  # (7, 8) has no east/west neighbour left
    ge, gn = gradient(f, geom)
    hole = np.isnan(f)
    no_ew = hole.copy()
    no_ew[7, 8] = True
    np.testing.assert_array_equal(np.isnan(gn), hole)
    np.testing.assert_array_equal(np.isnan(ge), no_ew)
    np.testing.assert_allclose(ge[~no_ew], 0.01, rtol=1e-12)
    np.testing.assert_allclose(gn[~hole], 0.02, rtol=1e-12)


# --- divergence ------------------------------------------------------------------------------


def test_uniform_northward_flux_converging_meridians():
    geom = global_grid()
    q = 1.0  # m^2/s
    qn = np.full(geom.shape, q)
    div = divergence(np.zeros(geom.shape), qn, geom)
    lat = geom.y[:, None]
    n_rad, _ = radii(lat)
    want = -np.tan(np.radians(lat)) * q / n_rad  # SCIENCE.md / ECOSYSTEM.md: -tan(phi) q / N
    # required: 1e-3 away from the poles; measured ~8e-7 on every row, pole rows included
    away = np.abs(geom.y) < 80
    np.testing.assert_allclose(div[away], np.broadcast_to(want, geom.shape)[away], rtol=1e-3)
    np.testing.assert_allclose(div, np.broadcast_to(want, geom.shape), rtol=1e-5)
    # the pole faces have zero length, cell areas stay positive
    _, ns = face_lengths(geom)
    assert ns[0, 0] == 0.0 and ns[-1, 0] == 0.0
    assert np.all(cell_areas(geom) > 0)
    # uniform eastward flux: every row's east and west faces carry the same flux
    assert np.abs(divergence(np.ones(geom.shape), np.zeros(geom.shape), geom)).max() < 1e-20


def test_row_centred_on_pole():
    geom = geographic([0.5, 1.5, 2.5], [90.0, 89.0, 88.0])
    ge, gn = gradient(np.ones(geom.shape), geom)
    assert np.all(np.isnan(ge[0])) and np.all(ge[1:] == 0.0)  # east is undefined at a pole
    assert np.all(gn == 0.0)
    assert np.all(cell_areas(geom) > 0)  # the pole row spans 89.5-90 N only
    assert np.all(np.isfinite(divergence(np.ones(geom.shape), np.ones(geom.shape), geom)))


def test_divergence_projected_analytic():
    x = np.arange(0.0, 600_001.0, 5000.0)
    y = np.arange(400_000.0, -1.0, -5000.0)
    geom = GridGeometry("projected", x, y)
    kx, ky = 2 * np.pi / 500e3, 2 * np.pi / 300e3
    xx, yy = np.meshgrid(x, y)
    qe = np.sin(kx * xx) * np.cos(ky * yy)
    qn = np.cos(kx * xx) * np.sin(0.5 * ky * yy)
    want = kx * np.cos(kx * xx) * np.cos(ky * yy) + 0.5 * ky * np.cos(kx * xx) * np.cos(
        0.5 * ky * yy
    )
    div = divergence(qe, qn, geom)
    assert np.abs(div - want)[1:-1, 1:-1].max() < 2e-3 * np.abs(want).max()
    # a linear field is exact wherever both faces lie between cells
    lin = divergence(3e-6 * xx, -2e-6 * yy, geom)
    np.testing.assert_allclose(lin[1:-1, 1:-1], 1e-6, rtol=1e-9)


def boundary_flux(qe, qn, geom, rows, cols, ew_len, ns_len):
    """Net outward flux through a rectangle's boundary, face by face (x ascending, y descending).

    Returns the net flux and the sum of the absolute boundary terms.
    """

    def face(q, a, b):
        inside = [v for v in (a, b) if v is not None]
        return np.mean([q[i] for i in inside])

    nrow, ncol = geom.shape
    r0, r1 = rows
    c0, c1 = cols
    terms = []
    for j in range(r0, r1):
        east = face(qe, (j, c1 - 1), (j, c1) if c1 < ncol else None)
        west = face(qe, (j, c0), (j, c0 - 1) if c0 > 0 else None)
        terms += [east * ew_len[j], -west * ew_len[j]]
    for i in range(c0, c1):
        north = face(qn, (r0, i), (r0 - 1, i) if r0 > 0 else None)  # row r0 - 1 lies north
        south = face(qn, (r1 - 1, i), (r1, i) if r1 < nrow else None)
        terms += [north * ns_len[r0], -south * ns_len[r1]]
    terms = np.array(terms)
    return terms.sum(), np.abs(terms).sum()


def geographic_lengths(geom):
    """Face lengths computed here: meridians by pyproj.Geod.inv, parallels by N cos(phi) dlam."""
    lat = geom.y
    bounds = np.concatenate([lat + geom.dy * -0.5, [lat[-1] + geom.dy * 0.5]])
    lon0 = np.zeros(lat.size)
    _, _, ew = GEOD.inv(lon0, bounds[:-1], lon0, bounds[1:])
    n_rad, _ = radii(bounds)
    ns = n_rad * np.cos(np.radians(bounds)) * np.radians(abs(geom.dx))
    return ew, ns


@pytest.mark.parametrize("kind", ["geographic", "projected"])
@pytest.mark.parametrize(
    ("rows", "cols"), [((3, 30), (2, 15)), ((0, 40), (0, 20)), ((5, 6), (7, 8))]
)
def test_divergence_conserves_volume(kind, rows, cols):
    rng = np.random.default_rng(42)
    if kind == "geographic":
        geom = geographic(np.arange(10.25, 20, 0.5), np.arange(49.75, 30, -0.5))
        ew_len, ns_len = geographic_lengths(geom)
    else:
        geom = GridGeometry("projected", np.arange(20) * 3000.0, 2e6 - np.arange(40) * 2000.0)
        ew_len, ns_len = np.full(40, 2000.0), np.full(41, 3000.0)
    qe = rng.normal(size=geom.shape)
    qn = rng.normal(size=geom.shape)
    div = divergence(qe, qn, geom)
    area = np.broadcast_to(cell_areas(geom), geom.shape)
    inside = (slice(*rows), slice(*cols))
    total = (div * area)[inside].sum()
    net, scale = boundary_flux(qe, qn, geom, rows, cols, ew_len, ns_len)
    assert abs(total - net) <= 1e-12 * scale


@pytest.mark.parametrize(
    "geom", [global_grid(4.0), GridGeometry("projected", np.arange(30.0), -np.arange(25.0))]
)
def test_divergence_integral_vanishes_without_boundary_flux(geom):
    rng = np.random.default_rng(7)
    qe, qn = rng.normal(size=(2, *geom.shape))
    for q in (qe, qn):
        q[0, :] = q[-1, :] = q[:, 0] = q[:, -1] = 0.0
    terms = divergence(qe, qn, geom) * cell_areas(geom)
    assert abs(terms.sum()) <= 1e-12 * np.abs(terms).sum()


def test_divergence_nan_stays_local():
    geom = geographic(np.arange(0.5, 10), np.arange(40.5, 30, -1.0))
    rng = np.random.default_rng(3)
    qe, qn = rng.normal(size=(2, *geom.shape))
    qe[4, 4] = np.nan
    qn[2, 7] = np.nan
    div = divergence(qe, qn, geom)
    expected = np.zeros(geom.shape, bool)
    expected[4, 4] = expected[2, 7] = True
    np.testing.assert_array_equal(np.isnan(div), expected)


# --- axis order ------------------------------------------------------------------------------


@pytest.mark.parametrize("kind", ["geographic", "projected"])
def test_south_to_north_rows_give_flipped_results(kind):
    rng = np.random.default_rng(11)
    if kind == "geographic":
        x, y = np.arange(100.25, 105, 0.5), np.arange(-10.25, -20, -0.5)
        make = geographic
    else:
        x, y = np.arange(12) * 1000.0, 7e6 - np.arange(20) * 1000.0

        def make(xx, yy):
            return grid_geometry(xx, yy, "EPSG:32633")

    f = rng.normal(size=(y.size, x.size))
    f[5, 5] = np.nan
    qe, qn = rng.normal(size=(2, y.size, x.size))
    down, up = make(x, y), make(x, y[::-1])
    kw = {"rtol": 1e-12, "atol": 0.0, "equal_nan": True}
    for a, b in zip(gradient(f, down), gradient(f[::-1], up), strict=True):
        np.testing.assert_allclose(a, b[::-1], **kw)
    np.testing.assert_allclose(
        divergence(qe, qn, down), divergence(qe[::-1], qn[::-1], up)[::-1], **kw
    )
    np.testing.assert_allclose(cell_areas(down), cell_areas(up)[::-1], **kw)
    # east-west mirror as well: reversing x keeps every east/north component
    left = make(x[::-1], y)
    np.testing.assert_allclose(gradient(f, down)[0], gradient(f[:, ::-1], left)[0][:, ::-1], **kw)


# --- meridian convergence and azimuth --------------------------------------------------------


def test_azimuth_on_utm_matches_geod():
    crs = pyproj.CRS("EPSG:32633")  # UTM 33N, central meridian 15 E
    x = np.arange(200_000.0, 800_001.0, 100_000.0)
    y = np.arange(7_000_000.0, 6_499_999.0, -100_000.0)
    geom = grid_geometry(x, y, crs)
    gamma = meridian_convergence(geom)
    assert gamma.shape == geom.shape
    assert np.all(gamma[:, 0] < 0) and np.all(gamma[:, -1] > 0)  # sign convention, see maps.py
    assert np.abs(gamma[:, 3]).max() < 1e-9  # central meridian
    rng = np.random.default_rng(5)
    east, north = rng.normal(size=(2, *geom.shape))
    east[0, 0], north[0, 0] = 0.0, 1.0  # grid north itself
    az = azimuth(east, north, geom)
    # reference: pyproj.Geod.inv from each cell centre to a point 10 m along the grid vector
    to_lonlat = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    xx, yy = np.meshgrid(x, y)
    step = 10.0 / np.hypot(east, north)
    lon1, lat1 = to_lonlat.transform(xx, yy)
    lon2, lat2 = to_lonlat.transform(xx + east * step, yy + north * step)
    ref, _, _ = GEOD.inv(lon1, lat1, lon2, lat2)
    diff = (az - ref + 180.0) % 360.0 - 180.0
    assert np.abs(diff).max() < 1e-4
    assert np.all((az >= 0) & (az < 360))
    assert az[0, 0] == pytest.approx(gamma[0, 0] % 360.0)


def test_azimuth_geographic_and_special_values():
    geom = geographic([0.5, 1.5], [45.5, 44.5])
    east = np.array([[0.0, 1.0], [0.0, np.nan]])
    north = np.array([[1.0, 0.0], [0.0, np.nan]])
    np.testing.assert_array_equal(azimuth(east, north, geom), [[0.0, 90.0], [0.0, np.nan]])
    np.testing.assert_array_equal(azimuth(-east, -north, geom)[0], [180.0, 270.0])
    tiny = azimuth(np.array([[-1e-300, 1], [1, 1]]), np.ones((2, 2)), geom)
    assert np.all(tiny < 360.0)
    assert np.all(meridian_convergence(geom) == 0.0)


# --- bad input -------------------------------------------------------------------------------


def test_bad_inputs_raise_with_fix_it_messages():
    with pytest.raises(CrustflowInputError, match="x spacing is irregular"):
        grid_geometry([0.0, 1.0, 2.5], [0.0, 1.0], "EPSG:4326")
    with pytest.raises(CrustflowInputError, match="y has 1 cell.*at least 2 cells"):
        grid_geometry([0.0, 1.0, 2.0], [5.0], "EPSG:4326")
    with pytest.raises(CrustflowInputError, match="US survey foot.*metres"):
        grid_geometry([0.0, 100.0], [0.0, 100.0], "EPSG:2230")
    with pytest.raises(CrustflowInputError, match="beyond \\+-90"):
        grid_geometry([0.0, 1.0], [89.0, 91.0], "EPSG:4326")
    with pytest.raises(CrustflowInputError, match="neither geographic nor projected"):
        grid_geometry([0.0, 1.0], [0.0, 1.0], "EPSG:4978")
    with pytest.raises(CrustflowInputError, match="needs the grid's crs"):
        grid_geometry([0.0, 1.0], [0.0, 1.0], None)
    with pytest.raises(CrustflowInputError, match="grid kind 'polar' is not one of"):
        GridGeometry("polar", np.arange(3.0), np.arange(3.0))
    geom = GridGeometry("projected", np.arange(3.0), np.arange(2.0))
    with pytest.raises(CrustflowInputError, match=r"shape \(3, 2\) but the grid is \(2, 3\)"):
        gradient(np.zeros((3, 2)), geom)
    with pytest.raises(CrustflowInputError, match="needs the projected grid's crs"):
        meridian_convergence(geom)


def test_interpolated_convergence_matches_pyproj_at_every_cell():
    # Reference library: pyproj get_factors at every cell of a 250 m UTM grid at the zone's western
    # edge near 63 N; the interpolated map (crustflow.geometry.grid.CONVERGENCE_SPACING) agrees to 1e-6 degree.
    x = 160e3 + 250.0 * np.arange(401)
    y = 7000e3 - 250.0 * np.arange(41)
    geom = grid_geometry(x, y, "EPSG:32633")
    to_lonlat = pyproj.Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True)
    lon, lat = to_lonlat.transform(*np.meshgrid(x, y))
    exact = pyproj.Proj("EPSG:32633").get_factors(lon, lat).meridian_convergence
    assert np.abs(meridian_convergence(geom) - exact).max() < 1e-6
