"""Load model: overburden, driving gradient, Airy relations (sources named per test)."""

from __future__ import annotations

import numpy as np
import pytest

from crustflow.geometry.grid import GridGeometry
from crustflow.physics import isostasy as load

G = 9.81
RHO_C, RHO_M, RHO_W = 2800.0, 3300.0, 1030.0


def projected(nx=41, ny=31, cell=5e3):
    x = 500e3 + cell * np.arange(nx)
    y = 5000e3 - cell * np.arange(ny)
    # No CRS: projected metres are ground metres (the load physics is under test here, not the
    # projection's scale factor, which tests/geometry/test_projection_factors.py covers).
    return GridGeometry(kind="projected", x=x, y=y), *np.meshgrid(x, y)


def test_airy_root_ratio():
    # Turcotte & Schubert (2002) section 2.2: root / elevation = rho_c / (rho_m - rho_c) = 5.6.
    assert load.airy_root(1000.0, RHO_C, RHO_M) / 1000.0 == pytest.approx(5.6)


def test_airy_columns_balance():
    # Hand-computed lithostatic sums to the reference Moho depth (Turcotte & Schubert 2002, 2.2):
    # each column weighs the same as the reference crust of 35 km.
    t0 = 35e3
    for h in (2000.0, -3000.0):
        t = float(load.crust_thickness_airy(np.array(h), t0, RHO_C, RHO_M, RHO_W))
        depth = max(t0, t - h)  # compensation depth below sea level
        water = max(0.0, -h)
        column = RHO_W * water + RHO_C * t + RHO_M * (depth - (t - h))
        reference = RHO_C * t0 + RHO_M * (depth - t0)
        assert column == pytest.approx(reference, rel=1e-12)


def test_uniform_crust_reduces_to_rho_c_g_grad_h():
    # SCIENCE.md / Bird (1991): G = rho_c g grad(H) for a uniform crust with rho_ch = rho_c.
    geom, x, y = projected()
    h_surf = 1000.0 + 2e-3 * (x - x.min()) - 1e-3 * (y - y.min())
    t = 40e3 + 3e-2 * (x - x.min()) + 0.01 * (y - y.min())  # Moho not isostatic: cancels anyway
    p = load.overburden_pressure(h_surf, t, 15e3, rho_crust=RHO_C, rho_water=RHO_W, gravity=G)
    z = load.channel_top_depth(h_surf, t, 15e3)
    ge, gn = load.driving_gradient(p, z, geom, rho_channel=RHO_C, gravity=G)
    np.testing.assert_allclose(ge, RHO_C * G * 2e-3, rtol=1e-10)
    np.testing.assert_allclose(gn, RHO_C * G * -1e-3, rtol=1e-10)


def test_channel_density_term_on_tilted_moho():
    # Value derived from SCIENCE.md: flat surface, Moho tilted by s, channel denser than the crust:
    # G = (rho_c - rho_ch) g grad(T).
    geom, x, y = projected()
    s = 0.05
    t = 40e3 + s * (x - x.min())
    h_surf = np.full_like(t, 500.0)
    rho_ch = 2900.0
    p = load.overburden_pressure(h_surf, t, 15e3, rho_crust=RHO_C, rho_water=RHO_W, gravity=G)
    z = load.channel_top_depth(h_surf, t, 15e3)
    ge, gn = load.driving_gradient(p, z, geom, rho_channel=rho_ch, gravity=G)
    np.testing.assert_allclose(ge, (RHO_C - rho_ch) * G * s, rtol=1e-10)
    np.testing.assert_allclose(gn, 0.0, atol=1e-9)


def test_water_load():
    # Lithostatic sum by hand (SCIENCE.md): 2 km of sea water over 20 km of crust above the channel.
    p = load.overburden_pressure(
        np.array(-2000.0), np.array(35e3), 15e3, rho_crust=RHO_C, rho_water=RHO_W, gravity=G
    )
    assert float(p) == pytest.approx(G * (RHO_W * 2000.0 + RHO_C * 20e3), rel=1e-14)


def test_uplift_factors():
    # SCIENCE.md (Airy compensation): land (1 - rho_ch/rho_m), water (rho_m - rho_ch)/(rho_m - rho_w).
    rate = np.array([1.0, 1.0])
    up = load.uplift_rate(
        rate, np.array([100.0, -100.0]), rho_channel=RHO_C, rho_mantle=RHO_M, rho_water=RHO_W
    )
    np.testing.assert_allclose(up, [1 - RHO_C / RHO_M, (RHO_M - RHO_C) / (RHO_M - RHO_W)])
