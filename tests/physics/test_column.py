"""Layered columns, channel placement, thin-channel check, wedge sample (sources named per test)."""

from __future__ import annotations

import tomllib

import numpy as np
import pytest

from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import GridGeometry
from crustflow.physics import column
from crustflow.physics import isostasy as load

G = 9.81
RHO_C, RHO_W = 2800.0, 1030.0


def projected(nx=41, ny=31, cell=5e3):
    x = 500e3 + cell * np.arange(nx)
    y = 5000e3 - cell * np.arange(ny)
    # No CRS: projected metres are ground metres (the load physics is under test here, not the
    # projection's scale factor, which tests/geometry/test_projection_factors.py covers).
    return GridGeometry(kind="projected", x=x, y=y), *np.meshgrid(x, y)


def overburden(h, t, z, layers, **kw):
    kw = {"rho_crust": RHO_C, "rho_water": RHO_W, "gravity": G} | kw
    return column.roof_overburden(h, t, z, layers=layers, **kw)


# ----------------------------------------------------------------------------------------------
# roof_overburden


def test_layered_column_hand_sum():
    # Lithostatic sum by hand (SCIENCE.md: g times the integral of density over the stack).
    # Offshore: 2 km of water, 3 km of sediments (2400), 1 km of lavas (2600), then crust to 20 km.
    layers = [("sediments", 3000.0, 2400.0), ("lavas", 1000.0, 2600.0)]
    p, ok = overburden(np.array(-2000.0), np.array(30e3), np.array(20e3), layers)
    by_hand = G * (1030 * 2000 + 2400 * 3000 + 2600 * 1000 + 2800 * (20000 - 2000 - 4000))
    assert float(p) == pytest.approx(by_hand, rel=1e-14)
    assert bool(ok)
    # On land: 1.5 km above sea level, same roof, channel top 25 km below sea level.
    p, ok = overburden(np.array(1500.0), np.array(45e3), np.array(25e3), layers)
    by_hand = G * (2400 * 3000 + 2600 * 1000 + 2800 * (25000 + 1500 - 4000))
    assert float(p) == pytest.approx(by_hand, rel=1e-14)


def test_no_layers_equals_uniform_crust_formula():
    # SCIENCE.md: P_top = g (rho_w max(0, -H) + rho_c (z_top + H)), as load.overburden_pressure.
    h = np.array([[-2500.0, -10.0, 0.0, 800.0, 4500.0]])
    t = np.array([[20e3, 30e3, 35e3, 40e3, 70e3]])
    z_top = load.channel_top_depth(h, t, 15e3)
    p, ok = overburden(h, t, z_top, [])
    ref = load.overburden_pressure(h, t, 15e3, rho_crust=RHO_C, rho_water=RHO_W, gravity=G)
    np.testing.assert_allclose(p, ref, rtol=1e-14)
    assert ok.all()


def test_two_equal_density_layers_equal_one_layer_of_summed_thickness():
    # Invariant (additivity of the lithostatic integral).
    rng = np.random.default_rng(5)
    h = rng.uniform(-3000, 3000, (6, 7))
    t = rng.uniform(30e3, 50e3, (6, 7))
    z = t - h - 10e3
    a, b = rng.uniform(0, 2000, (2, 6, 7))
    two, _ = overburden(h, t, z, [(a, 2300.0), (b, 2300.0)])
    one, _ = overburden(h, t, z, [{"thickness": a + b, "density": 2300.0, "name": "both"}])
    np.testing.assert_allclose(two, one, rtol=1e-13)


def test_density_grid_for_the_crust():
    # Lithostatic sum by hand, cell by cell, with a crust density grid.
    rho = np.array([2700.0, 2900.0])
    p, _ = overburden(
        np.array([0.0, 0.0]), np.array([30e3, 30e3]), 10e3, [(1e3, 2500.0)], rho_crust=rho
    )
    np.testing.assert_allclose(p, G * (2500 * 1e3 + rho * 9e3), rtol=1e-14)


