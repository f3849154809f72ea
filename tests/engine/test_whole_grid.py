"""The whole-grid load step out of core equals the in-memory one (sources named per test).

The out-of-core filter is the in-memory DCT filter done separably through scratch files, so it is
compared with :func:`crustflow.physics.flexure.wavenumber_filter` to rounding (1e-12 of the field's
range), and, as a second opinion from general-purpose libraries and published formulas, with
``scipy.ndimage.gaussian_filter`` and with the flexure of a plate under a line load
(Turcotte & Schubert 2002, chapter 3).
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from conftest import SCENARIO, airy, bump, write_grid
from scipy import ndimage

import crustflow
from crustflow.cli import main
from crustflow.engine import outofcore, strips
from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import GridGeometry, grid_geometry
from crustflow.io.scratch import ScratchGrid
from crustflow.physics import flexure
from crustflow.variables import VARIABLES

G = 9.81
DRHO = 600.0  # restoring density contrast, kg/m^3 (invented test value)


def projected(nx, ny, cell):
    x = cell * (np.arange(nx) + 0.5)
    y = cell * (np.arange(ny) + 0.5)[::-1]
    return GridGeometry(kind="projected", x=x, y=y, spacing=(cell, -cell))


def out_of_core(field, geometry, response, tmp_path, tile=16, **kw) -> np.ndarray:
    """Filter ``field`` through scratch files with tiles of ``tile`` cells (many bands)."""
    ny, nx = field.shape
    src = ScratchGrid(tmp_path / "src.bin", ny, nx, tile)
    dst = ScratchGrid(tmp_path / "dst.bin", ny, nx, tile)
    for r0 in src.bands():
        src.write_rows(r0, field[r0 : r0 + tile])
    outofcore.filter_scratch(src, dst, flexure.local_frame(geometry), response, **kw)
    out = dst.read_rows(0, ny)
    src.close()
    dst.close()
    return out


def test_scratch_grid_round_trip_by_rows_and_columns(tmp_path):
    # Definition of the store: what is written by bands of rows reads back by any rows and by
    # bands of columns, on a shape that is not a multiple of the tile.
    rng = np.random.default_rng(0)
    values = rng.normal(size=(37, 29))
    grid = ScratchGrid(tmp_path / "g.bin", 37, 29, 8)
    for r0 in grid.bands():
        grid.write_rows(r0, values[r0 : r0 + 8])
    np.testing.assert_array_equal(grid.read_rows(0, 37), values)
    np.testing.assert_array_equal(grid.read_rows(5, 22), values[5:22])
    for band in range(grid.tile_cols):
        np.testing.assert_array_equal(grid.read_columns(band), values[:, band * 8 : band * 8 + 8])
        grid.write_columns(band, -values[:, band * 8 : band * 8 + 8])
    np.testing.assert_array_equal(grid.read_rows(0, 37), -values)
    with pytest.raises(ValueError, match="not aligned"):
        grid.write_rows(3, values[3:11])
    grid.close()
    assert not (tmp_path / "g.bin").exists()


@pytest.mark.parametrize("kind", ["gaussian", "flexure"])
def test_out_of_core_filter_equals_whole_grid_filter(tmp_path, kind):
    # Identity of the two paths: the separable DCT through scratch files is the same linear map as
    # scipy.fft.dctn on the whole grid (Makhoul 1980); rounding only. Nodata within the fill halo.
    rng = np.random.default_rng(1)
    geom = projected(45, 38, 2e3)
    field = ndimage.gaussian_filter(rng.normal(size=geom.shape), 1.5) * 1e7 + 3e8
    field[10:13, 20:24] = np.nan
    field[0, :5] = np.nan
    if kind == "gaussian":
        response = flexure.gaussian_response(5e3)
        ref = flexure.gaussian_smoothing(field, geom, sigma=5e3)
    else:
        response = flexure.elastic_lid_response(
            elastic_thickness=5e3, density_contrast=DRHO, gravity=G
        )
        ref = flexure.flexural_filter(
            field, geom, elastic_thickness=5e3, density_contrast=DRHO, gravity=G
        )
    ours = out_of_core(field, geom, response, tmp_path)
    np.testing.assert_array_equal(np.isnan(ours), np.isnan(field))
    span = np.nanmax(field) - np.nanmin(field)
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12 * span)


def test_out_of_core_gaussian_on_a_geographic_grid(tmp_path):
    # Same identity on a lon/lat grid: both paths use the local frame of the whole grid.
    geom = grid_geometry(np.linspace(10.0, 11.0, 33), np.linspace(46.0, 45.2, 27), "EPSG:4326")
    rng = np.random.default_rng(2)
    field = ndimage.gaussian_filter(rng.normal(size=geom.shape), 2.0)
    ours = out_of_core(field, geom, flexure.gaussian_response(6e3), tmp_path)
    ref = flexure.gaussian_smoothing(field, geom, sigma=6e3)
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12 * np.ptp(field))


def test_out_of_core_gaussian_against_scipy_ndimage(tmp_path):
    # General-purpose library as second opinion: scipy.ndimage.gaussian_filter, mode "reflect"
    # (the half-sample mirror of the DCT-II), kernel truncated at 10 sigma; the differences come
    # from sampling the kernel and are far below 1e-6 of the field for sigma = 4 cells.
    rng = np.random.default_rng(3)
    geom = projected(64, 48, 1e3)
    field = ndimage.gaussian_filter(rng.normal(size=geom.shape), 2.0)
    ours = out_of_core(field, geom, flexure.gaussian_response(4e3), tmp_path)
    ref = ndimage.gaussian_filter(field, 4.0, mode="reflect", truncate=10.0)
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-6 * np.abs(field).max())


def test_out_of_core_flexure_line_load_first_zero(tmp_path):
    # Turcotte & Schubert (2002) ch. 3, continuous plate under a line load V0:
    # w = w0 exp(-|x|/alpha) (cos(x/alpha) + sin(|x|/alpha)), w0 = V0 alpha^3 / (8 D), first zero at
    # 3 pi alpha / 4; the deflection is the transmitted load over drho g.
    te = 20e3
    d = flexure.flexural_rigidity(te)
    alpha = flexure.flexural_parameter(d, DRHO, G)
    cell, nx = 2e3, 1001  # +-1000 km, about 11 alpha each way
    geom = projected(nx, 20, cell)
    load = np.zeros(geom.shape)
    centre = nx // 2
    load[:, centre] = 1e12 / cell
    response = flexure.elastic_lid_response(elastic_thickness=te, density_contrast=DRHO, gravity=G)
    w = out_of_core(load, geom, response, tmp_path, tile=64)[7] / (DRHO * G)
    dist = (np.arange(nx) - centre) * cell
    right = w[centre:]
    i = int(np.argmax(right < 0))
    zero = dist[centre + i - 1] + cell * right[i - 1] / (right[i - 1] - right[i])
    assert abs(zero - 3 * np.pi * alpha / 4) < 0.01 * alpha
    assert w[centre] == pytest.approx(1e12 * alpha**3 / (8 * d), rel=0.02)


def test_far_nodata_takes_the_fallback_and_stays_nodata(tmp_path):
    # Definition (crustflow.engine.outofcore, point 3): a band whose window holds no data is
    # filled with the fallback; the output is NaN there and finite elsewhere.
    geom = projected(20, 64, 1e3)
    field = np.full(geom.shape, 5.0)
    field[:40] = np.nan
    ours = out_of_core(
        field, geom, flexure.gaussian_response(2e3), tmp_path, fallback=5.0, fill_halo=2
    )
    assert np.isnan(ours[:40]).all()
    np.testing.assert_allclose(ours[40:], 5.0, rtol=1e-12)


def _scenario(tmp_path, load_table: str, nodata: bool = False, shape=(41, 37)):
    topo = bump(shape=shape, cell=5e3, radius=60e3)
    rng = np.random.default_rng(4)
    topo = topo + 40.0 * rng.normal(size=topo.shape)  # short-wavelength roughness: some flags
    if nodata:
        topo[3:6, 30:34] = np.nan
    write_grid(tmp_path / "topo.tif", topo)
    write_grid(tmp_path / "crust.tif", airy(np.nan_to_num(topo, nan=200.0)))
    (tmp_path / "scenario.toml").write_text(SCENARIO + load_table)
    return tmp_path / "scenario.toml"


@pytest.mark.parametrize(
    "load_table, nodata, shape",
    [
        ('[load]\nsmoothing = "8 km"\nelastic_thickness = "10 km"\n', True, (41, 37)),
        ("", False, (41, 37)),
        ('[load]\nsmoothing = "8 km"\n', False, (33, 20)),  # a last band of one row
    ],
)
def test_command_above_the_in_memory_limit_equals_api(
    tmp_path, monkeypatch, load_table, nodata, shape
):
    # A grid above a lowered in-memory limit runs the filters and writes thin_channel_warning out
    # of core (nothing refused or dropped); the files equal crustflow.solve (whole grid in memory)
    # to float32 rounding (the filtered load agrees to 1e-12, see the test above), the flag exactly.
    path = _scenario(tmp_path, load_table, nodata, shape)
    monkeypatch.setattr(strips, "IN_MEMORY_CELLS", 100)
    monkeypatch.setattr(outofcore, "scratch_tile", lambda h, w: 16)
    monkeypatch.setattr(outofcore, "PIECE_CELLS", 5 * shape[1])  # pieces of 5 rows in the bands
    out = tmp_path / "out"
    assert main(["run", str(path), "--out", str(out), "--quiet", "--strip-rows", "7"]) == 0
    assert not list(out.glob(".scratch-*"))  # scratch files removed with their folder
    whole = crustflow.solve(crustflow.load_scenario(path))
    if not load_table:  # the rough, unfiltered load has flagged cells
        assert np.nansum(whole["thin_channel_warning"].values) > 0
    with xr.open_dataset(out / "fields.nc") as ds:
        for name in VARIABLES:
            want = whole[name].values.astype("float32")
            got = ds[name].values.astype("float32")
            np.testing.assert_array_equal(np.isnan(got), np.isnan(want), err_msg=name)
            if name in ("thin_channel_warning", "backflow", "solver_converged"):
                np.testing.assert_array_equal(got, want, err_msg=name)
            else:
                scale = np.nanmax(np.abs(want)) or 1.0
                np.testing.assert_allclose(got, want, rtol=2e-6, atol=1e-6 * scale, err_msg=name)


def test_scratch_space_is_checked_before_the_step(tmp_path, monkeypatch):
    # A disk without room for the scratch files is refused before anything is written.
    path = _scenario(tmp_path, "")
    monkeypatch.setattr(strips, "IN_MEMORY_CELLS", 100)

    class Full:
        free = 1000

    monkeypatch.setattr(outofcore.shutil, "disk_usage", lambda folder: Full())
    scenario = crustflow.load_scenario(path)
    with outofcore.BlockReader(scenario) as reader:
        with pytest.raises(CrustflowInputError, match=r"needs about .* GB of scratch space"):
            outofcore.out_of_core_load(reader, tmp_path, filtered=False, thin_channel=True)


def test_local_cluster_gets_the_rows_it_needs(tmp_path, monkeypatch):
    # dask.distributed LocalCluster with 2 worker processes: each strip's rows of the out-of-core
    # load travel to the workers in memory (ScratchLoad.part); files identical to the serial run.
    path = _scenario(tmp_path, '[load]\nsmoothing = "8 km"\n', True)
    monkeypatch.setattr(strips, "IN_MEMORY_CELLS", 100)
    monkeypatch.setattr(outofcore, "scratch_tile", lambda h, w: 16)
    args = ["run", str(path), "--quiet", "--strip-rows", "7", "--out"]
    assert main([*args, str(tmp_path / "a")]) == 0
    assert main([*args, str(tmp_path / "b"), "--workers", "2"]) == 0
    with (
        xr.open_dataset(tmp_path / "a" / "fields.nc") as a,
        xr.open_dataset(tmp_path / "b" / "fields.nc") as b,
    ):
        for name in a.data_vars:
            np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)
