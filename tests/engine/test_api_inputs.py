"""The Python API on rasters as users open them, and lazily with dask: the command's numbers.

References: the command's own output files (``crustflow run``) on the same inputs; the engine's one
code path makes them equal. Nodata handling as GDAL defines it (a tagged nodata value is no data).
"""

from __future__ import annotations

import dask.array as dsa
import numpy as np
import pytest
import rioxarray
import xarray as xr
from conftest import SCENARIO, airy, bump, write_grid

import crustflow
from crustflow import CrustflowInputError, ModelParameters
from crustflow.cli import main

THREE = ["flux_east", "flux_north", "thickening_rate"]


@pytest.fixture
def hole_dir(tmp_path):
    """Grids with a -9999 patch (tagged nodata) in the topography, and a scenario naming them."""
    topo = bump(shape=(36, 44))
    topo[10:14, 20:25] = np.nan  # written as -9999, tagged as nodata
    write_grid(tmp_path / "topo.tif", topo)
    write_grid(tmp_path / "crust.tif", airy(np.nan_to_num(topo, nan=200.0)))
    (tmp_path / "scenario.toml").write_text(SCENARIO)
    return tmp_path


def _command(folder, out):
    assert main(["run", str(folder / "scenario.toml"), "--out", str(out), "--quiet"]) == 0
    return xr.open_dataset(out / "fields.nc").load()


def test_open_rasterio_grids_equal_the_command_cell_for_cell(hole_dir, tmp_path):
    # As a user opens them: band dimension, nodata not masked.
    topo = rioxarray.open_rasterio(hole_dir / "topo.tif")
    crust = rioxarray.open_rasterio(hole_dir / "crust.tif")
    assert "band" in topo.dims and float(topo.min()) == -9999.0
    ds = crustflow.compute_fields(
        topo,
        parameters=ModelParameters(channel_thickness="15 km", viscosity="1e19 Pa*s"),
        crust_thickness=crust,
    )
    ref = _command(hole_dir, tmp_path / "out")
    for name in crustflow.VARIABLES:
        got, want = ds[name].values.astype("float32"), ref[name].values
        np.testing.assert_array_equal(np.isnan(got), np.isnan(want), err_msg=name)
        np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-30, err_msg=name)
    # the patch stays local: next to the hole the flux is that of the plateau, not of a 9 km cliff
    assert np.nanmax(np.abs(ds.flux_east.values)) < 1e4


def test_lon_lat_dimension_names(tmp_path):
    lon = 10.0 + 0.05 * np.arange(30) + 0.025
    lat = 47.0 - 0.05 * np.arange(24) - 0.025
    topo = bump(shape=(24, 30), cell=1.0, radius=9.0)
    da = xr.DataArray(topo, dims=("lat", "lon"), coords={"lat": lat, "lon": lon})
    da = da.rio.write_crs("EPSG:4326")
    crust = da.copy(data=airy(topo))
    ds = crustflow.compute_fields(
        da, parameters=ModelParameters(15e3, 1e19), crust_thickness=crust, variables=THREE
    )
    plain = crustflow.compute_fields(
        da.rename(lat="y", lon="x"),
        parameters=ModelParameters(15e3, 1e19),
        crust_thickness=crust.rename(lat="y", lon="x"),
        variables=THREE,
    )
    assert list(ds.data_vars) == THREE
    for name in THREE:
        np.testing.assert_array_equal(ds[name].values, plain[name].values)


def test_model_parameters_take_unit_strings():
    p = ModelParameters(channel_thickness="15 km", viscosity="1e19 Pa*s", wall_east="3.15576 mm/yr")
    assert p.channel_thickness == 15e3 and p.viscosity == 1e19
    assert np.isclose(p.wall_east, 1e-10)  # 3.15576 mm/yr in m/s (Julian year)
    with pytest.raises(CrustflowInputError, match="channel.viscosity"):
        ModelParameters(channel_thickness="15 km", viscosity="1e19 m")


def test_solve_with_chunks_is_lazy_and_equals_the_command(scenario_dir, tmp_path):
    scenario = crustflow.load_scenario(scenario_dir / "scenario.toml")
    ds = crustflow.solve(scenario, variables=THREE, chunks={"y": 7})
    assert list(ds.data_vars) == THREE
    for name in THREE:
        assert isinstance(ds[name].data, dsa.Array) and ds[name].dtype == np.float32
        assert ds[name].data.numblocks[0] == -(-ds.sizes["y"] // 7)
    ref = _command(scenario_dir, tmp_path / "out")
    computed = ds.compute()
    for name in THREE:
        np.testing.assert_array_equal(computed[name].values, ref[name].values, err_msg=name)
    # writable as it is
    ds.to_netcdf(tmp_path / "lazy.nc")
    with xr.open_dataset(tmp_path / "lazy.nc") as back:
        np.testing.assert_array_equal(back.flux_east.values, ref.flux_east.values)


def test_solve_honours_the_scenarios_output_variables(scenario_dir):
    text = SCENARIO + '[output]\nvariables = ["flux_east", "uplift_rate"]\n'
    (scenario_dir / "sel.toml").write_text(text)
    ds = crustflow.solve(crustflow.load_scenario(scenario_dir / "sel.toml"))
    assert list(ds.data_vars) == ["flux_east", "uplift_rate"]


def test_dask_inputs_stay_lazy_and_equal_eager(scenario_dir):
    topo = rioxarray.open_rasterio(scenario_dir / "topo.tif", chunks={"y": 9, "x": -1})
    crust = rioxarray.open_rasterio(scenario_dir / "crust.tif", chunks={"y": 9, "x": -1})
    params = ModelParameters(channel_thickness=15e3, viscosity=1e19)
    lazy = crustflow.compute_fields(topo, parameters=params, crust_thickness=crust, variables=THREE)
    assert all(isinstance(lazy[n].data, dsa.Array) for n in THREE)
    eager = crustflow.compute_fields(
        topo.compute(), parameters=params, crust_thickness=crust.compute(), variables=THREE
    )
    for name in THREE:
        np.testing.assert_array_equal(
            lazy[name].values, eager[name].values.astype("float32"), err_msg=name
        )


def test_lazy_solve_runs_on_a_distributed_cluster(scenario_dir):
    distributed = pytest.importorskip("dask.distributed")
    scenario = crustflow.load_scenario(scenario_dir / "scenario.toml")
    ds = crustflow.solve(scenario, variables=THREE, chunks={"y": 10})
    with (
        distributed.LocalCluster(
            n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None
        ) as cluster,
        distributed.Client(cluster),
    ):
        on_cluster = ds.compute()
    local = ds.compute(scheduler="synchronous")
    for name in THREE:
        np.testing.assert_array_equal(on_cluster[name].values, local[name].values)


def test_a_multiband_raster_is_refused(tmp_path):
    da = xr.DataArray(
        np.zeros((2, 5, 6)),
        dims=("band", "y", "x"),
        coords={"band": [1, 2], "y": np.arange(5.0)[::-1], "x": np.arange(6.0)},
    )
    with pytest.raises(CrustflowInputError, match="2 bands; select one"):
        crustflow.compute_fields(
            da.rio.write_crs("EPSG:32633"), parameters=ModelParameters(15e3, 1e19)
        )