def test_roof_thicker_than_column_is_refused_or_flagged():
    # Definition: the roof layers must end above the channel top (crust material fills the rest).
    h = np.array([-1000.0, -1000.0, 200.0])
    t = np.full(3, 25e3)
    z = np.array([5000.0, 3000.0, 2000.0])  # solid column above the top: 4, 2, 2.2 km
    layers = [("sediments", 1500.0, 2400.0), ("lavas", np.array([500.0, 1000.0, 800.0]), 2600.0)]
    with pytest.raises(
        CrustflowInputError,
        match=r"^roof layer 'lavas' reaches below the channel top in 2 cells \(roof 2\.5 km thick "
        r"where the column above the channel top is 2 km\); thin the roof layers or place the "
        r"channel deeper",
    ):
        overburden(h, t, z, layers)
    p, ok = overburden(h, t, z, layers, strict=False)
    np.testing.assert_array_equal(ok, [True, False, False])
    # Flagged cells keep the lithostatic integral of the stack clipped at z_top (hand sum).
    assert p[1] == pytest.approx(G * (1030 * 1000 + 2400 * 1500 + 2600 * 500), rel=1e-14)


def test_top_below_moho_or_above_surface_flagged():
    # Definition (column docstring): the channel top must lie in the crust.
    h = np.array([0.0, 0.0, 500.0])
    t = np.array([30e3, 30e3, 30e3])
    z = np.array([20e3, 31e3, -600.0])
    _, ok = overburden(h, t, z, [])
    np.testing.assert_array_equal(ok, [True, False, False])


def test_negative_layer_thickness_refused():
    # Error message pinned (STYLE.md 6).
    with pytest.raises(
        CrustflowInputError, match=r"roof layer 'sediments' has negative thickness in 1 cells"
    ):
        overburden(
            np.zeros(2), np.full(2, 3e4), 1e4, [("sediments", np.array([10.0, -5.0]), 2400.0)]
        )
    with pytest.raises(CrustflowInputError, match=r"roof layer 'layer 1' density must be positive"):
        overburden(0.0, 3e4, 1e4, [(10.0, 0.0)])


# ----------------------------------------------------------------------------------------------
# driving gradient on the layered column


def test_denser_channel_on_tilted_moho_under_a_roof():
    # Value derived from SCIENCE.md: flat surface, uniform roof, Moho tilted by s, channel the lowest
    # h of the crust: P_top = g (rho_r r + rho_c (T - h - r)), z_top = T - H - h, so
    # G = grad(P_top) - rho_ch g grad(z_top) = (rho_c - rho_ch) g grad(T).
    assert column.driving_gradient_general is load.driving_gradient
    geom, x, y = projected()
    s = 0.05
    t = 40e3 + s * (x - x.min())
    h = np.full_like(t, -800.0)
    rho_ch = 2950.0
    chan = column.channel_geometry(h, t, placement="crust-base", thickness=15e3)
    assert chan.valid.all() and chan.invalid_cells == 0
    p, ok = overburden(h, t, chan.top_depth, [("sediments", 2000.0, 2400.0)])
    ge, gn = column.driving_gradient_general(p, chan.top_depth, geom, rho_channel=rho_ch, gravity=G)
    np.testing.assert_allclose(ge, (RHO_C - rho_ch) * G * s, rtol=1e-9)
    np.testing.assert_allclose(gn, 0.0, atol=1e-9)


def test_sediment_thickening_drives_from_light_to_heavy():
    # Value derived from SCIENCE.md: flat sea floor and Moho, roof thickness r growing by s per m,
    # channel of the crust's density: lighter sediment replaces crust in the column, so
    # G = (rho_r - rho_c) g grad(r).
    geom, x, y = projected()
    s = 0.02
    r = 1000.0 + s * (y - y.min())
    h = np.full_like(r, -2000.0)
    t = np.full_like(r, 30e3)
    chan = column.channel_geometry(h, t, thickness=10e3)
    p, _ = overburden(h, t, chan.top_depth, [("sediments", r, 2400.0)])
    ge, gn = load.driving_gradient(p, chan.top_depth, geom, rho_channel=RHO_C, gravity=G)
    np.testing.assert_allclose(gn, (2400.0 - RHO_C) * G * s, rtol=1e-9)
    np.testing.assert_allclose(ge, 0.0, atol=1e-9)


