"""The pipeline on synthetic grids: analytic plateaus, conservation, grid orientation, alignment."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from conftest import airy, bump, write_grid

import crustflow
from crustflow import ModelParameters
from crustflow.constants import SECONDS_PER_YEAR
from crustflow.geometry.grid import WGS84, cell_areas, face_lengths, grid_geometry

G, RHO = 9.81, 2800.0
PARAMS = ModelParameters(channel_thickness=15e3, viscosity=1e19)


def grid(values, x, y, crs):
    da = xr.DataArray(values, dims=("y", "x"), coords={"y": y, "x": x})
    return da.rio.write_crs(crs)


def gaussian_projected(n=161, cell=2e3):
    x = 400e3 + cell * np.arange(n)
    y = 5300e3 - cell * np.arange(n)
    xx, yy = np.meshgrid(x, y)
    xc, yc, s = x.mean(), y.mean(), 60e3
    h = 3000.0 * np.exp(-((xx - xc) ** 2 + (yy - yc) ** 2) / (2 * s**2))
    dhdx = -h * (xx - xc) / s**2
    dhdy = -h * (yy - yc) / s**2
    lap = h * (((xx - xc) ** 2 + (yy - yc) ** 2) / s**4 - 2 / s**2)
    return x, y, h, dhdx, dhdy, lap


def test_analytic_plateau_projected():
    # Analytic: G = rho_c g grad(H) (Bird 1991), q = -h^3 G/(12 eta), -div q = h^3 rho g lap(H)/(12 eta)
    # (Turcotte & Schubert 2002, 6.2). Interior reproduced to 0.2 %.
    x, y, h, dhdx, dhdy, lap = gaussian_projected()
    ds = crustflow.compute_fields(
        grid(h, x, y, "EPSG:32633"),
        parameters=PARAMS,
        crust_thickness=grid(airy(h), x, y, "EPSG:32633"),
    )
    k = (15e3) ** 3 / (12 * 1e19) * SECONDS_PER_YEAR  # m^2/yr per Pa/m
    inner = (slice(5, -5), slice(5, -5))
    q_e = -k * RHO * G * dhdx
    big = np.abs(q_e[inner]) > 0.05 * np.abs(q_e).max()
    rel = np.abs(ds.flux_east.values[inner] - q_e[inner])[big] / np.abs(q_e[inner])[big]
    assert rel.max() < 2e-3
    np.testing.assert_allclose(
        ds.drive_north.values[inner],
        (RHO * G * dhdy)[inner],
        atol=2e-3 * np.abs(RHO * G * dhdy).max(),
    )
    thick = k * RHO * G * lap * 1e3  # mm/yr
    err = np.abs(ds.thickening_rate.values[inner] - thick[inner]).max()
    assert err < 2e-3 * np.abs(thick).max()


def test_analytic_plateau_geographic():
    # Ellipsoidal gradient (SCIENCE.md): (1/(N cos phi)) dH/dlambda, (1/M) dH/dphi on WGS84
    # (NIMA TR8350.2); interior to 0.2 %.
    lon = np.arange(20.0, 30.0, 0.05) + 0.025
    lat = np.arange(50.0, 40.0, -0.05) - 0.025
    lo, la = np.meshgrid(lon, lat)
    s = 1.2
    h = 3000.0 * np.exp(-((lo - 25) ** 2 + (la - 45) ** 2) / (2 * s**2))
    phi = np.deg2rad(la)
    e2 = WGS84.e2
    w = np.sqrt(1 - e2 * np.sin(phi) ** 2)
    n_rad, m_rad = WGS84.semi_major / w, WGS84.semi_major * (1 - e2) / w**3
    dh_dlam = -h * (lo - 25) / s**2 * 180 / np.pi
    dh_dphi = -h * (la - 45) / s**2 * 180 / np.pi
    ge = RHO * G * dh_dlam / (n_rad * np.cos(phi))
    gn = RHO * G * dh_dphi / m_rad
    ds = crustflow.compute_fields(
        grid(h, lon, lat, "EPSG:4326"),
        parameters=PARAMS,
        crust_thickness=grid(airy(h), lon, lat, "EPSG:4326"),
    )
    inner = (slice(5, -5), slice(5, -5))
    for got, want in ((ds.drive_east.values, ge), (ds.drive_north.values, gn)):
        big = np.abs(want[inner]) > 0.05 * np.abs(want).max()
        rel = np.abs(got[inner] - want[inner])[big] / np.abs(want[inner])[big]
        assert rel.max() < 2e-3


@pytest.mark.parametrize("crs", ["EPSG:32633", "EPSG:4326"])
def test_volume_is_conserved(crs):
    # Invariant (finite-volume form): with no flux across the grid's edge, the area integral of the
    # thickening rate is zero to rounding, 1e-9 relative to the integral of its magnitude.
    h = bump(shape=(60, 70), cell=5e3, radius=120e3)
    if crs == "EPSG:4326":
        x = 10.0 + 0.05 * np.arange(70)
        y = 46.0 - 0.05 * np.arange(60)
        h = bump(shape=(60, 70), cell=1.0, radius=25.0)
    else:
        x = 300e3 + 5e3 * np.arange(70)
        y = 5200e3 - 5e3 * np.arange(60)
    params = ModelParameters(channel_thickness=15e3, viscosity=1e19, wall_east=1e-10)
    ds = crustflow.compute_fields(
        grid(h, x, y, crs), parameters=params, crust_thickness=grid(airy(h), x, y, crs)
    )
    # The wall adds a uniform flux U h / 2 (in the local frame): the area integral of the thickening
    # rate equals the net inflow through the grid's edge faces (each edge face carries its cell's
    # own flux). Geographic grids: the west and east faces are equally long, so that is zero; on
    # the UTM grid they differ by the projection's scale factor.
    geom = grid_geometry(x, y, crs)
    area = cell_areas(geom)
    rate = ds.thickening_rate.values * 1e-3 * area  # m3/yr
    east_len = np.broadcast_to(face_lengths(geom)[0], (y.size, x.size + 1))
    qe = ds.flux_east.values  # m2/yr
    inflow = np.sum(qe[:, 0] * east_len[:, 0] - qe[:, -1] * east_len[:, -1])
    assert np.isfinite(rate).all()
    assert abs(rate.sum() - inflow) < 1e-9 * np.abs(rate).sum()
    if crs == "EPSG:4326":
        assert abs(inflow) < 1e-9 * np.abs(rate).sum()


def test_south_to_north_input_equals_north_to_south(tmp_path):
    topo = bump()
    write_grid(tmp_path / "t_ns.tif", topo)
    write_grid(tmp_path / "t_sn.tif", topo, south_up=True)
    write_grid(tmp_path / "c.tif", airy(topo))
    base = {"channel": {"thickness": "15 km", "viscosity": "1e19 Pa*s"}}
    results = []
    for name in ("t_ns.tif", "t_sn.tif"):
        raw = dict(base, grids={"topography": name, "crust_thickness": "c.tif"})
        results.append(crustflow.solve(crustflow.scenario_from_dict(raw, base_dir=tmp_path)))
    a, b = results
    assert (a.y.values == b.y.values).all() and a.rio.transform() == b.rio.transform()
    for name in ("flux_east", "flux_north", "thickening_rate", "flux_azimuth"):
        np.testing.assert_array_equal(a[name].values, b[name].values)


def test_misaligned_crust_grid_is_resampled(tmp_path):
    # A coarser, shifted crust grid in another CRS: resampled bilinearly; the maps agree with the
    # aligned run to the interpolation error, and the manifest records the method.
    topo = bump(shape=(40, 50), cell=5e3, radius=90e3)
    write_grid(tmp_path / "t.tif", topo)
    write_grid(tmp_path / "c.tif", airy(topo))
    from pyproj import Transformer

    to_geo = Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True)
    to_utm = Transformer.from_crs("EPSG:4326", "EPSG:32633", always_xy=True)
    lon0, lat1 = to_geo.transform(290e3, 5210e3)
    lon1, lat0 = to_geo.transform(560e3, 4990e3)
    step = 0.02
    lons = np.arange(lon0, lon1, step) + step / 2
    lats = np.arange(lat1, lat0, -step) - step / 2
    px, py = to_utm.transform(*np.meshgrid(lons, lats))
    # Same analytic thickness, evaluated at the geographic cells (cell = 5 km bump coordinates).
    xs = 300e3 + 5e3 * np.arange(50) + 2.5e3
    ys = 5200e3 - 5e3 * np.arange(40) - 2.5e3
    from scipy.interpolate import RegularGridInterpolator

    interp = RegularGridInterpolator(
        (ys[::-1], xs), airy(topo)[::-1], bounds_error=False, fill_value=None, method="cubic"
    )
    crust_geo = interp(np.stack([py, px], axis=-1))
    write_grid(tmp_path / "c_geo.tif", crust_geo, crs="EPSG:4326", west=lon0, north=lat1, cell=step)
    base = {"channel": {"thickness": "15 km", "viscosity": "1e19 Pa*s"}}
    runs = {}
    for name in ("c.tif", "c_geo.tif"):
        raw = dict(base, grids={"topography": "t.tif", "crust_thickness": name})
        runs[name] = crustflow.solve(crustflow.scenario_from_dict(raw, base_dir=tmp_path))
    a, b = runs["c.tif"], runs["c_geo.tif"]
    assert "bilinear" in b.attrs["crustflow_inputs"]
    inner = (slice(3, -3), slice(3, -3))
    np.testing.assert_allclose(
        b.crust_thickness.values[inner], a.crust_thickness.values[inner], atol=0.3
    )  # km: bilinear interpolation error of a smooth field


def test_nodata_stays_local(tmp_path):
    # An output cell that depends on a nodata input is nodata; nothing else is lost.
    x, y, h, *_ = gaussian_projected(n=41, cell=5e3)
    h = h.copy()
    h[20, 20] = np.nan
    ds = crustflow.compute_fields(
        grid(h, x, y, "EPSG:32633"),
        parameters=PARAMS,
        crust_thickness=grid(airy(np.nan_to_num(h)), x, y, "EPSG:32633"),
    )
    missing = ~np.isfinite(ds.flux_east.values)
    assert missing.sum() == 1 and missing[20, 20]
    assert np.isfinite(ds.thickening_rate.values).sum() == h.size - 1


def test_inputs_not_modified():
    x, y, h, *_ = gaussian_projected(n=31, cell=5e3)
    topo = grid(h.copy(), x, y, "EPSG:32633")
    crust = grid(airy(h), x, y, "EPSG:32633")
    before = topo.copy(deep=True), crust.copy(deep=True)
    crustflow.compute_fields(topo, parameters=PARAMS, crust_thickness=crust)
    xr.testing.assert_identical(topo, before[0])
    xr.testing.assert_identical(crust, before[1])