# ----------------------------------------------------------------------------------------------
# channel_geometry


def test_placement_depths_thickness_and_flags():
    # Definitions (column.channel_geometry): thickness = base - top; invalid where not positive,
    # where the top is not below the surface, or where the base is below the Moho.
    h = np.array([-1000.0, -1000.0, 500.0, 500.0, np.nan])
    t = np.full(5, 20e3)  # Moho at 21 km offshore, 19.5 km on land
    top = np.array([4e3, 6e3, -600.0, 10e3, 5e3])
    base = np.array([6e3, 5e3, 2e3, 19.6e3, 7e3])
    chan = column.channel_geometry(h, t, placement="depths", top_depth=top, base_depth=base)
    np.testing.assert_allclose(chan.thickness[:4], [2e3, -1e3, 2.6e3, 9.6e3])
    np.testing.assert_array_equal(chan.valid, [True, False, False, False, False])
    assert chan.invalid_cells == 3  # the nodata cell is not counted


def test_placement_fixed_depth_thickness_and_flags():
    # Definition: top at the given depth, base at the Moho z_M = T - H.
    h = np.array([0.0, 2000.0, -3000.0])
    t = np.array([30e3, 50e3, 10e3])  # Moho 30, 48, 13 km
    chan = column.channel_geometry(h, t, placement="fixed-depth", top_depth=20e3)
    np.testing.assert_allclose(chan.thickness, [10e3, 28e3, -7e3])
    np.testing.assert_allclose(chan.top_depth, 20e3)
    np.testing.assert_array_equal(chan.valid, [True, True, False])
    assert chan.invalid_cells == 1


def test_placement_crust_base_grid_thickness():
    # Definition: the lowest h of the crust, z_top = T - H - h (load.channel_top_depth).
    h = np.array([1000.0, 1000.0])
    t = np.array([40e3, 40e3])
    chan = column.channel_geometry(h, t, thickness=np.array([10e3, 40e3]))
    np.testing.assert_allclose(chan.top_depth, load.channel_top_depth(h, t, np.array([10e3, 40e3])))
    np.testing.assert_array_equal(chan.valid, [True, False])  # h = T: no roof left


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        (
            {"placement": "depths", "top_depth": 8e3, "base_depth": np.array([5e3, 8e3])},
            r"channel\.base_depth is not below channel\.top_depth in any cell; .* not swapped",
        ),
        (
            {"placement": "fixed-depth", "top_depth": 60e3},
            r"channel\.top_depth lies below the Moho in every cell",
        ),
        (
            {"placement": "crust-base", "thickness": -1.0},
            r"channel\.thickness is not positive in any cell",
        ),
        (
            {"placement": "moho"},
            r"channel\.placement 'moho' is not known; choose one of 'crust-base', 'depths', "
            r"'fixed-depth'",
        ),
        (
            {"placement": "depths", "top_depth": 5e3},
            r"channel\.placement 'depths' needs channel\.base_depth; add it",
        ),
        (
            {"placement": "fixed-depth", "top_depth": 5e3, "thickness": 3e3},
            r"channel\.thickness is not used with channel\.placement 'fixed-depth'; remove it",
        ),
    ],
)
def test_channel_geometry_errors(kwargs, match):
    # Error messages pinned (STYLE.md 6).
    with pytest.raises(CrustflowInputError, match=match):
        column.channel_geometry(np.zeros(2), np.full(2, 30e3), **kwargs)


# ----------------------------------------------------------------------------------------------
# short_wavelength_mask


def cosine_grid(nx=120, ny=30, cell=1e3):
    x = cell * (np.arange(nx) + 0.5)  # first cell edge at 0: whole half-periods mirror exactly
    y = cell * (np.arange(ny) + 0.5)
    return GridGeometry(kind="projected", x=x, y=y), *np.meshgrid(x, y)


@pytest.mark.parametrize(("periods", "flagged"), [(50, True), (42, True), (38, False), (30, False)])
def test_short_wavelength_mask_sinusoid(periods, flagged):
    # Value derived (column.SHORT_WAVE_RATIO): a sinusoid is flagged exactly when its wavelength is
    # below factor * h = 3 km; 120 km / 50 = 2.4 km, / 42 = 2.86 km, / 38 = 3.16 km, / 30 = 4 km.
    geom, x, _ = cosine_grid()
    p = 1e6 * np.cos(2 * np.pi * periods * x / 120e3)
    mask = column.short_wavelength_mask(p, geom, 1000.0)
    assert mask.all() if flagged else not mask.any()


def test_short_wavelength_mask_leaves_smooth_loads_alone():
    # Invariant of the criterion (column.short_wavelength_mask Notes): loads whose features are much
    # wider than 3 h are not flagged, next to the edges included; nodata is never flagged.
    geom, x, y = cosine_grid()
    h = 2000.0
    for p in (
        3e4 * x,
        3e4 * (x + 2 * y),
        1e8 * np.tanh((x - 60e3) / 8e3),
        1e8 * np.exp(-((x - 60e3) ** 2 + (y - 15e3) ** 2) / (2 * 10e3**2)),
        np.full(geom.shape, 2e8),
    ):
        assert not column.short_wavelength_mask(p, geom, h).any()
    p = 1e6 * np.cos(2 * np.pi * x / 2e3)
    p[:, :5] = np.nan
    mask = column.short_wavelength_mask(p, geom, h)
    assert not mask[:, :5].any() and mask[:, 10:].all()


def test_short_wavelength_mask_bad_factor():
    # Error message pinned (STYLE.md 6).
    geom, x, _ = cosine_grid(10, 5)
    with pytest.raises(CrustflowInputError, match=r"factor is -1\.0; give the shortest acceptable"):
        column.short_wavelength_mask(x, geom, 1e3, factor=-1.0)


# ----------------------------------------------------------------------------------------------
# the wedge sample


def test_wedge_sample_writes_a_consistent_small_scenario(tmp_path):
    # Invented data (crustflow/wedge_sample.py): files written, read back, small, and the column
    # consistent (roof ends at the salt top, salt within the crust).
    import rasterio

    from crustflow.samples.wedge import write_wedge_sample

    scenario = write_wedge_sample(tmp_path / "wedge")
    folder = scenario.parent
    names = ["topography", "crust_thickness", "sediments", "salt_top", "salt_base"]
    grids = {}
    for name in names:
        with rasterio.open(folder / f"{name}.tif") as src:
            assert src.crs.to_epsg() == 32625 and src.shape == (70, 100)
            grids[name] = src.read(1).astype(float)
    assert sum(p.stat().st_size for p in folder.iterdir()) < 1_000_000
    assert "invented" in (folder / "README.md").read_text()
    spec = tomllib.loads(scenario.read_text())
    assert spec["roof"]["layers"][0]["thickness"] == {"grid": "sediments.tif", "units": "m"}
    assert spec["channel"]["placement"] == "depths"
    h, t = grids["topography"], grids["crust_thickness"]
    assert (h < 0).all()
    chan = column.channel_geometry(
        h, t, placement="depths", top_depth=grids["salt_top"], base_depth=grids["salt_base"]
    )
    assert chan.valid.all()
    assert 1400 < chan.thickness.min() and chan.thickness.max() < 2600
    p, ok = column.roof_overburden(
        h,
        t,
        chan.top_depth,
        layers=[("sediments", grids["sediments"], 2400.0)],
        rho_crust=2750.0,
        rho_water=RHO_W,
        gravity=G,
    )
    assert ok.all()
    sed = grids["sediments"].mean(axis=0)
    assert sed[0] < 1000 and sed[:60].max() > 4500  # thickening seaward (east) to ~5 km
